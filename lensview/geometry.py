"""Tangent-plane projection and exact distances to polylines.

Distances between positions near one another on the sky are measured in
the gnomonic (TAN) projection about a nearby centre (Calabretta & Greisen
2002, A&A 395, 1077, sec. 5.1.3), where x points East (increasing RA) and y
North, in arcsec. Within a cluster field the projection's scale differs from
unity by less than 1e-7, far below any measurement here.
"""

from dataclasses import dataclass

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from scipy.spatial import cKDTree

__all__ = [
    "TangentPlane",
    "NearestPoints",
    "nearest_on_polylines",
    "polyline_length",
    "polygon_area",
    "point_in_polygon",
]

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


class TangentPlane:
    """Gnomonic projection about a centre.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
        Tangent point (converted to ICRS).
    """

    def __init__(self, center):
        center = SkyCoord(center).icrs
        self.center = center
        self._ra0 = center.ra.rad
        self._dec0 = center.dec.rad

    def to_plane(self, coords):
        """Project sky positions.

        Returns
        -------
        x, y : `~astropy.units.Quantity`
            Standard coordinates in arcsec, x East and y North. Positions 90
            degrees or more from the centre give NaN.
        """
        coords = SkyCoord(coords).icrs
        ra, dec = coords.ra.rad, coords.dec.rad
        dra = ra - self._ra0
        cos_c = (np.sin(self._dec0) * np.sin(dec)
                 + np.cos(self._dec0) * np.cos(dec) * np.cos(dra))
        with np.errstate(divide="ignore", invalid="ignore"):
            x = np.cos(dec) * np.sin(dra) / cos_c
            y = (np.cos(self._dec0) * np.sin(dec)
                 - np.sin(self._dec0) * np.cos(dec) * np.cos(dra)) / cos_c
        behind = cos_c <= 0
        x = np.where(behind, np.nan, x)
        y = np.where(behind, np.nan, y)
        return x * _ARCSEC_PER_RAD * u.arcsec, y * _ARCSEC_PER_RAD * u.arcsec

    def to_sky(self, x, y):
        """Sky positions of standard coordinates (arcsec, or angle Quantities)."""
        x = _arcsec(x) / _ARCSEC_PER_RAD
        y = _arcsec(y) / _ARCSEC_PER_RAD
        rho = np.hypot(x, y)
        c = np.arctan(rho)
        with np.errstate(divide="ignore", invalid="ignore"):
            dec = np.arcsin(np.cos(c) * np.sin(self._dec0)
                            + np.where(rho > 0, y * np.sin(c) * np.cos(self._dec0) / rho, 0.0))
            ra = self._ra0 + np.arctan2(
                x * np.sin(c),
                rho * np.cos(self._dec0) * np.cos(c) - y * np.sin(self._dec0) * np.sin(c))
        return SkyCoord(np.mod(ra, 2 * np.pi) * u.rad, dec * u.rad, frame="icrs")


def _arcsec(value):
    if isinstance(value, u.Quantity):
        return np.asarray(value.to_value(u.arcsec), dtype=float)
    return np.asarray(value, dtype=float)


@dataclass
class NearestPoints:
    """Nearest points on a set of polylines.

    Attributes
    ----------
    distance : ndarray
        Euclidean distance from each point to the nearest polyline.
    foot_xy : ndarray
        (N, 2) nearest point on that polyline.
    polyline_index, segment_index : ndarray of int
        Which polyline and which of its segments (-1 where undefined).
    t : ndarray
        Position of the foot along the segment (0 at its start, 1 at its end).
    side : ndarray of int
        +1 when the point lies left of the direction of travel, -1 right,
        0 on the line.
    """

    distance: np.ndarray
    foot_xy: np.ndarray
    polyline_index: np.ndarray
    segment_index: np.ndarray
    t: np.ndarray
    side: np.ndarray


def _segments(polylines, closed):
    starts, ends, owner, index = [], [], [], []
    for k, (line, is_closed) in enumerate(zip(polylines, closed)):
        line = np.asarray(line, dtype=float).reshape(-1, 2)
        line = line[np.isfinite(line).all(axis=1)]
        if len(line) == 0:
            continue
        if len(line) == 1:
            a, b = line, line
        elif is_closed:
            a, b = line, np.roll(line, -1, axis=0)
        else:
            a, b = line[:-1], line[1:]
        starts.append(a)
        ends.append(b)
        owner.append(np.full(len(a), k))
        index.append(np.arange(len(a)))
    if not starts:
        return None
    return (np.concatenate(starts), np.concatenate(ends),
            np.concatenate(owner), np.concatenate(index))


def _project(points, a, b):
    d = b - a
    length2 = np.einsum("ij,ij->i", d, d)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.einsum("ij,ij->i", points - a, d) / length2
    t = np.where(length2 > 0, np.clip(t, 0.0, 1.0), 0.0)
    foot = a + t[:, None] * d
    diff = points - foot
    return np.sqrt(np.einsum("ij,ij->i", diff, diff)), foot, t


def nearest_on_polylines(points_xy, polylines, closed):
    """Exact nearest points on polylines for many points.

    A KD-tree on segment midpoints gives, for each point, the segments that
    can be nearest: any segment whose midpoint is within (distance to the
    nearest midpoint + half the longest segment) + half the longest segment
    is tested exactly; no other segment can be closer.

    Parameters
    ----------
    points_xy : array_like
        (N, 2) positions.
    polylines : list of array_like
        Each (M_k, 2) ordered vertices.
    closed : list of bool
        Whether each polyline closes on itself.

    Returns
    -------
    NearestPoints
        NaN and -1 for points that are not finite or when there are no
        polylines.
    """
    points = np.asarray(points_xy, dtype=float).reshape(-1, 2)
    n = len(points)
    result = NearestPoints(np.full(n, np.nan), np.full((n, 2), np.nan), np.full(n, -1),
                           np.full(n, -1), np.full(n, np.nan), np.zeros(n, dtype=int))
    segments = _segments(polylines, closed)
    finite = np.isfinite(points).all(axis=1)
    if segments is None or not finite.any():
        return result
    a, b, owner, index = segments
    mid = 0.5 * (a + b)
    half = 0.5 * np.sqrt(np.einsum("ij,ij->i", b - a, b - a))
    half_max = float(half.max())
    tree = cKDTree(mid)
    where = np.nonzero(finite)[0]
    pts = points[where]
    # The nearest segment s* has |p - mid(s*)| <= d* + half_max <= d_best + half_max, so
    # testing every midpoint within that radius of p is exact.
    best = np.full(len(pts), np.inf)
    best_seg = np.full(len(pts), -1)
    best_t = np.zeros(len(pts))
    best_foot = np.zeros((len(pts), 2))
    k_neighbours = min(16, len(mid))
    dist_k, idx_k = tree.query(pts, k=k_neighbours)
    dist_k = dist_k.reshape(len(pts), -1)
    idx_k = idx_k.reshape(len(pts), -1)
    for column in range(idx_k.shape[1]):
        seg = idx_k[:, column]
        d, foot, t = _project(pts, a[seg], b[seg])
        better = d < best
        best[better], best_seg[better], best_t[better] = d[better], seg[better], t[better]
        best_foot[better] = foot[better]
    # Points whose k nearest midpoints may not contain the nearest segment: search exactly.
    radius = best + half_max
    unsure = np.nonzero((dist_k[:, -1] < radius) & (k_neighbours < len(mid)))[0]
    if len(unsure):
        lists = tree.query_ball_point(pts[unsure], radius[unsure] + 1e-12)
        sizes = np.array([len(item) for item in lists])
        point_rows = np.repeat(unsure, sizes)
        seg = np.concatenate([np.asarray(item, dtype=int) for item in lists])
        d, foot, t = _project(pts[point_rows], a[seg], b[seg])
        order = np.lexsort((d, point_rows))
        first = np.ones(len(order), bool)
        first[1:] = point_rows[order][1:] != point_rows[order][:-1]
        pick = order[first]
        rows = point_rows[pick]
        better = d[pick] < best[rows]
        rows, pick = rows[better], pick[better]
        best[rows], best_seg[rows], best_t[rows] = d[pick], seg[pick], t[pick]
        best_foot[rows] = foot[pick]
    seg_dir = b[best_seg] - a[best_seg]
    rel = pts - a[best_seg]
    cross = seg_dir[:, 0] * rel[:, 1] - seg_dir[:, 1] * rel[:, 0]
    result.distance[where] = best
    result.foot_xy[where] = best_foot
    result.polyline_index[where] = owner[best_seg]
    result.segment_index[where] = index[best_seg]
    result.t[where] = best_t
    result.side[where] = np.sign(cross).astype(int)
    return result


def polyline_length(xy, closed):
    """Total length of a polyline (closing segment included when closed)."""
    xy = np.asarray(xy, dtype=float)
    if len(xy) < 2:
        return 0.0
    steps = np.diff(np.vstack([xy, xy[:1]]) if closed else xy, axis=0)
    return float(np.hypot(steps[:, 0], steps[:, 1]).sum())


def polygon_area(xy):
    """Area enclosed by a closed polygon (shoelace formula), always positive."""
    x, y = np.asarray(xy, dtype=float).T
    return float(0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def point_in_polygon(points, polygon, chunk=256):
    """True for points inside a closed polygon (even-odd ray casting)."""
    points = np.asarray(points, dtype=float).reshape(-1, 2)
    polygon = np.asarray(polygon, dtype=float)
    x1, y1 = polygon[:, 0][None, :], polygon[:, 1][None, :]
    x2, y2 = np.roll(polygon[:, 0], -1)[None, :], np.roll(polygon[:, 1], -1)[None, :]
    inside = np.zeros(len(points), dtype=bool)
    for start in range(0, len(points), chunk):
        x = points[start:start + chunk, 0][:, None]
        y = points[start:start + chunk, 1][:, None]
        straddles = (y1 > y) != (y2 > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            x_cross = x1 + (y - y1) * (x2 - x1) / (y2 - y1)
        inside[start:start + chunk] = np.sum(straddles & (x < x_cross), axis=1) % 2 == 1
    return inside
