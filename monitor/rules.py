"""Domain constants and rules: each defined once here, imported by the service, the verdict and the CLI.

The numerics (``chainvigil.estimators``) import no project module, so the two numeric rules they
need (the Pareto k-hat limit 0.7 and the sample-size threshold min(1 - 1/log10 S, 0.7)) live in
``chainvigil.estimators.psis`` and are re-exported here; everything else is defined here.

Run states (stored in the ``runs`` table by the service; the screen and the CLI show the same words):

``gathering``     draws are arriving and the verdict still wants more;
``enough``        the verdict says enough draws (the stop signal was dropped);
``needs_a_look``  a problem needs a person: some Pareto k-hat above 0.7 or a refit is advised;
``paused``        no new draws for a short while (the verdict's activity);
``finished``      every chain stopped: no new draws for a long while, or quiet after the stop signal;
``set_aside``     the service failed on this run's input or scoring; the reason is in ``state_reason``
                  and in an ``error`` event; the run is tried again on its next change.
"""
from __future__ import annotations

import math
from collections.abc import Mapping

from chainvigil.estimators.psis import KHAT_LIMIT
from chainvigil.estimators.psis import sample_size_threshold as _sample_size_threshold
from chainvigil.storage.history import RUN_STATES

__all__ = ["KHAT_LIMIT", "khat_threshold", "SIGNAL_FILE", "RUN_INFO_FILE", "RUN_INFO_FIELDS",
           "RUN_STATES", "STATE_DIR_NAME", "run_state", "finite_or_none", "format_minutes", "run_of_path",
           "DEFAULT_TARGETS", "P_EFF_CAUTION_FACTOR", "p_eff_caution"]

#: Name of the stop-signal file the service drops into a run folder when it has enough draws.
SIGNAL_FILE = "ENOUGH.json"

#: Name of the optional per-run description file, and the fields it may hold.
RUN_INFO_FILE = "run.json"
STATE_DIR_NAME = ".chainvigil"
"""The service's default state folder inside the root (the scan skips it without a problem)."""
RUN_INFO_FIELDS = ("title", "dataset", "observation_labels", "n_params", "point_loglik", "targets",
                   "draws_expected")

#: Default verdict targets (the ``Targets`` dataclass of ``chainvigil.verdict`` uses these values).
DEFAULT_TARGETS = {
    "rhat_max": 1.01,
    "ess_bulk_min_per_chain": 100.0,
    "ess_tail_min_per_chain": 100.0,
    "mcse_elpd_max": 0.1,
}


#: LOO's p_eff above this many times the model's parameter count earns a caution (a rule of thumb of
#: this project, not a goal: it never blocks the verdict).
P_EFF_CAUTION_FACTOR = 2.0


def p_eff_caution(p_eff, n_params) -> str | None:
    """A caution when the effective number of parameters of PSIS-LOO is far above the parameter count.

    For a regular model whose posterior is dominated by the likelihood, the effective number of
    parameters is close to the parameter count (Spiegelhalter, Best, Carlin & van der Linde 2002 for
    p_D; Vehtari, Gelman & Gabry 2017, Sec. 2-3, for p_loo, which estimates the same complexity).
    Well above it, single observations pull the posterior hard or the model misses a pattern in the
    data. "Well above" is ``P_EFF_CAUTION_FACTOR`` times the count (our rule of thumb). None when
    either number is missing or the count is not positive.
    """
    p, k = finite_or_none(p_eff), finite_or_none(n_params)
    if p is None or k is None or k <= 0 or p <= P_EFF_CAUTION_FACTOR * k:
        return None
    return (f"p_eff {p:.1f} is more than {P_EFF_CAUTION_FACTOR:g} times the model's {k:g} parameters: "
            "a few observations pull the fit hard, or the model misses a pattern in the data; look at "
            "the observations with the largest k-hat")


def khat_threshold(total_draws: float) -> float:
    """Sample-size k-hat threshold min(1 - 1/log10 S, 0.7) for S draws in all (-inf for S <= 1).

    Vehtari, Simpson, Gelman, Yao & Gabry (2024), Pareto smoothed importance sampling, JMLR 25(72),
    sec. 3.  S is the total number of draws over all chains.
    """
    return _sample_size_threshold(total_draws)


def finite_or_none(x) -> float | None:
    """``float(x)`` when it is a finite number; None for None, booleans, NaN, infinities and
    non-numbers."""
    if x is None or isinstance(x, bool):
        return None
    try:
        value = float(x)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def format_minutes(minutes: float) -> str:
    """A duration in minutes for people: ``<1 min``, ``42 min``, ``3.5 h``."""
    if minutes < 1:
        return "<1 min"
    if minutes < 120:
        return f"{minutes:,.0f} min"
    return f"{minutes / 60:,.1f} h"


def run_state(verdict: Mapping | None, k_max, *, set_aside: bool = False) -> str:
    """The one derivation of a run's state from its latest verdict and worst Pareto k-hat.

    ``set_aside`` wins (the service could not process the run); then ``enough`` (enough draws); then
    ``needs_a_look`` when a refit is advised or some k-hat is above ``KHAT_LIMIT`` (or not a number);
    then the verdict's ``activity``: ``finished`` (every chain stopped: no new draws for a long while,
    or the stop signal written and no new draws) and ``paused`` (no new draws for a short while); else
    ``gathering``.  Every result is one of ``RUN_STATES``.
    """
    if set_aside:
        return "set_aside"
    verdict = verdict or {}
    if verdict.get("enough"):
        return "enough"
    idle = verdict.get("activity") if verdict.get("activity") in ("paused", "finished") else "gathering"
    if "attention" in verdict:  # the verdict holds k-hat advice back until it can be judged
        return "needs_a_look" if verdict["attention"] else idle
    k = finite_or_none(k_max)
    if verdict.get("refit") or (k_max is not None and (k is None or k > KHAT_LIMIT)):
        return "needs_a_look"
    return idle


def run_of_path(path, root) -> str | None:
    """The run (first folder below ``root``) that owns ``path``; None for the root itself or outside it.

    Purely lexical on absolute, normalised paths (no symlinks are followed), so a path the service
    is told about is attributed to the folder it was found in.
    """
    import os

    root_s = os.path.abspath(os.fspath(root))
    path_s = os.path.abspath(os.path.join(root_s, os.fspath(path)))
    rel = os.path.relpath(path_s, root_s)
    parts = rel.split(os.sep)
    if not parts or parts[0] in (".", "..", ""):
        return None
    return parts[0]
