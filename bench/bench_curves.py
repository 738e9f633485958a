"""Benchmark: load + first critical curves, and a change of source redshift.

A 4096 x 4096 float32 deflection pair of a singular isothermal ellipsoid
(Kormann, Schneider & Bartelmann 1994) is written to FITS; lensview loads it
(memory-mapped) and extracts the critical curves. The plain reference, written
here, reads the maps, takes float64 `numpy.gradient` derivatives, forms det A
and contours its zero level with contourpy. Both run in this process; the
script prints medians, the ratio, peak memory and the accuracy of each against
the analytic kappa = 1/2 ellipse.
"""

import tempfile
from pathlib import Path

import contourpy
import numpy as np
from astropy.io import fits
from astropy.wcs import WCS

import lensview as lv
from timing import peak_memory, timed
from lensview.cosmology import distance_ratio

SIZE = 4096
THETA_E = 900.0   # pixels, for D_ls/D_s = 1
AXIS_RATIO = 0.7
POSITION_ANGLE = 0.4
Z_LENS = 0.4
Z_SOURCES = (2.0, 2.5, 3.0, 3.5, 4.0, 1.5, 5.0)


def sie_pixels(n, theta_e, q, pa, x0, y0, dtype=np.float32):
    """Deflection of a singular isothermal ellipsoid (pixels; Keeton 2001, eq. for SIE)."""
    y, x = np.mgrid[0:n, 0:n].astype(np.float64)
    x -= x0
    y -= y0
    c, s = np.cos(pa), np.sin(pa)
    xp, yp = c * x + s * y, -s * x + c * y
    qp = np.sqrt(1 - q * q)
    psi = np.hypot(q * xp, yp)
    psi[psi == 0] = 1e-12
    axp = theta_e * np.sqrt(q) / qp * np.arctan(qp * xp / psi)
    ayp = theta_e * np.sqrt(q) / qp * np.arctanh(qp * yp / psi)
    return (c * axp - s * ayp).astype(dtype), (s * axp + c * ayp).astype(dtype)


def ellipse_deviation(xy, theta_e, q, pa, x0, y0):
    """Distance (pixels) of points from the analytic tangential curve."""
    x, y = xy[:, 0] - x0, xy[:, 1] - y0
    c, s = np.cos(pa), np.sin(pa)
    xp, yp = c * x + s * y, -s * x + c * y
    r = np.hypot(q * xp, yp)
    grad = np.hypot(q * q * xp, yp) / r
    return (r - theta_e * np.sqrt(q)) / grad


def make_wcs(n):
    w = WCS(naxis=2)
    w.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    w.wcs.crval = [150.0, 2.0]
    w.wcs.crpix = [n / 2 + 1, n / 2 + 1]
    scale = 0.03 / 3600
    w.wcs.cd = [[-scale, 0], [0, scale]]
    return w


def reference_curves(path_x, path_y, f, derivatives=None):
    """Plain reference: float64 numpy.gradient + contouring of det A."""
    if derivatives is None:
        ax = fits.getdata(path_x).astype(np.float64)
        ay = fits.getdata(path_y).astype(np.float64)
        a12, a11 = np.gradient(ax)
        a22, a21 = np.gradient(ay)
        derivatives = (a11 + a22, a11 * a22 - a12 * a21)
    trace, det = derivatives
    det_a = 1.0 - f * trace + f * f * det
    lines = contourpy.contour_generator(z=det_a).lines(0.0)
    return lines, derivatives


def main():
    x0, y0 = SIZE / 2 + 0.37, SIZE / 2 - 0.21
    ax, ay = sie_pixels(SIZE, THETA_E, AXIS_RATIO, POSITION_ANGLE, x0, y0)
    with tempfile.TemporaryDirectory() as tmp:
        header = make_wcs(SIZE).to_header()
        header["BUNIT"] = "pixel"
        path_x, path_y = Path(tmp) / "ax.fits", Path(tmp) / "ay.fits"
        fits.writeto(path_x, ax, header)
        fits.writeto(path_y, ay, header)
        del ax, ay
        z_first = Z_SOURCES[0]
        f_first = distance_ratio(Z_LENS, z_first)

        def ours_first():
            field = lv.DeflectionField.from_fits(path_x, path_y, units="pixel", z_lens=Z_LENS)
            return field, field.critical_curves(z_first)

        def ref_first():
            return reference_curves(path_x, path_y, f_first)

        t_ours, (field, curves) = timed(ours_first)
        t_ref, (ref_lines, ref_terms) = timed(ref_first)

        z_cycle = iter(Z_SOURCES[1:] * 3)

        def ours_change():
            return field.critical_curves(next(z_cycle))

        def ref_change():
            return reference_curves(path_x, path_y, distance_ratio(Z_LENS, 2.7), ref_terms)

        t_ours_z, _ = timed(ours_change, repeats=len(Z_SOURCES) - 1)
        t_ref_z, _ = timed(ref_change)
        mem_ours = peak_memory(ours_first)
        mem_ref = peak_memory(ref_first)

        theta_curve = THETA_E * f_first
        ours_dev = ellipse_deviation(curves[0].map_pixels, theta_curve, AXIS_RATIO,
                                     POSITION_ANGLE, x0, y0)
        longest = max(ref_lines, key=len)
        ref_dev = ellipse_deviation(longest, theta_curve, AXIS_RATIO, POSITION_ANGLE, x0, y0)

    ax64, ay64 = sie_pixels(SIZE, THETA_E, AXIS_RATIO, POSITION_ANGLE, x0, y0, dtype=np.float64)
    field64 = lv.DeflectionField(ax64, ay64, make_wcs(SIZE), units="pixel", z_lens=Z_LENS)
    dev64 = ellipse_deviation(field64.critical_curves(z_first)[0].map_pixels, theta_curve,
                              AXIS_RATIO, POSITION_ANGLE, x0, y0)
    del ax64, ay64, field64

    print(f"critical curves, {SIZE}x{SIZE} float32 deflection pair")
    print(f"  load + first curves : lensview {t_ours * 1e3:8.1f} ms   reference {t_ref * 1e3:8.1f} ms"
          f"   ratio {t_ref / t_ours:5.1f}x")
    print(f"  source-z change     : lensview {t_ours_z * 1e3:8.1f} ms   reference {t_ref_z * 1e3:8.1f} ms"
          f"   ratio {t_ref_z / t_ours_z:5.1f}x")
    print(f"  peak memory         : lensview {mem_ours:8.0f} MB   reference {mem_ref:8.0f} MB")
    print(f"  curve accuracy (px) : lensview rms {np.sqrt(np.mean(ours_dev**2)):.1e} max "
          f"{np.abs(ours_dev).max():.1e}   reference rms {np.sqrt(np.mean(ref_dev**2)):.1e} max "
          f"{np.abs(ref_dev).max():.1e}")
    print(f"  same maps in float64: lensview rms {np.sqrt(np.mean(dev64**2)):.1e} max "
          f"{np.abs(dev64).max():.1e} px (float32 rounding of {THETA_E:.0f}-pixel deflections "
          "limits both methods above)")
    return dict(first_ratio=t_ref / t_ours, change_ratio=t_ref_z / t_ours_z, peak_mb=mem_ours)


if __name__ == "__main__":
    main()
