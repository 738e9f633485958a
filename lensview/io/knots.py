"""Knot lists as tables: the one in-memory form every reader and writer shares."""

import math

import numpy as np
import astropy.units as u
from astropy.coordinates import Angle, SkyCoord
from astropy.table import Table

from ..errors import LensviewInputError

__all__ = ["as_candidate_table", "NO_PAIR"]

NO_PAIR = -1

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
        return candidate_result(coords.ra.deg, coords.dec.deg, None, None)
    if isinstance(candidates, Table):
        missing = [name for name in ("ra", "dec") if name not in candidates.colnames]
        if missing:
            raise LensviewInputError(
                f"The candidate table has no {' or '.join(missing)} column (it has "
                f"{', '.join(candidates.colnames) or 'no columns'}); give ra and dec in degrees.")
        ra = coordinate_column(candidates["ra"], "ra", u.hourangle, "the candidate table")
        dec = coordinate_column(candidates["dec"], "dec", u.deg, "the candidate table")
        labels = list(candidates["label"]) if "label" in candidates.colnames else None
        pairs = list(candidates["pair_id"]) if "pair_id" in candidates.colnames else None
        return candidate_result(ra, dec, labels, pairs)
    raise LensviewInputError(
        f"Candidates must be a SkyCoord or a Table with ra and dec columns, got "
        f"{type(candidates).__name__}.")


def candidate_result(ra, dec, labels, pair_ids):
    ra = np.asarray(ra, dtype=float)
    dec = np.asarray(dec, dtype=float)
    bad = np.flatnonzero(~(np.isfinite(ra) & np.isfinite(dec)))
    if bad.size:
        raise LensviewInputError(
            f"Candidate row(s) {row_list(bad)} have no finite position; give numbers in degrees "
            "or remove those rows.")
    outside = np.flatnonzero(np.abs(dec) > 90)
    if outside.size:
        raise LensviewInputError(
            f"Candidate row(s) {row_list(outside)} have a declination beyond +-90 deg; check that "
            "RA and Dec are not swapped and that the unit is degrees.")
    n = len(ra)
    defaults = [f"K{i + 1}" for i in range(n)]
    if labels is None:
        labels = defaults
    else:
        labels = [label_text(value) or default for value, default in zip(labels, defaults)]
    if pair_ids is None:
        pair_ids = np.full(n, NO_PAIR, dtype=np.int64)
    else:
        pair_ids = np.array([_pair_value(value, i) for i, value in enumerate(pair_ids)], dtype=np.int64)
    table = Table()
    table["ra"] = np.mod(ra, 360.0) * u.deg
    table["dec"] = dec * u.deg
    table["label"] = np.array(labels, dtype=str) if n else np.zeros(0, dtype="U1")
    table["pair_id"] = pair_ids
    return table


def label_text(value):
    if value is None or value is np.ma.masked:
        return ""
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    return str(value).strip()


def _pair_value(value, row):
    if value is None or value is np.ma.masked:
        return NO_PAIR
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not math.isfinite(number) or number != int(number):
        if isinstance(value, str) and not value.strip():
            return NO_PAIR
        raise LensviewInputError(
            f"Candidate row {row + 1}: pair_id {value!r} is not a whole number; use integers "
            "(-1 for no pair) or leave it empty.")
    return int(number)


def row_list(indices, limit=8):
    shown = ", ".join(str(i + 1) for i in indices[:limit])
    return shown + (f" and {len(indices) - limit} more" if len(indices) > limit else "")


def coordinate_column(column, name, text_unit, label):
    """Degrees from a numeric column (with its unit) or from text, sexagesimal or decimal."""
    masked = np.ma.getmaskarray(column) if hasattr(column, "mask") else np.zeros(len(column), bool)
    if masked.any():
        raise LensviewInputError(
            f"{label!r}: column {name} is empty in row(s) {row_list(np.flatnonzero(masked))}; fill in "
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
        text = label_text(item)
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
        example = label_text(column[bad[0]])
        raise LensviewInputError(
            f"{label!r}: column {name} is not a number or a sexagesimal angle in row(s) "
            f"{row_list(np.array(bad))} (e.g. {example!r}); give degrees or h:m:s / d:m:s.")
    return values
