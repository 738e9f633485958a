"""Rendering the observed cutout: the ray-traced arc, members, field galaxies, PSF and noise."""


from dataclasses import replace

import numpy as np
import astropy.units as u
from astropy.modeling.models import Sersic2D
from scipy.signal import fftconvolve
from scipy.special import gamma as gamma_function, gammaincinv

from .. import analytic
from .colours import REFERENCE_LOOK
from .maps import scaled_size
from .scenario import (CLUSTER_NAME, CUTOUT_CENTRE, CUTOUT_SCALE, CUTOUT_SHAPE, HOST, MEMBERS,
                       OVERSAMPLE, PSF_BETA, PSF_FWHM, SKY_SIGMA, TRACED_SIGMA, ZERO_POINT, Z_LENS,
                       Z_SOURCE, scenario_sky)


def _flux(mag, zero_point=ZERO_POINT):
    """Counts per second of an AB magnitude at a cutout's zero point."""
    return 10.0 ** (-0.4 * (mag - zero_point))


def _sersic_amplitude(total, r_eff, n, ellip):
    """Surface brightness at r_eff of a Sersic profile of given total flux:
    L = 2 pi n Gamma(2n) e^b / b^(2n) I_e r_e^2 q (Graham & Driver 2005,
    PASA 22, 118), b from Gamma(2n) = 2 gamma(2n, b)."""
    b = gammaincinv(2 * n, 0.5)
    return total * b ** (2 * n) / (2 * np.pi * n * gamma_function(2 * n) * np.exp(b)
                                   * r_eff ** 2 * (1 - ellip))


def _source_brightness(uv_along, uv_inward, knots, look):
    """Surface brightness (counts/s/arcsec^2) of the source at fold-frame offsets."""
    host = HOST
    total = _flux(look.host_mag, look.zero_point)
    brightness = Sersic2D.evaluate(uv_along, uv_inward,
                                   _sersic_amplitude(total, host["r_eff"], host["sersic_n"],
                                                     host["ellip"]),
                                   host["r_eff"], host["sersic_n"], host["along"], host["inward"],
                                   host["ellip"], np.radians(host["angle"]))
    for knot, inward in knots:
        if knot.sigma < TRACED_SIGMA:
            continue
        r2 = (uv_along - knot.along) ** 2 + (uv_inward - inward) ** 2
        brightness = brightness + _flux(knot.mag, look.zero_point) / (2 * np.pi * knot.sigma ** 2) * np.exp(
            -0.5 * r2 / knot.sigma ** 2)
    return brightness


def _cutout_wcs(size_factor, look):
    base = int(round(CUTOUT_SHAPE[0] * CUTOUT_SCALE / look.scale))
    n = scaled_size(base, size_factor)
    scale = look.scale * base / n
    extra = {} if look.rotation == 0 else dict(rotation=look.rotation * u.deg)
    return (analytic.make_wcs(scenario_sky(*CUTOUT_CENTRE), (n, n), scale * u.arcsec, **extra),
            (n, n), scale)


def _subpixel_grid(shape):
    """Centres of the supersampled sub-pixels in cutout pixel coordinates."""
    ny, nx = shape
    sub_x = (np.arange(nx * OVERSAMPLE) + 0.5) / OVERSAMPLE - 0.5
    sub_y = (np.arange(ny * OVERSAMPLE) + 0.5) / OVERSAMPLE - 0.5
    return np.meshgrid(sub_x, sub_y)


def _lensed_source(field, fold, knots, cutout_wcs, shape, scale, look):
    """Supersampled lensed source: ray tracing through the truth model,
    surface brightness conserved (Schneider, Ehlers & Falco 1992, sec. 5.2)."""
    sub_x, sub_y = _subpixel_grid(shape)
    out = np.zeros(sub_x.size)
    chunk = 250_000
    flat_x, flat_y = sub_x.ravel(), sub_y.ravel()
    for start in range(0, flat_x.size, chunk):
        sky = cutout_wcs.pixel_to_world(flat_x[start:start + chunk], flat_y[start:start + chunk])
        mx, my = field.sky_to_pixels(sky)
        bx, by = field.trace_pixels(mx, my, Z_SOURCE)
        offset = np.column_stack([bx, by]) - fold.point
        along = offset @ fold.along * fold.scale
        inward = offset @ fold.inward * fold.scale
        values = _source_brightness(along, inward, knots, look)
        out[start:start + chunk] = np.where(np.isfinite(values), values, 0.0)
    return out.reshape(sub_x.shape) * (scale / OVERSAMPLE) ** 2


def _map_to_cutout(field, cutout_wcs):
    """Linear map from truth-map pixel offsets to cutout pixel offsets."""
    return np.linalg.solve(cutout_wcs.celestial.pixel_scale_matrix, field.wcs.pixel_scale_matrix)


def _add_knot_images(image, finder, knot, beta, cutout_wcs, zero_point):
    """Add the images of a small clump, each an elliptical Gaussian from the
    local linear lens mapping beta - beta_i = A (theta - theta_i), which
    keeps surface brightness and gives each image |mu| times the flux
    (Schneider, Ehlers & Falco 1992, sec. 5.2)."""
    field = finder.field
    xy, mu = finder.all_images(beta)
    terms = field.local_terms(xy[:, 0], xy[:, 1], warn=False)
    centres = np.column_stack(cutout_wcs.world_to_pixel(field.pixels_to_sky(xy[:, 0], xy[:, 1])))
    to_cutout = _map_to_cutout(field, cutout_wcs) * OVERSAMPLE
    sigma = knot.sigma / finder.fold.scale
    f = finder.f
    for k in range(len(xy)):
        jacobian = np.array([[1 - f * terms.a11[k], -f * terms.a12[k]],
                             [-f * terms.a21[k], 1 - f * terms.a22[k]]])
        if not np.isfinite(jacobian).all():
            continue
        inverse = to_cutout @ np.linalg.inv(jacobian)
        # Image-plane covariance in sub-pixels, plus the variance of a sub-pixel box.
        covariance = sigma ** 2 * inverse @ inverse.T + np.eye(2) / 12
        _add_gaussian(image, (centres[k] + 0.5) * OVERSAMPLE - 0.5, covariance,
                      abs(mu[k]) * _flux(knot.mag, zero_point))


def _add_gaussian(image, centre, covariance, flux):
    """Add a normalised 2-D Gaussian stamp (sub-pixel units) of total ``flux``."""
    half = int(np.ceil(5 * np.sqrt(np.linalg.eigvalsh(covariance).max()))) + 1
    ix, iy = int(round(centre[0])), int(round(centre[1]))
    xs = np.arange(ix - half, ix + half + 1)
    ys = np.arange(iy - half, iy + half + 1)
    dx, dy = np.meshgrid(xs - centre[0], ys - centre[1])
    precision = np.linalg.inv(covariance)
    stamp = np.exp(-0.5 * (precision[0, 0] * dx * dx + 2 * precision[0, 1] * dx * dy
                           + precision[1, 1] * dy * dy))
    stamp *= flux / stamp.sum()
    keep_y = (ys >= 0) & (ys < image.shape[0])
    keep_x = (xs >= 0) & (xs < image.shape[1])
    if keep_x.any() and keep_y.any():
        image[np.ix_(ys[keep_y], xs[keep_x])] += stamp[np.ix_(keep_y, keep_x)]


def _position_angle_to_theta(wcs, pa_deg):
    """Sersic2D rotation angle (from +x, counter-clockwise in pixels) of a
    major axis at position angle ``pa_deg`` (North through East)."""
    matrix = wcs.celestial.pixel_scale_matrix
    east, north = np.sin(np.radians(pa_deg)), np.cos(np.radians(pa_deg))
    # Plane x is East; in a TAN WCS RA grows along the first world axis.
    px, py = np.linalg.solve(matrix, [east, north])
    return float(np.arctan2(py, px))


def _sersic_on_subgrid(sub_x, sub_y, x0, y0, mag, r_eff_pix, n, ellip, theta, zero_point):
    return Sersic2D.evaluate(sub_x, sub_y, _sersic_amplitude(_flux(mag, zero_point), r_eff_pix, n, ellip)
                             / OVERSAMPLE ** 2, r_eff_pix, n, x0, y0, ellip, theta)


def _field_galaxy_draws(shape, arc_mask, rng):
    """Faint unlensed field galaxies at random places away from the arc, in the
    reference cutout's pixels: (x0, y0, mag, r_eff arcsec, n, ellip, theta)."""
    draws = []
    ny, nx = shape
    while len(draws) < 12:
        x0, y0 = rng.uniform(0, nx - 1), rng.uniform(0, ny - 1)
        mag = rng.uniform(24.0, 27.5)
        r_eff = rng.uniform(0.08, 0.30)
        n = rng.choice([0.8, 1.0, 1.5, 2.5])
        ellip = rng.uniform(0.0, 0.6)
        theta = rng.uniform(0.0, np.pi)
        if arc_mask[int(round(y0)), int(round(x0))]:
            continue
        draws.append((x0, y0, mag, r_eff, n, ellip, theta))
    return draws


def _galaxies(cutout_wcs, shape, scale, draws, look, reference_wcs=None):
    """Member galaxies where the models put them, and the field galaxies
    (drawn on ``reference_wcs``, default this cutout's), supersampled counts/s."""
    sub_x, sub_y = _subpixel_grid(shape)
    image = np.zeros(sub_x.shape)
    for m in MEMBERS:
        x0, y0 = cutout_wcs.world_to_pixel(scenario_sky(m.east, m.north))
        x0, y0 = float(x0), float(y0)
        reach = 12 * m.r_eff / scale
        if not (-reach < x0 < shape[1] + reach and -reach < y0 < shape[0] + reach):
            continue
        image += _sersic_on_subgrid(sub_x, sub_y, x0, y0, m.mag + look.member_offset,
                                    m.r_eff / scale, m.sersic_n, m.ellip,
                                    _position_angle_to_theta(cutout_wcs, m.pa), look.zero_point)
    for x0, y0, mag, r_eff, n, ellip, theta in draws:
        if reference_wcs is not None:
            # Same galaxy on the sky: move its centre and turn its axis into this cutout's pixels.
            x0, y0 = (float(v) for v in cutout_wcs.world_to_pixel(reference_wcs.pixel_to_world(x0, y0)))
            axis = np.linalg.solve(cutout_wcs.celestial.pixel_scale_matrix,
                                   reference_wcs.celestial.pixel_scale_matrix
                                   @ [np.cos(theta), np.sin(theta)])
            theta = float(np.arctan2(axis[1], axis[0]))
        image += _sersic_on_subgrid(sub_x, sub_y, x0, y0, mag + look.field_offset, r_eff / scale,
                                    n, ellip, theta, look.zero_point)
    return image


def _deposit_points(image, positions, fluxes):
    """Add unresolved images to the supersampled grid (bilinear weights)."""
    for (x, y), flux in zip(positions, fluxes):
        gx, gy = (x + 0.5) * OVERSAMPLE - 0.5, (y + 0.5) * OVERSAMPLE - 0.5
        ix, iy = int(np.floor(gx)), int(np.floor(gy))
        fx, fy = gx - ix, gy - iy
        for dy, wy in ((0, 1 - fy), (1, fy)):
            for dx, wx in ((0, 1 - fx), (1, fx)):
                if 0 <= iy + dy < image.shape[0] and 0 <= ix + dx < image.shape[1]:
                    image[iy + dy, ix + dx] += flux * wx * wy


def _psf_kernel(scale, psf_fwhm=PSF_FWHM):
    """Moffat PSF (Moffat 1969, A&A 3, 455) of FWHM ``psf_fwhm``, on the
    supersampled grid, normalised to unit sum."""
    sub = scale / OVERSAMPLE
    alpha = psf_fwhm / (2 * np.sqrt(2 ** (1 / PSF_BETA) - 1))
    half = int(np.ceil(1.2 / sub))
    r = np.arange(-half, half + 1) * sub
    rx, ry = np.meshgrid(r, r)
    kernel = (1 + (rx ** 2 + ry ** 2) / alpha ** 2) ** (-PSF_BETA)
    return kernel / kernel.sum()


def _bin(image):
    ny, nx = image.shape[0] // OVERSAMPLE, image.shape[1] // OVERSAMPLE
    return image.reshape(ny, OVERSAMPLE, nx, OVERSAMPLE).sum(axis=(1, 3))


def cutout_header(wcs, seed, look=None):
    look = REFERENCE_LOOK if look is None else look
    header = wcs.to_header()
    header["BUNIT"] = ("count/s", "invented detector counts per second")
    header["FILTER"] = (look.name, "invented filter of the demo")
    header["PHOTPLAM"] = (look.pivot_um * 1e4, "[Angstrom] pivot wavelength")
    header["PHOTZP"] = (look.zero_point, "AB magnitude of 1 count/s")
    header["PSF_FWHM"] = (look.psf_fwhm, "[arcsec] Moffat PSF FWHM")
    header["PSF_BETA"] = (PSF_BETA, "Moffat PSF index")
    header["SKYSIGMA"] = (look.sky_sigma, "[count/s] Gaussian sky noise per pixel")
    header["OBJECT"] = (CLUSTER_NAME, "invented demo cluster")
    header["Z_LENS"] = (Z_LENS, "cluster redshift")
    header["Z_ARC"] = (Z_SOURCE, "redshift of the lensed galaxy")
    header["DEMOSEED"] = (seed, "seed of the sky noise and field galaxies")
    header["ORIGIN"] = ("lensview demo", "invented data, see sample_images/README.md")
    return header


def render_cutout(finder, knots, compact_images, size_factor, seed, look=None, draws=None,
                  reference_wcs=None):
    """The observed image (float32), its WCS, the arc's total magnification
    (lensed over intrinsic flux of the extended source, noise free) and the
    field galaxies drawn. ``look`` (default: the reference filter) sets the
    filter's grid, PSF, zero point, noise and the components' magnitudes;
    ``draws`` and ``reference_wcs`` reuse the reference filter's field galaxies."""
    look = REFERENCE_LOOK if look is None else look
    truth, fold = finder.field, finder.fold
    cutout_wcs, shape, scale = _cutout_wcs(size_factor, look)
    knots = [(replace(k, mag=k.mag + look.knot_offset(k)), inward) for k, inward in knots]
    lensed = _lensed_source(truth, fold, knots, cutout_wcs, shape, scale, look)
    for knot, inward in knots:
        if 0 < knot.sigma < TRACED_SIGMA:
            _add_knot_images(lensed, finder, knot, fold.source(knot.along, inward), cutout_wcs,
                             look.zero_point)
    intrinsic = (_flux(look.host_mag, look.zero_point)
                 + sum(_flux(k.mag, look.zero_point) for k, _ in knots if k.sigma > 0))
    arc_mu = float(lensed.sum() / intrinsic)
    compact_xy, compact_mu = compact_images
    cx, cy = cutout_wcs.world_to_pixel(truth.pixels_to_sky(compact_xy[:, 0], compact_xy[:, 1]))
    compact = next(k for k, _ in knots if k.label == "C")
    _deposit_points(lensed, np.column_stack([cx, cy]),
                    np.abs(compact_mu) * _flux(compact.mag, look.zero_point))

    if draws is None:
        rng = np.random.default_rng(seed)
        draws = _field_galaxy_draws(shape, _arc_mask(_bin(lensed), scale), rng)
    else:
        rng = np.random.default_rng([seed, look.index])
    galaxies = _galaxies(cutout_wcs, shape, scale, draws, look, reference_wcs)
    model_image = _bin(fftconvolve(lensed + galaxies, _psf_kernel(scale, look.psf_fwhm), mode="same"))
    image = (model_image + rng.normal(0.0, look.sky_sigma, shape)).astype(np.float32)
    return image, cutout_wcs, arc_mu, draws


def _arc_mask(arc, scale):
    """Pixels of the lensed galaxy (above a tenth of the sky noise), grown by 1 arcsec."""
    from scipy import ndimage

    grow = int(np.ceil(1.0 / scale))
    return ndimage.binary_dilation(arc > 0.1 * SKY_SIGMA, iterations=grow)


