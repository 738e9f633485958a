"""Analytic profiles against their published closed forms."""

import numpy as np
import pytest
import astropy.units as u
from astropy import constants as const
from astropy.coordinates import SkyCoord
from scipy.integrate import quad

from lensview import analytic as A

CENTRE = SkyCoord(150.1 * u.deg, 2.2 * u.deg)


def test_point_mass_total_magnification_paczynski():
    lens = A.PointMass(CENTRE, 2.0 * u.arcsec)
    theta = np.array([2.5, 3.0, 4.0])
    a11, a12, a21, a22 = lens.jacobian(theta, 0 * theta)
    mu_plus = 1 / ((1 - a11) * (1 - a22) - a12 * a21)
    x = theta / 2.0
    u_src = x - 1 / x
    # mu_+ = (u^2 + 2) / (2 u sqrt(u^2 + 4)) + 1/2 (Paczynski 1986, ApJ 304, 1).
    expected = (u_src**2 + 2) / (2 * u_src * np.sqrt(u_src**2 + 4)) + 0.5
    np.testing.assert_allclose(mu_plus, expected, rtol=1e-12)


def test_sis_einstein_radius_from_velocity_dispersion():
    from lensview.cosmology import distance_ratio

    sigma = 250 * u.km / u.s
    sis = A.IsothermalSphere.from_velocity_dispersion(sigma, 0.3, 2.0, CENTRE)
    # theta_E = 4 pi (sigma/c)^2 D_ls/D_s (Narayan & Bartelmann 1996, eq. for the SIS).
    expected = 4 * np.pi * (sigma / const.c).decompose().value**2 * distance_ratio(0.3, 2.0)
    assert sis.theta_e * distance_ratio(0.3, 2.0) == pytest.approx(np.degrees(expected) * 3600, rel=1e-12)


@pytest.mark.parametrize("core", [0.0, 0.3])
def test_ellipsoid_poisson_equation_and_sphere_limit(core):
    lens = A.IsothermalEllipsoid(CENTRE, 3 * u.arcsec, 0.65, 40 * u.deg, core=core * u.arcsec)
    rng = np.random.default_rng(0)
    x, y = rng.uniform(-6, 6, (2, 200))
    a11, a12, a21, a22 = lens.jacobian(x, y)
    # Poisson equation: div alpha = 2 kappa; a potential field has no curl
    # (Schneider, Ehlers & Falco 1992, ch. 5).
    np.testing.assert_allclose((a11 + a22) / 2, lens.convergence(x, y), rtol=1e-10)
    np.testing.assert_allclose(a12, a21, atol=1e-12)
    sphere = A.IsothermalSphere(CENTRE, 3 * u.arcsec, core=core * u.arcsec)
    nearly = A.IsothermalEllipsoid(CENTRE, 3 * u.arcsec, 0.999999, 40 * u.deg, core=core * u.arcsec)
    np.testing.assert_allclose(nearly.deflection(x, y), sphere.deflection(x, y), atol=1e-5)


def test_singular_ellipsoid_critical_curve_is_kappa_half_ellipse():
    q, theta_e = 0.7, 3.0
    lens = A.IsothermalEllipsoid(CENTRE, theta_e * u.arcsec, q, 0 * u.deg)
    # Major axis along North (pa = 0): the curve crosses the axes at theta_E/sqrt(q), theta_E sqrt(q)
    # (Kormann et al. 1994: gamma = kappa, curve at kappa = 1/2).
    for dx, dy in ((0.0, theta_e / np.sqrt(q)), (theta_e * np.sqrt(q), 0.0)):
        assert lens.convergence(dx, dy) == pytest.approx(0.5, rel=1e-12)


def test_nfw_mean_convergence_is_the_average_of_kappa():
    nfw = A.NFW(CENTRE, 0.4, 15 * u.arcsec)
    for r in (3.0, 15.0, 40.0):
        integral, _ = quad(lambda rr: 2 * np.pi * rr * nfw.convergence(rr, 0.0), 0, r, limit=200)
        # Mean convergence inside r = 4 kappa_s h(x)/x^2 (Wright & Brainerd 2000, ApJ 534, 34).
        assert nfw.mean_convergence(r) == pytest.approx(integral / (np.pi * r * r), rel=1e-6)
        ax, _ = nfw.deflection(np.array([r]), np.array([0.0]))
        assert ax[0] == pytest.approx(r * nfw.mean_convergence(r), rel=1e-10)


def test_external_shear_jacobian():
    shear = A.ExternalShear(0.12, 30 * u.deg, CENTRE)
    a11, a12, a21, a22 = shear.jacobian(np.array([1.0]), np.array([2.0]))
    # Pure shear: zero trace, symmetric, eigenvalues +-gamma (Keeton 2001).
    assert a11 + a22 == pytest.approx(0, abs=1e-14)
    assert np.sqrt(a11**2 + a12**2)[0] == pytest.approx(0.12)


@pytest.mark.parametrize("rotation, flip", [(0 * u.deg, True), (33 * u.deg, True), (-70 * u.deg, False)])
def test_pixel_axis_components_reproduce_plane_deflection(rotation, flip):
    wcs = A.make_wcs(CENTRE, (60, 80), 0.1 * u.arcsec, rotation=rotation, flip_east=flip)
    lens = A.IsothermalEllipsoid(CENTRE.directional_offset_by(10 * u.deg, 1 * u.arcsec),
                                 2 * u.arcsec, 0.7, 15 * u.deg)
    ax, ay = A.deflection_maps(lens, wcs, (60, 80))
    x, y = A.plane_coordinates(wcs, (60, 80))
    cx, cy = A.sky_to_plane(wcs, lens.center)
    east, north = lens.deflection(x - cx, y - cy)
    m = wcs.pixel_scale_matrix * 3600
    scales = np.sqrt((m**2).sum(axis=0))
    back_e = m[0, 0] * ax / scales[0] + m[0, 1] * ay / scales[1]
    back_n = m[1, 0] * ax / scales[0] + m[1, 1] * ay / scales[1]
    np.testing.assert_allclose(back_e, east, atol=1e-12)
    np.testing.assert_allclose(back_n, north, atol=1e-12)
    # Plane coordinates agree with sky positions through the WCS (astropy.wcs).
    sky = A.plane_to_sky(wcs, x[5, 7], y[5, 7])
    assert sky.separation(wcs.pixel_to_world(7, 5)).to_value(u.arcsec) < 1e-9
