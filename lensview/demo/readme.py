"""The demo folder's README with the scenario's true values."""


import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from .maps import scaled_size
from .scenario import (CANDIDATE_FILE, CENTRE, CLUMP_SLOPE, CLUSTER_NAME, COMPACT_TEMPERATURE,
                       CUTOUT_FILE, CUTOUT_SCALE, CUTOUT_SHAPE, describe_model, FIELD_SLOPE,
                       FILTERS, GRIDS, HOST, HOST_SLOPE, KNOTS, MEMBER_SLOPE, MEMBERS, MODEL_NAMES,
                       OVERSAMPLE, PSF_BETA, PSF_FWHM, REFERENCE_FILTER, SKY_SIGMA, TRUTH_MODEL,
                       VERSIONS_FILE, Z_LENS, Z_SOURCE, ZERO_POINT)



def _radec(coord):
    return f"{coord.ra.deg:.7f}, {coord.dec.deg:+.7f}"


def _compact_truth():
    """True temperature, luminosity and radius of the compact object C."""
    from ..sed import blackbody_flux_density, stefan_boltzmann_luminosity
    from astropy.cosmology import Planck18

    reference = next(f for f in FILTERS if f.name == REFERENCE_FILTER)
    observed = (KNOTS[0].mag * u.ABmag).to(u.uJy)
    # Unlensed Omega = (1 + z) pi R^2 / D_L^2 (see lensview.sed).
    omega = float(observed / blackbody_flux_density(reference.pivot_um * u.um,
                                                     COMPACT_TEMPERATURE, 1.0, Z_SOURCE))
    radius = (Planck18.luminosity_distance(Z_SOURCE) * np.sqrt(omega / (np.pi * (1 + Z_SOURCE)))
              ).to(u.R_sun)
    luminosity = stefan_boltzmann_luminosity(radius, COMPACT_TEMPERATURE)
    radius_pc = radius.to_value(u.pc)
    return luminosity.to_value(u.L_sun), radius.to_value(u.R_sun), radius_pc


def _filters_section(size_factor):
    from .colours import compact_magnitude, filter_look

    rows = []
    for f in FILTERS:
        look = filter_look(f)
        base = int(round(CUTOUT_SHAPE[0] * CUTOUT_SCALE / f.scale))
        n = scaled_size(base, size_factor)
        rows.append(f"| `{f.file}` | {f.name} | {f.pivot_um:g} | {f.psf_fwhm:g}\" | {f.zero_point:g} | "
                    f"{n} x {n} of {f.scale * base / n:.4g}\", +y at PA {f.rotation:+.0f} deg | "
                    f"{f.sky_sigma:g} | {compact_magnitude(f.pivot_um):.2f} | "
                    f"{HOST['mag'] + look.host_offset:.2f} |")
    luminosity, radius, radius_pc = _compact_truth()
    return "\n".join(rows), luminosity, radius, radius_pc


def readme_text(fields, values, candidates, size_factor, seed):
    from ..measure import measure_candidates

    grids = "\n".join(
        f"| `{'`, `'.join(g.files)}` | {g.name} | {g.layout} | "
        f"{'D_ls/D_s = 1' if g.z_norm is None else f'source at z = {g.z_norm} (`Z_NORM`)'} | "
        f"{scaled_size(g.size, size_factor)}^2 pixels of "
        f"{g.scale * g.size / scaled_size(g.size, size_factor):.4g}\", "
        f"+y axis at PA {g.rotation:+.0f} deg |"
        for g in GRIDS)
    models = "\n".join(f"* `{name}`{' (the truth)' if name == TRUTH_MODEL else ''}: "
                       f"{describe_model(name)}." for name in MODEL_NAMES)
    members = ", ".join(f"({m.east:+.1f}\", {m.north:+.1f}\")" for m in MEMBERS)
    cutout_n = scaled_size(CUTOUT_SHAPE[0], size_factor)
    cutout_scale = CUTOUT_SCALE * CUTOUT_SHAPE[0] / cutout_n
    knots = values["knots"]
    compact, mirror = knots["C"], knots["M1"]
    pairs = "\n".join(
        f"| {label} | {k['inward'] * 1e3:.4g} mas ({k['caustic_offset_pc']:.4g} pc) | "
        f"{k['knot'].mag} | {k['knot'].sigma * 1e3:g} mas | {k['separation']:.3f}\" | "
        f"{k['mu'][0]:+.1f} / {k['mu'][1]:+.1f} | "
        f"{k['curve_offsets'][0]:.3f}\" / {k['curve_offsets'][1]:.3f}\" | "
        f"{k['midpoint_offset'] * 1e3:.1f} mas |"
        for label, k in knots.items())
    outer_mu = np.abs(np.concatenate([knots[label]["mu"] for label in ("M2", "M3", "M4")]))
    coords = SkyCoord(np.asarray(candidates["ra"]) * u.deg, np.asarray(candidates["dec"]) * u.deg)
    spread = measure_candidates(coords, fields, Z_SOURCE, labels=list(candidates["label"]))
    by_key = {(row["label"], row["model"]): row for row in spread}
    header = " | ".join(f"mu, offset ({name})" for name in MODEL_NAMES)
    spread_rows = "\n".join(
        f"| {row['label']} | {row['ra']:.7f} | {row['dec']:+.7f} | {row['pair_id']} | "
        + " | ".join(_mu_offset(by_key[(row['label'], name)]) for name in MODEL_NAMES) + " |"
        for row in candidates)
    source_rows = "\n".join(f"| {i} | {row['ra']:.7f} | {row['dec']:+.7f} | {row['mu']:+.2f} |"
                            for i, row in enumerate(values["source_images"]))
    lens_pc, source_pc = values["pc_per_arcsec_lens"], values["pc_per_arcsec_source"]
    c_offsets, c_mu = compact["curve_offsets"], compact["mu"]
    from ..nature import MAX_STELLAR_MASS, eddington_luminosity

    filter_rows, compact_luminosity, compact_radius, compact_radius_pc = _filters_section(size_factor)
    eddington = eddington_luminosity(MAX_STELLAR_MASS).to_value(u.L_sun)
    fold_offsets = ", ".join(f"{name} {values['curve_offsets_at_fold'][name]:.3f}\""
                             for name in MODEL_NAMES)
    return f"""# Demo scenario: the {CLUSTER_NAME} (invented data)

Everything in this folder is invented and was written by `lensview.demo`:
the cluster, its name, position and redshift, its galaxies, the lensed
galaxy and every number below. No real object, survey or publication is
behind any of it. The app opens on these files, and the README examples and
end-to-end tests use them:

```python
from lensview.demo import load_demo
cutout, fields, candidates = load_demo()   # Cutout, 3 DeflectionFields, Table
```

Regenerate them (the bundled files use seed {seed}) with
`lensview demo sample_images`, or `lensview.demo.generate_demo("sample_images")`:
bit for bit with the library versions in `{VERSIONS_FILE}`; other releases
round differently, far below the noise and a micro-arcsecond.

## The scenario

A massive cluster at **z_lens = {Z_LENS}** (centre RA, Dec = {_radec(CENTRE)} deg)
lenses a clumpy star-forming galaxy at **z_source = {Z_SOURCE}** into a giant arc
that crosses the tangential critical curve at a fold. Cosmology: Planck18
(D_ls/D_s = {values['scaling']:.4f} for the source; 1\" = {lens_pc:.0f} pc in the lens plane and
{source_pc:.0f} pc in the source plane).

Lens models of the same cluster, deliberately different (Einstein radii for
D_ls/D_s = 1; positions in arcsec East and North of the cluster centre):

{models}

Member galaxies at {members}; the first is the brightest cluster galaxy.
Near the arc the models' tangential curves lie apart: the truth's fold point
is {fold_offsets} from each model's nearest critical curve.

The source, in the source plane, is set out from the fold point of the
caustic (offsets along the caustic and towards its inside): an exponential
disk (half-light radius {HOST['r_eff']}\" = {HOST['r_eff'] * source_pc:.0f} pc, intrinsic AB
{HOST['mag']}) with Gaussian star-forming clumps, and a compact unresolved object (intrinsic AB
{KNOTS[0].mag}) just inside the caustic.

The cutout `{CUTOUT_FILE}` has {cutout_n} x {cutout_n} pixels of {cutout_scale:.4g}\", North up
and East left (celestial TAN WCS), in counts per second with the AB zero point
`PHOTZP = {ZERO_POINT}`. It was ray traced through the truth model with
{OVERSAMPLE} x {OVERSAMPLE} sub-pixels per pixel (surface brightness conserved); clumps
smaller than the sub-pixels were drawn from their images' local lens
mapping, and the compact object's two images as point sources with their
magnifications. Member galaxies are Sersic profiles at the models' member
positions, and there are twelve faint unlensed field galaxies. The image is
convolved with a Moffat PSF (FWHM {PSF_FWHM}\", beta = {PSF_BETA}) and carries Gaussian sky
noise (sigma = {SKY_SIGMA} count/s per pixel) from seed {seed}.

## Filters

The field is rendered in four invented filters (names of our own), each
cutout with its own WCS (pixel scale and rotation), Moffat PSF and AB zero
point in the header (`FILTER`, `PHOTPLAM` in Angstrom, `PSF_FWHM` in arcsec,
`PHOTZP`); the same field galaxies and member galaxies appear in all. The
magnitudes quoted elsewhere in this README are those of the reference filter
{REFERENCE_FILTER} (`{CUTOUT_FILE}`, the cutout `load_demo` returns). In the
other filters each part of the scene is brighter or fainter by its SED, taken
at the pivot wavelength: the compact object C is a **blackbody of
{COMPACT_TEMPERATURE:.0f} K** in its rest frame at z = {Z_SOURCE}; the host has f_nu ~ lambda^{HOST_SLOPE:g},
the clumps f_nu ~ lambda^{CLUMP_SLOPE:g}, the members f_nu ~ lambda^{MEMBER_SLOPE:g} and the field
galaxies f_nu ~ lambda^{FIELD_SLOPE:g}. No dust.

| file | filter | pivot (micron) | PSF FWHM | zero point (AB) | grid | sky sigma (count/s) \
| C intrinsic AB | host intrinsic AB |
| --- | --- | --- | --- | --- | --- | --- | --- | --- |
{filter_rows}

**True nature of C**: unlensed, a blackbody of {COMPACT_TEMPERATURE:.0f} K and intrinsic AB {KNOTS[0].mag} at
{REFERENCE_FILTER} has radius **{compact_radius:.0f} R_sun** ({compact_radius_pc:.3g} pc) and bolometric
luminosity **{compact_luminosity:.3g} L_sun** (log L/L_sun = {np.log10(compact_luminosity):.2f}; nominal solar
units of IAU 2015 Resolution B3, Planck18 distances). That is {compact_luminosity / eddington:.1f} times the
Eddington luminosity of a {MAX_STELLAR_MASS.value:.0f} M_sun star and far smaller than a star cluster: the
invented object is beyond what one steady star can be, and how clearly a measurement says so
depends on the magnification each model gives it (`lensview.knot_nature`).
`lensview.demo.load_demo_filters()` returns the four cutouts as `BandImage`s.

## Files

| files | model | layout | normalisation | grid |
| --- | --- | --- | --- | --- |
{grids}

Deflections are in arcsec along each map's own +x and +y pixel axes
(`BUNIT = 'arcsec'`). Every map header holds `Z_LENS`, and `Z_NORM` where the
maps are normalised to a reference source redshift instead of D_ls/D_s = 1.
`{CANDIDATE_FILE}` lists the knots a user would mark (`ra`, `dec`, `label`,
`pair_id`, `note`); its metadata hold the redshifts and the true images of the
compact object.

## True values (truth model `{TRUTH_MODEL}`, z_source = {Z_SOURCE})

The arc crosses the tangential critical curve at {_radec(values['fold_image'])}; the
fold point of the caustic is {_radec(values['fold_source'])}, {values['cusp_distance']:.2f}\" along the
caustic from the nearest cusp.

**Compact object C**: {compact['inward'] * 1e6:.1f} micro-arcsec ({compact['caustic_offset_pc']:.3f} pc)
inside the caustic. Its two images lie {compact['separation']:.3f}\" apart (well inside the PSF,
so they merge into one knot on the curve), {c_offsets[0]:.3f}\" and {c_offsets[1]:.3f}\" from
the critical curve, with mu = {c_mu[0]:+.0f} and {c_mu[1]:+.0f}: **total magnification
{np.abs(c_mu).sum():.0f}**. The images are at {_radec(compact['images'][0])} and
{_radec(compact['images'][1])}.

**Mirrored clump M1**: {mirror['inward'] * 1e3:.2f} mas inside the caustic. Its two images lie
{mirror['separation']:.3f}\" apart on either side of the curve, with opposite parity (mu =
{mirror['mu'][0]:+.1f} and {mirror['mu'][1]:+.1f}); their midpoint is
{mirror['midpoint_offset'] * 1e3:.1f} mas from the curve.

| knot | inside the caustic by | intrinsic AB | sigma | image separation | mu (even / odd) \
| images' offsets from the curve | midpoint to curve |
| --- | --- | --- | --- | --- | --- | --- | --- |
{pairs}

The lensed galaxy's total magnification in the cutout (lensed flux over
intrinsic flux, without the compact object, noise free) is **{values['arc_mu']:.1f}**; the
clumps' images away from the curve (M2-M4) are magnified {outer_mu.min():.0f}-{outer_mu.max():.0f} times,
as cluster arcs typically are.

All images of the source of M4 on the truth map, counter-images outside the
cutout included (`lensview.predict_counterimages`):

| image | ra | dec | mu |
| --- | --- | --- | --- |
{source_rows}

## Candidate list and model spread

Magnification and offset from each model's nearest critical curve
(`lensview.measure_candidates`):

| label | ra | dec | pair_id | {header} |
| --- | --- | --- | --- | {' | '.join('---' for _ in MODEL_NAMES)} |
{spread_rows}
"""


def _mu_offset(row):
    mu = float(row["mu"])
    text = f"{mu:+.3g}" if abs(mu) < 1e4 else "on the curve"
    return f"{text}, {float(row['offset_arcsec']):.3f}\""
