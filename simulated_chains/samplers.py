"""MCMC transition kernels used by the simulated scenarios.

Each sampler keeps its own state and exposes ``step() -> theta`` (one transition, returning the
current point as a fresh (d,) array), ``end_warmup()`` (stop adapting; from then on the kernel is
fixed and leaves the target invariant) and ``acceptance`` (the proportion of proposals accepted since
the end of warm-up, or since the start while still in warm-up).

Kernels:

- :class:`AdaptiveMetropolis`: random-walk Metropolis with the covariance adaptation of Haario,
  Saksman & Tamminen (2001), "An adaptive Metropolis algorithm", Bernoulli 7(2), 223-242. Adaptation
  runs during warm-up only; afterwards the proposal covariance is frozen.
- :class:`ComponentwiseMetropolis`: one-at-a-time random-walk Metropolis (Metropolis et al. 1953)
  with fixed, untuned step sizes; one ``step()`` is a full sweep over the components.

Gibbs kernels are model specific and live with their models in :mod:`chainvigil.simulated_chains.catalog`.
"""

from __future__ import annotations

import numpy as np


class AdaptiveMetropolis:
    """Adaptive random-walk Metropolis (Haario, Saksman & Tamminen 2001).

    Proposal ``theta* ~ N(theta_t, C_t)`` with

    - ``C_t = C_0`` for the first ``t0`` iterations,
    - ``C_t = s_d * Cov(theta_w, ..., theta_{t-1}) + s_d * eps * I_d`` afterwards, while warming up,
      with ``s_d = 2.4**2 / d`` (the scaling of Gelman, Roberts & Gilks 1996 used by Haario et al.).

    Following Roberts & Rosenthal (2009), "Examples of adaptive MCMC", J. Comput. Graph. Stat.
    18(2), 349-367, sec. 2, the proposal is a mixture: with probability ``beta`` (0.05) a fixed
    ``N(theta_t, 0.1**2 I_d / d)`` step instead of the adapted one, so a covariance learned from a
    window in which some direction barely moved cannot trap the chain.

    One departure from the paper: the history behind the covariance restarts at ``t0, 2 t0, 4 t0,
    ...`` (``theta_w`` is the first point of the current window), so the transient from a dispersed
    start does not inflate the proposal for the rest of warm-up. Until a new window holds
    ``10 d`` points the previous proposal is kept. The empirical covariance is kept with Welford's
    running update (mean (d,), co-moment (d, d)). After :meth:`end_warmup` the covariance is frozen,
    so the post-warm-up chain is a plain Metropolis chain with a fixed symmetric proposal and the
    target as its stationary law.

    Parameters
    ----------
    log_density : callable, (d,) -> float
        Unnormalised log target density; ``-inf`` outside the support.
    theta0 : (d,) array
        Initial point (must have finite density).
    rng : numpy.random.Generator
    scale0 : float or (d,) array
        Standard deviations of the initial diagonal proposal ``C_0 = diag(scale0**2)``.
    t0 : int
        Length of the initial non-adaptive period.
    eps : float
        Regulariser keeping ``C_t`` positive definite.
    beta : float
        Weight of the fixed safety component of the proposal mixture.
    """

    def __init__(self, log_density, theta0, rng, scale0=0.1, t0=100, eps=1e-10, beta=0.05):
        self.log_density = log_density
        self.theta = np.array(theta0, dtype=float)
        self.d = self.theta.size
        self.rng = rng
        self.logp = float(log_density(self.theta))
        if not np.isfinite(self.logp):
            raise ValueError("initial point has zero target density")
        self.sd = 2.4**2 / self.d
        self.eps = eps
        self.beta = float(beta)
        self.safe_sd = 0.1 / np.sqrt(self.d)
        self.t0 = int(t0)
        self.chol = np.diag(np.broadcast_to(np.asarray(scale0, dtype=float), (self.d,))).copy()
        self.adapting = True
        self.t = 0
        self._restart = self.t0
        self._reset()
        self.accepted = 0
        self.proposed = 0

    @property
    def acceptance(self) -> float:
        return self.accepted / self.proposed if self.proposed else float("nan")

    def _reset(self):
        self._mean = self.theta.copy()
        self._m2 = np.zeros((self.d, self.d))
        self._n = 1

    def _adapt(self):
        if self.t == self._restart:
            self._reset()
            self._restart *= 2
            return
        # Welford update of the running mean and co-moment of the current window.
        self._n += 1
        delta = self.theta - self._mean
        self._mean += delta / self._n
        self._m2 += np.outer(delta, self.theta - self._mean)
        if self.t > self.t0 and self._n >= 10 * self.d:
            cov = self._m2 / (self._n - 1)
            c = self.sd * (cov + self.eps * np.eye(self.d))
            try:
                self.chol = np.linalg.cholesky(c)
            except np.linalg.LinAlgError:
                pass  # keep the previous proposal until the history is rich enough

    def step(self) -> np.ndarray:
        z = self.rng.standard_normal(self.d)
        if self.t >= self.t0 and self.rng.uniform() < self.beta:
            prop = self.theta + self.safe_sd * z
        else:
            prop = self.theta + self.chol @ z
        logp_prop = float(self.log_density(prop))
        self.proposed += 1
        if np.log(self.rng.uniform()) < logp_prop - self.logp:
            self.theta, self.logp = prop, logp_prop
            self.accepted += 1
        self.t += 1
        if self.adapting:
            self._adapt()
        return self.theta.copy()

    def end_warmup(self):
        """Freeze the proposal covariance and restart the acceptance count."""
        self.adapting = False
        self.accepted = self.proposed = 0


class ComponentwiseMetropolis:
    """One-at-a-time random-walk Metropolis with fixed step sizes (no adaptation at all).

    For each component ``k`` in turn: propose ``theta*_k = theta_k + step_k * z``, ``z ~ N(0, 1)``,
    and accept with probability ``min(1, pi(theta*) / pi(theta))`` (Metropolis et al. 1953). One call
    to :meth:`step` is one sweep over all ``d`` components. On a posterior with strongly correlated
    components and steps far from the conditional scales this mixes slowly, which is the point.

    Parameters
    ----------
    log_density : callable, (d,) -> float
    theta0 : (d,) array
    rng : numpy.random.Generator
    steps : float or (d,) array
        Proposal standard deviation of each component.
    """

    def __init__(self, log_density, theta0, rng, steps):
        self.log_density = log_density
        self.theta = np.array(theta0, dtype=float)
        self.d = self.theta.size
        self.rng = rng
        self.steps = np.broadcast_to(np.asarray(steps, dtype=float), (self.d,)).copy()
        self.logp = float(log_density(self.theta))
        if not np.isfinite(self.logp):
            raise ValueError("initial point has zero target density")
        self.accepted = 0
        self.proposed = 0

    @property
    def acceptance(self) -> float:
        return self.accepted / self.proposed if self.proposed else float("nan")

    def step(self) -> np.ndarray:
        z = self.rng.standard_normal(self.d)
        u = np.log(self.rng.uniform(size=self.d))
        for k in range(self.d):
            prop = self.theta.copy()
            prop[k] += self.steps[k] * z[k]
            logp_prop = float(self.log_density(prop))
            self.proposed += 1
            if u[k] < logp_prop - self.logp:
                self.theta, self.logp = prop, logp_prop
                self.accepted += 1
        return self.theta.copy()

    def end_warmup(self):
        """Nothing adapts; only the acceptance count restarts."""
        self.accepted = self.proposed = 0
