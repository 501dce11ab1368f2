"""The time cursor bar: which run and snapshot every panel shows, and whether it is the latest.

Written for the bar's width: the run's title comes last and is cut with "…" when it does not fit."""

from __future__ import annotations

from rich.text import Text
from textual.widget import Widget

from . import fmt
from .fmt import ACCENT, AMBER, DIM, INK
from .loader import View


def cursor_text(view: View | None, live: bool, width: int = 200) -> Text:
    t = Text(no_wrap=True, overflow="ellipsis")
    t.append(" chainvigil ", style=f"bold {INK} on {ACCENT}")
    t.append(" ")
    if view is None:
        t.append("reading the history…", style=DIM)
        return t
    if view.run is None:
        t.append(fmt.fit(fmt.safe(view.problem or "no runs yet"), width - len(t)), style=DIM)
        return t
    run = view.run
    s = view.snap
    if s is not None:
        if view.at_latest and view.following and live and fmt.service_alive(view.service):
            t.append(" ● LIVE ", style=f"bold {INK} on {fmt.TEAL}")
        elif view.at_latest and view.following and live:
            t.append(f" ■ {fmt.service_gone_text(view.service)} ", style=f"bold {INK} on {DIM}")
        elif view.at_latest:
            t.append(" ■ newest ", style=f"bold {INK} on {DIM}")
        else:
            t.append(f" ◀ PAST: {view.n_snapshots - s['seq']} newer ", style=f"bold {INK} on {AMBER}")
        t.append(" ")
    t.append(fmt.fit(fmt.safe(run["name"]), max(8, width - len(t) - 16)), style="bold")
    t.append("  ")
    if s is None:
        t.append("no snapshots yet", style=DIM)
        return t
    t.append(f"snapshot {s['seq']}/{view.n_snapshots}", style="bold")
    # the rest by importance, each only when it fits whole; the title last, cut with "…"
    for piece in (f" · {fmt.whole(s.get('draws_per_chain'))} per chain (shortest)",
                  f" · {fmt.clock(s.get('time'))}"):
        if len(t) + len(piece) <= width:
            t.append(piece, style=DIM)
    if run.get("title"):
        room = width - len(t) - 3
        if room >= 6:
            t.append(" · " + fmt.fit(fmt.safe(run["title"]), room), style=DIM)
    return t


class CursorBar(Widget):
    DEFAULT_CSS = "CursorBar { height: 1; }"

    def __init__(self, *, id: str | None = None):
        super().__init__(id=id)
        self._args = (None, True)
        self.text = Text()

    def show_view(self, view: View | None, live: bool) -> None:
        self._args = (view, live)
        self.text = cursor_text(view, live, self.size.width or 200)
        self.refresh()

    def render(self) -> Text:
        self.text = cursor_text(*self._args, width=self.size.width or 200)
        return self.text

    @property
    def plain(self) -> str:
        return self.text.plain
