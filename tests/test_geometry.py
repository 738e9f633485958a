"""Tangent-plane projection and exact point-to-polyline distances."""

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS
from matplotlib.path import Path

from lensview.errors import LensviewInputError
from lensview.geometry import (TangentPlane, nearest_on_polylines, point_in_polygon,
                               polygon_area, polyline_length)

MICRO_ARCSEC = 1e-6


def unit_tan_wcs(centre):
    """TAN WCS whose pixel offsets are the standard coordinates in arcsec."""
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [centre.ra.deg, centre.dec.deg]
    wcs.wcs.crpix = [1, 1]  # FITS 1-based: the centre is 0-based pixel (0, 0)
    wcs.wcs.cdelt = [1 / 3600, 1 / 3600]
    wcs.wcs.set()
    return wcs


@pytest.mark.parametrize("ra, dec", [(150.2, 2.3), (359.995, -30.0), (0.01, 89.95), (210.0, -87.0)])
def test_tangent_plane_matches_astropy_tan_wcs(ra, dec):
    centre = SkyCoord(ra * u.deg, dec * u.deg)
    plane = TangentPlane(centre)
    rng = np.random.default_rng(0)
    coords = centre.directional_offset_by(rng.uniform(0, 360, 300) * u.deg,
                                          rng.uniform(0, 600, 300) * u.arcsec)
    x, y = plane.to_plane(coords)
    # A TAN WCS with CDELT = 1 arcsec gives the intermediate world coordinates,
    # i.e. the standard coordinates (Calabretta & Greisen 2002, A&A 395, 1077,
    # zenithal TAN; astropy.wcs / wcslib as the reference library).
    px, py = unit_tan_wcs(centre).world_to_pixel(coords)
    np.testing.assert_allclose(x.to_value(u.arcsec), px, rtol=0, atol=MICRO_ARCSEC)
    np.testing.assert_allclose(y.to_value(u.arcsec), py, rtol=0, atol=MICRO_ARCSEC)
    back = plane.to_sky(x, y)
    assert back.separation(coords).max().to_value(u.arcsec) < MICRO_ARCSEC


def test_tangent_plane_matches_astropy_offset_frame():
    centre = SkyCoord(30.0 * u.deg, -45.0 * u.deg)
    rng = np.random.default_rng(3)
    coords = centre.directional_offset_by(rng.uniform(0, 360, 200) * u.deg,
                                          rng.uniform(0, 1800, 200) * u.arcsec)
    x, y = TangentPlane(centre).to_plane(coords)
    lon, lat = centre.spherical_offsets_to(coords)
    # In astropy's offset frame about the centre a direction is
    # (cos b cos l, cos b sin l, sin b), so the gnomonic coordinates are
    # x = tan l, y = tan b / cos l (Calabretta & Greisen 2002; astropy SkyOffsetFrame).
    lon, lat = lon.to_value(u.rad), lat.to_value(u.rad)
    arcsec = np.degrees(1) * 3600
    np.testing.assert_allclose(x.to_value(u.arcsec), np.tan(lon) * arcsec,
                               rtol=0, atol=MICRO_ARCSEC)
    np.testing.assert_allclose(y.to_value(u.arcsec), np.tan(lat) / np.cos(lon) * arcsec,
                               rtol=0, atol=MICRO_ARCSEC)


def test_tangent_plane_directions_shapes_and_far_side():
    centre = SkyCoord(100.0 * u.deg, 20.0 * u.deg)
    plane = TangentPlane(centre)
    east = centre.directional_offset_by(90 * u.deg, 5 * u.arcsec)
    x, y = plane.to_plane(east)
    # Position angle 90 deg (North through East) is East (IAU convention, common practice).
    assert x.to_value(u.arcsec) == pytest.approx(5.0, abs=1e-6) and abs(y.to_value(u.arcsec)) < 1e-6
    assert x.shape == ()
    grid = plane.to_sky(np.zeros((2, 3)), np.arange(6.0).reshape(2, 3))  # floats are arcsec
    assert grid.shape == (2, 3)
    assert grid[1, 2].separation(plane.to_sky(0 * u.arcsec, 5 * u.arcsec)).to_value(u.arcsec) < 1e-9
    far_x, far_y = plane.to_plane(SkyCoord(280.0 * u.deg, -20.0 * u.deg))  # antipode
    assert np.isnan(far_x) and np.isnan(far_y)
    with pytest.raises(LensviewInputError, match="single SkyCoord"):
        TangentPlane(SkyCoord([1, 2] * u.deg, [3, 4] * u.deg))


def brute_force(points, lines, closed):
    """Distance, polyline and segment of the nearest segment, by testing every one."""
    best = np.full(len(points), np.inf)
    which = np.full((len(points), 2), -1)
    for k, (line, is_closed) in enumerate(zip(lines, closed)):
        a = line if is_closed else line[:-1]
        b = np.roll(line, -1, axis=0) if is_closed else line[1:]
        d = b - a
        for p_index, p in enumerate(points):
            t = np.clip(np.einsum("ij,ij->i", p - a, d) / np.einsum("ij,ij->i", d, d), 0, 1)
            dist = np.hypot(*(p - (a + t[:, None] * d)).T)
            j = np.argmin(dist)
            if dist[j] < best[p_index]:
                best[p_index] = dist[j]
                which[p_index] = k, j
    return best, which


def test_distance_to_circle_is_r_minus_radius():
    n = 4000
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    radius = 10.0
    circle = np.column_stack([radius * np.cos(t), radius * np.sin(t)])
    rng = np.random.default_rng(1)
    pts = rng.uniform(-30, 30, (2000, 2))
    result = nearest_on_polylines(pts, [circle], [True])
    r = np.hypot(pts[:, 0], pts[:, 1])
    # Distance to a circle is |r - R| (elementary geometry); the inscribed polygon's
    # chords lie inside by at most the sagitta R (1 - cos(pi / n)).
    sagitta = radius * (1 - np.cos(np.pi / n))
    error = result.distance - np.abs(r - radius)
    assert error.max() <= sagitta + 1e-12 and error.min() >= -sagitta - 1e-12
    # Counter-clockwise travel: the inside lies to the left (common practice).
    assert np.all(result.side[r < radius - 0.01] == 1)
    assert np.all(result.side[r > radius + 0.01] == -1)


def test_square_distances_end_caps_and_sides():
    square = np.array([[0, 0], [4, 0], [4, 4], [0, 4]], float)  # counter-clockwise
    pts = np.array([[2, -3], [7, 8], [1, 1], [2, 3.5], [-1, -1], [4, 2]], float)
    result = nearest_on_polylines(pts, [square], [True])
    # Elementary geometry: perpendicular feet on edges, corners as end caps.
    np.testing.assert_allclose(result.distance, [3, 5, 1, 0.5, np.sqrt(2), 0], atol=1e-12)
    np.testing.assert_allclose(result.foot_xy[:5], [[2, 0], [4, 4], [1, 0], [2, 4], [0, 0]],
                               atol=1e-12)
    assert list(result.side) == [-1, -1, 1, 1, -1, 0]
    assert result.segment_index[0] == 0 and result.t[0] == pytest.approx(0.5)
    assert result.segment_index[3] == 2 and result.t[3] == pytest.approx(0.5)  # (4,4) -> (0,4)
    clockwise = nearest_on_polylines(pts[:4], [square[::-1]], [True])
    assert list(clockwise.side) == [1, 1, -1, -1]

    line = np.array([[0.0, 0.0], [10.0, 0.0]])
    caps = np.array([[-3.0, 4.0], [13.0, -4.0], [5.0, 2.0]])
    result = nearest_on_polylines(caps, [line], [False])
    np.testing.assert_allclose(result.distance, [5.0, 5.0, 2.0])
    np.testing.assert_allclose(result.t, [0.0, 1.0, 0.5])


def test_exact_against_brute_force_on_random_data():
    rng = np.random.default_rng(2)
    lines = [np.cumsum(rng.normal(size=(rng.integers(2, 120), 2)), axis=0) for _ in range(6)]
    # Very uneven segments: long straight runs next to dense wiggles, so the
    # search has to split the long ones.
    lines.append(np.array([[-40.0, -25.0], [40.0, -25.0], [40.0, 30.0]]))
    wiggle = np.linspace(0, 60, 3000)
    lines.append(np.column_stack([np.linspace(-5, 5, 3000), 0.3 * np.sin(wiggle)]))
    closed = [True, False, True, False, True, False, False, False]
    pts = np.vstack([rng.uniform(-60, 60, (400, 2)), rng.normal(0, 1, (200, 2))])
    result = nearest_on_polylines(pts, lines, closed)
    expected, which = brute_force(pts, lines, closed)
    # Exactness, not an approximation: agreement to rounding (brute force, common practice).
    np.testing.assert_allclose(result.distance, expected, rtol=0, atol=1e-12)
    assert np.array_equal(result.polyline_index, which[:, 0])
    # At a shared vertex both segments are nearest; elsewhere the segment is unique.
    interior = (result.t > 1e-9) & (result.t < 1 - 1e-9)
    assert interior.sum() > 300
    assert np.array_equal(result.segment_index[interior], which[interior, 1])
    foot_distance = np.hypot(*(pts - result.foot_xy).T)
    np.testing.assert_allclose(foot_distance, result.distance, atol=1e-12)
    for k in range(len(pts)):
        line = lines[result.polyline_index[k]]
        a = line[result.segment_index[k]]
        b = line[(result.segment_index[k] + 1) % len(line)]
        np.testing.assert_allclose(a + result.t[k] * (b - a), result.foot_xy[k], atol=1e-9)


def test_many_lines_through_one_vertex():
    angles = np.linspace(0, np.pi, 40, endpoint=False)
    spokes = [np.array([[0.0, 0.0], [np.cos(a), np.sin(a)]]) for a in angles]
    pts = np.array([[0.05, -0.2], [0.3, 0.31], [-2.0, -0.5]])
    result = nearest_on_polylines(pts, spokes, [False] * len(spokes))
    expected, _ = brute_force(pts, spokes, [False] * len(spokes))
    # Forty segments share a vertex, more than one tree query returns at once.
    np.testing.assert_allclose(result.distance, expected, atol=1e-12)


def test_nan_points_nan_vertices_and_no_lines():
    line = np.array([[0.0, 0.0], [1.0, 0.0], [np.nan, np.nan], [3.0, 0.0], [4.0, 0.0]])
    pts = np.array([[2.0, 0.0], [np.nan, 1.0], [3.5, 1.0]])
    result = nearest_on_polylines(pts, [line], [False])
    # A NaN vertex breaks the line: nothing bridges from 1 to 3.
    assert result.distance[0] == pytest.approx(1.0)
    assert np.isnan(result.distance[1]) and result.polyline_index[1] == -1
    assert result.segment_index[2] == 3 and result.distance[2] == pytest.approx(1.0)
    empty = nearest_on_polylines(np.zeros((3, 2)), [], [])
    assert np.all(np.isnan(empty.distance))
    with pytest.raises(LensviewInputError, match="one flag per polyline"):
        nearest_on_polylines(np.zeros((3, 2)), [line], [])
    with pytest.raises(LensviewInputError, match="x, y positions"):
        nearest_on_polylines(np.zeros(3), [line], [False])


def test_length_and_area_of_regular_polygon():
    n, radius = 12, 3.0
    t = 2 * np.pi * np.arange(n) / n
    polygon = np.column_stack([100 + radius * np.cos(t), -50 + radius * np.sin(t)])
    # Regular n-gon: perimeter 2 n R sin(pi/n), area (n/2) R^2 sin(2 pi/n) (elementary geometry).
    perimeter = 2 * n * radius * np.sin(np.pi / n)
    assert polyline_length(polygon, closed=True) == pytest.approx(perimeter)
    open_length = (n - 1) * 2 * radius * np.sin(np.pi / n)
    assert polyline_length(polygon, closed=False) == pytest.approx(open_length)
    assert polygon_area(polygon) == pytest.approx(0.5 * n * radius**2 * np.sin(2 * np.pi / n),
                                                  rel=1e-12)
    assert polygon_area(polygon[::-1]) == pytest.approx(polygon_area(polygon))


def test_point_in_polygon_against_matplotlib_path():
    rng = np.random.default_rng(4)
    t = np.linspace(0, 2 * np.pi, 700, endpoint=False)
    r = 10 + 3 * np.sin(5 * t) + rng.uniform(-0.5, 0.5, t.size)
    star = np.column_stack([r * np.cos(t), r * np.sin(t)])
    pts = rng.uniform(-15, 15, (20000, 2))
    inside = point_in_polygon(pts, star)
    # matplotlib.path.Path.contains_points as the reference library; only points
    # within rounding of an edge may differ, and these random ones are not.
    reference = Path(star).contains_points(pts)
    assert np.array_equal(inside, reference)
    assert 0.2 < inside.mean() < 0.6
    square = np.array([[0, 0], [2, 0], [2, 2], [0, 2]], float)
    probe = np.array([[1, 1], [3, 1], [1.9, 0.1], [-0.1, 1], [np.nan, 1], [1, np.nan]])
    assert list(point_in_polygon(probe, square)) == [True, False, True, False, False, False]
