"""The headless change lines for comparisons (``comparison_change_lines``) on rows shaped like the
history's ``comparisons`` table, written through ``History`` and read back."""
from __future__ import annotations

from chainvigil.compare_text import comparison_change_lines
from chainvigil.storage.history import History


def _round(history, dataset, rows, time):
    history.add_comparison(dataset, rows, time=time)
    return history.comparisons(at_time=time)


def _row(run, delta, mcse_delta, may_flip, se=1.0):
    return {"run": run, "elpd": -100.0 + delta, "delta": delta, "se_delta": se, "mcse_delta": mcse_delta,
            "weight": 0.5, "caution": int(abs(delta) < 4), "may_flip": int(may_flip)}


def test_first_pass_order_change_and_swap_status(tmp_path):
    h = History(tmp_path / "history.sqlite")
    first = _round(h, "lakes", [_row("a", 0.0, 0.0, False), _row("b", -0.3, 0.4, True),
                                _row("c", -9.0, 0.5, False)], 10.0)
    assert comparison_change_lines([], first) == ["compare 'lakes': order a > b > c"]

    # nothing changed (new figures, same order, same could-swap status): no line
    same = _round(h, "lakes", [_row("a", 0.0, 0.0, False), _row("b", -0.2, 0.3, True),
                               _row("c", -8.0, 0.4, False)], 20.0)
    assert comparison_change_lines(first, same) == []

    # b settles behind a (no longer could swap)
    settled = _round(h, "lakes", [_row("a", 0.0, 0.0, False), _row("b", -1.5, 0.2, False),
                                  _row("c", -8.0, 0.4, False)], 30.0)
    assert comparison_change_lines(same, settled) == [
        "compare 'lakes': b no longer could swap with a (Δ -1.50, 2·MCSE(Δ) 0.40)"]

    # c overtakes b, and c is now within reach of a
    swapped = _round(h, "lakes", [_row("a", 0.0, 0.0, False), _row("c", -0.5, 0.6, True),
                                  _row("b", -1.5, 0.2, False)], 40.0)
    lines = comparison_change_lines(settled, swapped)
    assert lines == ["compare 'lakes': order now a > c > b (was a > b > c)",
                     "compare 'lakes': c could now swap with a (Δ -0.50, 2·MCSE(Δ) 1.20); "
                     "more draws may reorder them"]
    h.close()


def test_data_sets_are_kept_apart(tmp_path):
    h = History(tmp_path / "history.sqlite")
    h.add_comparison("lakes", [_row("a", 0.0, 0.0, False), _row("b", -5.0, 0.1, False)], time=1.0)
    h.add_comparison("hills", [_row("x", 0.0, 0.0, False), _row("y", -0.1, 0.2, True)], time=1.0)
    before = h.comparisons()
    h.add_comparison("hills", [_row("y", 0.0, 0.0, False), _row("x", -0.1, 0.2, True)], time=2.0)
    after = h.comparisons()
    # lakes is unchanged (its latest round is still the first); hills swapped its order
    assert comparison_change_lines(before, after) == [
        "compare 'hills': order now y > x (was x > y)",
        "compare 'hills': x could now swap with y (Δ -0.10, 2·MCSE(Δ) 0.40); more draws may reorder them"]
    assert comparison_change_lines(after, after) == []
    assert comparison_change_lines(after, []) == []
    h.close()
