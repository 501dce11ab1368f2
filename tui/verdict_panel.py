"""The verdict at the cursor snapshot: each check met or not, with projected draws and minutes.

Reads the snapshot's ``verdict`` JSON as ``chainvigil.verdict.evaluate`` writes it: ``enough``,
``checks`` [{name, ok (true/false/null = not made), value, target, more_draws (per chain), minutes,
note}], and optionally ``more_draws``, ``minutes`` (over all open checks) and ``refit``.
"""

from __future__ import annotations

from rich.text import Text

from . import fmt
from .fmt import BAD, DIM, GOOD
from .loader import View
from .text_panel import TextPanel


def _val(v, name: str = "") -> str:
    if "rhat" in name and fmt.ok(v):
        return fmt.f3(v)
    if isinstance(v, bool) or v is None:
        return "—" if v is None else ("yes" if v else "no")
    if isinstance(v, (int, float)):
        return fmt.g3(v) if abs(v) < 1000 else fmt.whole(v)
    return str(v)


def verdict_text(view: View) -> Text:
    t = Text(no_wrap=False)
    s = view.snap
    verdict = (s or {}).get("verdict")
    if not isinstance(verdict, dict):
        t.append("no verdict recorded yet", style=DIM)
        return t
    checks = verdict.get("checks") or []
    open_ = [c for c in checks if c.get("ok") is False]
    made = [c for c in checks if c.get("ok") is not None]
    refit = verdict.get("refit") or []
    if verdict.get("enough"):
        t.append("✔ enough draws: every goal met", style=f"bold {GOOD}")
        if (view.run or {}).get("enough_at"):
            t.append(f" (since {fmt.clock(view.run['enough_at'])})", style=DIM)
    else:
        t.append(f"✘ keep going: {len(open_)} of {len(made)} goals open", style=f"bold {BAD}")
        more = verdict.get("more_draws")
        mins = verdict.get("minutes")
        if "more_draws" not in verdict:  # older rows: the largest projection over open checks
            ms = [c.get("more_draws") for c in open_]
            more = None if any(m is None for m in ms) else max(ms, default=None)
            mins = max((c.get("minutes") for c in open_ if fmt.ok(c.get("minutes"))), default=None)
        if fmt.ok(more) and more > 0:
            t.append(f" · ≈ {fmt.whole(more)} more draws per chain", style="bold")
            if fmt.ok(mins):
                t.append(f" ({fmt.minutes(mins)})", style="bold")
        elif open_:
            # some open goal has no projection: say what drawing on would still buy for the others
            proj = [c for c in open_ if fmt.ok(c.get("more_draws"))]
            if proj:
                top = max(proj, key=lambda c: c["more_draws"])
                t.append(f" · ≈ {fmt.whole(top['more_draws'])} more draws per chain", style="bold")
                if fmt.ok(top.get("minutes")):
                    t.append(f" ({fmt.minutes(top['minutes'])})", style="bold")
                t.append(" for the others;", style="bold")
            t.append(" more draws alone will not do", style=BAD)
    if refit:
        names = [repr(r["label"]) if r.get("label") is not None else f"#{r.get('observation')}"
                 for r in refit[:4]]
        if len(refit) > 4:
            names.append(f"+{len(refit) - 4}")
        t.append(f"\n  k̂ > 0.7, refit exactly or split K-fold: {', '.join(names)}", style=BAD)
    width = max([len(str(c.get("name", ""))) for c in checks] + [4])
    for c in checks:
        t.append("\n")
        state = c.get("ok")
        mark, style = {True: (" ✔ ", GOOD), False: (" ✘ ", BAD)}.get(state, (" · ", DIM))
        t.append(mark, style=style)
        t.append(str(c.get("name", "?")).ljust(width), style="bold" if state is not None else DIM)
        if state is not None:
            t.append(f"  {_val(c.get('value'), str(c.get('name')))}", style=style)
            t.append(f" / goal {_val(c.get('target'), str(c.get('name')))}", style=DIM)
        if state is False:
            if fmt.ok(c.get("more_draws")):
                t.append(f"  +{fmt.whole(c['more_draws'])}/chain", style="bold")
            if fmt.ok(c.get("minutes")):
                t.append(f" ≈ {fmt.minutes(c['minutes'])}", style="bold")
        if c.get("note"):
            t.append(f"  {c['note']}", style=DIM)
    for e in view.events:
        t.append(f"\n ! {fmt.clock(e.get('time'))} {e.get('kind')}: ", style=BAD if e.get("level") == "error"
                 else "#e5c07b")
        t.append(str(e.get("message")), style=DIM)
    return t


class VerdictPanel(TextPanel):
    def make_text(self, view: View) -> Text:
        return verdict_text(view)
