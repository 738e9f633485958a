"""Lens models from FITS files, with units and normalisation read from the headers."""

from ..errors import LensviewInputError
from ..io.fits import read_deflection
from ..io.mapfiles import FROM_HEADER, MAGNIFICATION_ONLY, map_kind, read_scalar_map
from .field import DeflectionField

__all__ = ["FROM_HEADER", "load_model", "load_scalar_model"]




def load_model(x, y=None, *, z_lens, units=None, z_norm=FROM_HEADER, cosmology=None, name=None,
               kind=FROM_HEADER, **convergence_options):
    """A `DeflectionField` from files, reading what the headers say.

    Parameters
    ----------
    x, y : str, path, bytes or file-like
        As for `DeflectionField.from_fits`; a convergence or potential map is
        one file (``x``).
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
    kind : {"deflection", "convergence", "potential"} or FROM_HEADER
        What the file holds; FROM_HEADER reads the LENSMAP keyword
        (`lensview.io.mapfiles`; absent: a deflection pair).
    **convergence_options
        ``fill_nan``, ``external_kappa``, ``external_shear``, ``max_memory``
        of `DeflectionField.from_convergence`.
    """

    kind = map_kind(x, y, kind)
    if kind != "deflection":
        return load_scalar_model(x, kind, z_lens=z_lens, z_norm=z_norm, cosmology=cosmology,
                                 name=name, **convergence_options)
    if convergence_options:
        raise LensviewInputError(
            f"Options {sorted(convergence_options)} apply to convergence maps only, and this "
            "model is a deflection pair; drop them or give kind='convergence'.")
    maps = read_deflection(x, y, units=units)
    if isinstance(z_norm, str) and z_norm == FROM_HEADER:
        z_norm = maps.header.get("Z_NORM")
    return DeflectionField(maps.alpha_x, maps.alpha_y, maps.wcs, units=maps.units, z_lens=z_lens,
                           z_norm=z_norm, cosmology=cosmology, name=name or maps.name)


def load_scalar_model(source, kind, *, z_lens, z_norm, cosmology, name, **options):
    """A `~lensview.DeflectionField` from a convergence or potential file.

    ``z_norm`` may be the string "header" (the Z_NORM keyword, else
    D_ls/D_s = 1); ``options`` go to `DeflectionField.from_convergence`.
    """
    if kind == "magnification":
        raise LensviewInputError(MAGNIFICATION_ONLY)
    maps = read_scalar_map(source, kind)
    if isinstance(z_norm, str) and z_norm == FROM_HEADER:
        z_norm = maps.header.get("Z_NORM")
    name = name or maps.name
    if kind == "convergence":
        return DeflectionField.from_convergence(maps.data, maps.wcs, z_lens=z_lens, z_norm=z_norm,
                                                cosmology=cosmology, name=name, **options)
    if options:
        raise LensviewInputError(
            f"Options {sorted(options)} apply to convergence maps only; {maps.source} is a potential.")
    return DeflectionField.from_potential(maps.data, maps.wcs, z_lens=z_lens, z_norm=z_norm,
                                          cosmology=cosmology, name=name)
