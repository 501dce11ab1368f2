"""``chainvigil demo``: simulated samplers, the service and the screen, in one go."""
from __future__ import annotations

import signal
import subprocess
import tempfile
import time
from pathlib import Path

import chainvigil.simulated_chains as simulated_chains
from chainvigil.service import Service

DEMO_SECONDS_HEADLESS = 180.0
DEMO_SCENARIO = "tarn-levels"


def _final_lines(service: Service) -> list[str]:
    from chainvigil.verdict import describe

    lines = []
    for run in service.history.runs():
        snap = service.history.latest_snapshot(run["name"])
        if snap is None:
            lines.append(f"  {run['name']}: no snapshot yet")
            continue
        lines.append(f"  {run['name']:<22} {snap['draws_per_chain']:>6,} draws/chain  "
                     f"elpd_loo {snap['loo_elpd']:9.2f} ±{snap['loo_se']:.2f}  "
                     f"k̂max {snap['k_max']:.2f}  → {describe(snap['verdict'])}")
    return lines


def run_demo(*, headless: bool = False, seconds: float | None = None, root=None, pace=None) -> int:
    """Start the demo scenario's samplers in ROOT, watch them, and show the screen (or print lines)."""
    root = Path(root) if root else Path(tempfile.mkdtemp(prefix="chainvigil-demo-"))
    root.mkdir(parents=True, exist_ok=True)
    scenario = DEMO_SCENARIO
    print(f"chainvigil demo: scenario '{scenario}' writing into {root}", flush=True)
    # The samplers' closing lines would scribble over the screen; headless, they are useful output.
    procs = simulated_chains.launch(scenario, root, pace=pace, log=None if headless else subprocess.DEVNULL)
    report = (lambda line: print(line, flush=True)) if headless else None
    service = Service(root, every=2.0, report=report)
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
            enough = sorted(p.parent.name for p in root.glob("*/ENOUGH.json"))
            print(f"runs with ENOUGH.json: {', '.join(enough) if enough else 'none yet'}")
        else:
            from chainvigil.cli import run_with_screen

            run_with_screen(service, seconds)
    finally:
        for proc in procs:
            if proc.poll() is None:
                proc.terminate()
        deadline = time.time() + 10
        for proc in procs:
            try:
                proc.wait(timeout=max(0.1, deadline - time.time()))
            except Exception:
                proc.kill()
        print(f"the runs and their history stay in {root} (review them: chainvigil view {service.state_dir})")
    return 0
