"""Intrinsic brightness and size of a lensed source from its magnification."""


import numpy as np
import astropy.units as u
from astropy.table import Table

from ..cosmology import absolute_ab_magnitude, physical_size
from ..errors import LensviewInputError
from .magnitudes import ab_magnitude, ab_magnitude_from_fnu
from ..checks import angle_arcsec


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
        r_image = angle_arcsec(image_radius_limit, "image_radius_limit", allow_nan=True)
        stretch = np.broadcast_to(np.abs(np.asarray(lambda_t, dtype=float)), mu.shape)
        source_angle = np.broadcast_to(r_image * stretch, mu.shape) * u.arcsec
        table["source_radius_limit_arcsec"] = source_angle
        for unit, name in ((u.pc, "pc"), (u.AU, "au")):
            table[f"source_radius_limit_{name}"] = physical_size(
                source_angle, z, cosmology=cosmology, unit=unit)
    return table
