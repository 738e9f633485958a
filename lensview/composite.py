"""Filters on one pixel grid, and colour composites of them, for display.

Each filter's cutout is resampled onto a target WCS (bilinear interpolation
with `reproject.reproject_interp`; NaN where the filter has no data), in
flux density per pixel (microjansky, from its AB zero point) so that the
composite's colours follow the AB colours. The composite uses the
interconnected band scaling of Lupton et al. 2004 (PASP 116, 133) through
`astropy.visualization.make_lupton_rgb`. For display only: photometry is
always measured on each filter's own pixels (`lensview.photometry.measure_filters`).
"""

import numpy as np
import astropy.units as u

from .errors import LensviewInputError

__all__ = ["band_on_grid", "colour_composite"]


def band_on_grid(image, wcs, shape):
    """One filter's cutout on another pixel grid, in microjansky per target pixel.

    Parameters
    ----------
    image : `~lensview.photometry.BandImage`
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the target grid.
    shape : tuple of int
        (ny, nx) of the target grid.

    Returns
    -------
    ndarray
        Flux density per target pixel (surface brightness times the target
        pixel area); NaN outside the filter's footprint. Without a zero point
        the values stay in image units per target pixel.
    """
    from reproject import reproject_interp

    from .photometry.frame import pixel_scale_arcsec

    resampled, footprint = reproject_interp((image.data, image.wcs), wcs.celestial,
                                            shape_out=tuple(shape))
    area_ratio = (pixel_scale_arcsec(wcs.celestial) / pixel_scale_arcsec(image.wcs)) ** 2
    unit = 1.0
    if image.band.zero_point is not None:
        unit = image.band.unit_flux_density().to_value(u.uJy)
    return np.where(footprint > 0, resampled * area_ratio * unit, np.nan)


def colour_composite(images, wcs, shape, *, stretch=None, q=8.0):
    """An RGB picture of three filters on a target grid (red = the reddest).

    Parameters
    ----------
    images : sequence of three `~lensview.photometry.BandImage`
        Any order; sorted by pivot wavelength, blue to red.
    wcs, shape
        The target grid (see `band_on_grid`).
    stretch : float, optional
        Linear range of the asinh stretch, in microjansky per pixel; default
        the 99.5th percentile of the mean of the three filters.
    q : float
        Asinh softening parameter of Lupton et al. 2004.

    Returns
    -------
    ndarray
        (ny, nx, 3) uint8, row 0 at the bottom like the cutout's pixel rows.

    Raises
    ------
    LensviewInputError
        Unless exactly three filters are given.
    """
    from astropy.visualization import make_lupton_rgb

    images = list(images)
    if len(images) != 3:
        raise LensviewInputError(
            f"A colour composite takes three filters; got {len(images)}. Choose three.")
    images.sort(key=lambda image: image.band.pivot.to_value(u.um))
    blue, green, red = (np.nan_to_num(band_on_grid(image, wcs, shape), nan=0.0) for image in images)
    if stretch is None:
        mean = (red + green + blue) / 3
        stretch = float(np.percentile(mean, 99.5)) if np.any(mean > 0) else 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        # Pixels of zero total intensity divide 0 by 0 inside the scaling; they stay black.
        return make_lupton_rgb(red, green, blue, minimum=0.0, stretch=float(stretch), Q=float(q))
