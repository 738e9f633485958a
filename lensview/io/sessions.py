"""Session files: a versioned JSON document (never pickle) with the inputs'
file names and SHA-256 checksums, redshifts, cosmology, display settings and
knots; see `Session`, `save_session`, `load_session`, `check_session_files`."""

import hashlib
import json
import math
import os
from dataclasses import asdict, dataclass, field as dataclass_field
from pathlib import Path

import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table

from ..errors import LensviewInputError
from .files import atomic_write, lensview_version, plain_json
from .knots import NO_PAIR, as_candidate_table, candidate_result
from .tables import realisation_of

#: What a model's files may hold (the LENSMAP kinds that make a model).
MODEL_KINDS = ("deflection", "convergence", "potential")
__all__ = ["InputFile", "ModelInputs", "Candidate", "Session", "FileStatus", "save_session", "load_session", "check_session_files", "SESSION_FORMAT", "SESSION_VERSION"]


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
    kind : str
        What the files hold: "deflection", "convergence" or "potential"
        (sessions written before this field existed read as "deflection").
    """

    name: str
    files: tuple
    units: str = "arcsec"
    z_norm: float = None
    kind: str = "deflection"


@dataclass(frozen=True)
class Candidate:
    """A marked candidate: label, ICRS position in degrees, pair id (-1: none)."""

    label: str
    ra: float
    dec: float
    pair_id: int = NO_PAIR


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
    lensview_version: str = dataclass_field(default_factory=lensview_version)

    def candidate_table(self):
        """Candidates as a Table: ``ra``, ``dec`` (deg), ``label``, ``pair_id``."""
        return candidate_result([c.ra for c in self.candidates], [c.dec for c in self.candidates],
                                 [c.label for c in self.candidates], [c.pair_id for c in self.candidates])

    def candidate_coords(self):
        """Candidates as a `~astropy.coordinates.SkyCoord` (ICRS)."""
        return SkyCoord([c.ra for c in self.candidates] * u.deg, [c.dec for c in self.candidates] * u.deg,
                        frame="icrs")

    def cosmology_object(self):
        """The session's astropy cosmology."""
        if "name" in self.cosmology:
            return realisation_of(self.cosmology["name"])
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
                            "units": m.units, "z_norm": m.z_norm, "kind": m.kind}
                           for m in self.models],
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
        check.mapping(model, where, ("name", "files", "units", "z_norm"), optional=("kind",))
        files = check.array(model["files"], f"{where}.files")
        if len(files) not in (1, 2):
            check.fail(f"{where}.files", f"must list one or two files, got {len(files)}")
        z_norm = model["z_norm"]
        if z_norm is not None:
            z_norm = check.number(z_norm, f"{where}.z_norm", 0, strict=True)
        models.append(ModelInputs(
            name=check.text(model["name"], f"{where}.name"),
            files=tuple(_file_record(check, f, f"{where}.files[{j}]") for j, f in enumerate(files)),
            units=check.text(model["units"], f"{where}.units", ("arcsec", "pixel")), z_norm=z_norm,
            kind=check.text(model.get("kind", "deflection"), f"{where}.kind", MODEL_KINDS)))

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
        pair_id = NO_PAIR if pair_id is None else check.integer(pair_id, f"{where}.pair_id")
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
    document = {"format": SESSION_FORMAT, "version": SESSION_VERSION, "lensview_version": lensview_version()}
    cutout = state.get("cutout")
    models = state.get("models", ())
    document["inputs"] = {
        "cutout": None if cutout is None else _file_dict(_as_input_file(cutout)),
        "models": [_model_dict(model) for model in models]}
    for key in ("z_lens", "z_source"):
        if key not in state:
            raise LensviewInputError(f"The session lacks {key}; set it before saving.")
        document[key] = plain_json(state[key])
    document["cosmology"] = _cosmology_to_record(state.get("cosmology"))
    display = dict(_DISPLAY_DEFAULT)
    display.update(state.get("display") or {})
    document["display"] = plain_json(display)
    candidates = state.get("candidates")
    if isinstance(candidates, (SkyCoord, Table)):
        table = as_candidate_table(candidates)
        candidates = [{"label": str(row["label"]), "ra": float(row["ra"]), "dec": float(row["dec"]),
                       "pair_id": int(row["pair_id"])} for row in table]
    elif candidates is None:
        candidates = []
    else:
        candidates = [asdict(c) if isinstance(c, Candidate) else c for c in candidates]
    document["candidates"] = plain_json(candidates)
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
                "units": model.units, "z_norm": model.z_norm, "kind": model.kind}
    if isinstance(model, dict):
        out = dict(model)
        out["files"] = [_file_dict(_as_input_file(f)) for f in model.get("files", ())]
        out.setdefault("units", "arcsec")
        out.setdefault("z_norm", None)
        out.setdefault("kind", "deflection")
        return plain_json(out)
    raise LensviewInputError(f"Models in a session are ModelInputs records, got {type(model).__name__}.")


def _cosmology_to_record(cosmology):
    from astropy.cosmology import Cosmology, FlatLambdaCDM

    if cosmology is None:
        return {"name": "Planck18"}
    if isinstance(cosmology, dict):
        return plain_json(cosmology)
    if isinstance(cosmology, str):
        return {"name": cosmology}
    if isinstance(cosmology, Cosmology):
        named = realisation_of(cosmology.name)
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
        atomic_write(Path(path), lambda target: Path(target).write_text(text, encoding="utf-8"), True)
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
