"""Analytic profiles against their published closed forms, and the map conventions."""

import numpy as np
import pytest
import astropy.units as u
from astropy import constants as const
from astropy.coordinates import SkyCoord
from astropy.cosmology import FlatLambdaCDM, Planck18
from astropy.wcs import WCS
from scipy.integrate import quad

from lensview import analytic as A
from lensview.errors import LensviewInputError

CENTRE = SkyCoord(150.1 * u.deg, 2.2 * u.deg)


def numerical_jacobian(profile, x, y, h=1e-3):
    """Fourth-order central differences of the deflection (independent of the complex step)."""
    def diff(dx, dy):
        plus2 = np.array(profile.deflection(x + 2 * dx, y + 2 * dy))
        plus1 = np.array(profile.deflection(x + dx, y + dy))
        minus1 = np.array(profile.deflection(x - dx, y - dy))
        minus2 = np.array(profile.deflection(x - 2 * dx, y - 2 * dy))
        return (-plus2 + 8 * plus1 - 8 * minus1 + minus2) / (12 * h)
    (a11, a21), (a12, a22) = diff(h, 0.0), diff(0.0, h)
    return a11, a12, a21, a22


def det_a(jacobian):
    a11, a12, a21, a22 = jacobian
    return (1 - a11) * (1 - a22) - a12 * a21


def test_point_mass_image_pair_magnifications_paczynski():
    theta_e = 2.0
    lens = A.PointMass(CENTRE, theta_e * u.arcsec)
    u_src = np.array([0.05, 0.3, 1.0, 2.5])
    direction = np.radians(35.0)
    # Images at x = (u +- sqrt(u^2 + 4)) / 2 on the line through the source, and
    # mu_total = |mu+| + |mu-| = (u^2 + 2) / (u sqrt(u^2 + 4)) (Paczynski 1986, ApJ 304, 1).
    x_plus = (u_src + np.sqrt(u_src**2 + 4)) / 2
    x_minus = (u_src - np.sqrt(u_src**2 + 4)) / 2
    mu = []
    for xi in (x_plus, x_minus):
        x, y = xi * theta_e * np.sin(direction), xi * theta_e * np.cos(direction)
        ax, ay = lens.deflection(x, y)
        # Both images map to the same source (lens equation, same reference).
        np.testing.assert_allclose(np.hypot(x - ax, y - ay), u_src * theta_e, rtol=1e-12)
        mu.append(1 / det_a(lens.jacobian(x, y)))
    mu_plus, mu_minus = mu
    total = (u_src**2 + 2) / (u_src * np.sqrt(u_src**2 + 4))
    np.testing.assert_allclose(np.abs(mu_plus) + np.abs(mu_minus), total, rtol=1e-12)
    # The outer image has even parity, the inner one odd; mu+ + mu- = 1 (same reference).
    assert np.all(mu_plus > 0) and np.all(mu_minus < 0)
    np.testing.assert_allclose(mu_plus + mu_minus, 1.0, rtol=1e-12)


def test_point_mass_magnification_map_on_rotated_grid():
    theta_e = 1.5
    lens = A.PointMass(CENTRE, theta_e * u.arcsec)
    shape = (40, 57)  # no pixel on the lens itself
    wcs = A.make_wcs(CENTRE, shape, 0.13 * u.arcsec, rotation=20 * u.deg)
    mu = A.magnification_map([lens], wcs, shape)
    x, y = A.plane_coordinates(wcs, shape)
    cx, cy = A.sky_to_plane(wcs, CENTRE)  # 0 to within 1e-10 arcsec (double precision in degrees)
    assert abs(cx) < 1e-10 and abs(cy) < 1e-10
    xi = np.hypot(x - cx, y - cy) / theta_e
    u_src = np.abs(xi - 1 / xi)
    root = u_src * np.sqrt(u_src**2 + 4)
    # mu = 1/2 +- total/2 for the image outside / inside the ring,
    # total = (u^2 + 2)/(u sqrt(u^2 + 4))
    # (Paczynski 1986); total - 1 = 4 / (root (u^2 + 2 + root)) avoids cancelling far inside.
    excess = 4 / (root * (u_src**2 + 2 + root))
    expected = np.where(xi > 1, 1 + 0.5 * excess, -0.5 * excess)
    # Compared as det A = 1/mu, which stays finite (and well conditioned) at the ring.
    np.testing.assert_allclose(1 / mu, 1 / expected, rtol=1e-12, atol=1e-12)
    assert np.abs(mu).max() > 50  # the grid reaches close to the Einstein ring


def test_sis_einstein_radius_from_velocity_dispersion():
    sigma = 250 * u.km / u.s
    z_lens, z_source = 0.3, 2.0
    sis = A.IsothermalSphere.from_velocity_dispersion(sigma, z_lens, z_source, CENTRE)
    unit = 4 * np.pi * (sigma / const.c).decompose().value ** 2 * u.rad
    d_ls = Planck18.angular_diameter_distance_z1z2(z_lens, z_source)
    d_s = Planck18.angular_diameter_distance(z_source)
    # theta_E = 4 pi (sigma/c)^2 D_ls/D_s (Narayan & Bartelmann 1996, arXiv:astro-ph/9606001,
    # sec. 3.3; distances from astropy.cosmology as the reference library).
    expected = (unit * (d_ls / d_s).decompose()).to(u.arcsec)
    assert sis.source_theta_e.to_value(u.arcsec) == pytest.approx(expected.value, rel=1e-12)
    assert sis.theta_e == pytest.approx(unit.to_value(u.arcsec), rel=1e-12)
    # sigma = 250 km/s gives 4 pi (sigma/c)^2 close to 1.8 arcsec (from memory).
    assert 1.75 < sis.theta_e < 1.85
    # Einstein-de Sitter: D_C(z) = (2c/H0)(1 - 1/sqrt(1+z)) in a flat universe (Hogg 1999,
    # arXiv:astro-ph/9905116), so D_ls/D_s = (D_C(z_s) - D_C(z_l)) / D_C(z_s).
    eds = FlatLambdaCDM(H0=70, Om0=1.0)
    sis_eds = A.IsothermalSphere.from_velocity_dispersion(sigma, z_lens, z_source, CENTRE, eds)
    dc = lambda z: 1 - 1 / np.sqrt(1 + z)  # noqa: E731
    ratio = (dc(z_source) - dc(z_lens)) / dc(z_source)
    assert sis_eds.source_theta_e.to_value(u.arcsec) == pytest.approx(
        unit.to_value(u.arcsec) * ratio, rel=1e-8)
    with pytest.raises(LensviewInputError):
        A.IsothermalSphere.from_velocity_dispersion(sigma, 2.0, 1.0, CENTRE)


def test_sis_magnification_and_cored_sphere_enclosed_mass():
    sis = A.IsothermalSphere(CENTRE, 2.0 * u.arcsec)
    r = np.array([0.7, 1.5, 2.5, 6.0])
    # SIS: |alpha| = theta_E and mu = theta / (theta - theta_E) (Narayan & Bartelmann 1996).
    ax, ay = sis.deflection(r * 0.6, r * 0.8)
    np.testing.assert_allclose(np.hypot(ax, ay), 2.0, rtol=1e-14)
    np.testing.assert_allclose(1 / det_a(sis.jacobian(r * 0.6, r * 0.8)), r / (r - 2.0), rtol=1e-12)
    cored = A.IsothermalSphere(CENTRE, 2.0 * u.arcsec, core=0.4 * u.arcsec)
    for radius in (0.05, 1.0, 3.0):
        mass, _ = quad(lambda rr: 2 * np.pi * rr * cored.convergence(rr, 0.0), 0, radius)
        # Axisymmetric lens: alpha(r) = (1/(pi r)) * integral of kappa inside r
        # (Schneider, Ehlers & Falco 1992, ch. 8).
        assert cored.deflection(radius, 0.0)[0] == pytest.approx(mass / (np.pi * radius), rel=1e-10)
    assert cored.deflection(0.0, 0.0) == (0.0, 0.0)  # finite core: no deflection at the centre
    # Singular centres have no deflection and no Jacobian (common practice: NaN, not a number).
    assert np.isnan(sis.deflection(0.0, 0.0)[0])
    assert np.all(np.isnan(A.PointMass(CENTRE, 1 * u.arcsec).jacobian(0.0, 0.0)))


@pytest.mark.parametrize("q, core", [(0.65, 0.0), (0.3, 0.0), (0.65, 0.4), (0.9, 1.0)])
def test_ellipsoid_poisson_equation(q, core):
    lens = A.IsothermalEllipsoid(CENTRE, 3 * u.arcsec, q, 40 * u.deg, core=core * u.arcsec)
    rng = np.random.default_rng(0)
    r = rng.uniform(0.3, 8.0, 300)
    phi = rng.uniform(0, 2 * np.pi, 300)
    x, y = r * np.cos(phi), r * np.sin(phi)
    kappa = lens.convergence(x, y)
    fd = numerical_jacobian(lens, x, y)
    # Poisson equation: div alpha = 2 kappa, and a gradient field is curl-free
    # (Schneider, Ehlers & Falco 1992, ch. 5), from plain differences of the deflection.
    np.testing.assert_allclose((fd[0] + fd[3]) / 2, kappa, rtol=1e-8)
    np.testing.assert_allclose(fd[1], fd[2], rtol=0, atol=1e-8)
    # The complex-step Jacobian agrees with the differences and is exact to rounding.
    exact = lens.jacobian(x, y)
    for ours, theirs in zip(exact, fd):
        np.testing.assert_allclose(ours, theirs, rtol=0, atol=1e-8)
    np.testing.assert_allclose((exact[0] + exact[3]) / 2, kappa, rtol=1e-12)


def test_singular_ellipsoid_matches_kormann_form_and_its_critical_curve():
    q, theta_e, pa = 0.55, 3.0, np.radians(-25.0)
    lens = A.IsothermalEllipsoid(CENTRE, theta_e * u.arcsec, q, pa * u.rad)
    rng = np.random.default_rng(5)
    r = rng.uniform(0.2, 9.0, 200)
    phi = rng.uniform(0, 2 * np.pi, 200)
    # Kormann, Schneider & Bartelmann 1994 (from memory): with kappa =
    # sqrt(f) / (2 sqrt(x1^2 + f^2 x2^2)) (major axis x2), alpha_1 =
    # sqrt(f)/f' arsinh(f'/f cos phi), alpha_2 = sqrt(f)/f' arcsin(f' sin phi),
    # in units of theta_E, independent of radius.
    x1, x2 = r * np.cos(phi), r * np.sin(phi)  # x2 along the major axis
    f_prime = np.sqrt(1 - q * q)
    alpha_1 = theta_e * np.sqrt(q) / f_prime * np.arcsinh(f_prime / q * np.cos(phi))
    alpha_2 = theta_e * np.sqrt(q) / f_prime * np.arcsin(f_prime * np.sin(phi))
    major = np.array([np.sin(pa), np.cos(pa)])  # East, North
    minor = np.array([np.cos(pa), -np.sin(pa)])
    east, north = x2 * major[0] + x1 * minor[0], x2 * major[1] + x1 * minor[1]
    ax, ay = lens.deflection(east, north)
    np.testing.assert_allclose(ax, alpha_2 * major[0] + alpha_1 * minor[0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(ay, alpha_2 * major[1] + alpha_1 * minor[1], rtol=0, atol=1e-12)
    np.testing.assert_allclose(lens.convergence(east, north),
                               np.sqrt(q) * theta_e / (2 * np.hypot(x1, q * x2)), rtol=1e-13)
    # Isothermal: |gamma| = kappa everywhere (Kormann et al. 1994), so det A = 1 - 2 kappa and the
    # tangential critical curve is the ellipse q x'^2 + y'^2 / q = theta_E^2.
    a11, a12, a21, a22 = lens.jacobian(east, north)
    gamma = np.hypot((a11 - a22) / 2, a12)
    np.testing.assert_allclose(gamma, (a11 + a22) / 2, rtol=1e-12)
    t = np.linspace(0, 2 * np.pi, 50)
    on_major, on_minor = theta_e / np.sqrt(q) * np.cos(t), theta_e * np.sqrt(q) * np.sin(t)
    curve_e = on_major * major[0] + on_minor * minor[0]
    curve_n = on_major * major[1] + on_minor * minor[1]
    np.testing.assert_allclose(det_a(lens.jacobian(curve_e, curve_n)), 0.0, atol=1e-12)


@pytest.mark.parametrize("core", [0.0, 0.5])
def test_ellipsoid_tends_to_the_sphere(core):
    sphere = A.IsothermalSphere(CENTRE, 3 * u.arcsec, core=core * u.arcsec)
    rng = np.random.default_rng(1)
    x, y = rng.uniform(-6, 6, (2, 200))
    exact = np.array(sphere.deflection(x, y))
    round_one = A.IsothermalEllipsoid(CENTRE, 3 * u.arcsec, 1.0, 70 * u.deg, core=core * u.arcsec)
    np.testing.assert_allclose(np.array(round_one.deflection(x, y)), exact, rtol=0, atol=1e-13)
    # q -> 1: kappa and alpha reduce to the sphere's (Kormann et al. 1994; Narayan & Bartelmann
    # 1996), the difference shrinking in proportion to 1 - q.
    errors = []
    for eps in (1e-2, 1e-3, 1e-4, 1e-7):
        nearly = A.IsothermalEllipsoid(CENTRE, 3 * u.arcsec, 1 - eps, 70 * u.deg,
                                       core=core * u.arcsec)
        errors.append(np.abs(np.array(nearly.deflection(x, y)) - exact).max())
    assert errors[-1] < 1e-6
    assert 5 < errors[0] / errors[1] < 20 and 5 < errors[1] / errors[2] < 20


def test_nfw_convergence_mean_convergence_and_deflection():
    kappa_s, r_s = 0.4, 15.0
    nfw = A.NFW(CENTRE, kappa_s, r_s * u.arcsec)

    def projected(radius):
        # Sigma(R) = 2 integral rho dz of rho = rho_s / ((r/r_s)(1 + r/r_s)^2) (Navarro, Frenk &
        # White 1997, ApJ 490, 493), in units of kappa_s = rho_s r_s / Sigma_cr.
        x = radius / r_s
        value, _ = quad(lambda t: 1 / (np.hypot(x, t) * (1 + np.hypot(x, t)) ** 2), 0, np.inf,
                        epsabs=0, epsrel=1e-12, limit=400)
        return 2 * kappa_s * value

    for radius in (0.3, 7.0, 14.9, 15.0, 15.1, 40.0, 300.0):
        assert nfw.convergence(radius, 0.0) == pytest.approx(projected(radius), rel=1e-9)
    # kappa(x = 1) = 2 kappa_s / 3 and h(1) = 1 + ln(1/2) (Wright & Brainerd 2000, ApJ 534, 34).
    # rel 1e-12: thousands of float64 steps, room for any release's rounding of log/arccos.
    assert nfw.convergence(r_s, 0.0) == pytest.approx(2 * kappa_s / 3, rel=1e-12)
    assert nfw.mean_convergence(r_s) == pytest.approx(4 * kappa_s * (1 + np.log(0.5)), rel=1e-12)
    for radius in (0.01, 3.0, 15.0 * (1 - 1e-9), 15.0, 15.0 * (1 + 1e-9), 40.0):
        mass, _ = quad(lambda rr: 2 * np.pi * rr * projected(rr), 0, radius, epsrel=1e-11,
                       limit=200, points=[r_s] if radius > r_s else None)
        # Mean convergence inside x = 4 kappa_s h(x) / x^2 (Wright & Brainerd 2000) and, for an
        # axisymmetric lens, alpha(r) = r * mean kappa (Schneider, Ehlers & Falco 1992, ch. 8).
        mean = mass / (np.pi * radius**2)
        assert nfw.mean_convergence(radius) == pytest.approx(mean, rel=1e-8)
        assert nfw.deflection(radius, 0.0)[0] == pytest.approx(radius * mean, rel=1e-8)
    # Across x = 1 the Jacobian stays smooth and obeys the Poisson equation.
    x = r_s * np.array([0.2, 0.999999, 1.0, 1.000001, 2.0])
    a11, a12, a21, a22 = nfw.jacobian(x * 0.6, x * 0.8)
    np.testing.assert_allclose((a11 + a22) / 2, nfw.convergence(x * 0.6, x * 0.8), rtol=1e-12)
    assert nfw.deflection(0.0, 0.0) == (0.0, 0.0)


def test_external_shear_jacobian():
    gamma, pa = 0.12, np.radians(30.0)
    shear = A.ExternalShear(gamma, pa * u.rad, CENTRE)
    x, y = np.array([1.0, -3.0]), np.array([2.0, 0.5])
    a11, a12, a21, a22 = shear.jacobian(x, y)
    # psi = (gamma/2) r^2 cos 2(phi - phi_gamma) (Keeton 2001): a = gamma [[cos 2t, sin 2t],
    # [sin 2t, -cos 2t]] with t the angle of the axis from +x (East): t = 90 deg - pa.
    t = np.pi / 2 - pa
    np.testing.assert_allclose(a11, gamma * np.cos(2 * t), atol=1e-15)
    np.testing.assert_allclose(a12, gamma * np.sin(2 * t), atol=1e-15)
    np.testing.assert_allclose(a21, gamma * np.sin(2 * t), atol=1e-15)
    np.testing.assert_allclose(a22, -gamma * np.cos(2 * t), atol=1e-15)
    ax, ay = shear.deflection(x, y)
    np.testing.assert_allclose(ax, a11 * x + a12 * y, atol=1e-15)
    np.testing.assert_allclose(ay, a21 * x + a22 * y, atol=1e-15)
    assert np.all(shear.convergence(x, y) == 0)


def test_composite_lens_sums_its_members():
    second = CENTRE.directional_offset_by(60 * u.deg, 4 * u.arcsec)
    members = [A.IsothermalEllipsoid(CENTRE, 3 * u.arcsec, 0.7, 10 * u.deg),
               A.NFW(second, 0.2, 20 * u.arcsec), A.ExternalShear(0.05, 100 * u.deg, CENTRE)]
    lens = A.CompositeLens(members)
    assert len(lens) == 3 and list(lens) == members
    shape = (30, 40)
    wcs = A.make_wcs(CENTRE, shape, 0.2 * u.arcsec, rotation=15 * u.deg)
    total = A.deflection_maps(lens, wcs, shape)
    parts = [A.deflection_maps(m, wcs, shape) for m in members]
    for k in range(2):
        np.testing.assert_allclose(total[k], sum(p[k] for p in parts), rtol=0, atol=1e-12)
    x, y = A.plane_coordinates(wcs, shape)
    # The composite's own frame (gnomonic about its centre, which is CRVAL here) is the map plane.
    own = lens.deflection(x, y)
    back = np.linalg.inv(wcs.pixel_scale_matrix * 3600) @ np.array([own[0].ravel(), own[1].ravel()])
    np.testing.assert_allclose(back[0], total[0].ravel() / 0.2, rtol=0, atol=1e-9)
    np.testing.assert_allclose(A.convergence_map(lens, wcs, shape),
                               sum(A.convergence_map(m, wcs, shape) for m in members), atol=1e-14)


def skewed_wcs():
    """A TAN WCS with unequal, skewed pixel axes and East to the right."""
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [CENTRE.ra.deg, CENTRE.dec.deg]
    wcs.wcs.crpix = [20.5, 15.5]
    wcs.wcs.cd = np.array([[0.05, 0.012], [-0.02, 0.07]]) / 3600
    wcs.wcs.set()
    return wcs


@pytest.mark.parametrize("wcs", [
    A.make_wcs(CENTRE, (60, 80), 0.1 * u.arcsec),
    A.make_wcs(CENTRE, (60, 80), 0.1 * u.arcsec, rotation=33 * u.deg),
    A.make_wcs(CENTRE, (60, 80), 0.1 * u.arcsec, rotation=-70 * u.deg, flip_east=False),
    skewed_wcs(),
], ids=["north-up", "rotated", "rotated-mirrored", "skewed"])
def test_pixel_axis_components_on_rotated_and_flipped_grids(wcs):
    shape = (60, 80)
    theta_e = 1.2
    sis = A.IsothermalSphere(CENTRE, theta_e * u.arcsec)
    ax, ay = A.deflection_maps(sis, wcs, shape)
    m = wcs.pixel_scale_matrix * 3600
    scales = np.sqrt((m**2).sum(axis=0))
    # Converted back to East/North, the pixel-axis components give the plane deflection.
    x, y = A.plane_coordinates(wcs, shape)
    east, north = sis.deflection(x, y)
    along_x, along_y = ax / scales[0], ay / scales[1]  # pixels
    np.testing.assert_allclose(m[0, 0] * along_x + m[0, 1] * along_y, east, atol=1e-12)
    np.testing.assert_allclose(m[1, 0] * along_x + m[1, 1] * along_y, north, atol=1e-12)
    # Independent check on the sky: tracing pixels through the map (beta = theta - alpha in
    # pixels) puts each source on the same position angle as its image, theta_E closer to the
    # lens (SIS, Narayan & Bartelmann 1996; separations and position angles from astropy).
    py, px = np.mgrid[0:shape[0]:7, 0:shape[1]:9].astype(float)
    rows, cols = py.astype(int), px.astype(int)
    image = wcs.pixel_to_world(px, py)
    source = wcs.pixel_to_world(px - ax[rows, cols] / scales[0], py - ay[rows, cols] / scales[1])
    r = CENTRE.separation(image).arcsec
    outside = r > 1.5 * theta_e
    np.testing.assert_allclose(CENTRE.separation(source).arcsec[outside], r[outside] - theta_e,
                               atol=1e-7)
    turn = (CENTRE.position_angle(source) - CENTRE.position_angle(image)).wrap_at(180 * u.deg)
    assert np.abs(turn.rad[outside]).max() < 1e-8


def test_make_wcs_orientation_and_plane_round_trip():
    wcs = A.make_wcs(CENTRE, (50, 70), 0.05 * u.arcsec, rotation=30 * u.deg)
    centre_pixel = wcs.world_to_pixel(CENTRE)
    np.testing.assert_allclose(centre_pixel, [34.5, 24.5], atol=1e-9)  # middle of the grid
    up = wcs.pixel_to_world(34.5, 25.5)
    right = wcs.pixel_to_world(35.5, 24.5)
    # Position angles North through East (IAU convention, via astropy); +y at the rotation
    # angle, +x 90 degrees further round (East to the left of North).
    assert CENTRE.position_angle(up).deg == pytest.approx(30.0, abs=1e-6)
    assert CENTRE.position_angle(right).wrap_at(360 * u.deg).deg == pytest.approx(300.0, abs=1e-6)
    assert CENTRE.separation(up).arcsec == pytest.approx(0.05, rel=1e-6)
    mirrored = A.make_wcs(CENTRE, (50, 70), 0.05 * u.arcsec, flip_east=False)
    east = mirrored.pixel_to_world(35.5, 24.5)
    assert CENTRE.position_angle(east).deg == pytest.approx(90, abs=1e-6)
    coords = CENTRE.directional_offset_by([10, 100, 250] * u.deg, [0.3, 1.0, 2.0] * u.arcsec)
    x, y = A.sky_to_plane(wcs, coords)
    assert A.plane_to_sky(wcs, x, y).separation(coords).arcsec.max() < 1e-9
    assert A.plane_to_sky(wcs, x * u.arcsec, y * u.arcsec).separation(coords).arcsec.max() < 1e-9


def test_bad_input_is_reported():
    with pytest.raises(LensviewInputError, match=r"\(0, 1\]"):
        A.IsothermalEllipsoid(CENTRE, 1 * u.arcsec, 1.3, 0 * u.deg)
    with pytest.raises(LensviewInputError, match="positive"):
        A.IsothermalSphere(CENTRE, -1 * u.arcsec)
    with pytest.raises(LensviewInputError, match="angle"):
        A.PointMass(CENTRE, 3 * u.km)
    with pytest.raises(LensviewInputError, match="single SkyCoord"):
        A.NFW((150.0, 2.0), 0.2, 10 * u.arcsec)
    sin = WCS(naxis=2)
    sin.wcs.ctype = ["RA---SIN", "DEC--SIN"]
    with pytest.raises(LensviewInputError, match="TAN"):
        A.deflection_maps(A.PointMass(CENTRE, 1 * u.arcsec), sin, (10, 10))
    with pytest.raises(LensviewInputError, match="shape"):
        A.make_wcs(CENTRE, (0, 10), 0.1 * u.arcsec)
    with pytest.raises(LensviewInputError, match="profiles"):
        A.deflection_maps(["not a lens"], A.make_wcs(CENTRE, (5, 5), 0.1 * u.arcsec), (5, 5))
