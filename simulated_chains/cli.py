"""``chainvigil simulate SCENARIO OUT``: start the simulated samplers of a scenario."""

from __future__ import annotations

import argparse
import sys
import textwrap

from . import launch, stop, wait
from .catalog import SCENARIOS


def _scenario_list() -> str:
    lines = []
    for name, sc in SCENARIOS.items():
        lines.append(f"  {name}  (default pace {sc.pace:g} draws/s, {sc.draws} draws per chain)")
        lines += textwrap.wrap(sc.description, 90, initial_indent="      ", subsequent_indent="      ")
        for m in sc.models:
            lines.append(f"      - {m.name}: {m.description}")
    return "\n".join(lines)


def build_parser(prog: str = "chainvigil simulate") -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog=prog,
        formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Start real MCMC samplers (one process per chain per model) on an invented data "
                    "set. Each model writes a run folder OUT/<model>/ with run.json and its chains, "
                    "block by block at the set pace, until the draw count is reached or ENOUGH.json "
                    "appears in the run folder.",
        epilog="scenarios:\n" + _scenario_list() + "\n\nexamples:\n"
               "  chainvigil simulate tarn-levels /tmp/tarns\n"
               "  chainvigil simulate tarn-levels /tmp/tarns --pace 10 --chains 2 --wait\n"
               "  chainvigil simulate orchard-ledger /tmp/orchard --pace 0 --draws 500 --wait",
    )
    ap.add_argument("scenario", metavar="SCENARIO", help="scenario name (listed below)")
    ap.add_argument("out", metavar="OUT", help="folder to hold the run folders (created if missing)")
    ap.add_argument("--pace", type=float, metavar="DRAWS_PER_S", default=None,
                    help="draws per second per chain (default: the scenario's; 0 = as fast as possible)")
    ap.add_argument("--draws", type=int, metavar="N", default=None,
                    help="draws per chain after warm-up (default: the scenario's)")
    ap.add_argument("--chains", type=int, metavar="C", default=4, help="chains per model (default 4)")
    ap.add_argument("--format", dest="fmt", choices=("npz", "csv"), default="npz",
                    help="NPZ chunk files (default) or one CSV file per chain")
    ap.add_argument("--seed", type=int, metavar="S", default=0,
                    help="seed; the same seed gives the same draws (default 0)")
    ap.add_argument("--models", metavar="M1,M2", default=None,
                    help="only these models of the scenario (comma-separated)")
    ap.add_argument("--warmup", type=int, metavar="N", default=None,
                    help="warm-up transitions per chain (default: each model's own)")
    ap.add_argument("--keep-warmup", action="store_true",
                    help="write the warm-up draws too (paced like the rest)")
    ap.add_argument("--wait", action="store_true",
                    help="stay until every sampler has finished (Ctrl-C stops them)")
    return ap


def main(argv=None, prog: str = "chainvigil simulate") -> int:
    ap = build_parser(prog)
    a = ap.parse_args(argv)
    if a.scenario not in SCENARIOS:
        ap.error(f"unknown scenario {a.scenario!r}; known scenarios: {', '.join(SCENARIOS)}")
    chosen = None if a.models is None else [m.strip() for m in a.models.split(",") if m.strip()]
    try:
        procs = launch(a.scenario, a.out, pace=a.pace, draws=a.draws, chains=a.chains, fmt=a.fmt,
                       seed=a.seed, warmup=a.warmup, keep_warmup=a.keep_warmup, models=chosen)
    except ValueError as exc:
        ap.error(str(exc))
    runs = sorted({p.run_dir for p in procs})
    print(f"started {len(procs)} sampler process(es) for {a.scenario}:")
    for r in runs:
        pids = " ".join(str(p.pid) for p in procs if p.run_dir == r)
        print(f"  {r}  (pids {pids})")
    if not a.wait:
        print("they stop at their draw count, or when ENOUGH.json appears in their run folder")
        return 0
    try:
        codes = wait(procs)
    except KeyboardInterrupt:
        print("stopping the samplers ...", file=sys.stderr)
        stop(procs)
        return 130
    bad = [(p, c) for p, c in zip(procs, codes) if c != 0]
    for p, c in bad:
        print(f"{p.model} chain {p.chain + 1} ended with exit code {c}", file=sys.stderr)
    return 1 if bad else 0
