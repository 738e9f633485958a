"""Forced aperture photometry of knots in several filters at the same sky positions.

Each filter is measured on its own cutout, with its own WCS, at the sky
positions of the knots (no re-centring per filter, so the colours refer to
the same place), through `lensview.photometry.aperture_photometry` (photutils
apertures, sigma-clipped annulus background; the uncertainty comes from the
annulus scatter). Fluxes are converted to f_nu with each band's AB zero
point (Oke & Gunn 1983, ApJ 266, 713).
"""

import numpy as np
import astropy.units as u
from astropy.table import Table

from ..checks import angle_arcsec, sky_coord
from ..errors import LensviewInputError
from .aperture import aperture_photometry
from .bands import BandImage
from .frame import inside_image, pixels_of

__all__ = ["measure_filters", "ab_colours", "require_common_footprint", "point_source_correction",
           "DEFAULT_RADIUS_PER_FWHM"]

#: Default aperture radius, in units of the widest PSF FWHM of the set (common practice:
#: an aperture of 1-2 FWHM keeps most of a point source's light in every filter).
DEFAULT_RADIUS_PER_FWHM = 1.5
_FOOTPRINT_SAMPLES = 17


def _sample_pixels(shape, n=_FOOTPRINT_SAMPLES):
    ny, nx = shape
    gx, gy = np.meshgrid(np.linspace(-0.5, nx - 0.5, n), np.linspace(-0.5, ny - 0.5, n))
    return gx.ravel(), gy.ravel()


def _overlap(a, b):
    """Whether cutout ``b`` reaches onto cutout ``a`` (a sampled test of both directions)."""
    for one, other in ((a, b), (b, a)):
        x, y = _sample_pixels(other.data.shape)
        sky = other.wcs.pixel_to_world(x, y)
        px, py = pixels_of(one.wcs, sky)
        if inside_image(px, py, one.data.shape).any():
            return True
    return False


def require_common_footprint(images):
    """Check that every pair of cutouts covers a common patch of sky.

    Parameters
    ----------
    images : sequence of `BandImage`

    Raises
    ------
    LensviewInputError
        Naming the two filters whose footprints do not overlap.
    """
    for i, a in enumerate(images):
        for b in images[i + 1:]:
            if not _overlap(a, b):
                centre_a = a.wcs.pixel_to_world(*(np.array(a.data.shape[::-1]) / 2 - 0.5))
                centre_b = b.wcs.pixel_to_world(*(np.array(b.data.shape[::-1]) / 2 - 0.5))
                raise LensviewInputError(
                    f"The cutouts in {a.band.name!r} and {b.band.name!r} do not overlap on the "
                    f"sky (their centres are {centre_a.separation(centre_b).arcsec:.1f} arcsec "
                    "apart): give cutouts of the same field in every filter.")


def _check_images(images):
    images = list(images)
    if not images:
        raise LensviewInputError("Give at least one cutout (a BandImage per filter).")
    for image in images:
        if not isinstance(image, BandImage):
            raise LensviewInputError(
                "Each filter must be a lensview.photometry.BandImage (see band_image); "
                f"got {type(image).__name__}.")
    names = [image.band.name for image in images]
    repeated = sorted({name for name in names if names.count(name) > 1})
    if repeated:
        raise LensviewInputError(
            f"The filter name(s) {', '.join(repeated)} appear more than once; give each cutout "
            "a distinct filter name.")
    for image in images:
        image.band.require_zero_point()
    return images


def _default_radius(images):
    widths = [image.band.psf_fwhm for image in images]
    missing = [image.band.name for image, w in zip(images, widths) if w is None]
    if missing:
        raise LensviewInputError(
            f"No aperture radius was given and the PSF FWHM of {', '.join(missing)} is unknown; "
            "give radius= (an angle) or each band's PSF FWHM (PSF_FWHM keyword, psf_fwhm=).")
    return DEFAULT_RADIUS_PER_FWHM * max(w.to_value(u.arcsec) for w in widths) * u.arcsec


def point_source_correction(band, radius, annulus):
    """Factor from an aperture flux to the total flux of a point source.

    The aperture holds the enclosed fraction F(r) of the PSF
    (`Band.enclosed_fraction`), and the annulus background, its mean wing
    light, takes ``r^2 (F(r_out) - F(r_in)) / (r_out^2 - r_in^2)`` of it away
    again (common practice for aperture corrections). NaN without a PSF FWHM.
    """
    r, r_in, r_out = radius, annulus[0], annulus[1]
    inside = band.enclosed_fraction(r)
    wing = band.enclosed_fraction(r_out) - band.enclosed_fraction(r_in)
    kept = inside - r**2 * wing / (r_out**2 - r_in**2)
    return float(1.0 / kept) if kept > 0 else float("nan")


def measure_filters(images, coords, *, radius=None, annulus=None, labels=None,
                    point_source=True):
    """Forced aperture photometry of knots in every filter at the same sky positions.

    Parameters
    ----------
    images : sequence of `BandImage`
        One cutout per filter, each with its own WCS and `Band` (its zero
        point is required). Their footprints must overlap.
    coords : `~astropy.coordinates.SkyCoord`
        Positions of the knots.
    radius : `~astropy.units.Quantity`, optional
        Aperture radius (angle), the same on the sky in every filter;
        default `DEFAULT_RADIUS_PER_FWHM` times the widest PSF FWHM.
    annulus : tuple of two `~astropy.units.Quantity`, optional
        Background annulus; default 2 and 3 times the radius.
    labels : sequence of str, optional
        Names of the knots.
    point_source : bool
        Correct each filter's aperture fluxes to the total flux of a point
        source (`point_source_correction`, from the band's PSF FWHM and
        Moffat index), so that colours do not depend on the PSF widths.
        Filters without a PSF FWHM are left uncorrected. For resolved knots
        the correction is too small; use a larger radius.

    Returns
    -------
    `~astropy.table.Table`
        One row per (knot, filter), knots in the order of ``coords`` and
        filters in the order of ``images``: ``candidate`` (0-based),
        ``label`` (if given), ``band``, ``pivot`` (micron), ``ra``, ``dec``
        (deg), ``x``, ``y`` (pixels of that filter), ``flux`` and
        ``flux_err`` (f_nu, microjansky), ``snr``, ``mag_ab``, ``mag_ab_err``,
        ``aperture_correction`` (the factor applied, 1 for none)
        and ``note`` (why a value is NaN, e.g. outside one filter's
        cutout; empty otherwise). ``meta`` holds the radius and the bands.

    Raises
    ------
    LensviewInputError
        No cutout, a repeated filter name, a filter without zero point, or
        cutouts that do not overlap on the sky.
    """
    images = _check_images(images)
    require_common_footprint(images)
    coords = sky_coord(coords, "coords").reshape(-1)
    if labels is not None and len(labels) != len(coords):
        raise LensviewInputError(
            f"Got {len(labels)} labels for {len(coords)} knots; give one label per knot.")
    radius = _default_radius(images) if radius is None else radius
    r_arcsec = angle_arcsec(radius, "radius")
    if not r_arcsec > 0:
        raise LensviewInputError(f"The aperture radius must be positive; got {radius}.")
    if annulus is None:
        annulus = (2 * r_arcsec * u.arcsec, 3 * r_arcsec * u.arcsec)

    ring = tuple(angle_arcsec(a, "annulus") for a in annulus)
    per_band = []
    for image in images:
        table = aperture_photometry(image.data, image.wcs, coords, r_arcsec * u.arcsec,
                                    annulus=annulus, zero_point=image.band.zero_point)
        correction = 1.0
        if point_source and image.band.psf_fwhm is not None:
            correction = point_source_correction(image.band, r_arcsec, ring)
        unit_fnu = image.band.unit_flux_density().to_value(u.uJy) * correction
        per_band.append((image.band, table, unit_fnu, correction))

    rows = []
    for k in range(len(coords)):
        for band, table, unit_fnu, correction in per_band:
            row = table[k]
            note = str(row["note"])
            if note:
                note = f"{note} in {band.name}"
            rows.append((k, band.name, band.pivot.to_value(u.um), float(row["ra"]),
                         float(row["dec"]), float(row["x"]), float(row["y"]),
                         float(row["flux"]) * unit_fnu, float(row["flux_err"]) * unit_fnu,
                         float(row["mag_ab"]) - 2.5 * np.log10(correction),
                         float(row["mag_ab_err"]), correction, note))
    names = ("candidate", "band", "pivot", "ra", "dec", "x", "y", "flux", "flux_err", "mag_ab",
             "mag_ab_err", "aperture_correction", "note")
    dtypes = (np.int64, str, float, float, float, float, float, float, float, float, float, float,
              str)
    out = Table(rows=rows, names=names, dtype=dtypes) if rows else Table(names=names, dtype=dtypes)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = np.asarray(out["flux"], float) / np.asarray(out["flux_err"], float)
    out.add_column(snr, name="snr", index=out.colnames.index("flux_err") + 1)
    if labels is not None:
        out.add_column([str(labels[k]) for k in out["candidate"]], name="label", index=1)
    for name, unit in (("pivot", u.um), ("ra", u.deg), ("dec", u.deg), ("x", u.pix),
                       ("y", u.pix), ("flux", u.uJy), ("flux_err", u.uJy), ("mag_ab", u.mag),
                       ("mag_ab_err", u.mag)):
        out[name].unit = unit
    out.meta["radius_arcsec"] = r_arcsec
    out.meta["annulus_arcsec"] = list(ring)
    out.meta["bands"] = [band.name for band, _, _, _ in per_band]
    out.meta["pivot_um"] = [band.pivot.to_value(u.um) for band, _, _, _ in per_band]
    out.meta["zero_points"] = [band.zero_point for band, _, _, _ in per_band]
    return out


def ab_colours(photometry):
    """AB colours of each knot between filters adjacent in wavelength.

    Parameters
    ----------
    photometry : `~astropy.table.Table`
        The result of `measure_filters`.

    Returns
    -------
    `~astropy.table.Table`
        One row per knot: ``candidate``, ``label`` (if present),
        ``mag_<band>`` for each filter and ``<blue>-<red>`` colours (mag,
        blue minus red, filters sorted by pivot wavelength) with
        ``<blue>-<red>_err``; NaN where either magnitude is missing.
    """
    bands = list(photometry.meta.get("bands") or dict.fromkeys(photometry["band"]))
    pivots = {str(row["band"]): float(row["pivot"]) for row in photometry}
    bands.sort(key=lambda name: pivots[name])
    candidates = sorted(set(int(c) for c in photometry["candidate"]))
    lookup = {(int(row["candidate"]), str(row["band"])): row for row in photometry}
    out = Table()
    out["candidate"] = candidates
    if "label" in photometry.colnames:
        out["label"] = [str(lookup[(c, bands[0])]["label"]) for c in candidates]

    def values(band, column):
        return np.array([float(lookup[(c, band)][column]) for c in candidates])

    for band in bands:
        out[f"mag_{band}"] = values(band, "mag_ab") * u.mag
    for blue, red in zip(bands[:-1], bands[1:]):
        colour = values(blue, "mag_ab") - values(red, "mag_ab")
        error = np.hypot(values(blue, "mag_ab_err"), values(red, "mag_ab_err"))
        out[f"{blue}-{red}"] = colour * u.mag
        out[f"{blue}-{red}_err"] = error * u.mag
    return out

