"""``curves``, ``measure``, ``images``, ``pair`` and ``figure``: the lens models against the knots."""


import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord

from ..errors import LensviewInputError
from .options import (cosmology_from_args, load_models, positive_or_none, progress, read_knots,
                      sibling_path)

def cmd_curves(args):
    from ..io import write_regions
    from ..io.fits import read_cutout

    fields = load_models(args)
    curves = []
    for field in fields:
        progress(f"critical curves of {field.name}")
        curves += list(field.critical_curves(args.z_source))
        if args.caustics:
            curves += list(field.caustics(args.z_source))
    wcs = read_cutout(args.cutout).wcs if args.cutout else fields[0].wcs
    candidates = read_knots(args.candidates, wcs)[2] if args.candidates else None
    write_regions(args.output, curves, candidates, wcs=wcs)
    extra = f" and {len(candidates)} knot(s)" if candidates is not None else ""
    print(f"wrote {len(curves)} curve(s){extra} to {args.output}")


def cmd_measure(args):
    from ..io import write_table
    from ..measure import measure_candidates, summarize_models

    if args.aperture is not None and not args.cutout:
        raise LensviewInputError("--aperture needs --cutout: photometry is measured on the cutout.")
    positive_or_none(args.aperture, "--aperture")
    if args.zero_point is not None and args.aperture is None:
        raise LensviewInputError("--zero-point is used only with --aperture photometry; add --aperture.")
    cutout = None
    if args.cutout:
        from ..io.fits import read_cutout

        cutout = read_cutout(args.cutout)
    coords, labels, _ = read_knots(args.candidates, cutout.wcs if cutout else None)
    fields = load_models(args)
    if cutout is not None:
        for field in fields:
            field.require_overlap(cutout.wcs, cutout.data.shape)
    progress(f"measuring {len(coords)} knot(s) against {len(fields)} model(s)")
    table = measure_candidates(coords, fields, args.z_source, cosmology=cosmology_from_args(args), labels=labels)
    if cutout is not None and args.aperture is not None:
        table = _add_photometry(table, coords, cutout, args)
    cosmology = cosmology_from_args(args) or fields[0].cosmology
    write_table(table, args.output, cosmology=cosmology)
    print(f"wrote {len(table)} row(s) to {args.output}")
    if len(fields) > 1 or args.spread:
        spread_path = sibling_path(args.output, "_spread")
        write_table(summarize_models(table), spread_path, cosmology=cosmology)
        print(f"wrote the model spread to {spread_path}")


def _add_photometry(table, coords, cutout, args):
    from astropy.table import join

    from ..photometry import aperture_photometry, delensed_properties, zero_point

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
                                       cosmology=cosmology_from_args(args))
        for name in delensed.colnames:
            if name not in merged.colnames:
                merged[name] = delensed[name]
    merged.sort(["model", "candidate"])
    return merged


def cmd_images(args):
    from ..counterparts import predict_counterimages
    from ..io import write_table

    fields = load_models(args)
    coord = SkyCoord(args.ra * u.deg, args.dec * u.deg)
    psf = args.psf_fwhm * u.arcsec if args.psf_fwhm is not None else None
    tables = []
    for field in fields:
        progress(f"solving the lens equation on {field.name}")
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
    from ..counterparts import pair_counterparts
    from ..io import write_table

    coords, labels, _ = read_knots(args.candidates)
    fields = load_models(args)
    tolerance = positive_or_none(args.tolerance, "--tolerance")
    psf = positive_or_none(args.psf_fwhm, "--psf-fwhm")
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
    from ..figures import render_field_figure, save_figure
    from ..io.fits import read_cutout

    cutout = read_cutout(args.cutout)
    fields = load_models(args)
    for field in fields:
        field.require_overlap(cutout.wcs, cutout.data.shape)
    curves = []
    for field in fields:
        curves += list(field.critical_curves(args.z_source))
    candidates = pairs = counterimages = None
    if args.candidates:
        coords, _, candidates = read_knots(args.candidates, cutout.wcs)
    if (args.pairs or args.counterimages_of) and candidates is None:
        raise LensviewInputError("--pairs and --counterimages-of need the knots: add --knots FILE.")
    psf = positive_or_none(args.psf_fwhm, "--psf-fwhm")
    if args.pairs and len(coords) >= 2:
        from ..counterparts import pair_counterparts

        found = pair_counterparts(coords, fields, args.z_source, psf_fwhm=psf,
                                  tolerance=positive_or_none(args.tolerance, "--tolerance"))
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
        from ..io.mapfiles import OVERLAY_ONLY_REASON, read_magnification_map

        overlay = read_magnification_map(args.magnification_map)
        progress(OVERLAY_ONLY_REASON)
    fig = render_field_figure(cutout.data, cutout.wcs, curves=curves, candidates=candidates,
                              pairs=pairs, counterimages=counterimages, z_lens=args.z_lens,
                              cosmology=cosmology_from_args(args), stretch=args.stretch, limits=limits,
                              cmap=args.cmap, magnification_map=overlay)
    save_figure(fig, args.output, dpi=args.dpi)
    print(f"wrote {args.output}")


def _counterimages_of(label, candidates, fields, z_source, psf):
    from astropy.table import vstack

    from ..counterparts import predict_counterimages

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


