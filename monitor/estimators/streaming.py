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
  B K / S of a block of B once S >> K) are appended to the buffer; a full row is compacted by a
  partition back to its K smallest, ejecting the rest to the body.

:meth:`StreamingScorer.scores` sorts the buffer, fits the tails and combines them with the body sums
(:func:`.loo.loo_from_parts`, the same code the batch path uses). When M + 1 outgrows K (more draws,
smaller r_eff) the buffer is rebuilt from every draw so far through ``reader(start, stop)``, in blocks
of observations, with K set to 2 (M + 1) so rebuilds are rare (amortised linear cost).

Bad input: NaN / +inf values mark the observation bad (its values are replaced by 0 in the state, the
results are NaN as in the batch path); -inf values are kept (k-hat +inf, elpd -inf). See
:mod:`.loo` for the conventions.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable

import numpy as np

from .information import aic_from_max, dic_from_moments
from .loo import _col_blocks, _r_eff_vector, finish_loo, loo_from_parts
from .psis import MIN_TAIL, tail_length
from .scores import Scores, assemble
from .waic import waic_from_moments

__all__ = ["StreamingScorer"]

DEFAULT_K = 512
_COMPACT_ELEMENTS = 1 << 21  # size of the work array when compacting buffer rows
_SCORE_ELEMENTS = 1 << 18  # buffer values per observation block in scores()


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
        if initial_k is not None:
            K = int(initial_k)
        elif expected_draws is not None:
            K = 2 * (int(tail_length(int(expected_draws), 1.0)[0]) + 1)
        else:
            K = DEFAULT_K
        if K < 2:
            raise ValueError(f"StreamingScorer: buffer size must be >= 2, got {K}")
        self.k = K
        self.rebuilds = 0
        self._chain_draws: dict[Hashable, int] = {}
        self.draws = 0
        n = self.n
        # WAIC
        self._lse_m = np.full(n, -np.inf)
        self._lse_s = np.zeros(n)
        self._mean = np.zeros(n)
        self._m2 = np.zeros(n)
        self._bad = np.zeros(n, dtype=bool)
        # DIC / AIC
        self._t_mean = 0.0
        self._t_m2 = 0.0
        self._t_max = -math.inf
        # PSIS-LOO
        self._buf = np.full((n, 2 * K), np.inf)  # capacity 2K: appended to, compacted to K when full
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
        return int(sum(a.nbytes for a in arrs))

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
        """
        x = np.asarray(block)
        if x.ndim == 1 and self.n == x.size:
            x = x[None, :]
        if x.ndim != 2 or x.shape[1] != self.n:
            raise ValueError(f"StreamingScorer.add: block must be (draws, {self.n}), got shape {x.shape}")
        if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
            raise ValueError(f"StreamingScorer.add: block must be numeric, got dtype {x.dtype}")
        x = np.asarray(x, dtype=float)
        B = x.shape[0]
        if B == 0:
            return
        colmax = x.max(axis=0)
        badc = ~(colmax < np.inf)
        if badc.any():
            x = x.copy()
            x[:, badc] = 0.0
            colmax[badc] = 0.0
            self._bad |= badc
        na = self.draws
        tot = na + B
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            # --- WAIC: running log-sum-exp; w = exp(max(ll - m, -700)): the clamp changes terms
            # below e^-700 of the column's largest (which contributes 1), i.e. nothing, and keeps
            # w > 0 so that it can be reused for the body sums below.
            m_new = np.maximum(self._lse_m, colmax)
            ms = np.where(np.isfinite(m_new), m_new, 0.0)
            w = x - ms
            np.maximum(w, -700.0, out=w)
            np.exp(w, out=w)
            self._lse_s = self._lse_s * np.exp(self._lse_m - ms) + w.sum(axis=0)
            self._lse_m = ms
            # --- WAIC: mean / M2 (Chan et al. 1983)
            bmean = x.sum(axis=0) / B
            e = x - bmean
            bm2 = np.einsum("ij,ij->j", e, e)
            delta = bmean - self._mean
            self._mean = self._mean + delta * (B / tot)
            self._m2 = self._m2 + bm2 + delta * delta * (na * B / tot)
            # --- DIC / AIC on the draw totals
            T = x.sum(axis=1)
            tm = float(T.mean())
            tm2 = float(np.sum((T - tm) ** 2))
            d = tm - self._t_mean
            self._t_mean += d * (B / tot)
            self._t_m2 += tm2 + d * d * (na * B / tot)
            self._t_max = max(self._t_max, float(T.max()))
            # --- PSIS-LOO: draws >= the buffer's largest value go straight to the body
            thr = self._thr
            cand = x < thr
            ncand = cand.sum(axis=0)
            direct = B - ncand
            fin = np.isfinite(thr) & (direct > 0)
            if fin.any():
                cols = np.flatnonzero(fin)
                if cols.size < self.n:
                    self._body_rescale(cols, -thr[cols])
                else:
                    self._body_rescale(slice(None), -thr)
                tshift = np.where(np.isfinite(thr), thr - ms, 0.0)
                if np.all(tshift > -690.0):
                    # exp(thr - ll) = exp(thr - m) / w for body draws (ll >= thr, so w >= e^-690)
                    np.divide(np.exp(tshift), w, out=e)
                else:  # a column spans more than 690 nats: direct exponentials
                    np.subtract(np.where(np.isfinite(thr), thr, 0.0), x, out=e)
                    np.minimum(e, 0.0, out=e)
                    np.exp(e, out=e)
                np.multiply(e, ~cand, out=e)  # candidates contribute nothing here
                self._s1 += e.sum(axis=0)  # columns without direct draws add exact zeros
                self._s2 += np.einsum("ij,ij->j", e, e)
                self._bcount += direct
        self.draws = tot
        self._chain_draws[chain] = self._chain_draws.get(chain, 0) + B
        cols = np.flatnonzero(ncand > 0)
        if cols.size:
            self._merge(x, cand, ncand, cols)

    def _merge(self, x, cand, ncand, cols):
        """Append the candidate draws of ``cols`` to the buffer; compact columns that overflow.

        Compaction (a row-wise partition) keeps the K smallest values of a column, ejects the rest
        to the body sums and lowers the column's threshold to its new K-th smallest value.
        """
        K, cap = self.k, self._buf.shape[1]
        B = x.shape[0]
        f0 = int(self._fill[0])
        if cols.size == self.n and f0 + B <= cap and np.all(ncand == B) and np.all(self._fill == f0):
            # every draw of the block is a candidate and the buffer has room: plain copy
            self._buf[:, f0:f0 + B] = x.T
            self._fill += B
            return
        if cols.size == self.n:
            xT = x.T.copy()  # (observations, draws): candidates come out grouped by observation
            vals = xT[xT < self._thr[:, None]]
        else:
            xT = x[:, cols].T.copy()
            vals = xT[xT < self._thr[cols][:, None]]
        cnt = ncand[cols]
        ci = np.repeat(np.arange(cols.size), cnt)
        start = np.cumsum(cnt) - cnt
        pos = np.arange(ci.size) - start[ci]
        fill = self._fill[cols]
        over = fill + cnt > cap
        ok = ~over[ci]
        dest = cols[ci] * cap + fill[ci] + pos
        if over.any():
            self._buf.reshape(-1)[dest[ok]] = vals[ok]
        else:
            self._buf.reshape(-1)[dest] = vals
        self._fill[cols[~over]] += cnt[~over]
        if not over.any():
            return
        oc_all = np.flatnonzero(over)  # local indices (into cols) of overflowing columns
        sel = ~ok
        csel, psel, vsel = ci[sel], pos[sel], vals[sel]
        step = max(1, _COMPACT_ELEMENTS // (cap + int(cnt[oc_all].max())))
        for j0 in range(0, oc_all.size, step):  # blocks of observations: bounded temporaries
            oc = oc_all[j0:j0 + step]
            self._compact(cols, oc, fill, cnt, csel, psel, vsel)

    def _compact(self, cols, oc, fill, cnt, csel, psel, vsel):
        """Partition the rows ``cols[oc]`` (plus their pending candidates) back to K values."""
        K, cap = self.k, self._buf.shape[1]
        g = cols[oc]
        allc = g.size == self.n
        gi = slice(None) if allc else g  # plain slicing when every column overflows
        cmax = int(cnt[oc].max())
        Z = np.full((oc.size, cap + cmax), np.inf)
        Z[:, :cap] = self._buf[gi]
        loc = np.full(cols.size, -1)
        loc[oc] = np.arange(oc.size)
        mine = loc[csel] >= 0
        Z[loc[csel[mine]], fill[csel[mine]] + psel[mine]] = vsel[mine]
        Z.partition(K - 1, axis=1)
        self._buf[gi, :K] = Z[:, :K]
        self._buf[gi, K:] = np.inf
        self._fill[gi] = K
        new_thr = Z[:, K - 1]
        self._thr[gi] = new_thr
        ej = Z[:, K:]
        real = ej < np.inf
        nej = real.sum(axis=1)
        has = (nej > 0) & np.isfinite(new_thr)
        if has.any():
            h = np.flatnonzero(has)
            gh = g[h]
            self._body_rescale(gh, -new_thr[h])
            with np.errstate(over="ignore", invalid="ignore"):
                ee = np.exp(-ej[h] - self._bshift[gh][:, None])
            ee = np.where(real[h], ee, 0.0)
            self._s1[gh] += ee.sum(axis=1)
            self._s2[gh] += (ee * ee).sum(axis=1)
            self._bcount[gh] += nej[h]

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
            data = data.T.copy()  # (observations, draws)
            data[self._bad[a:b]] = 0.0
            if K_new < S:
                data.partition(K_new - 1, axis=1)
            buf[a:b, :K_new] = data[:, :K_new]
            if K_new < S:
                t = data[:, K_new - 1]
                thr[a:b] = t
                rest = data[:, K_new:]
                sh = np.where(np.isfinite(t), -t, 0.0)
                with np.errstate(over="ignore", invalid="ignore"):
                    ee = np.exp(-rest - sh[:, None])
                s1[a:b] = ee.sum(axis=1)
                s2[a:b] = (ee * ee).sum(axis=1)
                bshift[a:b] = sh
                bcount[a:b] = S - K_new
        self._buf, self._fill, self._thr = buf, fill, thr
        self._bcount, self._bshift, self._s1, self._s2 = bcount, bshift, s1, s2
        self.k = K_new
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
        if need > self.k and S > self.k:
            self._rebuild(2 * need)
        elpd = np.empty(n)
        mcse = np.empty(n)
        k = np.empty(n)
        zero = np.zeros(n, dtype=bool)
        need = int(M.max()) + 1
        cap = self._buf.shape[1]
        step = max(1, _SCORE_ELEMENTS // cap)
        for a in range(0, n, step):  # blocks of observations: bounded, cache-sized temporaries
            b = min(n, a + step)
            e_, m_, k_, z_ = self._score_rows(a, b, need, M[a:b], r[a:b])
            elpd[a:b], mcse[a:b], k[a:b], zero[a:b] = e_, m_, k_, z_
        with np.errstate(divide="ignore"):
            lse = self._lse_m + np.log(self._lse_s)
        bad = self._bad
        lppd = lse - np.log(S)
        loo = finish_loo(elpd, mcse, k, lppd, bad, zero, S, int(M.min()) < MIN_TAIL)
        w = waic_from_moments(lse, S, self._m2, bad, zero)
        any_bad, any_zero = bool(bad.any()), bool((zero & ~bad).any())
        dic = dic_from_moments(self._t_mean, self._t_m2, S, self.point_loglik, any_bad, any_zero)
        aic = aic_from_max(self._t_max, self.n_params, self.point_loglik, any_bad)
        return assemble(loo, w, dic, aic, r, chains=self.chains, run=run)
