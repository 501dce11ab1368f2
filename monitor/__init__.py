"""chainvigil: streaming diagnostics for long MCMC runs.

The public API for samplers and scripts:

- :class:`ChainWriter`, :func:`write_run_info`, :func:`enough_signalled` (feeding a run folder),
- :func:`batch_scores`, :class:`StreamingScorer`, :class:`Scores` (the scores themselves).

Everything else lives in the subpackages: ``chainvigil.estimators`` (pure numerics),
``chainvigil.storage`` (draw store and history), ``chainvigil.tui`` (the screen) and
``chainvigil.simulated_chains`` (demo samplers).
"""
from __future__ import annotations

__all__ = ["ChainWriter", "write_run_info", "enough_signalled", "batch_scores", "StreamingScorer", "Scores"]

_HOMES = {
    "ChainWriter": "chainvigil.writer", "write_run_info": "chainvigil.writer",
    "enough_signalled": "chainvigil.writer",
    "batch_scores": "chainvigil.estimators", "StreamingScorer": "chainvigil.estimators",
    "Scores": "chainvigil.estimators",
}


def __getattr__(name):
    # Lazy, so that `import chainvigil.estimators` does not pull in the writer (and the reverse).
    if name in _HOMES:
        import importlib
        return getattr(importlib.import_module(_HOMES[name]), name)
    raise AttributeError(f"module 'chainvigil' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
