"""Critical curves and caustics of a deflection field.

Critical curves are the zero set of det A (design notes, section 4). They are
found in three steps:

1. marching squares on the fourth-order det A of the tiles that may hold a
   curve (linear interpolation along cell edges, the asymptotic decider for
   saddle cells), vertices linked into ordered polylines with a graph walk;
2. each vertex refined by Newton steps along the gradient of the local fit
   of det A (`DeflectionField.local_terms`: the Lagrange interpolant on
   float64 maps, noise-aware least-squares windows on float32 ones), which
   moves it onto the smooth zero set to ~1e-6 pixel, or to the floor the
   map's storage precision allows (recorded on each `Curve`);
3. each polyline classified as tangential (lambda_t = 0) or radial
   (lambda_r = 0), and tiny loops around singular centres, where the grid
   cannot follow the profile, dropped and recorded.

Caustics are the critical curves mapped through the lens equation, with cusps
located as the vertices of maximal turning.
"""

from dataclasses import dataclass, field as dataclass_field

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components, depth_first_order
from scipy.spatial import cKDTree

from ..geometry import TangentPlane, mean_direction, plane_xy, polygon_area, polyline_length
from .stencils import TILE
from .precision import det_a_sigma

__all__ = ["Curve", "DroppedLoop", "CurveSet", "critical_curves", "caustics"]

#: Newton iterations on det A for every vertex.
NEWTON_STEPS = 4
#: A loop this small (pixels across) near unresolved nodes is a grid artefact.
SPURIOUS_LOOP_SIZE = 8.0
#: ... when all of its vertices lie this close (pixels) to unresolved nodes.
SPURIOUS_LOOP_DISTANCE = 4.0
#: Turning (degrees) between caustic segments above which a vertex is a cusp.
CUSP_TURNING_DEG = 90.0


@dataclass
class Curve:
    """A critical curve or a caustic of one model at one source redshift.

    Attributes
    ----------
    kind : str
        "tangential" or "radial".
    sky : `~astropy.coordinates.SkyCoord`
        Ordered vertices (ICRS). For caustics these are source-plane positions.
    closed : bool
        False where the map edge, a masked region or the computed area cuts
        the curve.
    model : str
        Name of the lens model.
    z_source : float
        Source redshift the curve belongs to.
    plane : str
        "image" for critical curves, "source" for caustics.
    map_pixels : ndarray
        (N, 2) vertices as (x, y) on the model's own pixel grid.
    cusps : ndarray of int
        For caustics, indices of vertices at cusps (empty otherwise).
    position_floor_pix : float
        For critical curves, the positional uncertainty the map's own
        storage precision leaves (RMS over the vertices of
        sigma(det A) / |grad det A|, map pixels; `lensview.lens.precision`);
        NaN for caustics.
    position_floor : `~astropy.units.Quantity`
        The same in arcsec (geometric mean pixel scale).
    """

    kind: str
    sky: SkyCoord
    closed: bool
    model: str
    z_source: float
    plane: str
    map_pixels: np.ndarray
    cusps: np.ndarray = dataclass_field(default_factory=lambda: np.zeros(0, int))
    position_floor_pix: float = np.nan
    position_floor: u.Quantity = dataclass_field(default_factory=lambda: np.nan * u.arcsec)

    def __len__(self):
        return len(self.sky)

    def to_pixels(self, wcs):
        """(N, 2) array of (x, y) pixel positions on another WCS (0-based)."""
        x, y = wcs.celestial.world_to_pixel(self.sky)
        return np.column_stack([x, y])

    def _plane_xy(self):

        return plane_xy(TangentPlane(mean_direction(self.sky)), self.sky)

    @property
    def length(self):
        """Length along the curve (`~astropy.units.Quantity`, arcsec)."""

        return polyline_length(self._plane_xy(), self.closed) * u.arcsec

    @property
    def area(self):
        """Enclosed area (arcsec**2) of a closed curve; NaN for open ones."""

        if not self.closed:
            return np.nan * u.arcsec**2
        return polygon_area(self._plane_xy()) * u.arcsec**2

    @property
    def cusp_sky(self):
        """Sky positions of the cusps (empty for critical curves)."""
        return self.sky[self.cusps]


@dataclass
class DroppedLoop:
    """A zero contour of det A rejected as an artefact of a singular centre."""

    model: str
    centre: SkyCoord
    size_pixels: float
    reason: str


class CurveSet(list):
    """A list of `Curve` that also records loops dropped as grid artefacts.

    Attributes
    ----------
    dropped : list of `DroppedLoop`
    """

    def __init__(self, curves=(), dropped=()):
        super().__init__(curves)
        self.dropped = list(dropped)


# ---------------------------------------------------------------------------- extraction
def critical_curves(field, z_source):
    """Critical curves of a `DeflectionField` for one source redshift.

    Parameters
    ----------
    field : `~lensview.DeflectionField`
    z_source : float

    Returns
    -------
    CurveSet
        Tangential and radial critical curves, longest first.
    """
    f = field.scaling_factor(z_source)
    tiles = field.tiles_near_curves(f)
    while True:
        polylines = _contour_tiles(field, tiles, f)
        extra = _tiles_beyond_open_ends(field, tiles, polylines)
        if not len(extra):
            break
        tiles = np.concatenate([tiles, extra])
    curves, dropped = [], []
    unresolved = _unresolved_nodes(field, tiles)
    for xy, closed in polylines:
        xy, fit = _refine(field, xy, f)
        reason = _artefact_reason(xy, unresolved)
        if reason:
            centre = field.pixels_to_sky(*np.nanmean(xy, axis=0))
            size = float(np.nanmax(np.ptp(xy, axis=0)))
            dropped.append(DroppedLoop(field.name, centre, size, reason))
            continue
        terms = fit.terms(xy[:, 0], xy[:, 1], second_derivatives=True)
        keep = np.isfinite(xy).all(axis=1)
        xy = xy[keep]
        if len(xy) < 2:
            continue
        floor = _position_floor(terms, f)
        curves.append(Curve(kind=_classify(terms, f), sky=field.pixels_to_sky(xy[:, 0], xy[:, 1]),
                            closed=bool(closed and keep.all()), model=field.name,
                            z_source=float(z_source), plane="image", map_pixels=xy,
                            position_floor_pix=floor,
                            position_floor=floor * _mean_pixel_scale(field)))
    curves.sort(key=lambda c: -len(c))
    return CurveSet(curves, dropped)


def caustics(field, z_source, curves=None):
    """Caustics: the critical curves mapped to the source plane.

    Parameters
    ----------
    field : `~lensview.DeflectionField`
    z_source : float
    curves : list of `Curve`, optional
        Critical curves already computed for this redshift.

    Returns
    -------
    CurveSet
        One caustic per critical curve, same order, with cusps located.
    """
    if curves is None:
        curves = critical_curves(field, z_source)
    out = CurveSet(dropped=getattr(curves, "dropped", ()))
    for curve in curves:
        bx, by = field.trace_pixels(curve.map_pixels[:, 0], curve.map_pixels[:, 1], z_source)
        xy = np.column_stack([bx, by])
        out.append(Curve(kind=curve.kind, sky=field.pixels_to_sky(bx, by), closed=curve.closed,
                         model=curve.model, z_source=curve.z_source, plane="source",
                         map_pixels=xy, cusps=_cusps(xy, curve.closed)))
    return out


def _contour_tiles(field, tiles, f):
    """Marching squares over tiles; returns [(xy (N, 2), closed)] in map pixels."""
    tiles = np.unique(np.asarray(tiles).reshape(-1, 2), axis=0)
    terms = field.tiles.terms(tiles, shear=False)
    det = 1.0 - f * terms["T"].astype(np.float64) + f * f * terms["D"].astype(np.float64)
    ny, nx = field.shape
    row0, col0 = field.tiles.origins(tiles)
    positive = det > 0
    p00, p01 = det[:, :-1, :-1], det[:, :-1, 1:]
    p10, p11 = det[:, 1:, :-1], det[:, 1:, 1:]
    s00, s01 = positive[:, :-1, :-1], positive[:, :-1, 1:]
    s10, s11 = positive[:, 1:, :-1], positive[:, 1:, 1:]
    # Cells with a masked corner carry no curve: it ends at the mask.
    valid = np.isfinite(p00) & np.isfinite(p01) & np.isfinite(p10) & np.isfinite(p11)
    crossed = valid & ~((s00 == s01) & (s00 == s10) & (s00 == s11))
    k, r, c = np.nonzero(crossed)
    if not len(k):
        return []
    v00, v01, v10, v11 = p00[k, r, c], p01[k, r, c], p10[k, r, c], p11[k, r, c]
    R = (row0[k] + r).astype(np.int64)
    C = (col0[k] + c).astype(np.int64)
    node = R * nx + C
    # Edge order: bottom (r, c)-(r, c+1), top (r+1, c)-(r+1, c+1), left (r, c)-(r+1, c),
    # right (r, c+1)-(r+1, c+1); ids are unique per grid edge, shared by neighbour cells.
    ids = np.stack([2 * node, 2 * (node + nx), 2 * node + 1, 2 * (node + 1) + 1], axis=1)
    has = np.stack([s00[k, r, c] != s01[k, r, c], s10[k, r, c] != s11[k, r, c],
                    s00[k, r, c] != s10[k, r, c], s01[k, r, c] != s11[k, r, c]], axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        zero = np.zeros_like(v00)
        x = np.stack([C + v00 / (v00 - v01), C + v10 / (v10 - v11), C + zero, C + 1.0 + zero], axis=1)
        y = np.stack([R + zero, R + 1.0 + zero, R + v00 / (v00 - v10), R + v01 / (v01 - v11)], axis=1)
    count = has.sum(axis=1)
    ends_a, ends_b = [], []
    two = np.nonzero(count == 2)[0]
    if len(two):
        slot = np.nonzero(has[two])[1].reshape(-1, 2)
        ends_a.append((two, slot[:, 0]))
        ends_b.append((two, slot[:, 1]))
    four = np.nonzero(count == 4)[0]
    if len(four):
        centre = (v00[four] + v01[four] + v10[four] + v11[four]) / 4.0
        joined = (centre > 0) == (v00[four] > 0)
        # Centre on the side of corner (r, c): that diagonal is connected, so the curve
        # cuts off corners (r, c+1) and (r+1, c); otherwise it cuts off (r, c) and (r+1, c+1).
        ends_a += [(four, np.zeros(len(four), int)), (four, np.where(joined, 2, 1))]
        ends_b += [(four, np.where(joined, 3, 2)), (four, np.where(joined, 1, 3))]
    cell_a, slot_a = (np.concatenate(part) for part in zip(*ends_a))
    cell_b, slot_b = (np.concatenate(part) for part in zip(*ends_b))
    all_ids = np.concatenate([ids[cell_a, slot_a], ids[cell_b, slot_b]])
    all_xy = np.column_stack([np.concatenate([x[cell_a, slot_a], x[cell_b, slot_b]]),
                              np.concatenate([y[cell_a, slot_a], y[cell_b, slot_b]])])
    nodes, first, inverse = np.unique(all_ids, return_index=True, return_inverse=True)
    positions = all_xy[first]
    n_seg = len(cell_a)
    ia, ib = inverse[:n_seg], inverse[n_seg:]
    n = len(nodes)
    graph = coo_matrix((np.ones(n_seg), (ia, ib)), shape=(n, n)).tocsr()
    graph = (graph + graph.T).tocsr()
    degree = np.diff(graph.indptr)
    n_comp, labels = connected_components(graph, directed=False)
    polylines = []
    by_label = np.argsort(labels, kind="stable")
    bounds = np.searchsorted(labels[by_label], np.arange(n_comp + 1))
    for comp in range(n_comp):
        members = by_label[bounds[comp]:bounds[comp + 1]]
        ends = members[degree[members] == 1]
        start = ends[0] if len(ends) else members[0]
        order = depth_first_order(graph, start, directed=False, return_predecessors=False)
        closed = len(ends) == 0 and len(order) > 2
        polylines.append((positions[order], closed))
    return polylines


def _tiles_beyond_open_ends(field, tiles, polylines):
    """Tiles that continue open polylines cut by the edge of the computed area."""
    computed = np.zeros(field.tiles.grid_shape, bool)
    computed[tiles[:, 0], tiles[:, 1]] = True
    extra = set()
    for xy, closed in polylines:
        if closed:
            continue
        for x, y in (xy[0], xy[-1]):
            for dr in (-1, 0, 1):
                for dc in (-1, 0, 1):
                    tr = int((y + dr * 0.5) // TILE)
                    tc = int((x + dc * 0.5) // TILE)
                    if 0 <= tr < computed.shape[0] and 0 <= tc < computed.shape[1] \
                            and not computed[tr, tc]:
                        extra.add((tr, tc))
    return np.array(sorted(extra), dtype=np.int64).reshape(-1, 2)


def refine_onto_critical(field, xy, f, steps=NEWTON_STEPS):
    """Move points onto the smooth zero set of det A by Newton steps.

    Each step follows the gradient of the local interpolant of det A
    (`DeflectionField.local_terms`); a point whose step would exceed one
    pixel, or is undefined, stays where it is.

    Parameters
    ----------
    field : `~lensview.DeflectionField`
    xy : ndarray
        (N, 2) map pixel positions near a critical curve.
    f : float
        Scaling factor for the source redshift.
    steps : int

    Returns
    -------
    ndarray
        (N, 2) refined positions.
    """
    return _refine(field, xy, f, steps)[0]


def _refine(field, xy, f, steps=NEWTON_STEPS):
    """`refine_onto_critical`, also returning the local fits it used."""
    xy = np.array(xy, dtype=float)
    # One noise-aware fit per start point; it stays valid for sub-pixel steps.
    fit = field.local_fit(xy[:, 0], xy[:, 1], warn=False)
    idx = np.arange(len(xy))
    negligible = None
    for _ in range(steps):
        if not len(idx):
            break
        part = fit if len(idx) == len(xy) else fit.subset(idx)
        terms = part.terms(xy[idx, 0], xy[idx, 1], second_derivatives=True,
                           noise=negligible is None)
        value = terms.det_a(f)
        gx, gy = terms.grad_det_a(f)
        norm2 = gx * gx + gy * gy
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.column_stack([value * gx, value * gy]) / norm2[:, None]
            if negligible is None:
                # Steps far below the map's own positional noise change nothing that matters.
                negligible = np.maximum(1e-9, 1e-2 * det_a_sigma(terms, f) / np.sqrt(norm2))
        size = np.hypot(step[:, 0], step[:, 1])
        good = np.isfinite(size) & (size < 1.0)
        xy[idx[good]] -= step[good]
        keep = good & ~(size < negligible)
        idx, negligible = idx[keep], negligible[keep]
    return xy, fit


def _unresolved_nodes(field, tiles):
    tiles = np.unique(np.asarray(tiles).reshape(-1, 2), axis=0)
    flags = field.tiles.terms(tiles, shear=False)["unresolved"]
    k, r, c = np.nonzero(flags)
    row0, col0 = field.tiles.origins(tiles)
    return np.column_stack([col0[k] + c, row0[k] + r]).astype(float)


def _artefact_reason(xy, unresolved):
    finite = xy[np.isfinite(xy).all(axis=1)]
    if len(finite) == 0:
        return "no vertex could be placed on the smooth zero set"
    size = float(np.max(np.ptp(finite, axis=0)))
    if size >= SPURIOUS_LOOP_SIZE or len(unresolved) == 0:
        return None
    distance, _ = cKDTree(unresolved).query(finite, distance_upper_bound=SPURIOUS_LOOP_DISTANCE)
    if np.all(np.isfinite(distance)):
        return ("loop of {:.1f} pixels around a centre the map's grid does not resolve "
                "(finite differences cannot follow the profile there)".format(size))
    return None


def _position_floor(terms, f):
    """RMS over the vertices of sigma(det A) / |grad det A| (map pixels)."""
    gx, gy = terms.grad_det_a(f)
    with np.errstate(divide="ignore", invalid="ignore"):
        per_vertex = det_a_sigma(terms, f) / np.hypot(gx, gy)
    per_vertex = per_vertex[np.isfinite(per_vertex)]
    return float(np.sqrt(np.mean(per_vertex**2))) if len(per_vertex) else np.nan


def _mean_pixel_scale(field):
    """Geometric mean pixel scale: an isotropic floor in pixels to arcsec."""
    return np.sqrt(np.prod(field.pixel_scales.to_value(u.arcsec))) * u.arcsec


def _classify(terms, f):
    lambda_t, lambda_r = terms.eigenvalues(f)
    return "tangential" if np.nanmedian(np.abs(lambda_t)) <= np.nanmedian(np.abs(lambda_r)) \
        else "radial"


def _cusps(xy, closed, span=2):
    """Vertices of locally maximal turning above CUSP_TURNING_DEG."""
    n = len(xy)
    if n < 2 * span + 1:
        return np.zeros(0, int)
    index = np.arange(n)
    if closed:
        back = xy - xy[(index - span) % n]
        fwd = xy[(index + span) % n] - xy
    else:
        inner = index[span:n - span]
        back = np.full_like(xy, np.nan)
        fwd = np.full_like(xy, np.nan)
        back[inner] = xy[inner] - xy[inner - span]
        fwd[inner] = xy[inner + span] - xy[inner]
    cross = back[:, 0] * fwd[:, 1] - back[:, 1] * fwd[:, 0]
    dot = np.einsum("ij,ij->i", back, fwd)
    turning = np.degrees(np.abs(np.arctan2(cross, dot)))
    turning = np.nan_to_num(turning, nan=0.0)
    neighbours = [np.roll(turning, s) for s in range(-span, span + 1) if s]
    if not closed:
        neighbours = [np.where((index - s >= 0) & (index - s < n), nb, 0.0)
                      for s, nb in zip([s for s in range(-span, span + 1) if s], neighbours)]
    peak = turning >= np.max(neighbours, axis=0)
    candidates = np.nonzero(peak & (turning > CUSP_TURNING_DEG))[0]
    # One cusp per run of neighbouring peaks.
    if len(candidates) > 1:
        keep = np.concatenate([[True], np.diff(candidates) > span])
        candidates = candidates[keep]
    return candidates
