"""Disk and memory of a run under ``chainvigil watch --keep-draws all|tail|none``, side by side.

One simulated run (4 chains, n observations, two parameters) grows in blocks of ``--block`` draws per
chain through the real ``ChainWriter``; three real ``Service`` objects (one state folder per mode, the
same root) ingest it through ``cycle()``, with a checkpoint after every commit (``checkpoint_every=0``,
so what a checkpoint covers is dropped at once; the service's default is one per minute, which adds
the draws of that minute to the tail/none figures).  Printed at each of ``--checkpoints`` lengths:

* the draw store on disk (every file of ``draws.zarr/<run>``: log-likelihood chunks, parameter
  draws, draw numbers, metadata) in MB and in bytes per draw per observation (draws after warm-up, all
  chains);
* the log-likelihood chunks alone;
* the checkpoint file and the scorer's memory (``state_nbytes``).

    .venv/bin/python bench/retention.py [--n 2000] [--draws 4096] [--block 256]

Measured 2026-12-03 (branch ``retention``; n = 2,000, 4 chains, 4,096 draws per chain in blocks of
256, run.json draws_expected = 16,384; 2 cores shared with other jobs, sizes do not depend on load):

  draws/chain  mode  store MB  bytes/draw/obs  loglik MB  checkpoint MB  scorer MB
         1024  all       65.6            8.01       65.5           16.7       16.5
         1024  tail      32.9            4.01       32.8           39.5       39.1
         1024  none       0.1            0.01        0.0           39.5       39.1
         4096  all      262.5            8.01      262.1           17.0       16.5
         4096  tail      33.2            1.01       32.8           24.4       39.1
         4096  none       0.4            0.01        0.0           24.4       39.1

So: ``all`` stores 8.01 bytes per draw per observation, growing with the run; ``tail`` stores a flat
32.8 MB of log-likelihoods here (4 chains x (512-draw window + the chunk rounding) x n x 8 bytes),
whatever the run's length; ``none`` stores only the parameter draws and draw numbers (24 bytes per
draw for two parameters: 0.4 MB at 4 x 4,096 draws) plus, in a real run, the draws not yet
checkpointed and the partial last chunk.  The price of tail and none is memory: the scorer's PSIS
tail buffer is sized for draws_expected at r_eff >= 0.1 from the start (K = 1,216 values per
observation here, 2K held: 39 MB) instead of 512 grown by rebuilds from the store (16.5 MB).  (An
earlier version of the tail pass read every kept draw, so a pass that ran back to back held back
every drop: 246 MB at 4,096 draws; the pass now reads the last 512 draws only.)
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path

import numpy as np

from chainvigil.longrun import checkpoint_path
from chainvigil.service import Service
from chainvigil.writer import ChainWriter

CHAINS = ("a", "b", "c", "d")


def folder_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file()) if path.exists() else 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--draws", type=int, default=4096, help="draws per chain at the end")
    ap.add_argument("--block", type=int, default=256)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(2026)
    y = rng.normal(size=args.n)
    with tempfile.TemporaryDirectory(prefix="cv-retention-") as tmp:
        root = Path(tmp) / "root"
        run = root / "r"
        run.mkdir(parents=True)
        (run / "run.json").write_text(json.dumps({"draws_expected": len(CHAINS) * args.draws}))
        services = {m: Service(root, Path(tmp) / f"state-{m}", every=0.0, checkpoint_every=0, keep_draws=m,
                               stretch=False) for m in ("all", "tail", "none")}
        report_at = {args.draws // 4, args.draws}
        print(f"n = {args.n}, {len(CHAINS)} chains, blocks of {args.block} draws per chain")
        print(f"{'draws/chain':>11}  {'mode':4}  {'store MB':>8}  {'bytes/draw/obs':>14}  {'loglik MB':>9}  "
              f"{'checkpoint MB':>13}  {'scorer MB':>9}")
        done = 0
        try:
            while done < args.draws:
                for c in CHAINS:
                    mu = rng.normal(0.0, 0.1, size=(args.block, 1))
                    sigma = np.exp(rng.normal(0.0, 0.05, size=(args.block, 1)))
                    ll = -0.5 * np.log(2 * np.pi) - np.log(sigma) - 0.5 * ((y[None, :] - mu) / sigma) ** 2
                    with ChainWriter(run, c, param_names=("mu", "sigma")) as w:
                        w.append(ll, np.hstack([mu, sigma]))
                done += args.block
                for svc in services.values():
                    svc.cycle(force=True)
                if done in report_at:
                    for mode, svc in services.items():
                        store = folder_bytes(svc.state_dir / "draws.zarr" / "r")
                        loglik = sum(folder_bytes(svc.state_dir / "draws.zarr" / "r" / c / "loglik")
                                     for c in CHAINS)
                        ckpt = checkpoint_path(svc.state_dir, "r")
                        per = store / (len(CHAINS) * done * args.n)
                        print(f"{done:>11}  {mode:4}  {store / 1e6:8.1f}  {per:14.2f}  {loglik / 1e6:9.1f}  "
                              f"{(ckpt.stat().st_size if ckpt.exists() else 0) / 1e6:13.1f}  "
                              f"{svc.runs['r'].scorer.state_nbytes() / 1e6:9.1f}", flush=True)
        finally:
            for svc in services.values():
                svc.finish()
    return 0


if __name__ == "__main__":
    sys.exit(main())
