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

p_eff = sum_i lppd_i - elpd_hat (lppd is known for every observation). Pareto k-hat is known for
the sampled observations only; the others carry NaN.

Monte Carlo error of elpd_hat (the error from finitely many draws, for the fixed sample J)
------------------------------------------------------------------------------------------
Every term of elpd_hat is a smooth function of averages over the S draws, so the delta method
(influence functions of those averages; e.g. van der Vaart 1998, Asymptotic Statistics, ch. 3 and
20) writes its Monte Carlo error to first order as an average over draws of one number per draw:
elpd_hat - E[elpd_hat] ~ (1/S) sum_s phi_s, with (p_si = exp(ll_si), r_si = exp(-ll_si))

    lppd_i  = log mean_s p_si            influence  p_si / exp(lppd_i) - 1
    V_i     = var_s ll_si                influence  (ll_si - mu_i)^2 - V_i
    elpd_j  = -log mean_s r_sj           influence  1 - r_sj / exp(R_j),  R_j = log mean_s r_sj
    a_i     = lppd_i - V_i (WAIC pointwise, Watanabe 2010), or lppd_i

    phi_s = sum_{i=1}^n psi^a_si + (n/m) sum_{j in J} (psi^elpd_sj - psi^a_sj)

The elpd_j influence is the self-normalised importance-sampling one behind the pointwise PSIS-LOO
MCSE of Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, sec. 2.3 (there with the
smoothed weights; here with the raw ratios r_sj, see the approximations below).  The same draws
enter elpd_j and a_j, so their influences largely cancel inside the second sum (for a nearly
normal ll_sj both are about ll_sj - mu_j): the Monte Carlo error of elpd_hat is about that of
sum_i a_i (near the full estimate's), not the (n/m) sqrt(sum_J mcse_j^2) of the sampled terms added
as if independent, which grows as n / sqrt(m).  For autocorrelated draws the variance of the mean of the series phi_s is
var(phi) / ESS(phi) (Geyer 1992; the project's multi-chain ESS of split chains, Vehtari, Gelman,
Simpson, Carpenter & Buerkner 2021, Bayesian Analysis 16(2)), exactly as the joint MCSE of a full
run (``loo.joint_mcse_finish`` with parts phi_s / S, centred):

    MCSE(elpd_hat) = sqrt( sum_s (phi_s - phibar)^2 / S^2 / r_phi ),   r_phi = ESS(phi) / S

Streaming: the first sum runs over all n observations, which only :meth:`SubsampledScorer.add`
sees, so phi_s is formed there, one number per draw (as the DIC totals T_s = sum_i ll_si), and
kept per chain (8 bytes per draw); the second sum needs the m sampled columns only.
Approximations (each checked in tests/test_subsample.py against the spread of elpd_hat over
independent replications of the draws):

* first order (delta method), as every published MCSE of PSIS-LOO;
* the influence of a draw is evaluated at the running state when the draw arrives (lppd_i, mu_i,
  V_i, R_j over the draws so far, its own block included), not at the final one.  The difference
  shrinks as 1/sqrt(draws) and touches early draws most; its effect on the variance is of order
  log(S)/S relative;
* the elpd_j influence uses the raw ratios r_sj, not the Pareto-smoothed weights (the draw a
  smoothed weight belongs to is not kept).  For k-hat <= 0.5 the two agree to first order; above,
  the raw-ratio variance is erratic, and above 0.7 the MCSE is not reliable either way (the
  verdict's k-hat check sends those observations to refits).

The quadrature of the sampled terms, (n/m) sqrt(sum_{j in J} mcse_j^2), is kept as
``mcse_independent`` (it ignores the cancellation and is about sqrt(n/m) times too large).

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

__all__ = ["subsampled_elpd", "subsample_indices", "difference_influence", "influence_mcse",
           "SubsampledScorer"]


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
    ((n/m) sqrt(sum mcse_j^2), NaN without exact_mcse: the sampled terms' quadrature, which ignores
    that elpd_j and a_j share the draws; the Monte Carlo error of elpd_hat needs the per-draw
    values, :class:`SubsampledScorer` reports it and keeps this one as ``mcse_independent``),
    ``m``, ``n``. Formulas in the module
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


def difference_influence(loglik, sample, approx: str = "waic") -> np.ndarray:
    """Per-draw influence phi_s of the difference estimator, at the final state (batch reference).

    Formula: the module docstring, "Monte Carlo error of elpd_hat" (delta method; the elpd_j part
    with raw importance ratios as in Vehtari, Gelman & Gabry 2017, sec. 2.3), with lppd_i, mu_i,
    V_i (ddof 1, as WAIC) and R_j over all the given draws.  :class:`SubsampledScorer` forms the
    same sums as draws arrive, at the running state; this function is what it approximates.

    Parameters
    ----------
    loglik : array_like (S, n) or (chains, draws, n), every draw of every observation.
    sample : array_like of int (m,), the sampled observations.
    approx : "waic" or "lppd", the approximation a_i.

    Returns
    -------
    ndarray, shape (S,) or (chains, draws): phi_s (finite inputs assumed).
    """
    x = np.asarray(loglik, dtype=float)
    shape = x.shape[:-1]
    x = x.reshape(-1, x.shape[-1])
    J = np.asarray(sample, dtype=np.int64)
    S, n = x.shape
    lppd = np.logaddexp.reduce(x, axis=0) - np.log(S)
    psi_a = np.exp(x - lppd) - 1.0
    if approx == "waic":
        mu = x.mean(axis=0)
        psi_a -= (x - mu) ** 2 - x.var(axis=0, ddof=1)
    R = np.logaddexp.reduce(-x[:, J], axis=0) - np.log(S)
    psi_e = 1.0 - np.exp(-x[:, J] - R)
    phi = psi_a.sum(axis=1) + (n / J.size) * (psi_e - psi_a[:, J]).sum(axis=1)
    return phi.reshape(shape)


def influence_mcse(series) -> float:
    """MCSE of an estimate whose first-order error is (1/S) sum_s phi_s, from the series phi_s.

    Formula: MCSE = sqrt( sum_s (phi_s - phibar)^2 / S^2 / r_phi ), r_phi = ESS(phi) / S clipped to
    [1/S, log10 S] (the multi-chain ESS of split chains, :func:`.mixing.ess`; Vehtari, Gelman,
    Simpson, Carpenter & Buerkner 2021, Bayesian Analysis 16(2); Geyer 1992), the same rule as
    :func:`.loo.joint_mcse_finish`.  Chains may differ in length: the sum of squares covers every
    draw; the ESS ratio is measured on the chains holding at least half the longest chain's draws,
    cut to the shortest of those (r_phi = 1 below 4 draws per chain).

    Parameters
    ----------
    series : sequence of 1-D arrays, phi_s per chain (S draws in all).

    Returns
    -------
    float: the MCSE; NaN if a value is NaN, +inf if one is infinite.
    """
    from .mixing import MIN_DRAWS_PER_CHAIN, ess

    chains = [np.asarray(c, dtype=float).ravel() for c in series if np.size(c)]
    if not chains:
        return math.nan
    flat = np.concatenate(chains)
    if np.isnan(flat).any():
        return math.nan
    if np.isinf(flat).any():
        return math.inf
    S = flat.size
    centre = float(flat.mean())
    ss = float(np.sum((flat - centre) ** 2)) / (S * S)
    if ss == 0.0:
        return 0.0
    r = 1.0
    longest = max(c.size for c in chains)
    kept = [c for c in chains if 2 * c.size >= longest]
    length = min(c.size for c in kept)
    if length >= MIN_DRAWS_PER_CHAIN and S > 1:
        e = ess(np.stack([c[:length] - centre for c in kept]), split=True)
        if np.isfinite(e):
            r = float(np.clip(e / (length * len(kept)), 1.0 / S, np.log10(S)))
    return math.sqrt(ss / r)


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
    ``loo`` totals from :func:`subsampled_elpd`, ``loo["mcse"]`` the draws' Monte Carlo error of
    elpd_hat (:meth:`draws_mcse`, ``mcse_method`` "joint"; the subsampling SE is not in it) and
    ``loo["mcse_independent"]`` the sampled terms' quadrature; ``loo_pointwise`` holds the exact PSIS-LOO values
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
        # running log-sum-exp of -ll over the sampled observations (the raw-ratio normaliser R_j)
        self._neg_m = np.full(self.m, -np.inf)
        self._neg_s = np.zeros(self.m)
        self._influence: dict[Hashable, list[np.ndarray]] = {}  # phi_s per chain, per block
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
        return self._exact.state_nbytes() + 5 * 8 * self.n + 2 * 8 * self.m + 8 * self.draws

    def chain_draws(self) -> dict:
        return dict(self._chain_draws)

    _VECTORS = ("_lse_m", "_lse_s", "_moments_mean", "_moments_m2", "_bad", "_zero")

    def to_state(self) -> dict:
        """The whole state as plain arrays (no objects): the sample, the O(n) running vectors, the
        draw totals' moments, and the exact scorer's state under ``exact_*`` keys
        (``StreamingScorer.to_state``), and the per-draw influence series (``influence``: every chain's
        phi_s, chains in the order of ``chain_names``).  ``from_state`` restores it; further :meth:`add` calls then
        give the same results as the uninterrupted scorer."""
        names = list(self._chain_draws)
        state = {name.lstrip("_"): getattr(self, name).copy() for name in self._VECTORS}
        state.update({
            "subsample_format": np.asarray(2, dtype=np.int64),
            "neg_m": self._neg_m.copy(), "neg_s": self._neg_s.copy(),
            "influence": self._influence_series(names),
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
        if int(state["subsample_format"]) != 2:
            # format 1 had no per-draw influence series: its MCSE cannot be continued (re-stream)
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
        for name in ("neg_m", "neg_s"):
            value = np.array(state[name], dtype=float)
            if value.shape != (out.m,):
                raise ValueError(f"SubsampledScorer.from_state: {name} has shape {value.shape}, expected ({out.m},)")
            setattr(out, "_" + name, value)
        influence = np.array(state["influence"], dtype=float)
        if influence.shape != (out.draws,) or sum(out._chain_draws.values()) != out.draws:
            raise ValueError(f"SubsampledScorer.from_state: influence has shape {influence.shape}, "
                             f"expected ({out.draws},)")
        edges = np.cumsum([0] + list(out._chain_draws.values()))
        out._influence = {c: [influence[a:b].copy()] for c, a, b in zip(out._chain_draws, edges[:-1], edges[1:])}
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
        phi = np.zeros(B)  # sum_i psi^a_si over every observation (module docstring)
        step = max(1, (1 << 17) // B)  # observation chunks: cache-sized temporaries
        for a in range(0, self.n, step):
            b = min(self.n, a + step)
            xc = x[:, a:b]
            xc, colmax, badc = mask_bad_columns(xc)
            self._bad[a:b] |= badc
            zero = xc.min(axis=0) == -np.inf
            self._zero[a:b] |= zero
            T += xc.sum(axis=1)
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                # running log-sum-exp and Chan et al. (1983) mean / M2, as in StreamingScorer
                lm = self._lse_m[a:b]
                ms = np.maximum(lm, colmax)
                ms = np.where(np.isfinite(ms), ms, 0.0)
                ex = np.exp(xc - ms)
                self._lse_s[a:b] = self._lse_s[a:b] * np.exp(lm - ms) + ex.sum(axis=0)
                self._lse_m[a:b] = ms
                bmean = xc.sum(axis=0) / B
                dev = xc - bmean
                dev2 = dev * dev
                bm2 = dev2.sum(axis=0)
                delta = bmean - self._moments_mean[a:b]
                self._moments_mean[a:b] += delta * (B / tot)
                self._moments_m2[a:b] += bm2 + delta * delta * (na * B / tot)
                if zero.any():  # -inf draws: the elementwise form, which skips non-finite terms
                    phi += self._psi_a(xc, slice(a, b), tot).sum(axis=1)
                    continue
                # sum_i psi^a_si from the block's own temporaries (no second exp over the block):
                # p_si / exp(lppd_i) = ex_si * tot / s_i, and with e_i = bmean_i - mu_i,
                # (ll_si - mu_i)^2 = dev2_si + 2 (ll_si - bmean_i) e_i + e_i^2
                phi += ex @ (tot / self._lse_s[a:b]) - (b - a)
                if self.approx == "waic":
                    e = bmean - self._moments_mean[a:b]
                    var = self._moments_m2[a:b] / (tot - 1) if tot > 1 else np.zeros(b - a)
                    phi -= (dev2.sum(axis=1) + 2.0 * (dev @ e)
                            + float(np.sum(e * e)) - float(np.sum(var)))
        # the sampled observations: (n/m) sum_J (psi^elpd_sj - psi^a_sj), at the running state
        neg, negmax, _ = mask_bad_columns(-x[:, self.sample])
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            nm = np.maximum(self._neg_m, negmax)
            nm = np.where(np.isfinite(nm), nm, 0.0)
            self._neg_s = self._neg_s * np.exp(self._neg_m - nm) + np.exp(neg - nm).sum(axis=0)
            self._neg_m = nm
            R = nm + np.log(self._neg_s) - math.log(tot)
            psi_e = 1.0 - np.exp(neg - R)
            psi_e = np.where(np.isfinite(psi_e), psi_e, 0.0)
            xs, _, _ = mask_bad_columns(x[:, self.sample])
            phi += (self.n / self.m) * (psi_e - self._psi_a(xs, self.sample, tot)).sum(axis=1)
        self._influence.setdefault(chain, []).append(phi)
        self._totals.update(T)
        self.draws = tot
        self._chain_draws[chain] = self._chain_draws.get(chain, 0) + B

    def _psi_a(self, xc, cols, tot):
        """psi^a_si of a block's columns ``cols`` at the running state after ``tot`` draws (module
        docstring): p/exp(lppd) - 1, minus (ll - mu)^2 - V for WAIC; non-finite terms (a flagged
        observation, whose total is NaN or -inf anyway) count 0."""
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            lppd = self._lse_m[cols] + np.log(self._lse_s[cols]) - math.log(tot)
            psi = np.exp(xc - lppd) - 1.0
            if self.approx == "waic":
                var = self._moments_m2[cols] / (tot - 1) if tot > 1 else 0.0
                psi -= (xc - self._moments_mean[cols]) ** 2 - var
        return np.where(np.isfinite(psi), psi, 0.0)

    def _influence_series(self, names=None) -> np.ndarray:
        """Every chain's phi_s, concatenated in the order of ``names`` (consolidates the blocks)."""
        out = []
        for c in (self._chain_draws if names is None else names):
            blocks = self._influence.get(c, [])
            if len(blocks) > 1:
                self._influence[c] = blocks = [np.concatenate(blocks)]
            out.extend(blocks)
        return np.concatenate(out) if out else np.zeros(0)

    def influence(self, chain) -> np.ndarray:
        """The per-draw influence phi_s of one chain's draws so far (module docstring), a copy."""
        return self._influence_series([chain]).copy()

    def draws_mcse(self) -> float:
        """MCSE of elpd_hat from the per-draw influence series (:func:`influence_mcse`)."""
        series = []
        for c in self._chain_draws:
            self._influence_series([c])
            series.extend(self._influence[c])
        return influence_mcse(series)

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
        if math.isnan(sub["elpd"]):
            mcse = math.nan
        elif sub["elpd"] == -math.inf:
            mcse = math.inf
        else:
            mcse = self.draws_mcse()
        # mcse: the draws' Monte Carlo error of elpd_hat from the per-draw influence of the whole
        # estimate ("joint": the sampled terms' errors cancel against their approximations');
        # mcse_independent: the sampled terms' quadrature, (n/m) sqrt(sum_J mcse_j^2)
        loo = {"elpd": sub["elpd"], "se": sub["se"], "mcse": mcse, "mcse_independent": sub["mcse"],
               "mcse_method": "joint", "p_eff": p_eff, "pointwise": pointwise, "mcse_pointwise": mcse_i,
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

