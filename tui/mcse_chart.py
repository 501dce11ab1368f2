"""MCSE of the LOO elpd against draws (all chains together) on log-log axes, the goal line, and the
projected crossing.

The goal is the MCSE check's ``target`` in the snapshot's stored verdict (``loader.mcse_target``).
The projection uses MCSE ∝ 1/√S from the cursor snapshot: S* = S · (MCSE / goal)².
"""

from __future__ import annotations

from . import fmt
from .canvas import Figure, Layer
from .chart import Chart
from .elpd_chart import X_LABEL, since_half
from .loader import View, mcse_target


def projected_draws(draws: float, mcse: float, goal: float) -> float | None:
    """Total draws at which MCSE reaches ``goal`` if it falls as 1/√S (None when it cannot be said)."""
    if not (fmt.ok(draws) and fmt.ok(mcse) and fmt.ok(goal)) or draws <= 0 or mcse <= 0 or goal <= 0:
        return None
    return draws * (mcse / goal) ** 2


def mcse_figure(view: View, half: bool = False) -> tuple[Figure, str]:
    snaps = [s for s in view.snapshots
             if fmt.ok(s.get("loo_mcse")) and s["loo_mcse"] > 0 and fmt.ok(s.get("draws")) and s["draws"] > 0]
    if not snaps:
        return Figure(message=view.problem or "no snapshots yet"), ""
    if half:
        snaps = since_half(snaps)
    goal = mcse_target(view.run, view.snap)
    if goal is None:
        return Figure(message="no MCSE goal stored in this snapshot's verdict"), ""
    xs = [s["draws"] for s in snaps]
    ys = [s["loo_mcse"] for s in snaps]
    layers = [Layer("hline", value=goal, style=fmt.RUST, legend=f"goal {fmt.g3(goal)}")]
    cross = projected_draws(xs[-1], ys[-1], goal)
    if cross is not None and ys[-1] > goal:
        layers.append(Layer("dotted", [xs[-1], cross], [ys[-1], goal], style=fmt.LEMON,
                            legend="∝1/√draws"))
        layers.append(Layer("mark", [cross], [goal], style=f"bold {fmt.LEMON}", glyph="◆",
                            legend="reached"))
        note = f"goal at ≈ {fmt.whole(cross)} draws (+{fmt.whole(cross - xs[-1])}, all chains)"
    else:
        note = "goal met" if ys[-1] <= goal else ""
    layers.append(Layer("line", xs, ys, style=f"bold {fmt.AMBER}", legend="MCSE"))
    lo = min(xs) * 0.9
    hi = max(xs[-1], cross or 0) * 1.15 if ys[-1] > goal else max(xs) * 1.1
    return Figure(layers, x_log=True, y_log=True, x_range=(lo, hi),
                  x_label=X_LABEL), note


class McseChart(Chart):
    def show_view(self, view: View) -> None:
        self.view = view
        fig, note = mcse_figure(view, half=getattr(self.app, "since_half", False))
        self.note = note
        half = getattr(self.app, "since_half", False)
        title = self.title + (" · since half the draws" if half else "")
        fig.title = f"{title} · {note}" if note else title
        self.show(fig)
