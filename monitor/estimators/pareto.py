"""Generalized Pareto distribution: a vectorised tail fit and its quantile function.

The fit is the empirical-Bayes estimator of Zhang & Stephens (2009), "A new and efficient estimation
method for the generalized Pareto distribution", Technometrics 51(3), 316-325, with the grid of
m = 30 + floor(sqrt(M)) candidate values and the weakly informative prior that shrinks the shape
towards 0.5 with the weight of 10 observations, as used for Pareto smoothed importance sampling in
Vehtari, Simpson, Gelman, Yao & Gabry (2024), "Pareto smoothed importance sampling", JMLR 25(72),
Appendix.

Parameterisation (the usual one): for shape k and scale sigma > 0,

    F(x) = 1 - (1 + k x / sigma) ** (-1 / k),   x >= 0     (k != 0)
    F(x) = 1 - exp(-x / sigma)                             (k == 0)

Zhang & Stephens work with theta = -k / sigma. For a fixed theta the maximum-likelihood shape is
k(theta) = mean_t log(1 - theta x_t) and the profile log-likelihood is

    l(theta) = M * (log(-theta / k(theta)) - k(theta) - 1)

(written in their sign convention b = theta, kz = -k: l = M (log(b / kz) + kz - 1)). The estimator
averages theta over the grid theta_j with posterior weights w_j proportional to exp(l(theta_j)).
"""

from __future__ import annotations

import numpy as np

__all__ = ["gpd_fit", "gpd_quantile", "fit_generalized_pareto"]

# Weakly informative prior on the shape (Vehtari et al. 2024, Appendix): k <- (M k + 10 * 0.5) / (M + 10).
PRIOR_SHAPE = 0.5
PRIOR_WEIGHT = 10.0

# Size of the reused (observations, grid, tail) work array, in elements (cache-sized: 256 KiB).
_WORK_ELEMENTS = 1 << 15


def gpd_fit(x, lengths=None, *, prior: bool = True):
    """Fit a generalized Pareto distribution (location 0) to many samples at once.

    Parameters
    ----------
    x : array_like, shape (n, M_max) or (M,)
        Row i holds the M_i exceedances x_i1 <= ... <= x_iM_i (sorted ascending, all >= 0), padded
        on the right to M_max; padding values are ignored.
    lengths : array_like of int, shape (n,), optional
        M_i, the number of valid entries in each row (default: every row is full). Each M_i >= 1 and
        each row must have a positive largest value.
    prior : bool
        Apply the weakly informative shrinkage of the shape towards 0.5 (weight 10).

    Returns
    -------
    k : ndarray, shape (n,) (or a float for 1-D input)
        Estimated shape.
    sigma : ndarray, shape (n,) (or a float)
        Estimated scale, computed from the shape before the prior shrinkage.

    Notes
    -----
    Zhang & Stephens (2009), Technometrics 51(3), with m = 30 + floor(sqrt(M)) grid points

        b_j = 1/x_(M) + (1 - sqrt(m / (j - 1/2))) / (3 x_(floor(M/4 + 1/2))),   j = 1..m
        kz_j = -mean_t log1p(-b_j x_t),   l_j = M (log(b_j / kz_j) + kz_j - 1)
        w_j = exp(l_j) / sum_l exp(l_l)  (weights below 10 machine epsilon are dropped)
        b = sum_j w_j b_j,  k = mean_t log1p(-b x_t),  sigma = -k / b
        k <- (M k + 10 * 0.5) / (M + 10)   (Vehtari et al. 2024, JMLR 25(72), Appendix)

    A sample whose fit is not finite (spread over more than ~300 orders of magnitude, so that the
    grid overflows) gets k = +inf. When the first-quartile order statistic is 0 (ties at the bottom of the sample) the smallest
    positive value stands in for it, so that the grid stays finite. Rows are processed in blocks so
    that the work array stays bounded; there is no Python loop per row.
    """
    x = np.asarray(x, dtype=float)
    one = x.ndim == 1
    x2 = np.atleast_2d(x)
    if x2.ndim != 2:
        raise ValueError(f"gpd_fit: x must be 1-D or 2-D, got shape {x.shape}")
    n, mmax_t = x2.shape
    if lengths is None:
        L = np.full(n, mmax_t, dtype=np.int64)
    else:
        L = np.asarray(lengths, dtype=np.int64).reshape(-1)
        if L.shape != (n,):
            raise ValueError(f"gpd_fit: lengths must have shape ({n},), got {L.shape}")
        if np.any(L < 1) or np.any(L > mmax_t):
            raise ValueError("gpd_fit: every length must be between 1 and x.shape[1]")
    valid = np.arange(mmax_t)[None, :] < L[:, None]
    xz = np.where(valid, x2, 0.0)
    rows = np.arange(n)
    xmax = xz[rows, L - 1]
    if np.any(~(xmax > 0)) or np.any(~np.isfinite(xz)):
        raise ValueError("gpd_fit: each sample needs a positive, finite largest value")
    if np.any(xz < 0):
        raise ValueError("gpd_fit: exceedances must be >= 0")
    qi = np.maximum(np.floor(L / 4.0 + 0.5).astype(np.int64) - 1, 0)
    xq = xz[rows, qi]
    if np.any(xq <= 0):
        smallest_pos = np.min(np.where(xz > 0, xz, np.inf), axis=1)
        xq = np.where(xq > 0, xq, smallest_pos)

    m = 30 + np.floor(np.sqrt(L)).astype(np.int64)
    mmax = int(m.max())
    j = np.arange(1, mmax + 1, dtype=float)
    jmask = j[None, :] <= m[:, None]
    with np.errstate(over="ignore", divide="ignore"):
        b = 1.0 / xmax[:, None] + (1.0 - np.sqrt(m[:, None] / (j[None, :] - 0.5))) / (3.0 * xq[:, None])
    b = np.where(jmask, b, b[:, :1])  # padding grid points: any valid value, masked below

    kz = np.empty_like(b)
    err = np.seterr(invalid="ignore", over="ignore", divide="ignore")
    try:
        k, sigma = _profile_fit(xz, b, jmask, L, mmax, mmax_t, kz)
    finally:
        np.seterr(**err)
    # a sample spread over more than ~300 orders of magnitude (x_q underflows relative to x_max)
    # has no finite fit: such a tail is reported as k = +inf
    k = np.where(np.isfinite(k), k, np.inf)
    if prior:
        k = (L * k + PRIOR_WEIGHT * PRIOR_SHAPE) / (L + PRIOR_WEIGHT)
    if one:
        return float(k[0]), float(sigma[0])
    return k, sigma


def _profile_fit(xz, b, jmask, L, mmax, mmax_t, kz):
    """Profile log-likelihood over the grid and the posterior-mean theta (see :func:`gpd_fit`).

    kz_j = -mean_t log1p(-b_j x_t) is evaluated for blocks of rows in one reused work array of at
    most ``_WORK_ELEMENTS`` values (rows x grid x tail; cache-sized), with in-place ufuncs.
    """
    n = xz.shape[0]
    step = max(1, _WORK_ELEMENTS // max(1, mmax * mmax_t))
    nb = np.negative(b)
    work = np.empty((min(step, n), mmax, mmax_t))
    ones = np.ones(mmax_t)
    kz2 = kz.reshape(-1)
    for s0 in range(0, n, step):  # blocks of rows, bounded memory
        s1 = min(n, s0 + step)
        t = work[: s1 - s0]
        np.multiply(nb[s0:s1, :, None], xz[s0:s1, None, :], out=t)
        np.log1p(t, out=t)
        np.dot(t.reshape(-1, mmax_t), ones, out=kz2[s0 * mmax:s1 * mmax])  # sums over the tail
    kz /= -L[:, None].astype(float)
    Lf = L[:, None].astype(float)
    prof = Lf * (np.log(b / kz) + kz - 1.0)
    prof = np.where(jmask & np.isfinite(prof), prof, -np.inf)
    pmax = prof.max(axis=1, keepdims=True)
    w = np.exp(prof - pmax)
    w /= w.sum(axis=1, keepdims=True)
    w = np.where(w >= 10 * np.finfo(float).eps, w, 0.0)
    w /= w.sum(axis=1, keepdims=True)
    bhat = (w * b).sum(axis=1)
    k = np.log1p(-bhat[:, None] * xz).sum(axis=1) / L
    sigma = -k / bhat
    return k, sigma


def fit_generalized_pareto(sample, *, prior: bool = True):
    """Fit a generalized Pareto distribution (location 0) to one sample of exceedances.

    Parameters
    ----------
    sample : array_like, shape (M,)
        Exceedances >= 0, in any order.

    Returns
    -------
    (k, sigma) : tuple of float
        Shape and scale; see :func:`gpd_fit` (Zhang & Stephens 2009 with the prior of Vehtari et al.
        2024).
    """
    s = np.sort(np.asarray(sample, dtype=float).reshape(-1))
    if s.size < 1:
        raise ValueError("fit_generalized_pareto: empty sample")
    return gpd_fit(s, prior=prior)


def gpd_quantile(p, k, sigma):
    """Quantile function of the generalized Pareto distribution with location 0.

    Q(p) = sigma * ((1 - p)**(-k) - 1) / k = sigma * expm1(-k log1p(-p)) / k   (k != 0)
    Q(p) = -sigma * log1p(-p)                                                   (k == 0)

    Parameters
    ----------
    p : array_like
        Probabilities in [0, 1).
    k, sigma : array_like
        Shape and scale; broadcast against ``p``.

    Returns
    -------
    ndarray, the broadcast shape of the inputs.
    """
    p = np.asarray(p, dtype=float)
    k = np.asarray(k, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    lg = np.log1p(-p)
    zero = k == 0
    ks = np.where(zero, 1.0, k)
    with np.errstate(over="ignore", invalid="ignore"):
        q = np.where(zero, -sigma * lg, sigma * np.expm1(-ks * lg) / ks)
    return q
