"""Knot lists read back from region files and user catalogues (column
conventions, sexagesimal text, pixel columns with a WCS)."""

import io
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.table import Table

from ..checks import celestial_wcs
from ..errors import LensviewInputError
from .files import FITS_SUFFIXES, TABLE_FORMATS, VOTABLE_SUFFIXES, first_line, read_source
from .knots import candidate_result, coordinate_column, label_text, row_list
from .regions import candidates_from_region_hdu
from .tables import parse_table

__all__ = ["read_candidates", "SKY_COLUMNS", "PIXEL_COLUMNS"]

#: Sky column pairs accepted in candidate catalogues (compared case-insensitively).
SKY_COLUMNS = (("ra", "dec"), ("raj2000", "dej2000"), ("alpha_j2000", "delta_j2000"),
               ("ra_icrs", "de_icrs"), ("ra_deg", "dec_deg"), ("radeg", "dedeg"))
#: Pixel column pairs (0-based, as astropy.wcs uses them), needing a WCS.
PIXEL_COLUMNS = (("x", "y"), ("xcentroid", "ycentroid"))
_LABEL_COLUMNS = ("label", "name", "id")

def read_candidates(path, wcs=None):
    """Read a candidate list back, from lensview's region files or a catalogue.

    Parameters
    ----------
    path : str, path-like or file-like
        A region list written by `write_regions` (``.fits``, ``.ecsv``,
        ``.vot``; only its candidate rows are read), or a catalogue in CSV,
        ECSV, VOTable or a FITS table. Catalogue positions come from the first
        column pair found among ra/dec, RAJ2000/DEJ2000, ALPHA_J2000/
        DELTA_J2000, RA_ICRS/DE_ICRS, RA_DEG/DEC_DEG, RADEG/DEDEG (any case;
        degrees, another angle unit given in the file, or sexagesimal text
        with RA in hours), or else from 0-based pixel columns x/y or
        xcentroid/ycentroid with ``wcs``. A file-like object needs a ``name``
        with the suffix.
    wcs : `~astropy.wcs.WCS`, optional
        For pixel columns, and for a FITS region table that carries no WCS
        of its own (a WCS in the file takes precedence).

    Returns
    -------
    `~astropy.table.Table`
        Columns ``ra``, ``dec`` (deg, ICRS), ``label`` (from a label, name or
        id column; default "K1", "K2", ...) and ``pair_id`` (-1: no pair).

    Raises
    ------
    LensviewInputError
        For an empty or unreadable file, missing or non-numeric coordinate
        columns, or no candidate rows. Nothing is modified.
    """
    name, content = read_source(path)
    suffix = Path(name).suffix.lower()
    if suffix in FITS_SUFFIXES:
        return _candidates_from_fits(name, content, wcs)
    if suffix not in (".csv", ".ecsv") + VOTABLE_SUFFIXES:
        raise LensviewInputError(
            f"Cannot tell the format of {name!r} from its suffix; use .csv, .ecsv, .vot or .fits.")
    table = parse_table(name, content, TABLE_FORMATS[suffix])
    return _candidates_from_catalogue(name, table, wcs)


def _find_column(table, wanted):
    lower = {name.lower(): name for name in table.colnames}
    return lower.get(wanted)


def _candidates_from_catalogue(name, table, wcs):
    label = Path(name).name
    if len(table) == 0:
        raise LensviewInputError(f"{label!r} holds no rows; add the candidates' positions.")
    kind = _find_column(table, "kind")
    if kind is not None:
        rows = np.array([label_text(value) == "candidate" for value in table[kind]])
        if not rows.any():
            raise LensviewInputError(
                f"{label!r} is a region list without candidate rows (only curves); mark candidates "
                "and export them, or choose a catalogue.")
        table = table[rows]
    labels = None
    for candidate_name in _LABEL_COLUMNS:
        column = _find_column(table, candidate_name)
        if column is not None:
            labels = list(table[column])
            break
    pair_column = _find_column(table, "pair_id")
    pairs = list(table[pair_column]) if pair_column is not None else None
    for ra_name, dec_name in SKY_COLUMNS:
        ra_col, dec_col = _find_column(table, ra_name), _find_column(table, dec_name)
        if ra_col is not None and dec_col is not None:
            ra = coordinate_column(table[ra_col], ra_col, u.hourangle, label)
            dec = coordinate_column(table[dec_col], dec_col, u.deg, label)
            return candidate_result(ra, dec, labels, pairs)
    for x_name, y_name in PIXEL_COLUMNS:
        x_col, y_col = _find_column(table, x_name), _find_column(table, y_name)
        if x_col is not None and y_col is not None:
            if wcs is None:
                raise LensviewInputError(
                    f"{label!r} gives pixel columns {x_col}, {y_col} but no WCS was supplied; "
                    "pass the cutout's WCS (wcs=...) or give RA/Dec columns.")
            x = _number_column(table[x_col], x_col, label)
            y = _number_column(table[y_col], y_col, label)
            sky = celestial_wcs(wcs, "The region list").pixel_to_world(x, y)
            return candidate_result(sky.icrs.ra.deg, sky.icrs.dec.deg, labels, pairs)
    accepted = ", ".join(f"{a}/{b}" for a, b in SKY_COLUMNS + PIXEL_COLUMNS)
    raise LensviewInputError(
        f"{label!r} has no coordinate columns (it has {', '.join(table.colnames)}); name them one "
        f"of {accepted} (x/y are 0-based pixels and need a WCS).")


def _number_column(column, name, label):
    try:
        values = np.ma.filled(np.ma.asarray(column, dtype=float), np.nan)
    except (TypeError, ValueError) as error:
        raise LensviewInputError(
            f"{label!r}: pixel column {name} holds text that is not a number; give pixel numbers.") from error
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        raise LensviewInputError(
            f"{label!r}: pixel column {name} has no number in row(s) {row_list(bad)}; fill them in.")
    return values


def _candidates_from_fits(name, content, wcs):
    import warnings

    from astropy.io import fits

    label = Path(name).name
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hdul = fits.open(io.BytesIO(content))
            hdul.verify("silentfix")
    except Exception as error:  # astropy raises OSError, ValueError, TypeError for bad FITS
        raise LensviewInputError(
            f"{label!r} is not a readable FITS file ({first_line(error)}); check the file.") from error
    with hdul:
        names = [hdu.name for hdu in hdul]
        if "REGION" in names:
            return candidates_from_region_hdu(label, hdul, wcs)
        for hdu in hdul:
            if isinstance(hdu, (fits.BinTableHDU, fits.TableHDU)):
                return _candidates_from_catalogue(name, Table.read(hdu), wcs)
    raise LensviewInputError(
        f"{label!r} holds no table (no REGION extension and no catalogue table); choose a region "
        "table or a catalogue.")


