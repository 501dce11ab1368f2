"""How well the chains mix, per parameter, at the cursor snapshot: worst first (largest R̂, then
smallest ESS). Columns of our own: R̂ with a met/open mark, R̂ over the run (a sparkline from the
mixing rows of every snapshot up to the cursor), the ESS of the bulk and of the tails against their
goals, the mean with its MCSE (one number format throughout), and what the verdict says each parameter
still needs.

Goals come from the checks of the snapshot's stored verdict (``rhat``, ``ess-bulk``, ``ess-tail``:
their ``target``s, ESS over all chains). The verdict projects draws for the worst parameter of each
check only (its note names it); for the others the table shows which goals they miss, not a projection
of its own.
"""

from __future__ import annotations

from rich.text import Text
from textual.widgets import DataTable

from . import fmt
from .fmt import BAD, DIM, GOOD
from .loader import View, check, goal
from .text_panel import TextPanel

# Two lines per parameter, so every figure fits 80 columns without sideways scrolling:
#   parameter      │ R̂ 1.319 ✘    │ bulk   5/200 ✘ │ still needs (verdict)
#   mean ± MCSE    │ R̂ over the run│ tail  30/200 ✘ │ (continued)
COLUMNS = (("param", "parameter\nmean ± MCSE"), ("rhat", "R̂\nover the run"),
           ("ess", "ESS/goal\n(all chains)"), ("needs", "still needs\n(the verdict)"))
TRAIL_W = 12
NEEDS_W = 28


def worst_first(rows: list[dict]) -> list[dict]:
    def key(r):
        rhat = r.get("rhat") if fmt.ok(r.get("rhat")) else float("inf")
        ess = min([v for v in (r.get("ess_bulk"), r.get("ess_tail")) if fmt.ok(v)] or [float("inf")])
        return (-rhat, ess, r.get("param", ""))

    return sorted(rows, key=key)


def needs(view: View, row: dict) -> str:
    """What the stored verdict says this parameter still needs: the projected draws per chain of each
    open check whose note names it as the worst, else the goals it misses."""
    out, missing = [], []
    for name, key, better, word in (("rhat", "rhat", "low", "R̂"), ("ess-bulk", "ess_bulk", "high", "bulk"),
                                    ("ess-tail", "ess_tail", "high", "tail")):
        c = check(view.snap, name)
        target = goal(view.snap, name)
        v = row.get(key)
        if c is None or target is None or not fmt.ok(v):
            continue
        met = v <= target if better == "low" else v >= target
        if met:
            continue
        note = str(c.get("note") or "")
        if f"worst: {row.get('param')};" in note + ";" or note.startswith(f"worst: {row.get('param')}"):
            more = c.get("more_draws")
            out.append(f"{word} +{fmt.whole(more)}/chain" if fmt.ok(more) else f"{word}: no projection")
        else:
            missing.append(word)
    if missing:
        out.append("misses " + ", ".join(missing))
    return "; ".join(out) if out else "✔ goals met"


def rhat_trail(view: View, param: str) -> list[float | None]:
    return [m.get("rhat") for m in view.mixing_trail.get(param, [])]


def mixing_note(view: View) -> str:
    """The words under the table: what the columns are and where the goals come from."""
    s = view.snap or {}
    return (f"ESS over all {fmt.whole(s.get('chains'))} chains; goals from this snapshot's verdict; "
            "R̂ over the run: oldest left, one glyph per snapshot (▁ lowest, █ highest of the run); "
            "still needs: the verdict's projection for the parameter it names as worst, else the goals "
            "missed. Not in the history: sd, central intervals, per-chain figures.")


class MixingTable(DataTable):
    def __init__(self, **kw):
        super().__init__(cursor_type="row", header_height=2, **kw)
        self.shown: list[tuple] = []

    def on_mount(self) -> None:
        for key, label in COLUMNS:
            self.add_column(Text(label, style="bold"), key=key)

    def show_view(self, view: View) -> None:
        rows = []
        r_goal = goal(view.snap, "rhat")
        b_goal, t_goal = goal(view.snap, "ess-bulk"), goal(view.snap, "ess-tail")
        for r in worst_first(view.mixing):
            rhat = r.get("rhat")
            good = None if r_goal is None or not fmt.ok(rhat) else rhat <= r_goal
            trail = fmt.sparkline(rhat_trail(view, r.get("param")), TRAIL_W)

            def ess(word, v, g):
                met = None if g is None or not fmt.ok(v) else v >= g
                t = Text(f"{word} ", style=DIM)
                t.append(f"{fmt.whole(v):>6}/{fmt.whole(g)} {fmt.mark(met)}",
                         style=DIM if met is None else (GOOD if met else BAD))
                return t

            name = Text(fmt.safe(r.get("param")), style="bold")
            name.append(f"\n{fmt.g3(r.get('mean'))} ± {fmt.g3(r.get('mcse'))}", style="")
            rh = Text(f"{fmt.f3(rhat)} {fmt.mark(good)}", style=DIM if good is None else (GOOD if good else BAD))
            rh.append("\n" + trail, style=fmt.ACCENT)
            es = ess("bulk", r.get("ess_bulk"), b_goal)
            es.append("\n")
            es.append_text(ess("tail", r.get("ess_tail"), t_goal))
            need = needs(view, r)
            room = max(NEEDS_W, self.size.width - 64)  # the other columns take about 64 cells
            lines = fmt.wrap(need, room)
            if len(lines) > 2:
                lines = [lines[0], fmt.fit(" ".join(lines[1:]), room)]
            rows.append((name, rh, es, Text("\n".join(lines), style=GOOD if need.startswith("✔") else "")))
        plain = [tuple(str(c) for c in row) for row in rows]
        if plain == self.shown:
            return
        cursor = self.cursor_row
        if len(plain) == len(self.shown):  # same size: rewrite cells in place
            for i, row in enumerate(rows):
                for (key, _), cell in zip(COLUMNS, row):
                    self.update_cell(f"r{i}", key, cell, update_width=True)
        else:
            self.clear()
            for i, row in enumerate(rows):
                self.add_row(*row, key=f"r{i}", height=2)
            if rows:
                self.move_cursor(row=min(cursor, len(rows) - 1))
        self.shown = plain


class MixingNote(TextPanel):
    """The words under the mixing table, wrapped to the panel's width."""

    def make_text(self, view: View, width: int) -> Text:
        t = Text(no_wrap=True)
        for i, line in enumerate(fmt.wrap(mixing_note(view), width)):
            t.append(("\n" if i else "") + line, style=f"italic {DIM}")
        return t
