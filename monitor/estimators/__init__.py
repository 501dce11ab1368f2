"""Pure numerics for chainvigil (numpy/scipy only, no I/O).

Public API: :func:`waic`, :func:`psis_loo`, :func:`psis`, :func:`gpd_fit`, :func:`gpd_quantile`,
:func:`fit_generalized_pareto`, :func:`aic`, :func:`dic`, :class:`Scores`, :func:`batch_scores`,
:class:`StreamingScorer`, :class:`ShardedScorer` (the same state split into observation shards,
run on a thread pool or a Dask cluster), and from :mod:`.mixing` and :mod:`.compare` the mixing diagnostics
(:func:`split_rhat`, :func:`ess_bulk`, :func:`ess_tail`, :func:`mcse_of_mean`, :func:`mixing_summary`,
:func:`relative_efficiency`), the comparison of runs (:func:`compare_runs`, :func:`stacking_weights`)
and, from :mod:`.refit`, exact LOO / K-fold from refits (:func:`exact_elpd`, :func:`combine_pointwise`, :func:`combine_run`,
:func:`kfold_elpd`, :func:`kfold_plan`, :func:`refit_request`).
"""

from .compare import compare_runs, stacking_weights
from .information import aic, dic
from .loo import psis_loo
from .mixing import (ess_bulk, ess_tail, finite_relative_efficiency, mcse_of_mean, mixing_summary,
                     relative_efficiency, split_rhat)
from .pareto import fit_generalized_pareto, gpd_fit, gpd_quantile
from .psis import psis, sample_size_threshold, tail_length
from .refit import combine_pointwise, combine_run, exact_elpd, kfold_elpd, kfold_plan, refit_request
from .scores import Scores, batch_scores
from .sharded import ShardedScorer
from .streaming import StreamingScorer
from .subsample import SubsampledScorer, subsampled_elpd
from .waic import waic

__all__ = [
    "aic", "dic", "psis_loo", "psis", "tail_length", "sample_size_threshold", "gpd_fit",
    "gpd_quantile", "fit_generalized_pareto", "Scores", "batch_scores", "StreamingScorer", "ShardedScorer",
    "SubsampledScorer", "subsampled_elpd", "waic",
    "split_rhat", "ess_bulk", "ess_tail", "mcse_of_mean", "mixing_summary", "relative_efficiency",
    "finite_relative_efficiency",
    "compare_runs", "stacking_weights",
    "exact_elpd", "combine_pointwise", "combine_run", "kfold_elpd", "kfold_plan", "refit_request",
]
