"""A history written by the real service while real simulated samplers write their run folders.

Used by the viewer's tests: the same kind of file a user opens with ``chainvigil view``.
"""
from __future__ import annotations

import subprocess
import time
from pathlib import Path

import chainvigil.simulated_chains as simulated_chains
from chainvigil.service import HISTORY_FILE, Service


def build_service_history(folder: Path, *, draws: int = 400, pace: float = 50.0, seed: int = 5) -> Path:
    """Run the tarn-levels samplers (two chains per model) under the service; return the history path.

    The service takes a snapshot about every half second while the samplers write, so each run gets a
    trail of snapshots; the three models share one data set, so they are compared.
    """
    root = Path(folder) / "root"
    root.mkdir(parents=True)
    procs = simulated_chains.launch("tarn-levels", root, pace=pace, draws=draws, chains=2, seed=seed,
                                    log=subprocess.DEVNULL)
    service = Service(root, every=0.5, signal_enough=False)
    try:
        deadline = time.time() + 180
        while any(p.poll() is None for p in procs) and time.time() < deadline:
            service.cycle()
            time.sleep(0.2)
        service.cycle(force=True)
    finally:
        simulated_chains.stop(procs, grace=2)
        service.close()
    return service.state_dir / HISTORY_FILE
