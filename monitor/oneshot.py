"""One-shot batch scoring of a run folder (``chainvigil score RUN_DIR``).

Reads every chain of the folder through the service's own ingest path into memory
(``chainvigil.ingest.read_run_folder``; no state folder, nothing written), with the same read
options as the service (``run.json`` over the command line's ``--loglik/--warmup/--thin/--params/
--ignore``) and each chain's warm-up draws left out, pools all post-warm-up draws for WAIC and
PSIS-LOO exactly as the service does, computes r_eff with the service's streaming estimator over every
post-warm-up draw of each chain (``StreamingRelativeEfficiency``, so ``score --json`` and the service's
last snapshot of the same draws agree), mixing on the chains cut to the shortest chain (as the service
does), and evaluates the verdict with a stability trail made from the
first four fifths of each chain.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from chainvigil import verdict as verdicts
from chainvigil.estimators import batch_scores
from chainvigil.estimators.mixing import mixing_summary
from chainvigil.estimators.reff_stream import StreamingRelativeEfficiency
from chainvigil.ingest import read_run_folder  # noqa: F401  (the one reader of a run folder)


def score_chains(chains: dict, info: dict, *, run: str | None = None, targets=None):
    """Batch scores of already-read chains, the verdict included; returns a `Scores`."""
    names = sorted(chains)
    per_chain = min(chains[c][0].shape[0] for c in names)
    trimmed = np.stack([chains[c][0][:per_chain] for c in names])
    equal = all(chains[c][0].shape[0] == per_chain for c in names)
    # chains kept apart when they can be (the joint MCSE estimates its ESS per chain), else pooled
    pooled = trimmed if equal else np.concatenate([chains[c][0] for c in names])[None]
    r_eff = None
    if per_chain >= 4:  # the service's r_eff: streamed over every draw of each chain
        streaming = StreamingRelativeEfficiency(trimmed.shape[2])
        for c in names:
            streaming.update(c, chains[c][0])
        r_eff = streaming.result()
    param_names = chains[names[0]][2]
    n_params = info.get("n_params") or (len(param_names) if param_names else None)
    scores = batch_scores(pooled, r_eff=r_eff if r_eff is not None else 1.0, n_params=n_params,
                          point_loglik=info.get("point_loglik"), run=run)
    scores.chains = len(names)
    if param_names and per_chain >= 4:
        draws = np.stack([chains[c][1][:per_chain] for c in names])
        scores.mixing = mixing_summary(draws, param_names)
    trail = []
    early = (4 * per_chain) // 5
    if early >= 10:
        early_pooled = np.concatenate([chains[c][0][:early] for c in names])[None]
        early_scores = batch_scores(early_pooled, r_eff=r_eff if r_eff is not None else 1.0).to_dict()
        trail.append({"draws_per_chain": early, "loo_elpd": early_scores["loo"]["elpd"],
                      "loo_mcse": early_scores["loo"]["mcse"], "time": None})
    labels = info.get("observation_labels")
    n = pooled.shape[2]
    if labels and len(labels) != n:
        labels = None
    scores.verdict = verdicts.evaluate(
        scores.to_dict(), trail, chains=len(names), draws_per_chain=per_chain, draw_rate=None,
        targets=targets or verdicts.Targets.from_sources(None, info.get("targets"), None), labels=labels)
    return scores
