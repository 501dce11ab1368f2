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
* PSIS-LOO (Vehtari, Gelman & Gabry 2017; PSIS of Vehtari et al. 2024): a buffer of the K smallest
  log-likelihoods (K >= M + 1, M the PSIS tail length) and, for every draw that has left the buffer
  (the *body*), its count and the sums exp(-ll - c_i), exp(-2 ll - 2 c_i), kept with a shift c_i equal
  to minus the buffer's current largest value, so every term is <= 1. Invariant: every body draw is
  >= every buffer draw, hence the M largest ratios are always in the buffer. Draws of a block that
  are >= the buffer's largest value go straight to the body sums; only the others are merged into
  the buffer (once S >> K that is about B K / S draws of a block of B).

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
        self._buf = np.full((K, n), np.inf)
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
        arrs = (self._lse_m, self._lse_s, self._mean, self._m2, self._bad, self._buf, self._thr,
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
            # --- WAIC: running log-sum-exp
            m_new = np.maximum(self._lse_m, colmax)
            ms = np.where(np.isfinite(m_new), m_new, 0.0)
            e = x - ms
            np.exp(e, out=e)
            self._lse_s = self._lse_s * np.exp(self._lse_m - ms) + e.sum(axis=0)
            self._lse_m = ms
            # --- WAIC: mean / M2 (Chan et al. 1983)
            bmean = x.sum(axis=0) / B
            np.subtract(x, bmean, out=e)
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
            np.subtract(thr, x, out=e)  # e = thr - ll; body where <= 0
            cand = e > 0
            ncand = cand.sum(axis=0)
            direct = B - ncand
            fin = np.isfinite(thr) & (direct > 0)
            if fin.any():
                cols = np.flatnonzero(fin)
                self._body_rescale(cols, -thr[cols])
                e[cand] = -np.inf
                np.exp(e, out=e)
                if cols.size == self.n:
                    self._s1 += e.sum(axis=0)
                    self._s2 += np.einsum("ij,ij->j", e, e)
                else:
                    ec = e[:, cols]
                    self._s1[cols] += ec.sum(axis=0)
                    self._s2[cols] += np.einsum("ij,ij->j", ec, ec)
                self._bcount += direct
        self.draws = tot
        self._chain_draws[chain] = self._chain_draws.get(chain, 0) + B
        cols = np.flatnonzero(ncand > 0)
        if cols.size:
            self._merge(x, cand, ncand, cols)

    def _merge(self, x, cand, ncand, cols):
        """Merge the candidate draws of ``cols`` into the buffer; eject the excess to the body."""
        K = self.k
        B = x.shape[0]
        nc = cols.size
        cmax = int(ncand[cols].max())
        if cmax == B:
            sub = x[:, cols]
            C = np.where(cand[:, cols], sub, np.inf)
        else:
            ci, ri = np.nonzero(cand[:, cols].T)  # ordered by column, then draw
            cnt = ncand[cols]
            start = np.cumsum(cnt) - cnt
            pos = np.arange(ci.size) - start[ci]
            C = np.full((cmax, nc), np.inf)
            C[pos, ci] = x[ri, cols[ci]]
        Z = np.concatenate([self._buf[:, cols], C], axis=0)
        Z.partition(K - 1, axis=0)
        self._buf[:, cols] = Z[:K]
        new_thr = Z[K - 1]
        self._thr[cols] = new_thr
        ej = Z[K:]
        real = ej < np.inf
        nej = real.sum(axis=0)
        has = (nej > 0) & np.isfinite(new_thr)
        if has.any():
            hc = np.flatnonzero(has)
            gc = cols[hc]
            self._body_rescale(gc, -new_thr[hc])
            with np.errstate(over="ignore", invalid="ignore"):
                ee = np.exp(-ej[:, hc] - self._bshift[gc])
            ee = np.where(real[:, hc], ee, 0.0)
            self._s1[gc] += ee.sum(axis=0)
            self._s2[gc] += (ee * ee).sum(axis=0)
            self._bcount[gc] += nej[hc]

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
        buf = np.full((K_new, n), np.inf)
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
            data = data.copy()
            data[:, self._bad[a:b]] = 0.0
            if K_new < S:
                data.partition(K_new - 1, axis=0)
            buf[:, a:b] = data[:K_new]
            if K_new < S:
                t = data[K_new - 1]
                thr[a:b] = t
                rest = data[K_new:]
                sh = np.where(np.isfinite(t), -t, 0.0)
                with np.errstate(over="ignore", invalid="ignore"):
                    ee = np.exp(-rest - sh)
                s1[a:b] = ee.sum(axis=0)
                s2[a:b] = (ee * ee).sum(axis=0)
                bshift[a:b] = sh
                bcount[a:b] = S - K_new
        self._buf, self._thr, self._bcount, self._bshift, self._s1, self._s2 = buf, thr, bcount, bshift, s1, s2
        self.k = K_new
        self.rebuilds += 1

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
        n_low = min(S, self.k)
        elpd = np.empty(n)
        mcse = np.empty(n)
        k = np.empty(n)
        zero = np.zeros(n, dtype=bool)
        for a, b in _col_blocks(self.k, n):
            low = np.sort(self._buf[:, a:b], axis=0).T[:, :n_low].copy()
            zero[a:b] = low[:, 0] == -np.inf
            e_, m_, k_ = loo_from_parts(low, np.full(b - a, n_low), M[a:b], self._bcount[a:b],
                                        self._bshift[a:b], self._s1[a:b], self._s2[a:b], r[a:b])
            elpd[a:b], mcse[a:b], k[a:b] = e_, m_, k_
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
