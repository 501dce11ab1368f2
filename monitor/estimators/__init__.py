"""Pure numerics for chainvigil (numpy/scipy only, no I/O).

Public API: :func:`waic`, :func:`psis_loo`, :func:`psis`, :func:`gpd_fit`, :func:`gpd_quantile`,
:func:`fit_generalized_pareto`, :func:`aic`, :func:`dic`, :class:`Scores`, :func:`batch_scores`,
:class:`StreamingScorer`; mixing diagnostics and comparisons live in :mod:`.mixing` and
:mod:`.compare`.
"""

from .information import aic, dic
from .loo import psis_loo
from .pareto import fit_generalized_pareto, gpd_fit, gpd_quantile
from .psis import psis, sample_size_threshold, tail_length
from .scores import Scores, batch_scores
from .streaming import StreamingScorer
from .waic import waic

__all__ = [
    "aic", "dic", "psis_loo", "psis", "tail_length", "sample_size_threshold", "gpd_fit",
    "gpd_quantile", "fit_generalized_pareto", "Scores", "batch_scores", "StreamingScorer", "waic",
]
