"""The LOO elpd estimate against draws (all chains together), with a ±2·MCSE band (░) and WAIC (×).

``half=True`` shows only the snapshots from half the current draws on, so early transients do not
squash the settled part of the y-axis (the ``h`` key).
"""

from __future__ import annotations

from . import fmt
from .canvas import Figure, Layer
from .chart import Chart
from .loader import View

X_LABEL = "draws, all chains"


def since_half(snaps: list[dict]) -> list[dict]:
    """The snapshots whose total draws are at least half of the last one's."""
    if not snaps:
        return snaps
    half = snaps[-1]["draws"] / 2
    kept = [s for s in snaps if s["draws"] >= half]
    return kept if len(kept) >= 2 else snaps[-2:]


def elpd_figure(view: View, half: bool = False) -> Figure:
    snaps = [s for s in view.snapshots if fmt.ok(s.get("loo_elpd")) and fmt.ok(s.get("draws"))]
    if not snaps:
        return Figure(message=view.problem or "no snapshots yet")
    if half:
        snaps = since_half(snaps)
    xs = [s["draws"] for s in snaps]
    ys = [s["loo_elpd"] for s in snaps]
    m = [s.get("loo_mcse") if fmt.ok(s.get("loo_mcse")) else 0.0 for s in snaps]
    waic = [(s["draws"], s["waic_elpd"]) for s in snaps if fmt.ok(s.get("waic_elpd"))]
    layers = [Layer("band", xs, [y - 2 * e for y, e in zip(ys, m)], [y + 2 * e for y, e in zip(ys, m)],
                    style=fmt.BAND, legend="LOO ±2·MCSE")]
    if waic:
        layers.append(Layer("mark", *zip(*waic), style=f"bold {fmt.AMBER}", glyph="×", legend="WAIC"))
    layers.append(Layer("line", xs, ys, style=f"bold {fmt.SKY}", legend="LOO elpd"))
    x_range = None
    if len(xs) == 1:
        x_range = (xs[0] * 0.9, xs[0] * 1.1 + 1)
    return Figure(layers, x_label=X_LABEL, x_range=x_range)


class ElpdChart(Chart):
    def show_view(self, view: View) -> None:
        self.view = view
        half = getattr(self.app, "since_half", False)
        fig = elpd_figure(view, half=half)
        fig.title = self.title + (" · since half the draws" if half else "")
        self.show(fig)
