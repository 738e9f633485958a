"""Rendering analytic profiles onto WCS grids, and the map's intermediate world plane."""

import numpy as np
import astropy.units as u
from astropy.wcs import WCS

from ..checks import finite_number
from ..errors import LensviewInputError
from .profiles import (arcsec_value, centre_coord, flatten_profiles, plane_offsets,
                       position_angle_rad)

_BLOCK_PIXELS = 1 << 20  # grid evaluation in blocks of about a million pixels

def make_wcs(center, shape, pixel_scale, rotation=0 * u.deg, flip_east=True):
    """A TAN WCS with a CD matrix, centred on a sky position.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
        Sky position of the middle of the grid (the reference point).
    shape : tuple of int
        (ny, nx).
    pixel_scale : `~astropy.units.Quantity`
        Angle per pixel, the same along both axes.
    rotation : `~astropy.units.Quantity`
        Position angle of the +y pixel axis, North through East.
    flip_east : bool
        True for the usual orientation with East to the left of North
        (det CD < 0, +x towards West at rotation 0); False for a mirrored grid.

    Returns
    -------
    `~astropy.wcs.WCS`
    """
    center = centre_coord(center)
    ny, nx = _shape(shape)
    scale = arcsec_value(pixel_scale, "pixel_scale", positive=True) / 3600.0
    th = position_angle_rad(rotation, "rotation")
    sign = -1.0 if flip_east else 1.0
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.radesys = "ICRS"
    wcs.wcs.crval = [center.ra.deg, center.dec.deg]
    wcs.wcs.crpix = [(nx + 1) / 2, (ny + 1) / 2]
    # Columns: the +x and +y pixel axes as (East, North) steps in degrees.
    wcs.wcs.cd = scale * np.array([[sign * np.cos(th), np.sin(th)],
                                   [-sign * np.sin(th), np.cos(th)]])
    wcs.wcs.set()
    return wcs


def _shape(shape):
    try:
        ny, nx = (int(v) for v in shape)
    except (TypeError, ValueError) as error:
        raise LensviewInputError(f"shape must be (ny, nx); got {shape!r}.") from error
    if ny < 1 or nx < 1:
        raise LensviewInputError(f"shape must be two positive sizes (ny, nx); got {shape!r}.")
    return ny, nx


def _tan_wcs(wcs):
    """The celestial part of a WCS whose pixels map affinely onto its plane."""
    if not isinstance(wcs, WCS) or not wcs.has_celestial:
        raise LensviewInputError("Analytic maps need a celestial astropy WCS (RA---TAN, DEC--TAN).")
    cel = wcs.celestial
    if [c[-3:] for c in cel.wcs.ctype] != ["TAN", "TAN"] or cel.sip is not None \
            or cel.cpdis1 is not None or cel.cpdis2 is not None or cel.det2im1 is not None \
            or cel.det2im2 is not None:
        raise LensviewInputError(
            f"Analytic profiles are rendered on undistorted TAN grids only (got "
            f"{list(cel.wcs.ctype)}); use make_wcs or a RA---TAN/DEC--TAN WCS without SIP or "
            "lookup-table distortions.")
    if not np.isclose(cel.wcs.lonpole, 180.0):
        raise LensviewInputError(
            f"LONPOLE = {cel.wcs.lonpole} turns the TAN plane away from East/North; use the "
            "default 180 degrees.")
    if cel.wcs.lng != 0:
        raise LensviewInputError("The WCS has latitude before longitude; give RA first, then Dec.")
    return cel


def _matrix(cel):
    """Pixel-to-plane matrix in arcsec per pixel (rows East, North; columns x, y)."""
    return cel.pixel_scale_matrix * 3600.0


def _pixels_to_plane(cel, px, py):
    m = _matrix(cel)
    dx, dy = px - (cel.wcs.crpix[0] - 1.0), py - (cel.wcs.crpix[1] - 1.0)
    return m[0, 0] * dx + m[0, 1] * dy, m[1, 0] * dx + m[1, 1] * dy


def plane_coordinates(wcs, shape):
    """Plane coordinates of every pixel of a grid.

    Parameters
    ----------
    wcs : `~astropy.wcs.WCS`
        TAN WCS of the grid.
    shape : tuple of int
        (ny, nx).

    Returns
    -------
    x, y : ndarray
        (ny, nx) arrays, arcsec East and North of the reference point.
    """
    cel = _tan_wcs(wcs)
    ny, nx = _shape(shape)
    py, px = np.mgrid[0:ny, 0:nx].astype(float)
    return _pixels_to_plane(cel, px, py)


def sky_to_plane(wcs, coords):
    """Plane coordinates of sky positions on a map's WCS.

    Parameters
    ----------
    wcs : `~astropy.wcs.WCS`
    coords : `~astropy.coordinates.SkyCoord`

    Returns
    -------
    x, y : ndarray
        Arcsec East and North of the reference point.
    """
    cel = _tan_wcs(wcs)
    px, py = cel.world_to_pixel(coords)
    return _pixels_to_plane(cel, np.asarray(px, float), np.asarray(py, float))


def plane_to_sky(wcs, x, y):
    """Sky positions of plane coordinates on a map's WCS.

    Parameters
    ----------
    wcs : `~astropy.wcs.WCS`
    x, y : array_like or `~astropy.units.Quantity`
        East and North of the reference point (plain numbers in arcsec).

    Returns
    -------
    `~astropy.coordinates.SkyCoord`
        ICRS positions.
    """
    cel = _tan_wcs(wcs)
    x, y = plane_offsets(x, y)
    inverse = np.linalg.inv(_matrix(cel))
    px = inverse[0, 0] * x + inverse[0, 1] * y + cel.wcs.crpix[0] - 1.0
    py = inverse[1, 0] * x + inverse[1, 1] * y + cel.wcs.crpix[1] - 1.0
    return cel.pixel_to_world(px, py).icrs


def _on_grid(profiles, wcs, shape, evaluate, n_out):
    """Sum ``evaluate(profile, dx, dy)`` over profiles at every pixel, in row blocks."""
    members = flatten_profiles(profiles)
    cel = _tan_wcs(wcs)
    ny, nx = _shape(shape)
    centres = [sky_to_plane(cel, p.center) for p in members]
    out = [np.zeros((ny, nx)) for _ in range(n_out)]
    rows = max(1, _BLOCK_PIXELS // nx)
    for start in range(0, ny, rows):
        py, px = np.mgrid[start:min(ny, start + rows), 0:nx].astype(float)
        x, y = _pixels_to_plane(cel, px, py)
        for profile, (cx, cy) in zip(members, centres):
            for total, part in zip(out, evaluate(profile, x - cx, y - cy)):
                total[start:start + rows] += part
    return out


def deflection_maps(profiles, wcs, shape, *, dtype=np.float64):
    """Deflection maps in the file convention of lensview.

    The components are those along the map's own +x and +y pixel axes, in
    arcsec: the plane (East, North) deflection is turned into pixels with the
    inverse of the pixel scale matrix, and each pixel component is multiplied
    by that axis' pixel scale |CD[:, i]| in arcsec. This holds for rotated
    and mirrored grids alike.

    Parameters
    ----------
    profiles : profile, list of profiles or `CompositeLens`
        Normalised to D_ls/D_s = 1.
    wcs : `~astropy.wcs.WCS`
        TAN WCS of the map.
    shape : tuple of int
        (ny, nx).
    dtype : numpy dtype
        Output type (float32 for files like most published ones).

    Returns
    -------
    alpha_x, alpha_y : ndarray
    """
    east, north = _on_grid(profiles, wcs, shape, lambda p, x, y: p.deflection(x, y), 2)
    m = _matrix(_tan_wcs(wcs))
    inverse = np.linalg.inv(m)
    along_x = inverse[0, 0] * east + inverse[0, 1] * north
    along_y = inverse[1, 0] * east + inverse[1, 1] * north
    scales = np.sqrt((m**2).sum(axis=0))
    return (along_x * scales[0]).astype(dtype), (along_y * scales[1]).astype(dtype)


def convergence_map(profiles, wcs, shape):
    """Exact convergence at every pixel, for D_ls/D_s = 1.

    Parameters
    ----------
    profiles : profile, list of profiles or `CompositeLens`
    wcs : `~astropy.wcs.WCS`
    shape : tuple of int
        (ny, nx).

    Returns
    -------
    ndarray
    """
    (kappa,) = _on_grid(profiles, wcs, shape, lambda p, x, y: (p.convergence(x, y),), 1)
    return kappa


def magnification_map(profiles, wcs, shape, scaling=1.0):
    """Exact signed magnification 1 / det(I - f a) at every pixel.

    Parameters
    ----------
    profiles : profile, list of profiles or `CompositeLens`
    wcs : `~astropy.wcs.WCS`
    shape : tuple of int
        (ny, nx).
    scaling : float
        f = D_ls/D_s of the source (1 for the map normalisation).

    Returns
    -------
    ndarray
        Negative where the image parity is odd.
    """
    a11, a12, a21, a22 = _on_grid(profiles, wcs, shape, lambda p, x, y: p.jacobian(x, y), 4)
    f = finite_number(scaling, "scaling", low=0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return 1.0 / ((1 - f * a11) * (1 - f * a22) - f * f * a12 * a21)
