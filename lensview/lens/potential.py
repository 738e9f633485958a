"""Deflection maps from a lensing-potential (psi) map, and psi at any point.

The scaled deflection is the gradient of the lensing potential, alpha =
grad psi (Schneider, Ehlers & Falco 1992, eq. 5.8; Narayan & Bartelmann
1996, arXiv:astro-ph/9606001, eq. 22). psi is given in arcsec^2 on the map's
own grid. With M the pixel-to-plane matrix (arcsec per pixel) and
G = M^T M, the pixel derivatives dpsi/dp = M^T grad psi give the deflection in
map pixels as alpha_pix = G^-1 dpsi/dp; it is returned in arcsec along the
map's own +x/+y axes, as `~lensview.DeflectionField` expects. The derivatives
are the fourth-order central differences of `lensview.lens.stencils` (the ones the
field uses for its Jacobian), so the two outermost rows and columns have no
deflection (NaN).

Only differences of psi matter (an added constant changes nothing); psi is
kept on the field for time delays (`lensview.lens.timedelay`).
"""

import numpy as np

from ..checks import celestial_wcs
from ..errors import LensviewInputError
from .stencils import central_difference_4, interpolate_values

__all__ = ["potential_deflection", "potential_at"]


def potential_deflection(psi, wcs):
    """Deflection maps (arcsec, along the map's +x/+y axes) of a potential map.

    Parameters
    ----------
    psi : array_like
        2-D lensing potential in arcsec^2, normalised as the deflection will
        be (usually D_ls/D_s = 1).
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the map.

    Returns
    -------
    alpha_x, alpha_y : ndarray
        float64, NaN on the two outermost rows and columns and next to NaN cells.

    Raises
    ------
    LensviewInputError
        For a map that is not 2-D, too small for the stencil, without any
        finite value, or without a celestial WCS.
    """
    psi = potential_map(psi)
    matrix = _pixel_matrix(wcs)
    dpsi_dx = np.full(psi.shape, np.nan)
    dpsi_dy = np.full(psi.shape, np.nan)
    dpsi_dx[:, 2:-2] = central_difference_4(psi, 1)
    dpsi_dy[2:-2, :] = central_difference_4(psi, 0)
    inverse_gram = np.linalg.inv(matrix.T @ matrix)
    scales = np.sqrt((matrix**2).sum(axis=0))
    alpha_x = (inverse_gram[0, 0] * dpsi_dx + inverse_gram[0, 1] * dpsi_dy) * scales[0]
    alpha_y = (inverse_gram[1, 0] * dpsi_dx + inverse_gram[1, 1] * dpsi_dy) * scales[1]
    return alpha_x, alpha_y


def potential_at(psi, x, y):
    """psi at map pixel positions, by the local six-point Lagrange interpolant.

    Parameters
    ----------
    psi : ndarray
        The potential map.
    x, y : array_like
        Map pixel positions (0-based); positions off the map give NaN.

    Returns
    -------
    ndarray
    """
    return interpolate_values(psi, x, y)


def potential_map(psi):
    """The potential as a float64 2-D array, checked."""
    array = np.asarray(psi)
    if array.ndim != 2:
        raise LensviewInputError(
            f"The potential map must be 2-D, got {array.ndim} dimension(s) with shape "
            f"{array.shape}.")
    if min(array.shape) < 8:
        raise LensviewInputError(
            f"The potential map is only {array.shape} pixels; at least 8 per side are needed "
            "to take derivatives.")
    array = np.asarray(array, dtype=np.float64)
    if not np.isfinite(array).any():
        raise LensviewInputError(
            "The potential map holds no finite values; check that the right file or HDU was given.")
    return array


def _pixel_matrix(wcs):
    """Pixel offsets to sky-plane offsets (East, North), arcsec per pixel."""
    return np.asarray(celestial_wcs(wcs, "The potential map").pixel_scale_matrix, float) * 3600.0
