"""A small shared thread pool: numpy releases the GIL, so batches of grid and
point work run on separate cores."""

import os
import threading
from concurrent.futures import ThreadPoolExecutor

__all__ = ["in_threads", "THREADED_POINTS", "THREADED_TILES"]

#: Threads for tile batches (numpy releases the GIL, so they use separate cores).
_WORKERS = min(4, os.cpu_count() or 1)
_POOL = None
_POOL_LOCK = threading.Lock()
#: Below these sizes work stays on the calling thread.
THREADED_POINTS = 2000
THREADED_TILES = 64


def in_threads(work, batches, worth_it=True):
    """``work`` on each batch, in threads (numpy releases the GIL in its loops)
    when ``worth_it`` (small jobs cost more to hand over than to do)."""
    global _POOL
    if len(batches) < 2 or _WORKERS < 2 or not worth_it:
        return [work(b) for b in batches]
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(max_workers=_WORKERS, thread_name_prefix="lensview")
    return list(_POOL.map(work, batches))
