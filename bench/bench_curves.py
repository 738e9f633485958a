"""Benchmark: load + first critical curves, and a change of source redshift.

A 4096 x 4096 float32 deflection pair of a singular isothermal ellipsoid
(Kormann, Schneider & Bartelmann 1994) is held in memory and written to FITS;
lensview extracts the critical curves from the arrays and from the files
(memory-mapped). The plain reference, written here, takes float64
`numpy.gradient` derivatives of the same arrays or files, forms det A and
contours its zero level with contourpy. Both run in this process; the script
prints medians, ratios, peak memory, the accuracy of each against the analytic
kappa = 1/2 ellipse, the floor lensview reports on the curve, and the |mu|
error of each 0.1 px outside the curve.
"""

import tempfile
from pathlib import Path

import contourpy
import numpy as np
from astropy.io import fits
from scipy import ndimage

import lensview as lv
from timing import peak_memory, square_tan_wcs, timed
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




def reference_curves(path_x, path_y, f, derivatives=None, maps=None):
    """Plain reference: float64 numpy.gradient + contouring of det A.

    Reads the files unless ``maps`` (in-memory arrays) or ``derivatives``
    (T and D already taken) are given.
    """
    if derivatives is None:
        if maps is None:
            maps = fits.getdata(path_x), fits.getdata(path_y)
        ax, ay = (m.astype(np.float64) for m in maps)
        a12, a11 = np.gradient(ax)
        a22, a21 = np.gradient(ay)
        derivatives = (a11 + a22, a11 * a22 - a12 * a21)
    trace, det = derivatives
    det_a = 1.0 - f * trace + f * f * det
    lines = contourpy.contour_generator(z=det_a).lines(0.0)
    return lines, derivatives


def probe_points(theta_e, q, pa, x0, y0, offset, n=720):
    """Points ``offset`` pixels outside the analytic tangential curve, and their exact mu.

    On the isothermal ellipsoid gamma = kappa, so det A = 1 - 2 kappa with
    kappa = theta_e sqrt(q) / (2 sqrt(q^2 x'^2 + y'^2)) (Kormann et al. 1994).
    """
    phi = np.linspace(0, 2 * np.pi, n, endpoint=False)
    r = np.sqrt(q) * theta_e / np.hypot(q * np.cos(phi), np.sin(phi))
    xp, yp = r * np.cos(phi), r * np.sin(phi)
    normal = np.column_stack([q * q * xp, yp])
    normal /= np.hypot(*normal.T)[:, None]
    xp, yp = xp + offset * normal[:, 0], yp + offset * normal[:, 1]
    c, s = np.cos(pa), np.sin(pa)
    x, y = c * xp - s * yp + x0, s * xp + c * yp + y0
    kappa = theta_e * np.sqrt(q) / (2 * np.hypot(q * xp, yp))
    return x, y, 1.0 / (1.0 - 2.0 * kappa)


def curve_errors(xy, theta_curve, x0, y0):
    d = ellipse_deviation(xy, theta_curve, AXIS_RATIO, POSITION_ANGLE, x0, y0)
    return np.sqrt(np.mean(d**2)), np.abs(d).max()


def main():
    x0, y0 = SIZE / 2 + 0.37, SIZE / 2 - 0.21
    ax, ay = sie_pixels(SIZE, THETA_E, AXIS_RATIO, POSITION_ANGLE, x0, y0)
    z_first = Z_SOURCES[0]
    f_first = distance_ratio(Z_LENS, z_first)
    wcs = square_tan_wcs(SIZE, 0.03)
    with tempfile.TemporaryDirectory() as tmp:
        header = wcs.to_header()
        header["BUNIT"] = "pixel"
        path_x, path_y = Path(tmp) / "ax.fits", Path(tmp) / "ay.fits"
        fits.writeto(path_x, ax, header)
        fits.writeto(path_y, ay, header)

        def ours_memory():
            field = lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS)
            return field, field.critical_curves(z_first)

        def ref_memory():
            return reference_curves(None, None, f_first, maps=(ax, ay))

        def ours_file():
            field = lv.DeflectionField.from_fits(path_x, path_y, units="pixel", z_lens=Z_LENS)
            return field, field.critical_curves(z_first)

        def ref_file():
            return reference_curves(path_x, path_y, f_first)

        t_ours_mem, (field, curves) = timed(ours_memory)
        t_ref_mem, _ = timed(ref_memory)
        t_ours_file, (field_file, _) = timed(ours_file)
        t_ref_file, (ref_lines, ref_terms) = timed(ref_file)

        z_cycle = iter(Z_SOURCES[1:] * 3)

        def ours_change():
            return field.critical_curves(next(z_cycle))

        def ref_change():
            return reference_curves(path_x, path_y, distance_ratio(Z_LENS, 2.7), ref_terms)

        t_ours_z, _ = timed(ours_change, repeats=len(Z_SOURCES) - 1)
        t_ref_z, _ = timed(ref_change)
        mem_ours_mem = peak_memory(ours_memory)
        mem_ours_file = peak_memory(ours_file)
        mem_ref = peak_memory(ref_file)
        del field_file

    theta_curve = THETA_E * f_first
    tangential = curves[0]
    ours_rms, ours_max = curve_errors(tangential.map_pixels, theta_curve, x0, y0)
    ref_rms, ref_max = curve_errors(max(ref_lines, key=len), theta_curve, x0, y0)

    # |mu| 0.1 px outside the curve: ours from the local fit, the plain method from
    # its det A grid interpolated bilinearly (scipy.ndimage.map_coordinates).
    px, py, mu_true = probe_points(theta_curve, AXIS_RATIO, POSITION_ANGLE, x0, y0, 0.1)
    mu_ours = 1.0 / field.local_terms(px, py).det_a(f_first)
    trace, det = ref_terms
    ref_det_a = 1.0 - f_first * trace + f_first**2 * det
    mu_ref = 1.0 / ndimage.map_coordinates(ref_det_a, [py, px], order=1)
    mu_err_ours = np.abs(np.abs(mu_ours) / np.abs(mu_true) - 1)
    mu_err_ref = np.abs(np.abs(mu_ref) / np.abs(mu_true) - 1)
    del ref_terms, trace, det, ref_det_a

    ax64, ay64 = sie_pixels(SIZE, THETA_E, AXIS_RATIO, POSITION_ANGLE, x0, y0, dtype=np.float64)
    field64 = lv.DeflectionField(ax64, ay64, wcs, units="pixel", z_lens=Z_LENS)
    rms64, max64 = curve_errors(field64.critical_curves(z_first)[0].map_pixels, theta_curve, x0, y0)
    del ax64, ay64, field64

    print(f"critical curves, {SIZE}x{SIZE} float32 deflection pair (theta_E {THETA_E:.0f} px)")
    print(f"  first curves, maps in memory : lensview {t_ours_mem * 1e3:7.1f} ms   reference "
          f"{t_ref_mem * 1e3:7.1f} ms   ratio {t_ref_mem / t_ours_mem:5.1f}x")
    print(f"  load + first curves, files   : lensview {t_ours_file * 1e3:7.1f} ms   reference "
          f"{t_ref_file * 1e3:7.1f} ms   ratio {t_ref_file / t_ours_file:5.1f}x")
    print(f"  source-z change              : lensview {t_ours_z * 1e3:7.1f} ms   reference "
          f"{t_ref_z * 1e3:7.1f} ms   ratio {t_ref_z / t_ours_z:5.1f}x")
    print(f"  peak memory                  : lensview {mem_ours_mem:5.0f} MB (in memory), "
          f"{mem_ours_file:5.0f} MB (files)   reference {mem_ref:5.0f} MB")
    print(f"  curve error (px)             : lensview rms {ours_rms:.1e} max {ours_max:.1e}   "
          f"reference rms {ref_rms:.1e} max {ref_max:.1e}   (lensview/reference rms "
          f"{ours_rms / ref_rms:.2f}, max {ours_max / ref_max:.2f})")
    print(f"  floor reported on the curve  : {tangential.position_floor_pix:.1e} px "
          f"({tangential.position_floor.to_value('arcsec'):.1e} arcsec)")
    print(f"  |mu| error 0.1 px outside    : lensview median {np.median(mu_err_ours):.1e} max "
          f"{mu_err_ours.max():.1e}   reference median {np.median(mu_err_ref):.1e} max "
          f"{mu_err_ref.max():.1e}  (|mu| ~ {np.median(np.abs(mu_true)):.0f})")
    print(f"  same maps in float64         : lensview rms {rms64:.1e} max {max64:.1e} px")
    return dict(first_ratio=t_ref_mem / t_ours_mem, file_ratio=t_ref_file / t_ours_file,
                change_ratio=t_ref_z / t_ours_z, peak_mb=max(mem_ours_mem, mem_ours_file),
                rms=ours_rms, max=ours_max, ref_rms=ref_rms, ref_max=ref_max, rms64=rms64)


if __name__ == "__main__":
    main()
