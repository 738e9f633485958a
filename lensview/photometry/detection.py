"""Detection of point-like sources in a box or along an arc band (DAOFIND)."""

import warnings
from dataclasses import dataclass

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.stats import sigma_clipped_stats
from astropy.table import Table
from photutils.detection import DAOStarFinder
from photutils.utils.exceptions import NoDetectionsWarning

from ..errors import LensviewInputError
from .frame import (cutout_wcs, cutout_image, pixel_scale_arcsec, pixels_of,
                    sky_of)
from ..checks import angle_arcsec, sky_coord


@dataclass(frozen=True)
class ArcBand:
    """A band along a polyline on the sky, for detection along an arc.

    Parameters
    ----------
    path : `~astropy.coordinates.SkyCoord`
        At least two vertices along the arc, in order.
    width : `~astropy.units.Quantity`
        Full width of the band (angle), centred on the path.
    """

    path: SkyCoord
    width: u.Quantity


def detect_point_sources(data, wcs, *, fwhm_pix, region=None, threshold_sigma=5.0):
    """Find point-like sources with the DAOFIND algorithm.

    The background and its scatter come from sigma-clipped statistics (3
    sigma) of the pixels inside ``region``; sources are then found with
    `photutils.detection.DAOStarFinder` (Stetson 1987, PASP 99, 191) on the
    background-subtracted image, restricted to the region.

    Parameters
    ----------
    data : 2-D ndarray
        The cutout image.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the cutout.
    fwhm_pix : float
        FWHM of the point-spread function in pixels.
    region : None, SkyCoord, tuple of slice, or ArcBand, optional
        Where to search: ``None`` for the whole cutout; a `SkyCoord` of two
        opposite corners of a box (the box is aligned with the pixel axes);
        a pair ``(rows, columns)`` of `slice` objects in numpy order; or an
        `ArcBand` for a band along an arc.
    threshold_sigma : float, optional
        Detection threshold in units of the background scatter.

    Returns
    -------
    `~astropy.table.Table`
        One row per source, brightest first, with ``ra``, ``dec`` (deg),
        ``x``, ``y`` (pixels), ``flux`` (sum of background-subtracted pixels
        in the finder's kernel footprint, not a total flux; use
        `aperture_photometry` for that), ``peak`` (background-subtracted
        peak pixel), ``peak_snr`` (peak over background scatter) and
        ``sharpness`` (DAOFIND). ``meta`` holds the background, scatter and
        threshold.

    Raises
    ------
    LensviewInputError
        If the inputs are unusable, the region holds too few pixels, or its
        background has no scatter to scale the threshold by.
    """
    image = cutout_image(data)
    celestial = cutout_wcs(wcs, image)
    if not (np.isscalar(fwhm_pix) and np.isfinite(fwhm_pix) and fwhm_pix > 0):
        raise LensviewInputError(
            f"fwhm_pix must be a positive number of pixels; got {fwhm_pix!r}."
        )
    if not (np.isscalar(threshold_sigma) and threshold_sigma > 0):
        raise LensviewInputError(
            f"threshold_sigma must be a positive number; got {threshold_sigma!r}."
        )

    inside = _region_mask(image.shape, celestial, region)
    finite = np.isfinite(image)
    usable = inside & finite
    if usable.sum() < 25:
        raise LensviewInputError(
            f"The search region holds only {int(usable.sum())} finite pixels; "
            "enlarge it or check that it overlaps the cutout."
        )
    _, background, scatter = sigma_clipped_stats(image[usable], sigma=3.0)
    if not scatter > 0:
        raise LensviewInputError(
            "The background in the search region has no scatter (a constant "
            "or noiseless image), so a threshold in units of sigma is "
            "undefined; detect on an image with noise."
        )

    threshold = threshold_sigma * scatter
    finder = DAOStarFinder(threshold=threshold, fwhm=float(fwhm_pix))
    subtracted = np.where(finite, image - background, 0.0)
    with warnings.catch_warnings():
        # An empty table is the answer when nothing is found.
        warnings.simplefilter("ignore", NoDetectionsWarning)
        found = finder(subtracted, mask=~usable)

    if found is None:
        found = Table(names=("xcentroid", "ycentroid", "flux", "peak", "sharpness"),
                      dtype=(float,) * 5)
    found.sort("flux", reverse=True)
    x = np.asarray(found["xcentroid"], dtype=float)
    y = np.asarray(found["ycentroid"], dtype=float)
    sky = sky_of(celestial, x, y)
    peak = np.asarray(found["peak"], dtype=float)
    table = Table()
    table["ra"] = sky.ra.deg * u.deg
    table["dec"] = sky.dec.deg * u.deg
    table["x"] = x * u.pix
    table["y"] = y * u.pix
    table["flux"] = np.asarray(found["flux"], dtype=float)
    table["peak"] = peak
    table["peak_snr"] = peak / scatter
    table["sharpness"] = np.asarray(found["sharpness"], dtype=float)
    table.meta.update(
        {"background": float(background), "noise": float(scatter),
         "threshold": float(threshold), "fwhm_pix": float(fwhm_pix)}
    )
    return table


def _region_mask(shape, wcs, region):
    """Boolean mask of the pixels inside a detection region."""
    ny, nx = shape
    if region is None:
        return np.ones(shape, dtype=bool)
    if isinstance(region, ArcBand):
        return _arc_band_mask(shape, wcs, region)
    if isinstance(region, SkyCoord):
        if region.isscalar or region.size != 2:
            raise LensviewInputError(
                "A box region needs exactly two SkyCoord corners; for a band "
                "along an arc pass an ArcBand(path, width)."
            )
        x, y = pixels_of(wcs, region.reshape(-1))
        if not np.all(np.isfinite(x) & np.isfinite(y)):
            raise LensviewInputError("The box corners could not be placed on the cutout WCS.")
        row, col = np.mgrid[0:ny, 0:nx]
        return (col >= x.min()) & (col <= x.max()) & (row >= y.min()) & (row <= y.max())
    if (isinstance(region, tuple) and len(region) == 2
            and all(isinstance(part, slice) for part in region)):
        mask = np.zeros(shape, dtype=bool)
        mask[region] = True
        return mask
    raise LensviewInputError(
        "region must be None, a SkyCoord of two box corners, a (rows, columns) "
        f"pair of slices, or an ArcBand; got {type(region).__name__}."
    )


def _arc_band_mask(shape, wcs, band):
    path = sky_coord(band.path, "ArcBand.path")
    if path.isscalar or path.size < 2:
        raise LensviewInputError("An ArcBand path needs at least two vertices along the arc.")
    half_width = 0.5 * angle_arcsec(band.width, "ArcBand.width") / pixel_scale_arcsec(wcs)
    px, py = pixels_of(wcs, path.reshape(-1))
    if not np.all(np.isfinite(px) & np.isfinite(py)):
        raise LensviewInputError("The ArcBand path could not be placed on the cutout WCS.")
    ny, nx = shape
    row, col = np.mgrid[0:ny, 0:nx]
    nearest = np.full(shape, np.inf)
    for ax, ay, bx, by in zip(px[:-1], py[:-1], px[1:], py[1:]):
        dx, dy = bx - ax, by - ay
        length2 = dx * dx + dy * dy
        t = 0.0 if length2 == 0 else np.clip(((col - ax) * dx + (row - ay) * dy) / length2, 0, 1)
        nearest = np.minimum(nearest, np.hypot(col - ax - t * dx, row - ay - t * dy))
    return nearest <= half_width


