"""The `lensview nature` command on the demo's filters."""

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.table import Table

import lensview as lv
from lensview import demo
from lensview.cli import main

D = demo.DEMO_DIRECTORY


def _models():
    grid = demo.GRIDS[0]
    return ["--model", ",".join(str(D / f) for f in grid.files),
            "--z-lens", str(demo.Z_LENS), "--z-source", str(demo.Z_SOURCE)]


def _cutouts():
    out = []
    for f in demo.FILTERS:
        out += ["--cutout", str(D / f.file)]
    return out


@pytest.fixture(scope="module")
def two_knots(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("nature")
    candidates = lv.read_candidates(D / demo.CANDIDATE_FILE)[:2]
    path = tmp / "knots.ecsv"
    candidates.write(path)
    return path, candidates


def test_nature_writes_the_library_result_and_figures(two_knots, tmp_path, capsys):
    path, candidates = two_knots
    out = tmp_path / "nature.ecsv"
    code = main(["nature", *_models(), *_cutouts(), "--candidates", str(path),
                 "--figures", str(tmp_path / "figs"), "-o", str(out)])
    assert code == 0
    table = Table.read(out)
    coords = SkyCoord(np.asarray(candidates["ra"]) * u.deg, np.asarray(candidates["dec"]) * u.deg)
    _, fields, _ = demo.load_demo()
    expected = lv.knot_nature(demo.load_demo_filters(), coords, fields[:1], demo.Z_SOURCE,
                              labels=list(candidates["label"]))
    assert np.allclose(table["temperature"], expected.summary["temperature"], rtol=1e-9)
    assert list(table["verdict"]) == list(expected.summary["verdict"])
    assert (tmp_path / "nature_models.ecsv").is_file() and (tmp_path / "nature_filters.ecsv").is_file()
    assert sorted(p.name for p in (tmp_path / "figs").iterdir()) == ["knot_C.png", "knot_M1a.png"]
    printed = capsys.readouterr()
    assert "C: " in printed.out and "caution:" in printed.err


def test_per_filter_options_override_the_header(two_knots, tmp_path):
    path, _ = two_knots
    out = tmp_path / "n.ecsv"
    cutouts = _cutouts()
    cutouts[3:4] = [cutouts[3], "zp=28.5", "name=mine", "pivot=15000Angstrom", "psf=0.1", "beta=3"]
    assert main(["nature", *_models(), *cutouts, "--candidates", str(path), "-o", str(out)]) == 0
    filters = Table.read(tmp_path / "n_filters.ecsv")
    assert "mine" in set(filters["band"])
    assert filters.meta["zero_points"][1] == 28.5


@pytest.mark.parametrize("change, phrase", [
    (lambda c: c[:2] + [c[1] + "X"] + c[2:], "is not an option of a filter"),
    (lambda c: c[:2] + ["pivot=blue"] + c[2:], "could not read"),
])
def test_bad_filter_options_exit_2(two_knots, tmp_path, capsys, change, phrase):
    path, _ = two_knots
    code = main(["nature", *_models(), *change(_cutouts()), "--candidates", str(path),
                 "-o", str(tmp_path / "x.ecsv")])
    assert code == 2
    err = capsys.readouterr().err
    assert phrase in err and "Traceback" not in err


def test_missing_zero_point_exits_2_naming_the_filter(two_knots, tmp_path, capsys):
    path, _ = two_knots
    data, header = fits.getdata(D / demo.FILTERS[0].file, header=True)
    del header["PHOTZP"]
    bare = tmp_path / "bare.fits"
    fits.writeto(bare, data, header)
    cutouts = _cutouts()
    cutouts[1] = str(bare)
    code = main(["nature", *_models(), *cutouts, "--candidates", str(path),
                 "-o", str(tmp_path / "x.ecsv")])
    assert code == 2
    err = capsys.readouterr().err
    assert f"'{demo.FILTERS[0].name}' has no photometric zero point" in err and "zp=" in err
