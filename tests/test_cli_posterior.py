"""The ``lensview posterior`` subcommand: knots over a folder of realisations."""

import numpy as np
import astropy.units as u
from astropy.io import fits
from astropy.table import Table

import lensview as lv
from lensview.cli import main

from closed_form import make_wcs, sie

Z_LENS, Z_SOURCE = 0.4, 2.0
N = 200


def realisations(folder, einstein_radii):
    wcs = make_wcs(N, N)
    header = wcs.to_header()
    header["BUNIT"] = "pixel"
    for k, theta in enumerate(einstein_radii):
        ax, ay = sie(N, theta, 0.75, 0.3, N / 2 + 0.3, N / 2 - 0.2)
        fits.writeto(folder / f"draw{k:02d}_alpha_x.fits", ax.astype(np.float32), header)
        fits.writeto(folder / f"draw{k:02d}_alpha_y.fits", ay.astype(np.float32), header)
    return wcs


def knots_file(folder, wcs):
    coords = wcs.pixel_to_world(np.array([N / 2 + 40.0, N / 2.0]), np.array([N / 2.0, N / 2 + 62.0]))
    Table({"ra": coords.ra.deg * u.deg, "dec": coords.dec.deg * u.deg,
           "label": ["east", "north"]}).write(folder / "knots.ecsv")
    return coords


def test_posterior_writes_the_library_summary_and_the_samples(tmp_path, capsys):
    models = tmp_path / "models"
    models.mkdir()
    wcs = realisations(models, [58.0, 61.0, 64.0])
    coords = knots_file(tmp_path, wcs)
    out, samples = tmp_path / "spread.ecsv", tmp_path / "every.vot"
    status = main(["posterior", "--realisations", str(models), "--knots",
                   str(tmp_path / "knots.ecsv"), "--z-lens", str(Z_LENS), "--z-source",
                   str(Z_SOURCE), "--percentiles", "16,50,84", "--mu-threshold", "10",
                   "--mu-threshold", "3", "--samples", str(samples), "-o", str(out)])
    assert status == 0
    captured = capsys.readouterr()
    assert "realisations [" in captured.err and "3/3" in captured.err  # the progress bar
    table = Table.read(out)
    expected = lv.measure_ensemble(coords, models, Z_SOURCE, z_lens=Z_LENS, labels=["east", "north"],
                                   percentiles=(16, 50, 84), mu_thresholds=(10, 3))
    assert list(table["label"]) == ["east", "north"]
    for name in ("offset_arcsec_p50", "abs_mu_p84", "mu_p16", "fraction_abs_mu_gt_10",
                 "fraction_abs_mu_gt_3", "fraction_odd_parity"):
        np.testing.assert_allclose(table[name], expected[name], rtol=1e-6)
    assert table["offset_arcsec_p50"].unit == u.arcsec
    every = Table.read(samples)
    assert len(every) == 6 and set(every["model"]) == {"draw00", "draw01", "draw02"}


def test_posterior_bad_input_exits_2_and_a_broken_file_is_reported(tmp_path, capsys):
    empty = tmp_path / "empty"
    empty.mkdir()
    wcs = make_wcs(N, N)
    knots_file(tmp_path, wcs)
    common = ["--knots", str(tmp_path / "knots.ecsv"), "--z-lens", str(Z_LENS), "--z-source",
              str(Z_SOURCE), "-o", str(tmp_path / "out.ecsv")]
    assert main(["posterior", "--realisations", str(empty), *common]) == 2
    err = capsys.readouterr().err
    assert "lensview: error:" in err and "holds no FITS files" in err and "Traceback" not in err
    models = tmp_path / "models"
    models.mkdir()
    realisations(models, [58.0, 62.0])
    (models / "draw09.fits").write_bytes(b"not a FITS file at all" * 10)
    assert main(["posterior", "--realisations", str(models / "*.fits"), "--candidates",
                 str(tmp_path / "knots.ecsv"), *common[2:]]) == 0
    err = capsys.readouterr().err
    assert "left out draw09" in err and "draw09.fits" in err
    assert Table.read(tmp_path / "out.ecsv").meta["n_realisations"] == 2
    assert main(["posterior", "--realisations", str(models), *common, "--scheduler", "nowhere"]) == 2
    assert "Unknown scheduler" in capsys.readouterr().err
