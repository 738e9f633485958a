"""Benchmark: 50 knots on 100 posterior realisations of 1024^2 float32 maps.

The realisations (singular isothermal ellipsoids with scattered Einstein
radius, x and y maps in two files each) are written to a temporary folder.
`lensview.measure_ensemble` on dask's local threaded scheduler is timed
against a plain sequential loop written here (`load_model` and
`measure_candidates` per realisation) in the same run, and both answers are
compared. Memory: peak traced allocations (tracemalloc) and peak resident
memory (sampled from /proc) beyond the baseline, for 25 and for 100
realisations, against the size of one realisation's arrays and against the
working memory of measuring one realisation alone (curve extraction needs
about 15 times a realisation's arrays). With two threads the ensemble's peak
is that of two realisations in flight, whatever their number.

Usage: ``python bench/run.py bench_ensemble`` (``LENSVIEW_BENCH_REALISATIONS``
sets a smaller number for a quick look).
"""

import gc
import os
import tempfile
import threading
import time
import tracemalloc
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import vstack

import lensview as lv
from timing import square_tan_wcs
from lensview.ensemble import find_realisations, measure_ensemble, summarize_ensemble

N_PIXELS = 1024
N_REALISATIONS = int(os.environ.get("LENSVIEW_BENCH_REALISATIONS", 100))
N_KNOTS = 50
Z_LENS, Z_SOURCE = 0.4, 2.0
MiB = 2**20




def sie_unit(n, q=0.72, pa=0.5):
    """SIE deflection in pixels for theta_E = 1 px (Kormann, Schneider & Bartelmann 1994);
    the deflection scales linearly with theta_E, so every realisation is a multiple."""
    y, x = np.mgrid[0:n, 0:n].astype(float)
    x -= n / 2 + 0.3
    y -= n / 2 - 0.2
    c, s = np.cos(pa), np.sin(pa)
    xp, yp = c * x + s * y, -s * x + c * y
    qp = np.sqrt(1 - q * q)
    psi = np.hypot(q * xp, yp)
    psi[psi == 0] = 1e-12
    axp = np.sqrt(q) / qp * np.arctan(qp * xp / psi)
    ayp = np.sqrt(q) / qp * np.arctanh(qp * yp / psi)
    return c * axp - s * ayp, s * axp + c * ayp


def write_realisations(folder, n_realisations, rng):
    wcs = square_tan_wcs(N_PIXELS, 0.05)
    header = wcs.to_header()
    header["BUNIT"] = "pixel"
    ax, ay = sie_unit(N_PIXELS)
    for k, theta in enumerate(rng.normal(300.0, 12.0, n_realisations)):
        fits.writeto(folder / f"draw{k:03d}_alpha_x.fits", (theta * ax).astype(np.float32), header)
        fits.writeto(folder / f"draw{k:03d}_alpha_y.fits", (theta * ay).astype(np.float32), header)
    return wcs


def plain_loop(coords, folder, n):
    """The reference: each realisation loaded and measured in turn, in one thread."""
    tables = []
    for k in range(n):
        field = lv.load_model(folder / f"draw{k:03d}_alpha_x.fits",
                              folder / f"draw{k:03d}_alpha_y.fits", z_lens=Z_LENS,
                              name=f"draw{k:03d}")
        tables.append(lv.measure_candidates(coords, field, Z_SOURCE))
        del field
    return vstack(tables, metadata_conflicts="silent")


def _rss():
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


class RssPeak:
    """Peak resident memory above the start, sampled every 10 ms in a thread."""

    def __enter__(self):
        gc.collect()
        self.baseline = self.peak = _rss()
        self.running = True
        self.thread = threading.Thread(target=self._sample, daemon=True)
        self.thread.start()
        return self

    def _sample(self):
        while self.running:
            self.peak = max(self.peak, _rss())
            time.sleep(0.01)

    def __exit__(self, *exc):
        self.running = False
        self.thread.join()
        self.above = (self.peak - self.baseline) / MiB


def traced_peak(func):
    gc.collect()
    tracemalloc.start()
    baseline = tracemalloc.get_traced_memory()[0]
    func()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return (peak - baseline) / MiB


def main():
    rng = np.random.default_rng(11)
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        start = time.perf_counter()
        wcs = write_realisations(folder, N_REALISATIONS, rng)
        written = time.perf_counter() - start
        radius = rng.uniform(180, 380, N_KNOTS)
        angle = rng.uniform(0, 2 * np.pi, N_KNOTS)
        coords = wcs.pixel_to_world(N_PIXELS / 2 + radius * np.cos(angle),
                                    N_PIXELS / 2 + radius * np.sin(angle))
        arrays = 2 * N_PIXELS**2 * 4 / MiB
        print(f"{N_REALISATIONS} realisations of 2 x {N_PIXELS}^2 float32 ({arrays:.0f} MiB each, "
              f"written in {written:.0f} s), {N_KNOTS} knots, {os.cpu_count()} cores")

        # Warm-up (imports, cosmology tables) outside every measurement.
        plain_loop(coords, folder, 1)
        with RssPeak() as rss_loop:
            start = time.perf_counter()
            reference = plain_loop(coords, folder, N_REALISATIONS)
            loop_time = time.perf_counter() - start
        with RssPeak() as rss_ensemble:
            start = time.perf_counter()
            summary, samples = measure_ensemble(coords, folder, Z_SOURCE, z_lens=Z_LENS,
                                                mu_thresholds=(10, 100), return_samples=True)
            ensemble_time = time.perf_counter() - start
        difference = np.nanmax(np.abs(np.asarray(samples["offset_arcsec"], float)
                                      - np.asarray(reference["offset_arcsec"], float)))
        expected = summarize_ensemble(reference, mu_thresholds=(10, 100))
        summary_difference = np.nanmax(np.abs(np.asarray(summary["abs_mu_p50"], float)
                                              - np.asarray(expected["abs_mu_p50"], float)))
        print(f"  plain sequential loop {loop_time:7.1f} s   ensemble (threads) {ensemble_time:7.1f} s"
              f"   ratio {loop_time / ensemble_time:5.2f}x   max offset difference "
              f"{difference:.1e} arcsec, median |mu| difference {summary_difference:.1e}")

        one = traced_peak(lambda: plain_loop(coords, folder, 1))
        print(f"  one realisation measured alone: traced peak {one:6.1f} MiB "
              f"({one / arrays:.1f}x its arrays)")
        loaders = find_realisations(folder, z_lens=Z_LENS)
        for n in sorted({min(25, N_REALISATIONS), N_REALISATIONS}):
            peak = traced_peak(lambda: measure_ensemble(coords, loaders[:n], Z_SOURCE))
            with RssPeak() as rss:
                measure_ensemble(coords, loaders[:n], Z_SOURCE)
            print(f"  ensemble of {n:3d}: traced peak {peak:6.1f} MiB beyond the baseline "
                  f"({peak / arrays:.1f} realisations' arrays, {peak / one:.2f}x one realisation's "
                  f"working memory); resident peak {rss.above:6.1f} MiB")
        print(f"  resident peak beyond the baseline: loop {rss_loop.above:6.1f} MiB, "
              f"ensemble of {N_REALISATIONS} {rss_ensemble.above:6.1f} MiB")
    return dict(ratio=loop_time / ensemble_time, seconds=ensemble_time)


if __name__ == "__main__":
    main()
