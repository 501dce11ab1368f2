"""Enough draws? The verdict on a run, with projections of the draws still needed.

Pure logic on plain data (no SQLite, no zarr, no clock): the service, ``score --json`` and the tests
all call :func:`evaluate` with the ``Scores.to_dict()`` shape of docs/interfaces.md and a short trail of
earlier snapshot points. No I/O: the stop signal itself is written by :mod:`chainvigil.signals`.

Checks (names are ours)
-----------------------
``rhat``      largest rank-normalised split R̂ over the parameters ≤ ``rhat_max`` (1.01).
``ess-bulk``  smallest bulk-ESS ≥ ``ess_bulk_min_per_chain`` × chains (100 per chain).
``ess-tail``  smallest tail-ESS ≥ ``ess_tail_min_per_chain`` × chains (100 per chain).
              (Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis 16(2), §4:
              R̂ < 1.01 and ESS > 100 per chain, i.e. 400 for four chains.)
``mcse``      MCSE of elpd_loo ≤ ``mcse_elpd_max`` (0.1 nats; a rule of thumb). For an estimate from a
              random subsample of the observations ``loo.mcse`` is the draws' Monte Carlo error
              alone, judged as for any run; the subsampling SE (``loo.subsampled.se_subsample``),
              which more draws cannot lower, is named in the note and never blocks.
``k-hat``     every Pareto k̂ ≤ the sample-size threshold min(1 − 1/log10 S, 0.7)
              (Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72), §3). k̂ > 0.7 is not fixed
              by more draws: those observations go to ``refit`` (exact refits or K-fold).
``settled``   the LOO estimate moved (max − min) less than ``stability_mcse_factor`` × its current
              MCSE over the trailing window of snapshots spanning at least ``stability_window`` (a
              fifth) of the draws (for a subsampled estimate the draws' MCSE: with its sample fixed,
              only the draws move it).
``compare``   only for runs compared on the same data: MCSE(Δelpd) ≤ max(``delta_mcse_ratio_max`` ×
              SE(Δelpd), ``delta_mcse_floor``). With the default ratio 0.2 the Monte Carlo error adds
              at most 2% to the total spread sqrt(SE² + MCSE²) of Δ, so it cannot change which model
              looks better; the floor (0.1 nats, the same scale as ``mcse_elpd_max``) keeps nearly
              identical models (SE(Δ) → 0) from asking for unbounded draws.

``floor``     at least ``min_draws_per_chain`` draws per chain (200).

The stopping rule (docs/verdict.md)
-----------------------------------
``enough`` = past the floor, every check passes and no refit, and either every check passes with a
margin (MCSE ≤ 0.9 goal, ESS ≥ 1.1 goal, R̂ ≤ 1 + 0.9 (goal − 1), MCSE(Δ) ≤ 0.9 allowed) or this
and the previous ``HOLD_SNAPSHOTS`` − 1 snapshots all passed and the streak spans a tenth more
draws. k̂ is judged only once every observation's PSIS tail holds ``KHAT_MIN_TAIL`` (50) draws;
before that it is provisional: no observation named, no refit, no ``attention``.

Projections (draws per chain still needed)
------------------------------------------
A projection without basis gives ``more_draws`` null and says why: k̂ above 0.7 (the MCSE check),
a value that has not moved toward its goal since half the draws ("not converging at this rate"),
a pooled ESS rate that puts the goal behind us (the current point is used instead). A run that is
not growing (``activity`` "paused" / "finished") gets no minutes. Against a finished compared run
the compare check judges only this run's part of MCSE(Δ).

S is the current draws per chain; a projected S' gives ``more_draws = ceil(S') − S``.

* MCSE ∝ 1/√S (central limit theorem for Markov chains):      S' = S · (mcse / target)².
* ESS ∝ S (fixed integrated autocorrelation time):             S' = S · target / ess.
* ESS ∝ S says the rate a = ESS/S is constant. When the trail carries earlier values
  (``ess_bulk_min``, ``ess_tail_min``), the rate is pooled over the trail points with S_k ≥ S/2
  and the current point, weighted by draws: â = Σ ESS_k / Σ S_k (the weighted least-squares slope
  of ESS = a·S through the origin with Var(ESS_k) ∝ S_k), and S' = target / â. Without such points
  (e.g. ``score --json``) this is exactly the single-point rule above. Why only the last half: the
  ESS estimate (Geyer's 1992 truncated autocorrelation sum, as in Vehtari et al. 2021) is noisy and
  biased at small ESS, upward for tail-ESS (likely because the sum is cut early while few tail excursions have
  been seen; on AR(1) chains we measured the mean tail-ESS/S about 5–20% high at 25 per chain and
  about 40–70% high at 6 per chain; 40 seeds each), and early draws may still be leaving the starting point. Points from
  the last half hold at least about half the current ESS, so they add little of that bias, while
  their own jitter (quantile estimates, truncation lag) averages out. The gain is modest: the
  points share most of their draws, so the noise of the draws themselves, which dominates at
  small ESS, does not average away (bench/projection_quality.py prints both rules side by side).
  The MCSE of elpd_loo is not pooled (MCSE²·S is constant only for a fixed r_eff, which the
  service re-estimates as draws grow, and pooling did not narrow the spread on AR(1) chains).
* R̂: for stationary chains split-R̂² ≈ 1 + (τ − 1)/N with N = S/2 draws per half chain and τ the
  integrated autocorrelation time (E[B/N] = τσ²/N in Gelman et al., BDA3 §11.4 notation), so
  R̂ − 1 ≈ (τ − 1)/S ∝ 1/S:                                    S' = S · (R̂ − 1)/(rhat_max − 1).
  This is rough (R̂ − 1 is a noisy estimate) and holds only once the chains sample the same
  distribution; when the trail carries ``rhat_max`` values, R̂ has not fallen across the
  stability window and R̂ − 1 is more than twice the stationary value (τ − 1)/S (τ = chains·S /
  bulk-ESS), the chains look stuck apart and no projection is made (``more_draws`` null).
* k̂ threshold: min(1 − 1/log10 S_tot, 0.7) ≥ k̂  ⇔  S_tot ≥ 10^(1/(1 − k̂)). S_tot is the sample size
  the PSIS code used; it is read back from the reported threshold (S_tot = 10^(1/(1 − threshold))
  when the threshold is below 0.7) so the projection follows the same convention, else it is the
  total number of draws chains · S. k̂ itself is re-estimated as draws arrive, so this is the
  projection for the k̂ seen now.
* settled: until the trail spans the window: S' = S_first / (1 − window) with S_first the earliest
  trail point; when the window is spanned but the estimate still drifts, the draws for a fresh
  window starting now, S' = S / (1 − window) (a lower bound).
* compare: MCSE(Δ)² = mcse_self² + mcse_other² (independent runs); this run's part falls as 1/S:
  S' = S · mcse_self² / (allowed² − mcse_other²); null when the other run's part alone is too large.

minutes = more_draws / draw_rate / 60 with draw_rate in draws per chain per second (null when unknown).
"""

from __future__ import annotations

import dataclasses
import math
from bisect import bisect_left, bisect_right
from fractions import Fraction
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

__all__ = [
    "bounded_trail",
    "KHAT_LIMIT",
    "SIGNAL_NAME",
    "Targets",
    "evaluate",
    "describe",
    "parameter_projections",
    "khat_threshold",
]

# The k̂ limit 0.7, the sample-size threshold, the stop-signal file name, "finite or None" and the
# minute format are defined once, in chainvigil.rules.
from chainvigil.rules import KHAT_LIMIT, SIGNAL_FILE as SIGNAL_NAME, finite_or_none as _num  # noqa: E402
from chainvigil.rules import DEFAULT_TARGETS, format_minutes as _fmt_minutes, khat_threshold  # noqa: E402
from chainvigil.rules import p_eff_caution  # noqa: E402

_MAX_NAMED = 8  # observations named in a note before "+N more"

# The stopping rule and the k-hat judgement (docs/verdict.md explains each number).
MARGIN_MCSE = 0.9         # "with margin": MCSE ≤ 0.9 × goal (also MCSE(Δ) in the compare check)
MARGIN_ESS = 1.1          # ESS ≥ 1.1 × goal
MARGIN_RHAT = 0.9         # R̂ ≤ 1 + 0.9 (goal − 1)
HOLD_SNAPSHOTS = 3        # without margin: passed on this many snapshots in a row (this one included)
HOLD_SPAN = 0.1           # ... spanning at least a tenth more draws
KHAT_MIN_TAIL = 50        # k̂ is judged once every observation's PSIS tail holds this many draws
KHAT_CAUTION = 0.6        # worst k̂ at or above this: PSIS-LOO may carry a bias the MCSE omits
ACTIVITIES = ("growing", "paused", "finished")


# ---------------------------------------------------------------------------------------------
# Targets
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Targets:
    """Goals of the verdict; every field can be set in ``run.json`` ``targets`` or by a flag.

    rhat_max                 largest R̂ allowed (> 1). Default 1.01 (Vehtari et al. 2021).
    ess_bulk_min_per_chain   bulk-ESS needed per chain (> 0); the goal is this × chains. Default 100.
    ess_tail_min_per_chain   tail-ESS needed per chain (> 0). Default 100.
    mcse_elpd_max            largest MCSE of elpd_loo in nats (> 0). Default 0.1.
    stability_window         fraction of the current draws the settled-check window must span
                             (0 < w < 1). Default 0.2.
    stability_mcse_factor    the LOO estimate must move less than this × its MCSE over the window
                             (> 0). Default 2.
    delta_mcse_ratio_max     MCSE(Δelpd) allowed as a fraction of SE(Δelpd) (> 0). Default 0.2.
    delta_mcse_floor         MCSE(Δelpd) at or below this many nats always passes (≥ 0). Default 0.1.
    min_draws_per_chain      no "enough" before this many draws per chain (≥ 4). Default 200:
                             with 4 chains that is 800 draws, where the PSIS tail of an observation
                             (3 sqrt(S / r_eff) draws) holds about 85 draws at r_eff = 1, comfortably
                             above the 50 k̂ needs to be judged (docs/verdict.md).
    """

    rhat_max: float = DEFAULT_TARGETS["rhat_max"]
    ess_bulk_min_per_chain: float = DEFAULT_TARGETS["ess_bulk_min_per_chain"]
    ess_tail_min_per_chain: float = DEFAULT_TARGETS["ess_tail_min_per_chain"]
    mcse_elpd_max: float = DEFAULT_TARGETS["mcse_elpd_max"]
    stability_window: float = 0.2
    stability_mcse_factor: float = 2.0
    delta_mcse_ratio_max: float = 0.2
    delta_mcse_floor: float = 0.1
    min_draws_per_chain: float = 200.0

    def __post_init__(self):
        for f in dataclasses.fields(self):
            _check_target(f.name, getattr(self, f.name), "targets")

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)

    @classmethod
    def keys(cls) -> tuple[str, ...]:
        return tuple(f.name for f in dataclasses.fields(cls))

    @classmethod
    def from_sources(cls, defaults: "Targets | Mapping | None" = None,
                     run_json_targets: Mapping | None = None,
                     cli_overrides: Mapping | None = None, *,
                     run_json_name: str = "run.json") -> "Targets":
        """Targets from the defaults, then ``run.json`` ``targets``, then command-line flags.

        Later sources win. ``cli_overrides`` entries whose value is None (a flag not given) are
        ignored, hyphens in its keys are read as underscores and numeric strings are accepted.
        Raises ValueError naming the source and the key for an unknown key or a bad value.
        """
        if defaults is None:
            base = cls().to_dict()
        elif isinstance(defaults, Targets):
            base = defaults.to_dict()
        elif isinstance(defaults, Mapping):
            base = cls().to_dict()
            base.update(_read_source(defaults, "default targets", cli=False))
        else:
            raise ValueError(f"default targets: expected a Targets or a mapping, got "
                             f"{type(defaults).__name__}")
        if run_json_targets is not None:
            where = f"{run_json_name} targets"
            if not isinstance(run_json_targets, Mapping):
                raise ValueError(f"{where}: expected an object of target values, got "
                                 f"{type(run_json_targets).__name__}")
            base.update(_read_source(run_json_targets, where, cli=False))
        if cli_overrides is not None:
            base.update(_read_source(cli_overrides, "command line", cli=True))
        return cls(**base)


_RULES = {
    "rhat_max": (lambda v: v > 1.0, "must be a number above 1"),
    "ess_bulk_min_per_chain": (lambda v: v > 0, "must be a positive number"),
    "ess_tail_min_per_chain": (lambda v: v > 0, "must be a positive number"),
    "mcse_elpd_max": (lambda v: v > 0, "must be a positive number of nats"),
    "stability_window": (lambda v: 0 < v < 1, "must be a fraction between 0 and 1 (exclusive)"),
    "stability_mcse_factor": (lambda v: v > 0, "must be a positive number"),
    "delta_mcse_ratio_max": (lambda v: v > 0, "must be a positive number"),
    "delta_mcse_floor": (lambda v: v >= 0, "must be a number of nats, 0 or more"),
    "min_draws_per_chain": (lambda v: v >= 4, "must be a number of draws, 4 or more"),
}


def _check_target(key, value, where):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{where}: target {key!r} must be a number, got {value!r}")
    ok, need = _RULES[key]
    if not math.isfinite(value) or not ok(float(value)):
        raise ValueError(f"{where}: target {key!r} {need}, got {value!r}")


def _read_source(src: Mapping, where: str, *, cli: bool) -> dict:
    known = Targets.keys()
    out = {}
    for raw_key, value in src.items():
        key = str(raw_key).replace("-", "_") if cli else raw_key
        if key not in known:
            raise ValueError(f"{where}: unknown target {raw_key!r} (known: {', '.join(known)})")
        if cli and value is None:
            continue
        if cli and isinstance(value, str):
            try:
                value = float(value)
            except ValueError:
                raise ValueError(f"{where}: target {raw_key!r} must be a number, got {value!r}") \
                    from None
        _check_target(key, value, where)
        out[key] = float(value)
    return out


# ---------------------------------------------------------------------------------------------
# Small helpers
# ---------------------------------------------------------------------------------------------

def _more(s_needed: float, s_now: int) -> int:
    """Draws per chain still needed to reach ``s_needed`` (at least 1 when called for a miss)."""
    return max(1, int(math.ceil(s_needed - 1e-9)) - s_now)


def _check(name, ok, value, target, more_draws, note, draw_rate, margin=None):
    """One check row; ``margin`` (passed checks with a stopping margin) is null otherwise."""
    if ok:
        more_draws = 0
    minutes = None
    if more_draws is not None and draw_rate:
        minutes = round(more_draws / draw_rate / 60.0, 2)
    return {"name": name, "ok": ok, "value": value, "target": target,
            "more_draws": more_draws, "minutes": minutes, "note": note,
            "margin": bool(margin) if ok and margin is not None else None}


def _obs_name(i: int, labels) -> str:
    return repr(labels[i]) if labels is not None else f"#{i + 1}"


def _name_list(idx: Sequence[int], labels) -> str:
    names = [_obs_name(i, labels) for i in idx[:_MAX_NAMED]]
    if len(idx) > _MAX_NAMED:
        names.append(f"+{len(idx) - _MAX_NAMED} more")
    return ", ".join(names)


def _get(d, *path, where="scores"):
    cur = d
    for p in path:
        if not isinstance(cur, Mapping) or p not in cur:
            raise ValueError(f"{where}: missing {'.'.join(path)}")
        cur = cur[p]
    return cur


# ---------------------------------------------------------------------------------------------
# The checks
# ---------------------------------------------------------------------------------------------

def _worst_param(mixing, key, largest):
    params = mixing.get("params") or {}
    best_name, best_val = None, None
    for name, row in params.items():
        v = _num(row.get(key)) if isinstance(row, Mapping) else None
        if v is None:
            continue
        if best_val is None or (v > best_val if largest else v < best_val):
            best_name, best_val = name, v
    return best_name


_NOT_CONVERGING = "not converging at this rate: {what} since half the draws, so no projection"


def _rhat_check(mixing, trail_rhat, chains, S, t: Targets, rate, view: "_TrailAt"):
    target = t.rhat_max
    value = _num(mixing.get("rhat_max"))
    raw = mixing.get("rhat_max")
    if value is None:
        note = ("R̂ not defined: fewer than 4 draws per chain, or every parameter constant"
                if raw is None else
                f"R̂ not finite ({raw!r}): a parameter may be constant or the chains degenerate")
        return _check("rhat", False, None, target, None, note, rate)
    worst = _worst_param(mixing, "rhat", largest=True)
    if value <= target:
        return _check("rhat", True, value, target, 0, None, rate,
                      margin=value <= 1.0 + MARGIN_RHAT * (target - 1.0))
    note = f"worst: {worst}; " if worst else ""
    if trail_rhat and trail_rhat[0] <= value:
        # R̂ has not fallen across the window (trail_rhat: oldest first). Noise alone does that
        # often, so call the chains stuck only when R̂ − 1 is also well above what their
        # autocorrelation explains for stationary chains: (τ − 1)/S with τ = chains·S/bulk-ESS.
        ess = _num(mixing.get("ess_bulk_min"))
        expected = max(chains * S / ess - 1.0, 0.0) / S if ess and ess > 0 else 0.0
        if value - 1.0 > 2.0 * expected:
            return _check("rhat", False, value, target, None,
                          note + "R̂ has not fallen over the recent draws and is above what "
                          "autocorrelation explains: the chains may be stuck apart, more draws "
                          "may not help", rate)
    then = view.half_value("rhat")
    if then is not None and value >= then:
        return _check("rhat", False, value, target, None,
                      note + _NOT_CONVERGING.format(what=f"R̂ has not fallen ({then:.4g} → {value:.4g})"),
                      rate)
    s_needed = S * (value - 1.0) / (target - 1.0)
    return _check("rhat", False, value, target, _more(s_needed, S),
                  note + "rough projection, R̂ − 1 taken to fall as 1/draws", rate)


def _pooled_note(n_used):
    return f"; rate pooled over this and {n_used} earlier snapshot(s) since half the draws" \
        if n_used else ""


def _ess_check(name, mixing, key, per_chain, chains, S, rate, view: "_TrailAt"):
    target = per_chain * chains
    raw = mixing.get(key)
    value = _num(raw)
    if value is None:
        return _check(name, False, None, target, None,
                      f"{name} not defined: fewer than 4 draws per chain, or every parameter "
                      "constant" if raw is None else f"{name} not finite ({raw!r})", rate)
    if value >= target:
        return _check(name, True, value, target, 0, None, rate, margin=value >= MARGIN_ESS * target)
    worst = _worst_param(mixing, key.replace("_min", ""), largest=False)
    note = f"worst: {worst}; " if worst else ""
    note += f"goal {per_chain:g} per chain × {chains} chains"
    if value <= 0:
        return _check(name, False, value, target, None, note + "; no projection from ESS ≤ 0", rate)
    then = view.half_value(key)
    # Small ESS estimates scatter (tail-ESS is biased upward early), so a lack of growth counts
    # only once the value at half the draws was at least half the goal.
    if then is not None and then >= 0.5 * target and value <= then:
        return _check(name, False, value, target, None, note + "; " + _NOT_CONVERGING.format(
            what=f"{name} has not grown ({then:,.0f} → {value:,.0f})"), rate)
    ess_rate, n_used = view.pooled_rate(key, value)
    s_single = S * target / value
    s_needed = s_single if not n_used else target / ess_rate
    if n_used and s_needed <= S:
        # the pooled rate says the goal is already met while the current value says it is not
        # (earlier, upward-biased small-sample ESS): it has no basis here, use this point alone
        s_needed, n_used = s_single, 0
    return _check(name, False, value, target, _more(s_needed, S), note + _pooled_note(n_used),
                  rate)


def _mcse_check(loo, S, t: Targets, rate, view: "_TrailAt", khat_hard=False):
    target = t.mcse_elpd_max
    raw = loo.get("mcse")
    value = _num(raw)
    if value is None or value < 0:
        return _check("mcse", False, value, target, None,
                      f"MCSE of elpd_loo not usable ({raw!r})", rate)
    hard_note = ("k̂ above 0.7: the MCSE of elpd_loo is not reliable there and more draws will "
                 "not fix it (refit those observations)")
    # a subsampled estimate: ``mcse`` is the draws' Monte Carlo error, judged alone (only it falls
    # with more draws); the subsampling SE is reported beside it and never blocks
    sub = _num((loo.get("subsampled") or {}).get("se_subsample"))
    sub_note = (f"subsampling SE {sub:.3g} beside it (more draws do not lower it; a larger subsample "
                "does)") if sub is not None else None

    def joined(*notes):
        return "; ".join(x for x in notes if x) or None

    if value <= target:
        return _check("mcse", True, value, target, 0, joined(hard_note if khat_hard else None, sub_note),
                      rate, margin=value <= MARGIN_MCSE * target)
    if khat_hard:
        return _check("mcse", False, value, target, None, joined(hard_note, sub_note), rate)
    then = view.half_value("mcse")
    if then is not None and value >= then:
        return _check("mcse", False, value, target, None, joined(_NOT_CONVERGING.format(
            what=f"the MCSE has not fallen ({then:.3g} → {value:.3g})"), sub_note), rate)
    return _check("mcse", False, value, target, _more(S * (value / target) ** 2, S), sub_note, rate)


def _tail_draws_needed(r_max: float) -> int:
    """Smallest total S with ceil(min(S/5, 3 sqrt(S/r))) ≥ KHAT_MIN_TAIL (the PSIS tail length)."""
    m = KHAT_MIN_TAIL - 1  # ceil(x) ≥ M  ⇔  x > M − 1
    return int(math.floor(max(5.0 * m, (m / 3.0) ** 2 * r_max))) + 1


def _khat_check(pk, flags, chains, S, labels, rate, r_eff=None, exact=frozenset(), subsampled=False):
    """The k̂ check, the refit list, and whether k̂ was judged (enough draws in every tail).

    ``exact``: 0-based observations whose elpd is exact (a finished refit): their k̂ is not judged.
    ``subsampled``: PSIS ran on a random sample of the observations only; the others carry no k̂
    (null) and are not judged."""
    values = pk.get("values")
    if values is None:
        raise ValueError("scores: missing pareto_k.values")
    values = list(values)
    n = len(values)
    if labels is not None and len(labels) != n:
        raise ValueError(f"observation labels: {len(labels)} labels for {n} observations")
    flags = flags if isinstance(flags, Mapping) else {}
    flat = set(flags.get("flat_tail_observations") or ())     # k̂ = −inf: equal weights, fine
    broken = set(flags.get("bad_observations") or ())         # NaN/+inf log-likelihood: bad input
    too_few = bool(flags.get("too_few_draws"))                # no tail fit yet (k̂ = +inf)
    total = chains * S
    thr = _num(pk.get("threshold"))
    if thr is None:
        thr = khat_threshold(total)
    # Sample size the PSIS code used for its threshold, as a multiple of the total draws.
    scale = 1.0
    if 0 < thr < KHAT_LIMIT - 1e-12:
        scale = 10.0 ** (1.0 / (1.0 - thr)) / total
    # Tail length of the PSIS fit, M = ceil(min(S/5, 3 sqrt(S/r_eff))): the smallest over the
    # observations (largest r_eff) decides whether k̂ can be judged.
    r_vals = [_num(r) for r in (r_eff or ())]
    r_max = max((r for r in r_vals if r is not None and r > 0), default=1.0)
    tail_min = math.ceil(min(total / 5.0, 3.0 * math.sqrt(total / r_max)))
    judged = not too_few and tail_min >= KHAT_MIN_TAIL

    hard, soft, bad, undefined, refit, finite = [], [], [], [], [], []
    for i, raw in enumerate(values):
        if i in exact:
            continue  # its PSIS value is replaced by an exact one
        if i in broken:
            bad.append(i)
            continue
        k = None if raw is None or isinstance(raw, bool) else float(raw)
        if k is not None and math.isnan(k):
            k = None
        if k is None:
            if i in flat or subsampled:
                continue
            if not too_few:
                undefined.append(i)
            continue
        if k == -math.inf:
            continue
        if k > KHAT_LIMIT:  # includes +inf (an infinite ratio)
            hard.append(i)
            refit.append({"observation": i + 1,
                          "label": labels[i] if labels is not None else None,
                          "k": k if math.isfinite(k) else None, "why": "k̂ above 0.7"})
            continue
        finite.append(k)
        if k > thr:
            soft.append(i)
    value = max(finite) if finite else None
    if hard:
        value = max(float(values[i]) for i in hard)
        value = value if math.isfinite(value) else None
    caution = None
    worst_finite = max([float(values[i]) for i in hard if math.isfinite(float(values[i]))] + finite,
                       default=None)
    if judged and worst_finite is not None and worst_finite >= KHAT_CAUTION:
        caution = (f"worst k̂ {worst_finite:.2f} is near the 0.7 limit: there PSIS-LOO can be off by "
                   "more than its MCSE says (the MCSE does not include that bias); exact refits of "
                   "the worst observations would confirm the estimate")

    if not judged:
        # Provisional: a generalized Pareto fit to fewer than KHAT_MIN_TAIL draws scatters too much
        # (and leans on its prior) to name observations; no refit advice, no "needs a look".
        need = math.ceil(_tail_draws_needed(r_max) / (scale * chains))
        notes = [f"too few draws to judge k̂ yet (PSIS tail of {max(tail_min, 0)} draws, "
                 f"{KHAT_MIN_TAIL} needed); k̂ values are provisional"]
        more = max(1, need - S) if need > S else 1
        if bad:
            notes.append(f"log-likelihood not finite for {_name_list(bad, labels)}: fix the input")
            more = None
        c = _check("k-hat", False, value, thr, more, "; ".join(notes), rate)
        c["provisional"] = True
        return c, [], None

    if not (hard or soft or bad or undefined):
        c = _check("k-hat", True, value, thr, 0, caution, rate)
        c["provisional"] = False
        return c, refit, caution

    notes, more = [], 0
    if soft:
        k_worst = max(float(values[i]) for i in soft)
        # threshold(S_tot) ≥ k  ⇔  S_tot ≥ 10^(1/(1−k)); S_tot = scale · chains · S'.
        s_needed = 10.0 ** (1.0 / (1.0 - k_worst)) / (scale * chains)
        soft_more = _more(s_needed, S)
        notes.append(f"{len(soft)} obs above the sample-size threshold ({_name_list(soft, labels)}),"
                     f" fixable with ~{soft_more:,} more draws/chain")
        more = soft_more
    if undefined:
        notes.append(f"k̂ not defined for {_name_list(undefined, labels)}")
        more = None
    if bad:
        notes.append(f"log-likelihood not finite for {_name_list(bad, labels)}: fix the input")
        more = None
    if hard:
        notes.insert(0, f"{len(hard)} obs need exact refits or K-fold, more draws will not fix them:"
                        f" {_name_list(hard, labels)}")
        more = None
    if caution:
        notes.append(caution)
    c = _check("k-hat", False, value, thr, more, "; ".join(notes), rate)
    c["provisional"] = False
    return c, refit, caution


# Key under which a TrailPoint holds its validated reading, so a long trail is validated once per
# point, not once per snapshot; bounded_trail's copies drop it.
_READ = "_read"


class TrailPoint(dict):
    """A trail point its owner will not change after adding it to a trail (the service's points):
    :func:`evaluate` keeps its validated reading in it.  Plain dicts are read afresh every time."""


def _read_point(j, p):
    """``(s, skipped, q)`` of one trail point: its draws per chain, how many points without a finite
    elpd it counts (itself and ``folded_without_elpd``), and its reading (None without elpd)."""
    if not isinstance(p, Mapping):
        raise ValueError(f"trail point {j}: expected an object, got {type(p).__name__}")
    for key in ("draws_per_chain", "loo_elpd", "loo_mcse"):
        if key not in p:
            raise ValueError(f"trail point {j}: missing {key!r}")
    s = p["draws_per_chain"]
    if isinstance(s, bool) or not isinstance(s, (int, float)) or not math.isfinite(s) or s < 0:
        raise ValueError(f"trail point {j}: bad draws_per_chain {s!r}")
    elpd = _num(p["loo_elpd"])
    # ``folded_without_elpd``: points without a finite elpd that bounded_trail dropped before this one
    skipped = int(p.get("folded_without_elpd") or 0)
    if elpd is None:
        return s, skipped + 1, None
    passed = p.get("passed")
    return s, skipped, {"s": float(s), "elpd": elpd, "mcse": _num(p.get("loo_mcse")),
                        "covers": max(1, int(p.get("covers") or 1)),
                        "rhat": _num(p.get("rhat_max")),
                        "ess_bulk_min": _num(p.get("ess_bulk_min")),
                        "ess_tail_min": _num(p.get("ess_tail_min")),
                        "passed": passed if isinstance(passed, bool) else None}


def _read_trail(trail):
    """Validated trail points with a finite elpd, sorted by draws per chain (stable), and the count
    of points without one (``bounded_trail``; :class:`TrailIndex` keeps its own readings)."""
    pts, skipped = [], 0
    for j, p in enumerate(trail or ()):
        _, without, q = _read_point(j, p)
        skipped += without
        if q is not None:
            pts.append(q)
    pts.sort(key=lambda q: q["s"])
    return pts, skipped


_HALF_KEYS = ("mcse", "rhat", "ess_bulk_min", "ess_tail_min")
_POOLED_KEYS = ("ess_bulk_min", "ess_tail_min")


class _SparseExtremes:
    """Max and min of an append-only list over any range [a, n) in O(1) (a sparse table: level j
    holds the extremes of the 2^j values from each position); an append costs O(log n)."""

    def __init__(self):
        self.high: list[list[float]] = [[]]
        self.low: list[list[float]] = [[]]

    def append(self, x: float) -> None:
        self.high[0].append(x)
        self.low[0].append(x)
        n, j = len(self.high[0]), 1
        while (1 << j) <= n:
            if len(self.high) == j:
                self.high.append([])
                self.low.append([])
            i, half = n - (1 << j), 1 << (j - 1)
            self.high[j].append(max(self.high[j - 1][i], self.high[j - 1][i + half]))
            self.low[j].append(min(self.low[j - 1][i], self.low[j - 1][i + half]))
            j += 1

    def range(self, a: int, b: int) -> tuple[float, float]:
        j = (b - a).bit_length() - 1
        return (max(self.high[j][a], self.high[j][b - (1 << j)]),
                min(self.low[j][a], self.low[j][b - (1 << j)]))


class TrailIndex(Sequence):
    """A trail of earlier snapshot points with the indexes :func:`evaluate` reads, so a verdict
    costs O(log N) in the trail's length N instead of a walk over every point.

    A sequence of the points as given (``bounded_trail`` and the history take it as a list); each
    point is validated once, when added.  Kept, in the order of draws per chain (stable; a point
    added out of order re-sorts the index, O(N log N), which the service never does):

    * every point's draws per chain with the prefix counts of points without a finite elpd;
    * the readings with a finite elpd, and the sparse table of their elpd (max/min over the
      settled check's window);
    * per quantity (MCSE, R̂, bulk/tail ESS) the positions of the readings holding it, and for the
      ESS the exact prefix sums (``fractions.Fraction``) of the pooled rate's terms, so every window
      sum is the correctly rounded sum of its terms, whatever came before;
    * the passing streak at the end, per (targets, chains), extended as points arrive.

    ``evaluate`` builds one from a plain list (O(N), as reading the list costs anyway); the service
    keeps one per run and appends each snapshot's point.
    """

    def __init__(self, points=()):
        self.points: list = []
        self._clear()
        for p in points:
            self.append(p)

    def _clear(self):
        self._all_s: list[float] = []       # every point's draws per chain, sorted
        self._skip_prefix: list[int] = [0]  # prefix sums of the points without a finite elpd
        self._pts: list[dict] = []          # readings with a finite elpd, sorted by draws
        self._pts_s: list[float] = []
        self._extremes = _SparseExtremes()
        self._with = {key: [] for key in _HALF_KEYS}  # positions in _pts holding the key
        self._pooled = {key: ([], [Fraction(0)], [Fraction(0)]) for key in _POOLED_KEYS}
        self._streaks: dict = {}

    # -------------------------------------------------------------------- the sequence
    def __len__(self) -> int:
        return len(self.points)

    def __getitem__(self, i):
        return self.points[i]

    def append(self, p) -> None:
        read = p.get(_READ) if type(p) is TrailPoint else None
        if read is None:
            read = _read_point(len(self.points), p)
            if type(p) is TrailPoint:
                p[_READ] = read
        self.points.append(p)
        if self._all_s and read[0] < self._all_s[-1]:
            self._resort()
        else:
            self._insert(read)

    def _resort(self) -> None:
        readings = [q[_READ] if type(q) is TrailPoint and _READ in q else _read_point(j, q)
                    for j, q in enumerate(self.points)]
        self._clear()
        for read in sorted(readings, key=lambda r: r[0]):  # stable, as _read_trail sorts
            self._insert(read)

    def _insert(self, read) -> None:
        s, without, q = read
        self._all_s.append(float(s))
        self._skip_prefix.append(self._skip_prefix[-1] + without)
        if q is None:
            return
        position = len(self._pts)
        self._pts.append(q)
        self._pts_s.append(q["s"])
        self._extremes.append(q["elpd"])
        for key in _HALF_KEYS:
            if q.get(key) is not None:
                self._with[key].append(position)
        for key in _POOLED_KEYS:
            v = q.get(key)
            if v is not None and v > 0 and q["s"] > 0:
                where, terms, draws = self._pooled[key]
                where.append(position)
                terms.append(terms[-1] + Fraction(q["s"] * (v / q["s"])))
                draws.append(draws[-1] + Fraction(q["s"]))

    def at(self, S) -> "_TrailAt":
        """The trail as the verdict at ``S`` draws per chain reads it: the points before S."""
        return _TrailAt(self, float(S))


class _TrailAt:
    """Queries on the points of a :class:`TrailIndex` strictly before S draws per chain."""

    def __init__(self, index: TrailIndex, S: float):
        self.index, self.S = index, S
        self.count = bisect_left(index._pts_s, S)  # readings with a finite elpd before S
        self.skipped = index._skip_prefix[bisect_left(index._all_s, S)]

    def first_s(self) -> float:
        return self.index._pts_s[0]

    def last_at_or_before(self, s: float) -> int | None:
        i = bisect_right(self.index._pts_s, s, 0, self.count) - 1
        return i if i >= 0 else None

    def elpd_range(self, a: int) -> tuple[float, float]:
        """(max, min) of elpd over the readings a .. count - 1."""
        return self.index._extremes.range(a, self.count)

    def first_with(self, key: str, a: int):
        where = self.index._with[key]
        i = bisect_left(where, a)
        return self.index._pts[where[i]][key] if i < len(where) and where[i] < self.count else None

    def half_value(self, key: str):
        end = bisect_right(self.index._pts_s, 0.5 * self.S, 0, self.count)
        where = self.index._with[key]
        i = bisect_left(where, end) - 1
        return self.index._pts[where[i]][key] if i >= 0 else None

    def pooled_rate(self, key: str, value: float):
        """Rate of a quantity that grows linearly in S (ESS), pooled over the recent trail and the
        current point (S, ``value``).

        Points used: the trail points with ``s ≥ S/2`` and a positive finite ``key``, plus the
        current point. Pooled rate = Σ s_k·r_k / Σ s_k with r_k = v_k / s_k (weights ∝ draws, i.e.
        inverse variance, since the variance of a rate estimate falls about as 1/s): Σ ESS_k / Σ s_k,
        the weighted least-squares slope of ESS = a·S through the origin with Var(ESS_k) ∝ s_k. Both
        sums are the correctly rounded sums of their terms (``math.fsum``), from the index's exact
        prefix sums, so the window costs O(log N). Returns (rate, number of trail points used);
        with no usable trail point the rate is the current point's alone and the count 0.
        """
        S = self.S
        where, terms, draws = self.index._pooled[key]
        lo = bisect_left(self.index._pts_s, 0.5 * S, 0, self.count)
        i0, i1 = bisect_left(where, lo), bisect_left(where, self.count)
        if i1 == i0:
            return value / S, 0
        num = float(terms[i1] - terms[i0] + Fraction(S * (value / S)))
        den = float(draws[i1] - draws[i0] + Fraction(S))
        return num / den, i1 - i0

    def hold(self, t: Targets, chains) -> tuple[int, float]:
        """(snapshots in the passing streak that ends at the newest reading, its first draws per
        chain; ``S`` when there is none), counting what a point ``covers``; kept per (targets,
        chains) and extended over the readings added since."""
        pts, key = self.index._pts, (t, chains)
        done, count, start = self.index._streaks.get(key, (0, 0, None))
        if done > self.count:  # an earlier S than last time: walk back
            done, count, start = 0, 0, None
            for q in reversed(pts[:self.count]):
                if not _point_passed(q, t, chains):
                    break
                count, start = count + q.get("covers", 1), q["s"]
            return (count, start) if count else (0, self.S)
        for q in pts[done:self.count]:
            if _point_passed(q, t, chains):
                count, start = count + q.get("covers", 1), (q["s"] if count == 0 else start)
            else:
                count, start = 0, None
        self.index._streaks[key] = (self.count, count, start)
        return (count, start) if count else (0, self.S)


def _settled_check(view: "_TrailAt", loo, S, t: Targets, rate):
    """The settled check, and the R̂ of the oldest window point holding one (a list of at most one
    value: what the R̂ check reads of the window)."""
    w = t.stability_window
    skipped = view.skipped
    elpd_now, mcse_now = _num(loo.get("elpd")), _num(loo.get("mcse"))
    tail_note = f"; {skipped} trail point(s) without a finite elpd ignored" if skipped else ""
    if elpd_now is None or mcse_now is None:
        return _check("settled", False, None, None, None,
                      f"current elpd_loo or its MCSE not finite{tail_note}", rate), None
    target = t.stability_mcse_factor * mcse_now
    cutoff = (1.0 - w) * S
    anchor = view.last_at_or_before(cutoff)
    if anchor is None:
        first = view.first_s() if view.count else float(S)
        span = S - first
        if view.count:
            high, low = view.elpd_range(0)
            value = max(high, elpd_now) - min(low, elpd_now)
        else:
            value = 0.0
        note = (f"snapshots span {span:,.0f} of the {S - cutoff:,.0f} draws/chain the window needs"
                + tail_note)
        return _check("settled", False, value, target, _more(first / (1.0 - w), S), note,
                      rate), None
    high, low = view.elpd_range(anchor)
    value = max(high, elpd_now) - min(low, elpd_now)
    oldest = view.first_with("rhat", anchor)
    rhats = [] if oldest is None else [oldest]
    if value < target:
        return _check("settled", True, value, target, 0, tail_note[2:] or None, rate), rhats
    note = ("elpd_loo still drifting; projection is a fresh window from now (a lower bound)"
            + tail_note)
    return _check("settled", False, value, target, _more(S / (1.0 - w), S), note, rate), rhats


def _compare_check(comparison, run, loo, S, t: Targets, rate, finished=frozenset()):
    rows = list(comparison)
    for j, r in enumerate(rows):
        if not isinstance(r, Mapping) or "run" not in r:
            raise ValueError(f"comparison row {j}: expected an object with 'run'")
    if len(rows) < 2 or run is None or not any(r["run"] == run for r in rows):
        return None
    best = rows[0]
    pairs = [r for r in rows[1:] if r["run"] == run] if best["run"] != run else rows[1:]
    mcse_self = _num(loo.get("mcse"))
    worst, notes = None, []
    ok_all, more_all, unknown, margin_all = True, 0, False, True
    for r in pairs:
        other = best["run"] if r["run"] == run else r["run"]
        for key in ("se_delta", "mcse_delta"):
            if key not in r:
                raise ValueError(f"comparison row for run {r['run']!r}: missing {key!r}")
        se, md = _num(r["se_delta"]), _num(r["mcse_delta"])
        if md is None or se is None:
            ok_all, unknown = False, True
            notes.append(f"vs {other}: SE or MCSE of Δ not finite")
            continue
        allowed = max(t.delta_mcse_ratio_max * se, t.delta_mcse_floor)
        other_sq = max(md ** 2 - (mcse_self or 0.0) ** 2, 0.0)
        if other in finished and mcse_self is not None:
            # The other run's part of MCSE(Δ)² is fixed: judge only what this run can still
            # reduce. Its goal is the room the fixed part leaves, but never below an even share
            # allowed/√2 (so a large fixed part cannot keep this run open for ever).
            goal = math.sqrt(max(allowed ** 2 - other_sq, 0.5 * allowed ** 2))
            ratio = mcse_self / goal if goal > 0 else math.inf
            if worst is None or ratio > worst[0]:
                worst = (ratio, mcse_self, goal)
            stuck = allowed ** 2 - other_sq < 0.5 * allowed ** 2
            if mcse_self <= goal:
                margin_all = margin_all and mcse_self <= MARGIN_MCSE * goal
                if md > allowed:
                    notes.append(f"vs {other} (finished): MCSE(Δ) {md:.3g} stays above {allowed:.3g} "
                                 f"because of that run's fixed part {math.sqrt(other_sq):.3g}; this "
                                 "run has done its share")
                continue
            ok_all = False
            more_all = max(more_all, _more(S * (mcse_self / goal) ** 2, S))
            notes.append(f"vs {other} (finished): this run's part {mcse_self:.3g} > {goal:.3g}"
                         + (" (the finished run's fixed part leaves no more room)" if stuck else ""))
            continue
        ratio = md / allowed if allowed > 0 else math.inf
        if worst is None or ratio > worst[0]:
            worst = (ratio, md, allowed)
        if md <= allowed:
            margin_all = margin_all and md <= MARGIN_MCSE * allowed
            continue
        ok_all = False
        room = allowed ** 2 - other_sq
        if mcse_self is None or mcse_self <= 0 or room <= 0:
            unknown = True
            notes.append(f"vs {other}: the other run's MCSE alone is too large; it needs more draws")
            continue
        need = _more(S * mcse_self ** 2 / room, S)
        more_all = max(more_all, need)
        notes.append(f"vs {other}: MCSE(Δ) {md:.3g} > {allowed:.3g}")
    if not pairs:
        return None
    value, target = (worst[1], worst[2]) if worst else (None, None)
    more = None if unknown else more_all
    return _check("compare", ok_all, value, target, more, "; ".join(notes) or None, rate,
                  margin=margin_all if ok_all else None)


def _point_passed(q, t: Targets, chains) -> bool:
    """Did an earlier snapshot pass? Its recorded ``passed`` when the trail carries it, else what
    its recorded values say (MCSE, and R̂ / ESS when present)."""
    if q["passed"] is not None:
        return q["passed"]
    if q["mcse"] is None or q["mcse"] > t.mcse_elpd_max:
        return False
    if q["rhat"] is not None and q["rhat"] > t.rhat_max:
        return False
    for key, per_chain in (("ess_bulk_min", t.ess_bulk_min_per_chain),
                           ("ess_tail_min", t.ess_tail_min_per_chain)):
        if q[key] is not None and q[key] < per_chain * chains:
            return False
    return True


def bounded_trail(trail: Sequence[Mapping], targets: "Targets | None" = None, *, chains: int = 1,
                  upto: float | None = None) -> list[dict]:
    """The part of a trail that :func:`evaluate` can still use, so its cost stays bounded.

    For any later evaluation at S' ≥ ``upto`` draws per chain (default: the largest
    ``draws_per_chain`` in the trail), the verdict reads only

    * the settled check's window: the latest point at or before (1 − w) S' and everything after;
    * per quantity (R̂, bulk/tail ESS, MCSE), the latest point at or before S'/2 holding it
      (``_TrailAt.half_value``), and the points after S'/2 (the pooled ESS rate);
    * the passing streak ending at the newest point (``_TrailAt.hold``: its length and where it began);
    * the count of points without a finite elpd (a note).

    Since S' ≥ ``upto``, every such anchor lies at or after the anchor computed at ``upto``; the points
    before the earliest anchor are dropped.  What they still tell is folded into the first kept point
    (``folded_without_elpd``: how many had no finite elpd) and, when the newest points form a passing
    streak that reaches into the dropped part, into one point that stands for the dropped part of the
    streak (the streak's first point, with ``covers`` = how many passing snapshots it stands for).
    So ``evaluate(scores, bounded_trail(trail, ...), ...)`` equals ``evaluate(scores, trail, ...)``
    for the same targets and chains; a later stability window wider than ``targets``' would move the
    settled anchor earlier and is not covered.  The result holds about w/(1 − w) of the draws since
    the anchor: a bounded number of points at a steady snapshot cadence in draws (a fixed cadence in
    time keeps the window's points proportional to the points in (1 − w) S .. S).
    """
    t = targets if targets is not None else Targets()
    # copies without the cached readings: the copies' fields may change below
    points = [TrailPoint((k, v) for k, v in p.items() if k != _READ) if type(p) is TrailPoint
              else dict(p) if isinstance(p, Mapping) else p for p in trail or ()]
    if not points:
        return []
    if upto is None:
        upto = max(float(p["draws_per_chain"]) for p in points)
    pts, _ = _read_trail(points)  # validated, sorted, finite-elpd points
    if not pts:
        return points
    S = float(upto)
    settled = [q["s"] for q in pts if q["s"] <= (1.0 - t.stability_window) * S]
    if not settled:
        return points  # the settled check still reads every point (its no-anchor branch)
    anchors = [settled[-1], 0.5 * S]  # the pooled ESS rate reads every point from S'/2 on
    for key in ("rhat", "ess_bulk_min", "ess_tail_min", "mcse"):
        found = [q["s"] for q in pts if q["s"] <= 0.5 * S and q.get(key) is not None]
        if found:
            anchors.append(found[-1])
    cut = min(anchors)
    order = sorted(range(len(points)), key=lambda j: float(points[j]["draws_per_chain"]))
    dropped = [points[j] for j in order if float(points[j]["draws_per_chain"]) < cut]
    kept = [points[j] for j in order if float(points[j]["draws_per_chain"]) >= cut]
    if not dropped:
        return kept
    finite = lambda p: _num(p.get("loo_elpd")) is not None
    without = sum(int(p.get("folded_without_elpd") or 0) + (0 if finite(p) else 1) for p in dropped)
    head = []
    kept_pts, _ = _read_trail(kept)
    if all(_point_passed(q, t, chains) for q in kept_pts):
        streak = []
        for p in reversed([p for p in dropped if finite(p)]):
            q, _ = _read_trail([p])
            if not _point_passed(q[0], t, chains):
                break
            streak.append(p)
        if streak:
            first = dict(streak[-1])
            first["covers"] = sum(max(1, int(p.get("covers") or 1)) for p in streak)
            first["passed"] = True
            head = [first]
    # the without-elpd count rides on the first point that stays (never on a dropped one)
    if head:
        head[0]["folded_without_elpd"] = without  # its own earlier count is part of ``without``
    else:
        kept[0]["folded_without_elpd"] = without + int(kept[0].get("folded_without_elpd") or 0)
    return head + kept


# ---------------------------------------------------------------------------------------------
# Per-parameter projections (the Mixing view's "still needs")
# ---------------------------------------------------------------------------------------------

def parameter_projections(mixing: Mapping | None, *, chains: int, draws_per_chain: int,
                          targets: Targets | None = None) -> dict:
    """Draws per chain each parameter still needs for its two ESS goals, from this snapshot alone.

    ESS ∝ S (a fixed integrated autocorrelation time, as for the ``ess-bulk``/``ess-tail`` checks):
    with S the current draws per chain, a goal g = ``ess_*_min_per_chain`` × chains and the
    parameter's ESS e,
        S' = S · g / e,   more = ceil(S') − S   (0 when e ≥ g),
    and the parameter's ``more_draws`` is the larger of the bulk and tail values. This is the
    single-point rule; the checks themselves pool the rate over recent snapshots for the worst
    parameter, so the two can differ a little for that parameter. R̂ gets no projection per
    parameter (the check's rough 1/S rule needs the trail to judge whether the chains are stuck).

    Parameters
    ----------
    mixing : the ``mixing`` part of ``Scores.to_dict()`` (``params{name: {ess_bulk, ess_tail, ...}}``)
        or None.
    chains, draws_per_chain : the run's chains and the current draws per chain S.
    targets : the verdict's ``Targets`` (defaults when None).

    Returns
    -------
    dict name -> int or None: None when there is no basis (an ESS not defined, not finite or ≤ 0).
    """
    t = targets or Targets()
    S = int(draws_per_chain)
    out = {}
    for name, row in ((mixing or {}).get("params") or {}).items():
        needs = []
        for key, per_chain in (("ess_bulk", t.ess_bulk_min_per_chain),
                               ("ess_tail", t.ess_tail_min_per_chain)):
            value = _num(row.get(key)) if isinstance(row, Mapping) else None
            goal = per_chain * chains
            if value is None or value <= 0 or S <= 0:
                needs.append(None)
            else:
                needs.append(0 if value >= goal else _more(S * goal / value, S))
        out[name] = None if None in needs else max(needs)
    return out


# ---------------------------------------------------------------------------------------------
# evaluate / describe / the stop signal
# ---------------------------------------------------------------------------------------------

def evaluate(scores: Mapping, trail: Sequence[Mapping] | None, *, chains: int,
             draws_per_chain: int, draw_rate: float | None, targets: Targets | None = None,
             labels: Sequence[str] | None = None,
             comparison: Sequence[Mapping] | None = None,
             activity: str = "growing",
             finished_runs: Sequence[str] | None = None,
             exact: Sequence[int] | None = None, refit_run: bool = False) -> dict:
    """Decide whether a run has enough draws, and project what is missing.

    Parameters
    ----------
    scores : mapping in the ``Scores.to_dict()`` shape (docs/interfaces.md); uses ``run``, ``loo.elpd``,
        ``loo.mcse``, ``pareto_k.values`` (n,), ``pareto_k.threshold``, ``r_eff`` (n,) when present
        (the PSIS tail length, for judging k̂), ``mixing`` (None when the
        run has no parameters: the R̂/ESS checks are then skipped, ``ok`` null, not failed) and,
        when present, ``flags`` (0-based ``flat_tail_observations``: a null k̂ meaning −inf, fine;
        ``bad_observations``: non-finite log-likelihood, the check fails naming them;
        ``too_few_draws``: no tail fit yet). A null k̂ without a flag fails as "not defined".
    trail : earlier snapshot points, each ``{"draws_per_chain", "loo_elpd", "loo_mcse", "time"}``
        and optionally ``"rhat_max"``, ``"ess_bulk_min"``, ``"ess_tail_min"`` (null when unknown;
        used by the projections) and ``"passed"`` (that snapshot's verdict ``passed``; without it
        the stopping rule judges the point from its MCSE, R̂ and ESS); any order; points at or
        beyond ``draws_per_chain`` are ignored.
    chains, draws_per_chain : current number of chains and draws per chain S.
    draw_rate : measured draws per chain per second, or None (minutes are then null).
    targets : :class:`Targets` (defaults when None).
    labels : observation labels (n,) from run.json, used to name observations; else ``#i`` (1-based).
    comparison : rows of ``compare_runs`` (best first, each with ``run``, ``se_delta``,
        ``mcse_delta``) for the runs compared with this one, or None.
    activity : "growing" (draws arrive), "paused" (none for a while) or "finished" (the sampler
        stopped). Only a growing run gets minutes; the others keep their draw counts, minutes null.
    finished_runs : names of compared runs whose draws will not grow any more: their part of
        MCSE(Δ) is fixed, and the compare check judges only this run's part.
    exact : 0-based observations whose elpd comes from a finished refit (exact LOO, or every
        observation once a K-fold plan is complete): their k̂ is not judged (they are neither failed
        nor in ``refit``); ``loo`` then holds the combined values.
    refit_run : the run is a refit (its log-likelihood columns are held-out observations, ``loo`` holds
        their exact elpd and its MCSE): the k̂ check is not made (``ok`` null).

    Returns
    -------
    dict ``{"enough": bool, "checks": [{"name", "ok", "value", "target", "more_draws", "minutes",
    "note", "margin"}], "refit": [{"observation" (1-based), "label", "k", "why"}], "more_draws",
    "minutes", "passed", "stop_rule", "hold", "attention", "activity", "cautions"}``.
    ``ok`` is true/false, or null for a check that could not be made; ``margin`` says whether a
    passed check passed with the margin of the stopping rule (null where the rule has none).
    ``passed``: every check made passes now (no refit). ``enough`` adds the stopping rule
    (docs/verdict.md): past ``min_draws_per_chain`` (the ``floor`` check), and every check with
    margin (``stop_rule`` "margin") or a passing streak of ``HOLD_SNAPSHOTS`` snapshots spanning a
    tenth more draws ("held"); ``hold`` = {"snapshots", "since_draws_per_chain"} of the streak.
    The top-level ``more_draws`` is the largest projection over the failed checks (null when some
    failed check has none), or while only the streak is missing, the draws it still needs.
    ``attention``: observations need refits (judged k̂ above 0.7) or the input has non-finite
    log-likelihoods. ``cautions``: notes that do not block (k̂ near the limit; LOO's p_eff more than
    ``rules.P_EFF_CAUTION_FACTOR`` times the parameter count, read from ``aic.p_eff``).

    Raises ValueError for malformed input (missing fields, labels of the wrong length, bad trail,
    unknown activity).
    """
    t = targets if targets is not None else Targets()
    if not isinstance(t, Targets):
        raise ValueError(f"targets: expected Targets, got {type(t).__name__}")
    for name, v in (("chains", chains), ("draws_per_chain", draws_per_chain)):
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise ValueError(f"{name} must be a positive integer, got {v!r}")
    if draw_rate is not None:
        if isinstance(draw_rate, bool) or not isinstance(draw_rate, (int, float)) \
                or math.isnan(draw_rate) or draw_rate < 0:
            raise ValueError(f"draw_rate must be a non-negative number or None, got {draw_rate!r}")
        if draw_rate == 0 or math.isinf(draw_rate):
            draw_rate = None
    if activity not in ACTIVITIES:
        raise ValueError(f"activity must be one of {', '.join(ACTIVITIES)}, got {activity!r}")
    if activity != "growing":
        draw_rate = None  # no draws arrive: a time to the goal has no basis
    finished = frozenset(str(r) for r in (finished_runs or ()))
    if not isinstance(scores, Mapping):
        raise ValueError(f"scores: expected a mapping, got {type(scores).__name__}")
    loo = _get(scores, "loo")
    pk = _get(scores, "pareto_k")
    mixing = scores.get("mixing")
    S = draws_per_chain
    if labels is not None:
        labels = list(labels)

    index = trail if isinstance(trail, TrailIndex) else TrailIndex(trail or ())
    view = index.at(S)
    settled, window_rhats = _settled_check(view, loo, S, t, draw_rate)
    khat, refit, caution = _khat_check(pk, scores.get("flags"), chains, S, labels, draw_rate,
                                       scores.get("r_eff"), frozenset(int(i) for i in (exact or ())),
                                       subsampled=bool(loo.get("subsampled")))
    if refit_run:
        khat = {"name": "k-hat", "ok": None, "value": None, "target": khat["target"], "more_draws": None,
                "minutes": None, "note": "not judged: a refit's columns are its held-out observations",
                "margin": None, "provisional": False}
        refit, caution = [], None

    checks = []
    if mixing is None:
        skip = "skipped: the run has no parameters"
        for name, target in (("rhat", t.rhat_max),
                             ("ess-bulk", t.ess_bulk_min_per_chain * chains),
                             ("ess-tail", t.ess_tail_min_per_chain * chains)):
            checks.append({"name": name, "ok": None, "value": None, "target": target,
                           "more_draws": None, "minutes": None, "note": skip, "margin": None})
    else:
        if not isinstance(mixing, Mapping):
            raise ValueError("scores: mixing must be an object or null")
        checks.append(_rhat_check(mixing, window_rhats, chains, S, t, draw_rate, view))
        checks.append(_ess_check("ess-bulk", mixing, "ess_bulk_min", t.ess_bulk_min_per_chain,
                                 chains, S, draw_rate, view))
        checks.append(_ess_check("ess-tail", mixing, "ess_tail_min", t.ess_tail_min_per_chain,
                                 chains, S, draw_rate, view))
    checks.append(_mcse_check(loo, S, t, draw_rate, view, khat_hard=bool(refit)))
    checks.append(khat)
    checks.append(settled)
    if comparison is not None:
        cmp = _compare_check(comparison, scores.get("run"), loo, S, t, draw_rate, finished)
        if cmp is not None:
            checks.append(cmp)
    floor = math.ceil(t.min_draws_per_chain - 1e-9)
    checks.append(_check("floor", S >= floor, S, floor, None if S >= floor else floor - S,
                         None if S >= floor else "fewer draws than the floor of the stopping rule",
                         draw_rate))

    failed = [c for c in checks if c["ok"] is False]
    passed = not failed and not refit
    margin = all(c.get("margin") is not False for c in checks if c["ok"] is True)
    count, since = view.hold(t, chains)
    held = count >= HOLD_SNAPSHOTS - 1 and S >= (1.0 + HOLD_SPAN) * since
    enough = passed and (margin or held)
    if failed:
        more = None if any(c["more_draws"] is None for c in failed) else \
            max((c["more_draws"] for c in failed), default=0)
    elif not enough and not refit:
        more = max(1, math.ceil((1.0 + HOLD_SPAN) * since - 1e-9) - S)
    else:
        more = 0 if enough else None
    minutes = round(more / draw_rate / 60.0, 2) if (more is not None and draw_rate) else None
    broken = bool((scores.get("flags") or {}).get("bad_observations")) \
        if isinstance(scores.get("flags"), Mapping) else False
    return {"enough": enough, "checks": checks, "refit": refit,
            "more_draws": more, "minutes": minutes, "passed": passed,
            "stop_rule": ("margin" if margin else "held") if enough else None,
            "hold": {"snapshots": count + 1 if passed else 0,
                     "since_draws_per_chain": int(since) if passed else None},
            "attention": bool(refit) or broken, "activity": activity,
            "cautions": [c for c in (caution, p_eff_caution(
                loo.get("p_eff"), (scores.get("aic") or {}).get("p_eff"))) if c]}


def describe(verdict: Mapping) -> str:
    """One line for the headless service, e.g. ``needs ~1,200 more draws/chain (~3 min): ess-tail, mcse``."""
    checks = verdict.get("checks", [])
    skipped = [c["name"] for c in checks if c.get("ok") is None]
    if verdict.get("enough"):
        return "enough" + (f" ({', '.join(skipped)} not checked)" if skipped else "")
    idle = verdict.get("activity") in ("paused", "finished")
    suffix = f" (run {verdict['activity']})" if idle else ""
    if verdict.get("passed"):
        more = verdict.get("more_draws")
        hold = verdict.get("hold") or {}
        return (f"passing, confirming: {hold.get('snapshots', 1)} of {HOLD_SNAPSHOTS} snapshots"
                + (f", ~{more:,} more draws/chain" if more else "") + suffix)
    failed = [c for c in checks if c.get("ok") is False]
    projected = [c for c in failed if c.get("more_draws") is not None]
    stuck = [c for c in failed if c.get("more_draws") is None and c["name"] != "k-hat"]
    parts = []
    if projected:
        more = max(c["more_draws"] for c in projected)
        mins = [c["minutes"] for c in projected if c["more_draws"] == more and c["minutes"] is not None]
        when = f" (~{_fmt_minutes(mins[0])})" if mins else ""
        parts.append(f"needs ~{more:,} more draws/chain{when}: "
                     + ", ".join(c["name"] for c in projected))
    if stuck:
        parts.append("no projection: " + ", ".join(c["name"] for c in stuck))
    refit = verdict.get("refit") or []
    if refit:
        names = [repr(r["label"]) if r.get("label") is not None else f"#{r['observation']}"
                 for r in refit[:_MAX_NAMED]]
        if len(refit) > _MAX_NAMED:
            names.append(f"+{len(refit) - _MAX_NAMED} more")
        parts.append(f"{len(refit)} obs need refits or K-fold: {', '.join(names)}")
    return ("; ".join(parts) if parts else "not enough") + suffix
