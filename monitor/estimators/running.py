"""Small mergeable streaming statistics with ``update`` / ``merge`` / ``result``.

Each state summarises a stream of values per column (shape (k,), k >= 1) and can be saved to and
restored from plain arrays (``to_state`` / ``from_state``: a dict of numpy arrays, no pickles).

:class:`RunningMoments`
    count, mean and M2 = sum (x - mean)^2 per column.  A block of B values is merged with the
    pairwise update of Chan, Golub & LeVeque (1983), "Algorithms for computing the sample
    variance: analysis and recommendations", The American Statistician 37(3), 242-247, eq. 1.5:
    with counts n_a, n_b, means m_a, m_b, sums of squares M_a, M_b and d = m_b - m_a,

        n = n_a + n_b,  m = m_a + d n_b / n,  M = M_a + M_b + d^2 n_a n_b / n

    (Welford's update is the case n_b = 1).  Also keeps the running maximum.

:class:`RunningLogSumExp`
    log sum_s exp(x_s) per column without overflow: the running maximum m and s = sum exp(x_s - m),
    rescaled by exp(m_old - m_new) when the maximum grows (the usual shifted log-sum-exp; the
    result is m + log s).

These are the accumulators the streaming scorer is built from (``chainvigil.estimators.streaming``).
"""
from __future__ import annotations

import numpy as np

__all__ = ["RunningMoments", "RunningLogSumExp"]


def _columns(x) -> np.ndarray:
    x = np.asarray(x, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise ValueError(f"expected values (draws, k) or (draws,), got shape {x.shape}")
    return x


class RunningMoments:
    """Count, mean, sum of squared deviations (M2) and maximum per column; mergeable.

    ``update(x)`` with x (B, k) or (B,); ``merge(other)``; ``result()`` returns
    ``{"count", "mean", "m2", "var" (M2 / (count - 1)), "max"}``.
    """

    def __init__(self, k: int = 1):
        self.count = 0
        self.mean = np.zeros(k)
        self.m2 = np.zeros(k)
        self.max = np.full(k, -np.inf)

    def _combine(self, nb: int, mean_b: np.ndarray, m2_b: np.ndarray, max_b: np.ndarray) -> None:
        na = self.count
        tot = na + nb
        if nb == 0:
            return
        with np.errstate(invalid="ignore", over="ignore"):
            d = mean_b - self.mean
            self.mean = self.mean + d * (nb / tot)
            self.m2 = self.m2 + (m2_b + d * d * (na * nb / tot))
        self.max = np.maximum(self.max, max_b)
        self.count = tot

    def update(self, x) -> "RunningMoments":
        """Add a block of values (B, k) (or (B,) for k = 1)."""
        x = _columns(x)
        if x.shape[0] == 0:
            return self
        with np.errstate(invalid="ignore", over="ignore"):
            mean_b = x.mean(axis=0)
            m2_b = np.sum((x - mean_b) ** 2, axis=0)
        self._combine(x.shape[0], mean_b, m2_b, x.max(axis=0))
        return self

    def merge(self, other: "RunningMoments") -> "RunningMoments":
        """Fold ``other`` (the values that came after this state's) into this state."""
        self._combine(other.count, other.mean, other.m2, other.max)
        return self

    def merge_summary(self, count: int, mean, m2, maximum) -> "RunningMoments":
        """Fold the summary of a block (count, mean, M2, max per column) into this state.

        For a caller that already has a block's column means and sums of squared deviations (the
        streaming scorer computes them chunk by chunk while it reuses its work arrays).
        """
        self._combine(int(count), np.asarray(mean, dtype=float), np.asarray(m2, dtype=float),
                      np.asarray(maximum, dtype=float))
        return self

    def result(self) -> dict:
        with np.errstate(invalid="ignore", divide="ignore"):
            var = self.m2 / (self.count - 1) if self.count > 1 else np.full_like(self.m2, np.nan)
        return {"count": self.count, "mean": self.mean.copy(), "m2": self.m2.copy(), "var": var,
                "max": self.max.copy()}

    def to_state(self) -> dict:
        return {"count": np.asarray(self.count, dtype=np.int64), "mean": self.mean.copy(),
                "m2": self.m2.copy(), "max": self.max.copy()}

    @classmethod
    def from_state(cls, state: dict) -> "RunningMoments":
        out = cls(len(state["mean"]))
        out.count = int(state["count"])
        out.mean = np.array(state["mean"], dtype=float)
        out.m2 = np.array(state["m2"], dtype=float)
        out.max = np.array(state["max"], dtype=float)
        return out


class RunningLogSumExp:
    """log sum_s exp(x_s) per column, kept as a running max m and s = sum exp(x_s - m); mergeable.

    ``result()`` is m + log s (-inf for no values or all -inf).
    """

    def __init__(self, k: int = 1):
        self.m = np.full(k, -np.inf)
        self.s = np.zeros(k)

    def _combine(self, m_b: np.ndarray, s_b: np.ndarray) -> None:
        new_m = np.maximum(self.m, m_b)
        finite = np.isfinite(new_m)
        with np.errstate(invalid="ignore", over="ignore"):
            scale_a = np.where(finite, np.exp(self.m - new_m), 0.0)
            scale_b = np.where(finite, np.exp(m_b - new_m), 0.0)
        self.s = np.where(finite, self.s * scale_a + s_b * scale_b, self.s + s_b)
        self.m = new_m

    def update(self, x) -> "RunningLogSumExp":
        x = _columns(x)
        if x.shape[0] == 0:
            return self
        m_b = x.max(axis=0)
        with np.errstate(invalid="ignore", over="ignore"):
            s_b = np.where(np.isfinite(m_b), np.exp(x - np.where(np.isfinite(m_b), m_b, 0.0)).sum(axis=0), 0.0)
        self._combine(m_b, s_b)
        return self

    def merge(self, other: "RunningLogSumExp") -> "RunningLogSumExp":
        self._combine(other.m, other.s)
        return self

    def merge_summary(self, m, s) -> "RunningLogSumExp":
        """Fold a block summarised as its shift m and s = sum exp(x - m) per column (any m >= the
        block's maximum that keeps the terms finite; the streaming scorer passes the new running
        maximum, so the block's exponentials can be reused elsewhere)."""
        self._combine(np.asarray(m, dtype=float), np.asarray(s, dtype=float))
        return self

    def result(self) -> np.ndarray:
        with np.errstate(divide="ignore"):
            return np.where(self.s > 0, self.m + np.log(np.where(self.s > 0, self.s, 1.0)), -np.inf)

    def to_state(self) -> dict:
        return {"m": self.m.copy(), "s": self.s.copy()}

    @classmethod
    def from_state(cls, state: dict) -> "RunningLogSumExp":
        out = cls(len(state["m"]))
        out.m = np.array(state["m"], dtype=float)
        out.s = np.array(state["s"], dtype=float)
        return out
