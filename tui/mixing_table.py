"""How well the chains mix, per parameter, at the cursor snapshot: worst first (largest R̂, then
smallest ESS). Columns of our own: R̂ with a met/open mark and R̂ over the run (a sparkline from the
mixing rows of every snapshot up to the cursor), the ESS of the bulk and of the tails against their
goals, the posterior sd and the central 90% interval (5% … 95%), the mean with its MCSE (one number
format throughout), and the draws per chain each parameter still needs.

Everything shown is stored by the service: goals from the checks of the snapshot's stored verdict
(``rhat``, ``ess-bulk``, ``ess-tail``: their ``target``s, ESS over all chains); ``sd``, ``q05``,
``q95``, ``chain_means``, ``chain_sds`` and ``more_draws`` from the ``mixing`` rows (docs/interfaces.md).
``more_draws`` is the service's projection for the two ESS goals (ESS taken to grow with the draws);
R̂ is never projected per parameter, so a parameter above the R̂ goal reads "R̂: no projection".

Under the table: when the worst parameter's R̂ is above the goal, its chains side by side (each chain's
mean ± sd as an interval on one axis, ``●`` the mean), so a chain that sits apart is seen at once.
"""

from __future__ import annotations

from rich.text import Text
from textual.widgets import DataTable

from . import fmt
from .fmt import BAD, DIM, GOOD
from .loader import View, goal
from .text_panel import TextPanel

# Two lines per parameter, so every figure fits 80 columns without sideways scrolling:
#   parameter      │ 1.319 ✘    │ bulk   5/200 ✘ │ sd 0.0456     │ ESS +1,500
#   mean ± MCSE    │ ▁▂▃▅▇▆▃▂▁▁ │ tail  30/200 ✘ │ -0.12…0.45    │ R̂: no projection
COLUMNS = (("param", "parameter\nmean ± MCSE"), ("rhat", "R̂\nrun trail"),
           ("ess", "ESS/goal\n(all chains)"), ("spread", "sd\n5% … 95%"),
           ("needs", "still needs\n(per chain)"))
TRAIL_W = 10
NEEDS_W = 18  # the longest phrase of needs(): 'ESS: no projection'


def worst_first(rows: list[dict]) -> list[dict]:
    def key(r):
        rhat = r.get("rhat") if fmt.ok(r.get("rhat")) else float("inf")
        ess = min([v for v in (r.get("ess_bulk"), r.get("ess_tail")) if fmt.ok(v)] or [float("inf")])
        return (-rhat, ess, r.get("param", ""))

    return sorted(rows, key=key)


def needs(view: View, row: dict) -> list[str]:
    """What this parameter still needs, from the stored row: the service's ESS projection
    (``more_draws``, draws per chain) and, above the R̂ goal, that R̂ has no projection. One or two
    short lines."""
    r_goal = goal(view.snap, "rhat")
    b_goal, t_goal = goal(view.snap, "ess-bulk"), goal(view.snap, "ess-tail")
    rhat, more = row.get("rhat"), row.get("more_draws")
    ess_met = [v >= g for v, g in ((row.get("ess_bulk"), b_goal), (row.get("ess_tail"), t_goal))
               if fmt.ok(v) and g is not None]
    rhat_open = fmt.ok(rhat) and r_goal is not None and rhat > r_goal
    if fmt.ok(more) and more > 0:
        lines = [f"ESS +{fmt.whole(more)}"]
    elif fmt.ok(more) or (len(ess_met) == 2 and all(ess_met)):
        lines = ["✔ ESS met" if rhat_open else "✔ goals met"]
    elif row.get("sd") is not None:  # a row with the new figures: stored, but no basis for it
        lines = ["ESS: no projection"]
    else:
        lines = ["ESS: not stored"]  # a row written before the history kept projections
    if rhat_open:
        lines.append("R̂: no projection")
    return lines


def rhat_trail(view: View, param: str) -> list[float | None]:
    return [m.get("rhat") for m in view.mixing_trail.get(param, [])]


def mixing_note(view: View) -> str:
    """The words under the table: what the columns are and where the goals come from."""
    s = view.snap or {}
    return (f"ESS over all {fmt.whole(s.get('chains'))} chains; goals from this snapshot's verdict; "
            "R̂ run trail: oldest left, one glyph per snapshot (▁ lowest, █ highest of the run); "
            "sd and 5%…95% (a central 90% interval) over all retained draws; still needs: draws per "
            "chain for both ESS goals, ESS taken to grow with the draws (R̂ is not projected).")


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
            spread = Text("sd ", style=DIM)
            spread.append(fmt.g3(r.get("sd")))
            spread.append(f"\n{fmt.g3(r.get('q05'))}…{fmt.g3(r.get('q95'))}")
            need = needs(view, r)  # short fixed phrases (at most NEEDS_W cells): never cut
            done = len(need) == 1 and need[0].startswith("✔")
            rows.append((name, rh, es, spread, Text("\n".join(need), style=GOOD if done else "")))
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


def chains_apart(view: View) -> dict | None:
    """The worst parameter (first of ``worst_first``) when its R̂ is above the goal and its per-chain
    figures are stored: ``{"param", "rhat", "goal", "chains": [(name, mean, sd)], "mean"}``; else None.
    Chain names come from the run's chains (the service orders chains by name) when their number
    matches, else ``#1``, ``#2``, ..."""
    rows = worst_first(view.mixing)
    r_goal = goal(view.snap, "rhat")
    if not rows or r_goal is None:
        return None
    w = rows[0]
    means, sds = w.get("chain_means") or [], w.get("chain_sds") or []
    if not (fmt.ok(w.get("rhat")) and w["rhat"] > r_goal and means and len(sds) == len(means)):
        return None
    names = list(view.chain_names) if len(view.chain_names) == len(means) else \
        [f"#{i + 1}" for i in range(len(means))]
    return {"param": w.get("param"), "rhat": w["rhat"], "goal": r_goal, "mean": w.get("mean"),
            "chains": list(zip(names, means, sds))}


def chains_text(view: View, width: int) -> Text | None:
    """The worst parameter's chains side by side: one line per chain, mean ± sd as ``├──●──┤`` on one
    axis shared by all chains (``┊`` the mean over all chains), figures in front; glyphs, not colour."""
    apart = chains_apart(view)
    if apart is None:
        return None
    t = Text(no_wrap=True, overflow="ellipsis")
    head = (f"chains of {fmt.safe(apart['param'])}, R̂ {fmt.f3(apart['rhat'])} > {fmt.g3(apart['goal'])}: "
            "each chain's mean ± sd (● mean ├─┤ ± sd ┊ all chains)")
    for line in fmt.wrap(head, width):
        t.append(line + "\n", style=f"bold {DIM}")
    chains = apart["chains"]
    name_w = min(10, max(len(fmt.safe(n)) for n, _, _ in chains))
    figures = [f"{fmt.g3(m)} ± {fmt.g3(sd)}" for _, m, sd in chains]
    fig_w = max(len(f) for f in figures)
    axis_w = max(10, width - name_w - fig_w - 3)
    ends = [v for _, m, sd in chains if fmt.ok(m) for v in ((m - sd, m + sd) if fmt.ok(sd) else (m, m))]
    lo, hi = (min(ends), max(ends)) if ends else (0.0, 1.0)
    if hi - lo <= 0:
        lo, hi = lo - 1.0, hi + 1.0

    def col(v: float) -> int:
        return max(0, min(axis_w - 1, round((v - lo) / (hi - lo) * (axis_w - 1))))

    for (name, m, sd), figure in zip(chains, figures):
        cells = [" "] * axis_w
        if fmt.ok(apart["mean"]):
            cells[col(apart["mean"])] = "┊"
        if fmt.ok(m):
            if fmt.ok(sd):
                a, b = col(m - sd), col(m + sd)
                for i in range(a, b + 1):
                    cells[i] = "─"
                cells[a], cells[b] = "├", "┤"
            cells[col(m)] = "●"
        t.append(fmt.fit(fmt.safe(name), name_w).ljust(name_w) + " ", style="bold")
        t.append(figure.rjust(fig_w) + " ")
        t.append("".join(cells) + "\n", style=fmt.ACCENT)
    scale = [" "] * axis_w
    for v in (lo, hi):
        label = fmt.g3(v)
        c = 0 if v == lo else axis_w - len(label)
        scale[max(0, c):max(0, c) + len(label)] = list(label)
    t.append(" " * (name_w + fig_w + 2) + "".join(scale)[:axis_w] + "\n", style=DIM)
    return t


class MixingNote(TextPanel):
    """Under the mixing table: the worst parameter's chains side by side (when R̂ says they are apart),
    then the words about the columns, wrapped to the panel's width."""

    def make_text(self, view: View, width: int) -> Text:
        t = Text(no_wrap=True)
        apart = chains_text(view, width)
        if apart is not None:
            t.append_text(apart)
        for i, line in enumerate(fmt.wrap(mixing_note(view), width)):
            t.append(("\n" if i else "") + line, style=f"italic {DIM}")
        return t
