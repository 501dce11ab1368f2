"""Real histories for the viewer tests, written through ``History``'s write API from the estimators'
output on real posterior draws (until the service-made fixture replaces it: tests take a path).

Model: y_i ~ Normal(mu, sigma²) with sigma known and the prior mu ~ Normal(0, 10²). The posterior of
mu is Normal(m, v) with v = 1 / (1/10² + n/sigma²), m = v · Σy / sigma² (conjugate normal, Gelman et
al., Bayesian Data Analysis, 3rd ed., §2.5). Each chain is a stationary AR(1) sequence with that
marginal (autocorrelation 0.5), so R̂, ESS and r_eff behave as for a real sampler. Parameters
recorded: ``mu`` and ``y_rep`` (a posterior predictive draw).

Runs
----
``narrow``: sigma = 1 (the data-generating value), dataset ``cohort``, n = 48, one outlier labelled
``o17-far``; ``wide``: sigma = 2.5, same data (compared with ``narrow``); ``subset``: sigma = 1,
dataset ``cohort`` but only the first 32 observations (same dataset name, different n: never compared);
``solo``: dataset ``counts`` (n = 20, one far outlier ``o04``), alone.

Every ``step()`` adds 40 draws per chain to each run and writes, per run, one snapshot (figures,
mixing rows with the per-parameter projection of ``chainvigil.verdict.parameter_projections``,
pointwise values, the verdict of ``chainvigil.verdict.evaluate``) and one comparison round (with its
pairs, ``pairwise_differences``) for the comparable pair, with times 30 s apart.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from chainvigil import verdict as verdicts
from chainvigil.estimators import batch_scores
from chainvigil.estimators.compare import compare_runs, pairwise_differences
from chainvigil.rules import run_state
from chainvigil.snapshot import mixing_rows, snapshot_row
from chainvigil.storage.history import History

CHAINS = 4
PER_STEP = 40
RHO = 0.5
PRIOR_SD = 10.0
T0 = 1_700_000_000.0
STEP_SECONDS = 30.0

RUNS = {  # name: (sigma, dataset, n)
    "narrow": (1.0, "cohort", 48),
    "wide": (2.5, "cohort", 48),
    "subset": (1.0, "cohort", 32),
    "solo": (1.0, "counts", 20),
}
COMPARED = ("narrow", "wide")


def _labels(n: int) -> list[str]:
    return ["o17-far" if i == 16 else f"o{i + 1:02d}" for i in range(n)]


class HistoryBuilder:
    """Writes a growing history to ``path``; ``step()`` adds one snapshot per run."""

    def __init__(self, path, seed: int = 11, apart: dict | None = None):
        self.path = path
        self.apart = apart or {}  # run -> shift of its last chain's mu, in posterior sds (R̂ above 1)
        self.rng = np.random.default_rng(seed)
        y = self.rng.normal(1.5, 1.0, 48)
        y[16] = 12.0  # a surprising point: large k̂ expected for it (a fact of the trade)
        z = self.rng.normal(-0.5, 1.0, 20)
        z[3] = 11.0  # an even more surprising one in a small data set
        self.y = {"cohort": y, "counts": z}
        self.history = History(path)
        self.mu = {}
        self.trail: dict[str, list[dict]] = {r: [] for r in RUNS}
        self.steps = 0
        for name, (sigma, dataset, n) in RUNS.items():
            self.history.upsert_run(name, folder=f"/runs/{name}", title=f"normal mean, sigma {sigma:g}",
                                    dataset=dataset, n_obs=n, n_params=1, labels=_labels(n),
                                    targets={}, state="gathering", first_seen=T0)
            for c in range(CHAINS):
                self.history.upsert_chain(name, f"chain{c + 1}", kind="npz",
                                          param_names=["mu", "y_rep"], draws=0)
            self.mu[name] = np.empty((CHAINS, 0))

    def _posterior(self, name):
        sigma, dataset, n = RUNS[name]
        y = self.y[dataset][:n]
        v = 1.0 / (1.0 / PRIOR_SD**2 + n / sigma**2)
        return y, sigma, v * y.sum() / sigma**2, v

    def _extend(self, name):
        y, sigma, m, v = self._posterior(name)
        sd = np.sqrt(v)
        old = self.mu[name]
        prev = old[:, -1].copy() if old.shape[1] else self.rng.normal(m, sd, CHAINS)
        if name in self.apart and old.shape[1]:
            prev[-1] -= self.apart[name] * sd  # continue the chain's own path, shifted below
        new = np.empty((CHAINS, PER_STEP))
        for t in range(PER_STEP):
            prev = m + RHO * (prev - m) + np.sqrt(1 - RHO**2) * sd * self.rng.normal(size=CHAINS)
            new[:, t] = prev
        if name in self.apart:  # the last chain sits apart: a chain stuck elsewhere
            new[-1] += self.apart[name] * sd
        self.mu[name] = np.concatenate([old, new], axis=1)

    def step(self) -> None:
        self.steps += 1
        now = T0 + self.steps * STEP_SECONDS
        results = {}
        for name in RUNS:
            self._extend(name)
            y, sigma, _, _ = self._posterior(name)
            mu = self.mu[name]
            ll = stats.norm.logpdf(y[None, None, :], mu[..., None], sigma)
            y_rep = mu + sigma * self.rng.normal(size=mu.shape)
            results[name] = batch_scores(ll, params=np.stack([mu, y_rep], axis=-1),
                                         param_names=["mu", "y_rep"], n_params=1, run=name)
        pointwise = {r: results[r].loo_pointwise for r in COMPARED}
        mcse = {r: results[r].loo["mcse"] for r in COMPARED}
        cmp = compare_runs(pointwise, mcse)
        for name, sc in results.items():
            self._write(name, sc, now, cmp if name in COMPARED else None)
        self.history.add_comparison("cohort", [{k: r[k] for k in ("run", "elpd", "delta", "se_delta",
                                                                    "mcse_delta", "weight", "caution",
                                                                    "may_flip")} for r in cmp],
                                    time=now, pairs=pairwise_differences(pointwise, mcse))

    def _write(self, name, sc, now, cmp):
        per_chain = self.mu[name].shape[1]
        rate = PER_STEP / STEP_SECONDS
        d = sc.to_dict()
        v = verdicts.evaluate(d, self.trail[name], chains=CHAINS, draws_per_chain=per_chain,
                              draw_rate=rate, labels=_labels(RUNS[name][2]), comparison=cmp)
        mixing = d["mixing"]
        sc.verdict = v
        row = snapshot_row(sc.to_dict(), now, per_chain, rate, sc.r_eff)  # the service's own row builder
        more = verdicts.parameter_projections(mixing, chains=CHAINS, draws_per_chain=per_chain)
        self.history.add_snapshot(
            name, row, mixing=mixing_rows(sc.to_dict(), more),  # the service's own row builder
            pointwise={"elpd_loo": sc.loo_pointwise, "elpd_waic": sc.waic_pointwise, "k_hat": sc.pareto_k})
        for c in range(CHAINS):
            self.history.upsert_chain(name, f"chain{c + 1}", draws=per_chain)
        self.trail[name].append({"draws_per_chain": per_chain, "loo_elpd": d["loo"]["elpd"],
                                 "loo_mcse": d["loo"]["mcse"], "time": now,
                                 "rhat_max": mixing["rhat_max"]})
        state = run_state(v, d["pareto_k"]["max"])  # the one derivation the service uses
        self.history.set_run_state(name, state, enough_at=now if v["enough"] else None)

    def close(self):
        self.history.close()


def build_history(path, steps: int = 12, seed: int = 11, apart: dict | None = None) -> HistoryBuilder:
    """Write ``steps`` snapshots per run to ``path``; returns the builder (still open for more).
    ``apart`` {run: shift} moves the last chain of those runs by shift posterior sds."""
    b = HistoryBuilder(path, seed=seed, apart=apart)
    for _ in range(steps):
        b.step()
    return b
