"""``chainvigil demo``: simulated samplers, the service and the screen, in one go."""
from __future__ import annotations

import os
import shlex
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import chainvigil.simulated_chains as simulated_chains
from chainvigil.console import line_printer, run_with_screen
from chainvigil.service import Service

DEMO_SECONDS_HEADLESS = 180.0
DEMO_SCENARIO = "tarn-levels"
# Refits of the misfit model's flagged readings: two chains each, faster than the models' own chains
# so the headline turns from PSIS to the mixed estimate within the demo's minutes.
DEMO_REFIT_CHAINS = 2
DEMO_REFIT_PACE = 200.0


def own_command(argv0: str | None = None) -> str:
    """How to start this same ``chainvigil`` again from the user's shell, as a string to print.

    ``chainvigil`` alone when that name on the PATH is this very program; otherwise the full path of
    the script that was started (e.g. ``/home/me/chainvigil/.venv/bin/chainvigil`` after ``make
    demo``); when started as ``python -m chainvigil.cli``, that interpreter with ``-m``.
    """
    argv0 = sys.argv[0] if argv0 is None else argv0
    started = Path(argv0)
    if started.suffix == ".py" or started.name in ("__main__.py", "cli.py", "-c", ""):
        return f"{shlex.quote(sys.executable)} -m chainvigil.cli"
    found = shutil.which("chainvigil")
    try:
        if found and os.path.samefile(found, started):
            return "chainvigil"
    except OSError:
        pass
    return shlex.quote(str(started.resolve()) if started.exists() else argv0)


def _final_lines(service: Service) -> list[str]:
    from chainvigil.verdict import describe

    lines = []
    for run in service.history.runs():
        snap = service.history.latest_snapshot(run["name"])
        if snap is None:
            lines.append(f"  {run['name']}: no snapshot yet")
            continue
        method = snap.get("loo_method")
        how = ("" if method in (None, "psis") and not snap.get("loo_pending") else
               f" [{method}: {snap.get('loo_exact') or 0} exact, {snap.get('loo_pending') or 0} pending]")
        se = f" ±{snap['loo_se']:.2f}" if snap.get("loo_se") is not None else ""
        elpd = f"{snap['loo_elpd']:9.2f}" if snap.get("loo_elpd") is not None else "        —"
        kmax = f"{snap['k_max']:.2f}" if snap.get("k_max") is not None else "—"
        lines.append(f"  {run['name']:<22} {snap['draws_per_chain']:>6,} draws/chain  "
                     f"elpd_loo {elpd}{se}{how}  k̂max {kmax}  → {describe(snap['verdict'])}")
    return lines


def closing_lines(root: Path, state_dir: Path, command: str) -> list[str]:
    """What the demo prints last: where the runs are, and commands to review them that work as printed."""
    state = shlex.quote(str(state_dir))
    return [f"the runs and their history stay in {root}; review them with:",
            f"  {command} view {state}",
            f"  {command} compare {state}",
            f"  {command} report {state} -o {shlex.quote(str(root / 'report.html'))}"]


def run_demo(*, headless: bool = False, seconds: float | None = None, root=None, pace=None) -> int:
    """Start the demo scenario's samplers in ROOT, watch them, and show the screen (or print lines).

    ``draws/chain`` in the printed lines is the shortest chain's draw count.
    """
    root = Path(root).resolve() if root else Path(tempfile.mkdtemp(prefix="chainvigil-demo-"))
    root.mkdir(parents=True, exist_ok=True)
    scenario = DEMO_SCENARIO
    print(f"chainvigil demo: scenario '{scenario}' writing into {root}", flush=True)
    # The samplers' closing lines would scribble over the screen; headless, they are useful output.
    procs = simulated_chains.launch(scenario, root, pace=pace, log=None if headless else subprocess.DEVNULL)
    holder = []
    report = line_printer(lambda: holder and holder[0].stop()) if headless else None
    from chainvigil.simulated_chains.refit import RefitLauncher

    # the service writes REFITS.json for the misfit model; real refit sampler processes start from it
    launcher = RefitLauncher(root, chains=DEMO_REFIT_CHAINS, pace=DEMO_REFIT_PACE if pace is None else pace,
                             log=None if headless else subprocess.DEVNULL)

    def start_refits(path, run, folder):
        started = launcher.poll()
        if headless:
            for where, problem in launcher.problems:
                print(f"refits not started for {where}: {problem}", flush=True)
            launcher.problems.clear()
            if started:
                print(f"started {len(started)} refit sampler process(es) for '{run}'", flush=True)

    service = Service(root, every=2.0, report=report, on_refits=start_refits)
    holder.append(service)
    try:
        if headless:
            def _stop(signum, frame):
                service.stop()
            signal.signal(signal.SIGINT, _stop)
            signal.signal(signal.SIGTERM, _stop)
            service.run(duration=seconds if seconds is not None else DEMO_SECONDS_HEADLESS)
            print("final verdicts:")
            for line in _final_lines(service):
                print(line)
            print("  (draws/chain: the draws of the shortest chain)")
            enough = sorted(p.parent.name for p in root.glob("*/ENOUGH.json"))
            print(f"runs with ENOUGH.json: {', '.join(enough) if enough else 'none yet'}")
        else:
            run_with_screen(service, seconds)
    finally:
        launcher.stop(grace=5.0)
        for proc in procs:
            if proc.poll() is None:
                proc.terminate()
        deadline = time.time() + 10
        for proc in procs:
            try:
                proc.wait(timeout=max(0.1, deadline - time.time()))
            except Exception:
                proc.kill()
        for line in closing_lines(root, service.state_dir, own_command()):
            print(line, flush=True)
    return 0
