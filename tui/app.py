"""The chainvigil viewer: a Textual app over the SQLite history (live while it grows, or after a run).

The app reads the history only (``chainvigil.storage.history.History`` opened read-only) in one worker thread
that polls ``History.change_marker()`` every ``refresh`` seconds and posts a ``ViewLoaded`` message
only when something changed or the user moved (another run, another snapshot). Widgets update their
content in place; nothing is remounted on refresh.

Keys: ←/→ older/newer snapshot (shift: 10 at a time), home/end first/newest (end resumes following
new snapshots), n/p next/previous run (or ↑/↓ in the runs list), 1-5 views (Scores, Trend,
Observations, Mixing, Compare), PgDn/PgUp scroll the view (every check of the verdict, every row),
h charts since half the draws (or all), s save a screenshot (SVG, beside the history file or in the
current folder; the path is shown), q quit.

Files: ``loader.py`` (what is read, in the worker), ``run_list.py``, ``cursor.py``, ``headline.py``,
``verdict_panel.py``, ``elpd_chart.py``, ``mcse_chart.py``, ``khat_chart.py``, ``mixing_table.py``,
``comparison_panel.py`` (one widget each), ``chart.py`` + ``canvas.py`` (the braille plotting),
``fmt.py`` (number formats, run-state glyphs), ``app.tcss`` (layout and colours).
"""

from __future__ import annotations

import threading
from pathlib import Path

from textual import work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Container, Horizontal, ScrollableContainer, VerticalScroll
from textual.css.query import NoMatches
from textual.message import Message
from textual.widgets import Footer, TabbedContent, TabPane
from textual.worker import get_current_worker

from .comparison_panel import ComparisonPanel
from .cursor import CursorBar
from .elpd_chart import ElpdChart
from .headline import Headline
from .khat_chart import KhatChart, KhatPanel
from .loader import Loader, Request, View
from .mcse_chart import McseChart
from .mixing_table import MixingNote, MixingTable
from .run_list import RunList
from .verdict_panel import VerdictPanel

KEYS_HELP = ("←/→ older/newer snapshot (shift: 10 at a time) · home first snapshot · end newest, "
             "following live · n/p or ↑/↓ next/previous run · 1-5 views: Scores, Trend, Observations, "
             "Mixing, Compare · PgDn/PgUp page through the view (every check of the verdict) · h charts "
             "since half the draws / all draws · s save the screen as SVG · ? these keys · q quit")

WIDE = 150  # columns from which panels sit side by side
TALL = 45  # rows from which (with WIDE) the Scores tab also shows the three charts

TABS = (("scores", "Scores"), ("trend", "Trend"), ("points", "Observations"), ("mixing", "Mixing"),
        ("compare", "Compare"))


class VigilApp(App):
    """Viewer of a chainvigil history file.

    Parameters: ``history_path`` (the SQLite file; it may appear later), ``refresh`` (seconds between
    polls), ``live`` (poll for new data and follow new snapshots; False reads once, for a finished run).
    """

    CSS_PATH = "app.tcss"
    TITLE = "chainvigil"
    ENABLE_COMMAND_PALETTE = False  # every action has its own key, listed in the footer

    BINDINGS = [
        Binding("left", "step(-1)", "time", key_display="←/→", priority=True),
        Binding("right", "step(1)", "newer", show=False, priority=True),
        Binding("shift+left", "step(-10)", "−10", show=False, priority=True),
        Binding("shift+right", "step(10)", "+10", show=False, priority=True),
        Binding("home", "first", "first", show=False, priority=True),
        Binding("end", "latest", "live", show=False, priority=True),
        Binding("n", "next_run(1)", "run", key_display="n/p"),
        Binding("p", "next_run(-1)", "prev run", show=False),
        *[Binding(str(i + 1), f"tab('{key}')", "view" if i == 0 else label, show=i == 0,
                  key_display="1-5" if i == 0 else None) for i, (key, label) in enumerate(TABS)],
        Binding("pagedown", "scroll_view(1)", "page", key_display="PgDn/Up", priority=True),
        Binding("pageup", "scroll_view(-1)", "page up", show=False, priority=True),
        Binding("h", "toggle_half", "half"),
        Binding("s", "screenshot", "save"),
        Binding("question_mark", "keys", "keys", key_display="?"),
        Binding("q", "quit", "quit"),
    ]

    class ViewLoaded(Message):
        """Posted by the loading worker when the history or the request changed."""

        def __init__(self, view: View):
            super().__init__()
            self.view = view

    def __init__(self, history_path, refresh: float = 1.0, *, live: bool = True):
        super().__init__()
        self.history_path = Path(history_path)
        self.refresh_interval = float(refresh)
        self.live = bool(live)
        self.view: View | None = None
        self.views_loaded = 0  # how many views were applied (tests use it to wait)
        self._request = Request()
        self._wake = threading.Event()
        self._stopping = False
        self.since_half = False  # charts show only the snapshots from half the draws on
        self.last_screenshot: Path | None = None
        self._pending: View | None = None  # a view that arrived before the widgets were there

    # -- layout -------------------------------------------------------------------------------------
    def compose(self) -> ComposeResult:
        yield CursorBar(id="cursor")
        yield RunList(id="runs")
        with TabbedContent(id="tabs"):
            with TabPane("Scores", id="scores"):
                with Horizontal(id="scores-box"):
                    with VerticalScroll(id="headline-box"):
                        yield Headline(id="headline")
                    with VerticalScroll(id="verdict-box"):
                        yield VerdictPanel(id="verdict")
                with Horizontal(id="dash"):
                    yield ElpdChart("LOO elpd by draws", id="dash-elpd")
                    yield McseChart("MCSE of LOO elpd", id="dash-mcse")
                    yield KhatChart("k̂ of the worst, over draws", id="dash-khat")
            with TabPane("Trend", id="trend"):
                with Container(id="trend-box"):
                    yield ElpdChart("LOO elpd by draws", id="elpd-chart")
                    yield McseChart("MCSE of LOO elpd, log-log", id="mcse-chart")
            with TabPane("Observations", id="points"):
                yield KhatPanel(id="khat")
            with TabPane("Mixing", id="mixing"):
                yield MixingTable(id="mixing-table")
                with VerticalScroll(id="mixing-note-box"):  # PgDn pages it when it holds more
                    yield MixingNote(id="mixing-note")
            with TabPane("Compare", id="compare"):
                with VerticalScroll(id="compare-box"):
                    yield ComparisonPanel(id="comparison")
        yield Footer()

    def on_mount(self) -> None:
        self.query_one(CursorBar).show_view(None, self.live)
        self._apply_width()
        self.query_one(RunList).focus()
        # start reading once the first frame is laid out, so every widget a view goes to exists
        self.call_after_refresh(self.load_history)

    def on_resize(self) -> None:
        self._apply_width()

    def _apply_width(self) -> None:
        self.screen.set_class(self.size.width >= WIDE, "-wide")
        self.screen.set_class(self.size.width >= WIDE and self.size.height >= TALL, "-big")

    # -- data ---------------------------------------------------------------------------------------
    @work(thread=True, exclusive=True, name="history-loader")
    def load_history(self) -> None:
        worker = get_current_worker()
        loader = Loader(self.history_path)
        last_marker = last_req = last_problem = None
        first = True
        while not (worker.is_cancelled or self._stopping):
            req = self._request
            try:
                marker = loader.marker()
                if first or marker is None or marker != last_marker or req != last_req:
                    view = loader.load(req)
                    view.request = req
                    if first or view.problem != last_problem or view.problem is None:
                        self.post_message(self.ViewLoaded(view))
                    last_marker, last_req, last_problem, first = marker, req, view.problem, False
            except Exception as exc:  # a reader must outlive a busy or half-written file
                loader.history = None
                problem = f"cannot read the history yet: {exc}"
                if problem != last_problem:
                    self.post_message(self.ViewLoaded(View(problem=problem, request=req)))
                last_problem = problem
            self._wake.wait(self.refresh_interval if self.live else None)
            self._wake.clear()

    def on_vigil_app_view_loaded(self, message: ViewLoaded) -> None:
        view = message.view
        if view.request != self._request:
            return  # the user has moved on; a newer view is on its way
        self._pending = view
        self._apply_pending()

    def _apply_pending(self) -> None:
        """Show the pending view in every widget; if some widget is not mounted yet, try again after
        the next refresh (a view is never shown half)."""
        view = self._pending
        if view is None:
            return
        try:
            bar = self.query_one(CursorBar)
            tab = self.query_one(TabbedContent).get_tab("compare")
            widgets = [w for kind in (RunList, Headline, VerdictPanel, ElpdChart, McseChart, KhatChart,
                                      KhatPanel, MixingTable, MixingNote, ComparisonPanel)
                       for w in self.query(kind)]
            if len(widgets) < 12 or not all(w.is_mounted for w in widgets):
                raise NoMatches("widgets not mounted yet")
        except (NoMatches, ValueError, AttributeError):
            self.call_after_refresh(self._apply_pending)
            return
        self._pending = None
        previous = (self.view.run or {}).get("name") if self.view else None
        self.view = view
        bar.show_view(view, self.live)
        for widget in widgets:
            widget.show_view(view)
        if previous != (view.run or {}).get("name"):  # another run: read it from its top
            for box in self.query(ScrollableContainer):
                if not isinstance(box, (RunList, MixingTable)):
                    box.scroll_home(animate=False)
        self.views_loaded += 1
        tab.label = "Compare" if view.comparisons else "Compare: none"

    def _ask(self, request: Request) -> None:
        if request != self._request:
            self._request = request
            self._wake.set()

    def on_run_list_picked(self, message: RunList.Picked) -> None:
        req = self._request
        if message.run == req.run:
            return
        shown = self.view.run["name"] if self.view and self.view.run else None
        keep = req.seq if req.run is None and message.run == shown else None
        self._ask(Request(message.run, keep))

    # -- actions ------------------------------------------------------------------------------------
    def _seq_now(self) -> tuple[int, int]:
        """(seq under the cursor, number of snapshots) as the app last saw them."""
        v = self.view
        total = v.n_snapshots if v else 0
        seq = self._request.seq if self._request.seq is not None else total
        return seq, total

    def action_step(self, delta: int) -> None:
        seq, total = self._seq_now()
        if total == 0:
            return
        new = max(1, min(total, seq + delta))
        self._ask(Request(self._request.run, None if new >= total else new))

    def action_first(self) -> None:
        if self._seq_now()[1]:
            self._ask(Request(self._request.run, 1))

    def action_latest(self) -> None:
        self._ask(Request(self._request.run, None))

    def action_next_run(self, delta: int) -> None:
        self.query_one(RunList).step(delta)

    def action_tab(self, key: str) -> None:
        self.query_one(TabbedContent).active = key

    def action_scroll_view(self, direction: int) -> None:
        """Page the scrollable parts of the active view (verdict checks, tables, comparison)."""
        pane = self.query_one(TabbedContent).active_pane
        if pane is None:
            return
        targets = [w for w in pane.query("*") if isinstance(w, ScrollableContainer) and w.display
                   and w.max_scroll_y > 0]
        for w in targets:
            (w.scroll_page_down if direction > 0 else w.scroll_page_up)(animate=False)

    def action_keys(self) -> None:
        """Every key in one note (the footer has room for the main ones only)."""
        self.notify(KEYS_HELP, title="keys", timeout=12, markup=False)

    def action_toggle_half(self) -> None:
        self.since_half = not self.since_half
        if self.view is not None:
            for kind in (ElpdChart, McseChart):
                for widget in self.query(kind):
                    widget.show_view(self.view)
        self.notify("charts from half the draws on" if self.since_half else "charts over all draws",
                    timeout=2)

    def action_screenshot(self) -> None:
        """Save the screen as SVG beside the history file (or in the current folder) and show where."""
        stamp = __import__("time").strftime("%Y%m%d-%H%M%S")
        name = f"chainvigil-{stamp}.svg"
        for folder in (self.history_path.parent, Path.cwd()):
            try:
                path = Path(self.save_screenshot(filename=name, path=str(folder)))
            except OSError:
                continue
            self.last_screenshot = path
            self.notify(f"screen saved to {path}", timeout=6, markup=False)
            return
        self.notify("could not save the screen: neither the history's folder nor the current "
                    "folder is writable", severity="error", timeout=6)

    async def action_quit(self) -> None:
        self._stopping = True
        self._wake.set()
        self.exit()

    def on_unmount(self) -> None:
        self._stopping = True
        self._wake.set()


def run_viewer(history_path, *, live: bool = True, refresh: float = 1.0) -> None:
    """Open the viewer on ``history_path`` and block until the user quits."""
    VigilApp(history_path, refresh=refresh, live=live).run()
