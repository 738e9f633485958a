"""``nature``: several filters of one field, colours, temperature, delensed luminosity and a
verdict per knot."""

import sys
from pathlib import Path

import numpy as np
import astropy.units as u

from ..errors import LensviewInputError
from .options import (cosmology_from_args, load_models, positive_or_none, progress, read_knots,
                      sibling_path)

_BAND_KEYS = ("name", "zp", "pivot", "psf", "beta")


def _band_options(spec):
    """Path and band options of one ``--cutout PATH [KEY=VALUE ...]``."""
    path, options = spec[0], {}
    for item in spec[1:]:
        key, sep, value = item.partition("=")
        key = key.strip().lower()
        if not sep or key not in _BAND_KEYS or not value.strip():
            raise LensviewInputError(
                f"--cutout {path}: {item!r} is not an option of a filter; give KEY=VALUE with KEY "
                f"one of {', '.join(_BAND_KEYS)} (e.g. zp=28.1 pivot=1.5um psf=0.1).")
        options[key] = value.strip()
    band = {}
    if "name" in options:
        band["name"] = options["name"]
    try:
        if "zp" in options:
            band["zero_point"] = float(options["zp"])
        if "psf" in options:
            band["psf_fwhm"] = _quantity(options["psf"], u.arcsec)
        if "pivot" in options:
            band["pivot"] = _quantity(options["pivot"], u.um)
        if "beta" in options:
            band["psf_beta"] = float(options["beta"])
    except (TypeError, ValueError) as error:
        raise LensviewInputError(
            f"--cutout {path}: could not read {options} ({error}); numbers are micron for pivot, "
            "arcsec for psf and AB magnitudes for zp, or give a unit (pivot=15000Angstrom).") from None
    for key, unit in (("pivot", u.um), ("psf_fwhm", u.arcsec)):
        if key in band and not band[key].unit.is_equivalent(unit):
            raise LensviewInputError(f"--cutout {path}: {key} must be in units of {unit}; got {band[key]}.")
    return path, band


def _quantity(text, unit):
    """A number in ``unit``, or a number with its own unit (e.g. ``15000Angstrom``)."""
    try:
        return float(text) * unit
    except ValueError:
        return u.Quantity(text)


def cmd_nature(args):
    from ..io import write_table
    from ..io.fits import read_cutout
    from ..nature import CAUTIONS, knot_nature
    from ..photometry import band_image
    from ..sed import Dust

    images = []
    for spec in args.cutout:
        path, band = _band_options(spec)
        progress(f"reading {path}")
        images.append(band_image(read_cutout(path), **band))
    coords, labels, _ = read_knots(args.candidates, images[0].wcs)
    fields = load_models(args)
    dust = None
    if args.av is not None:
        if not (np.isfinite(args.av) and args.av >= 0):
            raise LensviewInputError(f"--av {args.av} must be a non-negative V-band extinction (mag).")
        dust = Dust(a_v=float(args.av), law=args.dust)
    realisations = None
    if args.realisations:
        from astropy.table import Table

        realisations = Table.read(args.realisations)
    radius = positive_or_none(args.aperture, "--aperture")
    progress(f"{len(coords)} knot(s) in {len(images)} filter(s) against {len(fields)} model(s)")
    result = knot_nature(images, coords, fields, args.z_source, labels=labels, radius=radius,
                         dust=dust, realisations=realisations, cosmology=cosmology_from_args(args))
    cosmology = cosmology_from_args(args) or fields[0].cosmology
    write_table(result.summary, args.output, cosmology=cosmology)
    print(f"wrote {len(result.summary)} knot(s) to {args.output}")
    for suffix, table in (("_models", result.per_model), ("_filters", result.photometry)):
        path = sibling_path(args.output, suffix)
        write_table(table, path, cosmology=cosmology)
        print(f"wrote {path}")
    for row in result.summary:
        print(f"{row['label']}: {row['verdict']}")
    if args.figures:
        from ..figures import save_figure
        from ..figures import render_knot_figures

        folder = Path(args.figures)
        folder.mkdir(parents=True, exist_ok=True)
        for label, fig in render_knot_figures(result):
            safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in label)
            save_figure(fig, folder / f"knot_{safe}.png", dpi=150)
        print(f"wrote {len(result.summary)} figure(s) to {folder}")
    print("caution: " + " ".join(CAUTIONS), file=sys.stderr)


