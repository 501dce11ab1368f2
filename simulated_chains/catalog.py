"""Invented scenarios, their data sets and the models fitted to them.

Two scenarios, each a data set generated from a fixed seed (so every process rebuilds exactly the
same data) and several models fitted to it:

``tarn-levels`` (336 observations)
    Each morning for 48 days a warden reads the water level of seven tarns of the (invented) Orrin
    Fells against the marker post at each tarn, in cm above the post's zero mark. Readings scatter
    about each tarn's own level with a spread of about 1.5 cm, but four readings (one morning each
    at four of the tarns) were taken by a visiting surveyor who read the wrong graduation and are
    25 to 40 cm off.

    - ``tarns-robust``: Student-t readings (nu = 4), one level per tarn; Gibbs sampler on the normal
      scale-mixture form of the t. Fits well (absorbs the misreadings) and mixes well.
    - ``tarns-plain``: normal readings, one level per tarn, conjugate normal / scaled-inverse-chi^2
      prior; adaptive random-walk Metropolis. The misreadings inflate the spread and stay
      influential: their Pareto k-hat is above 0.7.
    - ``tarns-sticky``: Student-t readings (nu = 4), a common level plus tarn offsets; one-at-a-time
      random walk with untuned steps, dispersed starts and a short warm-up. The common level and the
      offsets are strongly correlated a posteriori, so R-hat takes a long time to settle.

    Measured at the default pace (40 draws/s per chain, 4 chains, seed 0) with the project's own
    estimators: tarns-robust meets the default targets after about 450 draws per chain (~12 s);
    tarns-plain keeps Pareto k-hat of 0.8-1.5 at exactly the four misread readings, and its R-hat
    reaches 1.01 after about 5,000 draws (acceptance ~0.32); tarns-sticky (acceptance ~0.46 per
    component) has R-hat of about 1.15 after 2,000 draws and reaches 1.01 only after 12,000-20,000+
    draws per chain depending on the seed (5-10 minutes), with bulk-ESS of ~400 over 4 chains
    after about 20,000.

``orchard-ledger`` (24,000 observations)
    Yield in kg of each tree in eight invented orchards (60 rows of 50 trees each) with the tree's
    age, the slope of its row, irrigation hours, soil depth and wind exposure. For benchmarks.

    - ``orchard-full``: normal linear regression on all five covariates; Gibbs sampler
      (conjugate normal / inverse-gamma prior).
    - ``orchard-lean``: the same without soil depth and exposure; Gibbs sampler.

A model offers ``initial(rng) -> x`` (a sampler state, drawn widely dispersed),
``sampler(rng, x0)`` (an object with ``step() -> x``, ``end_warmup()``, ``acceptance``),
``pointwise_loglik(x) -> (n,)`` and ``output(x) -> (p,)`` (the parameter values written, on their
natural scale), both taking a sampler state, and ``point_loglik()`` (the maximum of the total
log-likelihood, found with ``scipy.optimize``).

Refits: ``model.refit(held_out0)`` is the same model fitted without the observations ``held_out0``
(0-based): its ``data`` are the other readings (so its sampler never sees the held-out ones), and
``written_loglik(x)`` gives log p(y_i | theta) of the held-out observations only, in the order given.
For an ordinary model ``written_loglik`` is ``pointwise_loglik``.
"""

from __future__ import annotations

import copy
import functools
from dataclasses import dataclass, replace

import numpy as np
from scipy import special

from .samplers import AdaptiveMetropolis, ComponentwiseMetropolis

LOG_2PI = np.log(2.0 * np.pi)


# --------------------------------------------------------------------------------------------
# data sets


@dataclass(frozen=True)
class GroupedData:
    """Readings ``y`` (n,) with group index ``group`` (n,) into ``group_names`` (J,)."""

    dataset: str
    y: np.ndarray
    group: np.ndarray
    group_names: tuple
    labels: tuple
    misread: np.ndarray  # (k,) indices of the planted gross errors

    @property
    def n(self) -> int:
        return self.y.size

    @property
    def n_groups(self) -> int:
        return len(self.group_names)

    def subset(self, index) -> "GroupedData":
        """The readings at ``index`` (0-based, in that order); the tarns (groups) stay the same."""
        idx = np.asarray(index, dtype=np.int64)
        where = {int(i): j for j, i in enumerate(idx)}
        misread = np.array([where[int(i)] for i in self.misread if int(i) in where], dtype=np.int64)
        return replace(self, y=self.y[idx], group=self.group[idx],
                       labels=tuple(self.labels[i] for i in idx), misread=misread)


@dataclass(frozen=True)
class RegressionData:
    """Response ``y`` (n,) and standardised design ``X`` (n, q) with named columns."""

    dataset: str
    y: np.ndarray
    X: np.ndarray
    columns: tuple
    labels: tuple

    @property
    def n(self) -> int:
        return self.y.size

    def subset(self, index) -> "RegressionData":
        """The observations at ``index`` (0-based, in that order)."""
        idx = np.asarray(index, dtype=np.int64)
        return replace(self, y=self.y[idx], X=self.X[idx], labels=tuple(self.labels[i] for i in idx))


TARNS = ("Orrin", "Quillbeck", "Fennimere", "Glimmerpool", "Harrowdel", "Wyndscar", "Lantern")
TARN_DAYS = 48


@functools.lru_cache(maxsize=None)
def tarn_data() -> GroupedData:
    """The tarn readings: 7 tarns x 48 days = 336 observations, 4 of them misread."""
    rng = np.random.default_rng(61_0427)
    n_t, n_d = len(TARNS), TARN_DAYS
    level = rng.normal(0.0, 3.0, size=n_t)  # each tarn's level above its post's zero mark, cm
    group = np.repeat(np.arange(n_t), n_d)
    y = level[group] + rng.normal(0.0, 1.5, size=n_t * n_d)
    # four misread readings, each at a different tarn on a random day
    misread = np.sort(rng.choice(n_t, size=4, replace=False) * n_d + rng.integers(0, n_d, size=4))
    y[misread] += rng.choice([-1.0, 1.0], size=4) * rng.uniform(25.0, 40.0, size=4)
    y = np.round(y, 1)  # the posts are graduated in millimetres
    labels = tuple(f"{TARNS[g]} Tarn, day {d + 1}" for g in range(n_t) for d in range(n_d))
    return GroupedData("orrin-fells-tarn-levels", y, group, TARNS, labels, misread)


ORCHARDS = ("Hollin", "Brackwater", "Sedge End", "Tallowby", "Mirefield", "Crane Hill",
            "Ashgrove Nook", "Pellow")
ORCHARD_COLUMNS = ("intercept", "age", "slope", "irrigation", "soil_depth", "exposure")


@functools.lru_cache(maxsize=None)
def orchard_data() -> RegressionData:
    """The orchard ledger: 8 orchards x 60 rows x 50 trees = 24,000 trees."""
    rng = np.random.default_rng(88_1902)
    n_o, n_r, n_t = len(ORCHARDS), 60, 50
    n = n_o * n_r * n_t
    age = rng.uniform(3.0, 60.0, n)  # years
    slope = np.repeat(rng.uniform(0.0, 25.0, n_o * n_r), n_t)  # degrees, one per row
    irrigation = np.repeat(rng.uniform(0.0, 12.0, n_o), n_r * n_t) + rng.normal(0, 1.0, n)
    soil = rng.uniform(20.0, 150.0, n)  # cm
    exposure = np.repeat(rng.uniform(-1.0, 1.0, n_o * n_r), n_t)
    raw = np.column_stack([age, slope, irrigation, soil, exposure])
    Z = (raw - raw.mean(axis=0)) / raw.std(axis=0)
    X = np.column_stack([np.ones(n), Z])
    beta = np.array([40.0, 6.0, -2.5, 4.0, 3.0, 1.0])
    y = np.round(X @ beta + rng.normal(0.0, 8.0, n), 2)
    labels = tuple(f"{ORCHARDS[o]} row {r + 1} tree {t + 1}"
                   for o in range(n_o) for r in range(n_r) for t in range(n_t))
    return RegressionData("orchard-ledger-yields", y, X, ORCHARD_COLUMNS, labels)


def _slug(name: str) -> str:
    return name.lower().replace(" ", "_")


# --------------------------------------------------------------------------------------------
# models


class Model:
    """Base class; see the module docstring for the interface."""

    name: str
    title: str
    description: str
    scenario: str
    param_names: tuple
    warmup: int  # default warm-up length (transitions not written)

    held_out: tuple = ()  # 0-based observations a refit leaves out (empty: the full data)
    _train = None  # a refit's data without the held-out observations
    _held = None  # a refit's held-out observations

    @property
    def n_params(self) -> int:
        return len(self.param_names)

    def full_data(self):
        raise NotImplementedError

    @property
    def data(self):
        """The data the model is fitted to (a refit: every observation except the held-out ones)."""
        return self.full_data() if self._train is None else self._train

    def loglik_on(self, data, x):
        """log p(y_i | x) for every observation of ``data`` (n,)."""
        raise NotImplementedError

    def pointwise_loglik(self, x):
        return self.loglik_on(self.data, x)

    def written_loglik(self, x):
        """The log-likelihood columns a chain writes: every observation, or a refit's held-out ones."""
        return self.pointwise_loglik(x) if self._held is None else self.loglik_on(self._held, x)

    @property
    def written_n(self) -> int:
        return self.data.n if self._held is None else self._held.n

    def refit(self, held_out0) -> "Model":
        """This model fitted without the observations ``held_out0`` (0-based, distinct); see the module
        docstring. Raises ValueError for indices outside the data or repeated ones."""
        full = self.full_data()
        held = [int(i) for i in held_out0]
        if not held or len(set(held)) != len(held) or min(held) < 0 or max(held) >= full.n:
            raise ValueError(f"held-out observations must be distinct indices 0..{full.n - 1}, got {held[:10]}")
        if len(held) >= full.n:
            raise ValueError("a refit must keep at least one observation")
        out = copy.copy(self)
        out.__dict__.pop("_design", None)  # cached design of the full data
        keep = np.setdiff1d(np.arange(full.n), held)
        out._train = full.subset(keep)
        out._held = full.subset(held)
        out.held_out = tuple(held)
        return out

    def run_info(self) -> dict:
        d = self.data
        if self._held is not None:
            shown = ", ".join(str(i + 1) for i in self.held_out[:8]) + (" ..." if len(self.held_out) > 8 else "")
            return dict(title=f"{self.title}, refitted without observation(s) {shown}",
                        observation_labels=list(self._held.labels), n_params=self.n_params)
        return dict(title=self.title, dataset=d.dataset, observation_labels=list(d.labels),
                    n_params=self.n_params, point_loglik=self.point_loglik())


def _t_loglik(r, sigma, nu):
    """log t_nu(r | 0, sigma) elementwise."""
    return (special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2)
            - 0.5 * np.log(nu * np.pi) - np.log(sigma)
            - (nu + 1) / 2 * np.log1p((r / sigma) ** 2 / nu))


def _normal_loglik(r, sigma):
    return -0.5 * LOG_2PI - np.log(sigma) - 0.5 * (r / sigma) ** 2


def _grouped_ml(data: GroupedData, loglik) -> float:
    """Maximum over (levels (J,), log sigma) of sum_i loglik(y_i - level_g(i), sigma)."""
    from scipy import optimize  # imported here: the sampler processes never need it

    J = data.n_groups

    def negll(x):
        return -np.sum(loglik(data.y - x[:J][data.group], np.exp(x[J])))

    start = np.append([np.median(data.y[data.group == j]) for j in range(J)],
                      np.log(np.std(data.y)))
    best = optimize.minimize(negll, start, method="L-BFGS-B")
    best = optimize.minimize(negll, best.x, method="Nelder-Mead",
                             options=dict(xatol=1e-8, fatol=1e-10, maxiter=20_000))
    return float(-best.fun)


def _dispersed_levels(rng, data: GroupedData):
    """Initial levels scattered widely around the overall median, and a spread from 0.5 to 10 cm."""
    mu = np.median(data.y) + rng.normal(0.0, 6.0, size=data.n_groups)
    sigma = np.exp(rng.uniform(np.log(0.5), np.log(10.0)))
    return mu, sigma


class _TarnModel(Model):
    """The tarn-levels data; one level per tarn and the spread of the readings."""

    def full_data(self):
        return tarn_data()

    @property
    def param_names(self):
        return tuple(f"level_{_slug(t)}" for t in TARNS) + ("spread",)


class TarnsRobust(_TarnModel):
    """y_i ~ t_4(mu_g(i), sigma); mu_j ~ N(0, 10^2); sigma^2 ~ Inv-Gamma(1, 1).

    Gibbs sampler on the scale-mixture form y_i | lambda_i ~ N(mu_g(i), sigma^2 / lambda_i),
    lambda_i ~ Gamma(nu/2, rate nu/2) (Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 17.2):
    every full conditional is conjugate,

    - lambda_i | . ~ Gamma((nu + 1)/2, rate (nu + r_i^2 / sigma^2) / 2), r_i = y_i - mu_g(i)
    - mu_j | .     ~ N(m_j, v_j), 1/v_j = 1/10^2 + sum_{i in j} lambda_i / sigma^2,
                     m_j = v_j * sum_{i in j} lambda_i y_i / sigma^2
    - sigma^2 | .  ~ Inv-Gamma(1 + n/2, 1 + sum_i lambda_i r_i^2 / 2).
    """

    name = "tarns-robust"
    scenario = "tarn-levels"
    nu = 4.0
    prior_sd = 10.0
    a0 = b0 = 1.0
    warmup = 200
    title = "Tarn levels: Student-t readings (nu = 4), one level per tarn (Gibbs)"
    description = "fits well and mixes well (Gibbs on the t scale mixture)"

    def loglik_on(self, d, theta):
        J = d.n_groups
        return _t_loglik(d.y - theta[:J][d.group], theta[J], self.nu)

    def output(self, theta):
        return np.asarray(theta, dtype=float)

    def initial(self, rng):
        mu, sigma = _dispersed_levels(rng, self.data)
        return np.append(mu, sigma)

    def sampler(self, rng, theta0):
        return _TGibbs(self, rng, theta0)

    def point_loglik(self):
        return _grouped_ml(self.data, lambda r, s: _t_loglik(r, s, self.nu))


class _TGibbs:
    def __init__(self, model: TarnsRobust, rng, theta0):
        self.m, self.rng = model, rng
        d = model.data
        self.J = d.n_groups
        self.mu = np.array(theta0[: self.J], dtype=float)
        self.sig2 = float(theta0[self.J]) ** 2
        self.acceptance = 1.0  # every Gibbs draw is taken

    def step(self):
        m, rng, d, J = self.m, self.rng, self.m.data, self.J
        nu = m.nu
        r = d.y - self.mu[d.group]
        lam = rng.gamma((nu + 1) / 2, 2.0 / (nu + r * r / self.sig2))
        prec = 1.0 / m.prior_sd**2 + np.bincount(d.group, lam, J) / self.sig2
        mean = np.bincount(d.group, lam * d.y, J) / self.sig2 / prec
        self.mu = mean + rng.standard_normal(J) / np.sqrt(prec)
        r = d.y - self.mu[d.group]
        shape = m.a0 + d.n / 2
        rate = m.b0 + 0.5 * np.sum(lam * r * r)
        self.sig2 = rate / rng.gamma(shape)
        return np.append(self.mu, np.sqrt(self.sig2))

    def end_warmup(self):
        pass


class TarnsPlain(_TarnModel):
    """y_i ~ N(mu_g(i), sigma^2); mu_j | sigma^2 ~ N(m0, sigma^2 / kappa0);
    sigma^2 ~ Scaled-Inv-chi^2(nu0, s0^2), with m0 = 0, kappa0 = 0.01, nu0 = 1, s0 = 1.

    The conjugate prior of Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 3.3, with the J
    levels sharing sigma^2. Sampled by adaptive random-walk Metropolis on (mu (J,), log sigma); the
    closed-form posterior (:meth:`exact_posterior`) is what the tests check the chains against.
    """

    name = "tarns-plain"
    scenario = "tarn-levels"
    m0, kappa0, nu0, s0 = 0.0, 0.01, 1.0, 1.0
    warmup = 5000
    title = "Tarn levels: normal readings, one level per tarn (adaptive Metropolis)"
    description = "misfit: the four misread readings stay influential (Pareto k-hat above 0.7)"

    def loglik_on(self, d, x):
        J = d.n_groups
        return _normal_loglik(d.y - x[:J][d.group], np.exp(x[J]))

    def log_density(self, x):
        """Log posterior in (mu (J,), log sigma), up to a constant, with the Jacobian of log sigma."""
        d = self.data
        J = d.n_groups
        mu, log_s = x[:J], x[J]
        s2 = np.exp(2 * log_s)
        r = d.y - mu[d.group]
        ll = -d.n * log_s - 0.5 * np.dot(r, r) / s2
        prior_mu = -J * log_s - 0.5 * self.kappa0 * np.sum((mu - self.m0) ** 2) / s2
        # Scaled-Inv-chi^2(nu0, s0^2) density of sigma^2, times |d sigma^2 / d log sigma| = 2 sigma^2
        prior_s2 = -(self.nu0 / 2 + 1) * 2 * log_s - self.nu0 * self.s0**2 / (2 * s2) + 2 * log_s
        return ll + prior_mu + prior_s2

    def output(self, x):
        J = self.data.n_groups
        return np.append(x[:J], np.exp(x[J]))

    def initial(self, rng):
        mu, sigma = _dispersed_levels(rng, self.data)
        return np.append(mu, np.log(sigma))

    def sampler(self, rng, x0):
        return AdaptiveMetropolis(self.log_density, x0, rng, scale0=0.1, t0=100)

    def point_loglik(self):
        return _grouped_ml(self.data, _normal_loglik)

    def exact_posterior(self) -> dict:
        """Closed-form marginal posterior (Bayesian Data Analysis, 3rd ed., sec. 3.3).

        With n_j readings at tarn j, mean ybar_j and within-tarn sum of squares S_j:
        kappa_j = kappa0 + n_j, m_j = (kappa0 m0 + n_j ybar_j) / kappa_j, nu_n = nu0 + n,
        nu_n s_n^2 = nu0 s0^2 + sum_j [S_j + kappa0 n_j / kappa_j (ybar_j - m0)^2];
        sigma^2 | y ~ Scaled-Inv-chi^2(nu_n, s_n^2) = Inv-Gamma(nu_n / 2, nu_n s_n^2 / 2) and
        mu_j | y ~ t_{nu_n}(m_j, s_n^2 / kappa_j). (Integrating each mu_j out of the joint
        posterior gives the sec. 3.3 result with the J within-tarn terms summed.)

        Returns ``mean`` and ``sd`` (p,) of the written parameters (levels, then sigma).
        """
        d = self.data
        J = d.n_groups
        n_j = np.bincount(d.group, minlength=J).astype(float)
        ybar = np.bincount(d.group, d.y, J) / n_j
        S = np.bincount(d.group, (d.y - ybar[d.group]) ** 2, J)
        kappa = self.kappa0 + n_j
        m = (self.kappa0 * self.m0 + n_j * ybar) / kappa
        nu_n = self.nu0 + d.n
        ss = self.nu0 * self.s0**2 + np.sum(S + self.kappa0 * n_j / kappa * (ybar - self.m0) ** 2)
        s2n = ss / nu_n
        mu_sd = np.sqrt(s2n / kappa * nu_n / (nu_n - 2))
        a, b = nu_n / 2, ss / 2  # sigma^2 ~ Inv-Gamma(a, b)
        e_sigma = np.exp(0.5 * np.log(b) + special.gammaln(a - 0.5) - special.gammaln(a))
        sd_sigma = np.sqrt(b / (a - 1) - e_sigma**2)
        return dict(mean=np.append(m, e_sigma), sd=np.append(mu_sd, sd_sigma))


class TarnsSticky(_TarnModel):
    """y_i ~ t_4(alpha + beta_g(i), sigma); alpha ~ N(0, 10^2), beta_j ~ N(0, tau^2) with tau fixed;
    sigma^2 ~ Inv-Gamma(1, 1).

    The data pin down alpha + beta_j closely but alpha only through the prior on the offsets, so the
    posterior is a narrow ridge along (alpha + c, beta - c). A one-at-a-time random walk with fixed
    steps (no tuning) creeps along the ridge, started from dispersed points after a short warm-up.
    """

    name = "tarns-sticky"
    scenario = "tarn-levels"
    nu = 4.0
    tau = 1.0
    step = 0.4
    warmup = 100
    title = "Tarn levels: Student-t readings (nu = 4), common level plus tarn offsets (one-at-a-time walk)"
    description = "mixes slowly: correlated level and offsets, untuned one-at-a-time random walk"

    @property
    def param_names(self):
        return ("common_level",) + tuple(f"offset_{_slug(t)}" for t in TARNS) + ("spread",)

    def loglik_on(self, d, x):
        J = d.n_groups
        return _t_loglik(d.y - x[0] - x[1:J + 1][d.group], np.exp(x[J + 1]), self.nu)

    def log_density(self, x):
        J = self.data.n_groups
        log_s = x[J + 1]
        ll = np.sum(self.pointwise_loglik(x))
        prior = -0.5 * (x[0] / 10.0) ** 2 - 0.5 * np.sum((x[1:J + 1] / self.tau) ** 2)
        # sigma^2 ~ Inv-Gamma(1, 1), times |d sigma^2 / d log sigma| = 2 sigma^2
        prior += -2.0 * 2 * log_s - np.exp(-2 * log_s) + 2 * log_s
        return ll + prior

    def output(self, x):
        J = self.data.n_groups
        return np.append(x[:J + 1], np.exp(x[J + 1]))

    def initial(self, rng):
        J = self.data.n_groups
        alpha = np.median(self.data.y) + rng.normal(0.0, 6.0)
        beta = rng.normal(0.0, 3.0, size=J)
        return np.concatenate([[alpha], beta, [rng.uniform(np.log(0.5), np.log(10.0))]])

    def sampler(self, rng, x0):
        return ComponentwiseMetropolis(self.log_density, x0, rng, steps=self.step)

    def point_loglik(self):
        return _grouped_ml(self.data, lambda r, s: _t_loglik(r, s, self.nu))


class _OrchardModel(Model):
    """y_i ~ N(x_i' beta, sigma^2); beta | sigma^2 ~ N(0, sigma^2 g I), g = 100;
    sigma^2 ~ Inv-Gamma(a0, b0), a0 = b0 = 1 (the conjugate normal / inverse-gamma regression,
    Bayesian Data Analysis, 3rd ed., sec. 14.8).

    Gibbs sampler: with V = (X'X + I/g)^{-1} and b = V X'y,
    beta | sigma^2, y ~ N(b, sigma^2 V) and
    sigma^2 | beta, y ~ Inv-Gamma(a0 + (n + q)/2, b0 + (|y - X beta|^2 + beta'beta / g) / 2).
    """

    scenario = "orchard-ledger"
    columns: tuple
    g = 100.0
    a0 = b0 = 1.0
    warmup = 100

    def full_data(self):
        return orchard_data()

    @functools.cached_property
    def _design(self):
        d = self.data
        idx = [d.columns.index(c) for c in self.columns]
        X = np.ascontiguousarray(d.X[:, idx])
        prec = X.T @ X + np.eye(len(idx)) / self.g
        V = np.linalg.inv(prec)
        b = V @ (X.T @ d.y)
        return X, V, np.linalg.cholesky(V), b

    @property
    def param_names(self):
        return tuple(f"effect_{c}" for c in self.columns) + ("spread",)

    def loglik_on(self, d, theta):
        if d is self.data:
            X = self._design[0]
        else:
            X = d.X[:, [d.columns.index(c) for c in self.columns]]
        return _normal_loglik(d.y - X @ theta[:-1], theta[-1])

    def output(self, theta):
        return np.asarray(theta, dtype=float)

    def initial(self, rng):
        q = len(self.columns)
        return np.append(rng.normal(0.0, 10.0, q), np.exp(rng.uniform(np.log(1.0), np.log(30.0))))

    def sampler(self, rng, theta0):
        return _RegressionGibbs(self, rng, theta0)

    def point_loglik(self):
        from scipy import optimize

        X, y = self._design[0], self.data.y
        q = X.shape[1]

        def negll(x):
            r = y - X @ x[:q]
            s = np.exp(x[q])
            return y.size * x[q] + 0.5 * np.dot(r, r) / s**2

        def grad(x):
            r = y - X @ x[:q]
            s2 = np.exp(2 * x[q])
            return np.append(-(X.T @ r) / s2, y.size - np.dot(r, r) / s2)

        start = np.append(np.zeros(q), np.log(np.std(y)))
        best = optimize.minimize(negll, start, jac=grad, method="BFGS", options=dict(gtol=1e-8))
        return float(-best.fun - 0.5 * y.size * LOG_2PI)

    def exact_posterior(self) -> dict:
        """Closed-form marginal posterior of beta (Bayesian Data Analysis, 3rd ed., sec. 14.8 with the
        conjugate prior): sigma^2 | y ~ Inv-Gamma(a_n, b_n), a_n = a0 + n/2,
        b_n = b0 + (y'y - b' V^{-1} b)/2, and beta | y ~ t_{2 a_n}(b, (b_n / a_n) V).
        Returns ``mean`` and ``sd`` (q,) of beta."""
        X, V, _, b = self._design
        y = self.data.y
        a_n = self.a0 + y.size / 2
        b_n = self.b0 + 0.5 * (y @ y - b @ np.linalg.solve(V, b))
        dof = 2 * a_n
        sd = np.sqrt(b_n / a_n * np.diag(V) * dof / (dof - 2))
        return dict(mean=b, sd=sd)


class _RegressionGibbs:
    def __init__(self, model: _OrchardModel, rng, theta0):
        self.m, self.rng = model, rng
        self.sig2 = float(theta0[-1]) ** 2
        self.beta = np.array(theta0[:-1], dtype=float)
        self.acceptance = 1.0

    def step(self):
        m, rng = self.m, self.rng
        X, _, L, b = m._design
        y = m.data.y
        q = b.size
        self.beta = b + np.sqrt(self.sig2) * (L @ rng.standard_normal(q))
        r = y - X @ self.beta
        shape = m.a0 + (y.size + q) / 2
        rate = m.b0 + 0.5 * (np.dot(r, r) + np.dot(self.beta, self.beta) / m.g)
        self.sig2 = rate / rng.gamma(shape)
        return np.append(self.beta, np.sqrt(self.sig2))

    def end_warmup(self):
        pass


class OrchardFull(_OrchardModel):
    name = "orchard-full"
    columns = ORCHARD_COLUMNS
    title = "Orchard yields: normal regression on age, slope, irrigation, soil depth, exposure (Gibbs)"
    description = "all five covariates; conjugate Gibbs"


class OrchardLean(_OrchardModel):
    name = "orchard-lean"
    columns = ("intercept", "age", "slope", "irrigation")
    title = "Orchard yields: normal regression on age, slope, irrigation (Gibbs)"
    description = "drops soil depth and exposure; conjugate Gibbs"


@dataclass(frozen=True)
class Scenario:
    name: str
    description: str
    models: tuple  # of Model instances
    pace: float  # default draws per second per chain
    draws: int  # default draws per chain (after warm-up)


SCENARIOS = {
    s.name: s
    for s in (
        Scenario(
            "tarn-levels",
            "Morning water levels of seven tarns over 48 days (336 readings, four misread); "
            "three models: tarns-robust (fits and mixes well), tarns-plain (misfit, influential "
            "readings), tarns-sticky (slow mixing)",
            (TarnsRobust(), TarnsPlain(), TarnsSticky()),
            pace=40.0,
            draws=30_000,
        ),
        Scenario(
            "orchard-ledger",
            "Yields of 24,000 orchard trees with five covariates, for benchmarks; two models: "
            "orchard-full and orchard-lean (normal regressions, conjugate Gibbs)",
            (OrchardFull(), OrchardLean()),
            pace=5.0,
            draws=2_000,
        ),
    )
}


def get_scenario(name: str) -> Scenario:
    try:
        return SCENARIOS[name]
    except KeyError:
        known = ", ".join(SCENARIOS)
        raise ValueError(f"unknown scenario {name!r}; known scenarios: {known}") from None


def get_model(name: str) -> Model:
    for s in SCENARIOS.values():
        for m in s.models:
            if m.name == name:
                return m
    known = ", ".join(m.name for s in SCENARIOS.values() for m in s.models)
    raise ValueError(f"unknown model {name!r}; known models: {known}")
