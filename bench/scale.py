"""Benchmark: how the service and its scorers grow with the number of observations n (10^4, 10^5, 10^6).

Through the service (default).  Per scenario one child process: a writer child writes run 'big' (4
chains, NPZ chunks of BLOCK draws, the real ``ChainWriter``; y_i ~ N(mu, 1) at AR(1) draws of mu with
the posterior's spread) into a fresh root, all draws but the last chunk of each chain; a real
``Service`` (zarr store, SQLite history, checkpoints, the joint-MCSE pass thread) catches up in one
``cycle()``; then one more chunk per chain is written and one ``cycle()`` takes it: that is the
steady "snapshot" (read the new chunks, store, score, verdict, history rows, commit).  Then a clean
stop (``finish()``: final joint pass and checkpoint).  Printed per row: seconds to write the root,
catch-up, snapshot, the joint-MCSE pass the first snapshot started (its own run time, off the loop),
stop; the process's peak resident memory (ru_maxrss) and, on a cluster, the largest worker's; the
draw store's size; elpd, its MCSE (the draws' Monte Carlo error; for a subsampled run from the
per-draw influence of the difference estimator) and the subsampling SE.  Ways:

  service     the default service: RunScorer (streaming state of every observation) in-process
  dask        the same on a distributed.LocalCluster(n_workers=2, threads_per_worker=1,
              processes=True) through ``ClusterScoring`` (``watch --cluster``), 4 shards per run
  subsampled  ``Service(subsample=2000)`` (``watch --subsample 2000``): exact PSIS on 2,000 sampled
              observations, O(n) running moments for all; the store keeps the 2,000 sampled columns

10^4 and 10^5 run every way (200 draws per chain); 10^6 runs ``subsampled`` only (100 draws per
chain, 3.2 GB of input, written and removed by the scenario).  ``--scorer-only`` runs the scorers
alone instead (fed from memory, no files, store or history; the rows below the service figures).
Targets: n = 10^6 watched with a snapshot under 60 s and under 4 GB resident.

Measured 2026-12-03 (2 cores shared with four other sessions, load average 10-12, so times are
pessimistic and vary by 2x between runs; the second of two runs, the first in brackets where
it differs much; "pass s" is the joint-MCSE pass the first snapshot started, off the loop):

  way               n  write s  catch-up s  snapshot s  pass s  stop s  peak MB  worker MB  store MB
  service       10000      3.5        5.52        1.27    5.43    3.42      575          -      78.2
  dask          10000     21.1        9.88  2.58 (8.13)   3.52    0.00      433        222      78.2
  subsampled    10000      2.1  1.31 (9.05)        0.19    0.92    0.33      259          -      15.6
  service      100000      5.7 28.19 (60.0) 7.88 (11.9)  13.68   20.15     3965          -     781.3
  dask         100000      6.0       89.86 23.77 (35.1)  32.73    0.01     1741       1347     781.3
  subsampled   100000      4.8        1.78        0.93    0.34    0.84      318          -      15.6
  subsampled  1000000     23.9 11.59 (8.5)  6.55 (5.16)   0.09    2.89      515          -      15.6

  growth for 10x more observations (second run): service 10^5: snapshot x6.2, peak x6.9, store x10;
  dask 10^5: snapshot x9.2, peak x4.0 (workers x6); subsampled 10^5: snapshot x5.0, peak x1.2,
  store x1.0; subsampled 10^6: snapshot x7.0, peak x1.6, store x1.0, pass x0.3.

So n = 10^6 is watched in 5-7 s per snapshot and 0.52 GB resident (targets 60 s, 4 GB), and the
store no longer grows with n.  What still grows linearly with n in a subsampled snapshot (a
profile of the 10^6 snapshot, 6.1 s under load): the per-observation Python lists of the snapshot
(``Scores.to_dict`` 1.7 s, the verdict's k-hat check over n values 1.5 s, the refit headline's
lists 0.5 s), reading the new NPZ chunks (1.0 s: 200 MB each, inherent), and the running moments of
all n (0.8 s); PSIS itself is on the 2,000 sampled observations.  The full service at 10^5 is
already at 4 GB (the PSIS tail state of every observation, its checkpoint copy and its lists).
Subsampled MCSE was larger than the full one (0.27 vs 0.07 at 10^5) while it was the sampled
terms' quadrature scaled by n/m; it is now the draws' Monte Carlo error of the whole difference
estimator (chainvigil.estimators.subsample; checked against replicated draws in
tests/test_subsample.py), near the full estimate's. The subsampling SE itself is tiny here (5e-4:
WAIC and PSIS-LOO agree closely for this model).  Measured after that change (2026-12-03, one
``--service-one`` each, 2 shared cores): n = 10^5, 800 draws: subsampled MCSE 0.067 against the
full run's joint MCSE 0.069 (same data; elpd equal within the subsampling SE 5e-4);
n = 10^6 subsampled (400 draws): catch-up 4.0 s, snapshot 2.2 s, peak 522 MB, MCSE 0.090.  The
per-draw influence costs the scorer's ``add`` about 1.3-1.4x (n = 10^6, m = 2,000, blocks of 50:
4.5-7 ms against 3.4-5 ms per draw, in-process, before and after side by side).

Again on main at 1c0fd40 (2026-12-03, fourth session, a quiet machine; live snapshots with the
tail lag, docs/numerics.md):

  way               n  write s  catch-up s  snapshot s  pass s  stop s  peak MB  worker MB  store MB
  service       10000      1.4        4.03        0.44    1.79    2.20      554          -      78.2
  dask          10000      1.4        2.52        1.33    1.76    0.01      385        174      78.2
  subsampled    10000      1.6        1.46        0.30    0.00    0.07      198          -      15.6
  service      100000      6.3       27.29        4.05    9.28   13.94     3921          -     781.3
  dask         100000      2.6       18.98       10.31   11.89    0.01     1713        779     781.3
  subsampled   100000      2.3        1.86        0.70    0.00    0.18      231          -      15.6
  subsampled  1000000     24.2        4.60        2.16    0.00    0.21      520          -      15.6

  growth for 10x more observations: service snapshot x9.1, peak x7.1; dask snapshot x7.7, peak
  x4.4; subsampled 10^5 snapshot x2.3, peak x1.2; subsampled 10^6 snapshot x3.1, peak x2.2, store
  x1.0.  n = 10^6: a 2.2 s snapshot in 0.52 GB (targets 60 s, 4 GB).

Scorer only (``--scorer-only``): the scorers fed from memory, one snapshot each (ways streaming,
local (ShardedScorer on a 2-thread LocalPool), dask (ShardedScorer on the LocalCluster),
subsampled); the full-state ways at 10^4 and 10^5, ``subsampled`` at 10^6; ``--full-large`` also
runs ``dask`` at 10^6.  Earlier measured: 10^6 subsampled 0.28 s per snapshot, 0.54 GB.

Run: .venv/bin/python bench/scale.py [--draws 200] [--draws-large 100] [--no-dask] [--scorer-only]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np

CHAINS = 4
BLOCK = 25
SUBSAMPLE_M = 2_000


def loglik_blocks(n: int, draws: int, seed: int = 7, start: int = 0, stop: int | None = None,
                  spread: float = 30.0):
    """Yield (chain, block (<= BLOCK, n), mu (<= BLOCK,)) for the draws start..stop of every chain:
    a normal location model y_i ~ N(mu, 1) at AR(1) draws of mu around its posterior mean with sd
    spread / sqrt(n) (spread 1: the posterior itself; the scorer-only rows use 30, a much wider
    spread that stresses the PSIS tails) (0.5 % of the observations are outliers).  The same seed
    gives the same draws whatever the range."""
    stop = draws if stop is None else stop
    rng = np.random.default_rng(seed)
    y = rng.normal(0.0, 1.0, n)
    y[rng.choice(n, max(1, n // 200), replace=False)] += 6.0
    z = rng.normal(size=(CHAINS, draws))
    mu = np.empty((CHAINS, draws))
    mu[:, 0] = z[:, 0]
    for t in range(1, draws):
        mu[:, t] = 0.5 * mu[:, t - 1] + np.sqrt(0.75) * z[:, t]
    mu = y.mean() + spread / np.sqrt(n) * mu
    const = -0.5 * np.log(2 * np.pi)
    for a in range(start, stop, BLOCK):
        b = min(stop, a + BLOCK)
        for c in range(CHAINS):
            block = y[None, :] - mu[c, a:b, None]
            np.square(block, out=block)
            block *= -0.5
            block += const
            yield c, block, mu[c, a:b]


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux


def _worker_peak_mb():
    import resource as r

    return r.getrusage(r.RUSAGE_SELF).ru_maxrss / 1024.0


def _warm_up():
    import chainvigil.estimators.sharded  # noqa: F401


def one(way: str, n: int, draws: int) -> dict:
    """Feed and score once in this process; return the figures."""
    from chainvigil.estimators import ShardedScorer, StreamingScorer, SubsampledScorer
    from chainvigil.estimators.sharded import DaskPool, LocalPool

    S = CHAINS * draws
    cluster = client = None
    if way == "streaming":
        sc = StreamingScorer(n, expected_draws=S)
    elif way == "local":
        sc = ShardedScorer(n, shards=4, pool=LocalPool(2), expected_draws=S)
    elif way == "dask":
        import distributed

        cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                           dashboard_address=None, silence_logs=40)
        client = distributed.Client(cluster)
        client.run(_warm_up)  # long-lived workers have the package imported already
        sc = ShardedScorer(n, shards=4, pool=DaskPool(client), expected_draws=S)
    elif way == "subsampled":
        sc = SubsampledScorer(n, min(SUBSAMPLE_M, n), seed=1, expected_draws=S)
    else:
        raise SystemExit(f"unknown way {way}")
    r_eff = np.full(n, 0.6)
    t_add = 0.0
    for chain, block, _ in loglik_blocks(n, draws):
        t0 = time.perf_counter()
        sc.add(chain, block)
        t_add += time.perf_counter() - t0
    if client is not None:  # the adds run asynchronously: count them until the last one is done
        import distributed

        t0 = time.perf_counter()
        sc._send()  # blocks held back for batching
        distributed.wait(sc._states)
        t_add += time.perf_counter() - t0
    t0 = time.perf_counter()
    s = sc.scores(r_eff)
    t_snap = time.perf_counter() - t0
    out = {"way": way, "n": n, "draws": S, "add_s": t_add, "snapshot_s": t_snap, "peak_mb": peak_mb(),
           "elpd": s.loo["elpd"], "se": s.loo["se"], "k_max": s.k_max,
           "se_subsample": (s.subsampled or {}).get("se_subsample")}
    if client is not None:
        out["worker_peak_mb"] = max(client.run(_worker_peak_mb).values())
        client.close()
        cluster.close()
    return out


# ------------------------------------------------------------------------------------------------
# Through the real service: a root written by ChainWriter, Service.cycle(), the zarr store, the history
# ------------------------------------------------------------------------------------------------

def write_draws(root: str, n: int, draws: int, start: int, stop: int) -> None:
    """Write draws start..stop of every chain of run 'big' under root as NPZ chunks (ChainWriter)."""
    from pathlib import Path

    from chainvigil.writer import ChainWriter

    run = Path(root) / "big"
    writers = {c: ChainWriter(run, f"c{c}", param_names=("mu",)) for c in range(CHAINS)}
    try:
        for chain, block, mu in loglik_blocks(n, draws, start=start, stop=stop, spread=1.0):
            writers[chain].append(block, mu[:, None])
    finally:
        for w in writers.values():
            w.close()


def _write_in_child(root: str, n: int, draws: int, start: int, stop: int) -> float:
    """Write in a child process (its memory is not the service's); returns the seconds it took."""
    t0 = time.perf_counter()
    subprocess.run([sys.executable, __file__, "--write", root, str(n), str(draws), str(start), str(stop)],
                   check=True)
    return time.perf_counter() - t0


def _folder_mb(path) -> float:
    from pathlib import Path

    return sum(p.stat().st_size for p in Path(path).rglob("*") if p.is_file()) / 2 ** 20


def service_one(way: str, n: int, draws: int, workdir: str) -> dict:
    """One scenario in this process: the root gets all draws but the last block of each chain; the
    service catches up (first cycle), then one more block per chain arrives and one cycle takes it
    (the steady snapshot); then a clean stop.  Returns the figures."""
    import shutil
    import tempfile

    from chainvigil.service import Service

    root = tempfile.mkdtemp(prefix=f"scale-{way}-{n}-", dir=workdir)
    cluster = client = scoring = None
    try:
        first = draws - BLOCK
        out = {"way": way, "n": n, "draws": CHAINS * draws}
        out["write_s"] = _write_in_child(root, n, draws, 0, first)
        kwargs = {"every": 0.0}
        if way == "subsampled":
            kwargs["subsample"] = SUBSAMPLE_M
        elif way in ("service", "dask"):
            kwargs["subsample_above"] = 0  # never: the full state
        if way == "dask":
            import distributed

            from chainvigil.cluster import ClusterScoring

            cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                               dashboard_address=None, silence_logs=40)
            client = distributed.Client(cluster)
            client.run(_warm_up)
            scoring = ClusterScoring(client, shards=4)
            kwargs["scorer_factory"] = scoring.scorer_factory
        svc = Service(root, **kwargs)
        t0 = time.perf_counter()
        svc.cycle()
        out["catch_up_s"] = time.perf_counter() - t0
        svc.passes.worker.wait(600)
        # the joint-MCSE pass the first snapshot started (off the loop): its own seconds
        out["pass_s"] = sum(r.seconds for r in svc.passes.worker._done)
        _write_in_child(root, n, draws, first, draws)
        t0 = time.perf_counter()
        svc.cycle()
        out["snapshot_s"] = time.perf_counter() - t0
        svc.passes.worker.wait(600)
        t0 = time.perf_counter()
        svc.finish()
        out["stop_s"] = time.perf_counter() - t0
        out["peak_mb"] = peak_mb()
        from chainvigil.storage.history import HistoryReader

        reader = HistoryReader(svc.state_dir / "history.sqlite")
        snap = reader.latest_snapshot("big")
        reader.close()
        out.update(elpd=snap["loo_elpd"], se=snap["loo_se"], mcse=snap["loo_mcse"],
                   se_subsample=snap["loo_se_subsample"], snap_draws=snap["draws"])
        out["store_mb"] = _folder_mb(svc.state_dir / "draws.zarr")
        out["history_mb"] = _folder_mb(svc.state_dir) - out["store_mb"]
        out["input_mb"] = _folder_mb(root) - _folder_mb(svc.state_dir)
        if client is not None:
            out["worker_peak_mb"] = max(client.run(_worker_peak_mb).values())
        return out
    finally:
        if scoring is not None:
            scoring.close()
        if client is not None:
            client.close()
            cluster.close()
        shutil.rmtree(root, ignore_errors=True)


def service_main(args) -> None:
    plan = [(way, n) for n in (10_000, 100_000) for way in ("service", "dask", "subsampled")]
    plan.append(("subsampled", 1_000_000))
    if args.no_dask:
        plan = [p for p in plan if p[0] != "dask"]
    print(f"through the service: {CHAINS} chains, chunks of {BLOCK} draws; {args.draws} draws per chain at "
          f"n <= 10^5, {args.draws_large} at 10^6; subsample m = {SUBSAMPLE_M}")
    print(f"{'way':<11} {'n':>9} {'write s':>8} {'catch-up s':>10} {'snapshot s':>10} {'pass s':>7} "
          f"{'stop s':>7} {'peak MB':>8} {'worker MB':>9} {'store MB':>9} {'elpd':>13} {'mcse':>7} {'se_sub':>7}")
    rows = {}
    for way, n in plan:
        draws = args.draws if n < 1_000_000 else args.draws_large
        proc = subprocess.run([sys.executable, __file__, "--draws", str(draws), "--workdir", args.workdir,
                               "--service-one", way, str(n)], capture_output=True, text=True)
        if proc.returncode != 0:
            print(f"{way:<11} {n:>9} failed: {proc.stderr.strip().splitlines()[-3:]}")
            continue
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        rows[(way, n)] = r
        worker = f"{r['worker_peak_mb']:.0f}" if "worker_peak_mb" in r else "-"
        se_sub = f"{r['se_subsample']:.3g}" if r["se_subsample"] is not None else "-"
        print(f"{way:<11} {n:>9} {r['write_s']:>8.1f} {r['catch_up_s']:>10.2f} {r['snapshot_s']:>10.2f} "
              f"{r['pass_s']:>7.2f} {r['stop_s']:>7.2f} {r['peak_mb']:>8.0f} {worker:>9} {r['store_mb']:>9.1f} "
              f"{r['elpd']:>13.2f} {r['mcse']:>7.3g} {se_sub:>7}", flush=True)
    print("\ngrowth for 10x more observations (figure at n / figure at n/10):")
    for (way, n), r in rows.items():
        prev = rows.get((way, n // 10))
        if prev:
            print(f"  {way:<11} {n:>9}: catch-up x{r['catch_up_s'] / prev['catch_up_s']:.1f}, "
                  f"snapshot x{r['snapshot_s'] / prev['snapshot_s']:.1f}, peak x{r['peak_mb'] / prev['peak_mb']:.1f}, "
                  f"store x{r['store_mb'] / prev['store_mb']:.1f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--draws", type=int, default=200, help="draws per chain (default 200)")
    parser.add_argument("--draws-large", type=int, default=100,
                        help="through the service: draws per chain at n = 10^6 (default 100)")
    parser.add_argument("--scorer-only", action="store_true",
                        help="the scorers alone, fed from memory (no files, store or history)")
    parser.add_argument("--no-dask", action="store_true", help="through the service: leave out the LocalCluster")
    parser.add_argument("--workdir", default="/tmp", help="where the service scenarios write their roots")
    parser.add_argument("--full-large", action="store_true", help="scorer only: also the dask way at n = 10^6")
    parser.add_argument("--one", nargs=2, metavar=("WAY", "N"), help=argparse.SUPPRESS)
    parser.add_argument("--service-one", nargs=2, metavar=("WAY", "N"), help=argparse.SUPPRESS)
    parser.add_argument("--write", nargs=5, metavar=("ROOT", "N", "DRAWS", "START", "STOP"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.write:
        root, n, draws, start, stop = args.write
        write_draws(root, int(n), int(draws), int(start), int(stop))
        return
    if args.service_one:
        print(json.dumps(service_one(args.service_one[0], int(args.service_one[1]), args.draws, args.workdir)))
        return
    if args.one:
        print(json.dumps(one(args.one[0], int(args.one[1]), args.draws)))
        return
    if not args.scorer_only:
        service_main(args)
        return
    plan = [(way, n) for n in (10_000, 100_000) for way in ("streaming", "local", "dask", "subsampled")]
    plan.append(("subsampled", 1_000_000))
    if args.full_large:
        plan.append(("dask", 1_000_000))
    print(f"{CHAINS} chains x {args.draws} draws, blocks of {BLOCK}; subsample m = {SUBSAMPLE_M}")
    print(f"{'way':<11} {'n':>9} {'add s':>8} {'snapshot s':>11} {'peak MB':>9} {'worker MB':>10} "
          f"{'elpd':>14} {'se_sub':>8}")
    rows = {}
    for way, n in plan:
        proc = subprocess.run([sys.executable, __file__, "--draws", str(args.draws), "--one", way, str(n)],
                              capture_output=True, text=True)
        if proc.returncode != 0:
            print(f"{way:<11} {n:>9} failed: {proc.stderr.strip().splitlines()[-1:]}")
            continue
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        rows[(way, n)] = r
        worker = f"{r['worker_peak_mb']:.0f}" if "worker_peak_mb" in r else "-"
        se_sub = f"{r['se_subsample']:.2f}" if r["se_subsample"] is not None else "-"
        print(f"{way:<11} {n:>9} {r['add_s']:>8.2f} {r['snapshot_s']:>11.2f} {r['peak_mb']:>9.0f} {worker:>10} "
              f"{r['elpd']:>14.2f} {se_sub:>8}", flush=True)
    print("\ngrowth for 10x more observations (figure at n / figure at n/10):")
    for (way, n), r in rows.items():
        prev = rows.get((way, n // 10))
        if prev:
            print(f"  {way:<11} {n:>9}: add x{r['add_s'] / prev['add_s']:.1f}, "
                  f"snapshot x{r['snapshot_s'] / prev['snapshot_s']:.1f}, peak x{r['peak_mb'] / prev['peak_mb']:.1f}")


if __name__ == "__main__":
    main()
