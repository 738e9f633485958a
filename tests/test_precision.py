"""Curves on float32 maps: noise-limited, better than the plain method, honest floor.

The lens is the singular isothermal ellipsoid of Kormann, Schneider &
Bartelmann (1994) (tests/closed_form.py), whose tangential critical curve is
the kappa = 1/2 ellipse. Each map is a crop of the deflection field around
part of that curve (the lens centre lies off the crop), stored as float32 as
published maps are, so the values keep their full magnitude and rounding.
"""

import contourpy
import numpy as np
import pytest
import astropy.units as u

import lensview as lv
from lensview.lens import precision
from lensview.lens.stencils import fit_weights, gather_windows

from closed_form import make_wcs, sie, sie_curve_distance

Z_LENS, Z_SOURCE = 0.4, 2.0
Q, PA = 0.7, 0.4
CROP = 160


def curve_crop(theta_e, phi=0.9):
    """float32 SIE maps on a CROP x CROP grid centred on the tangential curve at
    lens-frame polar angle ``phi``; returns the maps and the lens centre (pixels)."""
    c, s = np.cos(PA), np.sin(PA)
    # kappa = 1/2 where q^2 x'^2 + y'^2 = q theta_e^2 (Kormann et al. 1994; closed_form.sie).
    r = np.sqrt(Q) * theta_e / np.hypot(Q * np.cos(phi), np.sin(phi))
    xp, yp = r * np.cos(phi), r * np.sin(phi)
    x_curve, y_curve = c * xp - s * yp, s * xp + c * yp
    x0 = CROP / 2 - x_curve + 0.31
    y0 = CROP / 2 - y_curve - 0.17
    ax, ay = sie(CROP, theta_e, Q, PA, x0, y0)
    return ax.astype(np.float32), ay.astype(np.float32), x0, y0


def predicted_floor(ax, ay, xy, theta_e, x0, y0, n_nodes):
    """Our own derivation of the positional floor from float32 rounding.

    Each stored value carries an independent rounding error of standard deviation
    ulp/sqrt(12) (uniform within half a unit in the last place: Higham 2002,
    sec. 2.1; common practice). A tensor least-squares polynomial fit on n x n
    nodes (of the degree lensview reports for n) passes it to a_ij multiplied by |w_1| |w_0| (derivative weights along
    the differentiated axis, value weights along the other), computed here
    from the normal equations with numpy alone. det A = (1 - a11)(1 - a22) -
    a12 a21 (f = 1) changes under a Jacobian error da by -(1 - a22) da11 -
    (1 - a11) da22 - a21 da12 - a12 da21. For the isothermal ellipsoid
    gamma = kappa, so det A = 1 - 2 kappa and the curve point moves by
    sigma(det A) / |grad det A| = sigma(det A) / (2 |grad kappa|).
    """
    degree = precision.fit_degree(n_nodes)
    nodes = np.arange(n_nodes) - (n_nodes - 1) / 2
    vander = np.vander(nodes, degree + 1, increasing=True)
    projector = np.linalg.pinv(vander)
    t = (np.modf(xy)[0] + n_nodes // 2 - 1) - (n_nodes - 1) / 2  # offset from the window centre
    powers = np.arange(degree + 1)
    w0 = (t[..., None] ** powers) @ projector
    w1 = (powers * t[..., None] ** np.maximum(powers - 1, 0)) @ projector
    gain_dx = np.linalg.norm(w1[:, 0], axis=1) * np.linalg.norm(w0[:, 1], axis=1)
    gain_dy = np.linalg.norm(w0[:, 0], axis=1) * np.linalg.norm(w1[:, 1], axis=1)
    cols, rows = np.round(xy).astype(int).T
    ulp = [np.spacing(np.abs(a[rows, cols])).astype(float) for a in (ax, ay)]
    sigma_x, sigma_y = (u_ / np.sqrt(12) for u_ in ulp)
    # Jacobian entries (only needed to ~1 %) from the float64 closed form by central
    # differences; kappa and its gradient in closed form.
    bx, by = sie(CROP, theta_e, Q, PA, x0, y0)
    jacobian = [np.gradient(b)[::-1] for b in (bx, by)]  # [[d/dx, d/dy] of each map]
    a11, a12 = (g[rows, cols] for g in jacobian[0])
    a21, a22 = (g[rows, cols] for g in jacobian[1])
    c, s = np.cos(PA), np.sin(PA)
    x, y = xy[:, 0] - x0, xy[:, 1] - y0
    xp, yp = c * x + s * y, -s * x + c * y
    rho = np.hypot(Q * xp, yp)
    kappa = theta_e * np.sqrt(Q) / (2 * rho)
    var = (((1 - a22) * sigma_x * gain_dx) ** 2 + ((1 - a11) * sigma_y * gain_dy) ** 2
           + (a21 * sigma_x * gain_dy) ** 2 + (a12 * sigma_y * gain_dx) ** 2)
    grad_kappa = kappa / rho * np.hypot(Q * Q * xp, yp) / rho
    return np.sqrt(np.mean(var / (2 * grad_kappa) ** 2))


def plain_curve_error(ax, ay, theta_e, x0, y0):
    """The plain method: float64 numpy.gradient, det A, zero contour by contourpy."""
    a12, a11 = np.gradient(ax.astype(np.float64))
    a22, a21 = np.gradient(ay.astype(np.float64))
    det_a = 1 - (a11 + a22) + (a11 * a22 - a12 * a21)
    lines = contourpy.contour_generator(z=det_a).lines(0.0)
    xy = max(lines, key=len)
    inner = xy[(xy > 3).all(axis=1) & (xy < CROP - 4).all(axis=1)]
    d = sie_curve_distance(inner, theta_e, Q, PA, x0, y0)
    return np.sqrt(np.mean(d**2))


@pytest.mark.parametrize("theta_e", [100.0, 400.0, 900.0])
def test_float32_curve_is_noise_limited_and_beats_the_plain_method(theta_e):
    ax, ay, x0, y0 = curve_crop(theta_e)
    # z_norm = z_source: the maps are the deflections for this source (f = 1).
    field = lv.DeflectionField(ax, ay, make_wcs(CROP, CROP), units="pixel", z_lens=Z_LENS,
                               z_norm=Z_SOURCE)
    curves = [c for c in field.critical_curves(Z_SOURCE) if c.kind == "tangential"]
    assert len(curves) == 1
    curve = curves[0]
    xy = curve.map_pixels
    # Away from the crop's edges, where windows are pushed inwards.
    interior = (xy > 14).all(axis=1) & (xy < CROP - 15).all(axis=1)
    assert interior.sum() > 100
    xy = xy[interior]
    d = sie_curve_distance(xy, theta_e, Q, PA, x0, y0)
    rms = np.sqrt(np.mean(d**2))
    window = field.local_terms(xy[:, 0], xy[:, 1]).window
    # Mean square of the per-vertex floors, each for the window its vertex was fitted on.
    floor = np.sqrt(sum(
        predicted_floor(ax, ay, xy[window == n], theta_e, x0, y0, n) ** 2 * np.sum(window == n)
        for n in np.unique(window)) / len(xy))
    assert floor / 2 < rms < 2 * floor
    assert rms < plain_curve_error(ax, ay, theta_e, x0, y0)
    # The floor the curve reports brackets the error it has.
    assert rms / 3 < curve.position_floor_pix < 3 * rms
    scale = field.pixel_scales[0].to_value(u.arcsec)
    assert curve.position_floor.to_value(u.arcsec) == pytest.approx(curve.position_floor_pix * scale)


def test_float64_maps_keep_the_interpolant_and_a_negligible_floor():
    ax, ay, x0, y0 = curve_crop(400.0)
    field = lv.DeflectionField(ax.astype(np.float64), ay.astype(np.float64),
                               make_wcs(CROP, CROP), units="pixel", z_lens=Z_LENS, z_norm=Z_SOURCE)
    curve = field.critical_curves(Z_SOURCE)[0]
    assert set(np.unique(field.local_terms(*curve.map_pixels.T).window)) == {6}
    # float64 rounding (1.1e-16 relative) of 400-pixel deflections, amplified by the
    # 6-node interpolant, moves the curve by far less than a micro-pixel.
    assert curve.position_floor_pix < 1e-8


def test_wide_windows_are_refused_where_the_field_bends_faster_than_its_noise():
    # A float32 map with small deflections but a sharp feature: the wide fits disagree
    # with the narrow ones by far more than their noise, so the rule keeps narrow ones.
    n = 120
    y, x = np.mgrid[0:n, 0:n].astype(float)
    ax = (3.0 * np.sin(x / 3.0)).astype(np.float32)
    ay = (3.0 * np.cos(y / 3.0)).astype(np.float32)
    field = lv.DeflectionField(ax, ay, make_wcs(n, n), units="pixel", z_lens=Z_LENS)
    terms = field.local_terms(np.array([60.3, 40.7]), np.array([55.2, 70.4]))
    assert (terms.window == precision.WINDOW_LADDER[0]).all()
    # d/dx (3 sin(x/3)) = cos(x/3): the narrow fit stays close to it.
    np.testing.assert_allclose(terms.a11, np.cos(np.array([60.3, 40.7]) / 3.0), atol=2e-3)


def test_rounding_sigma_is_the_uniform_law_of_the_last_place():
    values = np.full((1, 4, 4), 700.0, np.float32)
    # 700 lies in [512, 1024): ulp = 2**(9 - 23) (IEEE 754 binary32).
    assert precision.rounding_sigma(values)[0] == pytest.approx(2.0**-14 / np.sqrt(12))


def test_fit_weights_reproduce_low_degree_polynomials_and_gather_is_exact():
    t = np.array([3.3, 11.8])
    nodes = np.arange(24.0)
    cubic = 0.5 * nodes**3 - 2 * nodes + 1
    np.testing.assert_allclose(fit_weights(t, 0, 24, 5) @ cubic, 0.5 * t**3 - 2 * t + 1, rtol=1e-10)
    np.testing.assert_allclose(fit_weights(t, 1, 24, 5) @ cubic, 1.5 * t**2 - 2, rtol=1e-10)
    grid = np.arange(100.0).reshape(10, 10)
    windows = gather_windows(grid, np.array([2, 0]), np.array([1, 4]), 3)
    np.testing.assert_array_equal(windows[0], grid[2:5, 1:4])
    np.testing.assert_array_equal(windows[1], grid[0:3, 4:7])


def test_measurements_carry_the_floor_of_the_nearest_curve():
    ax, ay, x0, y0 = curve_crop(400.0)
    wcs = make_wcs(CROP, CROP)
    field = lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS, z_norm=Z_SOURCE)
    curve = field.critical_curves(Z_SOURCE)[0]
    knot = wcs.pixel_to_world(*(curve.map_pixels[len(curve) // 2] + 0.7))
    table = lv.measure_candidates(knot, field, Z_SOURCE)
    assert table["curve_floor_arcsec"].unit == u.arcsec
    assert table["curve_floor_arcsec"][0] == pytest.approx(curve.position_floor.to_value(u.arcsec))
    assert 0 < table["curve_floor_arcsec"][0] < 1e-3 * table["offset_arcsec"][0]
