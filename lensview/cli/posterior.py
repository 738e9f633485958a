"""``posterior``: knots across many realisations of one lens model."""

import warnings
from .options import ProgressBar, UNIT_NORMALISATION, cosmology_from_args, progress, read_knots



def cmd_posterior(args):
    from ..lens.loading import FROM_HEADER
    from ..ensemble import BrokenRealisationWarning, measure_ensemble
    from ..io import write_table

    coords, labels, _ = read_knots(args.candidates)
    z_norm = FROM_HEADER if args.z_norm is None else (
        None if args.z_norm == UNIT_NORMALISATION else args.z_norm)
    cosmology = cosmology_from_args(args)
    progress(f"measuring {len(coords)} knot(s) on the realisations in "
              f"{', '.join(args.realisations)}")
    with ProgressBar("realisations") as bar, warnings.catch_warnings():
        warnings.simplefilter("ignore", BrokenRealisationWarning)  # reported below, one per line
        summary, samples = measure_ensemble(
            coords, args.realisations, args.z_source, z_lens=args.z_lens, units=args.units,
            z_norm=z_norm, cosmology=cosmology, labels=labels, percentiles=args.percentiles,
            mu_thresholds=args.mu_threshold, scheduler=args.scheduler, progress=bar.update,
            return_samples=True)
    for broken in summary.meta["broken"]:
        progress(f"left out {broken['name']}: {broken['message']}")
    write_table(summary, args.output, cosmology=cosmology)
    print(f"wrote the distributions of {len(summary)} knot(s) over "
          f"{summary.meta['n_realisations']} realisation(s) to {args.output}")
    if args.samples:
        write_table(samples, args.samples, cosmology=cosmology)
        print(f"wrote {len(samples)} per-realisation row(s) to {args.samples}")


