"""What keeps a days-long run's cost flat: the scorer with its streaming r_eff, its checkpoint, and
the joint-MCSE store pass run off the loop (docs/architecture.md, "Long runs").

* :class:`RunScorer`: a ``StreamingScorer`` that also feeds every block it receives to a
  ``StreamingRelativeEfficiency``, so the r_eff PSIS-LOO uses is current at every snapshot without
  reading the draw store (ingest feeds the scorer; the same blocks reach the r_eff estimator).
* Checkpoints (:func:`save_checkpoint`, :func:`load_checkpoint`): the scorer's state, the streaming
  r_eff's state and the committed draws per chain they cover, in one ``.npz`` per run under
  ``<state>/checkpoints/``, written atomically (temporary file, fsync, rename) *after* the manifest
  commit that covers those draws, and loaded with ``allow_pickle=False``.  On start the service
  compares the checkpoint with the commit log: a chain the checkpoint covers further than the
  store's committed length (a checkpoint newer than the commit log, impossible by the write order
  but checked) discards it; draws committed after it are streamed from the store.  So a restart
  costs the checkpoint load plus the draws since it, not the run's whole length.
* :class:`JointPassWorker`: one background thread that runs the store pass the joint MCSE needs
  (every draw of every observation, docs/numerics.md) over a frozen view of the committed draws
  (:meth:`chainvigil.storage.draws.DrawStore.frozen_view`), so the loop never waits for it.

No I/O in the numerics: the estimators stay pure; this module does the file and thread work.
"""
from __future__ import annotations

import os
import queue
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from chainvigil.estimators import StreamingScorer, SubsampledScorer
from chainvigil.estimators.loo import joint_mcse_finish, joint_mcse_parts
from chainvigil.estimators.reff_stream import StreamingRelativeEfficiency

__all__ = ["RunScorer", "RunSubsampledScorer", "RUN_SCORERS", "save_checkpoint", "load_checkpoint",
           "checkpoint_path", "CheckpointMismatch", "JointPassWorker", "PassResult", "CHECKPOINT_DIR",
           "KEEP_DRAWS", "REFF_FLOOR", "TAIL_LAG", "DEFAULT_PLANNED_DRAWS", "KEEP_WINDOW", "planned_buffer_size",
           "fit_r_eff_to_buffer"]

CHECKPOINT_DIR = "checkpoints"
# 2: the scorer state of StreamingScorer.STATE_FORMAT 2 (parts with their own states, tail cache).
# A checkpoint of another format is refused with CheckpointMismatch: the service re-streams.
_FORMAT = 2
# Observations per block in the joint-MCSE pass: bounds its memory for large n.
PASS_OBS_BLOCK = 2048



def _trim_buffer(state: dict, prefix: str) -> dict:
    """A scorer state whose tail buffer (capacity 2K per observation, holding fill_i <= 2K values,
    the rest +inf) keeps only its filled columns, with the capacity recorded: what a checkpoint
    stores.  ``prefix`` names the buffer's keys (``tail_`` of a scorer, ``exact_tail_`` of the
    exact part of a subsampled one)."""
    buffer, fill = state[prefix + "buffer"], state[prefix + "fill"]
    if buffer.ndim == 2 and buffer.size:
        used = int(fill.max()) if fill.size else 0
        state[prefix + "buffer_capacity"] = np.asarray(buffer.shape[1], dtype=np.int64)
        state[prefix + "buffer"] = np.ascontiguousarray(buffer[:, :used])
    return state


def _untrim_buffer(state: dict, prefix: str) -> dict:
    """The inverse of :func:`_trim_buffer` (a new dict; the buffer padded back with +inf)."""
    state = dict(state)
    capacity = state.pop(prefix + "buffer_capacity", None)
    if capacity is not None:
        kept = np.asarray(state[prefix + "buffer"], dtype=float)
        full = np.full((kept.shape[0], int(capacity)), np.inf)
        full[:, :kept.shape[1]] = kept
        state[prefix + "buffer"] = full
    return state


class RunScorer(StreamingScorer):
    """A ``StreamingScorer`` whose :meth:`add` also updates a streaming r_eff (``self.reff``).

    ``r_eff()`` returns the streaming estimate (n,) (1.0 everywhere while a chain has fewer than
    4 draws, see ``StreamingRelativeEfficiency``).  ``to_state``/``from_state`` carry both parts.
    """

    def __init__(self, n: int, **kw):
        super().__init__(n, **kw)
        self.reff = StreamingRelativeEfficiency(self.n)

    def add(self, chain, block) -> None:
        super().add(chain, block)
        x = np.asarray(block, dtype=float)
        if x.ndim == 1:
            x = x[None, :]
        self.reff.update(str(chain), x)

    def r_eff(self) -> np.ndarray:
        return self.reff.result()

    def to_state(self) -> dict:
        state = _trim_buffer(super().to_state(), "tail_")
        state.update({f"reff_{k}": v for k, v in self.reff.to_state().items()})
        return state

    @classmethod
    def from_state(cls, state: dict, *, reader=None, copy: bool = True) -> "RunScorer":
        """``copy=False``: work on the given arrays (a caller that drops ``state``, e.g. a freshly
        loaded checkpoint), so a restart holds each array once, not twice."""
        state = _untrim_buffer(state, "tail_")
        out = super().from_state(state, reader=reader, copy=copy)
        out.reff = StreamingRelativeEfficiency.from_state(
            {k[len("reff_"):]: v for k, v in state.items() if k.startswith("reff_")})
        if out.reff.n != out.n:
            raise ValueError(f"checkpoint: r_eff state has n={out.reff.n}, scorer n={out.n}")
        return out


class RunSubsampledScorer(SubsampledScorer):
    """A ``SubsampledScorer`` whose :meth:`add` also streams r_eff, for the m sampled observations only.

    PSIS-LOO needs r_eff only where it is computed exactly (the sample), so the streaming r_eff state
    is O(m), not O(n).  ``r_eff()`` returns an (n,) vector: the streamed values at the sampled
    observations and their mean elsewhere (used by nothing but the snapshot's ``r_eff_mean``);
    ``sample_r_eff()`` the (m,) values.  ``to_state``/``from_state`` carry both parts.
    """

    def __init__(self, n: int, m: int, seed=0, **kw):
        super().__init__(n, m, seed, **kw)
        self.reff = StreamingRelativeEfficiency(self.m)

    def add(self, chain, block) -> None:
        super().add(chain, block)
        x = np.asarray(block, dtype=float)
        if x.ndim == 1:
            x = x[None, :]
        self.reff.update(str(chain), x[:, self.sample])

    def sample_r_eff(self) -> np.ndarray:
        return self.reff.result()

    def r_eff(self) -> np.ndarray:
        r = self.reff.result()
        out = np.full(self.n, float(np.nanmean(r)) if np.any(np.isfinite(r)) else 1.0)
        out[self.sample] = r
        return out

    def to_state(self) -> dict:
        state = _trim_buffer(super().to_state(), "exact_tail_")
        state.update({f"reff_{k}": v for k, v in self.reff.to_state().items()})
        return state

    @classmethod
    def from_state(cls, state: dict, *, column_reader=None) -> "RunSubsampledScorer":
        state = _untrim_buffer(state, "exact_tail_")
        out = super().from_state(state, column_reader=column_reader)
        out.reff = StreamingRelativeEfficiency.from_state(
            {k[len("reff_"):]: v for k, v in state.items() if k.startswith("reff_")})
        if out.reff.n != out.m:
            raise ValueError(f"checkpoint: r_eff state has n={out.reff.n}, the sample m={out.m}")
        return out


#: The scorers the service checkpoints (full and subsampled).
RUN_SCORERS = (RunScorer, RunSubsampledScorer)


class CheckpointMismatch(ValueError):
    """A checkpoint that does not fit the committed draws (the caller re-streams)."""


def checkpoint_path(state_dir, run: str) -> Path:
    return Path(state_dir) / CHECKPOINT_DIR / f"{run}.npz"


def save_checkpoint(path, scorer: RunScorer, committed: dict) -> int:
    """Write ``scorer`` (scores + streaming r_eff) and the committed draws per chain it covers to
    ``path`` atomically; returns the bytes written.  ``committed`` must equal the scorer's own draws
    per chain (the caller writes right after the manifest commit of exactly those draws)."""
    return write_checkpoint(path, checkpoint_state(scorer, committed))


def checkpoint_state(scorer: RunScorer, committed: dict, last_pass: tuple | None = None) -> dict:
    """The arrays of a checkpoint (copies: the scorer may go on while they are written).

    ``last_pass``: ``(draws per chain, joint MCSE)`` of the run's last joint-MCSE store pass, kept so
    a restart does not start a new pass over every stored draw before the run has grown enough for
    one (``chainvigil.joint_passes.R_EFF_REFRESH_GROWTH``)."""
    counts = scorer.chain_draws()
    if {str(c): int(v) for c, v in counts.items()} != {str(c): int(v) for c, v in committed.items()}:
        raise CheckpointMismatch(f"checkpoint: scorer holds {counts} draws per chain, committed {committed}")
    names = sorted(str(c) for c in committed)
    state = scorer.to_state()
    if last_pass is not None and last_pass[1] is not None:
        state["pass_per_chain"] = np.asarray(int(last_pass[0]), dtype=np.int64)
        state["pass_joint_mcse"] = np.asarray(float(last_pass[1]))
    state["checkpoint_format"] = np.asarray(_FORMAT, dtype=np.int64)
    state["covers_chains"] = np.asarray(names, dtype=np.str_) if names else np.zeros(0, dtype="<U1")
    state["covers_draws"] = np.asarray([int(committed[c]) for c in names], dtype=np.int64)
    state["written"] = np.asarray(time.time())
    return state


def write_checkpoint(path, state: dict) -> int:
    """Write checkpoint arrays to ``path``: temporary file, fsync, rename (atomic)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "wb") as fh:
        np.savez(fh, **state)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    return path.stat().st_size


def load_checkpoint(path, *, n: int, committed: dict, reader=None,
                    column_reader=None) -> tuple[RunScorer | RunSubsampledScorer, dict]:
    """Load a checkpoint; returns ``(scorer, covered)`` with ``covered`` the draws per chain it holds.
    ``scorer.last_pass`` is ``(draws per chain, joint MCSE)`` of the last joint-MCSE pass the
    checkpoint recorded, or None.  The arrays are read once and handed to the scorer (no copies).

    Raises ``FileNotFoundError`` when there is none and :class:`CheckpointMismatch` when it cannot be
    used: unreadable, another n, or a chain covered beyond its committed draws (``committed``:
    chain -> committed draws, from the commit log).  Draws committed after the checkpoint are the
    caller's to stream (``committed[c] - covered[c]`` per chain).  A checkpoint of a subsampled
    scorer (``subsample_format`` among its arrays) is restored as :class:`RunSubsampledScorer` with
    ``column_reader``; any other as :class:`RunScorer` with ``reader``.
    """
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as data:
            state = {k: data[k] for k in data.files}
    except FileNotFoundError:
        raise
    except Exception as err:  # a torn or foreign file: re-stream instead
        raise CheckpointMismatch(f"{path}: unreadable checkpoint ({type(err).__name__}: {err})") from err
    try:
        if int(state["checkpoint_format"]) != _FORMAT:
            raise CheckpointMismatch(
                f"{path}: checkpoint format {int(state['checkpoint_format'])} is not the current format "
                f"{_FORMAT} (written by another version); the draws are streamed again from the store")
        covered = {str(c): int(d) for c, d in zip(state["covers_chains"].tolist(), state["covers_draws"])}
        last_pass = None
        if "pass_per_chain" in state and "pass_joint_mcse" in state:
            last_pass = (int(state["pass_per_chain"]), float(state["pass_joint_mcse"]))
        if "subsample_format" in state:
            scorer = RunSubsampledScorer.from_state(state, column_reader=column_reader)
        else:
            scorer = RunScorer.from_state(state, reader=reader, copy=False)
        scorer.last_pass = last_pass
    except CheckpointMismatch:
        raise
    except (KeyError, ValueError, TypeError) as err:
        raise CheckpointMismatch(f"{path}: unusable checkpoint ({type(err).__name__}: {err})") from err
    if scorer.n != int(n):
        raise CheckpointMismatch(f"{path}: checkpoint has n={scorer.n}, the run has n={n}")
    if {str(c): v for c, v in scorer.chain_draws().items()} != covered:
        raise CheckpointMismatch(f"{path}: scorer and checkpoint cover different draws")
    for chain, draws in covered.items():
        if draws > int(committed.get(chain, 0)):
            raise CheckpointMismatch(
                f"{path}: checkpoint covers {draws} draws of chain '{chain}' but only "
                f"{int(committed.get(chain, 0))} are committed (newer than the commit log)")
    return scorer, covered


# ---------------------------------------------------------------------------------------------
# How stale a cached PSIS tail fit may be (docs/numerics.md, "Tail lag")
# ---------------------------------------------------------------------------------------------

#: A live snapshot reuses an observation's last PSIS tail fit until the draws that entered its tail
#: since, or the change of its tail length M, exceed this fraction of M (``--tail-lag``); then it is
#: refitted.  Without it every snapshot refits each tail a new draw entered, and that work grows
#: with the run (M ~ sqrt(S)); with it a tail is refitted about once per 5 % more draws, so the cost
#: per snapshot stays flat (bench/psis_work.py).  The final snapshot of a clean stop uses 0 (exact).
TAIL_LAG = 0.05

# ---------------------------------------------------------------------------------------------
# Retention: what --keep-draws keeps of the log-likelihood draws (docs/storage.md, "Retention")
# ---------------------------------------------------------------------------------------------

#: ``--keep-draws`` modes: ``all`` keeps every log-likelihood draw (a PSIS tail that outgrows the
#: scorer's buffer is rebuilt from the store); ``tail`` drops the chunks a committed checkpoint covers
#: except the last ``KEEP_WINDOW`` draws per chain (the joint-MCSE pass runs over that window);
#: ``none`` drops every chunk a committed checkpoint covers.  Parameter draws and draw numbers are
#: always kept (R-hat and ESS read them).
KEEP_DRAWS = ("all", "tail", "none")
#: The smallest r_eff the scorer's tail buffer is sized for in ``tail`` and ``none``: PSIS needs
#: M + 1 values per observation, M = ceil(min(S/5, 3 sqrt(S/r_eff))); below this floor (or past the
#: planned draws) the buffer may be too small, and the snapshot says so.
REFF_FLOOR = 0.1
#: Draws (all chains, after warm-up) a run is planned for when its run.json gives no ``draws_expected``.
DEFAULT_PLANNED_DRAWS = 100_000
#: Draws per chain ``tail`` keeps behind the last checkpoint (two store chunks).
KEEP_WINDOW = 512


def planned_buffer_size(draws_expected, r_floor: float = REFF_FLOOR) -> int:
    """K = M(S, r_floor) + 1 values per observation: enough for PSIS-LOO of S = ``draws_expected``
    draws (``DEFAULT_PLANNED_DRAWS`` when None) at any r_eff >= ``r_floor``, so the tail buffer never
    needs the dropped draws while the run stays within its plan.

    M = ceil(min(S/5, 3 sqrt(S/r_eff))) (Vehtari et al. 2024, JMLR 25(72), sec. 3).  The scorer holds
    up to 2K values per observation in memory (8 bytes each).
    """
    from chainvigil.estimators.psis import tail_length

    S = DEFAULT_PLANNED_DRAWS if draws_expected is None else max(2, int(draws_expected))
    if not r_floor > 0:
        raise ValueError(f"r_eff floor must be positive, got {r_floor}")
    return max(2, int(tail_length(S, float(r_floor))[0]) + 1)


def fit_r_eff_to_buffer(S: int, k: int, r_eff) -> tuple[np.ndarray, np.ndarray, int]:
    """The r_eff to score with when the tail buffer holds only ``k`` values per observation and the
    draws it lacks cannot be read again.

    PSIS needs M_i + 1 <= k values, M_i = ceil(min(S/5, 3 sqrt(S/r_i))).  Observations whose r_i asks
    for more get r_i raised to the smallest r with M + 1 <= k (about 9 S / (k - 1)^2): their Pareto tail
    is fitted on the k - 1 largest ratios instead of M_i, and their MCSE uses the raised r_eff (smaller
    than it should be).  Returns ``(r_used (n,), short (n,) bool, need)`` with ``need`` = max M_i + 1
    at the given r_eff; ``short`` is all False when every observation fits (r_used = r_eff then).
    """
    from chainvigil.estimators.psis import tail_length

    r = np.atleast_1d(np.asarray(1.0 if r_eff is None else r_eff, dtype=float))
    M = tail_length(S, r)
    need = int(M.max()) + 1
    if S <= k or need <= k:
        return r, np.zeros(r.shape, dtype=bool), need
    r_min = 9.0 * S / (k - 1) ** 2
    while int(tail_length(S, r_min)[0]) + 1 > k:  # ceil at the edge: nudge up
        r_min *= 1 + 1e-9
    short = (M + 1) > k
    return np.where(short, np.maximum(r, r_min), r), short, need


# ---------------------------------------------------------------------------------------------
# The joint-MCSE pass, off the loop
# ---------------------------------------------------------------------------------------------

@dataclass
class PassResult:
    run: str
    per_chain: int  # draws per chain the pass covered
    joint_mcse: float | None
    seconds: float
    error: str | None = None


@dataclass
class _Job:
    run: str
    per_chain: int
    view: object  # DrawStore.frozen_view: read(chain, obs_slice) -> (per_chain, k)
    chains: list
    r_eff: np.ndarray
    n: int
    started: float = field(default_factory=time.time)


# How much lower the joint-MCSE pass thread runs than the service loop (a nice increment): the pass
# is background work the loop never waits for, so on a busy machine it yields the cores to the loop.
PASS_NICE = 10


def _lower_this_threads_priority() -> None:
    """Lower the calling thread's scheduling priority by ``PASS_NICE`` where the system lets a
    thread have its own (Linux: a thread id is a valid ``PRIO_PROCESS`` target); elsewhere, and
    when refused, nothing changes."""
    if not sys.platform.startswith("linux"):
        return
    try:
        tid = threading.get_native_id()
        os.setpriority(os.PRIO_PROCESS, tid, min(19, os.getpriority(os.PRIO_PROCESS, tid) + PASS_NICE))
    except (OSError, AttributeError):
        pass


class JointPassWorker:
    """One background thread running joint-MCSE store passes, one job at a time per run.

    ``submit(run, per_chain, view, chains, r_eff, n)`` queues a pass unless one for that run is
    queued or running (returns False then); ``results()`` returns and forgets the finished ones.
    ``delay`` (seconds, default 0) is added to every pass: a knob for tests and benchmarks that
    need a slow pass without a huge store.  ``close()`` stops the thread after the current block.
    """

    def __init__(self, *, delay: float = 0.0):
        self.delay = float(delay)
        self._jobs: queue.Queue = queue.Queue()
        self._busy: set = set()
        self._done: list = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="chainvigil-joint-pass", daemon=True)
        self._thread.start()

    def busy(self, run: str | None = None) -> bool:
        with self._lock:
            return bool(self._busy) if run is None else run in self._busy

    def submit(self, run: str, per_chain: int, view, chains, r_eff, n: int) -> bool:
        with self._lock:
            if run in self._busy:
                return False
            self._busy.add(run)
        self._jobs.put(_Job(run, int(per_chain), view, list(chains), np.array(r_eff, dtype=float), int(n)))
        return True

    def results(self) -> list[PassResult]:
        with self._lock:
            done, self._done = self._done, []
        return done

    def wait(self, timeout: float = 60.0) -> bool:
        """Wait until no pass is queued or running (tests, the final pass); False on timeout."""
        end = time.time() + timeout
        while self.busy():
            if time.time() > end:
                return False
            time.sleep(0.01)
        return True

    def close(self):
        self._stop.set()
        self._jobs.put(None)
        self._thread.join(timeout=5.0)

    def _loop(self):
        _lower_this_threads_priority()
        while not self._stop.is_set():
            job = self._jobs.get()
            if job is None:
                return
            t0 = time.time()
            try:
                mcse = self._run(job)
                result = PassResult(job.run, job.per_chain, mcse, time.time() - t0)
            except Exception as err:  # reported by the service as an event; the loop goes on
                result = PassResult(job.run, job.per_chain, None, time.time() - t0,
                                    error=f"{type(err).__name__}: {err}")
            with self._lock:
                self._done.append(result)
                self._busy.discard(job.run)

    def _run(self, job: _Job) -> float | None:
        parts = np.zeros((len(job.chains), job.per_chain))
        blocks = range(0, job.n, PASS_OBS_BLOCK)
        pause = self.delay / max(1, len(blocks))
        for start in blocks:
            if self._stop.is_set():
                return None
            stop = min(job.n, start + PASS_OBS_BLOCK)
            block = np.stack([job.view.read(c, slice(start, stop)) for c in job.chains])
            parts += joint_mcse_parts(block, job.r_eff[start:stop])
            if pause and self._stop.wait(pause):
                return None
        value = joint_mcse_finish(parts)
        return float(value) if np.isfinite(value) else None


# ---------------------------------------------------------------------------------------------
# Pruning the draw store of finished runs
# ---------------------------------------------------------------------------------------------

#: Run states whose stored log-likelihoods ``prune`` may drop (no new draws expected).
PRUNABLE_STATES = ("finished", "enough")


def _folder_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in Path(path).rglob("*") if p.is_file())


def prune_runs(state_dir, run: str | None = None) -> list[dict]:
    """Drop the stored log-likelihood draws of finished runs that a checkpoint makes unneeded.

    Per run (all, or only ``run``) whose state is in ``PRUNABLE_STATES`` and whose checkpoint covers
    every committed draw: ``DrawStore.drop_before(run, chain, committed)`` on each chain, which deletes
    the whole log-likelihood chunks below that length (the partial last chunk stays).  Kept: every
    parameter draw and draw number (mixing, R-hat and ESS read them), the array lengths (the commit
    log and crash recovery stay valid), the checkpoint (a restart needs no log-likelihood), and the
    whole history.  Lost: a rebuild of the scores from the draws (if the checkpoint goes too), and
    exact scores if the run gets more draws (a larger PSIS tail buffer or a joint-MCSE pass would
    need the dropped draws; the service scores with the buffer it has and flags the snapshot, as
    with ``--keep-draws``).

    The caller holds the state folder's lock (no service running).  Returns one dict per run:
    ``run, state, pruned (bool), reason, freed (bytes)``.
    """
    from chainvigil.storage.draws import DrawStore
    from chainvigil.storage.history import HistoryReader

    state_dir = Path(state_dir)
    history = HistoryReader(state_dir / "history.sqlite")
    store = DrawStore(state_dir / "draws.zarr")
    out = []
    try:
        rows = history.runs()
        if run is not None:
            rows = [r for r in rows if r["name"] == run]
        for row in rows:
            name = row["name"]
            item = {"run": name, "state": row.get("state"), "pruned": False, "reason": None, "freed": 0}
            out.append(item)
            if row.get("state") not in PRUNABLE_STATES:
                item["reason"] = f"state '{row.get('state')}': only {' or '.join(PRUNABLE_STATES)} runs are pruned"
                continue
            committed = {c["chain"]: history.committed(name, c["chain"])["draws"] for c in history.chains(name)}
            try:
                load_checkpoint(checkpoint_path(state_dir, name), n=int(row.get("n_obs") or 0),
                                committed=committed)
            except (FileNotFoundError, CheckpointMismatch) as err:
                item["reason"] = f"no usable checkpoint ({err}); start and stop the service once to write one"
                continue
            _, covered = load_checkpoint(checkpoint_path(state_dir, name), n=int(row["n_obs"]),
                                         committed=committed)
            if covered != committed:
                item["reason"] = "the checkpoint does not cover every committed draw yet"
                continue
            folder = state_dir / "draws.zarr" / name
            before = _folder_bytes(folder)
            for chain, draws in committed.items():
                store.truncate(name, chain, draws)  # nothing past the commit log
                store.drop_before(name, chain, draws)
            item["freed"] = before - _folder_bytes(folder)
            item["pruned"] = True
    finally:
        store.close(flush=False)
        history.close()
    return out
