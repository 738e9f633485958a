"""Distances, distance ratios and angular scales through astropy cosmologies.

Every function takes an optional ``cosmology``: None means
`astropy.cosmology.Planck18`; any astropy FLRW cosmology (flat or curved, an
Einstein-de Sitter ``FlatLambdaCDM(H0, Om0=1)`` included) is accepted.
Distances follow Hogg 1999 (arXiv:astro-ph/9905116) as astropy implements
them; the lensing scaling factor follows the design notes, section 4::

    f = [D_ls/D_s](z_s)                       maps normalised to D_ls/D_s = 1
    f = [D_ls/D_s](z_s) / [D_ls/D_s](z_norm)  maps made for a source at z_norm

A source at or in front of the lens is not lensed; that is an input error,
never a zero.
"""

import numpy as np
import astropy.units as u
from astropy.cosmology import Cosmology, Planck18

from .checks import length_unit, redshift, redshifts, require_behind
from .errors import LensviewInputError

__all__ = [
    "resolve_cosmology",
    "angular_diameter_distance",
    "angular_diameter_distance_between",
    "distance_ratio",
    "scaling_factor",
    "angular_scale",
    "physical_size",
    "distance_modulus",
    "absolute_ab_magnitude",
]


def resolve_cosmology(cosmology=None):
    """The astropy cosmology to use.

    Parameters
    ----------
    cosmology : `~astropy.cosmology.Cosmology` or None
        None selects `astropy.cosmology.Planck18`.

    Returns
    -------
    `~astropy.cosmology.Cosmology`

    Raises
    ------
    LensviewInputError
        If ``cosmology`` is neither None nor an astropy cosmology with
        distances.
    """
    if cosmology is None:
        return Planck18
    if isinstance(cosmology, Cosmology) and hasattr(cosmology, "angular_diameter_distance_z1z2"):
        return cosmology
    raise LensviewInputError(
        f"{cosmology!r} is not an astropy cosmology with distances; pass None for "
        "Planck18, an astropy realisation such as astropy.cosmology.Planck18, or a "
        "model such as astropy.cosmology.FlatLambdaCDM(H0=70, Om0=0.3)."
    )


def angular_diameter_distance(z, cosmology=None):
    """Angular diameter distance D_A(z) from the observer.

    Parameters
    ----------
    z : float or array-like
        Redshift(s), zero or positive.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.

    Returns
    -------
    `~astropy.units.Quantity`
        D_A in Mpc, of the shape of ``z``.
    """
    z = redshifts(z, "redshift")
    return resolve_cosmology(cosmology).angular_diameter_distance(z).to(u.Mpc)


def angular_diameter_distance_between(z1, z2, cosmology=None):
    """Angular diameter distance D_A(z1, z2) of a plane at z2 seen from z1.

    Parameters
    ----------
    z1, z2 : float or array-like
        Redshifts with ``z2 >= z1 >= 0`` (broadcast together).
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.

    Returns
    -------
    `~astropy.units.Quantity`
        D_A(z1, z2) in Mpc (Hogg 1999, eq. 19 for a flat universe).
    """
    z1 = redshifts(z1, "first redshift")
    z2 = redshifts(z2, "second redshift")
    if np.any(z2 < z1):
        raise LensviewInputError(
            f"The second redshift ({z2}) must not be below the first ({z1}); give the "
            "nearer plane first."
        )
    return resolve_cosmology(cosmology).angular_diameter_distance_z1z2(z1, z2).to(u.Mpc)


def distance_ratio(z_lens, z_source, cosmology=None):
    """The lensing distance ratio D_ls/D_s for a source behind a lens.

    Parameters
    ----------
    z_lens, z_source : float
        Redshifts of the lens and the source; ``z_source > z_lens``.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.

    Returns
    -------
    float
        D_A(z_lens, z_source) / D_A(z_source), between 0 and 1 in a flat
        universe.

    Raises
    ------
    LensviewInputError
        For a redshift that is negative, NaN or not a number, or a source at
        or in front of the lens.
    """
    z_lens = redshift(z_lens, "lens redshift")
    z_source = redshift(z_source, "source redshift")
    require_behind(z_lens, z_source, "source redshift")
    cosmo = resolve_cosmology(cosmology)
    d_ls = cosmo.angular_diameter_distance_z1z2(z_lens, z_source)
    d_s = cosmo.angular_diameter_distance(z_source)
    return float((d_ls / d_s).to_value(u.one))


def scaling_factor(z_lens, z_source, z_norm=None, cosmology=None):
    """Factor f that turns a stored deflection map into the one for z_source.

    Parameters
    ----------
    z_lens, z_source : float
        Redshifts of the lens and the source; ``z_source > z_lens``.
    z_norm : float or None
        None for maps normalised to D_ls/D_s = 1; otherwise the source
        redshift the maps were made for (it must lie behind the lens too).
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.

    Returns
    -------
    float
        ``ratio(z_source)`` or ``ratio(z_source) / ratio(z_norm)`` with
        ``ratio = D_ls/D_s`` (design notes, section 4).
    """
    ratio = distance_ratio(z_lens, z_source, cosmology)
    if z_norm is None:
        return ratio
    z_norm = redshift(z_norm, "normalisation redshift")
    require_behind(redshift(z_lens, "lens redshift"), z_norm, "normalisation redshift")
    return ratio / distance_ratio(z_lens, z_norm, cosmology)


def angular_scale(z, cosmology=None, unit=u.pc):
    """Physical length per arcsecond in a plane at redshift z.

    Parameters
    ----------
    z : float or array-like
        Redshift of the plane (lens or source), positive.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.
    unit : `~astropy.units.Unit` or str
        Length unit of the result, e.g. ``u.pc``, ``u.lyr``, ``u.kpc``.

    Returns
    -------
    `~astropy.units.Quantity`
        ``D_A(z) * (1 arcsec in radians)`` in ``unit / arcsec``.
    """
    unit = length_unit(unit)
    distance = angular_diameter_distance(z, cosmology)
    return (distance * (1 * u.arcsec).to_value(u.rad)).to(unit) / u.arcsec


def physical_size(angle, z, cosmology=None, unit=u.pc):
    """Length that an angle subtends in a plane at redshift z.

    Parameters
    ----------
    angle : `~astropy.units.Quantity`
        Angle(s), e.g. in arcsec; NaN entries give NaN.
    z : float or array-like
        Redshift(s) of the plane, broadcast against ``angle``.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.
    unit : `~astropy.units.Unit` or str
        Length unit of the result.

    Returns
    -------
    `~astropy.units.Quantity`
        ``angle [rad] * D_A(z)`` in ``unit``.
    """
    if not isinstance(angle, u.Quantity) or not angle.unit.is_equivalent(u.rad):
        raise LensviewInputError(
            f"The angle must be an astropy Quantity with an angular unit; got "
            f"{angle!r}. Multiply by astropy.units.arcsec, e.g. 0.05 * u.arcsec."
        )
    unit = length_unit(unit)
    return (angle.to_value(u.rad) * angular_diameter_distance(z, cosmology)).to(unit)


def distance_modulus(z, cosmology=None):
    """Distance modulus DM = 5 log10(D_L / 10 pc) at redshift z.

    Parameters
    ----------
    z : float or array-like
        Redshift(s), strictly positive.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.

    Returns
    -------
    `~astropy.units.Quantity`
        DM in mag.
    """
    z = redshifts(z, "redshift")
    if np.any(z <= 0):
        raise LensviewInputError(
            f"A distance modulus needs a redshift above 0; got {z}. Give the "
            "redshift of the source."
        )
    return u.Quantity(resolve_cosmology(cosmology).distmod(z), u.mag)


def absolute_ab_magnitude(m_ab, z, cosmology=None):
    """Rest-frame absolute AB magnitude of an AB measurement at redshift z.

    ``M = m - DM(z) + 2.5 log10(1 + z)`` (Hogg et al. 2002,
    arXiv:astro-ph/0210394): the K-correction of a source flat in f_nu, so
    M refers to the rest-frame wavelength ``lambda_obs / (1 + z)``.

    Parameters
    ----------
    m_ab : float, array-like or `~astropy.units.Quantity` in mag
        Apparent AB magnitude(s); NaN entries give NaN.
    z : float or array-like
        Redshift(s), strictly positive, broadcast against ``m_ab``.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Default Planck18.

    Returns
    -------
    `~astropy.units.Quantity`
        M in mag.
    """
    if isinstance(m_ab, u.Quantity):
        if m_ab.unit != u.mag:
            raise LensviewInputError(
                f"The apparent magnitude must be a number or a Quantity in u.mag; got {m_ab}."
            )
        m_ab = m_ab.value
    try:
        m_ab = np.asarray(m_ab, dtype=float)
    except (TypeError, ValueError):
        raise LensviewInputError(
            f"The apparent AB magnitude must be a number; got {m_ab!r}."
        ) from None
    z = redshifts(z, "redshift")
    dm = distance_modulus(z, cosmology).value
    return (m_ab - dm + 2.5 * np.log10(1.0 + z)) * u.mag
