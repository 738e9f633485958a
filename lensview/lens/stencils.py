"""Finite-difference stencils and local Lagrange interpolation on a pixel grid.

Two tools that let `DeflectionField` stay accurate without building a global
spline over a large map:

* fourth-order central differences evaluated on stacks of small tiles, for
  whole-grid quantities and contouring;
* a six-point (degree-5) Lagrange interpolant in each axis, built from the
  6 x 6 neighbourhood of each query point, whose analytic derivatives give the
  deflection Jacobian and its gradient anywhere on the grid.
"""

import numpy as np

__all__ = [
    "TILE",
    "LAGRANGE_NODES",
    "lagrange_weights",
    "window_starts",
    "gather_windows",
    "central_difference_4",
    "central_difference_2",
]

#: Cells per tile side for grid work: derivative terms are computed and cached
#: per tile (lensview.lens.field), curves contoured and counter-images searched
#: tile by tile.
TILE = 16
#: Number of grid nodes per axis used by the local interpolant.
LAGRANGE_NODES = 6


def _lagrange_coefficients(n_nodes):
    """Monomial coefficients of the Lagrange basis polynomials on nodes 0..n-1.

    Returns an array ``C`` of shape (n_nodes, n_nodes) with
    ``L_k(t) = sum_p C[p, k] t**p``.
    """
    nodes = np.arange(n_nodes, dtype=float)
    vandermonde = np.vander(nodes, n_nodes, increasing=True)
    return np.linalg.inv(vandermonde)


_COEFFS = _lagrange_coefficients(LAGRANGE_NODES)
_POWERS = np.arange(LAGRANGE_NODES)


def lagrange_weights(t, derivative=0):
    """Weights of the local Lagrange interpolant at offsets ``t``.

    Parameters
    ----------
    t : ndarray
        Position of each query point in units of the grid spacing, measured
        from the first node of its window (nodes sit at 0, 1, ..., 5).
    derivative : int
        0 for values, 1 or 2 for first or second derivatives of the
        interpolant with respect to ``t``.

    Returns
    -------
    ndarray
        Shape ``t.shape + (6,)``; the interpolated value at ``t`` is the dot
        product of these weights with the six node values.
    """
    t = np.asarray(t, dtype=float)[..., None]
    powers = _POWERS
    if derivative == 0:
        basis = t**powers
    elif derivative == 1:
        basis = np.where(powers >= 1, powers * t ** np.maximum(powers - 1, 0), 0.0)
    elif derivative == 2:
        basis = np.where(
            powers >= 2, powers * (powers - 1) * t ** np.maximum(powers - 2, 0), 0.0
        )
    else:
        raise ValueError("derivative must be 0, 1 or 2")
    return basis @ _COEFFS


def window_starts(position, size):
    """First node of the 6-node window used for each position along an axis.

    Windows are centred on the cell holding the position where possible and
    pushed inwards at the map edges, so every window lies inside the grid.
    """
    start = np.floor(position).astype(np.int64) - (LAGRANGE_NODES // 2 - 1)
    return np.clip(start, 0, size - LAGRANGE_NODES)


def gather_windows(array, row_start, col_start, size=LAGRANGE_NODES):
    """Stack of ``size`` x ``size`` windows of ``array`` at the given corners.

    Works on memory-mapped arrays of any byte order; the result is float64.
    """
    offsets = np.arange(size)
    rows = row_start[:, None, None] + offsets[None, :, None]
    cols = col_start[:, None, None] + offsets[None, None, :]
    return np.asarray(array[rows, cols], dtype=np.float64)


def central_difference_4(stack, axis):
    """Fourth-order central first derivative along ``axis``, unit spacing.

    The result is two samples shorter at each end of ``axis``. Stencil
    (1, -8, 0, 8, -1)/12 (Abramowitz & Stegun 1964, eq. 25.3.6).
    """
    n = stack.shape[axis]

    def part(lo):
        index = [slice(None)] * stack.ndim
        index[axis] = slice(lo, n - 4 + lo)
        return stack[tuple(index)]

    return (part(0) - 8.0 * part(1) + 8.0 * part(3) - part(4)) / 12.0


def central_difference_2(stack, axis):
    """Second-order central first derivative along ``axis``, trimmed like
    `central_difference_4` so the two can be compared sample by sample."""
    n = stack.shape[axis]

    def part(lo):
        index = [slice(None)] * stack.ndim
        index[axis] = slice(lo, n - 4 + lo)
        return stack[tuple(index)]

    return (part(3) - part(1)) / 2.0
