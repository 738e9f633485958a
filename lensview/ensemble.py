"""Many realisations of one lens model, measured on dask, summarised per knot.

Lens modellers publish sets of deflection maps drawn from their posterior, not
just a best fit; near a critical curve the honest answer for a knot is the
distribution across them. `measure_ensemble` measures every knot on every
realisation and summarises the distribution per knot.

Each realisation is loaded, measured and released inside its own dask task,
so memory does not grow with the number of realisations: only the small
per-realisation tables travel back. numpy releases the GIL, so the default
threaded scheduler keeps every core busy; the same graph runs on a
dask.distributed cluster when ``scheduler`` is a ``Client`` or an address.

Realisations on disk (a folder, a glob pattern, or file paths) are grouped
into models by file name (`group_model_files`):

- a pair of files whose names differ only in a component suffix, such as
  ``r07_alpha_x.fits`` / ``r07_alpha_y.fits``, ``r07_x.fits`` / ``r07_y.fits``
  or ``r07-defx.fits`` / ``r07-defy.fits``, is one realisation (x then y);
- every other file is one realisation on its own, holding two image HDUs or
  a two-plane cube.

Each is read by `lensview.load_model`, so BUNIT and Z_NORM are honoured
unless ``units`` / ``z_norm`` say otherwise.
"""

import glob
import io
import os
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import dask
import numpy as np
import astropy.units as u
from astropy.coordinates import angular_separation
from astropy.table import Table, vstack

from .lens.loading import FROM_HEADER, load_model
from .errors import LensviewInputError
from .measure import measure_candidates

__all__ = ["measure_ensemble", "summarize_ensemble", "find_realisations", "group_model_files",
           "RealisationFiles", "BrokenRealisationWarning", "DEFAULT_PERCENTILES"]

#: Median, the central 68 % and the central 95 % intervals.
DEFAULT_PERCENTILES = (2.5, 16.0, 50.0, 84.0, 97.5)

#: Suffixes of FITS files looked for in a folder.
FITS_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz")

# Quantities summarised by percentiles, with their units.
_SUMMARISED = {"offset_arcsec": u.arcsec, "abs_mu": None, "mu": None, "caustic_offset_pc": u.pc}

# Component suffixes of x maps and the matching y suffix (case-insensitive).
_COMPONENT_PAIRS = {"alpha_x": "alpha_y", "alphax": "alphay", "alpha1": "alpha2",
                    "defl_x": "defl_y", "deflx": "defly", "defx": "defy", "def_x": "def_y",
                    "ax": "ay", "x": "y"}
_COMPONENT = re.compile(
    r"^(?P<stem>.+?)[_\-.](?P<component>" + "|".join(
        sorted(set(_COMPONENT_PAIRS) | set(_COMPONENT_PAIRS.values()), key=len, reverse=True))
    + r")$", re.IGNORECASE)
_Y_OF = {x: y for x, y in _COMPONENT_PAIRS.items()}


class BrokenRealisationWarning(UserWarning):
    """Some realisations could not be read; the others were measured."""


# ---------------------------------------------------------------------------- realisations on disk
@dataclass(frozen=True)
class RealisationFiles:
    """A loader of one realisation stored in one or two FITS files.

    Calling it reads the maps (with `lensview.load_model`) and returns a
    `~lensview.DeflectionField`; it holds only file names (or, for uploads,
    the files' bytes), so it is cheap to send to a dask worker.

    Attributes
    ----------
    name : str
        Realisation name (the common file stem).
    files : tuple
        One or two paths, or ``(file name, bytes)`` pairs.
    z_lens : float
    units, z_norm, cosmology
        As for `lensview.load_model`.
    """

    name: str
    files: tuple
    z_lens: float
    units: str = None
    z_norm: object = FROM_HEADER
    cosmology: object = None

    @property
    def file_names(self):
        return [f[0] if isinstance(f, tuple) else os.fspath(f) for f in self.files]

    def __call__(self):
        sources = []
        for item in self.files:
            if isinstance(item, tuple):
                buffer = io.BytesIO(item[1])
                buffer.name = item[0]
                sources.append(buffer)
            else:
                sources.append(item)
        return load_model(*sources, z_lens=self.z_lens, units=self.units, z_norm=self.z_norm,
                          cosmology=self.cosmology, name=self.name)


def _fits_stem(name):
    base = Path(name).name
    for suffix in sorted(FITS_SUFFIXES, key=len, reverse=True):
        if base.lower().endswith(suffix):
            return base[: -len(suffix)]
    return Path(base).stem


def group_model_files(names):
    """Group file names into realisations.

    Parameters
    ----------
    names : sequence of str
        File names or paths.

    Returns
    -------
    list of (str, tuple)
        ``(realisation name, (x file, y file))`` for component pairs and
        ``(name, (file,))`` for single files, sorted by name. A file with a
        component suffix but no partner stays on its own (and fails to load
        with a message naming it if it holds a single map).
    """
    by_stem, singles = {}, []
    for name in names:
        stem = _fits_stem(name)
        match = _COMPONENT.match(stem)
        if match:
            key = (str(Path(name).parent), match["stem"])
            by_stem.setdefault(key, {})[match["component"].lower()] = name
        else:
            singles.append((stem, (name,)))
    groups = list(singles)
    for (_, stem), parts in by_stem.items():
        paired = set()
        for x_part, y_part in _Y_OF.items():
            if x_part in parts and y_part in parts:
                groups.append((stem, (parts[x_part], parts[y_part])))
                paired |= {x_part, y_part}
        groups += [(_fits_stem(parts[c]), (parts[c],)) for c in parts if c not in paired]
    return sorted(groups, key=lambda group: (group[0], group[1]))


def _expand(pattern):
    """File paths named by a folder, a glob pattern or a file path."""
    text = os.fspath(pattern)
    if os.path.isdir(text):
        found = sorted(str(p) for p in Path(text).iterdir()
                       if p.is_file() and p.name.lower().endswith(FITS_SUFFIXES))
        if not found:
            raise LensviewInputError(
                f"The folder {text} holds no FITS files ({', '.join(FITS_SUFFIXES)}); point at the "
                "folder that holds the realisations' deflection maps.")
        return found
    if glob.has_magic(text):
        found = sorted(p for p in glob.glob(text) if os.path.isfile(p))
        if not found:
            raise LensviewInputError(
                f"No file matches {text}; check the pattern (relative paths start at {os.getcwd()}).")
        return found
    if not os.path.exists(text):
        raise LensviewInputError(f"There is no file or folder {text}; check the path.")
    return [text]


def find_realisations(sources, *, z_lens, units=None, z_norm=FROM_HEADER, cosmology=None):
    """Loaders of the realisations in folders, glob patterns or files.

    Parameters
    ----------
    sources : str, path-like or sequence of them
        Folders (every FITS file inside), glob patterns or file paths.
    z_lens : float
    units, z_norm, cosmology
        As for `lensview.load_model` (default: the files' BUNIT and Z_NORM).

    Returns
    -------
    list of `RealisationFiles`
        Grouped by `group_model_files`.

    Raises
    ------
    LensviewInputError
        A folder without FITS files, a pattern matching nothing, a missing path.
    """
    if isinstance(sources, (str, os.PathLike)):
        sources = [sources]
    paths = []
    for source in sources:
        paths += [p for p in _expand(source) if p not in paths]
    return [RealisationFiles(name, files, z_lens=z_lens, units=units, z_norm=z_norm,
                             cosmology=cosmology) for name, files in group_model_files(paths)]


def _as_realisations(realisations, z_lens, units, z_norm, cosmology):
    if isinstance(realisations, (str, os.PathLike)):
        realisations = [realisations]
    out = []
    for item in realisations:
        if isinstance(item, (str, os.PathLike)):
            if z_lens is None:
                raise LensviewInputError(
                    "Realisations given as files need the lens redshift; pass z_lens=.")
            out += find_realisations(item, z_lens=z_lens, units=units, z_norm=z_norm,
                                     cosmology=cosmology)
        else:
            out.append(item)
    return out


# ---------------------------------------------------------------------------- one task
@dataclass
class _Outcome:
    """What one task sends back: the realisation's measurements, or why it failed to load."""

    index: int
    name: str
    files: list
    table: Table = None
    grid: tuple = None
    error: str = None


def _describe(realisation, index):
    if isinstance(realisation, RealisationFiles):
        return realisation.name, realisation.file_names
    name = getattr(realisation, "name", None)
    return (str(name) if name else f"realisation {index + 1}"), []


def _grid(field):
    """Shape and the sky positions of the corners and centre (to compare grids)."""
    ny, nx = field.shape
    x = np.array([0.0, nx - 1.0, 0.0, nx - 1.0, (nx - 1) / 2])
    y = np.array([0.0, 0.0, ny - 1.0, ny - 1.0, (ny - 1) / 2])
    sky = field.pixels_to_sky(x, y)
    scale = float(np.sqrt(abs(np.linalg.det(field.wcs.pixel_scale_matrix)))) * 3600.0
    return (ny, nx), np.column_stack([sky.ra.deg, sky.dec.deg]), scale


def _measure_one(realisation, index, coords, z_source, cosmology, labels):
    name, files = _describe(realisation, index)
    try:
        field = realisation() if callable(realisation) else realisation
    except (LensviewInputError, OSError) as error:
        return _Outcome(index, name, files, error=str(error))
    table = measure_candidates(coords, field, z_source, cosmology=cosmology, labels=labels)
    table["realisation"] = np.full(len(table), index)
    outcome = _Outcome(index, field.name or name, files, table=table, grid=_grid(field))
    del field  # the maps are released with the task
    return outcome


# ---------------------------------------------------------------------------- running
def _client(scheduler):
    """(client, whether it was opened here) for a Client or a scheduler address."""
    from distributed import Client

    if isinstance(scheduler, Client):
        return scheduler, False
    if isinstance(scheduler, str) and "://" in scheduler:
        try:
            return Client(scheduler, timeout="10s"), True
        except (OSError, TimeoutError) as error:
            raise LensviewInputError(
                f"Cannot reach a dask scheduler at {scheduler} ({error}); start one there or "
                "check the address.") from None
    raise LensviewInputError(
        f"Unknown scheduler {scheduler!r}; give 'threads', 'processes', 'synchronous', a "
        "dask.distributed Client or a scheduler address such as 'tcp://host:8786'.")


def _run_local(tasks, scheduler, report):
    from dask.callbacks import Callback

    keys = {task.key for task in tasks}
    done = [0]

    class _Count(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            if key in keys:
                done[0] += 1
                report(done[0])

    with _Count():
        return list(dask.compute(*tasks, scheduler=scheduler))


def _run_distributed(tasks, client, report):
    from distributed import as_completed

    futures = client.compute(tasks)
    try:
        for k, _ in enumerate(as_completed(futures), start=1):
            report(k)
        return client.gather(futures)
    finally:
        client.cancel(futures)


def measure_ensemble(coords, realisations, z_source, *, cosmology=None, labels=None,
                     percentiles=DEFAULT_PERCENTILES, mu_thresholds=(), scheduler="threads",
                     z_lens=None, units=None, z_norm=FROM_HEADER, progress=None,
                     return_samples=False):
    """Measure knots on many realisations of a lens model and summarise them.

    Parameters
    ----------
    coords : `~astropy.coordinates.SkyCoord`
        Knot positions.
    realisations : str, path-like or sequence
        A folder, glob pattern or file path of model files (grouped as the
        module docstring says), or a sequence mixing such paths,
        `~lensview.DeflectionField` objects and callables returning one.
        Callables and files are loaded inside their own task.
    z_source : float
    cosmology : `~astropy.cosmology.Cosmology`, optional
        For physical scales; also the cosmology of models read from files.
    labels : sequence of str, optional
        Knot labels (default "K1", "K2", ...).
    percentiles : sequence of float
        Percentiles reported for each summarised quantity.
    mu_thresholds : sequence of float
        For each T, the column ``fraction_abs_mu_gt_T`` (T written as ``%g``).
    scheduler : str or `distributed.Client`
        "threads" (default), "processes" or "synchronous" for dask's local
        schedulers; a ``dask.distributed.Client``, or a scheduler address
        such as ``"tcp://host:8786"`` (a client is opened and closed here).
    z_lens : float, optional
        Lens redshift, needed for realisations given as files.
    units, z_norm
        As for `lensview.load_model`, for realisations given as files.
    progress : callable, optional
        Called as ``progress(done, total)`` after each realisation.
    return_samples : bool
        Also return the per-realisation table.

    Returns
    -------
    summary : `~astropy.table.Table`
        See `summarize_ensemble`. ``meta["broken"]`` lists realisations that
        could not be read (name, files, message); a
        `BrokenRealisationWarning` says the same.
    samples : `~astropy.table.Table`
        Only with ``return_samples``: the `lensview.measure_candidates` rows
        of every realisation, with a ``realisation`` column (its position).

    Raises
    ------
    LensviewInputError
        No realisation; none readable; realisations on different grids
        (shape or WCS), naming the odd one; an unreachable scheduler.
    """
    from astropy.coordinates import SkyCoord

    coords = SkyCoord(coords).icrs
    coords = coords.reshape(-1) if coords.shape else coords.reshape((1,))
    realisations = _as_realisations(realisations, z_lens, units, z_norm, cosmology)
    if not realisations:
        raise LensviewInputError("No model realisations were given; supply at least one.")
    percentiles = _check_percentiles(percentiles)
    mu_thresholds = _check_thresholds(mu_thresholds)
    total = len(realisations)

    def report(done):
        if progress is not None:
            progress(done, total)

    shared = dask.delayed(coords)  # one copy of the knots in the graph, shared by the tasks
    tasks = [dask.delayed(_measure_one, pure=False)(r, k, shared, z_source, cosmology, labels)
             for k, r in enumerate(realisations)]
    client, opened = _client(scheduler) if not _local(scheduler) else (None, False)
    try:
        outcomes = (_run_distributed(tasks, client, report) if client is not None
                    else _run_local(tasks, scheduler, report))
    finally:
        if opened:
            client.close()
    outcomes = sorted(outcomes, key=lambda o: o.index)
    broken = [o for o in outcomes if o.error is not None]
    measured = [o for o in outcomes if o.error is None]
    if not measured:
        raise LensviewInputError(
            f"None of the {total} realisations could be read: " + "; ".join(
                o.error for o in broken[:3]) + ("; ..." if len(broken) > 3 else ""))
    _require_one_grid(measured)
    samples = vstack([o.table for o in measured], metadata_conflicts="silent") \
        if len(measured) > 1 else measured[0].table
    samples.meta.update(models=[o.name for o in measured])
    summary = summarize_ensemble(samples, percentiles=percentiles, mu_thresholds=mu_thresholds)
    summary.meta["broken"] = [dict(name=o.name, files=o.files, message=o.error) for o in broken]
    if broken:
        warnings.warn(
            f"{len(broken)} of {total} realisations could not be read and were left out: "
            + "; ".join(o.error for o in broken), BrokenRealisationWarning, stacklevel=2)
    return (summary, samples) if return_samples else summary


def _local(scheduler):
    return isinstance(scheduler, str) and scheduler in (
        "threads", "threading", "processes", "multiprocessing", "synchronous", "sync",
        "single-threaded")


def _check_percentiles(percentiles):
    values = [float(p) for p in np.atleast_1d(percentiles)]
    if not values or not all(0 <= p <= 100 for p in values):
        raise LensviewInputError(
            f"Percentiles {list(percentiles)} must lie between 0 and 100; give e.g. 16, 50, 84.")
    return tuple(values)


def _check_thresholds(thresholds):
    values = [float(t) for t in np.atleast_1d(thresholds)] if np.size(thresholds) else []
    if not all(np.isfinite(t) and t > 0 for t in values):
        raise LensviewInputError(
            f"Magnification thresholds {list(thresholds)} must be positive numbers, e.g. 10 and 100.")
    return tuple(values)


def _require_one_grid(measured):
    """Refuse realisations whose shape or WCS differs from the first one's."""
    reference = measured[0]
    shape0, sky0, scale0 = reference.grid
    where0 = _where(reference)
    for outcome in measured[1:]:
        shape, sky, scale = outcome.grid
        if shape != shape0:
            raise LensviewInputError(
                f"Realisation {_where(outcome)} is {shape[1]} x {shape[0]} pixels but {where0} is "
                f"{shape0[1]} x {shape0[0]}; the realisations of an ensemble share one grid. "
                "Remove the odd one or regrid it.")
        separation = np.degrees(angular_separation(*np.radians(sky0.T), *np.radians(sky.T)))
        separation = float(separation.max()) * 3600.0
        if separation > 1e-3 * min(scale, scale0):
            raise LensviewInputError(
                f"Realisation {_where(outcome)} has a different WCS from {where0} (its pixels lie "
                f"up to {separation:.3g} arcsec away); the realisations of an ensemble share one "
                "grid. Remove the odd one or regrid it.")


def _where(outcome):
    return f"{outcome.name} ({', '.join(outcome.files)})" if outcome.files else repr(outcome.name)


# ---------------------------------------------------------------------------- the summary
def summarize_ensemble(samples, *, percentiles=DEFAULT_PERCENTILES, mu_thresholds=()):
    """Distributions per knot across realisations.

    Parameters
    ----------
    samples : `~astropy.table.Table`
        `lensview.measure_candidates` rows of several realisations (one row
        per knot and realisation).
    percentiles : sequence of float
    mu_thresholds : sequence of float

    Returns
    -------
    `~astropy.table.Table`
        One row per knot: ``candidate``, ``label``, ``n_realisations``
        (realisations whose footprint holds the knot); for each percentile NN
        (written as ``%g``) ``offset_arcsec_pNN``, ``abs_mu_pNN``, ``mu_pNN``
        (signed), ``caustic_offset_pc_pNN``, ``source_ra_pNN`` and
        ``source_dec_pNN``; ``fraction_odd_parity``, ``fraction_inside_curve``
        (the knot inside its nearest closed critical curve) and
        ``fraction_abs_mu_gt_T`` for each threshold T, all over the
        realisations that hold the knot (NaN when none does).
    """
    percentiles = _check_percentiles(percentiles)
    mu_thresholds = _check_thresholds(mu_thresholds)
    candidate = np.asarray(samples["candidate"], int)
    knots = np.unique(candidate)
    realisation = (np.asarray(samples["realisation"]) if "realisation" in samples.colnames
                   else np.asarray(samples["model"]))
    runs = {value: k for k, value in enumerate(dict.fromkeys(realisation.tolist()))}
    row_of = np.array([runs[value] for value in realisation.tolist()])
    shape = (len(runs), len(knots))
    column_of = np.searchsorted(knots, candidate)

    def grid_of(name, fill=np.nan, dtype=float):
        values = np.full(shape, fill, dtype=dtype)
        values[row_of, column_of] = np.asarray(samples[name], dtype=dtype)
        return values

    held = np.isfinite(grid_of("mu"))
    n_held = held.sum(axis=0)
    out = Table()
    out["candidate"] = knots
    labels = dict(zip(candidate.tolist(), [str(v) for v in samples["label"]]))
    out["label"] = [labels[k] for k in knots.tolist()]
    out["n_realisations"] = n_held
    quantities = {name: (grid_of(name), unit) for name, unit in _SUMMARISED.items()}
    source_ra = grid_of("source_ra")
    quantities["source_ra"] = (_unwrapped(source_ra, held), u.deg)
    quantities["source_dec"] = (grid_of("source_dec"), u.deg)
    for name, (values, unit) in quantities.items():
        levels = _percentiles(np.where(held, values, np.nan), percentiles)
        if name == "source_ra":
            levels = levels % 360.0
        for p, level in zip(percentiles, levels):
            column = f"{name}_p{p:g}"
            out[column] = level if unit is None else level * unit
            if name.startswith("source_"):
                out[column].info.format = ".7f"
    parity = grid_of("parity", fill=0, dtype=int)
    side = np.full(shape, "", dtype=object)
    side[row_of, column_of] = np.asarray(samples["inside_or_outside"]).astype(str)
    abs_mu = quantities["abs_mu"][0]
    out["fraction_odd_parity"] = _fraction(held & (parity == -1), n_held)
    out["fraction_inside_curve"] = _fraction(held & (side == "inside"), n_held)
    for threshold in mu_thresholds:
        with np.errstate(invalid="ignore"):
            out[f"fraction_abs_mu_gt_{threshold:g}"] = _fraction(held & (abs_mu > threshold), n_held)
    out.meta.update({key: samples.meta[key] for key in ("z_source", "cosmology")
                     if key in samples.meta})
    out.meta.update(n_realisations=len(runs), percentiles=list(percentiles),
                    mu_thresholds=list(mu_thresholds),
                    realisations=list(samples.meta.get("models", [])))
    return out


def _percentiles(values, percentiles):
    levels = np.full((len(percentiles), values.shape[1]), np.nan)
    some = np.isfinite(values).any(axis=0)
    if some.any():
        levels[:, some] = np.nanpercentile(values[:, some], percentiles, axis=0)
    return levels


def _unwrapped(ra, held):
    """RA about each knot's first held value, so percentiles do not break at 0/360 deg."""
    reference = np.where(held.any(axis=0), ra[np.argmax(held, axis=0), np.arange(ra.shape[1])], 0.0)
    return reference + (ra - reference + 180.0) % 360.0 - 180.0


def _fraction(mask, n):
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, mask.sum(axis=0) / np.maximum(n, 1), np.nan)
