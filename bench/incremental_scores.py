"""Benchmark: cost per snapshot of a days-long run, incremental PSIS-LOO scoring against the full path.

A run of ``snapshots`` snapshots (default 20,000) at n = 2,000 observations; each snapshot adds one
block of 2 draws (chains take turns) and asks for the scores, as the service does on a live run.
Every snapshot uses ``StreamingScorer.scores`` (incremental: only the observations whose PSIS tail
changed are refitted, see chainvigil.estimators.tail_buffer). Printed, side by side in the same run:

  * at S = 200, 2,000, 20,000, 40,000 draws: the mean incremental scores() over the 50 snapshots
    up to that S and the full path (``scores(incremental=False)``, every tail refitted: the code path
    of main before this change) on the same state, median of 3 calls; their ratio; the rows
    refitted per snapshot;
  * add() + scores() per snapshot over the first and the last tenth of the run, and the ratio
    last / first  [target <= 1.2];
  * the largest relative difference of elpd_loo between the two paths (they must agree to 1e-9).

``--reff stream`` uses the streaming r_eff of ``chainvigil.longrun.RunScorer`` at every snapshot
(what the service passes) instead of a fixed r_eff per observation.

Run: nice -n 10 .venv/bin/python bench/incremental_scores.py [--n 2000] [--snapshots 20000] [--reff fixed|stream]

Dirty rows come in bursts (a new extreme draw of the parameter falls below the cutoff of many
observations at once), so the 50-snapshot windows are noisy; the tenth averages are the robust figure.

Measured 2026-12-03, 2 cores shared with other jobs (load ~8), ``nice -n 10``, defaults
(n = 2,000, 20,000 snapshots of 2 draws, fixed r_eff ~ U(0.5, 1) per observation, K = 1,202):

      S  full scores() ms  incremental ms   ratio  rows refitted
    200              20.2           18.16   0.900         1290.0
   2000             235.6           28.93   0.123          275.8
  20000             468.8           27.15   0.058          173.4
  40000             414.6            8.26   0.020           42.8
  add + scores per snapshot: first tenth 40.02 ms, last tenth 23.72 ms, ratio last/first 0.59
  largest relative difference of elpd_loo, incremental vs full: 0.0e+00

(an earlier run, windows after each mark: first tenth 48.56 ms, last tenth 26.08 ms, ratio 0.54;
full path 19.7 / 204 / 616 / 690 ms at the four marks).  With the full path every snapshot would
cost the full column: 20 ms at S = 200 growing to 400-700 ms at S = 40,000.

``--n 500 --reff stream`` (RunScorer's streaming r_eff at every snapshot; r_eff moves a little each
time, so some M_i step back and forth: about 3.8 % of the rows change M per snapshot at S = 39,000
against ~2 % from the growth of S alone): full 5.7 / 47.1 / 62.7 / 136.5 ms, incremental 5.64 /
18.87 / 9.84 / 4.39 ms at the four marks; first tenth 12.20 ms, last tenth 7.74 ms, ratio 0.63.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from chainvigil.estimators import StreamingScorer
from chainvigil.longrun import RunScorer


class Draws:
    """Log-likelihood of a normal location model y_i ~ N(mu, 1): mu from AR(1) chains around a
    posterior made wider than the exact one (visible tails), 0.5 % outliers (heavy-tailed ratios)."""

    def __init__(self, n: int, chains: int, seed: int = 11):
        self.rng = np.random.default_rng(seed)
        self.y = self.rng.normal(0.0, 1.0, n)
        self.y[self.rng.choice(n, max(1, n // 200), replace=False)] += 6.0
        self.scale = 30.0 / np.sqrt(n)
        self.state = self.rng.normal(size=chains)
        self.rho = 0.5

    def block(self, chain: int, size: int) -> np.ndarray:
        mus = np.empty(size)
        for t in range(size):
            self.state[chain] = self.rho * self.state[chain] + np.sqrt(1 - self.rho**2) * self.rng.normal()
            mus[t] = self.y.mean() + self.scale * self.state[chain]
        return -0.5 * np.log(2 * np.pi) - 0.5 * (self.y[None, :] - mus[:, None]) ** 2


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--snapshots", type=int, default=20_000)
    ap.add_argument("--per", type=int, default=2, help="draws per snapshot")
    ap.add_argument("--reff", choices=("fixed", "stream"), default="fixed")
    ap.add_argument("--window", type=int, default=50)
    args = ap.parse_args()
    n, snaps, per, chains = args.n, args.snapshots, args.per, 4
    total = snaps * per
    draws = Draws(n, chains)
    r_fixed = np.random.default_rng(3).uniform(0.5, 1.0, n)
    cls = RunScorer if args.reff == "stream" else StreamingScorer
    sc = cls(n, n_params=1, expected_draws=total)
    marks = [s for s in (200, 2000, 20_000, 40_000) if s <= total]
    print(f"n={n} snapshots={snaps} draws/snapshot={per} S_end={total} r_eff={args.reff} K={sc.k}")
    per_snap = np.zeros(snaps)
    window: dict[int, list] = {}
    full_at: dict[int, float] = {}
    worst = 0.0
    for i in range(snaps):
        blk = draws.block(i % chains, per)
        t0 = time.perf_counter()
        sc.add(i % chains, blk)
        if sc.draws < 2:
            per_snap[i] = time.perf_counter() - t0
            continue
        r = sc.r_eff() if args.reff == "stream" else r_fixed
        t1 = time.perf_counter()
        s = sc.scores(r)
        t2 = time.perf_counter()
        per_snap[i] = t2 - t0
        for m in marks:
            if m - per * args.window < sc.draws <= m:  # the window of snapshots up to the mark
                window.setdefault(m, []).append((t2 - t1, sc.refits))
            if sc.draws == m:  # the full path on the same state (it leaves the state untouched)
                times = []
                for _ in range(3):
                    t3 = time.perf_counter()
                    f = sc.scores(r, incremental=False)
                    times.append(time.perf_counter() - t3)
                full_at[m] = float(np.median(times))
                worst = max(worst, abs(f.loo["elpd"] - s.loo["elpd"]) / abs(f.loo["elpd"]))
    print(f"{'S':>7} {'full scores() ms':>17} {'incremental ms':>15} {'ratio':>7} {'rows refitted':>14}")
    for m in marks:
        inc = np.array([t for t, _ in window.get(m, [])])
        rows = np.array([k for _, k in window.get(m, [])])
        if inc.size and m in full_at:
            print(f"{m:>7} {full_at[m] * 1e3:>17.1f} {inc.mean() * 1e3:>15.2f} {inc.mean() / full_at[m]:>7.3f} "
                  f"{rows.mean():>14.1f}")
    tenth = max(1, snaps // 10)
    first, last = per_snap[1:tenth].mean(), per_snap[-tenth:].mean()
    print(f"add + scores per snapshot: first tenth {first * 1e3:.2f} ms, last tenth {last * 1e3:.2f} ms, "
          f"ratio last/first {last / first:.2f}  [target <= 1.2]")
    print(f"largest relative difference of elpd_loo, incremental vs full: {worst:.1e}  [<= 1e-9]; "
          f"rebuilds {sc.rebuilds}, K = {sc.k}")


if __name__ == "__main__":
    main()
