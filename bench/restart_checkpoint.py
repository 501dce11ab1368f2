"""Restart cost with and without a checkpoint, at large n and many draws, without a huge store.

A restart without a checkpoint re-streams every stored draw through the run's scorer (plus reading
it from the draw store); with a checkpoint it loads ``checkpoints/<run>.npz`` and streams only the
draws committed since.  Either way the first snapshot then scores the run (PSIS-LOO over the tail,
whose length grows like sqrt(S / r_eff)).  This bench times the three parts on the real
``RunScorer`` and the real checkpoint file, for n observations and S draws in all (4 chains):

* re-stream: ``RunScorer.add`` of every draw, in the service's rebuild blocks (store reads excluded:
  at 8 bytes per draw per observation they add their own disk time on top);
* checkpoint: ``save_checkpoint`` size and ``load_checkpoint`` time;
* first snapshot: ``scores(r_eff)`` once.

    .venv/bin/python bench/restart_checkpoint.py [--n 10000] [--draws 20000]
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from chainvigil.ingest import REBUILD_BLOCK
from chainvigil.longrun import RunScorer, load_checkpoint, save_checkpoint

CHAINS = ("c1", "c2", "c3", "c4")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--draws", type=int, default=20_000, help="draws in all (over 4 chains)")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(3)
    n, per_chain = args.n, args.draws // len(CHAINS)
    y = rng.normal(size=n)
    # no store here to rebuild from: size the tail buffer for r_eff down to 0.1 up front
    scorer = RunScorer(n, reader=None, initial_k=2 * (int(np.ceil(3 * np.sqrt(args.draws / 0.1))) + 1))
    t_add = 0.0
    for c in CHAINS:
        mu = 0.0
        for start in range(0, per_chain, REBUILD_BLOCK):
            k = min(REBUILD_BLOCK, per_chain - start)
            mus = np.empty(k)
            for t in range(k):  # AR(1) draws of the mean (rho 0.8)
                mu = 0.8 * mu + 0.6 * rng.normal(0, 1 / np.sqrt(n))
                mus[t] = mu
            ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - mus[:, None]) ** 2
            t0 = time.process_time()
            scorer.add(c, ll)
            t_add += time.process_time() - t0
    committed = scorer.chain_draws()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "run.npz"
        t0 = time.perf_counter()
        size = save_checkpoint(path, scorer, committed)
        t_save = time.perf_counter() - t0
        t0 = time.perf_counter()
        loaded, _ = load_checkpoint(path, n=n, committed=committed)
        t_load = time.perf_counter() - t0
    t0 = time.process_time()
    loaded.scores(loaded.r_eff())
    t_score = time.process_time() - t0
    print(f"n = {n:,}, {args.draws:,} draws in all ({per_chain:,} per chain), tail buffer K = {loaded.k}")
    print(f"  re-stream every draw through the scorer  {t_add:8.1f} s CPU "
          f"({t_add / args.draws * 1e3:.2f} ms per draw; store reads not included)")
    print(f"  checkpoint: write {t_save:6.2f} s, load {t_load:6.2f} s, {size / 1e6:,.0f} MB")
    print(f"  first snapshot's scores()                {t_score:8.1f} s CPU")
    print(f"  first snapshot after start: without checkpoint >= {t_add + t_score:.1f} s, "
          f"with checkpoint {t_load + t_score:.1f} s")


if __name__ == "__main__":
    main()
