"""AIC and DIC from posterior draws: coarse references next to WAIC and PSIS-LOO.

Both work on the total log-likelihood of each draw, T_s = sum_i ll_si, s = 1..S, and are reported in
the elpd scale (higher is better; multiply by -2 for the deviance scale).

* AIC (Akaike 1974, "A new look at the statistical model identification", IEEE TAC 19(6)):
  elpd_AIC = max log-likelihood - n_params, with the maximum taken as the supplied ``point_loglik``
  when given, else the best draw max_s T_s. p_eff = n_params. Undefined (None) when n_params is
  unknown.
* DIC (Spiegelhalter, Best, Carlin & van der Linde 2002, JRSS B 64(4)) with the variance penalty
  p_DIC = 2 var_s(T_s) (sample variance, ddof = 1; Gelman et al. 2013, Bayesian Data Analysis,
  3rd ed., sec. 7.2): elpd_DIC = point_loglik - p_DIC when ``point_loglik`` (the log-likelihood at
  a point estimate) is given, else mean_s T_s - p_DIC / 2 (the posterior mean of the log-likelihood,
  which equals log p(y | theta_hat) - p_DIC/2 to first order).

Conventions: any bad observation (NaN/+inf) makes both NaN; a -inf value makes DIC elpd -inf with
p_eff +inf, and AIC uses the best draw (which is finite if any draw has every value finite).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["aic", "dic", "aic_from_max", "dic_from_moments"]


def aic_from_max(max_total: float, n_params, point_loglik=None, any_bad: bool = False):
    """AIC in the elpd scale from the best total log-likelihood; None when n_params is unknown."""
    if n_params is None:
        return None
    if any_bad:
        return {"elpd": float("nan"), "p_eff": float(n_params)}
    best = float(point_loglik) if point_loglik is not None else float(max_total)
    return {"elpd": best - float(n_params), "p_eff": float(n_params)}


def dic_from_moments(mean_total: float, m2_total: float, S: int, point_loglik=None,
                     any_bad: bool = False, any_zero: bool = False) -> dict:
    """DIC in the elpd scale from the mean and sum of squared deviations of T_s over S draws."""
    if any_bad:
        return {"elpd": float("nan"), "p_eff": float("nan")}
    if any_zero:
        return {"elpd": float("-inf"), "p_eff": float("inf")}
    p = 2.0 * m2_total / (S - 1)
    if point_loglik is not None:
        return {"elpd": float(point_loglik) - p, "p_eff": p}
    return {"elpd": float(mean_total) - p / 2.0, "p_eff": p}


def _totals(loglik):
    from .loo import as_draws_matrix

    ll = as_draws_matrix(loglik)
    T = ll.sum(axis=1)
    any_bad = bool(np.any(np.isnan(ll)) or np.any(ll == np.inf))
    any_zero = bool(np.any(ll == -np.inf))
    return T, any_bad, any_zero


def aic(loglik, n_params, point_loglik=None):
    """AIC in the elpd scale: max_s sum_i ll_si (or ``point_loglik``) - n_params.

    Parameters
    ----------
    loglik : array_like (chains, draws, n) or (draws, n)
    n_params : int or None (None -> returns None)
    point_loglik : float, optional, the maximised log-likelihood if known.

    Returns
    -------
    dict {elpd, p_eff} or None. Reference: Akaike (1974).
    """
    if n_params is None:
        return None
    T, any_bad, _ = _totals(loglik)
    with np.errstate(invalid="ignore"):
        mx = float(np.max(T))
    return aic_from_max(mx, n_params, point_loglik, any_bad)


def dic(loglik, point_loglik=None) -> dict:
    """DIC in the elpd scale with p_DIC = 2 var_s(sum_i ll_si).

    Parameters
    ----------
    loglik : array_like (chains, draws, n) or (draws, n)
    point_loglik : float, optional, log p(y | theta_hat) at a point estimate.

    Returns
    -------
    dict {elpd, p_eff}. Reference: Spiegelhalter et al. (2002); Gelman et al. (2013), BDA3 sec. 7.2.
    """
    T, any_bad, any_zero = _totals(loglik)
    S = T.size
    if any_bad or any_zero:
        return dic_from_moments(math.nan, math.nan, S, point_loglik, any_bad, any_zero)
    mean = float(T.mean())
    m2 = float(np.sum((T - mean) ** 2))
    return dic_from_moments(mean, m2, S, point_loglik)
