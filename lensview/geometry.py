"""Tangent-plane projection and exact distances to polylines.

Distances between positions near one another on the sky are measured in the
gnomonic (zenithal TAN) projection about a nearby centre (Calabretta &
Greisen 2002, A&A 395, 1077, sec. 5.1.3), where x points East (increasing
RA) and y North, in arcsec. The projection's scale grows as 1/cos^2 of the
distance from the centre, so across a field a few arcminutes wide lengths
differ from great-circle lengths by a few parts in a million.
"""

from dataclasses import dataclass

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from scipy.spatial import cKDTree

from .errors import LensviewInputError

__all__ = [
    "TangentPlane",
    "mean_direction",
    "plane_xy",
    "NearestResult",
    "nearest_on_polylines",
    "polyline_length",
    "polygon_area",
    "point_in_polygon",
]

_ARCSEC_PER_RAD = 180.0 / np.pi * 3600.0


class TangentPlane:
    """Gnomonic projection about a centre.

    The standard coordinates are those of the zenithal TAN projection with
    the centre at the native pole (Calabretta & Greisen 2002, eqs. 54-55):
    a sky direction p maps to x = (p . e) / (p . c), y = (p . n) / (p . c),
    with c the centre and e, n the unit vectors East and North there.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
        Tangent point (any frame; converted to ICRS).
    """

    def __init__(self, center):
        if not isinstance(center, SkyCoord) or not center.isscalar:
            raise LensviewInputError(
                "The tangent-plane centre must be a single SkyCoord; pass e.g. "
                "SkyCoord(ra, dec) for one position.")
        self.center = center.icrs
        ra0, dec0 = self.center.ra.rad, self.center.dec.rad
        self._axis = np.array([np.cos(dec0) * np.cos(ra0), np.cos(dec0) * np.sin(ra0),
                               np.sin(dec0)])
        self._east = np.array([-np.sin(ra0), np.cos(ra0), 0.0])
        self._north = np.array([-np.sin(dec0) * np.cos(ra0), -np.sin(dec0) * np.sin(ra0),
                                np.cos(dec0)])

    def to_plane(self, coords):
        """Project sky positions onto the plane.

        Parameters
        ----------
        coords : `~astropy.coordinates.SkyCoord`
            Positions (any frame, any shape).

        Returns
        -------
        x, y : `~astropy.units.Quantity`
            Standard coordinates in arcsec, x East and y North, with the shape
            of ``coords``. Positions 90 degrees or more from the centre have no
            projection and give NaN.
        """
        if not (isinstance(coords, SkyCoord) and coords.frame.name == "icrs"):
            coords = SkyCoord(coords).icrs  # a copy only where a conversion is needed
        ra, dec = coords.ra.rad, coords.dec.rad
        p = np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=-1)
        along = p @ self._axis
        with np.errstate(divide="ignore", invalid="ignore"):
            scale = np.where(along > 0, _ARCSEC_PER_RAD / along, np.nan)
        return (p @ self._east) * scale * u.arcsec, (p @ self._north) * scale * u.arcsec

    def to_sky(self, x, y):
        """Sky positions of standard coordinates.

        Parameters
        ----------
        x, y : `~astropy.units.Quantity` or array_like
            East and North coordinates; plain numbers are taken as arcsec.

        Returns
        -------
        `~astropy.coordinates.SkyCoord`
            ICRS positions with the broadcast shape of ``x`` and ``y``.
        """
        x, y = np.broadcast_arrays(_arcsec(x) / _ARCSEC_PER_RAD, _arcsec(y) / _ARCSEC_PER_RAD)
        p = (self._axis + x[..., None] * self._east + y[..., None] * self._north)
        ra = np.arctan2(p[..., 1], p[..., 0])
        dec = np.arctan2(p[..., 2], np.hypot(p[..., 0], p[..., 1]))
        return SkyCoord(np.mod(ra, 2 * np.pi) * u.rad, dec * u.rad, frame="icrs")


def mean_direction(coords):
    """Mean direction (ICRS) of the finite positions, e.g. a tangent point."""
    coords = SkyCoord(coords).icrs.reshape(-1)
    finite = np.isfinite(coords.ra.deg) & np.isfinite(coords.dec.deg)
    if not finite.any():
        return SkyCoord(0 * u.deg, 0 * u.deg, frame="icrs")
    x, y, z = coords[finite].cartesian.xyz.value.mean(axis=1)
    return SkyCoord(np.arctan2(y, x) * u.rad, np.arctan2(z, np.hypot(x, y)) * u.rad, frame="icrs")


def plane_xy(plane, coords):
    """(N, 2) standard coordinates (arcsec) of sky positions in a `TangentPlane`."""
    x, y = plane.to_plane(coords)
    return np.column_stack([np.atleast_1d(x.to_value(u.arcsec)), np.atleast_1d(y.to_value(u.arcsec))])


def _arcsec(value):
    if isinstance(value, u.Quantity):
        return np.asarray(value.to_value(u.arcsec), dtype=float)
    return np.asarray(value, dtype=float)


@dataclass
class NearestResult:
    """Nearest points on a set of polylines, one entry per query point.

    Attributes
    ----------
    distance : ndarray
        Euclidean distance to the nearest polyline (NaN where undefined).
    foot_xy : ndarray
        (N, 2) nearest point on that polyline.
    polyline_index : ndarray of int
        Which polyline (-1 where undefined).
    segment_index : ndarray of int
        Which of its segments: segment i runs from vertex i to vertex i + 1
        (the closing segment of a closed polyline ends at vertex 0).
    t : ndarray
        Position of the foot along the segment, 0 at its start and 1 at its end.
    side : ndarray of int
        Sign of the cross product of the segment direction with the offset of
        the point: +1 left of the direction of travel, -1 right, 0 on the line
        or undefined.
    """

    distance: np.ndarray
    foot_xy: np.ndarray
    polyline_index: np.ndarray
    segment_index: np.ndarray
    t: np.ndarray
    side: np.ndarray


def _segments(polylines, closed):
    """Start and end points of every segment, with their polyline and index.

    Segments that touch a non-finite vertex are left out, so a NaN vertex
    breaks a polyline instead of bridging the gap.
    """
    if len(polylines) != len(closed):
        raise LensviewInputError(
            f"Got {len(polylines)} polylines but {len(closed)} 'closed' flags; give one flag "
            "per polyline.")
    starts, ends, owner, index = [], [], [], []
    for k, (line, is_closed) in enumerate(zip(polylines, closed)):
        line = np.asarray(line, dtype=float)
        if line.ndim != 2 or line.shape[1] != 2:
            raise LensviewInputError(
                f"Polyline {k} has shape {line.shape}; give an (M, 2) array of x, y vertices.")
        if len(line) == 0:
            continue
        if len(line) == 1:
            a, b = line, line
        elif is_closed:
            a, b = line, np.roll(line, -1, axis=0)
        else:
            a, b = line[:-1], line[1:]
        keep = np.isfinite(a).all(axis=1) & np.isfinite(b).all(axis=1)
        starts.append(a[keep])
        ends.append(b[keep])
        owner.append(np.full(keep.sum(), k))
        index.append(np.nonzero(keep)[0])
    if not starts or sum(len(s) for s in starts) == 0:
        return None
    return (np.concatenate(starts), np.concatenate(ends),
            np.concatenate(owner), np.concatenate(index))


def _pieces(a, b):
    """Split long segments so that no piece is much longer than a typical one.

    The search radius below grows with the longest piece; capping piece
    lengths at max(4 x median, 2 x mean) keeps it small while adding at most
    half as many pieces as there are segments.
    """
    length = np.hypot(*(b - a).T)
    cap = max(4.0 * np.median(length), 2.0 * length.mean())
    if cap == 0 or length.max() <= cap:
        return a, b, np.arange(len(a)), np.zeros(len(a)), np.ones(len(a))
    n_pieces = np.maximum(1, np.ceil(length / cap)).astype(int)
    segment = np.repeat(np.arange(len(a)), n_pieces)
    first = np.repeat(np.cumsum(n_pieces) - n_pieces, n_pieces)
    k = np.arange(len(segment)) - first
    t0 = k / n_pieces[segment]
    t1 = (k + 1) / n_pieces[segment]
    d = b[segment] - a[segment]
    return a[segment] + t0[:, None] * d, a[segment] + t1[:, None] * d, segment, t0, t1


def _project(points, a, b):
    """Distance, foot and clamped fraction of points projected onto segments (a, b)."""
    d = b - a
    length2 = np.einsum("...j,...j->...", d, d)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.einsum("...j,...j->...", points - a, d) / length2
    t = np.where(length2 > 0, np.clip(t, 0.0, 1.0), 0.0)
    foot = a + t[..., None] * d
    diff = points - foot
    return np.sqrt(np.einsum("...j,...j->...", diff, diff)), foot, t


def _vertex_tree(a, b, owner):
    """Unique piece end points and, for each, the pieces that start and end there.

    Consecutive pieces share a vertex (bitwise, since both come from the same
    input value or the same subdivision formula); an end that starts no piece
    (the last vertex of an open polyline, or one before a break) gets its own
    entry.
    """
    n = len(a)
    successor = np.arange(1, n + 1)
    last = np.r_[owner[1:] != owner[:-1], True]
    first_of_owner = np.r_[0, np.nonzero(last)[0][:-1] + 1]
    successor[last] = first_of_owner
    joined = (b == a[successor]).all(axis=1)
    # A single-piece open polyline ending on its own start is not joined to itself.
    joined &= successor != np.arange(n)
    end_of = np.full(n, -1)
    end_of[successor[joined]] = np.nonzero(joined)[0]
    dangling = np.nonzero(~joined)[0]
    vertices = np.concatenate([a, b[dangling]])
    starts_here = np.concatenate([np.arange(n), np.full(len(dangling), -1)])
    ends_here = np.concatenate([end_of, dangling])
    return vertices, starts_here, ends_here


def nearest_on_polylines(points_xy, polylines, closed):
    """Exact nearest points on polylines for many points.

    A KD-tree holds the vertices. For a point whose nearest vertex is at
    distance d_v, the nearest segment is no farther than d_v, and the end of
    that segment closer to its foot is at most half a segment length from the
    foot, at a right angle to the offset; so that end lies within
    sqrt(d_v^2 + (L_max / 2)^2) of the point (Pythagoras). Every segment with
    an end inside that radius is tested exactly, so the answer is the true
    nearest point on the segments, not the nearest vertex. Segments much
    longer than typical are split for the search (the result still refers to
    the original segments), which keeps L_max and the radius small.

    Parameters
    ----------
    points_xy : array_like
        (N, 2) positions.
    polylines : list of array_like
        Each an (M_k, 2) array of ordered vertices, in the same units as the
        points.
    closed : list of bool
        Whether each polyline closes on itself.

    Returns
    -------
    NearestResult
        NaN (and -1 indices) for points that are not finite, and for every
        point when there is no segment.
    """
    points = np.asarray(points_xy, dtype=float)
    if points.ndim != 2 or points.shape[1] != 2:
        raise LensviewInputError(
            f"Points have shape {points.shape}; give an (N, 2) array of x, y positions.")
    n = len(points)
    result = NearestResult(np.full(n, np.nan), np.full((n, 2), np.nan), np.full(n, -1),
                           np.full(n, -1), np.full(n, np.nan), np.zeros(n, dtype=int))
    segments = _segments(polylines, closed)
    finite = np.isfinite(points).all(axis=1)
    if segments is None or not finite.any():
        return result
    seg_a, seg_b, owner, index = segments
    a, b, piece_segment, t0, t1 = _pieces(seg_a, seg_b)
    half_max = 0.5 * float(np.hypot(*(b - a).T).max())
    vertices, starts_here, ends_here = _vertex_tree(a, b, owner[piece_segment])
    # Large leaves suit vertices strung along curves queried from afar.
    tree = cKDTree(vertices, leafsize=128)

    rows = np.nonzero(finite)[0]
    pts = points[rows]
    best = np.full(len(pts), np.inf)
    best_piece = np.zeros(len(pts), dtype=int)
    best_t = np.zeros(len(pts))
    best_foot = np.zeros((len(pts), 2))
    todo = np.arange(len(pts))
    k = min(4, len(vertices))
    while len(todo):
        dist, idx = tree.query(pts[todo], k=k, workers=-1)
        dist, idx = dist.reshape(len(todo), k), idx.reshape(len(todo), k)
        radius = np.sqrt(dist[:, :1] ** 2 + half_max**2) * (1 + 1e-12)
        near = dist <= radius
        piece = np.concatenate([starts_here[idx], ends_here[idx]], axis=1)
        usable = np.concatenate([near, near], axis=1) & (piece >= 0)
        piece = np.where(usable, piece, 0)
        d, foot, t = _project(pts[todo, None, :], a[piece], b[piece])
        d = np.where(usable, d, np.inf)
        pick = np.argmin(d, axis=1)
        here = np.arange(len(todo))
        best[todo] = d[here, pick]
        best_piece[todo] = piece[here, pick]
        best_t[todo] = t[here, pick]
        best_foot[todo] = foot[here, pick]
        if k == len(vertices):
            break
        # All k vertices inside the radius: more may be, so look again with more.
        todo = todo[near[:, -1]]
        k = min(4 * k, len(vertices))

    seg = piece_segment[best_piece]
    seg_dir = seg_b[seg] - seg_a[seg]
    rel = pts - seg_a[seg]
    cross = seg_dir[:, 0] * rel[:, 1] - seg_dir[:, 1] * rel[:, 0]
    result.distance[rows] = best
    result.foot_xy[rows] = best_foot
    result.polyline_index[rows] = owner[seg]
    result.segment_index[rows] = index[seg]
    result.t[rows] = t0[best_piece] + best_t * (t1[best_piece] - t0[best_piece])
    result.side[rows] = np.sign(cross).astype(int)
    return result


def polyline_length(xy, closed):
    """Total length of a polyline.

    Parameters
    ----------
    xy : array_like
        (M, 2) vertices.
    closed : bool
        Whether to include the segment from the last vertex back to the first.

    Returns
    -------
    float
    """
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    if len(xy) < 2:
        return 0.0
    steps = np.diff(np.vstack([xy, xy[:1]]) if closed else xy, axis=0)
    return float(np.hypot(steps[:, 0], steps[:, 1]).sum())


def polygon_area(xy):
    """Area enclosed by a simple closed polygon (shoelace formula).

    Parameters
    ----------
    xy : array_like
        (M, 2) vertices in order, either sense; the polygon closes itself.

    Returns
    -------
    float
        The area, always positive.
    """
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    # Offsets from one vertex keep the cross products small for polygons far from the origin.
    x, y = (xy - xy[0]).T if len(xy) else (xy[:, 0], xy[:, 1])
    return float(0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def point_in_polygon(points, polygon):
    """Whether points lie inside a closed polygon (even-odd ray casting).

    A ray from each point towards +x crosses the edges that straddle the
    point's y; an odd count means inside. Points are sorted by y so that each
    edge meets only the points in its own y band, which keeps the work close
    to (number of points) x (edges crossed by a horizontal line).

    Parameters
    ----------
    points : array_like
        (N, 2) positions.
    polygon : array_like
        (M, 2) vertices; the polygon closes itself. Edges with a non-finite
        vertex are ignored.

    Returns
    -------
    ndarray of bool
        False for points that are not finite.
    """
    points = np.asarray(points, dtype=float).reshape(-1, 2)
    polygon = np.asarray(polygon, dtype=float).reshape(-1, 2)
    x1, y1 = polygon.T
    x2, y2 = np.roll(polygon, -1, axis=0).T
    finite = np.isfinite(polygon).all(axis=1)
    usable = finite & np.roll(finite, -1)
    x1, y1, x2, y2 = x1[usable], y1[usable], x2[usable], y2[usable]
    order = np.argsort(points[:, 1], kind="stable")
    ys = points[order, 1]
    # Edge straddles y when min(y1, y2) <= y < max(y1, y2): the half-open rule
    # counts a vertex on the ray once.
    lo = np.searchsorted(ys, np.minimum(y1, y2), side="left")
    hi = np.searchsorted(ys, np.maximum(y1, y2), side="left")
    counts = hi - lo
    edge = np.repeat(np.arange(len(x1)), counts)
    offset = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    member = order[np.repeat(lo, counts) + offset]
    px, py = points[member, 0], points[member, 1]
    x_cross = x1[edge] + (py - y1[edge]) * (x2[edge] - x1[edge]) / (y2[edge] - y1[edge])
    crossings = np.bincount(member[px < x_cross], minlength=len(points))
    return crossings % 2 == 1
