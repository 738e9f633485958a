"""Benchmark: a 4096 x 4096 float32 convergence map to its deflection pair.

The map is a sum of circular Gaussians, whose deflection has a closed form
(alpha(r) = 2 kappa0 s^2 (1 - exp(-r^2/2s^2))/r each; Schneider, Ehlers &
Falco 1992, eq. 8.3), so both results are also checked for accuracy on a
sample of pixels where |alpha| exceeds one pixel.

lensview (`lensview.lens.convergence.convergence_deflection`: zero-padded real
FFTs in float32 with `workers`, kernel spectra by sine/cosine transforms of
one quadrant, lattice correction) is compared with a plain reference written
here: `numpy.fft` complex convolution of the zero-padded map with the complex
kernel (Kx + i Ky) on the same doubled grid, one forward transform of each
and one inverse. Each runs in a fresh child process, which reports its wall
time and its peak resident memory above the input map (VmHWM - VmRSS before
the call, from /proc/self/status).

Targets (issue 12): at most 3 s and 2.5 GB on the 2-core machine.
"""

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from timing import square_tan_wcs

SIZE = 4096
SCALE_ARCSEC = 0.03
#: (x, y, kappa0, sigma) of the Gaussians, pixels.
BLOBS = ((2048.3, 2047.6, 1.2, 260.0), (1700.0, 2300.0, 0.6, 90.0), (2500.0, 1800.0, 0.8, 60.0),
         (900.0, 900.0, 0.3, 40.0), (3300.0, 3100.0, 0.5, 120.0))
SAMPLES = 4000




def kappa_map():
    kappa = np.zeros((SIZE, SIZE), np.float32)
    y = np.arange(SIZE, dtype=np.float32)[:, None]
    x = np.arange(SIZE, dtype=np.float32)[None, :]
    for x0, y0, k0, s in BLOBS:
        kappa += np.float32(k0) * np.exp(-((x - x0) ** 2 + (y - y0) ** 2) / np.float32(2 * s * s))
    return kappa


def closed_form_pixels(px, py):
    """Deflection (pixels) of the Gaussian sum at pixel positions (SEF 1992, eq. 8.3)."""
    ax = np.zeros(len(px))
    ay = np.zeros(len(px))
    for x0, y0, k0, s in BLOBS:
        dx, dy = px - x0, py - y0
        r2 = dx * dx + dy * dy
        radial = 2 * k0 * s * s * (1 - np.exp(-r2 / (2 * s * s))) / r2
        ax += radial * dx
        ay += radial * dy
    return ax, ay


def reference_deflection(kappa):
    """Plain numpy.fft complex convolution with K = (x + i y) / (pi |x|^2) on a doubled grid."""
    n = kappa.shape[0]
    size = 2 * n
    offsets = np.fft.fftfreq(size, 1.0 / size).astype(np.float32)
    dx = offsets[None, :]
    dy = offsets[:, None]
    r2 = dx * dx + dy * dy
    r2[0, 0] = np.inf
    kernel = (dx + 1j * dy) / (np.pi * r2)
    del r2
    padded = np.zeros((size, size), np.complex64)
    padded[:n, :n] = kappa
    product = np.fft.fft2(padded) * np.fft.fft2(kernel.astype(np.complex64))
    del padded, kernel
    alpha = np.fft.ifft2(product)[:n, :n]
    return alpha.real * SCALE_ARCSEC, alpha.imag * SCALE_ARCSEC


def _memory_kb(field):
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    return 0


def child(which):
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from lensview.lens.convergence import convergence_deflection, fft_memory_bytes

    wcs = square_tan_wcs(SIZE, SCALE_ARCSEC)
    kappa = kappa_map()
    if which == "lensview":
        run = lambda: convergence_deflection(kappa, wcs)  # noqa: E731
    else:
        run = lambda: reference_deflection(kappa)  # noqa: E731
    before = _memory_kb("VmRSS")
    start, cpu_start = time.perf_counter(), time.process_time()
    ax, ay = run()
    elapsed, cpu = time.perf_counter() - start, time.process_time() - cpu_start
    peak = _memory_kb("VmHWM") - before
    rng = np.random.default_rng(1)
    py, px = rng.integers(0, SIZE, SAMPLES), rng.integers(0, SIZE, SAMPLES)
    ex, ey = closed_form_pixels(px.astype(float), py.astype(float))
    big = np.hypot(ex, ey) > 1.0
    got_x, got_y = ax[py, px] / SCALE_ARCSEC, ay[py, px] / SCALE_ARCSEC
    error = np.hypot(got_x - ex, got_y - ey)[big] / np.hypot(ex, ey)[big]
    print(json.dumps(dict(seconds=elapsed, cpu_seconds=cpu, peak_mb=peak / 1024, max_rel_error=float(error.max()),
                          estimate_mb=fft_memory_bytes((SIZE, SIZE), np.float32) / 2**20)))


def measure(which):
    output = subprocess.run([sys.executable, __file__, "--child", which], check=True,
                            capture_output=True, text=True).stdout
    return json.loads(output.strip().splitlines()[-1])


def main():
    print(f"convergence {SIZE}x{SIZE} float32 -> deflection pair (each in a fresh process; "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)")
    ours = [measure("lensview") for _ in range(2)]
    best = min(ours, key=lambda r: r["seconds"])
    reference = measure("reference")
    ratio = reference["seconds"] / best["seconds"]
    runs = ", ".join(f"{r['seconds']:.2f}" for r in ours)
    print(f"  lensview   {best['seconds']:6.2f} s (runs: {runs}; CPU {best['cpu_seconds']:.2f} s "
          f"over all threads)  peak {best['peak_mb']:7.0f} MB "
          f"(its own estimate {best['estimate_mb']:.0f} MB)  max rel. error "
          f"{best['max_rel_error']:.1e}")
    print(f"  numpy.fft  {reference['seconds']:6.2f} s (CPU {reference['cpu_seconds']:.2f} s)  peak {reference['peak_mb']:7.0f} MB  "
          f"max rel. error {reference['max_rel_error']:.1e}")
    print(f"  ratio {ratio:.1f}x faster, {reference['peak_mb'] / best['peak_mb']:.1f}x less memory"
          f"  (targets: <= 3 s, <= 2560 MB)")
    return dict(ratio=ratio, seconds=best["seconds"], peak_mb=best["peak_mb"])


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        child(sys.argv[2])
    else:
        main()
