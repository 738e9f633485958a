"""Helpers shared by the benchmarks: timing, memory and test grids."""

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


def square_tan_wcs(n, scale_arcsec):
    """A TAN WCS of n x n square pixels of ``scale_arcsec``, North up, East left."""
    from astropy.wcs import WCS

    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [150.0, 2.0]
    wcs.wcs.crpix = [n / 2 + 1, n / 2 + 1]
    wcs.wcs.cd = [[-scale_arcsec / 3600, 0], [0, scale_arcsec / 3600]]
    return wcs
