"""AB magnitudes and photometric zero points."""

import math

import numpy as np
import astropy.units as u

from ..errors import LensviewInputError

#: Flux density of an AB magnitude of zero (Oke & Gunn 1983, ApJ 266, 713).
AB_ZERO_FLUX_DENSITY = 3631.0 * u.Jy


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
    zp = zero_point_value(zero_point)
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


def zero_point_value(zero_point):
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
        Header of the cutout; read with `lensview.io.fits.zero_point_from_header`.
    user_value : float or `~astropy.units.Quantity` in mag, optional
        A zero point given by the user; it always wins.

    Returns
    -------
    float or None
        AB magnitude of a unit flux in image units, or None if unknown.
    """
    if user_value is not None:
        return zero_point_value(user_value)
    if header is None:
        return None
    from ..io.fits import zero_point_from_header

    found = zero_point_from_header(header)
    return None if found is None else zero_point_value(found)


