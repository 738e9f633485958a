"""measure_ensemble: percentiles over model realisations."""

import numpy as np
import astropy.units as u
import pytest

import lensview as lv
from lensview.cosmology import distance_ratio
from lensview.ensemble import measure_ensemble
from lensview.errors import LensviewInputError

from closed_form import grid, make_wcs

Z_LENS, Z_SOURCE = 0.4, 2.0


def sis_field(theta_unit, n=200):
    x, y = grid(n, n / 2, n / 2)
    r = np.hypot(x, y)
    with np.errstate(invalid="ignore", divide="ignore"):
        return lv.DeflectionField(theta_unit * x / r, theta_unit * y / r, make_wcs(n, n),
                                  units="pixel", z_lens=Z_LENS, name=f"sis {theta_unit}")


def test_percentiles_match_the_sis_distribution():
    thetas = np.linspace(40.0, 50.0, 11)
    f = distance_ratio(Z_LENS, Z_SOURCE)
    wcs = make_wcs(200, 200)
    radius = 45.0
    coords = wcs.pixel_to_world(np.array([100 + radius, 100.0]), np.array([100.0, 100 + 70.0]))
    # Callables: each realisation is built inside its own task.
    table = measure_ensemble(coords, [lambda t=t: sis_field(t) for t in thetas], Z_SOURCE,
                             labels=["near", "far"])
    assert list(table["n_realisations"]) == [11, 11]
    for row, r in zip(table, (radius, 70.0)):
        # SIS: mu = theta/(theta - theta_E) (Narayan & Bartelmann 1996); percentiles as numpy's.
        mu = np.abs(r / (r - thetas * f))
        assert row["abs_mu_p50"] == pytest.approx(np.percentile(mu, 50), rel=1e-3)
        assert row["abs_mu_p16"] == pytest.approx(np.percentile(mu, 16), rel=1e-3)
        assert row["abs_mu_p84"] == pytest.approx(np.percentile(mu, 84), rel=1e-3)
    # theta_E f spans 27.9..34.9 px (f ~ 0.7): both knots lie outside every curve.
    assert list(table["fraction_odd_parity"]) == [0.0, 0.0]


def test_parity_fraction_counts_realisations_on_each_side():
    f = distance_ratio(Z_LENS, Z_SOURCE)
    wcs = make_wcs(200, 200)
    coords = wcs.pixel_to_world(np.array([100 + 45.0 * f]), np.array([100.0]))
    thetas = [40.0, 42.0, 48.0, 50.0]  # two curves inside the knot, two outside
    table = measure_ensemble(coords, [sis_field(t) for t in thetas], Z_SOURCE, scheduler="synchronous")
    assert table["fraction_odd_parity"][0] == pytest.approx(0.5)


def test_no_realisation_is_an_error():
    with pytest.raises(LensviewInputError, match="at least one"):
        measure_ensemble(make_wcs(10, 10).pixel_to_world([1], [1]), [], Z_SOURCE)


# ---------------------------------------------------------------------------- realisations on disk
import warnings

from astropy.io import fits
from astropy.table import vstack

from lensview.ensemble import (BrokenRealisationWarning, find_realisations, group_model_files,
                               summarize_ensemble)

N_MAP = 160
SCALE = 0.05  # arcsec per pixel, make_wcs's default


def sis_maps(theta_e, n=N_MAP, centre=None):
    """SIS deflection in pixels: alpha = theta_E r_hat (Narayan & Bartelmann 1996, sec. 3)."""
    c = n / 2 if centre is None else centre
    x, y = grid(n, c, c)
    r = np.hypot(x, y)
    r[r == 0] = 1e-9
    return theta_e * x / r, theta_e * y / r


def write_pair(folder, stem, theta_e, *, n=N_MAP, wcs=None, layout="pair", arcsec=False):
    ax, ay = sis_maps(theta_e, n)
    header = (wcs or make_wcs(n, n)).to_header()
    header["BUNIT"] = "arcsec" if arcsec else "pixel"
    if arcsec:
        ax, ay = ax * SCALE, ay * SCALE
    if layout == "pair":
        fits.writeto(folder / f"{stem}_alpha_x.fits", ax.astype(np.float32), header)
        fits.writeto(folder / f"{stem}_alpha_y.fits", ay.astype(np.float32), header)
    else:  # a two-plane cube in one file
        fits.writeto(folder / f"{stem}.fits", np.stack([ax, ay]).astype(np.float32), header)


def knot_coords(radii):
    wcs = make_wcs(N_MAP, N_MAP)
    radii = np.asarray(radii, float)
    return wcs.pixel_to_world(N_MAP / 2 + radii, np.full(len(radii), N_MAP / 2.0))


def test_files_are_grouped_into_pairs_and_single_files():
    names = ["m/r2_alpha_y.fits", "m/r1_alpha_x.fits", "m/r1_alpha_y.fits", "m/r2_alpha_x.fits",
             "m/cube3.fits", "m/r4-defx.fits.gz", "m/r4-defy.fits.gz", "m/lonely_x.fits"]
    assert group_model_files(names) == [
        ("cube3", ("m/cube3.fits",)),
        ("lonely_x", ("m/lonely_x.fits",)),
        ("r1", ("m/r1_alpha_x.fits", "m/r1_alpha_y.fits")),
        ("r2", ("m/r2_alpha_x.fits", "m/r2_alpha_y.fits")),
        ("r4", ("m/r4-defx.fits.gz", "m/r4-defy.fits.gz")),
    ]


def test_ensemble_equals_a_plain_loop_over_measure_candidates(tmp_path):
    thetas = [38.0, 41.0, 44.0, 47.5]
    for k, theta in enumerate(thetas):
        write_pair(tmp_path, f"r{k}", theta, layout="pair" if k % 2 else "cube", arcsec=k == 3)
    coords = knot_coords([25.0, 31.0, 50.0])
    calls = []
    summary, samples = measure_ensemble(coords, tmp_path, Z_SOURCE, z_lens=Z_LENS,
                                        mu_thresholds=(5, 20), return_samples=True,
                                        progress=lambda done, total: calls.append((done, total)))
    assert calls[-1] == (4, 4) and [c[0] for c in calls] == [1, 2, 3, 4]
    # The plain loop (reference): load each model and measure it, one after the other.
    loop = []
    for k in range(len(thetas)):
        files = sorted(tmp_path.glob(f"r{k}*.fits"))
        field = lv.load_model(*files, z_lens=Z_LENS, name=f"r{k}")
        loop.append(lv.measure_candidates(coords, field, Z_SOURCE))
    plain = vstack(loop)
    assert list(samples["model"]) == list(plain["model"])
    for name in ("offset_arcsec", "mu", "caustic_offset_pc", "source_ra", "source_dec"):
        np.testing.assert_allclose(samples[name], plain[name], rtol=1e-12, atol=0)
    n = len(coords)
    for name in ("offset_arcsec", "abs_mu", "mu", "caustic_offset_pc", "source_dec"):
        values = np.asarray(plain[name], float).reshape(len(thetas), n)
        for p in (2.5, 16, 50, 84, 97.5):
            # Percentiles as numpy computes them over the loop's values.
            np.testing.assert_allclose(summary[f"{name}_p{p:g}"], np.percentile(values, p, axis=0),
                                       rtol=1e-12)
    abs_mu = np.asarray(plain["abs_mu"], float).reshape(len(thetas), n)
    parity = np.asarray(plain["parity"]).reshape(len(thetas), n)
    np.testing.assert_allclose(summary["fraction_abs_mu_gt_5"], (abs_mu > 5).mean(axis=0))
    np.testing.assert_allclose(summary["fraction_abs_mu_gt_20"], (abs_mu > 20).mean(axis=0))
    np.testing.assert_allclose(summary["fraction_odd_parity"], (parity == -1).mean(axis=0))
    assert list(summary["n_realisations"]) == [4, 4, 4]
    assert summary.meta["broken"] == [] and summary.meta["n_realisations"] == 4
    assert summary["offset_arcsec_p50"].unit == u.arcsec
    assert summary["source_ra_p50"].unit == u.deg


def test_sis_with_a_drawn_einstein_radius(tmp_path):
    """theta_E ~ Normal(42 px, 3 px): the ensemble reproduces the distribution of the draws."""
    rng = np.random.default_rng(2028)
    thetas = rng.normal(42.0, 3.0, 24)
    f = distance_ratio(Z_LENS, Z_SOURCE)
    einstein = thetas * f  # Einstein radius at z_source in pixels: theta_E D_ls/D_s
    radii = np.array([22.0, 29.5, 45.0])
    thresholds = (4.0, 10.0, 30.0)
    # SIS: mu = r / (r - theta_E) (Narayan & Bartelmann 1996, eq. for the SIS); |mu| per draw.
    analytic_mu = radii[None, :] / np.abs(radii[None, :] - einstein[:, None])
    # Guard: no draw sits within 2 % of a threshold, where a numerical mu could round over it.
    assert np.min(np.abs(analytic_mu[..., None] / np.array(thresholds) - 1)) > 0.02
    table = measure_ensemble(knot_coords(radii), [lambda t=t: sis_field_n(t) for t in thetas],
                             Z_SOURCE, mu_thresholds=thresholds)
    offsets_mas = np.abs(radii[None, :] - einstein[:, None]) * SCALE * 1e3
    for p in (2.5, 16, 50, 84, 97.5):
        # Offset of an SIS image from its critical circle: |r - theta_E| (Narayan & Bartelmann 1996).
        np.testing.assert_allclose(np.asarray(table[f"offset_arcsec_p{p:g}"]) * 1e3,
                                   np.percentile(offsets_mas, p, axis=0), atol=1.0)
    for t in thresholds:
        # Probability that |mu| exceeds T over the same draws, from the SIS formula above.
        np.testing.assert_allclose(table[f"fraction_abs_mu_gt_{t:g}"], (analytic_mu > t).mean(axis=0))
    # SIS: images inside the Einstein circle have negative parity (Narayan & Bartelmann 1996).
    inside = (radii[None, :] < einstein[:, None]).mean(axis=0)
    np.testing.assert_allclose(table["fraction_odd_parity"], inside)
    np.testing.assert_allclose(table["fraction_inside_curve"], inside)
    assert 0 < inside[1] < 1  # the middle knot straddles the drawn curves


def sis_field_n(theta_e, n=N_MAP):
    ax, ay = sis_maps(theta_e, n)
    return lv.DeflectionField(ax, ay, make_wcs(n, n), units="pixel", z_lens=Z_LENS,
                              name=f"sis {theta_e:.3f}")


def test_a_local_cluster_reached_by_its_address_gives_the_same_table(tmp_path):
    from distributed import LocalCluster

    for k, theta in enumerate([39.0, 43.0, 46.0]):
        write_pair(tmp_path, f"r{k}", theta)
    coords = knot_coords([27.0, 33.0])
    local = measure_ensemble(coords, str(tmp_path / "*.fits"), Z_SOURCE, z_lens=Z_LENS,
                             mu_thresholds=(10,))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the cluster's own start-up notices
        with LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                          dashboard_address=None) as cluster:
            calls = []
            remote = measure_ensemble(coords, str(tmp_path / "*.fits"), Z_SOURCE, z_lens=Z_LENS,
                                      mu_thresholds=(10,), scheduler=cluster.scheduler_address,
                                      progress=lambda done, total: calls.append(done))
    assert calls == [1, 2, 3]
    assert remote.colnames == local.colnames
    for name in local.colnames:
        if local[name].dtype.kind == "f":
            np.testing.assert_allclose(remote[name], local[name], rtol=1e-12, equal_nan=True)
        else:
            assert list(remote[name]) == list(local[name])


# ---------------------------------------------------------------------------- bad input
def test_an_empty_folder_is_an_error(tmp_path):
    with pytest.raises(LensviewInputError, match="holds no FITS files"):
        measure_ensemble(knot_coords([30.0]), tmp_path, Z_SOURCE, z_lens=Z_LENS)
    with pytest.raises(LensviewInputError, match="No file matches"):
        measure_ensemble(knot_coords([30.0]), str(tmp_path / "*.fits"), Z_SOURCE, z_lens=Z_LENS)
    with pytest.raises(LensviewInputError, match="lens redshift"):
        measure_ensemble(knot_coords([30.0]), tmp_path, Z_SOURCE)


def test_a_realisation_on_another_grid_is_refused_by_name(tmp_path):
    write_pair(tmp_path, "a", 40.0)
    write_pair(tmp_path, "b", 42.0, n=N_MAP + 8)
    with pytest.raises(LensviewInputError, match=r"b_alpha_x.fits.*168 x 168.*share one grid"):
        measure_ensemble(knot_coords([30.0]), tmp_path, Z_SOURCE, z_lens=Z_LENS)
    shifted = tmp_path / "shifted"
    shifted.mkdir()
    write_pair(shifted, "a", 40.0)
    write_pair(shifted, "c", 42.0, wcs=make_wcs(N_MAP, N_MAP, crval=(150.0, 2.001)))
    with pytest.raises(LensviewInputError, match=r"c_alpha_x.fits.*different WCS"):
        measure_ensemble(knot_coords([30.0]), shifted, Z_SOURCE, z_lens=Z_LENS)


def test_a_broken_file_is_named_and_the_others_are_measured(tmp_path):
    for k, theta in enumerate([40.0, 44.0]):
        write_pair(tmp_path, f"r{k}", theta)
    (tmp_path / "r9.fits").write_bytes(b"SIMPLE  =  not really a FITS file")
    with pytest.warns(BrokenRealisationWarning, match="r9.fits"):
        table = measure_ensemble(knot_coords([30.0]), tmp_path, Z_SOURCE, z_lens=Z_LENS)
    assert table.meta["n_realisations"] == 2 and list(table["n_realisations"]) == [2]
    [broken] = table.meta["broken"]
    assert broken["name"] == "r9" and broken["files"][0].endswith("r9.fits")
    assert "not a readable FITS file" in broken["message"]
    assert len(find_realisations(tmp_path, z_lens=Z_LENS)) == 3


def test_summary_of_a_knot_outside_every_footprint_is_empty_not_zero():
    samples = measure_ensemble(knot_coords([30.0, 500.0]), [sis_field_n(40.0), sis_field_n(44.0)],
                               Z_SOURCE, return_samples=True, scheduler="synchronous")[1]
    table = summarize_ensemble(samples, percentiles=(50,), mu_thresholds=(3,))
    assert list(table["n_realisations"]) == [2, 0]
    assert np.isnan(table["offset_arcsec_p50"][1]) and np.isnan(table["fraction_odd_parity"][1])
    with pytest.raises(LensviewInputError, match="between 0 and 100"):
        summarize_ensemble(samples, percentiles=(150,))
    with pytest.raises(LensviewInputError, match="positive"):
        summarize_ensemble(samples, mu_thresholds=(-1,))


def test_an_unknown_scheduler_is_an_error():
    with pytest.raises(LensviewInputError, match="Unknown scheduler"):
        measure_ensemble(knot_coords([30.0]), [sis_field_n(40.0)], Z_SOURCE, scheduler="cluster")
