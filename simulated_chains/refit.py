"""``python -m chainvigil.simulated_chains.refit [REQUEST]``: start the refits a REFITS.json asks for.

REQUEST is the run folder or its REFITS.json; without it the path is taken from the environment
variable ``CHAINVIGIL_REFITS`` (set by the service for its ``--on-refits`` command), so
``chainvigil watch ROOT --on-refits "python -m chainvigil.simulated_chains.refit"`` refits the
simulated runs as soon as they are flagged. Refit folders that already exist are left alone.
"""

from __future__ import annotations

import argparse
import os
import sys

from . import launch_refits, stop, wait

ENV_REQUEST = "CHAINVIGIL_REFITS"


def main(argv=None, prog: str = "python -m chainvigil.simulated_chains.refit") -> int:
    ap = argparse.ArgumentParser(prog=prog, description="Start simulated refit samplers for the refits a "
                                 "REFITS.json asks for (one process per chain per refit folder).")
    ap.add_argument("request", nargs="?", default=None,
                    help=f"run folder or REFITS.json (default: ${ENV_REQUEST})")
    ap.add_argument("--model", default=None, help="model to refit (default: the run's name)")
    ap.add_argument("--pace", type=float, default=None, help="draws per second per chain (0 = unpaced)")
    ap.add_argument("--draws", type=int, default=None, help="draws per chain after warm-up")
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--format", dest="fmt", choices=("npz", "csv"), default="npz")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--warmup", type=int, default=None)
    ap.add_argument("--wait", action="store_true", help="stay until every refit sampler has finished")
    a = ap.parse_args(argv)
    request = a.request or os.environ.get(ENV_REQUEST)
    if not request:
        ap.error(f"give the run folder or REFITS.json, or set {ENV_REQUEST}")
    try:
        procs = launch_refits(request, model=a.model, pace=a.pace, draws=a.draws, chains=a.chains,
                              fmt=a.fmt, seed=a.seed, warmup=a.warmup)
    except ValueError as exc:
        print(f"{prog}: {exc}", file=sys.stderr)
        return 2
    folders = sorted({p.run_dir for p in procs})
    print(f"started {len(procs)} refit sampler process(es) in {len(folders)} folder(s)"
          + "".join(f"\n  {f}" for f in folders))
    if not a.wait:
        return 0
    try:
        codes = wait(procs)
    except KeyboardInterrupt:
        stop(procs)
        return 130
    return 1 if any(codes) else 0


if __name__ == "__main__":
    sys.exit(main())
