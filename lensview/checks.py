"""Input checks shared by the library, the command line and the page.

Each check has one message, written for the user: what is wrong and what to
do. Every failure is a `~lensview.errors.LensviewInputError` (a
`ValueError`). The accepted ranges of user settings (cosmology parameters)
live here too, so the page's widgets and the command line's options accept
the same values.
"""

import numpy as np
import astropy.units as u
import astropy.cosmology.units as cu
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS

from .errors import LensviewInputError

__all__ = [
    "DEFLECTION_UNITS",
    "H0_RANGE",
    "OM0_RANGE",
    "angle_arcsec",
    "celestial_wcs",
    "deflection_units",
    "finite_number",
    "flat_cosmology",
    "length_unit",
    "positive_angle",
    "positive_int",
    "positive_redshift",
    "redshift",
    "redshifts",
    "require_behind",
    "sky_coord",
]

#: Hubble constants accepted for a user's flat LCDM cosmology (km/s/Mpc);
#: wide enough for every value in use, narrow enough to catch a unit slip
#: (e.g. 0.7 for h).
H0_RANGE = (10.0, 200.0)
#: Matter densities accepted for a user's flat LCDM cosmology: above 0, and up
#: to 1 (Einstein-de Sitter) so that the dark-energy density is not negative.
OM0_RANGE = (0.0, 1.0)
#: Units a deflection map may be given in (pixels are the map's own).
DEFLECTION_UNITS = ("arcsec", "pixel")


# ---------------------------------------------------------------------------- redshifts


def redshifts(z, what, *, positive=False):
    """Redshift(s) as a float array, checked to be finite and non-negative
    (above zero with ``positive``)."""
    if isinstance(z, u.Quantity):
        try:
            z = z.to_value(u.one, equivalencies=cu.dimensionless_redshift())
        except u.UnitConversionError:
            raise LensviewInputError(f"The {what} must be dimensionless; got {z}.") from None
    if z is None or isinstance(z, (str, bytes, bool, np.bool_)):
        raise LensviewInputError(f"The {what} must be a number; got {z!r}.")
    try:
        values = np.asarray(z, dtype=float)
    except (TypeError, ValueError):
        raise LensviewInputError(f"The {what} must be a number; got {z!r}.") from None
    if values.size == 0:
        raise LensviewInputError(f"The {what} is empty; give at least one redshift.")
    if not np.all(np.isfinite(values)):
        raise LensviewInputError(f"The {what} must be finite; got {z!r}. Give a finite redshift.")
    if positive and np.any(values <= 0):
        raise LensviewInputError(f"The {what} must be a positive number; got {z!r}.")
    if np.any(values < 0):
        raise LensviewInputError(
            f"The {what} must not be negative; got {z!r}. Give a redshift of 0 or more.")
    return values


def redshift(z, what, *, positive=False):
    """One redshift as a float, checked like `redshifts`."""
    values = redshifts(z, what, positive=positive)
    if values.ndim != 0 and values.size != 1:
        raise LensviewInputError(f"The {what} must be a single number; got {values.size} values.")
    return float(values.reshape(()))


def positive_redshift(z, what):
    """One redshift above zero (a lens or a normalisation redshift)."""
    return redshift(z, what, positive=True)


def require_behind(z_lens, z_behind, what):
    """Refuse a redshift at or below the lens: no lensing happens there."""
    if z_behind <= z_lens:
        raise LensviewInputError(
            f"The {what} {z_behind:g} is at or below the lens redshift {z_lens:g}: "
            f"no lensing happens there. Choose a {what} above {z_lens:g}.")


# ---------------------------------------------------------------------------- numbers


def finite_number(value, name, low=None):
    """A finite float, above ``low`` when given."""
    try:
        number = float(value)
    except (TypeError, ValueError) as error:
        raise LensviewInputError(f"{name} must be a number; got {value!r}.") from error
    if not np.isfinite(number) or (low is not None and number <= low):
        raise LensviewInputError(f"{name} must be a finite number above {low}; got {value!r}.")
    return number


def positive_int(value, name):
    """A whole number of at least 1 (booleans refused)."""
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool) and value >= 1:
        return int(value)
    raise LensviewInputError(f"{name} must be a whole number >= 1, got {value!r}.")


# ---------------------------------------------------------------------------- angles and units


def angle_arcsec(value, name, *, allow_nan=False):
    """Positive, finite angle Quantity (scalar or array) as float arcsec."""
    if not isinstance(value, u.Quantity) or value.unit.physical_type != "angle":
        raise LensviewInputError(
            f"{name} must be an angle Quantity such as 0.1 * u.arcsec; got {value!r}.")
    arcsec = value.to_value(u.arcsec)
    checked = arcsec[~np.isnan(arcsec)] if allow_nan else arcsec
    if not np.all(np.isfinite(checked)) or np.any(checked <= 0):
        raise LensviewInputError(f"{name} must be a positive, finite angle; got {value}.")
    return arcsec


def positive_angle(value, name, allow_none=False):
    """One positive angle as an arcsec Quantity (None passes when allowed)."""
    if value is None and allow_none:
        return None
    try:
        angle = u.Quantity(value).to(u.arcsec)
    except (TypeError, ValueError, u.UnitsError):
        angle = None
    if angle is None or angle.size != 1 or not np.isfinite(angle.value) or angle.value <= 0:
        raise LensviewInputError(
            f"{name} must be a positive angle Quantity, got {value!r}; pass e.g. 0.1 * u.arcsec.")
    return angle


def deflection_units(units, *, from_header=False):
    """Deflection units: "arcsec" or "pixel" (the map's own pixels); with
    ``from_header`` also None, meaning "take them from the BUNIT keyword"."""
    if (units is None and from_header) or units in DEFLECTION_UNITS:
        return units
    hint = ", or None to take them from the BUNIT keyword" if from_header else ""
    raise LensviewInputError(f"Unknown deflection units {units!r}; use 'arcsec' or 'pixel'{hint}.")


def length_unit(unit):
    """An astropy length unit from a unit or its name."""
    try:
        unit = u.Unit(unit)
    except (TypeError, ValueError):
        raise LensviewInputError(
            f"{unit!r} is not a unit; give a length unit such as 'pc', 'lyr' or 'kpc'.") from None
    if not unit.is_equivalent(u.m):
        raise LensviewInputError(f"{unit} is not a length unit; give one such as 'pc', 'lyr' or 'kpc'.")
    return unit


# ---------------------------------------------------------------------------- positions and WCS


def sky_coord(coord, name):
    """Refuse anything but a SkyCoord."""
    if not isinstance(coord, SkyCoord):
        raise LensviewInputError(
            f"{name} must be an astropy SkyCoord, for example SkyCoord(ra, dec, unit='deg'); "
            f"got {type(coord).__name__}.")
    return coord


def celestial_wcs(wcs, what="The cutout", shape=None):
    """The two celestial axes of ``wcs``; with ``shape`` (rows, columns) also
    checked against the image the WCS is said to describe."""
    if not isinstance(wcs, WCS) or not wcs.has_celestial:
        raise LensviewInputError(
            f"{what} needs a celestial astropy.wcs.WCS (RA/Dec axes); read it from the FITS "
            "header with astropy.wcs.WCS(header).")
    celestial = wcs.celestial
    if celestial.naxis != 2:
        raise LensviewInputError(
            f"{what}'s WCS must have exactly two celestial axes; drop the spectral or other "
            "axes first.")
    if shape is not None and celestial.pixel_shape is not None \
            and tuple(celestial.pixel_shape) != tuple(shape)[::-1]:
        raise LensviewInputError(
            f"The WCS describes an image of {celestial.pixel_shape[0]} x "
            f"{celestial.pixel_shape[1]} pixels (x by y) but the array is "
            f"{shape[1]} x {shape[0]}; pass the WCS of this image.")
    return celestial


# ---------------------------------------------------------------------------- cosmology


def flat_cosmology(h0, om0):
    """A flat LCDM cosmology from user settings, or None (Planck18) when both are None.

    The command line and the page accept the same ranges, `H0_RANGE` and
    `OM0_RANGE`.
    """
    if h0 is None and om0 is None:
        return None
    if h0 is None or om0 is None:
        raise LensviewInputError(
            "Give both the Hubble constant H0 and the matter density Om0 for a flat LCDM "
            "cosmology, or neither for Planck18.")
    low, high = H0_RANGE
    if not (np.isfinite(h0) and low <= h0 <= high):
        raise LensviewInputError(
            f"H0 = {h0:g} is not a Hubble constant in km/s/Mpc; give a value from {low:g} to "
            f"{high:g}.")
    low, high = OM0_RANGE
    if not (np.isfinite(om0) and low < om0 <= high):
        raise LensviewInputError(
            f"Om0 = {om0:g} is not a matter density for a flat cosmology; give a value above "
            f"{low:g} and at most {high:g}.")
    from astropy.cosmology import FlatLambdaCDM

    return FlatLambdaCDM(H0=h0, Om0=om0)
