"""Real MCMC samplers for invented scenarios, writing run folders at a set pace.

Public API::

    scenarios() -> {scenario name: description}
    models(scenario) -> {model name: description}
    launch(scenario, out_dir, *, pace=None, draws=None, chains=4, fmt="npz", seed=0,
           warmup=None, keep_warmup=False, models=None, log=None) -> list[subprocess.Popen]
    launch_refits(request, *, model=None, pace=None, draws=None, chains=4, fmt="npz", seed=0,
                  warmup=None, log=None) -> list[subprocess.Popen]
    wait(procs, timeout=None) -> list[int]
    stop(procs, grace=5.0) -> list[int]
    cli_main(argv) -> int          # 'chainvigil simulate ...' and 'python -m chainvigil.simulated_chains ...'

Each model of a scenario becomes a run folder ``out_dir/<model>/`` holding ``run.json`` (written
before any draw) and one chain per sampler process (``chain-1`` ... ``chain-C``), written through
:mod:`chainvigil.writer`. See :mod:`chainvigil.simulated_chains.catalog` for the stories, data and models.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import time

from .catalog import SCENARIOS, get_scenario

__all__ = ["scenarios", "models", "launch", "launch_refits", "wait", "stop", "cli_main"]

_PROJECT_ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def scenarios() -> dict:
    """``{scenario name: one-paragraph description}``."""
    return {name: s.description for name, s in SCENARIOS.items()}


def models(scenario: str) -> dict:
    """``{model name: description}`` for one scenario (ValueError for an unknown scenario)."""
    return {m.name: m.description for m in get_scenario(scenario).models}


def _check_settings(pace, draws, chains, fmt, seed, warmup):
    if not (isinstance(pace, (int, float)) and math.isfinite(pace) and pace >= 0):
        raise ValueError(f"pace must be a number of draws per second >= 0 (0: as fast as possible), "
                         f"not {pace!r}")
    if not (isinstance(draws, int) and draws >= 1):
        raise ValueError(f"draws must be a whole number >= 1, not {draws!r}")
    if not (isinstance(chains, int) and chains >= 1):
        raise ValueError(f"chains must be a whole number >= 1, not {chains!r}")
    if fmt not in ("npz", "csv"):
        raise ValueError(f"format must be 'npz' or 'csv', not {fmt!r}")
    if not (isinstance(seed, int) and seed >= 0):
        raise ValueError(f"seed must be a whole number >= 0, not {seed!r}")
    if warmup is not None and not (isinstance(warmup, int) and warmup >= 0):
        raise ValueError(f"warmup must be a whole number >= 0, not {warmup!r}")


def launch(scenario: str, out_dir, *, pace: float | None = None, draws: int | None = None,
           chains: int = 4, fmt: str = "npz", seed: int = 0, warmup: int | None = None,
           keep_warmup: bool = False, models=None, log=None) -> list[subprocess.Popen]:
    """Start one sampler process per chain per model of ``scenario``; returns at once.

    Parameters
    ----------
    scenario : str
        A name from :func:`scenarios`.
    out_dir : path-like
        Root folder; each model writes ``out_dir/<model>/``. A run folder that already holds
        anything is refused (ValueError), so a new launch never mixes with an old run.
    pace : float, optional
        Draws per second per chain (default: the scenario's own; 0: as fast as possible). Paced
        chains write a block about every half second.
    draws : int, optional
        Draws written per chain after warm-up (default: the scenario's own).
    chains, fmt, seed
        Chains per model, ``"npz"`` chunks or ``"csv"``, and the seed (the same seed gives the
        same draws).
    warmup, keep_warmup
        Warm-up transitions (default: each model's own) and whether to write them.
    models : iterable of str, optional
        Only these models of the scenario.
    log : file object or ``subprocess.DEVNULL``, optional
        Where the processes' one-line summaries go (default: this process's stderr).

    Returns
    -------
    list of subprocess.Popen, each with attributes ``model``, ``chain`` and ``run_dir``.
    """
    from chainvigil.writer import write_run_info

    sc = get_scenario(scenario)
    pace = sc.pace if pace is None else pace
    draws = sc.draws if draws is None else draws
    _check_settings(pace, draws, chains, fmt, seed, warmup)
    chosen = list(sc.models)
    if models is not None:
        wanted = list(models)
        known = [m.name for m in sc.models]
        bad = [w for w in wanted if w not in known]
        if bad:
            raise ValueError(f"scenario {scenario!r} has no model {', '.join(map(repr, bad))}; "
                             f"its models: {', '.join(known)}")
        chosen = [m for m in sc.models if m.name in wanted]
    out_dir = os.fspath(out_dir)
    for m in chosen:
        run_dir = os.path.join(out_dir, m.name)
        if os.path.isdir(run_dir) and os.listdir(run_dir):
            raise ValueError(f"run folder {run_dir} already holds files; launch into an empty "
                             f"folder so the new chains do not mix with an old run")
    procs: list[subprocess.Popen] = []
    try:
        for m in chosen:
            run_dir = os.path.join(out_dir, m.name)
            write_run_info(run_dir, **m.run_info())
            for c in range(chains):
                procs.append(_start_chain(m.name, run_dir, c, pace=pace, draws=draws, seed=seed,
                                          fmt=fmt, warmup=warmup, keep_warmup=keep_warmup, log=log))
    except BaseException:
        stop(procs, grace=2.0)
        raise
    return procs


def _start_chain(model: str, run_dir: str, c: int, *, pace, draws, seed, fmt, warmup, keep_warmup=False,
                 log=None, held_out=None) -> subprocess.Popen:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (_PROJECT_ROOT, env.get("PYTHONPATH")) if p)
    cmd = [sys.executable, "-m", "chainvigil.simulated_chains.chain", model, run_dir,
           "--chain", str(c), "--pace", repr(float(pace)), "--draws", str(draws),
           "--seed", str(seed), "--format", fmt]
    if warmup is not None:
        cmd += ["--warmup", str(warmup)]
    if keep_warmup:
        cmd.append("--keep-warmup")
    if held_out:
        cmd += ["--held-out", ",".join(str(int(i)) for i in held_out)]
    p = subprocess.Popen(cmd, env=env, stdin=subprocess.DEVNULL, stdout=log, stderr=log)
    p.model, p.chain, p.run_dir = model, c, run_dir
    p.held_out = tuple(held_out or ())
    return p


def launch_refits(request, *, model: str | None = None, pace: float | None = None,
                  draws: int | None = None, chains: int = 4, fmt: str = "npz", seed: int = 0,
                  warmup: int | None = None, log=None) -> list[subprocess.Popen]:
    """Start the refits a REFITS.json asks for: one sampler process per chain per refit folder.

    Parameters
    ----------
    request : path-like
        The run folder holding ``REFITS.json``, or the path of the file.
    model : str, optional
        The model to refit (default: the request's run name, which is the model name for run
        folders made by :func:`launch`).
    pace, draws, chains, fmt, seed, warmup
        As for :func:`launch` (pace and draws default to the model's scenario).

    Each refit the request asks for whose folder does not exist yet (``<run>--refit-<i>`` or
    ``<run>--fold-<k>``, beside the run folder) gets its run.json (:func:`chainvigil.writer.write_refit_info`:
    ``refit_of``, ``held_out``, ``fold``) and its chains, which sample the model without the
    held-out readings and write log p(y_i | theta) of those readings only. Folders already present
    are left alone, so calling this again after the request changed starts only the new refits.
    Returns the processes (attributes ``model``, ``chain``, ``run_dir``, ``held_out``); ValueError for
    an unknown model, an invalid request or observations the model does not have.
    """
    from chainvigil.writer import pending_refits, read_refit_request, write_refit_info

    from .catalog import get_model

    path = os.fspath(request)
    run_dir = os.path.dirname(path) if os.path.basename(path) == "REFITS.json" else path
    req = read_refit_request(path)
    if req is None:
        return []
    m = get_model(model or req["run"])
    if req["observations_total"] != m.full_data().n:
        raise ValueError(f"{path}: the request is for {req['observations_total']} observations; model "
                         f"{m.name!r} has {m.full_data().n}")
    sc = get_scenario(m.scenario)
    pace = sc.pace if pace is None else pace
    draws = sc.draws if draws is None else draws
    _check_settings(pace, draws, chains, fmt, seed, warmup)
    jobs = pending_refits(run_dir)
    procs: list[subprocess.Popen] = []
    try:
        for job in jobs:
            refit = m.refit(job.held_out0)
            write_refit_info(job.folder, job.refit_of, list(job.held_out), fold=job.fold, **refit.run_info())
            for c in range(chains):
                p = _start_chain(m.name, job.folder, c, pace=pace, draws=draws, seed=seed, fmt=fmt,
                                 warmup=warmup, log=log, held_out=job.held_out)
                p.fold = job.fold
                procs.append(p)
    except BaseException:
        stop(procs, grace=2.0)
        raise
    return procs


def wait(procs, timeout: float | None = None) -> list[int]:
    """Wait until every process has ended; returns their exit codes in order.

    Raises TimeoutError (naming the processes still running, which are left running) when
    ``timeout`` seconds pass first.
    """
    deadline = None if timeout is None else time.monotonic() + timeout
    for p in procs:
        try:
            p.wait(None if deadline is None else max(0.0, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            running = [f"{getattr(q, 'model', '?')} chain {getattr(q, 'chain', '?')} (pid {q.pid})"
                       for q in procs if q.poll() is None]
            raise TimeoutError(f"{len(running)} sampler process(es) still running after {timeout} s: "
                               + ", ".join(running)) from None
    return [p.returncode for p in procs]


def stop(procs, grace: float = 5.0) -> list[int]:
    """Ask each running process to stop (SIGTERM: it finishes its current draw and closes its
    chain), then kill those still running after ``grace`` seconds. Returns the exit codes."""
    for p in procs:
        if p.poll() is None:
            p.terminate()
    deadline = time.monotonic() + grace
    for p in procs:
        try:
            p.wait(max(0.0, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()
    return [p.returncode for p in procs]


def cli_main(argv=None) -> int:
    """``chainvigil simulate SCENARIO OUT [options]``; see ``--help``."""
    from .cli import main

    return main(argv)
