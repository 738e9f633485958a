"""Lens models from FITS files, with units and normalisation read from the headers."""

from .field import DeflectionField

__all__ = ["FROM_HEADER", "load_model"]


#: Ask `load_model` to take the normalisation from the Z_NORM header keyword.
FROM_HEADER = "header"


def load_model(x, y=None, *, z_lens, units=None, z_norm=FROM_HEADER, cosmology=None, name=None):
    """A `DeflectionField` from files, reading what the headers say.

    Parameters
    ----------
    x, y : str, path, bytes or file-like
        As for `DeflectionField.from_fits`.
    z_lens : float
    units : {"arcsec", "pixel"} or None
        None takes the units from the BUNIT keyword (an error names the
        keyword when it is missing).
    z_norm : float, None or FROM_HEADER
        FROM_HEADER uses the Z_NORM keyword when present (maps made for a
        source at that redshift) and D_ls/D_s = 1 otherwise; None means
        D_ls/D_s = 1; a number is the reference source redshift.
    cosmology, name
        As for `DeflectionField`.
    """
    from ..io.fits import read_deflection

    maps = read_deflection(x, y, units=units)
    if isinstance(z_norm, str) and z_norm == FROM_HEADER:
        z_norm = maps.header.get("Z_NORM")
    return DeflectionField(maps.alpha_x, maps.alpha_y, maps.wcs, units=maps.units, z_lens=z_lens,
                           z_norm=z_norm, cosmology=cosmology, name=name or maps.name)
