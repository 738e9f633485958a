import math

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.cosmology import FlatLambdaCDM, Planck18
from astropy.io import fits
from astropy.modeling.models import Gaussian2D
from astropy.stats import gaussian_fwhm_to_sigma
from astropy.wcs import WCS
from scipy.special import erf

from lensview import photometry as ph
from lensview.errors import LensviewInputError

SCALE = 0.03  # arcsec per pixel of the synthetic cutouts


def cutout_wcs(shape, scale=SCALE, rotation_deg=0.0):
    ny, nx = shape
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [150.1, 2.2]
    wcs.wcs.crpix = [(nx + 1) / 2, (ny + 1) / 2]
    s, t = scale / 3600.0, math.radians(rotation_deg)
    wcs.wcs.cd = [[-s * math.cos(t), s * math.sin(t)], [s * math.sin(t), s * math.cos(t)]]
    wcs.pixel_shape = (nx, ny)
    return wcs


def pixel_integrated_gaussian(shape, x0, y0, sigma, total):
    """A circular Gaussian of given total flux, integrated exactly over each pixel."""
    ny, nx = shape

    def fractions(n, centre):
        edges = np.arange(n + 1) - 0.5
        return np.diff(0.5 * erf((edges - centre) / (math.sqrt(2.0) * sigma)))

    return total * np.outer(fractions(ny, y0), fractions(nx, x0))


def sampled_gaussian(shape, x0, y0, fwhm_arcsec, amplitude):
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    sigma = fwhm_arcsec / SCALE * gaussian_fwhm_to_sigma
    return Gaussian2D(amplitude, x0, y0, sigma, sigma)(cols, rows)


# ---------------------------------------------------------------- snapping


@pytest.mark.parametrize("rotation_deg", [0.0, 37.0])
def test_snap_reaches_noiseless_gaussian_centre(rotation_deg):
    shape = (64, 64)
    wcs = cutout_wcs(shape, rotation_deg=rotation_deg)
    x0, y0 = 30.37, 24.81
    image = pixel_integrated_gaussian(shape, x0, y0, 1.8, 1000.0) + 3.0
    click = wcs.pixel_to_world(x0 + 2.2, y0 - 1.5)  # 2.7 px = 0.08 arcsec off
    snap = ph.snap_to_centroid(image, wcs, click, radius=0.15 * u.arcsec)
    assert snap.moved and snap.reason == ""
    x, y = wcs.world_to_pixel(snap.coord)
    # Tolerance 0.05 pixel (common practice for click snapping); the truth is the injected centre.
    assert math.hypot(x - x0, y - y0) < 0.05


def test_snap_keeps_position_where_centroid_is_undefined():
    shape = (64, 64)
    wcs = cutout_wcs(shape)
    x0, y0 = 30.37, 24.81
    image = pixel_integrated_gaussian(shape, x0, y0, 1.8, 1000.0)
    cases = {
        "flat": (np.full(shape, 3.0), wcs.pixel_to_world(30, 30)),
        "outside": (image, wcs.pixel_to_world(-5.0, 30.0)),
        "beyond": (image, wcs.pixel_to_world(x0 + 8.0, y0)),
    }
    with_nan = image.copy()
    with_nan[25, 30] = np.nan
    cases["non-finite"] = (with_nan, wcs.pixel_to_world(x0 + 1.0, y0))
    for expected, (data, click) in cases.items():
        snap = ph.snap_to_centroid(data, wcs, click, radius=0.15 * u.arcsec)
        assert not snap.moved
        assert snap.coord is click
        assert expected in snap.reason


def test_snap_many_positions_moves_only_the_good_ones():
    shape = (64, 64)
    wcs = cutout_wcs(shape)
    image = pixel_integrated_gaussian(shape, 20.6, 40.2, 1.5, 500.0)
    image += pixel_integrated_gaussian(shape, 45.1, 15.7, 1.5, 500.0)
    clicks = wcs.pixel_to_world([21.5, 44.0, 5.0], [39.0, 16.5, 5.0])
    snap = ph.snap_to_centroid(image, wcs, clicks)
    assert list(snap.moved) == [True, True, False]
    x, y = wcs.world_to_pixel(snap.coord)
    assert np.allclose(x[:2], [20.6, 45.1], atol=0.05)  # injected centres
    assert np.allclose(y[:2], [40.2, 15.7], atol=0.05)
    assert snap.coord[2].separation(clicks[2]) < 1e-6 * u.arcsec


def test_snap_rejects_a_radius_without_units():
    shape = (32, 32)
    wcs = cutout_wcs(shape)
    with pytest.raises(LensviewInputError, match="angle Quantity"):
        ph.snap_to_centroid(np.zeros(shape), wcs, wcs.pixel_to_world(10, 10), radius=0.15)


# ---------------------------------------------------------------- aperture photometry


@pytest.mark.parametrize("radius_in_sigma", [1.0, 2.0, 3.0])
def test_aperture_flux_matches_gaussian_enclosed_fraction(radius_in_sigma):
    shape = (141, 141)
    wcs = cutout_wcs(shape)
    sigma, total, sky = 8.0, 1000.0, 7.0
    x0, y0 = 70.3, 69.6
    image = pixel_integrated_gaussian(shape, x0, y0, sigma, total) + sky
    to_arcsec = sigma * SCALE * u.arcsec
    table = ph.aperture_photometry(
        image, wcs, wcs.pixel_to_world(x0, y0), radius=radius_in_sigma * to_arcsec,
        annulus=(5.0 * to_arcsec, 6.5 * to_arcsec),
    )
    # Enclosed flux of a circular Gaussian, 1 - exp(-r^2 / 2 sigma^2)
    # (standard Gaussian integral), to 0.5 per cent.
    expected = total * (1.0 - math.exp(-0.5 * radius_in_sigma**2))
    assert table["flux"][0] == pytest.approx(expected, rel=5e-3)
    assert table["background"][0] == pytest.approx(sky, rel=1e-6)
    assert table["note"][0] == ""


def test_flux_errors_match_empty_aperture_scatter():
    rng = np.random.default_rng(1)
    shape = (400, 400)
    wcs = cutout_wcs(shape)
    noise = 2.0
    image = rng.normal(10.0, noise, shape)
    grid_x, grid_y = np.meshgrid(np.arange(30, 371, 34.0), np.arange(30, 371, 34.0))
    positions = wcs.pixel_to_world(grid_x.ravel() + 0.3, grid_y.ravel() - 0.2)
    for error in (None, np.full(shape, noise)):
        table = ph.aperture_photometry(image, wcs, positions, radius=0.12 * u.arcsec,
                                       annulus=(0.25 * u.arcsec, 0.45 * u.arcsec), error=error)
        # Empty-aperture test (common practice): the scatter of fluxes in
        # blank apertures is the flux error; 121 apertures pin it to ~7 %.
        assert np.std(table["flux"]) == pytest.approx(np.median(table["flux_err"]), rel=0.2)
        assert abs(np.mean(table["flux"])) < 3 * np.std(table["flux"]) / math.sqrt(len(table))


def test_aperture_magnitude_and_flags():
    shape = (101, 101)
    wcs = cutout_wcs(shape)
    image = pixel_integrated_gaussian(shape, 50.0, 50.0, 2.0, 100.0) + 1.0
    coords = wcs.pixel_to_world([50.0, 1.0, 300.0], [50.0, 50.0, 50.0])
    table = ph.aperture_photometry(image, wcs, coords, radius=0.3 * u.arcsec,
                                   annulus=(0.6 * u.arcsec, 0.9 * u.arcsec),
                                   zero_point=25.0, labels=["a", "b", "c"])
    assert list(table["label"]) == ["a", "b", "c"]
    # m = ZP - 2.5 log10(flux): the definition of a magnitude (Pogson 1856).
    assert table["mag_ab"][0] == pytest.approx(25.0 - 2.5 * math.log10(table["flux"][0]))
    assert table["mag_ab_err"][0] == pytest.approx(
        2.5 / math.log(10) * table["flux_err"][0] / table["flux"][0])
    assert np.isnan(table["flux"][1]) and "beyond the image" in table["note"][1]
    assert np.isnan(table["flux"][2]) and table["note"][2] == "outside the image"
    assert table["ra"].unit == u.deg


def test_aperture_rejects_annulus_inside_aperture():
    shape = (32, 32)
    wcs = cutout_wcs(shape)
    with pytest.raises(LensviewInputError, match="annulus"):
        ph.aperture_photometry(np.zeros(shape), wcs, wcs.pixel_to_world(16, 16),
                               radius=0.2 * u.arcsec, annulus=(0.1 * u.arcsec, 0.3 * u.arcsec))


# ---------------------------------------------------------------- magnitudes


def test_ab_magnitude_zero_point_flux_density():
    # 3631 Jy is AB magnitude 0 (Oke & Gunn 1983, ApJ 266, 713).
    assert ph.ab_magnitude_from_fnu(3631 * u.Jy) == pytest.approx(0.0, abs=1e-12)
    # astropy's AB magnitude unit (reference library) is defined with 48.60
    # in cgs, i.e. 3630.78 Jy, so values agree to 1e-4 mag.
    fnu = [1.0, 27.5, 3631.0e6] * u.uJy
    reference = fnu.to(u.ABmag).value
    assert np.allclose(ph.ab_magnitude_from_fnu(fnu), reference, atol=1e-4)


def test_ab_magnitude_from_image_flux():
    # Pogson's ratio (Pogson 1856): a factor 100 in flux is 5 magnitudes.
    assert ph.ab_magnitude(1.0, 26.5) == pytest.approx(26.5)
    assert ph.ab_magnitude(100.0, 26.5) == pytest.approx(21.5)
    assert np.isnan(ph.ab_magnitude(-3.0, 26.5))
    with pytest.raises(LensviewInputError, match="flux density"):
        ph.ab_magnitude_from_fnu(1e-3 * u.erg / u.s / u.cm**2 / u.AA)


# ---------------------------------------------------------------- detection


def noisy_field_with_sources(seed=7):
    rng = np.random.default_rng(seed)
    shape = (200, 200)
    image = rng.normal(5.0, 1.0, shape)
    sigma = 3.0 * gaussian_fwhm_to_sigma
    truth = []
    for gx in range(25, 200, 50):
        for gy in range(25, 200, 50):
            x, y = gx + rng.uniform(-8, 8), gy + rng.uniform(-8, 8)
            peak = rng.uniform(12.0, 40.0)
            image += pixel_integrated_gaussian(shape, x, y, sigma, peak * 2 * math.pi * sigma**2)
            truth.append((x, y))
    return image, cutout_wcs(shape), np.array(truth)


def match(table, truth):
    distance = np.hypot(np.asarray(table["x"])[:, None] - truth[:, 0],
                        np.asarray(table["y"])[:, None] - truth[:, 1])
    recovered = distance.min(axis=0) < 1.0
    spurious = distance.min(axis=1) >= 1.0
    return recovered, spurious


def test_detection_recovers_injected_sources():
    image, wcs, truth = noisy_field_with_sources()
    table = ph.detect_point_sources(image, wcs, fwhm_pix=3.0, threshold_sigma=5.0)
    recovered, spurious = match(table, truth)
    # Injected truth: all 16 sources (peaks 12-40 sigma) and at most one
    # spurious detection at 5 sigma.
    assert recovered.all()
    assert spurious.sum() <= 1
    assert table.meta["noise"] == pytest.approx(1.0, rel=0.05)
    assert np.all(np.diff(table["flux"]) <= 0)
    sky = wcs.pixel_to_world(table["x"], table["y"])
    assert np.all(sky.separation(SkyCoord(table["ra"], table["dec"])) < 1e-6 * u.arcsec)


def test_detection_in_pure_noise_finds_almost_nothing():
    rng = np.random.default_rng(11)
    image = rng.normal(0.0, 1.0, (200, 200))
    table = ph.detect_point_sources(image, cutout_wcs(image.shape), fwhm_pix=3.0)
    # Gaussian tail (common practice): 5 sigma peaks in 40,000 pixels are rare.
    assert len(table) <= 1


def test_detection_restricted_to_box_and_arc_band():
    image, wcs, truth = noisy_field_with_sources()
    corners = SkyCoord([wcs.pixel_to_world(0, 0), wcs.pixel_to_world(99, 99)])
    in_box = ph.detect_point_sources(image, wcs, fwhm_pix=3.0, region=corners)
    expected = truth[(truth < 99).all(axis=1)]
    assert match(in_box, expected)[0].all() and len(in_box) == len(expected)

    by_slices = ph.detect_point_sources(image, wcs, fwhm_pix=3.0,
                                        region=(slice(0, 100), slice(100, 200)))
    expected = truth[(truth[:, 1] < 100) & (truth[:, 0] >= 100)]
    assert match(by_slices, expected)[0].all() and len(by_slices) == len(expected)

    chosen = truth[[0, 5, 10, 15]]
    band = ph.ArcBand(wcs.pixel_to_world(chosen[:, 0], chosen[:, 1]), 0.3 * u.arcsec)
    along = ph.detect_point_sources(image, wcs, fwhm_pix=3.0, region=band)
    assert match(along, chosen)[0].all() and len(along) == len(chosen)


def test_detection_rejects_noiseless_region():
    image = np.zeros((50, 50))
    with pytest.raises(LensviewInputError, match="no scatter"):
        ph.detect_point_sources(image, cutout_wcs(image.shape), fwhm_pix=3.0)


# ---------------------------------------------------------------- sizes


def test_psf_sized_source_is_unresolved():
    psf = 0.1
    image = sampled_gaussian((64, 64), 31.4, 30.7, psf, 50.0) + 2.0
    wcs = cutout_wcs(image.shape)
    size = ph.measure_size(image, wcs, wcs.pixel_to_world(32, 30), psf_fwhm=psf * u.arcsec)
    assert size.fwhm.to_value(u.arcsec) == pytest.approx(psf, rel=1e-4)  # injected width
    assert not size.resolved
    assert np.isnan(size.intrinsic_fwhm)
    # Limit from the 1.2 x PSF criterion: half of sqrt(1.2^2 - 1) x PSF.
    assert size.radius_limit.to_value(u.arcsec) == pytest.approx(0.5 * math.sqrt(0.44) * psf)


def test_wide_source_is_resolved_with_quadrature_intrinsic_width():
    psf, intrinsic = 0.1, 0.2
    # Gaussian widths add in quadrature under convolution (standard result).
    observed = math.hypot(intrinsic, psf)
    rng = np.random.default_rng(3)
    image = sampled_gaussian((64, 64), 31.4, 30.7, observed, 50.0) + 2.0
    image += rng.normal(0.0, 1.0, image.shape)
    wcs = cutout_wcs(image.shape)
    size = ph.measure_size(image, wcs, wcs.pixel_to_world(32, 30), psf_fwhm=psf * u.arcsec)
    assert size.resolved
    assert size.intrinsic_fwhm.to_value(u.arcsec) == pytest.approx(intrinsic, rel=0.02)
    assert size.radius == 0.5 * size.intrinsic_fwhm
    assert 0 < size.fwhm_err.to_value(u.arcsec) < 0.01
    assert np.isnan(size.radius_limit)
    centre = wcs.world_to_pixel(size.center)
    assert np.allclose(centre, (31.4, 30.7), atol=0.05)  # injected centre


def test_size_of_empty_noise_reports_no_source():
    rng = np.random.default_rng(5)
    image = rng.normal(0.0, 1.0, (64, 64))
    wcs = cutout_wcs(image.shape)
    size = ph.measure_size(image, wcs, wcs.pixel_to_world(32, 32), psf_fwhm=0.1 * u.arcsec)
    assert not size.resolved and np.isnan(size.fwhm) and size.note


# ---------------------------------------------------------------- delensing


def test_delensed_magnitude_and_flux_arithmetic():
    table = ph.delensed_properties(mu=[-10.0, 100.0, 0.0], z_source=2.5,
                                   flux=[50.0, 50.0, 50.0], zero_point=26.0)
    # Flux over |mu|, and 2.5 log10|mu| fainter (definition of a magnitude).
    assert np.allclose(table["flux_intrinsic"][:2], [5.0, 0.5])
    observed = 26.0 - 2.5 * math.log10(50.0)
    assert np.allclose(table["mag_intrinsic"][:2].value, [observed + 2.5, observed + 5.0])
    assert np.isnan(table["mag_intrinsic"][2])


def test_delensed_absolute_magnitude_against_astropy_distmod():
    z = np.array([1.5, 3.0, 6.2])
    mag = np.array([27.0, 26.2, 28.4])
    mu = np.array([12.0, -40.0, 7.5])
    table = ph.delensed_properties(mu=mu, z_source=z, mag=mag)
    # Hand computation: M = m + 2.5 log10|mu| - DM(z) + 2.5 log10(1 + z)
    # (Hogg et al. 2002), DM from astropy's Planck18.distmod (reference library).
    expected = mag + 2.5 * np.log10(np.abs(mu)) - Planck18.distmod(z).value + 2.5 * np.log10(1 + z)
    assert np.allclose(table["abs_mag_ab"].value, expected, atol=1e-6)

    other = FlatLambdaCDM(H0=70, Om0=0.3)
    table = ph.delensed_properties(mu=mu, z_source=z, mag=mag, cosmology=other)
    expected = mag + 2.5 * np.log10(np.abs(mu)) - other.distmod(z).value + 2.5 * np.log10(1 + z)
    assert np.allclose(table["abs_mag_ab"].value, expected, atol=1e-6)


def test_delensed_magnitude_from_flux_density():
    table = ph.delensed_properties(mu=100.0, z_source=2.0, flux=3631 * u.uJy)
    # 3631 uJy is AB 15 (Oke & Gunn 1983); |mu| = 100 adds 5 mag.
    assert table["mag_observed"][0] == pytest.approx(15.0, abs=1e-9)
    assert table["mag_intrinsic"][0] == pytest.approx(20.0, abs=1e-9)
    assert table["flux_intrinsic"].unit == u.uJy


def test_source_radius_limit_from_tangential_stretch():
    lambda_t = np.array([0.02, -0.005])
    z = 3.0
    table = ph.delensed_properties(mu=[-30.0, 80.0, 5.0], z_source=z,
                                   lambda_t=np.append(lambda_t, 0.1),
                                   image_radius_limit=[0.03, 0.03, np.nan] * u.arcsec)
    assert np.isnan(table["source_radius_limit_pc"][2])  # a resolved image has no limit
    table = table[:2]
    angle = 0.03 * np.abs(lambda_t) * u.arcsec
    assert np.allclose(table["source_radius_limit_arcsec"].to(u.arcsec).value, angle.value)
    # Physical size = angle x D_A(z) (Hogg 1999), D_A from astropy Planck18
    # (reference library), pc and AU as IAU-defined in astropy.units.
    expected = (angle.to_value(u.rad) * Planck18.angular_diameter_distance(z)).to(u.pc)
    assert np.allclose(table["source_radius_limit_pc"].to(u.pc).value, expected.value, rtol=1e-6)
    assert np.allclose(table["source_radius_limit_au"].to(u.AU).value,
                       expected.to_value(u.AU), rtol=1e-6)


def test_delensing_needs_lambda_t_for_a_size():
    with pytest.raises(LensviewInputError, match="lambda_t"):
        ph.delensed_properties(mu=5.0, z_source=2.0, image_radius_limit=0.03 * u.arcsec)


# ---------------------------------------------------------------- zero point


def test_zero_point_prefers_the_users_value():
    assert ph.zero_point(user_value=25.1) == 25.1
    assert ph.zero_point(user_value=25.1 * u.mag) == 25.1
    assert ph.zero_point() is None
    with pytest.raises(LensviewInputError, match="AB magnitude"):
        ph.zero_point(user_value="bright")


def test_zero_point_from_header_unless_the_user_gives_one():
    header = fits.Header()
    header["PHOTZP"] = 28.1
    assert ph.zero_point(header) == pytest.approx(28.1)
    assert ph.zero_point(header, user_value=25.0) == 25.0
    assert ph.zero_point(fits.Header()) is None
    # An image in nJy per pixel: a flux of 27.5 image units is 27.5 nJy, whose
    # AB magnitude follows from 3631 Jy (Oke & Gunn 1983).
    in_njy = fits.Header()
    in_njy["BUNIT"] = "nJy"
    from_header = ph.ab_magnitude(27.5, ph.zero_point(in_njy))
    assert from_header == pytest.approx(ph.ab_magnitude_from_fnu(27.5 * u.nJy), abs=1e-9)
