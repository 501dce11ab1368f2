"""Ingest throughput of the zarr draw store, measured side by side in one run.

Compared, on the same blocks of draws (random sizes 100-400 draws, n = 10,000 observations):

* ``numpy.save``: every block dumped to its own .npy file (the floor: no layout, no chunking);
* ``DrawStore`` with each codec (none, Blosc-LZ4 with byte shuffle, Zstd level 1): chunk-aligned
  appends, one flush at the end; also the bytes on disk;
* ``DrawStore`` flushed after every block (what a service committing every block pays), and the
  same with ``durable=True`` (``--durable``: every flush also fsyncs the files and folders it wrote);
* ``DrawStore`` with one column chunk spanning all n (faster ingest, but every observation block
  read by a tail rebuild then decodes whole rows);
* misaligned appends: each block written straight into a zarr array at its offset (same chunks, no
  codec), so blocks start and end inside chunks and zarr reads, merges and rewrites them;
* the same with every written file fsynced (time until the bytes are on disk, not in page cache);
* the history's pointwise write for n = 20,000 observations (one snapshot);
* observation-blocked reads (every draw of ``--block`` observations at a time, all blocks: what a
  tail-buffer rebuild or an r_eff refresh reads) from the store with the default column chunks and
  with full-width chunks, against ``numpy.load`` of the .npy files (which must read whole rows).

Timings are noisy on a shared machine: each variant runs ``--repeat`` times, interleaved, and the
best time is kept.  Nothing here is asserted; the ratios are printed.

    .venv/bin/python bench/ingest_store.py [--draws 4096] [--n 10000] [--repeat 3]
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import zarr
from zarr.storage import LocalStore

from chainvigil.storage.draws import DrawStore
from chainvigil.storage.history import History


def make_blocks(total: int, n: int, seed: int = 0) -> list[np.ndarray]:
    """Pointwise log-likelihoods of a normal model, log N(y_i | mu_s, sigma_s), in blocks."""
    rng = np.random.default_rng(seed)
    y = rng.normal(size=n)
    blocks, done = [], 0
    while done < total:
        k = min(int(rng.integers(100, 401)), total - done)
        mu = rng.normal(0, 0.05, size=(k, 1))
        sigma = np.exp(rng.normal(0, 0.03, size=(k, 1)))
        blocks.append(-0.5 * np.log(2 * np.pi * sigma**2) - (y - mu) ** 2 / (2 * sigma**2))
        done += k
    return blocks


def du(path: Path) -> int:
    return sum(p.stat().st_size for p in Path(path).rglob("*") if p.is_file())


def fsync_tree(d: Path) -> None:
    """fsync every file under d (the time until the bytes are on the disk, not in the page cache)."""
    for p in sorted(Path(d).rglob("*")):
        if p.is_file():
            fd = os.open(p, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)


def durable(fn):
    def timed(d: Path) -> float:
        t = time.perf_counter()
        fn(d)
        fsync_tree(d)
        return time.perf_counter() - t
    return timed


def run_numpy(blocks, d: Path) -> float:
    d.mkdir()
    t = time.perf_counter()
    for i, b in enumerate(blocks):
        np.save(d / f"{i:06d}.npy", b)
    return time.perf_counter() - t


def run_store(blocks, d: Path, codec: str = "none", flush_each: bool = False,
              chunk_obs: int = 4096, durable: bool = False) -> float:
    t = time.perf_counter()
    store = DrawStore(d, codec=codec, chunk_obs=chunk_obs, durable=durable)
    for b in blocks:
        store.append("run", "chain", b)
        if flush_each:
            store.flush()
    store.close()
    return time.perf_counter() - t


def run_misaligned(blocks, d: Path) -> float:
    t = time.perf_counter()
    n = blocks[0].shape[1]
    root = zarr.open_group(store=LocalStore(str(d)), mode="a")
    width = -(-n // -(-n // 4096))  # the store's column chunk width (equal parts <= 4096)
    arr = root.create_array("loglik", shape=(0, n), chunks=(256, width), dtype="float64",
                            compressors=None, fill_value=np.nan)
    at = 0
    for b in blocks:
        arr.resize((at + b.shape[0], n))
        arr[at:at + b.shape[0]] = b
        at += b.shape[0]
    return time.perf_counter() - t


def bench_block_reads(blocks, scratch: Path, block: int, repeat: int) -> dict:
    """Seconds to read every draw of all observations in column blocks of ``block`` (best of repeat)."""
    n = blocks[0].shape[1]
    out = {}
    scratch.mkdir()
    run_numpy(blocks, scratch / "npy")
    for name, chunk_obs in (("store default chunks", 4096), ("store full-width chunks", 10**9)):
        s = DrawStore(scratch / name.replace(" ", "_"), chunk_obs=chunk_obs)
        for b in blocks:
            s.append("run", "chain", b)
        s.close()
    files = sorted((scratch / "npy").iterdir())
    best = {k: np.inf for k in ("numpy.load, whole rows", "store default chunks", "store full-width chunks")}
    for _ in range(repeat):
        t = time.perf_counter()
        for start in range(0, n, block):  # numpy has no column access: every block reads all rows
            np.concatenate([np.load(f, allow_pickle=False)[:, start:start + block] for f in files])
        best["numpy.load, whole rows"] = min(best["numpy.load, whole rows"], time.perf_counter() - t)
        t = time.perf_counter()
        np.concatenate([np.load(f, allow_pickle=False) for f in files])
        out["numpy.load once (all)"] = min(out.get("numpy.load once (all)", np.inf), time.perf_counter() - t)
        for name in ("store default chunks", "store full-width chunks"):
            s = DrawStore(scratch / name.replace(" ", "_"))
            t = time.perf_counter()
            for start in range(0, n, block):
                s.read_all_loglik("run", start, min(n, start + block))
            best[name] = min(best[name], time.perf_counter() - t)
    out.update(best)
    return out


def bench_pointwise(d: Path, n: int = 20_000, repeat: int = 5) -> float:
    h = History(d / "history.db")
    rng = np.random.default_rng(1)
    best = np.inf
    for i in range(repeat):
        pw = {"elpd_loo": rng.normal(size=n), "elpd_waic": rng.normal(size=n),
              "k_hat": rng.uniform(size=n)}
        t = time.perf_counter()
        h.add_snapshot("run", {"loo_elpd": -1.0}, pointwise=pw, keep_pointwise=True)
        best = min(best, time.perf_counter() - t)
    h.close()
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--draws", type=int, default=4096)
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--block", type=int, default=2048, help="observations per block in the read test")
    ap.add_argument("--dir", default=None, help="scratch folder (default: a temporary folder)")
    args = ap.parse_args()

    blocks = make_blocks(args.draws, args.n)
    raw = sum(b.nbytes for b in blocks)
    print(f"{len(blocks)} blocks of 100-400 draws, {args.draws} draws x n={args.n} "
          f"({raw / 2**20:.0f} MiB float64)")

    variants = {
        "numpy.save": lambda d: run_numpy(blocks, d),
        "store none": lambda d: run_store(blocks, d, "none"),
        "store lz4": lambda d: run_store(blocks, d, "lz4"),
        "store zstd": lambda d: run_store(blocks, d, "zstd"),
        "store none, full-width chunks": lambda d: run_store(blocks, d, "none", chunk_obs=10**9),
        "store none, flush every block": lambda d: run_store(blocks, d, "none", flush_each=True),
        "same, durable (--durable)": lambda d: run_store(blocks, d, "none", flush_each=True, durable=True),
        "misaligned zarr writes": lambda d: run_misaligned(blocks, d),
    }
    variants["numpy.save + fsync"] = durable(variants["numpy.save"])
    variants["store none + fsync"] = durable(variants["store none"])
    variants["store lz4 + fsync"] = durable(variants["store lz4"])
    best = {k: np.inf for k in variants}
    size = {}
    scratch = Path(tempfile.mkdtemp(prefix="ingest_bench_", dir=args.dir))
    try:
        for _ in range(args.repeat):
            for name, fn in variants.items():
                d = scratch / name.replace(" ", "_").replace(",", "").replace(".", "_")
                best[name] = min(best[name], fn(d))
                size[name] = du(d)
                shutil.rmtree(d)
        check = DrawStore(scratch / "check")
        for b in blocks:
            check.append("run", "chain", b)
        check.flush()
        assert np.array_equal(DrawStore(scratch / "check").read_loglik("run", "chain"),
                              np.concatenate(blocks)), "store does not read back what was written"
        pointwise = bench_pointwise(scratch)
        reads = bench_block_reads(blocks, scratch / "reads", args.block, args.repeat)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)

    print(f"\n{'variant':32s} {'seconds':>8s} {'MiB/s':>8s} {'disk/raw':>9s}")
    for name in variants:
        print(f"{name:32s} {best[name]:8.3f} {raw / 2**20 / best[name]:8.0f} "
              f"{size[name] / raw:9.3f}")
    print("\nratios (throughput relative to numpy.save; target for the store >= 0.5):")
    for name in variants:
        if not name.startswith("numpy.save"):
            synced = name.endswith("fsync") or "durable" in name
            base = best["numpy.save + fsync" if synced else "numpy.save"]
            print(f"  {name:32s} {base / best[name]:.2f}")
    print(f"misaligned / aligned time: {best['misaligned zarr writes'] / best['store none']:.2f}x")
    print(f"flush every block / one flush time: "
          f"{best['store none, flush every block'] / best['store none']:.2f}x")
    print(f"durable / not, flushing every block (one commit per block): "
          f"{best['same, durable (--durable)'] / best['store none, flush every block']:.2f}x the time")
    print(f"history pointwise write, n = 20,000 (latest + history rows): {pointwise * 1000:.0f} ms")
    print(f"\nreading every draw in blocks of {args.block} observations ({raw / 2**20:.0f} MiB returned):")
    for name, sec in reads.items():
        print(f"  {name:32s} {sec:8.3f} s {raw / 2**20 / sec:8.0f} MiB/s "
              f"(x{sec / reads['numpy.load once (all)']:.1f} of one numpy.load pass)")


if __name__ == "__main__":
    main()
