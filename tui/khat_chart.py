"""What Pareto k̂ shows while a run goes on: the k̂ of the worst observations over draws (settling or
rising?), labels in full, and the whole set as a histogram beside it with the thresholds marked.

Values come from the pointwise values the history keeps over the run (``View.pointwise_trail``); the
sample-size threshold is the snapshot's ``k_threshold`` column (stored by the service, not computed
here), 0.7 the point above which PSIS is unreliable whatever the draws (Vehtari et al. 2024, Pareto smoothed
importance sampling, JMLR 25(72)), drawn as a fact of the method.
"""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal, VerticalScroll
from textual.widgets import Static

from . import fmt
from .canvas import Figure, Layer
from .chart import Chart
from .fmt import AMBER as AMBER_MARK, BAD, DIM, GOOD, ORCHID
from .loader import View, goal

HARD_LIMIT = 0.7  # above this PSIS is unreliable whatever the number of draws (Vehtari et al. 2024)
TRACKED = 4  # worst observations followed over draws
GLYPHS = "ABCD"  # each followed observation's own mark (no colour needed)
SERIES = ("#5ab0e0", "#e0a020", "#c57aa5", "#e8dc5a")


def threshold(view: View) -> float | None:
    """The sample-size dependent k̂ threshold, as the service stored it in the snapshot's
    ``k_threshold`` column (never computed here); None when not stored."""
    t = (view.snap or {}).get("k_threshold")
    return t if fmt.ok(t) else None


def worst_rows(view: View, count: int = 8) -> list[dict]:
    """The ``count`` observations with the largest k̂ at the cursor, largest first."""
    rows = [p for p in view.pointwise if fmt.ok(p.get("k_hat"))]
    return sorted(rows, key=lambda p: (-p["k_hat"], p["obs"]))[:count]


#: How an observation's elpd was made (``pointwise_latest.loo_source``), as the screen marks it.
SOURCE_MARKS = {"exact": "◆ exact", "kfold": "◇ K-fold", "pending": "◌ pending", "psis": ""}


def source_counts(view: View) -> dict:
    """How many observations have an exact (refit or K-fold), pending or PSIS elpd at the cursor."""
    out = {"exact": 0, "pending": 0, "psis": 0}
    for p in view.pointwise:
        src = p.get("loo_source") or "psis"
        out["exact" if src in ("exact", "kfold") else src if src in out else "psis"] += 1
    return out


def source_mark(p: dict) -> str:
    """The mark of one observation: "◆ exact" (its elpd from a finished refit), "◇ K-fold", "◌ pending"
    (flagged, its refit not finished: PSIS value shown meanwhile) or "" (PSIS)."""
    return SOURCE_MARKS.get(p.get("loo_source") or "psis", "")


def _label(p: dict) -> str:
    return fmt.safe(p.get("label") or f"#{p['obs'] + 1}")


def tracks(view: View, count: int = TRACKED) -> list[tuple[dict, list[tuple[int, float]]]]:
    """For each of the ``count`` worst observations: its row and its k̂ over the stored pointwise sets,
    as (total draws, k̂)."""
    out = []
    for p in worst_rows(view, count):
        pts = []
        for _, draws, rows in view.pointwise_trail:
            row = rows[p["obs"]] if p["obs"] < len(rows) and rows[p["obs"]]["obs"] == p["obs"] else \
                next((r for r in rows if r["obs"] == p["obs"]), None)
            if row is not None and fmt.ok(row.get("k_hat")):
                pts.append((draws, row["k_hat"]))
        out.append((p, pts))
    return out


def trend_word(pts: list[tuple[int, float]]) -> str:
    """How k̂ moved between the last two stored sets: ↑ rising, ↓ settling, → steady (within 0.02)."""
    if len(pts) < 2:
        return "· one set"
    d = pts[-1][1] - pts[-2][1]
    if abs(d) <= 0.02:
        return "→ steady"
    return "↑ rising" if d > 0 else "↓ settling"


def khat_figure(view: View) -> Figure:
    tr = [(p, pts) for p, pts in tracks(view) if pts]
    if not tr:
        return Figure(message=view.problem or "no pointwise values yet")
    thr = threshold(view)
    layers = [Layer("hline", value=HARD_LIMIT, style=BAD, legend="0.7", rule="═")]
    if thr is not None and abs(thr - HARD_LIMIT) > 1e-12:
        layers.append(Layer("hline", value=thr, style=fmt.AMBER, legend=f"limit {thr:.3g}", rule="┈"))
    for i, (p, pts) in enumerate(tr):
        xs, ys = zip(*pts)
        layers.append(Layer("line", xs, ys, style=SERIES[i]))
        layers.append(Layer("mark", xs, ys, style=f"bold {SERIES[i]}", glyph=GLYPHS[i]))
    # one legend entry for the lettered series: their labels are written in full beside the chart
    layers.append(Layer("mark", [], [], glyph=f"A–{GLYPHS[len(tr) - 1]}", legend="worst (labels →)"))
    xs = [x for _, pts in tr for x, _ in pts]
    ys = [y for _, pts in tr for _, y in pts] + [HARD_LIMIT] + ([thr] if thr is not None else [])
    lo, hi = min(xs), max(xs)
    x_range = (lo * 0.95, hi * 1.05 + 1) if hi == lo else None
    # early sets can hold wild values far below zero; they would squash the part that matters
    return Figure(layers, x_range=x_range, y_range=(max(min(min(ys), 0.0), -0.5) - 0.05, max(ys) + 0.05),
                  x_label="draws, all chains")


def histogram(view: View) -> list[tuple[str, int, bool]]:
    """Counts of k̂ in bins whose edges include the threshold and 0.7: (bin words, count, bad)."""
    ks = [p["k_hat"] for p in view.pointwise if fmt.ok(p.get("k_hat"))]
    thr = threshold(view)
    edges = sorted({0.0, 0.5, HARD_LIMIT, 1.0} | ({round(thr, 3)} if thr is not None else set()))
    bins = [(None, edges[0])] + list(zip(edges, edges[1:])) + [(edges[-1], None)]
    out = []
    for a, b in reversed(bins):
        n = sum(1 for k in ks if (a is None or k > a) and (b is None or k <= b))
        if a is None:
            words = f"≤ {b:g}"
        elif b is None:
            words = f"> {a:g}"
        else:
            words = f"{a:g}–{b:g}"
        bad = a is not None and ((thr is not None and a >= thr) or a >= HARD_LIMIT)
        out.append((words, n, bad))
    return out


def side_text(view: View, count: int = 8) -> Text:
    """The followed observations (labels in full) with their trend, the rest of the worst, the histogram."""
    t = Text(no_wrap=True)
    rows = worst_rows(view, count)
    thr = threshold(view)
    if not rows:
        t.append("no pointwise values yet", style=DIM)
        return t
    tr = dict((p["obs"], pts) for p, pts in tracks(view))
    lab_w = max(len(_label(p)) for p in rows)

    t.append("largest k̂ now".ljust(lab_w + 2) + "    k̂  over draws\n", style=f"bold {DIM}")
    for i, p in enumerate(rows):
        k = p["k_hat"]
        bad = (thr is not None and k > thr) or k > HARD_LIMIT
        t.append((GLYPHS[i] if i < TRACKED else " ") + " ", style=f"bold {SERIES[i]}" if i < TRACKED else "")
        t.append(_label(p).ljust(lab_w), style="bold")
        t.append(f" {k:5.2f}{fmt.mark(not bad)}", style=BAD if bad else GOOD)
        mark = source_mark(p)
        if mark:  # in place of the k̂ trend: where its elpd comes from now matters more
            t.append(f"  {mark}", style=GOOD if p.get("loo_source") in ("exact", "kfold") else AMBER_MARK)
        elif i < TRACKED:
            t.append(f"  {trend_word(tr.get(p['obs'], []))}")
        t.append("\n")
    counts = source_counts(view)
    if counts["exact"] or counts["pending"]:
        t.append(f"elpd: {counts['exact']} exact, {counts['pending']} pending, {counts['psis']} PSIS\n",
                 style="bold")
    if view.pointwise_from is not None and view.snap and view.pointwise_from != view.snap.get("seq"):
        t.append(f"(values of snapshot #{view.pointwise_from})\n", style=f"italic {DIM}")
    t.append("\n")
    n = len([p for p in view.pointwise if fmt.ok(p.get("k_hat"))])
    # the threshold is min(1 - 1/log10 S, 0.7): one figure says where ✘ starts
    limit = HARD_LIMIT if thr is None else min(thr, HARD_LIMIT)
    t.append(f"all {n} observations by k̂ (✘ above {limit:.3g})\n", style=f"bold {DIM}")
    hist = histogram(view)
    top = max((c for _, c, _ in hist), default=1) or 1
    for words, c, bad in hist:
        bar = "█" * max(1 if c else 0, round(c / top * 16))
        t.append(f"{words:>9} ", style=DIM)
        t.append(f"{c:>5} ", style="bold")
        t.append(("✘ " if bad and c else "  ") + bar + "\n", style=BAD if bad else ORCHID)
    t.append(f"{'total':>9} {sum(c for _, c, _ in hist):>5}", style=DIM)
    return t


class KhatChart(Chart):
    """The worst observations' k̂ over draws alone (for the overview on large screens)."""

    def show_view(self, view: View) -> None:
        self.show(khat_figure(view))


class KhatPanel(Horizontal):
    """The worst observations' k̂ over draws, and beside it their labels in full and the histogram."""

    DEFAULT_CSS = """
    KhatPanel { height: 1fr; }
    KhatPanel > Chart { width: 1fr; min-width: 30; }
    KhatPanel > #khat-side { width: auto; max-width: 70%; height: 1fr; padding: 0 1; }
    KhatPanel #khat-worst { width: auto; }
    """

    def compose(self) -> ComposeResult:
        yield Chart("k̂ of the worst, over draws", id="khat-chart")
        with VerticalScroll(id="khat-side"):
            yield Static(id="khat-worst")

    def show_view(self, view: View) -> None:
        self.query_one("#khat-chart", Chart).show(khat_figure(view))
        self.worst_rows = worst_rows(view)
        self.worst = side_text(view)
        self.query_one("#khat-worst", Static).update(self.worst)
