"""Speed of the service itself, measured side by side in one run (issue 3, "Speed").

Everything runs through the real ``chainvigil.service.Service`` on a temporary root, fed by the real
``chainvigil.writer.ChainWriter`` (NPZ chunks, atomic renames), with the real zarr store and SQLite
history.  The bench only wraps a few methods with timers (the wrapped methods still do their work) to
break the time down and to count every read of log-likelihoods from the draw store.

1. Arrival to snapshot row, n = 10,000, 400 new draws (4 chains x 100) on top of a history of
   4 x 1,000 draws [target: under 1 s]:
   * synchronous: ``Service(every=0).cycle()`` called right after the chunks land;
   * watched: ``Service.run()`` in a thread with the watchdog observer; the time from the last
     atomic rename until a read-only ``History`` sees the snapshot row with the new draw count.
   Each round is broken down into: read (NPZ load), store append, store flush + manifest commit,
   scorer add, scores, store read (log-likelihoods read back, e.g. for r_eff), r_eff refresh (its
   computation when due, reads excluded), mixing, verdict, history write, compare, other.
2. One snapshot at n = 20,000 and 4,000 draws (4 x 1,000) against rereading the whole store
   (``DrawStore.read_run``) and ``batch_scores`` with the same r_eff: the ratio, the agreement of
   the two elpd values, and the count of log-likelihood reads from the store per purpose (the
   streaming path may read only to rebuild a tail buffer or to refresh r_eff).

Timings are noisy on a shared machine: each figure is given as a range over the rounds (and over
``--repeat`` runs of the whole scenario for part 2).  Nothing is asserted except correctness checks.

    .venv/bin/python bench/service_speed.py [--rounds 5] [--repeat 2] [--skip-watch] [--skip-big]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import threading
import time
from collections import defaultdict
from contextlib import contextmanager
from pathlib import Path

import numpy as np

import chainvigil.ingest as ingest_mod
import chainvigil.joint_passes as passes_mod
import chainvigil.service as service_mod
from chainvigil.estimators import StreamingScorer, batch_scores
from chainvigil.service import Service
from chainvigil.writer import ChainWriter
from chainvigil.storage.history import History

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _sampler  # noqa: E402
from _sampler import CHAINS, PARAMS  # noqa: E402



def Sampler(n: int, seed: int = 3):
    """The shared simulated sampler (bench/_sampler.py) with this benchmark's chains: AR(1) with
    rho = 0.5, spread ten times the posterior scale."""
    return _sampler.Sampler(n, seed, rho=0.5, spread=10.0)


# ---------------------------------------------------------------------------- instrumentation
class Probe:
    """Timers around a service's steps and a ledger of log-likelihood reads from its store."""

    def __init__(self):
        self.times = defaultdict(float)
        self.reads = defaultdict(lambda: [0, 0])  # purpose -> [calls, bytes]
        self.stack: list[str] = []
        self.lock = threading.RLock()

    @contextmanager
    def phase(self, name):
        self.stack.append(name)
        t = time.perf_counter()
        try:
            yield
        finally:
            self.times[name] += time.perf_counter() - t
            self.stack.pop()
            if self.stack:  # report time only once: the enclosing phase excludes it
                self.times[self.stack[-1]] -= time.perf_counter() - t

    def wrap(self, obj, attr, name):
        fn = getattr(obj, attr)

        def timed(*a, **k):
            with self.phase(name):
                return fn(*a, **k)
        setattr(obj, attr, timed)

    def take(self):
        out = dict(self.times)
        self.times.clear()
        return out

    def install(self, svc: Service):
        """Wrap the service's steps (instance attributes shadow the methods; the real ones run)."""
        store, hist = svc.store, svc.history
        self.wrap(store, "append", "store append")
        self.wrap(store, "flush", "store flush")
        self.wrap(hist, "commit_ingest", "manifest commit")
        self.wrap(hist, "add_snapshot", "history write")
        self.wrap(svc.passes, "start", "joint pass start")
        self.wrap(svc.mixing, "figures", "mixing")
        self.wrap(svc, "compare", "compare")
        read_loglik = store.read_loglik

        def counted(run, chain=None, obs=slice(None), draws=slice(None)):
            if chain is None:
                return read_loglik(run, chain, obs, draws)
            purpose_now = next((p for p in reversed(self.stack) if p in PURPOSES), "other")
            with self.phase("store read"):
                out = read_loglik(run, chain, obs, draws)
            if chain is not None:  # count per chain read (chain=None recurses into this)
                purpose = purpose_now
                with self.lock:
                    self.reads[purpose][0] += 1
                    self.reads[purpose][1] += out.nbytes
            return out
        store.read_loglik = counted
        for attr, name in (("read_all_loglik", "scorer rebuild"), ("read_run", "read_run")):
            self.wrap(store, attr, name)


PURPOSES = ("scorer rebuild", "joint pass start", "read_run", "recovery")

_ORIG = {}


def patch_module(probe: Probe):
    """Time the NPZ reader, scorer steps and the verdict (module-level names the service uses)."""
    if not _ORIG:
        _ORIG["load"] = ingest_mod.load_npz_chunk
        _ORIG["add"] = StreamingScorer.add
        _ORIG["scores"] = StreamingScorer.scores
        _ORIG["evaluate"] = service_mod.verdicts.evaluate

    def load(*a, **k):
        with probe.phase("read npz"):
            return _ORIG["load"](*a, **k)

    def add(self, *a, **k):
        with probe.phase("scorer add"):
            return _ORIG["add"](self, *a, **k)

    def scores(self, *a, **k):
        with probe.phase("scores"):
            return _ORIG["scores"](self, *a, **k)

    def evaluate(*a, **k):
        with probe.phase("verdict"):
            return _ORIG["evaluate"](*a, **k)
    ingest_mod.load_npz_chunk = load
    StreamingScorer.add = add
    StreamingScorer.scores = scores
    service_mod.verdicts.evaluate = evaluate


def unpatch_module():
    if _ORIG:
        ingest_mod.load_npz_chunk = _ORIG["load"]
        StreamingScorer.add = _ORIG["add"]
        StreamingScorer.scores = _ORIG["scores"]
        service_mod.verdicts.evaluate = _ORIG["evaluate"]


def write_round(root: Path, writers: dict, sampler: Sampler, per_chain: int, run: str = "model"):
    """Each chain's writer appends one chunk of ``per_chain`` draws (atomic rename per chunk).
    Blocks are simulated first, so the time after the last rename is not the sampler's."""
    blocks = {c: sampler.block(c, per_chain) for c in CHAINS}
    for c in CHAINS:
        writers[c].append(*blocks[c])
    return time.perf_counter()


def open_writers(root: Path, run: str = "model"):
    run_dir = root / run
    run_dir.mkdir(parents=True, exist_ok=True)
    return {c: ChainWriter(run_dir, c, param_names=PARAMS) for c in CHAINS}


def rng_str(values, fmt="{:.3f}"):
    values = list(values)
    if not values:
        return "-"
    lo, hi = min(values), max(values)
    return fmt.format(lo) if np.isclose(lo, hi) else f"{fmt.format(lo)}-{fmt.format(hi)}"


BREAKDOWN = ("read npz", "store append", "store flush", "manifest commit", "scorer add", "scores",
             "store read", "joint pass start", "mixing", "verdict", "history write", "compare")


def print_breakdown(title, totals, rounds):
    print(f"\n{title}")
    print(f"  {'step':18s} {'seconds (range over rounds)':>28s}")
    for key in BREAKDOWN + ("other",):
        vals = [r.get(key, 0.0) for r in rounds]
        print(f"  {key:18s} {rng_str(vals):>28s}")
    print(f"  {'total':18s} {rng_str(totals):>28s}")
    quiet = [t for t, r in zip(totals, rounds) if r.get("joint pass start", 0) < 0.01]
    if len(quiet) < len(totals):
        print(f"  {'total, rounds without an r_eff refresh':40s} {rng_str(quiet)}")


# ---------------------------------------------------------------------------- part 1
def arrival_sync(n: int, history_per_chain: int, new_per_chain: int, rounds: int, scratch: Path):
    root = scratch / "sync"
    sampler = Sampler(n)
    writers = open_writers(root)
    for _ in range(history_per_chain // 100):
        write_round(root, writers, sampler, 100)
    svc = Service(root, every=0)
    svc.cycle()  # ingest the history (one snapshot)
    probe = Probe()
    probe.install(svc)
    patch_module(probe)
    totals, parts, refreshed = [], [], []
    hist = History(svc.state_dir / service_mod.HISTORY_FILE, readonly=True)
    try:
        for _ in range(rounds):
            write_round(root, writers, sampler, new_per_chain)
            probe.take()
            t0 = time.perf_counter()
            with probe.phase("other"):
                svc.cycle()
            totals.append(time.perf_counter() - t0)
            parts.append(probe.take())
            refreshed.append(parts[-1].get("joint pass start", 0) > 0.01)
            snap = hist.latest_snapshot("model")
            assert snap["draws"] == sum(svc.store.length("model", c) for c in CHAINS), "snapshot lags"
        draws = snap["draws"]
    finally:
        unpatch_module()
        hist.close()
        svc.close()
        for w in writers.values():
            w.close()
    return totals, parts, draws, probe.reads


def arrival_watched(n: int, history_per_chain: int, new_per_chain: int, rounds: int, scratch: Path,
                    every: float):
    root = scratch / "watched"
    sampler = Sampler(n, seed=5)
    writers = open_writers(root)
    for _ in range(history_per_chain // 100):
        write_round(root, writers, sampler, 100)
    svc = Service(root, every=every)
    probe = Probe()
    probe.install(svc)
    patch_module(probe)
    thread = threading.Thread(target=svc.run, daemon=True)
    thread.start()
    hist = None
    latencies, parts, first_seen = [], [], []
    total = 4 * history_per_chain
    try:
        deadline = time.time() + 120
        while hist is None or not (hist.latest_snapshot("model") or {}).get("draws") == total:
            if time.time() > deadline:
                raise RuntimeError("the service did not take in the history within 120 s")
            time.sleep(0.05)
            if hist is None and (svc.state_dir / service_mod.HISTORY_FILE).exists():
                hist = History(svc.state_dir / service_mod.HISTORY_FILE, readonly=True)
        for _ in range(rounds):
            time.sleep(max(every, 0.3) + 0.5)  # the previous round is fully done and due again
            probe.take()
            total += 4 * new_per_chain
            t_land = write_round(root, writers, sampler, new_per_chain)
            while (hist.latest_snapshot("model") or {}).get("draws") != total:
                if time.perf_counter() - t_land > 30:
                    raise RuntimeError("no snapshot row 30 s after the chunks landed")
                time.sleep(0.005)
            latencies.append(time.perf_counter() - t_land)
            time.sleep(0.05)
            parts.append(probe.take())
    finally:
        svc.stop()
        thread.join(60)
        unpatch_module()
        if hist is not None:
            hist.close()
        for w in writers.values():
            w.close()
    return latencies, parts


# ---------------------------------------------------------------------------- part 2
def snapshot_vs_batch(n: int, per_chain: int, block: int, scratch: Path, tag: str):
    """Ingest through the service with a snapshot per round (as a live service does, so r_eff is
    refreshed on its growth schedule), then time the snapshot of the last round by itself."""
    root = scratch / f"big{tag}"
    sampler = Sampler(n, seed=11)
    writers = open_writers(root)
    svc = Service(root, every=0)
    probe = Probe()
    probe.install(svc)
    patch_module(probe)
    try:
        for _ in range(per_chain // block - 1):
            write_round(root, writers, sampler, block)
            svc.cycle()
        write_round(root, writers, sampler, block)
        svc.scan()  # ingest the last round; its snapshot is timed alone below
        watch = svc.runs["model"]
        probe.take()
        t = time.perf_counter()
        with probe.phase("other"):
            snap = svc.take_snapshot(watch)
        t_stream = time.perf_counter() - t
        parts = probe.take()
        reads_streaming = {k: tuple(v) for k, v in probe.reads.items()}
        r_eff = watch.r_eff
        t = time.perf_counter()
        ll = svc.store.read_run("model")
        t_read = time.perf_counter() - t
        t = time.perf_counter()
        batch = batch_scores(ll, r_eff=r_eff)
        t_batch = time.perf_counter() - t
        del ll
        b_elpd = batch.to_dict()["loo"]["elpd"]
        rel = abs(b_elpd - snap["loo"]["elpd"]) / abs(b_elpd)
        # what an r_eff refresh from the store costs at this size (state reset for the timing only)
        per = min(svc.store.length("model", c) for c in CHAINS)
        used_r_eff = watch.r_eff_per_chain
        svc.passes.worker.wait(600)
        watch.r_eff_per_chain, svc.passes.asked[watch.name] = 0, 0
        t = time.perf_counter()
        svc.passes.start(watch, per, watch.scorer.r_eff(), force=True)  # returns at once ...
        svc.passes.worker.wait(600)  # ... the pass runs in the background thread
        t_refresh = time.perf_counter() - t
    finally:
        unpatch_module()
        svc.close()
        for w in writers.values():
            w.close()
    return dict(stream=t_stream, read=t_read, batch=t_batch, rel=rel, parts=parts, refresh=t_refresh,
                reads=reads_streaming, draws=snap["draws"], used_r_eff=used_r_eff)


# ---------------------------------------------------------------------------- main
def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rounds", type=int, default=5, help="rounds of 4 x 100 new draws (part 1)")
    ap.add_argument("--repeat", type=int, default=2, help="repeats of part 2")
    ap.add_argument("--every", type=float, default=0.5, help="snapshot cadence of the watched service")
    ap.add_argument("--skip-watch", action="store_true")
    ap.add_argument("--skip-big", action="store_true")
    ap.add_argument("--dir", default=None, help="scratch folder (default: a temporary folder)")
    args = ap.parse_args()
    scratch = Path(tempfile.mkdtemp(prefix="service_speed_", dir=args.dir))
    try:
        n, hist_pc, new_pc = 10_000, 1_000, 100
        print(f"part 1: n = {n:,}, history {len(CHAINS)} x {hist_pc:,} draws, "
              f"{args.rounds} rounds of {len(CHAINS)} x {new_pc} new draws (NPZ chunks)")
        totals, parts, draws, reads = arrival_sync(n, hist_pc, new_pc, args.rounds, scratch)
        print_breakdown(f"synchronous: Service(every=0).cycle() right after the chunks land "
                        f"(ends at {draws:,} draws)", totals, parts)
        print(f"  r_eff refreshed in rounds: {[i + 1 for i, p in enumerate(parts) if p.get('r_eff refresh', 0) > 0.01]}")
        print(f"  log-likelihood reads from the store during these rounds: "
              f"{ {k: f'{v[0]} reads, {v[1] / 2**20:.0f} MiB' for k, v in reads.items()} or 'none'}")
        if not args.skip_watch:
            lat, wparts = arrival_watched(n, hist_pc, new_pc, args.rounds, scratch, args.every)
            print_breakdown(f"watched: Service.run(every={args.every}) in a thread, watchdog observer; "
                            f"last rename -> snapshot row visible in SQLite", lat, wparts)
            from chainvigil.service import WATCH_QUIET_SECONDS
            print(f"  (the watcher waits for a quiet period of {WATCH_QUIET_SECONDS} s after the last event "
                  "before it wakes the loop; the breakdown is the service's own work in that round)")
        if not args.skip_big:
            n2, pc2 = 20_000, 1_000
            print(f"\npart 2: n = {n2:,}, {len(CHAINS)} x {pc2:,} draws ingested through the service "
                  f"in chunks of 100, then one snapshot vs read_run + batch_scores (same r_eff)")
            res = [snapshot_vs_batch(n2, pc2, 100, scratch, str(i)) for i in range(args.repeat)]
            print(f"  streaming snapshot (take_snapshot)  {rng_str(r['stream'] for r in res)} s")
            for key in ("scores", "store read", "joint pass start", "mixing", "verdict", "history write", "other"):
                print(f"    of which {key:24s} {rng_str(r['parts'].get(key, 0) for r in res)} s")
            print(f"  read_run (whole store)              {rng_str(r['read'] for r in res)} s")
            print(f"  batch_scores                        {rng_str(r['batch'] for r in res)} s")
            print(f"  ratio snapshot / (read_run + batch) "
                  f"{rng_str((r['stream'] / (r['read'] + r['batch']) for r in res), '{:.2f}')}")
            print(f"  ratio scores / batch_scores         "
                  f"{rng_str((r['parts'].get('scores', 0) / r['batch'] for r in res), '{:.2f}')}")
            print(f"  |elpd_loo streaming - batch| / |batch|  {max(r['rel'] for r in res):.1e}")
            print(f"  a joint-MCSE pass over the store at this size: {rng_str(r['refresh'] for r in res)} s "
                  f"in the background (due when draws per chain grow by "
                  f"{passes_mod.R_EFF_REFRESH_GROWTH:.0%}; r_eff itself is streamed; the last pass "
                  f"here covered {res[0]['used_r_eff']} per chain)")
            for i, r in enumerate(res):
                reads = ", ".join(f"{k}: {v[0]} reads, {v[1] / 2**20:.0f} MiB" for k, v in r["reads"].items())
                print(f"  run {i + 1}: log-likelihood reads over ingest + {pc2 // 100} snapshots "
                      f"({r['draws']:,} draws, {r['draws'] * n2 * 8 / 2**20:.0f} MiB in the store): "
                      f"{reads or 'none'}")
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()
