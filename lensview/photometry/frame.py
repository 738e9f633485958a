"""Cutout arrays, their celestial WCS, and pixel <-> sky conversions shared by
the photometry modules.

Pixel positions are 0-based with ``x`` the column, exactly as
`astropy.wcs.WCS.pixel_to_world` uses them.
"""

import numpy as np
import astropy.units as u

from ..checks import celestial_wcs
from ..errors import LensviewInputError

__all__ = ["cutout_image", "cutout_wcs", "pixel_scale_arcsec", "pixels_of", "sky_of",
           "inside_image"]


def cutout_image(data):
    """The cutout as a 2-D float array."""
    image = np.asarray(data, dtype=float)
    if image.ndim != 2:
        raise LensviewInputError(
            f"The cutout must be a 2-D image, but the array has {image.ndim} "
            "dimension(s); pass a single image plane (for a cube, one slice)."
        )
    return image


def cutout_wcs(wcs, image):
    """The celestial WCS of a cutout, checked against the image's shape."""
    return celestial_wcs(wcs, "The cutout", image.shape)


def pixel_scale_arcsec(wcs):
    """Side of a square pixel of the same area (arcsec): the geometric mean of the axes."""
    scales = u.Quantity(wcs.proj_plane_pixel_scales()).to_value(u.arcsec)
    return float(np.sqrt(scales[0] * scales[1]))


def pixels_of(wcs, coord):
    """Pixel positions (x, y) of sky positions, as 1-D float arrays."""
    x, y = wcs.world_to_pixel(coord)
    return np.atleast_1d(np.asarray(x, dtype=float)), np.atleast_1d(np.asarray(y, dtype=float))


def sky_of(wcs, x, y):
    """ICRS positions of pixel positions."""
    return wcs.pixel_to_world(x, y).icrs


def inside_image(x, y, shape):
    """Whether pixel positions fall on the image (pixel centres at integers)."""
    ny, nx = shape
    finite = np.isfinite(x) & np.isfinite(y)
    return finite & (x >= -0.5) & (x < nx - 0.5) & (y >= -0.5) & (y < ny - 0.5)
