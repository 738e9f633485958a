"""Tangent-plane projection and exact point-to-polyline distances."""

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS

from lensview.geometry import (TangentPlane, nearest_on_polylines, point_in_polygon,
                               polygon_area, polyline_length)


def test_tangent_plane_matches_astropy_tan_wcs():
    centre = SkyCoord(150.2 * u.deg, 2.3 * u.deg)
    plane = TangentPlane(centre)
    rng = np.random.default_rng(0)
    coords = centre.directional_offset_by(rng.uniform(0, 360, 200) * u.deg,
                                          rng.uniform(0, 300, 200) * u.arcsec)
    x, y = plane.to_plane(coords)
    # A TAN WCS with unit CDELT in degrees gives the standard coordinates directly
    # (Calabretta & Greisen 2002, via astropy.wcs as the reference library).
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [centre.ra.deg, centre.dec.deg]
    wcs.wcs.crpix = [1, 1]  # FITS 1-based: the centre is 0-based pixel (0, 0)
    wcs.wcs.cdelt = [-1 / 3600, 1 / 3600]
    px, py = wcs.world_to_pixel(coords)
    np.testing.assert_allclose(x.to_value(u.arcsec), -px, atol=1e-6)
    np.testing.assert_allclose(y.to_value(u.arcsec), py, atol=1e-6)
    back = plane.to_sky(x, y)
    assert back.separation(coords).max().to_value(u.arcsec) < 1e-6


def test_small_offsets_match_astropy_spherical_offsets():
    centre = SkyCoord(30.0 * u.deg, -45.0 * u.deg)
    other = SkyCoord(30.001 * u.deg, -44.9995 * u.deg)
    x, y = TangentPlane(centre).to_plane(other)
    dra, ddec = centre.spherical_offsets_to(other)
    # Gnomonic and spherical offsets agree to O(theta^3) (astropy as reference library).
    assert x.to_value(u.arcsec) == pytest.approx(dra.to_value(u.arcsec), abs=1e-4)
    assert y.to_value(u.arcsec) == pytest.approx(ddec.to_value(u.arcsec), abs=1e-4)


def brute_force(points, lines, closed):
    best = np.full(len(points), np.inf)
    for line, is_closed in zip(lines, closed):
        a = line if is_closed else line[:-1]
        b = np.roll(line, -1, axis=0) if is_closed else line[1:]
        for p_index, p in enumerate(points):
            d = b - a
            t = np.clip(np.einsum("ij,ij->i", p - a, d) / np.einsum("ij,ij->i", d, d), 0, 1)
            dist = np.hypot(*(p - (a + t[:, None] * d)).T).min()
            best[p_index] = min(best[p_index], dist)
    return best


def test_distance_to_circle_is_r_minus_radius():
    t = np.linspace(0, 2 * np.pi, 4000, endpoint=False)
    radius = 10.0
    circle = np.column_stack([radius * np.cos(t), radius * np.sin(t)])
    rng = np.random.default_rng(1)
    pts = rng.uniform(-30, 30, (500, 2))
    result = nearest_on_polylines(pts, [circle], [True])
    r = np.hypot(pts[:, 0], pts[:, 1])
    # Distance to a circle is |r - R| (elementary geometry); chords sag by R (1 - cos(dt/2)).
    sagitta = radius * (1 - np.cos(np.pi / 4000))
    assert np.abs(result.distance - np.abs(r - radius)).max() <= sagitta + 1e-12
    # Counter-clockwise travel: the inside lies to the left.
    assert np.all(result.side[r < radius - 0.01] == 1) and np.all(result.side[r > radius + 0.01] == -1)


def test_exact_against_brute_force_with_open_and_closed_lines():
    rng = np.random.default_rng(2)
    lines = [np.cumsum(rng.normal(size=(60, 2)), axis=0) for _ in range(4)]
    lines.append(np.array([[0.0, 0.0], [40.0, 0.0]]))
    closed = [True, False, True, False, False]
    pts = rng.uniform(-20, 20, (300, 2))
    result = nearest_on_polylines(pts, lines, closed)
    np.testing.assert_allclose(result.distance, brute_force(pts, lines, closed), atol=1e-12)
    foot_distance = np.hypot(*(pts - result.foot_xy).T)
    np.testing.assert_allclose(foot_distance, result.distance, atol=1e-12)


def test_segment_end_caps_and_nan_points():
    line = np.array([[0.0, 0.0], [10.0, 0.0]])
    pts = np.array([[-3.0, 4.0], [13.0, -4.0], [5.0, 2.0], [np.nan, 1.0]])
    result = nearest_on_polylines(pts, [line], [False])
    np.testing.assert_allclose(result.distance[:3], [5.0, 5.0, 2.0])
    assert np.isnan(result.distance[3]) and result.polyline_index[3] == -1
    np.testing.assert_allclose(result.t[:3], [0.0, 1.0, 0.5])


def test_no_polylines_gives_nan():
    result = nearest_on_polylines(np.zeros((3, 2)), [], [])
    assert np.all(np.isnan(result.distance))


def test_length_area_and_inside():
    square = np.array([[0, 0], [2, 0], [2, 2], [0, 2]], float)
    assert polyline_length(square, closed=True) == pytest.approx(8.0)
    assert polyline_length(square, closed=False) == pytest.approx(6.0)
    assert polygon_area(square) == pytest.approx(4.0)
    inside = point_in_polygon(np.array([[1, 1], [3, 1], [1.9, 0.1], [-0.1, 1]]), square)
    assert list(inside) == [True, False, True, False]
