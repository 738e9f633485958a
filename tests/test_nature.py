"""What is the knot: single-star limits, the verdict, and the demo's compact knot."""

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table

import lensview as lv
from lensview import demo, nature
from lensview.demo.readme import _compact_truth


def test_eddington_luminosity_per_solar_mass():
    # L_Edd = 4 pi G M c / kappa_es = 1.26e38 (M / M_sun) erg/s for pure hydrogen,
    # kappa_es = 0.4 cm^2/g (Rybicki & Lightman 1979, sec. 1.6; from memory).
    one = nature.eddington_luminosity(1 * u.M_sun, hydrogen_fraction=1.0)
    assert one.to_value(u.erg / u.s) == pytest.approx(1.26e38, rel=0.01)
    assert nature.electron_scattering_opacity(0.7).to_value(u.cm**2 / u.g) == pytest.approx(0.34)
    # Linear in mass and inverse in the opacity (the formula itself).
    many = nature.eddington_luminosity(300 * u.M_sun, 0.7).to_value(u.L_sun)
    assert many == pytest.approx(300 * one.to_value(u.L_sun) * 2.0 / 1.7)


def test_single_star_limit_switches_to_the_cool_supergiant_limit():
    # Humphreys & Davidson 1979 (ApJ 232, 409; from memory): log L/L_sun = 5.8 for cool stars.
    assert nature.single_star_limit(5000 * u.K).to_value(u.L_sun) == pytest.approx(10**5.8)
    assert nature.single_star_limit(30000 * u.K).to_value(u.L_sun) == pytest.approx(
        nature.eddington_luminosity(nature.MAX_STELLAR_MASS).to_value(u.L_sun))


@pytest.mark.parametrize("temperature, lum, radius, size, expected", [
    (20000, (1e5, 1e6), (10, 80), 0.01, dict(single_star=True, cluster=False, transient=False)),
    (20000, (5e7, 1e8), (200, 300), 2.0, dict(single_star=False, few_stars=False, cluster=True)),
    (20000, (5e7, 1e8), (200, 300), 0.01, dict(transient=True, cluster=False)),
    (6000, (1e6, 2e6), (900, 1200), np.nan, dict(single_star=False, few_stars=True, cluster=True)),
    (6000, (1e5, 2e5), (5000, 6000), 0.01, dict(single_star=False, few_stars=False, transient=True)),
])
def test_verdict_keeps_only_what_the_limits_allow(temperature, lum, radius, size, expected):
    verdict = nature.knot_verdict(temperature * u.K, [v * u.L_sun for v in lum],
                                  [v * u.R_sun for v in radius], size * u.pc)
    for key, value in expected.items():
        assert verdict[key] is value, (key, verdict)
    assert verdict["verdict"]


def test_verdict_wording():
    only = nature.knot_verdict(8000 * u.K, (1e8 * u.L_sun, 2e8 * u.L_sun),
                               (3000 * u.R_sun, 4000 * u.R_sun), 3 * u.pc)
    assert only["verdict"] == "only a star cluster fits"
    none = nature.knot_verdict(np.nan * u.K, (np.nan, np.nan), (np.nan, np.nan), np.nan)
    assert none["verdict"].startswith("undecided")


@pytest.fixture(scope="module")
def demo_nature():
    _, fields, candidates = demo.load_demo()
    images = demo.load_demo_filters()
    labels = list(candidates["label"])
    coords = SkyCoord(np.asarray(candidates["ra"]) * u.deg, np.asarray(candidates["dec"]) * u.deg)
    c = labels.index("C")
    return lv.knot_nature(images, coords[[c, c + 1]], fields, demo.Z_SOURCE,
                          labels=["C", labels[c + 1]]), images, coords[c]


def test_demo_compact_knot_temperature_is_recovered(demo_nature):
    result, _, _ = demo_nature
    row = result.summary[0]
    # The demo's invented truth (sample_images/README.md): a blackbody of COMPACT_TEMPERATURE.
    # The arc's own light under the aperture (10-30 % of C's flux, more in the bluest
    # filter) is not removed by a local annulus on a thin arc, so the fit is a few per
    # cent off.
    assert row["temperature"] == pytest.approx(demo.COMPACT_TEMPERATURE, rel=0.05)
    assert row["n_filters"] == len(demo.FILTERS)
    assert len(result.per_model) == 2 * len(demo.MODEL_NAMES)
    assert row["luminosity_min"] < row["luminosity_max"]
    assert set(result.summary.meta) >= {"limits", "cautions", "dust"}
    assert row["verdict"] and row["source_radius_kind"] in ("upper limit", "measured", "unknown")


def test_demo_compact_knot_luminosity_with_its_true_magnification(demo_nature):
    _, images, coord = demo_nature
    # The true total magnification of C's two merged images is in the demo's metadata.
    candidates = demo.load_demo()[2]
    mu_true = float(np.sum(np.abs(candidates.meta["compact_images_mu"])))
    table = Table(dict(candidate=[0], model=["truth"], mu=[mu_true], lambda_t=[np.nan]))
    result = lv.knot_nature(images, coord, table, demo.Z_SOURCE, labels=["C"])
    luminosity, radius, _ = _compact_truth()
    # The arc's light under the aperture adds 10-30 % to C's fluxes (see above), which
    # the luminosity and the radius inherit.
    assert result.per_model["luminosity"][0] == pytest.approx(luminosity, rel=0.2)
    assert result.per_model["radius"][0] == pytest.approx(radius, rel=0.15)


def test_realisations_widen_the_luminosity_range(demo_nature):
    _, images, coord = demo_nature
    table = Table(dict(candidate=[0], model=["one"], mu=[1000.0]))
    realisations = Table(dict(candidate=[0, 0, 0], mu=[500.0, 2000.0, 8000.0]))
    result = lv.knot_nature(images, coord, table, demo.Z_SOURCE, realisations=realisations)
    lum = np.asarray(result.per_model["luminosity"])
    assert list(result.per_model["model"]) == ["one", "realisation 1", "realisation 2",
                                               "realisation 3"]
    # L ~ 1/|mu| (Hogg 1999 with the magnification; see lensview.sed).
    assert lum[1] / lum[0] == pytest.approx(2.0, rel=1e-9)
    assert result.summary["luminosity_min"][0] < lum[3] < lum[1] < result.summary["luminosity_max"][0]


def test_missing_mu_columns_are_an_input_error(demo_nature):
    _, images, coord = demo_nature
    with pytest.raises(lv.LensviewInputError, match="candidate, model and mu"):
        lv.knot_nature(images, coord, Table(dict(candidate=[0])), demo.Z_SOURCE)


def test_readme_example_of_several_filters_runs(capsys):
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    code = re.search(r"## Several filters: what is the knot\?\n.*?```python\n(.*?)```", text,
                     re.S).group(1)
    namespace = {}
    exec(compile(code, "README.md", "exec"), namespace)
    assert len(namespace["result"].summary) == len(namespace["knots"])
    assert "verdict" in capsys.readouterr().out


def test_realisations_without_mu_are_an_input_error(demo_nature):
    _, images, coord = demo_nature
    table = Table(dict(candidate=[0], model=["one"], mu=[1000.0]))
    with pytest.raises(lv.LensviewInputError, match="columns candidate"):
        lv.knot_nature(images, coord, table, demo.Z_SOURCE,
                       realisations=Table(dict(candidate=[0], magnification=[3.0])))


def _moffat_stamp(shape, x0, y0, fwhm_pix, beta, total, oversample=5):
    """A Moffat profile (Moffat 1969, A&A 3, 455) integrated over pixels by supersampling."""
    alpha = fwhm_pix / (2 * np.sqrt(2 ** (1 / beta) - 1))
    ny, nx = shape
    sub = (np.arange(nx * oversample) + 0.5) / oversample - 0.5
    suby = (np.arange(ny * oversample) + 0.5) / oversample - 0.5
    xx, yy = np.meshgrid(sub, suby)
    profile = (1 + ((xx - x0) ** 2 + (yy - y0) ** 2) / alpha**2) ** (-beta)
    binned = profile.reshape(ny, oversample, nx, oversample).sum(axis=(1, 3))
    # Normalised to the profile's total over the whole plane, pi alpha^2 / (beta - 1).
    return total * binned / oversample**2 / (np.pi * alpha**2 / (beta - 1))


def test_synthetic_knots_in_the_demo_filters_give_back_their_temperature():
    # Knots of known temperature at z = 1-6 put into images with the demo filters'
    # own WCS, Moffat PSF, zero point and sky noise (headers of sample_images), at
    # five places each (independent noise): the quoted 1-sigma uncertainty must hold
    # the true temperature in at least 68 % of the 30 measurements (Gaussian coverage).
    from astropy.io import fits

    from lensview.photometry import BandImage, measure_filters
    from lensview.sed import blackbody_flux_density, fit_blackbody

    headers = [fits.getheader(demo.DEMO_DIRECTORY / f.file) for f in demo.FILTERS]
    filters = demo.load_demo_filters()
    rng = np.random.default_rng(42)
    centre = filters[1].wcs.pixel_to_world(299.5, 299.5)
    offsets = [(-6, -6), (6, -6), (-6, 6), (6, 6), (0, 0)]
    cases = [(1.0, 5000.0), (2.0, 8000.0), (3.0, 12000.0), (4.0, 10000.0), (5.0, 15000.0),
             (6.0, 20000.0)]
    hits = total = 0
    for z, temperature in cases:
        # Normalised to 0.5 microjansky at the reference filter (S/N of tens).
        scale = 0.5 / blackbody_flux_density(1.5 * u.um, temperature, 1.0, z).value
        fluxes = blackbody_flux_density(np.array([f.pivot_um for f in demo.FILTERS]) * u.um,
                                        temperature, scale, z).to_value(u.uJy)
        for east, north in offsets:
            knot = centre.spherical_offsets_by(east * u.arcsec, north * u.arcsec)
            images = []
            for image, header, fnu in zip(filters, headers, fluxes):
                shape = image.data.shape
                x, y = (float(v) for v in image.wcs.world_to_pixel(knot))
                pixel = image.wcs.proj_plane_pixel_scales()[0].to_value(u.arcsec)
                counts = fnu / image.band.unit_flux_density().to_value(u.uJy)
                box = 40
                data = rng.normal(0.0, header["SKYSIGMA"], shape)
                ix, iy = int(round(x)), int(round(y))
                stamp = _moffat_stamp((2 * box + 1, 2 * box + 1), x - ix + box, y - iy + box,
                                      header["PSF_FWHM"] / pixel, header["PSF_BETA"], counts)
                data[iy - box:iy + box + 1, ix - box:ix + box + 1] += stamp
                images.append(BandImage(data, image.wcs, image.band))
            phot = measure_filters(images, knot, radius=0.5 * u.arcsec)
            fit = fit_blackbody(phot["pivot"].quantity, phot["flux"].quantity,
                                phot["flux_err"].quantity, z)
            total += 1
            hits += abs(fit.temperature.to_value(u.K) - temperature) <= fit.temperature_err.to_value(u.K)
    print(f"coverage {hits}/{total}")
    assert hits / total >= 0.68
