"""The PSIS-LOO state of a stream of draws: a tail buffer with body sums, and a cache of the last
tail evaluation that lets most observations be scored in O(1) per snapshot.

PSIS-LOO (Vehtari, Gelman & Gabry 2017, Statistics and Computing 27; PSIS of Vehtari, Simpson,
Gelman, Yao & Gabry 2024, JMLR 25(72)) of observation i needs, out of its S log-likelihoods ll_s,
only the M_i + 1 smallest in order (the M_i largest ratios and the cutoff; M_i = ceil(min(S/5,
3 sqrt(S / r_eff_i)))); every other draw keeps its raw ratio exp(-ll), so w p = 1 for it and it
enters the estimate through three numbers: its count, sum exp(-ll - c) and sum exp(-2 ll - 2 c).

:class:`TailBuffer` (per observation, n rows)
    *Buffer*: capacity 2K values per row that always hold the K smallest log-likelihoods
    (K >= M + 1); *body*: for every draw that has left the buffer, the count and the sums
    s1 = sum exp(-ll - b_i), s2 = sum exp(-2 ll - 2 b_i) at the shift b_i = -t_i, t_i the row's
    threshold (its K-th smallest value at the last compaction), so every term is <= 1.
    Invariant: every body draw is >= at least K buffered draws.  ``update`` sends a draw >= t_i
    straight to the body sums (reusing the caller's exponentials when given, see
    :meth:`TailBuffer.update`) and appends the others; a row that would overflow is partitioned
    back to its K smallest, the rest going to the body.  ``merge`` combines the states of two
    disjoint sets of draws (the union's K smallest stay, the rest and both bodies are summed at the
    new shift).  ``result(r_eff)`` gives elpd_i, mcse_i and k-hat_i.

*Incremental scoring* (the cache).  For every observation the last full evaluation is kept:
M_i, the cutoff t*_i (the (M_i + 1)-th smallest log-likelihood), the shift c_i = -min ll, k-hat_i,
the tail summaries of :func:`.loo.tail_summaries` (L_i and the sums of u, u^2, v, v^2, v u over the
M_i smoothed tail weights) and the *rest sums* over every draw outside the tail at that shift:
count R0_i, R1_i = sum exp(-ll - c_i), R2_i = sum exp(-2 ll - 2 c_i).  Then

* a new draw with ll >= t*_i leaves the M_i + 1 smallest values unchanged: only R0, R1, R2 grow
  (at add time, from the exponentials the body sums use: exp(-ll - c) = exp(-t - c) exp(t - ll));
* a new draw with ll < t*_i is a late tail draw: counted in ``c_late`` and added to the rest sums
  at its raw ratio; one below the cached minimum (a new largest ratio) marks row i dirty;
* buffer compaction moves draws between buffer and body but never in or out of the rest, so it
  leaves the cache alone; so does a rebuild that rereads the same draws into a larger buffer; a
  merge clears it.

``result`` re-evaluates in full (in blocks of rows) only the rows that are dirty, or whose late
draws or change of M_i (more draws, or an r_eff that changes the ceiling) exceed ``lag`` x M_i
(``lag`` = 0, the default: any late draw or change; docs/numerics.md, "Tail lag"); every other row is finished from its
cache in O(1) with :func:`.loo.loo_from_summaries`, the same function the full path ends in, so the
numbers are the batch ones to rounding when ``lag`` is 0.  The smoothed weights depend on S only through M_i (the
fit uses the M_i exceedances over the cutoff and the quantiles (z - 1/2) / M_i; they are truncated
at the largest raw ratio, which the cache holds), so no other row needs a refit.  A -inf draw makes
the row's results fixed for good (elpd -inf, mcse +inf, k-hat +inf).  Expected cost per snapshot
of B draws with ``lag`` 0: about B (M + 1) / S of the rows are dirty and a change of M_i comes every
~2 sqrt(S r_eff) / 3 draws, each refit costs O(M (30 + sqrt M)) (the GPD fit's grid), which grows
slowly with S (bench/psis_work.py); with ``lag`` f a row is refitted about once per f S draws, so
the cost falls as S grows.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ._blocks import for_each_block
from .loo import loo_from_summaries, rest_sums, tail_summaries
from .psis import tail_length

__all__ = ["TailBuffer"]

COMPACT_ELEMENTS = 1 << 18  # buffer values per block when compacting buffer rows
SCORE_ELEMENTS = 1 << 17  # buffer values per row block in a full evaluation
_BLOCK_ELEMENTS = 1 << 22  # reader values per block in a rebuild

_CACHE_FLOATS = ("cut", "minll", "k", "top", "su", "su2", "sv", "sv2", "svu", "count", "r1", "r2")
_TAIL_KEYS = ("shift", "k", "top", "su", "su2", "sv", "sv2", "svu")


def _fit_work(M: np.ndarray) -> float:
    """The tail fits' work: sum over the fitted rows of M_i (30 + floor(sqrt(M_i))), the values a
    Zhang-Stephens fit evaluates (M_i exceedances at each point of its grid)."""
    M = np.asarray(M, dtype=float)
    return float(np.sum(M * (30.0 + np.floor(np.sqrt(M)))))


class TailBuffer:
    """The K smallest log-likelihoods of each of n observations, the body sums of all the other
    draws, and the cache of the last PSIS-LOO evaluation; mergeable.

    Parameters
    ----------
    n : int, observations (rows).
    k : int >= 2, values kept per row (capacity 2k).

    ``update(block)`` with block (draws, n) (no NaN / +inf: the caller masks them);
    ``merge(other)``; ``result(r_eff)`` -> dict of (n,) arrays ``elpd``, ``mcse``, ``k``, ``zero``;
    ``to_state()`` / ``from_state()``.  Attributes: ``draws``, ``k``, ``refits`` (rows evaluated in
    full by the last :meth:`result`), ``refit_work`` (their fits' work, sum of M_i (30 + floor(sqrt
    M_i)): what a snapshot's PSIS-LOO costs, for benchmarks).
    """

    def __init__(self, n: int, k: int):
        if k < 2:
            raise ValueError(f"TailBuffer: k must be >= 2, got {k}")
        self.n = int(n)
        self.k = int(k)
        self.draws = 0
        self.ok = True  # False after a failed rebuild: the state is stale until the next rebuild
        self.refits = 0
        self.refit_work = 0.0
        self.lag = 0.0
        self.lagged = 0
        self.buf = np.full((n, 2 * self.k), np.inf)
        self.fill = np.zeros(n, dtype=np.int64)
        self.thr = np.full(n, np.inf)
        self.bcount = np.zeros(n)
        self.bshift = np.zeros(n)
        self.s1 = np.zeros(n)
        self.s2 = np.zeros(n)
        self._clear_cache()

    def _clear_cache(self):
        n = self.n
        self.c_valid = np.zeros(n, dtype=bool)  # cached and no draw below the cutoff since
        self.c_zero = np.zeros(n, dtype=bool)  # a -inf draw: results fixed for good
        self.c_m = np.full(n, -1, dtype=np.int64)
        self.c_late = np.zeros(n, dtype=np.int64)  # draws below the cutoff since, in the rest sums raw
        for name in _CACHE_FLOATS:
            setattr(self, f"c_{name}", np.zeros(n))

    # ------------------------------------------------------------------------------ state
    _CACHE_ARRAYS = ("c_valid", "c_zero", "c_m", "c_late") + tuple(f"c_{name}" for name in _CACHE_FLOATS)
    _ARRAYS = ("fill", "thr", "bcount", "bshift", "s1", "s2") + _CACHE_ARRAYS

    def nbytes(self) -> int:
        arrs = [getattr(self, name) for name in self._ARRAYS]
        return int(sum(a.nbytes for a in arrs) + (self.buf.nbytes if self.buf is not None else 0))

    def to_state(self, copy: bool = True) -> dict:
        """Plain arrays (numpy arrays and 0-d scalars, no objects); ``copy=False`` hands over the
        state's own arrays."""
        own = (lambda a: a.copy()) if copy else (lambda a: a)
        state = {name: own(getattr(self, name)) for name in self._ARRAYS}
        state.update({
            "k": np.asarray(self.k, dtype=np.int64),
            "draws": np.asarray(self.draws, dtype=np.int64),
            "ok": np.asarray(bool(self.ok)),
            "has_buffer": np.asarray(self.buf is not None),
            "buffer": own(self.buf) if self.buf is not None else np.empty((0, 0)),
        })
        return state

    @classmethod
    def from_state(cls, state: dict, copy: bool = True) -> "TailBuffer":
        own = np.array if copy else np.asarray
        n = len(state["fill"])
        out = cls.__new__(cls)
        out.n, out.k = n, int(state["k"])
        out.draws = int(state["draws"])
        out.ok = bool(state["ok"])
        out.refits = 0
        out.refit_work = 0.0
        out.lag = 0.0
        out.lagged = 0
        for name in cls._ARRAYS:
            if name == "c_late" and name not in state:  # a state saved before the lag existed
                out.c_late = np.zeros(n, dtype=np.int64)
                continue
            setattr(out, name, own(state[name]))
        out.buf = own(state["buffer"], dtype=float) if bool(state["has_buffer"]) else None
        return out

    # ------------------------------------------------------------------------------ update
    def update(self, block) -> "TailBuffer":
        """Add a block (draws, n) of log-likelihoods (finite or -inf)."""
        x = np.asarray(block, dtype=float)
        if x.ndim != 2 or x.shape[1] != self.n:
            raise ValueError(f"TailBuffer.update: block must be (draws, {self.n}), got {x.shape}")
        if x.shape[0]:
            self.update_columns(x, 0, self.n, np.empty(x.shape))
            self.draws += x.shape[0]
        return self

    def _body_rescale(self, rows, new_shift):
        """Move the body sums of ``rows`` to a larger shift (never smaller)."""
        with np.errstate(invalid="ignore", over="ignore"):
            f = np.exp(self.bshift[rows] - new_shift)
        f = np.where(self.bcount[rows] > 0, f, 0.0)
        self.s1[rows] *= f
        self.s2[rows] *= f * f
        self.bshift[rows] = new_shift

    def update_columns(self, xc, a, b, e, ms=None, w=None) -> None:
        """Fold the draws of observations a:b (xc: (B, b - a)) into rows a:b.

        The caller advances ``draws`` once the whole block is in (the scorer feeds a block in
        chunks of observations).  ``e`` is a work array of xc's shape.  Hint: ``ms`` (b - a,) and
        ``w`` = exp(max(xc - ms, -700)) (the WAIC exponentials of the scorer); with them the body
        terms exp(t - ll) = exp(t - ms) / w cost one division instead of an exponential.
        """
        if not self.ok:  # stale after a failed rebuild: the next result() rebuilds
            return
        B = xc.shape[0]
        thr = self.thr[a:b]
        cache = bool(self.c_valid[a:b].any())
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if not np.any(thr < np.inf):  # buffer not full yet: every draw enters it
                fill = self.fill[a:b]
                f0 = int(fill[0])
                if np.all(fill == f0):
                    cap = self.buf.shape[1]
                    if f0 + B > cap and f0 > self.k and B <= cap - self.k:
                        self._compact_rows(a, b)  # first compaction: every row to K
                        f0 = self.k
                    if f0 + B <= cap:
                        if cache:
                            self._cache_dense(xc, a, b, e)
                        self.buf[a:b, f0:f0 + B] = xc.T
                        fill += B
                        return
                cand = np.ones(xc.shape, dtype=bool)
            else:
                cand = np.less(xc, thr)
            # candidates, grouped by observation (draw order inside); a 1-D flatnonzero of the
            # transposed mask is several times faster than a 2-D nonzero
            ct = np.ascontiguousarray(cand.T)
            flat = np.flatnonzero(ct)
            cnt = np.count_nonzero(ct, axis=1)
            ci = np.repeat(np.arange(b - a), cnt)
            ri = flat - ci * B
            direct = B - cnt
            fin = np.isfinite(thr)
            if np.any(fin & (direct > 0)):
                # draws >= the row's threshold go straight to the body sums (shift -thr):
                # exp(thr - ll) = exp(thr - ms) / w (ll >= thr, so w >= e^-690 is exact)
                self._body_rescale(slice(a, b), np.where(fin, -thr, self.bshift[a:b]))
                tshift = np.where(fin, thr - ms, 0.0) if ms is not None else None
                if tshift is not None and np.all(tshift > -690.0):
                    np.divide(np.exp(tshift), w, out=e)
                else:  # no hint, or a column spans more than 690 nats: direct exponentials
                    np.subtract(np.where(fin, thr, 0.0), xc, out=e)
                    np.minimum(e, 0.0, out=e)
                    np.exp(e, out=e)
                e[ri, ci] = 0.0  # candidates contribute nothing here
                if not fin.all():
                    e[:, ~fin] = 0.0
                d1 = e.sum(axis=0)
                d2 = np.einsum("ij,ij->j", e, e)
                self.s1[a:b] += d1
                self.s2[a:b] += d2
                dcount = np.where(fin, direct, 0)
                self.bcount[a:b] += dcount
                if cache:  # the body draws are all >= thr >= the cached cutoff: rest sums only
                    live = self.c_valid[a:b] & fin
                    f = np.where(live, np.exp(self.c_minll[a:b] - np.where(fin, thr, 0.0)), 0.0)
                    self.c_r1[a:b] += f * d1
                    self.c_r2[a:b] += (f * f) * d2
                    self.c_count[a:b] += np.where(live, dcount, 0)
        if ci.size:
            if cache:
                self._cache_sparse(xc[ri, ci], a, b, ci)
            self._append(xc, a, b, ri, ci, cnt)

    def _cache_dense(self, xc, a, b, e):
        """Cache bookkeeping for every draw of a chunk (while the buffer fills): a draw below the
        row's smallest value marks it dirty; a draw below the cutoff is a late tail draw (counted,
        and in the rest sums at its raw ratio); the others go to the rest sums."""
        live = self.c_valid[a:b]
        cut = self.c_cut[a:b]
        low = np.less(xc, cut)
        with np.errstate(invalid="ignore", over="ignore"):
            np.subtract(np.where(live, self.c_minll[a:b], 0.0), xc, out=e)
            np.minimum(e, 0.0, out=e)
            np.exp(e, out=e)
        self.c_r1[a:b] += np.where(live, e.sum(axis=0), 0.0)
        self.c_r2[a:b] += np.where(live, np.einsum("ij,ij->j", e, e), 0.0)
        self.c_count[a:b] += np.where(live, xc.shape[0], 0)
        self.c_late[a:b] += np.where(live, np.count_nonzero(low, axis=0), 0)
        self.c_valid[a:b] &= ~np.less(xc, self.c_minll[a:b]).any(axis=0)

    def _cache_sparse(self, values, a, b, ci):
        """Cache bookkeeping for the buffered draws ``values`` of local rows ``ci`` (rows a + ci),
        as :meth:`_cache_dense`."""
        rows = a + ci
        live = self.c_valid[rows]
        new_min = live & (values < self.c_minll[rows])
        keep = live & ~new_min
        if keep.any():
            ck = ci[keep]
            with np.errstate(over="ignore", invalid="ignore"):
                t = np.exp(np.minimum(self.c_minll[a + ck] - values[keep], 0.0))
            self.c_r1[a:b] += np.bincount(ck, weights=t, minlength=b - a)
            self.c_r2[a:b] += np.bincount(ck, weights=t * t, minlength=b - a)
            self.c_count[a:b] += np.bincount(ck, minlength=b - a)
            late = values[keep] < self.c_cut[a + ck]
            if late.any():
                self.c_late[a:b] += np.bincount(ck[late], minlength=b - a)
        if new_min.any():
            self.c_valid[rows[new_min]] = False

    def _append(self, xc, a, b, ri, ci, cnt):
        """Append the candidates (rows ri, local columns ci, sorted by column) to buffer rows a:b.

        A chunk whose rows would overflow is compacted first (:meth:`_compact_rows`); the
        candidates are appended in parts of at most cap - K draws so that they always fit.
        """
        K, cap = self.k, self.buf.shape[1]
        room = cap - K
        if int(cnt.max()) > room:
            for r0 in range(0, xc.shape[0], room):
                sel = (ri >= r0) & (ri < r0 + room)
                if sel.any():
                    self._append(xc, a, b, ri[sel], ci[sel], np.bincount(ci[sel], minlength=b - a))
            return
        if np.any(self.fill[a:b] + cnt > cap):
            self._compact_rows(a, b)
        fill = self.fill[a:b]
        # flat destinations: row start + fill + rank of the candidate within its column
        base = np.arange(a, b) * cap + fill - (np.cumsum(cnt) - cnt)
        dest = np.repeat(base, cnt) + np.arange(ci.size)
        self.buf.reshape(-1)[dest] = xc[ri, ci]
        fill += cnt

    def _eject(self, rows, Z, K):
        """Partition the values Z (rows of the buffer or a merge, +inf padded) to their K smallest
        and fold the rest into the body sums of ``rows``; returns the new thresholds."""
        Z.partition(K - 1, axis=1)
        new_thr = Z[:, K - 1].copy()
        ej = Z[:, K:]
        nej = np.count_nonzero(ej < np.inf, axis=1)
        has = (nej > 0) & np.isfinite(new_thr)
        self._body_rescale(rows, np.where(has, -new_thr, self.bshift[rows]))
        with np.errstate(over="ignore", invalid="ignore"):
            ee = np.negative(ej)
            ee -= self.bshift[rows][:, None]
            np.exp(ee, out=ee)
        if not has.all():
            ee[~has] = 0.0
        self.s1[rows] += ee.sum(axis=1)
        self.s2[rows] += np.einsum("ij,ij->i", ee, ee)
        self.bcount[rows] += np.where(has, nej, 0)
        ej[...] = np.inf
        return new_thr

    def _compact_rows(self, a, b):
        """Partition buffer rows a:b back to their K smallest values, ejecting the rest to the body.

        Works in place on blocks of about ``COMPACT_ELEMENTS`` values (rows holding K or fewer
        values are left alone); lowers each row's threshold to its new K-th smallest value.  The
        cache is not touched: ejected draws are outside every tail before and after.
        """
        K, cap = self.k, self.buf.shape[1]
        step = max(1, COMPACT_ELEMENTS // cap)
        for r0 in range(a, b, step):
            r1 = min(b, r0 + step)
            fl = self.fill[r0:r1]
            more = fl > K
            if not more.any():
                continue
            if more.all():
                rows = slice(r0, r1)
                Z = self.buf[r0:r1]  # a view: partitioned in place
            else:
                rows = r0 + np.flatnonzero(more)
                Z = self.buf[rows]
            new_thr = self._eject(rows, Z, K)
            if not isinstance(rows, slice):
                self.buf[rows] = Z
            self.thr[rows] = new_thr
            self.fill[rows] = K

    # ------------------------------------------------------------------------------ merge
    def merge(self, other: "TailBuffer") -> "TailBuffer":
        """Fold ``other`` (a state of other draws of the same n observations) into this state.

        The result holds the K = min(k, other.k) smallest values of the union per row; everything
        else goes to the body at the shift of the union's K-th smallest value (each body draw of
        either part is >= K of its own buffered values, so >= that value: the invariant holds).
        The cache is cleared (the next result() evaluates every row).
        """
        if other.n != self.n:
            raise ValueError(f"TailBuffer.merge: n differs ({self.n} vs {other.n})")
        K = min(self.k, other.k)
        ok = self.ok and other.ok and self.buf is not None and other.buf is not None
        draws = self.draws + other.draws
        if ok:
            wa, wb = int(self.fill.max()), int(other.fill.max())
            Z = np.concatenate([self.buf[:, :wa], other.buf[:, :wb]], axis=1)
            total = self.fill + other.fill
            # both bodies at one shift (the larger: every term stays <= 1), then summed
            shift = np.maximum(np.where(self.bcount > 0, self.bshift, -np.inf),
                               np.where(other.bcount > 0, other.bshift, -np.inf))
            shift = np.where(np.isfinite(shift), shift, 0.0)
            rows = np.arange(self.n)
            self._body_rescale(rows, shift)
            with np.errstate(invalid="ignore", over="ignore"):
                f = np.where(other.bcount > 0, np.exp(other.bshift - shift), 0.0)
            self.s1 += other.s1 * f
            self.s2 += other.s2 * f * f
            self.bcount += other.bcount
            thr = np.minimum(self.thr, other.thr)
            over = total > K
            if over.any():
                idx = np.flatnonzero(over)
                Zo = Z[idx]
                thr[idx] = self._eject(idx, Zo, K)
                Z[idx] = Zo
            fill = np.minimum(total, K)
            # values of each row: the partitioned rows hold their K smallest first; the others
            # hold all their (< K) values, the +inf padding of the first part in between
            Z.sort(axis=1)  # +inf padding last (real values are never +inf)
            width = max(2 * K, Z.shape[1])
            buf = np.full((self.n, width), np.inf)
            buf[:, :Z.shape[1]] = Z
            self.buf = np.ascontiguousarray(buf[:, :2 * K]) if width > 2 * K else buf
            self.fill, self.thr = fill.astype(np.int64), thr
        else:  # a stale part: only the count survives; the next result() rebuilds
            self.ok = False
        self.k = K
        self.draws = draws
        self._clear_cache()
        return self

    # ------------------------------------------------------------------------------ rebuild
    def rebuild(self, K_new: int, reader: Callable[[int, int], np.ndarray], bad=None, who="TailBuffer"):
        """Rebuild the buffer (size K_new) and the body sums from every draw so far.

        ``reader(start, stop)`` returns all ``draws`` log-likelihoods of observations start:stop
        (any draw order); rows flagged in ``bad`` are zeroed, as the streaming path does.  The old
        buffer is released first, so the peak is the new state plus one reader block; should the
        reader fail, the state is marked stale (``ok`` False) and the next rebuild starts over.

        The tail-fit cache describes the draws, not the buffer: a rebuild of a sound state (a resize,
        the same draws reread) keeps it, so only the rows it already marked are refitted next; a
        rebuild of a stale state starts with an empty cache.
        """
        S, n = self.draws, self.n
        K_new = min(int(K_new), S)
        kept = {name: getattr(self, name) for name in self._CACHE_ARRAYS} if self.ok else None
        self.buf = None
        self.ok = False
        self._clear_cache()
        buf = np.full((n, 2 * K_new), np.inf)
        fill = np.full(n, K_new, dtype=np.int64)
        thr = np.full(n, np.inf)
        bcount = np.zeros(n)
        bshift = np.zeros(n)
        s1 = np.zeros(n)
        s2 = np.zeros(n)
        bad = np.zeros(n, dtype=bool) if bad is None else np.asarray(bad, dtype=bool)
        step = max(1, _BLOCK_ELEMENTS // max(S, 1))
        for a in range(0, n, step):
            b = min(n, a + step)
            data = np.asarray(reader(a, b), dtype=float)
            if data.shape != (S, b - a):
                raise ValueError(
                    f"{who}: reader({a}, {b}) returned shape {data.shape}, expected {(S, b - a)} "
                    f"(every draw so far of observations {a}:{b})"
                )
            sub = max(1, COMPACT_ELEMENTS // S)  # transpose in small column groups
            for c0 in range(a, b, sub):
                c1 = min(b, c0 + sub)
                part = data[:, c0 - a:c1 - a].T.copy()  # (observations, draws)
                part[bad[c0:c1]] = 0.0
                if K_new < S:
                    part.partition(K_new - 1, axis=1)
                buf[c0:c1, :K_new] = part[:, :K_new]
                if K_new < S:
                    t = part[:, K_new - 1]
                    thr[c0:c1] = t
                    rest = part[:, K_new:]
                    sh = np.where(np.isfinite(t), -t, 0.0)
                    with np.errstate(over="ignore", invalid="ignore"):  # in place: no more temporaries
                        np.negative(rest, out=rest)
                        rest -= sh[:, None]
                        np.exp(rest, out=rest)
                    s1[c0:c1] = rest.sum(axis=1)
                    s2[c0:c1] = np.einsum("ij,ij->i", rest, rest)
                    bshift[c0:c1] = sh
                    bcount[c0:c1] = S - K_new
            del data
        self.buf, self.fill, self.thr = buf, fill, thr
        self.bcount, self.bshift, self.s1, self.s2 = bcount, bshift, s1, s2
        self.k = K_new
        self.ok = True
        if kept is not None:
            for name, value in kept.items():
                setattr(self, name, value)

    # ------------------------------------------------------------------------------ result
    def tail_lengths(self, r) -> np.ndarray:
        return np.broadcast_to(tail_length(self.draws, r), (self.n,))

    def needed_k(self, r) -> int:
        """max_i M_i + 1: the buffer size the result for r_eff ``r`` needs."""
        return int(self.tail_lengths(r).max()) + 1

    def _evaluate(self, rows, M, need):
        """Full evaluation of buffer ``rows`` (a slice or an index array): the tail summaries and
        the rest sums at the tail shift (see :mod:`.loo`)."""
        fill = self.fill[rows]
        W = int(fill.max())
        Z = self.buf[rows, :W]
        Z = Z.copy() if isinstance(rows, slice) else Z  # fancy indexing already copied
        if W > need:
            Z.partition(need - 1, axis=1)
        low = np.sort(Z[:, :need], axis=1)
        tail = tail_summaries(low, M)
        c = tail["shift"]
        count = self.bcount[rows]
        with np.errstate(over="ignore", invalid="ignore"):
            scale = np.where(count > 0, np.exp(self.bshift[rows] - c), 0.0)
            s1 = self.s1[rows] * scale
            s2 = self.s2[rows] * (scale * scale)
            if W > need:  # buffered draws beyond the need smallest (padding is +inf: exp(-inf) = 0)
                ex = np.negative(Z[:, need:])
                ex -= c[:, None]
                np.exp(ex, out=ex)
                s1 += ex.sum(axis=1)
                s2 += np.einsum("ij,ij->i", ex, ex)
                count = count + (fill - need)
        count, r1, r2 = rest_sums(low, np.full(low.shape[0], need), M, count, c, s1, s2, c)
        return tail, low[:, 0], count, r1, r2

    def _within_lag(self, M) -> np.ndarray:
        """Rows whose cached fit still serves: its tail length and the draws that entered the tail
        since are within ``lag`` x the cached tail length (lag 0: an unchanged tail only)."""
        allowed = self.lag * self.c_m
        return (self.c_late <= allowed) & (np.abs(M - self.c_m) <= allowed)

    def result(self, r, *, incremental: bool = True) -> dict:
        """elpd_i, mcse_i, k-hat_i and the zero flag of every row for relative efficiencies ``r`` (n,).

        The buffer must hold max_i M_i + 1 values per row (:meth:`needed_k` <= ``k``, or fewer
        draws than that): the caller rebuilds first.  ``incremental`` (default) evaluates in full
        only the rows the cache cannot answer and refreshes the cache; ``incremental=False`` is the
        full evaluation of every row and leaves the state untouched (a read-only caller, a check).
        """
        if not self.ok or self.buf is None:
            raise ValueError("TailBuffer.result: the buffer is stale; rebuild it first")
        n = self.n
        M = np.ascontiguousarray(self.tail_lengths(r))
        cap = self.buf.shape[1]
        step = max(1, SCORE_ELEMENTS // cap)
        if not incremental:
            elpd, mcse, k, zero = np.empty(n), np.empty(n), np.empty(n), np.zeros(n, dtype=bool)

            def block(a, b):  # blocks of rows: bounded, cache-sized temporaries
                need = int(M[a:b].max()) + 1
                tail, _, count, r1, r2 = self._evaluate(slice(a, b), M[a:b], need)
                elpd[a:b], mcse[a:b], k[a:b] = loo_from_summaries(tail, count, r1, r2, r[a:b])
                zero[a:b] = tail["zero"]

            for_each_block(n, step, block)
            self.refits = n
            self.refit_work = _fit_work(M)
            self.lagged = 0
            return {"elpd": elpd, "mcse": mcse, "k": k, "zero": zero}

        clean = self.c_zero | (self.c_valid & self._within_lag(M))
        dirty = np.flatnonzero(~clean)
        moved = (self.c_late > 0) | (self.c_m != M)  # served from a fit its tail has moved past
        self.lagged = int(np.count_nonzero(clean & ~self.c_zero & moved))
        self.refits = int(dirty.size)
        self.refit_work = _fit_work(M[dirty])

        def refit(a, b):
            idx = dirty[a:b]
            Mi = M[idx]
            tail, minll, count, r1, r2 = self._evaluate(idx, Mi, int(Mi.max()) + 1)
            zero = tail["zero"]
            self.c_zero[idx] = zero
            self.c_valid[idx] = ~zero
            self.c_m[idx] = Mi
            self.c_late[idx] = 0
            self.c_cut[idx] = tail["cut"]
            self.c_minll[idx] = minll
            for key in ("k", "top", "su", "su2", "sv", "sv2", "svu"):
                getattr(self, f"c_{key}")[idx] = tail[key]
            self.c_count[idx], self.c_r1[idx], self.c_r2[idx] = count, r1, r2

        if dirty.size:
            for_each_block(dirty.size, step, refit)
        zero = self.c_zero
        tail = {"zero": zero, "shift": np.where(zero, 0.0, -self.c_minll), "k": self.c_k, "top": self.c_top,
                "su": self.c_su, "su2": self.c_su2, "sv": self.c_sv, "sv2": self.c_sv2, "svu": self.c_svu}
        elpd, mcse, k = loo_from_summaries(tail, self.c_count, self.c_r1, self.c_r2, r)
        return {"elpd": elpd, "mcse": mcse, "k": k, "zero": zero.copy()}
