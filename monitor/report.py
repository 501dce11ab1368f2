"""``chainvigil report``: one self-contained HTML file about every run of a history.

The file needs no network to open: the styles are inline and every figure is an inline SVG drawn
with matplotlib (the optional extra ``chainvigil[report]``). Per data set it shows the comparison of
its runs; per run the headline figures of the newest snapshot, the verdict with each check, the
PSIS-LOO elpd (±2·MCSE) and its MCSE against draws per chain, Pareto k̂ by observation with the worst
observations by label, and the mixing table.

Every figure shown is also carried as ``data-value`` (Python ``repr`` of the number read from the
history) beside a ``data-figure`` / ``data-field`` name, so that scripts and tests can read the report.
Every string that comes from the history (run names, titles, labels, parameter names, notes) is
escaped with :func:`html.escape`; ids are derived from them by :func:`_slug`.
"""
from __future__ import annotations

import html
import io
import math
import re
import time as _time
from pathlib import Path

from chainvigil.compare_text import comparison_records, local_time

__all__ = ["ReportError", "build_report", "write_report"]

#: observations named in the list of the worst k̂ per run
WORST_SHOWN = 8


class ReportError(Exception):
    """The report cannot be written (matplotlib missing, an unwritable file, an empty history)."""


def _esc(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _slug(text: str) -> str:
    """An id-safe form of a name, kept unique by a short hash of the original."""
    import hashlib

    base = re.sub(r"[^A-Za-z0-9_-]+", "-", str(text)).strip("-")[:40] or "x"
    return f"{base}-{hashlib.sha1(str(text).encode()).hexdigest()[:6]}"


def _fmt(value, spec: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    return format(value, spec)


def _fig(name: str, value, spec: str, tag: str = "span") -> str:
    """One figure: the shown text, with the exact number in ``data-value``."""
    raw = "" if value is None else repr(value)
    return f'<{tag} data-figure="{_esc(name)}" data-value="{_esc(raw)}">{_esc(_fmt(value, spec))}</{tag}>'


def _cell(name: str, value, spec: str) -> str:
    raw = "" if value is None else repr(value)
    return f'<td data-field="{_esc(name)}" data-value="{_esc(raw)}">{_esc(_fmt(value, spec))}</td>'


# ---------------------------------------------------------------------- figures (matplotlib -> SVG)
def _matplotlib():
    try:
        import matplotlib
    except ImportError:
        raise ReportError("the HTML report draws its figures with matplotlib, which is not installed: "
                          "pip install 'chainvigil[report]' (or pip install matplotlib)") from None
    from matplotlib.figure import Figure

    return matplotlib, Figure


_RC = {"svg.fonttype": "none", "svg.hashsalt": "chainvigil",
       "font.size": 9, "axes.spines.top": False, "axes.spines.right": False,
       "axes.edgecolor": "#6b7280", "axes.labelcolor": "#1f2937", "xtick.color": "#4b5563",
       "ytick.color": "#4b5563", "axes.grid": True, "grid.color": "#e5e7eb", "grid.linewidth": 0.6}

INK, ACCENT, WARN, BAD, MUTED = "#1d4e89", "#3a86c8", "#d98f1e", "#b3261e", "#9ca3af"


def _plain(text) -> str:
    """A string from the history as matplotlib text: a ``$`` would otherwise start math mode."""
    return str(text).replace("$", r"\$")


def _svg(fig, prefix: str) -> str:
    """The figure as an inline ``<svg>`` element; ids prefixed so several SVGs share one page."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    text = re.sub(r"\s*<metadata>.*?</metadata>", "", text, flags=re.S)  # authoring details only
    text = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}-{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}-{m.group(1)})", text)
    text = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}-{m.group(1)}"', text)
    return text


def _plain_log_ticks(ax) -> None:
    """Log axes labelled 20, 50, 100 rather than powers of ten, without crowded minor labels."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        axis.set_minor_formatter(NullFormatter())


def _trend_svg(snaps: list[dict], target: float | None, prefix: str) -> str | None:
    matplotlib, Figure = _matplotlib()
    pts = [(s["draws_per_chain"], s["loo_elpd"], s["loo_mcse"]) for s in snaps
           if s.get("draws_per_chain") and s.get("loo_elpd") is not None]
    if not pts:
        return None
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(9.6, 3.0))
        left, right = fig.subplots(1, 2)
        x = [p[0] for p in pts]
        y = [p[1] for p in pts]
        m = [p[2] if p[2] is not None else math.nan for p in pts]
        left.fill_between(x, [a - 2 * b for a, b in zip(y, m)], [a + 2 * b for a, b in zip(y, m)],
                          color=ACCENT, alpha=0.22, linewidth=0, label="±2·MCSE")
        left.plot(x, y, color=INK, linewidth=1.4, marker="o", markersize=2.2, label="elpd (PSIS-LOO)")
        left.set_xlabel("draws per chain")
        left.set_ylabel("elpd")
        left.set_title("elpd as draws arrive", fontsize=9, loc="left")
        left.legend(frameon=False, fontsize=7, loc="best")
        good = [(a, b) for a, b in zip(x, m) if b is not None and math.isfinite(b) and b > 0]
        if good:
            right.plot([a for a, _ in good], [b for _, b in good], color=INK, linewidth=1.4, marker="o",
                       markersize=2.2, label="MCSE of elpd")
            right.set_xscale("log")
            right.set_yscale("log")
            _plain_log_ticks(right)
            if target:
                right.axhline(target, color=WARN, linestyle="--", linewidth=1, label=f"target {target:g}")
            right.legend(frameon=False, fontsize=7, loc="best")
        right.set_xlabel("draws per chain")
        right.set_ylabel("MCSE (nats)")
        right.set_title("Monte Carlo error", fontsize=9, loc="left")
        fig.tight_layout()
        return _svg(fig, prefix)


def _khat_svg(points: list[dict], threshold: float | None, prefix: str) -> str | None:
    matplotlib, Figure = _matplotlib()
    pts = [(p["obs"], p["k_hat"]) for p in points if p.get("k_hat") is not None and math.isfinite(p["k_hat"])]
    if not pts:
        return None
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(9.6, 2.8))
        ax = fig.subplots()
        colors = [BAD if k > 0.7 else WARN if threshold is not None and k > threshold else INK for _, k in pts]
        ax.scatter([o + 1 for o, _ in pts], [k for _, k in pts], s=9, c=colors, linewidths=0)
        if threshold is not None and threshold < 0.7:
            ax.axhline(threshold, color=WARN, linestyle="--", linewidth=0.9, label=f"sample-size limit {threshold:.2f}")
        ax.axhline(0.7, color=BAD, linestyle=":", linewidth=0.9, label="0.7: more draws will not help")
        ax.set_xlabel("observation (1-based)")
        ax.set_ylabel("Pareto k̂")
        ax.set_title("Pareto k̂ of each observation", fontsize=9, loc="left")
        ax.legend(frameon=False, fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.28), ncols=2)
        fig.tight_layout()
        return _svg(fig, prefix)


def _compare_svg(rec: dict, prefix: str) -> str | None:
    matplotlib, Figure = _matplotlib()
    runs = [r for r in rec["runs"] if r["delta"] is not None]
    if len(runs) < 2:
        return None
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(9.6, 0.9 + 0.42 * len(runs)))
        ax = fig.subplots()
        ys = list(range(len(runs)))[::-1]
        for y, r in zip(ys, runs):
            se = r["se_delta"] or 0.0
            color = WARN if r["could_swap"] else INK
            ax.errorbar([r["delta"]], [y], xerr=[[2 * se], [2 * se]], fmt="o", color=color, markersize=4,
                        capsize=3, linewidth=1.2)
        ax.axvline(0, color=MUTED, linewidth=0.9)
        ax.set_yticks(ys)
        ax.set_yticklabels([_plain(r["run"]) for r in runs])
        ax.set_xlabel(f"Δelpd against {_plain(rec['against'])} (±2·SE(Δ))")
        ax.grid(axis="y", visible=False)
        fig.tight_layout()
        return _svg(fig, prefix)


# ---------------------------------------------------------------------- sections
def _comparison_section(rec: dict, runs_by_name: dict) -> str:
    sid = _slug(rec["dataset"])
    out = [f'<section class="dataset" id="dataset-{sid}" data-dataset="{_esc(rec["dataset"])}" '
           f'data-round="{rec["round"]}">',
           f'<h2>Data set <q>{_esc(rec["dataset"])}</q></h2>',
           f'<p class="meta">compared {_esc(local_time(rec["time"]))} (comparison round {rec["round"]}); '
           f'Δelpd is measured against {"the best run" if rec["against_best"] else "the chosen run"}, '
           f'<b>{_esc(rec["against"])}</b>. Negative Δ: that run predicts new data worse.</p>',
           '<ul class="pairs">']
    ref = next(r for r in rec["runs"] if r["run"] == rec["against"])
    for r in rec["runs"]:
        if r["run"] == rec["against"]:
            continue
        status = ('<span class="tag warn">could swap with more draws</span>' if r["could_swap"]
                  else '<span class="tag ok">order holds</span>')
        caution = (' <span class="tag note">SE(Δ) likely too small: |Δ| &lt; 4 or n &lt; 100</span>'
                   if r["caution"] else "")
        out.append(
            f'<li data-run="{_esc(r["run"])}"><b>{_esc(rec["against"])}</b> vs <b>{_esc(r["run"])}</b>: '
            f'Δelpd {_fig("delta", r["delta"], "+.2f")}, SE(Δ) {_fig("se_delta", r["se_delta"], ".2f")}, '
            f'MCSE(Δ) {_fig("mcse_delta", r["mcse_delta"], ".3f")}; stacking weight '
            f'{_fig("weight", r["weight"], ".2f")} (against {_fig("weight_against", ref["weight"], ".2f")}) '
            f'{status}{caution}</li>')
    out.append("</ul>")
    svg = _compare_svg(rec, f"cmp-{sid}")
    if svg:
        out.append(f'<figure class="plot" data-plot="compare">{svg}</figure>')
    names = ", ".join(f'<a href="#run-{_slug(r["run"])}">{_esc(r["run"])}</a>' for r in rec["runs"]
                      if r["run"] in runs_by_name)
    out.append(f'<p class="meta">runs: {names}</p></section>')
    return "\n".join(out)


def _headline(run: dict, snap: dict) -> str:
    rows = [
        ("draws per chain (shortest chain)", _fig("draws_per_chain", snap["draws_per_chain"], ",d")),
        ("chains · draws in all", f'{_fig("chains", snap["chains"], "d")} · {_fig("draws", snap["draws"], ",d")}'),
        ("draw rate (per chain)", f'{_fig("draw_rate", snap.get("draw_rate"), ".2f")} per second'),
        ("elpd, PSIS-LOO", f'{_fig("loo_elpd", snap["loo_elpd"], ".2f")} ± SE {_fig("loo_se", snap["loo_se"], ".2f")}'),
        ("its Monte Carlo error", f'MCSE {_fig("loo_mcse", snap["loo_mcse"], ".3f")}'),
        *([("PSIS-LOO subsampled", f'exact on {_fig("loo_subsample_m", snap["loo_subsample_m"], ",d")} of '
            f'{_fig("loo_subsample_n", snap.get("loo_subsample_n"), ",d")} observations, subsampling SE '
            f'{_fig("loo_se_subsample", snap.get("loo_se_subsample"), ".3f")} (more draws do not lower it)')]
          if snap.get("loo_subsample_m") else []),
        ("effective parameters", f'p_eff {_fig("loo_p_eff", snap["loo_p_eff"], ".2f")}'),
        ("elpd, WAIC", f'{_fig("waic_elpd", snap["waic_elpd"], ".2f")} ± SE {_fig("waic_se", snap["waic_se"], ".2f")}'),
        ("Pareto k̂", f'worst {_fig("k_max", snap["k_max"], ".2f")}; {_fig("k_above", snap["k_above"], "d")} '
                    f'above {_fig("k_threshold", snap["k_threshold"], ".2f")}'),
        ("mixing, worst parameter", f'R̂ {_fig("rhat_max", snap.get("rhat_max"), ".3f")}, bulk-ESS '
                                   f'{_fig("ess_bulk_min", snap.get("ess_bulk_min"), ",.0f")}, tail-ESS '
                                   f'{_fig("ess_tail_min", snap.get("ess_tail_min"), ",.0f")}'),
        ("for reference", f'AIC-scale elpd {_fig("aic_elpd", snap.get("aic_elpd"), ".2f")}, DIC-scale elpd '
                          f'{_fig("dic_elpd", snap.get("dic_elpd"), ".2f")}'),
    ]
    cells = "\n".join(f"<div><dt>{_esc(k)}</dt><dd>{v}</dd></div>" for k, v in rows)
    return f'<dl class="headline">{cells}</dl>'


def _verdict(verdict: dict | None) -> str:
    from chainvigil.verdict import describe

    if not verdict:
        return '<p class="meta">no verdict recorded</p>'
    enough = bool(verdict.get("enough"))
    out = [f'<p class="verdict {"ok" if enough else "warn"}" data-figure="enough" data-value="{enough!r}">'
           f'{"Enough draws" if enough else "Not enough yet"}: {_esc(describe(verdict))}</p>',
           '<table class="checks"><thead><tr><th>check</th><th>met?</th><th>now</th><th>goal</th>'
           '<th>more draws/chain</th><th>minutes</th><th class="note">note</th></tr></thead><tbody>']
    for c in verdict.get("checks", []):
        ok = c.get("ok")
        mark = "yes" if ok else ("not checked" if ok is None else "no")
        cls = "ok" if ok else ("skip" if ok is None else "bad")
        out.append(f'<tr data-check="{_esc(c.get("name"))}"><th>{_esc(c.get("name"))}</th>'
                   f'<td class="{cls}" data-field="ok" data-value="{_esc(repr(ok))}">{mark}</td>'
                   f'{_cell("value", c.get("value"), ".4g")}{_cell("target", c.get("target"), ".4g")}'
                   f'{_cell("more_draws", c.get("more_draws"), ",d")}{_cell("minutes", c.get("minutes"), ".1f")}'
                   f'<td class="note">{_esc(c.get("note"))}</td></tr>')
    out.append("</tbody></table>")
    refit = verdict.get("refit") or []
    if refit:
        names = ", ".join(_esc(r.get("label") if r.get("label") is not None else f"#{r.get('observation')}")
                          for r in refit)
        out.append(f'<p class="warn">k̂ above 0.7 (refit these observations or use K-fold): {names}</p>')
    return "\n".join(out)


def _worst(points: list[dict]) -> str:
    finite = [p for p in points if p.get("k_hat") is not None and math.isfinite(p["k_hat"])]
    worst = sorted(finite, key=lambda p: -p["k_hat"])[:WORST_SHOWN]
    if not worst:
        return ""
    rows = "\n".join(
        f'<tr data-obs="{p["obs"]}"><td>{_esc(p["label"] if p.get("label") is not None else "#" + str(p["obs"] + 1))}</td>'
        f'{_cell("k_hat", p["k_hat"], ".2f")}{_cell("elpd_loo", p.get("elpd_loo"), ".2f")}</tr>' for p in worst)
    return ('<table class="worst"><caption>highest k̂, by label</caption><thead><tr><th>observation</th>'
            f'<th>k̂</th><th>elpd_i</th></tr></thead><tbody>{rows}</tbody></table>')


def _mixing(rows: list[dict]) -> str:
    if not rows:
        return '<p class="meta">no parameters recorded for this run</p>'

    def badness(r):
        rh = r.get("rhat")
        return -(rh if rh is not None and math.isfinite(rh) else math.inf)

    body = "\n".join(
        f'<tr data-param="{_esc(r["param"])}"><th>{_esc(r["param"])}</th>{_cell("mean", r.get("mean"), ".4g")}'
        f'{_cell("mcse", r.get("mcse"), ".2g")}{_cell("rhat", r.get("rhat"), ".3f")}'
        f'{_cell("ess_bulk", r.get("ess_bulk"), ",.0f")}{_cell("ess_tail", r.get("ess_tail"), ",.0f")}</tr>'
        for r in sorted(rows, key=badness))
    return ('<table class="mixing"><caption>parameters, least mixed first</caption><thead><tr><th>parameter</th>'
            '<th>mean</th><th>MCSE</th><th>R̂</th><th>bulk-ESS</th><th>tail-ESS</th></tr></thead>'
            f"<tbody>{body}</tbody></table>")


def _run_section(history, run: dict) -> str:
    name = run["name"]
    sid = _slug(name)
    snaps = history.snapshots(run=name)
    head = [f'<section class="run" id="run-{sid}" data-run="{_esc(name)}">',
            f'<h2>Run <q>{_esc(name)}</q></h2>',
            f'<p class="meta">{_esc(run.get("title") or "")}{" · " if run.get("title") else ""}'
            f'data set {_esc(run.get("dataset") or "none named")}, n = {_esc(run.get("n_obs"))}, '
            f'folder {_esc(run.get("folder"))}, state {_esc((run.get("state") or "not started").replace("_", " "))}</p>']
    if not snaps:
        return "\n".join(head + ['<p class="meta">no snapshot yet</p></section>'])
    snap = snaps[-1]
    verdict = snap.get("verdict")
    target = next((c.get("target") for c in (verdict or {}).get("checks", []) if c.get("name") == "mcse"), None)
    points = history.pointwise(name)
    body = [f'<p class="meta" data-snapshot="{snap["id"]}">newest update {_esc(local_time(snap["time"]))} '
            f'(update {snap["seq"]} of {len(snaps)})</p>',
            _headline(run, snap),
            "<h3>Enough draws?</h3>", _verdict(verdict),
            "<h3>How the estimate settled</h3>"]
    trend = _trend_svg(snaps, target, f"trend-{sid}")
    body.append(f'<figure class="plot" data-plot="trend">{trend}</figure>' if trend
                else '<p class="meta">no elpd recorded yet</p>')
    body.append("<h3>Observations</h3>")
    khat = _khat_svg(points, snap.get("k_threshold"), f"khat-{sid}")
    if khat:
        body.append(f'<figure class="plot" data-plot="khat">{khat}</figure>')
    body.append(_worst(points))
    body.append("<h3>Mixing</h3>")
    body.append(_mixing(history.mixing(snap["id"])))
    return "\n".join(head + body + ["</section>"])


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;color:#1f2937;margin:0;background:#f7f7f4}
main{max-width:1100px;margin:0 auto;padding:18px 28px 60px}
header{border-bottom:3px solid #1d4e89;margin-bottom:10px}
h1{font-size:22px;margin:10px 0 4px} h2{font-size:18px;margin:0 0 4px;color:#1d4e89}
h3{font-size:14px;margin:16px 0 6px;text-transform:uppercase;letter-spacing:.04em;color:#4b5563}
section{background:#fff;border:1px solid #e2e2dc;border-radius:6px;padding:14px 18px;margin:16px 0}
.meta{color:#6b7280;margin:2px 0 8px}
nav ul{margin:4px 0;padding-left:20px}
dl.headline{display:grid;grid-template-columns:repeat(auto-fill,minmax(240px,1fr));gap:6px 18px;margin:8px 0}
dl.headline div{border-left:3px solid #3a86c8;padding-left:8px} dt{font-size:12px;color:#6b7280} dd{margin:0;font-weight:600}
table{border-collapse:collapse;margin:6px 0;font-size:13px} th,td{padding:3px 10px;text-align:right;border-bottom:1px solid #eee}
th:first-child,td:first-child,.note{text-align:left} td.note{color:#4b5563;font-size:12px;max-width:420px}
caption{text-align:left;color:#6b7280;font-size:12px;padding-bottom:2px}
td.ok{color:#1b7f3b;font-weight:600} td.bad{color:#b3261e;font-weight:600} td.skip{color:#9ca3af}
p.verdict{font-weight:600;padding:6px 10px;border-radius:4px} p.verdict.ok{background:#e7f5ec} p.verdict.warn{background:#fdf3e2}
p.warn{color:#b3261e}
ul.pairs{padding-left:18px} ul.pairs li{margin:4px 0}
.tag{font-size:11px;border-radius:9px;padding:1px 7px;margin-left:4px;white-space:nowrap}
.tag.ok{background:#e7f5ec;color:#1b7f3b} .tag.warn{background:#fdf3e2;color:#9a5b00} .tag.note{background:#eef2f7;color:#374151}
figure.plot{margin:6px 0} figure.plot svg{max-width:100%;height:auto}
"""


def build_report(history, *, source: str = "", progress=None, now: float | None = None) -> str:
    """The report as one HTML document (a string). ``history`` is an open history (read API);
    ``progress(line)`` is called before each long step."""
    say = progress or (lambda line: None)
    _matplotlib()  # fail early, before any work, when matplotlib is missing
    runs = history.runs()
    by_name = {r["name"]: r for r in runs}
    say(f"reading the comparisons of {len(runs)} run(s)")
    records = comparison_records(history)
    compared = {r["run"] for rec in records for r in rec["runs"]}
    written = local_time(_time.time() if now is None else now)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>chainvigil report: {_esc(source)}</title><style>{_CSS}</style></head><body><main>",
             f'<header><h1>chainvigil report</h1><p class="meta">history <code>{_esc(source)}</code> · '
             f'written {_esc(written)} · {len(runs)} run(s), {len(records)} compared data set(s). '
             '“draws per chain” is the shortest chain’s draw count.</p></header>',
             "<nav><b>Contents</b><ul>"]
    for rec in records:
        parts.append(f'<li><a href="#dataset-{_slug(rec["dataset"])}">data set {_esc(rec["dataset"])}</a>: '
                     + ", ".join(f'<a href="#run-{_slug(r["run"])}">{_esc(r["run"])}</a>' for r in rec["runs"])
                     + "</li>")
    alone = [r for r in runs if r["name"] not in compared]
    if alone:
        parts.append("<li>not compared: " + ", ".join(f'<a href="#run-{_slug(r["name"])}">{_esc(r["name"])}</a>'
                                                      for r in alone) + "</li>")
    parts.append("</ul></nav>")
    if not runs:
        parts.append('<section><p class="meta">this history holds no runs yet</p></section>')
    for rec in records:
        say(f"data set {rec['dataset']}: comparison of {len(rec['runs'])} runs")
        parts.append(_comparison_section(rec, by_name))
    for i, run in enumerate(runs, start=1):
        say(f"run {i}/{len(runs)}: {run['name']}")
        parts.append(_run_section(history, run))
    parts.append("</main></body></html>")
    return "\n".join(parts)


def write_report(history, output, *, source: str = "", progress=None) -> Path:
    """Write the report to ``output`` (atomically: a temporary file beside it, then a rename)."""
    path = Path(output).expanduser()
    text = build_report(history, source=source, progress=progress)
    tmp = path.with_name(f".{path.name}.tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(path)
    except OSError as err:
        raise ReportError(f"{path}: cannot write the report ({err.strerror or err})") from None
    return path
