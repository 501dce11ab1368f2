"""Soak: SIGKILL the service 50 times (or --kills N) at random moments while real samplers write,
then check that every written draw is in the store exactly once and that the final snapshot equals
``chainvigil score --json``. Run with ``make soak`` (minutes; not part of ``make test``)."""
from __future__ import annotations

import argparse
import random
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import chainvigil.simulated_chains as simulated_chains  # noqa: E402
from tests.test_service_process import (assert_final_snapshot_equals_score,  # noqa: E402
                                        assert_store_matches_files, launch_samplers, start_service)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--kills", type=int, default=50)
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args(argv)
    rng = random.Random(args.seed)
    with tempfile.TemporaryDirectory(prefix="chainvigil-soak-") as tmp:
        root = Path(tmp) / "root"
        root.mkdir()
        # enough draws that the samplers outlast the kills (about 1.5 s per kill)
        samplers = launch_samplers(root, draws=int(args.kills * 1.6 * 25) + 200, pace=25)
        try:
            for kill in range(1, args.kills + 1):
                service = start_service(root)
                time.sleep(rng.uniform(0.6, 2.2))
                service.send_signal(signal.SIGKILL)
                service.wait(timeout=30)
                print(f"kill {kill}/{args.kills}", flush=True)
            simulated_chains.stop(samplers, grace=5)
        finally:
            simulated_chains.stop(samplers, grace=2)
        final = start_service(root, "--seconds", "8")
        out, _ = final.communicate(timeout=300)
        if final.returncode != 0:
            print(out)
            return 1
        assert_store_matches_files(root)
        assert_final_snapshot_equals_score(root)
        print(f"{args.kills} kills: every draw stored once and in order; final snapshot equals score --json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
