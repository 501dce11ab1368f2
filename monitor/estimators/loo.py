"""PSIS-LOO: leave-one-out predictive accuracy from posterior draws.

Vehtari, Gelman & Gabry (2017), "Practical Bayesian model evaluation using leave-one-out
cross-validation and WAIC", Statistics and Computing 27, 1413-1432; the smoothing is PSIS
(Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72)), see :mod:`.psis`.

For observation i with draws ll_s = log p(y_i | theta_s), s = 1..S, the raw ratios are
w_s = exp(-ll_s); PSIS replaces the M largest by smoothed weights w~_s, and

    elpd_i = log( sum_s w~_s p_s / sum_s w~_s ),             p_s = exp(ll_s)
    var_i  = sum_s wbar_s^2 (p_s - E_i)^2 / r_eff_i,         wbar = w~ / sum w~, E_i = exp(elpd_i)
    mcse_i = sqrt(var_i) / E_i                                (delta method for the log)

Totals: elpd = sum_i elpd_i, SE = sqrt(n var_i(elpd_i)) (sample variance, ddof = 1),
p_eff = lppd - elpd with lppd = sum_i log mean_s p_s.

MCSE of the total: every observation uses the same draws, so the Monte Carlo errors of the elpd_i
are correlated and sqrt(sum_i mcse_i^2) (kept as ``mcse_independent``) understates the error of
the sum. ``mcse`` is the joint value of :func:`joint_mcse` (delta method applied to the whole sum,
see docs/numerics.md):

    a_s  = sum_i wbar_is (p_is - E_i) / E_i                    (one number per draw)
    MCSE = sqrt( sum_s a_s^2 / r_a ),  r_a = ESS(a) / S          (ESS of the series a_s, chains kept)

Only the tail depends on order statistics. Every body draw (not among the M largest ratios) keeps
w_s = exp(-ll_s), so w_s p_s = 1 and its contributions to all sums above are given by three numbers
per observation: the body count, sum exp(-ll) and sum exp(-2 ll). :func:`loo_from_parts` computes
the estimate from the sorted lower part of the log-likelihoods plus those body sums; the batch
function and the streaming scorer both call it, which is what makes them agree to rounding.

Conventions (per observation):
* NaN or +inf log-likelihood in any draw: the observation is *bad*: elpd_i = NaN, mcse_i = NaN,
  k-hat = +inf, and the totals are NaN (never a partial sum passed off as complete); the indices are
  listed under ``bad_observations``.
* -inf log-likelihood in a draw (likelihood zero; its ratio is +inf): the importance-sampling
  estimate of p(y_i | y_-i) is 0, so elpd_i = -inf, mcse_i = +inf, k-hat = +inf; totals become
  elpd -inf, se / mcse / p_eff +inf; listed under ``zero_likelihood_observations``.
* too few draws for a tail fit (M < 5): raw ratios, k-hat = +inf, ``too_few_draws`` = True.
* flat tail (e.g. a constant column): k-hat = -inf, elpd exact.
"""

from __future__ import annotations

import numpy as np

from .psis import MIN_TAIL, psis, sample_size_threshold, smooth_tail, tail_length

__all__ = ["psis_loo", "loo_from_parts", "tail_summaries", "rest_sums", "loo_from_summaries", "as_draws_matrix", "lse_columns", "joint_mcse",
           "joint_mcse_parts", "joint_mcse_finish"]

_BLOCK_ELEMENTS = 1 << 22  # observations are processed in blocks of about this many values
_LOO_BLOCK_ELEMENTS = 1 << 20  # psis_loo: values per (observations, draws) block (cache-sized)


def as_draws_matrix(loglik, what: str = "loglik") -> np.ndarray:
    """Validate a log-likelihood array and return it as (S, n) float64.

    Accepts (chains, draws, n) or (draws, n); raises ValueError naming the problem otherwise.
    """
    a = np.asarray(loglik)
    if a.dtype == object or not (np.issubdtype(a.dtype, np.floating) or np.issubdtype(a.dtype, np.integer)):
        raise ValueError(f"{what}: expected a numeric array, got dtype {a.dtype}")
    if a.ndim == 3:
        a = a.reshape(-1, a.shape[-1])
    elif a.ndim != 2:
        raise ValueError(f"{what}: expected shape (chains, draws, n) or (draws, n), got {a.shape}")
    if a.shape[0] < 2:
        raise ValueError(f"{what}: need at least 2 draws, got {a.shape[0]}")
    if a.shape[1] < 1:
        raise ValueError(f"{what}: need at least 1 observation, got shape {a.shape}")
    return np.asarray(a, dtype=float)


def lse_columns(a: np.ndarray) -> np.ndarray:
    """log sum_s exp(a_s) over axis 0 (max-shifted; -inf for an all -inf column)."""
    m = a.max(axis=0)
    ms = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(divide="ignore"):
        return np.log(np.exp(a - ms).sum(axis=0)) + ms


def _col_blocks(S: int, n: int):
    step = max(1, _BLOCK_ELEMENTS // max(S, 1))
    for a in range(0, n, step):
        yield a, min(n, a + step)


def tail_summaries(low, lengths) -> dict:
    """The PSIS tail of each observation reduced to the sums the PSIS-LOO estimate needs.

    Parameters
    ----------
    low : ndarray, shape (n, W)
        Row i: at least the M_i + 1 smallest log-likelihoods of observation i, sorted ascending.
    lengths : ndarray of int, shape (n,)
        Tail length M_i (:func:`.psis.tail_length`); M_i + 1 <= W.

    Returns
    -------
    dict of (n,) arrays:
        ``zero`` (a -inf draw), ``shift`` c = -min ll (0 for a zero row), ``cut`` the (M_i + 1)-th
        smallest log-likelihood (the largest log ratio outside the tail), ``k`` (Pareto k-hat),
        ``top`` L = max(0, max_tail (lw + ll)) and, with u = w~ e^{-c} and v = w~ p e^{-L} over the
        M_i tail draws (w~ the smoothed ratios, p = exp ll): ``su`` = sum u, ``su2`` = sum u^2,
        ``sv`` = sum v, ``sv2`` = sum v^2, ``svu`` = sum v u.

    Notes
    -----
    These depend only on the M_i + 1 smallest values (tail and cutoff; PSIS, Vehtari, Simpson,
    Gelman, Yao & Gabry 2024, JMLR 25(72): the fit uses the M_i exceedances over the cutoff and the
    smoothed weights are truncated at the largest raw ratio), so they stay valid while M_i and
    those values do not change (:mod:`.tail_buffer` caches them between snapshots).
    """
    n, W = low.shape
    rows = np.arange(n)
    M = np.asarray(lengths, dtype=np.int64)
    z = np.arange(W)[None, :]
    minll = low[:, 0]
    zero = minll == -np.inf
    c = np.where(zero, 0.0, -minll)
    # the M smallest log-likelihoods = the M largest ratios; ascending ratios = reversed order
    pos = np.where(z < M[:, None], M[:, None] - 1 - z, 0)[:, : int(M.max())]
    with np.errstate(invalid="ignore"):
        rt = -np.take_along_axis(low, pos, axis=1)
        cutoff = -low[rows, M]
    lw, k = smooth_tail(rt, M, cutoff)
    tv = (z[:, : rt.shape[1]] < M[:, None])
    # (overflow only in rows with a -inf draw, whose results are fixed by the zero flag)
    with np.errstate(invalid="ignore", over="ignore"):
        lu = np.where(tv, lw - c[:, None], -np.inf)  # log u on the tail
        lv = np.where(tv, lw - rt, -np.inf)  # log v on the tail (w~ p = exp(lw + ll))
        u = np.exp(lu)
        # the rest is never empty (S - M_i >= 1 draws with v = e^{-L}): v is shifted by max(0, max lv)
        top = np.maximum(0.0, lv.max(axis=1))
        top = np.where(np.isfinite(top), top, 0.0)
        v = np.exp(lv - top[:, None])
        return {"zero": zero, "shift": c, "cut": -cutoff, "k": k, "top": top, "su": u.sum(axis=1),
                "su2": (u * u).sum(axis=1), "sv": v.sum(axis=1), "sv2": (v * v).sum(axis=1),
                "svu": (v * u).sum(axis=1)}


def rest_sums(low, n_low, lengths, body_count, body_shift, body_s1, body_s2, shift):
    """Count and sums over every draw outside the tail, at the shift c of :func:`tail_summaries`.

    The rest is the entries M_i .. n_low[i] - 1 of ``low`` plus the body (``body_count`` draws with
    s1 = sum exp(-ll - body_shift), s2 = sum exp(-2 ll - 2 body_shift)). Returns ``(count, r1, r2)``
    with r1 = sum exp(-ll - c), r2 = sum exp(-2 ll - 2 c) over the rest (every term <= 1).
    """
    W = low.shape[1]
    M = np.asarray(lengths, dtype=np.int64)
    z = np.arange(W)[None, :]
    c = shift
    extra = (z >= M[:, None]) & (z < np.asarray(n_low)[:, None])
    with np.errstate(over="ignore", invalid="ignore"):
        e = np.where(extra, np.exp(np.where(extra, -low, 0.0) - c[:, None]), 0.0)
        scale = np.exp(body_shift - c)
        scale = np.where(body_count > 0, scale, 0.0)
        r1 = np.where(body_count > 0, body_s1 * scale, 0.0) + e.sum(axis=1)
        r2 = np.where(body_count > 0, body_s2 * scale * scale, 0.0) + (e * e).sum(axis=1)
    count = body_count + extra.sum(axis=1)
    return count, r1, r2


def loo_from_summaries(tail: dict, count, r1, r2, r_eff):
    """elpd_i and mcse_i from the tail summaries and the rest sums (count, r1, r2) at shift c.

    Every rest draw keeps its raw ratio, so w p = 1 for it: with vb = e^{-L},
    U = r1 + su, V = count vb + sv and

        elpd_i = L + log V - c - log U
        var_i / E_i^2 = (count vb^2 + sv2) / V^2 - 2 (r1 vb + svu) / (V U) + (r2 + su2) / U^2,

    mcse_i = sqrt(var_i / E_i^2 / r_eff_i) (delta method for the log; Vehtari, Gelman & Gabry
    2017, Statistics and Computing 27). Zero rows: elpd -inf, mcse +inf, k-hat +inf.
    """
    zero, c, L = tail["zero"], tail["shift"], tail["top"]
    vb = np.exp(-L)
    U = r1 + tail["su"]
    V = count * vb + tail["sv"]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # only in -inf (zero) rows, replaced below
        elpd = L + np.log(V) - c - np.log(U)
        sv2 = count * vb * vb + tail["sv2"]
        svu = r1 * vb + tail["svu"]
        su2 = r2 + tail["su2"]
        rel = sv2 / (V * V) - 2.0 * svu / (V * U) + su2 / (U * U)
    rel = np.maximum(rel, 0.0)
    mcse = np.sqrt(rel / r_eff)
    elpd = np.where(zero, -np.inf, elpd)
    mcse = np.where(zero, np.inf, mcse)
    k = np.where(zero, np.inf, tail["k"])
    return elpd, mcse, k


def loo_from_parts(low, n_low, lengths, body_count, body_shift, body_s1, body_s2, r_eff):
    """PSIS-LOO per observation from the lowest log-likelihoods and the body sums.

    Parameters
    ----------
    low : ndarray, shape (n, W)
        Row i: the smallest log-likelihood values of observation i, sorted ascending; the first
        ``n_low[i]`` are real draws, the rest padding. W >= M_i + 1.
    n_low : ndarray of int, shape (n,)
        Number of real draws in each row of ``low``.
    lengths : ndarray of int, shape (n,)
        Tail length M_i (:func:`.psis.tail_length`); M_i + 1 <= n_low[i].
    body_count : ndarray, shape (n,)
        Number of draws not in ``low`` (all >= every value in ``low``).
    body_shift, body_s1, body_s2 : ndarray, shape (n,)
        For those draws: s1 = sum exp(-ll - shift), s2 = sum exp(-2 ll - 2 shift).
    r_eff : ndarray, shape (n,)

    Returns
    -------
    elpd : ndarray (n,), mcse : ndarray (n,), k : ndarray (n,)

    Notes
    -----
    With c = -low[:, 0] (the largest ratio), u_s = w~_s e^{-c} and v_s = w~_s p_s (= 1 in the body),
    U = sum u, V = sum v: elpd_i = log V - c - log U and
    var_i / E_i^2 = sum v^2 / V^2 - 2 sum v u / (V U) + sum u^2 / U^2, divided by r_eff_i.
    Computed as :func:`tail_summaries` + :func:`rest_sums` + :func:`loo_from_summaries`.
    """
    tail = tail_summaries(low, lengths)
    count, r1, r2 = rest_sums(low, n_low, lengths, body_count, body_shift, body_s1, body_s2, tail["shift"])
    return loo_from_summaries(tail, count, r1, r2, r_eff)


def totals(pointwise: np.ndarray, bad: np.ndarray) -> tuple[float, float]:
    """Sum and SE = sqrt(n var_i(x_i)) (ddof = 1) of pointwise values, with the bad/-inf rules.

    Any bad observation -> (NaN, NaN); any -inf value -> (-inf, +inf).
    """
    n = pointwise.size
    if np.any(bad):
        return float("nan"), float("nan")
    if np.any(pointwise == -np.inf):
        return float("-inf"), float("inf")
    se = float(np.sqrt(n * np.var(pointwise, ddof=1))) if n > 1 else 0.0
    return float(pointwise.sum()), se


def finish_loo(elpd_i, mcse_i, k, lppd_i, bad, zero, S, too_few) -> dict:
    """Assemble the PSIS-LOO result dict from pointwise values (shared by batch and streaming)."""
    elpd_i = np.where(bad, np.nan, elpd_i)
    mcse_i = np.where(bad, np.nan, mcse_i)
    k = np.where(bad, np.inf, k)
    elpd, se = totals(elpd_i, bad)
    if np.any(bad):
        mcse = p_eff = float("nan")
    else:
        mcse = float(np.sqrt(np.sum(mcse_i**2)))
        p_eff = float(np.sum(lppd_i) - elpd) if np.isfinite(elpd) else float("inf")
    return {
        "elpd": elpd,
        "se": se,
        "mcse": mcse,  # replaced by the joint value where the draws are at hand (psis_loo)
        "mcse_independent": mcse,
        "mcse_method": "independent",
        "p_eff": p_eff,
        "pointwise": elpd_i,
        "mcse_pointwise": mcse_i,
        "pareto_k": k,
        "k_threshold": sample_size_threshold(S),
        "draws": int(S),
        "bad_observations": np.flatnonzero(bad).tolist(),
        "zero_likelihood_observations": np.flatnonzero(zero & ~bad).tolist(),
        "flat_tail_observations": np.flatnonzero(k == -np.inf).tolist(),
        "too_few_draws": bool(too_few),
    }


def _r_eff_vector(r_eff, n: int) -> np.ndarray:
    if r_eff is None:
        r_eff = 1.0
    r = np.asarray(r_eff, dtype=float)
    if r.ndim == 0:
        r = np.full(n, float(r))
    if r.shape != (n,):
        raise ValueError(f"r_eff must be a scalar or shape ({n},), got {r.shape}")
    if np.any(~(r > 0)) or np.any(~np.isfinite(r)):
        raise ValueError("r_eff must be positive and finite")
    return r


def _as_chain_blocks(loglik, what: str) -> np.ndarray:
    """(chains, draws, n) float64 view of a log-likelihood block; (draws, n) is one chain."""
    a = np.asarray(loglik, dtype=float)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3:
        raise ValueError(f"{what}: expected shape (chains, draws, n) or (draws, n), got {a.shape}")
    if a.shape[1] < 2 or a.shape[2] < 1:
        raise ValueError(f"{what}: need at least 2 draws per chain and 1 observation, got {a.shape}")
    return a


def joint_mcse_parts(block, r_eff=None) -> np.ndarray:
    """Per-draw contributions a_s of a block of observations to the error of the PSIS-LOO total.

    Formula (the delta method applied to the whole sum; docs/numerics.md): with wbar_is the
    normalised Pareto-smoothed weights of observation i (:func:`.psis.psis` of r_is = -ll_is, tail
    length from ``r_eff``), p_is = exp(ll_is) and E_i = sum_s wbar_is p_is = exp(elpd_i),

        a_s = sum_{i in block} wbar_is (p_is - E_i) / E_i
            = sum_{i in block} ( exp(lw_is + ll_is - log E_i) - exp(lw_is) ).

    The a_s of disjoint blocks of observations add: run the blocks of a store one after another,
    sum what they return and finish with :func:`joint_mcse_finish`.

    Parameters
    ----------
    block : array_like, shape (chains, draws, nb) or (draws, nb)
        Log-likelihood of nb observations, every draw, chains in their order.
    r_eff : float or array_like (nb,), optional
        The relative efficiencies used for PSIS-LOO of these observations (default 1.0); they set
        the tail length, so pass the same values as the scorer uses.

    Returns
    -------
    ndarray, shape (chains, draws): the partial sums a_s. NaN everywhere when an observation of
    the block has a NaN or +inf log-likelihood (the total is undefined), +inf everywhere when one
    has a -inf log-likelihood (elpd -inf, MCSE +inf), following :mod:`.loo`'s conventions.

    Reference: pointwise MCSE of PSIS-LOO, Vehtari, Gelman & Gabry (2017), Statistics and
    Computing 27, Sec. 2.3, section number from memory (self-normalised importance sampling with
    the delta method); PSIS
    weights from Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72).
    """
    a = _as_chain_blocks(block, "joint_mcse_parts")
    m, d, nb = a.shape
    S = m * d
    r = _r_eff_vector(r_eff, nb)
    out = np.zeros((m, d))
    ll = a.reshape(S, nb)
    nan_col = np.isnan(ll).any(axis=0) | (ll == np.inf).any(axis=0)
    if nan_col.any():
        return np.full((m, d), np.nan)
    zero_col = (ll == -np.inf).any(axis=0)
    if zero_col.any():
        return np.full((m, d), np.inf)
    step = max(1, _LOO_BLOCK_ELEMENTS // S)
    flat = out.reshape(S)
    for lo in range(0, nb, step):
        hi = min(nb, lo + step)
        x = ll[:, lo:hi]
        lw, _ = psis(-x, r[lo:hi])  # normalised: logsumexp over draws = 0
        lwx = lw + x  # log(wbar p)
        v = np.exp(lwx - lwx.max(axis=0))
        v /= v.sum(axis=0)  # wbar p / E_i
        v -= np.exp(lw)  # minus wbar
        flat += v.sum(axis=1)
    return out


def joint_mcse_finish(parts) -> float:
    """MCSE of the PSIS-LOO total from the summed per-draw contributions a_s.

    Formula: MCSE = sqrt( sum_s a_s^2 / r_a ), r_a = ESS(a) / S, with ESS the multi-chain
    effective sample size of the split chains of a (:func:`.mixing.ess`, Vehtari, Gelman, Simpson,
    Carpenter & Buerkner 2021, Bayesian Analysis 16(2)), clipped to [1/S, log10 S] as for r_eff;
    with fewer than 4 draws per chain (no autocorrelation estimate) r_a = 1. sum_s a_s = 0 exactly
    (E_i is the weighted mean of p_is), so sum_s a_s^2 = S var(a) and the formula is
    S var(a) tau_a, the variance of a sum of S autocorrelated terms (tau_a = 1 / r_a).

    Parameters
    ----------
    parts : array_like, shape (chains, draws) (or (draws,) for one chain)
        The sum over all observations of :func:`joint_mcse_parts`.

    Returns
    -------
    float: NaN when a part is NaN, +inf when a part is infinite, else the MCSE in nats.
    """
    from .mixing import MIN_DRAWS_PER_CHAIN, ess

    p = np.asarray(parts, dtype=float)
    if p.ndim == 1:
        p = p[None]
    if p.ndim != 2 or p.size == 0:
        raise ValueError(f"joint_mcse_finish: expected parts shaped (chains, draws), got {p.shape}")
    if np.isnan(p).any():
        return float("nan")
    if np.isinf(p).any():
        return float("inf")
    S = p.size
    ss = float(np.sum(p * p))
    if ss == 0.0:
        return 0.0
    r_a = 1.0
    if p.shape[1] >= MIN_DRAWS_PER_CHAIN:
        e = ess(p, split=True)
        if np.isfinite(e):
            r_a = float(np.clip(e / S, 1.0 / S, np.log10(S))) if S > 1 else 1.0
    return float(np.sqrt(ss / r_a))


def joint_mcse(loglik, r_eff=None) -> float:
    """Joint MCSE of the PSIS-LOO total elpd (all observations at once).

    :func:`joint_mcse_finish` of :func:`joint_mcse_parts`, with the observations processed in
    blocks. ``loglik`` is (chains, draws, n) or (draws, n) (one chain); ``r_eff`` a scalar or (n,).

    Derivation (docs/numerics.md). The published pointwise MCSE (Vehtari, Gelman & Gabry 2017;
    PSIS weights of Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72)) is the delta method on
    one self-normalised ratio: E_i_hat - E_i ~ sum_s wbar_is (p_is - E_i), hence
    log E_i_hat - log E_i ~ sum_s wbar_is (p_is - E_i) / E_i and
    Var ~ sum_s wbar_is^2 (p_is - E_i)^2 / (E_i^2 r_eff_i). Summing the first-order errors over
    observations *before* taking the variance,

        elpd_hat - elpd ~ sum_i sum_s wbar_is (p_is - E_i) / E_i = sum_s a_s,

    a sum over draws of one number per draw in which the observations' errors keep their signs
    (the draws are shared, so the errors are correlated). For independent draws Var(sum_s a_s) is
    estimated by sum_s a_s^2 (= S var(a), since sum_s a_s = 0); autocorrelated draws multiply it by
    the integrated autocorrelation time of a_s, 1 / r_a with r_a = ESS(a) / S. With n = 1 this is
    the published pointwise MCSE with r_eff taken from the series a_s. New here (not in the
    papers): the delta method applied to the whole sum instead of term by term, and the relative
    efficiency of a_s for it. The quadrature sqrt(sum_i mcse_i^2) assumes independent errors and
    is too small when the observations share draws (by about 1.4-1.6 for a conjugate normal model
    with independent draws).
    """
    a = _as_chain_blocks(loglik, "joint_mcse")
    return joint_mcse_finish(joint_mcse_parts(a, r_eff))


def psis_loo(loglik, r_eff=None) -> dict:
    """PSIS-LOO estimate of the expected log pointwise predictive density.

    Parameters
    ----------
    loglik : array_like, shape (chains, draws, n) or (draws, n)
        Pointwise log-likelihood log p(y_i | theta_s).
    r_eff : float or array_like (n,), optional
        Relative efficiency of the draws for each observation (default 1.0); enters the tail length
        and the MCSE.

    Returns
    -------
    dict with ``elpd``, ``se``, ``mcse`` (the joint MCSE of the total, :func:`joint_mcse`; chains
    are kept apart for its ESS), ``mcse_independent`` (sqrt(sum_i mcse_i^2), which treats the
    observations' errors as independent and understates the total's error; for reference),
    ``mcse_method`` ("joint"), ``p_eff``, ``pointwise`` (n,), ``mcse_pointwise`` (n,),
    ``pareto_k`` (n,), ``k_threshold``, ``draws``, ``lppd_pointwise`` (n,), and the flags
    ``bad_observations``, ``zero_likelihood_observations``, ``flat_tail_observations``,
    ``too_few_draws`` (see the module docstring for the conventions).

    Reference: Vehtari, Gelman & Gabry (2017), Statistics and Computing 27; PSIS from Vehtari,
    Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72).
    """
    ll = as_draws_matrix(loglik)
    S, n = ll.shape
    r = _r_eff_vector(r_eff, n)
    M = np.broadcast_to(tail_length(S, r), (n,))
    elpd = np.empty(n)
    mcse = np.empty(n)
    k = np.empty(n)
    lppd = np.empty(n)
    bad = np.zeros(n, dtype=bool)
    zero = np.zeros(n, dtype=bool)
    step = max(1, _LOO_BLOCK_ELEMENTS // S)
    for a in range(0, n, step):  # blocks of observations, each (observations, draws) contiguous
        b = min(n, a + step)
        blk = ll[:, a:b].T.copy()  # a copy: the caller's array is never written to
        mx = blk.max(axis=1)
        bd = ~(mx < np.inf)  # NaN or +inf somewhere in the column
        if bd.any():
            blk[bd] = 0.0
            mx[bd] = 0.0
        bad[a:b] = bd
        Mb = M[a:b]
        W = int(Mb.max()) + 1
        if W < S:
            blk.partition(W - 1, axis=1)  # the W smallest first (the multiset is unchanged)
        low = np.sort(blk[:, :W], axis=1)
        zero[a:b] = low[:, 0] == -np.inf
        ms = np.where(np.isfinite(mx), mx, 0.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            lppd[a:b] = np.log(np.exp(blk - ms[:, None]).sum(axis=1)) + ms - np.log(S)
            shift = -low[:, W - 1]
            shift = np.where(np.isfinite(shift), shift, 0.0)
            rest = blk[:, W:]  # body draws, all >= low[:, W - 1]: exp(-ll - shift) <= 1, in place
            np.negative(rest, out=rest)
            rest -= shift[:, None]
            np.exp(rest, out=rest)
        s1 = rest.sum(axis=1)
        s2 = np.einsum("ij,ij->i", rest, rest)
        cnt = np.full(b - a, float(S - W))
        e_, m_, k_ = loo_from_parts(low, np.full(b - a, W), Mb, cnt, shift, s1, s2, r[a:b])
        elpd[a:b], mcse[a:b], k[a:b] = e_, m_, k_
    out = finish_loo(elpd, mcse, k, lppd, bad, zero, S, int(M.min()) < MIN_TAIL)
    out["lppd_pointwise"] = np.where(bad, np.nan, lppd)
    if np.isfinite(out["mcse_independent"]):
        chains = np.asarray(loglik).shape[0] if np.ndim(loglik) == 3 else 1
        out["mcse"] = joint_mcse(ll.reshape(chains, S // chains, n), r)
        out["mcse_method"] = "joint"
    return out
