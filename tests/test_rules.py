"""chainvigil.rules: each domain rule defined once and used by every module that needs it.

Outside source for the threshold: Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72), sec. 3,
k-hat threshold min(1 - 1/log10 S, 0.7); e.g. S = 100 gives 0.5 and S = 10^(1/0.3) ~ 2154 reaches 0.7.
"""
from __future__ import annotations

import math

import numpy as np

from chainvigil import readers, rules, verdict, watcher, writer
import importlib

psis = importlib.import_module("chainvigil.estimators.psis")  # (the package also exports a function psis)


def test_khat_threshold_from_the_paper():
    assert rules.khat_threshold(100) == 0.5
    assert abs(rules.khat_threshold(1000) - (1 - 1 / 3)) < 1e-15
    assert rules.khat_threshold(10 ** 6) == rules.KHAT_LIMIT == 0.7
    assert rules.khat_threshold(1) == -math.inf
    assert rules.khat_threshold(2154) < 0.7 <= rules.khat_threshold(2155)


def test_one_definition_everywhere():
    assert verdict.khat_threshold is rules.khat_threshold
    assert verdict.KHAT_LIMIT is psis.KHAT_LIMIT
    assert readers.STOP_SIGNAL_NAME == verdict.SIGNAL_NAME == watcher.STOP_SIGNAL_NAME == rules.SIGNAL_FILE
    assert readers.RUN_INFO_NAME == rules.RUN_INFO_FILE
    assert writer._RUN_INFO_FIELDS is rules.RUN_INFO_FIELDS
    assert verdict.Targets().rhat_max == rules.DEFAULT_TARGETS["rhat_max"]


def test_finite_or_none():
    assert [rules.finite_or_none(x) for x in (1, 2.5, np.float32(0.5), np.int64(3))] == [1.0, 2.5, 0.5, 3.0]
    assert [rules.finite_or_none(x) for x in (None, math.nan, math.inf, -np.inf, "x", True, [1])] == [None] * 7


def test_run_state_is_derived_in_one_place():
    assert rules.run_state({"enough": True}, 0.2) == "enough"
    assert rules.run_state({"enough": False, "refit": ["#3"]}, 0.2) == "needs_a_look"
    assert rules.run_state({"enough": False}, 0.71) == "needs_a_look"
    assert rules.run_state({"enough": False}, math.inf) == "needs_a_look"
    assert rules.run_state({"enough": False}, 0.7) == "gathering"
    assert rules.run_state(None, None) == "gathering"
    assert rules.run_state({"enough": True}, 0.2, set_aside=True) == "set_aside"
    assert set(rules.RUN_STATES) == {"gathering", "enough", "needs_a_look", "set_aside", "paused", "finished"}
    # the verdict's activity: no new draws for a while, or every chain stopped
    assert rules.run_state({"enough": False, "attention": False, "activity": "paused"}, 0.2) == "paused"
    assert rules.run_state({"enough": False, "activity": "finished"}, 0.2) == "finished"
    assert rules.run_state({"enough": True, "activity": "finished"}, 0.2) == "enough"
    assert rules.run_state({"enough": False, "attention": True, "activity": "paused"}, 0.2) == "needs_a_look"
    assert rules.run_state({"enough": False, "activity": "growing"}, 0.2) == "gathering"


def test_minutes_and_path_owner():
    assert [rules.format_minutes(m) for m in (0.4, 42.2, 150)] == ["<1 min", "42 min", "2.5 h"]
    assert rules.run_of_path("/r/run-a/c1/0001.npz", "/r") == "run-a"
    assert rules.run_of_path("run-b/c.csv", "/r") == "run-b"
    assert rules.run_of_path("/r", "/r") is None and rules.run_of_path("/elsewhere/x", "/r") is None


def test_p_eff_caution_rule_and_no_copy_of_it_in_the_screen():
    assert rules.P_EFF_CAUTION_FACTOR == 2.0
    assert rules.p_eff_caution(8.1, 4) is not None and "p_eff 8.1" in rules.p_eff_caution(8.1, 4)
    assert rules.p_eff_caution(8.0, 4) is None  # at the factor: not yet
    for p_eff, n in ((None, 4), (9.0, None), (9.0, 0), (float("nan"), 4), (True, 1)):
        assert rules.p_eff_caution(p_eff, n) is None
    from pathlib import Path

    import chainvigil.tui as tui

    screen = "".join(p.read_text() for p in Path(tui.__file__).parent.glob("*.py"))
    assert "P_EFF" not in screen and "sample_size_threshold" not in screen and "khat_threshold" not in screen
