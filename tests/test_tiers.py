"""The suite's two tiers (tests/_tiers.py): the fast tier is the run whose -m expression leaves out the
tests marked slow, and only there do property tests draw fewer hypothesis examples."""
from __future__ import annotations

import _tiers
from _tiers import deselects_slow


def test_the_fast_tier_is_a_run_that_leaves_out_slow_tests():
    for expr in ("not slow", "not  slow", "not slow and not tui", "(not slow)"):
        assert deselects_slow(expr), expr
    for expr in ("", "slow", "slow or not slow", "not tui", "slow and tui", "tui and not slow"):
        assert not deselects_slow(expr), expr


def test_this_run_knows_its_tier(pytestconfig):
    assert _tiers.FAST == deselects_slow(pytestconfig.getoption("markexpr"))


def test_the_fast_tier_draws_a_third_of_the_examples_and_at_least_five(monkeypatch):
    monkeypatch.setattr(_tiers, "FAST", False)
    assert [_tiers.examples(n) for n in (3, 15, 40, 60)] == [3, 15, 40, 60]
    monkeypatch.setattr(_tiers, "FAST", True)
    assert [_tiers.examples(n) for n in (3, 15, 40, 60)] == [3, 5, 14, 20]
