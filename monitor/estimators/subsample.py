"""Subsampled PSIS-LOO for very many observations: exact PSIS on a random sample, cheap moments for all.

Magnusson, Andersen, Jonasson & Vehtari (2019), "Bayesian leave-one-out cross-validation for large
data", Proceedings of the 36th International Conference on Machine Learning (ICML), PMLR 97.
(Recalled from memory: the difference estimator under simple random sampling without replacement
and its variance; the finite-population algebra below is the textbook survey-sampling result, e.g.
Cochran (1977), Sampling Techniques, 3rd ed., ch. 2 and 7.)

Every observation i = 1..n gets a cheap approximation a_i of its elpd_loo,i from the running
accumulators that WAIC needs anyway (a log-sum-exp and the mean / M2 of ll_si per observation): by
default the WAIC pointwise value a_i = lppd_i - var_s(ll_si) (Watanabe 2010), or lppd_i. PSIS-LOO
(Vehtari, Gelman & Gabry 2017) is computed exactly, from the full tail state, only for a simple
random sample J of m observations (drawn without replacement). With d_j = elpd_j - a_j,

    elpd_hat  = sum_{i=1}^n a_i + (n / m) sum_{j in J} d_j                 (difference estimator)
    Var_sub   = n^2 (1 - m / n) s_d^2 / m,   s_d^2 = sum_j (d_j - dbar)^2 / (m - 1)
    se_subsample = sqrt(Var_sub)

Var_sub is the subsampling variance of elpd_hat (the error from looking at m of the n
observations; it is 0 when m = n). The usual SE of elpd, sqrt(n sigma^2) with sigma^2 the variance
of the elpd_i over observations, is estimated from the difference estimates of sum_i elpd_i^2 and of
(sum_i elpd_i)^2 = elpd_hat^2 - Var_sub (unbiased under the sampling design; this correction is
written out here, the published estimator may differ in detail, from memory):

    Q_hat     = sum_i a_i^2 + (n / m) sum_{j in J} (elpd_j^2 - a_j^2)
    sigma2    = (Q_hat - (elpd_hat^2 - Var_sub) / n) / (n - 1),      se = sqrt(n sigma2)

p_eff = sum_i lppd_i - elpd_hat (lppd is known for every observation). The Monte Carlo error of the
total counts the sampled PSIS terms only: mcse = (n / m) sqrt(sum_{j in J} mcse_j^2) (the
approximations' own Monte Carlo error is left out). Pareto k-hat is known for the sampled
observations only; the others carry NaN.

Limit (measured in tests/test_subsample.py): Var_sub is unbiased, but when one or a few
observations dominate the differences d_i (very heavy-tailed data), most samples miss them and the
typical se_subsample is too small (by a factor of 3 for t-distributed data with 3 degrees of
freedom, n = 2000, m = 200); a larger m, or the observations with large Pareto k-hat in the sample
on the next pass, are the remedies.

:func:`subsampled_elpd` is the pure estimator; :class:`SubsampledScorer` keeps the state as draws
arrive: the WAIC accumulators for all n (O(n) memory) and a :class:`.streaming.StreamingScorer`
over the m sampled observations (O(m K) memory for its tail buffer).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable

import numpy as np

from .information import aic_from_max, dic_from_moments
from .loo import _r_eff_vector
from .psis import sample_size_threshold
from .running import RunningMoments
from .scores import Scores, assemble
from .streaming import StreamingScorer, as_block, mask_bad_columns
from .waic import waic_from_moments

__all__ = ["subsampled_elpd", "subsample_indices", "SubsampledScorer"]


def subsample_indices(n: int, m: int, seed) -> np.ndarray:
    """A simple random sample of m of the observations 0..n-1 (without replacement), sorted."""
    if not 1 <= m <= n:
        raise ValueError(f"subsample size m must be in 1..{n}, got {m}")
    return np.sort(np.random.default_rng(seed).choice(n, size=int(m), replace=False))


def subsampled_elpd(approx, sample, exact, *, exact_mcse=None) -> dict:
    """The difference estimator of the PSIS-LOO total from a simple random sample of observations.

    Parameters
    ----------
    approx : array_like (n,), the cheap approximation a_i of every observation's elpd_loo,i.
    sample : array_like of int (m,), the sampled observations (distinct; simple random sample).
    exact : array_like (m,), PSIS-LOO elpd_j of the sampled observations (same order as sample).
    exact_mcse : array_like (m,), optional, their pointwise MCSE.

    Returns
    -------
    dict: ``elpd`` (elpd_hat), ``se`` (sqrt(n sigma2)), ``se_subsample`` (sqrt(Var_sub)), ``mcse``
    ((n/m) sqrt(sum mcse_j^2), NaN without exact_mcse), ``m``, ``n``. Formulas in the module
    docstring (Magnusson, Andersen, Jonasson & Vehtari 2019, ICML). A NaN among the inputs gives NaN
    results; a -inf elpd_j gives elpd -inf and infinite SEs.
    """
    a = np.asarray(approx, dtype=float)
    J = np.asarray(sample, dtype=np.int64)
    e = np.asarray(exact, dtype=float)
    n, m = a.size, J.size
    if a.ndim != 1 or e.shape != (m,) or m < 1 or m > n:
        raise ValueError(f"subsampled_elpd: approx (n,), sample (m,), exact (m,) with 1 <= m <= n; "
                         f"got {a.shape}, {J.shape}, {e.shape}")
    if np.unique(J).size != m or J.min() < 0 or J.max() >= n:
        raise ValueError("subsampled_elpd: the sample must hold distinct observation indices in 0..n-1")
    out = {"m": int(m), "n": int(n)}
    mcse = float("nan")
    if exact_mcse is not None:
        mcse = (n / m) * float(np.sqrt(np.sum(np.asarray(exact_mcse, dtype=float) ** 2)))
    if np.isnan(a).any() or np.isnan(e).any():
        return {**out, "elpd": math.nan, "se": math.nan, "se_subsample": math.nan, "mcse": math.nan}
    if np.any(e == -np.inf) or np.any(a == -np.inf):
        return {**out, "elpd": -math.inf, "se": math.inf, "se_subsample": math.inf, "mcse": math.inf}
    d = e - a[J]
    elpd = float(a.sum() + (n / m) * d.sum())
    s2 = float(np.var(d, ddof=1)) if m > 1 else 0.0
    var_sub = n * n * (1.0 - m / n) * s2 / m
    q = float(np.sum(a * a) + (n / m) * np.sum(e * e - a[J] ** 2))
    if n > 1:
        sigma2 = max((q - (elpd * elpd - var_sub) / n) / (n - 1), 0.0)
        se = math.sqrt(n * sigma2)
    else:
        se = 0.0
    return {**out, "elpd": elpd, "se": se, "se_subsample": math.sqrt(var_sub), "mcse": mcse}


class SubsampledScorer:
    """PSIS-LOO by subsampling, kept up to date as draws arrive (the same add / scores API).

    Parameters
    ----------
    n : int, observations.
    m : int, sampled observations with the exact PSIS state (m = n: every observation, i.e. the
        full PSIS-LOO estimate).
    seed : the sample's seed (:func:`subsample_indices`).
    approx : "waic" (default: lppd_i - var_s ll_si) or "lppd", the approximation for all n.
    column_reader : callable(columns) -> ndarray (total draws, len(columns)), optional
        Every draw so far of the given observations; used only when the sampled tail buffer must
        grow (as ``reader`` of :class:`.streaming.StreamingScorer`).
    n_params, point_loglik, expected_draws, initial_k : as for StreamingScorer.
    sample : array_like of int (m,), optional
        The sampled observations to use instead of drawing them (distinct, in 0..n-1; kept sorted):
        a scorer restored or rebuilt for a run whose sample was recorded keeps that sample.

    ``scores(r_eff)`` takes a scalar or an (n,) r_eff (only the sampled values are used) and
    returns :class:`.scores.Scores` with ``subsampled = {"m", "n", "se_subsample", "approx"}``:
    ``loo`` totals from :func:`subsampled_elpd`; ``loo_pointwise`` holds the exact PSIS-LOO values
    at the sampled observations and the approximation a_i elsewhere; ``pareto_k`` and
    ``loo_mcse_pointwise`` are NaN outside the sample. WAIC, DIC and AIC cover every observation.
    """

    def __init__(self, n: int, m: int, seed=0, *, approx: str = "waic",
                 column_reader: Callable[[np.ndarray], np.ndarray] | None = None, n_params=None,
                 point_loglik=None, expected_draws: int | None = None, initial_k: int | None = None,
                 sample=None):
        if not isinstance(n, (int, np.integer)) or n < 1:
            raise ValueError(f"SubsampledScorer: n must be a positive integer, got {n!r}")
        if approx not in ("waic", "lppd"):
            raise ValueError(f"SubsampledScorer: approx must be 'waic' or 'lppd', got {approx!r}")
        self.n = int(n)
        if sample is None:
            self.sample = subsample_indices(self.n, int(m), seed)
        else:
            self.sample = np.sort(np.asarray(sample, dtype=np.int64))
            if (self.sample.ndim != 1 or not 1 <= self.sample.size <= self.n
                    or np.unique(self.sample).size != self.sample.size
                    or self.sample[0] < 0 or self.sample[-1] >= self.n):
                raise ValueError(f"SubsampledScorer: sample must hold 1..{self.n} distinct indices in "
                                 f"0..{self.n - 1}")
        self.m = int(self.sample.size)
        self.approx = approx
        self.n_params = n_params
        self.point_loglik = point_loglik
        reader = None
        if column_reader is not None:
            reader = lambda a, b: column_reader(self.sample[a:b])  # noqa: E731
        self._exact = StreamingScorer(self.m, reader=reader, expected_draws=expected_draws, initial_k=initial_k)
        self._lse_m = np.full(self.n, -np.inf)
        self._lse_s = np.zeros(self.n)
        self._moments_mean = np.zeros(self.n)
        self._moments_m2 = np.zeros(self.n)
        self._bad = np.zeros(self.n, dtype=bool)
        self._zero = np.zeros(self.n, dtype=bool)  # a -inf draw seen (likelihood zero)
        self._totals = RunningMoments(1)
        self._chain_draws: dict[Hashable, int] = {}
        self.draws = 0

    @property
    def chains(self) -> int:
        return len(self._chain_draws)

    @property
    def rebuilds(self) -> int:
        return self._exact.rebuilds

    @property
    def k(self) -> int:
        return self._exact.k

    def state_nbytes(self) -> int:
        return self._exact.state_nbytes() + 5 * 8 * self.n

    def chain_draws(self) -> dict:
        return dict(self._chain_draws)

    _VECTORS = ("_lse_m", "_lse_s", "_moments_mean", "_moments_m2", "_bad", "_zero")

    def to_state(self) -> dict:
        """The whole state as plain arrays (no objects): the sample, the O(n) running vectors, the
        draw totals' moments, and the exact scorer's state under ``exact_*`` keys
        (``StreamingScorer.to_state``).  ``from_state`` restores it; further :meth:`add` calls then
        give the same results as the uninterrupted scorer."""
        names = list(self._chain_draws)
        state = {name.lstrip("_"): getattr(self, name).copy() for name in self._VECTORS}
        state.update({
            "subsample_format": np.asarray(1, dtype=np.int64),
            "n": np.asarray(self.n, dtype=np.int64),
            "sample": self.sample.copy(),
            "approx": np.asarray(self.approx, dtype=np.str_),
            "draws": np.asarray(self.draws, dtype=np.int64),
            "n_params": np.asarray(np.nan if self.n_params is None else float(self.n_params)),
            "point_loglik": np.asarray(np.nan if self.point_loglik is None else float(self.point_loglik)),
            "chain_names": np.asarray([str(c) for c in names], dtype=np.str_),
            "chain_counts": np.asarray([self._chain_draws[c] for c in names], dtype=np.int64),
        })
        state.update({f"totals_{k}": v for k, v in self._totals.to_state().items()})
        state.update({f"exact_{k}": v for k, v in self._exact.to_state().items()})
        return state

    @classmethod
    def from_state(cls, state: dict, *, column_reader=None) -> "SubsampledScorer":
        """A scorer restored from :meth:`to_state` (arrays as saved, or as loaded from an npz)."""
        if int(state["subsample_format"]) != 1:
            raise ValueError(f"SubsampledScorer.from_state: unknown format {int(state['subsample_format'])}")
        n_params, point = float(state["n_params"]), float(state["point_loglik"])
        out = cls(int(state["n"]), 1, sample=state["sample"], approx=str(state["approx"]),
                  column_reader=column_reader, n_params=None if math.isnan(n_params) else int(n_params),
                  point_loglik=None if math.isnan(point) else point, initial_k=2)
        for name in cls._VECTORS:
            value = np.array(state[name.lstrip("_")])
            if value.shape != (out.n,):
                raise ValueError(f"SubsampledScorer.from_state: {name.lstrip('_')} has shape {value.shape}, "
                                 f"expected ({out.n},)")
            setattr(out, name, value)
        out.draws = int(state["draws"])
        out._chain_draws = {str(c): int(v) for c, v in zip(state["chain_names"], state["chain_counts"])}
        out._totals = RunningMoments.from_state({k[len("totals_"):]: v for k, v in state.items()
                                                 if k.startswith("totals_")})
        reader = out._exact.reader
        out._exact = StreamingScorer.from_state({k[len("exact_"):]: v for k, v in state.items()
                                                 if k.startswith("exact_")}, reader=reader)
        if out._exact.n != out.m or out._exact.draws != out.draws:
            raise ValueError("SubsampledScorer.from_state: the exact state does not match the sample")
        return out

    def add(self, chain, block) -> None:
        """Add a block (draws, n) of one chain."""
        x = as_block(block, self.n, "SubsampledScorer.add")
        B = x.shape[0]
        if B == 0:
            return
        x = np.asarray(x, dtype=float)
        self._exact.accumulate(x[:, self.sample])
        na, tot = self.draws, self.draws + B
        T = np.zeros(B)
        step = max(1, (1 << 17) // B)  # observation chunks: cache-sized temporaries
        for a in range(0, self.n, step):
            b = min(self.n, a + step)
            xc = x[:, a:b]
            xc, colmax, badc = mask_bad_columns(xc)
            self._bad[a:b] |= badc
            self._zero[a:b] |= xc.min(axis=0) == -np.inf
            T += xc.sum(axis=1)
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                # running log-sum-exp and Chan et al. (1983) mean / M2, as in StreamingScorer
                lm = self._lse_m[a:b]
                ms = np.maximum(lm, colmax)
                ms = np.where(np.isfinite(ms), ms, 0.0)
                self._lse_s[a:b] = self._lse_s[a:b] * np.exp(lm - ms) + np.exp(xc - ms).sum(axis=0)
                self._lse_m[a:b] = ms
                bmean = xc.sum(axis=0) / B
                bm2 = ((xc - bmean) ** 2).sum(axis=0)
                delta = bmean - self._moments_mean[a:b]
                self._moments_mean[a:b] += delta * (B / tot)
                self._moments_m2[a:b] += bm2 + delta * delta * (na * B / tot)
        self._totals.update(T)
        self.draws = tot
        self._chain_draws[chain] = self._chain_draws.get(chain, 0) + B

    def scores(self, r_eff=None, *, run=None) -> Scores:
        S, n = self.draws, self.n
        if S < 2:
            raise ValueError(f"SubsampledScorer.scores: need at least 2 draws, have {S}")
        r = _r_eff_vector(r_eff, n)
        ex = self._exact.scores(r[self.sample])
        with np.errstate(divide="ignore"):
            lse = self._lse_m + np.log(self._lse_s)
        zero = self._zero & ~self._bad
        w = waic_from_moments(lse, S, self._moments_m2, self._bad, zero)
        lppd = np.where(self._bad, np.nan, lse - np.log(S))
        approx = w["pointwise"] if self.approx == "waic" else lppd
        sub = subsampled_elpd(approx, self.sample, ex.loo_pointwise, exact_mcse=ex.loo_mcse_pointwise)
        bad = self._bad
        if bad.any():
            p_eff = math.nan
        elif math.isfinite(sub["elpd"]):
            p_eff = float(np.sum(lppd) - sub["elpd"])
        else:
            p_eff = math.inf
        pointwise = np.array(approx, dtype=float)
        pointwise[self.sample] = ex.loo_pointwise
        k = np.full(n, np.nan)
        k[self.sample] = ex.pareto_k
        k[bad] = np.inf
        mcse_i = np.full(n, np.nan)
        mcse_i[self.sample] = ex.loo_mcse_pointwise
        loo = {"elpd": sub["elpd"], "se": sub["se"], "mcse": sub["mcse"], "mcse_independent": sub["mcse"],
               "mcse_method": "independent", "p_eff": p_eff, "pointwise": pointwise, "mcse_pointwise": mcse_i,
               "pareto_k": k, "k_threshold": sample_size_threshold(S), "draws": S,
               "bad_observations": np.flatnonzero(bad).tolist(),
               "zero_likelihood_observations": np.flatnonzero(zero & ~bad).tolist(),
               "flat_tail_observations": np.flatnonzero(k == -np.inf).tolist(),
               "too_few_draws": ex.flags["too_few_draws"]}
        any_bad, any_zero = bool(bad.any()), bool((zero & ~bad).any())
        t = self._totals
        dic = dic_from_moments(float(t.mean[0]), float(t.m2[0]), S, self.point_loglik, any_bad, any_zero)
        aic = aic_from_max(float(t.max[0]), self.n_params, self.point_loglik, any_bad)
        out = assemble(loo, w, dic, aic, r, chains=self.chains, run=run)
        out.subsampled = {"m": self.m, "n": n, "se_subsample": sub["se_subsample"], "approx": self.approx}
        return out

