"""Which tier of the suite is running, and how many hypothesis examples a property gets in it.

The full suite (``make test``, the CI command) runs every property test with its full example count.
The fast tier (``pytest -m "not slow"``, ``make test-fast``) runs the same properties with a third of
the examples (at least five): the inner loop still draws fresh random cases on every run, and the
full count is still drawn by every CI run.  ``tests/conftest.py`` sets ``FAST`` before any test module
is imported (the ``@settings`` decorators read it when their module is collected).
"""
from __future__ import annotations

FAST = False

#: The fast tier's share of a property's examples (and its floor).
FAST_SHARE = 3
FAST_FLOOR = 5


def examples(n: int) -> int:
    """Hypothesis ``max_examples`` for a property written with ``n`` examples in the full suite."""
    if not FAST:
        return n
    return min(n, max(FAST_FLOOR, -(-n // FAST_SHARE)))


def deselects_slow(markexpr: str) -> bool:
    """True when the ``-m`` expression runs unmarked tests and leaves out those marked ``slow``
    (the fast tier)."""
    if not markexpr:
        return False
    try:
        from _pytest.mark.expression import Expression
        expr = Expression.compile(markexpr)
        return expr.evaluate(lambda name, **_kw: False) and \
            not expr.evaluate(lambda name, **_kw: name == "slow")
    except Exception:  # an expression pytest itself rejects, or a pytest without this module
        return "not slow" in " ".join(markexpr.split())
