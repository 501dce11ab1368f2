"""The list of runs: the stored state (with a glyph), draws over all chains, current LOO
elpd, data set. Every cell is a ``rich.text.Text`` so names from input never pass through markup."""

from __future__ import annotations

from rich.text import Text
from textual.message import Message
from textual.widgets import DataTable

from . import fmt
from .loader import View

COLUMNS = (("run", "run"), ("state", "state"), ("draws", "all draws"), ("elpd", "LOO elpd"),
           ("dataset", "data"))


class RunList(DataTable):
    """One row per run, updated cell by cell (rows are added, never rebuilt)."""

    class Picked(Message):
        """The user moved to another run."""

        def __init__(self, run: str):
            super().__init__()
            self.run = run

    def __init__(self, **kw):
        super().__init__(cursor_type="row", zebra_stripes=False, **kw)
        self._rows: list[str] = []

    def on_mount(self) -> None:
        for key, label in COLUMNS:
            self.add_column(label, key=key)

    @staticmethod
    def cells(run: dict) -> dict:
        snap = run.get("latest") or {}
        word, colour = fmt.state_word(run.get("state"))
        return {
            "run": Text(fmt.safe(run["name"]), style="bold"),
            "state": Text(word, style=colour),
            "draws": Text(fmt.whole(snap.get("draws")), justify="right"),
            "elpd": Text(fmt.f2(snap.get("loo_elpd")), justify="right"),
            # a refit is part of its run, never a model of its own: say whose
            "dataset": Text(fmt.safe(run.get("dataset") or "—")) if not run.get("refit_of")
            else Text("↳ refit of " + fmt.safe(run["refit_of"]), style="italic"),
        }

    def show_view(self, view: View) -> None:
        names = [r["name"] for r in view.runs]
        for name in [n for n in self._rows if n not in names]:
            self.remove_row(name)
            self._rows.remove(name)
        for run in view.runs:
            cells = self.cells(run)
            if run["name"] in self._rows:
                old = self.get_row(run["name"])
                for (key, _), new, prev in zip(COLUMNS, cells.values(), old):
                    if str(new) != str(prev) or new.style != getattr(prev, "style", None):
                        self.update_cell(run["name"], key, new, update_width=True)
            else:
                self.add_row(*cells.values(), key=run["name"])
                self._rows.append(run["name"])

    def on_data_table_row_highlighted(self, event: DataTable.RowHighlighted) -> None:
        event.stop()
        if event.row_key is not None and event.row_key.value is not None:
            self.post_message(self.Picked(event.row_key.value))

    def step(self, delta: int) -> None:
        if self.row_count:
            self.move_cursor(row=max(0, min(self.row_count - 1, self.cursor_row + delta)))
