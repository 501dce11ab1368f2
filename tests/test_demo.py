"""`chainvigil demo --headless`: the one-command demo as CI can run it (real sampler processes, the
real service with its watcher, a short run)."""
from __future__ import annotations

import json
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow  # real sampler processes and the service for a minute

PROJECT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_headless_demo_scores_every_model_and_keeps_its_folder(tmp_path):
    root = tmp_path / "demo"
    proc = subprocess.run([sys.executable, "-m", "chainvigil.cli", "demo", "--headless", "--seconds", "25",
                           "--root", str(root)], capture_output=True, text=True, timeout=240, cwd=PROJECT)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    out = proc.stdout
    assert "final verdicts:" in out
    models = ("tarns-robust", "tarns-plain", "tarns-sticky")
    for model in models:
        assert (root / model / "run.json").is_file()
        assert any(line.split()[1:2] == [model] and "elpd_loo" in line for line in out.splitlines()), model
    history = json.loads(subprocess.run([sys.executable, "-m", "chainvigil.cli", "history", str(root / ".chainvigil"),
                                         "--json"], capture_output=True, text=True, timeout=60,
                                        cwd=PROJECT).stdout)
    # the models (and refits of the misfit model's flagged readings, when they have draws already)
    assert {h["run"] for h in history if "--refit-" not in h["run"]} == set(models)
    # the final verdict lines name what each model still needs (or that it has enough)
    final = out.split("final verdicts:")[1]
    for model in models:
        assert model in final
    # the misfit model's influential readings are named by their labels from run.json
    assert "need refits or K-fold" in final
    # ... so the service asked for them in REFITS.json, and the demo started each refit (real processes)
    request = json.loads((root / "tarns-plain" / "REFITS.json").read_text())
    refits = sorted(p.name for p in root.glob("tarns-plain--refit-*"))
    assert {r["folder"] for r in request["refits"]} <= set(refits)
    assert all(json.loads((root / r / "run.json").read_text())["refit_of"] == "tarns-plain" for r in refits)
    # the closing lines print review commands that work as printed (here: this interpreter with -m)
    review = [line.strip() for line in out.splitlines()[-3:]]
    assert [shlex.split(r)[3] for r in review] == ["view", "compare", "report"]
    for command in review[1:]:
        proc = subprocess.run(shlex.split(command), capture_output=True, text=True, timeout=120, cwd=root)
        assert proc.returncode == 0, (command, proc.stderr)
    assert (root / "report.html").is_file()
