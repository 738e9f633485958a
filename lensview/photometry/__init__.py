"""Photometry of compact knots on a cutout.

Click snapping to a local centroid (`centroid`), detection of point-like
sources in a box or along an arc (`detection`), AB magnitudes and zero points
(`magnitudes`), aperture photometry with a local background (`aperture`),
sizes against the PSF (`sizes`), and the delensed brightness and size of the
source (`delensing`); filters (`bands`) and forced photometry in several
filters at the same sky positions (`forced`).

Every function works on a 2-D cutout array with its celestial WCS. Pixel
positions are 0-based with ``x`` the column, exactly as
`astropy.wcs.WCS.pixel_to_world` uses them.
"""

from .aperture import aperture_photometry
from .bands import Band, BandImage, band_from_header, band_image
from .centroid import CentroidSnap, snap_to_centroid
from .delensing import delensed_properties
from .detection import ArcBand, detect_point_sources
from .forced import ab_colours, measure_filters, point_source_correction, require_common_footprint
from .magnitudes import AB_ZERO_FLUX_DENSITY, ab_magnitude, ab_magnitude_from_fnu, zero_point
from .sizes import RESOLVED_FWHM_FACTOR, SizeEstimate, measure_size

__all__ = [
    "AB_ZERO_FLUX_DENSITY",
    "ArcBand",
    "Band",
    "BandImage",
    "CentroidSnap",
    "RESOLVED_FWHM_FACTOR",
    "SizeEstimate",
    "ab_colours",
    "ab_magnitude",
    "ab_magnitude_from_fnu",
    "aperture_photometry",
    "band_from_header",
    "band_image",
    "delensed_properties",
    "detect_point_sources",
    "measure_filters",
    "measure_size",
    "point_source_correction",
    "require_common_footprint",
    "snap_to_centroid",
    "zero_point",
]
