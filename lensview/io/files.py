"""File suffixes, atomic writes, reading a path or uploaded bytes, and plain JSON values."""

import math
import os
import tempfile
from pathlib import Path

import numpy as np
import astropy.units as u

from ..errors import LensviewInputError

__all__ = ["FITS_SUFFIXES", "VOTABLE_SUFFIXES", "TABLE_FORMATS", "atomic_write", "read_source", "plain_json"]

FITS_SUFFIXES = (".fits", ".fit", ".fts")
VOTABLE_SUFFIXES = (".vot", ".votable", ".xml")
TABLE_FORMATS = {".ecsv": "ecsv", ".csv": "csv", **{s: "votable" for s in VOTABLE_SUFFIXES}}
FORMAT_NAMES = {"ecsv": "ecsv", "ascii.ecsv": "ecsv", "csv": "csv", "ascii.csv": "csv",
                 "votable": "votable", "vot": "votable"}
def lensview_version():
    from .. import __version__

    return __version__


def atomic_write(path, writer, overwrite):
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


def read_source(source):
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


def first_line(error):
    text = str(error).strip().splitlines()
    return text[0] if text else type(error).__name__


def plain_json(value):
    """JSON-ready version of a metadata value."""
    if isinstance(value, u.Quantity):
        return {"value": plain_json(value.value), "unit": value.unit.to_string()}
    if isinstance(value, np.ndarray):
        return [plain_json(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, dict):
        return {str(k): plain_json(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain_json(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    return str(value)


