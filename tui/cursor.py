"""The time cursor bar: which run and snapshot every panel shows, and whether it is the latest."""

from __future__ import annotations

from rich.text import Text
from textual.widgets import Static

from . import fmt
from .fmt import ACCENT, DIM
from .loader import View


def cursor_text(view: View | None, live: bool) -> Text:
    t = Text(no_wrap=True, overflow="ellipsis")
    t.append(" chainvigil ", style="bold #1e222a on #7fd1b9")
    t.append(" ")
    if view is None:
        t.append("reading the history…", style=DIM)
        return t
    if view.run is None:
        t.append(view.problem or "no runs yet", style=DIM)
        return t
    run = view.run
    s = view.snap
    if s is not None:
        if view.at_latest and view.following and live:
            t.append(" ● LIVE ", style=f"bold #1e222a on {ACCENT}")
        elif view.at_latest:
            t.append(" newest ", style="bold #1e222a on #8b95a7")
        else:
            t.append(f" ◀ PAST: {view.n_snapshots - s['seq']} newer ", style="bold #1e222a on #e5c07b")
        t.append(" ")
    t.append(run["name"], style="bold")
    t.append("  ")
    if s is None:
        t.append("no snapshots yet", style=DIM)
        return t
    t.append(f"snapshot {s['seq']}/{view.n_snapshots}", style="bold")
    t.append(f" · {fmt.clock(s.get('time'))} · {fmt.whole(s.get('draws_per_chain'))}/chain", style=DIM)
    if run.get("title"):
        t.append(f" · {run['title']}", style=DIM)
    return t


class CursorBar(Static):
    DEFAULT_CSS = "CursorBar { height: 1; }"

    def show_view(self, view: View | None, live: bool) -> None:
        self.text = cursor_text(view, live)
        self.update(self.text)

    @property
    def plain(self) -> str:
        return getattr(self, "text", Text()).plain
