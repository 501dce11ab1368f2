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
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from chainvigil.estimators import StreamingScorer
from chainvigil.estimators.loo import joint_mcse_finish, joint_mcse_parts
from chainvigil.estimators.reff_stream import StreamingRelativeEfficiency

__all__ = ["RunScorer", "save_checkpoint", "load_checkpoint", "checkpoint_path", "CheckpointMismatch",
           "JointPassWorker", "PassResult", "CHECKPOINT_DIR"]

CHECKPOINT_DIR = "checkpoints"
_FORMAT = 1
# Observations per block in the joint-MCSE pass: bounds its memory for large n.
PASS_OBS_BLOCK = 2048


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
        state = super().to_state()
        # The tail buffer has capacity 2K per observation but holds fill_i <= 2K values (the rest
        # +inf); the checkpoint keeps the filled columns only and records the capacity.
        buffer = state["buffer"]
        if buffer.ndim == 2 and buffer.size:
            used = int(self._fill.max()) if self._fill.size else 0
            state["buffer_capacity"] = np.asarray(buffer.shape[1], dtype=np.int64)
            state["buffer"] = np.ascontiguousarray(buffer[:, :used])
        state.update({f"reff_{k}": v for k, v in self.reff.to_state().items()})
        return state

    @classmethod
    def from_state(cls, state: dict, *, reader=None, copy: bool = True) -> "RunScorer":
        """``copy=False``: work on the given arrays (a caller that drops ``state``, e.g. a freshly
        loaded checkpoint), so a restart holds each array once, not twice."""
        state = dict(state)
        if "buffer_capacity" in state:
            kept = np.asarray(state["buffer"], dtype=float)
            full = np.empty((kept.shape[0], int(state["buffer_capacity"])))
            full[:, :kept.shape[1]] = kept
            full[:, kept.shape[1]:] = np.inf
            state["buffer"] = full
            copy_buffer = False  # already a new array
        else:
            copy_buffer = copy
        if not copy_buffer and copy:
            state = {k: (v if k == "buffer" else np.array(v)) for k, v in state.items()}
        out = super().from_state(state, reader=reader, copy=copy and copy_buffer)
        out.reff = StreamingRelativeEfficiency.from_state(
            {k[len("reff_"):]: v for k, v in state.items() if k.startswith("reff_")})
        if out.reff.n != out.n:
            raise ValueError(f"checkpoint: r_eff state has n={out.reff.n}, scorer n={out.n}")
        return out


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
    one (``chainvigil.service.R_EFF_REFRESH_GROWTH``)."""
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


def load_checkpoint(path, *, n: int, committed: dict, reader=None) -> tuple[RunScorer, dict]:
    """Load a checkpoint; returns ``(scorer, covered)`` with ``covered`` the draws per chain it holds.
    ``scorer.last_pass`` is ``(draws per chain, joint MCSE)`` of the last joint-MCSE pass the
    checkpoint recorded, or None.  The arrays are read once and handed to the scorer (no copies).

    Raises ``FileNotFoundError`` when there is none and :class:`CheckpointMismatch` when it cannot be
    used: unreadable, another n, or a chain covered beyond its committed draws (``committed``:
    chain -> committed draws, from the commit log).  Draws committed after the checkpoint are the
    caller's to stream (``committed[c] - covered[c]`` per chain).
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
            raise CheckpointMismatch(f"{path}: checkpoint format {int(state['checkpoint_format'])}")
        covered = {str(c): int(d) for c, d in zip(state["covers_chains"].tolist(), state["covers_draws"])}
        last_pass = None
        if "pass_per_chain" in state and "pass_joint_mcse" in state:
            last_pass = (int(state["pass_per_chain"]), float(state["pass_joint_mcse"]))
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
PRUNABLE_STATES = ("finished", "settled")


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
    more draws for that run (a larger PSIS tail buffer or a joint-MCSE pass would need the dropped
    draws; the service then sets the run aside with a message saying so).

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
