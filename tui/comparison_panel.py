"""The selected run against each other run fitted to the same data (same dataset and n).

Everything is signed from the selected run's side: Δ = elpd(this) − elpd(other), > 0 when this run
predicts better. What is shown, top to bottom:

- a row per other run: Δ, SE(Δ), the separation Δ/SE(Δ), MCSE(Δ), and marks (``✘k̂`` when a run's
  elpd rests on observations with k̂ > 0.7: its snapshot's verdict lists refits);
- the same pairs as intervals Δ ± 2·SE(Δ) on one axis, with ``┊`` at no difference;
- where the difference to the strongest other run comes from: a strip of Δ_i by observation (▲ row:
  this run better, ▼ row: the other better) and the observations with the largest |Δ_i| by label,
  from both runs' stored pointwise elpd_loo;
- how the separation moved over the run, from the comparison rounds stored over time;
- stacking weights in a panel of their own;
- the goal of the verdict's ``compare`` check, in words.

SE(Δ), MCSE(Δ) and the marks of every pair come from the round's ``comparison_pairs`` rows, stored by
the service (run_a the better of the two, delta = elpd(run_a) − elpd(run_b) ≥ 0; the screen turns the
sign to this run's side). Rounds written before the history kept pairs have them against the round's
best run only: for a pair of which neither is the best, those cells read "n.s." (not stored; the
screen does not compute them).
"""

from __future__ import annotations

from rich.text import Text

from . import fmt
from .fmt import ACCENT, AMBER, BAD, DIM, GOOD
from .loader import View, check
from .text_panel import TextPanel

NAME_W = 16


def pair(rows: list[dict], this: str, other: str, pairs=()) -> dict | None:
    """Δ, SE(Δ), MCSE(Δ) of ``this`` against ``other`` from one comparison round (rows by rank) and its
    stored ``pairs``, signed from ``this`` side. Without a stored pair, the round's rows against its
    best run; ``stored`` is False when neither run is the best there (SE and MCSE unknown)."""
    by = {r["run"]: r for r in rows}
    if this not in by or other not in by or not rows:
        return None
    for p in pairs or ():
        if {p.get("run_a"), p.get("run_b")} == {this, other}:
            sign = 1.0 if p["run_a"] == this else -1.0
            d = p.get("delta")
            return {"delta": sign * d if fmt.ok(d) else None, "se": p.get("se_delta"),
                    "mcse": p.get("mcse_delta"), "stored": True, "caution": bool(p.get("caution")),
                    "may_flip": bool(p.get("may_flip"))}
    best = rows[0]["run"]
    a, b = by[this], by[other]
    if best == this:
        src, sign = b, -1.0
    elif best == other:
        src, sign = a, 1.0
    else:
        d = a["elpd"] - b["elpd"] if fmt.ok(a.get("elpd")) and fmt.ok(b.get("elpd")) else None
        return {"delta": d, "se": None, "mcse": None, "stored": False, "caution": False,
                "may_flip": False}
    d = src.get("delta")
    return {"delta": sign * d if fmt.ok(d) else None, "se": src.get("se_delta"),
            "mcse": src.get("mcse_delta"), "stored": True, "caution": bool(src.get("caution")),
            "may_flip": bool(src.get("may_flip"))}


def separation(p: dict | None) -> float | None:
    if p is None or not (fmt.ok(p["delta"]) and fmt.ok(p["se"])) or p["se"] <= 0:
        return None
    return p["delta"] / p["se"]


def khat_flag(view: View, name: str) -> bool:
    """True when the run's snapshot (at the cursor time) lists observations to refit (k̂ > 0.7)."""
    run = next((r for r in view.runs if r["name"] == name), None)
    snap = (run or {}).get("latest") or {}
    verdict = snap.get("verdict") if isinstance(snap.get("verdict"), dict) else {}
    return bool(verdict.get("refit"))


def rival(view: View) -> str | None:
    """The strongest other run (largest elpd) of the round: the pair the detail is drawn for."""
    others = [c for c in view.comparisons if c["run"] != (view.run or {}).get("name")]
    others = [c for c in others if fmt.ok(c.get("elpd"))]
    return max(others, key=lambda c: c["elpd"])["run"] if others else None


def pointwise_delta(view: View, other: str) -> list[tuple[int, str, float]]:
    """(obs, label, Δ_i = elpd_loo_i(this) − elpd_loo_i(other)) from the stored pointwise values."""
    mine = {p["obs"]: p for p in view.pointwise if fmt.ok(p.get("elpd_loo"))}
    theirs = {p["obs"]: p["elpd_loo"] for p in view.peer_pointwise.get(other, [])
              if fmt.ok(p.get("elpd_loo"))}
    return [(i, fmt.safe(mine[i].get("label") or f"#{i + 1}"), mine[i]["elpd_loo"] - theirs[i])
            for i in sorted(mine) if i in theirs]


def strip(deltas: list[float], width: int) -> tuple[str, str]:
    """Two rows of block glyphs over the observations in order: the upper row where Δ_i > 0, the lower
    where Δ_i < 0, heights by |Δ_i| against the largest; each column the observation of largest |Δ_i|
    among those it covers."""
    if not deltas or width <= 0:
        return "", ""
    per = max(1, -(-len(deltas) // width))
    cols = [max(deltas[i:i + per], key=abs) for i in range(0, len(deltas), per)]
    top = max(abs(v) for v in cols) or 1.0
    up, down = [], []
    for v in cols:
        g = fmt.SPARK[min(7, int(abs(v) / top * 7.999))] if v != 0 else " "
        up.append(g if v > 0 else " ")
        down.append(g if v < 0 else " ")
    return "".join(up), "".join(down)


def comparison_text(view: View, width: int = 100) -> Text:
    width = max(40, width)
    t = Text(no_wrap=True, overflow="ellipsis")
    run = view.run or {}
    this = run.get("name")
    if not view.comparisons:
        if run.get("dataset"):
            t.append(f"no other run on dataset {fmt.safe(run['dataset'])!r} with n = {run.get('n_obs')} "
                     "has been compared with this one", style=DIM)
        else:
            t.append("this run names no dataset, so it is not compared with others", style=DIM)
        return t
    rows = view.comparisons
    when = rows[0].get("time")
    others = [c["run"] for c in rows if c["run"] != this]
    name_w = min(NAME_W, max(len(fmt.safe(n)) for n in [this, *others]))
    for line in fmt.wrap(f"{fmt.safe(this)} against the other runs on {fmt.safe(run.get('dataset'))!r} "
                         f"(n = {run.get('n_obs')}), round of {fmt.clock(when)}", width):
        t.append(line + "\n", style="bold")
    for line in fmt.wrap("Δ = elpd(this) − elpd(other): > 0 this run predicts better; "
                         "separation = Δ/SE(Δ)", width):
        t.append(line + "\n", style=DIM)
    t.append("\n")
    head = ("vs " + "run".ljust(name_w - 3) if name_w >= 6 else "run".ljust(name_w),
            "Δelpd".rjust(9), "SE(Δ)".rjust(8), "Δ/SE".rjust(6), "MCSE(Δ)".rjust(8), " marks")
    t.append(" ".join(head), style=f"bold {DIM}")
    t.append("\n")
    round_pairs = view.pairs_by_round.get(rows[0].get("round"), [])
    pairs = {o: pair(rows, this, o, round_pairs) for o in others}
    unstored = False
    for o in others:
        p = pairs[o]
        sep = separation(p)
        t.append(fmt.fit(fmt.safe(o), name_w).ljust(name_w) + " ", style="bold")
        style = GOOD if fmt.ok(p["delta"]) and p["delta"] > 0 else BAD
        arrow = "▲" if fmt.ok(p["delta"]) and p["delta"] > 0 else "▼"
        t.append(f"{fmt.signed(p['delta']):>8}{arrow}", style=style)
        if p["stored"]:
            t.append(f"{fmt.f2(p['se']):>8} {fmt.signed(sep, 1):>6} {fmt.f3(p['mcse']):>8}")
        else:
            unstored = True
            t.append(f"{'n.s.':>8} {'—':>6} {'n.s.':>8}", style=DIM)
        marks = []
        if khat_flag(view, o):
            marks.append(("✘k̂ other", BAD))
        if p["may_flip"]:
            marks.append(("⇄ may swap", AMBER))
        if p["caution"]:
            marks.append(("≈ SE small?", AMBER))
        for m, st in marks:
            t.append(" " + m, style=st)
        t.append("\n")
    if khat_flag(view, this):
        t.append(fmt.fit("✘k̂ this run: its elpd rests on observations with k̂ > 0.7 (see the verdict)",
                         width), style=BAD)
        t.append("\n")
    legend = ["▲ this better", "▼ other better", "✘k̂: elpd rests on k̂ > 0.7 obs.",
              "⇄ may swap: |Δ| < 2·MCSE(Δ), more draws may reorder",
              "≈ SE small?: SE(Δ) likely too small (|Δ| < 4 or n < 100)"]
    if unstored:
        legend.append("n.s.: not stored (this round kept SE and MCSE of Δ against its best run only)")
    for line in fmt.wrap(" · ".join(legend), width):
        t.append(line + "\n", style=f"italic {DIM}")

    # -- intervals on one axis ------------------------------------------------------------------
    t.append("\n")
    t.append("Δ ± 2·SE(Δ) on one axis (┊ no difference, ● Δ)\n", style=f"bold {DIM}")
    axis_w = max(10, width - name_w - 2)
    ends = [0.0]
    for p in pairs.values():
        if fmt.ok(p["delta"]):
            ends.append(p["delta"])
            if p["stored"] and fmt.ok(p["se"]):
                ends += [p["delta"] - 2 * p["se"], p["delta"] + 2 * p["se"]]
    lo, hi = min(ends), max(ends)
    if hi - lo <= 0:
        lo, hi = lo - 1, hi + 1
    pad = (hi - lo) * 0.04
    lo, hi = lo - pad, hi + pad

    def col(v: float) -> int:
        return max(0, min(axis_w - 1, round((v - lo) / (hi - lo) * (axis_w - 1))))

    zero = col(0.0)
    for o in others:
        p = pairs[o]
        cells = [" "] * axis_w
        cells[zero] = "┊"
        if fmt.ok(p["delta"]):
            if p["stored"] and fmt.ok(p["se"]):
                a, b = col(p["delta"] - 2 * p["se"]), col(p["delta"] + 2 * p["se"])
                for i in range(a, b + 1):
                    cells[i] = "─"
                cells[a], cells[b] = "├", "┤"
            cells[col(p["delta"])] = "●"
        t.append(fmt.fit(fmt.safe(o), name_w).ljust(name_w) + " ", style="bold")
        t.append("".join(cells) + "\n", style=ACCENT)
    scale = [" "] * axis_w
    for v in (lo + pad, 0.0, hi - pad):
        s = "0" if v == 0 else fmt.signed(v, 0 if abs(hi - lo) > 20 else 1)
        c = min(max(0, col(v) - len(s) // 2), axis_w - len(s))
        if all(ch == " " for ch in scale[max(0, c - 1):c + len(s) + 1]):
            scale[c:c + len(s)] = list(s)
    t.append(" " * (name_w + 1) + "".join(scale) + "\n", style=DIM)

    # -- where the difference comes from ------------------------------------------------------------
    other = rival(view)
    t.append("\n")
    if other is not None:
        d = pointwise_delta(view, other)
        for line in fmt.wrap(f"where Δ against {fmt.safe(other)} comes from: Δ_i by observation "
                             f"(1 … {len(d)}, left to right)", width):
            t.append(line + "\n", style=f"bold {DIM}")
        if d:
            up, down = strip([v for _, _, v in d], width - 3)
            t.append("▲ ", style=GOOD)
            t.append(up + "\n", style=GOOD)
            t.append("▼ ", style=BAD)
            t.append(down + "\n", style=BAD)
            t.append(fmt.fit(f"sum of Δ_i = {fmt.signed(sum(v for _, _, v in d))} "
                             "(both runs' newest stored pointwise values)", width) + "\n", style=DIM)
            top = sorted(d, key=lambda x: -abs(x[2]))[:5]
            lab_w = min(max(len(l) for _, l, _ in top), max(10, width - 14))
            for _, label, v in top:
                t.append(fmt.fit(label, lab_w).ljust(lab_w) + " ", style="bold")
                t.append(f"{fmt.signed(v):>9}", style=GOOD if v > 0 else BAD)
                t.append(" ▲\n" if v > 0 else " ▼\n", style=GOOD if v > 0 else BAD)
        else:
            t.append("no pointwise values stored for both runs yet\n", style=DIM)

        # -- separation over the run ----------------------------------------------------------------
        seps = [(seq, separation(pair(r, this, other, view.pairs_by_round.get(r[0].get("round")))))
                for seq, _, r in view.comparison_trail]
        seps = [(q, v) for q, v in seps if v is not None]
        t.append("\n")
        if len(seps) >= 2:
            line = fmt.sparkline([v for _, v in seps], max(8, width - 40))
            t.append(f"separation vs {fmt.fit(fmt.safe(other), 12)} over the run ", style=f"bold {DIM}")
            t.append(line, style=ACCENT)
            t.append(f"  {fmt.signed(seps[0][1], 1)} (#{seps[0][0]}) → {fmt.signed(seps[-1][1], 1)} "
                     f"(#{seps[-1][0]})\n", style="bold")
        else:
            t.append(fmt.fit(f"separation vs {fmt.safe(other)} over the run: one round with SE(Δ) so far "
                             "(or SE not stored for this pair)", width) + "\n", style=DIM)

    # -- stacking weights --------------------------------------------------------------------------
    t.append("\n")
    weights = [(c["run"], c.get("weight")) for c in rows]
    t.append("stacking weights (sum ", style=f"bold {DIM}")
    total = sum(w for _, w in weights if fmt.ok(w))
    t.append(f"{total:.2f}", style="bold")
    t.append(")\n", style=f"bold {DIM}")
    bar_w = max(5, min(30, width - name_w - 10))
    for name, w in sorted(weights, key=lambda x: -(x[1] or 0)):
        t.append(fmt.fit(fmt.safe(name), name_w).ljust(name_w) + " ", style="bold" if name == this else "")
        t.append(f"{fmt.f2(w):>5} ")
        if fmt.ok(w):
            t.append("█" * round(w * bar_w) + "·" * (bar_w - round(w * bar_w)), style=ACCENT)
        t.append(" ◀ this run\n" if name == this else "\n", style=DIM)

    # -- the verdict's compare goal ----------------------------------------------------------------
    c = check(view.snap, "compare")
    if c is not None:
        t.append("\n")
        words = (f"goal of the verdict's compare check {fmt.mark(c.get('ok'))}: MCSE(Δ) of each pair with "
                 f"the best run at most {fmt.g3(c.get('target'))} (set by the verdict from SE(Δ)), so more "
                 f"draws would not change the picture; now {fmt.g3(c.get('value'))}.")
        for line in fmt.wrap(words, width):
            t.append(line + "\n", style=DIM)
    return t


class ComparisonPanel(TextPanel):
    def make_text(self, view: View, width: int) -> Text:
        return comparison_text(view, width)
