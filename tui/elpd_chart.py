"""The LOO elpd estimate against draws, with a ±2·MCSE band (and WAIC as a dotted line)."""

from __future__ import annotations

from . import fmt
from .canvas import Figure, Layer
from .chart import Chart
from .loader import View


def elpd_figure(view: View) -> Figure:
    snaps = [s for s in view.snapshots if fmt.ok(s.get("loo_elpd")) and fmt.ok(s.get("draws"))]
    if not snaps:
        return Figure(message=view.problem or "no snapshots yet")
    xs = [s["draws"] for s in snaps]
    ys = [s["loo_elpd"] for s in snaps]
    m = [s.get("loo_mcse") if fmt.ok(s.get("loo_mcse")) else 0.0 for s in snaps]
    layers = [
        Layer("band", xs, [y - 2 * e for y, e in zip(ys, m)], [y + 2 * e for y, e in zip(ys, m)],
              style="#2f6f63", legend="±2·MCSE"),
        Layer("dotted", xs, [s.get("waic_elpd") for s in snaps], style="#61afef", legend="WAIC"),
        Layer("line", xs, ys, style="bold #7fd1b9", legend="LOO elpd"),
    ]
    x_range = None
    if len(xs) == 1:
        x_range = (xs[0] * 0.9, xs[0] * 1.1 + 1)
    return Figure(layers, x_label="draws", x_range=x_range)


class ElpdChart(Chart):
    def show_view(self, view: View) -> None:
        self.show(elpd_figure(view))
