"""Scoring on a Dask cluster: the scorer factory behind ``chainvigil watch --cluster ADDRESS``.

The service stays one process: it reads the run folders, appends to the draw store and writes the
history (one SQLite file, written by the service alone). Only the scoring moves: each run gets a
:class:`chainvigil.estimators.ShardedScorer` whose observation shards live on the cluster's workers.
The service sends each new block of draws (cut by shard) to the workers; when a PSIS buffer must
grow, the service rereads the draws from its store and sends them too. So the workers need the same
Python environment with chainvigil installed, and no access to the service's files.

Dask (``distributed``, the optional extra ``chainvigil[cluster]``) is imported only here, and only
when a cluster is asked for.
"""
from __future__ import annotations

__all__ = ["ClusterScoring"]


class ClusterScoring:
    """A connection to a Dask scheduler and the scorer factory that uses it.

    Parameters
    ----------
    address : the scheduler's address (``tcp://host:8786``) or a ``distributed.Client``.
    shards : observation shards per run; 0 (default) means one per worker thread of the cluster.
    """

    def __init__(self, address, shards: int = 0):
        from chainvigil.estimators.sharded import DaskPool

        if shards < 0:
            raise ValueError(f"--shards must be >= 0, got {shards}")
        self.pool = DaskPool(address)
        threads = sum(self.pool.client.nthreads().values())
        self.shards = int(shards) if shards else max(1, threads)

    def scorer_factory(self, n, **kwargs):
        """``ShardedScorer(n, shards=..., pool=<the cluster>, **kwargs)`` (Service's scorer_factory)."""
        from chainvigil.estimators.sharded import ShardedScorer

        return ShardedScorer(n, shards=self.shards, pool=self.pool, **kwargs)

    def describe(self) -> str:
        return f"scoring on the Dask cluster at {self.pool.client.scheduler.address} ({self.shards} shards per run)"

    def close(self):
        self.pool.close()

