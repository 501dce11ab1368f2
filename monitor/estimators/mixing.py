"""Mixing diagnostics for MCMC draws: rank-normalised split R-hat, bulk and tail ESS, MCSE of the
mean, and the relative efficiency r_eff used by PSIS-LOO.

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Buerkner, P.-C. (2021). Rank-normalization,
    folding, and localization: an improved R-hat for assessing convergence of MCMC. Bayesian
    Analysis 16(2), 667-718.  (Called "VGSCB 2021" below.)
Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science 7(4), 473-483.
Vehtari, A., Gelman, A. & Gabry, J. (2017). Practical Bayesian model evaluation using leave-one-out
    cross-validation and WAIC. Statistics and Computing 27, 1413-1432.  (r_eff, Section 3.2.)
Blom, G. (1958). Statistical estimates and transformed beta-variables. Wiley.  (Offset 3/8.)

Conventions
-----------
Every diagnostic takes ``x`` shaped ``(chains, draws)``; a 1-D array is read as one chain.
Chains are split in half before any diagnostic (VGSCB 2021, Sec. 3): with an odd number of draws
the middle draw is dropped so both halves have equal length.  At least 4 draws per chain are
needed (2 per half); with fewer, or when the draws are constant, the diagnostics are NaN.
Non-finite draws raise ``ValueError``.  Pure numpy/scipy, no I/O.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy import fft as sp_fft

from ._blocks import for_each_block

__all__ = [
    "MIN_DRAWS_PER_CHAIN",
    "split_chains",
    "rank_normalize",
    "autocovariance",
    "rhat_basic",
    "split_rhat",
    "ess",
    "ess_bulk",
    "ess_tail",
    "ess_mean",
    "mcse_of_mean",
    "mixing_summary",
    "relative_efficiency",
]

#: Fewer draws per chain than this (before splitting) give NaN diagnostics.
MIN_DRAWS_PER_CHAIN = 4

# Upper bound on the number of float64 values handled by one FFT block in the vectorised ESS.
_BLOCK_ELEMENTS = 1 << 18


# ---------------------------------------------------------------------------------------------
# input handling


def _as_chains(x, what: str = "x") -> np.ndarray:
    """Return ``x`` as a float64 array ``(chains, draws)``; raise on bad shape or non-finite values."""
    a = np.asarray(x, dtype=float)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2:
        raise ValueError(f"{what}: expected an array shaped (chains, draws), got shape {a.shape}")
    if a.shape[0] < 1 or a.shape[1] < 1:
        raise ValueError(f"{what}: no draws (shape {a.shape})")
    if not np.all(np.isfinite(a)):
        c, d = np.argwhere(~np.isfinite(a))[0]
        raise ValueError(f"{what}: non-finite value {a[c, d]!r} at chain {c}, draw {d}")
    return a


def split_chains(x) -> np.ndarray:
    """Split each chain into its first and second half.

    Formula: chain m with draws 1..N becomes chains (m, first half) and (m, second half), each of
    length floor(N/2); for odd N the middle draw is dropped (VGSCB 2021, Sec. 3, "split-R-hat").

    Parameters
    ----------
    x : array_like, shape (chains, draws, ...)
        Extra trailing axes (e.g. observations) are carried along.

    Returns
    -------
    ndarray, shape (2*chains, draws // 2, ...)
        Halves ordered [chain0-first, chain1-first, ..., chain0-second, chain1-second, ...].
    """
    a = np.asarray(x)
    if a.ndim < 2:
        raise ValueError(f"split_chains: expected at least 2 axes (chains, draws), got {a.shape}")
    n = a.shape[1]
    half = n // 2
    return np.concatenate([a[:, :half], a[:, n - half:]], axis=0)


def rank_normalize(x) -> np.ndarray:
    """Rank-normalise draws pooled over all chains.

    Formula (VGSCB 2021, eq. for z^(nm); fractional offset of Blom 1958):
        z = Phi^{-1}((r - 3/8) / (S - 2*3/8 + 1)),
    with r the average rank (ties share the mean rank) of each draw among all S draws of all chains
    and Phi^{-1} the standard normal quantile function.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    ndarray, shape (chains, draws)
    """
    a = _as_chains(x)
    return _rank_normalize_cols(a[:, :, None])[:, :, 0]


def autocovariance(x, axis: int = -1) -> np.ndarray:
    """Biased autocovariance of each series along ``axis``, computed with the FFT.

    Formula: gamma_t = (1/N) sum_{n=0}^{N-1-t} (x_n - xbar)(x_{n+t} - xbar), t = 0..N-1, obtained
    as the inverse FFT of |FFT(x - xbar)|^2 with zero padding to at least 2N (Wiener-Khinchin;
    VGSCB 2021, Sec. 3.2 uses FFT autocorrelations).

    Parameters
    ----------
    x : array_like, any shape, series along ``axis`` (length N)

    Returns
    -------
    ndarray, same shape as ``x``: lag t at position t along ``axis``.
    """
    a = np.moveaxis(np.asarray(x, dtype=float), axis, -1)
    n = a.shape[-1]
    centred = a - a.mean(axis=-1, keepdims=True)
    size = sp_fft.next_fast_len(2 * n, real=True)
    f = sp_fft.rfft(centred, n=size, axis=-1)
    acov = sp_fft.irfft(f.real**2 + f.imag**2, n=size, axis=-1)[..., :n] / n
    return np.moveaxis(acov, -1, axis)


# ---------------------------------------------------------------------------------------------
# column-vectorised cores: a is (M chains, N draws, K columns), finite float64


def _rank_normalize_cols(a: np.ndarray) -> np.ndarray:
    """Rank normalisation (see :func:`rank_normalize`) of each column k, pooled over chains and draws."""
    m, n, k = a.shape
    total = m * n
    from scipy import stats  # here, not at import: scipy.stats takes a second to import

    cols = np.ascontiguousarray(a.reshape(total, k).T)  # (K, S): sort along contiguous rows
    r = stats.rankdata(cols, axis=1, method="average")
    return np.ascontiguousarray(stats.norm.ppf((r - 0.375) / (total - 0.75 + 1.0)).T).reshape(m, n, k)


def _rhat_cols(a: np.ndarray) -> np.ndarray:
    """R-hat of the chains as given (no splitting, no ranks), one value per column; NaN if W = 0."""
    m, n, k = a.shape
    if n < 2:
        return np.full(k, np.nan)
    w = a.var(axis=1, ddof=1).mean(axis=0)
    b_over_n = a.mean(axis=1).var(axis=0, ddof=1) if m > 1 else np.zeros(k)
    var_plus = (n - 1.0) / n * w + b_over_n
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(w > 0, np.sqrt(var_plus / w), np.nan)


def _split_rhat_cols(a: np.ndarray, z: np.ndarray | None = None) -> np.ndarray:
    """max(bulk, folded) rank-normalised split R-hat per column (see :func:`split_rhat`);
    ``z`` may pass in the already rank-normalised split chains."""
    s = split_chains(a)
    bulk = _rhat_cols(_rank_normalize_cols(s) if z is None else z)
    folded = _rhat_cols(_rank_normalize_cols(np.abs(s - np.median(s.reshape(-1, s.shape[2]), axis=0))))
    # np.fmax ignores a NaN folded value (|x - median| constant, e.g. two symmetric values)
    return np.fmax(bulk, folded)


def _ess_bulk_cols(a: np.ndarray, z: np.ndarray | None = None) -> np.ndarray:
    return _ess_vectorised(_rank_normalize_cols(split_chains(a)) if z is None else z)


def _ess_tail_cols(a: np.ndarray) -> np.ndarray:
    k = a.shape[2]
    q = np.quantile(a.reshape(-1, k), [0.05, 0.95], axis=0)  # (2, K)
    s = split_chains(a)
    indicators = np.concatenate([s <= q[0], s <= q[1]], axis=2).astype(float)  # (2M, N/2, 2K)
    vals = _ess_vectorised(indicators)
    return np.minimum(vals[:k], vals[k:])  # NaN if either indicator is constant


def _mcse_mean_cols(a: np.ndarray) -> np.ndarray:
    k = a.shape[2]
    sd = a.reshape(-1, k).std(axis=0, ddof=1)
    ess_vals = _ess_vectorised(split_chains(a))
    with np.errstate(invalid="ignore", divide="ignore"):
        out = sd / np.sqrt(ess_vals)
    return np.where(np.ptp(a.reshape(-1, k), axis=0) == 0, 0.0, out)


def _ess_vectorised(a: np.ndarray) -> np.ndarray:
    """Multi-chain ESS of chains a (M, N, K) as given (no splitting): one value per column k.

    See :func:`ess` for the formula.  NaN where the within-chain variance is zero or N < 2.
    """
    m, n, k = a.shape
    out = np.full(k, np.nan)
    if n < 2:
        return out
    total = m * n
    tau_floor = 1.0 / math.log10(total) if total > 1 else 1.0
    size = sp_fft.next_fast_len(2 * n, real=True)
    block = max(1, _BLOCK_ELEMENTS // (m * size))
    pairs = n // 2
    for start in range(0, k, block):
        stop = min(k, start + block)
        part = a[:, :, start:stop]  # (M, N, Kb)
        means = part.mean(axis=1)  # (M, Kb)
        # centred series, zero padded along the draws axis to avoid wrap-around: (M, size, Kb)
        y = np.zeros((m, size, stop - start), dtype=np.float64)
        np.subtract(part, means[:, None, :], out=y[:, :n, :], casting="same_kind")
        f = sp_fft.rfft(y, axis=1)
        power = f.real**2 + f.imag**2  # |FFT|^2, (M, size//2+1, Kb)
        # chain-averaged biased autocovariance (Wiener-Khinchin), (N, Kb);
        # s_m^2 rho_{t,m} = acov_{t,m} N/(N-1)
        acov_mean = sp_fft.irfft(power.mean(axis=0), n=size, axis=0)[:n].astype(float) / n
        mean_term = acov_mean * (n / (n - 1.0))
        w = mean_term[0]  # W = mean_m s_m^2
        b_over_n = means.var(axis=0, ddof=1) if m > 1 else np.zeros(stop - start)
        var_plus = (n - 1.0) / n * w + b_over_n
        good = w > 0
        with np.errstate(invalid="ignore", divide="ignore"):
            rho = 1.0 - (w - mean_term) / var_plus
        p = rho[0:2 * pairs:2] + rho[1:2 * pairs:2]  # (pairs, Kb): P_t = rho_2t + rho_2t+1
        # initial positive sequence: keep P_t up to (not including) the first non-positive pair
        keep = np.logical_and.accumulate(p > 0, axis=0)
        # initial monotone sequence: P_t <- min(P_0..P_t)
        p_mono = np.minimum.accumulate(p, axis=0)
        tau = -1.0 + 2.0 * np.where(keep, p_mono, 0.0).sum(axis=0)
        tau = np.maximum(tau, tau_floor)
        out[start:stop] = np.where(good, total / tau, np.nan)
    return out


# ---------------------------------------------------------------------------------------------
# R-hat


def rhat_basic(x, split: bool = True) -> float:
    """R-hat of the raw values (no rank normalisation), split by default.

    Formula (VGSCB 2021, Sec. 3.1; Gelman et al. BDA3 Sec. 11.4): for M chains of N draws,
        W = mean_m s_m^2,  B/N = var_m(mean_n theta_nm)  (sample variances, ddof 1),
        var+ = (N-1)/N W + B/N,  R-hat = sqrt(var+ / W).

    Parameters
    ----------
    x : array_like, shape (chains, draws)
    split : bool
        Split each chain in two first (recommended; detects trends within a chain).

    Returns
    -------
    float; NaN for constant draws or fewer than 4 draws per chain (2 if ``split`` is False).
    """
    a = _as_chains(x)
    if split:
        if a.shape[1] < MIN_DRAWS_PER_CHAIN:
            return float("nan")
        a = split_chains(a)
    return float(_rhat_cols(a[:, :, None])[0])


def _one_parameter(x, per_column) -> float:
    """A column-vectorised diagnostic on one parameter's (chains, draws); NaN below 4 draws per chain."""
    a = _as_chains(x)
    if a.shape[1] < MIN_DRAWS_PER_CHAIN:
        return float("nan")
    return float(per_column(a[:, :, None])[0])


def split_rhat(x) -> float:
    """Rank-normalised split R-hat: the larger of bulk R-hat and folded R-hat.

    Formula (VGSCB 2021, Sec. 4.1-4.2):
        bulk   = R-hat(z(split(x))),
        folded = R-hat(z(split(|x - median(x)|))),
        split_rhat = max(bulk, folded),
    with z the rank normalisation of :func:`rank_normalize` (pooled over all split chains), R-hat
    as in :func:`rhat_basic` and the median over all draws.  Folding makes chains with equal
    location but different scale visible.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float; NaN for constant draws or fewer than 4 draws per chain.
    """
    return _one_parameter(x, _split_rhat_cols)


# ---------------------------------------------------------------------------------------------
# ESS


def ess(x, split: bool = True) -> float:
    """Multi-chain effective sample size of the raw values.

    Formula (VGSCB 2021, Sec. 3.2; Geyer 1992): with M chains of N draws, per-chain FFT
    autocorrelations rho_{t,m}, W and var+ as in :func:`rhat_basic`,
        rho_t = 1 - (W - (1/M) sum_m s_m^2 rho_{t,m}) / var+,
        P_t = rho_{2t} + rho_{2t+1},  kept while P_t > 0 (initial positive sequence) and made
        non-increasing, P_t <- min_{t' <= t} P_{t'} (initial monotone sequence),
        tau = -1 + 2 sum_t P_t,  tau >= 1/log10(MN) (a guard against runaway values for
        antithetic chains, as proposed in VGSCB 2021 (from memory)),  ESS = M N / tau,
    so ESS <= M N log10(M N).

    Parameters
    ----------
    x : array_like, shape (chains, draws)
    split : bool
        Split chains in half first (default; the ESS then also reflects trends within chains).

    Returns
    -------
    float; NaN for constant draws or fewer than 4 draws per chain.
    """
    a = _as_chains(x)
    if split:
        if a.shape[1] < MIN_DRAWS_PER_CHAIN:
            return float("nan")
        a = split_chains(a)
    return float(_ess_vectorised(a[:, :, None])[0])


def ess_mean(x) -> float:
    """ESS for the posterior mean: :func:`ess` of the split raw draws (VGSCB 2021, Sec. 3.2).

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float; NaN for constant draws or fewer than 4 draws per chain.
    """
    return ess(x, split=True)


def ess_bulk(x) -> float:
    """Bulk effective sample size: ESS of the rank-normalised split chains.

    Formula (VGSCB 2021, Sec. 4.1): ess_bulk = ESS(z(split(x))), ESS as in :func:`ess` and z the
    rank normalisation of :func:`rank_normalize` over all split chains.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float; NaN for constant draws or fewer than 4 draws per chain.
    """
    return _one_parameter(x, _ess_bulk_cols)


def ess_tail(x) -> float:
    """Tail effective sample size: the smaller ESS of the 5% and 95% quantile indicators.

    Formula (VGSCB 2021, Sec. 4.3):
        ess_tail = min(ESS(I(x <= q_0.05)), ESS(I(x <= q_0.95))),
    with q the empirical quantiles (linear interpolation) over all draws and ESS as in :func:`ess`
    on split chains.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float; NaN for constant draws, fewer than 4 draws per chain, or when an indicator is constant
    (e.g. a discrete parameter with a mass of more than 95% at one value).
    """
    return _one_parameter(x, _ess_tail_cols)


def mcse_of_mean(x) -> float:
    """Monte Carlo standard error of the posterior mean.

    Formula (VGSCB 2021, Sec. 3.2): MCSE = sd(x) / sqrt(ESS_mean(x)), with sd over all draws of all
    chains (ddof 1) and ESS_mean from :func:`ess_mean`.  For a stationary chain this estimates
    sqrt(sigma^2_longrun / S), sigma^2_longrun = var * tau.

    Parameters
    ----------
    x : array_like, shape (chains, draws)

    Returns
    -------
    float; 0.0 for constant draws; NaN for fewer than 4 draws per chain.
    """
    return _one_parameter(x, _mcse_mean_cols)


# ---------------------------------------------------------------------------------------------
# summaries


def _none_if_nan(v: float) -> float | None:
    return None if v is None or not math.isfinite(v) else float(v)


def mixing_summary(draws, names: Sequence[str]) -> dict:
    """Mixing diagnostics for every parameter, plus the worst values over parameters.

    For each parameter j (VGSCB 2021): ``mean`` (over all draws), ``mcse`` (:func:`mcse_of_mean`),
    ``rhat`` (:func:`split_rhat`), ``ess_bulk`` (:func:`ess_bulk`), ``ess_tail`` (:func:`ess_tail`).
    Posterior summaries of the pooled draws x_1..x_S (S = chains * draws, all retained draws):

        sd  = sqrt(sum_s (x_s - mean)^2 / (S - 1))           (sample standard deviation, ddof 1)
        q05, q95 = the 5% and 95% quantiles, a central 90% interval, by linear interpolation
              between order statistics x_(1) <= ... <= x_(S): q_p = x_(h) + (h - floor h)
              (x_(floor h + 1) - x_(floor h)) with h = 1 + (S - 1) p (numpy's default method,
              Hyndman & Fan 1996 definition 7; the same quantiles ``ess_tail`` uses).

    Per chain m (for chains compared side by side): ``chain_means`` [mean_n x_nm] and ``chain_sds``
    [sd_n x_nm, ddof 1] (lists in the order of the chains axis; sd None for a chain of one draw).

    Parameters
    ----------
    draws : array_like, shape (chains, draws, p)
        A 2-D array (draws, p) is read as one chain.
    names : sequence of str, length p

    Returns
    -------
    dict
        ``{"rhat_max": float|None, "ess_bulk_min": float|None, "ess_tail_min": float|None,
        "params": {name: {"mean", "mcse", "rhat", "ess_bulk", "ess_tail", "sd", "q05", "q95",
        "chain_means", "chain_sds"}}}``, every value a Python float or ``None`` (JSON-friendly;
        the two per-chain entries are lists of them).  ``sd`` is None with a single draw in all.  ``None`` stands for "not defined": ``rhat``,
        ``ess_bulk`` and ``ess_tail`` of a constant parameter, and every diagnostic except ``mean``
        when a chain has fewer than 4 draws; a constant parameter has ``mcse`` 0.0.  The three
        headline values skip ``None`` entries and are ``None`` when no parameter has a value.

    Raises
    ------
    ValueError
        Wrong shape, ``names`` not of length p, duplicate names, or a non-finite draw (the message
        names the parameter, chain and draw).
    """
    a = np.asarray(draws, dtype=float)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3:
        raise ValueError(f"mixing_summary: expected draws shaped (chains, draws, p), got {a.shape}")
    names = [str(n) for n in names]
    if len(names) != a.shape[2]:
        raise ValueError(
            f"mixing_summary: {len(names)} names for {a.shape[2]} parameters (draws shape {a.shape})"
        )
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise ValueError(f"mixing_summary: duplicate parameter names {dup}")
    if a.shape[1] < 1:
        raise ValueError("mixing_summary: no draws")
    for j, name in enumerate(names):
        bad = ~np.isfinite(a[:, :, j])
        if bad.any():
            c, d = np.argwhere(bad)[0]
            raise ValueError(
                f"mixing_summary: parameter {name!r} has non-finite value {a[c, d, j]!r} "
                f"at chain {c}, draw {d}"
            )
    nan = np.full(a.shape[2], np.nan)
    enough = a.shape[1] >= MIN_DRAWS_PER_CHAIN
    z = _rank_normalize_cols(split_chains(a)) if enough else None  # shared by bulk R-hat and ESS
    cols = {
        "mean": a.mean(axis=(0, 1)),
        "mcse": _mcse_mean_cols(a) if enough else nan,
        "rhat": _split_rhat_cols(a, z) if enough else nan,
        "ess_bulk": _ess_bulk_cols(a, z) if enough else nan,
        "ess_tail": _ess_tail_cols(a) if enough else nan,
    }
    pooled = a.reshape(-1, a.shape[2])  # (S, p): every retained draw of every chain
    with np.errstate(invalid="ignore", divide="ignore"):
        cols["sd"] = pooled.std(axis=0, ddof=1) if pooled.shape[0] > 1 else nan
        chain_sds = a.std(axis=1, ddof=1) if a.shape[1] > 1 else np.full(a.shape[::2], np.nan)
    cols["q05"], cols["q95"] = np.quantile(pooled, [0.05, 0.95], axis=0)
    chain_means = a.mean(axis=1)  # (chains, p)
    params: dict[str, dict] = {
        name: {key: _none_if_nan(values[j]) for key, values in cols.items()}
        for j, name in enumerate(names)
    }
    for j, name in enumerate(names):
        params[name]["chain_means"] = [_none_if_nan(v) for v in chain_means[:, j]]
        params[name]["chain_sds"] = [_none_if_nan(v) for v in chain_sds[:, j]]

    def pick(key, fn):
        vals = [p[key] for p in params.values() if p[key] is not None]
        return float(fn(vals)) if vals else None

    return {
        "rhat_max": pick("rhat", max),
        "ess_bulk_min": pick("ess_bulk", min),
        "ess_tail_min": pick("ess_tail", min),
        "params": params,
    }


def _check_finite_loglik(part: np.ndarray, offset: int) -> None:
    """Raise ValueError naming the first non-finite entry of a (chains, draws, nb) block."""
    if np.isfinite(part).all():
        return
    c, d, i = np.argwhere(~np.isfinite(part))[0]
    raise ValueError(
        f"relative_efficiency: non-finite log-likelihood {part[c, d, i]!r} at observation index "
        f"{offset + i} (0-based), chain {c}, draw {d}"
    )


def relative_efficiency(loglik) -> np.ndarray:
    """Relative efficiency r_eff of every observation's likelihood draws, for PSIS-LOO.

    Formula (Vehtari, Gelman & Gabry 2017, Sec. 3.2; ESS of VGSCB 2021 as in :func:`ess`):
        r_eff_i = ESS(exp(loglik[:, :, i])) / S,   S = chains * draws,
    with the multi-chain ESS of the split chains (a single chain is split into two halves, so it is
    handled the same way).  Because ESS is invariant to scaling, exp(loglik_i - max_s loglik_i) is
    used for numerical safety.  All observations are processed together (FFT per block of
    observations), so n = 20,000 with 4 x 1,000 draws takes about 2 s of one CPU core.

    Range: r_eff is clipped to [1/S, log10(S)]: at least one effective draw, and at most the ceiling
    the tau >= 1/log10(S) guard of :func:`ess` already implies (r_eff > 1 arises for antithetic
    chains).  An observation whose likelihood is the same in every draw gets r_eff = 1 (every draw
    carries the same information), and so does every observation when a chain has fewer than 4
    draws (too few to estimate autocorrelation; 1 is the independent-draws value).

    Parameters
    ----------
    loglik : array_like, shape (chains, draws, n)
        Pointwise log-likelihood; a 2-D array (draws, n) is one chain.

    Returns
    -------
    ndarray, shape (n,)

    Raises
    ------
    ValueError
        Wrong shape or a non-finite log-likelihood (the message names the observation).
    """
    a = np.asarray(loglik, dtype=float)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3:
        raise ValueError(f"relative_efficiency: expected loglik shaped (chains, draws, n), got {a.shape}")
    m, n_draws, n_obs = a.shape
    if n_draws < 1 or n_obs < 1:
        raise ValueError(f"relative_efficiency: empty loglik (shape {a.shape})")
    if n_draws < MIN_DRAWS_PER_CHAIN:
        _check_finite_loglik(a, 0)
        return np.ones(n_obs)
    total = m * n_draws
    half = n_draws // 2
    size = sp_fft.next_fast_len(2 * half, real=True)
    block = max(1, 8 * _BLOCK_ELEMENTS // (2 * m * size))
    r = np.empty(n_obs)

    def observations(start, stop):
        part = a[:, :, start:stop]
        _check_finite_loglik(part, start)
        lik = np.exp(split_chains(part) - part.max(axis=(0, 1)))
        r[start:stop] = _ess_vectorised(lik) / total

    for_each_block(n_obs, block, observations)
    r = np.where(np.isfinite(r), r, 1.0)
    return np.clip(r, 1.0 / total, math.log10(total))


def finite_relative_efficiency(loglik) -> np.ndarray:
    """r_eff (n,) of a (chains, draws, n) block, with 1.0 for observations holding a non-finite value.

    Such observations get no trustworthy PSIS-LOO value anyway (the scorers flag them with k-hat =
    inf), so their r_eff only has to be defined, not meaningful; :func:`relative_efficiency` of the
    other observations is unchanged.
    """
    a = np.asarray(loglik, dtype=float)
    finite = np.isfinite(a).all(axis=(0, 1))
    if finite.all():
        return relative_efficiency(a)
    r_eff = np.ones(a.shape[2])
    if finite.any():
        r_eff[finite] = relative_efficiency(a[:, :, finite])
    return r_eff
