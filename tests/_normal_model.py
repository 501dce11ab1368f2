"""Conjugate normal model with known variance (Gelman et al., Bayesian Data Analysis, 3rd ed., ch. 2).

y_i ~ N(mu, sigma^2), mu ~ N(mu0, tau0^2). Posterior mu | y ~ N(mu_n, tau_n^2) with
1/tau_n^2 = 1/tau0^2 + n/sigma^2 and mu_n = tau_n^2 (mu0/tau0^2 + sum y / sigma^2). Leaving y_i out
gives the same formulas over the other n - 1 values, and the posterior predictive of y_i is
N(mu_-i, sigma^2 + tau_-i^2), so exact LOO elpd_i = log N(y_i | mu_-i, sigma^2 + tau_-i^2).
"""

import numpy as np
from scipy import stats


def posterior(y, sigma, mu0, tau0):
    prec = 1.0 / tau0**2 + y.size / sigma**2
    tn2 = 1.0 / prec
    return tn2 * (mu0 / tau0**2 + y.sum() / sigma**2), np.sqrt(tn2)


def exact_loo(y, sigma, mu0, tau0):
    n = y.size
    prec = 1.0 / tau0**2 + (n - 1) / sigma**2
    t2 = 1.0 / prec
    m = t2 * (mu0 / tau0**2 + (y.sum() - y) / sigma**2)
    return stats.norm.logpdf(y, m, np.sqrt(sigma**2 + t2))


def loglik(y, mu_draws, sigma):
    """(chains, draws, n) log-likelihood for mu_draws shaped (chains, draws)."""
    return stats.norm.logpdf(y[None, None, :], mu_draws[..., None], sigma)


def ar1_draws(mean, sd, chains, draws, rho, rng):
    z = rng.normal(size=(chains, draws))
    x = np.empty_like(z)
    x[:, 0] = z[:, 0]
    for t in range(1, draws):
        x[:, t] = rho * x[:, t - 1] + np.sqrt(1 - rho**2) * z[:, t]
    return mean + sd * x
