"""Headline figures of the selected run at the cursor snapshot, fitted to the panel's width."""

from __future__ import annotations

from rich.text import Text

from . import fmt
from .fmt import ACCENT, AMBER, BAD, DIM, GOOD, ORCHID
from .loader import View
from .text_panel import TextPanel


def _pair(t: Text, label: str, value: str, style: str = "bold") -> None:
    t.append(label + " ", style=DIM)
    t.append(value, style=style)
    t.append("  ")


def draws_sentence(view: View) -> str:
    """The draws of the snapshot as a sum that adds up: per chain when the chains' committed draws add up
    to the snapshot's total (the newest snapshot), else the total with the shortest chain."""
    s = view.snap or {}
    total, chains, shortest = s.get("draws"), s.get("chains"), s.get("draws_per_chain")
    per = [c.get("draws") for c in view.chains]
    if per and len(per) == chains and all(fmt.ok(d) for d in per) and sum(per) == total:
        if len(set(per)) == 1:
            return f"{fmt.whole(total)} draws = {chains} chains × {fmt.whole(per[0])}"
        return f"{fmt.whole(total)} draws = " + " + ".join(fmt.whole(d) for d in per)
    return (f"{fmt.whole(total)} draws over all {fmt.whole(chains)} chains "
            f"(shortest chain {fmt.whole(shortest)})")


def cautions(view: View) -> list[str]:
    """The stored verdict's cautions: notes that do not block (worst k̂ near 0.7; LOO's p_eff far above
    the parameter count). The rules live with the verdict (``chainvigil.rules``); shown literally."""
    verdict = (view.snap or {}).get("verdict")
    found = verdict.get("cautions") if isinstance(verdict, dict) else None
    return [fmt.safe(c) for c in found or [] if isinstance(c, str) and c]


def set_aside_lines(view: View, width: int) -> list[str]:
    """When the service set the run aside (``runs.state`` 'set_aside'): the stored state with its
    glyph and the stored reason (``runs.state_reason``, shown literally), wrapped; else []."""
    run = view.run or {}
    if run.get("state") != "set_aside":
        return []
    word, _ = fmt.state_word("set_aside")
    reason = run.get("state_reason")
    words = (f"{word}: the service could not process this run"
             + (f" ({fmt.safe(reason)})" if reason else " (no reason stored)")
             + "; it tries again when the run's folder changes"
             + (". The figures below are the last it stored." if view.snap else "."))
    return fmt.wrap(words, max(20, width))


def loo_method_words(s: dict) -> str:
    """How the LOO elpd was made, when refits are involved: "mixed · 4 exact, 0 pending",
    "K-fold · 336 exact, 0 pending", "PSIS · 0 exact, 3 pending"; "" for plain PSIS-LOO."""
    method, exact, pending = s.get("loo_method"), s.get("loo_exact") or 0, s.get("loo_pending") or 0
    if method in (None, "psis") and not pending:
        return ""
    word = {"mixed": "mixed", "kfold": "K-fold", "refit": "exact (a refit)"}.get(method, "PSIS")
    if method == "refit":
        return word
    return f"{word} · {fmt.whole(exact)} exact, {fmt.whole(pending)} pending"


def subsample_words(s: dict) -> str:
    """A run scored from a random subsample: "sampled 2,000 of 1,000,000 obs · ±3.10 from sampling"
    (the SE of elpd due to the subsample alone, shown beside the MCSE of the draws); "" for a run
    scored over all."""
    m, n = s.get("loo_subsample_m"), s.get("loo_subsample_n")
    if not fmt.ok(m):
        return ""
    return f"sampled {fmt.whole(m)} of {fmt.whole(n)} obs · ±{fmt.f2(s.get('loo_se_subsample'))} from sampling"


def headline_text(view: View, width: int = 100) -> Text:
    s = view.snap
    t = Text(no_wrap=True, overflow="ellipsis")
    if view.problem:  # written whole (wrapped): the bar above has room for its start only
        t.append("\n".join(fmt.wrap(fmt.safe(view.problem), max(20, width))), style=DIM)
        return t
    for line in set_aside_lines(view, width):
        t.append(line + "\n", style=f"bold {AMBER}")
    if s is None:
        t.append("no snapshots for this run yet", style=DIM)
        return t

    t.append("LOO   ", style=f"bold {ACCENT}")
    _pair(t, "elpd", fmt.f2(s.get("loo_elpd")), f"bold {ACCENT}")
    _pair(t, "SE", fmt.f2(s.get("loo_se")))
    _pair(t, "MCSE", fmt.f3(s.get("loo_mcse")))
    _pair(t, "p_eff", fmt.f2(s.get("loo_p_eff")))
    sampled = subsample_words(s)
    if sampled:
        t.append(sampled, style=AMBER)
        t.append("  ")
    method = loo_method_words(s)
    if method:
        t.append(method, style=f"bold {GOOD}" if s.get("loo_method") in ("mixed", "kfold") else AMBER)
    t.append("\n")

    t.append("WAIC  ", style=f"bold {AMBER}")
    _pair(t, "elpd", fmt.f2(s.get("waic_elpd")), f"bold {AMBER}")
    _pair(t, "SE", fmt.f2(s.get("waic_se")))
    _pair(t, "p_eff", fmt.f2(s.get("waic_p_eff")))
    t.append("\n")

    kmax, thr, above = s.get("k_max"), s.get("k_threshold"), s.get("k_above")
    t.append("k̂     ", style=f"bold {ORCHID}")
    bad = fmt.ok(kmax) and fmt.ok(thr) and kmax > thr
    _pair(t, "worst", f"{fmt.f3(kmax)} {fmt.mark(not bad)}", f"bold {BAD if bad else GOOD}")
    _pair(t, "limit", fmt.f3(thr))
    n = (view.run or {}).get("n_obs")
    if fmt.ok(s.get("loo_subsample_m")):  # k̂ is known for the sampled observations only
        above_s = f"{fmt.whole(above)} of {fmt.whole(s['loo_subsample_m'])} sampled"
    else:
        above_s = fmt.whole(above) + (f" of {n}" if n else "")
    _pair(t, "above limit", above_s, f"bold {BAD if above else GOOD}")
    t.append("\n")

    t.append("mix   ", style=f"bold {fmt.LEMON}")
    if s.get("rhat_max") is None:
        t.append("no parameters recorded for this run", style=DIM)
    else:
        _pair(t, "worst R̂", fmt.f3(s.get("rhat_max")))
        _pair(t, "least ESS bulk", fmt.whole(s.get("ess_bulk_min")))
        _pair(t, "tail", fmt.whole(s.get("ess_tail_min")))
        t.append("(all chains)", style=DIM)
    t.append("\n")

    t.append("rough ", style=f"bold {DIM}")
    if s.get("aic_elpd") is None:
        _pair(t, "AIC", "—")
    else:
        _pair(t, "AIC elpd", f"{fmt.f2(s.get('aic_elpd'))} (p {fmt.whole(s.get('aic_p_eff'))})")
    _pair(t, "DIC elpd", f"{fmt.f2(s.get('dic_elpd'))} (p_eff {fmt.f2(s.get('dic_p_eff'))})")
    t.append("\n")

    t.append(f"#{s.get('seq')} at {fmt.clock(s.get('time'))}: ", style=DIM)
    t.append(draws_sentence(view), style="bold")
    t.append(f" · {fmt.g3(s.get('draw_rate'))} draws/s per chain · r_eff {fmt.f2(s.get('r_eff_mean'))}",
             style=DIM)
    t.append("\n")
    t.append("p_eff: effective number of parameters", style=f"italic {DIM}")
    for note in cautions(view):
        for i, line in enumerate(fmt.wrap(note, max(20, width - 2))):
            t.append("\n" + ("! " if i == 0 else "  ") + line, style=AMBER)
    return t


class Headline(TextPanel):
    """The run's key figures; ``show_view`` replaces the text in place."""

    def make_text(self, view: View, width: int) -> Text:
        return headline_text(view, width)
