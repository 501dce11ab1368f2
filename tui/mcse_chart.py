"""MCSE of the LOO elpd against draws on log-log axes, the goal line, and the projected crossing.

The projection uses MCSE ∝ 1/√S from the cursor snapshot: S* = S · (MCSE / goal)².
"""

from __future__ import annotations

from . import fmt
from .canvas import Figure, Layer
from .chart import Chart
from .loader import View, mcse_target


def projected_draws(draws: float, mcse: float, goal: float) -> float | None:
    """Total draws at which MCSE reaches ``goal`` if it falls as 1/√S (None when it cannot be said)."""
    if not (fmt.ok(draws) and fmt.ok(mcse) and fmt.ok(goal)) or draws <= 0 or mcse <= 0 or goal <= 0:
        return None
    return draws * (mcse / goal) ** 2


def mcse_figure(view: View) -> tuple[Figure, str]:
    snaps = [s for s in view.snapshots
             if fmt.ok(s.get("loo_mcse")) and s["loo_mcse"] > 0 and fmt.ok(s.get("draws")) and s["draws"] > 0]
    if not snaps:
        return Figure(message=view.problem or "no snapshots yet"), ""
    goal = mcse_target(view.run, view.snap)
    xs = [s["draws"] for s in snaps]
    ys = [s["loo_mcse"] for s in snaps]
    layers = [Layer("hline", value=goal, style="#e06c75", legend=f"goal {fmt.g3(goal)}")]
    cross = projected_draws(xs[-1], ys[-1], goal)
    if cross is not None and ys[-1] > goal:
        layers.append(Layer("dotted", [xs[-1], cross], [ys[-1], goal], style="#c678dd",
                            legend="∝1/√S"))
        layers.append(Layer("mark", [cross], [goal], style="bold #c678dd", glyph="◆"))
        note = f"goal at ≈ {fmt.whole(cross)} draws (+{fmt.whole(cross - xs[-1])})"
    else:
        note = "goal met" if ys[-1] <= goal else ""
    layers.append(Layer("line", xs, ys, style="bold #f2b36b", legend="MCSE"))
    lo = min(xs) * 0.9
    hi = max(xs[-1], cross or 0) * 1.15 if ys[-1] > goal else max(xs) * 1.1
    return Figure(layers, x_log=True, y_log=True, x_range=(lo, hi), x_label="draws"), note


class McseChart(Chart):
    def show_view(self, view: View) -> None:
        fig, note = mcse_figure(view)
        self.note = note
        fig.title = f"{self.title} · {note}" if note else self.title
        self.show(fig)
