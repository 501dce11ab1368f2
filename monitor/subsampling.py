"""Subsampled runs in the service: which runs, which observations, and a draw store that keeps only those.

A run with very many observations is scored by :class:`chainvigil.longrun.RunSubsampledScorer`
(exact PSIS-LOO for a simple random sample of m observations, cheap running moments for all n, the
difference estimator with its subsampling SE; ``chainvigil.estimators.subsample``).  This module holds
the service-side pieces (file work, no numerics):

* :func:`subsample_size`: the rule that picks m for a run of n observations (``watch --subsample M``
  and ``--subsample-above N``; docs/architecture.md "Very many observations");
* :class:`SampledStore`: the draw store as the service sees it.  For a subsampled run it keeps the
  log-likelihood columns of the m sampled observations only (8 bytes x m per draw instead of
  8 bytes x n); parameters and draw numbers are kept whole.  Every other run passes through
  unchanged.  Reads of a subsampled run return its m stored columns, in the order of the sample;
* the run's sample is recorded once, when its scorer is made, in ``<state>/subsamples/<run>.json``
  (n, m, seed and the sorted indices; written atomically), so a restart keeps the same sample and
  the same stored columns whatever ``--subsample`` says then.

Restart: the stored columns cannot rebuild the cheap moments of the other n - m observations, so a
subsampled run resumes from its checkpoint only.  When the checkpoint is missing or does not cover
every committed draw (start-up, the restore after a failed pass, a run set aside), the run's draws
are read again from its files: ``chainvigil.scorer_lifecycle`` cuts the store and the commit log of
its chains back to nothing, resets its readers and says so in an event.  A chain whose input was rewritten
(``<chain>~2`` segments) keeps only its newest file's content then.
"""
from __future__ import annotations

import json
import os
import zlib
from pathlib import Path

import numpy as np

from chainvigil.atomic import write_json_atomic

__all__ = ["SUBSAMPLE_ABOVE", "SUBSAMPLE_M", "SUBSAMPLE_DIR", "subsample_size", "run_seed", "SampledStore"]

#: Without ``--subsample``, runs with more observations than this are subsampled ...
SUBSAMPLE_ABOVE = 200_000
#: ... with this many observations scored exactly.
SUBSAMPLE_M = 2_000
SUBSAMPLE_DIR = "subsamples"


def subsample_size(n: int, subsample: int | None, above: int | None) -> int | None:
    """m for a run of n observations, or None (scored in full).

    ``subsample`` (``--subsample M``): every run with more than M observations is subsampled with m = M.
    Without it, runs with more than ``above`` observations (``--subsample-above N``, default
    ``SUBSAMPLE_ABOVE``; 0 or None: never) are subsampled with m = ``SUBSAMPLE_M``.  A run with
    n <= m is always scored in full (m = n would be the full estimate anyway).
    """
    if subsample is not None:
        return int(subsample) if n > int(subsample) else None
    if above and n > int(above) and n > SUBSAMPLE_M:
        return SUBSAMPLE_M
    return None


def run_seed(run: str, seed: int = 0) -> list[int]:
    """The seed of a run's sample: the service's seed and a stable checksum of the run's name."""
    return [int(seed), zlib.crc32(run.encode("utf-8"))]


class SampledStore:
    """A draw store that keeps only the sampled log-likelihood columns of subsampled runs.

    Wraps a ``chainvigil.storage.draws.DrawStore`` (every other method passes through).  ``records``
    is the folder of the sample records (``<state>/subsamples``).
    """

    def __init__(self, store, records):
        self._store = store
        self.records = Path(records)
        self.samples: dict[str, np.ndarray] = {}
        self.info: dict[str, dict] = {}

    def __getattr__(self, name):
        return getattr(self._store, name)

    # ------------------------------------------------------------------ records
    def load_records(self) -> list[str]:
        """Read every recorded sample; returns the problems (one line per unusable record)."""
        problems = []
        if not self.records.is_dir():
            return problems
        for path in sorted(self.records.glob("*.json")):
            try:
                if path.stat().st_size > 64 * 1024 * 1024:
                    raise ValueError("larger than 64 MiB")
                rec = json.loads(path.read_text(encoding="utf-8"))
                sample = np.asarray(rec["sample"], dtype=np.int64)
                n, m = int(rec["n"]), int(rec["m"])
                if (sample.shape != (m,) or not 1 <= m <= n or np.any(np.diff(sample) <= 0)
                        or sample[0] < 0 or sample[-1] >= n):
                    raise ValueError("the sample is not m sorted distinct indices in 0..n-1")
            except (OSError, ValueError, KeyError, TypeError) as err:
                problems.append(f"{path}: unusable sample record ({type(err).__name__}: {err})")
                continue
            run = str(rec.get("run") or path.stem)
            self.samples[run] = sample
            self.info[run] = {"n": n, "m": m, "seed": rec.get("seed")}
        return problems

    def record(self, run: str, n: int, sample: np.ndarray, seed) -> None:
        """Keep (and record) the sample of a run: from now on only its columns are stored."""
        sample = np.asarray(sample, dtype=np.int64)
        write_json_atomic(self.records, f"{run}.json", {"run": run, "n": int(n), "m": int(sample.size),
                                                       "seed": seed, "sample": sample.tolist()})
        self.samples[run] = sample
        self.info[run] = {"n": int(n), "m": int(sample.size), "seed": seed}

    def forget(self, run: str) -> None:
        self.samples.pop(run, None)
        self.info.pop(run, None)
        try:
            os.unlink(self.records / f"{run}.json")
        except FileNotFoundError:
            pass

    def sample(self, run: str) -> np.ndarray | None:
        return self.samples.get(run)

    # ------------------------------------------------------------------ the store
    def stored_columns(self, run: str, loglik):
        """The columns of a (draws, n) block that the store keeps for ``run``."""
        sample = self.samples.get(run)
        if sample is None:
            return loglik
        x = np.asarray(loglik)
        return x[:, sample] if x.ndim == 2 and x.shape[1] == self.info[run]["n"] else x

    def append(self, run, chain, loglik, params=None, draw_ids=None):
        return self._store.append(run, chain, self.stored_columns(run, loglik), params, draw_ids=draw_ids)
