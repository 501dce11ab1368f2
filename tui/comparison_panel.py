"""Runs fitted to the same data (same dataset and n), side by side: Δelpd against the best, SE(Δ),
MCSE(Δ), stacking weight, and whether more draws could still reorder them."""

from __future__ import annotations

from rich.text import Text

from . import fmt
from .fmt import ACCENT, BAD, DIM, GOOD
from .loader import View
from .text_panel import TextPanel

HEAD = ("#", "run", "elpd", "Δelpd", "SE(Δ)", "MCSE(Δ)", "weight", "order")
WIDTHS = (2, 16, 9, 8, 7, 8, 7, 12)


def comparison_text(view: View) -> Text:
    t = Text(no_wrap=True, overflow="ellipsis")
    run = view.run or {}
    if not view.comparisons:
        if run.get("dataset"):
            t.append(f"no other run on dataset {run['dataset']!r} with n = {run.get('n_obs')} "
                     "has been compared with this one", style=DIM)
        else:
            t.append("this run names no dataset, so it is not compared with others", style=DIM)
        return t
    when = view.comparisons[0].get("time")
    t.append(f"dataset {run.get('dataset')!r}, n = {run.get('n_obs')}, compared at {fmt.clock(when)}\n",
             style=DIM)
    for h, w in zip(HEAD, WIDTHS):
        t.append(h.rjust(w) if h not in ("run", "order") else h.ljust(w), style=f"bold {DIM}")
        t.append(" ")
    t.append("\n")
    for c in view.comparisons:
        mine = c.get("run") == run.get("name")
        base = f"bold {ACCENT}" if mine else ""
        cells = (str(c.get("rank")), str(c.get("run")), fmt.f2(c.get("elpd")), fmt.f2(c.get("delta")),
                 fmt.f2(c.get("se_delta")), fmt.f3(c.get("mcse_delta")), fmt.f2(c.get("weight")))
        for i, (v, w) in enumerate(zip(cells, WIDTHS)):
            t.append((v[:w].ljust(w) if i == 1 else v.rjust(w)), style=base)
            t.append(" ")
        if c.get("rank") == 1:
            order = ("ahead", GOOD)
        elif c.get("may_flip"):
            order = ("could swap", BAD)
        else:
            order = ("behind", DIM)
        t.append(order[0], style=order[1])
        if c.get("caution"):
            t.append(" ~SE", style="#e5c07b")
        t.append("\n")
    t.append("could swap: |Δ| < 2·MCSE(Δ), more draws may reorder · ~SE: SE(Δ) likely too small "
             "(|Δ| < 4 or n < 100)", style=f"italic {DIM}")
    return t


class ComparisonPanel(TextPanel):
    def make_text(self, view: View) -> Text:
        return comparison_text(view)
