"""Per-parameter mixing at the cursor snapshot, worst first (largest R̂, then smallest ESS)."""

from __future__ import annotations

from rich.text import Text
from textual.widgets import DataTable

from . import fmt
from .fmt import BAD, GOOD
from .loader import View

COLUMNS = (("param", "parameter"), ("mean", "mean"), ("mcse", "MCSE"), ("rhat", "R̂"),
           ("ess_bulk", "ESS bulk"), ("ess_tail", "ESS tail"))

RHAT_GOAL = 1.01  # Vehtari et al. (2021)


def worst_first(rows: list[dict]) -> list[dict]:
    def key(r):
        rhat = r.get("rhat") if fmt.ok(r.get("rhat")) else float("inf")
        ess = min([v for v in (r.get("ess_bulk"), r.get("ess_tail")) if fmt.ok(v)] or [float("inf")])
        return (-rhat, ess, r.get("param", ""))

    return sorted(rows, key=key)


class MixingTable(DataTable):
    def __init__(self, **kw):
        super().__init__(cursor_type="row", **kw)
        self.shown: list[tuple] = []

    def on_mount(self) -> None:
        for key, label in COLUMNS:
            self.add_column(label, key=key)

    def show_view(self, view: View) -> None:
        rows = []
        for r in worst_first(view.mixing):
            rhat = r.get("rhat")
            rows.append((
                Text(str(r.get("param")), style="bold"),
                fmt.g3(r.get("mean")),
                fmt.g3(r.get("mcse")),
                Text(fmt.f3(rhat), style=BAD if fmt.ok(rhat) and rhat > RHAT_GOAL else GOOD),
                fmt.whole(r.get("ess_bulk")),
                fmt.whole(r.get("ess_tail")),
            ))
        plain = [tuple(str(c) for c in row) for row in rows]
        if plain == self.shown:
            return
        cursor = self.cursor_row
        if len(plain) == len(self.shown):  # same size: rewrite cells in place
            for i, row in enumerate(rows):
                for (key, _), cell in zip(COLUMNS, row):
                    self.update_cell(f"r{i}", key, cell)
        else:
            self.clear()
            for i, row in enumerate(rows):
                self.add_row(*row, key=f"r{i}")
            if rows:
                self.move_cursor(row=min(cursor, len(rows) - 1))
        self.shown = plain
