"""Refits in the service: REFITS.json requests out, refit runs in, exact values into the headline.

The service calls one :class:`RefitService` at three clear points of a pass (docs/architecture.md):

* :meth:`RefitService.combine` (in scoring, before the comparison): for an ordinary run, its PSIS-LOO
  values combined with the exact values of its finished refits (``chainvigil.estimators.refit.
  combine_run``): exact where a finished refit exists, PSIS elsewhere; K-fold once every fold is in.
  The combined pointwise values are what the comparison, SE and p_eff use.
* :meth:`RefitService.apply` (before the verdict): the combination written into the scores' JSON
  (``loo.method``, counts, ``pointwise.loo_source``, ``refits``); for a refit run, ``loo`` becomes
  the exact elpd of its held-out observations and its MCSE, which its own verdict judges.
* :meth:`RefitService.after_verdict`: once the verdict judges k-hat (not provisional), the run's
  request is made (``refit_request``) and, when its set of refits changed, ``REFITS.json`` is written
  into the run folder (only inside the root, ``chainvigil.signals.write_json_inside``) or removed,
  an event is recorded and the ``--on-refits`` command is run (no shell; ``CHAINVIGIL_REFITS``,
  ``CHAINVIGIL_RUN``, ``CHAINVIGIL_FOLDER``, ``CHAINVIGIL_STATE`` in its environment). After a
  (re)start the command runs once more for a request already on disk (a kill may have come between
  the file and the command), so it must start only the refits whose folders do not exist yet.

A refit is *finished* when its own verdict said enough (``RunState.signalled``, kept in the history
as ``enough_at``, so it survives a restart); until then its observations are *pending* (PSIS value
used). Exact values are computed from the draw store (never from memory only), so a restarted
service computes the same values from the same committed draws.

Bad input (events, never a crash): a ``refit_of`` naming no run (``refit_orphan``, checked again each
pass), a refit the request does not ask for or whose columns do not match its held-out list
(``refit_mismatch``, not used), two refits of one observation or fold (``refit_replaced``: the newer
run.json wins), an unreadable REFITS.json found at start (``bad_refit_request``: rewritten).
"""
from __future__ import annotations

import math
import os
import zlib
from pathlib import Path
from typing import Callable

import numpy as np

from chainvigil.estimators.refit import combine_run, exact_elpd, refit_request, request_key
from chainvigil.problems import InputProblem
from chainvigil.refits import REFITS_NAME, check_refit, read_groups, read_refit_request, validate_refit_request
from chainvigil.rules import RUN_INFO_FILE
from chainvigil.signals import OutsideRoot, remove_inside, run_on_enough, write_json_inside

__all__ = ["RefitService", "refits_environment"]

_UNREAD = object()

#: Default goal for the MCSE of a refit's exact elpd (nats; run.json targets and command-line flags
#: override it). A refitted observation is one whose PSIS value had no trustworthy error at all
#: (k-hat > 0.7); its exact value is a plain Monte Carlo mean of p(y_i | theta) over a posterior that
#: did not see y_i, which for a badly misfit observation is itself heavy-tailed, so 0.1 nats can take
#: hundreds of thousands of draws. Half a nat per refit is an honest, known error that the combined
#: MCSE of the run carries forward.
REFIT_MCSE_MAX = 0.5


def refits_environment(*, run: str, folder, request_file, state_dir) -> dict:
    """The environment of the ``--on-refits`` command: this process's plus the CHAINVIGIL_* values."""
    env = dict(os.environ)
    env.update({"CHAINVIGIL_REFITS": str(request_file), "CHAINVIGIL_RUN": str(run),
                "CHAINVIGIL_FOLDER": str(folder), "CHAINVIGIL_STATE": str(state_dir)})
    return env


def _json_list(values) -> list:
    return [float(v) if math.isfinite(v) else None for v in np.asarray(values, dtype=float).tolist()]


class RefitService:
    """The refit loop of one service (see the module docstring).

    Parameters
    ----------
    service : the ``chainvigil.service.Service`` (its root, state folder, store, runs and events).
    write : write REFITS.json into run folders (``--no-refits`` turns it off; the combination of
        refits that exist still happens).
    on_refits : ``argv`` list of the ``--on-refits`` command, or a callable ``(path, run, folder)``
        (the demo), or None.
    """

    def __init__(self, service, *, write: bool = True, on_refits: list | Callable | None = None):
        self.service = service
        self.write = write
        self.on_refits = on_refits
        self.requests: dict = {}      # run -> its current request (None: none), _UNREAD before the first look
        self.asked: dict = {}         # run -> every refit entry its requests asked for in this lifetime
        self._exact: dict = {}        # refit run -> (per_chain, elpd (m,), mcse (m,))
        self._dirty: set = set()      # runs whose headline changed without new draws of their own
        self._replaced: set = set()   # (older, newer) pairs already reported
        self._seen: set = set()       # refit runs that had a snapshot in this lifetime
        self._announced: set = set()  # runs whose --on-refits command ran in this lifetime
        self._judged: set = set()     # runs whose k-hat the verdict has judged (not provisional)
        self._restore_checked: set = set()  # finished refits looked at after a restart

    # ------------------------------------------------------------------ helpers
    def is_refit(self, state) -> bool:
        return getattr(state, "refit", None) is not None

    def default_targets(self, state) -> dict | None:
        """Default verdict targets of a run: a refit's MCSE goal is ``REFIT_MCSE_MAX``."""
        return {"mcse_elpd_max": REFIT_MCSE_MAX} if self.is_refit(state) else None

    def after_restore(self, history) -> None:
        """After a restart: a run one of whose refits finished after the run's latest snapshot is due
        at once.  (The service may have stopped between a refit's stop signal and its run's next
        snapshot; the refit will not grow again, so nothing else would score the run anew.)

        Called after each scan; each refit restored as finished is looked at once, when its run.json
        has been read."""
        for refit_state in self.service.runs.values():
            if (refit_state.name in self._restore_checked or not self.is_refit(refit_state)
                    or not refit_state.signalled):
                continue
            self._restore_checked.add(refit_state.name)
            parent = refit_state.refit["refit_of"]
            enough_at = (history.run(refit_state.name) or {}).get("enough_at")
            last = history.latest_snapshot(parent) if parent in self.service.runs else None
            if enough_at is not None and last and last["time"] < enough_at:
                self._dirty.add(parent)

    def wants_snapshot(self, state) -> bool:
        """A run whose refits changed state (one finished, one arrived) is due without new draws."""
        return state.name in self._dirty

    def _event(self, *args, **kwargs):
        self.service.event(*args, **kwargs)

    def request(self, state) -> dict | None:
        """The run's current request; read from its REFITS.json the first time (after a restart the
        K-fold plan and the requested set stay what they were)."""
        req = self.requests.get(state.name, _UNREAD)
        if req is _UNREAD:
            try:
                req = read_refit_request(state.folder)
            except InputProblem as problem:
                self._event("warning", "bad_refit_request", f"{problem}; it is written afresh",
                            run=state.name, file=problem.path)
                req = None
            self._remember(state.name, req)
            self.requests[state.name] = req
        return req

    def _remember(self, run: str, req):
        if req:
            known = self.asked.setdefault(run, {})
            for r in req["refits"]:
                known[(tuple(r["held_out"]), r.get("fold"))] = r

    def _accepting(self, run: str, req) -> dict | None:
        """The current request widened to every refit asked for earlier in this lifetime (a refit started
        before the set changed is still a correct exact value)."""
        if req is None:
            return None
        return {**req, "refits": list(self.asked.get(run, {}).values()) or req["refits"]}

    def exact_values(self, refit_state):
        """(elpd (m,), mcse (m,), draws) of a refit from its committed and pending draws in the store
        (equal length per chain); None with fewer than 2 draws."""
        store = self.service.store
        lengths = {c: store.length(refit_state.name, c) for c in sorted(store.chains(refit_state.name))}
        per_chain = min(lengths.values()) if lengths else 0
        if per_chain < 2:
            return None
        cached = self._exact.get(refit_state.name)
        if cached is not None and cached[0] == per_chain and cached[3] == len(lengths):
            return cached[1], cached[2], per_chain * len(lengths)
        ll = np.stack([store.read_loglik(refit_state.name, c, draws=slice(0, per_chain)) for c in lengths])
        elpd, mcse = exact_elpd(ll)
        self._exact[refit_state.name] = (per_chain, elpd, mcse, len(lengths))
        return elpd, mcse, per_chain * len(lengths)

    def _refits_of(self, run: str) -> list:
        return [s for s in self.service.runs.values() if self.is_refit(s) and s.refit["refit_of"] == run]

    def _order(self, refit_state) -> tuple:
        try:
            mtime = os.stat(refit_state.folder / RUN_INFO_FILE).st_mtime_ns
        except OSError:
            mtime = 0
        return (mtime, refit_state.name)

    # ------------------------------------------------------------------ a refit run
    def check_orphan(self, refit_state) -> bool:
        """True when the refit names a run that exists (else a ``refit_orphan`` warning, once)."""
        parent = refit_state.refit["refit_of"]
        known = [s.name for s in self.service.runs.values() if not self.is_refit(s)]
        if parent in known:
            return True
        self._event("warning", "refit_orphan", f"{refit_state.folder / RUN_INFO_FILE}: refit_of names no "
                    f"run: there is no run '{parent}' (kept waiting for it)", run=refit_state.name,
                    file=refit_state.folder / RUN_INFO_FILE)
        return False

    def apply_refit_run(self, state, data: dict) -> None:
        """A refit run's own scores: ``loo`` becomes the exact elpd of its held-out observations (sum),
        its MCSE sqrt(sum mcse_i^2), and ``loo.method`` "refit"; its verdict judges these. Checked
        against its run's request at each of its snapshots (events); its run is scored again after
        the refit's first snapshot (the refit shows as running) and when it finishes."""
        if self.check_orphan(state):
            parent = self.service.runs[state.refit["refit_of"]]
            if state.n is not None:
                self._usable(state, parent)
            if state.name not in self._seen or state.signalled:
                # first snapshot (shows as running), or more draws of a finished refit (its value moved)
                self._seen.add(state.name)
                self._dirty.add(parent.name)
        values = self.exact_values(state)
        loo = data["loo"]
        loo["psis_elpd"], loo["method"] = loo.get("elpd"), "refit"
        loo["exact_observations"], loo["pending_observations"], loo["psis_observations"] = None, None, None
        if values is None:
            return
        elpd, mcse, draws = values
        loo["elpd"] = float(np.sum(elpd)) if np.all(np.isfinite(elpd)) else None
        loo["mcse"] = float(np.sqrt(np.sum(mcse**2))) if np.all(np.isfinite(mcse)) else None
        loo["se"] = loo["p_eff"] = None
        data["refit"] = {"refit_of": state.refit["refit_of"], "held_out": list(state.refit["held_out"]),
                         "fold": state.refit.get("fold"), "elpd": _json_list(elpd), "mcse": _json_list(mcse),
                         "draws": draws}

    def _usable(self, refit_state, parent) -> bool:
        """Whether a refit can be used for its run now; a ``refit_mismatch`` warning (once per problem)
        when it cannot. Silent while the run's k-hat is not judged yet (its request may still come)."""
        req = self.request(parent)
        if req is None and parent.name not in self._judged:
            return False
        file = refit_state.folder / RUN_INFO_FILE
        problem = check_refit(refit_state.refit, self._accepting(parent.name, req),
                              loglik_columns=refit_state.n)
        if problem is None and max(refit_state.refit["held_out"]) > (parent.n or 0):
            problem = f"held_out names observations beyond the {parent.n} of run '{parent.name}'"
        if problem is not None:
            self._event("warning", "refit_mismatch", f"{file}: {problem}; this refit is not used",
                        run=refit_state.name, file=file)
            return False
        return True

    def on_enough(self, state) -> None:
        """A refit that finished: its parent's headline changes at the next pass."""
        if self.is_refit(state):
            self._dirty.add(state.refit["refit_of"])

    # ------------------------------------------------------------------ an ordinary run
    def combine(self, state, scores) -> dict | None:
        """The run's headline from its PSIS-LOO scores, its request and its usable refits
        (``combine_run``), or None for a refit run."""
        if self.is_refit(state):
            return None
        self._dirty.discard(state.name)
        req = self.request(state)
        accepting = self._accepting(state.name, req)
        usable = []
        for refit_state in self._refits_of(state.name):
            if refit_state.n is None:
                continue
            if not self._usable(refit_state, state):
                continue
            values = self.exact_values(refit_state)
            if values is None:
                continue
            elpd, mcse, draws = values
            usable.append({"folder": refit_state.name, "held_out": list(refit_state.refit["held_out"]),
                           "fold": refit_state.refit.get("fold"), "elpd": elpd, "mcse": mcse,
                           "finished": bool(refit_state.signalled), "order": self._order(refit_state),
                           "draws": draws})
        psis = {**scores.loo, "pointwise": scores.loo_pointwise, "mcse_pointwise": scores.loo_mcse_pointwise}
        if req is not None and req["observations_total"] != state.n:
            req = None  # a request for another observation count (the run changed): not used
        out = combine_run(psis, req, usable)
        loo = out["loo"]
        if loo["method"] == "psis":
            # nothing exact yet: the headline stays the PSIS-LOO result as scored (its joint MCSE)
            loo.update({k: scores.loo.get(k) for k in ("elpd", "se", "mcse", "p_eff")})
        elif loo["method"] == "mixed":
            loo["mcse"], loo["mcse_own"] = self._mixed_mcse(scores, out)
        for old, new in out["replaced"]:
            if (old, new) not in self._replaced:
                self._replaced.add((old, new))
                self._event("info", "refit_replaced", f"run '{state.name}': refit '{new}' replaces '{old}' "
                            "(two refits of the same observations; the newer run.json wins)",
                            run=state.name, file=self.service.root / new / RUN_INFO_FILE)
        return out

    @staticmethod
    def _mixed_mcse(scores, out) -> tuple[float, float]:
        """MCSE of the mixed total, and its part from the run's own draws: the PSIS part keeps the
        joint/independent ratio of the run's own MCSE (draws shared by every observation are
        correlated across observations), the exact part adds its refits' independent errors:

            own^2 = q^2 sum_{i psis} mcse_i^2,   mcse^2 = own^2 + sum_{i exact} mcse_i^2,
            q = joint / independent

        The run's verdict judges ``own`` (what more draws of this run can lower; each refit's own
        verdict judged its part).
        """
        mc = np.asarray(out["mcse_pointwise"], dtype=float)
        exact = np.zeros(mc.size, dtype=bool)
        exact[out["exact"]] = True
        joint, independent = scores.loo.get("mcse"), scores.loo.get("mcse_independent", scores.loo.get("mcse"))
        q = 1.0
        if joint is not None and independent and math.isfinite(joint) and math.isfinite(independent):
            q = max(joint / independent, 1e-12) if independent > 0 else 1.0
        psis_part = float(np.sum(np.asarray(scores.loo_mcse_pointwise, dtype=float)[~exact] ** 2))
        own = q * math.sqrt(psis_part)
        return float(math.sqrt(own * own + float(np.sum(mc[exact] ** 2)))), float(own)

    def apply(self, state, data: dict, combined: dict | None) -> list:
        """Write a combination into the scores' JSON (``data``, in place); returns the 0-based
        observations whose value is exact (for the verdict)."""
        if self.is_refit(state):
            self.apply_refit_run(state, data)
            return []
        if combined is None:
            return []
        data["loo"].update({k: (v if not isinstance(v, float) or math.isfinite(v) else None)
                            for k, v in combined["loo"].items()})
        data["pointwise"]["loo"] = _json_list(combined["pointwise"])
        data["pointwise"]["loo_source"] = list(combined["source"])
        data["refits"] = combined["refits"]
        if data["refits"] is not None:
            req = self.requests.get(state.name)
            data["refits"] = {**data["refits"], "request": str(state.folder / REFITS_NAME) if req else None}
        return list(combined["exact"])

    def after_verdict(self, state, scores, verdict: dict, *, now: float) -> bool:
        """Make the run's request from its k-hat once the verdict judges k-hat; write, update or remove
        REFITS.json when the set of refits changed. True when the request changed."""
        if self.is_refit(state):
            return False
        khat = next((c for c in verdict.get("checks", []) if c.get("name") == "k-hat"), None)
        if khat is None or khat.get("provisional"):
            return False  # the verdict holds k-hat advice back: so does the request
        self._judged.add(state.name)
        previous = self.request(state)
        labels = state.info.get("observation_labels")
        if labels and len(labels) != state.n:
            labels = None
        try:
            groups = read_groups(state.folder, state.n)
        except InputProblem as problem:
            self._event("warning", "bad_run_info", f"{problem}; folds made without groups", run=state.name,
                        file=problem.path)
            groups = None
        try:
            req = refit_request(scores.pareto_k, labels, run=state.name, seed=zlib.crc32(state.name.encode()),
                                too_few_draws=bool(scores.flags.get("too_few_draws")), draws=scores.draws,
                                groups=groups, previous=previous)
        except ValueError as err:
            self._event("warning", "refits_not_requested", f"run '{state.name}': no refit request ({err})",
                        run=state.name)
            return False
        if request_key(req) == request_key(previous):
            if req is not None and self.write and state.name not in self._announced:
                # first look after a (re)start: a kill may have come between writing the file and
                # running the command, so it runs once more (it starts only refits not yet started)
                self._announced.add(state.name)
                self._run_command(state, state.folder / REFITS_NAME)
            return False
        self.requests[state.name] = req
        self._remember(state.name, req)
        if not self.write:
            return True
        try:
            if req is None:
                if remove_inside(self.service.root, state.folder, REFITS_NAME):
                    self._event("info", "refits_withdrawn", f"{state.folder / REFITS_NAME}: no observation "
                                "needs a refit any more; removed", run=state.name, file=state.folder / REFITS_NAME,
                                once=False)
                return True
            validate_refit_request(req)
            path = write_json_inside(self.service.root, state.folder, REFITS_NAME, req)
        except OutsideRoot as err:
            self._event("warning", "refits_refused", f"{REFITS_NAME} not written: {err}", run=state.name,
                        file=state.folder)
            return True
        except (OSError, ValueError) as err:
            self._event("warning", "refits_failed", f"{state.folder}: cannot write {REFITS_NAME} ({err})",
                        run=state.name, file=state.folder)
            return True
        what = (f"{len(req['flagged'])} observation(s) with k-hat above 0.7: "
                + (f"{len(req['refits'])} exact refit(s)" if req["method"] == "exact"
                   else f"K-fold with K = {req['kfold']['K']}"))
        self._event("info", "refits_requested", f"{path}: {what}", run=state.name, file=path, once=False)
        self._announced.add(state.name)
        self._run_command(state, path)
        return True

    def _run_command(self, state, path: Path):
        if self.on_refits is None:
            return
        try:
            if callable(self.on_refits):
                self.on_refits(path, state.name, state.folder)
            else:
                env = refits_environment(run=state.name, folder=state.folder, request_file=path,
                                         state_dir=self.service.state_dir)
                run_on_enough(self.on_refits, env, cwd=self.service.state_dir)
        except Exception as err:  # a failing user command never stops the service
            self._event("warning", "on_refits_failed", f"--on-refits command failed to start: "
                        f"{type(err).__name__}: {err}", run=state.name)
