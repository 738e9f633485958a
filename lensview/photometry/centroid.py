"""Snapping a clicked position to the local light centroid of a knot."""

import math
import warnings
from typing import NamedTuple

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.stats import sigma_clipped_stats
from astropy.utils.exceptions import AstropyUserWarning
from photutils.centroids import centroid_2dg

from ..errors import LensviewInputError
from .frame import (cutout_wcs, cutout_image, inside_image, pixel_scale_arcsec, pixels_of,
                    sky_of)
from ..checks import angle_arcsec, sky_coord


class CentroidSnap(NamedTuple):
    """Result of `snap_to_centroid`.

    Attributes
    ----------
    coord : `~astropy.coordinates.SkyCoord`
        The snapped position, or the input position where it did not move.
    moved : bool or ndarray of bool
        Whether each position was moved to a centroid.
    reason : str or ndarray of str
        Why a position was left where it was; empty where it moved.
    """

    coord: SkyCoord
    moved: object
    reason: object


def snap_to_centroid(data, wcs, coord, radius=0.15 * u.arcsec, *, min_snr=3.0):
    """Move clicked positions to the centroid of the nearby peak.

    Within ``radius`` of each position the brightest pixel is located; a box
    of about twice the radius around it is background-subtracted with the
    sigma-clipped median of its border pixels and fitted with a 2-D Gaussian
    (`photutils.centroids.centroid_2dg`). The position moves only when the
    centroid is well defined: the peak stands ``min_snr`` times above the
    scatter of the border, the fit gives a finite centre inside the box, and
    that centre lies within ``radius`` of the input.

    Parameters
    ----------
    data : 2-D ndarray
        The cutout image.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the cutout.
    coord : `~astropy.coordinates.SkyCoord`
        One position or an array of positions (e.g. clicks).
    radius : `~astropy.units.Quantity`, optional
        Largest allowed move (angle).
    min_snr : float, optional
        Peak above the local background, in units of the border scatter,
        below which the region counts as flat.

    Returns
    -------
    CentroidSnap
        ``(coord, moved, reason)``. For a scalar input ``coord`` is the input
        object itself when it did not move; moved positions are ICRS.

    Raises
    ------
    LensviewInputError
        If the image, WCS, position or radius is unusable.
    """
    image = cutout_image(data)
    celestial = cutout_wcs(wcs, image)
    coord = sky_coord(coord, "coord")
    radius_pix = angle_arcsec(radius, "radius") / pixel_scale_arcsec(celestial)
    if not min_snr > 0:
        raise LensviewInputError(f"min_snr must be positive; got {min_snr}.")

    xs, ys = pixels_of(celestial, coord)
    new_x, new_y = xs.copy(), ys.copy()
    moved = np.zeros(xs.size, dtype=bool)
    reasons = []
    for i, (x0, y0) in enumerate(zip(xs, ys)):
        outcome = _centroid_near(image, x0, y0, radius_pix, min_snr)
        if isinstance(outcome, str):
            reasons.append(outcome)
        else:
            new_x[i], new_y[i] = outcome
            moved[i] = True
            reasons.append("")

    if coord.isscalar:
        if not moved[0]:
            return CentroidSnap(coord, False, reasons[0])
        return CentroidSnap(sky_of(celestial, new_x[0], new_y[0]), True, "")

    start = coord.icrs.reshape(-1)
    snapped = sky_of(celestial, new_x[moved], new_y[moved])
    ra = start.ra.deg.copy()
    dec = start.dec.deg.copy()
    ra[moved] = snapped.ra.deg
    dec[moved] = snapped.dec.deg
    result = SkyCoord(ra * u.deg, dec * u.deg, frame="icrs").reshape(coord.shape)
    return CentroidSnap(result, moved.reshape(coord.shape), np.array(reasons).reshape(coord.shape))


def _centroid_near(image, x0, y0, radius_pix, min_snr):
    """Centroid (x, y) near a pixel position, or the reason there is none."""
    ny, nx = image.shape
    if not inside_image(np.array([x0]), np.array([y0]), image.shape)[0]:
        return "outside the image"

    # At least one pixel of search radius, so the disc is never empty.
    search = max(radius_pix, 1.0)
    row, col = _disc_pixels(x0, y0, search, image.shape)
    disc_values = image[row, col]
    if not np.all(np.isfinite(disc_values)):
        return "non-finite pixels within the snapping radius"
    peak = int(np.argmax(disc_values))
    peak_x, peak_y = int(col[peak]), int(row[peak])

    half = max(int(math.ceil(2.0 * radius_pix)), 3)
    x_lo, x_hi = max(peak_x - half, 0), min(peak_x + half + 1, nx)
    y_lo, y_hi = max(peak_y - half, 0), min(peak_y + half + 1, ny)
    box = image[y_lo:y_hi, x_lo:x_hi]
    if min(box.shape) < 5:
        return "too close to the image edge for a centroid"
    border = np.concatenate([box[0], box[-1], box[1:-1, 0], box[1:-1, -1]])
    border = border[np.isfinite(border)]
    if border.size < 8:
        return "too few finite pixels around the peak to set a background"
    _, background, scatter = sigma_clipped_stats(border, sigma=3.0)
    excess = image[peak_y, peak_x] - background
    if not excess > min_snr * scatter or not excess > 0:
        return "flat region: no peak stands out from the local background"

    bad = ~np.isfinite(box)
    subtracted = np.where(bad, 0.0, box - background)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", AstropyUserWarning)
        try:
            cx, cy = centroid_2dg(subtracted, mask=bad)
        except ValueError:
            return "the Gaussian centroid fit failed"
    if any(issubclass(w.category, AstropyUserWarning) for w in caught):
        return "the Gaussian centroid fit did not converge"
    if not (np.isfinite(cx) and np.isfinite(cy)):
        return "the Gaussian centroid fit gave no finite centre"
    if not (-0.5 <= cx < box.shape[1] - 0.5 and -0.5 <= cy < box.shape[0] - 0.5):
        return "the centroid fell outside the fitting box"
    x, y = x_lo + cx, y_lo + cy
    distance = math.hypot(x - x0, y - y0)
    if distance > radius_pix:
        return (
            f"the centroid lies {distance:.2f} px away, beyond the snapping "
            f"radius of {radius_pix:.2f} px"
        )
    return x, y


def _disc_pixels(x0, y0, radius, shape):
    ny, nx = shape
    x_lo, x_hi = max(int(math.floor(x0 - radius)), 0), min(int(math.ceil(x0 + radius)), nx - 1)
    y_lo, y_hi = max(int(math.floor(y0 - radius)), 0), min(int(math.ceil(y0 + radius)), ny - 1)
    row, col = np.mgrid[y_lo : y_hi + 1, x_lo : x_hi + 1]
    inside = (col - x0) ** 2 + (row - y0) ** 2 <= radius**2
    return row[inside], col[inside]


