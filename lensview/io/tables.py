"""Measurement tables: ECSV (units and metadata), CSV (values only) and
VOTable (units, and metadata as JSON in ``INFO`` elements)."""

import io
import json
from pathlib import Path

import astropy.units as u
from astropy.table import Table

from ..errors import LensviewInputError
from .files import (FORMAT_NAMES, TABLE_FORMATS, atomic_write, first_line, lensview_version,
                    plain_json, read_source)

__all__ = ["write_table", "read_table"]

def parse_table(name, content, kind):
    import warnings

    label = Path(name).name
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if kind == "votable":
                return read_votable(io.BytesIO(content))
            text = content.decode("utf-8-sig")
            return Table.read(text.splitlines(), format="ascii.ecsv" if kind == "ecsv" else "ascii.csv")
    except UnicodeDecodeError as error:
        raise LensviewInputError(f"{label!r} is not a text file; save it as UTF-8 {kind.upper()}.") from error
    except LensviewInputError:
        raise
    except Exception as error:  # the readers raise many types for malformed files
        raise LensviewInputError(
            f"{label!r} could not be read as {'VOTable' if kind == 'votable' else kind.upper()}: "
            f"{first_line(error)}. Check the file, or save it again from the program that made it."
        ) from error


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
    write_table_file(out, path, kind, overwrite)
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
    name, content = read_source(path)
    return parse_table(name, content, _table_format(Path(name), format))


def _table_format(path, format):
    if format is not None:
        kind = FORMAT_NAMES.get(str(format).lower())
        if kind is None:
            raise LensviewInputError(f"Unknown table format {format!r}; use 'ecsv', 'csv' or 'votable'.")
        return kind
    kind = TABLE_FORMATS.get(path.suffix.lower())
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
    resolved = given if isinstance(given, Cosmology) else realisation_of(given)
    if resolved is not None:
        out["cosmology"] = resolved.name
        out["cosmology_parameters"] = _cosmology_parameters(resolved)
    out["lensview_version"] = lensview_version()
    return out


def realisation_of(name):
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
        params[key] = plain_json(value)
    return params


def write_table_file(table, path, kind, overwrite):
    def write(target):
        if kind == "votable":
            _write_votable(table, target)
        else:
            out = table
            if kind == "ecsv":
                out = table.copy(copy_data=False)
                out.meta = plain_json(dict(table.meta))
            out.write(target, format="ascii.ecsv" if kind == "ecsv" else "ascii.csv", overwrite=True)

    atomic_write(path, write, overwrite)


def _write_votable(table, target):
    from astropy.io.votable import from_table
    from astropy.io.votable.tree import Info

    plain = table.copy(copy_data=False)
    plain.meta = {}
    votable = from_table(plain)
    resource_table = votable.get_first_table()
    for k, (key, value) in enumerate(table.meta.items()):
        resource_table.infos.append(Info(ID=f"lensview_meta_{k}", name=str(key),
                                         value=json.dumps(plain_json(value))))
    votable.to_xml(target)


def read_votable(stream):
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


