"""Headline figures of the selected run at the cursor snapshot."""

from __future__ import annotations

from rich.text import Text

from . import fmt
from .fmt import ACCENT, BAD, DIM, GOOD
from .loader import View
from .text_panel import TextPanel


def _pair(t: Text, label: str, value: str, style: str = "bold") -> None:
    t.append(label + " ", style=DIM)
    t.append(value, style=style)
    t.append("  ")


def headline_text(view: View) -> Text:
    s = view.snap
    t = Text(no_wrap=True, overflow="ellipsis")
    if view.problem:
        t.append(view.problem, style=DIM)
        return t
    if s is None:
        t.append("no snapshots for this run yet", style=DIM)
        return t

    t.append("LOO   ", style=f"bold {ACCENT}")
    _pair(t, "elpd", fmt.f2(s.get("loo_elpd")), f"bold {ACCENT}")
    _pair(t, "SE", fmt.f2(s.get("loo_se")))
    _pair(t, "MCSE", fmt.f3(s.get("loo_mcse")))
    _pair(t, "eff. params", fmt.f2(s.get("loo_p_eff")))
    t.append("\n")

    t.append("WAIC  ", style="bold #61afef")
    _pair(t, "elpd", fmt.f2(s.get("waic_elpd")), "bold #61afef")
    _pair(t, "SE", fmt.f2(s.get("waic_se")))
    _pair(t, "eff. params", fmt.f2(s.get("waic_p_eff")))
    t.append("\n")

    kmax, thr, above = s.get("k_max"), s.get("k_threshold"), s.get("k_above")
    t.append("k̂     ", style="bold #c678dd")
    kstyle = BAD if fmt.ok(kmax) and fmt.ok(thr) and kmax > thr else GOOD
    _pair(t, "worst", fmt.f3(kmax), f"bold {kstyle}")
    _pair(t, "limit", fmt.f3(thr))
    n = (view.run or {}).get("n_obs")
    above_s = fmt.whole(above) + (f" of {n}" if n else "")
    _pair(t, "above limit", above_s, f"bold {BAD if above else GOOD}")
    t.append("\n")

    t.append("mix   ", style="bold #e5c07b")
    if s.get("rhat_max") is None:
        t.append("no parameters recorded for this run", style=DIM)
    else:
        _pair(t, "worst R̂", fmt.f3(s.get("rhat_max")))
        _pair(t, "least ESS bulk", fmt.whole(s.get("ess_bulk_min")))
        _pair(t, "tail", fmt.whole(s.get("ess_tail_min")))
    t.append("\n")

    t.append("rough ", style=f"bold {DIM}")
    if s.get("aic_elpd") is None:
        _pair(t, "AIC", "—")
    else:
        _pair(t, "AIC elpd", f"{fmt.f2(s.get('aic_elpd'))} (p {fmt.g3(s.get('aic_p_eff'))})")
    _pair(t, "DIC elpd", f"{fmt.f2(s.get('dic_elpd'))} (p {fmt.f2(s.get('dic_p_eff'))})")
    t.append("\n")

    t.append(f"#{s.get('seq')} at {fmt.clock(s.get('time'))}: ", style=DIM)
    t.append(f"{fmt.whole(s.get('draws'))} draws", style="bold")
    t.append(f" = {fmt.whole(s.get('chains'))} chains × {fmt.whole(s.get('draws_per_chain'))}", style=DIM)
    t.append(f" · {fmt.g3(s.get('draw_rate'))}/s per chain · r_eff {fmt.f2(s.get('r_eff_mean'))}", style=DIM)
    return t


class Headline(TextPanel):
    """The run's key figures; ``show_view`` replaces the text in place."""

    def make_text(self, view: View) -> Text:
        return headline_text(view)
