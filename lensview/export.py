"""Region lists, measurement tables and session files: taking results away and
bringing them back.

Region lists
    ``write_regions`` writes curves (one polygon per curve) and candidates
    (points) in one of three forms chosen by the file suffix:

    - ``.fits``: a FITS region table written with the ``regions`` library, in
      the pixel frame of the given WCS (the cutout's), whose header carries a
      copy of that WCS. X and Y are 0-based pixel positions, the convention
      of ``regions.PixCoord`` and ``astropy.wcs`` and the one the ``regions``
      library reads back; the header keyword ``LVORIGIN = 0`` records it (add
      1 for 1-based FITS pixel numbers). A second table, ``REGION_TAGS``, has
      one row per region ``COMPONENT`` with its kind, plane, model, source
      redshift, closure, vertex count, label and pair id, because the region
      table itself admits only its standard columns.

      A FITS region table knows no open polyline (and the ``regions`` library
      writes no line regions to it), so an open curve v0 ... v(n-1) is written
      as the "there-and-back" polygon v0 ... v(n-1), v(n-2) ... v1: its
      outline is exactly the open curve, with no invented closing edge, and it
      encloses no area. ``NVERTEX`` and ``CLOSED`` in ``REGION_TAGS`` give the
      original polyline as the first ``NVERTEX`` vertices. Polygons shorter
      than the table's vertex columns are padded by repeating their last
      vertex (zero-length edges), because the zero padding of the ``regions``
      writer would read back as extra vertices at pixel (0, 0).
    - ``.ecsv`` and ``.vot``: one row per curve vertex or candidate, with sky
      coordinates in degrees (see `vertex_table`).

Tables
    ``write_table`` / ``read_table``: ECSV (units and metadata), CSV (values
    only) and VOTable (units, and metadata as JSON in ``INFO`` elements).

Session files
    A versioned JSON document (never pickle) with the inputs' file names and
    SHA-256 checksums, redshifts, cosmology, display settings and candidates;
    see `Session`, `save_session`, `load_session`, `check_session_files`.
"""

import hashlib
import io
import json
import math
import os
import tempfile
from dataclasses import asdict, dataclass, field as dataclass_field
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.coordinates import Angle, SkyCoord
from astropy.table import Table
from astropy.wcs import WCS

from .errors import LensviewInputError

__all__ = [
    "write_regions",
    "vertex_table",
    "read_candidates",
    "as_candidate_table",
    "write_table",
    "read_table",
    "InputFile",
    "ModelInputs",
    "Candidate",
    "Session",
    "FileStatus",
    "save_session",
    "load_session",
    "check_session_files",
    "SESSION_FORMAT",
    "SESSION_VERSION",
]

_FITS_SUFFIXES = (".fits", ".fit", ".fts")
_VOTABLE_SUFFIXES = (".vot", ".votable", ".xml")
_TABLE_FORMATS = {".ecsv": "ecsv", ".csv": "csv", **{s: "votable" for s in _VOTABLE_SUFFIXES}}
_FORMAT_NAMES = {"ecsv": "ecsv", "ascii.ecsv": "ecsv", "csv": "csv", "ascii.csv": "csv",
                 "votable": "votable", "vot": "votable"}
_KINDS = ("tangential", "radial")
#: Sky column pairs accepted in candidate catalogues (compared case-insensitively).
SKY_COLUMNS = (("ra", "dec"), ("raj2000", "dej2000"), ("alpha_j2000", "delta_j2000"),
               ("ra_icrs", "de_icrs"), ("ra_deg", "dec_deg"), ("radeg", "dedeg"))
#: Pixel column pairs (0-based, as astropy.wcs uses them), needing a WCS.
PIXEL_COLUMNS = (("x", "y"), ("xcentroid", "ycentroid"))
_LABEL_COLUMNS = ("label", "name", "id")
_NO_PAIR = -1
_TAGS_EXTNAME = "REGION_TAGS"


def _version():
    from . import __version__

    return __version__


# ---------------------------------------------------------------------------- candidates in
def as_candidate_table(candidates):
    """Candidates as a Table with ``ra``, ``dec`` (deg), ``label`` and ``pair_id``.

    Parameters
    ----------
    candidates : `~astropy.coordinates.SkyCoord` or `~astropy.table.Table`
        Positions, or a table with ``ra`` and ``dec`` columns (degrees when
        they carry no unit) and optional ``label`` and ``pair_id`` columns.

    Returns
    -------
    `~astropy.table.Table`
        Labels default to "K1", "K2", ...; ``pair_id`` is -1 for no pair.
    """
    if isinstance(candidates, SkyCoord):
        coords = candidates.icrs.reshape(-1) if candidates.shape else candidates.icrs.reshape((1,))
        return _candidate_result(coords.ra.deg, coords.dec.deg, None, None)
    if isinstance(candidates, Table):
        missing = [name for name in ("ra", "dec") if name not in candidates.colnames]
        if missing:
            raise LensviewInputError(
                f"The candidate table has no {' or '.join(missing)} column (it has "
                f"{', '.join(candidates.colnames) or 'no columns'}); give ra and dec in degrees.")
        ra = _coordinate_column(candidates["ra"], "ra", u.hourangle, "the candidate table")
        dec = _coordinate_column(candidates["dec"], "dec", u.deg, "the candidate table")
        labels = list(candidates["label"]) if "label" in candidates.colnames else None
        pairs = list(candidates["pair_id"]) if "pair_id" in candidates.colnames else None
        return _candidate_result(ra, dec, labels, pairs)
    raise LensviewInputError(
        f"Candidates must be a SkyCoord or a Table with ra and dec columns, got "
        f"{type(candidates).__name__}.")


def _candidate_result(ra, dec, labels, pair_ids):
    ra = np.asarray(ra, dtype=float)
    dec = np.asarray(dec, dtype=float)
    bad = np.flatnonzero(~(np.isfinite(ra) & np.isfinite(dec)))
    if bad.size:
        raise LensviewInputError(
            f"Candidate row(s) {_rows(bad)} have no finite position; give numbers in degrees "
            "or remove those rows.")
    outside = np.flatnonzero(np.abs(dec) > 90)
    if outside.size:
        raise LensviewInputError(
            f"Candidate row(s) {_rows(outside)} have a declination beyond +-90 deg; check that "
            "RA and Dec are not swapped and that the unit is degrees.")
    n = len(ra)
    defaults = [f"K{i + 1}" for i in range(n)]
    if labels is None:
        labels = defaults
    else:
        labels = [_label_text(value) or default for value, default in zip(labels, defaults)]
    if pair_ids is None:
        pair_ids = np.full(n, _NO_PAIR, dtype=np.int64)
    else:
        pair_ids = np.array([_pair_value(value, i) for i, value in enumerate(pair_ids)], dtype=np.int64)
    table = Table()
    table["ra"] = np.mod(ra, 360.0) * u.deg
    table["dec"] = dec * u.deg
    table["label"] = np.array(labels, dtype=str) if n else np.zeros(0, dtype="U1")
    table["pair_id"] = pair_ids
    return table


def _label_text(value):
    if value is None or value is np.ma.masked:
        return ""
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    return str(value).strip()


def _pair_value(value, row):
    if value is None or value is np.ma.masked:
        return _NO_PAIR
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not math.isfinite(number) or number != int(number):
        if isinstance(value, str) and not value.strip():
            return _NO_PAIR
        raise LensviewInputError(
            f"Candidate row {row + 1}: pair_id {value!r} is not a whole number; use integers "
            "(-1 for no pair) or leave it empty.")
    return int(number)


def _rows(indices, limit=8):
    shown = ", ".join(str(i + 1) for i in indices[:limit])
    return shown + (f" and {len(indices) - limit} more" if len(indices) > limit else "")


# ---------------------------------------------------------------------------- region lists
def write_regions(path, curves, candidates=None, *, wcs, overwrite=True):
    """Write curves and candidates as a region list.

    Parameters
    ----------
    path : str or path-like
        Output file; the suffix chooses the form: ``.fits`` (FITS region
        table in the pixels of ``wcs``, with the WCS in the header), ``.ecsv``
        or ``.vot`` (one row per vertex or point, see `vertex_table`). See
        the module notes for how open curves are written to FITS.
    curves : sequence of `~lensview.curves.Curve`
        Critical curves and/or caustics (``plane="source"``).
    candidates : `~astropy.coordinates.SkyCoord` or `~astropy.table.Table`, optional
        Positions, or a table with ``ra``, ``dec``, ``label`` and optional
        ``pair_id``.
    wcs : `~astropy.wcs.WCS`
        The cutout's celestial WCS: the pixel frame of the FITS table and of
        the ``x``, ``y`` columns of the vertex tables (None is allowed for
        ``.ecsv``/``.vot``, which then carry sky coordinates only).
    overwrite : bool
        Replace an existing file.

    Returns
    -------
    str
        The path written.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in _FITS_SUFFIXES + (".ecsv",) + _VOTABLE_SUFFIXES:
        raise LensviewInputError(
            f"Cannot tell the region format of {path.name!r} from its suffix; use .fits (FITS "
            "region table), .ecsv or .vot (vertex tables with sky coordinates).")
    curves = _curve_list(curves)
    candidates = as_candidate_table(candidates) if candidates is not None else None
    if suffix in _FITS_SUFFIXES:
        if wcs is None:
            raise LensviewInputError(
                "A FITS region table is written in pixels; pass wcs= (the cutout's WCS).")
        _write_region_fits(path, curves, candidates, _celestial(wcs), overwrite)
    else:
        table = vertex_table(curves, candidates, wcs=None if wcs is None else _celestial(wcs))
        table.meta = _export_meta(table.meta, None)
        _write_table_file(table, path, _TABLE_FORMATS[suffix], overwrite)
    return str(path)


def vertex_table(curves, candidates=None, *, wcs=None):
    """One row per curve vertex and per candidate, with sky coordinates.

    Parameters
    ----------
    curves : sequence of `~lensview.curves.Curve`
    candidates : `~astropy.coordinates.SkyCoord` or `~astropy.table.Table`, optional
    wcs : `~astropy.wcs.WCS`, optional
        Adds 0-based pixel columns ``x``, ``y`` in this frame.

    Returns
    -------
    `~astropy.table.Table`
        Columns ``kind`` ("tangential", "radial" or "candidate"), ``plane``
        ("image", or "source" for caustics), ``curve_id`` (position in
        ``curves``; -1 for candidates), ``vertex`` (index along the curve, or
        the candidate's position in the list), ``closed``, ``cusp``,
        ``model``, ``z_source`` (NaN for candidates), ``ra``, ``dec`` (deg),
        ``label``, ``pair_id`` (-1: no pair) and, with ``wcs``, ``x``, ``y``.
    """
    curves = _curve_list(curves)
    candidates = as_candidate_table(candidates) if candidates is not None else None
    columns = {name: [] for name in ("kind", "plane", "curve_id", "vertex", "closed", "cusp",
                                     "model", "z_source", "ra", "dec", "label", "pair_id")}

    def extend(n, **values):
        for name, value in values.items():
            columns[name].append(np.broadcast_to(np.asarray(value), (n,)))

    for curve_id, curve in enumerate(curves):
        n = len(curve.sky)
        cusp = np.zeros(n, bool)
        cusp[np.asarray(curve.cusps, int)] = True
        extend(n, kind=curve.kind, plane=curve.plane, curve_id=curve_id, vertex=np.arange(n),
               closed=bool(curve.closed), cusp=cusp, model=str(curve.model),
               z_source=float(curve.z_source), ra=curve.sky.icrs.ra.deg, dec=curve.sky.icrs.dec.deg,
               label="", pair_id=_NO_PAIR)
    if candidates is not None and len(candidates):
        n = len(candidates)
        extend(n, kind="candidate", plane="image", curve_id=-1, vertex=np.arange(n), closed=False,
               cusp=False, model="", z_source=np.nan, ra=candidates["ra"].quantity.to_value(u.deg),
               dec=candidates["dec"].quantity.to_value(u.deg), label=np.asarray(candidates["label"]),
               pair_id=np.asarray(candidates["pair_id"]))
    dtypes = {"kind": str, "plane": str, "curve_id": np.int64, "vertex": np.int64, "closed": bool,
              "cusp": bool, "model": str, "z_source": float, "ra": float, "dec": float,
              "label": str, "pair_id": np.int64}
    table = Table()
    for name, parts in columns.items():
        table[name] = np.concatenate(parts).astype(dtypes[name]) if parts \
            else np.zeros(0, dtype="U1" if dtypes[name] is str else dtypes[name])
    table["ra"].unit = u.deg
    table["dec"].unit = u.deg
    table.meta["content"] = "lensview region list: curve vertices and candidate points"
    if wcs is not None:
        x, y = wcs.world_to_pixel(SkyCoord(table["ra"], table["dec"], frame="icrs"))
        table["x"] = np.asarray(x, float) * u.pix
        table["y"] = np.asarray(y, float) * u.pix
        table.meta["pixel_origin"] = 0
        table.meta["wcs"] = {key: value for key, value in wcs.to_header(relax=True).items()}
    return table


def _curve_list(curves):
    from .curves import Curve

    curves = list(curves) if curves is not None else []
    for k, curve in enumerate(curves):
        if not isinstance(curve, Curve):
            raise LensviewInputError(
                f"Item {k} of curves is a {type(curve).__name__}, not a Curve; pass the lists "
                "returned by DeflectionField.critical_curves or .caustics.")
    return curves


def _celestial(wcs):
    if not isinstance(wcs, WCS) or not wcs.has_celestial:
        raise LensviewInputError(
            "The WCS must be an astropy.wcs.WCS with celestial axes; pass the cutout's WCS.")
    return wcs.celestial


def _write_region_fits(path, curves, candidates, wcs, overwrite):
    from astropy.io import fits
    from regions import PixCoord, PointPixelRegion, PolygonPixelRegion, Regions

    outlines = [_polygon_outline(curve.to_pixels(wcs), curve.closed) for curve in curves]
    width = max([len(xy) for xy in outlines], default=1)
    regions, tags = [], []
    for curve_id, (curve, xy) in enumerate(zip(curves, outlines)):
        padded = np.vstack([xy, np.repeat(xy[-1:], width - len(xy), axis=0)])
        region = PolygonPixelRegion(PixCoord(padded[:, 0], padded[:, 1]))
        region.meta["component"] = len(regions) + 1
        regions.append(region)
        tags.append((region.meta["component"], curve.kind, curve.plane, str(curve.model),
                     float(curve.z_source), bool(curve.closed), len(curve.sky), curve_id, "", _NO_PAIR))
    if candidates is not None and len(candidates):
        x, y = wcs.world_to_pixel(SkyCoord(candidates["ra"], candidates["dec"], frame="icrs"))
        for k in range(len(candidates)):
            region = PointPixelRegion(PixCoord(float(x[k]), float(y[k])))
            region.meta["component"] = len(regions) + 1
            regions.append(region)
            tags.append((region.meta["component"], "candidate", "image", "", math.nan, False, 1, -1,
                         str(candidates["label"][k]), int(candidates["pair_id"][k])))
    if not regions:
        raise LensviewInputError("There is nothing to write: give at least one curve or candidate.")

    header = fits.Header()
    for key, value, comment in (
            ("EXTNAME", "REGION", ""), ("HDUNAME", "REGION", ""), ("HDUCLASS", "ASC", ""),
            ("HDUCLAS1", "REGION", ""), ("HDUCLAS2", "STANDARD", ""), ("HDUVERS", "1.2.0", ""),
            ("HDUDOC", "ASC-FITS-REGION-1.2: Rots, McDowell: FITS REGION Binary Table Design", ""),
            ("CONTENT", "REGION", ""), ("ORIGIN", f"lensview {_version()}", "with astropy regions"),
            ("LVORIGIN", 0, "X,Y 0-based; add 1 for FITS pixel numbers")):
        header[key] = (value, comment)
    header.update(wcs.to_header(relax=True))

    tag_table = Table(rows=tags, names=("COMPONENT", "KIND", "PLANE", "MODEL", "Z_SOURCE", "CLOSED",
                                        "NVERTEX", "CURVE_ID", "LABEL", "PAIR_ID"),
                      dtype=(np.int64, "U10", "U6", str, float, bool, np.int64, np.int64, str, np.int64))
    tag_hdu = fits.table_to_hdu(tag_table)
    tag_hdu.header["EXTNAME"] = _TAGS_EXTNAME
    tag_hdu.header["COMMENT"] = "One row per COMPONENT of the REGION table; NVERTEX vertices of " \
                                "each polygon are the curve, the rest outline an open curve or pad."

    def write(target):
        Regions(regions).write(target, format="fits", header=header, overwrite=True)
        with fits.open(target, mode="append") as hdul:
            hdul.append(tag_hdu)

    _atomic_write(path, write, overwrite)


def _polygon_outline(xy, closed):
    """Vertices of a polygon whose outline is the curve (there and back if open)."""
    if closed or len(xy) < 3:
        return xy
    return np.vstack([xy, xy[-2:0:-1]])


def _atomic_write(path, writer, overwrite):
    """Write through a temporary file so a failure never leaves a partial file."""
    path = Path(path)
    if not path.parent.exists():
        raise LensviewInputError(
            f"The folder {str(path.parent)!r} does not exist; create it or choose another output path.")
    if path.exists() and not overwrite:
        raise LensviewInputError(f"{str(path)!r} exists; pass overwrite=True or choose another name.")
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".lensview-", suffix=path.suffix)
    os.close(handle)
    try:
        writer(temporary)
        os.replace(temporary, path)
    finally:
        if os.path.exists(temporary):
            os.unlink(temporary)


# ---------------------------------------------------------------------------- candidates back
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
    name, content = _read_source(path)
    suffix = Path(name).suffix.lower()
    if suffix in _FITS_SUFFIXES:
        return _candidates_from_fits(name, content, wcs)
    if suffix not in (".csv", ".ecsv") + _VOTABLE_SUFFIXES:
        raise LensviewInputError(
            f"Cannot tell the format of {name!r} from its suffix; use .csv, .ecsv, .vot or .fits.")
    table = _parse_table(name, content, _TABLE_FORMATS[suffix])
    return _candidates_from_catalogue(name, table, wcs)


def _read_source(source):
    if hasattr(source, "read"):
        name = getattr(source, "name", None)
        if not name:
            raise LensviewInputError("A file-like input needs a name with its suffix (.csv, .ecsv, ...).")
        content = source.getvalue() if hasattr(source, "getvalue") else source.read()
    else:
        path = Path(source)
        name = str(path)
        if not path.is_file():
            raise LensviewInputError(f"There is no file {name!r}; check the path.")
        content = path.read_bytes()
    if isinstance(content, str):
        content = content.encode("utf-8")
    if not content.strip():
        raise LensviewInputError(f"{Path(name).name!r} is empty; choose the file that holds the list.")
    return name, bytes(content)


def _parse_table(name, content, kind):
    import warnings

    label = Path(name).name
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if kind == "votable":
                return _read_votable(io.BytesIO(content))
            text = content.decode("utf-8-sig")
            return Table.read(text.splitlines(), format="ascii.ecsv" if kind == "ecsv" else "ascii.csv")
    except UnicodeDecodeError as error:
        raise LensviewInputError(f"{label!r} is not a text file; save it as UTF-8 {kind.upper()}.") from error
    except LensviewInputError:
        raise
    except Exception as error:  # the readers raise many types for malformed files
        raise LensviewInputError(
            f"{label!r} could not be read as {'VOTable' if kind == 'votable' else kind.upper()}: "
            f"{_first_line(error)}. Check the file, or save it again from the program that made it."
        ) from error


def _first_line(error):
    text = str(error).strip().splitlines()
    return text[0] if text else type(error).__name__


def _find_column(table, wanted):
    lower = {name.lower(): name for name in table.colnames}
    return lower.get(wanted)


def _candidates_from_catalogue(name, table, wcs):
    label = Path(name).name
    if len(table) == 0:
        raise LensviewInputError(f"{label!r} holds no rows; add the candidates' positions.")
    kind = _find_column(table, "kind")
    if kind is not None:
        rows = np.array([_label_text(value) == "candidate" for value in table[kind]])
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
            ra = _coordinate_column(table[ra_col], ra_col, u.hourangle, label)
            dec = _coordinate_column(table[dec_col], dec_col, u.deg, label)
            return _candidate_result(ra, dec, labels, pairs)
    for x_name, y_name in PIXEL_COLUMNS:
        x_col, y_col = _find_column(table, x_name), _find_column(table, y_name)
        if x_col is not None and y_col is not None:
            if wcs is None:
                raise LensviewInputError(
                    f"{label!r} gives pixel columns {x_col}, {y_col} but no WCS was supplied; "
                    "pass the cutout's WCS (wcs=...) or give RA/Dec columns.")
            x = _number_column(table[x_col], x_col, label)
            y = _number_column(table[y_col], y_col, label)
            sky = _celestial(wcs).pixel_to_world(x, y)
            return _candidate_result(sky.icrs.ra.deg, sky.icrs.dec.deg, labels, pairs)
    accepted = ", ".join(f"{a}/{b}" for a, b in SKY_COLUMNS + PIXEL_COLUMNS)
    raise LensviewInputError(
        f"{label!r} has no coordinate columns (it has {', '.join(table.colnames)}); name them one "
        f"of {accepted} (x/y are 0-based pixels and need a WCS).")


def _coordinate_column(column, name, text_unit, label):
    """Degrees from a numeric column (with its unit) or from text, sexagesimal or decimal."""
    masked = np.ma.getmaskarray(column) if hasattr(column, "mask") else np.zeros(len(column), bool)
    if masked.any():
        raise LensviewInputError(
            f"{label!r}: column {name} is empty in row(s) {_rows(np.flatnonzero(masked))}; fill in "
            "every position or remove those rows.")
    if column.dtype.kind in "iuf":
        values = np.asarray(column, dtype=float)
        unit = column.unit
        if unit is not None and str(unit) != "":
            try:
                values = (values * u.Unit(unit)).to_value(u.deg)
            except (u.UnitConversionError, ValueError) as error:
                raise LensviewInputError(
                    f"{label!r}: column {name} has unit {unit}, which is not an angle; give degrees."
                ) from error
        return values
    values = np.empty(len(column))
    bad = []
    for i, item in enumerate(column):
        text = _label_text(item)
        try:
            values[i] = float(text)
            continue
        except ValueError:
            pass
        try:
            values[i] = Angle(text, unit=text_unit).deg
        except (ValueError, u.UnitsError):
            bad.append(i)
    if bad:
        example = _label_text(column[bad[0]])
        raise LensviewInputError(
            f"{label!r}: column {name} is not a number or a sexagesimal angle in row(s) "
            f"{_rows(np.array(bad))} (e.g. {example!r}); give degrees or h:m:s / d:m:s.")
    return values


def _number_column(column, name, label):
    try:
        values = np.ma.filled(np.ma.asarray(column, dtype=float), np.nan)
    except (TypeError, ValueError) as error:
        raise LensviewInputError(
            f"{label!r}: pixel column {name} holds text that is not a number; give pixel numbers.") from error
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        raise LensviewInputError(
            f"{label!r}: pixel column {name} has no number in row(s) {_rows(bad)}; fill them in.")
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
            f"{label!r} is not a readable FITS file ({_first_line(error)}); check the file.") from error
    with hdul:
        names = [hdu.name for hdu in hdul]
        if "REGION" in names:
            return _candidates_from_region_hdu(label, hdul, wcs)
        for hdu in hdul:
            if isinstance(hdu, (fits.BinTableHDU, fits.TableHDU)):
                return _candidates_from_catalogue(name, Table.read(hdu), wcs)
    raise LensviewInputError(
        f"{label!r} holds no table (no REGION extension and no catalogue table); choose a region "
        "table or a catalogue.")


def _candidates_from_region_hdu(label, hdul, wcs):
    import warnings

    from astropy.table import QTable
    from regions import PointPixelRegion, Regions

    hdu = hdul["REGION"]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            regions = Regions.parse(QTable.read(hdu), format="fits")
    except Exception as error:  # the regions parser raises its own error types
        raise LensviewInputError(
            f"{label!r}: the REGION table could not be parsed ({_first_line(error)}).") from error
    tags = {}
    if _TAGS_EXTNAME in [h.name for h in hdul]:
        for row in Table.read(hdul[_TAGS_EXTNAME]):
            tags[int(row["COMPONENT"])] = row
    points = []
    for region in regions:
        component = region.meta.get("component")
        tag = tags.get(int(component)) if component is not None else None
        if tag is not None and _label_text(tag["KIND"]) != "candidate":
            continue
        if isinstance(region, PointPixelRegion):
            points.append((region.center.x, region.center.y, tag))
    if not points:
        raise LensviewInputError(
            f"{label!r} holds no candidate points (only curves or other shapes); mark candidates "
            "and export them, or choose another file.")
    frame = _region_wcs(hdu.header) or (None if wcs is None else _celestial(wcs))
    if frame is None:
        raise LensviewInputError(
            f"{label!r} carries no WCS for its pixel positions; pass the cutout's WCS (wcs=...).")
    origin = float(hdu.header.get("LVORIGIN", 0))
    x = np.array([p[0] for p in points]) - origin
    y = np.array([p[1] for p in points]) - origin
    sky = frame.pixel_to_world(x, y)
    labels = [_label_text(p[2]["LABEL"]) if p[2] is not None else "" for p in points]
    pairs = [int(p[2]["PAIR_ID"]) if p[2] is not None else _NO_PAIR for p in points]
    return _candidate_result(sky.icrs.ra.deg, sky.icrs.dec.deg, labels, pairs)


def _region_wcs(header):
    import warnings

    if "CTYPE1" not in header:
        return None
    image_header = header.copy()
    for key in ("NAXIS1", "NAXIS2"):
        image_header.remove(key, ignore_missing=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wcs = WCS(image_header)
    return wcs.celestial if wcs.has_celestial else None


# ---------------------------------------------------------------------------- tables
def write_table(table, path, *, format=None, cosmology=None, overwrite=True):
    """Write a measurement or pairing table, keeping units and metadata.

    Parameters
    ----------
    table : `~astropy.table.Table`
    path : str or path-like
    format : {"ecsv", "csv", "votable"}, optional
        Default from the suffix: ``.ecsv``, ``.csv``, ``.vot``/``.votable``/``.xml``.
        ECSV keeps units and metadata; VOTable keeps units and stores the
        metadata as JSON in ``INFO`` elements (`read_table` restores it); CSV
        keeps values only.
    cosmology : `~astropy.cosmology.Cosmology`, optional
        Recorded by name and parameters; default: the table's ``cosmology``
        metadata (an astropy cosmology, or the name of an astropy realisation).
    overwrite : bool
        Replace an existing file.

    Returns
    -------
    str
        The path written.

    Notes
    -----
    The metadata gains ``lensview_version`` and, when the cosmology is known,
    ``cosmology`` (its name) and ``cosmology_parameters`` (class, H0 in
    km/s/Mpc, Om0, Ode0, Tcmb0 in K, Neff, m_nu in eV, Ob0). Models and
    redshifts already in the metadata (as `~lensview.measure_candidates`
    stores them) are kept.
    """
    if not isinstance(table, Table):
        raise LensviewInputError(f"write_table needs an astropy Table, got {type(table).__name__}.")
    path = Path(path)
    kind = _table_format(path, format)
    out = table.copy(copy_data=False)
    out.meta = _export_meta(table.meta, cosmology)
    _write_table_file(out, path, kind, overwrite)
    return str(path)


def read_table(path, *, format=None):
    """Read a table written by `write_table` (metadata included for ECSV and VOTable).

    Parameters
    ----------
    path : str or path-like
    format : {"ecsv", "csv", "votable"}, optional
        Default from the suffix.

    Returns
    -------
    `~astropy.table.Table`
    """
    name, content = _read_source(path)
    return _parse_table(name, content, _table_format(Path(name), format))


def _table_format(path, format):
    if format is not None:
        kind = _FORMAT_NAMES.get(str(format).lower())
        if kind is None:
            raise LensviewInputError(f"Unknown table format {format!r}; use 'ecsv', 'csv' or 'votable'.")
        return kind
    kind = _TABLE_FORMATS.get(path.suffix.lower())
    if kind is None:
        raise LensviewInputError(
            f"Cannot tell the table format of {path.name!r} from its suffix; use .ecsv, .csv or .vot.")
    return kind


def _export_meta(meta, cosmology):
    from astropy.cosmology import Cosmology

    if cosmology is not None and not isinstance(cosmology, Cosmology):
        raise LensviewInputError(
            f"cosmology must be an astropy cosmology, got {type(cosmology).__name__}; e.g. "
            "astropy.cosmology.Planck18.")
    out = {key: value for key, value in meta.items()}
    given = cosmology if cosmology is not None else out.get("cosmology")
    resolved = given if isinstance(given, Cosmology) else _realisation(given)
    if resolved is not None:
        out["cosmology"] = resolved.name
        out["cosmology_parameters"] = _cosmology_parameters(resolved)
    out["lensview_version"] = _version()
    return out


def _realisation(name):
    from astropy.cosmology import realizations

    if isinstance(name, str) and name in realizations.available:
        return getattr(realizations, name)
    return None


def _cosmology_parameters(cosmology):
    params = {"class": type(cosmology).__name__}
    for key, unit in (("H0", u.km / u.s / u.Mpc), ("Om0", None), ("Ode0", None), ("Tcmb0", u.K),
                      ("Neff", None), ("m_nu", u.eV), ("Ob0", None)):
        value = getattr(cosmology, key, None)
        if value is None:
            continue
        value = value.to_value(unit) if isinstance(value, u.Quantity) else value
        params[key] = _plain(value)
    return params


def _plain(value):
    """JSON-ready version of a metadata value."""
    if isinstance(value, u.Quantity):
        return {"value": _plain(value.value), "unit": value.unit.to_string()}
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    return str(value)


def _write_table_file(table, path, kind, overwrite):
    def write(target):
        if kind == "votable":
            _write_votable(table, target)
        else:
            out = table
            if kind == "ecsv":
                out = table.copy(copy_data=False)
                out.meta = _plain(dict(table.meta))
            out.write(target, format="ascii.ecsv" if kind == "ecsv" else "ascii.csv", overwrite=True)

    _atomic_write(path, write, overwrite)


def _write_votable(table, target):
    from astropy.io.votable import from_table
    from astropy.io.votable.tree import Info

    plain = table.copy(copy_data=False)
    plain.meta = {}
    votable = from_table(plain)
    resource_table = votable.get_first_table()
    for k, (key, value) in enumerate(table.meta.items()):
        resource_table.infos.append(Info(ID=f"lensview_meta_{k}", name=str(key),
                                         value=json.dumps(_plain(value))))
    votable.to_xml(target)


def _read_votable(stream):
    from astropy.io.votable import parse

    votable = parse(stream)
    resource_table = votable.get_first_table()
    table = resource_table.to_table(use_names_over_ids=True)
    for info in resource_table.infos:
        try:
            table.meta[info.name] = json.loads(info.value)
        except (TypeError, ValueError):
            table.meta[info.name] = info.value
    return table


# ---------------------------------------------------------------------------- sessions
SESSION_FORMAT = "lensview-session"
SESSION_VERSION = 1
_STRETCHES = ("linear", "sqrt", "log", "asinh")
_DISPLAY_DEFAULT = {"stretch": "asinh", "limits": "zscale", "colormap": "gray_r"}


def _sha256(content):
    return hashlib.sha256(content).hexdigest()


def _content_of(value, role):
    """Bytes of a supplied file: bytes, a path, or a file-like object."""
    if isinstance(value, (bytes, bytearray, memoryview)):
        return bytes(value)
    if hasattr(value, "getvalue"):
        return bytes(value.getvalue())
    if hasattr(value, "read"):
        return bytes(value.read())
    path = Path(value)
    if not path.is_file():
        raise LensviewInputError(f"The {role} file {str(path)!r} does not exist; check the path.")
    return path.read_bytes()


@dataclass(frozen=True)
class InputFile:
    """An input file as a session records it: its name and SHA-256 checksum.

    Attributes
    ----------
    name : str
        File name (no folder), the key under which it is supplied again.
    sha256 : str
        Hex SHA-256 of the file's bytes.
    """

    name: str
    sha256: str

    @classmethod
    def from_content(cls, name, content):
        """Record of a file from its bytes, a path or a file-like object."""
        return cls(Path(str(name)).name, _sha256(_content_of(content, "input")))


@dataclass(frozen=True)
class ModelInputs:
    """The inputs of one lens model.

    Attributes
    ----------
    name : str
        Model name shown in tables and legends.
    files : tuple of `InputFile`
        One file (two HDUs or a cube) or two (x and y components).
    units : str
        "arcsec" or "pixel".
    z_norm : float or None
        Redshift the maps were made for; None for maps normalised to D_ls/D_s = 1.
    """

    name: str
    files: tuple
    units: str = "arcsec"
    z_norm: float = None


@dataclass(frozen=True)
class Candidate:
    """A marked candidate: label, ICRS position in degrees, pair id (-1: none)."""

    label: str
    ra: float
    dec: float
    pair_id: int = _NO_PAIR


@dataclass(frozen=True)
class Session:
    """Everything needed to restore a lensview session, independent of any UI.

    Attributes
    ----------
    z_lens, z_source : float
    cutout : `InputFile` or None
    models : tuple of `ModelInputs`
    cosmology : dict
        ``{"name": <astropy realisation>}`` or ``{"H0": km/s/Mpc, "Om0": ...,
        "Tcmb0": K}`` for a flat LCDM model.
    display : dict
        ``stretch`` (linear, sqrt, log, asinh), ``limits`` ("zscale", a
        percentile such as 99.5, or [low, high]) and ``colormap`` (a name).
    candidates : tuple of `Candidate`
    lensview_version : str
        Version that wrote the session.
    """

    z_lens: float
    z_source: float
    cutout: InputFile = None
    models: tuple = ()
    cosmology: dict = dataclass_field(default_factory=lambda: {"name": "Planck18"})
    display: dict = dataclass_field(default_factory=lambda: dict(_DISPLAY_DEFAULT))
    candidates: tuple = ()
    lensview_version: str = dataclass_field(default_factory=_version)

    def candidate_table(self):
        """Candidates as a Table: ``ra``, ``dec`` (deg), ``label``, ``pair_id``."""
        return _candidate_result([c.ra for c in self.candidates], [c.dec for c in self.candidates],
                                 [c.label for c in self.candidates], [c.pair_id for c in self.candidates])

    def candidate_coords(self):
        """Candidates as a `~astropy.coordinates.SkyCoord` (ICRS)."""
        return SkyCoord([c.ra for c in self.candidates] * u.deg, [c.dec for c in self.candidates] * u.deg,
                        frame="icrs")

    def cosmology_object(self):
        """The session's astropy cosmology."""
        if "name" in self.cosmology:
            return _realisation(self.cosmology["name"])
        from astropy.cosmology import FlatLambdaCDM

        return FlatLambdaCDM(H0=self.cosmology["H0"], Om0=self.cosmology["Om0"],
                             Tcmb0=self.cosmology.get("Tcmb0", 0.0))

    def input_files(self):
        """(role, `InputFile`) for every input, the cutout first."""
        files = [("cutout", self.cutout)] if self.cutout is not None else []
        for model in self.models:
            for k, record in enumerate(model.files):
                files.append((f"model {model.name!r} file {k + 1}", record))
        return files

    def to_dict(self):
        """The JSON document of the session (plain types)."""
        return {
            "format": SESSION_FORMAT,
            "version": SESSION_VERSION,
            "lensview_version": self.lensview_version,
            "inputs": {
                "cutout": None if self.cutout is None else _file_dict(self.cutout),
                "models": [{"name": m.name, "files": [_file_dict(f) for f in m.files],
                            "units": m.units, "z_norm": m.z_norm} for m in self.models],
            },
            "z_lens": self.z_lens,
            "z_source": self.z_source,
            "cosmology": dict(self.cosmology),
            "display": {key: (list(value) if isinstance(value, tuple) else value)
                        for key, value in self.display.items()},
            "candidates": [{"label": c.label, "ra": c.ra, "dec": c.dec, "pair_id": c.pair_id}
                           for c in self.candidates],
        }

    @classmethod
    def from_dict(cls, document):
        """A validated Session from a session document (see `load_session`)."""
        return _session_from_document(document)


def _file_dict(record):
    return {"name": record.name, "sha256": record.sha256}


class _Checker:
    """Validation helpers that name the offending key in every message."""

    def fail(self, where, problem):
        raise LensviewInputError(
            f"Session file: {where} {problem}. Fix that entry or save the session again from lensview.")

    def mapping(self, value, where, required, optional=()):
        if not isinstance(value, dict):
            self.fail(where, f"must be a JSON object, got {_json_type(value)}")
        missing = [key for key in required if key not in value]
        if missing:
            self.fail(where, f"lacks the key(s) {', '.join(repr(k) for k in missing)}")
        unknown = [key for key in value if key not in required and key not in optional]
        if unknown:
            self.fail(where, f"has unknown key(s) {', '.join(repr(k) for k in unknown)}")
        return value

    def number(self, value, where, minimum=None, strict=False):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(where, f"must be a number, got {_json_type(value)} {value!r}")
        if not math.isfinite(value):
            self.fail(where, f"must be a finite number, got {value!r}")
        if minimum is not None and (value <= minimum if strict else value < minimum):
            self.fail(where, f"must be {'above' if strict else 'at least'} {minimum}, got {value!r}")
        return float(value)

    def text(self, value, where, choices=None):
        if not isinstance(value, str):
            self.fail(where, f"must be a string, got {_json_type(value)}")
        if choices is not None and value not in choices:
            self.fail(where, f"must be one of {', '.join(choices)}, got {value!r}")
        return value

    def integer(self, value, where):
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(where, f"must be a whole number, got {_json_type(value)} {value!r}")
        return value

    def array(self, value, where):
        if not isinstance(value, list):
            self.fail(where, f"must be a JSON array, got {_json_type(value)}")
        return value


def _json_type(value):
    if value is None:
        return "null"
    return {bool: "a boolean", int: "a number", float: "a number", str: "a string",
            list: "an array", dict: "an object"}.get(type(value), type(value).__name__)


def _session_from_document(document):
    check = _Checker()
    top_keys = ("format", "version", "inputs", "z_lens", "z_source", "cosmology", "display", "candidates")
    if not isinstance(document, dict):
        check.fail("the document", f"must be a JSON object, got {_json_type(document)}")
    if document.get("format") != SESSION_FORMAT:
        raise LensviewInputError(
            f"This is not a lensview session file (format {document.get('format')!r}, expected "
            f"{SESSION_FORMAT!r}); choose a file saved by lensview.")
    version = document.get("version")
    if isinstance(version, bool) or not isinstance(version, int):
        check.fail("'version'", f"must be a whole number, got {version!r}")
    if version > SESSION_VERSION:
        raise LensviewInputError(
            f"This session file has version {version}, newer than this lensview reads "
            f"({SESSION_VERSION}); upgrade lensview to open it.")
    if version < 1:
        check.fail("'version'", f"must be 1 or more, got {version}")
    check.mapping(document, "the document", top_keys, optional=("lensview_version",))

    inputs = check.mapping(document["inputs"], "'inputs'", ("cutout", "models"))
    cutout = None if inputs["cutout"] is None else _file_record(check, inputs["cutout"], "'inputs.cutout'")
    models = []
    for k, model in enumerate(check.array(inputs["models"], "'inputs.models'")):
        where = f"'inputs.models[{k}]'"
        check.mapping(model, where, ("name", "files", "units", "z_norm"))
        files = check.array(model["files"], f"{where}.files")
        if len(files) not in (1, 2):
            check.fail(f"{where}.files", f"must list one or two files, got {len(files)}")
        z_norm = model["z_norm"]
        if z_norm is not None:
            z_norm = check.number(z_norm, f"{where}.z_norm", 0, strict=True)
        models.append(ModelInputs(
            name=check.text(model["name"], f"{where}.name"),
            files=tuple(_file_record(check, f, f"{where}.files[{j}]") for j, f in enumerate(files)),
            units=check.text(model["units"], f"{where}.units", ("arcsec", "pixel")), z_norm=z_norm))

    z_lens = check.number(document["z_lens"], "'z_lens'", 0, strict=True)
    z_source = check.number(document["z_source"], "'z_source'", 0, strict=True)
    if z_source <= z_lens:
        check.fail("'z_source'", f"({z_source}) must exceed z_lens ({z_lens}); a source in front of "
                                 "the lens is not lensed")
    cosmology = _cosmology_record(check, document["cosmology"])
    display = _display_record(check, document["display"])
    candidates = []
    for k, item in enumerate(check.array(document["candidates"], "'candidates'")):
        where = f"'candidates[{k}]'"
        check.mapping(item, where, ("label", "ra", "dec"), optional=("pair_id",))
        dec = check.number(item["dec"], f"{where}.dec (degrees)")
        if abs(dec) > 90:
            check.fail(f"{where}.dec", f"must lie within +-90 degrees, got {dec}")
        pair_id = item.get("pair_id")
        pair_id = _NO_PAIR if pair_id is None else check.integer(pair_id, f"{where}.pair_id")
        candidates.append(Candidate(label=check.text(item["label"], f"{where}.label"),
                                    ra=check.number(item["ra"], f"{where}.ra (degrees)"), dec=dec,
                                    pair_id=pair_id))
    lensview_version = document.get("lensview_version", "unknown")
    return Session(z_lens=z_lens, z_source=z_source, cutout=cutout, models=tuple(models),
                   cosmology=cosmology, display=display, candidates=tuple(candidates),
                   lensview_version=check.text(lensview_version, "'lensview_version'"))


def _file_record(check, value, where):
    check.mapping(value, where, ("name", "sha256"))
    name = check.text(value["name"], f"{where}.name")
    digest = check.text(value["sha256"], f"{where}.sha256")
    if len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest.lower()):
        check.fail(f"{where}.sha256", "must be 64 hexadecimal digits (a SHA-256 checksum)")
    return InputFile(name, digest.lower())


def _cosmology_record(check, value):
    from astropy.cosmology import realizations

    if isinstance(value, dict) and "name" in value:
        check.mapping(value, "'cosmology'", ("name",))
        check.text(value["name"], "'cosmology.name'", realizations.available)
        return {"name": value["name"]}
    check.mapping(value, "'cosmology'", ("H0", "Om0"), optional=("Tcmb0",))
    record = {"H0": check.number(value["H0"], "'cosmology.H0' (km/s/Mpc)", 0, strict=True),
              "Om0": check.number(value["Om0"], "'cosmology.Om0'", 0)}
    if "Tcmb0" in value:
        record["Tcmb0"] = check.number(value["Tcmb0"], "'cosmology.Tcmb0' (K)", 0)
    return record


def _display_record(check, value):
    check.mapping(value, "'display'", ("stretch", "limits", "colormap"))
    limits = value["limits"]
    if isinstance(limits, str):
        check.text(limits, "'display.limits'", ("zscale", "minmax"))
    elif isinstance(limits, list):
        if len(limits) != 2:
            check.fail("'display.limits'", f"must hold two numbers [low, high], got {len(limits)} values")
        low = check.number(limits[0], "'display.limits[0]'")
        high = check.number(limits[1], "'display.limits[1]'")
        if not high > low:
            check.fail("'display.limits'", f"must have high > low, got [{low}, {high}]")
        limits = [low, high]
    else:
        limits = check.number(limits, "'display.limits' (percentile)", 0, strict=True)
        if limits > 100:
            check.fail("'display.limits'", f"as a percentile must be at most 100, got {limits}")
    return {"stretch": check.text(value["stretch"], "'display.stretch'", _STRETCHES), "limits": limits,
            "colormap": check.text(value["colormap"], "'display.colormap'")}


def _session_from_state(state):
    """A Session from a Session or a plain mapping of its fields (tables and objects allowed)."""
    if isinstance(state, Session):
        return _session_from_document(state.to_dict())
    if not hasattr(state, "keys"):
        raise LensviewInputError(f"save_session needs a Session or a mapping, got {type(state).__name__}.")
    state = dict(state)
    document = {"format": SESSION_FORMAT, "version": SESSION_VERSION, "lensview_version": _version()}
    cutout = state.get("cutout")
    models = state.get("models", ())
    document["inputs"] = {
        "cutout": None if cutout is None else _file_dict(_as_input_file(cutout)),
        "models": [_model_dict(model) for model in models]}
    for key in ("z_lens", "z_source"):
        if key not in state:
            raise LensviewInputError(f"The session lacks {key}; set it before saving.")
        document[key] = _plain(state[key])
    document["cosmology"] = _cosmology_to_record(state.get("cosmology"))
    display = dict(_DISPLAY_DEFAULT)
    display.update(state.get("display") or {})
    document["display"] = _plain(display)
    candidates = state.get("candidates")
    if isinstance(candidates, (SkyCoord, Table)):
        table = as_candidate_table(candidates)
        candidates = [{"label": str(row["label"]), "ra": float(row["ra"]), "dec": float(row["dec"]),
                       "pair_id": int(row["pair_id"])} for row in table]
    elif candidates is None:
        candidates = []
    else:
        candidates = [asdict(c) if isinstance(c, Candidate) else c for c in candidates]
    document["candidates"] = _plain(candidates)
    return _session_from_document(document)


def _as_input_file(value):
    if isinstance(value, InputFile):
        return value
    if isinstance(value, dict):
        return InputFile(str(value.get("name")), str(value.get("sha256")))
    raise LensviewInputError(
        f"Input files in a session are InputFile records (name and checksum), got "
        f"{type(value).__name__}; build them with InputFile.from_content(name, bytes_or_path).")


def _model_dict(model):
    if isinstance(model, ModelInputs):
        return {"name": model.name, "files": [_file_dict(_as_input_file(f)) for f in model.files],
                "units": model.units, "z_norm": model.z_norm}
    if isinstance(model, dict):
        out = dict(model)
        out["files"] = [_file_dict(_as_input_file(f)) for f in model.get("files", ())]
        out.setdefault("units", "arcsec")
        out.setdefault("z_norm", None)
        return _plain(out)
    raise LensviewInputError(f"Models in a session are ModelInputs records, got {type(model).__name__}.")


def _cosmology_to_record(cosmology):
    from astropy.cosmology import Cosmology, FlatLambdaCDM

    if cosmology is None:
        return {"name": "Planck18"}
    if isinstance(cosmology, dict):
        return _plain(cosmology)
    if isinstance(cosmology, str):
        return {"name": cosmology}
    if isinstance(cosmology, Cosmology):
        named = _realisation(cosmology.name)
        if named is not None and named == cosmology:
            return {"name": cosmology.name}
        record = {"H0": float(cosmology.H0.to_value(u.km / u.s / u.Mpc)), "Om0": float(cosmology.Om0),
                  "Tcmb0": float(cosmology.Tcmb0.to_value(u.K))}
        if FlatLambdaCDM(**record, name=cosmology.name) == cosmology:
            return record
    raise LensviewInputError(
        f"A session records an astropy realisation (e.g. Planck18) or a flat LCDM model "
        f"(H0, Om0, Tcmb0); {cosmology!r} is neither. Choose one of those.")


def save_session(path, session):
    """Write a session file (JSON) and return its text.

    Parameters
    ----------
    path : str, path-like or None
        Output file; None returns the text without writing.
    session : `Session` or mapping
        A Session, or a mapping with ``z_lens``, ``z_source`` and optional
        ``cutout`` (`InputFile`), ``models`` (`ModelInputs`), ``cosmology``
        (astropy realisation or flat LCDM, a name or a record), ``display``
        and ``candidates`` (Table, SkyCoord or `Candidate` records).

    Returns
    -------
    str
        The JSON document.
    """
    record = _session_from_state(session)
    text = json.dumps(record.to_dict(), indent=2, allow_nan=False) + "\n"
    if path is not None:
        _atomic_write(Path(path), lambda target: Path(target).write_text(text, encoding="utf-8"), True)
    return text


def load_session(path_or_text, available_files=None):
    """Read and validate a session file.

    Parameters
    ----------
    path_or_text : str, path-like or bytes
        A session file, or its JSON text.
    available_files : dict, optional
        File name -> bytes, path or file-like object of the files supplied
        now; when given, every input of the session must be present with the
        same checksum (see `check_session_files`).

    Returns
    -------
    `Session`

    Raises
    ------
    LensviewInputError
        For bad JSON, another format or a newer version, missing keys, wrong
        types, non-numeric coordinates, or missing/different input files.
        Nothing is modified on failure.
    """
    text = _session_text(path_or_text)
    try:
        document = json.loads(text)
    except json.JSONDecodeError as error:
        raise LensviewInputError(
            f"The session file is not valid JSON (line {error.lineno}, column {error.colno}: "
            f"{error.msg}); choose a file saved by lensview.") from error
    session = _session_from_document(document)
    if available_files is not None:
        problems = [status for status in check_session_files(session, available_files) if not status.ok]
        if problems:
            raise LensviewInputError(
                "The session cannot be restored: " + "; ".join(str(p) for p in problems)
                + ". Supply the same files the session was saved with.")
    return session


def _session_text(source):
    if isinstance(source, (bytes, bytearray)):
        data = bytes(source)
    elif isinstance(source, Path) or (isinstance(source, str) and os.path.isfile(source)):
        if not Path(source).is_file():
            raise LensviewInputError(f"There is no session file {str(source)!r}; check the path.")
        data = Path(source).read_bytes()
    elif isinstance(source, str):
        if not source.lstrip().startswith(("{", "[")) and "\n" not in source and len(source) < 4096:
            raise LensviewInputError(f"There is no session file {source!r}; check the path.")
        return source
    else:
        raise LensviewInputError(f"load_session needs a path or JSON text, got {type(source).__name__}.")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise LensviewInputError(
            "The session file is not UTF-8 text; choose a file saved by lensview.") from error


@dataclass(frozen=True)
class FileStatus:
    """Whether one input of a session was supplied unchanged.

    Attributes
    ----------
    role : str
        "cutout" or "model 'A' file 1", ...
    name : str
    status : str
        "ok", "missing" or "differs".
    expected_sha256, found_sha256 : str
        Checksums saved and found (None when missing).
    """

    role: str
    name: str
    status: str
    expected_sha256: str
    found_sha256: str = None

    @property
    def ok(self):
        return self.status == "ok"

    def __str__(self):
        if self.status == "missing":
            return f"the {self.role} {self.name!r} is missing"
        if self.status == "differs":
            return (f"the {self.role} {self.name!r} differs from the one saved (SHA-256 "
                    f"{self.found_sha256[:12]}... instead of {self.expected_sha256[:12]}...)")
        return f"the {self.role} {self.name!r} matches"


def check_session_files(session, supplied):
    """Compare the files supplied now with the inputs a session recorded.

    Parameters
    ----------
    session : `Session`
    supplied : dict
        File name -> bytes, path or file-like object. Keys are matched to the
        recorded names directly or by their base name.

    Returns
    -------
    list of `FileStatus`
        One entry per recorded input, cutout first.
    """
    by_name = {}
    for key, value in dict(supplied).items():
        by_name.setdefault(str(key), value)
        by_name.setdefault(Path(str(key)).name, value)
    statuses = []
    for role, record in session.input_files():
        if record.name not in by_name:
            statuses.append(FileStatus(role, record.name, "missing", record.sha256))
            continue
        found = _sha256(_content_of(by_name[record.name], role))
        statuses.append(FileStatus(role, record.name, "ok" if found == record.sha256 else "differs",
                                   record.sha256, found))
    return statuses
