"""Writing the demo scenario's files deterministically."""

import json
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.io import fits
from astropy.table import Table

from ..cosmology import angular_scale
from ..errors import LensviewInputError
from .colours import filter_look
from .fold import ImageFinder, fold_frame, inward_for_separation
from .maps import model_maps, write_model
from .readme import readme_text
from .render import cutout_header, render_cutout
from .scenario import (CANDIDATE_FILE, CLUSTER_NAME, COMPACT_SEPARATION, CUTOUT_FILE, DEFAULT_SEED,
                       DEMO_DIRECTORY, FILTERS, GRIDS, KNOTS, MIRROR_SEPARATION, MODEL_NAMES,
                       README_FILE, REFERENCE_FILTER, TRUTH_MODEL, VERSIONS_FILE, Z_LENS, Z_SOURCE)


def _check_options(seed, size_factor):
    if seed is None:
        seed = DEFAULT_SEED
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise LensviewInputError(f"The demo seed must be a non-negative whole number; got {seed!r}.")
    try:
        size_factor = float(size_factor)
    except (TypeError, ValueError):
        size_factor = float("nan")
    if not 0.2 <= size_factor <= 2.0:
        raise LensviewInputError(
            f"size_factor must be a number from 0.2 to 2 (1 = the bundled files); got {size_factor!r}.")
    return int(seed), size_factor


def generate_demo(directory=DEMO_DIRECTORY, seed=None, *, size_factor=1.0):
    """Write the invented demo scenario (deterministic for a given seed).

    Parameters
    ----------
    directory : str or path-like
        Folder to write into (created if needed); files there with the demo's
        names are replaced.
    seed : int, optional
        Seed of the sky noise and the field galaxies (default `DEFAULT_SEED`,
        that of the bundled files). The lens models, the source and the
        members do not depend on it.
    size_factor : float
        Pixel counts of the cutout and the maps relative to the bundled files
        (0.2 to 2), over the same fields of view; smaller is faster.

    Returns
    -------
    list of `pathlib.Path`
        The files written: model maps, cutouts (one per filter), candidate list, README,
        library versions.

    Raises
    ------
    LensviewInputError
        For a seed that is not a non-negative integer or a size factor out of range.
    """
    seed, size_factor = _check_options(seed, size_factor)
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    from ..lens.field import DeflectionField

    written, fields = [], []
    for grid in GRIDS:
        alpha_x, alpha_y, wcs = model_maps(grid, size_factor)
        written += write_model(directory, grid, alpha_x, alpha_y, wcs)
        fields.append(DeflectionField(alpha_x, alpha_y, wcs, z_lens=Z_LENS, z_norm=grid.z_norm,
                                      name=grid.name))
    truth = fields[MODEL_NAMES.index(TRUTH_MODEL)]
    fold = fold_frame(truth)
    finder = ImageFinder(truth, fold)

    knots = []
    for knot in KNOTS:
        inward = knot.inward
        if knot.label == "C":
            inward = inward_for_separation(finder, knot.along, COMPACT_SEPARATION, 1e-5)
        elif knot.label == "M1":
            inward = inward_for_separation(finder, knot.along, MIRROR_SEPARATION, 2e-3)
        knots.append((knot, inward))

    images = {knot.label: finder.pair(fold.source(knot.along, inward))
              for knot, inward in knots if knot.label}
    image, cutout_wcs, arc_mu, draws = render_cutout(finder, knots, images["C"], size_factor, seed)
    cutout_path = directory / CUTOUT_FILE
    fits.PrimaryHDU(image, cutout_header(cutout_wcs, seed)).writeto(cutout_path, overwrite=True)
    written.append(cutout_path)
    for demo_filter in FILTERS:
        if demo_filter.name == REFERENCE_FILTER:
            continue
        look = filter_look(demo_filter)
        band_data, band_wcs, _, _ = render_cutout(finder, knots, images["C"], size_factor, seed,
                                                  look=look, draws=draws,
                                                  reference_wcs=cutout_wcs)
        band_path = directory / demo_filter.file
        fits.PrimaryHDU(band_data, cutout_header(band_wcs, seed, look)).writeto(
            band_path, overwrite=True)
        written.append(band_path)

    truth_values = _truth_values(fields, fold, knots, images, arc_mu)
    candidates = _candidate_table(truth, images, knots, truth_values)
    candidate_path = directory / CANDIDATE_FILE
    candidates.write(candidate_path, format="ascii.ecsv", overwrite=True)
    written.append(candidate_path)
    readme_path = directory / README_FILE
    readme_path.write_text(readme_text(fields, truth_values, candidates, size_factor, seed),
                           encoding="utf-8")
    written.append(readme_path)
    versions_path = directory / VERSIONS_FILE
    versions_path.write_text(json.dumps(library_versions(), indent=1) + "\n", encoding="utf-8")
    written.append(versions_path)
    return written


def library_versions():
    """The versions of the libraries whose arithmetic the demo files depend on.

    Returns
    -------
    dict
        ``numpy``, ``scipy``, ``astropy`` versions and the machine
        architecture; the same values regenerate the files bit for bit.
    """
    import platform

    import astropy
    import scipy

    return {"numpy": np.__version__, "scipy": scipy.__version__,
            "astropy": astropy.__version__, "machine": platform.machine()}


def _truth_values(fields, fold, knots, images, arc_mu):
    """The numbers the README and the candidate list report, from the maps."""
    from ..counterparts import predict_counterimages
    from ..measure import measure_candidates

    truth = fields[MODEL_NAMES.index(TRUTH_MODEL)]
    pc_per_arcsec_source = angular_scale(Z_SOURCE).to_value(u.pc / u.arcsec)
    fold_image = truth.pixels_to_sky(*fold.image)
    at_fold = measure_candidates(fold_image, fields, Z_SOURCE)
    values = dict(
        fold_source=truth.pixels_to_sky(*fold.point),
        fold_image=fold_image,
        cusp_distance=fold.cusp_distance,
        scaling=truth.scaling_factor(Z_SOURCE),
        arc_mu=arc_mu,
        pc_per_arcsec_lens=angular_scale(Z_LENS).to_value(u.pc / u.arcsec),
        pc_per_arcsec_source=pc_per_arcsec_source,
        curve_offsets_at_fold={row["model"]: float(row["offset_arcsec"]) for row in at_fold},
        knots={},
    )
    for knot, inward in knots:
        if not knot.label:
            continue
        xy, mu = images[knot.label]
        sky = truth.pixels_to_sky(xy[:, 0], xy[:, 1])
        measured = measure_candidates(sky, [truth], Z_SOURCE)
        midpoint = measure_candidates(truth.pixels_to_sky(*xy.mean(axis=0)), [truth], Z_SOURCE)
        values["knots"][knot.label] = dict(
            knot=knot, inward=inward, images=sky, mu=mu,
            separation=float(sky[0].separation(sky[1]).arcsec),
            curve_offsets=np.asarray(measured["offset_arcsec"], float),
            midpoint_offset=float(midpoint["offset_arcsec"][0]),
            source=truth.pixels_to_sky(*fold.source(knot.along, inward)),
            caustic_offset_pc=inward * pc_per_arcsec_source,
        )
    outer = images["M4"][0][0]
    values["source_images"] = predict_counterimages(
        truth.pixels_to_sky(outer[:1], outer[1:])[0], truth, Z_SOURCE)
    return values


def _candidate_table(truth, images, knots, values):
    rows = []
    pair_id = 0
    for knot, _ in knots:
        if not knot.label:
            continue
        xy, mu = images[knot.label]
        if knot.label == "C":
            # The two images blend into one knot; a user marks its light centre.
            weights = np.abs(mu) / np.abs(mu).sum()
            merged = truth.pixels_to_sky(*(weights @ xy))
            rows.append((merged.ra.deg, merged.dec.deg, "C", -1, knot.note))
            continue
        pair_id += 1
        sky = truth.pixels_to_sky(xy[:, 0], xy[:, 1])
        for suffix, coord, parity in zip("ab", sky, ("even", "odd")):
            rows.append((coord.ra.deg, coord.dec.deg, knot.label + suffix, pair_id,
                         f"{knot.note} ({parity} parity)"))
    table = Table(rows=rows, names=("ra", "dec", "label", "pair_id", "note"),
                  dtype=(float, float, str, np.int64, str))
    table["ra"].unit = u.deg
    table["dec"].unit = u.deg
    compact = values["knots"]["C"]
    table.meta.update(
        scenario=f"{CLUSTER_NAME} (invented demo data)",
        z_lens=Z_LENS,
        z_source=Z_SOURCE,
        truth_model=TRUTH_MODEL,
        cosmology="Planck18",
        compact_images_ra=[float(v) for v in compact["images"].ra.deg],
        compact_images_dec=[float(v) for v in compact["images"].dec.deg],
        compact_images_mu=[float(v) for v in compact["mu"]],
        compact_source_ra=float(compact["source"].ra.deg),
        compact_source_dec=float(compact["source"].dec.deg),
    )
    return table


