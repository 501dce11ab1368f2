"""The everyday commands on a history written by the real service while real simulated samplers wrote:
``compare`` (text, JSON, CSV, ``--at``, ``--run``), ``report`` (values in the HTML equal the history's,
the HTML and each inline SVG parse), every command on a closed pipe, and each ``--help``."""
from __future__ import annotations

import csv
import io
import json
import math
import os
import shlex
import subprocess
import sys
import xml.etree.ElementTree as ET
from datetime import datetime, timezone
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from chainvigil import cli
from chainvigil.storage.history import History
from service_history import build_service_history

PROJECT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.slow  # the shared history takes ~15 s of real sampling


@pytest.fixture(scope="module")
def state(tmp_path_factory):
    path = build_service_history(tmp_path_factory.mktemp("svc"))
    return path.parent


def run_cli(*args, stdout=subprocess.PIPE, timeout=120):
    return subprocess.run([sys.executable, "-m", "chainvigil.cli", *map(str, args)], stdout=stdout,
                          stderr=subprocess.PIPE, text=True, timeout=timeout, cwd=PROJECT)


def rounds(state):
    h = History(state / "history.sqlite", readonly=True)
    try:
        rows = h.conn.execute("SELECT DISTINCT round, time FROM comparisons ORDER BY round").fetchall()
        return rows, h.comparisons()
    finally:
        h.close()


# ---------------------------------------------------------------------- compare
def test_compare_json_and_csv_equal_the_latest_round(state):
    _, latest = rounds(state)
    assert len(latest) == 3  # the three tarn models share one data set
    out = json.loads(run_cli("compare", state, "--json").stdout)
    assert out["at"] is None and len(out["datasets"]) == 1
    ds = out["datasets"][0]
    assert ds["round"] == latest[0]["round"] and ds["against_best"] and ds["against"] == latest[0]["run"]
    assert [r["run"] for r in ds["runs"]] == [r["run"] for r in latest]
    for got, want in zip(ds["runs"], latest):
        for key in ("elpd", "delta", "se_delta", "mcse_delta", "weight"):
            assert got[key] == want[key], key
        assert got["could_swap"] == bool(want["may_flip"]) and got["caution"] == bool(want["caution"])
    rows = list(csv.DictReader(io.StringIO(run_cli("compare", state, "--csv").stdout)))
    assert [r["run"] for r in rows] == [r["run"] for r in latest]
    for got, want in zip(rows, latest):
        assert float(got["delta"]) == want["delta"] and float(got["weight"]) == want["weight"]
        assert int(got["could_swap"]) == want["may_flip"] and got["dataset"] == want["dataset"]


def test_compare_text_has_one_line_per_pair(state):
    _, latest = rounds(state)
    lines = run_cli("compare", state).stdout.splitlines()
    assert lines[0].startswith(f"data set '{latest[0]['dataset']}'")
    best = latest[0]["run"]
    pairs = [line for line in lines if " vs " in line]
    assert len(pairs) == 2
    for line, row in zip(pairs, latest[1:]):
        assert line.strip().startswith(f"{best} vs {row['run']}: Δelpd {row['delta']:+.2f}")
        assert ("could swap with more draws" in line) == bool(row["may_flip"])


def test_compare_at_a_time_gives_the_round_then(state):
    all_rounds, _ = rounds(state)
    assert len(all_rounds) >= 3
    rnd, t_round = all_rounds[len(all_rounds) // 2]
    t = (t_round + all_rounds[len(all_rounds) // 2 + 1][1]) / 2  # between two rounds: ISO's µs do not matter
    h = History(state / "history.sqlite", readonly=True)
    then = h.comparisons(at_time=t)
    h.close()
    assert then[0]["round"] == rnd
    iso_utc = datetime.fromtimestamp(t, tz=timezone.utc).isoformat()
    iso_local = datetime.fromtimestamp(t).isoformat()  # no zone: local time
    for at in (repr(t), iso_utc, iso_local):
        ds = json.loads(run_cli("compare", state, "--json", "--at", at).stdout)["datasets"][0]
        assert ds["round"] == rnd, at
        assert [r["delta"] for r in ds["runs"]] == [r["delta"] for r in then]
    # before the first comparison: nothing, said in words
    early = run_cli("compare", state, "--at", "1970-01-02T00:00Z")
    assert early.returncode == 0 and early.stdout.startswith("no comparison recorded at or before")
    bad = run_cli("compare", state, "--at", "yesterday-ish")
    assert bad.returncode != 0 and "--at 'yesterday-ish': not a time" in bad.stderr


def test_compare_against_a_chosen_run(state):
    _, latest = rounds(state)
    best, second = latest[0]["run"], latest[1]["run"]
    ds = json.loads(run_cli("compare", state, "--json", "--run", second).stdout)["datasets"][0]
    assert ds["against"] == second and not ds["against_best"]
    by_run = {r["run"]: r for r in ds["runs"]}
    assert by_run[second]["delta"] == 0.0
    # measured the other way round, the pair best/second has the opposite Δ and the same SE(Δ) and
    # MCSE(Δ) as the service's own comparison (var(a − b) = var(b − a); sqrt(Ma² + Mb²) is symmetric)
    assert by_run[best]["delta"] == pytest.approx(-latest[1]["delta"], rel=1e-12)
    assert by_run[best]["se_delta"] == pytest.approx(latest[1]["se_delta"], rel=1e-9)
    assert by_run[best]["mcse_delta"] == pytest.approx(latest[1]["mcse_delta"], rel=1e-9)
    # the third run against the chosen one, from the pointwise values (Vehtari, Gelman & Gabry 2017, §5.2)
    third = latest[2]["run"]
    h = History(state / "history.sqlite", readonly=True)
    e3 = np.array([r["elpd_loo"] for r in h.pointwise(third)])
    e2 = np.array([r["elpd_loo"] for r in h.pointwise(second)])
    h.close()
    assert by_run[third]["delta"] == pytest.approx(e3.sum() - e2.sum(), rel=1e-9)
    assert by_run[third]["se_delta"] == pytest.approx(math.sqrt(e3.size * np.var(e3 - e2, ddof=1)), rel=1e-9)
    text = run_cli("compare", state, "--run", second).stdout
    assert f"Δ against the chosen run {second}" in text and f"{second} vs {best}: Δelpd +" in text
    missing = run_cli("compare", state, "--run", "no-such-run")
    assert missing.returncode == 2 and "no run named 'no-such-run'" in missing.stderr


# ---------------------------------------------------------------------- report
VOID = {"meta", "br", "hr", "img", "input", "link", "col", "area", "base", "wbr", "source"}


class ReportParser(HTMLParser):
    """Collects figures by their data attributes and checks that every element is closed."""

    def __init__(self):
        super().__init__()
        self.stack, self.errors, self.ids = [], [], []
        self.run = self.dataset = self.check = self.param = self.obs = self.li_run = None
        self.figures = {}  # (run, figure) -> value
        self.compare = {}  # (li run, field) -> value
        self.checks, self.mixing, self.worst = {}, {}, {}
        self.plots = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.append(a["id"])
        if tag not in VOID:
            self.stack.append(tag)
        if tag == "section":
            self.run, self.dataset = a.get("data-run"), a.get("data-dataset")
        if tag == "li" and "data-run" in a:
            self.li_run = a["data-run"]
        if tag == "tr":
            self.check, self.param, self.obs = a.get("data-check"), a.get("data-param"), a.get("data-obs")
        if tag == "figure" and "data-plot" in a:
            self.plots.append((self.run or self.dataset, a["data-plot"]))
        value = a.get("data-value")
        if "data-figure" in a:
            if self.li_run is not None and self.dataset is not None:
                self.compare[(self.li_run, a["data-figure"])] = value
            elif self.run is not None:
                self.figures[(self.run, a["data-figure"])] = value
        if "data-field" in a:
            if self.check is not None:
                self.checks[(self.run, self.check, a["data-field"])] = value
            elif self.param is not None:
                self.mixing[(self.run, self.param, a["data-field"])] = value
            elif self.obs is not None:
                self.worst[(self.run, int(self.obs), a["data-field"])] = value

    def handle_startendtag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.append(a["id"])

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
            return
        self.stack.pop()
        if tag == "li":
            self.li_run = None
        if tag == "tr":
            self.check = self.param = self.obs = None


def _num(text):
    return None if text in ("", None) else float(text)


def test_report_values_equal_the_history(state, tmp_path):
    out = tmp_path / "report.html"
    proc = run_cli("report", state, "-o", out)
    assert proc.returncode == 0, proc.stderr
    assert "run 3/3" in proc.stderr  # progress on stderr
    text = out.read_text(encoding="utf-8")
    # nothing is fetched when it opens: no scripts, style sheets, images or links out
    for fetching in ("<script", "<link", "<img", "src=", 'href="http', "@import", "url(http"):
        assert fetching not in text, fetching
    p = ReportParser()
    p.feed(text)
    p.close()
    assert p.errors == [] and p.stack == []
    assert len(p.ids) == len(set(p.ids))  # ids stay unique with several inline SVGs

    h = History(state / "history.sqlite", readonly=True)
    runs = [r["name"] for r in h.runs()]
    for run in runs:
        snap = h.latest_snapshot(run)
        for key in ("draws_per_chain", "chains", "draws", "loo_elpd", "loo_se", "loo_mcse", "loo_p_eff",
                    "waic_elpd", "waic_se", "k_max", "k_threshold", "k_above", "rhat_max", "ess_bulk_min",
                    "ess_tail_min", "aic_elpd", "dic_elpd"):
            assert _num(p.figures[(run, key)]) == snap[key], (run, key)
        assert p.figures[(run, "enough")] == repr(bool(snap["verdict"]["enough"]))
        stored = h.run(run)["state"]
        assert f"state {stored.replace('_', ' ')}</p>" in text  # the words, as the screen shows them
        for check in snap["verdict"]["checks"]:
            for key in ("value", "target", "more_draws", "minutes"):
                assert _num(p.checks[(run, check["name"], key)]) == check.get(key), (run, check["name"], key)
            assert p.checks[(run, check["name"], "ok")] == repr(check["ok"])
        mixing = h.mixing(snap["id"])
        assert mixing and {m["param"] for m in mixing} == {k[1] for k in p.mixing if k[0] == run}
        for m in mixing:
            for key in ("mean", "mcse", "rhat", "ess_bulk", "ess_tail"):
                assert _num(p.mixing[(run, m["param"], key)]) == m[key]
        points = h.pointwise(run)
        worst = sorted(points, key=lambda r: -r["k_hat"])[:8]
        shown = sorted({k[1] for k in p.worst if k[0] == run})
        assert shown == sorted(r["obs"] for r in worst)
        for r in worst:
            assert _num(p.worst[(run, r["obs"], "k_hat")]) == r["k_hat"]
            assert f">{r['label']}<" in text  # the worst observations are named by label
        assert (run, "trend") in p.plots and (run, "khat") in p.plots
    for row in h.comparisons()[1:]:
        for key in ("delta", "se_delta", "mcse_delta", "weight"):
            assert _num(p.compare[(row["run"], key)]) == row[key], (row["run"], key)
    h.close()

    svgs = [text[i:text.index("</svg>", i) + len("</svg>")] for i in range(len(text))
            if text.startswith("<svg", i)]
    assert len(svgs) == 2 * len(runs) + 1  # trend and k-hat per run, one comparison figure
    for svg in svgs:
        root = ET.fromstring(svg)
        assert root.tag == "{http://www.w3.org/2000/svg}svg"


def test_report_escapes_every_string_from_input(tmp_path):
    name, label, param = "<b>x</b>&$y", "<lab & el>", "<i>mu</i>"
    h = History(tmp_path / "history.sqlite")
    h.upsert_run(name, folder="/runs/<odd>", title="<script>alert(1)</script>", dataset="d&<s>", n_obs=3,
                 n_params=1, labels=[label, "b", "c"], targets={}, state="gathering", first_seen=1.0)
    verdict = {"enough": False, "checks": [{"name": "<chk>", "ok": False, "value": 1.2, "target": 1.01,
                                            "more_draws": 10, "minutes": 1.0, "note": "<note & more>"}]}
    for seq in (1, 2):
        h.add_snapshot(name, {"time": float(seq), "chains": 2, "draws": 200 * seq, "draws_per_chain": 100 * seq,
                              "loo_elpd": -5.0 - seq, "loo_se": 1.0, "loo_mcse": 0.1 / seq, "loo_p_eff": 1.0,
                              "waic_elpd": -5.0, "waic_se": 1.0, "waic_p_eff": 1.0, "k_max": 0.9,
                              "k_threshold": 0.6, "k_above": 1, "verdict": verdict},
                       mixing=[{"param": param, "mean": 0.1, "mcse": 0.01, "rhat": 1.2, "ess_bulk": 50.0,
                                "ess_tail": 40.0}],
                       pointwise={"elpd_loo": [-1.0, -2.0, -3.0], "elpd_waic": [-1.0, -2.0, -3.0],
                                  "k_hat": [0.9, 0.1, 0.2]})
    h.close()
    out = tmp_path / "r.html"
    assert cli.main(["report", str(tmp_path), "-o", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    for raw in (name, label, param, "<script>", "<chk>", "<note & more>", "<odd>"):
        assert raw not in text
    p = ReportParser()
    p.feed(text)
    assert p.errors == []
    assert p.figures[(name, "loo_elpd")] == repr(-7.0)  # the parsed attribute is the original name
    assert (name, param, "rhat") in p.mixing and (name, "<chk>", "value") in p.checks
    for svg in [text[i:text.index("</svg>", i) + 6] for i in range(len(text)) if text.startswith("<svg", i)]:
        ET.fromstring(svg)


def test_report_without_matplotlib_says_how_to_get_it(tmp_path):
    History(tmp_path / "history.sqlite").close()
    code = ("import sys; sys.modules['matplotlib'] = None\n"  # as on an install without the extra
            "from chainvigil.cli import main; sys.exit(main(sys.argv[1:]))")
    proc = subprocess.run([sys.executable, "-c", code, "report", str(tmp_path), "-o", str(tmp_path / "r.html")],
                          capture_output=True, text=True, timeout=60, cwd=PROJECT)
    assert proc.returncode == 2
    assert "pip install 'chainvigil[report]'" in proc.stderr and "Traceback" not in proc.stderr
    assert not (tmp_path / "r.html").exists()


# ---------------------------------------------------------------------- closed pipes
def _closed_pipe_run(args, cwd):
    """Run the command with stdout a real pipe whose reading end is already closed."""
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        proc = subprocess.run([sys.executable, "-m", "chainvigil.cli", *map(str, args)], stdout=write_end,
                              stderr=subprocess.PIPE, text=True, timeout=120, cwd=cwd)
    finally:
        os.close(write_end)
    return proc


def test_every_command_ends_quietly_on_a_closed_pipe(state, tmp_path):
    run_dir = state.parent / "tarns-robust"
    empty_root = tmp_path / "empty-root"
    empty_root.mkdir()
    commands = [["history", state, "--csv"], ["history", state, "--json"], ["events", state],
                ["events", state, "--json"], ["compare", state], ["compare", state, "--json"],
                ["compare", state, "--csv"], ["score", run_dir], ["score", run_dir, "--json"],
                ["report", state, "-o", tmp_path / "r.html"], ["--help"], ["compare", "--help"],
                ["watch", empty_root, "--headless", "--seconds", "2"],
                ["demo", "--headless", "--seconds", "1", "--root", tmp_path / "demo"]]
    for args in commands:
        proc = _closed_pipe_run(args, PROJECT)
        # argparse itself drops write errors of --help (exit 0); everything else reports the closed pipe
        expected = (0, cli.EXIT_CLOSED_PIPE) if "--help" in args else (cli.EXIT_CLOSED_PIPE,)
        assert proc.returncode in expected, (args, proc.returncode, proc.stderr)
        assert "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr, (args, proc.stderr)


def test_piped_into_head(state):
    for fmt in ("--csv", "--json"):
        line = f"set -o pipefail; {shlex.quote(sys.executable)} -m chainvigil.cli history {shlex.quote(str(state))} {fmt} | head -n 2"
        proc = subprocess.run(["bash", "-c", line], capture_output=True, text=True, timeout=60, cwd=PROJECT)
        assert len(proc.stdout.splitlines()) == 2
        assert proc.stderr == "", proc.stderr
        assert proc.returncode in (0, cli.EXIT_CLOSED_PIPE)  # 0 if it all fitted in the pipe first


# ---------------------------------------------------------------------- help
@pytest.mark.parametrize("command", ["view", "history", "events", "compare", "report", "score", "watch",
                                     "demo", "simulate"])
def test_help_says_what_it_is_for_and_shows_examples_that_parse(command, capsys):
    with pytest.raises(SystemExit) as done:
        cli.main([command, "--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    usage, _, rest = text.partition("\n\n")
    assert usage.startswith("usage: chainvigil " + command)
    description = rest.split("\n\n")[0]
    assert len(description.split()) >= 12, description  # a sentence or two saying what it is for
    examples = text.split("examples:\n", 1)[1].split("\n\n")[0].splitlines()
    assert examples
    for line in examples:
        words = shlex.split(line.split("  ", 2)[1] if line.startswith("  ") else line)
        assert words[:2] == ["chainvigil", command], line
        words = words[: words.index(">")] if ">" in words else words
        if command == "simulate":
            from chainvigil.simulated_chains.cli import build_parser as simulate_parser

            simulate_parser().parse_args(words[2:])
        else:
            cli.build_parser().parse_args(words[1:])  # the example is valid syntax
