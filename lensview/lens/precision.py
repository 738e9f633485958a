"""How far the stored precision of a deflection map limits its derivatives.

Deflection maps are mostly stored as float32, which keeps about seven
significant digits: a deflection of 900 pixels carries a rounding error of up
to half a unit in the last place, 3e-5 pixels, in every value. Rounding to
nearest makes that error uniform within +-ulp/2, so its standard deviation is
ulp/sqrt(12) (Higham 2002, *Accuracy and Stability of Numerical Algorithms*,
sec. 2.1, rounding model; the uniform law is common practice), and for a
smooth field whose values change by many ulps from node to node it is
uncorrelated between nodes.

Derivatives are linear combinations of node values, so the noise reaches
each estimate multiplied by the Euclidean norm of its weights. A least-squares
polynomial fit over a wider window (`lensview.lens.stencils.fit_weights`) lowers
that gain about as n**-1.5 for a first derivative and n**-0.5 for the value
in the other axis, at the price of a truncation error that grows with the
window. The window for each point is chosen by the intersection of
confidence intervals rule (Goldenshluger & Nemirovski 1997; Katkovnik 1999):
estimates from a ladder of growing windows are kept while their intervals of
+-CONFIDENCE standard deviations still share a common point, so the widest
window whose truncation error stays within its noise wins. The choice follows
how fast the field bends, which changes over many cells, so
`DeflectionField.local_fit` makes it once per block of a few cells, and the
points of a block share its widest window's fit.

The positional uncertainty of a critical curve follows to first order from
det A = 0: a curve point moves by sigma(det A) / |grad det A| along the
normal (our derivation; the same linearisation as the fold law).
"""

import numpy as np

__all__ = [
    "FIT_DEGREE",
    "fit_degree",
    "WINDOW_LADDER",
    "CONFIDENCE",
    "noise_aware",
    "rounding_sigma",
    "intersect_confidence",
    "det_a_sigma",
]

#: Polynomial degree of the least-squares fits on windows wider than the
#: 6-node (degree-5) interpolant. Degree 7 keeps the truncation of wide
#: windows below their noise down to Einstein radii of ~100 pixels; degree 5
#: leaves a bias of several noise units there.
FIT_DEGREE = 7
#: Nodes per axis of the candidate windows, narrowest first.
WINDOW_LADDER = (6, 12, 24)
#: Half-width of each confidence interval, in standard deviations of the estimate.
CONFIDENCE = 3.0
#: Storage precisions (relative) above this get noise-aware fits; float64 does not.
NOISE_AWARE_PRECISION = 1e-10


def fit_degree(n_nodes):
    """Degree of the fit on ``n_nodes`` per axis: FIT_DEGREE, or the interpolant's."""
    return min(FIT_DEGREE, int(n_nodes) - 1)


def noise_aware(dtype):
    """True when rounding of values stored as ``dtype`` can limit derivatives.

    float64 rounding (1.1e-16 relative) stays far below the truncation of
    the 6-node interpolant on any map; float32 (6e-8) and float16 do not.
    """
    dtype = np.dtype(dtype)
    return bool(np.issubdtype(dtype, np.floating) and np.finfo(dtype).eps > NOISE_AWARE_PRECISION)


def rounding_sigma(windows, stride=4):
    """Standard deviation of the rounding error of stored values, per window.

    Parameters
    ----------
    windows : ndarray
        Shape (N, n, n), node values in their stored dtype (any byte order).
    stride : int
        The unit in the last place changes only between binades, so every
        ``stride``-th node in each axis is enough to average it.

    Returns
    -------
    ndarray
        sqrt(mean(ulp**2) / 12) per window, in the units of the values (float64).
    """
    sample = windows[:, ::stride, ::stride]
    ulp = np.spacing(np.abs(sample)).astype(np.float64)
    return np.sqrt(np.mean(ulp * ulp, axis=(-2, -1)) / 12.0)


def intersect_confidence(estimates, sigmas, confidence=CONFIDENCE):
    """Index of the widest window accepted by the intersection of intervals.

    Parameters
    ----------
    estimates, sigmas : ndarray
        Shape (K, M, N): K windows (narrowest first), M estimated quantities,
        N points. Non-finite estimates end the ladder for that point.
    confidence : float

    Returns
    -------
    ndarray of int
        Shape (N,), in 0 .. K-1; 0 is always accepted.
    """
    with np.errstate(invalid="ignore"):
        lower = np.maximum.accumulate(estimates - confidence * sigmas, axis=0)
        upper = np.minimum.accumulate(estimates + confidence * sigmas, axis=0)
        agree = np.all(lower <= upper, axis=1)
    agree[0] = True
    # Once the intervals stop intersecting, wider windows are not considered.
    return np.logical_and.accumulate(agree, axis=0).sum(axis=0) - 1


def det_a_sigma(terms, f):
    """Standard deviation of det A from the rounding noise of the Jacobian.

    Parameters
    ----------
    terms : `~lensview.lens.local.LocalTerms`
        Must carry ``sigma_a`` (standard deviations of a11, a12, a21, a22).
    f : float
        Scaling factor for the source redshift.

    Notes
    -----
    det A = 1 - f T + f**2 D, so d det A / d a11 = -f (1 - f a22),
    d/d a22 = -f (1 - f a11), d/d a12 = -f**2 a21, d/d a21 = -f**2 a12; the
    four estimates are treated as independent (the x and y derivatives of a
    centred least-squares fit are uncorrelated; the two maps are separate).
    """
    s11, s12, s21, s22 = terms.sigma_a
    g11 = f * (1.0 - f * terms.a22)
    g22 = f * (1.0 - f * terms.a11)
    g12 = f * f * terms.a21
    g21 = f * f * terms.a12
    return np.sqrt((g11 * s11) ** 2 + (g22 * s22) ** 2 + (g12 * s12) ** 2 + (g21 * s21) ** 2)
