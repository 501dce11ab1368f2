"""Benchmark: streaming predictive scores against the batch path, measured side by side in one run.

n = 20,000 observations, 4 chains, blocks of 100 draws per chain up to 1,000 draws per chain.
Prints ratios (targets in brackets):
  * StreamingScorer.scores at the end / batch_scores on the same draws, same r_eff   [<= 0.5]
  * StreamingScorer.add per block / a bare numpy log-sum-exp pass over the block     [<= 5]
  * psis_loo / waic on the same draws                                                [<= 3]
  * streaming state bytes (and tracemalloc peak of add + scores) / (3 n K 8)         [<= 1]
  * the same peak for a scorer sized for S/4 draws, whose scores() rebuilds the buffer from a reader
Timings are noisy on a shared machine: the add figure is the median of the per-block ratios (and,
for the amortised cost including the compaction blocks, the ratio of the totals); run it a few
times and report the range.

``--before REF`` (e.g. ``--before main``) first runs the scorer of git revision REF
(``monitor/estimators/streaming.py`` at REF, loaded next to the current package) and the current one
side by side on the same blocks, alternating block by block, and prints after / before for add()
(median per block, first half and second half: a scores() call in the middle warms the tail cache
of the current scorer, whose add() then keeps it up to date) and for scores() at the end (both
evaluate every tail: the first call after many blocks; and the current scorer's
``scores(incremental=False)``).

Run: .venv/bin/python bench/streaming_scores.py [n] [draws_per_chain] [--before main]

Measured 2026-12-03 (2 shared cores, load ~8, ``nice -n 10``; n = 20,000, S = 4,000), before = main
(one fused class), after = the scorer composed of RunningLogSumExp / RunningMoments / TailBuffer
with the incremental tail cache:
  add per block, first half: before 25.6 ms, after 23.0 ms (0.90); second half with a warm
  cache: 20.0 / 19.0 ms (0.95); scores at the end, every tail refitted: before 1.09 s, after
  1.12 s (1.03; incremental=False 1.14 s, 1.05); elpd identical (rel diff 0). At n = 5,000:
  add 0.87 / 0.83, scores 0.84.
"""

from __future__ import annotations

import importlib.util
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

from chainvigil.estimators import StreamingScorer, batch_scores, psis_loo, waic


def simulate(n: int, chains: int, draws: int, seed: int = 7) -> np.ndarray:
    """Log-likelihood of a normal location model y_i ~ N(mu, 1), mu drawn by AR(1) chains around
    its posterior; 0.5 % of observations are outliers (heavier tails in their log ratios)."""
    rng = np.random.default_rng(seed)
    y = rng.normal(0.0, 1.0, n)
    y[rng.choice(n, n // 200, replace=False)] += 6.0
    post_sd = 1.0 / np.sqrt(n)
    rho = 0.5
    mu = np.empty((chains, draws))
    z = rng.normal(size=(chains, draws))
    mu[:, 0] = z[:, 0]
    for t in range(1, draws):
        mu[:, t] = rho * mu[:, t - 1] + np.sqrt(1 - rho**2) * z[:, t]
    mu = y.mean() + post_sd * mu * 30.0  # wider posterior than exact: more visible tails
    ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, None, :] - mu[:, :, None]) ** 2
    return ll


def bare_lse(block: np.ndarray) -> np.ndarray:
    m = block.max(axis=0)
    return np.log(np.exp(block - m).sum(axis=0)) + m


def baseline_scorer(ref: str):
    """``StreamingScorer`` of git revision ``ref``: its streaming.py is loaded as a sibling module
    of the current package (its relative imports resolve to the current modules)."""
    root = Path(__file__).resolve().parent.parent
    source = subprocess.run(["git", "-C", str(root), "show", f"{ref}:monitor/estimators/streaming.py"],
                            check=True, capture_output=True, text=True).stdout
    name = "chainvigil.estimators._streaming_before"
    spec = importlib.util.spec_from_loader(name, loader=None)
    module = importlib.util.module_from_spec(spec)
    module.__package__ = "chainvigil.estimators"
    sys.modules[name] = module
    exec(compile(source, f"{ref}:streaming.py", "exec"), module.__dict__)
    return module.StreamingScorer


def before_after(ref: str, ll: np.ndarray, r_eff: np.ndarray, bsize: int) -> None:
    chains, per_chain, n = ll.shape
    S = chains * per_chain
    Before = baseline_scorer(ref)
    old, new = Before(n, n_params=1, expected_draws=S), StreamingScorer(n, n_params=1, expected_draws=S)
    t_old, t_new, half = [], [], None
    for start in range(0, per_chain, bsize):
        if half is None and start >= per_chain // 2:
            half = len(t_old)
            old.scores(r_eff)
            new.scores(r_eff)  # warms the tail cache: add() keeps it from here on
        for c in range(chains):
            blk = np.ascontiguousarray(ll[c, start:start + bsize])
            pair = [(old, t_old), (new, t_new)]
            if c % 2:
                pair.reverse()  # alternate the order: neither side always runs first
            for sc, times in pair:
                t0 = time.perf_counter()
                sc.add(c, blk)
                times.append(time.perf_counter() - t0)
    t_old, t_new = np.array(t_old), np.array(t_new)
    for label, sl in (("first half", slice(0, half)), ("second half, warm cache", slice(half, None))):
        a, b = np.median(t_old[sl]), np.median(t_new[sl])
        print(f"  add per block ({label}): before {a * 1e3:.1f} ms, after {b * 1e3:.1f} ms, "
              f"after/before {b / a:.2f}  [target <= 1.1]")
    rows = []
    for _ in range(3):  # interleaved repeats, each on a fresh copy of the end state
        o, m = Before.from_state(old.to_state()), StreamingScorer.from_state(new.to_state())
        t0 = time.perf_counter()
        so = o.scores(r_eff)
        t1 = time.perf_counter()
        sn = m.scores(r_eff)  # S doubled since the cache was filled: M_i changed, every row refits
        t2 = time.perf_counter()
        new.scores(r_eff, incremental=False)
        t3 = time.perf_counter()
        rows.append((t1 - t0, t2 - t1, t3 - t2))
    a, b, c = np.median(np.array(rows), axis=0)
    print(f"  scores at the end: before {a:.2f} s, after (every tail refitted) {b:.2f} s "
          f"[after/before {b / a:.2f}, target <= 1.1], after incremental=False {c:.2f} s "
          f"[{c / a:.2f}]; rows refitted {m.refits} of {n}; elpd rel diff {abs(sn.loo['elpd'] - so.loo['elpd']) / abs(so.loo['elpd']):.1e}")


def main() -> None:
    args = [a for a in sys.argv[1:] if not a.startswith("--")]
    before = sys.argv[sys.argv.index("--before") + 1] if "--before" in sys.argv else None
    if before is not None:
        args.remove(before)
    n = int(args[0]) if len(args) > 0 else 20_000
    per_chain = int(args[1]) if len(args) > 1 else 1_000
    chains, bsize = 4, 100
    ll = simulate(n, chains, per_chain)
    S = chains * per_chain
    r_eff = np.full(n, 0.6)
    print(f"n={n} chains={chains} draws/chain={per_chain} block={bsize} S={S}")
    if before is not None:
        print(f"before = {before}, after = this worktree (same run, same blocks):")
        before_after(before, ll, r_eff, bsize)

    sc = StreamingScorer(n, n_params=1, expected_draws=S)
    add_t, lse_t = [], []
    for start in range(0, per_chain, bsize):
        for c in range(chains):
            blk = np.ascontiguousarray(ll[c, start:start + bsize])
            t0 = time.perf_counter()
            bare_lse(blk)
            t1 = time.perf_counter()
            sc.add(c, blk)
            t2 = time.perf_counter()
            lse_t.append(t1 - t0)
            add_t.append(t2 - t1)
    add_t, lse_t = np.array(add_t), np.array(lse_t)
    late = slice(len(add_t) // 2, None)  # steady state (S >> K)
    print(f"add per block: median {np.median(add_t) * 1e3:.1f} ms, bare lse {np.median(lse_t) * 1e3:.1f} ms, "
          f"ratio {np.median(add_t) / np.median(lse_t):.2f} (second half: "
          f"{np.median(add_t[late]) / np.median(lse_t[late]):.2f}; totals: {add_t.sum() / lse_t.sum():.2f})  [target <= 5]")

    t0 = time.perf_counter()
    s_stream = sc.scores(r_eff)
    t_stream = time.perf_counter() - t0
    t0 = time.perf_counter()
    s_batch = batch_scores(ll, r_eff, n_params=1)
    t_batch = time.perf_counter() - t0
    print(f"scores at end: streaming {t_stream:.2f} s, batch {t_batch:.2f} s, ratio {t_stream / t_batch:.2f}  "
          f"[target <= 0.5]  (rebuilds: {sc.rebuilds}, K = {sc.k})")
    rel = abs(s_stream.loo["elpd"] - s_batch.loo["elpd"]) / abs(s_batch.loo["elpd"])
    print(f"  elpd_loo streaming {s_stream.loo['elpd']:.6f} batch {s_batch.loo['elpd']:.6f} (rel diff {rel:.1e}); "
          f"max k-hat {s_batch.k_max:.3f}")

    t0 = time.perf_counter()
    psis_loo(ll, r_eff)
    t_loo = time.perf_counter() - t0
    t0 = time.perf_counter()
    waic(ll)
    t_waic = time.perf_counter() - t0
    print(f"psis_loo {t_loo:.2f} s, waic {t_waic:.2f} s, ratio {t_loo / t_waic:.2f}  [target <= 3]")

    ref = 3 * n * sc.k * 8
    print(f"streaming state {sc.state_nbytes() / 2**20:.1f} MiB vs 3 n K 8 = {ref / 2**20:.1f} MiB, "
          f"ratio {sc.state_nbytes() / ref:.2f}  [target <= 1]")
    # peak of the state plus temporaries while adding blocks and scoring (tracemalloc sees numpy)
    tracemalloc.start()
    sc2 = StreamingScorer(n, n_params=1, expected_draws=S)
    for start in range(0, per_chain, bsize):
        for c in range(chains):
            sc2.add(c, ll[c, start:start + bsize])
    _, peak_add = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    sc2.scores(r_eff)
    _, peak_scores = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"peak traced memory: during add {peak_add / 2**20:.1f} MiB (ratio {peak_add / ref:.2f}), "
          f"during scores {peak_scores / 2**20:.1f} MiB (ratio {peak_scores / ref:.2f}) vs 3 n K 8")
    del sc2

    # a buffer sized for S/4 draws: the final scores() rebuilds it from the reader (the reader's
    # blocks are fresh arrays, as a store read would be; they count in the peak)
    flat = ll.reshape(-1, n)
    tracemalloc.start()
    sc3 = StreamingScorer(n, n_params=1, expected_draws=S // 4, reader=lambda a, b: flat[:, a:b].copy())
    for start in range(0, per_chain, bsize):
        for c in range(chains):
            sc3.add(c, ll[c, start:start + bsize])
    _, peak_add3 = tracemalloc.get_traced_memory()
    k_before = sc3.k
    tracemalloc.reset_peak()
    t0 = time.perf_counter()
    s3 = sc3.scores(r_eff)
    t_rebuild = time.perf_counter() - t0
    _, peak_scores3 = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    ref3 = 3 * n * sc3.k * 8
    rel3 = abs(s3.loo["elpd"] - s_batch.loo["elpd"]) / abs(s_batch.loo["elpd"])
    print(f"with a rebuild (K {k_before} -> {sc3.k}, rebuilds {sc3.rebuilds}): scores {t_rebuild:.2f} s "
          f"(traced, ratio to batch {t_rebuild / t_batch:.2f}), rel diff {rel3:.1e}; peak during add "
          f"{peak_add3 / (3 * n * k_before * 8):.2f} of 3 n K_old 8, during scores {peak_scores3 / ref3:.2f} "
          f"of 3 n K_new 8")


if __name__ == "__main__":
    main()
