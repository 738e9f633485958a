"""Deflection fields from convergence and potential maps, against closed forms."""

import warnings

import numpy as np
import pytest
import astropy.units as u
from astropy.wcs import WCS
from scipy.optimize import brentq

import lensview as lv
from lensview.lens.convergence import (convergence_deflection, external_deflection,
                                  fft_memory_bytes, padded_shape)
from lensview.errors import LensviewInputError, MissingMassWarning

from closed_form import make_wcs

Z_LENS = 0.4
Z_SOURCE = 2.0


def rectangular_wcs(n_x, n_y, scale_x, scale_y, rotation_deg, skew=0.0):
    """Non-square pixels (scale_x by scale_y arcsec), rotated on the sky; ``skew``
    tilts the y axis (pixel axes not at right angles)."""
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [150.0, 2.0]
    wcs.wcs.crpix = [n_x / 2 + 1, n_y / 2 + 1]
    th = np.radians(rotation_deg)
    rotation = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    wcs.wcs.cd = rotation @ np.array([[-scale_x, skew * scale_y], [0.0, scale_y]]) / 3600
    return wcs


def gaussian_lens(shape, wcs, kappa0, sigma_arcsec, centre):
    """kappa0 exp(-r^2 / 2 s^2) and its deflection in arcsec along the pixel axes.

    Closed form for an axisymmetric lens: alpha(r) = 2 r^-1 Int_0^r kappa r' dr'
    = 2 kappa0 s^2 (1 - exp(-r^2 / 2 s^2)) / r (Schneider, Ehlers & Falco 1992,
    eq. 8.3; Narayan & Bartelmann 1996, eq. 29), radial in the sky plane.
    """
    ny, nx = shape
    matrix = wcs.pixel_scale_matrix * 3600.0
    y, x = np.mgrid[0:ny, 0:nx].astype(float)
    plane = np.einsum("ij,jyx->iyx", matrix, np.stack([x - centre[0], y - centre[1]]))
    r = np.hypot(plane[0], plane[1])
    kappa = kappa0 * np.exp(-r**2 / (2 * sigma_arcsec**2))
    with np.errstate(invalid="ignore", divide="ignore"):
        alpha = 2 * kappa0 * sigma_arcsec**2 * (1 - np.exp(-r**2 / (2 * sigma_arcsec**2))) / r
        direction = plane / r
    alpha_plane = alpha * direction
    alpha_pix = np.einsum("ij,jyx->iyx", np.linalg.inv(matrix), alpha_plane)
    scales = np.sqrt((matrix**2).sum(axis=0))
    return kappa, alpha_pix[0] * scales[0], alpha_pix[1] * scales[1], alpha_pix, r


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("scales, rotation, skew", [((0.05, 0.05), 0.0, 0.0),
                                                    ((0.05, 0.05), 33.0, 0.0),
                                                    ((0.04, 0.065), -21.0, 0.0),
                                                    ((0.05, 0.05), 12.0, 0.25)])
def test_gaussian_deflection_matches_closed_form(dtype, scales, rotation, skew):
    shape = (230, 260)
    wcs = rectangular_wcs(shape[1], shape[0], *scales, rotation, skew)
    centre = (131.3, 113.6)
    kappa, ex, ey, alpha_pix, _ = gaussian_lens(shape, wcs, 1.4, 0.6, centre)
    ax, ay = convergence_deflection(kappa.astype(dtype), wcs)
    assert ax.dtype == dtype and ax.shape == shape
    # Closed form above (SEF 1992 eq. 8.3): 1e-3 relative wherever |alpha| exceeds a pixel.
    big = np.hypot(*alpha_pix) > 1.0
    error = np.hypot(ax - ex, ay - ey) / np.hypot(ex, ey)
    assert big.sum() > 10000
    assert error[big].max() < 1e-3


def test_no_periodic_images_leak_in():
    # Mass hugging the left edge, deflection read at the right edge: a circular
    # convolution would wrap the mass around next to it. Reference: the direct
    # sum of the same pixel kernel (common practice), evaluated here by brute force.
    n = 64
    wcs = make_wcs(n, n, scale_arcsec=0.1)
    rng = np.random.default_rng(3)
    kappa = np.zeros((n, n))
    kappa[:, :6] = rng.random((n, 6))
    ax, ay = convergence_deflection(kappa, wcs)
    y, x = np.mgrid[0:n, 0:n].astype(float)
    # The FFT result minus its local correction term (zero here, where kappa is flat).
    for px, py in ((n - 1, 5), (n - 2, n - 1), (n - 1, 31)):
        dx, dy = px - x, py - y
        r2 = dx * dx + dy * dy
        r2[py, px] = np.inf
        direct = np.array([np.sum(kappa * dx / r2), np.sum(kappa * dy / r2)]) / np.pi * 0.1
        assert np.allclose([ax[py, px], ay[py, px]], direct, rtol=1e-9, atol=1e-12)


def test_tangential_critical_radius_of_gaussian():
    n, scale = 256, 0.05
    wcs = make_wcs(n, n, scale_arcsec=scale, rotation_deg=17.0)
    kappa0, sigma = 2.0, 15 * scale
    centre = (127.37, 128.21)
    kappa, *_ = gaussian_lens((n, n), wcs, kappa0, sigma, centre)
    with pytest.warns(MissingMassWarning, match="mass outside the map is missing"):
        field = lv.DeflectionField.from_convergence(kappa, wcs, z_lens=Z_LENS, z_norm=Z_SOURCE,
                                                    name="gauss")
    assert field.map_kind == "convergence"
    # Tangential curve where the mean convergence inside r is 1 (SEF 1992, sec. 8.1.2):
    # 2 kappa0 s^2 (1 - exp(-r^2/2s^2)) / r^2 = 1, solved with scipy's brentq.
    r_t = brentq(lambda r: 2 * kappa0 * sigma**2 * (1 - np.exp(-r**2 / (2 * sigma**2))) / r**2 - 1,
                 0.1 * sigma, 10 * sigma) / scale
    tangential = [c for c in field.critical_curves(Z_SOURCE) if c.kind == "tangential"]
    assert len(tangential) == 1 and tangential[0].closed
    xy = tangential[0].map_pixels
    radius = np.hypot(xy[:, 0] - centre[0], xy[:, 1] - centre[1])
    assert np.abs(radius - r_t).max() < 1e-3


def test_external_sheet_and_shear_add_to_convergence_and_shear():
    n, scale = 128, 0.05
    wcs = make_wcs(n, n, scale_arcsec=scale, rotation_deg=25.0)
    kappa = np.zeros((n, n))
    kappa[60:68, 60:68] = 0.2
    base = lv.DeflectionField.from_convergence
    with pytest.warns(MissingMassWarning, match="external convergence/shear was added"):
        field = base(kappa, wcs, z_lens=Z_LENS, z_norm=Z_SOURCE, external_kappa=0.1,
                     external_shear=(0.05, -0.03))
    with pytest.warns(MissingMassWarning):
        plain = base(kappa, wcs, z_lens=Z_LENS, z_norm=Z_SOURCE)
    x, y = np.array([20.0, 100.0]), np.array([30.0, 90.0])
    with_ext, without = field.local_terms(x, y), plain.local_terms(x, y)
    # A uniform sheet adds kappa_ext, a constant shear adds (gamma1, gamma2) on the
    # East/North axes (Keeton 2001, arXiv:astro-ph/0102341, external shear).
    assert np.allclose(with_ext.convergence(1.0) - without.convergence(1.0), 0.1, atol=1e-9)
    g_with, g_without = with_ext.shear(1.0), without.shear(1.0)
    assert np.allclose(g_with[0] - g_without[0], 0.05, atol=1e-9)
    assert np.allclose(g_with[1] - g_without[1], -0.03, atol=1e-9)
    ex, ey = external_deflection((n, n), wcs, kappa_ext=0.0, shear=(0.0, 0.0))
    assert not ex.any() and not ey.any()


def test_nan_cells_are_refused_unless_a_fill_is_given():
    wcs = make_wcs(40, 40)
    kappa = np.full((40, 40), 0.1)
    kappa[3, 7] = np.nan
    with pytest.raises(LensviewInputError, match=r"1 NaN .*fill_nan"):
        convergence_deflection(kappa, wcs)
    filled = convergence_deflection(kappa, wcs, fill_nan=0.0)
    zeroed = kappa.copy()
    zeroed[3, 7] = 0.0
    assert np.array_equal(filled[0], convergence_deflection(zeroed, wcs)[0])


def test_too_large_a_map_names_the_memory_needed():
    wcs = make_wcs(300, 200)
    need = fft_memory_bytes((200, 300), np.float32)
    assert padded_shape((200, 300)) == (400, 600)
    with pytest.raises(LensviewInputError, match=rf"needs about {need / 1e9:.2f} GB.*max_memory"):
        convergence_deflection(np.zeros((200, 300), np.float32), wcs, max_memory=1 * u.MB)
    with pytest.raises(LensviewInputError, match="not an amount of memory"):
        convergence_deflection(np.zeros((20, 30)), make_wcs(30, 20), max_memory=3 * u.s)


def test_maps_without_wcs_are_refused():
    with pytest.raises(LensviewInputError, match="celestial"):
        convergence_deflection(np.zeros((20, 20)), None)
    with pytest.raises(LensviewInputError, match="celestial"):
        lv.DeflectionField.from_potential(np.zeros((20, 20)), None, z_lens=Z_LENS)
    with pytest.raises(LensviewInputError, match="2-D"):
        lv.DeflectionField.from_potential(np.zeros((2, 20, 20)), make_wcs(20, 20), z_lens=Z_LENS)


def sis_maps(n, theta_e_px, scale, rotation, centre):
    """SIS in map pixels: psi = theta_E |theta|, alpha = theta_E theta/|theta|
    (Narayan & Bartelmann 1996, sec. 3.1)."""
    y, x = np.mgrid[0:n, 0:n].astype(float)
    dx, dy = x - centre[0], y - centre[1]
    r = np.hypot(dx, dy)
    psi = theta_e_px * r * scale**2  # arcsec^2
    return psi, theta_e_px * dx / r, theta_e_px * dy / r, r


def test_sis_from_potential_map_matches_the_deflection_pair():
    n, scale, theta_e = 240, 0.05, 70.0
    wcs = make_wcs(n, n, scale_arcsec=scale, rotation_deg=-28.0)
    centre = (119.6, 120.3)
    psi, ax, ay, r = sis_maps(n, theta_e, scale, -28.0, centre)
    from_psi = lv.DeflectionField.from_potential(psi, wcs, z_lens=Z_LENS, name="psi")
    from_alpha = lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS, name="alpha")
    assert from_psi.potential is not None and from_alpha.potential is None
    bx, by = from_psi.node_deflection(slice(None), slice(None))
    ring = (r > 20) & np.isfinite(bx)
    # alpha = grad psi (SEF 1992, eq. 5.8) to the accuracy of fourth-order differences.
    assert np.abs(bx - ax)[ring].max() < 2e-4 * theta_e
    assert np.abs(by - ay)[ring].max() < 2e-4 * theta_e
    assert np.isnan(bx[:, :2]).all() and np.isnan(by[:2]).all()
    curves = [[c for c in fld.critical_curves(Z_SOURCE) if c.kind == "tangential"]
              for fld in (from_psi, from_alpha)]
    f = from_alpha.scaling_factor(Z_SOURCE)
    for (curve,) in curves:
        # SIS tangential critical curve: |theta| = theta_E D_ls/D_s (Narayan & Bartelmann 1996).
        radius = np.hypot(curve.map_pixels[:, 0] - centre[0], curve.map_pixels[:, 1] - centre[1])
        assert np.abs(radius - f * theta_e).max() < 1e-3


def test_missing_mass_warning_is_a_lensview_warning():
    assert issubclass(MissingMassWarning, UserWarning)
    assert lv.MissingMassWarning is MissingMassWarning
    wcs = make_wcs(32, 32)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        lv.DeflectionField.from_convergence(np.full((32, 32), 0.1), wcs, z_lens=Z_LENS)
    assert [w.category for w in caught] == [MissingMassWarning]


def test_potential_on_rectangular_rotated_pixels():
    # psi = theta_E |theta| in the sky plane on non-square, rotated pixels: the gradient,
    # taken on the pixel grid, must come back as alpha = theta_E theta/|theta| along the
    # map's own axes (Narayan & Bartelmann 1996, sec. 3.1; SEF 1992, eq. 5.8).
    shape = (200, 230)
    wcs = rectangular_wcs(shape[1], shape[0], 0.04, 0.07, 38.0)
    theta_e = 2.0  # arcsec
    centre = (114.6, 99.3)
    matrix = wcs.pixel_scale_matrix * 3600.0
    y, x = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    plane = np.einsum("ij,jyx->iyx", matrix, np.stack([x - centre[0], y - centre[1]]))
    r = np.hypot(plane[0], plane[1])
    field = lv.DeflectionField.from_potential(theta_e * r, wcs, z_lens=Z_LENS)
    alpha_pix = np.einsum("ij,jyx->iyx", np.linalg.inv(matrix), theta_e * plane / r)
    got = field.node_deflection(slice(None), slice(None))
    ring = (r > 1.5) & np.isfinite(got[0])
    assert ring.sum() > 30000
    for component in (0, 1):
        assert np.abs(got[component] - alpha_pix[component])[ring].max() < 1e-4 * theta_e / 0.04
