"""Streaming predictive scores: WAIC, PSIS-LOO, DIC and AIC kept up to date as draws arrive.

:class:`StreamingScorer` accumulates blocks of draws (draws x n) from any number of chains, in any
order, and returns the same :class:`.scores.Scores` as :func:`.scores.batch_scores` on the same draws
with the same r_eff, to rounding (the tests hold it to 1e-9 relative).

State per observation i (n observations):

* WAIC (Watanabe 2010; Gelman, Hwang & Vehtari 2014): a running log-sum-exp of ll_si (max m_i and
  sum_s exp(ll_si - m_i), rescaled when the max grows) and the running mean / sum of squared
  deviations, merged block by block with the pairwise update of Chan, Golub & LeVeque (1983),
  "Algorithms for computing the sample variance", The American Statistician 37(3)
  (Welford's update for a block of one).
* DIC / AIC: the same mean / M2 merge for the total T_s = sum_i ll_si of each draw, and max_s T_s.
* PSIS-LOO (Vehtari, Gelman & Gabry 2017; PSIS of Vehtari et al. 2024): a buffer (capacity 2K) that
  always holds the K smallest log-likelihoods (K >= M + 1, M the PSIS tail length) and, for every
  draw that has left it (the *body*), the count and the sums exp(-ll - c_i), exp(-2 ll - 2 c_i), with
  the shift c_i = -t_i, t_i the buffer's K-th smallest value at its last compaction, so every term is
  <= 1. Invariant: every body draw is >= at least K buffer draws (so the M + 1 smallest are always
  in the buffer). Draws of a block that are >= t_i go straight to the body sums (for them
  exp(t_i - ll) = exp(t_i - m) / exp(ll - m) reuses the WAIC exponentials); only the others (about
  B K / S of a block of B once S >> K) are found sparsely (a 1-D nonzero of the transposed
  mask) and scattered into the buffer rows; when a row of an observation chunk would overflow,
  the chunk's rows are compacted in place by a partition back to their K smallest, ejecting the
  rest to the body.

Cost and memory: :meth:`StreamingScorer.add` works on the block in chunks of observations with two
reused work arrays (about ``_ADD_ELEMENTS`` values each), so its temporaries are cache-sized and do
not grow with n; compaction, scoring and rebuilding also work in bounded observation blocks. The
state is the buffer, n x 2K float64 (2/3 of 3 n K 8 bytes), plus O(n) accumulators; the benchmark
(bench/streaming_scores.py) and a test hold the traced peak of add and scores below 3 n K 8 bytes.

:meth:`StreamingScorer.scores` sorts the buffer, fits the tails and combines them with the body sums
(:func:`.loo.loo_from_parts`, the same code the batch path uses). When M + 1 outgrows K (more draws,
smaller r_eff) the buffer is rebuilt from every draw so far through ``reader(start, stop)``, in blocks
of observations, with K set to 2 (M + 1) so rebuilds are rare (amortised linear cost). The old
buffer is released before the new one is built; if the reader fails, the tail state is marked
stale, later blocks update only the WAIC / DIC accumulators, and the next scores() rebuilds.

Bad input: NaN / +inf values mark the observation bad (its values are replaced by 0 in the state, the
results are NaN as in the batch path); -inf values are kept (k-hat +inf, elpd -inf). See
:mod:`.loo` for the conventions.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable

import numpy as np

from ._blocks import for_each_block
from .information import aic_from_max, dic_from_moments
from .loo import _col_blocks, _r_eff_vector, finish_loo, loo_from_parts
from .psis import MIN_TAIL, tail_length
from .running import RunningMoments
from .scores import Scores, assemble
from .waic import waic_from_moments

__all__ = ["StreamingScorer", "scores_from_parts"]

DEFAULT_K = 512
_COMPACT_ELEMENTS = 1 << 18  # buffer values per block when compacting buffer rows
_ADD_ELEMENTS = 1 << 17  # block values per observation chunk in add()
_SCORE_ELEMENTS = 1 << 17  # buffer values per observation block in scores()



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
    draws : int (all chains), chains : int, rebuilds : int, k : int (buffer size)
    """

    def __init__(self, n: int, *, n_params=None, point_loglik=None,
                 reader: Callable[[int, int], np.ndarray] | None = None,
                 expected_draws: int | None = None, initial_k: int | None = None):
        if not isinstance(n, (int, np.integer)) or n < 1:
            raise ValueError(f"StreamingScorer: n must be a positive integer, got {n!r}")
        self.n = int(n)
        self.n_params = n_params
        self.point_loglik = point_loglik
        self.reader = reader
        self.k = initial_buffer_size(initial_k, expected_draws, "StreamingScorer")
        self.rebuilds = 0
        self._tail_ok = True  # False after a failed rebuild (see _rebuild)
        self._chain_draws: dict[Hashable, int] = {}
        self.draws = 0
        n = self.n
        # WAIC
        self._lse_m = np.full(n, -np.inf)
        self._lse_s = np.zeros(n)
        self._mean = np.zeros(n)
        self._m2 = np.zeros(n)
        self._bad = np.zeros(n, dtype=bool)
        # DIC / AIC: moments and maximum of the draw totals T_s = sum_i ll_si
        self._totals = RunningMoments(1)
        # PSIS-LOO
        self._buf = np.full((n, 2 * self.k), np.inf)  # capacity 2K: appended to, compacted to K when full
        self._fill = np.zeros(n, dtype=np.int64)
        self._thr = np.full(n, np.inf)
        self._bcount = np.zeros(n)
        self._bshift = np.zeros(n)
        self._s1 = np.zeros(n)
        self._s2 = np.zeros(n)

    # ------------------------------------------------------------------------------------------
    @property
    def chains(self) -> int:
        return len(self._chain_draws)

    def chain_draws(self) -> dict:
        """Draws received per chain."""
        return dict(self._chain_draws)

    def state_nbytes(self) -> int:
        """Bytes held by the accumulated state (arrays only)."""
        arrs = (self._lse_m, self._lse_s, self._mean, self._m2, self._bad, self._buf, self._fill, self._thr,
                self._bcount, self._bshift, self._s1, self._s2)
        return int(sum(a.nbytes for a in arrs if a is not None))

    # ------------------------------------------------------------------------------------------
    _ARRAYS = ("_lse_m", "_lse_s", "_mean", "_m2", "_bad", "_fill", "_thr", "_bcount", "_bshift",
               "_s1", "_s2")

    def to_state(self, copy: bool = True) -> dict:
        """The whole state as plain arrays: a dict of numpy arrays and 0-d scalars (no objects).

        ``copy=False`` hands over the scorer's own arrays (for a caller that drops the scorer).

        ``numpy.savez(path, **scorer.to_state())`` writes it; ``StreamingScorer.from_state(
        dict(numpy.load(path, allow_pickle=False)), reader=...)`` restores it, and further
        :meth:`add` calls then give the same results as the uninterrupted scorer.  Chain
        identifiers are stored as strings.  The ``reader`` is not part of the state.
        """
        names = list(self._chain_draws)
        own = (lambda a: a.copy()) if copy else (lambda a: a)
        state = {name.lstrip("_"): own(getattr(self, name)) for name in self._ARRAYS}
        state.update({
            "format": np.asarray(1, dtype=np.int64),
            "n": np.asarray(self.n, dtype=np.int64),
            "k": np.asarray(self.k, dtype=np.int64),
            "draws": np.asarray(self.draws, dtype=np.int64),
            "rebuilds": np.asarray(self.rebuilds, dtype=np.int64),
            "tail_ok": np.asarray(bool(self._tail_ok)),
            "has_buffer": np.asarray(self._buf is not None),
            "buffer": own(self._buf) if self._buf is not None else np.empty((0, 0)),
            "n_params": np.asarray(np.nan if self.n_params is None else float(self.n_params)),
            "point_loglik": np.asarray(np.nan if self.point_loglik is None else float(self.point_loglik)),
            "chain_names": np.asarray([str(c) for c in names], dtype=np.str_),
            "chain_counts": np.asarray([self._chain_draws[c] for c in names], dtype=np.int64),
        })
        state.update({f"totals_{key}": value for key, value in self._totals.to_state().items()})
        return state

    @classmethod
    def from_state(cls, state: dict, *, reader: Callable[[int, int], np.ndarray] | None = None,
                   copy: bool = True):
        """A scorer restored from :meth:`to_state` (arrays as saved, or as loaded from an npz).

        ``copy=False`` works on the given arrays (float64 / bool / int64 as saved) instead of copies,
        for a caller that drops ``state`` afterwards.
        """
        own = np.array if copy else np.asarray
        if int(state["format"]) != 1:
            raise ValueError(f"StreamingScorer.from_state: unknown state format {int(state['format'])}")
        n_params = float(state["n_params"])
        point = float(state["point_loglik"])
        out = cls(int(state["n"]), n_params=None if math.isnan(n_params) else int(n_params),
                  point_loglik=None if math.isnan(point) else point, reader=reader, initial_k=2)
        out.k = int(state["k"])
        out.draws = int(state["draws"])
        out.rebuilds = int(state["rebuilds"])
        out._tail_ok = bool(state["tail_ok"])
        for name in cls._ARRAYS:
            setattr(out, name, own(state[name.lstrip("_")]))
        out._buf = own(state["buffer"], dtype=float) if bool(state["has_buffer"]) else None
        out._chain_draws = {str(c): int(v) for c, v in zip(state["chain_names"], state["chain_counts"])}
        out._totals = RunningMoments.from_state({key[len("totals_"):]: value for key, value in state.items()
                                                 if key.startswith("totals_")})
        return out

    # ------------------------------------------------------------------------------------------
    def _body_rescale(self, cols, new_shift):
        """Move the body sums of ``cols`` to a larger shift (never smaller)."""
        old = self._bshift[cols]
        with np.errstate(invalid="ignore", over="ignore"):
            f = np.exp(old - new_shift)
        f = np.where(self._bcount[cols] > 0, f, 0.0)
        self._s1[cols] *= f
        self._s2[cols] *= f * f
        self._bshift[cols] = new_shift

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
        na = self.draws
        tot = na + B
        step = max(1, min(n, _ADD_ELEMENTS // B))
        work_w = np.empty(B * step)
        work_e = np.empty(B * step)
        T = np.zeros(B)
        for a in range(0, n, step):
            b = min(n, a + step)
            w = work_w[: B * (b - a)].reshape(B, b - a)
            e = work_e[: B * (b - a)].reshape(B, b - a)
            self._add_columns(x[:, a:b], a, b, na, tot, w, e, T)
        self.draws = tot
        return T

    def _add_columns(self, xc, a, b, na, tot, w, e, T):
        """Accumulate observations a:b of a block (xc: (B, b - a)); w, e: work arrays of that shape."""
        B = xc.shape[0]
        xc, colmax, badc = mask_bad_columns(xc)
        self._bad[a:b] |= badc
        T += xc.sum(axis=1)
        thr = self._thr[a:b]
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            # --- WAIC: running log-sum-exp; w = exp(max(ll - m, -700)): the clamp changes terms
            # below e^-700 of the column's largest (which contributes 1), i.e. nothing, and keeps
            # w > 0 so that it can be reused for the body sums below.
            lm = self._lse_m[a:b]
            m_new = np.maximum(lm, colmax)
            ms = np.where(np.isfinite(m_new), m_new, 0.0)
            np.subtract(xc, ms, out=w)
            np.maximum(w, -700.0, out=w)
            np.exp(w, out=w)
            self._lse_s[a:b] = self._lse_s[a:b] * np.exp(lm - ms) + w.sum(axis=0)
            self._lse_m[a:b] = ms
            # --- WAIC: mean / M2 (Chan et al. 1983)
            bmean = xc.sum(axis=0) / B
            np.subtract(xc, bmean, out=e)
            bm2 = np.einsum("ij,ij->j", e, e)
            delta = bmean - self._mean[a:b]
            self._mean[a:b] = self._mean[a:b] + delta * (B / tot)
            self._m2[a:b] = self._m2[a:b] + bm2 + delta * delta * (na * B / tot)
            # --- PSIS-LOO
            if not self._tail_ok:  # stale after a failed rebuild: scores() rebuilds from the reader
                return
            if not np.any(thr < np.inf):  # buffer not full yet: every draw enters it
                fill = self._fill[a:b]
                f0 = int(fill[0])
                if np.all(fill == f0):
                    cap = self._buf.shape[1]
                    if f0 + B > cap and f0 > self.k and B <= cap - self.k:
                        self._compact_rows(a, b)  # first compaction: every row to K
                        f0 = self.k
                    if f0 + B <= cap:
                        self._buf[a:b, f0:f0 + B] = xc.T
                        fill += B
                        return
                cand = np.ones(xc.shape, dtype=bool)
            else:
                cand = np.less(xc, thr)
            # candidates, grouped by observation (draw order inside); a 1-D flatnonzero of the
            # transposed mask is several times faster than a 2-D nonzero
            ct = np.ascontiguousarray(cand.T)
            flat = np.flatnonzero(ct)
            cnt = np.count_nonzero(ct, axis=1)
            ci = np.repeat(np.arange(b - a), cnt)
            ri = flat - ci * B
            direct = B - cnt
            fin = np.isfinite(thr)
            if np.any(fin & (direct > 0)):
                # draws >= the column's threshold go straight to the body sums (shift -thr):
                # exp(thr - ll) = exp(thr - m) / w (ll >= thr, so w >= e^-690 is exact)
                self._body_rescale(slice(a, b), np.where(fin, -thr, self._bshift[a:b]))
                tshift = np.where(fin, thr - ms, 0.0)
                if np.all(tshift > -690.0):
                    np.divide(np.exp(tshift), w, out=e)
                else:  # a column spans more than 690 nats: direct exponentials
                    np.subtract(np.where(fin, thr, 0.0), xc, out=e)
                    np.minimum(e, 0.0, out=e)
                    np.exp(e, out=e)
                e[ri, ci] = 0.0  # candidates contribute nothing here
                if not fin.all():
                    e[:, ~fin] = 0.0
                self._s1[a:b] += e.sum(axis=0)
                self._s2[a:b] += np.einsum("ij,ij->j", e, e)
                self._bcount[a:b] += np.where(fin, direct, 0)
        if ci.size:
            self._append(xc, a, b, ri, ci, cnt)

    def _append(self, xc, a, b, ri, ci, cnt):
        """Append the candidates (rows ri, local columns ci, sorted by column) to buffer rows a:b.

        A chunk whose rows would overflow is compacted first (:meth:`_compact_rows`); the
        candidates are appended in parts of at most cap - K draws so that they always fit.
        """
        K, cap = self.k, self._buf.shape[1]
        room = cap - K
        if int(cnt.max()) > room:
            for r0 in range(0, xc.shape[0], room):
                sel = (ri >= r0) & (ri < r0 + room)
                if sel.any():
                    self._append(xc, a, b, ri[sel], ci[sel], np.bincount(ci[sel], minlength=b - a))
            return
        if np.any(self._fill[a:b] + cnt > cap):
            self._compact_rows(a, b)
        fill = self._fill[a:b]
        # flat destinations: row start + fill + rank of the candidate within its column
        base = np.arange(a, b) * cap + fill - (np.cumsum(cnt) - cnt)
        dest = np.repeat(base, cnt) + np.arange(ci.size)
        self._buf.reshape(-1)[dest] = xc[ri, ci]
        fill += cnt

    def _compact_rows(self, a, b):
        """Partition buffer rows a:b back to their K smallest values, ejecting the rest to the body.

        Works in place on blocks of about ``_COMPACT_ELEMENTS`` values (rows holding K or fewer
        values are left alone); lowers each row's threshold to its new K-th smallest value.
        """
        K, cap = self.k, self._buf.shape[1]
        step = max(1, _COMPACT_ELEMENTS // cap)
        for r0 in range(a, b, step):
            r1 = min(b, r0 + step)
            fl = self._fill[r0:r1]
            more = fl > K
            if not more.any():
                continue
            if more.all():
                rows = slice(r0, r1)
                Z = self._buf[r0:r1]  # a view: partitioned in place
            else:
                rows = r0 + np.flatnonzero(more)
                Z = self._buf[rows]
            Z.partition(K - 1, axis=1)
            new_thr = Z[:, K - 1].copy()
            ej = Z[:, K:]
            nej = np.count_nonzero(ej < np.inf, axis=1)
            has = (nej > 0) & np.isfinite(new_thr)
            old = self._bshift[rows]
            self._body_rescale(rows, np.where(has, -new_thr, old))
            with np.errstate(over="ignore", invalid="ignore"):
                ee = np.negative(ej)
                ee -= self._bshift[rows][:, None]
                np.exp(ee, out=ee)
            if not has.all():
                ee[~has] = 0.0
            self._s1[rows] += ee.sum(axis=1)
            self._s2[rows] += np.einsum("ij,ij->i", ee, ee)
            self._bcount[rows] += np.where(has, nej, 0)
            ej[...] = np.inf
            if not isinstance(rows, slice):
                self._buf[rows] = Z
            self._thr[rows] = new_thr
            self._fill[rows] = K

    # ------------------------------------------------------------------------------------------
    def _rebuild(self, K_new: int) -> None:
        """Rebuild the buffer (size K_new) and the body sums from every draw so far via the reader."""
        if self.reader is None:
            raise ValueError(
                f"StreamingScorer: the PSIS tail needs {K_new // 2} buffered draws per observation but "
                f"the buffer holds {self.k}; a rebuild source is needed (pass reader=, or size the "
                f"buffer with expected_draws= / initial_k=)"
            )
        S, n = self.draws, self.n
        K_new = min(K_new, S)
        # The old buffer plays no part in a rebuild: release it first, so that the peak is the new
        # state plus one reader block. Should the reader fail, the tail state is marked stale:
        # add() then keeps the WAIC / DIC accumulators only and the next scores() rebuilds again.
        self._buf = None
        self._tail_ok = False
        buf = np.full((n, 2 * K_new), np.inf)
        fill = np.full(n, K_new, dtype=np.int64)
        thr = np.full(n, np.inf)
        bcount = np.zeros(n)
        bshift = np.zeros(n)
        s1 = np.zeros(n)
        s2 = np.zeros(n)
        for a, b in _col_blocks(S, n):
            data = np.asarray(self.reader(a, b), dtype=float)
            if data.shape != (S, b - a):
                raise ValueError(
                    f"StreamingScorer: reader({a}, {b}) returned shape {data.shape}, expected {(S, b - a)} "
                    f"(every draw so far of observations {a}:{b})"
                )
            sub = max(1, _COMPACT_ELEMENTS // S)  # transpose in small column groups
            for c0 in range(a, b, sub):
                c1 = min(b, c0 + sub)
                part = data[:, c0 - a:c1 - a].T.copy()  # (observations, draws)
                part[self._bad[c0:c1]] = 0.0
                if K_new < S:
                    part.partition(K_new - 1, axis=1)
                buf[c0:c1, :K_new] = part[:, :K_new]
                if K_new < S:
                    t = part[:, K_new - 1]
                    thr[c0:c1] = t
                    rest = part[:, K_new:]
                    sh = np.where(np.isfinite(t), -t, 0.0)
                    with np.errstate(over="ignore", invalid="ignore"):  # in place: no more temporaries
                        np.negative(rest, out=rest)
                        rest -= sh[:, None]
                        np.exp(rest, out=rest)
                    s1[c0:c1] = rest.sum(axis=1)
                    s2[c0:c1] = np.einsum("ij,ij->i", rest, rest)
                    bshift[c0:c1] = sh
                    bcount[c0:c1] = S - K_new
            del data
        self._buf, self._fill, self._thr = buf, fill, thr
        self._bcount, self._bshift, self._s1, self._s2 = bcount, bshift, s1, s2
        self.k = K_new
        self._tail_ok = True
        self.rebuilds += 1

    def _score_rows(self, a, b, need, M, r):
        """PSIS-LOO of observations a:b from the buffer and the body sums.

        A copy of the block's buffer rows is partitioned (in place the +inf padding could move in
        front of a row's fill mark): the ``need`` smallest values of each row (need = max M + 1 <=
        fill) are sorted; the other
        buffered values are body draws, folded into the body sums with the shift c = -min ll
        (every term exp(-ll - c) <= 1), and :func:`.loo.loo_from_parts` gets them as one body.
        """
        fill = self._fill[a:b]
        W = int(fill.max())
        rows = self._buf[a:b, :W].copy()
        if W > need:
            rows.partition(need - 1, axis=1)
        low = np.sort(rows[:, :need], axis=1)
        minll = low[:, 0]
        zero = minll == -np.inf
        c = np.where(zero, 0.0, -minll)
        count = self._bcount[a:b]
        with np.errstate(over="ignore", invalid="ignore"):
            scale = np.where(count > 0, np.exp(self._bshift[a:b] - c), 0.0)
            s1 = self._s1[a:b] * scale
            s2 = self._s2[a:b] * (scale * scale)
            if W > need:  # buffered body draws (padding is +inf: exp(-inf) = 0)
                ex = np.negative(rows[:, need:])
                ex -= c[:, None]
                np.exp(ex, out=ex)
                s1 += ex.sum(axis=1)
                s2 += np.einsum("ij,ij->i", ex, ex)
                count = count + (fill - need)
        e_, m_, k_ = loo_from_parts(low, np.full(b - a, need), M, count, c, s1, s2, r)
        return e_, m_, k_, zero

    def scores(self, r_eff=None, *, run=None) -> Scores:
        """Scores of every draw added so far.

        Parameters
        ----------
        r_eff : float or array_like (n,), optional (default 1.0)
            Relative efficiency per observation (the service computes it from the store).
        run : str, optional

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
        if not self._tail_ok:  # an earlier rebuild failed: the reader is the only source
            self._rebuild(max(2 * need, self.k))
        elif need > self.k and S > self.k:
            self._rebuild(2 * need)
        parts = self.pointwise_parts(r)
        t_mean, t_m2, t_max = (float(self._totals.mean[0]), float(self._totals.m2[0]),
                               float(self._totals.max[0]))
        return scores_from_parts(parts, S, int(M.min()), (t_mean, t_m2, t_max), n_params=self.n_params,
                                 point_loglik=self.point_loglik, r_eff=r, chains=self.chains, run=run)

    def pointwise_parts(self, r) -> dict:
        """Per-observation results of the state: what :func:`scores_from_parts` totals.

        Parameters
        ----------
        r : ndarray (n,), the relative efficiencies. The buffer must already hold the
            max_i M_i + 1 smallest draws of every observation (:meth:`scores` rebuilds first).

        Returns
        -------
        dict of (n,) arrays: ``elpd``, ``mcse``, ``k`` (PSIS-LOO), ``zero`` (a -inf draw), ``lse``
        (log sum_s exp ll_si), ``m2`` (sum of squared deviations), ``bad`` (NaN / +inf seen).
        Observation blocks are independent: the parts of disjoint observation ranges concatenate.
        """
        S, n = self.draws, self.n
        M = np.broadcast_to(tail_length(S, r), (n,))
        elpd = np.empty(n)
        mcse = np.empty(n)
        k = np.empty(n)
        zero = np.zeros(n, dtype=bool)
        need = int(M.max()) + 1
        cap = self._buf.shape[1]
        step = max(1, _SCORE_ELEMENTS // cap)

        def block(a, b):  # blocks of observations: bounded, cache-sized temporaries
            e_, m_, k_, z_ = self._score_rows(a, b, need, M[a:b], r[a:b])
            elpd[a:b], mcse[a:b], k[a:b], zero[a:b] = e_, m_, k_, z_

        for_each_block(n, step, block)
        with np.errstate(divide="ignore"):
            lse = self._lse_m + np.log(self._lse_s)
        return {"elpd": elpd, "mcse": mcse, "k": k, "zero": zero, "lse": lse, "m2": self._m2.copy(),
                "bad": self._bad.copy()}


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
