"""Options shared by the subcommands (models, knots, cosmology, pairing), reading
them, and progress on stderr."""

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord

from ..checks import H0_RANGE, OM0_RANGE, flat_cosmology
from ..errors import LensviewInputError, MissingMassWarning

def add_models(parser):
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
    group.add_argument("--z-norm", action="append", default=[], type=normalisation,
                       metavar="Z|unit",
                       help="redshift the maps were made for, or 'unit' for maps normalised to "
                            "D_ls/D_s = 1 (default: the files' Z_NORM keyword, else unit); "
                            "one value applies to all")
    group.add_argument("--z-lens", type=float, required=True, help="lens redshift")
    group.add_argument("--z-source", type=float, required=True, help="source redshift")
    add_cosmology(group)


def add_cosmology(parser):
    """``--h0`` and ``--om0``, with the ranges the page accepts too."""
    parser.add_argument("--h0", type=float, default=None,
                        help=f"Hubble constant (km/s/Mpc, {H0_RANGE[0]:g} to {H0_RANGE[1]:g}) for "
                             "a flat LCDM cosmology; default Planck18")
    parser.add_argument("--om0", type=float, default=None,
                        help=f"matter density (above {OM0_RANGE[0]:g}, at most {OM0_RANGE[1]:g}) "
                             "for a flat LCDM cosmology (with --h0)")


UNIT_NORMALISATION = "unit"


def normalisation(text):
    if text.lower() in ("unit", "1", "none"):
        return UNIT_NORMALISATION
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is neither a redshift nor 'unit'; give the source redshift the maps were "
            "made for, or 'unit' for maps normalised to D_ls/D_s = 1") from None


def per_model(values, n, default, label):
    if not values:
        return [default] * n
    if len(values) == 1:
        return values * n
    if len(values) != n:
        raise LensviewInputError(
            f"{len(values)} values of {label} were given for {n} models; give one per model or one for all."
        )
    return values


def cosmology_from_args(args):
    return flat_cosmology(args.h0, args.om0)


def load_models(args):
    """DeflectionFields from the model options of a parsed command line."""
    from ..lens.loading import FROM_HEADER, load_model
    from ..io.mapfiles import map_kind

    n = len(args.model)
    kinds = per_model(args.map_kind, n, FROM_HEADER, "--map-kind")
    names = per_model(args.model_name, n, None, "--model-name") if args.model_name else [None] * n
    units = per_model(args.units, n, None, "--units")
    norms = per_model(args.z_norm, n, FROM_HEADER, "--z-norm")
    cosmology = cosmology_from_args(args)
    fields = []
    for k, (spec, name, unit, z_norm, kind) in enumerate(zip(args.model, names, units, norms,
                                                              kinds)):
        paths = [p for p in spec.split(",") if p]
        if len(paths) not in (1, 2):
            raise LensviewInputError(f"--model {spec!r}: give one file or two files separated by a comma.")
        progress(f"loading model {k + 1}/{n}: {spec}")
        if z_norm == UNIT_NORMALISATION:
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
            progress(f"  {kind} map turned into deflections")
        for warning in caught:
            if issubclass(warning.category, MissingMassWarning):
                progress(f"  caution: {warning.message}")
            else:
                warnings.warn_explicit(warning.message, warning.category, warning.filename,
                                       warning.lineno)
        if field.z_norm is not None:
            progress(f"  maps made for a source at z = {field.z_norm}")
        fields.append(field)
    return fields


def add_knots(parser, help, required=False):
    """``--knots FILE``; ``--candidates`` stays as a hidden alias of earlier releases."""
    parser.add_argument("--knots", dest="candidates", metavar="FILE",
                        help=help + (" (required)" if required else ""))
    parser.add_argument("--candidates", dest="candidates", help=argparse.SUPPRESS)
    parser.set_defaults(knots_required=required)


def add_pairing(parser):
    """Pairing options, worded as on the page's tab "Counter-images and pairs"."""
    parser.add_argument("--psf-fwhm", type=float, default=None, metavar="ARCSEC",
                        help="PSF FWHM: knots whose predicted images lie closer than this merge "
                             "into one unresolved image on the curve (default: not set)")
    parser.add_argument("--tolerance", type=float, default=None, metavar="ARCSEC",
                        help="pairing tolerance: the largest source-plane separation of two "
                             "traced knots that can still be one source (default: from the "
                             "model spread, at least 0.1 arcsec)")


def positive_or_none(value, option):
    if value is None:
        return None
    if not (np.isfinite(value) and value > 0):
        raise LensviewInputError(f"{option} {value} must be a positive number of arcsec.")
    return value * u.arcsec


def progress(message):
    print(f"[lensview] {message}", file=sys.stderr, flush=True)


def read_knots(path, cutout_wcs=None):
    from ..io import read_candidates

    table = read_candidates(path, wcs=cutout_wcs)
    if len(table) == 0:
        raise LensviewInputError(f"The knot list {path} holds no knots; list at least one RA/Dec.")
    coords = SkyCoord(np.asarray(table["ra"], float) * u.deg, np.asarray(table["dec"], float) * u.deg)
    return coords, [str(label) for label in table["label"]], table


# ---------------------------------------------------------------------------- commands
class ProgressBar:
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


def percentile_list(text):
    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        values = []
    if not values or not all(0 <= v <= 100 for v in values):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a list of percentiles; give numbers between 0 and 100 separated "
            "by commas, e.g. 2.5,16,50,84,97.5")
    return values


def sibling_path(path, suffix):
    path = Path(path)
    return str(path.with_name(path.stem + suffix + path.suffix))


