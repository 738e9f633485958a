"""Critical curves and caustics against closed-form lenses (tests/closed_form.py)."""

import numpy as np
import pytest
import astropy.units as u
from scipy.optimize import brentq

import lensview as lv
from lensview.lens import field as deflection_field
from lensview.cosmology import distance_ratio
from lensview.errors import LensviewInputError

from closed_form import cored_sphere, grid, make_wcs, nfw_alpha, sie, sie_curve_distance

Z_LENS = 0.4


def field_from(ax, ay, wcs, **kwargs):
    return lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS, **kwargs)


@pytest.mark.parametrize("q, pa_deg, map_rot, cutout_rot", [
    (0.6, 17.0, 0.0, 0.0),
    (0.75, 113.0, 35.0, -50.0),
    (0.8, 71.0, -20.0, 90.0),
])
def test_sie_tangential_curve_on_kappa_half_ellipse(q, pa_deg, map_rot, cutout_rot):
    n, theta_unit = 360, 90.0
    x0, y0 = n / 2 + 0.31, n / 2 - 0.17
    pa = np.radians(pa_deg)
    wcs = make_wcs(n, n, rotation_deg=map_rot)
    field = field_from(*sie(n, theta_unit, q, pa, x0, y0), wcs, name="sie")
    z_source = 2.0
    theta_e = theta_unit * distance_ratio(Z_LENS, z_source)
    assert theta_e > 50  # Einstein radius: geometric mean of the semi-axes
    curves = field.critical_curves(z_source)
    tangential = [c for c in curves if c.kind == "tangential"]
    assert len(tangential) == 1 and tangential[0].closed
    # Isothermal: gamma = kappa, so the tangential curve is kappa = 1/2 (Kormann et al. 1994).
    d = sie_curve_distance(tangential[0].map_pixels, theta_e, q, pa, x0, y0)
    assert np.sqrt(np.mean(d**2)) < 1e-4
    assert np.abs(d).max() < 1e-3
    # The same curve on a differently oriented, differently scaled cutout grid.
    cutout = make_wcs(500, 400, scale_arcsec=0.03, rotation_deg=cutout_rot, crval=(150.0003, 1.9998))
    on_cutout = tangential[0].to_pixels(cutout)
    back_x, back_y = wcs.world_to_pixel(cutout.pixel_to_world(on_cutout[:, 0], on_cutout[:, 1]))
    d_back = sie_curve_distance(np.column_stack([back_x, back_y]), theta_e, q, pa, x0, y0)
    assert np.abs(d_back).max() < 1e-3
    assert tangential[0].model == "sie"
    assert tangential[0].sky.frame.name == "icrs"


def test_cored_sphere_radii_and_kinds():
    n, theta_unit, core = 300, 60.0, 6.0
    x0, y0 = n / 2 + 0.4, n / 2 + 0.1
    field = field_from(*cored_sphere(n, theta_unit, core, x0, y0), make_wcs(n, n))
    z_source = 3.0
    f = distance_ratio(Z_LENS, z_source)

    def alpha(r):
        return f * theta_unit * (np.sqrt(r * r + core * core) - core) / r

    def dalpha(r, h=1e-5):
        return (alpha(r + h) - alpha(r - h)) / (2 * h)

    # Tangential: alpha/theta = 1; radial: d alpha / d theta = 1 (Narayan & Bartelmann 1996).
    r_t = brentq(lambda r: alpha(r) / r - 1, core, 3 * theta_unit)
    r_r = brentq(lambda r: dalpha(r) - 1, 0.05, r_t * 0.99)
    curves = field.critical_curves(z_source)
    kinds = sorted(c.kind for c in curves)
    assert kinds == ["radial", "tangential"]
    for curve in curves:
        radius = np.hypot(curve.map_pixels[:, 0] - x0, curve.map_pixels[:, 1] - y0)
        expected = r_t if curve.kind == "tangential" else r_r
        assert np.abs(radius - expected).max() < 1e-3
    radial_caustic = [c for c in field.caustics(z_source) if c.kind == "radial"][0]
    beta = np.hypot(radial_caustic.map_pixels[:, 0] - x0, radial_caustic.map_pixels[:, 1] - y0)
    # Radial caustic radius |theta_r - alpha(theta_r)| (lens equation, same reference).
    assert np.abs(beta - abs(r_r - alpha(r_r))).max() < 1e-3


def test_nfw_tangential_radius_where_mean_convergence_is_one():
    n, kappa_s, r_s = 300, 0.6, 40.0
    x0, y0 = n / 2 - 0.3, n / 2 + 0.45
    x, y = grid(n, x0, y0)
    r = np.hypot(x, y)
    r[r == 0] = 1e-9
    alpha = nfw_alpha(r, kappa_s, r_s)
    field = field_from(alpha * x / r, alpha * y / r, make_wcs(n, n))
    z_source = 2.5
    f = distance_ratio(Z_LENS, z_source)
    # Mean convergence inside r equals alpha(r)/r; the tangential curve has it equal to 1
    # (Wright & Brainerd 2000).
    r_t = brentq(lambda rr: f * nfw_alpha(rr, kappa_s, r_s) / rr - 1, 2.0, 140.0)
    tangential = [c for c in field.critical_curves(z_source) if c.kind == "tangential"]
    assert len(tangential) == 1
    radius = np.hypot(tangential[0].map_pixels[:, 0] - x0, tangential[0].map_pixels[:, 1] - y0)
    assert np.abs(radius - r_t).max() < 1e-3


@pytest.mark.parametrize("profile", ["point mass", "singular sphere"])
def test_no_spurious_curve_at_singular_centres(profile):
    n, theta_unit = 200, 40.0
    x0, y0 = n / 2 + 0.23, n / 2 - 0.38
    x, y = grid(n, x0, y0)
    r2 = x * x + y * y
    if profile == "point mass":
        # alpha = theta_E^2 theta / |theta|^2 (Paczynski 1986).
        ax, ay = theta_unit**2 * x / r2, theta_unit**2 * y / r2
    else:
        # SIS: alpha = theta_E theta / |theta| (Narayan & Bartelmann 1996).
        ax, ay = theta_unit * x / np.sqrt(r2), theta_unit * y / np.sqrt(r2)
    field = field_from(ax, ay, make_wcs(n, n))
    z_source = 2.0
    f = distance_ratio(Z_LENS, z_source)
    r_e = theta_unit * (np.sqrt(f) if profile == "point mass" else f)
    curves = field.critical_curves(z_source)
    assert len(curves) == 1
    assert curves[0].kind == "tangential"
    radius = np.hypot(curves[0].map_pixels[:, 0] - x0, curves[0].map_pixels[:, 1] - y0)
    assert np.abs(radius - r_e).max() < 1e-3
    assert len(curves.dropped) >= 1
    for loop in curves.dropped:
        cx, cy = field.sky_to_pixels(loop.centre)
        assert np.hypot(cx - x0, cy - y0) < 5


def test_redshift_scaling_matches_maps_made_for_that_redshift():
    n, theta_unit, q, pa = 260, 70.0, 0.7, 0.5
    x0, y0 = n / 2, n / 2 + 0.5
    ax, ay = sie(n, theta_unit, q, pa, x0, y0)
    wcs = make_wcs(n, n)
    unit = field_from(ax, ay, wcs)
    z_source = 3.3
    ratio = distance_ratio(Z_LENS, z_source)
    # Maps made for z_source are the unit maps times D_ls/D_s(z_source) (design notes, sec. 4).
    direct = field_from(ax * ratio, ay * ratio, wcs, z_norm=z_source)
    a = unit.critical_curves(z_source)[0].map_pixels
    b = direct.critical_curves(z_source)[0].map_pixels
    assert a.shape == b.shape
    # Vertices may slide along the curve by the float32 rounding of the cached terms,
    # never off it.
    np.testing.assert_allclose(a, b, atol=1e-4)
    theta_e = theta_unit * ratio
    for xy in (a, b):
        assert np.abs(sie_curve_distance(xy, theta_e, q, pa, x0, y0)).max() < 1e-5
    # A second redshift reuses the cached tile terms: no new tiles are computed.
    computed = unit.tiles.slot.max()
    unit.critical_curves(2.1)
    assert unit.tiles.slot.max() == computed


def test_masked_region_cuts_the_curve():
    n, theta_unit, q, pa = 260, 70.0, 0.7, 0.2
    x0, y0 = n / 2, n / 2
    ax, ay = sie(n, theta_unit, q, pa, x0, y0)
    ax[100:160, 180:] = np.nan
    field = field_from(ax, ay, make_wcs(n, n))
    curves = field.critical_curves(2.0)
    assert curves and not curves[0].closed
    xy = curves[0].map_pixels
    inside_mask = (xy[:, 1] > 100 - 3) & (xy[:, 1] < 160 + 2) & (xy[:, 0] > 180 - 3)
    assert not inside_mask.any()


def test_sie_caustic_has_four_cusps_and_curve_geometry():
    n, theta_unit, q, pa = 300, 90.0, 0.7, 0.3
    x0, y0 = n / 2 + 0.2, n / 2 + 0.3
    field = field_from(*sie(n, theta_unit, q, pa, x0, y0), make_wcs(n, n))
    z_source = 2.0
    theta_e = theta_unit * distance_ratio(Z_LENS, z_source)
    caustic = [c for c in field.caustics(z_source) if c.kind == "tangential"][0]
    # An isolated elliptical lens has a four-cusp (astroid-like) tangential caustic
    # (Schneider, Ehlers & Falco 1992, ch. 8; Kormann et al. 1994).
    assert len(caustic.cusps) == 4
    assert caustic.plane == "source"
    curve = field.critical_curves(z_source)[0]
    # Ellipse with semi-axes theta_e sqrt(q)/q and theta_e sqrt(q): area pi a b = pi theta_e^2;
    # the inscribed polygon of ~1 pixel chords falls short by ~(2/3) sagitta x perimeter.
    area = curve.area.to_value(u.arcsec**2) / 0.05**2
    assert area == pytest.approx(np.pi * theta_e**2, rel=1e-4)
    perimeter = curve.length.to_value(u.arcsec) / 0.05
    a, b = theta_e / np.sqrt(q), theta_e * np.sqrt(q)
    # Ramanujan's perimeter of an ellipse (accurate to ~1e-5 for this axis ratio, from memory).
    h = ((a - b) / (a + b)) ** 2
    ramanujan = np.pi * (a + b) * (1 + 3 * h / (10 + np.sqrt(4 - 3 * h)))
    assert perimeter == pytest.approx(ramanujan, rel=1e-4)


def test_hierarchical_search_finds_the_same_curves(monkeypatch):
    """Large maps locate curves on a coarse grid first; nothing may be missed,
    including the small curves of member galaxies."""
    n = 700
    x0, y0 = n / 2 + 0.3, n / 2 - 0.2
    ax, ay = sie(n, 160.0, 0.75, 0.4, x0, y0)
    rng = np.random.default_rng(3)
    for _ in range(12):
        gx, gy = rng.uniform(60, n - 60, 2)
        bx, by = sie(n, rng.uniform(2.0, 6.0), 0.8, rng.uniform(0, np.pi), gx + 0.37, gy + 0.11)
        ax += bx
        ay += by
    wcs = make_wcs(n, n)
    full = field_from(ax, ay, wcs)
    full_curves = full.critical_curves(2.0)
    monkeypatch.setattr(deflection_field, "HIERARCHY_THRESHOLD", 256)
    coarse = field_from(ax, ay, wcs)
    coarse_curves = coarse.critical_curves(2.0)
    assert coarse.tiles.slot.max() + 1 < 0.6 * coarse.tiles.slot.size
    assert len(coarse_curves) == len(full_curves) > 2
    for a, b in zip(full_curves, coarse_curves):
        assert len(a) == len(b)
        np.testing.assert_allclose(a.map_pixels[np.argsort(a.map_pixels[:, 0])],
                                   b.map_pixels[np.argsort(b.map_pixels[:, 0])], atol=1e-9)


def test_source_redshift_in_front_of_lens_is_an_input_error():
    n = 100
    field = field_from(*sie(n, 30.0, 0.7, 0.0, 50, 50), make_wcs(n, n))
    with pytest.raises(LensviewInputError, match="at or below"):
        field.critical_curves(0.3)


def test_bad_redshift_text_is_an_input_error_and_cusps_have_sky_positions():
    n = 200
    field = field_from(*sie(n, 60.0, 0.7, 0.3, 100.2, 99.7), make_wcs(n, n))
    with pytest.raises(LensviewInputError):
        field.critical_curves("two")
    caustic = field.caustics(2.0)[0]
    assert len(caustic.cusp_sky) == len(caustic.cusps) == 4
    assert caustic.cusp_sky.frame.name == "icrs"
