"""The verdict at the cursor snapshot: each check met or not, with projected draws and minutes.

Reads the snapshot's ``verdict`` JSON as ``chainvigil.verdict.evaluate`` writes it: ``enough``,
``checks`` [{name, ok (true/false/null = not made), value, target, more_draws (per chain), minutes,
note}], and optionally ``more_draws``, ``minutes`` (over all open checks) and ``refit``.

Written for the panel's width: a long line wraps under its own check (never back to column 1), and
every check is a line of its own, reachable with PgDn/PgUp when the panel is short.
"""

from __future__ import annotations

from rich.text import Text

from . import fmt
from .fmt import AMBER, BAD, DIM, GOOD
from .loader import View
from .text_panel import TextPanel


def _val(v, name: str = "") -> str:
    if "rhat" in name and fmt.ok(v):
        return fmt.f3(v)
    if isinstance(v, bool) or v is None:
        return "—" if v is None else ("yes" if v else "no")
    if isinstance(v, (int, float)):
        return fmt.g3(v) if abs(v) < 1000 else fmt.whole(v)
    return fmt.safe(v)


def _wrapped(t: Text, parts: list[tuple[str, str]], width: int, indent: int) -> None:
    """Append ``parts`` (text, style) as words, breaking lines at ``width`` and indenting the
    continuation lines by ``indent`` cells."""
    col = len(t.plain.rsplit("\n", 1)[-1])
    for text, style in parts:
        words = text.split(" ")
        for i, word in enumerate(words):
            piece = word if i == 0 else " " + word
            if col + len(piece) > width and col > indent:
                t.append("\n" + " " * indent)
                col = indent
                piece = word
            while len(piece) > width - indent:  # a word longer than the line: cut it
                t.append(piece[: width - col], style=style)
                piece = piece[width - col:]
                t.append("\n" + " " * indent)
                col = indent
            t.append(piece, style=style)
            col += len(piece)


def verdict_text(view: View, width: int = 100) -> Text:
    width = max(30, width)
    t = Text(no_wrap=True)
    s = view.snap
    verdict = (s or {}).get("verdict")
    if not isinstance(verdict, dict):
        t.append("no verdict recorded yet", style=DIM)
        return t
    checks = verdict.get("checks") or []
    open_ = [c for c in checks if c.get("ok") is False]
    made = [c for c in checks if c.get("ok") is not None]
    refit = verdict.get("refit") or []
    head: list[tuple[str, str]] = []
    if verdict.get("enough"):
        head.append(("✔ enough draws: every goal met", f"bold {GOOD}"))
        if (view.run or {}).get("enough_at"):
            head.append((f" (since {fmt.clock(view.run['enough_at'])})", DIM))
    else:
        head.append((f"✘ keep going: {len(open_)} of {len(made)} goals open", f"bold {BAD}"))
        more = verdict.get("more_draws")
        mins = verdict.get("minutes")
        if "more_draws" not in verdict:  # older rows: the largest projection over open checks
            ms = [c.get("more_draws") for c in open_]
            more = None if any(m is None for m in ms) else max(ms, default=None)
            mins = max((c.get("minutes") for c in open_ if fmt.ok(c.get("minutes"))), default=None)
        if fmt.ok(more) and more > 0:
            head.append((f" · ≈ {fmt.whole(more)} more draws per chain", "bold"))
            if fmt.ok(mins):
                head.append((f" ({fmt.minutes(mins)})", "bold"))
        elif open_:
            proj = [c for c in open_ if fmt.ok(c.get("more_draws"))]
            if proj:
                top = max(proj, key=lambda c: c["more_draws"])
                head.append((f" · ≈ {fmt.whole(top['more_draws'])} more draws per chain", "bold"))
                if fmt.ok(top.get("minutes")):
                    head.append((f" ({fmt.minutes(top['minutes'])})", "bold"))
                head.append((" for the others;", "bold"))
            head.append((" more draws alone will not do", BAD))
    _wrapped(t, head, width, 2)
    if refit:
        names = [repr(fmt.safe(r["label"])) if r.get("label") is not None else f"#{r.get('observation')}"
                 for r in refit[:4]]
        if len(refit) > 4:
            names.append(f"+{len(refit) - 4} more")
        t.append("\n  ")
        _wrapped(t, [("✘ k̂ > 0.7 (the verdict's refit list): refit these exactly or split K-fold: "
                      + ", ".join(names), BAD)], width, 4)
    name_w = max([len(str(c.get("name", ""))) for c in checks] + [4])
    indent = 3 + name_w + 2
    for c in checks:
        t.append("\n")
        state = c.get("ok")
        mark, style = {True: (" ✔ ", GOOD), False: (" ✘ ", BAD)}.get(state, (" · ", DIM))
        t.append(mark, style=style)
        t.append(fmt.safe(c.get("name", "?")).ljust(name_w), style="bold" if state is not None else DIM)
        parts: list[tuple[str, str]] = []
        if state is not None:
            parts.append((f"  {_val(c.get('value'), str(c.get('name')))}", style))
            parts.append((f" / goal {_val(c.get('target'), str(c.get('name')))}", DIM))
        if state is False:
            if fmt.ok(c.get("more_draws")):
                parts.append((f"  +{fmt.whole(c['more_draws'])}/chain", "bold"))
            if fmt.ok(c.get("minutes")):
                parts.append((f" ≈ {fmt.minutes(c['minutes'])}", "bold"))
        if c.get("note"):
            parts.append((f"  {fmt.safe(c['note'])}", DIM))
        _wrapped(t, parts, width, indent)
    for e in view.events:
        t.append("\n")
        _wrapped(t, [(f" ! {fmt.clock(e.get('time'))} {fmt.safe(e.get('kind'))}:",
                      BAD if e.get("level") == "error" else AMBER),
                     (" " + fmt.safe(e.get("message")), DIM)], width, 4)
    return t


class VerdictPanel(TextPanel):
    def make_text(self, view: View, width: int) -> Text:
        return verdict_text(view, width)
