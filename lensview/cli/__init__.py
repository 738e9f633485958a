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

from ..errors import LensviewInputError
from .files import cmd_demo, cmd_session
from .filters import cmd_nature
from .lensing import cmd_curves, cmd_figure, cmd_images, cmd_measure, cmd_pair
from .options import (add_cosmology, add_knots, add_models, add_pairing, normalisation,
                      percentile_list)
from .posterior import cmd_posterior

__all__ = ["main", "build_parser"]


def build_parser():
    """The argument parser of the ``lensview`` command."""
    parser = argparse.ArgumentParser(
        prog="lensview",
        description="Critical curves, magnifications and mirrored images of compact knots "
                    "in cluster-lensed arcs. Magnifications near critical curves depend "
                    "strongly on the lens model: compare several models.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("curves", help="critical curves (and caustics) as a region table")
    add_models(p)
    p.add_argument("--cutout", help="FITS cutout whose pixel frame the .fits region table uses")
    p.add_argument("--caustics", action="store_true", help="also write the caustics")
    add_knots(p, "knot list to add as points (label, pair_id kept)")
    p.add_argument("-o", "--output", required=True, help="output .fits, .ecsv or .vot")
    p.set_defaults(run=cmd_curves)

    p = sub.add_parser("measure", help="offsets, magnification and parity of knots")
    add_models(p)
    add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns (or x/y pixels with --cutout)",
               required=True)
    p.add_argument("--cutout", help="FITS cutout (for pixel positions and photometry)")
    p.add_argument("--aperture", type=float, default=None, metavar="ARCSEC",
                   help="aperture radius for photometry on the cutout")
    p.add_argument("--zero-point", type=float, default=None, help="AB zero point (default: header)")
    p.add_argument("--spread", action="store_true", help="also write the spread table for one model")
    p.add_argument("-o", "--output", required=True, help="output .ecsv, .csv or .vot")
    p.set_defaults(run=cmd_measure)

    p = sub.add_parser("images", help="all images of the source behind one position")
    add_models(p)
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
    add_models(p)
    add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns", required=True)
    add_pairing(p)
    p.add_argument("-o", "--output", required=True, help="output .ecsv, .csv or .vot")
    p.set_defaults(run=cmd_pair)

    p = sub.add_parser("figure", help="figure of the cutout with curves, knots, pairs and "
                                      "counter-images")
    add_models(p)
    p.add_argument("--cutout", required=True, help="FITS cutout")
    add_knots(p, "knot list to mark")
    p.add_argument("--pairs", action="store_true",
                   help="link the proposed mirrored pairs (the models' consensus, as on the page)")
    p.add_argument("--counterimages-of", metavar="LABEL",
                   help="draw the predicted counter-images of this knot in every model")
    add_pairing(p)
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
    add_models(p)
    p.add_argument("--cutout", action="append", nargs="+", required=True,
                   metavar=("FILE", "KEY=VALUE"),
                   help="a cutout in one filter, optionally followed by name=, zp= (AB zero "
                        "point), pivot= (micron, or with a unit), psf= (FWHM, arcsec) and beta= "
                        "(Moffat index of the PSF) where the header lacks them; repeat for each "
                        "filter")
    add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns", required=True)
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
    add_knots(p, "knot list: CSV/ECSV/VOTable with RA/Dec columns", required=True)
    p.add_argument("--z-lens", type=float, required=True, help="lens redshift")
    p.add_argument("--z-source", type=float, required=True, help="source redshift")
    p.add_argument("--units", choices=["arcsec", "pixel"], default=None,
                   help="deflection units of every realisation (default: the files' BUNIT)")
    p.add_argument("--z-norm", type=normalisation, default=None, metavar="Z|unit",
                   help="redshift the maps were made for, or 'unit' (default: the files' Z_NORM "
                        "keyword, else unit)")
    add_cosmology(p)
    p.add_argument("--percentiles", type=percentile_list, default=[2.5, 16.0, 50.0, 84.0, 97.5],
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


