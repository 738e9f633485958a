"""Finite-difference stencils and local Lagrange interpolation on a pixel grid.

Two tools that let `DeflectionField` stay accurate without building a global
spline over a large map:

* fourth-order central differences evaluated on stacks of small tiles, for
  whole-grid quantities and contouring;
* a six-point (degree-5) Lagrange interpolant in each axis, built from the
  6 x 6 neighbourhood of each query point, whose analytic derivatives give the
  deflection Jacobian and its gradient anywhere on the grid;
* its least-squares generalisation to wider windows (tensor-product
  polynomial fits, `fit_coefficients`), which averages down the rounding noise
  of maps stored with few digits (see `lensview.lens.precision`).
"""

import functools

import numpy as np

__all__ = [
    "TILE",
    "LAGRANGE_NODES",
    "lagrange_weights",
    "fit_weights",
    "fit_frame",
    "fit_projector",
    "fit_coefficients",
    "monomials",
    "window_starts",
    "gather_windows",
    "interpolate_values",
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


def fit_weights(t, derivative, n_nodes, degree):
    """Weights of a least-squares polynomial fit at offsets ``t``.

    The polynomial of ``degree`` that fits ``n_nodes`` equally spaced node
    values best in the least-squares sense (Savitzky & Golay 1964, for any
    evaluation point rather than the centre only); with
    ``n_nodes == degree + 1`` it is the Lagrange interpolant. Rounding noise
    of the node values, if white, reaches the fitted value or derivative
    multiplied by the Euclidean norm of these weights.

    Parameters
    ----------
    t : ndarray
        Positions in units of the grid spacing from the first node of the
        window (nodes at 0, 1, ..., n_nodes - 1).
    derivative : int
        0, 1 or 2.
    n_nodes, degree : int

    Returns
    -------
    ndarray
        Shape ``t.shape + (n_nodes,)``.
    """
    centre, scale = fit_frame(n_nodes)
    s = (np.asarray(t, dtype=float) - centre) / scale
    return (monomials(s, derivative, degree) @ fit_projector(n_nodes, degree)) / scale**derivative


def fit_frame(n_nodes):
    """(centre, half-width) of an ``n_nodes`` window, in nodes from its first node.

    Fits use the scaled coordinate s = (t - centre) / half-width, in [-1, 1]
    over the window, which keeps the normal equations well conditioned.
    """
    centre = 0.5 * (np.asarray(n_nodes, dtype=float) - 1.0)
    return centre, np.maximum(centre, 1.0)


@functools.lru_cache(maxsize=64)
def fit_projector(n_nodes, degree):
    """Least-squares projector P (degree+1, n_nodes): node values to monomial
    coefficients in the scaled coordinate of `fit_frame`."""
    centre, scale = fit_frame(n_nodes)
    nodes = (np.arange(n_nodes) - centre) / scale
    projector = np.linalg.pinv(np.vander(nodes, degree + 1, increasing=True))
    projector.setflags(write=False)
    return projector


def monomials(s, derivative, degree):
    """d^k/ds^k of the monomials 1, s, ..., s**degree at ``s``; shape s.shape + (degree+1,)."""
    s = np.asarray(s, dtype=float)
    powers = np.arange(degree + 1)
    falling = np.ones(degree + 1)
    for k in range(derivative):
        falling = falling * np.maximum(powers - k, 0)
    plain = np.ones(s.shape + (degree + 1,))
    for p in range(1, degree + 1 - derivative):
        plain[..., p] = plain[..., p - 1] * s
    # d^k/ds^k s^p = falling(p, k) s^(p - k): the plain monomials shifted up by k.
    basis = np.zeros_like(plain)
    basis[..., derivative:] = plain[..., :degree + 1 - derivative]
    return basis * falling


def fit_coefficients(windows, n_nodes, degree):
    """Tensor-product least-squares polynomials fitted to stacks of windows.

    Parameters
    ----------
    windows : ndarray
        (N, n_nodes, n_nodes) node values (rows = y, columns = x), float64.
    n_nodes, degree : int

    Returns
    -------
    ndarray
        (N, degree+1, degree+1) coefficients ``C`` with the fit
        ``sum_pq C[p, q] s_y**p s_x**q`` in the coordinates of `fit_frame`.
    """
    projector = fit_projector(n_nodes, degree)
    # Broadcast matrix products: faster here than one reshaped BLAS call plus a transpose.
    return np.matmul(projector, np.matmul(windows, projector.T))


def window_starts(position, size, n_nodes=LAGRANGE_NODES, align=1):
    """First node of the ``n_nodes`` window used for each position along an axis.

    Windows are centred on the cell holding the position where possible and
    pushed inwards at the map edges, so every window lies inside the grid.
    With ``align`` > 1 they are centred on blocks of ``align`` cells instead,
    so that nearby positions share one window (and one fit).
    """
    block = np.floor(position).astype(np.int64) // align
    start = block * align + align // 2 - (n_nodes // 2 - 1)
    return np.clip(start, 0, size - n_nodes)


def gather_windows(array, row_start, col_start, size=LAGRANGE_NODES, dtype=np.float64):
    """Stack of ``size`` x ``size`` windows of ``array`` at the given corners.

    Works on memory-mapped arrays of any byte order; the result is float64,
    or the stored dtype with ``dtype=None``.
    """
    # Indexing a strided view of all windows copies whole window rows at a time,
    # several times faster than indexing every node.
    windows = np.lib.stride_tricks.sliding_window_view(array, (size, size))
    return np.asarray(windows[row_start, col_start], dtype=dtype)


def interpolate_values(array, x, y):
    """Values of a map at pixel positions by the local six-point Lagrange interpolant.

    For values only (no derivatives): rounding noise of the stored values
    reaches them unamplified, so no wider fit is needed on float32 maps.
    Positions off the map give NaN.
    """
    x = np.atleast_1d(np.asarray(x, float))
    y = np.atleast_1d(np.asarray(y, float))
    ny, nx = array.shape
    inside = np.isfinite(x) & np.isfinite(y) & (x >= 0) & (x <= nx - 1) & (y >= 0) & (y <= ny - 1)
    xs, ys = np.where(inside, x, 0.0), np.where(inside, y, 0.0)
    col0, row0 = window_starts(xs, nx), window_starts(ys, ny)
    windows = gather_windows(array, row0, col0)
    wx = lagrange_weights(xs - col0)
    wy = lagrange_weights(ys - row0)
    values = np.einsum("ni,nij,nj->n", wy, windows, wx)
    return np.where(inside, values, np.nan)


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
