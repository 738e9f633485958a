"""The ``lensview`` command.

Subcommands (each prints what it wrote; errors of input end with a message
and exit status 2, never a traceback):

``lensview curves``   critical curves and caustics -> region table
``lensview measure``  knot measurements (per model and the spread)
``lensview images``   predicted counter-images of one position
``lensview pair``     mirrored pairs among marked knots
``lensview figure``   publication figure of the cutout with overlays
``lensview nature``   colours, temperature, delensed luminosity and a verdict per knot
``lensview session``  check a saved session against its input files
``lensview posterior`` knots across many realisations of one model (percentiles)
``lensview demo``     regenerate the invented demo scenario
"""

import argparse
import sys
import warnings
from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.coordinates import SkyCoord

from .checks import H0_RANGE, OM0_RANGE, flat_cosmology
from .errors import LensviewInputError, MissingMassWarning

__all__ = ["main", "build_parser"]


def _add_models(parser):
    group = parser.add_argument_group("lens models")
    group.add_argument("--model", action="append", required=True, metavar="FILE[,FILE_Y]",
                       help="deflection model: two files 'x.fits,y.fits', or one file holding "
                            "two image HDUs or a two-plane cube; or one convergence or potential "
                            "map (see --map-kind); repeat for several models")
    group.add_argument("--map-kind", action="append", default=[],
                       choices=["deflection", "convergence", "potential"],
                       help="what each --model file holds (default: the files' LENSMAP keyword, "
                            "else a deflection pair); one value applies to all")
    group.add_argument("--fill-nan", type=float, default=None, metavar="KAPPA",
                       help="convergence models: value for NaN cells (default: refuse them)")
    group.add_argument("--external-kappa", type=float, default=0.0, metavar="KAPPA",
                       help="convergence models: uniform convergence added for mass outside the map")
    group.add_argument("--external-shear", type=float, nargs=2, default=(0.0, 0.0),
                       metavar=("GAMMA1", "GAMMA2"),
                       help="convergence models: constant shear added (East/North axes)")
    group.add_argument("--model-name", action="append", default=[], metavar="NAME",
                       help="name of each model, in the order of --model")
    group.add_argument("--units", action="append", default=[], choices=["arcsec", "pixel"],
                       help="deflection units per model (default: the files' BUNIT keyword); "
                            "one value applies to all")
    group.add_argument("--z-norm", action="append", default=[], type=_normalisation,
                       metavar="Z|unit",
                       help="redshift the maps were made for, or 'unit' for maps normalised to "
                            "D_ls/D_s = 1 (default: the files' Z_NORM keyword, else unit); "
                            "one value applies to all")
    group.add_argument("--z-lens", type=float, required=True, help="lens redshift")
    group.add_argument("--z-source", type=float, required=True, help="source redshift")
    _add_cosmology(group)


def _add_cosmology(parser):
    """``--h0`` and ``--om0``, with the ranges the page accepts too."""
    parser.add_argument("--h0", type=float, default=None,
                        help=f"Hubble constant (km/s/Mpc, {H0_RANGE[0]:g} to {H0_RANGE[1]:g}) for "
                             "a flat LCDM cosmology; default Planck18")
    parser.add_argument("--om0", type=float, default=None,
                        help=f"matter density (above {OM0_RANGE[0]:g}, at most {OM0_RANGE[1]:g}) "
                             "for a flat LCDM cosmology (with --h0)")


_UNIT_NORMALISATION = "unit"


def _normalisation(text):
    if text.lower() in ("unit", "1", "none"):
        return _UNIT_NORMALISATION
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is neither a redshift nor 'unit'; give the source redshift the maps were "
            "made for, or 'unit' for maps normalised to D_ls/D_s = 1") from None


def _per_model(values, n, default, label):
    if not values:
        return [default] * n
    if len(values) == 1:
        return values * n
    if len(values) != n:
        raise LensviewInputError(
            f"{len(values)} values of {label} were given for {n} models; give one per model or one for all."
        )
    return values


def _cosmology(args):
    return flat_cosmology(args.h0, args.om0)


def load_models(args):
    """DeflectionFields from the model options of a parsed command line."""
    from .lens.loading import FROM_HEADER, load_model
    from .io.mapfiles import map_kind

    n = len(args.model)
    kinds = _per_model(args.map_kind, n, FROM_HEADER, "--map-kind")
    names = _per_model(args.model_name, n, None, "--model-name") if args.model_name else [None] * n
    units = _per_model(args.units, n, None, "--units")
    norms = _per_model(args.z_norm, n, FROM_HEADER, "--z-norm")
    cosmology = _cosmology(args)
    fields = []
    for k, (spec, name, unit, z_norm, kind) in enumerate(zip(args.model, names, units, norms,
                                                              kinds)):
        paths = [p for p in spec.split(",") if p]
        if len(paths) not in (1, 2):
            raise LensviewInputError(f"--model {spec!r}: give one file or two files separated by a comma.")
        _progress(f"loading model {k + 1}/{n}: {spec}")
        if z_norm == _UNIT_NORMALISATION:
            z_norm = None
        kind = map_kind(*paths, kind=kind)
        options = {}
        if kind == "convergence":
            options = dict(fill_nan=args.fill_nan, external_kappa=args.external_kappa,
                           external_shear=tuple(args.external_shear))
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", MissingMassWarning)
            field = load_model(*paths, z_lens=args.z_lens, units=unit, z_norm=z_norm,
                               cosmology=cosmology, name=name or Path(paths[0]).stem, kind=kind,
                               **options)
        if kind != "deflection":
            _progress(f"  {kind} map turned into deflections")
        for warning in caught:
            if issubclass(warning.category, MissingMassWarning):
                _progress(f"  caution: {warning.message}")
            else:
                warnings.warn_explicit(warning.message, warning.category, warning.filename,
                                       warning.lineno)
        if field.z_norm is not None:
            _progress(f"  maps made for a source at z = {field.z_norm}")
        fields.append(field)
    return fields


def _add_knots(parser, help, required=False):
    """``--knots FILE``; ``--candidates`` stays as a hidden alias of earlier releases."""
    parser.add_argument("--knots", dest="candidates", metavar="FILE",
                        help=help + (" (required)" if required else ""))
    parser.add_argument("--candidates", dest="candidates", help=argparse.SUPPRESS)
    parser.set_defaults(knots_required=required)


def _add_pairing(parser):
    """Pairing options, worded as on the page's tab "Counter-images and pairs"."""
    parser.add_argument("--psf-fwhm", type=float, default=None, metavar="ARCSEC",
                        help="PSF FWHM: knots whose predicted images lie closer than this merge "
                             "into one unresolved image on the curve (default: not set)")
    parser.add_argument("--tolerance", type=float, default=None, metavar="ARCSEC",
                        help="pairing tolerance: the largest source-plane separation of two "
                             "traced knots that can still be one source (default: from the "
                             "model spread, at least 0.1 arcsec)")


def _positive_or_none(value, option):
    if value is None:
        return None
    if not (np.isfinite(value) and value > 0):
        raise LensviewInputError(f"{option} {value} must be a positive number of arcsec.")
    return value * u.arcsec


def _progress(message):
    print(f"[lensview] {message}", file=sys.stderr, flush=True)


def _candidates(path, cutout_wcs=None):
    from .io import read_candidates

    table = read_candidates(path, wcs=cutout_wcs)
    if len(table) == 0:
        raise LensviewInputError(f"The knot list {path} holds no knots; list at least one RA/Dec.")
    coords = SkyCoord(np.asarray(table["ra"], float) * u.deg, np.asarray(table["dec"], float) * u.deg)
    return coords, [str(label) for label in table["label"]], table


# ---------------------------------------------------------------------------- commands
def cmd_curves(args):
    from .io import write_regions
    from .io.fits import read_cutout

    fields = load_models(args)
    curves = []
    for field in fields:
        _progress(f"critical curves of {field.name}")
        curves += list(field.critical_curves(args.z_source))
        if args.caustics:
            curves += list(field.caustics(args.z_source))
    wcs = read_cutout(args.cutout).wcs if args.cutout else fields[0].wcs
    candidates = _candidates(args.candidates, wcs)[2] if args.candidates else None
    write_regions(args.output, curves, candidates, wcs=wcs)
    extra = f" and {len(candidates)} knot(s)" if candidates is not None else ""
    print(f"wrote {len(curves)} curve(s){extra} to {args.output}")


def cmd_measure(args):
    from .io import write_table
    from .measure import measure_candidates, summarize_models

    if args.aperture is not None and not args.cutout:
        raise LensviewInputError("--aperture needs --cutout: photometry is measured on the cutout.")
    if args.aperture is not None and not args.aperture > 0:
        raise LensviewInputError(f"--aperture {args.aperture} must be a positive radius in arcsec.")
    if args.zero_point is not None and args.aperture is None:
        raise LensviewInputError("--zero-point is used only with --aperture photometry; add --aperture.")
    cutout = None
    if args.cutout:
        from .io.fits import read_cutout

        cutout = read_cutout(args.cutout)
    coords, labels, _ = _candidates(args.candidates, cutout.wcs if cutout else None)
    fields = load_models(args)
    if cutout is not None:
        for field in fields:
            field.require_overlap(cutout.wcs, cutout.data.shape)
    _progress(f"measuring {len(coords)} knot(s) against {len(fields)} model(s)")
    table = measure_candidates(coords, fields, args.z_source, cosmology=_cosmology(args), labels=labels)
    if cutout is not None and args.aperture is not None:
        table = _add_photometry(table, coords, cutout, args)
    cosmology = _cosmology(args) or fields[0].cosmology
    write_table(table, args.output, cosmology=cosmology)
    print(f"wrote {len(table)} row(s) to {args.output}")
    if len(fields) > 1 or args.spread:
        spread_path = _sibling(args.output, "_spread")
        write_table(summarize_models(table), spread_path, cosmology=cosmology)
        print(f"wrote the model spread to {spread_path}")


def _add_photometry(table, coords, cutout, args):
    from astropy.table import join

    from .photometry import aperture_photometry, delensed_properties, zero_point

    zp = zero_point(cutout.header, args.zero_point)
    phot = aperture_photometry(cutout.data, cutout.wcs, coords, radius=args.aperture * u.arcsec,
                               annulus=(2 * args.aperture * u.arcsec, 3 * args.aperture * u.arcsec),
                               zero_point=zp)
    phot["candidate"] = np.arange(len(phot))
    keep = [c for c in phot.colnames if c not in ("ra", "dec", "label")]
    merged = join(table, phot[keep], keys="candidate", join_type="left")
    if zp is not None and "mag_ab" in merged.colnames:
        delensed = delensed_properties(mu=np.asarray(merged["mu"], float), z_source=args.z_source,
                                       mag=np.asarray(merged["mag_ab"], float),
                                       lambda_t=np.asarray(merged["lambda_t"], float),
                                       cosmology=_cosmology(args))
        for name in delensed.colnames:
            if name not in merged.colnames:
                merged[name] = delensed[name]
    merged.sort(["model", "candidate"])
    return merged


def cmd_images(args):
    from .counterparts import predict_counterimages
    from .io import write_table

    fields = load_models(args)
    coord = SkyCoord(args.ra * u.deg, args.dec * u.deg)
    psf = args.psf_fwhm * u.arcsec if args.psf_fwhm is not None else None
    tables = []
    for field in fields:
        _progress(f"solving the lens equation on {field.name}")
        images = predict_counterimages(coord, field, args.z_source, psf_fwhm=psf)
        images["model"] = field.name
        tables.append(images)
        print(f"{field.name}: {len(images)} image(s) of the source")
        for row in images[np.argsort(np.where(images["arrival_order"] > 0,
                                              images["arrival_order"], len(images) + 1))]:
            delay = float(row["time_delay_days"])
            when = "first" if row["arrival_order"] == 1 else (
                f"{delay:.2f} days later" if np.isfinite(delay) else "delay unknown")
            print(f"  image {row['image']}{' (the knot)' if row['is_input'] else ''}: {when}")
    from astropy.table import vstack

    write_table(vstack(tables, metadata_conflicts="silent"), args.output)
    print(f"wrote {args.output}")


def cmd_pair(args):
    from .counterparts import pair_counterparts
    from .io import write_table

    coords, labels, _ = _candidates(args.candidates)
    fields = load_models(args)
    tolerance = _positive_or_none(args.tolerance, "--tolerance")
    psf = _positive_or_none(args.psf_fwhm, "--psf-fwhm")
    table = pair_counterparts(coords, fields, args.z_source, tolerance=tolerance, psf_fwhm=psf)
    write_table(table, args.output)
    print(f"wrote {len(table)} proposed pair(s) to {args.output}")
    for row in table:
        delay = float(row["time_delay_days"])
        if np.isfinite(delay):
            lead = labels[int(row["leading"])]
            print(f"  {labels[row['i']]} - {labels[row['j']]} ({row['model']}): {lead} leads by "
                  f"{abs(delay):.2f} days")


def cmd_figure(args):
    from .figures import render_field_figure, save_figure
    from .io.fits import read_cutout

    cutout = read_cutout(args.cutout)
    fields = load_models(args)
    for field in fields:
        field.require_overlap(cutout.wcs, cutout.data.shape)
    curves = []
    for field in fields:
        curves += list(field.critical_curves(args.z_source))
    candidates = pairs = counterimages = None
    if args.candidates:
        coords, _, candidates = _candidates(args.candidates, cutout.wcs)
    if (args.pairs or args.counterimages_of) and candidates is None:
        raise LensviewInputError("--pairs and --counterimages-of need the knots: add --knots FILE.")
    psf = _positive_or_none(args.psf_fwhm, "--psf-fwhm")
    if args.pairs and len(coords) >= 2:
        from .counterparts import pair_counterparts

        found = pair_counterparts(coords, fields, args.z_source, psf_fwhm=psf,
                                  tolerance=_positive_or_none(args.tolerance, "--tolerance"))
        # As on the page: the consensus of several models, or the one model's pairs.
        shown = "consensus" if len(fields) > 1 else fields[0].name
        pairs = found[np.asarray(found["model"]) == shown]
    if args.counterimages_of:
        counterimages = _counterimages_of(args.counterimages_of, candidates, fields, args.z_source, psf)
    limits = args.limits
    try:
        limits = float(limits)
    except ValueError:
        pass
    overlay = None
    if args.magnification_map:
        from .io.mapfiles import OVERLAY_ONLY_REASON, read_magnification_map

        overlay = read_magnification_map(args.magnification_map)
        _progress(OVERLAY_ONLY_REASON)
    fig = render_field_figure(cutout.data, cutout.wcs, curves=curves, candidates=candidates,
                              pairs=pairs, counterimages=counterimages, z_lens=args.z_lens,
                              cosmology=_cosmology(args), stretch=args.stretch, limits=limits,
                              cmap=args.cmap, magnification_map=overlay)
    save_figure(fig, args.output, dpi=args.dpi)
    print(f"wrote {args.output}")


def _counterimages_of(label, candidates, fields, z_source, psf):
    from astropy.table import vstack

    from .counterparts import predict_counterimages

    labels = [str(v) for v in candidates["label"]]
    if label not in labels:
        raise LensviewInputError(
            f"--counterimages-of {label!r} names no knot of the list; choose one of "
            f"{', '.join(labels[:8])}{' ...' if len(labels) > 8 else ''}.")
    row = candidates[labels.index(label)]
    coord = SkyCoord(float(row["ra"]) * u.deg, float(row["dec"]) * u.deg)
    tables = []
    for field in fields:
        images = predict_counterimages(coord, field, z_source, psf_fwhm=psf)
        images["model"] = field.name
        tables.append(images[~np.asarray(images["is_input"], bool)])
    return vstack(tables, metadata_conflicts="silent")


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
    from .io import write_table
    from .io.fits import read_cutout
    from .nature import CAUTIONS, knot_nature
    from .photometry import band_image
    from .sed import Dust

    images = []
    for spec in args.cutout:
        path, band = _band_options(spec)
        _progress(f"reading {path}")
        images.append(band_image(read_cutout(path), **band))
    coords, labels, _ = _candidates(args.candidates, images[0].wcs)
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
    if args.aperture is not None and not args.aperture > 0:
        raise LensviewInputError(f"--aperture {args.aperture} must be a positive radius in arcsec.")
    radius = None if args.aperture is None else args.aperture * u.arcsec
    _progress(f"{len(coords)} knot(s) in {len(images)} filter(s) against {len(fields)} model(s)")
    result = knot_nature(images, coords, fields, args.z_source, labels=labels, radius=radius,
                         dust=dust, realisations=realisations, cosmology=_cosmology(args))
    cosmology = _cosmology(args) or fields[0].cosmology
    write_table(result.summary, args.output, cosmology=cosmology)
    print(f"wrote {len(result.summary)} knot(s) to {args.output}")
    for suffix, table in (("_models", result.per_model), ("_filters", result.photometry)):
        path = _sibling(args.output, suffix)
        write_table(table, path, cosmology=cosmology)
        print(f"wrote {path}")
    for row in result.summary:
        print(f"{row['label']}: {row['verdict']}")
    if args.figures:
        from .figures import save_figure
        from .figures_sed import render_knot_figures

        folder = Path(args.figures)
        folder.mkdir(parents=True, exist_ok=True)
        for label, fig in render_knot_figures(result):
            safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in label)
            save_figure(fig, folder / f"knot_{safe}.png", dpi=150)
        print(f"wrote {len(result.summary)} figure(s) to {folder}")
    print("caution: " + " ".join(CAUTIONS), file=sys.stderr)


def cmd_session(args):
    from .io import check_session_files, load_session

    session = load_session(args.session)
    supplied = {Path(p).name: p for p in args.files}
    statuses = check_session_files(session, supplied)
    for status in statuses:
        print(str(status))
    print(f"{len(session.candidates)} knot(s); z_lens = {session.z_lens}, "
          f"z_source = {session.z_source}")
    if args.candidates_out:
        from .io import write_table

        write_table(session.candidate_table(), args.candidates_out)
        print(f"wrote the knots to {args.candidates_out}")
    bad = [s for s in statuses if not s.ok]
    if bad:
        raise LensviewInputError(
            f"{len(bad)} input file(s) are missing or differ from the session; supply the "
            "files the session was made with (see the lines above).")


def cmd_demo(args):
    from .demo import generate_demo

    written = generate_demo(args.directory, seed=args.seed)
    print(f"wrote the demo scenario to {args.directory}"
          + (f" ({len(written)} files)" if written else ""))


def cmd_posterior(args):
    from .lens.loading import FROM_HEADER
    from .ensemble import BrokenRealisationWarning, measure_ensemble
    from .io import write_table

    coords, labels, _ = _candidates(args.candidates)
    z_norm = FROM_HEADER if args.z_norm is None else (
        None if args.z_norm == _UNIT_NORMALISATION else args.z_norm)
    cosmology = _cosmology(args)
    _progress(f"measuring {len(coords)} knot(s) on the realisations in "
              f"{', '.join(args.realisations)}")
    with _ProgressBar("realisations") as bar, warnings.catch_warnings():
        warnings.simplefilter("ignore", BrokenRealisationWarning)  # reported below, one per line
        summary, samples = measure_ensemble(
            coords, args.realisations, args.z_source, z_lens=args.z_lens, units=args.units,
            z_norm=z_norm, cosmology=cosmology, labels=labels, percentiles=args.percentiles,
            mu_thresholds=args.mu_threshold, scheduler=args.scheduler, progress=bar.update,
            return_samples=True)
    for broken in summary.meta["broken"]:
        _progress(f"left out {broken['name']}: {broken['message']}")
    write_table(summary, args.output, cosmology=cosmology)
    print(f"wrote the distributions of {len(summary)} knot(s) over "
          f"{summary.meta['n_realisations']} realisation(s) to {args.output}")
    if args.samples:
        write_table(samples, args.samples, cosmology=cosmology)
        print(f"wrote {len(samples)} per-realisation row(s) to {args.samples}")


class _ProgressBar:
    """A progress bar on stderr: redrawn in place on a terminal, a line per tenth otherwise."""

    WIDTH = 30

    def __init__(self, what):
        self.what = what
        self.tty = sys.stderr.isatty()
        self.shown = -1

    def update(self, done, total):
        if not self.tty and done != total and (10 * done) // total == self.shown:
            return
        self.shown = (10 * done) // total
        filled = self.WIDTH * done // total
        bar = "#" * filled + "." * (self.WIDTH - filled)
        end = "" if self.tty and done < total else "\n"
        prefix = "\r" if self.tty else ""
        print(f"{prefix}[lensview] {self.what} [{bar}] {done}/{total}", end=end, file=sys.stderr,
              flush=True)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if self.tty and exc[0] is not None and self.shown >= 0:
            print(file=sys.stderr, flush=True)
        return False


def _percentile_list(text):
    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        values = []
    if not values or not all(0 <= v <= 100 for v in values):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a list of percentiles; give numbers between 0 and 100 separated "
            "by commas, e.g. 2.5,16,50,84,97.5")
    return values


def _sibling(path, suffix):
    path = Path(path)
    return str(path.with_name(path.stem + suffix + path.suffix))


def build_parser():
    """The argument parser of the ``lensview`` command."""
    parser = argparse.ArgumentParser(
        prog="lensview",
        description="Critical curves, magnifications and mirrored images of compact knots "
                    "in cluster-lensed arcs. Magnifications near critical curves depend "
                    "strongly on the lens model: compare several models.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("curves", help="critical curves (and caustics) as a region table")
    _add_models(p)
    p.add_argument("--cutout", help="FITS cutout whose pixel frame the .fits region table uses")
    p.add_argument("--caustics", action="store_true", help="also write the caustics")
    _add_knots(p, "knot list to add as points (label, pair_id kept)")
    p.add_argument("-o", "--output", required=True, help="output .fits, .ecsv or .vot")
    p.set_defaults(run=cmd_curves)

    p = sub.add_parser("measure", help="offsets, magnification and parity of knots")
    _add_models(p)
    _add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns (or x/y pixels with --cutout)",
               required=True)
    p.add_argument("--cutout", help="FITS cutout (for pixel positions and photometry)")
    p.add_argument("--aperture", type=float, default=None, metavar="ARCSEC",
                   help="aperture radius for photometry on the cutout")
    p.add_argument("--zero-point", type=float, default=None, help="AB zero point (default: header)")
    p.add_argument("--spread", action="store_true", help="also write the spread table for one model")
    p.add_argument("-o", "--output", required=True, help="output .ecsv, .csv or .vot")
    p.set_defaults(run=cmd_measure)

    p = sub.add_parser("images", help="all images of the source behind one position")
    _add_models(p)
    p.add_argument("--ra", type=float, required=True, help="RA of the image (deg)")
    p.add_argument("--dec", type=float, required=True, help="Dec of the image (deg)")
    p.add_argument("--psf-fwhm", type=float, default=None, metavar="ARCSEC",
                   help="PSF FWHM: predicted images closer than this merge into one unresolved "
                        "image on the curve (default: not set)")
    p.add_argument("-o", "--output", required=True, help="output .ecsv, .csv or .vot")
    p.set_defaults(run=cmd_images)

    p = sub.add_parser("pair", help="propose mirrored pairs among knots",
                       description="Propose mirrored pairs among knots. Each pair's score is "
                                   "a chi-square-like sum (0 is a perfect match, lower is "
                                   "better) of the source-plane separation over the tolerance, "
                                   "the midpoint's distance from the critical curve and a "
                                   "penalty when no curve lies between the images; the gate "
                                   "keeps opposite-parity pairs scoring at most 9.")
    _add_models(p)
    _add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns", required=True)
    _add_pairing(p)
    p.add_argument("-o", "--output", required=True, help="output .ecsv, .csv or .vot")
    p.set_defaults(run=cmd_pair)

    p = sub.add_parser("figure", help="figure of the cutout with curves, knots, pairs and "
                                      "counter-images")
    _add_models(p)
    p.add_argument("--cutout", required=True, help="FITS cutout")
    _add_knots(p, "knot list to mark")
    p.add_argument("--pairs", action="store_true",
                   help="link the proposed mirrored pairs (the models' consensus, as on the page)")
    p.add_argument("--counterimages-of", metavar="LABEL",
                   help="draw the predicted counter-images of this knot in every model")
    _add_pairing(p)
    p.add_argument("--stretch", default="asinh", choices=["linear", "sqrt", "log", "asinh"])
    p.add_argument("--limits", default="zscale", metavar="zscale|minmax|PERCENT",
                   help="display limits: 'zscale' (a robust range around the sky level), "
                        "'minmax', or the central PERCENT of the pixel values")
    p.add_argument("--cmap", default="gray_r", metavar="NAME",
                   help="matplotlib colour map (the page offers gray_r, gray, magma, cividis, "
                        "viridis, inferno, bone)")
    p.add_argument("--dpi", type=int, default=300)
    p.add_argument("--magnification-map", metavar="FILE",
                   help="a magnification map (FITS) drawn as |mu| = 3, 10, 30 contours only: it "
                        "cannot place critical curves")
    p.add_argument("-o", "--output", required=True, help="output .png or .pdf")
    p.set_defaults(run=cmd_figure)

    p = sub.add_parser("nature", help="colours, blackbody temperature, delensed luminosity and "
                                      "radius of knots in several filters, with a verdict")
    _add_models(p)
    p.add_argument("--cutout", action="append", nargs="+", required=True,
                   metavar=("FILE", "KEY=VALUE"),
                   help="a cutout in one filter, optionally followed by name=, zp= (AB zero "
                        "point), pivot= (micron, or with a unit), psf= (FWHM, arcsec) and beta= "
                        "(Moffat index of the PSF) where the header lacks them; repeat for each "
                        "filter")
    _add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns", required=True)
    p.add_argument("--aperture", type=float, default=None, metavar="ARCSEC",
                   help="aperture radius (default 1.5 times the widest PSF FWHM)")
    p.add_argument("--dust", default="G23", choices=["G23", "F99", "CCM89"],
                   help="extinction law in the knot's rest frame (with --av)")
    p.add_argument("--av", type=float, default=None, metavar="MAG",
                   help="V-band extinction in the knot's rest frame (default: no dust)")
    p.add_argument("--realisations", default=None, metavar="TABLE",
                   help="table with candidate and mu columns, one row per model realisation")
    p.add_argument("--figures", default=None, metavar="DIR", help="write one PNG per knot here")
    p.add_argument("-o", "--output", required=True,
                   help="output .ecsv, .csv or .vot (also NAME_models and NAME_filters)")
    p.set_defaults(run=cmd_nature)

    p = sub.add_parser("session", help="check a saved session against its input files")
    p.add_argument("session", help="session file (.json) saved by the app")
    p.add_argument("files", nargs="*", help="the cutout and model files to check")
    p.add_argument("--knots-out", dest="candidates_out",
                   help="also write the session's knots (.ecsv/.csv/.vot)")
    p.add_argument("--candidates-out", dest="candidates_out", help=argparse.SUPPRESS)
    p.set_defaults(run=cmd_session)

    p = sub.add_parser("posterior", help="distributions of knot measurements over many "
                                         "realisations of one lens model")
    p.add_argument("--realisations", action="append", required=True, metavar="FOLDER|GLOB",
                   help="folder or glob pattern of the realisations' FITS files: pairs named "
                        "*_alpha_x/*_alpha_y (or _x/_y, _defx/_defy), or one file each with two "
                        "image HDUs or a two-plane cube; repeat to add more")
    _add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns", required=True)
    p.add_argument("--z-lens", type=float, required=True, help="lens redshift")
    p.add_argument("--z-source", type=float, required=True, help="source redshift")
    p.add_argument("--units", choices=["arcsec", "pixel"], default=None,
                   help="deflection units of every realisation (default: the files' BUNIT)")
    p.add_argument("--z-norm", type=_normalisation, default=None, metavar="Z|unit",
                   help="redshift the maps were made for, or 'unit' (default: the files' Z_NORM "
                        "keyword, else unit)")
    _add_cosmology(p)
    p.add_argument("--percentiles", type=_percentile_list, default=[2.5, 16.0, 50.0, 84.0, 97.5],
                   metavar="P,P,...", help="percentiles to report (default 2.5,16,50,84,97.5)")
    p.add_argument("--mu-threshold", type=float, action="append", default=[], metavar="T",
                   help="also report the fraction of realisations with |mu| > T; repeatable")
    p.add_argument("--scheduler", default="threads", metavar="ADDRESS",
                   help="dask scheduler: 'threads' (default), 'processes', 'synchronous', or the "
                        "address of a dask.distributed scheduler, e.g. tcp://host:8786")
    p.add_argument("--samples", metavar="FILE",
                   help="also write every realisation's measurements (.ecsv, .csv or .vot)")
    p.add_argument("-o", "--output", required=True, help="summary table (.ecsv, .csv or .vot)")
    p.set_defaults(run=cmd_posterior)

    p = sub.add_parser("demo", help="regenerate the invented demo scenario")
    p.add_argument("directory", nargs="?", default="sample_images")
    p.add_argument("--seed", type=int, default=None, help="random seed (default: the demo's own)")
    p.set_defaults(run=cmd_demo)
    return parser


def main(argv=None):
    """Entry point of the ``lensview`` command; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "knots_required", False) and args.candidates is None:
        parser.error(f"the following arguments are required: --knots (lensview {args.command})")
    try:
        args.run(args)
    except LensviewInputError as error:
        print(f"lensview: error: {error}", file=sys.stderr)
        return 2
    except (OSError, ValueError) as error:
        print(f"lensview: error: {error}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
