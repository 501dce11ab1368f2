"""Pareto smoothed importance sampling (PSIS).

Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto smoothed importance sampling", JMLR 25(72).

For S draws with log importance ratios r_1..r_S (for leave-one-out: r_s = -log p(y_i | theta_s)):

* tail length M = ceil(min(S / 5, 3 sqrt(S / r_eff)));
* fit a generalized Pareto distribution (:mod:`.pareto`) to the exceedances
  x_z = exp(r_(z)) - exp(r_cut) of the M largest ratios over the (M+1)-th largest, r_cut;
* replace the z-th smallest of those M ratios by log(exp(r_cut) + Q((z - 1/2) / M)), Q the fitted
  quantile function, truncated at the largest raw ratio;
* self-normalise. The fitted shape k-hat is the diagnostic; with S draws estimates are trusted
  when k-hat < min(1 - 1/log10 S, 0.7); above 0.7 they are not, whatever S.

Conventions of this module for the edge cases (each row is one observation):

* fewer than ``MIN_TAIL`` = 5 tail draws (S <= 20 at r_eff = 1): no fit, raw ratios kept,
  k-hat = +inf (flagged as too few draws);
* a flat tail (all M largest ratios equal the cutoff, e.g. a constant column): nothing to smooth,
  raw ratios kept (they are all equal), k-hat = -inf;
* a ratio of +inf (a draw where the likelihood is zero), or a tail spread over so many orders of
  magnitude that no finite fit exists: k-hat = +inf, raw ratios kept.
"""

from __future__ import annotations

import numpy as np

from .pareto import gpd_fit, gpd_quantile

__all__ = ["tail_length", "sample_size_threshold", "smooth_tail", "psis", "MIN_TAIL"]

MIN_TAIL = 5


def tail_length(S: int, r_eff=1.0) -> np.ndarray:
    """Tail length M = ceil(min(S/5, 3 sqrt(S/r_eff))) (Vehtari et al. 2024, JMLR 25(72), sec. 3).

    Parameters
    ----------
    S : int, total number of draws.
    r_eff : float or array_like (n,), relative efficiency of the draws (ESS / S).

    Returns
    -------
    ndarray of int64, shape of ``r_eff`` (at least 1-D).
    """
    r = np.atleast_1d(np.asarray(r_eff, dtype=float))
    if np.any(~(r > 0)):
        raise ValueError("r_eff must be positive and finite")
    return np.ceil(np.minimum(S / 5.0, 3.0 * np.sqrt(S / r))).astype(np.int64)


#: Above this Pareto k-hat the importance-sampling estimate is unreliable whatever the number of
#: draws (Vehtari et al. 2024, JMLR 25(72), sec. 3.2).  The one definition in the project:
#: ``chainvigil.rules`` re-exports it (the estimators import no project module).
KHAT_LIMIT = 0.7


def sample_size_threshold(S: int) -> float:
    """k-hat threshold for S draws: min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024, sec. 3)."""
    if S <= 1:
        return -np.inf
    return float(min(1.0 - 1.0 / np.log10(S), KHAT_LIMIT))


def smooth_tail(ratio_tail, lengths, cutoff):
    """Pareto-smooth the tails of many sets of log ratios at once.

    Parameters
    ----------
    ratio_tail : ndarray, shape (n, M_max)
        Row i: the M_i largest log ratios, sorted ascending, padded on the right (padding ignored).
    lengths : ndarray of int, shape (n,)
        M_i.
    cutoff : ndarray, shape (n,)
        The (M_i + 1)-th largest log ratio of row i.

    Returns
    -------
    lw : ndarray, shape (n, M_max)
        Smoothed log weights for the tail entries (same order as ``ratio_tail``): with c the largest
        ratio, lw_z = min(c, log(exp(r_cut) + Q((z - 1/2)/M))); padding entries are -inf.
    k : ndarray, shape (n,)
        Pareto k-hat; +inf when M < MIN_TAIL or a ratio is +inf, -inf for a flat tail.

    Notes
    -----
    Computations are shifted by c (the largest ratio) so that exp never overflows; the GPD fit is
    scale-equivariant, so the shift leaves k-hat unchanged.
    """
    rt = np.asarray(ratio_tail, dtype=float)
    n, mmax = rt.shape
    L = np.asarray(lengths, dtype=np.int64)
    cut = np.asarray(cutoff, dtype=float)
    rows = np.arange(n)
    valid = np.arange(mmax)[None, :] < L[:, None]
    c = rt[rows, L - 1]
    lw = np.where(valid, rt, -np.inf)
    k = np.full(n, np.inf)
    finite = np.isfinite(c) & np.isfinite(cut)
    with np.errstate(invalid="ignore", over="ignore"):
        top = np.where(finite, np.exp(cut - np.where(finite, c, 0.0)), 0.0)
        x = np.where(valid & finite[:, None], np.exp(np.where(valid, rt, 0.0) - np.where(finite, c, 0.0)[:, None]) - top[:, None], 0.0)
    x = np.maximum(x, 0.0)
    xmax = x[rows, L - 1]
    flat = finite & (xmax <= 0) & (L >= MIN_TAIL)
    k[flat] = -np.inf
    fit = finite & (xmax > 0) & (L >= MIN_TAIL)
    if np.any(fit):
        xf = x[fit]
        Lf = L[fit]
        kf, sf = gpd_fit(xf, Lf)
        z = np.arange(1, mmax + 1, dtype=float)
        p = np.minimum((z[None, :] - 0.5) / Lf[:, None], 1.0 - 1e-16)
        q = gpd_quantile(p, kf[:, None], sf[:, None])
        cf = c[fit][:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            lq = np.log(top[fit][:, None] + q) + cf
        lq = np.minimum(lq, cf)  # truncate at the largest raw ratio
        vf = valid[fit]
        ok = np.isfinite(kf)  # a fit that is not finite keeps the raw ratios (k-hat = +inf)
        lw[fit] = np.where(vf & ok[:, None], lq, lw[fit])
        k[fit] = kf
    return lw, k


def psis(log_ratios, r_eff=1.0):
    """Pareto smoothed importance sampling of log ratios, one set per column.

    Parameters
    ----------
    log_ratios : array_like, shape (S, n) or (chains, draws, n)
        Log importance ratios; +inf allowed (k-hat = +inf), NaN not allowed.
    r_eff : float or array_like (n,)
        Relative efficiency used for the tail length.

    Returns
    -------
    lw : ndarray, shape (S, n)
        Self-normalised smoothed log weights (logsumexp over draws = 0 per column).
    k : ndarray, shape (n,)
        Pareto k-hat per column (see :func:`smooth_tail` for the edge-case conventions).

    Reference: Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72).
    """
    r = np.asarray(log_ratios, dtype=float)
    if r.ndim == 3:
        r = r.reshape(-1, r.shape[-1])
    if r.ndim != 2:
        raise ValueError(f"psis: log_ratios must be (S, n) or (chains, draws, n), got shape {r.shape}")
    if np.isnan(r).any():
        raise ValueError("psis: log ratios contain NaN")
    S, n = r.shape
    if S < 2:
        raise ValueError("psis: need at least 2 draws")
    M = np.broadcast_to(tail_length(S, r_eff), (n,)).copy()
    mmax = int(M.max())
    k0 = S - mmax - 1
    # only the mmax + 1 largest ratios need an order: partition them out, then sort that part
    part = np.argpartition(r, k0, axis=0)[k0:] if k0 > 0 else np.argsort(r, axis=0, kind="stable")
    part = np.take_along_axis(part, np.argsort(np.take_along_axis(r, part, axis=0), axis=0,
                                               kind="stable"), axis=0)  # ascending
    top_idx = part[::-1].T  # (n, mmax+1): largest first
    cols = np.arange(n)[:, None]
    desc = r[top_idx, cols]
    z = np.arange(mmax)[None, :]
    pos = np.where(z < M[:, None], M[:, None] - 1 - z, 0)  # ascending order of the M largest
    tail = np.take_along_axis(desc, pos, axis=1)
    cutoff = desc[np.arange(n), M]
    lw_tail, k = smooth_tail(tail, M, cutoff)
    lw = r.copy()
    idx = np.take_along_axis(top_idx, pos, axis=1)
    valid = z < M[:, None]
    rows_i = idx[valid]
    cols_i = np.broadcast_to(cols, idx.shape)[valid]
    lw[rows_i, cols_i] = lw_tail[valid]
    with np.errstate(invalid="ignore"):
        mx = lw.max(axis=0)
        lse = mx + np.log(np.exp(lw - mx).sum(axis=0))
        lw = lw - lse
    return lw, k
