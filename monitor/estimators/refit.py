"""Exact leave-one-out and K-fold cross-validation from refits, in place of PSIS where k-hat > 0.7.

When PSIS-LOO's Pareto k-hat of observation i is above 0.7 its importance-sampling estimate cannot be
trusted however many draws are added. The remedy (Vehtari, Gelman & Gabry 2017, "Practical Bayesian
model evaluation using leave-one-out cross-validation and WAIC", Statistics and Computing 27,
1413-1432, sec. 2.3 and 4) is to fit the model again without y_i and compute

    elpd_i = log p(y_i | y_-i) ~= log (1/S) sum_s p(y_i | theta_s),   theta_s ~ p(theta | y_-i)

directly ("exact LOO" for those few observations, PSIS for the rest), or, when many observations are
flagged, K-fold cross-validation: split the observations into K folds, fit once without each fold k
and score every y_i of the fold by the same log mean density over that fit's draws,

    elpd_kfold = sum_k sum_{i in fold k} log p(y_i | y_-(k))

(Vehtari, Gelman & Gabry 2017, sec. 2.3 and 4; K-fold for Bayesian models, recalled from memory:
Vehtari & Lampinen 2002, "Bayesian model assessment and comparison using cross-validation predictive
densities", Neural Computation 14(10), 2439-2468).

Pure functions (numpy/scipy only, no I/O). Observation indices are 0-based in arrays and mappings;
the request written for samplers (:func:`refit_request`) numbers observations and folds from 1.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from .loo import totals
from .mixing import finite_relative_efficiency

__all__ = ["exact_elpd", "combine_pointwise", "combine_run", "kfold_elpd", "kfold_plan", "refit_request",
           "request_key", "refit_folder_name", "KHAT_LIMIT", "MIN_DRAWS", "REQUEST_VERSION"]

#: k-hat above which an observation's PSIS estimate is replaced by a refit (Vehtari et al. 2024).
KHAT_LIMIT = 0.7
#: Fewest total draws behind the k-hat values before refits are requested (see :func:`refit_request`).
MIN_DRAWS = 400
#: Version of the REFITS.json layout produced by :func:`refit_request`.
REQUEST_VERSION = 1


def _as_chains_obs(loglik) -> np.ndarray:
    a = np.asarray(loglik)
    if a.dtype == object or a.dtype.kind not in "fiu":
        raise ValueError(f"loglik: expected a numeric array, got dtype {a.dtype}")
    a = np.asarray(a, dtype=float)
    if a.ndim == 2:
        a = a[None]
    if a.ndim != 3:
        raise ValueError(f"loglik: expected shape (chains, draws, m) or (draws, m), got {a.shape}")
    if a.shape[0] * a.shape[1] < 2:
        raise ValueError(f"loglik: need at least 2 draws, got shape {a.shape}")
    if a.shape[2] < 1:
        raise ValueError(f"loglik: need at least 1 held-out observation, got shape {a.shape}")
    return a


def exact_elpd(loglik, r_eff=None) -> tuple[np.ndarray, np.ndarray]:
    """Exact elpd of held-out observations from the draws of a refit that did not see them.

    Parameters
    ----------
    loglik : array_like, shape (chains, draws, m) or (draws, m)
        log p(y_i | theta_s) of the m held-out observations, theta_s drawn from p(theta | y_-held).
    r_eff : float or array_like (m,), optional
        Relative efficiency ESS / S of the likelihood draws p(y_i | theta_s). Default (None): computed
        from the chains as ESS(exp(loglik_i)) / S (:func:`.mixing.finite_relative_efficiency`).

    Returns
    -------
    elpd_i : ndarray (m,)
        elpd_i = log( (1/S) sum_s exp(ll_si) ), computed with a max shift (logsumexp - log S).
    mcse_i : ndarray (m,)
        Delta-method Monte Carlo standard error of elpd_i: with p_s = exp(ll_si) and E = mean_s p_s,
        mcse_i = sqrt( var_s(p_s) / (S r_eff_i) ) / E (the MCSE of a mean of correlated draws,
        ESS = S r_eff, carried through the log by its derivative 1/E).

    Conventions: NaN or +inf in a draw gives elpd_i = NaN, mcse_i = NaN (bad input); a column of
    -inf gives elpd_i = -inf, mcse_i = +inf; single -inf draws are likelihood zero and count as 0.

    Reference: Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, sec. 2.3 and 4 (exact
    LOO for the observations with large k-hat); MCSE by the delta method as in their sec. 3.2.
    """
    a = _as_chains_obs(loglik)
    C, D, m = a.shape
    S = C * D
    flat = a.reshape(S, m)
    bad = ~(flat.max(axis=0) < np.inf)  # NaN or +inf somewhere
    if r_eff is None:
        r = np.ones(m)
        good = ~bad & np.isfinite(flat).any(axis=0)
        if good.any():
            sub = np.where(np.isfinite(a[:, :, good]), a[:, :, good], -745.0)  # exp() underflows to 0 either way
            r[good] = finite_relative_efficiency(sub)
    else:
        r = np.asarray(r_eff, dtype=float)
        if r.ndim == 0:
            r = np.full(m, float(r))
        if r.shape != (m,):
            raise ValueError(f"r_eff must be a scalar or shape ({m},), got {r.shape}")
        if np.any(~(r > 0)) or np.any(~np.isfinite(r)):
            raise ValueError("r_eff must be positive and finite")
    safe = np.where(bad[None, :], 0.0, flat)
    mx = safe.max(axis=0)
    ms = np.where(np.isfinite(mx), mx, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.exp(safe - ms)  # in (0, 1], the largest is 1
        mean = p.mean(axis=0)
        elpd = np.log(mean) + ms
        var = p.var(axis=0, ddof=1)
        mcse = np.sqrt(var / (S * r)) / mean
    allzero = mx == -np.inf
    elpd = np.where(allzero, -np.inf, elpd)
    mcse = np.where(allzero, np.inf, mcse)
    elpd = np.where(bad, np.nan, elpd)
    mcse = np.where(bad, np.nan, mcse)
    return elpd, mcse


def combine_pointwise(psis_elpd, psis_mcse, exact: Mapping[int, tuple[float, float]], *, lppd=None,
                      pending: Sequence[int] = ()) -> dict:
    """Mixed elpd: exact refit values where they exist, PSIS-LOO values elsewhere.

    Parameters
    ----------
    psis_elpd, psis_mcse : array_like (n,)
        PSIS-LOO pointwise elpd_i and their MCSE (:func:`.loo.psis_loo` ``pointwise`` and
        ``mcse_pointwise``).
    exact : mapping {index0: (elpd_i, mcse_i)}
        Exact values from finished refits (:func:`exact_elpd`), keyed by 0-based observation index.
    lppd : float or array_like (n,), optional
        Log pointwise predictive density of the full-data posterior, sum_i log mean_s p(y_i | theta_s)
        (or its n terms); when given, p_eff = lppd - elpd.
    pending : sequence of int
        0-based observations waiting for a refit (flagged, no exact value yet); only counted.

    Returns
    -------
    dict with ``elpd`` = sum_i elpd_i over the combined pointwise values, ``se`` = sqrt(n var_i
    elpd_i) (ddof = 1), ``mcse`` = sqrt(sum_i mcse_i^2), ``p_eff`` (None without ``lppd``),
    ``pointwise`` (n,), ``mcse_pointwise`` (n,), ``exact_observations`` (0-based, sorted),
    ``counts`` {``exact``, ``psis``, ``pending``} and ``method`` ("psis" when nothing is exact,
    "exact" when everything is, "mixed" otherwise). NaN pointwise values (bad input) make every total
    NaN, -inf makes elpd -inf (the rules of :func:`.loo.totals`).

    Reference: Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, sec. 4: the exact values
    of the refitted observations replace their PSIS values in the sum, and the standard error is
    computed from the combined pointwise values.
    """
    elpd = np.array(psis_elpd, dtype=float).ravel()
    mcse = np.array(psis_mcse, dtype=float).ravel()
    n = elpd.size
    if mcse.shape != (n,):
        raise ValueError(f"psis_mcse has shape {mcse.shape}; psis_elpd has ({n},)")
    done = []
    for key, value in exact.items():
        i = int(key)
        if i != key or not 0 <= i < n:
            raise ValueError(f"exact value for observation index {key!r}: outside 0..{n - 1}")
        e, m = value
        elpd[i], mcse[i] = float(e), float(m)
        done.append(i)
    done.sort()
    bad = np.isnan(elpd)
    total, se = totals(elpd, bad)
    mc = float(np.sqrt(np.sum(mcse**2))) if not bad.any() else float("nan")
    p_eff = None
    if lppd is not None:
        lp = float(np.sum(np.asarray(lppd, dtype=float)))
        p_eff = lp - total if math.isfinite(total) else (float("nan") if math.isnan(total) else float("inf"))
    waiting = sorted(set(int(i) for i in pending) - set(done))
    method = "psis" if not done else ("exact" if len(done) == n else "mixed")
    return {
        "elpd": total, "se": se, "mcse": mc, "p_eff": p_eff,
        "pointwise": elpd, "mcse_pointwise": mcse,
        "exact_observations": done,
        "counts": {"exact": len(done), "psis": n - len(done), "pending": len(waiting)},
        "method": method,
    }


def kfold_elpd(folds, fold_values: Mapping[int, tuple], *, lppd=None) -> dict:
    """K-fold cross-validation elpd from the refits of the folds that are in.

    Parameters
    ----------
    folds : array_like of int, shape (n,)
        Fold number (1..K) of each observation (:func:`kfold_plan`).
    fold_values : mapping {fold k: (elpd (m_k,), mcse (m_k,) or None)}
        For each finished fold, :func:`exact_elpd` of its held-out observations in ascending
        observation order (the order of ``held_out`` in the request).
    lppd : float or array_like (n,), optional
        Full-data lppd; gives p_eff = lppd - elpd_kfold once complete.

    Returns
    -------
    dict: ``elpd_kfold`` = sum_i log p(y_i | y_-(k(i))) (NaN until every fold is in), ``se`` =
    sqrt(n var_i elpd_i) (ddof = 1; NaN until complete), ``mcse`` = sqrt(sum_i mcse_i^2) (NaN until
    complete; 0 where no MCSE was given), ``p_eff``, ``pointwise`` (n,) (NaN for observations whose
    fold is not in), ``mcse_pointwise`` (n,), ``complete`` (bool), ``folds_done``, ``folds_missing``
    (sorted fold numbers) and ``observations_done``.

    Reference: Vehtari, Gelman & Gabry (2017), Statistics and Computing 27, sec. 2.3 and 4 (K-fold
    elpd and its SE from the pointwise values); Vehtari & Lampinen (2002), Neural Computation 14(10)
    (recalled from memory).
    """
    f = np.asarray(folds)
    if f.ndim != 1 or f.size == 0 or f.dtype.kind not in "iu":
        raise ValueError(f"folds must be a 1-D array of fold numbers, got shape {f.shape}, dtype {f.dtype}")
    n = f.size
    all_folds = sorted(set(f.tolist()))
    pointwise = np.full(n, np.nan)
    mcse = np.full(n, np.nan)
    done = []
    for k, value in fold_values.items():
        members = np.flatnonzero(f == k)
        if members.size == 0:
            raise ValueError(f"fold {k!r} has no observations in the plan (folds {all_folds[0]}..{all_folds[-1]})")
        e, m = value if isinstance(value, tuple) else (value, None)
        e = np.asarray(e, dtype=float).ravel()
        if e.size != members.size:
            raise ValueError(f"fold {k}: {e.size} values for its {members.size} observations")
        pointwise[members] = e
        if m is None:
            mcse[members] = 0.0
        else:
            m = np.asarray(m, dtype=float).ravel()
            if m.size != members.size:
                raise ValueError(f"fold {k}: {m.size} MCSE values for its {members.size} observations")
            mcse[members] = m
        done.append(int(k))
    done.sort()
    missing = [k for k in all_folds if k not in set(done)]
    complete = not missing
    elpd = se = mc = float("nan")
    p_eff = None
    if complete:
        elpd, se = totals(pointwise, np.isnan(pointwise))
        mc = float(np.sqrt(np.sum(mcse**2)))
        if lppd is not None and math.isfinite(elpd):
            p_eff = float(np.sum(np.asarray(lppd, dtype=float))) - elpd
    return {
        "elpd_kfold": elpd, "se": se, "mcse": mc, "p_eff": p_eff,
        "pointwise": pointwise, "mcse_pointwise": mcse, "complete": complete,
        "folds_done": done, "folds_missing": missing,
        "observations_done": int(np.count_nonzero(np.isin(f, done))),
    }


def kfold_plan(n: int, K: int = 10, seed: int = 0, groups=None) -> np.ndarray:
    """Assign n observations to K folds, balanced and random with a recorded seed.

    Parameters
    ----------
    n : int, number of observations (>= K).
    K : int, number of folds (>= 2).
    seed : int, seed of ``numpy.random.default_rng``; the same (n, K, seed, groups) give the same plan.
    groups : sequence (n,), optional
        A group key per observation (str or int); observations of one group share a fold.

    Returns
    -------
    ndarray of int64, shape (n,), values 1..K.

    Balancing rule. Without groups: a random permutation of the observations is dealt round-robin
    to folds 1..K, so fold sizes are floor(n/K) or ceil(n/K) (they differ by at most one). With
    groups: the groups are shuffled, then stably sorted by size, largest first (ties stay in random
    order), and each group goes to the fold holding the fewest observations so far (lowest fold
    number on ties). Every fold gets at least one group when there are at least K groups, and fold
    sizes differ by at most the size of the largest group (the greedy longest-first bound).
    """
    if not (isinstance(n, (int, np.integer)) and n >= 1):
        raise ValueError(f"n must be a positive whole number, not {n!r}")
    if not (isinstance(K, (int, np.integer)) and K >= 2):
        raise ValueError(f"K must be a whole number >= 2, not {K!r}")
    rng = np.random.default_rng(seed)
    out = np.empty(n, dtype=np.int64)
    if groups is None:
        if K > n:
            raise ValueError(f"K = {K} folds need at least {K} observations, got {n}")
        order = rng.permutation(n)
        out[order] = np.arange(n) % K + 1
        return out
    keys = list(groups)
    if len(keys) != n:
        raise ValueError(f"groups has {len(keys)} entries for {n} observations")
    index: dict = {}
    codes = np.empty(n, dtype=np.int64)
    for i, g in enumerate(keys):
        codes[i] = index.setdefault(g, len(index))
    G = len(index)
    if K > G:
        raise ValueError(f"K = {K} folds need at least {K} groups, got {G}")
    sizes = np.bincount(codes, minlength=G)
    shuffled = rng.permutation(G)
    by_size = shuffled[np.argsort(-sizes[shuffled], kind="stable")]
    load = np.zeros(K, dtype=np.int64)
    fold_of_group = np.empty(G, dtype=np.int64)
    for g in by_size:
        k = int(np.argmin(load))  # first minimum: lowest fold number on ties
        fold_of_group[g] = k + 1
        load[k] += sizes[g]
    out[:] = fold_of_group[codes]
    return out


def refit_folder_name(run: str, *, observation: int | None = None, fold: int | None = None) -> str:
    """Folder name of a refit: ``<run>--refit-<observation>`` (1-based) or ``<run>--fold-<k>``."""
    if (observation is None) == (fold is None):
        raise ValueError("give exactly one of observation and fold")
    return f"{run}--refit-{int(observation)}" if fold is None else f"{run}--fold-{int(fold)}"


def refit_request(k_hat, labels=None, *, run: str, seed: int, limit: float = KHAT_LIMIT,
                  share: float = 0.10, max_exact: int = 20, K: int = 10, groups=None,
                  too_few_draws: bool = False, draws: int | None = None, min_draws: int = MIN_DRAWS,
                  previous: Mapping | None = None, margin: float = 0.1) -> dict | None:
    """The refit request of a run (the content of its REFITS.json), or None when none is needed.

    Parameters
    ----------
    k_hat : array_like (n,)
        Pareto k-hat of every observation (NaN for bad input, +inf for a zero likelihood in a draw,
        -inf for a flat tail).
    labels : sequence of str (n,), optional
    run : str, the run's name (refit folders are named after it).
    seed : int, seed of the K-fold plan (recorded in the request).
    limit : float, k-hat above which an observation is flagged (0.7).
    share, max_exact : when more than ``share * n`` observations, or more than ``max_exact``, are
        flagged, the request is a K-fold plan instead of one refit per observation.
    K : int, folds of a K-fold plan (at most n, or the number of groups).
    groups : sequence (n,), optional, group keys kept together in one fold.
    too_few_draws : bool
        The PSIS tail fit has too few draws (k-hat is +inf everywhere): no request yet.
    draws, min_draws : int
        Total draws S behind ``k_hat``; below ``min_draws`` (400) no request is made yet. With
        S = 400 and r_eff <= 1 the Pareto tail holds M = min(S/5, 3 sqrt(S/r_eff)) >= 60 draws
        (Vehtari et al. 2024, sec. 3), so a k-hat above 0.7 is not the noise of a handful of draws.
    previous : dict, optional
        The run's previous request. Its observations stay flagged while their k-hat is above
        ``limit - margin`` (so an observation whose k-hat wavers about the limit does not come and
        go), and a previous K-fold plan is kept as it is (same K, seed and folds) while anything is
        flagged, so finished fold refits stay valid.

    Returns
    -------
    dict (JSON-ready) or None when nothing is flagged::

        {"version": 1, "run": str, "observations_total": n, "method": "exact" | "kfold",
         "rule": {"limit", "margin", "share", "max_exact"},
         "flagged": [{"observation": i (1-based), "label": str | None, "k_hat": float | None}],
         "refits": [{"folder": "<run>--refit-<i>", "held_out": [i]}]            (exact)
                or [{"folder": "<run>--fold-<k>", "fold": k, "held_out": [i, ...]}] (kfold),
         "kfold": null | {"K", "seed", "grouped", "folds": [fold of each observation, 1..K]}}

    ``held_out`` lists are 1-based and ascending. A k-hat of +inf is written as null.

    Reference: k-hat > 0.7 marks PSIS estimates that more draws will not fix (Vehtari, Simpson,
    Gelman, Yao & Gabry 2024, JMLR 25(72)); exact refits for a few such observations, K-fold for
    many (Vehtari, Gelman & Gabry 2017, Statistics and Computing 27, sec. 4).
    """
    k = np.asarray(k_hat, dtype=float).ravel()
    n = k.size
    if labels is not None and len(labels) != n:
        raise ValueError(f"{len(labels)} labels for {n} observations")
    if groups is not None and len(groups) != n:
        raise ValueError(f"groups has {len(groups)} entries for {n} observations")
    if too_few_draws or n == 0 or (draws is not None and draws < min_draws):
        return None
    with np.errstate(invalid="ignore"):
        flagged = k > limit  # NaN (bad input) is never flagged; +inf is
        kept = set()
        if previous and previous.get("observations_total") == n:
            kept = {int(r["observation"]) - 1 for r in previous.get("flagged", ())}
            low = k > limit - margin
            for i in kept:
                if 0 <= i < n and low[i]:
                    flagged[i] = True
    idx = np.flatnonzero(flagged)
    if idx.size == 0:
        return None
    rows = [{"observation": int(i) + 1, "label": None if labels is None else str(labels[i]),
             "k_hat": float(k[i]) if math.isfinite(k[i]) else None} for i in idx]
    base = {"version": REQUEST_VERSION, "run": run, "observations_total": int(n),
            "rule": {"limit": float(limit), "margin": float(margin), "share": float(share),
                     "max_exact": int(max_exact)},
            "flagged": rows}
    prev_kfold = (previous or {}).get("kfold") if previous and previous.get("observations_total") == n else None
    use_kfold = prev_kfold is not None or idx.size > max_exact or idx.size > share * n
    if not use_kfold:
        refits = [{"folder": refit_folder_name(run, observation=int(i) + 1), "held_out": [int(i) + 1]}
                  for i in idx]
        return {**base, "method": "exact", "refits": refits, "kfold": None}
    if prev_kfold is not None:
        folds = np.asarray(prev_kfold["folds"], dtype=np.int64)
        plan = dict(prev_kfold)
    else:
        folds = kfold_plan(n, K, seed, groups)
        plan = {"K": int(K), "seed": int(seed), "grouped": groups is not None, "folds": folds.tolist()}
    refits = [{"folder": refit_folder_name(run, fold=int(f)), "fold": int(f),
               "held_out": (np.flatnonzero(folds == f) + 1).tolist()}
              for f in sorted(set(folds.tolist()))]
    return {**base, "method": "kfold", "refits": refits, "kfold": plan}


def request_key(request: Mapping | None) -> tuple:
    """What identifies a request's work: the method and every refit's folder and held-out list.

    Two requests with the same key ask for the same refits (k-hat values may differ); the service
    rewrites REFITS.json only when the key changes.
    """
    if not request:
        return ()
    return (request.get("method"),
            tuple((r["folder"], tuple(r["held_out"]), r.get("fold")) for r in request.get("refits", ())))


def combine_run(psis: Mapping, request: Mapping | None, refits: Sequence[Mapping]) -> dict:
    """A run's headline elpd from its PSIS-LOO result, its refit request and the usable refits.

    Parameters
    ----------
    psis : mapping
        ``pointwise`` (n,), ``mcse_pointwise`` (n,), ``elpd``, ``se``, ``p_eff`` of PSIS-LOO
        (:func:`.loo.psis_loo`, or ``Scores.loo`` with ``Scores.loo_pointwise`` /
        ``loo_mcse_pointwise``). lppd = p_eff + elpd.
    request : mapping or None
        The run's request (:func:`refit_request`).
    refits : sequence of mappings
        Refits already checked against the request, each ``{"folder", "held_out" (1-based list),
        "fold" (int or None), "elpd" (m,), "mcse" (m,)`` (:func:`exact_elpd` of its draws),
        ``"finished"`` (bool: its own checks are met), ``"order"`` (larger = newer), ``"draws"``}.

    Returns
    -------
    dict with ``loo`` {``elpd``, ``se``, ``mcse``, ``p_eff``, ``method`` ("psis" | "mixed" | "kfold"),
    ``exact_observations``, ``pending_observations``, ``psis_observations`` (counts), ``psis_elpd``,
    ``psis_se``}, ``pointwise`` (n,), ``mcse_pointwise`` (n,), ``source`` (n,) of "exact" |
    "kfold" | "pending" | "psis", ``exact`` (0-based observations whose value is exact, for the
    verdict), ``refits`` {``method``, ``K``, ``folds_done``, ``folds_missing``, ``folders`` [{``folder``,
    ``held_out``, ``fold``, ``draws``, ``state``: "running" | "finished" | "replaced"}]} (None without
    request or refits) and ``replaced`` [(older folder, newer folder)].

    Rules: two refits of the same observation (exact) or the same fold (K-fold): the newer one
    (larger ``order``) is used and the older is "replaced". Exact values of finished refits replace
    their PSIS values (:func:`combine_pointwise`); a K-fold plan gives the headline only when every
    fold is in (:func:`kfold_elpd`), PSIS before. References as for those two functions.
    """
    pw = np.asarray(psis["pointwise"], dtype=float)
    mc = np.asarray(psis["mcse_pointwise"], dtype=float)
    n = pw.size
    lppd = float(psis["p_eff"]) + float(psis["elpd"]) if psis.get("p_eff") is not None else None
    if lppd is not None and not math.isfinite(lppd):
        lppd = None
    flagged0 = [int(r["observation"]) - 1 for r in (request or {}).get("flagged", [])]
    kfold = request is not None and request.get("method") == "kfold"
    winners: dict = {}
    replaced = []
    for r in sorted(refits, key=lambda r: r["order"]):
        key = ("fold", r["fold"]) if r.get("fold") is not None else ("obs", tuple(r["held_out"]))
        if key in winners:
            replaced.append((winners[key]["folder"], r["folder"]))
        winners[key] = r
    lost = {old for old, _new in replaced}
    folders = [{"folder": r["folder"], "held_out": list(r["held_out"]), "fold": r.get("fold"),
                "draws": r.get("draws"),
                "state": "replaced" if r["folder"] in lost else ("finished" if r["finished"] else "running")}
               for r in refits]
    source = np.array(["psis"] * n, dtype=object)
    source[flagged0] = "pending"
    base = {"psis_elpd": psis["elpd"], "psis_se": psis["se"]}
    summary = None
    if request is not None or refits:
        summary = {"method": (request or {}).get("method"), "K": None, "folds_done": [], "folds_missing": [],
                   "folders": folders}
    if kfold:
        folds = np.asarray(request["kfold"]["folds"], dtype=np.int64)
        values = {int(r["fold"]): (r["elpd"], r["mcse"]) for (kind, _), r in winners.items()
                  if kind == "fold" and r["finished"]}
        kf = kfold_elpd(folds, values, lppd=lppd)
        summary.update(K=int(request["kfold"]["K"]), folds_done=kf["folds_done"], folds_missing=kf["folds_missing"])
        if kf["complete"]:
            return {"loo": {"elpd": kf["elpd_kfold"], "se": kf["se"], "mcse": kf["mcse"], "p_eff": kf["p_eff"],
                            "method": "kfold", "exact_observations": n, "pending_observations": 0,
                            "psis_observations": 0, **base},
                    "pointwise": kf["pointwise"], "mcse_pointwise": kf["mcse_pointwise"],
                    "source": ["kfold"] * n, "exact": list(range(n)), "refits": summary, "replaced": replaced}
        exact = {}
    else:
        exact = {}
        for (kind, held), r in winners.items():
            if kind == "obs" and r["finished"] and len(held) == 1 and 1 <= held[0] <= n:
                exact[held[0] - 1] = (float(np.ravel(r["elpd"])[0]), float(np.ravel(r["mcse"])[0]))
    c = combine_pointwise(pw, mc, exact, lppd=lppd, pending=flagged0)
    for i in c["exact_observations"]:
        source[i] = "exact"
    return {"loo": {"elpd": c["elpd"], "se": c["se"], "mcse": c["mcse"], "p_eff": c["p_eff"],
                    "method": "psis" if not exact else "mixed",
                    "exact_observations": c["counts"]["exact"], "pending_observations": c["counts"]["pending"],
                    "psis_observations": c["counts"]["psis"], **base},
            "pointwise": c["pointwise"], "mcse_pointwise": c["mcse_pointwise"], "source": source.tolist(),
            "exact": c["exact_observations"], "refits": summary, "replaced": replaced}
