"""Aperture photometry with a local background annulus."""

import math

import numpy as np
import astropy.units as u
from astropy.stats import SigmaClip
from astropy.table import Table
from photutils.aperture import ApertureStats, CircularAnnulus, CircularAperture
from photutils.aperture import aperture_photometry as _photutils_aperture_photometry

from ..errors import LensviewInputError
from .magnitudes import ab_magnitude, zero_point_value
from .frame import (cutout_wcs, cutout_image, inside_image, pixel_scale_arcsec, pixels_of)
from ..checks import angle_arcsec, sky_coord

# Variance of the median of n Gaussian samples is (pi/2) sigma^2 / n
# (asymptotic efficiency of the median, common practice in statistics).
_MEDIAN_VARIANCE_FACTOR = math.pi / 2.0

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
    image = cutout_image(data)
    celestial = cutout_wcs(wcs, image)
    coords = sky_coord(coords, "coords")
    scale = pixel_scale_arcsec(celestial)
    r_pix = angle_arcsec(radius, "radius") / scale
    if annulus is None:
        r_in, r_out = 2.0 * r_pix, 3.0 * r_pix
    else:
        if not (isinstance(annulus, (tuple, list)) and len(annulus) == 2):
            raise LensviewInputError(
                "annulus must be a pair (r_in, r_out) of angles, e.g. "
                "(0.3 * u.arcsec, 0.5 * u.arcsec)."
            )
        r_in = angle_arcsec(annulus[0], "annulus r_in") / scale
        r_out = angle_arcsec(annulus[1], "annulus r_out") / scale
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
    zp = None if zero_point is None else zero_point_value(zero_point)
    flat = coords.reshape(-1)
    if labels is not None and len(labels) != flat.size:
        raise LensviewInputError(
            f"Got {len(labels)} labels for {flat.size} positions; give one label per position."
        )

    x, y = pixels_of(celestial, flat)
    n = x.size
    flux = np.full(n, np.nan)
    flux_err = np.full(n, np.nan)
    background = np.full(n, np.nan)
    notes = [""] * n
    inside = inside_image(x, y, image.shape)
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


