"""Streaming relative efficiency r_eff for PSIS-LOO, updated as draws arrive, in bounded memory.

:func:`chainvigil.estimators.mixing.relative_efficiency` computes r_eff_i = ESS(exp(loglik_i)) / S
from every draw with FFT autocorrelations, so it must reread the whole draw store.  This module keeps,
per chain and per observation, a fixed number of batch sums and running moments instead, so each
new block costs O(draws * n) and the state is O(B * n) floats per chain whatever the length S.

Formula (batch means; Flegal & Jones 2010; the multi-chain pooling around the grand mean is the
"replicated batch means" idea, Vats & Knudson 2021 (from memory); Geyer 1992 for long-run variance
and ESS in general).  For observation i let y_t = exp(loglik_{t,i} - c_i), with c_i the running
maximum over all finite draws of all chains (r_eff is invariant to this scaling).  Chain m holds
N_m draws; its first a_m * b_m draws are cut into a_m consecutive batches of b_m draws with means
ybar_{m,j}.  With mu the mean of all S = sum_m N_m draws,

    V_b        = sum_{m,j} b_m (ybar_{m,j} - mu)^2 / (sum_m a_m - 1)      (batch means, size b)
    V_2b       = the same with neighbouring batches paired (size 2b, floor(a_m/2) per chain)
    sigma^2_lr = max(V_b, 2 V_2b - V_b)                                     (long-run variance)
    s^2        = sum_{m,t} (y_{m,t} - mu)^2 / (S - 1)                      (variance of all draws)
    r_eff      = s^2 / sigma^2_lr   (= ESS / S),

clipped to [1/S, log10(S)] like the full estimate.  2 V_2b - V_b is the lugsail batch-means
estimator with r = 2, c = 1/2 (Vats & Flegal 2022, from memory): batch means have a bias of order
1/b, and the combination cancels its first-order term; taking at least V_b keeps the noisier
corrected value from going below the plain one (whose bias is downwards for positively correlated
chains), so r_eff is never above the plain batch-means value.  The batches: each chain has 2B slots; batches
of the current size b fill them, and when all 2B are full neighbouring batches are summed pairwise
(b doubles, B slots free), so a chain always has between min(N, B) and 2B complete batches and the
batch size grows like N/B (b between N/(2B) and N/B once N > 2B).  Draws after the last complete
batch count in the moments only.  Moments are kept per chain with Welford's update and merged with
the pairwise formula of Chan, Golub & LeVeque (1983).  When a new maximum c_i arrives, every
stored sum of observation i is multiplied by exp(c_old - c_new) (moments of order two by its
square).

What is approximate, compared with the full estimate
----------------------------------------------------
* Batch means underestimate sigma^2_lr when b is not much longer than the autocorrelation time
  tau: for a stationary AR(1) with coefficient rho, b V_b estimates
  sigma^2_lr * (1 - 2 rho (1 - rho^b) / (b (1 - rho^2) tau)) with tau = (1+rho)/(1-rho)
  (the exact variance of a mean of b AR(1) draws).  The lugsail step removes the 1/b term, the
  rho^b term is left (small once b is a few tau).  The full estimate (Geyer's initial monotone
  sequence on split chains) is nearly unbiased for tau but noisy too; per observation the two
  differ by about 10-15% (relative sd) with 4 x 1,500 draws, on average over observations by a few
  percent (measured for AR(1) chains with rho 0.5-0.95, tests/test_reff_stream.py).
* Chains are not split in half: a trend within a chain shows up directly as variance between its
  batch means instead.  Differences between chains count through the grand mean mu, like the
  between-chain term of var+ in the full estimate.
* Chains may have different lengths (the full estimate takes the same number of draws from each).

Rules shared with :func:`chainvigil.estimators.mixing.finite_relative_efficiency`: an observation
with any non-finite log-likelihood (NaN, +inf, -inf) in any chain gets r_eff = 1 from then on; an
observation whose likelihood is constant within every chain gets 1; every observation gets 1 while
some chain has fewer than 4 draws.

References
----------
Flegal, J. M. & Jones, G. L. (2010). Batch means and spectral variance estimators in Markov chain
    Monte Carlo. Annals of Statistics 38(2), 1034-1070.
Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science 7(4), 473-483.
Chan, T. F., Golub, G. H. & LeVeque, R. J. (1983). Algorithms for computing the sample variance:
    analysis and recommendations. The American Statistician 37(3), 242-247.
Welford, B. P. (1962). Note on a method for calculating corrected sums of squares and products.
    Technometrics 4(3), 419-420.
Vats, D. & Knudson, C. (2021). Revisiting the Gelman-Rubin diagnostic. Statistical Science 36(4),
    518-529.  (Replicated batch means for several chains; cited from memory.)
Vats, D. & Flegal, J. M. (2022). Lugsail lag windows for estimating time-average covariance matrices.
    Biometrika 109(3), 735-750.  (Cited from memory.)
Vehtari, A., Gelman, A. & Gabry, J. (2017). Practical Bayesian model evaluation using leave-one-out
    cross-validation and WAIC. Statistics and Computing 27, 1413-1432.  (r_eff, Sec. 3.2.)

Pure numpy, no I/O.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["StreamingRelativeEfficiency", "DEFAULT_BATCHES", "MIN_DRAWS_PER_CHAIN"]

#: B: a chain keeps between B and 2B complete batches once it has more than 2B draws.
DEFAULT_BATCHES = 16
#: Fewer draws than this in some chain: r_eff is 1 everywhere (as in the full estimate).
MIN_DRAWS_PER_CHAIN = 4

_STATE_VERSION = 1


class _Chain:
    """Batch sums and running moments of one chain (all arrays over the n observations)."""

    __slots__ = ("sums", "filled", "batch_size", "partial", "partial_count", "count", "mean", "m2")

    def __init__(self, slots: int, n: int):
        self.sums = np.zeros((slots, n))  # sums of complete batches, rows 0..filled-1
        self.filled = 0
        self.batch_size = 1
        self.partial = np.zeros(n)  # sum of the draws of the batch being filled
        self.partial_count = 0
        self.count = 0
        self.mean = np.zeros(n)
        self.m2 = np.zeros(n)  # sum of squared deviations from the chain mean

    def rescale(self, cols: np.ndarray, factor: np.ndarray):
        self.sums[:, cols] *= factor
        self.partial[cols] *= factor
        self.mean[cols] *= factor
        self.m2[cols] *= factor * factor

    def add_moments(self, y: np.ndarray):
        """Chan-Golub-LeVeque merge of the moments of block y (d, n) into the running ones."""
        d = y.shape[0]
        block_mean = y.mean(axis=0)
        block_m2 = np.square(y - block_mean).sum(axis=0)
        total = self.count + d
        delta = block_mean - self.mean
        self.mean += delta * (d / total)
        self.m2 += block_m2 + np.square(delta) * (self.count * d / total)
        self.count = total

    def add_batches(self, y: np.ndarray):
        """Cut block y (d, n) into batches of the current size, doubling it whenever 2B are full."""
        slots = self.sums.shape[0]
        pos, d = 0, y.shape[0]
        while pos < d:
            b = self.batch_size
            if self.partial_count > 0 or d - pos < b:
                take = min(b - self.partial_count, d - pos)
                self.partial += y[pos:pos + take].sum(axis=0)
                self.partial_count += take
                pos += take
                if self.partial_count == b:
                    self.sums[self.filled] = self.partial
                    self.filled += 1
                    self.partial[:] = 0.0
                    self.partial_count = 0
            else:
                q = min(slots - self.filled, (d - pos) // b)
                part = y[pos:pos + q * b]
                self.sums[self.filled:self.filled + q] = part.reshape(q, b, -1).sum(axis=1)
                self.filled += q
                pos += q * b
            if self.filled == slots:
                half = slots // 2
                self.sums[:half] = self.sums[0::2] + self.sums[1::2]
                self.sums[half:] = 0.0
                self.filled = half
                self.batch_size *= 2


class StreamingRelativeEfficiency:
    """r_eff (n,) of PSIS-LOO kept current block by block (see the module docstring for the formula).

    Parameters
    ----------
    n : number of observations.
    batches : B; each chain keeps between B and 2B batch sums per observation (default 16).

    ``update(chain, block)`` takes a ``(draws, n)`` block of log-likelihoods of one chain (chain
    names are kept as ``str``); ``merge(other)`` adds the chains of another estimator (disjoint
    chain names, same n and B); ``result()`` returns r_eff (n,); ``to_state()`` / ``from_state()``
    convert to and from a dict of numpy arrays (no objects, safe with ``allow_pickle=False``).
    Memory: (2B + 3) * n float64 values per chain plus 2n for the shift and the flags.
    """

    def __init__(self, n: int, *, batches: int = DEFAULT_BATCHES):
        n, batches = int(n), int(batches)
        if n < 1:
            raise ValueError(f"StreamingRelativeEfficiency: n must be at least 1, got {n}")
        if batches < 1:
            raise ValueError(f"StreamingRelativeEfficiency: batches must be at least 1, got {batches}")
        self.n = n
        self.batches = batches
        self.shift = np.full(n, -np.inf)  # running max of finite log-likelihoods per observation
        self.bad = np.zeros(n, dtype=bool)  # saw a non-finite log-likelihood
        self.chains: dict[str, _Chain] = {}

    # ------------------------------------------------------------------ updating
    @property
    def draws(self) -> int:
        return sum(c.count for c in self.chains.values())

    def _raise_shift(self, new_shift: np.ndarray):
        """Move the per-observation shift up to new_shift, rescaling every stored sum."""
        cols = np.flatnonzero(new_shift > self.shift)
        if cols.size == 0:
            return
        old = self.shift[cols]
        factor = np.where(np.isfinite(old), np.exp(old - new_shift[cols]), 0.0)
        for chain in self.chains.values():
            chain.rescale(cols, factor)
        self.shift[cols] = new_shift[cols]

    def update(self, chain, block) -> None:
        """Add a block of log-likelihoods ``(draws, n)`` of chain ``chain`` (after its earlier draws)."""
        ll = np.asarray(block, dtype=float)
        if ll.ndim == 1 and self.n == 1:
            ll = ll[:, None]
        if ll.ndim != 2 or ll.shape[1] != self.n:
            raise ValueError(f"StreamingRelativeEfficiency.update: expected a block shaped (draws, {self.n}), "
                             f"got {ll.shape}")
        if ll.shape[0] == 0:
            return
        finite = np.isfinite(ll)
        if not finite.all():
            self.bad |= ~finite.all(axis=0)
            ll = np.where(finite, ll, -np.inf)  # weight 0; the observation's r_eff is 1 anyway
        self._raise_shift(np.maximum(self.shift, ll.max(axis=0)))
        shift = np.where(np.isfinite(self.shift), self.shift, 0.0)
        y = np.exp(ll - shift)
        key = str(chain)
        state = self.chains.get(key)
        if state is None:
            state = self.chains[key] = _Chain(2 * self.batches, self.n)
        state.add_moments(y)
        state.add_batches(y)

    def merge(self, other: "StreamingRelativeEfficiency") -> "StreamingRelativeEfficiency":
        """Add the chains of ``other`` (none may share a name with ours); returns self."""
        if other.n != self.n or other.batches != self.batches:
            raise ValueError(f"StreamingRelativeEfficiency.merge: n/B differ ({self.n}/{self.batches} vs "
                             f"{other.n}/{other.batches})")
        common = sorted(set(self.chains) & set(other.chains))
        if common:
            raise ValueError(f"StreamingRelativeEfficiency.merge: both hold chain(s) {common}; merge "
                             "combines estimators of different chains")
        self._raise_shift(np.maximum(self.shift, other.shift))
        cols = np.arange(self.n)
        # where other's shift is finite ours is finite and at least as large; elsewhere other holds zeros
        has = np.isfinite(other.shift)
        factor = np.zeros(self.n)
        factor[has] = np.exp(other.shift[has] - self.shift[has])
        for name, chain in other.chains.items():
            copy = _Chain(2 * self.batches, self.n)
            for attr in _Chain.__slots__:
                value = getattr(chain, attr)
                setattr(copy, attr, value.copy() if isinstance(value, np.ndarray) else value)
            copy.rescale(cols, factor)
            self.chains[name] = copy
        self.bad |= other.bad
        return self

    # ------------------------------------------------------------------ result
    def result(self) -> np.ndarray:
        """r_eff (n,): s^2 / sigma^2_lr clipped to [1/S, log10(S)]; 1 where undefined (see module doc)."""
        chains = list(self.chains.values())
        if not chains or min(c.count for c in chains) < MIN_DRAWS_PER_CHAIN:
            return np.ones(self.n)
        total = sum(c.count for c in chains)
        mu = sum(c.count * c.mean for c in chains) / total
        within = sum(c.m2 for c in chains)
        # Chan et al.: sum of squares of all draws around the grand mean
        m2 = within + sum(c.count * np.square(c.mean - mu) for c in chains)
        # batch means at the current size b and at 2b (neighbouring batches paired)
        plain, paired = np.zeros(self.n), np.zeros(self.n)
        n_plain = n_paired = 0
        for c in chains:
            b, k = c.batch_size, c.filled
            if k:
                plain += b * np.square(c.sums[:k] / b - mu).sum(axis=0)
                n_plain += k
            p = k // 2
            if p:
                pairs = (c.sums[0:2 * p:2] + c.sums[1:2 * p:2]) / (2 * b)
                paired += 2 * b * np.square(pairs - mu).sum(axis=0)
                n_paired += p
        if n_plain < 2:
            return np.ones(self.n)
        long_run = plain / (n_plain - 1)
        if n_paired >= 2:
            # lugsail correction 2 sigma^2_2b - sigma^2_b removes the O(1/b) bias; never below plain
            long_run = np.maximum(long_run, 2.0 * paired / (n_paired - 1) - long_run)
        variance = m2 / (total - 1)
        with np.errstate(invalid="ignore", divide="ignore"):
            r = variance / long_run
        r = np.where((within > 0) & (long_run > 0) & np.isfinite(r) & ~self.bad, r, 1.0)
        return np.clip(r, 1.0 / total, math.log10(total))

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict:
        """The whole state as a dict of numpy arrays (plain dtypes: floats, ints, bools, str)."""
        names = sorted(self.chains)
        slots = 2 * self.batches
        chains = [self.chains[k] for k in names]

        def stack(attr, shape):
            return np.stack([getattr(c, attr) for c in chains]) if chains else np.zeros((0, *shape))

        def ints(attr):
            return np.array([getattr(c, attr) for c in chains], dtype=np.int64)

        return {
            "version": np.array(_STATE_VERSION, dtype=np.int64),
            "n": np.array(self.n, dtype=np.int64),
            "batches": np.array(self.batches, dtype=np.int64),
            "shift": self.shift.copy(),
            "bad": self.bad.copy(),
            "chain_names": np.array(names, dtype=np.str_) if names else np.zeros(0, dtype="<U1"),
            "sums": stack("sums", (slots, self.n)),
            "filled": ints("filled"),
            "batch_size": ints("batch_size"),
            "partial": stack("partial", (self.n,)),
            "partial_count": ints("partial_count"),
            "count": ints("count"),
            "mean": stack("mean", (self.n,)),
            "m2": stack("m2", (self.n,)),
        }

    @classmethod
    def from_state(cls, state: dict) -> "StreamingRelativeEfficiency":
        """Rebuild from :meth:`to_state`; raises ValueError on a missing key or inconsistent shapes."""
        try:
            version = int(state["version"])
            if version != _STATE_VERSION:
                raise ValueError(f"StreamingRelativeEfficiency state version {version} (expected {_STATE_VERSION})")
            out = cls(int(state["n"]), batches=int(state["batches"]))
            n, slots = out.n, 2 * out.batches
            names = [str(x) for x in np.asarray(state["chain_names"]).tolist()]
            m = len(names)
            arrays = {
                "shift": ((n,), float), "bad": ((n,), bool), "sums": ((m, slots, n), float),
                "partial": ((m, n), float), "mean": ((m, n), float), "m2": ((m, n), float),
                "filled": ((m,), np.int64), "batch_size": ((m,), np.int64),
                "partial_count": ((m,), np.int64), "count": ((m,), np.int64),
            }
            got = {}
            for key, (shape, dtype) in arrays.items():
                a = np.asarray(state[key])
                if a.shape != shape:
                    raise ValueError(f"StreamingRelativeEfficiency state: '{key}' has shape {a.shape}, "
                                     f"expected {shape}")
                got[key] = a.astype(dtype, copy=True)
        except KeyError as err:
            raise ValueError(f"StreamingRelativeEfficiency state: missing key {err}") from None
        out.shift, out.bad = got["shift"], got["bad"]
        for j, name in enumerate(names):
            c = _Chain(slots, n)
            c.sums, c.partial, c.mean, c.m2 = got["sums"][j], got["partial"][j], got["mean"][j], got["m2"][j]
            c.filled, c.batch_size = int(got["filled"][j]), int(got["batch_size"][j])
            c.partial_count, c.count = int(got["partial_count"][j]), int(got["count"][j])
            if not (0 <= c.filled <= slots and c.batch_size >= 1 and 0 <= c.partial_count < c.batch_size
                    and c.count == c.filled * c.batch_size + c.partial_count):
                raise ValueError(f"StreamingRelativeEfficiency state: chain '{name}' counts are inconsistent")
            out.chains[name] = c
        return out

