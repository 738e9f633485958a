"""What is the knot? Colours, temperature, delensed luminosity and size against what stars can be.

`knot_nature` measures the knots in every filter (`lensview.photometry.measure_filters`),
fits a redshifted blackbody (`lensview.sed.fit_blackbody`), turns each model's
(and each realisation's) magnification into a delensed bolometric luminosity
and Stefan-Boltzmann radius (`lensview.sed.luminosity_and_radius`), sets the
source radius limit of an unresolved image (``r_image * |lambda_t|``,
`lensview.photometry.delensed_properties`) and compares all of it with the
limits of single stars below. The verdict is a statement of which
interpretations survive these limits, not an identification.

Limits used (each a published value, recalled rather than looked up where
marked):

* Eddington luminosity ``L_Edd = 4 pi G M c / kappa_es`` with the electron
  scattering opacity ``kappa_es = 0.2 (1 + X) cm^2 g^-1`` of fully ionised
  gas of hydrogen mass fraction X (Rybicki & Lightman 1979, *Radiative
  Processes in Astrophysics*, sec. 1.6 and 7.2, from memory), for the most
  massive stars known, ~300 M_sun (Crowther et al. 2010, MNRAS 408, 731,
  from memory);
* the empirical upper luminosity of cool supergiants, log L/L_sun = 5.8 below
  about 10^4 K (Humphreys & Davidson 1979, ApJ 232, 409, from memory);
* the largest stellar radii, ~1500 R_sun for red supergiants (Levesque et
  al. 2005, ApJ 628, 973, from memory);
* young massive star clusters have half-light radii of about 0.5-few pc,
  rarely below ~0.3 pc (Portegies Zwart, McMillan & Gieles 2010, ARA&A 48,
  431, from memory);
* "a few stars" means up to `FEW_STARS` of the most luminous (our own
  convention).
"""

import math
from dataclasses import dataclass

import numpy as np
import astropy.units as u
import astropy.constants as const
from astropy.table import Table

from .errors import LensviewInputError

__all__ = ["eddington_luminosity", "electron_scattering_opacity", "single_star_limit",
           "knot_verdict", "knot_nature", "KnotNature", "MAX_STELLAR_MASS",
           "COOL_STAR_LUMINOSITY", "COOL_STAR_TEMPERATURE", "LARGEST_STAR_RADIUS",
           "SMALLEST_CLUSTER_RADIUS", "FEW_STARS", "HYDROGEN_FRACTION", "CAUTIONS"]

#: Hydrogen mass fraction of a young massive star's envelope (near solar, from memory).
HYDROGEN_FRACTION = 0.7
#: Largest initial stellar mass known (Crowther et al. 2010, MNRAS 408, 731; from memory).
MAX_STELLAR_MASS = 300 * u.M_sun
#: Upper luminosity of cool supergiants (Humphreys & Davidson 1979, ApJ 232, 409; from memory).
COOL_STAR_LUMINOSITY = 10**5.8 * u.L_sun
#: Below this temperature the cool-supergiant limit applies (Humphreys & Davidson 1979; from memory).
COOL_STAR_TEMPERATURE = 1.0e4 * u.K
#: Largest stellar radii, red supergiants (Levesque et al. 2005, ApJ 628, 973; from memory).
LARGEST_STAR_RADIUS = 1500 * u.R_sun
#: Smallest half-light radius of young massive clusters (Portegies Zwart, McMillan &
#: Gieles 2010, ARA&A 48, 431; from memory).
SMALLEST_CLUSTER_RADIUS = 0.3 * u.pc
#: How many of the most luminous stars "a few stars" may be (our own convention).
FEW_STARS = 3

#: The cautions shown with every verdict (the README carries them too).
CAUTIONS = (
    "Magnifications near a critical curve differ strongly between lens models and diverge "
    "on the curve itself; the luminosity range is only as good as the models.",
    "A blackbody is a crude description of a stellar spectrum, and photometry in a few "
    "filters at monochromatic pivot wavelengths constrains the temperature loosely.",
    "Dust, a companion or a cluster's mixed population change the colours; the limits are "
    "published values recalled from the literature, not hard walls.",
    "Microlensing by stars in the cluster can raise a knot near the curve far above its "
    "smooth-model magnification for a while.",
    "Light of the arc around a knot falls into the aperture too (a local annulus on a thin "
    "arc does not remove it), and the point-source aperture correction assumes an "
    "unresolved knot.",
)


def electron_scattering_opacity(hydrogen_fraction=HYDROGEN_FRACTION):
    """kappa_es = 0.2 (1 + X) cm^2 / g (fully ionised gas; Rybicki & Lightman 1979, from memory)."""
    x = float(hydrogen_fraction)
    if not 0 <= x <= 1:
        raise LensviewInputError(f"The hydrogen mass fraction must lie in [0, 1]; got {x}.")
    return 0.2 * (1 + x) * u.cm**2 / u.g


def eddington_luminosity(mass, hydrogen_fraction=HYDROGEN_FRACTION):
    """L_Edd = 4 pi G M c / kappa_es, in nominal solar luminosities.

    Parameters
    ----------
    mass : `~astropy.units.Quantity`
        Stellar mass.
    hydrogen_fraction : float
        Hydrogen mass fraction X of the electron-scattering opacity.
    """
    mass = u.Quantity(mass, u.M_sun)
    kappa = electron_scattering_opacity(hydrogen_fraction)
    return (4 * np.pi * const.G * mass * const.c / kappa).to(u.L_sun)


def single_star_limit(temperature):
    """Highest luminosity one steady star may have at a temperature.

    The cool-supergiant limit below `COOL_STAR_TEMPERATURE`, else the
    Eddington luminosity of `MAX_STELLAR_MASS`; NaN temperatures get the
    Eddington value.
    """
    t = u.Quantity(temperature, u.K)
    eddington = eddington_luminosity(MAX_STELLAR_MASS)
    return np.where(t < COOL_STAR_TEMPERATURE, COOL_STAR_LUMINOSITY, eddington)


def knot_verdict(temperature, luminosity_range, radius_range, source_radius):
    """Which interpretations of a knot survive the single-star and cluster limits.

    Parameters
    ----------
    temperature : `~astropy.units.Quantity`
        Fitted rest-frame temperature (NaN: no fit).
    luminosity_range : pair of `~astropy.units.Quantity`
        Lowest and highest delensed luminosity across models (with their
        uncertainties).
    radius_range : pair of `~astropy.units.Quantity`
        Lowest and highest Stefan-Boltzmann radius.
    source_radius : `~astropy.units.Quantity`
        Largest source radius across models: the limit an unresolved image
        sets (``r_image * |lambda_t|``) or a resolved image's delensed
        radius (NaN: unknown).

    Returns
    -------
    dict
        ``single_star``, ``few_stars``, ``cluster``, ``transient`` (bools)
        and ``verdict`` (text of our own wording).
    """
    t = u.Quantity(temperature, u.K)
    l_low = u.Quantity(luminosity_range[0], u.L_sun)
    r_low = u.Quantity(radius_range[0], u.R_sun)
    size = u.Quantity(source_radius, u.pc)
    if not (np.isfinite(t) and np.isfinite(l_low) and np.isfinite(r_low)):
        return dict(single_star=False, few_stars=False, cluster=False, transient=False,
                    verdict="undecided: no temperature or no finite magnification")
    limit = single_star_limit(t)
    single = bool(l_low <= limit and r_low <= LARGEST_STAR_RADIUS)
    few = bool(l_low <= FEW_STARS * limit and r_low <= math.sqrt(FEW_STARS) * LARGEST_STAR_RADIUS)
    cluster = bool(not np.isfinite(size) or size >= SMALLEST_CLUSTER_RADIUS)
    transient = not (single or few or cluster)
    if transient:
        text = ("brighter than steady stars yet smaller than star clusters: a transient, an "
                "eruption or a star boosted by microlensing?")
    elif cluster and not (single or few):
        text = "only a star cluster fits"
    else:
        parts = []
        if single:
            parts.append("a single star fits")
        if few:
            parts.append("a binary or a few stars fit")
        parts.append("a star cluster fits" if cluster else "too small for a star cluster")
        text = "; ".join(parts)
    return dict(single_star=single, few_stars=few, cluster=cluster, transient=transient,
                verdict=text)


@dataclass
class KnotNature:
    """Result of `knot_nature`.

    Attributes
    ----------
    summary : `~astropy.table.Table`
        One row per knot: ``temperature`` (K) and ``temperature_err``,
        ``chi2``, ``dof``, ``n_filters``, ``luminosity_min`` /
        ``luminosity_max`` (L_sun, across models, widened by the fit
        uncertainty), ``radius_min`` / ``radius_max`` (R_sun),
        ``source_radius_pc`` and ``source_radius_kind`` ("upper limit",
        "measured" or "unknown"), ``single_star_limit`` (L_sun), the flags
        ``single_star``, ``few_stars``, ``cluster``, ``transient``, the
        ``verdict`` text and a ``note``. ``meta`` holds the limits used and
        the cautions.
    per_model : `~astropy.table.Table`
        One row per (knot, model) and per realisation (``model`` =
        ``"realisation N"``): ``mu``, ``luminosity`` and ``luminosity_err``
        (L_sun), ``radius`` and ``radius_err`` (R_sun), ``source_radius_pc``.
    photometry : `~astropy.table.Table`
        Forced photometry, one row per (knot, filter).
    colours : `~astropy.table.Table`
        AB colours per knot.
    fits : list of `~lensview.sed.BlackbodyFit`
        One per knot.
    """

    summary: Table
    per_model: Table
    photometry: Table
    colours: Table
    fits: list


def _mu_table(models, coords, z_source, cosmology, labels):
    if isinstance(models, Table):
        needed = {"candidate", "model", "mu"}
        if not needed <= set(models.colnames):
            raise LensviewInputError(
                "A magnification table needs the columns candidate, model and mu (as written "
                "by lensview.measure_candidates).")
        return models
    from .measure import measure_candidates

    models = list(models) if isinstance(models, (list, tuple)) else [models]
    if not models:
        raise LensviewInputError("Give at least one lens model for the magnifications.")
    return measure_candidates(coords, models, z_source, cosmology=cosmology, labels=labels)


def _image_radii(images, coords):
    """Image radius of each knot on the sharpest filter (arcsec): the unresolved
    limit, or the measured intrinsic half width of a resolved knot; NaN when unknown."""
    from .photometry import measure_size

    with_psf = [image for image in images if image.band.psf_fwhm is not None]
    radii = np.full(len(coords), np.nan)
    kinds = ["unknown"] * len(coords)
    notes = [""] * len(coords)
    if not with_psf:
        return radii, kinds, ["no PSF FWHM known: no size"] * len(coords), None
    sharpest = min(with_psf, key=lambda image: image.band.psf_fwhm.to_value(u.arcsec))
    for k, coord in enumerate(coords):
        size = measure_size(sharpest.data, sharpest.wcs, coord, psf_fwhm=sharpest.band.psf_fwhm)
        if size.note:
            notes[k] = f"no size in {sharpest.band.name}: {size.note}"
        elif size.resolved:
            radii[k], kinds[k] = size.radius.to_value(u.arcsec), "measured"
        else:
            radii[k], kinds[k] = size.radius_limit.to_value(u.arcsec), "upper limit"
    return radii, kinds, notes, sharpest.band.name


def knot_nature(images, coords, models, z_source, *, labels=None, radius=None, dust=None,
                realisations=None, cosmology=None):
    """Colours, blackbody temperature, delensed luminosity and radius, and a verdict per knot.

    Parameters
    ----------
    images : sequence of `~lensview.photometry.BandImage`
        One cutout per filter (see `lensview.photometry.band_image`).
    coords : `~astropy.coordinates.SkyCoord`
        The knots.
    models : `~lensview.DeflectionField`, list of them, or `~astropy.table.Table`
        Lens models (measured with `lensview.measure_candidates`), or a table
        of that form with ``candidate``, ``model``, ``mu`` (and ``lambda_t``
        for the size limit).
    z_source : float
        Source redshift.
    labels : sequence of str, optional
        Knot names.
    radius : `~astropy.units.Quantity`, optional
        Aperture radius (see `lensview.photometry.measure_filters`).
    dust : `~lensview.sed.Dust`, optional
        Rest-frame extinction; None for no dust.
    realisations : `~astropy.table.Table`, optional
        Magnifications of an ensemble: columns ``candidate`` and ``mu``, one
        row per realisation; added to the luminosity range.
    cosmology : `~astropy.cosmology.Cosmology`, optional
        Default Planck18.

    Returns
    -------
    KnotNature
    """
    from .checks import positive_redshift, sky_coord
    from .photometry import ab_colours, delensed_properties, measure_filters
    from .sed import fit_blackbody, luminosity_and_radius

    z = positive_redshift(z_source, "z_source")
    coords = sky_coord(coords, "coords").reshape(-1)
    if labels is None:
        labels = [f"K{k + 1}" for k in range(len(coords))]
    labels = [str(label) for label in labels]
    if realisations is not None and not (isinstance(realisations, Table)
                                         and {"candidate", "mu"} <= set(realisations.colnames)):
        raise LensviewInputError(
            "The realisations must be a table with the columns candidate (0-based knot index) "
            "and mu, one row per realisation.")
    photometry = measure_filters(images, coords, radius=radius, labels=labels)
    colours = ab_colours(photometry)
    mu_rows = _mu_table(models, coords, z, cosmology, labels)
    image_radii, size_kinds, size_notes, size_band = _image_radii(list(images), coords)

    fits, per_model_rows, summary_rows = [], [], []
    for k in range(len(coords)):
        rows = photometry[np.asarray(photometry["candidate"]) == k]
        fit = fit_blackbody(rows["pivot"].quantity, rows["flux"].quantity,
                            rows["flux_err"].quantity, z, dust=dust)
        fits.append(fit)
        own = mu_rows[np.asarray(mu_rows["candidate"]) == k]
        names = [str(name) for name in own["model"]]
        mus = np.asarray(own["mu"], float)
        lambda_t = (np.asarray(own["lambda_t"], float) if "lambda_t" in own.colnames
                    else np.full(len(own), np.nan))
        if realisations is not None:
            extra = np.asarray(realisations["mu"], float)[np.asarray(realisations["candidate"]) == k]
            names += [f"realisation {i + 1}" for i in range(extra.size)]
            mus = np.concatenate([mus, extra])
            lambda_t = np.concatenate([lambda_t, np.full(extra.size, np.nan)])
        derived = luminosity_and_radius(fit, mus, cosmology=cosmology)
        size_pc = np.full(mus.size, np.nan)
        if np.isfinite(image_radii[k]) and mus.size:
            limit = delensed_properties(mu=np.where(np.isfinite(mus), mus, np.nan), z_source=z,
                                        lambda_t=lambda_t,
                                        image_radius_limit=image_radii[k] * u.arcsec,
                                        cosmology=cosmology)
            size_pc = np.asarray(limit["source_radius_limit_pc"], float)
        for i, name in enumerate(names):
            per_model_rows.append((k, labels[k], name, mus[i], float(derived["luminosity"][i]),
                                   float(derived["luminosity_err"][i]),
                                   float(derived["radius"][i]), float(derived["radius_err"][i]),
                                   size_pc[i]))
        summary_rows.append(_summary_row(k, labels[k], fit, derived, size_pc, size_kinds[k],
                                         size_notes[k]))

    per_model = Table(rows=per_model_rows or None,
                      names=("candidate", "label", "model", "mu", "luminosity", "luminosity_err",
                             "radius", "radius_err", "source_radius_pc"),
                      dtype=(np.int64, str, str, float, float, float, float, float, float))
    for name, unit in (("luminosity", u.L_sun), ("luminosity_err", u.L_sun), ("radius", u.R_sun),
                       ("radius_err", u.R_sun), ("source_radius_pc", u.pc)):
        per_model[name].unit = unit
    summary = _summary_table(summary_rows)
    summary.meta.update(z_source=z, dust="none" if dust is None else dust.describe(),
                        size_band=size_band or "", cautions=list(CAUTIONS),
                        limits=_limits_text())
    return KnotNature(summary=summary, per_model=per_model, photometry=photometry,
                      colours=colours, fits=fits)


def _summary_row(k, label, fit, derived, size_pc, size_kind, size_note):
    lum = np.asarray(derived["luminosity"], float)
    lum_err = np.asarray(derived["luminosity_err"], float)
    rad = np.asarray(derived["radius"], float)
    good = np.isfinite(lum)
    if good.any():
        # Ranges over models, widened by each value's uncertainty in log (multiplicative).
        factor = np.where(np.isfinite(lum_err[good]), 1 + lum_err[good] / lum[good], 1.0)
        l_low, l_high = float(np.min(lum[good] / factor)), float(np.max(lum[good] * factor))
        r_low, r_high = float(np.nanmin(rad[good])), float(np.nanmax(rad[good]))
    else:
        l_low = l_high = r_low = r_high = np.nan
    size = float(np.nanmax(size_pc)) if np.isfinite(size_pc).any() else np.nan
    verdict = knot_verdict(fit.temperature, (l_low, l_high), (r_low, r_high), size * u.pc)
    notes = [note for note in (fit.note, size_note) if note]
    return (k, label, fit.temperature.to_value(u.K), fit.temperature_err.to_value(u.K), fit.chi2,
            fit.dof, int(np.isfinite(fit.flux.value).sum()), l_low, l_high, r_low, r_high, size,
            size_kind if np.isfinite(size) else "unknown",
            float(single_star_limit(fit.temperature).to_value(u.L_sun)),
            verdict["single_star"], verdict["few_stars"], verdict["cluster"],
            verdict["transient"], verdict["verdict"], "; ".join(notes))


def _summary_table(rows):
    names = ("candidate", "label", "temperature", "temperature_err", "chi2", "dof", "n_filters",
             "luminosity_min", "luminosity_max", "radius_min", "radius_max",
             "source_radius_pc", "source_radius_kind", "single_star_limit", "single_star", "few_stars",
             "cluster", "transient", "verdict", "note")
    dtypes = (np.int64, str, float, float, float, np.int64, np.int64, float, float, float, float,
              float, str, float, bool, bool, bool, bool, str, str)
    table = Table(rows=rows or None, names=names, dtype=dtypes)
    for name, unit in (("temperature", u.K), ("temperature_err", u.K),
                       ("luminosity_min", u.L_sun), ("luminosity_max", u.L_sun),
                       ("radius_min", u.R_sun), ("radius_max", u.R_sun),
                       ("source_radius_pc", u.pc), ("single_star_limit", u.L_sun)):
        table[name].unit = unit
    return table


def _limits_text():
    eddington = eddington_luminosity(MAX_STELLAR_MASS).to_value(u.L_sun)
    return [
        f"Eddington luminosity of {MAX_STELLAR_MASS.to_value(u.M_sun):.0f} M_sun with "
        f"kappa_es = 0.2(1+X) cm2/g, X = {HYDROGEN_FRACTION}: {eddington:.3g} L_sun "
        "(Crowther et al. 2010, MNRAS 408, 731 for the mass; from memory)",
        f"cool supergiants (T < {COOL_STAR_TEMPERATURE.to_value(u.K):.0f} K): log L/L_sun = 5.8 "
        "(Humphreys & Davidson 1979, ApJ 232, 409; from memory)",
        f"largest stellar radius {LARGEST_STAR_RADIUS.to_value(u.R_sun):.0f} R_sun "
        "(Levesque et al. 2005, ApJ 628, 973; from memory)",
        f"smallest star-cluster radius {SMALLEST_CLUSTER_RADIUS.to_value(u.pc):g} pc "
        "(Portegies Zwart, McMillan & Gieles 2010, ARA&A 48, 431; from memory)",
        f"a few stars: up to {FEW_STARS} of the most luminous (our own convention)",
    ]
