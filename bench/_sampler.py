"""The simulated sampler the service benchmarks share (bench/long_run.py, bench/service_speed.py,
bench/psis_work.py): an invented normal model, not a real data set."""
from __future__ import annotations

import numpy as np

CHAINS = ("c1", "c2", "c3", "c4")
PARAMS = ("mu", "log_sigma")


class Sampler:
    """Pointwise log-likelihoods of y_i ~ N(mu, sigma^2); (mu, log sigma) follow AR(1) chains with
    coefficient ``rho`` around their posterior, ``spread`` times its scale; 0.5 % of the observations
    are outliers, so r_eff, k-hat and the verdict all have work to do."""

    def __init__(self, n: int, seed: int = 5, *, rho: float = 0.8, spread: float = 1.0):
        self.rng = np.random.default_rng(seed)
        self.rho = float(rho)
        self.y = self.rng.normal(0.0, 1.0, n)
        self.y[self.rng.choice(n, max(1, n // 200), replace=False)] += 5.0
        self.state = {c: self.rng.normal(size=2) for c in CHAINS}
        self.sd = np.array([1.0, 0.7]) / np.sqrt(n) * spread

    def block(self, chain: str, k: int):
        """(loglik (k, n), draws of (mu, log sigma) (k, 2)) for ``k`` more draws of ``chain``."""
        rho, s = self.rho, self.state[chain]
        out = np.empty((k, 2))
        for t, z in enumerate(self.rng.normal(size=(k, 2))):
            s = rho * s + np.sqrt(1 - rho**2) * z
            out[t] = s
        self.state[chain] = s
        mu = self.y.mean() + self.sd[0] * out[:, :1]
        log_sigma = self.sd[1] * out[:, 1:]
        ll = (-0.5 * np.log(2 * np.pi) - log_sigma
              - 0.5 * (self.y[None, :] - mu) ** 2 * np.exp(-2 * log_sigma))
        return ll, np.hstack([mu, log_sigma])
