"""The predictive scores of one run: PSIS-LOO, WAIC, DIC, AIC, Pareto k-hat, and (filled later) mixing
and the verdict. :func:`batch_scores` computes them from all draws at once; the streaming scorer
(:mod:`.streaming`) returns the same :class:`Scores` from its accumulated state.

Observation indices in flags and lists are 0-based (observation j is CSV column ``loglik[j+1]``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .information import aic_from_max, dic_from_moments
from .loo import as_draws_matrix, psis_loo
from .waic import waic

__all__ = ["Scores", "batch_scores"]


def _f(v, json_safe: bool):
    """Python float; non-finite -> None when json_safe (JSON has no NaN/inf)."""
    if v is None:
        return None
    v = float(v)
    if json_safe and not math.isfinite(v):
        return None
    return v


def _flist(a, json_safe: bool):
    a = np.asarray(a, dtype=float)
    if not json_safe:
        return a.tolist()
    return [float(x) if math.isfinite(x) else None for x in a.tolist()]


@dataclass
class Scores:
    """Predictive scores of one run (see docs/interfaces.md for the JSON shape of :meth:`to_dict`).

    Attributes
    ----------
    run : str or None
    chains, draws, observations : int (draws counts every chain)
    loo : dict {elpd, se, mcse, p_eff, mcse_independent, mcse_method}
                                                PSIS-LOO (Vehtari, Gelman & Gabry 2017). ``mcse`` is
        the MCSE of the total elpd. ``mcse_method`` says how it was obtained:
        "joint"        from the draws by :func:`.loo.joint_mcse` (batch scores; the observations'
                       errors are correlated through the shared draws, and this keeps it);
        "joint-scaled" the streaming value times the joint/independent ratio measured on the
                       draws at the last store pass (:meth:`use_joint_mcse` with ``ratio``);
        "independent"  sqrt(sum_i mcse_i^2): what the streaming scorer alone can give (its state
                       does not hold the per-draw sums a_s); it understates the error of the
                       total, by a factor of about 1.6 for a conjugate normal model with
                       independent draws (docs/numerics.md).
        ``mcse_independent`` is always sqrt(sum_i mcse_i^2), for reference.
    waic : dict {elpd, se, p_eff}               WAIC (Watanabe 2010)
    dic : dict {elpd, p_eff}                    DIC (Spiegelhalter et al. 2002)
    aic : dict {elpd, p_eff} or None            AIC (Akaike 1974); None when n_params unknown
    pareto_k : ndarray (n,)                     PSIS k-hat per observation
    k_threshold : float                         min(1 - 1/log10 S, 0.7)
    loo_pointwise, loo_mcse_pointwise, waic_pointwise : ndarray (n,)
    r_eff : ndarray (n,)                        the relative efficiency used
    flags : dict                                ``bad_observations`` (NaN/+inf: totals NaN),
        ``zero_likelihood_observations`` (-inf: elpd -inf), ``flat_tail_observations``
        (k-hat -inf), ``too_few_draws`` (bool: no tail fit, k-hat +inf)
    mixing, verdict : dict or None              settable; filled by the service
    subsampled : dict or None                   set when PSIS-LOO was estimated from a random
        sample of the observations (:mod:`.subsample`): ``{m, n, se_subsample, approx}``; then
        ``pareto_k`` and ``loo_mcse_pointwise`` are NaN outside the sample and ``k_max`` /
        ``k_above`` cover the sampled observations
    """

    run: str | None
    chains: int
    draws: int
    observations: int
    loo: dict
    waic: dict
    dic: dict
    aic: dict | None
    pareto_k: np.ndarray
    k_threshold: float
    loo_pointwise: np.ndarray
    loo_mcse_pointwise: np.ndarray
    waic_pointwise: np.ndarray
    r_eff: np.ndarray
    flags: dict = field(default_factory=dict)
    mixing: dict | None = None
    verdict: dict | None = None
    subsampled: dict | None = None

    def use_joint_mcse(self, value=None, *, ratio=None) -> "Scores":
        """Report an externally computed joint MCSE of the LOO total (in place; returns self).

        ``value``: the joint MCSE for exactly these draws (e.g. :func:`.loo.joint_mcse_finish` of
        the parts summed over the store's observation blocks at this snapshot); sets
        ``mcse_method`` "joint". ``ratio``: joint / independent measured at an earlier store pass;
        the MCSE becomes ratio x the current ``mcse_independent`` ("joint-scaled"). Both MCSEs
        fall as 1/sqrt(draws) at a fixed autocorrelation, so their ratio carries over between
        passes while the draws' mixing stays the same. A None, NaN or negative input leaves the
        scores unchanged.
        """
        if value is not None:
            v = float(value)
            if math.isnan(v) or v < 0:
                return self
            self.loo["mcse"] = v
            self.loo["mcse_method"] = "joint"
            return self
        if ratio is not None:
            q = float(ratio)
            ind = float(self.loo.get("mcse_independent", self.loo["mcse"]))
            if not math.isfinite(q) or q < 0 or not math.isfinite(ind):
                return self
            self.loo["mcse"] = q * ind
            self.loo["mcse_method"] = "joint-scaled"
        return self

    @property
    def above_observations(self) -> list[int]:
        """0-based indices (for code) of the observations whose k-hat exceeds the sample-size threshold;
        JSON ``pareto_k.above_observations``.  ``score --json`` adds the 1-based numbers people read
        as ``pareto_k.above_observations_1based``."""
        k = self.pareto_k
        return np.flatnonzero(~(k <= self.k_threshold) & ~np.isnan(k)).tolist()  # NaN: not sampled

    @property
    def k_above(self) -> int:
        """How many observations have k-hat above the threshold: always a count, as JSON
        ``pareto_k.above`` and the history's ``snapshots.k_above``."""
        return len(self.above_observations)

    @property
    def k_max(self) -> float:
        k = self.pareto_k[~np.isnan(self.pareto_k)]
        return float(np.max(k)) if k.size else float("nan")

    @property
    def complete(self) -> bool:
        """False when bad observations make the totals undefined (NaN)."""
        return not self.flags.get("bad_observations")

    def to_dict(self, json_safe: bool = True) -> dict:
        """The JSON shape of docs/interfaces.md (plus ``r_eff`` and ``flags``).

        With ``json_safe`` (default) every non-finite number becomes None (JSON has no NaN or
        infinity); the ``flags`` lists say why a value is missing. ``pareto_k.above`` counts the
        observations above the threshold and ``pareto_k.above_observations`` lists their 0-based
        indices.
        """
        js = json_safe
        return {
            "run": self.run,
            "chains": int(self.chains),
            "draws": int(self.draws),
            "observations": int(self.observations),
            "loo": {**{k: _f(self.loo[k], js) for k in ("elpd", "se", "mcse", "p_eff")},
                    "mcse_independent": _f(self.loo.get("mcse_independent", self.loo["mcse"]), js),
                    "mcse_method": self.loo.get("mcse_method", "independent"),
                    **({} if self.subsampled is None else {"subsampled": {
                        "m": int(self.subsampled["m"]), "n": int(self.subsampled["n"]),
                        "se_subsample": _f(self.subsampled["se_subsample"], js),
                        "approx": self.subsampled["approx"]}})},
            "waic": {k: _f(self.waic[k], js) for k in ("elpd", "se", "p_eff")},
            "dic": {k: _f(self.dic[k], js) for k in ("elpd", "p_eff")},
            "aic": None if self.aic is None else {k: _f(self.aic[k], js) for k in ("elpd", "p_eff")},
            "pareto_k": {
                "max": _f(self.k_max, js),
                "threshold": _f(self.k_threshold, js),
                "above": self.k_above,
                "above_observations": self.above_observations,
                "values": _flist(self.pareto_k, js),
            },
            "pointwise": {"loo": _flist(self.loo_pointwise, js), "waic": _flist(self.waic_pointwise, js)},
            "mixing": self.mixing,
            "verdict": self.verdict,
            "r_eff": _flist(self.r_eff, js),
            "flags": {
                "bad_observations": list(self.flags.get("bad_observations", [])),
                "zero_likelihood_observations": list(self.flags.get("zero_likelihood_observations", [])),
                "flat_tail_observations": list(self.flags.get("flat_tail_observations", [])),
                "too_few_draws": bool(self.flags.get("too_few_draws", False)),
            },
        }


def assemble(loo: dict, w: dict, dic: dict, aic, r_eff, *, chains, run) -> Scores:
    """Build :class:`Scores` from the result dicts of :func:`.psis_loo` and :func:`.waic`."""
    flags = {
        "bad_observations": loo["bad_observations"],
        "zero_likelihood_observations": loo["zero_likelihood_observations"],
        "flat_tail_observations": loo["flat_tail_observations"],
        "too_few_draws": loo["too_few_draws"],
    }
    return Scores(
        run=run,
        chains=int(chains),
        draws=int(loo["draws"]),
        observations=int(loo["pointwise"].size),
        loo={"elpd": loo["elpd"], "se": loo["se"], "mcse": loo["mcse"], "p_eff": loo["p_eff"],
             "mcse_independent": loo.get("mcse_independent", loo["mcse"]),
             "mcse_method": loo.get("mcse_method", "independent")},
        waic={k: w[k] for k in ("elpd", "se", "p_eff")},
        dic=dic,
        aic=aic,
        pareto_k=np.asarray(loo["pareto_k"], dtype=float),
        k_threshold=float(loo["k_threshold"]),
        loo_pointwise=np.asarray(loo["pointwise"], dtype=float),
        loo_mcse_pointwise=np.asarray(loo["mcse_pointwise"], dtype=float),
        waic_pointwise=np.asarray(w["pointwise"], dtype=float),
        r_eff=np.asarray(r_eff, dtype=float),
        flags=flags,
    )


def batch_scores(loglik, r_eff=None, *, params=None, param_names=None, n_params=None,
                 point_loglik=None, run=None) -> Scores:
    """All predictive scores of a run from every draw at once.

    Parameters
    ----------
    loglik : array_like, shape (chains, draws, n); a 2-D (draws, n) array is one chain.
    r_eff : float or array_like (n,), optional
        Relative efficiency per observation; None computes it from the chains with
        :func:`.mixing.relative_efficiency` (observations with non-finite values get 1.0, their
        results are flagged anyway).
    params : array_like (chains, draws, p), optional -> ``mixing`` from :func:`.mixing.mixing_summary`.
    param_names : sequence of p str, optional (default ``param[1]`` ... ``param[p]``).
    n_params : int, optional (AIC's penalty; None -> ``aic`` is None).
    point_loglik : float, optional (maximised / point-estimate log-likelihood for AIC and DIC).
    run : str, optional

    Returns
    -------
    Scores

    Raises
    ------
    ValueError for a wrong shape (the message names it).
    """
    a = np.asarray(loglik)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3:
        raise ValueError(f"batch_scores: loglik must be (chains, draws, n) or (draws, n), got shape {a.shape}")
    chains = a.shape[0]
    ll = as_draws_matrix(a)
    S, n = ll.shape
    if r_eff is None:
        from .mixing import finite_relative_efficiency

        r_eff = finite_relative_efficiency(a)
    r = np.asarray(r_eff, dtype=float)
    r = np.full(n, float(r)) if r.ndim == 0 else r
    loo = psis_loo(a, r)  # chains kept: the joint MCSE needs them for its ESS
    w = waic(ll)
    with np.errstate(invalid="ignore"):
        T = ll.sum(axis=1)
    any_bad = bool(loo["bad_observations"])
    any_zero = bool(loo["zero_likelihood_observations"])
    if any_bad or any_zero:
        mean_t = m2_t = math.nan
        max_t = float(np.max(np.where(np.isnan(T), -np.inf, T)))
    else:
        mean_t = float(T.mean())
        m2_t = float(np.sum((T - mean_t) ** 2))
        max_t = float(T.max())
    dic = dic_from_moments(mean_t, m2_t, S, point_loglik, any_bad, any_zero)
    aic = aic_from_max(max_t, n_params, point_loglik, any_bad)
    sc = assemble(loo, w, dic, aic, r, chains=chains, run=run)
    if params is not None:
        from .mixing import mixing_summary

        p = np.asarray(params, dtype=float)
        if p.ndim == 2:
            p = p[None]
        if p.ndim != 3 or p.shape[:2] != a.shape[:2]:
            raise ValueError(
                f"batch_scores: params must be (chains, draws, p) matching loglik {a.shape[:2]}, got {p.shape}"
            )
        names = list(param_names) if param_names is not None else [f"param[{j + 1}]" for j in range(p.shape[2])]
        sc.mixing = mixing_summary(p, names)
    return sc
