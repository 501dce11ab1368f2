"""The verdict: each check's pass/fail boundary, its draw projection, target sources, the stop signal,
and the projection quality on AR(1) chains of known mixing (bench/projection_quality.py)."""

from __future__ import annotations

import importlib.util
import json
import math
import os
import threading
from pathlib import Path

import numpy as np
import pytest

from chainvigil.signals import OutsideRoot, write_signal_inside
from chainvigil.verdict import (KHAT_LIMIT, SIGNAL_NAME, Targets, describe, evaluate, khat_threshold,
                                parameter_projections)

ROOT = Path(__file__).resolve().parents[1]


def make_scores(*, rhat=1.001, ess_bulk=4000.0, ess_tail=4000.0, mcse=0.05, elpd=-120.0,
                k=(0.1, 0.2, 0.3), threshold=0.7, params=None, mixing=True, run="m1", flags=None):
    """A Scores.to_dict()-shaped mapping (docs/interfaces.md) with every check passing by default."""
    mix = None
    if mixing:
        mix = {"rhat_max": rhat, "ess_bulk_min": ess_bulk, "ess_tail_min": ess_tail,
               "params": params if params is not None else
               {"mu": {"mean": 0.0, "mcse": 0.01, "rhat": rhat, "ess_bulk": ess_bulk,
                       "ess_tail": ess_tail}}}
    d = {"run": run, "chains": 4, "draws": 4000, "observations": len(k),
         "loo": {"elpd": elpd, "se": 8.0, "mcse": mcse, "p_eff": 3.0},
         "waic": {"elpd": elpd, "se": 8.0, "p_eff": 3.0},
         "pareto_k": {"max": max((x for x in k if x is not None), default=None), "threshold": threshold, "above": [], "values": list(k)},
         "mixing": mix, "verdict": None}
    if flags is not None:
        d["flags"] = flags
    return d


def settled_trail(S, elpd=-120.0):
    """Trail points spanning the default window (a fifth of S) at a constant elpd."""
    return [{"draws_per_chain": s, "loo_elpd": elpd, "loo_mcse": None, "time": float(s)}
            for s in (S // 2, int(0.7 * S), int(0.8 * S), int(0.9 * S))]


def run(scores=None, trail=None, S=1000, chains=4, rate=None, targets=None, **kw):
    scores = scores if scores is not None else make_scores()
    trail = settled_trail(S) if trail is None else trail
    return evaluate(scores, trail, chains=chains, draws_per_chain=S, draw_rate=rate,
                    targets=targets, **kw)


def check(verdict, name):
    found = [c for c in verdict["checks"] if c["name"] == name]
    assert len(found) == 1, [c["name"] for c in verdict["checks"]]
    return found[0]


# ------------------------------------------------------------------------------------------------
# Targets


def test_default_targets_follow_the_design():
    # docs/verdict.md; R̂ ≤ 1.01 and ESS ≥ 100 per chain: Vehtari et al. 2021, Bayesian Analysis 16(2).
    t = Targets()
    assert (t.rhat_max, t.ess_bulk_min_per_chain, t.ess_tail_min_per_chain) == (1.01, 100, 100)
    assert (t.mcse_elpd_max, t.stability_window, t.stability_mcse_factor) == (0.1, 0.2, 2.0)


def test_targets_sources_in_order_run_json_then_flags():
    t = Targets.from_sources(None, {"rhat_max": 1.05, "mcse_elpd_max": 0.2},
                             {"mcse-elpd-max": "0.3", "ess_bulk_min_per_chain": None})
    assert t.rhat_max == 1.05          # from run.json
    assert t.mcse_elpd_max == 0.3      # the flag wins over run.json
    assert t.ess_bulk_min_per_chain == 100  # flag not given (None): default kept
    base = Targets(stability_window=0.5)
    assert Targets.from_sources(base, None, None).stability_window == 0.5
    assert Targets.from_sources({"rhat_max": 1.02}).rhat_max == 1.02


@pytest.mark.parametrize("src, key", [
    ({"rhat_maxx": 1.02}, "rhat_maxx"),
    ({"rhat_max": 0.99}, "rhat_max"),
    ({"rhat_max": "1.02"}, "rhat_max"),         # run.json numbers must be numbers
    ({"mcse_elpd_max": -0.1}, "mcse_elpd_max"),
    ({"stability_window": 1.0}, "stability_window"),
    ({"ess_tail_min_per_chain": True}, "ess_tail_min_per_chain"),
    ({"ess_bulk_min_per_chain": float("nan")}, "ess_bulk_min_per_chain"),
])
def test_bad_run_json_targets_are_named(src, key):
    with pytest.raises(ValueError, match=rf"run\.json targets: .*'{key}'"):
        Targets.from_sources(None, src, None)


def test_bad_flag_and_bad_targets_object_are_named():
    with pytest.raises(ValueError, match=r"command line: .*'rhat-max'.*number"):
        Targets.from_sources(None, None, {"rhat-max": "abc"})
    with pytest.raises(ValueError, match=r"command line: unknown target 'speed'"):
        Targets.from_sources(None, None, {"speed": 2})
    with pytest.raises(ValueError, match=r"runs/a/run\.json targets: expected an object"):
        Targets.from_sources(None, [1.01], None, run_json_name="runs/a/run.json")


def test_targets_overrides_change_the_verdict():
    sc = make_scores(rhat=1.03)
    assert check(run(sc), "rhat")["ok"] is False
    loose = Targets.from_sources(None, {"rhat_max": 1.05}, None)
    assert check(run(sc, targets=loose), "rhat")["ok"] is True


# ------------------------------------------------------------------------------------------------
# Individual checks: boundaries and projections


def test_everything_met_is_enough():
    v = run(rate=10.0)
    assert v["enough"] is True and v["refit"] == [] and v["more_draws"] == 0
    assert all(c["ok"] is True and c["more_draws"] == 0 for c in v["checks"])
    assert {c["name"] for c in v["checks"]} == {"rhat", "ess-bulk", "ess-tail", "mcse", "k-hat", "floor",
                                                "settled"}
    assert describe(v) == "enough"


def test_no_check_shares_its_name_with_a_run_state():
    # one name per concept: the stored run states (chainvigil.rules.RUN_STATES) are not check names
    from chainvigil.rules import RUN_STATES

    names = {c["name"] for c in run(rate=10.0)["checks"]}
    names |= {c["name"] for c in run(make_scores(), S=1000, comparison=cmp_rows(mcse_delta=0.8))["checks"]}
    assert {"settled", "compare"} <= names
    assert not names & set(RUN_STATES)


def test_rhat_boundary_and_projection():
    assert check(run(make_scores(rhat=1.01)), "rhat")["ok"] is True
    c = check(run(make_scores(rhat=1.0101)), "rhat")
    assert c["ok"] is False and c["more_draws"] >= 1
    # R̂ − 1 ∝ 1/S: at S = 1000, R̂ = 1.02 needs S' = 1000 · 0.02/0.01 = 2000 draws per chain.
    c = check(run(make_scores(rhat=1.02), S=1000, rate=5.0), "rhat")
    assert c["more_draws"] == 1000
    assert c["minutes"] == pytest.approx(1000 / 5.0 / 60, abs=0.01)
    assert "mu" in c["note"]  # names the worst parameter


def test_rhat_not_falling_and_far_above_autocorrelation_gets_no_projection():
    S = 1000
    trail = settled_trail(S)
    for p, r in zip(trail, (1.04, 1.05, 1.05, 1.06)):
        p["rhat_max"] = r
    # bulk-ESS 4000 over 4×1000 draws: τ ≈ 1, so stationary chains would have R̂ − 1 ≈ 0.
    c = check(run(make_scores(rhat=1.06), trail=trail, S=S), "rhat")
    assert c["ok"] is False and c["more_draws"] is None and "stuck" in c["note"]
    # The same R̂ after falling across the window keeps its 1/S projection.
    for p, r in zip(trail, (1.20, 1.15, 1.10, 1.08)):
        p["rhat_max"] = r
    c = check(run(make_scores(rhat=1.06), trail=trail, S=S), "rhat")
    assert c["more_draws"] == 5000  # 1000 · 0.06/0.01 − 1000
    # Not falling over the window but explained by autocorrelation (bulk-ESS 200 over 4000 draws:
    # τ = 20, expected R̂ − 1 ≈ 19/1000): not called stuck, and projected while R̂ fell since half
    # the draws ...
    for p, r in zip(trail, (1.03, 1.02, 1.02, 1.02)):
        p["rhat_max"] = r
    c = check(run(make_scores(rhat=1.02, ess_bulk=200.0), trail=trail, S=S), "rhat")
    assert c["more_draws"] == 1000
    # ... but R̂ no lower than at half the draws has no basis for a projection.
    trail[0]["rhat_max"] = 1.015
    c = check(run(make_scores(rhat=1.02, ess_bulk=200.0), trail=trail, S=S), "rhat")
    assert c["more_draws"] is None and "not converging at this rate" in c["note"]


def test_rhat_not_defined_fails_with_a_note():
    c = check(run(make_scores(rhat=None)), "rhat")
    assert c["ok"] is False and c["more_draws"] is None and "not defined" in c["note"]


@pytest.mark.parametrize("name, key", [("ess-bulk", "ess_bulk"), ("ess-tail", "ess_tail")])
def test_ess_boundary_is_per_chain_times_chains_and_projection_is_linear(name, key):
    # 100 per chain × 4 chains = 400 (Vehtari et al. 2021, §4).
    assert check(run(make_scores(**{key: 400.0}), chains=4), name)["ok"] is True
    c = check(run(make_scores(**{key: 399.9}), chains=4), name)
    assert c["ok"] is False and c["target"] == 400
    # ESS ∝ S: ESS 100 at S = 500 needs S' = 500 · 400/100 = 2000.
    c = check(run(make_scores(**{key: 100.0}), S=500, chains=4), name)
    assert c["more_draws"] == 1500
    # 8 chains double the goal.
    assert check(run(make_scores(**{key: 500.0}), chains=8), name)["ok"] is False


def test_parameter_projections_follow_ess_proportional_to_draws():
    # ESS ∝ S for every parameter, one snapshot: S' = S · goal / ESS; the larger of bulk and tail
    params = {"mu": {"rhat": 1.2, "ess_bulk": 100.0, "ess_tail": 250.0},  # bulk: 500·400/100 = 2000
              "tau": {"rhat": 1.0, "ess_bulk": 500.0, "ess_tail": 300.0},  # tail: 500·400/300 = 666.7
              "ok": {"rhat": 1.0, "ess_bulk": 400.0, "ess_tail": 900.0},
              "flat": {"rhat": None, "ess_bulk": None, "ess_tail": None},
              "zero": {"ess_bulk": 0.0, "ess_tail": 500.0}}
    mix = make_scores(params=params)["mixing"]
    more = parameter_projections(mix, chains=4, draws_per_chain=500)
    assert more == {"mu": 1500, "tau": 167, "ok": 0, "flat": None, "zero": None}
    # the worst parameter's single-point projection is the check's without a trail
    c = check(run(make_scores(ess_bulk=100.0, ess_tail=4000.0), S=500, trail=[]), "ess-bulk")
    assert c["more_draws"] == parameter_projections(
        make_scores(ess_bulk=100.0, ess_tail=4000.0)["mixing"], chains=4, draws_per_chain=500)["mu"]
    # targets per chain scale the goal; no mixing, no rows
    t = Targets.from_sources(None, {"ess_bulk_min_per_chain": 50, "ess_tail_min_per_chain": 50}, None)
    assert parameter_projections(mix, chains=4, draws_per_chain=500, targets=t)["mu"] == 500
    assert parameter_projections(None, chains=4, draws_per_chain=500) == {}


def test_mcse_boundary_and_projection():
    assert check(run(make_scores(mcse=0.1)), "mcse")["ok"] is True
    assert check(run(make_scores(mcse=0.1001)), "mcse")["ok"] is False
    # MCSE ∝ 1/√S: 0.2 at S = 1000 reaches 0.1 at S' = 1000 · (0.2/0.1)² = 4000.
    assert check(run(make_scores(mcse=0.2), S=1000), "mcse")["more_draws"] == 3000
    c = check(run(make_scores(mcse=None)), "mcse")
    assert c["ok"] is False and c["more_draws"] is None


def test_khat_above_limit_names_labels_and_asks_for_refits():
    labels = ["site-a", "site-b", "site-c", "site-d"]
    sc = make_scores(k=(0.1, 0.75, 0.3, 1.2))
    v = run(sc, labels=labels)
    c = check(v, "k-hat")
    assert v["enough"] is False
    assert c["ok"] is False and c["more_draws"] is None and c["value"] == 1.2
    assert "'site-b'" in c["note"] and "'site-d'" in c["note"] and "refit" in c["note"]
    assert "site-a" not in c["note"]
    assert [(r["observation"], r["label"]) for r in v["refit"]] == [(2, "site-b"), (4, "site-d")]
    assert v["more_draws"] is None
    assert "'site-b'" in describe(v) and "K-fold" in describe(v)


def test_khat_above_limit_without_labels_uses_one_based_indices():
    v = run(make_scores(k=(0.1, 0.2, 0.9)))
    assert "#3" in check(v, "k-hat")["note"]
    assert v["refit"][0]["observation"] == 3 and v["refit"][0]["label"] is None


def test_khat_between_threshold_and_limit_is_projected():
    # Threshold min(1 − 1/log10 S, 0.7) (Vehtari et al. 2024, JMLR 25(72)): at 4×100 = 400 draws it
    # is 1 − 1/log10 400 ≈ 0.616, so k̂ = 0.65 fails but is fixable.
    S, chains = 100, 4
    thr = khat_threshold(S * chains)
    assert thr == pytest.approx(1 - 1 / math.log10(400))
    c = check(run(make_scores(k=(0.1, 0.65), threshold=thr), trail=[], S=S, chains=chains), "k-hat")
    assert c["ok"] is False and c["more_draws"] is not None and c["provisional"] is False
    s_proj = S + c["more_draws"]
    # The projected draws lift the threshold to the k̂; one draw per chain fewer does not.
    assert khat_threshold(s_proj * chains) >= 0.65 > khat_threshold((s_proj - 1) * chains)
    assert s_proj == 180  # 10^(1/(1−0.65)) = 719.7 total → 180 per chain (4 × 179 = 716 is short)


def test_khat_threshold_with_another_sample_size_convention_is_followed():
    # A threshold computed from half the total draws (e.g. an effective size): the projection
    # reads that convention back from the reported threshold.
    S, chains = 150, 4
    thr = khat_threshold(S * chains / 2)
    c = check(run(make_scores(k=(0.62,), threshold=thr), trail=[], S=S, chains=chains), "k-hat")
    s_proj = S + c["more_draws"]
    assert khat_threshold(s_proj * chains / 2) >= 0.62 > khat_threshold((s_proj - 1) * chains / 2)


def test_khat_null_values_follow_the_flags():
    # null k̂ from a flat tail (−inf) is fine; from a bad log-likelihood it fails naming it.
    ok = run(make_scores(k=(0.1, None), flags={"flat_tail_observations": [1]}))
    assert check(ok, "k-hat")["ok"] is True
    bad = check(run(make_scores(k=(0.1, None), flags={"bad_observations": [1]}),
                    labels=["a", "b"]), "k-hat")
    assert bad["ok"] is False and "'b'" in bad["note"] and "not finite" in bad["note"]
    few = check(run(make_scores(k=(None, None), threshold=-1.0, flags={"too_few_draws": True}),
                    S=3, trail=[]), "k-hat")
    # judged once the tail M = ceil(min(S/5, 3 sqrt(S))) (r_eff 1) reaches 50: 4 × 67 = 268 draws
    assert few["ok"] is False and few["more_draws"] == 64 and few["provisional"] is True
    undefined = check(run(make_scores(k=(0.1, float("nan")))), "k-hat")
    assert undefined["ok"] is False and "#2" in undefined["note"]


def test_khat_exactly_at_limit_is_not_a_refit():
    v = run(make_scores(k=(KHAT_LIMIT,)), S=1000)  # threshold 0.7 at 4000 draws
    assert check(v, "k-hat")["ok"] is True and v["refit"] == []


def test_labels_of_wrong_length_raise():
    with pytest.raises(ValueError, match="2 labels for 3 observations"):
        run(labels=["a", "b"])


def test_no_parameters_skips_mixing_checks_without_failing():
    v = run(make_scores(mixing=False))
    for name in ("rhat", "ess-bulk", "ess-tail"):
        c = check(v, name)
        assert c["ok"] is None and "skipped" in c["note"] and c["more_draws"] is None
    assert v["enough"] is True
    assert "not checked" in describe(v)


def ess_trail(points, key="ess_tail_min"):
    """Trail points (draws_per_chain, ESS) with a passing LOO part."""
    return [{"draws_per_chain": s, "loo_elpd": -120.0, "loo_mcse": 0.06, "time": float(s), key: e}
            for s, e in points]


@pytest.mark.parametrize("name, key", [("ess-bulk", "ess_bulk"), ("ess-tail", "ess_tail")])
def test_ess_projection_pools_the_rate_over_the_last_half_of_the_trail(name, key):
    # ESS = a·S through the origin with Var(ESS_k) ∝ S_k: the weighted least-squares slope is
    # â = Σ ESS_k / Σ S_k (textbook ratio estimator). Points before S/2 and points without the
    # value are left out: â = (60 + 90 + 100) / (500 + 800 + 1000) = 250/2300, so
    # S' = 400 / â = 3680 and 2680 more draws per chain (the current point alone would say 3000).
    S = 1000
    trail = ess_trail([(400, 10.0), (500, 60.0), (800, 90.0)], key=f"{key}_min")
    trail.append({"draws_per_chain": 900, "loo_elpd": -120.0, "loo_mcse": 0.06, "time": 9.0,
                  f"{key}_min": None})
    c = check(run(make_scores(**{key: 100.0}), trail=trail, S=S), name)
    assert c["ok"] is False and c["more_draws"] == 2680
    assert "pooled over this and 2 earlier" in c["note"]
    # A trail exactly on ESS ∝ S changes nothing: 50 at 500 and 100 at 1000 give S' = 4000.
    c = check(run(make_scores(**{key: 100.0}), trail=ess_trail([(500, 50.0)], f"{key}_min"),
                  S=S), name)
    assert c["more_draws"] == 3000


def test_ess_projection_without_trail_values_is_the_single_point_rule():
    # No ESS in the trail (e.g. score --json, or a history written before the field existed), or
    # only unusable values: S' = S · target / ESS = 500 · 400 / 100 = 2000.
    for trail in ([], settled_trail(500), ess_trail([(300, 0.0), (400, float("nan"))]),
                  ess_trail([(200, 40.0)])):  # 200 < S/2: outside the window
        c = check(run(make_scores(ess_tail=100.0), trail=trail, S=500), "ess-tail")
        assert c["more_draws"] == 1500 and "pooled" not in c["note"]
    # The other check's values are not mixed in.
    c = check(run(make_scores(ess_bulk=100.0), trail=ess_trail([(400, 10.0)]), S=500), "ess-bulk")
    assert c["more_draws"] == 1500


# ------------------------------------------------------------------------------------------------
# Settled (stability) window


def test_settled_needs_a_window_spanning_a_fifth_of_the_draws():
    S = 1000
    c = check(run(trail=[], S=S), "settled")
    # No earlier snapshot: the window starts now, so S' = S/(1 − 0.2) = 1250.
    assert c["ok"] is False and c["more_draws"] == 250
    # Earliest snapshot at 900: spanned once S' − 900 ≥ S'/5, i.e. S' = 900/0.8 = 1125.
    late = [{"draws_per_chain": 900, "loo_elpd": -120.0, "loo_mcse": 0.06, "time": 1.0}]
    c = check(run(trail=late, S=S), "settled")
    assert c["ok"] is False and c["more_draws"] == 125
    # A snapshot at exactly 800 spans the window.
    at = [{"draws_per_chain": 800, "loo_elpd": -120.0, "loo_mcse": 0.06, "time": 1.0}]
    assert check(run(trail=at, S=S), "settled")["ok"] is True


def test_settled_movement_boundary_uses_only_the_window():
    S, mcse = 1000, 0.0625  # target 2 · 0.0625 = 0.125 nats (binary-exact numbers)
    trail = [{"draws_per_chain": 500, "loo_elpd": -150.0, "loo_mcse": 0.1, "time": 0},  # outside
             {"draws_per_chain": 800, "loo_elpd": -120.0, "loo_mcse": 0.07, "time": 1},
             {"draws_per_chain": 900, "loo_elpd": -120.1, "loo_mcse": 0.065, "time": 2}]
    c = check(run(make_scores(mcse=mcse, elpd=-120.0), trail=trail, S=S), "settled")
    assert c["ok"] is True and c["value"] == pytest.approx(0.1) and c["target"] == 0.125
    trail[2]["loo_elpd"] = -120.125  # moved exactly 2·MCSE: not "less than"
    c = check(run(make_scores(mcse=mcse, elpd=-120.0), trail=trail, S=S), "settled")
    assert c["ok"] is False and "drifting" in c["note"]
    assert c["more_draws"] == 250  # a fresh window from now: S/0.8 − S


def test_settled_window_override_and_trail_hygiene():
    S = 1000
    trail = [{"draws_per_chain": 700, "loo_elpd": -120.0, "loo_mcse": 0.06, "time": 0},
             {"draws_per_chain": 1000, "loo_elpd": -999.0, "loo_mcse": 0.06, "time": 9},  # now
             {"draws_per_chain": 1500, "loo_elpd": -999.0, "loo_mcse": 0.06, "time": 9},  # ignored
             {"draws_per_chain": 850, "loo_elpd": float("nan"), "loo_mcse": 0.06, "time": 1}]
    c = check(run(trail=trail, S=S), "settled")
    assert c["ok"] is True and "1 trail point" in c["note"]
    wide = Targets(stability_window=0.5)
    c = check(run(trail=trail, S=S, targets=wide), "settled")
    assert c["ok"] is False and c["more_draws"] == 400  # 700/0.5 − 1000
    with pytest.raises(ValueError, match=r"trail point 1: missing 'loo_elpd'"):
        run(trail=[trail[0], {"draws_per_chain": 800, "loo_mcse": 0.1}])


# ------------------------------------------------------------------------------------------------
# Comparison


def cmp_rows(best="m0", other="m1", se=5.0, mcse_delta=0.5):
    return [{"run": best, "elpd": -100.0, "delta": 0.0, "se_delta": 0.0, "mcse_delta": 0.0,
             "weight": 0.8, "caution": False},
            {"run": other, "elpd": -110.0, "delta": -10.0, "se_delta": se,
             "mcse_delta": mcse_delta, "weight": 0.2, "caution": False}]


def test_compare_check_boundary_and_projection():
    # allowed = max(0.2 · SE(Δ), 0.1) = 1.0 nats for SE(Δ) = 5.
    c = check(run(make_scores(run="m1"), comparison=cmp_rows(mcse_delta=1.0)), "compare")
    assert c["ok"] is True and c["target"] == pytest.approx(1.0)
    S, mcse_self, md = 1000, 1.9, 2.0
    sc = make_scores(run="m1", mcse=mcse_self)
    c = check(run(sc, S=S, comparison=cmp_rows(mcse_delta=md)), "compare")
    assert c["ok"] is False
    # With this run's MCSE falling as 1/√S and the other's fixed, MCSE(Δ) at the projected S'
    # reaches the allowed 1.0 (quadrature of independent errors).
    s_proj = S + c["more_draws"]
    other_sq = md ** 2 - mcse_self ** 2
    assert math.sqrt(mcse_self ** 2 * S / s_proj + other_sq) <= 1.0
    assert math.sqrt(mcse_self ** 2 * S / (s_proj - 1) + other_sq) > 1.0


def test_compare_check_when_the_other_run_must_move_and_when_not_compared():
    sc = make_scores(run="m1", mcse=0.1)
    c = check(run(sc, comparison=cmp_rows(mcse_delta=2.0)), "compare")
    assert c["ok"] is False and c["more_draws"] is None and "other run" in c["note"]
    # Nearly identical models: SE(Δ) ≈ 0 but MCSE(Δ) under the 0.1-nat floor passes.
    assert check(run(sc, comparison=cmp_rows(se=0.01, mcse_delta=0.09)), "compare")["ok"] is True
    # The best run is checked against every other run.
    best = make_scores(run="m0", mcse=0.05)
    assert check(run(best, comparison=cmp_rows(mcse_delta=1.5)), "compare")["ok"] is False
    v = run(make_scores(run="zz"), comparison=cmp_rows())
    assert "compare" not in [c["name"] for c in v["checks"]]


# ------------------------------------------------------------------------------------------------
# Overall verdict, describe, input errors


def test_overall_projection_is_the_largest_and_describe_names_the_checks():
    S = 1000
    sc = make_scores(ess_tail=200.0, mcse=0.2)  # ess-tail needs +1000, mcse needs +3000
    v = run(sc, S=S, rate=20.0)
    assert v["enough"] is False and v["more_draws"] == 3000
    assert v["minutes"] == pytest.approx(3000 / 20 / 60, abs=0.01)
    line = describe(v)
    assert line.startswith("needs ~3,000 more draws/chain (~2 min)")
    assert "ess-tail" in line and "mcse" in line and "rhat" not in line


def test_bad_input_raises_naming_the_problem():
    with pytest.raises(ValueError, match="chains"):
        evaluate(make_scores(), [], chains=0, draws_per_chain=10, draw_rate=None)
    with pytest.raises(ValueError, match="draws_per_chain"):
        evaluate(make_scores(), [], chains=4, draws_per_chain=10.5, draw_rate=None)
    with pytest.raises(ValueError, match="draw_rate"):
        evaluate(make_scores(), [], chains=4, draws_per_chain=10, draw_rate=-1.0)
    broken = make_scores()
    del broken["loo"]
    with pytest.raises(ValueError, match="missing loo"):
        evaluate(broken, [], chains=4, draws_per_chain=10, draw_rate=None)


def test_verdict_on_real_batch_scores():
    # End to end on the project's batch scorer: a normal model's draws (well mixed, iid), plus one
    # observation the model finds very surprising (a fact of the trade: it gets a large k̂).
    from chainvigil.estimators import scores as scores_mod

    rng = np.random.default_rng(5)
    chains, S, n = 4, 500, 20
    y = rng.normal(size=n)
    y[7] = 12.0
    mu = rng.normal(y.mean(), 1 / math.sqrt(n), size=(chains, S))
    ll = -0.5 * (y[None, None, :] - mu[:, :, None]) ** 2 - 0.5 * math.log(2 * math.pi)
    sc = scores_mod.batch_scores(ll, params=mu[:, :, None], param_names=["mu"], run="r").to_dict()
    v = evaluate(sc, [], chains=chains, draws_per_chain=S, draw_rate=None,
                 labels=[f"y{i}" for i in range(1, n + 1)])
    assert check(v, "rhat")["ok"] is True and check(v, "ess-bulk")["ok"] is True
    assert [r["label"] for r in v["refit"]] == ["y8"]
    json.dumps(v, allow_nan=False)  # the verdict is JSON-ready


# ------------------------------------------------------------------------------------------------
# ENOUGH.json


def write_enough_signal(run_dir, verdict, draws, time):
    """The service's one writer of the stop signal, on a run folder inside tmp_path's parent."""
    return write_signal_inside(run_dir.parent, run_dir, verdict, draws, time)


def test_enough_signal_is_written_atomically_and_replaced(tmp_path):
    tmp_path = tmp_path / "run"
    tmp_path.mkdir()
    v = run()
    path = write_enough_signal(tmp_path, v, draws=1000, time=1700000000.0)
    assert path == tmp_path / SIGNAL_NAME
    body = json.loads(path.read_text())
    assert body["enough"] is True and body["draws"] == 1000 and body["time"] == 1700000000.0
    assert [c["name"] for c in body["checks"]] == [c["name"] for c in v["checks"]]
    assert os.listdir(tmp_path) == [SIGNAL_NAME]  # no temp file left
    write_enough_signal(tmp_path, v, draws=2000, time=1700000100.0)
    assert json.loads(path.read_text())["draws"] == 2000
    assert os.listdir(tmp_path) == [SIGNAL_NAME]


def test_enough_signal_reader_never_sees_a_partial_file(tmp_path):
    tmp_path = tmp_path / "run"
    tmp_path.mkdir()
    v = run()
    v["checks"][0]["note"] = "x" * 200_000  # a large file makes a torn write visible
    write_enough_signal(tmp_path, v, draws=0, time=0.0)
    stop, seen, errors = threading.Event(), [], []

    def reader():
        while not stop.is_set():
            try:
                seen.append(json.loads((tmp_path / SIGNAL_NAME).read_text())["draws"])
            except json.JSONDecodeError as e:  # a partial file
                errors.append(e)

    t = threading.Thread(target=reader)
    t.start()
    try:
        for i in range(1, 60):
            write_enough_signal(tmp_path, v, draws=i, time=float(i))
    finally:
        stop.set()
        t.join()
    assert errors == [] and len(seen) > 0
    assert os.listdir(tmp_path) == [SIGNAL_NAME]


def test_enough_signal_refuses_a_verdict_that_is_not_enough_and_a_missing_folder(tmp_path):
    tmp_path = tmp_path / "run"
    tmp_path.mkdir()
    with pytest.raises(ValueError, match="not 'enough'"):
        write_enough_signal(tmp_path, run(make_scores(mcse=1.0)), draws=1, time=0.0)
    assert not (tmp_path / SIGNAL_NAME).exists()
    with pytest.raises(OutsideRoot, match="nope"):
        write_enough_signal(tmp_path / "nope", run(), draws=1, time=0.0)


def test_enough_signal_writes_non_finite_values_as_null(tmp_path):
    tmp_path = tmp_path / "run"
    tmp_path.mkdir()
    v = run()
    v["checks"][0]["value"] = float("nan")
    body = json.loads(write_enough_signal(tmp_path, v, draws=np.int64(5), time=1.0).read_text())
    assert body["checks"][0]["value"] is None and body["draws"] == 5


# ------------------------------------------------------------------------------------------------
# Projection quality on AR(1) chains (the requirement): bench/projection_quality.py


def _bench():
    spec = importlib.util.spec_from_file_location("projection_quality",
                                                  ROOT / "bench" / "projection_quality.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


RHOS, SEEDS = (0.5, 0.8, 0.95), (1, 2, 3)


def test_ar1_reference_ess_and_mcse_match_the_closed_forms():
    # Sanity of the outside reference: for AR(1), bulk-ESS → chains·S·(1−ρ)/(1+ρ) and the MCSE of
    # the mean → 1/((1−ρ)·√(chains·S)) with unit innovations (standard time-series results).
    pq = _bench()
    from chainvigil.estimators.mixing import ess_bulk, mcse_of_mean

    for rho in RHOS:
        x = pq.ar1_chains(rho, 4, 20000, seed=11)
        assert ess_bulk(x) == pytest.approx(4 * 20000 * (1 - rho) / (1 + rho), rel=0.15)
        assert mcse_of_mean(x) == pytest.approx(1 / ((1 - rho) * math.sqrt(4 * 20000)), rel=0.15)


@pytest.mark.slow
@pytest.mark.parametrize("every", [None, 0.05], ids=["no-trail", "trail"])
@pytest.mark.parametrize("kind", ["ess-bulk", "mcse"])
def test_projection_at_a_quarter_is_within_a_factor_1_5(kind, every):
    # The criterion: projected draws at a quarter of the way to the target agree with the
    # draws actually needed (first S where the measured value meets the target) within × 1.5.
    # "trail": the service's setting, snapshots every 5% of the draws up to the quarter point.
    pq = _bench()
    ratios, vs_theory = [], []
    for rho in RHOS:
        for seed in SEEDS:
            r = pq.trial(rho, seed, kind, grid=250, trail_every=every)
            ratios.append(r["ratio"])
            vs_theory.append(r["s_projected"] / r["s_theory"])
            if kind == "mcse":  # the measured need agrees with the closed form σ²/(1−ρ)²
                assert r["s_actual"] == pytest.approx(r["s_theory"], rel=0.25)
    print(f"\n{kind} projected/actual at 1/4 of the way:", " ".join(f"{x:.2f}" for x in ratios))
    print(f"{kind} projected/closed form:", " ".join(f"{x:.2f}" for x in vs_theory))
    assert all(1 / 1.5 <= x <= 1.5 for x in ratios), ratios


@pytest.mark.slow
@pytest.mark.parametrize("every", [None, 0.05], ids=["no-trail", "trail"])
def test_tail_ess_projection_is_unbiased_but_noisier(every):
    # Tail-ESS rests on the 5%/95% indicators: at a quarter of the default goal (~25 per chain)
    # there are only a few dozen tail events, so single projections scatter more. The projection
    # law is still right on average: the median ratio is near 1 and none is off by × 2.
    # Pooling the rate over the trail (snapshots every 5% of the draws) does not reach × 1.5 here:
    # measured 0.53 .. 1.65 on these seeds, and 20 of 96 trials outside × 1.5 on seeds 101-132
    # (22 of 96 without the trail), so the bound stays at × 2.
    pq = _bench()
    ratios = [pq.trial(rho, seed, "ess-tail", grid=250, trail_every=every)["ratio"]
              for rho in RHOS for seed in SEEDS]
    print("\ness-tail projected/actual at 1/4 of the way:", " ".join(f"{x:.2f}" for x in ratios))
    assert 1 / 1.25 <= float(np.median(ratios)) <= 1.25, ratios
    assert all(0.5 <= x <= 2.0 for x in ratios), ratios


def test_describe_separates_projected_stuck_and_refit():
    v = run(make_scores(mcse=0.2, rhat=None, k=(0.1, 0.9)), S=1000, rate=None, labels=["a", "b"])
    line = describe(v)
    assert line.startswith("no projection: rhat, mcse")  # k̂ > 0.7: more draws do not fix the MCSE
    assert "not reliable" in check(v, "mcse")["note"]
    assert "1 obs need refits or K-fold: 'b'" in line


# ------------------------------------------------------------------------------------------------
# The stopping rule: floor, margin or hold (docs/verdict.md)


def passed_trail(points, elpd=-120.0):
    """Trail points (draws_per_chain, passed) as the service records them."""
    return [{"draws_per_chain": s, "loo_elpd": elpd, "loo_mcse": 0.05, "time": float(s), "passed": p}
            for s, p in points]


def test_floor_holds_back_enough_until_the_minimum_draws():
    v = run(S=150)
    c = check(v, "floor")
    assert v["passed"] is False and v["enough"] is False
    assert c["ok"] is False and c["more_draws"] == 50 and c["target"] == 200
    assert run(S=150, targets=Targets(min_draws_per_chain=100))["enough"] is True
    assert check(run(S=200), "floor")["ok"] is True


def test_passing_without_margin_needs_a_streak_spanning_a_tenth_more_draws():
    S = 1000
    thin = make_scores(mcse=0.095)  # passes (≤ 0.1) but not with margin (> 0.09)
    v = run(thin, S=S, rate=10.0)
    assert v["passed"] is True and v["enough"] is False and check(v, "mcse")["margin"] is False
    assert v["more_draws"] == 100 and v["minutes"] == pytest.approx(100 / 10 / 60, abs=0.01)
    assert describe(v).startswith("passing, confirming: 1 of 3 snapshots")
    # two earlier passing snapshots, the streak began at 900: 1000 ≥ 1.1 × 900 → held
    trail = settled_trail(S) + passed_trail([(900, True), (950, True)])
    v = run(thin, trail=trail, S=S)
    assert v["enough"] is True and v["stop_rule"] == "held" and v["hold"]["snapshots"] == 3
    # the streak began at 920: it spans less than a tenth; 1.1 × 920 = 1012 → 12 more draws
    trail = settled_trail(S) + passed_trail([(900, False), (920, True), (950, True)])
    v = run(thin, trail=trail, S=S)
    assert v["enough"] is False and v["more_draws"] == 12
    # a failing snapshot inside the tenth breaks the streak
    trail = settled_trail(S) + passed_trail([(900, True), (950, False), (980, True)])
    assert run(thin, trail=trail, S=S)["enough"] is False
    # with margin on every check one snapshot is enough
    v = run(make_scores(mcse=0.09), S=S)
    assert v["enough"] is True and v["stop_rule"] == "margin"


def test_trail_points_without_a_recorded_pass_are_judged_from_their_values():
    S = 1000
    thin = make_scores(mcse=0.095, rhat=1.0095)
    pts = [{"draws_per_chain": s, "loo_elpd": -120.0, "loo_mcse": m, "time": 0.0, "rhat_max": r}
           for s, m, r in ((900, 0.099, 1.009), (950, 0.097, 1.009))]
    assert run(thin, trail=settled_trail(S) + pts, S=S)["enough"] is True
    pts[1]["rhat_max"] = 1.02  # R̂ above its goal at 950: not passed
    assert run(thin, trail=settled_trail(S) + pts, S=S)["enough"] is False


@pytest.mark.parametrize("name, field, value", [
    ("rhat", "rhat", 1.0095), ("ess-bulk", "ess_bulk", 420.0), ("ess-tail", "ess_tail", 420.0)])
def test_margins_of_rhat_and_ess(name, field, value):
    # R̂ ≤ 1 + 0.9 (1.01 − 1) = 1.009 and ESS ≥ 1.1 × 400 = 440 are "with margin"
    c = check(run(make_scores(**{field: value}), chains=4), name)
    assert c["ok"] is True and c["margin"] is False
    better = 1.009 if name == "rhat" else 440.5
    assert check(run(make_scores(**{field: better}), chains=4), name)["margin"] is True


# ------------------------------------------------------------------------------------------------
# k̂ from too few draws, and the caution near the limit


def test_khat_from_a_short_tail_is_provisional_and_names_no_observation():
    # 4 chains × 20 draws: the PSIS tail holds ceil(min(80/5, 3 sqrt 80)) = 16 draws (r_eff 1)
    v = run(make_scores(k=(0.1, 0.9, 0.75)), S=20, trail=[])
    c = check(v, "k-hat")
    assert c["provisional"] is True and "too few draws to judge" in c["note"]
    assert "#2" not in c["note"] and v["refit"] == [] and v["attention"] is False
    assert c["more_draws"] == 67 - 20  # 4 × 67 = 268 draws give a tail of 50
    # a smaller r_eff lengthens the tail (3 sqrt(S / r_eff)), the largest r_eff decides
    sc = make_scores(k=(0.1, 0.2))
    sc["r_eff"] = [0.2, 0.25]  # S = 4 × 50 = 200: tail min(40, 3 sqrt(200/0.25)) = 40 < 50
    assert check(run(sc, S=50, trail=[]), "k-hat")["provisional"] is True
    sc["r_eff"] = [0.2, 0.2]
    sc["pareto_k"]["threshold"] = khat_threshold(200)
    assert check(run(sc, S=63, trail=[]), "k-hat")["provisional"] is False  # 252: min(50.4, 106)


def test_well_fitting_model_at_20_draws_per_chain_gets_no_refit_advice():
    # Real batch scores of exact posterior draws of a normal model (BDA3 ch. 2): at 20 draws per
    # chain k̂ scatters (values above 0.7 appear by chance); the verdict holds the advice back.
    rng = np.random.default_rng(8)
    n = 50
    y = rng.normal(size=n)
    from chainvigil.estimators import batch_scores

    flagged_early = 0
    for seed in range(5):
        r = np.random.default_rng(seed)
        mu = r.normal(y.mean() * n / (n + 1 / 9), 1 / math.sqrt(n + 1 / 9), size=(4, 20))
        ll = -0.5 * (y[None, None, :] - mu[:, :, None]) ** 2 - 0.5 * math.log(2 * math.pi)
        sc = batch_scores(ll, 1.0, params=mu[:, :, None], param_names=["mu"]).to_dict()
        flagged_early += sc["pareto_k"]["above"]
        v = evaluate(sc, [], chains=4, draws_per_chain=20, draw_rate=None)
        assert v["refit"] == [] and v["attention"] is False and v["enough"] is False
        assert check(v, "k-hat")["provisional"] is True
    assert flagged_early > 0  # the raw k̂ values would have named observations
    mu = np.random.default_rng(9).normal(y.mean(), 1 / math.sqrt(n), size=(4, 300))
    ll = -0.5 * (y[None, None, :] - mu[:, :, None]) ** 2 - 0.5 * math.log(2 * math.pi)
    sc = batch_scores(ll, 1.0, params=mu[:, :, None], param_names=["mu"]).to_dict()
    c = check(evaluate(sc, [], chains=4, draws_per_chain=300, draw_rate=None), "k-hat")
    assert c["provisional"] is False and c["ok"] is True


def test_p_eff_far_above_the_parameter_count_carries_a_caution():
    # rules.P_EFF_CAUTION_FACTOR = 2: p_eff 6.5 against 3 parameters (aic.p_eff) is a caution,
    # 6.0 is not; without a parameter count there is nothing to compare with
    for p_eff, expected in ((6.5, True), (6.0, False)):
        scores = make_scores()
        scores["loo"]["p_eff"] = p_eff
        scores["aic"] = {"elpd": -125.0, "p_eff": 3.0}
        v = run(scores)
        assert any("p_eff 6.5" in c and "3 parameters" in c for c in v["cautions"]) == expected
        assert v["enough"] is True  # a caution never blocks
    scores = make_scores()
    scores["loo"]["p_eff"] = 50.0
    assert run(scores)["cautions"] == []


def test_khat_near_the_limit_carries_a_caution():
    v = run(make_scores(k=(0.1, 0.65)))
    assert check(v, "k-hat")["ok"] is True and v["enough"] is True
    assert len(v["cautions"]) == 1 and "bias" in v["cautions"][0] and "0.65" in v["cautions"][0]
    assert run(make_scores(k=(0.1, 0.55)))["cautions"] == []


# ------------------------------------------------------------------------------------------------
# Projections that say when they have no basis


def test_mcse_with_khat_above_limit_has_no_projection():
    v = run(make_scores(mcse=0.3, k=(0.1, 0.8)), rate=10.0)
    c = check(v, "mcse")
    assert c["ok"] is False and c["more_draws"] is None and c["minutes"] is None
    assert "will not fix" in c["note"]
    assert v["more_draws"] is None and v["attention"] is True


@pytest.mark.parametrize("key, trail_key, now, then, goal_ok", [
    ("mcse", "loo_mcse", 0.2, 0.19, None),          # MCSE has not fallen
    ("ess_tail", "ess_tail_min", 300.0, 310.0, None),   # tail-ESS has not grown (≥ half the goal)
    ("ess_bulk", "ess_bulk_min", 250.0, 250.0, None)])
def test_projection_not_moving_toward_its_goal_since_half_the_draws(key, trail_key, now, then, goal_ok):
    S = 1000
    trail = settled_trail(S)
    trail[0][trail_key] = then  # the point at S/2
    name = {"mcse": "mcse", "ess_tail": "ess-tail", "ess_bulk": "ess-bulk"}[key]
    c = check(run(make_scores(**{key: now}), trail=trail, S=S, rate=10.0), name)
    assert c["ok"] is False and c["more_draws"] is None and c["minutes"] is None
    assert "not converging at this rate" in c["note"]
    # moving toward the goal: projected
    trail[0][trail_key] = then * 1.5 if key == "mcse" else then / 2
    assert check(run(make_scores(**{key: now}), trail=trail, S=S), name)["more_draws"] is not None


def test_early_small_tail_ess_does_not_stop_the_projection():
    # a tail-ESS at half the draws below half the goal is too noisy to call a lack of growth
    trail = settled_trail(1000)
    trail[0]["ess_tail_min"] = 120.0
    c = check(run(make_scores(ess_tail=110.0), trail=trail, S=1000), "ess-tail")
    assert c["more_draws"] is not None


def test_pooled_rate_that_says_done_falls_back_to_this_point():
    # earlier snapshots with a higher ESS rate (e.g. upward-biased early tail-ESS) would put the
    # goal behind us (+1 draw); the projection then uses the current point: 1000·400/300 − 1000
    trail = ess_trail([(600, 320.0), (800, 380.0)])
    c = check(run(make_scores(ess_tail=300.0), trail=trail, S=1000), "ess-tail")
    assert c["more_draws"] == 334 and "pooled" not in c["note"]


@pytest.mark.parametrize("activity", ["paused", "finished"])
def test_a_run_that_does_not_grow_gets_no_minutes(activity):
    v = run(make_scores(mcse=0.2, ess_tail=200.0), S=1000, rate=10.0, activity=activity)
    assert v["activity"] == activity and v["minutes"] is None
    assert all(c["minutes"] is None for c in v["checks"])
    assert check(v, "mcse")["more_draws"] == 3000  # draws still needed if it resumes
    assert describe(v).endswith(f"(run {activity})")
    grown = run(make_scores(mcse=0.2), S=1000, rate=10.0)
    assert grown["minutes"] == pytest.approx(3000 / 10 / 60, abs=0.01)
    with pytest.raises(ValueError, match="activity"):
        run(activity="sleeping")


def test_compare_against_a_finished_run_judges_only_this_runs_part():
    # allowed = max(0.2 × 5, 0.1) = 1.0; MCSE(Δ) = 2.0 of which this run 0.9: the finished run's
    # fixed part sqrt(4 − 0.81) = 1.79 alone exceeds 1.0, so no draws here reach the goal. Against
    # a finished run this run's part is judged against its even share 1/√2 = 0.707.
    sc = make_scores(run="m1", mcse=0.9)
    growing = check(run(sc, comparison=cmp_rows(mcse_delta=2.0)), "compare")
    assert growing["ok"] is False and growing["more_draws"] is None
    c = check(run(sc, S=1000, comparison=cmp_rows(mcse_delta=2.0), finished_runs=["m0"]), "compare")
    assert c["ok"] is False and c["target"] == pytest.approx(1 / math.sqrt(2))
    assert c["more_draws"] == math.ceil(1000 * (0.9 / (1 / math.sqrt(2))) ** 2 - 1e-9) - 1000
    assert "finished" in c["note"]
    # once this run's part is within its share the check passes, saying why MCSE(Δ) stays high
    sc = make_scores(run="m1", mcse=0.6)
    c = check(run(sc, comparison=cmp_rows(mcse_delta=1.9), finished_runs=["m0"]), "compare")
    assert c["ok"] is True and "done its share" in c["note"]
    # with room left by the fixed part, the goal is that room: sqrt(1 − (0.8² − 0.5²)) = 0.781
    sc = make_scores(run="m1", mcse=0.5)
    c = check(run(sc, comparison=cmp_rows(mcse_delta=0.8), finished_runs=["m0"]), "compare")
    assert c["ok"] is True and c["target"] == pytest.approx(math.sqrt(1 - (0.64 - 0.25)))


# ------------------------------------------------------------------------------------------------
# Subsampled estimates (docs/verdict.md "Subsampled runs")


def subsampled_scores(mcse, se_sub, k=(0.1, None, 0.3, None)):
    s = make_scores(mcse=mcse, k=k)
    s["loo"]["subsampled"] = {"m": 2, "n": len(k), "se_subsample": se_sub, "approx": "waic"}
    return s


def test_subsampled_mcse_check_judges_the_draws_error_alone_and_names_the_subsampling_se():
    # a subsampling SE five times the goal does not block: more draws cannot lower it
    v = run(subsampled_scores(0.05, 0.5))
    c = check(v, "mcse")
    assert c["ok"] is True and c["value"] == 0.05 and c["margin"] is True
    assert "subsampling SE 0.5" in c["note"]
    assert v["enough"] is True
    # the draws' error above the goal: the plain 1/S projection, S' = 1000 (0.2/0.1)^2 = 4000
    c = check(run(subsampled_scores(0.2, 0.5)), "mcse")
    assert c["ok"] is False and c["more_draws"] == 3000 and "subsampling SE" in c["note"]
    # a run scored over every observation has no such note
    assert check(run(make_scores(mcse=0.05)), "mcse")["note"] is None


def test_subsampled_settled_measures_movement_against_the_draws_error():
    # movement 0.15 over the window: within 2 x the draws' MCSE 0.1, whatever the subsampling SE
    trail = settled_trail(1000, elpd=-120.15)
    s = subsampled_scores(0.1, 3.0)
    assert check(run(s, trail=trail), "settled")["ok"] is True
    s = subsampled_scores(0.05, 3.0)  # 0.15 > 2 x 0.05: still moving for the draws' error
    assert check(run(s, trail=trail), "settled")["ok"] is False


def test_subsampled_khat_judges_the_sampled_observations_only():
    # unsampled observations carry no k̂ (null); only a run scored in full calls that "not defined"
    assert check(run(subsampled_scores(0.05, 0.2)), "k-hat")["ok"] is True
    c = check(run(make_scores(k=(0.1, None, 0.3, None))), "k-hat")
    assert c["ok"] is False and "not defined" in c["note"]
    c = check(run(subsampled_scores(0.05, 0.2, k=(0.1, None, 0.9, None))), "k-hat")
    assert c["ok"] is False  # a sampled observation above 0.7 still counts
