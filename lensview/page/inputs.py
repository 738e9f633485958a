"""Sidebar panel "Field and models": what is loaded, at which redshifts, in which cosmology.

Heavy objects (cutouts, deflection fields with their cached derivative terms
and curves) are kept with ``st.cache_resource`` keyed by the SHA-256 of the
files' bytes, so a rerun, a new source redshift or a click reuses them. An
upload's bytes move out of its widget into the page's own store as soon as they
arrive (hashed once there), because Streamlit copies widget values on every
rerun.
Every `LensviewInputError` becomes a readable message; the page then keeps
showing the last field that loaded, and the marked knots are untouched.
"""

import hashlib
import io
import warnings
from dataclasses import dataclass, field as dataclass_field
from pathlib import Path

import streamlit as st

from ..lens.loading import FROM_HEADER, load_model
from ..checks import H0_RANGE, OM0_RANGE, flat_cosmology
from ..errors import LensviewInputError, MissingMassWarning

__all__ = ["Scene", "HeldFile", "inputs_panel", "demo_scene", "files_scene", "upload_slot",
           "held_files", "cosmology_from_choice", "upload_limit_mb"]

_SCENE = "lv_scene"
_FILES = "lv_files"
_MAX_MODELS = 8
_MAX_FILTERS = 6
PLANCK = "Planck18"
FLAT = "flat \u039bCDM (H0, \u03a9m)"

_UNIT_CHOICES = {"as the file says (BUNIT)": None, "arcsec": "arcsec", "pixel": "pixel"}
_KIND_CHOICES = {"as the file says (LENSMAP, else a deflection pair)": FROM_HEADER,
                 "deflection pair": "deflection", "convergence (\u03ba)": "convergence",
                 "potential (\u03c8, arcsec\u00b2)": "potential"}
_NORM_FROM_FILE = "as the file says (Z_NORM, else D_ls/D_s = 1)"
_NORM_UNIT = "D_ls/D_s = 1"
_NORM_REFERENCE = "made for a source redshift"


@dataclass
class Scene:
    """The inputs the page works on.

    Attributes
    ----------
    key : str
        Identity of the inputs (checksums and settings); changes whenever any
        of them changes.
    title : str
    cutout : `~lensview.io.fits.Cutout`
    fields : list of `~lensview.DeflectionField`
    z_lens : float
    cosmology : `~astropy.cosmology.Cosmology`
    cutout_file : `~lensview.io.InputFile` or None
        Name and checksum of the cutout (for session files).
    model_inputs : list of `~lensview.io.ModelInputs`
    files : dict
        File name -> bytes or path of every input, to check a session against.
    knots : `~astropy.table.Table` or None
        Knots that come with the inputs (the demo's).
    notes : list of str
        Cautions raised while the models were built (e.g. the mass missing
        outside a convergence map).
    z_source : float
        Suggested source redshift.
    filters : list of `~lensview.photometry.BandImage`
        The field in several filters, ready (the demo's).
    filter_files : list of `HeldFile`
        Cutouts of the same field in more filters (uploads), read with the
        user's band details by `lensview.page.nature.scene_filters`.
    """

    key: str
    title: str
    cutout: object
    fields: list
    z_lens: float
    cosmology: object
    cutout_file: object = None
    model_inputs: list = dataclass_field(default_factory=list)
    files: dict = dataclass_field(default_factory=dict)
    knots: object = None
    z_source: float = 2.0
    notes: list = dataclass_field(default_factory=list)
    filters: list = dataclass_field(default_factory=list)
    filter_files: list = dataclass_field(default_factory=list)


# ---------------------------------------------------------------------------- cached loaders
def _checksum(content):
    return hashlib.sha256(content).hexdigest()


def _named_bytes(name, content):
    buffer = io.BytesIO(content)
    buffer.name = name
    return buffer


@st.cache_resource(max_entries=4, show_spinner=False)
def _cached_cutout(sha256, name, _content):
    from ..io.fits import read_cutout

    return read_cutout(_named_bytes(name, _content))


@st.cache_resource(max_entries=16, show_spinner=False)
def _cached_field(checksums, names, units, z_lens, z_norm, cosmology_key, model_name, kind,
                  _contents):
    """The model and the cautions its construction raised (shown with it on every rerun)."""
    sources = [_named_bytes(n, c) for n, c in zip(names, _contents)]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", MissingMassWarning)
        field = load_model(*sources, units=units, z_lens=z_lens, z_norm=z_norm,
                           cosmology=cosmology_from_key(cosmology_key), name=model_name, kind=kind)
    return field, [str(w.message) for w in caught if issubclass(w.category, MissingMassWarning)]


@st.cache_resource(max_entries=2, show_spinner=False)
def _cached_demo(checksums):
    from ..demo import load_demo

    return load_demo()


@st.cache_resource(max_entries=2, show_spinner=False)
def _cached_demo_filters(checksums):
    from ..demo import load_demo_filters

    return load_demo_filters()


@st.cache_resource(max_entries=8, show_spinner=False)
def _cached_refit(demo_checksums, index, z_lens, cosmology_key):
    """A demo model again, for another lens redshift or cosmology."""
    from ..lens.field import DeflectionField

    _, fields, _ = _cached_demo(demo_checksums)
    original = fields[index]
    ax, ay = original.node_deflection(slice(None), slice(None))
    return DeflectionField(ax, ay, original.wcs, units="pixel", z_lens=z_lens,
                           z_norm=original.z_norm, cosmology=cosmology_from_key(cosmology_key),
                           name=original.name)


@st.cache_resource(show_spinner=False)
def _demo_files():
    """Name -> path of the demo scenario's files, and their checksums (read once per server)."""
    from ..demo import DEMO_DIRECTORY

    paths = sorted(p for p in Path(DEMO_DIRECTORY).glob("*") if p.is_file() and p.suffix != ".md")
    files = {p.name: p for p in paths}
    checksums = tuple((p.name, _checksum(p.read_bytes())) for p in paths)
    return files, checksums


def cosmology_key(choice, h0=70.0, om0=0.3):
    """A hashable record of the chosen cosmology (the cache key of the models)."""
    return (PLANCK,) if choice == PLANCK else (FLAT, float(h0), float(om0))


def cosmology_from_key(key):
    return cosmology_from_choice(*key)


def cosmology_from_choice(choice, h0=70.0, om0=0.3):
    """Planck18, or a flat LCDM cosmology with the given H0 (km/s/Mpc) and Om0."""
    if choice == PLANCK:
        from astropy.cosmology import Planck18

        return Planck18
    return flat_cosmology(h0, om0)


# ---------------------------------------------------------------------------- scenes
def demo_scene(z_lens=None, cosmology_choice=(PLANCK,)):
    """The bundled demo field (invented data), optionally at another z_lens or cosmology."""
    from .. import demo
    from ..io import InputFile, ModelInputs

    files, checksums = _demo_files()
    cutout, originals, knots = _cached_demo(checksums)
    z_lens = originals[0].z_lens if z_lens is None else float(z_lens)
    fields = list(originals)
    if z_lens != originals[0].z_lens or cosmology_choice != (PLANCK,):
        fields = [_cached_refit(checksums, k, z_lens, cosmology_choice)
                  for k in range(len(originals))]
    by_name = dict(checksums)
    cutout_name = Path(cutout.path).name
    # The session records the files as they are on disk, with their own units and normalisation.
    model_inputs = [ModelInputs(f.name, tuple(InputFile(n, by_name[n]) for n in by_name
                                              if _demo_file_of_model(n, f.name)),
                                f.units, f.z_norm) for f in originals]
    key = "demo|" + "|".join(s for _, s in checksums) + f"|{z_lens}|{cosmology_choice}"
    return Scene(key=key, title=f"{demo.CLUSTER_NAME} \u2014 invented demo field",
                 cutout=cutout, fields=fields, z_lens=z_lens, cosmology=fields[0].cosmology,
                 cutout_file=InputFile(cutout_name, by_name[cutout_name]),
                 model_inputs=model_inputs, files=files, knots=knots,
                 z_source=float(demo.Z_SOURCE), filters=list(_cached_demo_filters(checksums)))


def _demo_file_of_model(file_name, model_name):
    stem = file_name.lower()
    return stem.endswith((".fits", ".fits.gz")) and model_name.lower().replace(" ", "_") in stem


@dataclass(frozen=True)
class HeldFile:
    """An uploaded file kept by the page: name, bytes and SHA-256."""

    name: str
    content: bytes
    sha256: str

    @classmethod
    def of(cls, name, content):
        return cls(str(name), bytes(content), _checksum(content))


def held_files(state, slot):
    """The files held for an upload slot ("cutout", "model_0", ...)."""
    return list(state.setdefault(_FILES, {}).get(slot, []))


def _take_upload(state, slot, key, keep):
    """Callback: move what an uploader holds into the page's own store, then reset it.

    Streamlit copies a widget's value on every rerun; a 4096 x 4096 model
    left in its uploader would be copied (hundreds of MB) at every click.
    The page keeps the bytes (hashed once, here) and gives the slot a fresh,
    empty uploader.
    """
    value = state.get(key)
    uploads = value if isinstance(value, list) else ([value] if value is not None else [])
    limit = upload_limit_mb()
    too_big = [up.name for up in uploads if getattr(up, "size", 0) > limit * 1024 * 1024]
    state.setdefault("lv_upload_errors", {}).pop(slot, None)
    if too_big:
        # Checked before any byte is read as FITS: the server enforces the same limit.
        state["lv_upload_errors"][slot] = (
            f"{', '.join(too_big)} is larger than the upload limit of {limit} MB per file; "
            "nothing was read. Crop or bin the file, or use the command line, which reads "
            "files of any size from disk (memory-mapped).")
        uploads = []
    if uploads:
        new = [HeldFile.of(up.name, up.getvalue()) for up in uploads]
        state.setdefault(_FILES, {})[slot] = (held_files(state, slot) + new)[-keep:]
    state[f"lv_upload_version_{slot}"] = state.get(f"lv_upload_version_{slot}", 0) + 1


def upload_limit_mb():
    """The largest upload the page accepts, in MB (``server.maxUploadSize``, .streamlit/config.toml)."""
    return int(st.get_option("server.maxUploadSize"))


def _drop_upload(state, slot):
    state.setdefault(_FILES, {}).pop(slot, None)


def upload_slot(state, label, slot, *, keep=1, help=None):
    """An uploader whose files the page holds (see `_take_upload`); returns the held files."""
    version = state.get(f"lv_upload_version_{slot}", 0)
    key = f"lv_up_{slot}_{version}"
    limit = f"Up to {upload_limit_mb()} MB per file."
    st.file_uploader(label, key=key, accept_multiple_files=keep > 1,
                     help=f"{help} {limit}" if help else limit,
                     on_change=_take_upload, args=(state, slot, key, keep))
    error = state.get("lv_upload_errors", {}).get(slot)
    if error:
        st.error(error)
    held = held_files(state, slot)
    if held:
        sizes = ", ".join(f"{h.name} ({len(h.content) / 1e6:.1f} MB)" for h in held)
        st.caption(f"Loaded: {sizes}")
        st.button("Remove " + ("these files" if len(held) > 1 else "this file"),
                  key=f"lv_drop_{slot}", on_click=_drop_upload, args=(state, slot))
    return held


def files_scene(cutout_files, model_specs, z_lens, cosmology_choice, filter_files=()):
    """A scene from uploaded files.

    Parameters
    ----------
    cutout_files : list of `HeldFile`
        The cutout (one file).
    model_specs : list of dict
        ``name``, ``files`` (one or two `HeldFile`), ``units``, ``z_norm``.
    z_lens : float
    cosmology_choice : tuple
        `cosmology_key` of the chosen cosmology.
    filter_files : list of `HeldFile`
        Cutouts of the same field in more filters.

    Raises
    ------
    LensviewInputError
        For any unusable file or setting.
    """
    from ..io import InputFile, ModelInputs

    if not cutout_files:
        raise LensviewInputError("No image cutout is loaded; upload a FITS cutout first.")
    image = cutout_files[-1]
    cutout = _cached_cutout(image.sha256, image.name, image.content)
    files = {image.name: image.content}
    fields, model_inputs, notes = [], [], []
    names_seen = set()
    for k, spec in enumerate(model_specs):
        held = spec["files"]
        if not held:
            raise LensviewInputError(
                f"Model {k + 1} has no file; upload one file (two image HDUs or a two-plane cube) "
                "or two files (x then y), or lower the number of models.")
        name = spec["name"].strip() or f"model {k + 1}"
        if name in names_seen:
            raise LensviewInputError(
                f"Two models are named {name!r}; give each model its own name.")
        names_seen.add(name)
        checksums = tuple(h.sha256 for h in held)
        names = tuple(h.name for h in held)
        field, cautions = _cached_field(checksums, names, spec["units"], float(z_lens),
                                        spec["z_norm"], cosmology_choice, name,
                                        spec.get("kind", FROM_HEADER),
                                        tuple(h.content for h in held))
        fields.append(field)
        notes.extend(cautions)
        # The session records what the files turned out to hold.
        model_inputs.append(ModelInputs(name, tuple(InputFile(h.name, h.sha256) for h in held),
                                        field.units, field.z_norm, field.map_kind))
        files.update({h.name: h.content for h in held})
    if not fields:
        raise LensviewInputError("No lens model is loaded; upload at least one deflection model.")
    for field in fields:
        field.require_overlap(cutout.wcs, cutout.data.shape)
    key = "files|" + image.sha256 + "|" + "|".join(
        f"{m.name}:{','.join(f.sha256 for f in m.files)}:{m.units}:{m.z_norm}" for m in model_inputs
    ) + f"|{float(z_lens)}|{cosmology_choice}|" + ",".join(str(s.get("kind")) for s in model_specs)
    filter_files = list(filter_files)
    if filter_files:
        key += "|filters:" + ",".join(h.sha256 for h in filter_files)
    return Scene(key=key, title=f"{image.name} with {len(fields)} model(s)", cutout=cutout,
                 fields=fields, z_lens=float(z_lens), cosmology=fields[0].cosmology,
                 cutout_file=InputFile(image.name, image.sha256), model_inputs=model_inputs,
                 files=files, notes=notes, filter_files=[image] + filter_files)


# ---------------------------------------------------------------------------- the panel
def inputs_panel(state):
    """Draw the sidebar inputs and return (scene, errors).

    ``scene`` is the field to show: the one just loaded, or the last one that
    loaded when the current inputs fail; ``errors`` lists the messages.
    """
    sidebar = st.sidebar
    sidebar.subheader("Field and models")
    source = sidebar.radio("Work on", ["Demo field", "My files"], key="lv_source",
                           horizontal=True,
                           help="The demo is an invented cluster field with three lens models.")
    sidebar.subheader("Lens and cosmology")
    choice = sidebar.radio("Cosmology", [PLANCK, FLAT], key="lv_cosmology", horizontal=True)
    h0, om0 = 70.0, 0.3
    if choice == FLAT:
        left, right = sidebar.columns(2)
        h0 = left.number_input("H0 (km/s/Mpc)", *H0_RANGE, 70.0, 0.5, key="lv_h0")
        om0 = right.number_input("\u03a9m", 0.01, OM0_RANGE[1], 0.3, 0.01, key="lv_om0")
    errors = []
    try:
        key = cosmology_key(choice, h0, om0)
        cosmology_from_key(key)
    except LensviewInputError as error:
        errors.append(str(error))
        key = (PLANCK,)

    scene = None
    try:
        if source == "Demo field":
            default_z_lens = demo_scene(None, (PLANCK,)).z_lens
            z_lens = sidebar.number_input("Lens redshift", 0.01, 5.0, float(default_z_lens), 0.01,
                                          format="%.3f", key="lv_z_lens_demo")
            with st.spinner("Loading the demo field..."):
                scene = demo_scene(z_lens, key)
        else:
            z_lens = sidebar.number_input("Lens redshift", 0.01, 5.0, 0.4, 0.01, format="%.3f",
                                          key="lv_z_lens_files")
            with sidebar:
                cutout_files, specs = _file_widgets(state)
                filter_files = upload_slot(
                    state, "More filters of the same field (FITS)", "filters", keep=_MAX_FILTERS,
                    help="Cutouts in other filters, each with its own WCS; name, pivot "
                         "wavelength, PSF and zero point come from the headers or from the "
                         "'Colours and nature' tab.")
            with st.spinner("Reading the files and preparing the models..."):
                scene = files_scene(cutout_files, specs, z_lens, key, filter_files)
    except LensviewInputError as error:
        errors.append(str(error))
    except (OSError, ValueError) as error:
        # Not foreseen by the readers; still a message, never a traceback.
        errors.append(f"These files could not be read: {error}. Check that they are the FITS "
                      "cutout and deflection maps you meant.")
    if scene is not None:
        state[_SCENE] = scene
        for note in scene.notes:
            sidebar.warning(note)
    return state.get(_SCENE), errors


def _default_model_name(held):
    """The common stem of a model's file names (``m_x.fits``, ``m_y.fits`` -> ``m``)."""
    import os

    stems = [Path(h.name).name.split(".")[0] for h in held]
    if not stems:
        return ""
    return os.path.commonprefix(stems).rstrip("_-. ") or stems[0]


def _file_widgets(state):
    cutout_files = upload_slot(state, "Image cutout (FITS)", "cutout",
                               help="A 2-D image with a celestial WCS; the first such HDU is used.")
    count = int(st.number_input("Number of lens models", 1, _MAX_MODELS, 1, 1, key="lv_n_models"))
    specs = []
    for k in range(count):
        with st.expander(f"Lens model {k + 1}", expanded=k == 0):
            held = upload_slot(state, "Deflection maps", f"model_{k}", keep=2,
                               help="One FITS file with two image HDUs or a two-plane cube, or "
                                    "two files (x component, then y); or one convergence or "
                                    "potential map (see 'Map holds').")
            held = sorted(held, key=lambda h: h.name)
            if len(held) == 2 and st.checkbox(f"x map: {held[0].name} \u2014 swap x and y",
                                              key=f"lv_swap_{k}"):
                held = held[::-1]
            default_name = _default_model_name(held) or f"model {k + 1}"
            name = st.text_input("Name", value=default_name, key=f"lv_name_{k}_{default_name}")
            kind = _KIND_CHOICES[st.selectbox(
                "Map holds", list(_KIND_CHOICES), key=f"lv_kind_{k}",
                help="A convergence map is turned into deflections by FFT (the mass outside the "
                     "map is missing, so curves near its edge are the least trustworthy); a "
                     "potential map by its gradient, and it also gives time delays directly.")]
            units = _UNIT_CHOICES[st.selectbox(
                "Deflection units", list(_UNIT_CHOICES), key=f"lv_units_{k}",
                help="What the map values count: arcsec on the sky, or pixels of the map's own "
                     "grid (not the cutout's). 'As the file says' reads the BUNIT keyword.")]
            norm = st.radio(
                "Normalisation", [_NORM_FROM_FILE, _NORM_UNIT, _NORM_REFERENCE], key=f"lv_norm_{k}",
                help="For which source the maps were made: D_ls/D_s = 1 (rescaled to any source "
                     "redshift), or the deflections of a source at a given redshift (Z_NORM). "
                     "lensview rescales them to the source redshift chosen above.")
            z_norm = FROM_HEADER if norm == _NORM_FROM_FILE else None
            if norm == _NORM_REFERENCE:
                z_norm = float(st.number_input("Reference source redshift", 0.02, 20.0, 2.0, 0.01,
                                               key=f"lv_znorm_{k}"))
        specs.append(dict(name=name, files=held, units=units, z_norm=z_norm, kind=kind))
    return cutout_files, specs
