"""Comparison of runs fitted to the same data: elpd differences, their standard errors and Monte Carlo
errors, and stacking weights.

References
----------
Vehtari, A., Gelman, A. & Gabry, J. (2017). Practical Bayesian model evaluation using leave-one-out
    cross-validation and WAIC. Statistics and Computing 27, 1413-1432.  (SE of the difference,
    Sec. 5.2.)
Sivula, T., Magnusson, M., Matamoros, A. A. & Vehtari, A. Uncertainty in Bayesian leave-one-out
    cross-validation based model comparison.  (When SE(Delta) is too optimistic.)
Yao, Y., Vehtari, A., Simpson, D. & Gelman, A. (2018). Using stacking to average Bayesian predictive
    distributions. Bayesian Analysis 13(3), 917-1007.  (Stacking of predictive distributions.)

Pure numpy/scipy, no I/O.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
from scipy.special import logsumexp

__all__ = ["CAUTION_DELTA", "CAUTION_N", "compare_runs", "pairwise_differences", "stacking_weights"]

#: |Delta elpd| below this many nats: SE(Delta) is likely too optimistic (Sivula et al.).
CAUTION_DELTA = 4.0
#: Fewer observations than this: SE(Delta) is likely too optimistic (Sivula et al.).
CAUTION_N = 100


def stacking_weights(lpd_points) -> np.ndarray:
    """Stacking weights of K predictive distributions from their pointwise LOO log densities.

    Formula (Yao, Vehtari, Simpson & Gelman 2018, eq. 4 with the LOO densities of Sec. 3.2):
        w = argmax_{w in simplex}  sum_i log sum_k w_k exp(lpd_ik).
    Solved with the softmax parametrisation w = softmax(beta), beta_K = 0, by L-BFGS-B with the
    analytic gradient
        d/d beta_j = sum_i (pi_ij - w_j),   pi_ij = w_j exp(lpd_ij) / sum_k w_k exp(lpd_ik),
    everything evaluated with log-sum-exp after subtracting each row's maximum (which does not
    move the optimum).  beta is bounded to [-50, 50], so a weight can fall to about e^-100 (an
    optimum on the edge of the simplex).  The objective is concave in w, so the optimum value is
    unique; when models are exactly identical, the weights are not identifiable and the start
    (equal weights) is returned.

    Parameters
    ----------
    lpd_points : array_like, shape (n, K)
        Pointwise log predictive densities (e.g. PSIS-LOO elpd_i) of K models on the same n
        observations.  A 1-D array is one model.

    Returns
    -------
    ndarray, shape (K,): non-negative weights summing to 1.

    Raises
    ------
    ValueError
        Wrong shape, no observations, or a non-finite entry (the message names observation and model).
    """
    lpd = np.asarray(lpd_points, dtype=float)
    if lpd.ndim == 1:
        lpd = lpd[:, None]
    if lpd.ndim != 2 or lpd.shape[0] < 1 or lpd.shape[1] < 1:
        raise ValueError(f"stacking_weights: expected lpd_points shaped (n, K) with n, K >= 1, got {lpd.shape}")
    bad = ~np.isfinite(lpd)
    if bad.any():
        i, k = np.argwhere(bad)[0]
        raise ValueError(
            f"stacking_weights: non-finite log density {lpd[i, k]!r} at observation index {i}, model {k}"
        )
    n, k = lpd.shape
    if k == 1:
        return np.ones(1)
    lpd = lpd - lpd.max(axis=1, keepdims=True)

    def negative_objective(beta_free):
        beta = np.append(beta_free, 0.0)
        log_w = beta - logsumexp(beta)
        joint = lpd + log_w  # (n, K): log(w_k p_ik)
        row = logsumexp(joint, axis=1)  # (n,): log sum_k w_k p_ik
        pi = np.exp(joint - row[:, None])  # responsibilities, rows sum to 1
        grad = pi.sum(axis=0) - n * np.exp(log_w)
        return -row.sum() / n, -grad[:-1] / n

    from scipy import optimize  # here, not at import: a command that never stacks does not pay for it

    res = optimize.minimize(
        negative_objective,
        np.zeros(k - 1),
        jac=True,
        method="L-BFGS-B",
        bounds=[(-50.0, 50.0)] * (k - 1),
        options={"ftol": 1e-14, "gtol": 1e-10, "maxiter": 10_000},
    )
    beta = np.append(res.x, 0.0)
    w = np.exp(beta - logsumexp(beta))
    return w / w.sum()


def compare_runs(pointwise: Mapping[str, np.ndarray], mcse: Mapping[str, float]) -> list[dict]:
    """Compare runs fitted to the same observations by their pointwise elpd.

    For runs a (best, largest elpd) and b with pointwise elpd vectors e_a, e_b of length n
    (Vehtari, Gelman & Gabry 2017, Sec. 5.2):
        elpd_b  = sum_i e_b,i,
        delta_b = elpd_b - elpd_a  (<= 0; 0 for the best run),
        se_delta_b = sqrt(n * var_i(e_b,i - e_a,i))  (sample variance, ddof 1; 0 for the best run,
                     NaN when n = 1),
        mcse_delta_b = sqrt(MCSE_a^2 + MCSE_b^2),
    with MCSE_a, MCSE_b the joint MCSEs of the two totals (:func:`.loo.joint_mcse`, ``loo.mcse`` of
    the scores; docs/numerics.md). The quadrature is exact for the variance of a difference of
    independent Monte Carlo errors, which holds for separate MCMC runs; it is approximate in that
    each MCSE is itself a first-order estimate. Runs sharing draws would have correlated errors
    (their difference would need the per-draw parts a_s of both). Passing the quadrature sums
    sqrt(sum_i mcse_i^2) instead understates MCSE(Delta) (tests/test_joint_mcse.py measures both).

    Flags (each describes the comparison of that row with the best; both False for the best row):
        caution  = |delta| < 4 or n < 100: SE(Delta) is then likely too optimistic and the normal
                   approximation poor (Sivula, Magnusson, Matamoros & Vehtari).
        may_flip = |delta| < 2 * mcse_delta: more draws could still change the order.
    ``weight`` is the stacking weight of the run among all runs (:func:`stacking_weights`).

    Parameters
    ----------
    pointwise : mapping run -> array_like, shape (n,)
        Pointwise elpd (e.g. PSIS-LOO elpd_i) of each run, all on the same n observations.
    mcse : mapping run -> float
        Monte Carlo standard error of each run's total elpd: the joint MCSE (``loo.mcse``).

    Returns
    -------
    list of dict, best run first (ties broken by run name), each with keys
        ``run`` (str), ``elpd``, ``delta``, ``se_delta``, ``mcse_delta``, ``weight`` (floats),
        ``caution``, ``may_flip`` (bool).

    Raises
    ------
    ValueError
        No runs; a run without an MCSE (or a negative / non-finite one); pointwise arrays that are
        not 1-D, empty or contain non-finite values (naming run and observation); runs with
        different n (naming the runs and their n).
    """
    vectors, mc = _checked(pointwise, mcse, "compare_runs")
    runs = list(vectors)
    elpd = {run: float(v.sum()) for run, v in vectors.items()}
    order = sorted(runs, key=lambda r: (-elpd[r], r))
    best = order[0]
    weights = stacking_weights(np.column_stack([vectors[r] for r in order]))

    rows = []
    for run, weight in zip(order, weights):
        if run == best:
            delta = se_delta = mcse_delta = 0.0
            caution = may_flip = False
        else:
            delta, se_delta, mcse_delta, caution, may_flip = _difference(
                vectors[best], vectors[run], mc[best], mc[run])
            delta = -delta  # this row's elpd minus the best's
        rows.append(
            {
                "run": run,
                "elpd": elpd[run],
                "delta": float(delta),
                "se_delta": float(se_delta),
                "mcse_delta": float(mcse_delta),
                "weight": float(weight),
                "caution": caution,
                "may_flip": may_flip,
            }
        )
    return rows


def _difference(e_a: np.ndarray, e_b: np.ndarray, mcse_a: float, mcse_b: float):
    """(delta, se_delta, mcse_delta, caution, may_flip) of run a against run b; delta is taken as
    sum(e_a) - sum(e_b), so it equals the difference of the elpd values the rows report exactly.

    See :func:`pairwise_differences` for the formulas; one place for both public functions.
    """
    n = e_a.size
    diff = e_a - e_b
    delta = float(e_a.sum()) - float(e_b.sum())
    se_delta = float(math.sqrt(n * diff.var(ddof=1))) if n > 1 else float("nan")
    mcse_delta = float(math.hypot(mcse_a, mcse_b))
    caution = bool(abs(delta) < CAUTION_DELTA or n < CAUTION_N)
    may_flip = bool(abs(delta) < 2.0 * mcse_delta)
    return delta, se_delta, mcse_delta, caution, may_flip


def pairwise_differences(pointwise: Mapping[str, np.ndarray], mcse: Mapping[str, float]) -> list[dict]:
    """Every pair of runs fitted to the same observations: elpd difference, its SE and its MCSE.

    The runs are ordered as :func:`compare_runs` orders them (larger elpd first, ties by name); for
    each unordered pair, run a the earlier and run b the later in that order, with pointwise elpd
    vectors e_a, e_b of length n (Vehtari, Gelman & Gabry 2017, Sec. 5.2, eq. 24):
        delta      = sum_i (e_a,i - e_b,i) = elpd_a - elpd_b  (>= 0 by the order),
        se_delta   = sqrt(n * var_i(e_a,i - e_b,i))  (sample variance, ddof 1; NaN when n = 1),
        mcse_delta = sqrt(MCSE_a^2 + MCSE_b^2),
    with MCSE_a, MCSE_b the joint MCSEs of the two totals (``loo.mcse``); the quadrature assumes the
    runs' Monte Carlo errors are independent (separate MCMC runs, see :func:`compare_runs`).
    Flags, the same rules as :func:`compare_runs` applied to the pair:
        caution  = |delta| < 4 or n < 100 (SE(Delta) likely too optimistic; Sivula et al.),
        may_flip = |delta| < 2 * mcse_delta (more draws could still swap the pair).
    The row of (best, other) equals, up to the sign of ``delta``, the ``compare_runs`` row of other.

    Parameters
    ----------
    pointwise : mapping run -> array_like, shape (n,)
        Pointwise elpd (e.g. PSIS-LOO elpd_i) of each run, all on the same n observations.
    mcse : mapping run -> float
        Monte Carlo standard error of each run's total elpd (the joint MCSE).

    Returns
    -------
    list of dict, K (K - 1) / 2 rows for K runs (empty for one run), pairs in the order
    (1, 2), (1, 3), ..., (2, 3), ... of the ranked runs, each with keys ``run_a``, ``run_b`` (str),
    ``delta``, ``se_delta``, ``mcse_delta`` (floats), ``caution``, ``may_flip`` (bool).

    Raises
    ------
    ValueError
        As :func:`compare_runs` (no runs, missing or bad MCSE, bad pointwise arrays, different n).
    """
    vectors, mc = _checked(pointwise, mcse, "pairwise_differences")
    elpd = {run: float(v.sum()) for run, v in vectors.items()}
    order = sorted(vectors, key=lambda r: (-elpd[r], r))
    rows = []
    for i, a in enumerate(order):
        for b in order[i + 1:]:
            delta, se_delta, mcse_delta, caution, may_flip = _difference(vectors[a], vectors[b], mc[a], mc[b])
            rows.append({"run_a": a, "run_b": b, "delta": delta, "se_delta": se_delta,
                         "mcse_delta": mcse_delta, "caution": caution, "may_flip": may_flip})
    return rows


def _checked(pointwise, mcse, where: str):
    """Validated ({run: (n,) float array}, {run: mcse}); ValueError naming the run and the problem."""
    if not pointwise:
        raise ValueError(f"{where}: no runs to compare")
    runs = [str(r) for r in pointwise]
    vectors: dict[str, np.ndarray] = {}
    for run, values in pointwise.items():
        v = np.asarray(values, dtype=float)
        if v.ndim != 1 or v.size == 0:
            raise ValueError(f"{where}: run {run!r}: pointwise elpd must be a non-empty 1-D array, got shape {v.shape}")
        bad = ~np.isfinite(v)
        if bad.any():
            i = int(np.argmax(bad))
            raise ValueError(f"{where}: run {run!r}: non-finite pointwise elpd {v[i]!r} at observation index {i}")
        vectors[str(run)] = v
    sizes = {run: v.size for run, v in vectors.items()}
    if len(set(sizes.values())) > 1:
        listing = ", ".join(f"{run!r} (n={size})" for run, size in sizes.items())
        raise ValueError(f"{where}: runs have different numbers of observations: {listing}")
    mc: dict[str, float] = {}
    for run in runs:
        if run not in mcse:
            raise ValueError(f"{where}: no MCSE given for run {run!r}")
        try:
            value = float(mcse[run])
        except (TypeError, ValueError):
            raise ValueError(f"{where}: run {run!r}: MCSE must be a number, got {mcse[run]!r}") from None
        if not (math.isfinite(value) and value >= 0):
            raise ValueError(f"{where}: run {run!r}: MCSE must be finite and >= 0, got {value!r}")
        mc[run] = value
    return vectors, mc
