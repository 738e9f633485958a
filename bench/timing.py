"""Timing helpers shared by the benchmarks."""

import gc
import statistics
import time
import tracemalloc


def timed(func, repeats=5):
    """Median wall time of ``repeats`` calls, and the last result."""
    times, result = [], None
    for _ in range(repeats):
        gc.collect()
        start = time.perf_counter()
        result = func()
        times.append(time.perf_counter() - start)
    return statistics.median(times), result


def peak_memory(func):
    """Peak traced allocation (MiB) during one call."""
    gc.collect()
    tracemalloc.start()
    func()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20
