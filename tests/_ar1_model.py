"""Invented test data: log-likelihoods of y_i ~ N(mu, 1) at autocorrelated (AR(1)) draws of mu.

The draws of mu follow mu_t = rho mu_{t-1} + sqrt(1 - rho^2) e_t, e_t ~ N(0, step_sd^2), started at
N(0, 0.2^2): autocorrelated, so r_eff < 1.  The data are n points spread evenly over [-2, 2]; with
``outlier_every = k`` every k-th point is moved up by 3 (a few outlying observations).
"""
from __future__ import annotations

import numpy as np


def ar1_normal_loglik(rng, draws: int, n: int, *, rho: float = 0.7, step_sd: float = 0.2,
                      outlier_every: int | None = None):
    """``(loglik (draws, n), mu (draws, 1))`` for the model above."""
    y = np.linspace(-2, 2, n)
    if outlier_every:
        y[::outlier_every] += 3.0
    mu = np.empty((draws, 1))
    m = rng.normal(0, 0.2)
    for t in range(draws):
        m = rho * m + np.sqrt(1 - rho * rho) * rng.normal(0, step_sd)
        mu[t] = m
    return -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - mu) ** 2, mu
