"""Time delays between the images of one source.

The light travel time of an image at theta of a source at beta is, up to a
constant common to all images, the Fermat potential (Schneider, Ehlers &
Falco 1992, eq. 5.45; Narayan & Bartelmann 1996, arXiv:astro-ph/9606001,
eq. 63)::

    t(theta) = (1 + z_l)/c * D_l D_s / D_ls * (|theta - beta|^2 / 2 - psi(theta))

with psi the lensing potential scaled to the source (f psi_map, as the
deflection) and all angles in radians. Only differences of psi matter, so
psi is needed up to a constant:

* a model given as a potential map (`DeflectionField.from_potential`) is
  interpolated at the images (six-point Lagrange, as the deflection);
* any other model gives psi differences by integrating alpha = grad psi along
  a path between the images. The path is the straight segment when it keeps
  clear of cells the model does not define (NaN) and of nodes the grid does
  not resolve (singular centres), else a detour around them (one or two
  corners, at growing distances). Each piece of the path between grid lines
  is integrated by six-point Gauss-Legendre quadrature, which is exact for the
  field's local interpolant there (a polynomial of degree 10 along a line).

Delays scale as 1/H0 and with the cosmology through D_l D_s / D_ls; they are
reported in days relative to the first-arriving image.
"""

import numpy as np
import astropy.constants as const
import astropy.units as u
from numpy.polynomial.legendre import leggauss
from scipy.spatial import cKDTree

from .. import cosmology as _cosmo
from .potential import potential_at

__all__ = ["time_delay_scale", "fermat_potential", "arrival_times", "pair_time_delay",
           "potential_differences", "CLEARANCE"]

#: Least distance (map pixels) between an integration path and a node the grid
#: does not resolve: beyond the reach of the interpolant's 6 x 6 window.
CLEARANCE = 6.0
_GAUSS_NODES, _GAUSS_WEIGHTS = leggauss(6)
_SAMPLE_STEP = 0.5


def time_delay_scale(z_lens, z_source, cosmology=None):
    """(1 + z_l)/c * D_l D_s / D_ls, as days per arcsec^2 of Fermat potential.

    Parameters
    ----------
    z_lens, z_source : float
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18. Delays scale as 1/H0.

    Returns
    -------
    `~astropy.units.Quantity`
        In day / arcsec^2.
    """
    cosmology = _cosmo.resolve_cosmology(cosmology)
    d_l = _cosmo.angular_diameter_distance(z_lens, cosmology)
    d_s = _cosmo.angular_diameter_distance(z_source, cosmology)
    d_ls = _cosmo.angular_diameter_distance_between(z_lens, z_source, cosmology)
    scale = (1 + z_lens) / const.c * d_l * d_s / d_ls * u.arcsec.to(u.rad) ** 2 / u.arcsec**2
    return scale.to(u.day / u.arcsec**2)


def potential_differences(field, x, y, origin):
    """psi(x_k, y_k) - psi(origin) of the unscaled model, in arcsec^2.

    Parameters
    ----------
    field : `~lensview.DeflectionField`
    x, y : array_like
        Map pixel positions.
    origin : (float, float)
        Map pixel position of the reference point.

    Returns
    -------
    ndarray
        NaN where no clear path joins a point to the origin.
    """
    x = np.atleast_1d(np.asarray(x, float))
    y = np.atleast_1d(np.asarray(y, float))
    origin = np.asarray(origin, float)
    if field.potential is not None:
        values = potential_at(field.potential, np.append(x, origin[0]), np.append(y, origin[1]))
        if np.isfinite(values).all():
            return values[:-1] - values[-1]
    out = np.empty(len(x))
    for k, end in enumerate(np.column_stack([x, y])):
        out[k] = _path_integral(field, origin, end)
    return out


def fermat_potential(field, x, y, z_source, *, beta=None):
    """Fermat potential |theta - beta|^2/2 - f psi (arcsec^2) at image positions.

    Parameters
    ----------
    field : `~lensview.DeflectionField`
    x, y : array_like
        Map pixel positions of the images.
    z_source : float
    beta : (float, float) or None
        Source position in map pixels; None takes each image's own traced
        position (exact for solved images).

    Returns
    -------
    ndarray
        Relative to the first position (its psi is the reference); NaN where
        psi could not be reached.
    """
    x = np.atleast_1d(np.asarray(x, float))
    y = np.atleast_1d(np.asarray(y, float))
    f = field.scaling_factor(z_source)
    to_arcsec = field.wcs.pixel_scale_matrix * 3600.0
    if beta is None:
        ax, ay = field.deflection_pixels(x, y)
        offset = f * np.column_stack([ax, ay])
    else:
        offset = np.column_stack([x - beta[0], y - beta[1]])
    offset = offset @ to_arcsec.T
    geometric = 0.5 * np.sum(offset**2, axis=1)
    psi = potential_differences(field, x, y, (x[0], y[0]))
    return geometric - f * psi


def arrival_times(field, x, y, z_source, *, beta=None):
    """Delays (days) after the first-arriving image, and the arrival order.

    Parameters
    ----------
    field, x, y, z_source, beta
        As for `fermat_potential`.

    Returns
    -------
    delays : `~astropy.units.Quantity`
        Days; 0 for the first image, positive for later ones, NaN where psi
        could not be reached.
    order : ndarray of int
        1 for the first-arriving image, 2 for the next, ...; 0 where unknown.
    """
    tau = fermat_potential(field, x, y, z_source, beta=beta)
    scale = time_delay_scale(field.z_lens, z_source, field.cosmology)
    known = np.isfinite(tau)
    delays = np.full(len(tau), np.nan)
    order = np.zeros(len(tau), int)
    if known.any():
        delays[known] = tau[known] - tau[known].min()
        ranks = np.argsort(np.argsort(tau[known], kind="stable"), kind="stable")
        order[known] = ranks + 1
    return delays * u.arcsec**2 * scale, order


def pair_time_delay(field, x, y, z_source):
    """t_j - t_i (days) for two knots at map pixels (x[0], y[0]) and (x[1], y[1]).

    The two knots are taken as images of one source at the mean of their
    traced positions.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    f = field.scaling_factor(z_source)
    ax, ay = field.deflection_pixels(x, y)
    beta = (np.mean(x - f * ax), np.mean(y - f * ay))
    tau = fermat_potential(field, x, y, z_source, beta=beta)
    scale = time_delay_scale(field.z_lens, z_source, field.cosmology)
    return ((tau[1] - tau[0]) * u.arcsec**2 * scale).to(u.day)


# ---------------------------------------------------------------------------- path integrals
def _path_integral(field, start, end):
    """Integral of alpha . dtheta (arcsec^2, unscaled) along a clear path start -> end."""
    span = float(max(field.shape))
    for path in _candidate_paths(start, end, span):
        if _clear(field, path):
            return sum(_segment_integral(field, a, b) for a, b in zip(path[:-1], path[1:]))
    return np.nan


def _candidate_paths(start, end, span):
    """The straight path, then detours with one or two corners at growing distances."""
    yield [start, end]
    step = end - start
    length = float(np.hypot(*step))
    if length == 0:
        return
    normal = np.array([-step[1], step[0]]) / length
    middle = 0.5 * (start + end)
    reach = CLEARANCE
    while reach <= span:
        for sign in (1.0, -1.0):
            yield [start, middle + sign * reach * normal, end]
        for sign in (1.0, -1.0):
            shift = sign * reach * normal
            yield [start, start + shift, end + shift, end]
        reach *= 1.5


def _clear(field, path):
    """True if the path stays on defined cells, away from unresolved nodes."""
    points = np.vstack([_samples(a, b) for a, b in zip(path[:-1], path[1:])] + [path[-1][None]])
    ax, ay = field.deflection_pixels(points[:, 0], points[:, 1])
    if not np.isfinite(ax + ay).all():
        return False
    nodes = _unresolved_near(field, points)
    if not len(nodes):
        return True
    distance, _ = cKDTree(nodes).query(points, distance_upper_bound=CLEARANCE)
    return bool(np.all(np.isinf(distance)))


def _samples(a, b):
    n = max(2, int(np.ceil(np.hypot(*(b - a)) / _SAMPLE_STEP)) + 1)
    t = np.linspace(0.0, 1.0, n)[:, None]
    return a + t * (b - a)


def _unresolved_near(field, points):
    """Map pixels of unresolved nodes in the tiles around the points."""
    tiles = field.tiles
    size = tiles.NODES - 1
    rows_max, cols_max = tiles.grid_shape
    reach = int(np.ceil(CLEARANCE / size))
    base = np.unique(np.column_stack([np.floor(points[:, 1] / size), np.floor(points[:, 0] / size)])
                     .astype(int), axis=0)
    shifts = np.array([(dr, dc) for dr in range(-reach, reach + 1) for dc in range(-reach, reach + 1)])
    near = (base[:, None, :] + shifts[None]).reshape(-1, 2)
    near = near[(near[:, 0] >= 0) & (near[:, 0] < rows_max) & (near[:, 1] >= 0)
                & (near[:, 1] < cols_max)]
    near = np.unique(near, axis=0)
    flags = tiles.terms(near, shear=False)["unresolved"]
    k, r, c = np.nonzero(flags)
    row0, col0 = tiles.origins(near)
    return np.column_stack([col0[k] + c, row0[k] + r]).astype(float)


def _segment_integral(field, a, b):
    """Gauss-Legendre over the pieces of a -> b between grid lines (exact per piece)."""
    step = b - a
    cuts = [0.0, 1.0]
    for axis in (0, 1):
        if step[axis] != 0:
            lo, hi = sorted((a[axis], b[axis]))
            lines = np.arange(np.ceil(lo), np.floor(hi) + 1)
            cuts.extend((lines - a[axis]) / step[axis])
    cuts = np.unique(np.clip(cuts, 0.0, 1.0))
    lo, hi = cuts[:-1], cuts[1:]
    keep = hi - lo > 1e-12
    lo, hi = lo[keep], hi[keep]
    t = 0.5 * (hi + lo)[:, None] + 0.5 * (hi - lo)[:, None] * _GAUSS_NODES[None, :]
    weights = 0.5 * (hi - lo)[:, None] * _GAUSS_WEIGHTS[None, :]
    points = a + t.reshape(-1, 1) * step
    ax, ay = field.deflection_pixels(points[:, 0], points[:, 1])
    matrix = field.wcs.pixel_scale_matrix * 3600.0
    gram = matrix.T @ matrix
    # d psi = alpha_plane . d theta = alpha_pix^T G dp, alpha_pix in map pixels (unscaled).
    along = gram @ step
    integrand = ax * along[0] + ay * along[1]
    return float(np.sum(weights.reshape(-1) * integrand))
