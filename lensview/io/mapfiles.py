"""What a lens-model FITS file holds, and reading the single-map kinds.

Groups publish more than deflection pairs: convergence (kappa) maps,
lensing-potential (psi) maps and magnification maps, each a single 2-D
image. lensview reads the keyword ``LENSMAP`` of the first image header (or
the primary header) to learn which:

==============  ==============================================================
LENSMAP         the file holds
==============  ==============================================================
DEFLECTION      the deflection pair (the default when the keyword is absent)
CONVERGENCE     one 2-D kappa map (dimensionless)
POTENTIAL       one 2-D psi map in arcsec^2 (BUNIT, if given, an angle squared)
MAGNIFICATION   one 2-D mu map: shown as an overlay only, never a model
==============  ==============================================================

The user can always override the keyword (``kind=`` of `load_model`, the
command line's ``--map-kind``, the page's "Map holds" choice). Z_NORM keeps
its meaning for every kind.

A magnification map cannot place critical curves: it has lost the sign of
det A near the curves and says nothing about the deflection, so neither the
curves' positions (where det A changes sign, sampled at the map's own
resolution) nor ray tracing, counter-images or time delays follow from it.
"""

from dataclasses import dataclass

import numpy as np
import astropy.units as u

from ..errors import LensviewInputError

__all__ = ["MAP_KIND_KEYWORD", "MAP_KINDS", "ScalarMap", "map_kind", "read_scalar_map",
           "read_magnification_map", "magnification_overlay_on", "FROM_HEADER", "MAGNIFICATION_ONLY",
           "OVERLAY_ONLY_REASON"]

#: Header keyword saying what a lens-model file holds.
MAP_KIND_KEYWORD = "LENSMAP"
#: Values of MAP_KIND_KEYWORD (lower case here; any case in the header).
MAP_KINDS = ("deflection", "convergence", "potential", "magnification")
#: Ask for a value from the file's header: the kind (LENSMAP) for `map_kind`,
#: the normalisation (Z_NORM) for `lensview.load_model`.
FROM_HEADER = "header"

#: Why a magnification map is shown, never used: for the page and the command line.
OVERLAY_ONLY_REASON = (
    "A magnification map alone cannot place critical curves: it has lost the sign of det A "
    "across the curves and carries no deflection, so curves, ray tracing, counter-images and "
    "delays cannot follow from it. It is drawn as |\u03bc| contours only.")

MAGNIFICATION_ONLY = (
    "A magnification map is not enough to place critical curves (it has no sign of det A "
    "across the curves and no deflection to trace rays with); give a deflection, convergence "
    "or potential map as the model, and show the magnification map as an overlay (page: "
    "'Magnification overlay'; command line: lensview figure --magnification-map).")


@dataclass
class ScalarMap:
    """One 2-D map of a lens model with its WCS and header."""

    data: np.ndarray
    wcs: object
    header: object
    kind: str
    name: str = None
    source: str = ""


def map_kind(x, y=None, kind=FROM_HEADER):
    """The kind of model a file holds: the user's ``kind``, else its LENSMAP keyword.

    Parameters
    ----------
    x, y : str, path, bytes or file-like
        As for `lensview.load_model`.
    kind : str
        One of `MAP_KINDS`, or FROM_HEADER to read the keyword (absent: deflection).

    Returns
    -------
    str
    """
    if not (isinstance(kind, str) and kind == FROM_HEADER):
        chosen = _checked_kind(kind, "kind")
        if y is not None and chosen != "deflection":
            raise LensviewInputError(
                f"A {chosen} model is one file, but two were given; give the single map alone.")
        return chosen
    from .fits import _image_hdus, _open_fits

    with _open_fits(x) as (hdul, label):
        headers = [hdul[0].header] + [h.header for _, h in _image_hdus(hdul)[:1]]
        declared = next((h[MAP_KIND_KEYWORD] for h in headers if MAP_KIND_KEYWORD in h), None)
    if declared is None:
        return "deflection"
    found = _checked_kind(declared, f"{MAP_KIND_KEYWORD} in {label}")
    if y is not None and found != "deflection":
        raise LensviewInputError(
            f"{label} says {MAP_KIND_KEYWORD} = {declared!r} (a single map) but a second file was "
            "given; a convergence or potential model is one file.")
    return found


def read_scalar_map(source, kind):
    """Read a single-HDU convergence, potential or magnification map.

    The first 2-D image with a celestial WCS is used. A potential's BUNIT, if
    present, must be an angle squared (converted to arcsec^2).

    Returns
    -------
    ScalarMap
    """
    from .fits import _first_celestial_image, _hdu_data, _model_name, _open_fits, _where

    kind = _checked_kind(kind, "kind")
    with _open_fits(source) as (hdul, label):
        index, hdu, wcs = _first_celestial_image(hdul, label)
        data = _hdu_data(hdu, label, index)
        header = hdu.header.copy()
        where = _where(label, index)
    if not np.issubdtype(data.dtype, np.floating):
        data = data.astype(np.float64)
    if kind == "potential":
        data = data * _potential_factor(header.get("BUNIT"), where)
    wcs.array_shape = data.shape
    return ScalarMap(data=data, wcs=wcs, header=header, kind=kind, name=_model_name(source, None),
                     source=where)


def read_magnification_map(source):
    """A magnification map (for overlays only) as a `ScalarMap`.

    Its LENSMAP keyword, when present, must say MAGNIFICATION.
    """
    declared = map_kind(source)
    if declared not in ("deflection", "magnification"):
        raise LensviewInputError(
            f"The file says {MAP_KIND_KEYWORD} = {declared.upper()}, not MAGNIFICATION; load it as "
            "a lens model instead of an overlay.")
    return read_scalar_map(source, "magnification")


def magnification_overlay_on(mu_map, wcs, shape):
    """|mu| of a magnification map resampled onto another grid, for display only.

    Parameters
    ----------
    mu_map : ScalarMap
        From `read_magnification_map`.
    wcs : `~astropy.wcs.WCS`
        Target celestial WCS (e.g. the cutout's, or a crop of it).
    shape : tuple of int
        Target (ny, nx).

    Returns
    -------
    ndarray
        |mu| by bilinear resampling (`reproject`), NaN off the map. Good for
        contours; not a measurement (mu diverges on the curves, which a
        resampled map smooths over).
    """
    from reproject import reproject_interp

    values = np.abs(np.asarray(mu_map.data, dtype=np.float64))
    resampled, _ = reproject_interp((values, mu_map.wcs), wcs.celestial, shape_out=tuple(shape),
                                    order="bilinear")
    return resampled


def _checked_kind(kind, label):
    text = str(kind).strip().lower() if kind is not None else ""
    if text not in MAP_KINDS:
        raise LensviewInputError(
            f"{label} = {kind!r} is not a kind of lens map; use one of "
            f"{', '.join(MAP_KINDS)}.")
    return text


def _potential_factor(bunit, where):
    if not isinstance(bunit, str) or not bunit.strip():
        return 1.0
    unit = u.Unit(bunit.strip(), format="fits", parse_strict="silent")
    if isinstance(unit, u.UnrecognizedUnit) or not unit.is_equivalent(u.arcsec**2):
        raise LensviewInputError(
            f"{where} declares BUNIT = {bunit!r}; a potential map must be in arcsec^2 (or another "
            "angle squared). Write BUNIT = 'arcsec2', or remove it for arcsec^2.")
    return float(unit.to(u.arcsec**2))
