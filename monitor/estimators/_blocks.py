"""Running independent blocks of observations on the machine's cores.

numpy releases the GIL inside its array operations, so blocks of observations (each reading and
writing only its own rows) can run in threads. Every observation is computed the same way whichever
thread takes it, so results do not depend on the number of threads.
"""
from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Callable

THREADS = max(1, min(4, os.cpu_count() or 1))
_pool: ThreadPoolExecutor | None = None
_pool_lock = threading.Lock()
_PREFIX = "chainvigil-blocks"


def _executor() -> ThreadPoolExecutor:
    global _pool
    with _pool_lock:
        if _pool is None:
            _pool = ThreadPoolExecutor(max_workers=THREADS, thread_name_prefix=_PREFIX)
        return _pool


def for_each_block(n: int, step: int, work: Callable[[int, int], None], *, threads: int | None = None) -> None:
    """Call ``work(a, b)`` for the blocks a:b of ``range(n)`` of length ``step`` (the last shorter).

    With more than one thread the blocks run concurrently; ``work`` must touch only its own rows.
    Called from inside a block, it runs serially (the pool's threads must not wait on each other).
    """
    threads = THREADS if threads is None else threads
    starts = range(0, n, max(1, step))
    nested = threading.current_thread().name.startswith(_PREFIX)
    if threads <= 1 or len(starts) <= 1 or nested:
        for a in starts:
            work(a, min(n, a + step))
        return
    futures = [_executor().submit(work, a, min(n, a + step)) for a in starts]
    for future in futures:
        future.result()  # re-raises the first error of a block
