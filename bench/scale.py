"""Benchmark: how scoring grows with the number of observations n (10^4, 10^5, 10^6).

For each n and each way of scoring, one child process feeds 4 chains x DRAWS draws (blocks of
BLOCK draws per chain, generated on the fly, never all held at once) and takes one snapshot
(``scores(r_eff)`` with an r_eff per observation). Printed per row: the seconds spent in ``add``
(all blocks), the snapshot seconds, the peak resident memory of the process (ru_maxrss) and, on a
cluster, the largest peak of its worker processes. Ways of scoring:

  streaming   StreamingScorer, one thread (the embedded default of the service)
  local       ShardedScorer on a LocalPool of 2 threads, 4 shards
  dask        ShardedScorer on a distributed.LocalCluster(n_workers=2, threads_per_worker=1,
              processes=True), 4 shards; add() returns once the blocks are scattered, so the add
              seconds run until every shard's last update is done; the snapshot starts after that
  subsampled  SubsampledScorer, m = 2,000 observations with exact PSIS (WAIC approximation for all n)

By default the full-state ways run at 10^4 and 10^5 and only ``subsampled`` at 10^6 (the full PSIS
state at 10^6 and 800 draws is n x 2K doubles, about 2.8 GB, before copies). ``--full-large``
also runs ``dask`` at 10^6. Targets: n = 10^6 with a snapshot under 60 s and under 4 GB resident.
Growth with n is printed as the ratio of each figure to the one at the previous n (10x more
observations). The machine is shared: run it once, and read the figures as one measurement.

Run: .venv/bin/python bench/scale.py [--draws 200] [--full-large]
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
        t0 = time.perf_counter()
        svc._passes.wait(600)
        out["pass1_s"] = time.perf_counter() - t0
        _write_in_child(root, n, draws, first, draws)
        t0 = time.perf_counter()
        svc.cycle()
        out["snapshot_s"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        svc._passes.wait(600)
        out["pass_s"] = time.perf_counter() - t0
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
