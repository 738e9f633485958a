"""DeflectionField: magnification, ray tracing, redshift scaling, bad input."""

import warnings

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.cosmology import FlatLambdaCDM
from astropy.wcs import WCS

import lensview as lv
from lensview import analytic
from lensview.cosmology import distance_ratio
from lensview.errors import LensviewInputError, OutsideFootprintWarning

CENTRE = SkyCoord(150.1 * u.deg, 2.2 * u.deg)
SCALE = 0.05 * u.arcsec
Z_LENS = 0.4


def field_for(profiles, shape=(400, 400), rotation=0 * u.deg, z_norm=None, dtype=np.float64,
              name="model"):
    wcs = analytic.make_wcs(CENTRE, shape, SCALE, rotation=rotation)
    ax, ay = analytic.deflection_maps(profiles, wcs, shape)
    return lv.DeflectionField(ax.astype(dtype), ay.astype(dtype), wcs, units="arcsec",
                              z_lens=Z_LENS, z_norm=z_norm, name=name), wcs


def ring(centre, radii, n=24, pa0=0.3):
    """Sky positions on circles of the given radii (arcsec) about centre."""
    angles = pa0 + np.linspace(0, 2 * np.pi, n, endpoint=False)
    r = np.repeat(np.atleast_1d(radii), n)
    a = np.tile(angles, np.size(radii))
    return centre.directional_offset_by(a * u.rad, r * u.arcsec), r


def test_point_mass_magnification_matches_paczynski():
    theta_e = 4.0
    lens = analytic.PointMass(CENTRE, theta_e=theta_e * u.arcsec)
    field, _ = field_for([lens])
    z_source = 2.0
    f = distance_ratio(Z_LENS, z_source)
    theta_eff = theta_e * np.sqrt(f)
    coords, r = ring(CENTRE, [1.5 * theta_eff, 2.0 * theta_eff, 0.6 * theta_eff])
    mu = field.magnification(coords, z_source)
    # Point-mass images: the image at theta traces to u = theta/theta_E - theta_E/theta and
    # has mu = (u^2 + 2) / (2 u sqrt(u^2 + 4)) +- 1/2 (Paczynski 1986, ApJ 304, 1).
    x = r / theta_eff
    u_src = np.abs(x - 1 / x)
    total = (u_src**2 + 2) / (u_src * np.sqrt(u_src**2 + 4))
    expected = np.where(x > 1, 0.5 * total + 0.5, -(0.5 * total - 0.5))
    np.testing.assert_allclose(mu, expected, rtol=1e-3)


def test_sis_magnification_and_ray_trace():
    theta_e = 3.0
    field, _ = field_for([analytic.IsothermalSphere(CENTRE, theta_e=theta_e * u.arcsec)])
    z_source = 3.0
    theta_eff = theta_e * distance_ratio(Z_LENS, z_source)
    coords, r = ring(CENTRE, [0.5 * theta_eff, 1.3 * theta_eff, 2.5 * theta_eff])
    # SIS: mu = theta / (theta - theta_E) (Narayan & Bartelmann 1996, arXiv:astro-ph/9606001).
    np.testing.assert_allclose(field.magnification(coords, z_source), r / (r - theta_eff), rtol=1e-3)
    # beta = theta - theta_E along the same direction (lens equation, same reference).
    traced = field.ray_trace(coords, z_source)
    np.testing.assert_allclose(CENTRE.separation(traced).arcsec, np.abs(r - theta_eff), atol=1e-4)


@pytest.mark.parametrize("rotation", [0 * u.deg, 37 * u.deg])
def test_sie_det_a_is_one_minus_two_kappa(rotation):
    offset_centre = CENTRE.directional_offset_by(40 * u.deg, 0.8 * u.arcsec)
    lens = analytic.IsothermalEllipsoid(offset_centre, theta_e=4.0 * u.arcsec, q=0.7, pa=25 * u.deg)
    field, wcs = field_for([lens], rotation=rotation)
    z_source = 2.5
    f = field.scaling_factor(z_source)
    rng = np.random.default_rng(1)
    x = rng.uniform(20, 380, 4000)
    y = rng.uniform(20, 380, 4000)
    coords = field.pixels_to_sky(x, y)
    px, py = analytic.sky_to_plane(wcs, coords)
    lx, ly = analytic.sky_to_plane(wcs, offset_centre)
    kappa = f * lens.convergence(px - lx, py - ly)
    # Isothermal profiles have gamma = kappa, so det A = 1 - 2 kappa (Kormann et al. 1994).
    det_expected = 1 - 2 * kappa
    mu = field.magnification(coords, z_source)
    distance_px = np.abs(det_expected) / (2 * kappa / np.hypot(px - lx, py - ly)
                                          * SCALE.to_value(u.arcsec))
    usable = (distance_px >= 0.1) & (np.hypot(px - lx, py - ly) > 20 * SCALE.to_value(u.arcsec))
    assert usable.sum() > 3000
    relative = np.abs(mu[usable] * det_expected[usable] - 1)
    assert relative.max() < 1e-3


def test_magnification_a_tenth_of_a_pixel_from_the_curve():
    """Plain second-order differences on the grid are off by several per cent here."""
    lens = analytic.IsothermalSphere(CENTRE, theta_e=3.0 * u.arcsec)
    field, wcs = field_for([lens])
    f = field.scaling_factor(2.0)
    theta_eff = 3.0 * f
    coords, r = ring(CENTRE, [theta_eff + 0.1 * SCALE.to_value(u.arcsec)], n=64)
    ours = field.magnification(coords, 2.0)
    expected = r / (r - theta_eff)  # Narayan & Bartelmann 1996
    assert np.abs(ours / expected - 1).max() < 1e-3


def test_redshift_scaling_with_reference_normalisation():
    lens = analytic.IsothermalEllipsoid(CENTRE, theta_e=4.0 * u.arcsec, q=0.8, pa=10 * u.deg)
    unit_field, wcs = field_for([lens])
    z_norm = 2.0
    # Maps made for z_norm are the unit-normalised maps times D_ls/D_s(z_norm) (design notes, sec. 4).
    ratio = distance_ratio(Z_LENS, z_norm)
    ax, ay = (np.asarray(a) * ratio for a in analytic.deflection_maps([lens], wcs, (400, 400)))
    ref_field = lv.DeflectionField(ax, ay, wcs, z_lens=Z_LENS, z_norm=z_norm)
    coords = field_for([lens])[0].pixels_to_sky(np.array([50.0, 200.5, 310.2]), np.array([60.0, 90.0, 333.0]))
    for z_source in (1.2, 3.0, 6.0):
        np.testing.assert_allclose(ref_field.magnification(coords, z_source),
                                   unit_field.magnification(coords, z_source), rtol=1e-10)
    assert ref_field.scaling_factor(z_norm) == pytest.approx(1.0)


def test_einstein_de_sitter_cosmology_is_accepted():
    eds = FlatLambdaCDM(H0=70, Om0=1.0)
    lens = analytic.IsothermalSphere(CENTRE, theta_e=3.0 * u.arcsec)
    wcs = analytic.make_wcs(CENTRE, (200, 200), SCALE)
    ax, ay = analytic.deflection_maps([lens], wcs, (200, 200))
    field = lv.DeflectionField(ax, ay, wcs, z_lens=0.5, cosmology=eds)
    # Einstein-de Sitter: D_C(z) = (2c/H0)(1 - 1/sqrt(1+z)) (Hogg 1999), ratio D_ls/D_s follows.
    dc = lambda z: 1 - 1 / np.sqrt(1 + z)  # noqa: E731 (units of 2c/H0)
    expected = (dc(2.0) - dc(0.5)) / dc(2.0)
    assert field.scaling_factor(2.0) == pytest.approx(expected, rel=1e-8)


def test_outside_positions_give_nan_and_warn():
    field, _ = field_for([analytic.IsothermalSphere(CENTRE, theta_e=3.0 * u.arcsec)], shape=(100, 100))
    far = CENTRE.directional_offset_by(0 * u.deg, 60 * u.arcsec)
    with pytest.warns(OutsideFootprintWarning, match="outside the footprint"):
        mu = field.magnification(SkyCoord([CENTRE.ra, far.ra], [CENTRE.dec, far.dec]), 2.0)
    assert np.isnan(mu[1])


def test_grid_maps_agree_with_point_evaluation():
    lens = analytic.IsothermalEllipsoid(CENTRE, theta_e=4.0 * u.arcsec, q=0.7, pa=60 * u.deg,
                                        core=0.5 * u.arcsec)
    field, _ = field_for([lens], shape=(150, 170))
    maps = field.grid_maps(2.0)
    assert maps["det_a"].shape == (150, 170)
    y, x = np.mgrid[10:140:7, 10:160:9]
    local = field.local_terms(x.ravel().astype(float), y.ravel().astype(float))
    # Two independent approximations (fourth-order stencils on the grid, a degree-5 local
    # interpolant at points) agree wherever the grid resolves the field; the tightest
    # agreement is away from the 0.5 arcsec (10 pixel) core.
    np.testing.assert_allclose(maps["det_a"][y, x].ravel(), local.det_a(field.scaling_factor(2.0)),
                               rtol=2e-4, atol=2e-5)
    assert np.isnan(maps["det_a"][0, 0])  # the stencil leaves the map at its edge


def test_magnification_map_on_another_grid():
    lens = analytic.IsothermalSphere(CENTRE, theta_e=3.0 * u.arcsec)
    field, _ = field_for([lens], shape=(200, 200))
    cutout = analytic.make_wcs(CENTRE, (120, 100), 0.08 * u.arcsec, rotation=30 * u.deg)
    mu = field.magnification_map_on(cutout, (120, 100), 2.0)
    assert mu.shape == (120, 100)
    coords = cutout.pixel_to_world(np.array([10, 15, 90]), np.array([20, 100, 100]))
    exact = field.magnification(coords, 2.0)
    np.testing.assert_allclose(mu[[20, 100, 100], [10, 15, 90]], exact, rtol=0.02)


@pytest.mark.parametrize("kwargs, phrase", [
    (dict(units="furlong"), "Unknown deflection units"),
    (dict(z_norm=0.3), "at or below"),
    (dict(z_lens=-1), "positive"),
])
def test_bad_values(kwargs, phrase):
    wcs = analytic.make_wcs(CENTRE, (50, 50), SCALE)
    args = dict(units="arcsec", z_lens=Z_LENS)
    args.update(kwargs)
    with pytest.raises(LensviewInputError, match=phrase):
        lv.DeflectionField(np.zeros((50, 50)), np.zeros((50, 50)), wcs, **args)


def test_bad_arrays_and_wcs():
    wcs = analytic.make_wcs(CENTRE, (50, 50), SCALE)
    with pytest.raises(LensviewInputError, match="differ in shape"):
        lv.DeflectionField(np.zeros((50, 50)), np.zeros((50, 40)), wcs, z_lens=Z_LENS)
    linear = WCS(naxis=2)
    with pytest.raises(LensviewInputError, match="celestial WCS"):
        lv.DeflectionField(np.zeros((50, 50)), np.zeros((50, 50)), linear, z_lens=Z_LENS)
    with pytest.raises(LensviewInputError, match="all NaN"):
        lv.DeflectionField(np.full((50, 50), np.nan), np.zeros((50, 50)), wcs, z_lens=Z_LENS)
    field = lv.DeflectionField(np.zeros((50, 50)), np.zeros((50, 50)), wcs, z_lens=Z_LENS)
    with pytest.raises(LensviewInputError, match="at or below"):
        field.magnification(CENTRE, 0.2)


def test_float32_maps_stay_float32():
    lens = analytic.IsothermalSphere(CENTRE, theta_e=3.0 * u.arcsec)
    field, _ = field_for([lens], dtype=np.float32, shape=(120, 120))
    assert all(a.dtype == np.float32 for a in field._alpha)  # kept as given, not upcast
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert np.isfinite(field.magnification(CENTRE.directional_offset_by(0 * u.deg, 2 * u.arcsec), 2.0))


def test_model_without_overlap_is_an_input_error():
    field, _ = field_for([analytic.IsothermalSphere(CENTRE, theta_e=3.0 * u.arcsec)], shape=(100, 100))
    elsewhere = analytic.make_wcs(CENTRE.directional_offset_by(90 * u.deg, 60 * u.arcsec), (80, 80),
                                  SCALE)
    with pytest.raises(LensviewInputError, match="does not cover any part of the cutout"):
        field.require_overlap(elsewhere, (80, 80))
    field.require_overlap(analytic.make_wcs(CENTRE, (80, 80), SCALE), (80, 80))
    assert field.caustics(2.0) is field.caustics(2.0)  # cached per source redshift


def test_shear_and_eigenvalues_on_non_square_pixels():
    """gamma is not invariant under a non-conformal pixel grid; lensview takes the
    Jacobian to sky axes first."""
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [CENTRE.ra.deg, CENTRE.dec.deg]
    wcs.wcs.crpix = [100.5, 80.5]
    wcs.wcs.cdelt = [-0.04 / 3600, 0.08 / 3600]
    wcs.wcs.set()
    lens = analytic.IsothermalEllipsoid(CENTRE, theta_e=3.0 * u.arcsec, q=0.7, pa=30 * u.deg)
    ax, ay = analytic.deflection_maps([lens], wcs, (160, 200))
    field = lv.DeflectionField(ax, ay, wcs, z_lens=Z_LENS)
    coords = CENTRE.directional_offset_by(np.linspace(0, 300, 7) * u.deg, 2.5 * u.arcsec)
    q = field.lens_quantities(coords, 2.0)
    # Isothermal: gamma = kappa, lambda_t = 1 - 2 kappa, lambda_r = 1 (Kormann et al. 1994).
    np.testing.assert_allclose(q["gamma"], q["kappa"], rtol=1e-4)
    np.testing.assert_allclose(q["lambda_t"], 1 - 2 * q["kappa"], atol=1e-4)
    np.testing.assert_allclose(q["lambda_r"], 1.0, atol=1e-4)
    curves = field.critical_curves(2.0)
    assert [c.kind for c in curves] == ["tangential"]
    maps = field.grid_maps(2.0)
    resolved = np.isfinite(maps["kappa"]) & (maps["kappa"] < 1.0)  # away from the singular centre
    assert resolved.sum() > 15000
    np.testing.assert_allclose(maps["gamma"][resolved], maps["kappa"][resolved], rtol=2e-3)
