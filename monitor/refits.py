"""The refit files: the request the service writes (``REFITS.json``) and the run.json of a refit.

When PSIS-LOO flags observations with Pareto k-hat above 0.7 the service writes ``REFITS.json`` into
the run folder: which observations to refit without (exact LOO), or a K-fold plan. Its content is
made by :func:`chainvigil.estimators.refit.refit_request`; this module checks, writes and reads it.

A refit is an ordinary run folder beside the run (``<run>--refit-<i>`` or ``<run>--fold-<k>``)
whose run.json says what it held out::

    {"refit_of": "<run>", "held_out": [i, ...]}              exact LOO (1-based observations)
    {"refit_of": "<run>", "fold": k, "held_out": [i, ...]}   fold k of the K-fold plan

and whose chains write as their log-likelihood columns log p(y_i | theta_s) of the held-out
observations only, in the listed order, from a posterior fitted without them.

Everything here is plain JSON (no pickles can be in it), checked field by field; every problem is a
ValueError (or :class:`~chainvigil.problems.InputProblem` when reading) naming the file.
"""

from __future__ import annotations

import json
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

from chainvigil.atomic import write_json_atomic
from chainvigil.problems import InputProblem
from chainvigil.readers import open_regular

__all__ = ["REFITS_NAME", "REFIT_FIELDS", "RefitJob", "validate_refit_request", "read_refit_request",
           "write_refit_request", "remove_refit_request", "validate_refit_info", "read_refit_info",
           "check_refit", "refit_jobs", "read_groups"]

REFITS_NAME = "REFITS.json"
RUN_INFO_NAME = "run.json"
#: run.json fields that make a run folder a refit.
REFIT_FIELDS = ("refit_of", "held_out", "fold")
_MAX_BYTES = 64 << 20  # a request for 10^6 observations is ~10 MB; anything far larger is not ours
_FOLDER_RE = re.compile(r"[A-Za-z0-9_\-][A-Za-z0-9_.\-]*")


def _plain_folder(name, what: str) -> str:
    """A folder name without separators that does not start with '.' (stays beside the run)."""
    if not isinstance(name, str) or not _FOLDER_RE.fullmatch(name) or name in (".", ".."):
        raise ValueError(f"{what} must be a plain folder name (letters, digits, '_', '-', '.', not "
                         f"starting with '.'), got {json.dumps(name, default=repr)[:60]}")
    return name


def _whole(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _observations(v, what: str, n: int | None = None) -> list[int]:
    if not isinstance(v, list) or not v:
        raise ValueError(f"{what} must be a non-empty list of observation numbers (1-based)")
    bad = [x for x in v if not _whole(x) or x < 1 or (n is not None and x > n)]
    if bad:
        top = f"1..{n}" if n is not None else "1 or more"
        raise ValueError(f"{what}: {json.dumps(bad[:5], default=repr)} are not observation numbers ({top})")
    if len(set(v)) != len(v):
        dup = sorted({x for x in v if v.count(x) > 1})[:5]
        raise ValueError(f"{what}: observations {dup} are listed more than once")
    return list(v)


# --------------------------------------------------------------------------------------------------
# the request (REFITS.json)


def validate_refit_request(req) -> dict:
    """Check a refit request (the layout of :func:`chainvigil.estimators.refit.refit_request`).

    Returns the request; raises ValueError naming the field and what is wrong. Checked: the version,
    ``run`` and every refit ``folder`` are plain folder names, ``method`` is "exact" or "kfold",
    every ``held_out`` lists distinct observations 1..n, exact refits hold out one observation each,
    K-fold refits are the folds of ``kfold.folds`` (n fold numbers) and cover every observation once.
    """
    if not isinstance(req, dict):
        raise ValueError(f"a refit request must be a JSON object, not {type(req).__name__}")
    if req.get("version") != 1:
        raise ValueError(f"unknown request version {json.dumps(req.get('version'))[:20]} (this reader knows 1)")
    run = _plain_folder(req.get("run"), "'run'")
    n = req.get("observations_total")
    if not _whole(n) or n < 1:
        raise ValueError("'observations_total' must be a whole number >= 1")
    method = req.get("method")
    if method not in ("exact", "kfold"):
        raise ValueError(f"'method' must be \"exact\" or \"kfold\", got {json.dumps(method, default=repr)[:30]}")
    flagged = req.get("flagged")
    if not isinstance(flagged, list):
        raise ValueError("'flagged' must be a list")
    for j, row in enumerate(flagged):
        if not isinstance(row, dict) or not _whole(row.get("observation")) or not 1 <= row["observation"] <= n:
            raise ValueError(f"'flagged'[{j}] must be an object with an 'observation' number 1..{n}")
        k = row.get("k_hat")
        if k is not None and not (isinstance(k, (int, float)) and not isinstance(k, bool) and math.isfinite(k)):
            raise ValueError(f"'flagged'[{j}].k_hat must be a number or null")
        if row.get("label") is not None and not isinstance(row["label"], str):
            raise ValueError(f"'flagged'[{j}].label must be a string or null")
    refits = req.get("refits")
    if not isinstance(refits, list) or not refits:
        raise ValueError("'refits' must be a non-empty list")
    folders = set()
    for j, r in enumerate(refits):
        if not isinstance(r, dict):
            raise ValueError(f"'refits'[{j}] must be an object")
        folder = _plain_folder(r.get("folder"), f"'refits'[{j}].folder")
        if folder == run or folder in folders:
            raise ValueError(f"'refits'[{j}].folder {folder!r} repeats the run or another refit")
        folders.add(folder)
        held = _observations(r.get("held_out"), f"'refits'[{j}].held_out", n)
        if method == "exact" and (len(held) != 1 or "fold" in r):
            raise ValueError(f"'refits'[{j}]: an exact refit holds out one observation and has no fold")
    kfold = req.get("kfold")
    if method == "exact":
        if kfold is not None:
            raise ValueError("'kfold' must be null for exact refits")
        return req
    if not isinstance(kfold, dict):
        raise ValueError("'kfold' must be an object for a K-fold request")
    K, folds = kfold.get("K"), kfold.get("folds")
    if not _whole(K) or K < 2 or not _whole(kfold.get("seed")):
        raise ValueError("'kfold' needs a whole number K >= 2 and the seed of the plan")
    if not isinstance(folds, list) or len(folds) != n or not all(_whole(f) and 1 <= f <= K for f in folds):
        raise ValueError(f"'kfold.folds' must list a fold number 1..{K} for each of the {n} observations")
    seen = {}
    for j, r in enumerate(refits):
        f = r.get("fold")
        if not _whole(f) or not 1 <= f <= K or f in seen:
            raise ValueError(f"'refits'[{j}].fold must be a fold number 1..{K}, once per fold")
        members = [i + 1 for i, x in enumerate(folds) if x == f]
        if sorted(r["held_out"]) != members:
            raise ValueError(f"'refits'[{j}]: held_out is not fold {f} of the plan")
        seen[f] = j
    if set(seen) != set(folds):
        raise ValueError(f"'refits' do not cover every fold of the plan (missing {sorted(set(folds) - set(seen))})")
    return req


def _request_path(path) -> Path:
    p = Path(os.fspath(path))
    return p / REFITS_NAME if p.is_dir() else p


def read_refit_request(path) -> dict | None:
    """Read and check a run's refit request; ``path`` is the run folder or the REFITS.json file.

    Returns None when there is no request (nothing flagged). Raises InputProblem (kind
    ``bad_refit_request``) for a file that is not JSON, too large, or not a valid request, and
    (``unreadable``) when it cannot be read; the message names the file.
    """
    p = _request_path(path)
    req = _load_json(p, "bad_refit_request")
    if req is None:
        return None
    try:
        return validate_refit_request(req)
    except ValueError as exc:
        raise InputProblem(p, str(exc), "bad_refit_request") from None


def _load_json(p: Path, kind: str, hint: str = ""):
    """The JSON value of file ``p``; None when it does not exist. Opened without blocking, regular
    files only, at most ``_MAX_BYTES``; InputProblem ``unreadable`` / ``not_regular`` or ``kind``
    (not JSON, too large) naming the file."""
    try:
        f = open_regular(p, "file")
    except InputProblem as problem:
        if not os.path.lexists(p):
            return None
        raise problem
    with f:
        raw = f.read(_MAX_BYTES + 1)
    if len(raw) > _MAX_BYTES:
        raise InputProblem(p, f"larger than {_MAX_BYTES >> 20} MiB, not ours", kind)
    try:
        return json.loads(raw.decode("utf-8"), parse_constant=_no_constant)
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise InputProblem(p, f"not valid JSON{hint} ({exc})", kind) from None


def _no_constant(name):
    raise ValueError(f"{name} is not a JSON number")


def write_refit_request(run_dir, request: dict) -> str:
    """Write ``<run_dir>/REFITS.json`` atomically (hidden temporary file, fsync, rename).

    The request is checked first (ValueError); returns the path written.
    """
    validate_refit_request(request)
    return write_json_atomic(run_dir, REFITS_NAME, request)


def remove_refit_request(run_dir) -> bool:
    """Remove ``<run_dir>/REFITS.json`` (nothing is flagged any more); True if there was one."""
    try:
        os.remove(Path(os.fspath(run_dir)) / REFITS_NAME)
        return True
    except FileNotFoundError:
        return False


# --------------------------------------------------------------------------------------------------
# a refit's run.json


def validate_refit_info(info) -> dict | None:
    """The refit fields of a run description: None for an ordinary run, else
    ``{"refit_of": str, "held_out": [int, ...], "fold": int | None}``.

    A run.json with ``held_out`` or ``fold`` but no ``refit_of`` is an error (ValueError), as are a
    ``refit_of`` that is not a plain folder name, a ``held_out`` that is not a non-empty list of
    distinct observation numbers >= 1, and a ``fold`` that is not a whole number >= 1.
    """
    if not isinstance(info, dict):
        raise ValueError(f"the run description must be a JSON object, not {type(info).__name__}")
    if "refit_of" not in info:
        extra = [k for k in ("held_out", "fold") if k in info]
        if extra:
            raise ValueError(f"{' and '.join(map(repr, extra))} without 'refit_of': say which run this refits")
        return None
    of = _plain_folder(info["refit_of"], "'refit_of'")
    held = _observations(info.get("held_out"), "'held_out'")
    fold = info.get("fold")
    if fold is not None and not (_whole(fold) and fold >= 1):
        raise ValueError(f"'fold' must be a whole number >= 1, got {json.dumps(fold, default=repr)[:30]}")
    return {"refit_of": of, "held_out": held, "fold": fold}


def read_refit_info(run_dir) -> dict | None:
    """The refit fields of ``<run_dir>/run.json`` (see :func:`validate_refit_info`), None when the
    folder has no run.json or is not a refit. Raises InputProblem (``bad_refit_info``) naming the file."""
    p = Path(os.fspath(run_dir)) / RUN_INFO_NAME
    info = _load_json(p, "bad_refit_info", ", perhaps still being written")
    if info is None:
        return None
    try:
        return validate_refit_info(info)
    except ValueError as exc:
        raise InputProblem(p, str(exc), "bad_refit_info") from None


def check_refit(info: dict, request: dict | None, *, loglik_columns: int | None = None,
                known_runs=None) -> str | None:
    """Why a refit cannot be used, or None when it can.

    ``info``: :func:`validate_refit_info` of the refit; ``request``: the refitted run's current
    request (None: none written); ``loglik_columns``: the refit's number of log-likelihood columns;
    ``known_runs``: names of the watched runs. Checks, in order: the run exists, a request exists, the
    held-out list (and fold) is one the request asks for, and the column count equals the held-out count.
    """
    of = info["refit_of"]
    if known_runs is not None and of not in set(known_runs):
        return f"refit_of names no run: there is no run '{of}'"
    if request is None:
        return f"run '{of}' has no refit request"
    held = list(info["held_out"])
    fold = info.get("fold")
    if request["method"] == "kfold":
        if fold is None:
            return f"run '{of}' asks for K-fold refits; this refit names no fold"
        match = next((r for r in request["refits"] if r.get("fold") == fold), None)
        if match is None:
            return f"run '{of}' has no fold {fold} (K = {request['kfold']['K']})"
        if held != match["held_out"]:
            return (f"held_out does not match fold {fold} of the request ({len(held)} listed, the fold "
                    f"has {len(match['held_out'])}, or a different order)")
    else:
        if fold is not None:
            return f"run '{of}' asks for exact refits, not K-fold (this refit names fold {fold})"
        if not any(held == r["held_out"] for r in request["refits"]):
            return f"held_out {held[:5]} is not a refit the request of '{of}' asks for"
    if loglik_columns is not None and loglik_columns != len(held):
        return f"{loglik_columns} log-likelihood columns for {len(held)} held-out observations"
    return None


@dataclass(frozen=True)
class RefitJob:
    """One refit a request asks for.

    ``folder``: the refit run folder (beside the run); ``refit_of``: the run's name; ``held_out``:
    1-based observations, in the order the refit writes their log-likelihood columns; ``fold``: the
    fold number of a K-fold plan, or None for exact LOO.
    """

    folder: str
    refit_of: str
    held_out: tuple
    fold: int | None

    @property
    def held_out0(self) -> list[int]:
        """0-based indices of the held-out observations (for numpy indexing)."""
        return [i - 1 for i in self.held_out]


def refit_jobs(run_dir, request: dict | None = None) -> list[RefitJob]:
    """The refits a run's request asks for, each with its folder beside ``run_dir``.

    ``request`` defaults to :func:`read_refit_request` of ``run_dir`` (no request: an empty list).
    """
    run_dir = os.fspath(run_dir)
    if request is None:
        request = read_refit_request(run_dir)
        if request is None:
            return []
    else:
        validate_refit_request(request)
    parent = os.path.dirname(os.path.abspath(run_dir))
    return [RefitJob(os.path.join(parent, r["folder"]), request["run"], tuple(r["held_out"]), r.get("fold"))
            for r in request["refits"]]


def read_groups(run_dir, n: int) -> list | None:
    """The ``group`` list of ``<run_dir>/run.json`` (one key per observation; observations sharing a key
    share a K-fold fold), or None when absent. Keys are strings or whole numbers; raises InputProblem
    (``bad_run_info``) for a list of the wrong length or with other values, naming the file."""
    p = Path(os.fspath(run_dir)) / RUN_INFO_NAME
    info = _load_json(p, "bad_run_info", ", perhaps still being written")
    if not isinstance(info, dict) or "group" not in info:
        return None
    g = info["group"]
    if not isinstance(g, list) or len(g) != n or not all(isinstance(x, str) or _whole(x) for x in g):
        size = len(g) if isinstance(g, list) else type(g).__name__
        raise InputProblem(p, f"'group' must list a string or whole number for each of the {n} "
                              f"observations (got {size})", "bad_run_info")
    return list(g)
