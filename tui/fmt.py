"""Number and word formatting shared by the panels: a glyph and a colour for each stored run state,
our own colours, and the escaping of every string that comes from input.

Colours: a set of our own choosing that colour-blind readers can tell apart (hues spaced like the
Okabe-Ito set, lightness varied too). Colour never carries a meaning alone: every good/bad mark has a
glyph (✔ ✘ ▲ ▼ !), every chart series its own glyph, so the screen reads the same on a monochrome
terminal or with ``NO_COLOR`` set.
"""

from __future__ import annotations

import math
import time

# -- palette (hex, our own) --------------------------------------------------------------------------
SKY = "#5ab0e0"  # LOO elpd, the selected run
AMBER = "#e0a020"  # WAIC, "in between" states
TEAL = "#1a9e77"  # good: a goal met
RUST = "#d45f1c"  # bad: a goal open, a warning
LEMON = "#e8dc5a"  # projections, marks
ORCHID = "#c57aa5"  # k-hat
INK = "#14171c"  # background
PANEL = "#1b1f26"  # list and panel backgrounds
RULE = "#3a424d"  # rules and axes
DIM = "#9aa3ad"  # secondary text
BAND = "#2c5a78"  # the ±2·MCSE band

GOOD, BAD, ACCENT, WARN = TEAL, RUST, SKY, AMBER
MET, OPEN, NOT_MADE = "✔", "✘", "·"  # glyphs beside every good/bad colour

# Run states as stored in the history (runs.state): the screen shows the stored word itself (an
# underscore as a space) after a glyph of its own, in a colour of its own; it renames nothing.
STATE_LOOKS = {
    "gathering": ("…", AMBER),
    "enough": ("✔", GOOD),
    "needs_a_look": ("✘", BAD),
    "paused": ("‖", DIM),
    "finished": ("■", ACCENT),
    "set_aside": ("⊘", AMBER),  # the service could not process it; runs.state_reason says why
}
UNKNOWN_STATE = ("?", BAD)  # a word the history should not hold: shown as it is, marked

# The service counts as running while its heartbeat (renewed every pass) is younger than this.
HEARTBEAT_FRESH_SECONDS = 60.0


def service_alive(service: dict | None, now: float | None = None) -> bool:
    """True while the history's service row has a fresh heartbeat and no stop or crash after it.

    A history without a service row (written by an older version or by a script) says nothing about
    a service: it is shown as live, as before the row existed."""
    if not service:
        return True
    if not ok(service.get("heartbeat")):
        return False
    if service.get("stopped_at") is not None or service.get("crashed_at") is not None:
        return False
    now = time.time() if now is None else now
    return now - service["heartbeat"] <= HEARTBEAT_FRESH_SECONDS


def service_gone_text(service: dict | None) -> str:
    """What the bar says instead of live when the service is not running."""
    if not service:
        return "no service has written here"
    if service.get("crashed_at") is not None:
        return f"service crashed at {hm(service['crashed_at'])}"
    when = service.get("stopped_at") if service.get("stopped_at") is not None else service.get("heartbeat")
    return f"service stopped at {hm(when)}"


def hm(t) -> str:
    return time.strftime("%H:%M", time.localtime(t)) if ok(t) else "—"


def state_word(state: str | None) -> tuple[str, str]:
    """The stored run state as shown: ``(glyph + " " + the stored word, colour)``."""
    if state is None:
        return ("· not started", DIM)
    glyph, colour = STATE_LOOKS.get(state, UNKNOWN_STATE)
    return (f"{glyph} {safe(state).replace('_', ' ')}", colour)


def mark(good: bool | None) -> str:
    """The glyph that goes with a good (✔), bad (✘) or unknown (·) colour."""
    return NOT_MADE if good is None else (MET if good else OPEN)


# -- input shown on screen -------------------------------------------------------------------------------
_CONTROL = {i: f"\\x{i:02x}" for i in (*range(0x20), 0x7f)}
_CONTROL.update({0x09: "\\t", 0x0a: "\\n", 0x0d: "\\r"})


def safe(value) -> str:
    """A string from input (run name, dataset, title, label, event message) as it may be shown: control
    characters written as escapes. Every panel puts it into ``rich.text.Text`` as plain text (never
    through markup), so ``[bold]`` or ``[/]`` show literally."""
    return str(value).translate(_CONTROL)


def fit(s: str, width: int) -> str:
    """``s`` cut at the end to ``width`` cells with an ellipsis when it does not fit."""
    if width <= 0:
        return ""
    return s if len(s) <= width else s[: max(0, width - 1)] + "…"


def wrap(s: str, width: int) -> list[str]:
    """``s`` broken into lines of at most ``width`` cells at spaces (long words cut)."""
    import textwrap

    return textwrap.wrap(s, max(4, width), break_on_hyphens=False) or [""]


# -- numbers ---------------------------------------------------------------------------------------------------
def ok(v) -> bool:
    return v is not None and isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def f2(v) -> str:
    """Two decimals (elpd, SE, Δ)."""
    return f"{v:.2f}" if ok(v) else "—"


def f3(v) -> str:
    """Three decimals (R̂, k̂, MCSE of elpd)."""
    return f"{v:.3f}" if ok(v) else "—"


def g3(v) -> str:
    """Three significant figures, trailing zeros kept (0.00600 next to 0.00608: one format)."""
    if not ok(v):
        return "—"
    if v != 0 and (abs(v) >= 1e5 or abs(v) < 1e-4):
        return f"{v:.2e}"
    return f"{v:#.3g}".rstrip(".")


def whole(v) -> str:
    """Rounded to a whole number with thousands separators (draws, ESS)."""
    return f"{v:,.0f}" if ok(v) else "—"


def signed(v, dec: int = 2) -> str:
    """With an explicit sign (differences)."""
    return f"{v:+.{dec}f}" if ok(v) else "—"


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


SPARK = "▁▂▃▄▅▆▇█"


def sparkline(values, width: int | None = None) -> str:
    """Values as a row of block glyphs, low to high (None: a gap). Resampled to ``width`` when longer."""
    vals = list(values)
    if width is not None and len(vals) > width > 0:
        vals = [vals[round(i * (len(vals) - 1) / (width - 1))] if width > 1 else vals[-1]
                for i in range(width)]
    good = [v for v in vals if ok(v)]
    if not good:
        return " " * len(vals)
    lo, hi = min(good), max(good)
    out = []
    for v in vals:
        if not ok(v):
            out.append(" ")
        elif hi == lo:
            out.append(SPARK[3])
        else:
            out.append(SPARK[min(7, int((v - lo) / (hi - lo) * 8))])
    return "".join(out)
