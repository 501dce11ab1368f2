"""Streaming predictive scores: WAIC, PSIS-LOO, DIC and AIC kept up to date as draws arrive.

:class:`StreamingScorer` accumulates blocks of draws (draws x n) from any number of chains, in any
order, and returns the same :class:`.scores.Scores` as :func:`.scores.batch_scores` on the same draws
with the same r_eff, to rounding (the tests hold it to 1e-9 relative).

State per observation i (n observations): three small mergeable states (``update`` / ``merge`` /
``result`` / ``to_state``), composed here; :meth:`StreamingScorer.merge` merges two scorers of
disjoint draws part by part.

* WAIC (Watanabe 2010; Gelman, Hwang & Vehtari 2014): :class:`.running.RunningLogSumExp` of ll_si
  (max m_i and sum_s exp(ll_si - m_i), rescaled when the max grows) and
  :class:`.running.RunningMoments` (mean / sum of squared deviations), merged block by block with
  the pairwise update of Chan, Golub & LeVeque (1983), "Algorithms for computing the sample
  variance", The American Statistician 37(3) (Welford's update for a block of one).
* DIC / AIC: a :class:`.running.RunningMoments` of the totals T_s = sum_i ll_si of each draw (and
  max_s T_s).
* PSIS-LOO (Vehtari, Gelman & Gabry 2017; PSIS of Vehtari et al. 2024):
  :class:`.tail_buffer.TailBuffer`, a buffer (capacity 2K) that always holds the K smallest
  log-likelihoods (K >= M + 1, M the PSIS tail length) and, for every draw that has left it (the
  *body*), the count and the sums exp(-ll - c_i), exp(-2 ll - 2 c_i), with the shift c_i = -t_i,
  t_i the buffer's K-th smallest value at its last compaction, so every term is <= 1. Invariant:
  every body draw is >= at least K buffer draws (so the M + 1 smallest are always in the buffer).
  Draws of a block that are >= t_i go straight to the body sums (for them exp(t_i - ll) =
  exp(t_i - m) / exp(ll - m) reuses the WAIC exponentials, passed to the buffer as a hint); only
  the others (about B K / S of a block of B once S >> K) are found sparsely (a 1-D nonzero of the
  transposed mask) and scattered into the buffer rows; when a row of an observation chunk would
  overflow, the chunk's rows are compacted in place by a partition back to their K smallest,
  ejecting the rest to the body.

Cost and memory: :meth:`StreamingScorer.add` works on the block in chunks of observations with two
reused work arrays (about ``_ADD_ELEMENTS`` values each), so its temporaries are cache-sized and do
not grow with n; compaction, scoring and rebuilding also work in bounded observation blocks. The
state is the buffer, n x 2K float64 (2/3 of 3 n K 8 bytes), plus O(n) accumulators; the benchmark
(bench/streaming_scores.py) and a test hold the traced peak of add and scores below 3 n K 8 bytes.

:meth:`StreamingScorer.scores` is incremental (:mod:`.tail_buffer`, docs/numerics.md): the tail
buffer caches each observation's last tail evaluation and keeps the sums over the draws outside the
tail current at add time, so only observations with a new draw below their cutoff or a changed
tail length M_i are refitted (sort, GPD fit); the others are finished in O(1) with
:func:`.loo.loo_from_summaries`, the same code the batch path ends in. ``incremental=False``
refits every tail. When M + 1 outgrows K (more draws, smaller r_eff) the buffer is rebuilt from
every draw so far through ``reader(start, stop)``, in blocks of observations, with K set to
2 (M + 1) so rebuilds are rare (amortised linear cost). The old buffer is released before the new
one is built; if the reader fails, the tail state is marked stale, later blocks update only the
WAIC / DIC accumulators, and the next scores() rebuilds.

Bad input: NaN / +inf values mark the observation bad (its values are replaced by 0 in the state, the
results are NaN as in the batch path); -inf values are kept (k-hat +inf, elpd -inf). See
:mod:`.loo` for the conventions.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable

import numpy as np

from .information import aic_from_max, dic_from_moments
from .loo import _r_eff_vector, finish_loo
from .psis import MIN_TAIL, tail_length
from .running import RunningLogSumExp, RunningMoments
from .scores import Scores, assemble
from .tail_buffer import TailBuffer
from .waic import waic_from_moments

__all__ = ["StreamingScorer", "scores_from_parts", "STATE_FORMAT"]

DEFAULT_K = 512
_ADD_ELEMENTS = 1 << 17  # block values per observation chunk in add()
#: Version of :meth:`StreamingScorer.to_state`: 2 since the parts keep their own states
#: (``lse_*``, ``moments_*``, ``tail_*``; the tail cache of incremental scoring).
STATE_FORMAT = 2


def initial_buffer_size(initial_k, expected_draws, who: str) -> int:
    """The tail buffer's first size K (values kept per observation): ``initial_k`` when given, else
    room for twice the PSIS tail of ``expected_draws`` (M + 1 values, r_eff = 1), else DEFAULT_K."""
    if initial_k is not None:
        K = int(initial_k)
    elif expected_draws is not None:
        K = 2 * (int(tail_length(int(expected_draws), 1.0)[0]) + 1)
    else:
        K = DEFAULT_K
    if K < 2:
        raise ValueError(f"{who}: buffer size must be >= 2, got {K}")
    return K


def mask_bad_columns(xc: np.ndarray):
    """``(xc, colmax, bad)`` for a block (B, k): ``bad`` marks columns holding NaN or +inf; those
    columns are zeroed (in a copy, the caller's array is never written) and their maximum set to 0,
    so the running sums stay finite while the observation is flagged."""
    colmax = xc.max(axis=0)
    bad = ~(colmax < np.inf)
    if bad.any():
        xc = xc.copy()
        xc[:, bad] = 0.0
        colmax[bad] = 0.0
    return xc, colmax, bad


def as_block(block, n: int, who: str) -> np.ndarray:
    """``block`` as a numeric (draws, n) array (a 1-D array of n values is one draw); ValueError
    naming ``who`` otherwise."""
    x = np.asarray(block)
    if x.ndim == 1 and n == x.size:
        x = x[None, :]
    if x.ndim != 2 or x.shape[1] != n:
        raise ValueError(f"{who}: block must be (draws, {n}), got shape {x.shape}")
    if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
        raise ValueError(f"{who}: block must be numeric, got dtype {x.dtype}")
    return x


class StreamingScorer:
    """Accumulate draws block by block and score them at any time.

    Parameters
    ----------
    n : int
        Number of observations (columns of every block).
    n_params : int, optional
        Number of parameters, AIC's penalty (None: no AIC).
    point_loglik : float, optional
        Maximised / point-estimate log-likelihood for AIC and DIC.
    reader : callable(start, stop) -> ndarray (total_draws, stop - start), optional
        Returns every draw so far of observations start:stop (any draw order); used only to rebuild
        the tail buffer when it is too small. Without it, :meth:`scores` raises ValueError when the
        buffer is too small.
    expected_draws : int, optional
        Total draws expected; sizes the buffer K = 2 (M + 1) with M the tail length at that size and
        r_eff = 1 (this also covers r_eff down to about 0.25). Default K = 512.
    initial_k : int, optional
        Explicit initial buffer size (overrides ``expected_draws``).

    Attributes
    ----------
    draws : int (all chains), chains : int, rebuilds : int, k : int (buffer size),
    refits : int (observations whose PSIS tail the last :meth:`scores` evaluated in full)

    The state is three small mergeable states per observation (:class:`.running.RunningLogSumExp`,
    :class:`.running.RunningMoments`, :class:`.tail_buffer.TailBuffer`), the bad-observation flags
    and the :class:`.running.RunningMoments` of the draw totals; :meth:`merge` folds in a scorer of
    other draws of the same observations.
    """

    def __init__(self, n: int, *, n_params=None, point_loglik=None,
                 reader: Callable[[int, int], np.ndarray] | None = None,
                 expected_draws: int | None = None, initial_k: int | None = None,
                 tail_lag: float = 0.0):
        if not isinstance(n, (int, np.integer)) or n < 1:
            raise ValueError(f"StreamingScorer: n must be a positive integer, got {n!r}")
        self.n = int(n)
        self.n_params = n_params
        self.point_loglik = point_loglik
        self.reader = reader
        k = initial_buffer_size(initial_k, expected_draws, "StreamingScorer")
        self.rebuilds = 0
        self._chain_draws: dict[Hashable, int] = {}
        self.draws = 0
        n = self.n
        self._lse = RunningLogSumExp(n)  # WAIC: log sum_s exp ll_si
        self._moments = RunningMoments(n)  # WAIC: mean / M2 of ll_si
        self._bad = np.zeros(n, dtype=bool)  # NaN / +inf seen
        self._totals = RunningMoments(1)  # DIC / AIC: the draw totals T_s = sum_i ll_si
        self._tail = TailBuffer(n, k)  # PSIS-LOO
        self.tail_lag = tail_lag

    # ------------------------------------------------------------------------------------------
    @property
    def k(self) -> int:
        return self._tail.k

    @property
    def refits(self) -> int:
        return self._tail.refits

    @property
    def lagged_rows(self) -> int:
        """Observations the last :meth:`scores` served from a cached tail fit their tail has moved
        past (within :attr:`tail_lag`): 0 means the batch numbers to rounding."""
        return self._tail.lagged

    @property
    def tail_lag(self) -> float:
        """How stale a cached PSIS tail fit may be and still serve :meth:`scores` (a fraction of its
        tail length; 0, the default, refits every changed tail: the batch numbers to rounding).
        Not part of the saved state: the owner sets it (``chainvigil.estimators.tail_buffer``)."""
        return self._tail.lag

    @tail_lag.setter
    def tail_lag(self, value: float) -> None:
        value = float(value)
        if not 0.0 <= value < 1.0:
            raise ValueError(f"tail lag must be in [0, 1), got {value}")
        self._tail.lag = value

    @property
    def refit_work(self) -> float:
        """The last :meth:`scores`' tail-fit work: sum over the refitted observations of
        M_i (30 + floor(sqrt(M_i))) (``chainvigil.estimators.tail_buffer``)."""
        return self._tail.refit_work

    @property
    def chains(self) -> int:
        return len(self._chain_draws)

    def chain_draws(self) -> dict:
        """Draws received per chain."""
        return dict(self._chain_draws)

    def state_nbytes(self) -> int:
        """Bytes held by the accumulated state (arrays only)."""
        own = (self._lse.m, self._lse.s, self._moments.mean, self._moments.m2, self._moments.max, self._bad)
        return int(sum(a.nbytes for a in own) + self._tail.nbytes())

    # ------------------------------------------------------------------------------------------
    def to_state(self, copy: bool = True) -> dict:
        """The whole state as plain arrays: a dict of numpy arrays and 0-d scalars (no objects).

        ``copy=False`` hands over the scorer's own arrays (for a caller that drops the scorer).

        ``numpy.savez(path, **scorer.to_state())`` writes it; ``StreamingScorer.from_state(
        dict(numpy.load(path, allow_pickle=False)), reader=...)`` restores it, and further
        :meth:`add` calls then give the same results as the uninterrupted scorer.  Chain
        identifiers are stored as strings.  The ``reader`` is not part of the state.  Keys:
        ``lse_*``, ``moments_*``, ``totals_*``, ``tail_*`` (the parts' own states), ``bad`` and the
        scalars; ``format`` is :data:`STATE_FORMAT`.
        """
        names = list(self._chain_draws)
        state = {
            "format": np.asarray(STATE_FORMAT, dtype=np.int64),
            "n": np.asarray(self.n, dtype=np.int64),
            "draws": np.asarray(self.draws, dtype=np.int64),
            "rebuilds": np.asarray(self.rebuilds, dtype=np.int64),
            "bad": self._bad.copy() if copy else self._bad,
            "n_params": np.asarray(np.nan if self.n_params is None else float(self.n_params)),
            "point_loglik": np.asarray(np.nan if self.point_loglik is None else float(self.point_loglik)),
            "chain_names": np.asarray([str(c) for c in names], dtype=np.str_),
            "chain_counts": np.asarray([self._chain_draws[c] for c in names], dtype=np.int64),
        }
        for prefix, part in (("lse", self._lse), ("moments", self._moments), ("totals", self._totals)):
            state.update({f"{prefix}_{key}": value for key, value in part.to_state().items()})
        state.update({f"tail_{key}": value for key, value in self._tail.to_state(copy=copy).items()})
        return state

    @classmethod
    def from_state(cls, state: dict, *, reader: Callable[[int, int], np.ndarray] | None = None,
                   copy: bool = True):
        """A scorer restored from :meth:`to_state` (arrays as saved, or as loaded from an npz).

        ``copy=False`` works on the given arrays (float64 / bool / int64 as saved) instead of copies,
        for a caller that drops ``state`` afterwards.  A state of another format raises
        ValueError (format 1, before the parts had their own states, cannot be converted: the
        caller re-streams the draws).
        """
        fmt = int(state["format"]) if "format" in state else -1
        if fmt != STATE_FORMAT:
            raise ValueError(f"StreamingScorer.from_state: state format {fmt} is not the current format "
                             f"{STATE_FORMAT}; the draws must be streamed again")

        def part(prefix):
            return {key[len(prefix) + 1:]: value for key, value in state.items() if key.startswith(prefix + "_")}

        n_params = float(state["n_params"])
        point = float(state["point_loglik"])
        out = cls(int(state["n"]), n_params=None if math.isnan(n_params) else int(n_params),
                  point_loglik=None if math.isnan(point) else point, reader=reader, initial_k=2)
        out.draws = int(state["draws"])
        out.rebuilds = int(state["rebuilds"])
        out._bad = np.array(state["bad"], dtype=bool) if copy else np.asarray(state["bad"])
        out._chain_draws = {str(c): int(v) for c, v in zip(state["chain_names"], state["chain_counts"])}
        out._lse = RunningLogSumExp.from_state(part("lse"))
        out._moments = RunningMoments.from_state(part("moments"))
        out._totals = RunningMoments.from_state(part("totals"))
        out._tail = TailBuffer.from_state(part("tail"), copy=copy)
        if out._tail.n != out.n or out._lse.m.shape != (out.n,):
            raise ValueError(f"StreamingScorer.from_state: parts do not have n={out.n} observations")
        return out

    def merge(self, other: "StreamingScorer") -> "StreamingScorer":
        """Fold ``other`` (a scorer of other draws of the same observations, e.g. other chains) into
        this one: the result scores the union of both scorers' draws.  Each part merges on its own
        (:meth:`.running.RunningLogSumExp.merge`, :meth:`.running.RunningMoments.merge`,
        :meth:`.tail_buffer.TailBuffer.merge`); chain counts add up.
        """
        if other.n != self.n:
            raise ValueError(f"StreamingScorer.merge: n differs ({self.n} vs {other.n})")
        self._lse.merge(other._lse)
        self._moments.merge(other._moments)
        self._totals.merge(other._totals)
        self._tail.merge(other._tail)
        self._bad |= other._bad
        for chain, count in other._chain_draws.items():
            self._chain_draws[chain] = self._chain_draws.get(chain, 0) + count
        self.draws += other.draws
        return self

    # ------------------------------------------------------------------------------------------
    def add(self, chain, block) -> None:
        """Add a block of draws of one chain.

        Parameters
        ----------
        chain : hashable, the chain's identifier.
        block : array_like, shape (draws, n), log p(y_i | theta_s) for the new draws.

        Raises
        ------
        ValueError when the block is not 2-D with n columns or not numeric.

        Notes
        -----
        The block is processed in chunks of observations (about ``_ADD_ELEMENTS`` values each) with
        two reused work arrays, so the temporaries stay cache-sized whatever n is; the caller's
        array is never written to.
        """
        x = as_block(block, self.n, "StreamingScorer.add")
        T = self.accumulate(x)
        if T.size == 0:
            return
        # --- DIC / AIC on the draw totals T_s = sum_i ll_si
        self._totals.update(T)
        self._chain_draws[chain] = self._chain_draws.get(chain, 0) + T.size

    def accumulate(self, block) -> np.ndarray:
        """Fold a validated (draws, n) block into the per-observation state; return its draw totals.

        Everything :meth:`add` does except the per-draw totals (DIC / AIC) and the chain counts:
        returns T_s = sum_i ll_si of the block (shape (draws,), bad observations counted as 0) so
        that a caller holding only some observations (a shard, :mod:`.sharded`) can add the totals
        of all shards before they enter the DIC moments.
        """
        x = np.asarray(block, dtype=float)
        B = x.shape[0]
        if B == 0:
            return np.zeros(0)
        n = self.n
        step = max(1, min(n, _ADD_ELEMENTS // B))
        work_w = np.empty(B * step)
        work_e = np.empty(B * step)
        T = np.zeros(B)
        # the block's summaries per observation, folded into the running states at the end
        summary = {key: np.empty(n) for key in ("m", "s", "mean", "m2", "max")}
        for a in range(0, n, step):
            b = min(n, a + step)
            w = work_w[: B * (b - a)].reshape(B, b - a)
            e = work_e[: B * (b - a)].reshape(B, b - a)
            self._add_columns(x[:, a:b], a, b, w, e, T, summary)
        self._lse.merge_summary(summary["m"], summary["s"])
        self._moments.merge_summary(B, summary["mean"], summary["m2"], summary["max"])
        self._tail.draws += B
        self.draws += B
        return T

    def _add_columns(self, xc, a, b, w, e, T, summary):
        """Accumulate observations a:b of a block (xc: (B, b - a)); w, e: work arrays of that shape."""
        B = xc.shape[0]
        xc, colmax, badc = mask_bad_columns(xc)
        self._bad[a:b] |= badc
        T += xc.sum(axis=1)
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            # --- WAIC: log-sum-exp at the new running max; w = exp(max(ll - m, -700)): the clamp
            # changes terms below e^-700 of the column's largest (which contributes 1), i.e.
            # nothing, and keeps w > 0 so that the tail buffer can reuse it for its body sums.
            m_new = np.maximum(self._lse.m[a:b], colmax)
            ms = np.where(np.isfinite(m_new), m_new, 0.0)
            np.subtract(xc, ms, out=w)
            np.maximum(w, -700.0, out=w)
            np.exp(w, out=w)
            summary["m"][a:b] = ms
            summary["s"][a:b] = w.sum(axis=0)
            # --- WAIC: the block's mean / M2 (merged by Chan et al. 1983 in accumulate)
            bmean = xc.sum(axis=0) / B
            np.subtract(xc, bmean, out=e)
            summary["mean"][a:b] = bmean
            summary["m2"][a:b] = np.einsum("ij,ij->j", e, e)
            summary["max"][a:b] = colmax
        # --- PSIS-LOO (reuses w; e is free again)
        self._tail.update_columns(xc, a, b, e, ms, w)

    # ------------------------------------------------------------------------------------------
    def _rebuild(self, K_new: int) -> None:
        """Rebuild the buffer (size K_new) and the body sums from every draw so far via the reader."""
        if self.reader is None:
            raise ValueError(
                f"StreamingScorer: the PSIS tail needs {K_new // 2} buffered draws per observation but "
                f"the buffer holds {self.k}; a rebuild source is needed (pass reader=, or size the "
                f"buffer with expected_draws= / initial_k=)"
            )
        self._tail.rebuild(K_new, self.reader, self._bad, who="StreamingScorer")
        self.rebuilds += 1

    def scores(self, r_eff=None, *, run=None, incremental: bool = True) -> Scores:
        """Scores of every draw added so far.

        Parameters
        ----------
        r_eff : float or array_like (n,), optional (default 1.0)
            Relative efficiency per observation (the service computes it from the store).
        run : str, optional
        incremental : bool
            True (default): only observations whose PSIS tail changed since the last call are
            evaluated in full (:mod:`.tail_buffer`); False: every one (the same numbers, to rounding).

        Returns
        -------
        Scores, equal to ``batch_scores`` on the same draws with the same r_eff (to rounding).
        ``mixing`` and ``verdict`` are None.
        """
        S, n = self.draws, self.n
        if S < 2:
            raise ValueError(f"StreamingScorer.scores: need at least 2 draws, have {S}")
        r = _r_eff_vector(r_eff, n)
        M = np.broadcast_to(tail_length(S, r), (n,))
        need = int(M.max()) + 1
        if not self._tail.ok:  # an earlier rebuild failed: the reader is the only source
            self._rebuild(max(2 * need, self.k))
        elif need > self.k and S > self.k:
            self._rebuild(2 * need)
        parts = self.pointwise_parts(r, incremental=incremental)
        t_mean, t_m2, t_max = (float(self._totals.mean[0]), float(self._totals.m2[0]),
                               float(self._totals.max[0]))
        return scores_from_parts(parts, S, int(M.min()), (t_mean, t_m2, t_max), n_params=self.n_params,
                                 point_loglik=self.point_loglik, r_eff=r, chains=self.chains, run=run)

    def pointwise_parts(self, r, *, incremental: bool = False) -> dict:
        """Per-observation results of the state: what :func:`scores_from_parts` totals.

        Parameters
        ----------
        r : ndarray (n,), the relative efficiencies. The buffer must already hold the
            max_i M_i + 1 smallest draws of every observation (:meth:`scores` rebuilds first).
        incremental : bool
            False (default): every observation's tail is evaluated and the state is only read
            (shards call it on a state they do not own); True: the tail cache is used and updated.

        Returns
        -------
        dict of (n,) arrays: ``elpd``, ``mcse``, ``k`` (PSIS-LOO), ``zero`` (a -inf draw), ``lse``
        (log sum_s exp ll_si), ``m2`` (sum of squared deviations), ``bad`` (NaN / +inf seen).
        Observation blocks are independent: the parts of disjoint observation ranges concatenate.
        """
        loo = self._tail.result(np.asarray(r, dtype=float), incremental=incremental)
        return {"elpd": loo["elpd"], "mcse": loo["mcse"], "k": loo["k"], "zero": loo["zero"],
                "lse": self._lse.result(), "m2": self._moments.m2.copy(), "bad": self._bad.copy()}


def scores_from_parts(parts: dict, S: int, min_tail: int, totals: tuple, *, n_params, point_loglik,
                      r_eff, chains: int, run=None) -> Scores:
    """:class:`Scores` from per-observation parts (:meth:`StreamingScorer.pointwise_parts`).

    ``parts`` may be the concatenation of the parts of disjoint observation ranges (in order);
    ``min_tail`` is min_i M_i over every observation; ``totals`` is (mean, M2, max) of the draw
    totals T_s = sum_i ll_si. Totals, SE, p_eff, WAIC, DIC and AIC are formed here, so a sharded
    state gives the same numbers as one scorer (:mod:`.sharded`).
    """
    bad, zero = parts["bad"], parts["zero"]
    lppd = parts["lse"] - np.log(S)
    loo = finish_loo(parts["elpd"], parts["mcse"], parts["k"], lppd, bad, zero, S, min_tail < MIN_TAIL)
    w = waic_from_moments(parts["lse"], S, parts["m2"], bad, zero)
    any_bad, any_zero = bool(bad.any()), bool((zero & ~bad).any())
    t_mean, t_m2, t_max = totals
    dic = dic_from_moments(t_mean, t_m2, S, point_loglik, any_bad, any_zero)
    aic = aic_from_max(t_max, n_params, point_loglik, any_bad)
    return assemble(loo, w, dic, aic, r_eff, chains=chains, run=run)
