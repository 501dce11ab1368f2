"""Sharded streaming scores: the per-observation state split into observation blocks.

Every per-observation quantity of :class:`.streaming.StreamingScorer` (the running log-sum-exp and
moments of WAIC, the PSIS tail buffer and body sums of PSIS-LOO) depends on that observation's
column only, so the state splits by observation blocks: shard j is a ``StreamingScorer`` over the
observations [start_j, stop_j), and the shards never need each other. What couples them:

* the per-draw totals T_s = sum_i ll_si of DIC / AIC: each shard returns the partial sums of its
  observations for every block (:func:`shard_add`); the driver adds them over shards and keeps the
  running moments of T (Chan, Golub & LeVeque 1983, :class:`.running.RunningMoments`);
* the PSIS tail length M_i (Vehtari, Simpson, Gelman, Yao & Gabry 2024) sets the buffer size K of
  every shard: the driver decides when the buffer must grow (max_i M_i + 1 > K over *all*
  observations) and sends each shard its columns of every draw so far (:func:`shard_rebuild`);
* the totals: elpd = sum_i elpd_i, SE = sqrt(n var_i(elpd_i)), p_eff = lppd - elpd and the
  independent MCSE sqrt(sum_i mcse_i^2) need every observation's value, so the shards return their
  pointwise parts (:func:`shard_score`: incremental, each shard refits only the observations whose
  PSIS tail changed and keeps its refreshed tail cache; :func:`shard_parts` reads a state and
  refits every tail), the driver concatenates them in observation order and
  forms the totals with the same code as the unsharded scorer
  (:func:`.streaming.scores_from_parts`).

So :class:`ShardedScorer` returns the same :class:`.scores.Scores` as ``StreamingScorer`` on the
same blocks, for any number of shards, to rounding (the tests hold it to 1e-9 relative).

Tasks.  :func:`shard_new`, :func:`shard_add`, :func:`shard_rebuild`, :func:`shard_score` and
:func:`shard_parts` are module-level pure functions of plain arrays and dicts of arrays (the shard's state is
``StreamingScorer.to_state()``): they never read or write files, and each returns a new state
instead of changing its input. That is what lets the same functions run on a local thread pool
(numpy releases the GIL in the heavy loops) or as tasks of a Dask ``distributed`` cluster, where
the shard states stay on the workers as futures and only blocks of draws go out and pointwise
parts come back. Dask itself is imported only when a ``DaskPool`` is made (the optional extra
``chainvigil[cluster]``); how Dask moves arguments between processes is Dask's own protocol.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Hashable
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .loo import _r_eff_vector
from .psis import tail_length
from .running import RunningMoments
from .scores import Scores
from .reff_stream import StreamingRelativeEfficiency
from .streaming import StreamingScorer, as_block, initial_buffer_size, scores_from_parts

__all__ = ["ShardedScorer", "LocalPool", "DaskPool", "shard_bounds", "shard_new", "shard_add",
           "shard_rebuild", "shard_parts", "shard_score"]


# ----------------------------------------------------------------------------------- pure tasks
def shard_bounds(n: int, shards: int) -> list[tuple[int, int]]:
    """Split observations 0..n-1 into ``shards`` contiguous ranges [start, stop) of near-equal size
    (at most n ranges; none empty)."""
    n = int(n)
    shards = max(1, min(int(shards), n))
    edges = [i * n // shards for i in range(shards + 1)]  # strictly increasing when shards <= n
    return list(zip(edges[:-1], edges[1:]))


def shard_new(width: int, k: int) -> dict:
    """The empty state of a shard of ``width`` observations with buffer size ``k``."""
    return StreamingScorer(int(width), initial_k=int(k)).to_state()


def _unwrap(state: dict) -> dict:
    """A shard state, or the result of :func:`shard_add` / :func:`shard_score` holding one (saves a
    task on a cluster)."""
    return state["state"] if "state" in state else state


def shard_add(state: dict, block: np.ndarray, in_place: bool = False) -> dict:
    """Add a block (draws, width) of this shard's observations to its state.

    Returns ``{"state": new state, "totals": T}`` with T (draws,) the block's per-draw sums over the
    shard's observations (:meth:`.streaming.StreamingScorer.accumulate`). The input state is not
    changed, unless ``in_place`` (for a caller in the same process that drops the old state: the
    local pool; tasks sent to Dask never use it), which saves a copy of the state.
    """
    scorer = StreamingScorer.from_state(_unwrap(state), copy=not in_place)
    totals = scorer.accumulate(block)
    return {"state": scorer.to_state(copy=False), "totals": totals}


def shard_rebuild(state: dict, draws: np.ndarray, k: int) -> dict:
    """The shard's state with its PSIS buffer rebuilt at size ``k`` from every draw so far.

    ``draws`` is (total draws, width): all draws of the shard's observations, any draw order.
    """
    data = np.asarray(draws, dtype=float)
    scorer = StreamingScorer.from_state(_unwrap(state), reader=lambda a, b: data[:, a:b])
    scorer._rebuild(int(k))
    return scorer.to_state(copy=False)


def shard_parts(state: dict, r_eff: np.ndarray) -> dict:
    """The shard's pointwise parts (:meth:`.streaming.StreamingScorer.pointwise_parts`), every tail
    evaluated; the state is only read."""
    scorer = StreamingScorer.from_state(_unwrap(state), copy=False)  # read only
    return scorer.pointwise_parts(np.asarray(r_eff, dtype=float))


def shard_score(state: dict, r_eff: np.ndarray, in_place: bool = False) -> dict:
    """The shard's pointwise parts from incremental scoring (:mod:`.tail_buffer`).

    Returns ``{"state": new state (its tail cache refreshed), "parts": pointwise parts}``; only the
    observations whose PSIS tail changed since the last call are refitted. The input state is not
    changed unless ``in_place`` (as for :func:`shard_add`).
    """
    scorer = StreamingScorer.from_state(_unwrap(state), copy=not in_place)
    parts = scorer.pointwise_parts(np.asarray(r_eff, dtype=float), incremental=True)
    return {"state": scorer.to_state(copy=False), "parts": parts}


# ----------------------------------------------------------------------------------- pools
class LocalPool:
    """Runs the shard tasks on a local thread pool; handles are the values themselves."""

    in_place = True  # the states live in this process only: tasks may update them in place
    batch_values = 0  # blocks go to the shards as they come

    def __init__(self, workers: int | None = None):
        self._executor = ThreadPoolExecutor(max_workers=workers)

    def map(self, fn: Callable, *arg_lists) -> list:
        """``[fn(*args) for args in zip(*arg_lists)]``, run in parallel; waits for all."""
        return [f.result() for f in [self._executor.submit(fn, *args) for args in zip(*arg_lists)]]

    def item(self, handles: list, key) -> list:
        return [h[key] for h in handles]

    def send(self, values: list) -> list:
        return list(values)

    def gather(self, handles: list) -> list:
        return list(handles)

    def close(self):
        self._executor.shutdown(wait=True)


class DaskPool:
    """Runs the shard tasks on a Dask ``distributed`` cluster; handles are futures.

    ``client`` is a ``distributed.Client`` or a scheduler address (``tcp://host:8786``).
    ``batch_values``: blocks are held back and joined until this many values wait (or a snapshot
    is asked for), since each send costs round trips to the scheduler. The shard states stay on
    the workers (each task takes the future of the previous state), blocks are scattered to the
    cluster, and only the per-draw totals and the pointwise parts come back.
    Every worker needs the same Python environment with chainvigil installed; it needs no access to
    the service's files (the service sends the draws).
    """

    in_place = False  # a task never changes its input (Dask may hold or reuse it)

    def __init__(self, client, batch_values: int = 1 << 22):
        self.batch_values = int(batch_values)
        try:
            import distributed
        except ImportError as err:  # the optional extra
            raise ImportError("a Dask cluster needs the optional extra: pip install 'chainvigil[cluster]'"
                              ) from err
        self._own = not isinstance(client, distributed.Client)
        self.client = distributed.Client(client) if self._own else client

    def map(self, fn: Callable, *arg_lists) -> list:
        # pure=False: the same state and block may legitimately be submitted twice (e.g. after a
        # failed gather); every call is its own task
        return [self.client.submit(fn, *args, pure=False) for args in zip(*arg_lists)]

    def item(self, handles: list, key) -> list:
        return [self.client.submit(operator.getitem, h, key, pure=False) for h in handles]

    def send(self, values: list) -> list:
        return self.client.scatter(list(values), direct=False)  # one round trip for all

    def gather(self, handles: list) -> list:
        return self.client.gather(handles)

    def close(self):
        if self._own:
            self.client.close()


# ----------------------------------------------------------------------------------- the scorer
class ShardedScorer:
    """:class:`.streaming.StreamingScorer`'s API over a state split into observation shards.

    Parameters
    ----------
    n : int, observations.
    shards : int, number of observation blocks (at most n).
    pool : LocalPool, DaskPool or None (a LocalPool of its own, closed by :meth:`close`).
    n_params, point_loglik, reader, expected_draws, initial_k :
        as for :class:`.streaming.StreamingScorer`. ``reader(start, stop)`` runs where the scorer
        is (the service): the draws it returns are sent to the shards when the buffer grows.

    ``add(chain, block)`` and ``scores(r_eff)`` behave as the unsharded scorer's; the attributes
    ``draws``, ``chains``, ``rebuilds``, ``k``, ``n_params``, ``point_loglik`` too.
    """

    def __init__(self, n: int, *, shards: int = 2, pool=None, n_params=None, point_loglik=None,
                 reader: Callable[[int, int], np.ndarray] | None = None,
                 expected_draws: int | None = None, initial_k: int | None = None):
        if not isinstance(n, (int, np.integer)) or n < 1:
            raise ValueError(f"ShardedScorer: n must be a positive integer, got {n!r}")
        if not isinstance(shards, (int, np.integer)) or shards < 1:
            raise ValueError(f"ShardedScorer: shards must be a positive integer, got {shards!r}")
        self.n = int(n)
        self.n_params = n_params
        self.point_loglik = point_loglik
        self.reader = reader
        self.k = initial_buffer_size(initial_k, expected_draws, "ShardedScorer")
        self.reff = StreamingRelativeEfficiency(self.n)
        self.rebuilds = 0
        self.draws = 0
        self._chain_draws: dict[Hashable, int] = {}
        self._totals = RunningMoments(1)
        self._pending: list[list] = []  # per sent block: the shards' totals handles, not yet summed
        self._waiting: list[np.ndarray] = []  # blocks not yet sent (pool.batch_values)
        self._waiting_values = 0
        self._own_pool = pool is None
        self.pool = LocalPool() if pool is None else pool
        self.bounds = shard_bounds(self.n, shards)
        self._states = self.pool.map(shard_new, [b - a for a, b in self.bounds], [self.k] * len(self.bounds))

    @property
    def shards(self) -> int:
        return len(self.bounds)

    @property
    def chains(self) -> int:
        return len(self._chain_draws)

    def chain_draws(self) -> dict:
        return dict(self._chain_draws)

    def close(self):
        """Release the shard states (and the pool when the scorer made it)."""
        self._states = []
        if self._own_pool:
            self.pool.close()

    # ------------------------------------------------------------------------------------------
    def r_eff(self) -> np.ndarray:
        """The streaming relative efficiency (n,) of every block added so far (``reff_stream``)."""
        return self.reff.result()

    def add(self, chain, block) -> None:
        """Add a block (draws, n) of one chain; see :meth:`.streaming.StreamingScorer.add`."""
        x = as_block(block, self.n, "ShardedScorer.add")
        self.reff.update(str(chain), np.asarray(x, dtype=float))  # r_eff streams in the driver
        B = x.shape[0]
        if B == 0:
            return
        self.draws += B
        self._chain_draws[chain] = self._chain_draws.get(chain, 0) + B
        batch = int(getattr(self.pool, "batch_values", 0))
        # a block that waits is copied (the caller may reuse its array); one sent now is not
        self._waiting.append(np.asarray(x, dtype=float) if batch <= 0 else np.array(x, dtype=float))
        self._waiting_values += x.size
        if self._waiting_values >= batch:
            self._send()

    def _send(self):
        """Send the waiting blocks (joined in draw order) to the shards."""
        if not self._waiting:
            return
        x = self._waiting[0] if len(self._waiting) == 1 else np.concatenate(self._waiting, axis=0)
        self._waiting, self._waiting_values = [], 0
        pieces = self.pool.send([x[:, a:b] for a, b in self.bounds])  # views, unless sent away
        in_place = [bool(getattr(self.pool, "in_place", False))] * self.shards
        out = self.pool.map(shard_add, self._states, pieces, in_place)
        self._states = out  # the next task takes the state out of the result itself
        self._pending.append(self.pool.item(out, "totals"))
        if len(self._pending) >= 64:  # bound what waits on the cluster
            self._fold_totals()

    def _fold_totals(self):
        """Add the shards' per-draw totals of each pending block and fold them into the moments."""
        if not self._pending:
            return
        flat = self.pool.gather([h for block in self._pending for h in block])
        K = self.shards
        for i in range(len(self._pending)):
            parts = flat[i * K:(i + 1) * K]
            self._totals.update(np.sum(parts, axis=0))
        self._pending = []

    def _rebuild(self, K_new: int):
        if self.reader is None:
            raise ValueError(
                f"ShardedScorer: the PSIS tail needs {K_new // 2} buffered draws per observation but "
                f"the buffer holds {self.k}; a rebuild source is needed (pass reader=, or size the "
                f"buffer with expected_draws= / initial_k=)"
            )
        S = self.draws
        K_new = min(K_new, S)
        states = []
        for (a, b), state in zip(self.bounds, self._states):  # one shard's draws in memory at a time
            data = np.asarray(self.reader(a, b), dtype=float)
            if data.shape != (S, b - a):
                raise ValueError(
                    f"ShardedScorer: reader({a}, {b}) returned shape {data.shape}, expected {(S, b - a)} "
                    f"(every draw so far of observations {a}:{b})"
                )
            states += self.pool.map(shard_rebuild, [state], self.pool.send([data]), [K_new])
            del data
        self._states = states
        self.k = K_new
        self.rebuilds += 1

    def scores(self, r_eff=None, *, run=None) -> Scores:
        """Scores of every draw so far; equal to ``StreamingScorer.scores`` on the same blocks."""
        S, n = self.draws, self.n
        if S < 2:
            raise ValueError(f"ShardedScorer.scores: need at least 2 draws, have {S}")
        r = _r_eff_vector(r_eff, n)
        M = np.broadcast_to(tail_length(S, r), (n,))
        need = int(M.max()) + 1
        self._send()
        if need > self.k and S > self.k:
            self._rebuild(2 * need)
        self._fold_totals()
        in_place = [bool(getattr(self.pool, "in_place", False))] * self.shards
        out = self.pool.map(shard_score, self._states, [r[a:b].copy() for a, b in self.bounds], in_place)
        self._states = out  # the next task takes the state (with its refreshed cache) out of it
        pieces = self.pool.gather(self.pool.item(out, "parts"))
        parts = {key: np.concatenate([p[key] for p in pieces]) for key in pieces[0]}
        totals = (float(self._totals.mean[0]), float(self._totals.m2[0]), float(self._totals.max[0]))
        return scores_from_parts(parts, S, int(M.min()), totals, n_params=self.n_params,
                                 point_loglik=self.point_loglik, r_eff=r, chains=self.chains, run=run)
