"""The lensview command: real files in, tables and regions out, clear errors."""

import subprocess
import sys

import numpy as np
import pytest
import astropy.units as u
from astropy.io import fits
from astropy.table import Table

import lensview as lv
from lensview.cli import main

from closed_form import make_wcs, sie

Z_LENS, Z_SOURCE = 0.4, 2.0


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A SIE model as two files and as a cube, a cutout and a candidate list."""
    tmp = tmp_path_factory.mktemp("cli")
    n = 240
    wcs = make_wcs(n, n, scale_arcsec=0.05, rotation_deg=20)
    ax, ay = sie(n, 70.0, 0.7, 0.4, n / 2 + 0.3, n / 2 - 0.2)
    header = wcs.to_header()
    header["BUNIT"] = "pixel"
    fits.writeto(tmp / "sie_x.fits", ax.astype(np.float32), header)
    fits.writeto(tmp / "sie_y.fits", ay.astype(np.float32), header)
    cube_header = header.copy()
    fits.writeto(tmp / "sie_cube.fits", np.stack([ax, ay]).astype(np.float32) * 1.1, cube_header)
    cutout_wcs = make_wcs(200, 200, scale_arcsec=0.04)
    rng = np.random.default_rng(0)
    cutout_header = cutout_wcs.to_header()
    cutout_header["PHOTZP"] = 28.0
    fits.writeto(tmp / "cutout.fits", rng.normal(0, 0.01, (200, 200)).astype(np.float32), cutout_header)
    field = lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS)
    xy = np.array([[60.0, 120.0], [180.0, 90.0], [120.0, 200.0]])
    coords = field.pixels_to_sky(xy[:, 0], xy[:, 1])
    candidates = Table({"ra": coords.ra.deg * u.deg, "dec": coords.dec.deg * u.deg,
                        "label": ["north", "east", "west"]})
    candidates.write(tmp / "knots.ecsv")
    (tmp / "empty.csv").write_text("ra,dec,label\n")
    (tmp / "junk.fits").write_bytes(b"this is not a FITS file" * 20)
    return tmp, field, coords


def model_args(tmp):
    return ["--model", f"{tmp / 'sie_x.fits'},{tmp / 'sie_y.fits'}", "--units", "pixel",
            "--model-name", "two-files", "--model", str(tmp / "sie_cube.fits"),
            "--model-name", "cube", "--z-lens", str(Z_LENS), "--z-source", str(Z_SOURCE)]


def test_measure_writes_the_library_table(files, tmp_path, capsys):
    tmp, field, coords = files
    out = tmp_path / "knots_measured.ecsv"
    status = main(["measure", *model_args(tmp), "--candidates", str(tmp / "knots.ecsv"),
                   "-o", str(out)])
    assert status == 0
    table = Table.read(out)
    assert len(table) == 6 and set(table["model"]) == {"two-files", "cube"}
    expected = lv.measure_candidates(coords, field, Z_SOURCE)
    mine = table[table["model"] == "two-files"]
    np.testing.assert_allclose(mine["offset_arcsec"], expected["offset_arcsec"], rtol=1e-5)
    np.testing.assert_allclose(mine["mu"], expected["mu"], rtol=1e-4)
    assert table["offset_arcsec"].unit == u.arcsec
    spread = Table.read(tmp_path / "knots_measured_spread.ecsv")
    assert list(spread["label"]) == ["north", "east", "west"]
    assert "[lensview]" in capsys.readouterr().err  # progress on stderr


def test_curves_and_images(files, tmp_path):
    tmp, field, coords = files
    regions = tmp_path / "curves.ecsv"
    assert main(["curves", *model_args(tmp), "--caustics", "-o", str(regions)]) == 0
    vertices = Table.read(regions)
    assert {"kind", "curve_id", "model", "ra", "dec"} <= set(vertices.colnames)
    images = tmp_path / "images.ecsv"
    assert main(["images", *model_args(tmp)[:6], "--z-lens", str(Z_LENS), "--z-source", str(Z_SOURCE),
                 "--ra", str(coords[0].ra.deg), "--dec", str(coords[0].dec.deg), "-o", str(images)]) == 0
    table = Table.read(images)
    assert len(table) >= 2 and set(np.unique(table["parity"])) <= {-1, 1}


@pytest.mark.parametrize("change, phrase", [
    (lambda a, tmp: a[:a.index("--z-source") + 1] + ["0.2"] + a[a.index("--z-source") + 2:],
     "at or below"),
    (lambda a, tmp: ["--model", str(tmp / "junk.fits")] + a[a.index("--z-lens"):], "FITS"),
    (lambda a, tmp: ["--model", str(tmp / "missing.fits")] + a[a.index("--z-lens"):], "missing.fits"),
])
def test_bad_input_exits_2_with_a_message(files, tmp_path, capsys, change, phrase):
    tmp = files[0]
    args = change(model_args(tmp), tmp)
    status = main(["measure", *args, "--candidates", str(tmp / "knots.ecsv"),
                   "-o", str(tmp_path / "out.ecsv")])
    err = capsys.readouterr().err
    assert status == 2
    assert phrase in err and "Traceback" not in err
    assert not (tmp_path / "out.ecsv").exists()


def test_empty_candidate_file_is_an_error(files, tmp_path, capsys):
    tmp = files[0]
    status = main(["measure", *model_args(tmp), "--candidates", str(tmp / "empty.csv"),
                   "-o", str(tmp_path / "out.ecsv")])
    assert status == 2
    assert "candidate" in capsys.readouterr().err.lower()


def test_console_script_help():
    result = subprocess.run([sys.executable, "-m", "lensview.cli", "--help"], capture_output=True,
                            text=True, check=True)
    for command in ("curves", "measure", "images", "pair", "figure", "demo"):
        assert command in result.stdout


def test_curves_with_candidates_to_fits_region_table(files, tmp_path):
    from regions import Regions

    tmp = files[0]
    out = tmp_path / "overlay.fits"
    assert main(["curves", *model_args(tmp), "--cutout", str(tmp / "cutout.fits"),
                 "--candidates", str(tmp / "knots.ecsv"), "-o", str(out)]) == 0
    regions = Regions.read(out, format="fits")
    assert len(regions) >= 5  # curves of two models plus three points


def test_session_check_names_the_file_that_differs(files, tmp_path, capsys):
    from lensview.io import InputFile, ModelInputs, save_session

    tmp, _, coords = files
    cutout = InputFile.from_content("cutout.fits", tmp / "cutout.fits")
    model = ModelInputs("cube", (InputFile.from_content("sie_cube.fits", tmp / "sie_cube.fits"),))
    session_path = tmp_path / "session.json"
    save_session(session_path, dict(z_lens=Z_LENS, z_source=Z_SOURCE, cutout=cutout, models=(model,),
                                    candidates=coords))
    assert main(["session", str(session_path), str(tmp / "cutout.fits"), str(tmp / "sie_cube.fits"),
                 "--candidates-out", str(tmp_path / "c.ecsv")]) == 0
    assert len(Table.read(tmp_path / "c.ecsv")) == 3
    changed = tmp_path / "sie_cube.fits"
    changed.write_bytes((tmp / "sie_cube.fits").read_bytes()[:-2880] + b"\0" * 2880)
    status = main(["session", str(session_path), str(tmp / "cutout.fits"), str(changed)])
    captured = capsys.readouterr()
    assert status == 2
    assert "sie_cube.fits" in captured.out + captured.err
    assert "differ" in (captured.out + captured.err)


def test_cutout_outside_every_model_exits_2(files, tmp_path, capsys):
    tmp = files[0]
    far = make_wcs(100, 100, crval=(151.0, 2.0)).to_header()
    fits.writeto(tmp_path / "far.fits", np.zeros((100, 100), np.float32), far)
    status = main(["measure", *model_args(tmp), "--candidates", str(tmp / "knots.ecsv"),
                   "--cutout", str(tmp_path / "far.fits"), "-o", str(tmp_path / "out.ecsv")])
    assert status == 2
    assert "does not cover any part of the cutout" in capsys.readouterr().err


def test_units_and_normalisation_come_from_the_headers(files, tmp_path, capsys):
    tmp, field, coords = files
    ratio = field.scaling_factor(3.0)
    header = fits.getheader(tmp / "sie_x.fits")
    header["Z_NORM"] = 3.0
    # Maps made for z = 3: the unit maps times D_ls/D_s(3) (design notes, sec. 4).
    fits.writeto(tmp_path / "z3_x.fits", fits.getdata(tmp / "sie_x.fits") * ratio, header)
    fits.writeto(tmp_path / "z3_y.fits", fits.getdata(tmp / "sie_y.fits") * ratio, header)
    out = tmp_path / "z3.ecsv"
    assert main(["measure", "--model", f"{tmp_path / 'z3_x.fits'},{tmp_path / 'z3_y.fits'}",
                 "--z-lens", str(Z_LENS), "--z-source", str(Z_SOURCE),
                 "--candidates", str(tmp / "knots.ecsv"), "-o", str(out)]) == 0
    assert "z = 3.0" in capsys.readouterr().err
    expected = lv.measure_candidates(coords, field, Z_SOURCE)
    np.testing.assert_allclose(Table.read(out)["mu"], expected["mu"], rtol=1e-4)
    del header["BUNIT"]
    fits.writeto(tmp_path / "bare_x.fits", fits.getdata(tmp / "sie_x.fits"), header)
    fits.writeto(tmp_path / "bare_y.fits", fits.getdata(tmp / "sie_y.fits"), header)
    status = main(["measure", "--model", f"{tmp_path / 'bare_x.fits'},{tmp_path / 'bare_y.fits'}",
                   "--z-lens", str(Z_LENS), "--z-source", str(Z_SOURCE),
                   "--candidates", str(tmp / "knots.ecsv"), "-o", str(tmp_path / "bare.ecsv")])
    assert status == 2
    assert "BUNIT" in capsys.readouterr().err


def test_convergence_model_gives_images_with_delays_and_pairs(files, tmp_path, capsys):
    tmp, field, coords = files
    n = 200
    wcs = make_wcs(n, n, scale_arcsec=0.05, rotation_deg=20)
    y, x = np.mgrid[0:n, 0:n].astype(float)
    # A Gaussian convergence (SEF 1992, sec. 8.1) strong enough for a tangential curve.
    kappa = 2.0 * np.exp(-((x - 100.3) ** 2 + (y - 99.6) ** 2) / (2 * 16.0**2))
    header = wcs.to_header()
    header["LENSMAP"] = "CONVERGENCE"
    fits.writeto(tmp_path / "kappa.fits", kappa.astype(np.float32), header)
    knot = wcs.pixel_to_world(100.3 + 22.0, 99.6 + 3.0)
    args = ["--model", str(tmp_path / "kappa.fits"), "--z-lens", str(Z_LENS),
            "--z-source", str(Z_SOURCE)]
    out = tmp_path / "images.ecsv"
    assert main(["images", *args, "--ra", str(knot.ra.deg), "--dec", str(knot.dec.deg),
                 "-o", str(out)]) == 0
    captured = capsys.readouterr()
    assert "mass outside the map is missing" in captured.err
    assert "days later" in captured.out and "first" in captured.out
    table = Table.read(out)
    assert table["time_delay_days"].unit == u.day
    assert sorted(table["arrival_order"]) == list(range(1, len(table) + 1))
    with pytest.warns(lv.MissingMassWarning):
        direct = lv.DeflectionField.from_convergence(kappa.astype(np.float32), wcs, z_lens=Z_LENS)
    expected = lv.predict_counterimages(knot, direct, Z_SOURCE)
    np.testing.assert_allclose(np.sort(table["time_delay_days"]),
                               np.sort(expected["time_delay_days"]), rtol=1e-4, atol=1e-3)
    # Two images of the knot, as a knot list: the pair carries their delay.
    images = Table({"ra": table["ra"], "dec": table["dec"],
                    "label": [f"k{k}" for k in range(len(table))]})
    images.write(tmp_path / "images_as_knots.ecsv")
    pairs_out = tmp_path / "pairs.ecsv"
    assert main(["pair", *args, "--candidates", str(tmp_path / "images_as_knots.ecsv"),
                 "-o", str(pairs_out)]) == 0
    pairs = Table.read(pairs_out)
    assert len(pairs) >= 1 and "time_delay_days" in pairs.colnames and "leading" in pairs.colnames
    assert "leads by" in capsys.readouterr().out


def test_map_kind_override_and_bad_convergence(files, tmp_path, capsys):
    n = 64
    wcs = make_wcs(n, n)
    kappa = np.full((n, n), 0.2, np.float32)
    kappa[10, 10] = np.nan
    fits.writeto(tmp_path / "holey.fits", kappa, wcs.to_header())
    common = ["--z-lens", str(Z_LENS), "--z-source", str(Z_SOURCE), "-o", str(tmp_path / "c.ecsv")]
    status = main(["curves", "--model", str(tmp_path / "holey.fits"), "--map-kind", "convergence",
                   *common])
    err = capsys.readouterr().err
    assert status == 2 and "fill_nan" in err and "Traceback" not in err
    status = main(["curves", "--model", str(tmp_path / "holey.fits"), "--map-kind", "convergence",
                   "--fill-nan", "0", *common])
    assert status == 0


def test_figure_draws_a_magnification_overlay(files, tmp_path, capsys):
    tmp, field, coords = files
    mu = np.abs(field.grid_maps(Z_SOURCE)["mu"])
    header = field.wcs.to_header()
    header["LENSMAP"] = "MAGNIFICATION"
    fits.writeto(tmp_path / "mu.fits", mu.astype(np.float32), header)
    out = tmp_path / "figure.png"
    assert main(["figure", *model_args(tmp)[:6], "--z-lens", str(Z_LENS), "--z-source",
                 str(Z_SOURCE), "--cutout", str(tmp / "cutout.fits"), "--magnification-map",
                 str(tmp_path / "mu.fits"), "--dpi", "60", "-o", str(out)]) == 0
    assert out.stat().st_size > 1000
    assert "cannot place critical curves" in capsys.readouterr().err
    # The same map given as a model is refused, with the reason.
    status = main(["curves", "--model", str(tmp_path / "mu.fits"), "--z-lens", str(Z_LENS),
                   "--z-source", str(Z_SOURCE), "-o", str(tmp_path / "c.ecsv")])
    assert status == 2 and "not enough to place critical curves" in capsys.readouterr().err


def test_pair_takes_the_psf_fwhm_and_knots_with_the_old_option_name(files, tmp_path, capsys):
    tmp = files[0]
    for option in ("--knots", "--candidates"):
        out = tmp_path / f"pairs{option}.ecsv"
        assert main(["pair", *model_args(tmp), option, str(tmp / "knots.ecsv"), "--psf-fwhm", "0.1",
                     "-o", str(out)]) == 0
        assert "score" in Table.read(out).colnames
    assert main(["pair", *model_args(tmp), "--knots", str(tmp / "knots.ecsv"), "--psf-fwhm", "-1",
                 "-o", str(tmp_path / "bad.ecsv")]) == 2
    assert "--psf-fwhm" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["pair", *model_args(tmp), "-o", str(tmp_path / "none.ecsv")])
    assert "--knots" in capsys.readouterr().err


def test_figure_draws_pairs_counterimages_with_the_page_display_options(files, tmp_path, capsys):
    tmp = files[0]
    out = tmp_path / "field.png"
    assert main(["figure", *model_args(tmp), "--cutout", str(tmp / "cutout.fits"),
                 "--knots", str(tmp / "knots.ecsv"), "--pairs", "--counterimages-of", "north",
                 "--limits", "99.5", "--cmap", "magma", "--dpi", "60", "-o", str(out)]) == 0
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    status = main(["figure", *model_args(tmp), "--cutout", str(tmp / "cutout.fits"),
                   "--knots", str(tmp / "knots.ecsv"), "--counterimages-of", "nope",
                   "-o", str(out)])
    assert status == 2 and "names no knot" in capsys.readouterr().err
