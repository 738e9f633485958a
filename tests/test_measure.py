"""measure_candidates and summarize_models against closed forms."""

import numpy as np
import pytest
import astropy.units as u
from astropy.cosmology import FlatLambdaCDM

import lensview as lv
from lensview.cosmology import distance_ratio

from closed_form import grid, make_wcs, sie

Z_LENS = 0.4
SCALE = 0.05  # arcsec per pixel
EDS = FlatLambdaCDM(H0=70, Om0=1.0)  # Einstein-de Sitter


def eds_angular_diameter_distance_mpc(z):
    """D_A(z) = (2c/H0)(1 - 1/sqrt(1+z)) / (1+z) (Hogg 1999, arXiv:astro-ph/9905116)."""
    c_km_s = 299792.458
    return 2 * c_km_s / 70.0 * (1 - 1 / np.sqrt(1 + z)) / (1 + z)


def sie_points_at_normal_distance(theta_e, q, pa, x0, y0, distances_px, n_angles=7):
    """Points at a given normal distance (pixels) from the kappa = 1/2 ellipse."""
    t = np.linspace(0.1, 2 * np.pi + 0.1, n_angles, endpoint=False)
    a, b = theta_e * np.sqrt(q) / q, theta_e * np.sqrt(q)
    xp, yp = a * np.cos(t), b * np.sin(t)
    nxp, nyp = b * np.cos(t), a * np.sin(t)
    norm = np.hypot(nxp, nyp)
    nxp, nyp = nxp / norm, nyp / norm
    c, s = np.cos(pa), np.sin(pa)
    pts, dist = [], []
    for d in distances_px:
        px, py = xp + d * nxp, yp + d * nyp
        pts.append(np.column_stack([c * px - s * py + x0, s * px + c * py + y0]))
        dist.append(np.full(n_angles, abs(d)))
    return np.concatenate(pts), np.concatenate(dist)


@pytest.fixture(scope="module")
def sie_case():
    n, theta_unit, q, pa = 420, 110.0, 0.7, 0.6
    x0, y0 = n / 2 + 0.21, n / 2 - 0.33
    wcs = make_wcs(n, n, scale_arcsec=SCALE, rotation_deg=25.0)
    ax, ay = sie(n, theta_unit, q, pa, x0, y0)
    field = lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS, cosmology=EDS,
                               name="sie")
    return field, theta_unit, q, pa, x0, y0


def test_offsets_from_sie_curve_and_physical_units(sie_case):
    field, theta_unit, q, pa, x0, y0 = sie_case
    z_source = 2.0
    theta_e = theta_unit * field.scaling_factor(z_source)
    offsets_arcsec = np.array([0.01, 0.1, 0.5, 2.0, 5.0, -0.01, -0.3, -1.0])
    xy, expected_px = sie_points_at_normal_distance(theta_e, q, pa, x0, y0, offsets_arcsec / SCALE)
    coords = field.pixels_to_sky(xy[:, 0], xy[:, 1])
    table = lv.measure_candidates(coords, field, z_source)
    expected = expected_px * SCALE
    # Exact point-to-curve distance: within 0.1 mas of the construction.
    np.testing.assert_allclose(table["offset_arcsec"], expected, atol=1e-4)
    assert table["offset_arcsec"].unit == u.arcsec
    # theta * D_A(z_l) with the Einstein-de Sitter closed form (Hogg 1999) and the IAU parsec
    # and light year (astropy.units).
    d_a_pc = eds_angular_diameter_distance_mpc(Z_LENS) * 1e6
    expected_pc = np.radians(expected / 3600) * d_a_pc
    np.testing.assert_allclose(table["offset_pc"], expected_pc, rtol=1e-3)
    np.testing.assert_allclose(table["offset_ly"], (expected_pc * u.pc).to_value(u.lyr), rtol=1e-3)
    assert set(table["curve_kind"]) == {"tangential"}
    outside = offsets_arcsec.repeat(7) > 0
    # Outside the tangential curve of an isothermal lens, det A = 1 - 2 kappa > 0 (even parity).
    assert np.all(table["parity"][outside] == 1) and np.all(table["parity"][~outside] == -1)
    assert np.all(table["inside_or_outside"][outside] == "outside") and np.all(table["inside_or_outside"][~outside] == "inside")


def test_magnification_near_curve_matches_analytic(sie_case):
    field, theta_unit, q, pa, x0, y0 = sie_case
    z_source = 3.0
    f = field.scaling_factor(z_source)
    theta_e = theta_unit * f
    xy, _ = sie_points_at_normal_distance(theta_e, q, pa, x0, y0, [0.1, 0.3, -0.1, -2.0, 8.0])
    table = lv.measure_candidates(field.pixels_to_sky(xy[:, 0], xy[:, 1]), field, z_source)
    x, y = xy[:, 0] - x0, xy[:, 1] - y0
    c, s = np.cos(pa), np.sin(pa)
    xp, yp = c * x + s * y, -s * x + c * y
    kappa = theta_e * np.sqrt(q) / (2 * np.hypot(q * xp, yp))
    # SIE: gamma = kappa, mu = 1 / (1 - 2 kappa) (Kormann et al. 1994).
    np.testing.assert_allclose(table["mu"], 1 / (1 - 2 * kappa), rtol=1e-3)
    np.testing.assert_allclose(table["kappa"], kappa, rtol=1e-4)
    np.testing.assert_allclose(table["lambda_t"], 1 - 2 * kappa, atol=1e-5)
    np.testing.assert_allclose(table["lambda_r"], 1.0, atol=1e-5)


def test_fold_coefficient_of_sis_is_theta_e():
    n, theta_unit = 300, 60.0
    x0, y0 = n / 2 + 0.3, n / 2 + 0.1
    x, y = grid(n, x0, y0)
    r = np.hypot(x, y)
    field = lv.DeflectionField(theta_unit * x / r, theta_unit * y / r, make_wcs(n, n),
                               units="pixel", z_lens=Z_LENS)
    z_source = 2.0
    theta_e = theta_unit * distance_ratio(Z_LENS, z_source)
    angles = np.linspace(0, 2 * np.pi, 5, endpoint=False)
    d = np.array([0.5, 1.0, 2.0, 3.0, 4.0])
    px, py = x0 + (theta_e + d) * np.cos(angles), y0 + (theta_e + d) * np.sin(angles)
    table = lv.measure_candidates(field.pixels_to_sky(px, py), field, z_source)
    # SIS: mu = theta/(theta - theta_E) ~ theta_E/d near the curve, so A = theta_E
    # (Narayan & Bartelmann 1996).
    np.testing.assert_allclose(table["fold_coefficient_arcsec"], theta_e * SCALE, rtol=1e-4)
    np.testing.assert_allclose(table["fold_mu"] * d / (theta_e), 1.0, rtol=1e-3)
    # The source plane: beta = theta - theta_E, at a distance d from the (point) caustic.
    np.testing.assert_allclose(table["caustic_offset_arcsec"], d * SCALE, rtol=1e-3)


def test_outside_footprint_gets_nan_and_reason(sie_case):
    field = sie_case[0]
    inside = field.pixels_to_sky(np.array([100.0]), np.array([120.0]))
    far = field.pixels_to_sky(np.array([5000.0]), np.array([-300.0]))
    from astropy.coordinates import concatenate

    table = lv.measure_candidates(concatenate([inside, far]), field, 2.0)
    assert np.isfinite(table["mu"][0]) and np.isnan(table["mu"][1])
    assert np.isnan(table["offset_arcsec"][1])
    assert table["reason"][1] == "outside the model footprint" and table["reason"][0] == ""


def test_model_spread_summary():
    n = 300
    wcs = make_wcs(n, n)
    fields = []
    for name, theta_unit in (("narrow", 50.0), ("wide", 62.0), ("mid", 56.0)):
        x, y = grid(n, n / 2, n / 2)
        r = np.hypot(x, y)
        fields.append(lv.DeflectionField(theta_unit * x / r, theta_unit * y / r, wcs,
                                         units="pixel", z_lens=Z_LENS, name=name))
    z_source = 2.0
    f = distance_ratio(Z_LENS, z_source)
    px = n / 2 + np.array([53.0, 80.0]) * f
    coords = wcs.pixel_to_world(px, np.full(2, n / 2))
    table = lv.measure_candidates(coords, fields, z_source, labels=["A", "B"])
    assert len(table) == 6 and set(table["model"]) == {"narrow", "wide", "mid"}
    summary = lv.summarize_models(table)
    assert list(summary["label"]) == ["A", "B"]
    for row, candidate in zip(summary, (0, 1)):
        rows = table[table["candidate"] == candidate]
        assert row["abs_mu_min"] == pytest.approx(np.min(rows["abs_mu"]))
        assert row["abs_mu_max"] == pytest.approx(np.max(rows["abs_mu"]))
        assert row["offset_arcsec_median"] == pytest.approx(np.median(rows["offset_arcsec"]))
        assert row["n_models"] == 3
    # Candidate A at r = 53 f px lies outside the narrow model's curve and inside the others.
    assert not summary["parity_agrees"][0] and summary["parity"][0] == 0
    assert summary["parity_agrees"][1] and summary["parity"][1] == 1


def test_offset_to_a_curve_cut_by_a_mask_is_flagged():
    n, theta_unit, q, pa = 300, 110.0, 0.7, 0.6
    x0, y0 = n / 2, n / 2
    ax, ay = sie(n, theta_unit, q, pa, x0, y0)
    field_full = lv.DeflectionField(ax, ay, make_wcs(n, n), units="pixel", z_lens=Z_LENS)
    curve = field_full.critical_curves(2.0)[0].map_pixels
    hole_x, hole_y = curve[len(curve) // 3]
    masked_x, masked_y = ax.copy(), ay.copy()
    rows = slice(int(hole_y) - 15, int(hole_y) + 15)
    cols = slice(int(hole_x) - 15, int(hole_x) + 15)
    masked_x[rows, cols] = np.nan
    masked_y[rows, cols] = np.nan
    field = lv.DeflectionField(masked_x, masked_y, make_wcs(n, n), units="pixel", z_lens=Z_LENS)
    # A knot just outside the hole, beside where the true curve runs through it.
    knot = field.pixels_to_sky(np.array([hole_x + 19.0, 60.0]), np.array([hole_y, 60.0]))
    table = lv.measure_candidates(knot, field, 2.0)
    assert "upper limit" in table["reason"][0]
    truth = lv.measure_candidates(knot, field_full, 2.0)
    assert table["offset_arcsec"][0] >= truth["offset_arcsec"][0] - 1e-9


def test_no_model_is_an_input_error(sie_case):
    from lensview.errors import LensviewInputError

    with pytest.raises(LensviewInputError, match="No lens model"):
        lv.measure_candidates(sie_case[0].pixels_to_sky(np.array([10.0]), np.array([10.0])), [], 2.0)


def test_metadata_records_each_models_cosmology_when_they_differ():
    n = 100
    x, y = grid(n, 50, 50)
    r = np.hypot(x, y)
    r[r == 0] = 1
    wcs = make_wcs(n, n)
    planck = lv.DeflectionField(30 * x / r, 30 * y / r, wcs, units="pixel", z_lens=Z_LENS, name="p")
    eds = lv.DeflectionField(30 * x / r, 30 * y / r, wcs, units="pixel", z_lens=Z_LENS, name="e",
                             cosmology=EDS)
    coords = wcs.pixel_to_world([70.0], [50.0])
    assert lv.measure_candidates(coords, [planck], 2.0).meta["cosmology"] == "Planck18"
    mixed = lv.measure_candidates(coords, [planck, eds], 2.0).meta["cosmology"]
    assert mixed["p"] == "Planck18" and "Om0=1.0" in mixed["e"]
