"""The ``chainvigil`` command line."""
from __future__ import annotations

import argparse
import csv
import json
import math
import signal
import sys
from pathlib import Path

DESCRIPTION = """\
chainvigil watches folders where MCMC samplers write their draws, keeps WAIC, PSIS-LOO (with Pareto
k-hat), R-hat, ESS and Monte Carlo errors up to date as draws arrive, records every update in a SQLite
history, and says when enough draws have been collected. "draws/chain" in its output is the draw
count of the shortest chain. Every command has its own --help with examples."""

EPILOG = """\
examples:
  chainvigil watch runs/                 service and live screen on the folder runs/
  chainvigil watch runs/ --headless      service only, one line per update (e.g. over ssh)
  chainvigil view runs/.chainvigil       the screen on a history, live or after the run
  chainvigil score runs/model-a --json   one-shot scores of one run folder
  chainvigil history runs/.chainvigil --csv > trail.csv
  chainvigil compare runs/.chainvigil    how the runs on the same data set compare
  chainvigil report runs/.chainvigil -o report.html   one HTML file about every run
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
    group.add_argument("--min-draws-per-chain", type=float, metavar="N",
                       help="no 'enough' before this many draws per chain, the stopping rule's floor "
                            "(default 200; see docs/verdict.md)")


def _read_flags(parser):
    group = parser.add_argument_group(
        "reading the chains", "Defaults for every run: a run's run.json keys loglik, warmup, thin, params "
        "and ignore override them, and a run keeps the options its first draws were read with.")
    group.add_argument("--loglik", metavar="NAME",
                       help="name of the log-likelihood columns NAME[i] / NAME.i / NAME_i, or of the NPZ "
                            "array (default loglik)")
    group.add_argument("--warmup", type=int, metavar="N",
                       help="the first N draws of every chain are warm-up: stored, left out of every score "
                            "(default 0)")
    group.add_argument("--thin", type=int, metavar="K",
                       help="keep every K-th draw after warm-up (default 1: all)")
    group.add_argument("--params", action="append", metavar="GLOB",
                       help="columns that are parameters (a pattern like 'beta*'; repeatable; default: all "
                            "but draw, the log-likelihood and names ending in __)")
    group.add_argument("--ignore", action="append", metavar="GLOB",
                       help="columns that are never parameters (e.g. 'y_rep*'; repeatable)")


def _read_defaults_from(args):
    """The read options given on the command line (ValueError naming the flag when unusable)."""
    from chainvigil.readers import ReadOptions

    fields = {}
    for key in ("loglik", "warmup", "thin"):
        if getattr(args, key, None) is not None:
            fields[key] = getattr(args, key)
    if getattr(args, "params", None):
        fields["params"] = tuple(args.params)
    if getattr(args, "ignore", None):
        fields["ignore"] = tuple(args.ignore)
    try:
        return ReadOptions(**fields)
    except ValueError as err:
        raise ValueError(str(err).replace("'", "--", 1).replace("'", "", 1)) from None


# command-line flag (argparse dest) -> verdict target key
FLAG_TARGETS = {
    "rhat_max": "rhat_max",
    "ess_bulk_per_chain": "ess_bulk_min_per_chain",
    "ess_tail_per_chain": "ess_tail_min_per_chain",
    "mcse_elpd_max": "mcse_elpd_max",
    "min_draws_per_chain": "min_draws_per_chain",
}


def _targets_from(args) -> dict:
    out = {}
    for flag, key in FLAG_TARGETS.items():
        value = getattr(args, flag, None)
        if value is not None:
            out[key] = value
    return out


def _sub(sub, name: str, help: str, description: str, examples: list[tuple[str, str]], **kw):
    """A subcommand whose --help says what it is for and shows examples."""
    width = max(len(cmd) for cmd, _ in examples)
    epilog = "examples:\n" + "\n".join(f"  {cmd:<{width}}  {what}" if what else f"  {cmd}"
                                        for cmd, what in examples)
    import textwrap

    return sub.add_parser(name, help=help, description=textwrap.fill(description, 100), epilog=epilog,
                          formatter_class=argparse.RawDescriptionHelpFormatter, **kw)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="chainvigil", description=DESCRIPTION, epilog=EPILOG,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    watch = _sub(sub, "watch", "watch a root folder of runs (service and screen)",
                 "Watch ROOT, which holds one folder per run, and keep the scores up to date as the samplers "
                 "write: every update is recorded in ROOT/.chainvigil/history.sqlite, ENOUGH.json is written "
                 "into a run folder once it has enough draws, and the live screen shows it all (or, with "
                 "--headless, one line per update).",
                 [("chainvigil watch runs/", "service and live screen on the folder runs/"),
                  ("chainvigil watch runs/ --headless --poll", "service only, polling (e.g. over ssh, NFS)"),
                  ("chainvigil watch runs/ --loglik log_lik --warmup 1000", "log_lik.1.. columns, 1000 warm-up draws")])
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
    watch.add_argument("--durable", action="store_true",
                       help="fsync the draw store before each commit, so a power loss loses nothing "
                            "committed (slower ingest; see the README)")
    watch.add_argument("--keep-draws", choices=("all", "tail", "none"), default="all",
                       help="which stored log-likelihood draws to keep (default all). all: every draw "
                            "(8 bytes per draw per observation on disk; every score exact). tail: once a "
                            "checkpoint covers them, drop all but the last 512 draws per chain; the PSIS "
                            "tail buffer is sized from run.json draws_expected for r_eff >= 0.1 and is "
                            "flagged when too small; the joint MCSE comes from the kept window. none: keep "
                            "no log-likelihood draws once checkpointed; the joint MCSE is not recomputed. "
                            "Parameter draws are always kept (see the README)")
    watch.add_argument("--on-refits", metavar="CMD",
                       help="command to run each time a run's REFITS.json is written (observations with "
                            "k-hat above 0.7 to refit); split like a shell would, run without a shell; it "
                            "gets CHAINVIGIL_REFITS (the file), CHAINVIGIL_RUN, CHAINVIGIL_FOLDER, "
                            "CHAINVIGIL_STATE (e.g. --on-refits 'python -m chainvigil.simulated_chains.refit')")
    watch.add_argument("--no-refits", action="store_true", help="do not write REFITS.json into run folders")
    # the default is chainvigil.longrun.TAIL_LAG (not imported here: --help stays quick; a test
    # checks that the number below is that constant)
    watch.add_argument("--tail-lag", type=float, metavar="F",
                       help="reuse an observation's PSIS tail fit in live updates until the draws that "
                            "entered its tail since exceed this fraction of the tail (default 0.05: the "
                            "cost per update stays flat over long runs, and the elpd moves far less than "
                            "its MCSE; 0: refit every changed tail at every update). The last update of "
                            "a clean stop is always exact")
    watch.add_argument("--seconds", type=float, metavar="S", help="stop after S seconds (default: until stopped)")
    watch.add_argument("--cluster", metavar="ADDRESS",
                       help="score on the Dask cluster at ADDRESS (e.g. tcp://10.0.0.5:8786; needs "
                            "chainvigil[cluster]); the history stays in this process")
    watch.add_argument("--shards", type=int, default=0, metavar="K",
                       help="with --cluster: observation shards per run (default: one per worker thread)")
    watch.add_argument("--subsample", type=int, metavar="M",
                       help="score every run with more than M observations from a random subsample of M "
                            "of them: exact PSIS-LOO there, cheap running moments for all; the estimate "
                            "gets a sampling SE, included in its MCSE (default: only runs above "
                            "--subsample-above, with M = 2000)")
    watch.add_argument("--subsample-above", type=int, default=200_000, metavar="N",
                       help="without --subsample: runs with more than N observations are scored from a "
                            "random subsample of 2000 (default 200000; 0: never)")
    _target_flags(watch)
    _read_flags(watch)

    view = _sub(sub, "view", "the screen on a history, live or after the run",
                "Open the terminal screen on a recorded history: runs, scores against draws, k-hat by "
                "observation, mixing, verdict and comparison. It only reads the SQLite file, so it can "
                "come and go while a service writes it. Needs a terminal.",
                [("chainvigil view runs/.chainvigil", "the history the service keeps for runs/")])
    view.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    view.add_argument("--refresh", type=float, default=1.0, metavar="SECONDS", help="poll interval (default 1)")

    score = _sub(sub, "score", "one-shot scores of a run folder",
                 "Read every draw of RUN_DIR and print its scores and verdict (nothing is written). "
                 "\"draws/chain\" in the output is the shortest chain's draw count.",
                 [("chainvigil score runs/hill-model", "a short text summary"),
                  ("chainvigil score runs/hill-model --json", "every figure as JSON"),
                  ("chainvigil score runs/hill-model --warmup 500", "the first 500 draws of each chain left out")])
    score.add_argument("run_dir", metavar="RUN_DIR")
    score.add_argument("--json", action="store_true", help="print JSON (default: a short text summary)")
    _target_flags(score)
    _read_flags(score)

    history = _sub(sub, "history", "the recorded snapshots of a history",
                   "Print every recorded update (snapshot) of a history, oldest first, for your own "
                   "plots or scripts.",
                   [("chainvigil history runs/.chainvigil --json", "a JSON array"),
                    ("chainvigil history runs/.chainvigil --csv --run hill-model > hill.csv", "one run as CSV")])
    history.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    fmt = history.add_mutually_exclusive_group()
    fmt.add_argument("--json", action="store_true", help="a JSON array, oldest first (default)")
    fmt.add_argument("--csv", action="store_true", help="CSV, one row per snapshot")
    history.add_argument("--run", metavar="NAME", help="only this run")

    events = _sub(sub, "events", "warnings and rejected input recorded in a history",
                  "Print the events of a history: rejected input (naming the file and the problem), "
                  "warnings, runs appearing, verdicts reached.",
                  [("chainvigil events runs/.chainvigil", "one line each"),
                   ("chainvigil events runs/.chainvigil --json --run hill-model", "one run, as JSON")])
    events.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    events.add_argument("--json", action="store_true", help="a JSON array (default: one line each)")
    events.add_argument("--run", metavar="NAME", help="only this run")

    compare = _sub(sub, "compare", "the comparison of runs on the same data set",
                   "Print, per data set, how the runs compare: Δelpd (signed; against the best run or the "
                   "run chosen with --run), SE(Δ), MCSE(Δ), stacking weight, and whether more draws could "
                   "still swap the order (|Δ| < 2·MCSE(Δ)). Taken from the comparisons the service "
                   "recorded: the latest, or the one in force at --at TIME.",
                   [("chainvigil compare runs/.chainvigil", "one line per pair"),
                    ("chainvigil compare runs/.chainvigil --run hill-model --json", "Δ against hill-model"),
                    ("chainvigil compare runs/.chainvigil --at 2026-12-03T08:00 --csv", "as it stood then"),
                    ("chainvigil compare runs/.chainvigil --at 1796284800", "the same with unix seconds")])
    compare.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    cfmt = compare.add_mutually_exclusive_group()
    cfmt.add_argument("--json", action="store_true", help="JSON: one object per data set")
    cfmt.add_argument("--csv", action="store_true", help="CSV: one row per data set and run")
    compare.add_argument("--at", metavar="TIME",
                         help="the comparison in force at TIME: ISO 8601 (local time unless it names a "
                              "zone, e.g. 2026-12-03T08:00 or 2026-12-03T08:00Z) or unix seconds")
    compare.add_argument("--run", metavar="NAME", help="measure Δelpd against this run instead of the best")

    report = _sub(sub, "report", "one self-contained HTML file about every run of a history",
                  "Write one HTML file (no network needed to open it; figures are inline SVG) with, per "
                  "data set, the comparison, and per run the headline figures, the verdict with each "
                  "check, elpd and MCSE against draws, k-hat by observation with the worst ones by label, "
                  "and the mixing table. Needs matplotlib: pip install 'chainvigil[report]'.",
                  [("chainvigil report runs/.chainvigil", "writes chainvigil-report.html here"),
                   ("chainvigil report runs/.chainvigil -o ~/hill-report.html", "")])
    report.add_argument("state", metavar="STATE", help="state folder or its history.sqlite")
    report.add_argument("-o", "--output", metavar="FILE", default="chainvigil-report.html",
                        help="the HTML file to write (default chainvigil-report.html)")

    prune = _sub(sub, "prune", "free the disk that finished runs' stored log-likelihoods take",
                 "Delete the stored pointwise log-likelihood draws (8 bytes per draw per observation) of "
                 "runs whose state is finished or enough and whose checkpoint covers every committed "
                 "draw. Kept: parameter draws, draw numbers, the checkpoint and the whole history, so "
                 "the screen, history, compare and report work as before and a restart needs no "
                 "re-stream. Lost: rebuilding the scores from the draws, and adding draws to that run. "
                 "Stop the service first (prune takes the state folder's lock).",
                 [("chainvigil prune runs/.chainvigil", "every finished run"),
                  ("chainvigil prune runs/.chainvigil --run hill-model", "one run")])
    prune.add_argument("state", metavar="STATE", help="the state folder")
    prune.add_argument("--run", metavar="NAME", help="only this run")

    sub.add_parser("simulate", help="start simulated samplers writing run folders (see simulate --help)",
                   add_help=False)

    demo = _sub(sub, "demo", "simulated samplers, the service and the screen, in one go",
                "Start simulated samplers for three invented models of one data set, watch them with the "
                "service and show the live screen (or, with --headless, print the updates and the final "
                "verdicts). The runs and their history are kept for review afterwards.",
                [("chainvigil demo", "the live screen; q quits"),
                 ("chainvigil demo --headless --seconds 20 --root cv-demo", "no screen, 20 s, runs in cv-demo/")])
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
    from chainvigil.storage.history import HistoryReader

    path = _history_path(state)
    try:
        return HistoryReader(path)
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
    from chainvigil.console import line_printer
    from chainvigil.service import Service, ServiceError

    holder = []  # the service, for the printer to stop it when stdout is closed
    cluster = None
    if args.shards and not args.cluster:
        print("chainvigil: --shards needs --cluster", file=sys.stderr)
        return 2
    try:
        if args.cluster:
            from chainvigil.cluster import ClusterScoring

            cluster = ClusterScoring(args.cluster, args.shards)
        service = Service(args.root, args.state, every=args.every, poll=args.poll,
                          targets=_targets_from(args), on_enough=args.on_enough,
                          report=line_printer(lambda: holder and holder[0].stop()) if args.headless else None,
                          signal_enough=not args.no_signal, read_defaults=_read_defaults_from(args), durable=args.durable,
                          scorer_factory=cluster.scorer_factory if cluster else None,
                          on_refits=args.on_refits, write_refits=not args.no_refits,
                          keep_draws=args.keep_draws,
                          **({} if args.tail_lag is None else {"tail_lag": args.tail_lag}),
                          subsample=args.subsample, subsample_above=args.subsample_above)
    except (ServiceError, ValueError, ImportError, OSError) as err:
        print(f"chainvigil: {err}", file=sys.stderr)
        if cluster is not None:
            cluster.close()
        return 2
    holder.append(service)
    try:
        return _run_watch(service, args, cluster)
    finally:
        if cluster is not None:
            cluster.close()


def _run_watch(service, args, cluster) -> int:
    if cluster is not None:
        print(f"chainvigil: {cluster.describe()}", flush=True)
    if args.headless:
        def _stop(signum, frame):
            service.stop()
        signal.signal(signal.SIGINT, _stop)
        signal.signal(signal.SIGTERM, _stop)
        print(f"chainvigil: watching {service.root} (state in {service.state_dir}); Ctrl-C stops", flush=True)
        service.run(duration=args.seconds)
        return 0
    from chainvigil.console import run_with_screen

    run_with_screen(service, args.seconds)
    return 0


def cmd_view(args) -> int:
    from chainvigil.tui import run_viewer

    run_viewer(_history_path(args.state), live=True, refresh=args.refresh)
    return 0


def cmd_score(args) -> int:
    from chainvigil.oneshot import read_run_folder, score_chains
    from chainvigil.problems import InputProblem
    from chainvigil.verdict import Targets

    warmup: dict = {}
    try:
        chains, info, problems = read_run_folder(args.run_dir, read_defaults=_read_defaults_from(args),
                                                 warmup_out=warmup)
        targets = Targets.from_sources(None, info.get("targets"), _targets_from(args))
        scores = score_chains(chains, info, run=Path(args.run_dir).resolve().name, targets=targets)
    except (InputProblem, ValueError) as err:
        print(f"chainvigil: {err}", file=sys.stderr)
        return 2
    for problem in problems:
        print(f"chainvigil: warning: {problem}", file=sys.stderr)
    data = scores.to_dict()
    left_out = {c: warmup.get(c, 0) for c in sorted(chains)}
    if args.json:
        print(_dump({**score_record(data), "warmup": {"draws": sum(left_out.values()), "per_chain": left_out}}))
        return 0
    from chainvigil.verdict import describe

    loo, waic, k = data["loo"], data["waic"], data["pareto_k"]
    print(f"run {data['run']}: {data['chains']} chains, {data['draws']:,} draws, {data['observations']:,} observations"
          + (f" ({sum(left_out.values()):,} warm-up draws left out)" if any(left_out.values()) else ""))
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


def cmd_prune(args) -> int:
    """``prune``: drop finished runs' stored log-likelihoods, holding the state folder's lock."""
    import fcntl
    from pathlib import Path

    from chainvigil.longrun import prune_runs

    state = Path(args.state)
    if not (state / "history.sqlite").is_file():
        print(f"chainvigil: {state}: not a state folder (no history.sqlite)", file=sys.stderr)
        return 2
    with open(state / "service.lock", "a+") as lock:
        try:
            fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            print(f"chainvigil: {state}: a service is using this state folder; stop it first",
                  file=sys.stderr)
            return 2
        results = prune_runs(state, args.run)
    if args.run and not results:
        print(f"chainvigil: no run named '{args.run}' in this history", file=sys.stderr)
        return 2
    total = 0
    for r in results:
        if r["pruned"]:
            total += r["freed"]
            print(f"{r['run']}: freed {r['freed'] / 1e6:,.1f} MB of stored log-likelihoods")
        else:
            print(f"{r['run']}: kept ({r['reason']})")
    print(f"freed {total / 1e6:,.1f} MB in all")
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
        from chainvigil.reports import escape_text

        where = escape_text(where)
        print(f"{stamp} {row['level']:<7} {row['kind']}{where}: {escape_text(row['message'])}")
    return 0


def parse_time(text: str) -> float:
    """``--at``: unix seconds, or ISO 8601 (local time unless it names a zone); unix seconds out."""
    from datetime import datetime

    try:
        return float(text)
    except ValueError:
        pass
    try:
        return datetime.fromisoformat(text.strip()).timestamp()
    except ValueError:
        raise SystemExit(f"chainvigil: --at {text!r}: not a time (give ISO 8601 such as "
                         f"2026-12-03T08:00 or 2026-12-03T08:00Z, or unix seconds)") from None


COMPARE_CSV_COLUMNS = ("dataset", "round", "time", "against", "run", "rank", "elpd", "delta", "se_delta",
                       "mcse_delta", "weight", "could_swap", "caution")


def cmd_compare(args) -> int:
    from chainvigil.compare_text import comparison_records, comparison_text, local_time

    at = parse_time(args.at) if args.at is not None else None
    history = _open_history(args.state)
    try:
        records = comparison_records(history, at_time=at, against=args.run)
    except LookupError:
        print(f"chainvigil: no run named '{args.run}' in the comparison"
              f"{'' if at is None else ' at ' + local_time(at)}", file=sys.stderr)
        return 2
    if args.json:
        print(_dump({"at": at, "datasets": records}))
        return 0
    if args.csv:
        writer = csv.writer(sys.stdout)
        writer.writerow(COMPARE_CSV_COLUMNS)
        for rec in records:
            for r in rec["runs"]:
                row = {**r, "dataset": rec["dataset"], "round": rec["round"], "time": rec["time"],
                       "against": rec["against"], "could_swap": int(r["could_swap"]),
                       "caution": int(r["caution"])}
                writer.writerow(["" if row.get(c) is None else row[c] for c in COMPARE_CSV_COLUMNS])
        return 0
    if not records:
        when = "yet" if at is None else f"at or before {local_time(at)}"
        print(f"no comparison recorded {when} (runs are compared when their run.json names the same "
              "dataset and they have the same number of observations)")
        return 0
    for line in comparison_text(records):
        print(line)
    return 0


def cmd_report(args) -> int:
    from chainvigil.report import ReportError, write_report

    history = _open_history(args.state)
    try:
        path = write_report(history, args.output, source=str(_history_path(args.state)),
                            progress=lambda line: print(f"chainvigil report: {line}", file=sys.stderr,
                                                        flush=True))
    except ReportError as err:
        print(f"chainvigil: {err}", file=sys.stderr)
        return 2
    print(f"wrote {path}")
    return 0


def cmd_demo(args) -> int:
    from chainvigil.demo import run_demo

    return run_demo(headless=args.headless, seconds=args.seconds, root=args.root, pace=args.pace)


#: exit status after the reader of stdout went away (as a shell reports a process ended by SIGPIPE)
EXIT_CLOSED_PIPE = 128 + 13


def main(argv=None) -> int:
    """Run one command; a reader that closes the pipe early (``| head``) ends it quietly."""
    try:
        try:
            code = _dispatch(argv)
        except SystemExit:  # --help and usage errors: their text must reach the pipe too
            sys.stdout.flush()
            raise
        sys.stdout.flush()
        return code
    except BrokenPipeError:
        from chainvigil.console import silence_stdout

        silence_stdout()
        return EXIT_CLOSED_PIPE


def _dispatch(argv=None) -> int:
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
               "events": cmd_events, "compare": cmd_compare, "report": cmd_report,
               "demo": cmd_demo, "prune": cmd_prune}[args.command]
    return handler(args)


if __name__ == "__main__":
    sys.exit(main())
