"""The ``chainvigil`` command line."""
from __future__ import annotations

import argparse
import csv
import json
import math
import signal
import sys
import threading
from pathlib import Path

DESCRIPTION = """\
chainvigil watches folders where MCMC samplers write their draws, keeps WAIC, PSIS-LOO (with Pareto
k-hat), R-hat, ESS and Monte Carlo errors up to date as draws arrive, records every update in a SQLite
history, and says when enough draws have been collected."""

EPILOG = """\
examples:
  chainvigil watch runs/                 service and live screen on the folder runs/
  chainvigil watch runs/ --headless      service only, one line per update (e.g. over ssh)
  chainvigil view runs/.chainvigil       the screen on a history, live or after the run
  chainvigil score runs/model-a --json   one-shot scores of one run folder
  chainvigil history runs/.chainvigil --csv > trail.csv
  chainvigil demo                        simulated samplers, the service and the screen together
"""


def _target_flags(parser):
    group = parser.add_argument_group("targets (override the defaults and run.json)")
    group.add_argument("--rhat-max", type=float, metavar="X", help="largest acceptable R-hat (default 1.01)")
    group.add_argument("--ess-bulk-per-chain", type=float, metavar="N",
                       help="smallest bulk-ESS per chain (default 100)")
    group.add_argument("--ess-tail-per-chain", type=float, metavar="N",
                       help="smallest tail-ESS per chain (default 100)")
    group.add_argument("--mcse-elpd-max", type=float, metavar="NATS",
                       help="largest Monte Carlo error of the PSIS-LOO elpd (default 0.1)")


# command-line flag (argparse dest) -> verdict target key
FLAG_TARGETS = {
    "rhat_max": "rhat_max",
    "ess_bulk_per_chain": "ess_bulk_min_per_chain",
    "ess_tail_per_chain": "ess_tail_min_per_chain",
    "mcse_elpd_max": "mcse_elpd_max",
}


def _targets_from(args) -> dict:
    out = {}
    for flag, key in FLAG_TARGETS.items():
        value = getattr(args, flag, None)
        if value is not None:
            out[key] = value
    return out


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="chainvigil", description=DESCRIPTION, epilog=EPILOG,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    watch = sub.add_parser("watch", help="watch a root folder of runs (service and screen)",
                           description="Watch ROOT, which holds one folder per run, and keep the scores "
                                       "up to date as the samplers write.")
    watch.add_argument("root", metavar="ROOT", help="folder holding one folder per run")
    watch.add_argument("--headless", action="store_true", help="service only: print one line per update")
    watch.add_argument("--state", metavar="DIR", help="state folder (default ROOT/.chainvigil)")
    watch.add_argument("--poll", action="store_true",
                       help="poll the file system instead of waiting for its events (network file systems)")
    watch.add_argument("--every", type=float, default=5.0, metavar="SECONDS",
                       help="seconds between updates of a growing run (default 5)")
    watch.add_argument("--on-enough", metavar="CMD",
                       help="command to run when a run has enough draws; split like a shell would, run "
                            "without a shell; the run arrives in the environment as CHAINVIGIL_RUN, "
                            "CHAINVIGIL_FOLDER, CHAINVIGIL_DRAWS, CHAINVIGIL_DRAWS_PER_CHAIN, "
                            "CHAINVIGIL_ENOUGH_FILE, CHAINVIGIL_STATE (e.g. "
                            "--on-enough ./stop-sampler.sh)")
    watch.add_argument("--no-signal", action="store_true", help="do not write ENOUGH.json into run folders")
    watch.add_argument("--seconds", type=float, metavar="S", help="stop after S seconds (default: until stopped)")
    _target_flags(watch)

    view = sub.add_parser("view", help="the screen on a history, live or after the run")
    view.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    view.add_argument("--refresh", type=float, default=1.0, metavar="SECONDS", help="poll interval (default 1)")

    score = sub.add_parser("score", help="one-shot scores of a run folder",
                           description="Read every draw of RUN_DIR and print its scores (nothing is written).")
    score.add_argument("run_dir", metavar="RUN_DIR")
    score.add_argument("--json", action="store_true", help="print JSON (default: a short text summary)")
    _target_flags(score)

    history = sub.add_parser("history", help="the recorded snapshots of a history")
    history.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    fmt = history.add_mutually_exclusive_group()
    fmt.add_argument("--json", action="store_true", help="a JSON array, oldest first (default)")
    fmt.add_argument("--csv", action="store_true", help="CSV, one row per snapshot")
    history.add_argument("--run", metavar="NAME", help="only this run")

    events = sub.add_parser("events", help="warnings and rejected input recorded in a history")
    events.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    events.add_argument("--json", action="store_true", help="a JSON array (default: one line each)")
    events.add_argument("--run", metavar="NAME", help="only this run")

    sub.add_parser("simulate", help="start simulated samplers writing run folders (see simulate --help)",
                   add_help=False)

    demo = sub.add_parser("demo", help="simulated samplers, the service and the screen, in one go")
    demo.add_argument("--headless", action="store_true", help="no screen: print updates and final verdicts")
    demo.add_argument("--seconds", type=float, metavar="N", help="stop after N seconds (headless default 180)")
    demo.add_argument("--root", metavar="DIR", help="folder for the simulated runs (kept; default a temporary one)")
    demo.add_argument("--pace", type=float, metavar="DRAWS_PER_S", help="draws per second per chain")
    return parser


def _history_path(state: str) -> Path:
    from chainvigil.service import HISTORY_FILE, STATE_DIR_NAME

    path = Path(state)
    if path.is_dir():
        for candidate in (path / HISTORY_FILE, path / STATE_DIR_NAME / HISTORY_FILE):
            if candidate.is_file():
                return candidate
        raise SystemExit(f"chainvigil: {state}: no {HISTORY_FILE} here (give the state folder, e.g. ROOT/.chainvigil)")
    if not path.is_file():
        raise SystemExit(f"chainvigil: {state}: no such file or folder")
    return path


def _open_history(state: str):
    from chainvigil.storage.history import History

    path = _history_path(state)
    try:
        return History(path, readonly=True)
    except Exception as err:  # a file that is not our history: say so, no traceback
        raise SystemExit(f"chainvigil: {path}: not a chainvigil history ({err})")


def _clean(value):
    """JSON cannot hold NaN or infinities: they become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def _f(value, spec: str) -> str:
    """A number for the text output; a missing one (not defined yet) shows as a dash."""
    return "—" if value is None else format(value, spec)


def _dump(obj) -> str:
    return json.dumps(_clean(obj), indent=2, allow_nan=False)


# ---------------------------------------------------------------------- commands
def cmd_watch(args) -> int:
    from chainvigil.service import Service, ServiceError

    try:
        service = Service(args.root, args.state, every=args.every, poll=args.poll,
                          targets=_targets_from(args), on_enough=args.on_enough,
                          report=(lambda line: print(line, flush=True)) if args.headless else None,
                          signal_enough=not args.no_signal)
    except (ServiceError, ValueError) as err:
        print(f"chainvigil: {err}", file=sys.stderr)
        return 2
    if args.headless:
        def _stop(signum, frame):
            service.stop()
        signal.signal(signal.SIGINT, _stop)
        signal.signal(signal.SIGTERM, _stop)
        print(f"chainvigil: watching {service.root} (state in {service.state_dir}); Ctrl-C stops", flush=True)
        service.run(duration=args.seconds)
        return 0
    run_with_screen(service, args.seconds)
    return 0


def run_with_screen(service, seconds=None):
    """The service in a background thread, the screen in this one (it reads the same history)."""
    from chainvigil.service import HISTORY_FILE
    from chainvigil.tui import run_viewer

    worker = threading.Thread(target=service.run, kwargs={"duration": seconds}, daemon=True,
                              name="chainvigil-service")
    worker.start()
    try:
        run_viewer(service.state_dir / HISTORY_FILE, live=True)
    finally:
        service.stop()
        worker.join(timeout=60)


def cmd_view(args) -> int:
    from chainvigil.tui import run_viewer

    run_viewer(_history_path(args.state), live=True, refresh=args.refresh)
    return 0


def cmd_score(args) -> int:
    from chainvigil.oneshot import read_run_folder, score_chains
    from chainvigil.problems import InputProblem
    from chainvigil.verdict import Targets

    try:
        chains, info, problems = read_run_folder(args.run_dir)
        targets = Targets.from_sources(None, info.get("targets"), _targets_from(args))
        scores = score_chains(chains, info, run=Path(args.run_dir).resolve().name, targets=targets)
    except (InputProblem, ValueError) as err:
        print(f"chainvigil: {err}", file=sys.stderr)
        return 2
    for problem in problems:
        print(f"chainvigil: warning: {problem}", file=sys.stderr)
    data = scores.to_dict()
    if args.json:
        print(_dump(score_record(data)))
        return 0
    from chainvigil.verdict import describe

    loo, waic, k = data["loo"], data["waic"], data["pareto_k"]
    print(f"run {data['run']}: {data['chains']} chains, {data['draws']:,} draws, {data['observations']:,} observations")
    print(f"  PSIS-LOO elpd {_f(loo['elpd'], '.2f')}  SE {_f(loo['se'], '.2f')}  MCSE {_f(loo['mcse'], '.3f')}"
          f"  p_eff {_f(loo['p_eff'], '.2f')}")
    print(f"  WAIC     elpd {_f(waic['elpd'], '.2f')}  SE {_f(waic['se'], '.2f')}  p_eff {_f(waic['p_eff'], '.2f')}")
    print(f"  Pareto k-hat: worst {_f(k['max'], '.2f')}, {k['above']} above {_f(k['threshold'], '.2f')}")
    if data["mixing"]:
        m = data["mixing"]
        print(f"  mixing: worst R-hat {_f(m['rhat_max'], '.3f')}, bulk-ESS {_f(m['ess_bulk_min'], ',.0f')}, "
              f"tail-ESS {_f(m['ess_tail_min'], ',.0f')}")
    print(f"  verdict: {describe(data['verdict'])}")
    return 0



def score_record(data: dict) -> dict:
    """``score --json``: the scores' JSON shape plus ``schema`` and the 1-based observation numbers
    above the k-hat threshold (``pareto_k.above_observations`` stays 0-based; fields are only added)."""
    from chainvigil.storage.history import JSON_SCHEMA

    record = {"schema": JSON_SCHEMA, **data}
    k = dict(record["pareto_k"])
    k["above_observations_1based"] = [i + 1 for i in k.get("above_observations") or []]
    record["pareto_k"] = k
    return record


def cmd_history(args) -> int:
    """``history``: every snapshot as JSON records (the keys of ``score --json``, with ``schema``) or
    CSV (an ISO 8601 UTC ``time_iso`` beside the raw unix ``time``; floats rounded to what each
    estimate supports).  Both are made from the one column spec ``SNAPSHOT_COLUMNS``."""
    from chainvigil.storage.history import csv_columns, csv_row, snapshot_record

    history = _open_history(args.state)
    if args.run and history.run(args.run) is None:
        print(f"chainvigil: no run named '{args.run}' in this history", file=sys.stderr)
        return 2
    rows = history.snapshots(run=args.run)
    if args.csv:
        writer = csv.writer(sys.stdout)
        writer.writerow(csv_columns())
        for row in rows:
            writer.writerow(csv_row(row))
        return 0
    print(_dump([snapshot_record(r) for r in rows]))
    return 0


def cmd_events(args) -> int:
    history = _open_history(args.state)
    rows = history.events(run=args.run) if args.run else history.events()
    if args.json:
        print(_dump(rows))
        return 0
    import time as _time

    for row in rows:
        stamp = _time.strftime("%Y-%m-%d %H:%M:%S", _time.localtime(row["time"]))
        where = f" [{row['run']}]" if row.get("run") else ""
        print(f"{stamp} {row['level']:<7} {row['kind']}{where}: {row['message']}")
    return 0


def cmd_demo(args) -> int:
    from chainvigil.demo import run_demo

    return run_demo(headless=args.headless, seconds=args.seconds, root=args.root, pace=args.pace)


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] == "simulate":
        from chainvigil.simulated_chains import cli_main

        return cli_main(argv[1:]) or 0
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return 2
    handler = {"watch": cmd_watch, "view": cmd_view, "score": cmd_score, "history": cmd_history,
               "events": cmd_events, "demo": cmd_demo}[args.command]
    return handler(args)


if __name__ == "__main__":
    sys.exit(main())
