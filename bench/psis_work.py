"""How PSIS-LOO's own work per snapshot grows over a long run (the part of the long-run cost that
bench/long_run.py cannot make flat).

The scenario of bench/long_run.py (n = 2,000 observations, 4 AR(1) chains with rho = 0.8, one block
of 2 draws per snapshot, the streaming r_eff of ``RunScorer`` at every snapshot), driven through the
scorer alone.  Printed for windows of ``--window`` snapshots, at the start of the run and after
growing the chains to about ``--marks`` draws in all: per snapshot, the observations whose tail was
refitted (``StreamingScorer.refits``), the tail fits' work (``StreamingScorer.refit_work``: the sum
over them of M_i (30 + floor(sqrt M_i)), the values a Zhang-Stephens fit evaluates), the CPU of
``scores()`` (all threads of this process), the mean tail length M and the mean r_eff.

What to expect (docs/numerics.md, chainvigil.estimators.tail_buffer): a snapshot of B draws refits
about n B (M + 1) / S rows (a new draw entered their tail) plus about n B 1.5 / sqrt(S r_eff) rows
(their M_i stepped), each fit costing M (30 + sqrt M): about n B (9 / r_eff)(30 + sqrt M) per
snapshot once M = 3 sqrt(S / r_eff) (S > 225 / r_eff), more while M = S / 5 grows with every draw.

    nice -n 10 .venv/bin/python bench/psis_work.py [--n 2000] [--window 2000] [--marks 18000 36000]
                                                   [--tail-lag 0 0.05]

Measured 2026-12-03 (``--marks 36000``, ``nice -n 19`` beside a CI run on the 2 cores, so the CPU
column is inflated alike in both rows; the work column does not depend on the load):

         draws in all  rows refitted     fit work  scores() CPU  mean M  r_eff
           8-4,008              1043      17.14 M       73.3 ms     348  0.134
      36,008-40,008              330      52.17 M      178.7 ms    2051  0.087   (work x3.04, CPU x2.44)

With the tail lag (2026-12-03, fourth session: ``--window 1000``, both lags over the same draws in
one run, a test suite sharing the 2 cores):

         draws in all  rows refitted     fit work  scores() CPU  mean M  r_eff
    lag 0     8-2,008           1138      10.04 M       64.8 ms     199  0.159
       18,008-20,008             413      33.98 M      126.9 ms    1265  0.108   (work x3.38, CPU x1.96)
       36,008-38,008             308      46.21 M      145.0 ms    2004  0.085   (work x4.60, CPU x2.24)
    lag 0.05  8-2,008            194       0.79 M        4.7 ms     199  0.159
       18,008-20,008               4       0.35 M        1.8 ms    1265  0.108   (work x0.45, CPU x0.37)
       36,008-38,008               3       0.49 M        2.1 ms    2004  0.085   (work x0.61, CPU x0.45)

So with the service's lag a snapshot's PSIS work falls as the run grows instead of rising x4.6.

The first window is bench/long_run.py's first tenth, the second its last tenth: a third of the rows
are refitted at the end, but each fit is six times the work (M grew sixfold, its grid by 60 %), and
the streaming r_eff settled lower.  This is exact PSIS-LOO's own cost; the service around it is
measured by bench/long_run.py.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from long_run import CHAINS, Sampler  # noqa: E402  (the same simulated run)

from chainvigil.estimators.psis import tail_length  # noqa: E402
from chainvigil.longrun import TAIL_LAG, RunScorer  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--window", type=int, default=2000, help="snapshots per window")
    ap.add_argument("--marks", type=int, nargs="*", default=[18_000, 36_000],
                    help="draws in all at which later windows start")
    ap.add_argument("--tail-lag", type=float, nargs="*", default=[0.0, TAIL_LAG],
                    help="tail lags to run the same draws with, one after the other (default: 0, exact, "
                         f"and the service's {TAIL_LAG:g})")
    args = ap.parse_args(argv)
    for lag in args.tail_lag:
        run(args, lag)


def run(args, lag: float):
    n = args.n
    sampler = Sampler(n)
    kept = {c: [] for c in CHAINS}

    def reader(a, b):  # every draw so far of observations a:b (the buffer's rebuilds)
        return np.concatenate([np.concatenate(kept[c])[:, a:b] for c in CHAINS if kept[c]])

    scorer = RunScorer(n, n_params=2, reader=reader)
    scorer.tail_lag = lag

    def add(chain, k):
        ll, _ = sampler.block(chain, k)
        kept[chain].append(ll)
        scorer.add(chain, ll)

    def window():
        rows, work, cpu, m, r = [], [], [], [], []
        for i in range(args.window):
            add(CHAINS[i % len(CHAINS)], 2)
            r_eff = scorer.r_eff()
            t0 = time.process_time()
            scorer.scores(r_eff)
            cpu.append(time.process_time() - t0)
            rows.append(scorer.refits)
            work.append(scorer.refit_work)
            m.append(float(np.mean(tail_length(scorer.draws, r_eff))))
            r.append(float(np.mean(r_eff)))
        return [float(np.mean(x)) for x in (rows, work, cpu, m, r)]

    for c in CHAINS:
        add(c, 2)
    print(f"n = {n:,}, {args.window:,} snapshots of 2 draws per window, tail lag {lag:g}")
    print(f"{'draws in all':>17} {'rows refitted':>14} {'fit work':>12} {'scores() CPU':>13} {'mean M':>7} {'r_eff':>6}")
    first = None
    for mark in [None, *args.marks]:
        if mark is not None:
            while scorer.draws < mark:
                for c in CHAINS:
                    add(c, 500)
            scorer.scores(scorer.r_eff())
        start = scorer.draws
        rows, work, cpu, m, r = window()
        first = first or (work, cpu)
        print(f"{start:>8,}-{scorer.draws:<8,} {rows:14.0f} {work / 1e6:10.2f} M {cpu * 1e3:10.1f} ms "
              f"{m:7.0f} {r:6.3f}   (work x{work / first[0]:.2f}, CPU x{cpu / first[1]:.2f})", flush=True)


if __name__ == "__main__":
    main()
