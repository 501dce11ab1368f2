"""The viewer (tui/) through Textual's pilot on real history files.

Most tests read ``history_path``: a history the real service wrote while real simulated samplers
wrote their run folders (``tests/service_history.py``). The tests that need a particular content (a far
outlier with a known label, runs on one dataset with another n, a lone run) read the history of
``tests/tui_fixtures.py``, written through the history's own API from the estimators' output on
conjugate-normal posterior draws.

Every expected value is read from the file independently with ``History(path, readonly=True)``.
"""

from __future__ import annotations

import asyncio
import math
import os
import threading
import time
from pathlib import Path

import pytest
from textual.containers import ScrollableContainer

from chainvigil.storage.history import RUN_STATES, History
from chainvigil.tui.app import VigilApp
from chainvigil.tui.canvas import Canvas, Figure, Layer, Scale, draw, log_ticks, nice_ticks
from chainvigil.tui.comparison_panel import ComparisonPanel
from chainvigil.tui.cursor import CursorBar
from chainvigil.tui.fmt import STATE_LOOKS, service_alive, state_word
from chainvigil.tui.headline import Headline
from chainvigil.tui.khat_chart import KhatPanel
from chainvigil.tui.mixing_table import MixingTable
from chainvigil.tui.run_list import RunList
from chainvigil.tui.verdict_panel import VerdictPanel

from tests.service_history import build_service_history
from tests.tui_fixtures import build_history

pytestmark = [pytest.mark.timeout(120), pytest.mark.slow]  # the fixture history comes from simulated runs


# -- fixtures and helpers ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def fixture_history_path(tmp_path_factory):
    """The history of ``tests/tui_fixtures.py`` (12 snapshots per run), for the tests that rely on
    what it holds: a far outlier named 'o17-far', runs on one dataset with another n, a lone run."""
    path = tmp_path_factory.mktemp("hist") / "history.sqlite"
    build_history(path, steps=12).close()
    return path


@pytest.fixture(scope="module")
def history_path(tmp_path_factory):
    """The history most tests read: written by the real service watching simulated samplers (or the
    file CHAINVIGIL_TUI_HISTORY names). Needs ≥ 2 runs compared on one dataset and ≥ 6 snapshots per
    run."""
    other = os.environ.get("CHAINVIGIL_TUI_HISTORY")
    if other:
        return Path(other)
    path = build_service_history(tmp_path_factory.mktemp("service"))
    history = History(path, readonly=True)
    assert all(len(history.snapshots(run=r["name"])) >= 6 for r in history.runs())
    return path


@pytest.fixture(scope="module")
def reader(history_path):
    h = History(history_path, readonly=True)
    yield h
    h.close()


def comparable_pairs(h: History):
    """(dataset, runs compared) from the comparisons table; and a run on such a dataset with another n."""
    rows = h.comparisons()
    compared = {r["run"] for r in rows}
    runs = {r["name"]: r for r in h.runs()}
    datasets = {r["dataset"] for r in rows}
    n_of = {runs[r]["n_obs"] for r in compared}
    other_n = [r for r in runs.values() if r["dataset"] in datasets and r["n_obs"] not in n_of]
    alone = [r for r in runs.values() if r["dataset"] not in datasets]
    return sorted(compared), other_n, alone


def run_app(coro_fn, path, size=(120, 40), **kw):
    """Run ``coro_fn(app, pilot)`` inside ``app.run_test``."""

    async def main():
        app = VigilApp(path, refresh=kw.pop("refresh", 0.1), **kw)
        async with app.run_test(size=size) as pilot:
            await until(pilot, lambda: app.view is not None and app.view.snap is not None)
            await coro_fn(app, pilot)
        return app

    return asyncio.run(main())


def significant_digits(s: str) -> int:
    """Significant digits written in a plain decimal number (trailing zeros count)."""
    mantissa = s.split("e")[0].lstrip("+-").replace(".", "").lstrip("0")
    return len(mantissa)


def screen_text(app) -> str:
    """The whole screen as plain text, as the terminal shows it."""
    import io

    from rich.console import Console

    width, height = app.size
    console = Console(width=width, height=height, file=io.StringIO(), force_terminal=True,
                      color_system=None, record=True, legacy_windows=False, safe_box=False)
    console.print(app.screen._compositor.render_update(full=True, screen_stack=app._background_screens))
    return console.export_text()


async def until(pilot, cond, timeout=15.0):
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout:
            raise AssertionError("condition not reached in time")
        await pilot.pause(0.05)


async def pick(app, pilot, run: str):
    """Move the runs list to ``run`` with the keyboard (n / p) and wait for its view."""
    names = [r["name"] for r in app.view.runs]
    table = app.query_one(RunList)
    delta = names.index(run) - table.cursor_row
    for _ in range(abs(delta)):
        await pilot.press("n" if delta > 0 else "p")
    await until(pilot, lambda: app.view.run["name"] == run and app.view.request.run == run)
    await pilot.pause(0.05)


# -- the canvas on its own ------------------------------------------------------------------------------

def test_braille_dots_follow_the_unicode_dot_numbering():
    # Unicode braille block U+2800: dots 1,2,3 (left column, top down) are bits 0x01, 0x02, 0x04,
    # dot 7 (left bottom) 0x40; dots 4,5,6 (right column) 0x08, 0x10, 0x20, dot 8 0x80 (Unicode chart).
    c = Canvas(1, 1, (0, 1), (0, 1))
    c.dot(0, 0, "")
    assert c.row_text(0).plain == "\u2801"
    c.dot(1, 3, "")
    assert c.row_text(0).plain == chr(0x2800 | 0x01 | 0x80)
    full = Canvas(1, 1, (0, 1), (0, 1))
    for px in (0, 1):
        for py in range(4):
            full.dot(px, py, "")
    assert full.row_text(0).plain == "\u28ff"


def test_scales_map_ends_and_decades():
    s = Scale(10, 1000, 101, log=True)
    assert s(10) == pytest.approx(0) and s(1000) == pytest.approx(100) and s(100) == pytest.approx(50)
    assert s(-1) is None and s(float("nan")) is None
    assert s.value(50) == pytest.approx(100)
    y = Scale(0.0, 2.0, 9, flip=True)  # screen rows grow downwards
    assert y(2.0) == pytest.approx(0) and y(0.0) == pytest.approx(8)
    assert nice_ticks(0, 10, 5) == [0, 2, 4, 6, 8, 10]
    assert log_ticks(1, 1000) == [1, 10, 100, 1000]


def test_draw_fills_the_box_and_draws_a_rising_line_upwards():
    fig = Figure([Layer("line", [0, 1], [0, 1], style="")])
    text = draw(fig, 40, 12)
    lines = text.plain.split("\n")
    assert len(lines) == 12 and max(len(l) for l in lines) <= 40
    axis_col = lines[-2].index("└")  # legend row on top; axis and tick labels below
    plot = [l[axis_col + 1:] for l in lines[1:-2]]
    assert all(l[axis_col] in "│┤" for l in lines[1:-2])
    # the first dot of the line sits in the bottom-left cell, the last in the top-right one
    assert plot[-1][0] != " " and plot[0][-1] != " "
    assert plot[0][0] == " " and plot[-1][-1] == " "


def test_legend_shows_the_glyph_each_layer_is_drawn_with():
    # band, reference line, marks and data line each have their own glyph in plain text, and the
    # legend shows that same glyph (so the chart reads without colour)
    fig = Figure([Layer("band", [0, 10], [0, 0], [1.5, 1.5], legend="spread"),
                  Layer("hline", value=5, legend="goal", rule="┈"),
                  Layer("mark", [5], [8], glyph="×", legend="other"),
                  Layer("line", [0, 10], [2, 9], legend="estimate")], y_range=(0, 10))
    lines = draw(fig, 60, 16).plain.split("\n")
    legend, body = lines[0], "\n".join(lines[1:-2])
    for sym, word in (("░", "spread"), ("┈", "goal"), ("×", "other")):
        assert f"{sym} {word}" in legend and sym in body, sym
    assert "estimate" in legend and any(0x2800 < ord(ch) <= 0x28FF for ch in body)
    # a legend too long for one row wraps at an entry instead of being cut
    narrow = draw(fig, 24, 16).plain.split("\n")
    assert "spread" in narrow[0] + narrow[1] and "goal" in narrow[0] + narrow[1]


# -- the app on a history ---------------------------------------------------------------------------

def test_headline_and_runs_list_show_the_history(history_path, reader):
    async def check(app, pilot):
        for run in [r["name"] for r in reader.runs()]:
            await pick(app, pilot, run)
            s = reader.latest_snapshot(run)
            text = app.query_one(Headline).plain
            expected = [f"{s['loo_elpd']:.2f}", f"SE {s['loo_se']:.2f}", f"MCSE {s['loo_mcse']:.3f}",
                        f"p_eff {s['loo_p_eff']:.2f}", f"{s['waic_elpd']:.2f}",
                        f"SE {s['waic_se']:.2f}", f"worst {s['k_max']:.3f}",
                        f"limit {s['k_threshold']:.3f}", f"above limit {s['k_above']} of",
                        f"DIC elpd {s['dic_elpd']:.2f}", f"{s['draws']:,} draws"]
            expected.append("AIC —" if s["aic_elpd"] is None else f"AIC elpd {s['aic_elpd']:.2f}")
            if s["rhat_max"] is not None:
                expected += [f"worst R̂ {s['rhat_max']:.3f}", f"bulk {s['ess_bulk_min']:,.0f}",
                             f"tail {s['ess_tail_min']:,.0f}"]
            for value in expected:
                assert value in text, (run, value, text)
            bar = app.query_one(CursorBar).plain
            assert f"snapshot {s['seq']}/{s['seq']}" in bar
            # live only while the service's heartbeat is fresh (the fixture's service has stopped)
            live = service_alive(reader.service())
            assert ("LIVE" in bar) == live and (live or "service stopped at" in bar)
        table = app.query_one(RunList)
        # the state word is runs.state itself (an underscore as a space), after a glyph of its own
        words = {"gathering": "… gathering", "enough": "✔ enough", "needs_a_look": "✘ needs a look",
                 "paused": "‖ paused", "finished": "■ finished"}
        for r in reader.runs():
            s = reader.latest_snapshot(r["name"])
            cells = [str(c) for c in table.get_row(r["name"])]
            assert cells[0] == r["name"]
            assert cells[1] == words[r["state"]]
            assert cells[2] == f"{s['draws']:,}"  # "all draws": the total over chains
            assert cells[3] == f"{s['loo_elpd']:.2f}"
            assert cells[4] == r["dataset"]
        assert table.row_count == len(reader.runs())

    run_app(check, history_path)


def test_verdict_mixing_and_pointwise_panels(history_path, reader):
    async def check(app, pilot):
        for run in [r["name"] for r in reader.runs()]:
            await pick(app, pilot, run)
            s = reader.latest_snapshot(run)
            # verdict: one line per check, marked met / open as stored
            lines = app.query_one(VerdictPanel).plain.split("\n")
            for c in s["verdict"]["checks"]:
                line = next(l for l in lines if l[3:].startswith(c["name"] + " ") and l[:3].strip())
                assert line.startswith({True: " ✔ ", False: " ✘ ", None: " · "}[c["ok"]]), (run, line)
            assert ("enough draws" in lines[0]) == bool(s["verdict"]["enough"])
            # mixing: worst R̂ first, values as stored
            mix = reader.mixing(s["id"])
            table = app.query_one(MixingTable)
            shown = [[str(c) for c in table.get_row_at(i)] for i in range(table.row_count)]
            names = [row[0].split("\n")[0] for row in shown]
            assert sorted(names) == sorted(m["param"] for m in mix)
            rhats = [next(m for m in mix if m["param"] == n)["rhat"] for n in names]
            assert rhats == sorted(rhats, reverse=True)  # worst first
            goals = {c["name"]: c["target"] for c in s["verdict"]["checks"]}
            for name, row in zip(names, shown):
                m = next(m for m in mix if m["param"] == name)
                assert row[1].startswith(f"{m['rhat']:.3f} " + ("✔" if m["rhat"] <= goals["rhat"] else "✘"))
                assert f"{m['ess_bulk']:,.0f}/{goals['ess-bulk']:,.0f}" in row[2]
                assert f"{m['ess_tail']:,.0f}/{goals['ess-tail']:,.0f}" in row[2]
                # one number format for mean, MCSE, sd and the interval (three significant figures)
                mean_s, mcse_s = row[0].split("\n")[1].split(" ± ")
                sd_line, interval = row[3].split("\n")
                assert sd_line.startswith("sd ")
                q05_s, q95_s = interval.split("…")
                for text_value, value in ((mean_s, m["mean"]), (mcse_s, m["mcse"]), (sd_line[3:], m["sd"]),
                                          (q05_s, m["q05"]), (q95_s, m["q95"])):
                    assert float(text_value) == pytest.approx(value, rel=5e-3, abs=1e-12)
                    assert significant_digits(text_value) == 3, text_value
                assert m["q05"] <= m["mean"] <= m["q95"]
                # what it still needs: the stored projection; R̂ above its goal is never projected
                needs = row[4].split("\n")
                if m["more_draws"]:
                    assert needs[0] == f"ESS +{m['more_draws']:,}"
                else:
                    assert needs[0].startswith("✔") or needs[0] == "ESS: no projection"
                assert ("R̂: no projection" in needs) == (m["rhat"] > goals["rhat"])
            # largest k̂ by label, in order, as stored
            pw = reader.pointwise(run)
            top = sorted(pw, key=lambda p: (-p["k_hat"], p["obs"]))[:8]
            panel = app.query_one(KhatPanel)
            assert [(p["obs"], p["k_hat"]) for p in panel.worst_rows] == [(p["obs"], p["k_hat"]) for p in top]
            lines = panel.worst.plain.split("\n")[1:9]
            for i, (p, line) in enumerate(zip(top, lines)):
                label = p["label"] or f"#{p['obs'] + 1}"
                assert line[2:].startswith(label + " "), (line, label)  # in full, never cut
                assert f" {p['k_hat']:.2f}" in line
                assert line.startswith("ABCD"[i] if i < 4 else " ")

    run_app(check, history_path)


def test_surprising_observation_is_named_first(fixture_history_path):
    # A point far from the rest gets the largest k̂ (a fact of the trade); the fixture
    # puts one at observation 17 of the 'cohort' data.
    async def check(app, pilot):
        await pick(app, pilot, "narrow")
        await pilot.press("3")
        await pilot.pause(0.2)
        assert app.query_one(KhatPanel).worst.plain.split("\n")[1].split()[1] == "o17-far"
        chart = app.query_one("#khat-chart").plain
        assert "draws" in chart and any(0x2800 < ord(ch) <= 0x28FF for ch in chart)
        assert "A" in chart.split("\n", 3)[-1]  # the worst one's own mark is drawn

    run_app(check, fixture_history_path)


def test_time_cursor_moves_and_every_panel_follows(history_path, reader):
    run = comparable_pairs(reader)[0][0]
    dataset = reader.run(run)["dataset"]
    snaps = reader.snapshots(run)
    n = len(snaps)
    assert n >= 6

    async def check(app, pilot):
        await pick(app, pilot, run)
        await pilot.press("2")  # the charts tab, so the chart is drawn
        await pilot.pause(0.2)
        chart_latest = app.query_one("#elpd-chart").plain
        for _ in range(4):
            await pilot.press("left")
        await until(pilot, lambda: app.view.snap["seq"] == n - 4)
        await pilot.pause(0.2)
        s = snaps[n - 5]
        assert s["seq"] == n - 4
        bar = app.query_one(CursorBar).plain
        assert f"snapshot {n - 4}/{n}" in bar and "PAST" in bar and "LIVE" not in bar
        assert f"{s['loo_elpd']:.2f}" in app.query_one(Headline).plain
        assert app.query_one("#elpd-chart").plain != chart_latest
        mix = sorted(reader.mixing(s["id"]), key=lambda m: -m["rhat"])
        table = app.query_one(MixingTable)
        assert str(table.get_row_at(0)[1]).startswith(f"{mix[0]['rhat']:.3f}")
        # the runs list shows every run as it was at that time
        table = app.query_one(RunList)
        for r in reader.runs():
            then = [x for x in reader.snapshots(r["name"]) if x["time"] <= s["time"]][-1]
            assert str(table.get_row(r["name"])[2]) == f"{then['draws']:,}"
            assert str(table.get_row(r["name"])[3]) == f"{then['loo_elpd']:.2f}"
        # pointwise values: the nearest stored at or before the cursor (thinned history)
        pw = reader.pointwise(run, snapshot_id=s["id"])
        src = next(x["seq"] for x in snaps if x["id"] == pw[0]["snapshot_id"])
        assert src <= s["seq"] and app.view.pointwise_from == src
        assert [p["k_hat"] for p in app.view.pointwise] == [p["k_hat"] for p in pw]
        # comparison as it was then
        at = reader.comparisons(dataset=dataset, at_time=s["time"])
        assert [c["delta"] for c in app.view.comparisons] == [c["delta"] for c in at]
        await pilot.press("home")
        await until(pilot, lambda: app.view.snap["seq"] == 1)
        assert f"{snaps[0]['loo_elpd']:.2f}" in app.query_one(Headline).plain
        await pilot.press("left")  # already at the first: stays
        await pilot.pause(0.2)
        assert app.view.snap["seq"] == 1
        await pilot.press("right")
        await until(pilot, lambda: app.view.snap["seq"] == 2)
        await pilot.press("end")
        await until(pilot, lambda: app.view.snap["seq"] == n and app.view.following)
        bar = app.query_one(CursorBar).plain
        assert ("LIVE" in bar) == service_alive(reader.service()) or "service stopped at" in bar

    run_app(check, history_path)


def test_comparison_is_signed_from_the_selected_run(history_path, reader):
    compared, _, _ = comparable_pairs(reader)
    assert len(compared) >= 2

    async def check(app, pilot):
        await pilot.press("5")
        for run in compared:
            await pick(app, pilot, run)
            latest = reader.comparisons(dataset=reader.run(run)["dataset"])
            by = {c["run"]: c for c in latest}
            assert len(latest) >= 3  # a pair without the best run is on screen
            pairs = reader.comparison_pairs(latest[0]["round"])
            assert len(pairs) == len(latest) * (len(latest) - 1) // 2  # every pair stored
            text = app.query_one(ComparisonPanel).plain
            lines = text.split("\n")
            for other in [c["run"] for c in latest if c["run"] != run]:
                row = next(l for l in lines if l.startswith(other + " ") and ("▲" in l or "▼" in l))
                # Δ = elpd(this) − elpd(other), from the stored elpd of both rows
                delta = by[run]["elpd"] - by[other]["elpd"]
                assert f"{delta:+.2f}" in row, (row, delta)
                assert ("▲" in row) == (delta > 0)
                # every pair, the best run in it or not: SE, separation and MCSE as stored for it
                src = next(p for p in pairs if {p["run_a"], p["run_b"]} == {run, other})
                assert src["delta"] == pytest.approx(abs(delta), abs=1e-9)
                assert f"{src['se_delta']:.2f}" in row and f"{src['mcse_delta']:.3f}" in row
                assert f"{delta / src['se_delta']:+.1f}" in row
                assert ("⇄ may swap" in row) == bool(src["may_flip"])
                assert "n.s." not in row
            assert "n.s." not in text
            # stacking weights in a panel of their own, and they add up
            assert "stacking weights (sum " in text
            total = sum(c["weight"] for c in latest)
            assert f"stacking weights (sum {total:.2f})" in text
            for c in latest:
                assert any(l.startswith(c["run"] + " ") and f"{c['weight']:.2f}" in l
                           for l in lines[lines.index(next(l for l in lines if l.startswith("stacking"))):])
            # where the difference comes from: the sum of Δ_i over observations is Δ of the pair
            rival = max((c for c in latest if c["run"] != run), key=lambda c: c["elpd"])["run"]
            mine = {p["obs"]: p["elpd_loo"] for p in reader.pointwise(run)}
            theirs = {p["obs"]: p["elpd_loo"] for p in reader.pointwise(rival)}
            total_i = sum(mine[i] - theirs[i] for i in mine)
            assert f"sum of Δ_i = {total_i:+.2f}" in text
            assert "▲ " in text and "▼ " in text
            assert f"separation vs {rival[:12]}" in text or "one round with SE" in text

    run_app(check, history_path)


def test_comparison_only_for_runs_on_the_same_data(fixture_history_path):
    h = History(fixture_history_path, readonly=True)
    compared, other_n, alone = comparable_pairs(h)
    h.close()
    # what the fixture holds: a compared pair, a run on their dataset with another n, a lone run
    assert len(compared) == 2 and other_n and alone

    async def check(app, pilot):
        for run in compared:
            await pick(app, pilot, run)
            assert {c["run"] for c in app.view.comparisons} == set(compared)
            assert "Δelpd" in app.query_one(ComparisonPanel).plain
        for r in other_n + alone:
            await pick(app, pilot, r["name"])
            text = app.query_one(ComparisonPanel).plain
            assert text.startswith("no other run") and "Δelpd" not in text
            assert app.view.comparisons == []

    run_app(check, fixture_history_path)


def test_usable_at_80x24_on_every_tab(history_path):
    async def check(app, pilot):
        assert app.size == (80, 24)
        for key in "12345":
            await pilot.press(key)
            await pilot.pause(0.15)
            for widget in app.screen.query("*"):
                scrolled = any(isinstance(a, ScrollableContainer) for a in widget.ancestors)
                if widget.display and widget.region.area and not scrolled:
                    r = widget.region  # on screen (content inside scroll areas may run on)
                    assert r.right <= 80 and r.bottom <= 24, widget
        # the charts got drawing room and the keys are in the footer
        await pilot.press("2")
        await pilot.pause(0.2)
        for cid in ("#elpd-chart", "#mcse-chart"):
            assert app.query_one(cid).content_size.height >= 6
            assert len(app.query_one(cid).plain.split("\n")) >= 6
        keys = {k for k, active in app.active_bindings.items() if active.binding.show}
        assert {"q", "left", "pagedown"} <= keys
        footer_keys = {w.key for w in app.screen.query("FooterKey")}
        assert {"q", "left", "n", "pagedown", "h", "s", "question_mark"} <= footer_keys

    run_app(check, history_path, size=(80, 24))


def test_wide_terminal_puts_charts_side_by_side(history_path):
    async def check(app, pilot):
        await pilot.press("2")
        await pilot.pause(0.2)
        a, b = app.query_one("#elpd-chart").region, app.query_one("#mcse-chart").region
        assert a.y == b.y and a.right <= b.x and b.right <= 180  # side by side, both on screen
        assert a.width > 60 and b.width > 60 and a.height > 20
        # the Scores tab shows the figures, the verdict and the three charts at once
        await pilot.press("1")
        await pilot.pause(0.2)
        regions = [app.query_one(i).region for i in ("#headline", "#verdict", "#dash-elpd",
                                                     "#dash-mcse", "#dash-khat")]
        assert all(r.area > 0 and r.right <= 180 and r.bottom <= 50 for r in regions)
        for cid in ("#dash-elpd", "#dash-mcse", "#dash-khat"):
            assert any(0x2800 < ord(ch) <= 0x28FF for ch in app.query_one(cid).plain), cid

    run_app(check, history_path, size=(180, 50))


def test_q_quits(history_path):
    async def check(app, pilot):
        await pilot.press("q")
        await pilot.pause(0.1)
        assert not app.is_running

    app = run_app(check, history_path)
    assert app.return_code == 0


def test_new_snapshots_appear_while_the_app_runs(tmp_path):
    path = tmp_path / "live.sqlite"
    builder = build_history(path, steps=6)
    try:
        async def check(app, pilot):
            await pick(app, pilot, "solo")
            headline = app.query_one(Headline)
            assert app.view.n_snapshots == 6 and "snapshot 6/6" in app.query_one(CursorBar).plain
            # written from another thread, as the service in the same process would
            t = threading.Thread(target=builder.step)
            t.start()
            while t.is_alive():
                await pilot.pause(0.05)
            await until(pilot, lambda: app.view.n_snapshots == 7)
            s = History(path, readonly=True).latest_snapshot("solo")
            assert s["seq"] == 7
            assert "snapshot 7/7" in app.query_one(CursorBar).plain
            assert f"{s['loo_elpd']:.2f}" in headline.plain
            assert app.query_one(Headline) is headline  # updated in place, not remounted
            # reviewing an older snapshot: new data arrive but the cursor stays put
            await pilot.press("left", "left")
            await until(pilot, lambda: app.view.snap["seq"] == 5)
            t = threading.Thread(target=builder.step)
            t.start()
            while t.is_alive():
                await pilot.pause(0.05)
            await until(pilot, lambda: app.view.n_snapshots == 8)
            assert app.view.snap["seq"] == 5 and "snapshot 5/8" in app.query_one(CursorBar).plain
            await pilot.press("end")
            await until(pilot, lambda: app.view.snap["seq"] == 8)
            # a warning logged by the service shows up under the verdict
            builder.history.add_event("warning", "rejected_input", "chain3.csv line 12: 3 fields, "
                                      "the header has 52", run="solo", file="chain3.csv")
            await until(pilot, lambda: "rejected_input" in app.query_one(VerdictPanel).plain)
            assert "the header has 52" in app.query_one(VerdictPanel).plain

        run_app(check, path)
    finally:
        builder.close()


def test_waits_for_a_history_that_appears_later(tmp_path):
    path = tmp_path / "later.sqlite"

    async def main():
        app = VigilApp(path, refresh=0.1)
        async with app.run_test(size=(100, 30)) as pilot:
            await until(pilot, lambda: app.view is not None)
            assert "waiting for the history file" in app.query_one(CursorBar).plain
            b = build_history(path, steps=2)
            try:
                # the reader may look between the two steps; it must catch up with both
                await until(pilot, lambda: app.view.snap is not None and app.view.n_snapshots == 2)
                assert math.isfinite(app.view.snap["loo_elpd"])
            finally:
                b.close()

    asyncio.run(main())


def test_a_file_that_is_not_a_history_is_reported_not_fatal(tmp_path):
    import sqlite3

    path = tmp_path / "other.sqlite"
    with sqlite3.connect(path) as conn:
        conn.execute("CREATE TABLE birds (name TEXT)")

    async def main():
        app = VigilApp(path, refresh=0.1)
        async with app.run_test(size=(100, 30)) as pilot:
            await until(pilot, lambda: app.view is not None and app.view.problem is not None)
            bar = app.query_one(CursorBar).plain
            assert "cannot read the history" in bar and len(bar) <= 100
            whole = app.query_one(Headline).plain.replace("\n", " ")
            assert "not a chainvigil history" in whole and "birds" in whole
            await pilot.press("left", "home", "2")  # keys on an empty view do no harm
            await pilot.pause(0.1)
            assert app.is_running

    asyncio.run(main())


# -- text that fits, at three terminal sizes ----------------------------------------------------------

SIZES = [(80, 24), (100, 30), (180, 50)]


@pytest.mark.slow
@pytest.mark.parametrize("size", SIZES, ids=lambda s: f"{s[0]}x{s[1]}")
def test_every_check_reachable_labels_whole_sums_add_up(history_path, reader, size):
    async def check(app, pilot):
        for run in [r["name"] for r in reader.runs()]:
            await pick(app, pilot, run)
            s = reader.latest_snapshot(run)
            # every check of the verdict reachable with the documented PgDn key
            await pilot.press("1")
            await pilot.pause(0.2)
            seen = screen_text(app)
            for _ in range(12):
                await pilot.press("pagedown")
                await pilot.pause(0.1)
                seen += screen_text(app)
            for c in s["verdict"]["checks"]:
                mark = {True: "✔", False: "✘", None: "·"}[c["ok"]]
                assert f"{mark} {c['name']} " in seen, (size, run, c["name"])
            # figures that claim a sum add up: "N draws = a + b + …" or "= k chains × d"
            head = app.query_one(Headline).plain
            claim = next(l for l in head.split("\n") if " draws" in l and l.startswith("#"))
            total = int(claim.split(": ", 1)[1].split(" draws")[0].replace(",", ""))
            assert total == s["draws"]
            rhs = claim.split(" draws ", 1)[1].split(" · ")[0]
            if rhs.startswith("= ") and "×" in rhs:
                k, d = rhs[2:].split(" chains × ")
                assert int(k) * int(d.replace(",", "")) == total
            elif rhs.startswith("= "):
                assert sum(int(x.replace(",", "")) for x in rhs[2:].split(" + ")) == total
            else:
                assert rhs.startswith(f"over all {s['chains']} chains (shortest chain ")
            # no label cut where space exists: the worst observations' labels whole on screen
            await pilot.press("3")
            await pilot.pause(0.3)
            screen = screen_text(app)
            pw = reader.pointwise(run)
            top = sorted(pw, key=lambda p: (-p["k_hat"], p["obs"]))[:4]
            for p in top:
                assert (p["label"] or f"#{p['obs'] + 1}") in screen, (size, p["label"])
            # the histogram counts every observation once
            side = app.query_one(KhatPanel).worst.plain
            import re

            bins = side.split("by k̂")[1].split("\n")[1:]
            counts = [int(re.match(r"^\s*(?:[≤>] )?[\d.–]+\s+(\d+)", l).group(1))
                      for l in bins if l.strip() and "total" not in l]
            total_line = next(l for l in bins if "total" in l)
            assert sum(counts) == len(pw) == int(total_line.split()[-1])
            # one limit in the heading: where ✘ starts (the threshold, never above 0.7)
            thr = reader.latest_snapshot(run)["k_threshold"]
            heading = next(line for line in side.split("\n") if "by k̂" in line)
            assert f"(✘ above {min(thr, 0.7):.3g})" in heading
            # the run list shows the data set whole (there is room beside it)
            assert reader.run(run)["dataset"] in screen
            # a cut title ends with "…" (never cut mid-phrase without a sign)
            bar = screen.split("\n")[0].rstrip()
            title = reader.run(run)["title"] or ""
            assert title in bar or bar.endswith("…") or title[:6] not in bar

    run_app(check, history_path, size=size)


def test_no_colour_keeps_every_series_apart(history_path, monkeypatch):
    """With NO_COLOR set, each chart's series differ by glyph in the captured text."""
    monkeypatch.setenv("NO_COLOR", "1")

    async def check(app, pilot):
        await pilot.press("2")
        await pilot.pause(0.3)
        elpd = app.query_one("#elpd-chart").plain.split("\n")
        legend, body = "\n".join(elpd[:2]), "\n".join(elpd[2:])
        assert "░ LOO ±2·MCSE" in legend and "× WAIC" in legend and "LOO elpd" in legend
        assert "░" in body and "×" in body and any(0x2800 < ord(ch) <= 0x28FF for ch in body)
        mcse = app.query_one("#mcse-chart").plain
        assert "╌ goal" in mcse and "╌" in mcse.split("\n", 2)[2]
        await pilot.press("3")
        await pilot.pause(0.3)
        khat = app.query_one("#khat-chart").plain
        body = khat.split("\n", 3)[3]
        assert "═ 0.7" in khat and "A" in body and "B" in body
        # the good/bad marks carry a glyph beside the colour
        assert "✘" in app.query_one(KhatPanel).worst.plain or "✔" in app.query_one(KhatPanel).worst.plain
        assert app.query_one(CursorBar).plain

    run_app(check, history_path, size=(100, 30))


def test_input_strings_show_literally(tmp_path):
    """Markup-like and control characters from run.json/labels are shown as written, never parsed
    (a dataset called "[/]" used to crash the viewer)."""
    path = tmp_path / "odd.sqlite"
    build_history(path, steps=3).close()
    h = History(path)
    labels = [f"[red]obs {i}\x07" for i in range(48)]
    h.upsert_run("narrow", dataset="[/]", title="[bold]tarns[/bold] \x1b[31mred", labels=labels)
    h.upsert_run("wide", dataset="[/]")
    h.add_snapshot("narrow", {"draws": 480, "chains": 4, "draws_per_chain": 120, "loo_elpd": -80.0},
                   pointwise={"elpd_loo": [-1.0] * 48, "elpd_waic": [-1.0] * 48,
                              "k_hat": [0.9] + [0.1] * 47})
    h.close()

    async def check(app, pilot):
        await pick(app, pilot, "narrow")
        bar = app.query_one(CursorBar).plain
        assert "[bold]tarns[/bold]" in bar  # 180 columns: the whole title fits
        assert "\\x1b[31mred" in bar and "\x1b" not in bar  # the control character written escaped
        assert "[/]" in screen_text(app)
        for key in "12345":
            await pilot.press(key)
            await pilot.pause(0.2)
        await pilot.press("3")
        await pilot.pause(0.3)
        side = app.query_one(KhatPanel).worst.plain
        assert "[red]obs 0\\x07" in side and "\x07" not in side
        assert app.is_running

    run_app(check, path, size=(180, 50))


def test_screenshot_is_saved_and_its_path_shown(fixture_history_path, tmp_path):
    import shutil

    path = tmp_path / "copy.sqlite"
    shutil.copy(fixture_history_path, path)

    async def check(app, pilot):
        await pilot.press("s")
        await until(pilot, lambda: app.last_screenshot is not None)
        shot = app.last_screenshot
        assert shot.parent == tmp_path and shot.suffix == ".svg" and shot.stat().st_size > 1000
        assert "<svg" in shot.read_text()[:200]
        assert any(str(shot) in str(n.message) for n in app._notifications)

    run_app(check, path)


def test_half_the_draws_key_narrows_the_charts(history_path, reader):
    async def check(app, pilot):
        await pilot.press("2")
        await pilot.pause(0.2)
        assert "since half" not in app.query_one("#elpd-chart").plain
        await pilot.press("h")
        await pilot.pause(0.3)
        assert app.since_half
        assert "since half" in app.query_one("#elpd-chart").plain
        assert "since half" in app.query_one("#mcse-chart").plain
        # the x-axis now starts at half the draws of the cursor snapshot
        ticks = app.query_one("#elpd-chart").plain.rstrip().split("\n")[-1].split()
        first = float(ticks[0].replace("k", "e3"))
        assert first >= app.view.snap["draws"] / 2 - 1
        await pilot.press("h")
        await pilot.pause(0.3)
        assert "since half" not in app.query_one("#elpd-chart").plain

    run_app(check, history_path)


def test_draws_sentence_adds_up_with_chains_of_unequal_length():
    from chainvigil.tui.headline import draws_sentence
    from chainvigil.tui.loader import View

    snap = {"draws": 1720, "chains": 4, "draws_per_chain": 400}
    chains = [{"draws": d} for d in (430, 430, 460, 400)]
    assert draws_sentence(View(snap=snap, chains=chains)) == "1,720 draws = 430 + 430 + 460 + 400"
    # a past snapshot (the chains table holds today's lengths only): the total and the shortest chain
    assert draws_sentence(View(snap=snap, chains=[])) == \
        "1,720 draws over all 4 chains (shortest chain 400)"
    equal = {"draws": 1600, "chains": 4, "draws_per_chain": 400}
    assert draws_sentence(View(snap=equal, chains=[{"draws": 400}] * 4)) == "1,600 draws = 4 chains × 400"


def test_the_screen_shows_the_stored_state_word_itself():
    # one name per state: the run list shows runs.state as stored (an underscore as a space) after a
    # glyph; every stored state has its own glyph and colour, and nothing else is renamed
    assert set(STATE_LOOKS) == set(RUN_STATES)
    for state in RUN_STATES:
        word, colour = state_word(state)
        assert word == f"{STATE_LOOKS[state][0]} {state.replace('_', ' ')}" and colour == STATE_LOOKS[state][1]
    assert len({glyph for glyph, _ in STATE_LOOKS.values()}) == len(RUN_STATES)
    assert state_word("needs_a_look")[0] == "✘ needs a look"
    # a word the history should not hold (no mapping of older words) shows as it is, marked, escaped
    assert state_word("settled")[0] == "? settled" and state_word("x\x1b[2J")[0] == "? x\\x1b[2J"
    assert state_word(None)[0] == "· not started"


def test_a_run_set_aside_shows_so_with_its_reason(tmp_path):
    # runs.state 'set_aside' with runs.state_reason, as the service's ingest writes them
    path = tmp_path / "aside.sqlite"
    build_history(path, steps=3).close()
    h = History(path)
    reason = "reading failed on /runs/solo/chain2.csv: ValueError: line 7 has 3 fields, the header has 52"
    h.set_run_state("solo", "set_aside", reason=reason)
    h.upsert_run("waiting", folder="/runs/waiting", dataset="counts", n_obs=20)
    h.set_run_state("waiting", "set_aside", reason="reading failed on /runs/waiting/run.json: [bold]x")
    h.close()

    async def check(app, pilot):
        table = app.query_one(RunList)
        assert str(table.get_row("solo")[1]) == "⊘ set aside"
        assert str(table.get_row("waiting")[1]) == "⊘ set aside"
        assert str(table.get_row("narrow")[1]) != "⊘ set aside"
        await pick(app, pilot, "solo")
        head = app.query_one(Headline).plain
        flat = " ".join(head.split())
        assert flat.startswith("⊘ set aside: the service could not process this run")
        assert " ".join(reason.split()) in flat and "last it stored" in flat
        assert "LOO" in head  # the last stored figures are still shown below
        await pick(app, pilot, "waiting")  # set aside before any snapshot: the reason still shows
        flat = " ".join(app.query_one(Headline).plain.split())
        assert "⊘ set aside" in flat and "run.json: [bold]x" in flat and "no snapshots" in flat

    run_app(check, path)


def test_chains_apart_are_drawn_side_by_side(tmp_path):
    # the fixture's 'solo' run with its last chain moved 3 posterior sds away: R̂ far above 1.01
    path = tmp_path / "apart.sqlite"
    build_history(path, steps=6, apart={"solo": 3.0}).close()
    h = History(path, readonly=True)
    snap = h.latest_snapshot("solo")
    mu = next(m for m in h.mixing(snap["id"]) if m["param"] == "mu")
    others = [m for m in h.mixing(h.latest_snapshot("narrow")["id"])]
    h.close()
    assert mu["rhat"] > 1.1 and len(mu["chain_means"]) == 4
    assert mu["chain_means"][3] - max(mu["chain_means"][:3]) > 2 * max(mu["chain_sds"])

    async def check(app, pilot):
        await pick(app, pilot, "solo")
        await pilot.press("4")
        await pilot.pause(0.3)
        note = app.query_one("#mixing-note").plain
        lines = note.split("\n")
        assert lines[0].startswith(f"chains of mu, R̂ {mu['rhat']:.3f} > 1.01")
        rows = [l for l in lines if l.startswith("chain") and not l.startswith("chains") and "●" in l]
        assert [r.split()[0] for r in rows] == ["chain1", "chain2", "chain3", "chain4"]
        for r, m, sd in zip(rows, mu["chain_means"], mu["chain_sds"]):
            mean_s, sd_s = r.split()[1], r.split()[3]
            assert float(mean_s) == pytest.approx(m, rel=5e-3) and float(sd_s) == pytest.approx(sd, rel=5e-3)
            assert r.count("├") == 1 and r.count("┤") == 1  # an interval per chain, glyphs not colour
        # the chain apart: its interval starts right of where the others end (the axis is shared)
        ends = [r.index("┤") for r in rows[:3]]
        assert rows[3].index("├") > max(ends)
        # a run whose chains agree shows no such block
        await pick(app, pilot, "narrow")
        await pilot.pause(0.3)
        assert not app.query_one("#mixing-note").plain.startswith("chains of")
        assert all(m["rhat"] <= 1.01 for m in others)

    run_app(check, path, size=(100, 30))


def test_headline_shows_the_stored_cautions_and_computes_none():
    from chainvigil.tui.headline import headline_text
    from chainvigil.tui.loader import View

    snap = {"seq": 3, "draws": 400, "chains": 4, "draws_per_chain": 100, "loo_p_eff": 40.0,
            "verdict": {"enough": False, "checks": [], "cautions": ["p_eff 40.0 is more than 2 times [x]"]}}
    text = headline_text(View(snap=snap, run={"name": "r", "n_params": 2}), 100).plain
    assert "! p_eff 40.0 is more than 2 times [x]" in text
    # no caution stored, no hint, whatever the figures (the rule lives with the verdict)
    snap = {**snap, "verdict": {"enough": False, "checks": [], "cautions": []}}
    assert "!" not in headline_text(View(snap=snap, run={"name": "r", "n_params": 2}), 100).plain


def test_pair_uses_the_stored_pair_and_falls_back_for_rounds_without_pairs():
    from chainvigil.tui.comparison_panel import pair

    rows = [{"run": "a", "elpd": -10.0, "delta": 0.0, "se_delta": 0.0, "mcse_delta": 0.0},
            {"run": "b", "elpd": -12.0, "delta": -2.0, "se_delta": 1.0, "mcse_delta": 0.1},
            {"run": "c", "elpd": -15.0, "delta": -5.0, "se_delta": 2.0, "mcse_delta": 0.2}]
    pairs = [{"run_a": "b", "run_b": "c", "delta": 3.0, "se_delta": 1.5, "mcse_delta": 0.15,
              "caution": 1, "may_flip": 0}]
    # signed from the selected run's side, as stored for the pair
    assert pair(rows, "c", "b", pairs) == {"delta": -3.0, "se": 1.5, "mcse": 0.15, "stored": True,
                                           "caution": True, "may_flip": False}
    assert pair(rows, "b", "c", pairs)["delta"] == 3.0
    # a round written without pairs: against the best from its rows, else not stored
    assert pair(rows, "b", "a", [])["se"] == 1.0 and pair(rows, "a", "b", [])["delta"] == 2.0
    old = pair(rows, "b", "c", [])
    assert old["stored"] is False and old["se"] is None and old["delta"] == 3.0
