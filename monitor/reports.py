"""Text reports of the service: the headless lines, one per snapshot or problem.

Every string that comes from input (run and chain names, file names, messages quoting file
content) goes through :func:`escape_text` before it is printed, so a run folder named with control
characters, terminal escape sequences or newlines cannot move the cursor, recolour the terminal or
forge extra lines: they are shown as visible escapes (``\\x1b``, ``\\n``).
"""
from __future__ import annotations

import math
import time

__all__ = ["escape_text", "clock", "problem_line", "snapshot_line", "refit_words", "subsample_words"]

# Backslashes are kept as they are, so text escaped once (paths in input problems) is not escaped again.
_VISIBLE = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def escape_text(text) -> str:
    """``text`` with every control character (C0, DEL, C1), line or paragraph separator shown as a
    visible escape; printable text, including non-ASCII letters, is kept."""
    out = []
    for ch in str(text):
        code = ord(ch)
        if ch in _VISIBLE:
            out.append(_VISIBLE[ch])
        elif code < 0x20 or code == 0x7F or 0x80 <= code < 0xA0:
            out.append(f"\\x{code:02x}")
        elif code in (0x2028, 0x2029) or 0x202A <= code <= 0x202E or 0x2066 <= code <= 0x2069:
            out.append(f"\\u{code:04x}")  # line breaks and direction overrides
        else:
            out.append(ch)
    return "".join(out)


def clock() -> str:
    return time.strftime("%H:%M:%S")


def problem_line(run: str | None, message: str) -> str:
    """``HH:MM:SS ! run: message`` (both escaped)."""
    return f"{clock()} ! {escape_text(run or '-')}: {escape_text(message)}"


def _fmt(x, spec=".1f"):
    return "—" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, spec)


def refit_words(loo: dict, refits: dict | None) -> str:
    """How the headline elpd was made when refits are involved: "mixed 4/4 exact", "kfold 10/10 folds",
    "3 obs pending refits", "exact elpd of a refit"; "" for plain PSIS-LOO with nothing pending."""
    method, exact, pending = loo.get("method"), loo.get("exact_observations"), loo.get("pending_observations")
    if method == "refit":
        return "exact elpd of a refit"
    if method == "kfold":
        k = (refits or {}).get("K")
        return f"kfold {k}/{k} folds" if k else "kfold"
    if method == "mixed":
        return f"mixed {exact}/{(exact or 0) + (pending or 0)} exact"
    if pending:
        return f"{pending} obs pending refits"
    return ""


def subsample_words(sub: dict) -> str:
    """A subsampled estimate in a few words: "exact on 2,000 of 1,000,000 obs, sampling ±3.10"."""
    return (f"exact on {sub.get('m') or 0:,} of {sub.get('n') or 0:,} obs, "
            f"sampling ±{_fmt(sub.get('se_subsample'), '.2f')}")


def snapshot_line(run: str, data: dict, per_chain: int, chains: int, verdict_text: str) -> str:
    """One headless line for a snapshot: draws, PSIS-LOO elpd, worst k-hat, worst R-hat, verdict."""
    loo, k = data["loo"], data["pareto_k"]
    mixing = data.get("mixing") or {}
    parts = [
        clock(), escape_text(run), f"{chains}x{per_chain:,} draws",
        f"elpd_loo {_fmt(loo['elpd'])} ±{_fmt(loo['se'])} (mcse {_fmt(loo['mcse'], '.3f')})",
        f"k̂max {_fmt(k['max'], '.2f')}",
    ]
    how = refit_words(loo, data.get("refits"))
    if how:
        parts.insert(4, how)
    sub = loo.get("subsampled")
    if sub:
        parts.insert(4, subsample_words(sub))
    if mixing:
        parts.append(f"R̂ {_fmt(mixing.get('rhat_max'), '.3f')}")
    parts.append("→ " + escape_text(verdict_text))
    return "  ".join(parts)
