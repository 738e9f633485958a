"""Region lists, tables and session files: written, read back, and refused when malformed."""

import hashlib
import json

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.cosmology import FlatLambdaCDM, Planck18
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from regions import PointPixelRegion, PolygonPixelRegion, Regions

import lensview
from lensview.lens.curves import Curve
from lensview.errors import LensviewInputError
from lensview.io import (Candidate, FileStatus, InputFile, ModelInputs, Session, check_session_files,
                             load_session, read_candidates, read_table, save_session, vertex_table,
                             write_regions, write_table)

from closed_form import make_wcs

MICRO_ARCSEC = 1e-6 * u.arcsec


# ---------------------------------------------------------------------------- fixtures
@pytest.fixture
def cutout_wcs():
    return make_wcs(240, 200, scale_arcsec=0.04, rotation_deg=12.0, crval=(150.0, 2.0))


@pytest.fixture
def curves():
    """Curves on a model grid that differs from the cutout's (other scale and rotation)."""
    model_wcs = make_wcs(300, 300, scale_arcsec=0.05, rotation_deg=-20.0, crval=(150.0003, 1.9998))
    t = np.linspace(0, 2 * np.pi, 257, endpoint=False)
    ellipse = np.column_stack([150 + 60 * np.cos(t) + 3 * np.cos(3 * t), 150 + 35 * np.sin(t)])
    arc = np.column_stack([150 + 20 * np.cos(t[:90] * 0.7), 150 + 20 * np.sin(t[:90] * 0.7)])
    caustic = np.column_stack([150 + 8 * np.cos(t[::4]) ** 3, 150 + 8 * np.sin(t[::4]) ** 3])

    def curve(kind, xy, closed, model, plane, cusps=()):
        sky = model_wcs.pixel_to_world(xy[:, 0], xy[:, 1])
        return Curve(kind=kind, sky=sky, closed=closed, model=model, z_source=2.5, plane=plane,
                     map_pixels=xy, cusps=np.asarray(cusps, int))

    return [curve("tangential", ellipse, True, "model A", "image"),
            curve("radial", arc, False, "model B", "image"),
            curve("tangential", caustic, True, "model A", "source", cusps=(0, 16, 32, 48))]


@pytest.fixture
def candidates():
    coords = SkyCoord([150.00055, 149.99962, 150.00011] * u.deg, [2.00031, 1.99978, 2.00002] * u.deg)
    return Table({"ra": coords.ra.to(u.deg), "dec": coords.dec.to(u.deg),
                  "label": ["K1", "K2", "arc knot"], "pair_id": [1, 1, -1]})


def _digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ---------------------------------------------------------------------------- FITS region tables
def test_fits_region_table_round_trip_through_regions(tmp_path, curves, candidates, cutout_wcs):
    path = tmp_path / "regions.fits"
    write_regions(path, curves, candidates, wcs=cutout_wcs)
    # Read back with the regions library, the reference reader of FITS region
    # tables (ASC-FITS-REGION-1.2 binary table design).
    regions = Regions.read(str(path), format="fits")
    assert [type(r) for r in regions] == [PolygonPixelRegion] * 3 + [PointPixelRegion] * 3
    tags = Table.read(path, hdu="REGION_TAGS")
    for region, tag, curve in zip(regions, tags, curves):
        n = int(tag["NVERTEX"])
        assert n == len(curve.sky)
        # The cutout's pixels of the sky vertices, by astropy.wcs (reference library).
        x, y = cutout_wcs.world_to_pixel(curve.sky)
        vx, vy = region.vertices.x, region.vertices.y
        assert np.max(np.abs(vx[:n] - x)) < 1e-6 and np.max(np.abs(vy[:n] - y)) < 1e-6
        assert bool(tag["CLOSED"]) == curve.closed and tag["KIND"] == curve.kind
        assert tag["MODEL"] == curve.model and tag["PLANE"] == curve.plane
        extra = np.column_stack([vx[n:], vy[n:]])
        if curve.closed:
            # padding repeats the last vertex: zero-length edges, never (0, 0)
            assert np.all(extra == [vx[n - 1], vy[n - 1]])
        else:
            # an open curve is outlined there and back, then padded
            back = np.column_stack([x[-2:0:-1], y[-2:0:-1]])
            assert np.max(np.abs(extra[:len(back)] - back)) < 1e-6
            assert np.all(extra[len(back):] == extra[len(back) - 1])
    x, y = cutout_wcs.world_to_pixel(SkyCoord(candidates["ra"], candidates["dec"]))
    for k, region in enumerate(regions[3:]):
        assert abs(region.center.x - x[k]) < 1e-6 and abs(region.center.y - y[k]) < 1e-6
    assert list(tags["LABEL"][3:]) == ["K1", "K2", "arc knot"]
    assert list(tags["PAIR_ID"][3:]) == [1, 1, -1]


def test_fits_region_header_carries_the_cutout_wcs(tmp_path, curves, cutout_wcs):
    path = tmp_path / "regions.fits"
    write_regions(path, curves, wcs=cutout_wcs)
    header = fits.getheader(path, "REGION")
    assert header["LVORIGIN"] == 0 and header["HDUCLAS1"] == "REGION"
    copied = WCS(header).celestial
    probe = SkyCoord([150.0, 150.0008] * u.deg, [2.0, 1.9995] * u.deg)
    # astropy.wcs on both headers (reference library): same pixels for the same sky
    assert np.allclose(np.array(copied.world_to_pixel(probe)), np.array(cutout_wcs.world_to_pixel(probe)),
                       atol=1e-8, rtol=0)


# ---------------------------------------------------------------------------- vertex tables
@pytest.mark.parametrize("suffix", [".ecsv", ".vot"])
def test_vertex_table_round_trip_keeps_sky_positions_and_units(tmp_path, suffix, curves, candidates,
                                                               cutout_wcs):
    path = tmp_path / f"regions{suffix}"
    write_regions(path, curves, candidates, wcs=cutout_wcs)
    table = Table.read(path)  # plain astropy reader (reference library)
    assert table["ra"].unit == u.deg and table["dec"].unit == u.deg
    required = {"kind", "curve_id", "model", "z_source", "label", "pair_id", "vertex", "plane"}
    assert required <= set(table.colnames)
    for curve_id, curve in enumerate(curves):
        rows = table[table["curve_id"] == curve_id]
        assert list(rows["vertex"]) == list(range(len(curve.sky)))
        assert set(rows["kind"]) == {curve.kind} and set(rows["plane"]) == {curve.plane}
        assert set(rows["model"]) == {curve.model}
        back = SkyCoord(rows["ra"], rows["dec"])
        assert np.max(back.separation(curve.sky).to(u.arcsec)) < MICRO_ARCSEC
    caustic = table[table["curve_id"] == 2]
    assert list(np.flatnonzero(caustic["cusp"])) == [0, 16, 32, 48]
    points = table[table["kind"] == "candidate"]
    assert list(points["label"]) == ["K1", "K2", "arc knot"]
    back = SkyCoord(points["ra"], points["dec"])
    assert np.max(back.separation(SkyCoord(candidates["ra"], candidates["dec"])).to(u.arcsec)) < MICRO_ARCSEC


def test_vertex_table_pixels_match_the_cutout_wcs(curves, cutout_wcs):
    table = vertex_table(curves, wcs=cutout_wcs)
    x, y = cutout_wcs.world_to_pixel(curves[0].sky)  # astropy.wcs (reference library)
    rows = table[table["curve_id"] == 0]
    assert np.max(np.abs(rows["x"].value - x)) < 1e-9 and table["x"].unit == u.pix


@pytest.mark.parametrize("suffix", [".fits", ".ecsv", ".vot"])
def test_candidates_come_back_from_every_region_format(tmp_path, suffix, curves, candidates, cutout_wcs):
    path = tmp_path / f"regions{suffix}"
    write_regions(path, curves, candidates, wcs=cutout_wcs)
    back = read_candidates(path)
    assert list(back["label"]) == ["K1", "K2", "arc knot"]
    assert list(back["pair_id"]) == [1, 1, -1]
    separation = SkyCoord(back["ra"], back["dec"]).separation(SkyCoord(candidates["ra"], candidates["dec"]))
    assert np.max(separation.to(u.arcsec)) < MICRO_ARCSEC


def test_region_suffix_and_inputs_are_checked(tmp_path, curves, cutout_wcs):
    with pytest.raises(LensviewInputError, match="suffix"):
        write_regions(tmp_path / "regions.reg", curves, wcs=cutout_wcs)
    with pytest.raises(LensviewInputError, match="not a Curve"):
        write_regions(tmp_path / "regions.ecsv", [curves[0], "curve"], wcs=cutout_wcs)
    with pytest.raises(LensviewInputError, match="wcs"):
        write_regions(tmp_path / "regions.fits", curves, wcs=None)
    with pytest.raises(LensviewInputError, match="does not exist"):
        write_regions(tmp_path / "missing" / "regions.fits", curves, wcs=cutout_wcs)
    assert list(tmp_path.iterdir()) == []


def test_curves_only_region_file_has_no_candidates(tmp_path, curves, cutout_wcs):
    write_regions(tmp_path / "curves.fits", curves, wcs=cutout_wcs)
    write_regions(tmp_path / "curves.ecsv", curves, wcs=cutout_wcs)
    for name in ("curves.fits", "curves.ecsv"):
        with pytest.raises(LensviewInputError, match="candidate"):
            read_candidates(tmp_path / name)


# ---------------------------------------------------------------------------- user catalogues
def test_catalogue_with_decimal_columns_and_default_labels(tmp_path):
    path = tmp_path / "mine.csv"
    path.write_text("RA,DEC,mag\n150.001,2.0002,24.1\n149.9995,1.9999,25.3\n")
    table = read_candidates(path)
    assert list(table["label"]) == ["K1", "K2"]
    assert table["ra"].unit == u.deg
    assert np.allclose(table["ra"], [150.001, 149.9995], rtol=0, atol=1e-12)
    assert np.allclose(table["dec"], [2.0002, 1.9999], rtol=0, atol=1e-12)


def test_catalogue_with_sexagesimal_strings(tmp_path):
    path = tmp_path / "mine.csv"
    path.write_text("name,RAJ2000,DEJ2000\nknot a,10:00:00.12,+02:00:01.5\nknot b,09 59 59.95,-00 30 00\n")
    table = read_candidates(path)
    # astropy's sexagesimal parser (reference library), RA in hours
    expected = SkyCoord(["10:00:00.12 +02:00:01.5", "09:59:59.95 -00:30:00"], unit=(u.hourangle, u.deg))
    assert np.max(SkyCoord(table["ra"], table["dec"]).separation(expected).to(u.arcsec)) < MICRO_ARCSEC
    assert list(table["label"]) == ["knot a", "knot b"]


def test_catalogue_in_ecsv_with_other_units_and_votable(tmp_path):
    source = Table({"ALPHA_J2000": [10.0, 10.00002] * u.hourangle, "DELTA_J2000": [7200.0, 7201.0] * u.arcsec,
                    "id": [7, 9]})
    source.write(tmp_path / "mine.ecsv")
    table = read_candidates(tmp_path / "mine.ecsv")
    assert np.allclose(table["ra"], [150.0, 150.0003], rtol=0, atol=1e-10)  # 1 h = 15 deg (IAU)
    assert np.allclose(table["dec"], [2.0, 2.0 + 1 / 3600], rtol=0, atol=1e-12)
    assert list(table["label"]) == ["7", "9"]
    Table({"ra": [150.0], "dec": [2.0]}).write(tmp_path / "mine.vot", format="votable")
    assert list(read_candidates(tmp_path / "mine.vot")["label"]) == ["K1"]


def test_catalogue_with_pixel_columns_needs_a_wcs(tmp_path, cutout_wcs):
    path = tmp_path / "clicks.csv"
    path.write_text("x,y\n10.5,20.25\n100,50\n")
    with pytest.raises(LensviewInputError, match="WCS"):
        read_candidates(path)
    table = read_candidates(path, wcs=cutout_wcs)
    expected = cutout_wcs.pixel_to_world([10.5, 100], [20.25, 50])  # 0-based, astropy.wcs
    assert np.max(SkyCoord(table["ra"], table["dec"]).separation(expected).to(u.arcsec)) < MICRO_ARCSEC


@pytest.mark.parametrize("name, content, match", [
    ("empty.csv", "", "empty"),
    ("blank.csv", "\n\n", "empty"),
    ("header_only.csv", "ra,dec\n", "no rows"),
    ("columns.csv", "alpha,beta\n1,2\n", "no coordinate columns"),
    ("text.csv", "ra,dec\n150.0,2.0\nabc,2.1\n", "not a number or a sexagesimal angle in row"),
    ("hole.csv", "ra,dec\n150.0,2.0\n,2.1\n", "empty in row"),
    ("swapped.csv", "ra,dec\n2.0,150.0\n", "beyond"),
    ("ragged.csv", "ra,dec\n150.0,2.0,3,4\n1\n", "could not be read"),
    ("broken.vot", "<VOTABLE><RESOURCE><TABLE>", "could not be read as VOTable"),
    ("broken.ecsv", "# %ECSV 1.0\n# ---\n# datatype: [oops\nra dec\n", "could not be read as ECSV"),
    ("garbage.fits", "SIMPLE = nonsense", "not a readable FITS"),
    ("notes.txt", "ra,dec\n1,2\n", "suffix"),
])
def test_malformed_catalogues_give_clear_errors_and_change_nothing(tmp_path, name, content, match):
    path = tmp_path / name
    path.write_text(content)
    before = _digest(path)
    with pytest.raises(LensviewInputError, match=match):
        read_candidates(path)
    assert _digest(path) == before and sorted(p.name for p in tmp_path.iterdir()) == [name]


def test_missing_catalogue_file(tmp_path):
    with pytest.raises(LensviewInputError, match="no file"):
        read_candidates(tmp_path / "absent.csv")


# ---------------------------------------------------------------------------- measurement tables
@pytest.fixture
def measurement_table():
    table = Table({"candidate": [0, 1], "label": ["K1", "K2"], "model": ["model A", "model A"],
                   "ra": [150.001, 149.9995] * u.deg, "dec": [2.0002, 1.9999] * u.deg,
                   "offset_arcsec": [0.12, 0.31] * u.arcsec, "offset_pc": [712.5, 1841.0] * u.pc,
                   "mu": [-31.5, 12.25], "parity": [-1, 1]})
    table.meta.update(z_source=2.5, models=["model A"], z_lens={"model A": 0.35}, cosmology="Planck18")
    return table


def test_ecsv_keeps_units_and_metadata(tmp_path, measurement_table):
    path = tmp_path / "measure.ecsv"
    write_table(measurement_table, path)
    back = Table.read(path)  # plain astropy ECSV reader
    assert back["offset_pc"].unit == u.pc and back["ra"].unit == u.deg
    assert np.all(back["mu"] == measurement_table["mu"])
    assert back.meta["models"] == ["model A"] and back.meta["z_lens"] == {"model A": 0.35}
    assert back.meta["z_source"] == 2.5 and back.meta["lensview_version"] == lensview.__version__
    params = back.meta["cosmology_parameters"]
    # Planck18 as astropy defines it (reference library)
    assert back.meta["cosmology"] == "Planck18" and params["class"] == "FlatLambdaCDM"
    assert params["H0"] == Planck18.H0.value and params["Om0"] == Planck18.Om0
    assert params["Tcmb0"] == Planck18.Tcmb0.value
    # the caller's table is left as it was
    assert measurement_table.meta["cosmology"] == "Planck18"
    assert "lensview_version" not in measurement_table.meta


def test_votable_keeps_units_and_read_table_restores_metadata(tmp_path, measurement_table):
    path = tmp_path / "measure.vot"
    custom = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725)
    write_table(measurement_table, path, cosmology=custom)
    plain = Table.read(path)  # astropy's VOTable reader (reference library)
    assert plain["offset_arcsec"].unit == u.arcsec
    back = read_table(path)
    assert back.meta["models"] == ["model A"] and back.meta["z_lens"] == {"model A": 0.35}
    assert back.meta["cosmology_parameters"]["H0"] == 70.0
    assert back.meta["cosmology_parameters"]["Om0"] == 0.3
    assert list(back["label"]) == ["K1", "K2"] and np.all(back["parity"] == [-1, 1])


def test_csv_round_trip_and_format_choice(tmp_path, measurement_table):
    write_table(measurement_table, tmp_path / "measure.csv")
    back = read_table(tmp_path / "measure.csv")
    assert np.allclose(back["offset_pc"], measurement_table["offset_pc"].value, rtol=0, atol=0)
    write_table(measurement_table, tmp_path / "measure.txt", format="ecsv")
    assert read_table(tmp_path / "measure.txt", format="ecsv").meta["models"] == ["model A"]
    with pytest.raises(LensviewInputError, match="suffix"):
        write_table(measurement_table, tmp_path / "measure.dat")
    with pytest.raises(LensviewInputError, match="Unknown table format"):
        write_table(measurement_table, tmp_path / "measure.ecsv", format="hdf5")


# ---------------------------------------------------------------------------- sessions
@pytest.fixture
def inputs(tmp_path):
    files = {"cutout.fits": b"cutout bytes", "a_x.fits": b"model a x", "a_y.fits": b"model a y",
             "b.fits": b"model b cube"}
    for name, content in files.items():
        (tmp_path / name).write_bytes(content)
    return files


@pytest.fixture
def session(inputs, candidates):
    return {
        "z_lens": 0.35, "z_source": 2.5,
        "cutout": InputFile.from_content("cutout.fits", inputs["cutout.fits"]),
        "models": [ModelInputs("model A", (InputFile.from_content("a_x.fits", inputs["a_x.fits"]),
                                           InputFile.from_content("a_y.fits", inputs["a_y.fits"]))),
                   ModelInputs("model B", (InputFile.from_content("b.fits", inputs["b.fits"]),),
                               units="pixel", z_norm=9.0)],
        "cosmology": FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725),
        "display": {"stretch": "sqrt", "limits": [-0.01, 0.5], "colormap": "magma"},
        "candidates": candidates,
    }


def test_session_restores_an_identical_candidate_table(tmp_path, session, candidates):
    from lensview.io import as_candidate_table

    path = tmp_path / "session.json"
    text = save_session(path, session)
    assert path.read_text() == text
    document = json.loads(text)  # plain JSON, never pickle
    assert document["format"] == "lensview-session" and document["version"] == 1
    restored = load_session(path)
    table, original = restored.candidate_table(), as_candidate_table(candidates)
    assert table.colnames == original.colnames
    for name in table.colnames:
        assert table[name].dtype == original[name].dtype and table[name].unit == original[name].unit
        assert np.array_equal(np.asarray(table[name]), np.asarray(original[name]))
    assert restored.z_lens == 0.35 and restored.z_source == 2.5
    assert restored.cosmology_object() == FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.725)
    assert restored.display == {"stretch": "sqrt", "limits": [-0.01, 0.5], "colormap": "magma"}
    assert restored.models[1] == ModelInputs("model B", (InputFile("b.fits", hashlib.sha256(b"model b cube")
                                                                   .hexdigest()),), "pixel", 9.0)
    assert load_session(text) == restored and load_session(save_session(None, restored)) == restored


def test_session_defaults_and_named_cosmology(candidates):
    restored = load_session(save_session(None, {"z_lens": 0.3, "z_source": 1.2, "cosmology": Planck18,
                                                "candidates": SkyCoord([150.0] * u.deg, [2.0] * u.deg)}))
    assert restored.cosmology == {"name": "Planck18"} and restored.cosmology_object() is Planck18
    assert restored.display == {"stretch": "asinh", "limits": "zscale", "colormap": "gray_r"}
    assert restored.candidates == (Candidate("K1", 150.0, 2.0, -1),) and restored.cutout is None


def test_session_file_checks_name_missing_and_different_files(tmp_path, session, inputs):
    restored = load_session(save_session(None, session))
    statuses = check_session_files(restored, {name: tmp_path / name for name in inputs})
    assert all(s.ok for s in statuses) and len(statuses) == 4
    supplied = {"cutout.fits": inputs["cutout.fits"], "a_x.fits": b"model a x, edited",
                "/elsewhere/a_y.fits": inputs["a_y.fits"]}
    statuses = {s.name: s for s in check_session_files(restored, supplied)}
    assert statuses["cutout.fits"].ok and statuses["a_y.fits"].ok
    assert statuses["a_x.fits"].status == "differs" and "model 'model A' file 1" in str(statuses["a_x.fits"])
    assert statuses["b.fits"].status == "missing" and isinstance(statuses["b.fits"], FileStatus)
    with pytest.raises(LensviewInputError, match=r"'a_x.fits' differs.*'b.fits' is missing"):
        load_session(save_session(None, session), available_files=supplied)
    full = dict(supplied, **{"a_x.fits": inputs["a_x.fits"], "b.fits": tmp_path / "b.fits"})
    assert load_session(save_session(None, session), available_files=full) == restored


def _mutate(text, change):
    document = json.loads(text)
    change(document)
    return json.dumps(document)


@pytest.mark.parametrize("change, match", [
    (lambda d: d.update(version=2), "newer than this lensview reads"),
    (lambda d: d.update(version="1"), "version"),
    (lambda d: d.update(format="something else"), "not a lensview session"),
    (lambda d: d.pop("z_source"), "lacks the key"),
    (lambda d: d.update(extra=1), "unknown key"),
    (lambda d: d.update(z_lens="0.35"), "'z_lens' must be a number"),
    (lambda d: d.update(z_source=0.2), "must exceed z_lens"),
    (lambda d: d["candidates"][1].update(ra="10h00m"), r"candidates\[1\]'.ra \(degrees\) must be a number"),
    (lambda d: d["candidates"][0].update(dec=None), "must be a number, got null"),
    (lambda d: d["candidates"][0].update(dec=95.0), "within"),
    (lambda d: d["candidates"][0].pop("label"), "lacks the key"),
    (lambda d: d["inputs"]["models"][0]["files"][0].update(sha256="xyz"), "SHA-256"),
    (lambda d: d["inputs"]["models"][0].update(units="degrees"), "must be one of arcsec, pixel"),
    (lambda d: d["display"].update(stretch="cubic"), "display.stretch"),
    (lambda d: d["display"].update(limits=[1, 0]), "high > low"),
    (lambda d: d.update(cosmology={"name": "MyUniverse"}), "cosmology.name"),
    (lambda d: d.update(candidates={"K1": [1, 2]}), "must be a JSON array"),
])
def test_malformed_sessions_give_clear_errors_and_change_nothing(tmp_path, session, change, match):
    good = save_session(None, session)
    previous = load_session(good)
    path = tmp_path / "broken.json"
    path.write_text(_mutate(good, change))
    before = _digest(path)
    with pytest.raises(LensviewInputError, match=match):
        load_session(path)
    assert _digest(path) == before and previous == load_session(good)


@pytest.mark.parametrize("text, match", [
    ("{\"format\": \"lensview-session\", ", "not valid JSON"),
    ("[1, 2]", "must be a JSON object"),
    ("no such session", "no session file"),
])
def test_bad_json_is_refused(text, match):
    with pytest.raises(LensviewInputError, match=match):
        load_session(text)


def test_session_saving_refuses_unsavable_values(tmp_path, session):
    from astropy.cosmology import LambdaCDM

    with pytest.raises(LensviewInputError, match="realisation"):
        save_session(tmp_path / "s.json", dict(session, cosmology=LambdaCDM(H0=70, Om0=0.3, Ode0=0.6)))
    with pytest.raises(LensviewInputError, match="z_source"):
        save_session(tmp_path / "s.json", {"z_lens": 0.3})
    assert not (tmp_path / "s.json").exists()
    assert isinstance(load_session(save_session(None, session)), Session)


def test_session_records_what_each_model_file_holds(tmp_path, session):
    session["models"][1] = ModelInputs("model B", session["models"][1].files, kind="convergence")
    document = json.loads(save_session(None, session))
    assert [m["kind"] for m in document["inputs"]["models"]] == ["deflection", "convergence"]
    assert load_session(json.dumps(document)).models[1].kind == "convergence"
    # A session written before the kind was recorded reads as deflection pairs.
    for model in document["inputs"]["models"]:
        del model["kind"]
    assert {m.kind for m in load_session(json.dumps(document)).models} == {"deflection"}
    document["inputs"]["models"][0]["kind"] = "magnification"
    with pytest.raises(LensviewInputError, match="kind"):
        load_session(json.dumps(document))
