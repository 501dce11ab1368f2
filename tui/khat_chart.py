"""Pareto k̂ of each observation against its index, with the sample-size limit and 0.7, plus the
observations with the largest k̂ by label."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.widgets import Static

from . import fmt
from .canvas import Figure, Layer
from .chart import Chart
from .fmt import BAD, DIM, GOOD
from .loader import View

HARD_LIMIT = 0.7  # above this PSIS is unreliable whatever the number of draws (Vehtari et al. 2024)


def khat_figure(view: View) -> Figure:
    pts = [(p["obs"] + 1, p["k_hat"]) for p in view.pointwise if fmt.ok(p.get("k_hat"))]
    if not pts:
        return Figure(message=view.problem or "no pointwise values yet")
    thr = (view.snap or {}).get("k_threshold")
    xs, ys = zip(*pts)
    hi_x = max(xs)
    good = [(x, y) for x, y in pts if not (fmt.ok(thr) and y > thr)]
    bad = [(x, y) for x, y in pts if fmt.ok(thr) and y > thr]
    layers = [Layer("hline", value=HARD_LIMIT, style="#e06c75", legend="0.7")]
    if fmt.ok(thr) and abs(thr - HARD_LIMIT) > 1e-12:
        layers.append(Layer("hline", value=thr, style="#e5c07b", legend=f"limit {thr:.2f}"))
    if good:
        layers.append(Layer("points", *zip(*good), style="#61afef", legend="k̂"))
    if bad:
        layers.append(Layer("points", *zip(*bad), style="bold #e06c75", legend="above limit"))
    ymin = min(min(ys), 0.0)
    ymax = max(max(ys), HARD_LIMIT) + 0.05
    return Figure(layers, x_range=(0.5, hi_x + 0.5), y_range=(ymin - 0.05, ymax), x_label="observation")


def shorten(label: str, width: int) -> str:
    """Fit a label in ``width`` by cutting out its middle (both ends usually tell labels apart)."""
    if len(label) <= width:
        return label
    head = (width - 1) // 2
    return label[:head] + "…" + label[len(label) - (width - 1 - head):]


def worst_rows(view: View, count: int = 8) -> list[dict]:
    """The ``count`` observations with the largest k̂, largest first."""
    rows = [p for p in view.pointwise if fmt.ok(p.get("k_hat"))]
    return sorted(rows, key=lambda p: (-p["k_hat"], p["obs"]))[:count]


def worst_text(view: View, count: int = 8, label_width: int = 20) -> Text:
    t = Text(no_wrap=True, overflow="ellipsis")
    rows = worst_rows(view, count)
    thr = (view.snap or {}).get("k_threshold")
    t.append("largest k̂          k̂   elpd_i\n", style=f"bold {DIM}")
    if not rows:
        t.append("—", style=DIM)
        return t
    width = min(label_width, max(len(_label(p)) for p in rows))
    for p in rows:
        k = p["k_hat"]
        style = BAD if (fmt.ok(thr) and k > thr) or k > HARD_LIMIT else GOOD
        t.append(shorten(_label(p), width).ljust(width) + " ", style="bold")
        t.append(f"{k:5.2f}", style=style)
        t.append(f" {fmt.f2(p.get('elpd_loo'))}\n", style=DIM)
    if view.pointwise_from is not None and view.snap and view.pointwise_from != view.snap.get("seq"):
        t.append(f"(values of #{view.pointwise_from})", style=f"italic {DIM}")
    return t


def _label(p: dict) -> str:
    return str(p.get("label") or f"#{p['obs'] + 1}")


class KhatChart(Chart):
    """The k̂ scatter alone (for the overview on large screens)."""

    def show_view(self, view: View) -> None:
        self.show(khat_figure(view))


class KhatPanel(Horizontal):
    """Scatter of k̂ by observation and the list of the largest ones."""

    DEFAULT_CSS = """
    KhatPanel { height: 1fr; }
    KhatPanel > Chart { width: 1fr; }
    KhatPanel > #khat-worst { width: 36; height: auto; padding: 0 1; }
    """

    def compose(self) -> ComposeResult:
        yield Chart("Pareto k̂ by observation", id="khat-chart")
        yield Static(id="khat-worst")

    def show_view(self, view: View) -> None:
        self.query_one("#khat-chart", Chart).show(khat_figure(view))
        self.worst_rows = worst_rows(view)
        self.worst = worst_text(view)
        self.query_one("#khat-worst", Static).update(self.worst)
