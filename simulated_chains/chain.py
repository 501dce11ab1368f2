"""One simulated chain: the body of each sampler process.

``python -m chainvigil.simulated_chains.chain MODEL RUN_DIR --chain K ...`` runs chain K of MODEL and writes its
draws into RUN_DIR through :class:`chainvigil.writer.ChainWriter`, a block at a time, at a set pace, until
the draw count is reached, ``ENOUGH.json`` appears in RUN_DIR, or the process gets SIGTERM/SIGINT.
With ``--held-out 5,18`` it is a refit: the model is fitted without those observations (1-based) and
the chain writes log p(y_i | theta) of exactly those, in that order, as its log-likelihood columns.
:func:`chainvigil.simulated_chains.launch` starts these processes; :func:`run_chain` is the same loop in-process.
"""

from __future__ import annotations

import argparse
import signal
import sys
import time
import zlib

import numpy as np

from chainvigil.writer import ChainWriter, enough_signalled

from .catalog import get_model

BLOCK_SECONDS = 0.5  # a paced chain emits one block about every half second
UNPACED_BLOCK_VALUES = 2_000_000  # unpaced: blocks of at most this many log-likelihood values


def chain_name(index: int) -> str:
    """File stem / chunk folder of chain ``index`` (0-based): ``chain-1``, ``chain-2``, ..."""
    return f"chain-{index + 1}"


def chain_rng(seed: int, model_name: str, index: int, held_out=()) -> np.random.Generator:
    """The random stream of one chain: a function of the user's seed, the model and the chain only
    (and, for a refit, of its held-out observations, so refits do not share streams)."""
    words = [int(seed), zlib.crc32(model_name.encode()), int(index)]
    if held_out:
        words.append(zlib.crc32(",".join(str(int(i)) for i in held_out).encode()))
    return np.random.default_rng(np.random.SeedSequence(words))


class _Stop:
    """Set by SIGTERM / SIGINT so the loop ends after the current draw instead of mid-write."""

    requested = False

    @classmethod
    def install(cls):
        def handler(signum, frame):
            cls.requested = True

        signal.signal(signal.SIGTERM, handler)
        signal.signal(signal.SIGINT, handler)


def run_chain(model_name: str, run_dir, index: int, *, pace: float, draws: int, seed: int,
              fmt: str = "npz", warmup: int | None = None, keep_warmup: bool = False,
              block_seconds: float = BLOCK_SECONDS, held_out=None) -> dict:
    """Run one chain and write it to ``run_dir``; returns a summary dict.

    ``pace``: draws per second (``0`` = as fast as the sampler goes). ``draws``: draws written after
    warm-up. ``warmup``: transitions before those (default: the model's own); they are computed
    unpaced and not written unless ``keep_warmup``, in which case they are written (and paced) like
    the rest and come first. The stop signal is polled before each block and while waiting.
    ``held_out``: 1-based observations of a refit (the model is fitted without them and the chain
    writes their log-likelihood only, in this order).
    """
    model = get_model(model_name)
    held = [int(i) for i in held_out] if held_out else []
    if held:
        model = model.refit([i - 1 for i in held])
    W = model.warmup if warmup is None else int(warmup)
    rng = chain_rng(seed, model.name, index, held)
    sampler = model.sampler(rng, model.initial(rng))
    n, p = model.written_n, model.n_params
    t0 = time.monotonic()
    if not keep_warmup:
        for _ in range(W):
            sampler.step()
        sampler.end_warmup()
        pending_warmup = 0
    else:
        pending_warmup = W
    total = draws + pending_warmup
    if pace > 0:
        block = max(1, round(pace * block_seconds))
    else:
        block = max(1, min(500, UNPACED_BLOCK_VALUES // n))
    done = 0
    why = "draw count reached"
    start = time.monotonic()
    with ChainWriter(run_dir, chain_name(index), param_names=model.param_names, fmt=fmt) as out:
        while done < total:
            if _Stop.requested:
                why = "terminated"
                break
            if enough_signalled(run_dir):
                why = "stop signal (ENOUGH.json)"
                break
            b = min(block, total - done)
            ll = np.empty((b, n))
            pa = np.empty((b, p))
            for i in range(b):
                x = sampler.step()
                if done + i + 1 == pending_warmup:
                    sampler.end_warmup()
                ll[i] = model.written_loglik(x)
                pa[i] = model.output(x)
            done += b
            if pace > 0:
                due = start + done / pace
                while (left := due - time.monotonic()) > 0 and not _Stop.requested:
                    if enough_signalled(run_dir):
                        break
                    time.sleep(min(left, 0.1))
                if _Stop.requested or enough_signalled(run_dir):
                    done -= b  # the block is dropped: the run has been told to stop
                    continue
            out.append(ll, pa)
    return dict(model=model.name, chain=chain_name(index), draws=done, warmup=W, held_out=held,
                acceptance=float(sampler.acceptance), stopped=why,
                seconds=time.monotonic() - t0)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m chainvigil.simulated_chains.chain",
                                 description="Run one simulated chain (normally started by "
                                             "'chainvigil simulate').")
    ap.add_argument("model")
    ap.add_argument("run_dir")
    ap.add_argument("--chain", type=int, required=True, help="0-based chain index")
    ap.add_argument("--pace", type=float, required=True)
    ap.add_argument("--draws", type=int, required=True)
    ap.add_argument("--seed", type=int, required=True)
    ap.add_argument("--format", dest="fmt", choices=("npz", "csv"), default="npz")
    ap.add_argument("--warmup", type=int, default=None)
    ap.add_argument("--keep-warmup", action="store_true")
    ap.add_argument("--held-out", default=None, metavar="I,J",
                    help="a refit without these observations (1-based, comma-separated)")
    a = ap.parse_args(argv)
    held = None
    if a.held_out:
        try:
            held = [int(x) for x in a.held_out.split(",") if x.strip()]
        except ValueError:
            ap.error(f"--held-out must be comma-separated observation numbers, not {a.held_out!r}")
    _Stop.install()
    s = run_chain(a.model, a.run_dir, a.chain, pace=a.pace, draws=a.draws, seed=a.seed, fmt=a.fmt,
                  warmup=a.warmup, keep_warmup=a.keep_warmup, held_out=held)
    what = f" (refit without {len(s['held_out'])} obs)" if s["held_out"] else ""
    print(f"{s['model']}{what} {s['chain']}: {s['draws']} draws after {s['warmup']} warm-up, "
          f"acceptance {s['acceptance']:.2f}, {s['seconds']:.1f} s, {s['stopped']}",
          file=sys.stderr, flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
