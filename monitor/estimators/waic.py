"""WAIC, the widely applicable information criterion.

Watanabe (2010), "Asymptotic equivalence of Bayes cross validation and widely applicable information
criterion in singular learning theory", JMLR 11; in the elpd scale of Gelman, Hwang & Vehtari (2014),
"Understanding predictive information criteria for Bayesian models", Statistics and Computing 24.

For observation i with draws ll_si = log p(y_i | theta_s), s = 1..S:

    lppd_i = log( (1/S) sum_s exp(ll_si) )
    p_i    = var_s(ll_si)            (sample variance, ddof = 1)
    elpd_i = lppd_i - p_i

Totals: elpd = sum_i elpd_i, p_eff = sum_i p_i, SE = sqrt(n var_i(elpd_i)) (ddof = 1).

Conventions: NaN or +inf in an observation -> that observation is bad, its elpd_i is NaN and the
totals are NaN (listed in ``bad_observations``); -inf in an observation -> p_i = +inf and
elpd_i = -inf (totals elpd -inf, se and p_eff +inf).
"""

from __future__ import annotations

import numpy as np

from .loo import _col_blocks, as_draws_matrix, lse_columns, totals

__all__ = ["waic", "waic_from_moments"]


def waic_from_moments(lse, S, m2, bad, zero) -> dict:
    """WAIC from per-observation accumulators (shared by the batch and streaming paths).

    Parameters
    ----------
    lse : ndarray (n,), log sum_s exp(ll_si).
    S : int, number of draws.
    m2 : ndarray (n,), sum_s (ll_si - mean_i)^2.
    bad, zero : bool ndarrays (n,), observations with NaN/+inf and with -inf values.
    """
    lppd = lse - np.log(S)
    p = m2 / (S - 1)
    p = np.where(zero, np.inf, p)
    elpd_i = np.where(zero, -np.inf, lppd - np.where(zero, 0.0, p))
    elpd_i = np.where(bad, np.nan, elpd_i)
    p = np.where(bad, np.nan, p)
    elpd, se = totals(elpd_i, bad)
    if np.any(bad):
        p_eff = float("nan")
    else:
        p_eff = float(np.sum(p))
    return {
        "elpd": elpd,
        "se": se,
        "p_eff": p_eff,
        "pointwise": elpd_i,
        "p_pointwise": p,
        "lppd_pointwise": np.where(bad, np.nan, lppd),
        "bad_observations": np.flatnonzero(bad).tolist(),
        "zero_likelihood_observations": np.flatnonzero(zero & ~bad).tolist(),
    }


def waic(loglik) -> dict:
    """WAIC estimate of the expected log pointwise predictive density.

    Parameters
    ----------
    loglik : array_like, shape (chains, draws, n) or (draws, n)

    Returns
    -------
    dict with ``elpd``, ``se``, ``p_eff``, ``pointwise`` (n,), ``p_pointwise`` (n,),
    ``lppd_pointwise`` (n,), ``bad_observations``, ``zero_likelihood_observations``.

    Reference: Watanabe (2010); Gelman, Hwang & Vehtari (2014), eqs. for lppd and p_WAIC2.
    """
    ll = as_draws_matrix(loglik)
    S, n = ll.shape
    lse = np.empty(n)
    m2 = np.empty(n)
    bad = np.zeros(n, dtype=bool)
    zero = np.zeros(n, dtype=bool)
    for a, b in _col_blocks(S, n):
        blk = ll[:, a:b]
        mx = blk.max(axis=0)
        bd = ~(mx < np.inf)
        if bd.any():
            blk = blk.copy()
            blk[:, bd] = 0.0
        mn = blk.min(axis=0)
        zr = mn == -np.inf
        bad[a:b] = bd
        zero[a:b] = zr
        lse[a:b] = lse_columns(blk)
        with np.errstate(invalid="ignore"):
            mean = blk.mean(axis=0)
            d = blk - mean
            m2[a:b] = np.einsum("ij,ij->j", d, d)
    return waic_from_moments(lse, S, m2, bad, zero)
