"""A small braille plotting canvas: lines, bands, points, reference lines, axes with ticks.

Pure Python plus ``rich.text.Text`` for the output; no Textual here, so the drawing can be checked on
its own. Each terminal cell holds a 2 x 4 grid of braille dots (U+2800 block), so a canvas of
``cols x rows`` cells has ``2*cols x 4*rows`` dots. Axes may be linear or base-10 logarithmic.

Layers are drawn in call order; a cell takes the colour of the last layer that put a dot in it, so draw
bands first, then reference lines, then the data. Every kind of layer has its own look in plain text
too, so series stay apart without colour: a band fills empty cells with ``░``, a reference line with
``╌`` (``┆`` upright), a data line is solid braille, a dotted line sparse braille, points a braille
block, marks a glyph of their own (e.g. ``×``, ``◆``). The legend shows the same symbols.

Why our own canvas rather than a plotting library: a trial of plotext 6.1 on the MCSE chart (log-log
axes, a goal line, a projected crossing), side by side with this canvas at 70 x 18 cells, found its log axes labelled at unround values
(2.00e2, 5.15e2, 0.217), two series drawn with the same block glyph and the same legend symbol in its
colourless theme, ANSI escapes in its output with NO_COLOR set, a legend box over the data, and
2.4 times the build time (2.9 ms against 1.2 ms); its 6.x interface also differs from the one the
Textual wrapper was written for.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Iterable, Sequence

from rich.text import Text

TITLE, AXIS, AXIS_TEXT = "#5ab0e0", "#3a424d", "#9aa3ad"  # the palette of tui/fmt.py

# Dot bit for (dx, dy) inside a cell, dx in 0..1 (left, right), dy in 0..3 (top to bottom).
_DOT_BITS = ((0x01, 0x02, 0x04, 0x40), (0x08, 0x10, 0x20, 0x80))
_BRAILLE_BASE = 0x2800


def _finite(v) -> bool:
    return v is not None and isinstance(v, (int, float)) and math.isfinite(v)


class Scale:
    """Maps data values on one axis to dot coordinates ``0 .. size-1`` (linear or log10)."""

    def __init__(self, lo: float, hi: float, size: int, log: bool = False, flip: bool = False):
        if log:
            if not (lo > 0 and hi > 0):
                raise ValueError(f"log axis needs positive limits, got {lo}..{hi}")
            lo, hi = math.log10(lo), math.log10(hi)
        if not hi > lo:
            hi = lo + 1.0
        self.lo, self.hi, self.size, self.log, self.flip = lo, hi, size, log, flip

    def __call__(self, v: float) -> float | None:
        """Dot coordinate (float) of value ``v``, or None when it cannot be placed (e.g. ≤ 0 on log)."""
        if not _finite(v):
            return None
        if self.log:
            if v <= 0:
                return None
            v = math.log10(v)
        t = (v - self.lo) / (self.hi - self.lo) * (self.size - 1)
        return (self.size - 1) - t if self.flip else t

    def value(self, t: float) -> float:
        """Inverse of ``__call__`` (dot coordinate back to a data value)."""
        if self.flip:
            t = (self.size - 1) - t
        v = self.lo + t / (self.size - 1) * (self.hi - self.lo)
        return 10.0**v if self.log else v


class Canvas:
    """A ``cols x rows`` cell canvas of braille dots with per-cell colour.

    Parameters: ``x_range``/``y_range`` are data limits ``(lo, hi)``; ``x_log``/``y_log`` use log10.
    """

    def __init__(self, cols: int, rows: int, x_range, y_range, x_log=False, y_log=False):
        self.cols, self.rows = max(1, cols), max(1, rows)
        self.w, self.h = 2 * self.cols, 4 * self.rows
        self.sx = Scale(x_range[0], x_range[1], self.w, log=x_log)
        self.sy = Scale(y_range[0], y_range[1], self.h, log=y_log, flip=True)
        self.bits = [[0] * self.cols for _ in range(self.rows)]
        self.styles: list[list[str | None]] = [[None] * self.cols for _ in range(self.rows)]
        self.glyphs: dict[tuple[int, int], str] = {}
        self.fills: dict[tuple[int, int], tuple[str, str]] = {}  # glyph for cells left without dots

    # -- dots ---------------------------------------------------------------------------------------
    def dot(self, px: int, py: int, style: str) -> None:
        if 0 <= px < self.w and 0 <= py < self.h:
            c, r = px // 2, py // 4
            self.bits[r][c] |= _DOT_BITS[px % 2][py % 4]
            self.styles[r][c] = style

    def _segment(self, x0, y0, x1, y1, style, every=1):
        x0, y0, x1, y1 = round(x0), round(y0), round(x1), round(y1)
        steps = max(abs(x1 - x0), abs(y1 - y0), 1)
        # Skip far-off segments cheaply (e.g. a projection that runs off the chart).
        if steps > 20 * (self.w + self.h):
            return
        for i in range(0, steps + 1, every):
            t = i / steps
            self.dot(round(x0 + (x1 - x0) * t), round(y0 + (y1 - y0) * t), style)

    # -- layers -------------------------------------------------------------------------------------
    def line(self, xs: Sequence, ys: Sequence, style: str, dotted: bool = False) -> None:
        """Join consecutive placeable points with straight segments (gaps at unplaceable values)."""
        prev = None
        for x, y in zip(xs, ys):
            px, py = self.sx(x), self.sy(y)
            if px is None or py is None:
                prev = None
                continue
            if prev is None:
                self.dot(round(px), round(py), style)
            else:
                self._segment(prev[0], prev[1], px, py, style, every=3 if dotted else 1)
            prev = (px, py)

    def points(self, xs: Sequence, ys: Sequence, style: str) -> None:
        """Each point as a 2 x 2 block of dots (one cell wide), easier to see than a single dot."""
        for x, y in zip(xs, ys):
            px, py = self.sx(x), self.sy(y)
            if px is not None and py is not None:
                cx, cy = 2 * (round(px) // 2), min(self.h - 2, max(0, round(py)))
                for dx in (0, 1):
                    for dy in (0, 1):
                        self.dot(cx + dx, cy + dy, style)

    def band(self, xs: Sequence, lo: Sequence, hi: Sequence, style: str) -> None:
        """Fill between ``lo`` and ``hi`` (linear interpolation between the given xs) with ``░`` in the
        cells no other layer puts a dot in."""
        pts = []
        for x, a, b in zip(xs, lo, hi):
            px, pa, pb = self.sx(x), self.sy(a), self.sy(b)
            if None not in (px, pa, pb):
                pts.append((px, min(pa, pb), max(pa, pb)))
        pts.sort()
        if len(pts) == 1:
            pts = pts * 2
        for (x0, a0, b0), (x1, a1, b1) in zip(pts, pts[1:]):
            c0, c1 = max(0, math.ceil(x0)), min(self.w - 1, math.floor(x1))
            for px in range(c0, c1 + 1):
                t = 0.0 if x1 == x0 else (px - x0) / (x1 - x0)
                top = round(a0 + (a1 - a0) * t)
                bot = round(b0 + (b1 - b0) * t)
                for py in range(max(0, top), min(self.h - 1, bot) + 1):
                    self.fill(px, py, "░", style)

    def fill(self, px: int, py: int, glyph: str, style: str) -> None:
        """Give the cell holding dot (px, py) a glyph shown only when no layer puts a dot there."""
        if 0 <= px < self.w and 0 <= py < self.h:
            self.fills[(py // 4, px // 2)] = (glyph, style)

    def hline(self, y: float, style: str, dotted: bool = True, glyph: str = "╌") -> None:
        """A reference line: ``glyph`` across the row (braille dots where data share the cell)."""
        py = self.sy(y)
        if py is None or not 0 <= round(py) < self.h:
            return
        for px in range(0, self.w, 2):
            self.fill(px, round(py), glyph, style)

    def vline(self, x: float, style: str, dotted: bool = True) -> None:
        px = self.sx(x)
        if px is None or not 0 <= round(px) < self.w:
            return
        for py in range(0, self.h, 4):
            self.fill(round(px), py, "┆", style)

    def mark(self, x: float, y: float, glyph: str, style: str) -> None:
        """Put a whole-cell glyph (e.g. '◆') at a data point; drawn over dots."""
        px, py = self.sx(x), self.sy(y)
        if px is None or py is None:
            return
        c, r = int(px) // 2, int(py) // 4
        if 0 <= c < self.cols and 0 <= r < self.rows:
            self.glyphs[(r, c)] = glyph
            self.styles[r][c] = style

    def row_text(self, r: int) -> Text:
        out = Text()
        for c in range(self.cols):
            g = self.glyphs.get((r, c))
            style = self.styles[r][c] or ""
            if g is None:
                bits = self.bits[r][c]
                if bits:
                    g = chr(_BRAILLE_BASE + bits)
                elif (r, c) in self.fills:
                    g, style = self.fills[(r, c)]
                else:
                    g = " "
            out.append(g, style=style)
        return out


# -- ticks and labels ----------------------------------------------------------------------------------

def nice_ticks(lo: float, hi: float, target: int = 5) -> list[float]:
    """Round tick values (1, 2, 5 × 10^k steps) inside ``[lo, hi]``."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / max(1, target)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    ticks, v = [], first
    while v <= hi + 1e-9 * step:
        ticks.append(0.0 if abs(v) < step * 1e-9 else v)
        v += step
    return ticks


def log_ticks(lo: float, hi: float, target: int = 5) -> list[float]:
    """Tick values for a log10 axis: powers of ten, with 2 and 5 between them when the span is short."""
    a, b = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    decades = [10.0**k for k in range(a, b + 1)]
    ticks = [t for t in decades if lo * (1 - 1e-9) <= t <= hi * (1 + 1e-9)]
    if len(ticks) < target // 2 + 1:
        more = [m * t for t in decades for m in (1, 2, 5)]
        ticks = [t for t in more if lo * (1 - 1e-9) <= t <= hi * (1 + 1e-9)]
    if len(ticks) < 2:  # a span inside one 1-2-5 step: fall back to linear ticks
        ticks = [t for t in nice_ticks(lo, hi, target) if t > 0]
    return ticks


def tick_labels(ticks: list[float], log: bool = False) -> list[str]:
    """Labels for a set of ticks, with just enough decimals to tell neighbours apart."""
    if log or len(ticks) < 2:
        return [fmt_num(t) for t in ticks]
    step = min(abs(b - a) for a, b in zip(ticks, ticks[1:])) or 1.0
    big = max(abs(t) for t in ticks)
    if big >= 1e4 and step >= 100:
        div, suffix = (1e6, "M") if big >= 1e6 and step >= 1e5 else (1e3, "k")
        dec = max(0, math.ceil(-math.log10(step / div) - 1e-9))
        return ["0" if t == 0 else f"{t / div:.{dec}f}{suffix}" for t in ticks]
    dec = max(0, math.ceil(-math.log10(step) - 1e-9))
    if dec > 4:
        return [f"{t:.2g}" for t in ticks]
    return [f"{t:.{dec}f}" for t in ticks]


def fmt_num(v: float, width: int = 7) -> str:
    """Compact number for tick labels and tables: 3 significant figures, k/M suffixes for big values."""
    if v is None or not math.isfinite(v):
        return "—"
    a = abs(v)
    if a >= 1e6:
        s = f"{v / 1e6:.3g}M"
    elif a >= 1e4:
        s = f"{v / 1e3:.3g}k"
    elif a >= 100 or a == 0:
        s = f"{v:.0f}"
    elif a >= 0.01:
        s = f"{v:.3g}"
    else:
        s = f"{v:.1e}"
    return s[:width]


@dataclass
class Layer:
    """One drawing instruction: ``kind`` in line | dotted | points | band | hline | vline | mark."""

    kind: str
    xs: Sequence = ()
    ys: Sequence = ()
    ys2: Sequence = ()  # upper edge of a band
    value: float | None = None  # for hline / vline
    style: str = ""
    glyph: str = "◆"
    legend: str | None = None
    rule: str = "╌"  # the glyph of a reference line (hline), so two of them differ without colour


@dataclass
class Figure:
    """What to draw: layers, axes, labels. ``x_range``/``y_range`` None means fit to the data."""

    layers: list[Layer] = field(default_factory=list)
    x_log: bool = False
    y_log: bool = False
    x_range: tuple[float, float] | None = None
    y_range: tuple[float, float] | None = None
    x_label: str = ""
    title: str = ""  # shown at the start of the legend row
    message: str | None = None  # shown instead of a chart (e.g. "no snapshots yet")


def _values(layer: Layer, axis: str) -> Iterable[float]:
    if axis == "x":
        if layer.kind == "vline":
            return [layer.value]
        if layer.kind == "hline":
            return []
        return layer.xs
    if layer.kind == "hline":
        return [layer.value]
    if layer.kind == "vline":
        return []
    return list(layer.ys) + list(layer.ys2)


def _fit(values, log: bool, pad: float = 0.05) -> tuple[float, float] | None:
    vals = [v for v in values if _finite(v) and (v > 0 or not log)]
    if not vals:
        return None
    lo, hi = min(vals), max(vals)
    if log:
        lo, hi = math.log10(lo), math.log10(hi)
    span = hi - lo
    if span <= 0:
        span = abs(hi) * 0.1 if hi else 1.0
        if log:
            span = 0.5
    lo, hi = lo - pad * span, hi + pad * span
    return (10**lo, 10**hi) if log else (lo, hi)


SYMBOLS = {"band": "░", "points": "⣿", "hline": "╌", "vline": "┆", "dotted": "⠒", "line": "⣉"}


def legend_symbol(layer: "Layer") -> str:
    """The symbol the legend shows for a layer: the glyph the layer is drawn with."""
    if layer.kind == "hline":
        return layer.rule
    return layer.glyph if layer.kind == "mark" else SYMBOLS.get(layer.kind, "⣉")


def _legend(fig: "Figure", width: int, most: int = 2) -> list[Text]:
    """The title and one entry per labelled layer, on one row when they fit, else wrapped at entries."""
    items = []
    for l in fig.layers:
        if l.legend:
            t = Text(legend_symbol(l) + " ", style=l.style)
            t.append(l.legend, style="")
            items.append(t)
    lines = [Text(" ")]
    if fig.title:
        lines[0].append(fig.title, style=f"bold {TITLE}")
    for item in items:
        cur = lines[-1]
        gap = "  " if cur.plain.strip() else ""
        if len(cur) + len(gap) + len(item) > width and cur.plain.strip():
            lines.append(Text(" "))
            cur, gap = lines[-1], ""
        cur.append(gap)
        cur.append_text(item)
    if len(lines) > most:  # more rows of legend would take the chart's room: cut with "…"
        lines = lines[:most]
        lines[-1].truncate(width - 1)
        lines[-1].append("…")
    for line in lines:
        if len(line) > width:
            line.truncate(width - 1)
            line.append("…")
    return lines


def draw(fig: Figure, width: int, height: int) -> Text:
    """Render ``fig`` into a ``width x height`` block of text: legend, plot area with axes, x ticks."""
    width, height = max(width, 20), max(height, 4)
    if fig.message is not None or not fig.layers:
        msg = fig.message or "nothing to draw yet"
        out = Text(" " + fig.title + "\n", style=f"bold {TITLE}") if fig.title else Text()
        out.append("\n" * (height // 2 - 1) + msg.center(width), style="dim")
        return out
    xr = fig.x_range or _fit((v for l in fig.layers for v in _values(l, "x")), fig.x_log, pad=0.0)
    yr = fig.y_range or _fit((v for l in fig.layers for v in _values(l, "y")), fig.y_log)
    if xr is None or yr is None:
        return draw(Figure(title=fig.title, message="no values to draw"), width, height)
    legend_lines = _legend(fig, width, most=3 if height >= 14 else 2)
    rows = height - 2 - len(legend_lines)  # legend rows on top, axis row and x labels below
    yt = log_ticks(*yr, target=max(2, rows // 2)) if fig.y_log else nice_ticks(*yr, max(2, rows // 2))
    y_labels = tick_labels(yt, fig.y_log)
    label_w = max([5] + [len(l) for l in y_labels])
    cols = width - label_w - 1
    canvas = Canvas(cols, rows, xr, yr, fig.x_log, fig.y_log)
    for l in fig.layers:
        if l.kind == "band":
            canvas.band(l.xs, l.ys, l.ys2, l.style)
        elif l.kind == "hline":
            canvas.hline(l.value, l.style, glyph=l.rule)
        elif l.kind == "vline":
            canvas.vline(l.value, l.style)
        elif l.kind == "line":
            canvas.line(l.xs, l.ys, l.style)
        elif l.kind == "dotted":
            canvas.line(l.xs, l.ys, l.style, dotted=True)
        elif l.kind == "points":
            canvas.points(l.xs, l.ys, l.style)
        elif l.kind == "mark":
            for x, y in zip(l.xs, l.ys):
                canvas.mark(x, y, l.glyph, l.style)
        else:
            raise ValueError(f"unknown layer kind {l.kind!r}")

    out = Text(no_wrap=True, overflow="crop")
    for line in legend_lines:
        out.append_text(line)
        out.append("\n")

    # y ticks: label the canvas row each tick falls in
    sy = canvas.sy
    row_labels: dict[int, str] = {}
    for t, lab in zip(yt, y_labels):
        p = sy(t)
        if p is not None and 0 <= p <= canvas.h - 1:
            row_labels.setdefault(int(p) // 4, lab)
    for r in range(rows):
        lab = row_labels.get(r)
        out.append((lab or "").rjust(label_w), style=AXIS_TEXT)
        out.append("┤" if lab else "│", style=AXIS)
        out.append_text(canvas.row_text(r))
        out.append("\n")

    # x axis with ticks, then labels placed under them
    sx = canvas.sx
    xt = log_ticks(*xr, target=max(2, cols // 12)) if fig.x_log else nice_ticks(*xr, max(2, cols // 12))
    axis = ["─"] * cols
    labels = [" "] * (cols + 8)
    last_end = -2
    for t, s in zip(xt, tick_labels(xt, fig.x_log)):
        p = sx(t)
        if p is None or not (0 <= p <= canvas.w - 1):
            continue
        c = int(p) // 2
        axis[c] = "┬"
        start = max(0, c - len(s) // 2)
        if start > last_end + 1 and start + len(s) <= cols:
            labels[start:start + len(s)] = list(s)
            last_end = start + len(s)
    out.append(" " * label_w + "└", style=AXIS)
    out.append("".join(axis), style=AXIS)
    out.append("\n")
    xl = "".join(labels[:cols]).rstrip()
    tail = f"  {fig.x_label}" if fig.x_label else ""
    if len(xl) + len(tail) > cols:
        tail = ""
    out.append(" " * (label_w + 1) + xl, style=AXIS_TEXT)
    out.append(tail, style=f"italic {AXIS_TEXT}")
    return out
