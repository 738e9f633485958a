"""Photometry of compact knots on a cutout.

Click snapping to a local centroid, detection of point-like sources in a box
or along an arc, aperture photometry with a local background, sizes against
the PSF, and the delensed brightness and size of the source.

Every function works on a 2-D cutout array with its celestial WCS. Pixel
positions are 0-based with ``x`` the column, exactly as
`astropy.wcs.WCS.pixel_to_world` uses them.
"""

import math
import warnings
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.modeling import fitting, models
from astropy.stats import SigmaClip, gaussian_fwhm_to_sigma, sigma_clipped_stats
from astropy.table import Table
from astropy.utils.exceptions import AstropyUserWarning
from astropy.wcs import WCS
from photutils.aperture import ApertureStats, CircularAnnulus, CircularAperture
from photutils.aperture import aperture_photometry as _photutils_aperture_photometry
from photutils.centroids import centroid_2dg
from photutils.detection import DAOStarFinder
from photutils.utils.exceptions import NoDetectionsWarning

from lensview.cosmology import absolute_ab_magnitude, physical_size
from lensview.errors import LensviewInputError

__all__ = [
    "AB_ZERO_FLUX_DENSITY",
    "ArcBand",
    "CentroidSnap",
    "SizeEstimate",
    "ab_magnitude",
    "ab_magnitude_from_fnu",
    "aperture_photometry",
    "delensed_properties",
    "detect_point_sources",
    "measure_size",
    "snap_to_centroid",
    "zero_point",
]

#: Flux density of an AB magnitude of zero (Oke & Gunn 1983, ApJ 266, 713).
AB_ZERO_FLUX_DENSITY = 3631.0 * u.Jy

#: A resolved source must be this much wider than the PSF (common practice).
RESOLVED_FWHM_FACTOR = 1.2

_FWHM_PER_SIGMA = 1.0 / gaussian_fwhm_to_sigma
# Variance of the median of n Gaussian samples is (pi/2) sigma^2 / n
# (asymptotic efficiency of the median, common practice in statistics).
_MEDIAN_VARIANCE_FACTOR = math.pi / 2.0


# ----------------------------------------------------------------------------
# Input checks shared by the public functions


def _image(data):
    image = np.asarray(data, dtype=float)
    if image.ndim != 2:
        raise LensviewInputError(
            f"The cutout must be a 2-D image, but the array has {image.ndim} "
            "dimension(s); pass a single image plane (for a cube, one slice)."
        )
    return image


def _celestial(wcs, image):
    if not isinstance(wcs, WCS) or not wcs.has_celestial:
        raise LensviewInputError(
            "The cutout needs a celestial astropy.wcs.WCS (RA/Dec axes); "
            "read it from the FITS header with astropy.wcs.WCS(header)."
        )
    celestial = wcs.celestial
    if celestial.naxis != 2:
        raise LensviewInputError(
            "The cutout WCS must have exactly two celestial axes; drop the "
            "spectral or other axes before measuring."
        )
    if celestial.pixel_shape is not None and tuple(celestial.pixel_shape) != image.shape[::-1]:
        raise LensviewInputError(
            f"The WCS describes an image of {celestial.pixel_shape[0]} x "
            f"{celestial.pixel_shape[1]} pixels (x by y) but the array is "
            f"{image.shape[1]} x {image.shape[0]}; pass the WCS of this cutout."
        )
    return celestial


def _arcsec_per_pixel(wcs):
    # Geometric mean of the two axes: the side of a square pixel of equal area.
    scales = u.Quantity(wcs.proj_plane_pixel_scales()).to_value(u.arcsec)
    return float(np.sqrt(scales[0] * scales[1]))


def _angle_arcsec(value, name, *, allow_nan=False):
    if not isinstance(value, u.Quantity) or value.unit.physical_type != "angle":
        raise LensviewInputError(
            f"{name} must be an angle Quantity such as 0.1 * u.arcsec; got {value!r}."
        )
    arcsec = value.to_value(u.arcsec)
    checked = arcsec[~np.isnan(arcsec)] if allow_nan else arcsec
    if not np.all(np.isfinite(checked)) or np.any(checked <= 0):
        raise LensviewInputError(f"{name} must be a positive, finite angle; got {value}.")
    return arcsec


def _sky_coord(coord, name):
    if not isinstance(coord, SkyCoord):
        raise LensviewInputError(
            f"{name} must be an astropy SkyCoord, for example "
            f"SkyCoord(ra, dec, unit='deg'); got {type(coord).__name__}."
        )
    return coord


def _pixels(wcs, coord):
    x, y = wcs.world_to_pixel(coord)
    return np.atleast_1d(np.asarray(x, dtype=float)), np.atleast_1d(np.asarray(y, dtype=float))


def _sky(wcs, x, y):
    return wcs.pixel_to_world(x, y).icrs


def _inside_image(x, y, shape):
    ny, nx = shape
    finite = np.isfinite(x) & np.isfinite(y)
    return finite & (x >= -0.5) & (x < nx - 0.5) & (y >= -0.5) & (y < ny - 0.5)


# ----------------------------------------------------------------------------
# Centroid snapping


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
    image = _image(data)
    celestial = _celestial(wcs, image)
    coord = _sky_coord(coord, "coord")
    radius_pix = _angle_arcsec(radius, "radius") / _arcsec_per_pixel(celestial)
    if not min_snr > 0:
        raise LensviewInputError(f"min_snr must be positive; got {min_snr}.")

    xs, ys = _pixels(celestial, coord)
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
        return CentroidSnap(_sky(celestial, new_x[0], new_y[0]), True, "")

    start = coord.icrs.reshape(-1)
    snapped = _sky(celestial, new_x[moved], new_y[moved])
    ra = start.ra.deg.copy()
    dec = start.dec.deg.copy()
    ra[moved] = snapped.ra.deg
    dec[moved] = snapped.dec.deg
    result = SkyCoord(ra * u.deg, dec * u.deg, frame="icrs").reshape(coord.shape)
    return CentroidSnap(result, moved.reshape(coord.shape), np.array(reasons).reshape(coord.shape))


def _centroid_near(image, x0, y0, radius_pix, min_snr):
    """Centroid (x, y) near a pixel position, or the reason there is none."""
    ny, nx = image.shape
    if not _inside_image(np.array([x0]), np.array([y0]), image.shape)[0]:
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


# ----------------------------------------------------------------------------
# Detection


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
    image = _image(data)
    celestial = _celestial(wcs, image)
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
    sky = _sky(celestial, x, y)
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
        x, y = _pixels(wcs, region.reshape(-1))
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
    path = _sky_coord(band.path, "ArcBand.path")
    if path.isscalar or path.size < 2:
        raise LensviewInputError("An ArcBand path needs at least two vertices along the arc.")
    half_width = 0.5 * _angle_arcsec(band.width, "ArcBand.width") / _arcsec_per_pixel(wcs)
    px, py = _pixels(wcs, path.reshape(-1))
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


# ----------------------------------------------------------------------------
# Aperture photometry and magnitudes


def ab_magnitude(flux, zero_point):
    """AB magnitude of a flux in image units, given the image's AB zero point.

    ``m = zero_point - 2.5 log10(flux)``; non-positive or non-finite fluxes
    give NaN.

    Parameters
    ----------
    flux : float, array or `~astropy.units.Quantity`
        Flux in the units the zero point refers to (the image units).
    zero_point : float or `~astropy.units.Quantity` in mag
        AB magnitude of a unit flux.

    Returns
    -------
    float or ndarray
        AB magnitudes.
    """
    zp = _zero_point_value(zero_point)
    if isinstance(flux, u.Quantity) and flux.unit.physical_type != "dimensionless":
        raise LensviewInputError(
            f"A flux in {flux.unit} cannot be combined with an image zero point; give the flux in "
            "the image's own units, or use ab_magnitude_from_fnu for a flux density.")
    flux = np.asarray(u.Quantity(flux).value, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        magnitude = np.where(flux > 0, zp - 2.5 * np.log10(np.where(flux > 0, flux, 1.0)), np.nan)
    return float(magnitude) if magnitude.ndim == 0 else magnitude


def ab_magnitude_from_fnu(fnu):
    """AB magnitude of a spectral flux density per unit frequency.

    ``m = -2.5 log10(f_nu / 3631 Jy)`` (Oke & Gunn 1983, ApJ 266, 713);
    non-positive values give NaN.

    Parameters
    ----------
    fnu : `~astropy.units.Quantity`
        Flux density f_nu (e.g. in Jy or erg s-1 cm-2 Hz-1).

    Returns
    -------
    float or ndarray
        AB magnitudes.
    """
    if not isinstance(fnu, u.Quantity) or not fnu.unit.is_equivalent(u.Jy):
        raise LensviewInputError(
            "fnu must be a flux density per unit frequency, e.g. 1.2 * u.uJy; "
            f"got {fnu!r}. Convert f_lambda with u.spectral_density first."
        )
    return ab_magnitude(fnu.to_value(u.Jy) / AB_ZERO_FLUX_DENSITY.to_value(u.Jy), 0.0)


def _zero_point_value(zero_point):
    if isinstance(zero_point, u.Quantity):
        if zero_point.unit != u.mag:
            raise LensviewInputError(
                f"A zero point must be a number or a Quantity in u.mag; got {zero_point}."
            )
        zero_point = zero_point.value
    try:
        zp = float(zero_point)
    except (TypeError, ValueError):
        raise LensviewInputError(
            f"The zero point must be an AB magnitude (a number); got {zero_point!r}."
        ) from None
    if not math.isfinite(zp):
        raise LensviewInputError(f"The zero point must be finite; got {zp}.")
    return zp


def zero_point(header=None, user_value=None):
    """The AB zero point to use: the user's value, else the header's, else None.

    Parameters
    ----------
    header : `~astropy.io.fits.Header`, optional
        Header of the cutout; read with `lensview.fitsio.zero_point_from_header`.
    user_value : float or `~astropy.units.Quantity` in mag, optional
        A zero point given by the user; it always wins.

    Returns
    -------
    float or None
        AB magnitude of a unit flux in image units, or None if unknown.
    """
    if user_value is not None:
        return _zero_point_value(user_value)
    if header is None:
        return None
    from lensview.fitsio import zero_point_from_header

    found = zero_point_from_header(header)
    return None if found is None else _zero_point_value(found)


def aperture_photometry(data, wcs, coords, radius, annulus=None, *, zero_point=None,
                        error=None, labels=None):
    """Circular-aperture photometry with a local annulus background.

    The background per pixel is the sigma-clipped (3 sigma) median of the
    annulus; the flux is the exact-overlap aperture sum minus that
    background times the aperture area. The flux error adds the per-pixel
    errors in the aperture (``error``; without it, the annulus scatter
    stands in for them, a background-limited estimate) and the uncertainty
    of the background median, (pi/2) sigma^2 / n per pixel, scaled by the
    aperture area.

    Parameters
    ----------
    data : 2-D ndarray
        The cutout image.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the cutout.
    coords : `~astropy.coordinates.SkyCoord`
        Aperture centres.
    radius : `~astropy.units.Quantity`
        Aperture radius (angle).
    annulus : tuple of two `~astropy.units.Quantity`, optional
        Inner and outer background radii; default 2 and 3 times ``radius``.
    zero_point : float, optional
        AB zero point of the image (see `zero_point`); adds ``mag_ab`` and
        ``mag_ab_err``.
    error : 2-D ndarray, optional
        1-sigma error of each pixel.
    labels : sequence of str, optional
        Names of the positions, copied into a ``label`` column.

    Returns
    -------
    `~astropy.table.Table`
        One row per position: ``candidate`` (0-based), ``label`` (if given),
        ``ra``, ``dec`` (deg), ``x``, ``y`` (pixels), ``flux``, ``flux_err``,
        ``background`` (per pixel), ``mag_ab``, ``mag_ab_err`` (with a zero
        point) and ``note`` (why a value is NaN; empty otherwise).
    """
    image = _image(data)
    celestial = _celestial(wcs, image)
    coords = _sky_coord(coords, "coords")
    scale = _arcsec_per_pixel(celestial)
    r_pix = _angle_arcsec(radius, "radius") / scale
    if annulus is None:
        r_in, r_out = 2.0 * r_pix, 3.0 * r_pix
    else:
        if not (isinstance(annulus, (tuple, list)) and len(annulus) == 2):
            raise LensviewInputError(
                "annulus must be a pair (r_in, r_out) of angles, e.g. "
                "(0.3 * u.arcsec, 0.5 * u.arcsec)."
            )
        r_in = _angle_arcsec(annulus[0], "annulus r_in") / scale
        r_out = _angle_arcsec(annulus[1], "annulus r_out") / scale
        if not r_pix <= r_in < r_out:
            raise LensviewInputError(
                "The annulus must start at or outside the aperture and have "
                f"r_in < r_out; got radius {radius}, annulus {annulus[0]}, {annulus[1]}."
            )
    bad = ~np.isfinite(image)
    if error is not None:
        error = np.asarray(error, dtype=float)
        if error.shape != image.shape:
            raise LensviewInputError(
                f"The error array has shape {error.shape} but the image has "
                f"{image.shape}; pass a per-pixel error map of the same cutout."
            )
        bad |= ~np.isfinite(error)
    zp = None if zero_point is None else _zero_point_value(zero_point)
    flat = coords.reshape(-1)
    if labels is not None and len(labels) != flat.size:
        raise LensviewInputError(
            f"Got {len(labels)} labels for {flat.size} positions; give one label per position."
        )

    x, y = _pixels(celestial, flat)
    n = x.size
    flux = np.full(n, np.nan)
    flux_err = np.full(n, np.nan)
    background = np.full(n, np.nan)
    notes = [""] * n
    inside = _inside_image(x, y, image.shape)
    for i in np.flatnonzero(~inside):
        notes[i] = "outside the image"
    index = np.flatnonzero(inside)
    if index.size:
        positions = np.column_stack([x[index], y[index]])
        aperture = CircularAperture(positions, r=r_pix)
        ring = CircularAnnulus(positions, r_in=r_in, r_out=r_out)
        filled = np.where(bad, 0.0, image)
        sums = _photutils_aperture_photometry(
            filled, aperture, mask=bad, error=None if error is None else np.where(bad, 0.0, error)
        )
        area = np.atleast_1d(aperture.area_overlap(filled, mask=bad))
        full_area = aperture.area
        ring_stats = ApertureStats(filled, ring, mask=bad,
                                   sigma_clip=SigmaClip(sigma=3.0, maxiters=10))
        ring_median = np.atleast_1d(ring_stats.median)
        ring_std = np.atleast_1d(ring_stats.std)
        ring_count = np.atleast_1d(u.Quantity(ring_stats.center_aper_area).value)
        for k, i in enumerate(index):
            if area[k] < full_area * (1 - 1e-6):
                notes[i] = "aperture extends beyond the image or over non-finite pixels"
                continue
            if not ring_count[k] >= 10 or not np.isfinite(ring_median[k]):
                notes[i] = "too few usable annulus pixels for a background"
                continue
            background[i] = ring_median[k]
            flux[i] = float(sums["aperture_sum"][k]) - ring_median[k] * area[k]
            pixel_variance = (float(sums["aperture_sum_err"][k]) ** 2 if error is not None
                              else area[k] * ring_std[k] ** 2)
            median_variance = _MEDIAN_VARIANCE_FACTOR * ring_std[k] ** 2 / ring_count[k]
            flux_err[i] = math.sqrt(pixel_variance + area[k] ** 2 * median_variance)

    sky = flat.icrs
    table = Table()
    table["candidate"] = np.arange(n)
    if labels is not None:
        table["label"] = [str(label) for label in labels]
    table["ra"] = sky.ra.deg * u.deg
    table["dec"] = sky.dec.deg * u.deg
    table["x"] = x * u.pix
    table["y"] = y * u.pix
    table["flux"] = flux
    table["flux_err"] = flux_err
    table["background"] = background
    if zp is not None:
        table["mag_ab"] = ab_magnitude(flux, zp) * u.mag
        with np.errstate(divide="ignore", invalid="ignore"):
            mag_err = np.where(flux > 0, 2.5 / math.log(10) * flux_err / np.abs(flux), np.nan)
        table["mag_ab_err"] = mag_err * u.mag
    table["note"] = notes
    table.meta["radius_arcsec"] = r_pix * scale
    table.meta["annulus_arcsec"] = (r_in * scale, r_out * scale)
    if zp is not None:
        table.meta["zero_point"] = zp
    return table


# ----------------------------------------------------------------------------
# Sizes


@dataclass(frozen=True)
class SizeEstimate:
    """Result of `measure_size`; all angles in arcsec.

    Attributes
    ----------
    center : `~astropy.coordinates.SkyCoord`
        Fitted centre (ICRS).
    fwhm : `~astropy.units.Quantity`
        Circularised fitted FWHM, sqrt(major * minor).
    fwhm_major, fwhm_minor : `~astropy.units.Quantity`
        Fitted FWHM along the major and minor axes.
    fwhm_err : `~astropy.units.Quantity`
        1-sigma uncertainty of ``fwhm`` from the fit covariance.
    psf_fwhm : `~astropy.units.Quantity`
        The PSF FWHM the fit was compared with.
    resolved : bool
        Whether ``fwhm`` passes the criterion of `measure_size`.
    intrinsic_fwhm : `~astropy.units.Quantity`
        sqrt(fwhm^2 - psf^2) when resolved, else NaN.
    radius : `~astropy.units.Quantity`
        Intrinsic half width at half maximum when resolved, else NaN.
    radius_limit : `~astropy.units.Quantity`
        Upper limit on the intrinsic half width when unresolved, else NaN.
    note : str
        Why the fit gave no size; empty otherwise.
    """

    center: SkyCoord
    fwhm: u.Quantity
    fwhm_major: u.Quantity
    fwhm_minor: u.Quantity
    fwhm_err: u.Quantity
    psf_fwhm: u.Quantity
    resolved: bool
    intrinsic_fwhm: u.Quantity
    radius: u.Quantity
    radius_limit: u.Quantity
    note: str = ""


def measure_size(data, wcs, coord, *, psf_fwhm, fit_radius=None,
                 resolved_factor=RESOLVED_FWHM_FACTOR, min_snr=5.0):
    """Size of a compact source from a 2-D Gaussian fit, against the PSF.

    A 2-D Gaussian plus a constant is fitted (`astropy.modeling`, trust
    region least squares) to the pixels within a square box of half-side
    ``fit_radius`` around ``coord``. The source counts as resolved when the
    circularised FWHM is at least ``resolved_factor`` (default 1.2) times the
    PSF FWHM and exceeds the PSF FWHM by more than twice its fit error — a
    common-practice criterion for compact knots, since a fitted width within
    ~20 per cent of the PSF is indistinguishable from a point source once
    PSF mismatch and noise are allowed for. Gaussian widths add
    in quadrature under convolution, so the intrinsic FWHM is
    sqrt(fwhm^2 - psf^2). An unresolved source gets the radius limit
    ``0.5 * sqrt(resolved_factor^2 - 1) * psf_fwhm``: half the largest
    intrinsic FWHM that would still pass as unresolved.

    Parameters
    ----------
    data : 2-D ndarray
        The cutout image.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the cutout.
    coord : `~astropy.coordinates.SkyCoord`
        Approximate position of the source (scalar).
    psf_fwhm : `~astropy.units.Quantity`
        FWHM of the point-spread function (angle).
    fit_radius : `~astropy.units.Quantity`, optional
        Half-side of the fitting box; default three PSF FWHM.
    resolved_factor : float, optional
        Ratio of fitted to PSF FWHM at and above which a source is resolved.
    min_snr : float, optional
        Fitted peak over the rms of the fit residuals below which no
        significant source is reported.

    Returns
    -------
    SizeEstimate
    """
    image = _image(data)
    celestial = _celestial(wcs, image)
    coord = _sky_coord(coord, "coord")
    if not coord.isscalar:
        raise LensviewInputError("measure_size takes one position; loop over several.")
    scale = _arcsec_per_pixel(celestial)
    psf_arcsec = float(_angle_arcsec(psf_fwhm, "psf_fwhm"))
    if not (np.isscalar(resolved_factor) and resolved_factor > 1):
        raise LensviewInputError(
            f"resolved_factor must be a number above 1; got {resolved_factor!r}."
        )
    half_arcsec = 3.0 * psf_arcsec if fit_radius is None else _angle_arcsec(fit_radius, "fit_radius")
    half = max(int(math.ceil(half_arcsec / scale)), 3)

    nan = np.nan * u.arcsec
    limit = 0.5 * math.sqrt(resolved_factor**2 - 1.0) * psf_arcsec * u.arcsec

    def failed(note):
        return SizeEstimate(coord, nan, nan, nan, nan, psf_arcsec * u.arcsec, False,
                            nan, nan, nan, note)

    x0, y0 = (float(v[0]) for v in _pixels(celestial, coord))
    if not _inside_image(np.array([x0]), np.array([y0]), image.shape)[0]:
        return failed("outside the image")
    ny, nx = image.shape
    xc, yc = int(round(x0)), int(round(y0))
    x_lo, x_hi = max(xc - half, 0), min(xc + half + 1, nx)
    y_lo, y_hi = max(yc - half, 0), min(yc + half + 1, ny)
    row, col = np.mgrid[y_lo:y_hi, x_lo:x_hi]
    box = image[y_lo:y_hi, x_lo:x_hi]
    good = np.isfinite(box)
    if good.sum() < 25:
        return failed("too few finite pixels around the position for a fit")

    values = box[good]
    border = np.concatenate([box[0], box[-1], box[1:-1, 0], box[1:-1, -1]])
    floor = float(np.median(border[np.isfinite(border)])) if np.isfinite(border).any() else 0.0
    sigma0 = psf_arcsec / scale * gaussian_fwhm_to_sigma
    gaussian = models.Gaussian2D(
        amplitude=float(np.max(values)) - floor, x_mean=x0, y_mean=y0,
        x_stddev=sigma0, y_stddev=sigma0, theta=0.0,
        bounds={"x_stddev": (0.05, 4.0 * half), "y_stddev": (0.05, 4.0 * half),
                "x_mean": (x_lo - 0.5, x_hi - 0.5), "y_mean": (y_lo - 0.5, y_hi - 0.5)},
    )
    model = gaussian + models.Const2D(amplitude=floor)
    fitter = fitting.TRFLSQFitter(calc_uncertainties=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyUserWarning)
        fit = fitter(model, col[good], row[good], values, maxiter=500)
    g = fit[0]
    sx, sy = abs(float(g.x_stddev.value)), abs(float(g.y_stddev.value))
    if not (g.amplitude.value > 0 and np.isfinite(sx * sy)):
        return failed("the Gaussian fit found no positive source")
    residual_rms = float(np.std(values - fit(col[good], row[good])))
    if not g.amplitude.value > min_snr * residual_rms:
        return failed(
            f"no significant source: fitted peak {g.amplitude.value:.3g} is below "
            f"{min_snr} times the residual scatter {residual_rms:.3g}"
        )
    if math.hypot(g.x_mean.value - x0, g.y_mean.value - y0) > half:
        return failed("the Gaussian fit wandered away from the position")

    major = _FWHM_PER_SIGMA * max(sx, sy) * scale
    minor = _FWHM_PER_SIGMA * min(sx, sy) * scale
    fwhm = math.sqrt(major * minor)
    fwhm_err = _fwhm_uncertainty(fit, sx, sy) * fwhm
    # Resolved needs both the width criterion and a width distinguishable
    # from the PSF at two sigma of the fit.
    distinct = not np.isfinite(fwhm_err) or fwhm - psf_arcsec > 2.0 * fwhm_err
    resolved = fwhm >= resolved_factor * psf_arcsec and distinct
    intrinsic = math.sqrt(fwhm**2 - psf_arcsec**2) if resolved else np.nan
    return SizeEstimate(
        center=_sky(celestial, g.x_mean.value, g.y_mean.value),
        fwhm=fwhm * u.arcsec,
        fwhm_major=major * u.arcsec,
        fwhm_minor=minor * u.arcsec,
        fwhm_err=fwhm_err * u.arcsec,
        psf_fwhm=psf_arcsec * u.arcsec,
        resolved=bool(resolved),
        intrinsic_fwhm=intrinsic * u.arcsec,
        radius=0.5 * intrinsic * u.arcsec,
        radius_limit=nan if resolved else limit,
    )


def _fwhm_uncertainty(fit, sx, sy):
    """Relative 1-sigma error of sqrt(sx * sy) from the fit's standard errors."""
    std = fit.stds
    if std is None:
        return np.nan
    dsx, dsy = std["x_stddev_0"], std["y_stddev_0"]
    return 0.5 * math.hypot(dsx / sx, dsy / sy)


# ----------------------------------------------------------------------------
# Delensing


def delensed_properties(*, mu, z_source, flux=None, mag=None, zero_point=None,
                        lambda_t=None, image_radius_limit=None, cosmology=None):
    """Intrinsic brightness and size of a lensed source.

    The intrinsic flux is the observed one over |mu| and the intrinsic AB
    magnitude ``m_obs + 2.5 log10|mu|``. The rest-frame absolute AB magnitude
    is ``M = m - DM(z) + 2.5 log10(1 + z)`` (Hogg et al. 2002,
    arXiv:astro-ph/0210394) through `lensview.cosmology.absolute_ab_magnitude`.
    An image radius limit along the tangential stretch maps to the source
    radius limit ``r_image * |lambda_t|``, converted to parsecs and AU with
    the angular diameter distance to the source.

    Parameters
    ----------
    mu : float or array
        Signed magnification at each image.
    z_source : float or array
        Source redshift.
    flux : float, array or `~astropy.units.Quantity`, optional
        Observed flux: image units (with ``zero_point`` for magnitudes) or a
        flux density f_nu Quantity (magnitudes from 3631 Jy).
    mag : float or array, optional
        Observed AB magnitude; used instead of one derived from ``flux``.
    zero_point : float, optional
        AB zero point of the image units of ``flux``.
    lambda_t : float or array, optional
        Tangential eigenvalue of the lens Jacobian at each image.
    image_radius_limit : `~astropy.units.Quantity`, optional
        Upper limit on the image radius along the stretch (e.g.
        ``SizeEstimate.radius_limit``), scalar or one per image; NaN (a
        resolved image) gives NaN.
    cosmology : `~astropy.cosmology.Cosmology`, optional
        Default: `astropy.cosmology.Planck18`.

    Returns
    -------
    `~astropy.table.Table`
        Columns ``mu``, ``abs_mu``, ``z_source`` and, as the inputs allow,
        ``flux_intrinsic``, ``mag_observed``, ``mag_intrinsic``, ``abs_mag_ab``,
        ``source_radius_limit_arcsec``, ``source_radius_limit_pc`` and
        ``source_radius_limit_au``. NaN where |mu| is zero or not finite.
    """
    if flux is None and mag is None and image_radius_limit is None:
        raise LensviewInputError(
            "Give a flux, a magnitude or an image radius limit to delens."
        )
    mu = np.atleast_1d(np.asarray(mu, dtype=float))
    z = np.atleast_1d(np.asarray(z_source, dtype=float))
    if not np.all(np.isfinite(z) & (z > 0)):
        raise LensviewInputError(f"z_source must be positive redshifts; got {z_source!r}.")
    mu, z = np.broadcast_arrays(mu, z)
    abs_mu = np.where(np.isfinite(mu) & (mu != 0), np.abs(mu), np.nan)

    table = Table()
    table["mu"] = mu
    table["abs_mu"] = abs_mu
    table["z_source"] = z

    observed_mag = None
    if mag is not None:
        observed_mag = np.broadcast_to(np.asarray(mag, dtype=float), mu.shape)
    if flux is not None:
        flux_q = u.Quantity(flux)
        table["flux_intrinsic"] = np.broadcast_to(flux_q, mu.shape, subok=True) / abs_mu
        if observed_mag is None:
            if flux_q.unit.is_equivalent(u.Jy):
                observed_mag = np.broadcast_to(ab_magnitude_from_fnu(flux_q), mu.shape)
            elif zero_point is not None:
                observed_mag = np.broadcast_to(ab_magnitude(flux_q, zero_point), mu.shape)
    if observed_mag is not None:
        intrinsic_mag = observed_mag + 2.5 * np.log10(abs_mu)
        table["mag_observed"] = observed_mag * u.mag
        table["mag_intrinsic"] = intrinsic_mag * u.mag
        absolute = absolute_ab_magnitude(intrinsic_mag, z, cosmology=cosmology)
        table["abs_mag_ab"] = u.Quantity(absolute, u.mag)

    if image_radius_limit is not None:
        if lambda_t is None:
            raise LensviewInputError(
                "A source radius limit needs lambda_t, the tangential eigenvalue "
                "at each image; pass lambda_t= from the lens model."
            )
        r_image = _angle_arcsec(image_radius_limit, "image_radius_limit", allow_nan=True)
        stretch = np.broadcast_to(np.abs(np.asarray(lambda_t, dtype=float)), mu.shape)
        source_angle = np.broadcast_to(r_image * stretch, mu.shape) * u.arcsec
        table["source_radius_limit_arcsec"] = source_angle
        for unit, name in ((u.pc, "pc"), (u.AU, "au")):
            table[f"source_radius_limit_{name}"] = physical_size(
                source_angle, z, cosmology=cosmology, unit=unit)
    return table
