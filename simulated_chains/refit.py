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
from pathlib import Path

from . import launch_refits, stop, wait

ENV_REQUEST = "CHAINVIGIL_REFITS"


class RefitLauncher:
    """Starts the refits of every ``REFITS.json`` under a root of simulated runs, each folder once.

    For a long-running host (the demo): call :meth:`poll` now and then; it looks at
    ``root/*/REFITS.json`` and starts, through :func:`chainvigil.simulated_chains.launch_refits`, the
    refit folders that do not exist yet. A request that cannot be used (invalid, or for a run that is
    not a simulated model) is recorded in ``problems`` as ``(path, message)`` once per version of the
    file and skipped; nothing is raised. :meth:`stop` ends every process it started.
    """

    def __init__(self, root, *, pace=None, draws=None, chains=4, fmt="npz", seed=0, warmup=None, log=None):
        self.root = Path(os.fspath(root))
        self.settings = dict(pace=pace, draws=draws, chains=chains, fmt=fmt, seed=seed, warmup=warmup, log=log)
        self.procs: list = []
        self.problems: list[tuple[str, str]] = []
        self._failed: dict[str, float] = {}

    def poll(self) -> list:
        """Start what the requests ask for and is not started yet; returns the new processes."""
        started = []
        for path in sorted(self.root.glob("*/REFITS.json")):
            key = str(path)
            try:
                mtime = path.stat().st_mtime
            except OSError:
                continue
            if self._failed.get(key) == mtime:
                continue
            try:
                new = launch_refits(path, **self.settings)
            except ValueError as exc:
                self._failed[key] = mtime
                self.problems.append((key, str(exc)))
                continue
            started += new
        self.procs += started
        return started

    def stop(self, grace: float = 5.0) -> list[int]:
        """Stop every refit process started (SIGTERM, then SIGKILL after ``grace`` seconds)."""
        return stop(self.procs, grace=grace)


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
