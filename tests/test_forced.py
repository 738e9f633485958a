"""Filters from headers and forced photometry in several filters."""

import math

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from scipy.special import erf

from lensview import analytic, demo
from lensview import photometry as ph
from lensview.errors import LensviewInputError

CENTRE = SkyCoord(150.1 * u.deg, 2.2 * u.deg)


def gaussian_image(wcs, shape, coords, totals, fwhm_arcsec, sky_sigma=0.0, seed=0):
    """Pixel-integrated circular Gaussians (exact through erf) plus Gaussian noise."""
    scale = math.sqrt(abs(np.linalg.det(wcs.pixel_scale_matrix))) * 3600
    sigma = fwhm_arcsec / 2.354820045 / scale
    ny, nx = shape
    image = np.zeros(shape)
    x, y = wcs.world_to_pixel(coords)
    for x0, y0, total in zip(np.atleast_1d(x), np.atleast_1d(y), totals):
        def side(n, c):
            edges = np.arange(n + 1) - 0.5
            return np.diff(0.5 * (1 + erf((edges - c) / (math.sqrt(2) * sigma))))
        image += total * np.outer(side(ny, y0), side(nx, x0))
    return image + np.random.default_rng(seed).normal(0, sky_sigma, shape) if sky_sigma else image


def band_image(name, pivot_um, zp, scale, rotation, coords, totals, fwhm=0.1, shape=(160, 160),
               centre=CENTRE, sky_sigma=0.0, seed=0):
    wcs = analytic.make_wcs(centre, shape, scale * u.arcsec, rotation=rotation * u.deg)
    data = gaussian_image(wcs, shape, coords, totals, fwhm, sky_sigma, seed)
    band = ph.Band(name, pivot_um * u.um, zp, psf_fwhm=fwhm * u.arcsec)
    return ph.BandImage(data, wcs, band)


def knots():
    return SkyCoord([150.1, 150.1004, 150.0997] * u.deg, [2.2, 2.2003, 2.1997] * u.deg)


# ---------------------------------------------------------------------------- bands from headers
def test_band_from_header_reads_the_common_keywords():
    header = fits.Header({"FILTER": "lantern-150", "PHOTZP": 27.5, "PHOTPLAM": 15000.0,
                          "PSF_FWHM": 0.11})
    band = ph.band_from_header(header)
    assert band.name == "lantern-150" and band.zero_point == 27.5
    assert band.pivot.to_value(u.um) == pytest.approx(1.5)
    assert band.psf_fwhm.to_value(u.arcsec) == pytest.approx(0.11)
    assert band.zero_point_source == "PHOTZP"
    # The user's values win over the header's.
    band = ph.band_from_header(header, name="mine", zero_point=26.0, pivot=2 * u.um)
    assert (band.name, band.zero_point, band.zero_point_source) == ("mine", 26.0, "user")


def test_photflam_zero_point_uses_the_pivot_wavelength():
    # ZP_AB = -2.5 log10(PHOTFLAM) - 5 log10(PHOTPLAM) - 2.408 (the flux-density
    # calibration of space-telescope imaging; constant from memory, here checked
    # against the AB definition, Oke & Gunn 1983).
    header = fits.Header({"FILTER": "x", "PHOTFLAM": 1.5e-20, "PHOTPLAM": 8000.0})
    band = ph.band_from_header(header)
    expected = -2.5 * math.log10(1.5e-20) - 5 * math.log10(8000.0) - 2.408
    assert band.zero_point == pytest.approx(expected, abs=2e-3)
    assert band.zero_point_source == "PHOTFLAM/PHOTPLAM"
    # One image unit is 1.5e-20 erg/s/cm2/A at 8000 A: f_nu = f_lambda lambda^2 / c.
    fnu = (1.5e-20 * u.erg / u.s / u.cm**2 / u.AA).to(u.uJy, u.spectral_density(8000 * u.AA))
    assert band.unit_flux_density().to_value(u.uJy) == pytest.approx(fnu.value, rel=1e-3)


def test_missing_name_or_pivot_is_an_input_error_saying_what_to_give():
    with pytest.raises(LensviewInputError, match="no FILTER keyword"):
        ph.band_from_header(fits.Header({"PHOTZP": 25.0, "PHOTPLAM": 9000.0}))
    with pytest.raises(LensviewInputError, match="PHOTPLAM"):
        ph.band_from_header(fits.Header({"FILTER": "blue", "PHOTZP": 25.0}))


def test_demo_filters_load_with_their_own_wcs_psf_and_zero_point():
    images = demo.load_demo_filters()
    assert [i.band.name for i in images] == [f.name for f in demo.FILTERS]
    assert len({i.data.shape for i in images}) == 3
    assert all(i.band.zero_point is not None and i.band.psf_fwhm is not None for i in images)
    reference = images[[f.name for f in demo.FILTERS].index(demo.REFERENCE_FILTER)]
    cutout, _, _ = demo.load_demo()
    assert np.array_equal(reference.data, np.asarray(cutout.data, float))


# ---------------------------------------------------------------------------- forced photometry
def test_forced_photometry_recovers_fluxes_in_every_filter():
    coords = knots()
    totals = {"blue": [40.0, 10.0, 20.0], "red": [60.0, 5.0, 30.0]}
    images = [band_image("blue", 0.9, 27.0, 0.04, 0.0, coords, totals["blue"], fwhm=0.09),
              band_image("red", 2.0, 28.0, 0.06, 30.0, coords, totals["red"], fwhm=0.15)]
    table = ph.measure_filters(images, coords, radius=0.45 * u.arcsec, labels=["a", "b", "c"])
    assert len(table) == 6 and list(table["band"][:2]) == ["blue", "red"]
    for row in table:
        band = images[0].band if row["band"] == "blue" else images[1].band
        # An aperture of 0.45" holds all but 2^-(4 (r/FWHM)^2) of a Gaussian (< 1e-10 here),
        # and the AB definition (Oke & Gunn 1983) turns counts into f_nu.
        expected = totals[row["band"]][row["candidate"]] * 3631e6 * 10 ** (-0.4 * band.zero_point)
        assert row["flux"] == pytest.approx(expected, rel=1e-6)
    colours = ph.ab_colours(table)
    expected = -2.5 * np.log10(np.array(totals["blue"]) / np.array(totals["red"])) + (27.0 - 28.0)
    assert np.allclose(colours["blue-red"], expected, atol=1e-6)


def test_uncertainties_come_from_the_local_background():
    coords = knots()
    images = [band_image("blue", 0.9, 27.0, 0.04, 0.0, coords, [0, 0, 0], sky_sigma=0.2, seed=1,
                         shape=(300, 300)),
              band_image("red", 2.0, 28.0, 0.05, 10.0, coords, [0, 0, 0], sky_sigma=0.2, seed=2,
                         shape=(240, 240))]
    grid = np.linspace(-4, 4, 9)
    table = ph.measure_filters(images, SkyCoord(
        (150.1 + np.repeat(grid, 9) / 3600) * u.deg, (2.2 + np.tile(grid, 9) / 3600) * u.deg),
        radius=0.2 * u.arcsec)
    for name, image in (("blue", images[0]), ("red", images[1])):
        rows = table[table["band"] == name]
        unit = image.band.unit_flux_density().to_value(u.uJy)
        area = math.pi * (0.2 / (image.wcs.proj_plane_pixel_scales()[0].to_value(u.arcsec))) ** 2
        # Pure noise: the quoted error is about sqrt(area) sigma (common practice), and
        # the empty-aperture fluxes scatter by about as much.
        flux, error = np.asarray(rows["flux"]), np.asarray(rows["flux_err"])
        assert np.all(np.isfinite(flux))
        assert np.median(error) / unit == pytest.approx(math.sqrt(area) * 0.2, rel=0.2)
        assert np.std(flux) / np.median(error) == pytest.approx(1.0, abs=0.35)


def test_knot_outside_one_filter_is_nan_with_a_reason_and_the_rest_is_measured():
    coords = SkyCoord([150.1, 150.1 + 4.0 / 3600] * u.deg, [2.2, 2.2] * u.deg)
    wide = band_image("wide", 1.0, 27.0, 0.05, 0.0, coords, [10.0, 10.0], shape=(240, 240))
    small = band_image("small", 2.0, 27.0, 0.05, 0.0, coords[:1], [10.0], shape=(80, 80))
    table = ph.measure_filters([wide, small], coords, radius=0.3 * u.arcsec)
    outside = table[(table["candidate"] == 1) & (table["band"] == "small")][0]
    assert np.isnan(outside["flux"]) and outside["note"] == "outside the image in small"
    others = table[~((table["candidate"] == 1) & (table["band"] == "small"))]
    assert np.all(np.isfinite(others["flux"])) and all(n == "" for n in others["note"])


def test_non_overlapping_footprints_are_a_clear_error():
    coords = knots()
    here = band_image("here", 1.0, 27.0, 0.05, 0.0, coords, [1, 1, 1])
    far = band_image("there", 2.0, 27.0, 0.05, 0.0, coords, [1, 1, 1],
                     centre=SkyCoord(150.2 * u.deg, 2.2 * u.deg))
    with pytest.raises(LensviewInputError, match="'here' and 'there' do not overlap"):
        ph.measure_filters([here, far], coords, radius=0.2 * u.arcsec)


def test_missing_zero_point_names_the_filter_and_what_to_give():
    coords = knots()
    good = band_image("good", 1.0, 27.0, 0.05, 0.0, coords, [1, 1, 1])
    wcs = analytic.make_wcs(CENTRE, (160, 160), 0.05 * u.arcsec)
    header = wcs.to_header()
    header["FILTER"] = "nozp"
    header["PIVOT_UM"] = 2.0
    bare = ph.BandImage(np.zeros((160, 160)), wcs, ph.band_from_header(header))
    with pytest.raises(LensviewInputError, match="'nozp' has no photometric zero point.*PHOTZP.*zp="):
        ph.measure_filters([good, bare], coords, radius=0.2 * u.arcsec)


def test_repeated_filter_names_and_unknown_psf_are_input_errors():
    coords = knots()
    one = band_image("same", 1.0, 27.0, 0.05, 0.0, coords, [1, 1, 1])
    with pytest.raises(LensviewInputError, match="more than once"):
        ph.measure_filters([one, one], coords, radius=0.2 * u.arcsec)
    nopsf = ph.BandImage(one.data, one.wcs, ph.Band("nopsf", 1 * u.um, 27.0))
    with pytest.raises(LensviewInputError, match="PSF FWHM of nopsf is unknown"):
        ph.measure_filters([nopsf], coords)


@pytest.mark.parametrize("beta", [None, 2.5, 4.0])
def test_point_source_correction_matches_numerical_integration(beta):
    # Enclosed light of a Gaussian or Moffat PSF (Moffat 1969, A&A 3, 455) integrated
    # numerically over the plane (scipy.integrate.quad), with the annulus mean taken off.
    from scipy.integrate import quad

    band = ph.Band("b", 1 * u.um, 27.0, psf_fwhm=0.12 * u.arcsec, psf_beta=beta)
    fwhm = 0.12
    if beta is None:
        sigma = fwhm / 2.354820045
        profile = lambda r: np.exp(-0.5 * (r / sigma) ** 2)  # noqa: E731
    else:
        a = fwhm / (2 * np.sqrt(2 ** (1 / beta) - 1))
        profile = lambda r: (1 + (r / a) ** 2) ** (-beta)  # noqa: E731

    def light(r0, r1):
        return quad(lambda r: 2 * np.pi * r * profile(r), r0, r1, limit=200)[0]

    whole = light(0, np.inf)
    r, r_in, r_out = 0.15, 0.3, 0.45
    kept = (light(0, r) - np.pi * r**2 * light(r_in, r_out) / (np.pi * (r_out**2 - r_in**2))) / whole
    assert ph.point_source_correction(band, r, (r_in, r_out)) == pytest.approx(1 / kept,
                                                                                      rel=1e-6)
