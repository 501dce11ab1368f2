"""Benchmark: streaming r_eff (``StreamingRelativeEfficiency``) against the full FFT pass
(``relative_efficiency``), measured side by side in one run.

n = 10,000 observations, 4 chains x 1,500 draws arriving in blocks of 100 draws per chain.
A normal location model: y_i ~ N(mu, 1) with mu drawn by AR(1) chains (rho 0.8) around its
posterior, so each observation's likelihood is autocorrelated to a different degree.  Prints:
  * the full ``relative_efficiency`` pass over all 6,000 draws (the cost the service pays, plus the
    store reread, each time it refreshes r_eff);
  * the streaming ``update`` cost per block of 100 draws, amortised over all 60 blocks, and
    ``result()`` once;
  * a bare log-sum-exp (scipy.special.logsumexp) over the same (100, n) block, the floor any
    streaming estimate pays to look at the block;
  * the ratios, the state size, and the max / median relative difference of the two r_eff vectors.
Timings are noisy on a shared machine: each is the median of ``--repeat`` runs.

Run: .venv/bin/python bench/reff_stream.py [--n 10000] [--draws 1500] [--repeat 3]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.special import logsumexp

from chainvigil.estimators.mixing import relative_efficiency
from chainvigil.estimators.reff_stream import StreamingRelativeEfficiency

CHAINS, BLOCK = 4, 100


def simulate(n: int, draws: int, seed: int = 11) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y = rng.normal(0.0, 1.0, n)
    rho = 0.8
    z = rng.normal(size=(CHAINS, draws))
    mu = np.empty((CHAINS, draws))
    mu[:, 0] = z[:, 0]
    for t in range(1, draws):
        mu[:, t] = rho * mu[:, t - 1] + np.sqrt(1 - rho**2) * z[:, t]
    mu = y.mean() + mu / np.sqrt(n)
    return -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, None, :] - mu[:, :, None]) ** 2


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--draws", type=int, default=1500, help="draws per chain")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    loglik = simulate(args.n, args.draws)
    blocks = [(c, loglik[c, s:s + BLOCK]) for s in range(0, args.draws, BLOCK) for c in range(CHAINS)]

    full_t, upd_t, res_t, lse_t = [], [], [], []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        full = relative_efficiency(loglik)
        full_t.append(time.perf_counter() - t0)

        est = StreamingRelativeEfficiency(args.n)
        t0 = time.perf_counter()
        for c, block in blocks:
            est.update(c, block)
        upd_t.append((time.perf_counter() - t0) / len(blocks))
        t0 = time.perf_counter()
        r = est.result()
        res_t.append(time.perf_counter() - t0)

        t0 = time.perf_counter()
        for _, block in blocks:
            logsumexp(block, axis=0)
        lse_t.append((time.perf_counter() - t0) / len(blocks))

    full_s, upd_s, res_s, lse_s = (float(np.median(v)) for v in (full_t, upd_t, res_t, lse_t))
    rel = np.abs(r / full - 1)
    state_bytes = sum(a.nbytes for a in est.to_state().values())
    print(f"n = {args.n:,}, {CHAINS} chains x {args.draws:,} draws, blocks of {BLOCK} draws "
          f"({len(blocks)} blocks), median of {args.repeat} runs")
    print(f"  full relative_efficiency pass         {full_s * 1e3:9.1f} ms")
    print(f"  streaming update per block (amortised) {upd_s * 1e3:8.2f} ms")
    print(f"  streaming result()                     {res_s * 1e3:8.2f} ms")
    print(f"  bare logsumexp per block               {lse_s * 1e3:8.2f} ms")
    print(f"  update / logsumexp                     {upd_s / lse_s:8.2f}")
    print(f"  full pass / (update + result)          {full_s / (upd_s + res_s):8.1f}")
    print(f"  full pass / all {len(blocks)} updates            {full_s / (upd_s * len(blocks)):8.2f}")
    print(f"  streaming state                        {state_bytes / 1e6:8.1f} MB "
          f"({state_bytes / args.n / CHAINS:.0f} bytes per observation per chain)")
    print(f"  r_eff relative difference: max {rel.max():.3f}, median {np.median(rel):.3f}, "
          f"mean r_eff full {full.mean():.4f} streaming {r.mean():.4f}")


if __name__ == "__main__":
    main()
