"""Number and word formatting shared by the panels (our own words for run states and checks)."""

from __future__ import annotations

import math
import time

# Run states stored in the history -> words shown on screen, with a colour each.
STATE_WORDS = {
    "collecting": ("gathering", "#e5c07b"),
    "settled": ("enough", "#98c379"),
    "attention": ("needs a look", "#e06c75"),
}

GOOD, BAD, DIM, ACCENT = "#98c379", "#e06c75", "#8b95a7", "#7fd1b9"


def state_word(state: str | None) -> tuple[str, str]:
    if state is None:
        return ("not started", DIM)
    return STATE_WORDS.get(state, (state, DIM))


def ok(v) -> bool:
    return v is not None and isinstance(v, (int, float)) and math.isfinite(v)


def f2(v) -> str:
    """Two decimals (elpd, SE, Δ)."""
    return f"{v:.2f}" if ok(v) else "—"


def f3(v) -> str:
    """Three decimals (R̂, k̂, MCSE of elpd)."""
    return f"{v:.3f}" if ok(v) else "—"


def g3(v) -> str:
    """Three significant figures."""
    return f"{v:.3g}" if ok(v) else "—"


def whole(v) -> str:
    """Rounded to a whole number with thousands separators (draws, ESS)."""
    return f"{v:,.0f}" if ok(v) else "—"


def clock(t) -> str:
    return time.strftime("%H:%M:%S", time.localtime(t)) if ok(t) else "—"


def minutes(m) -> str:
    if not ok(m):
        return "—"
    if m < 1:
        return f"{m * 60:.0f} s"
    if m < 120:
        return f"{m:.0f} min"
    return f"{m / 60:.1f} h"
