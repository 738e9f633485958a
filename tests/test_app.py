"""The web page: the picture-to-sky mapping, the knot state, and the page run by AppTest."""

import math
from pathlib import Path

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs import WCS

from lensview.io.fits import Cutout
from lensview.page import state as page_state
from lensview.page.picture import render_base_layer
from lensview.page.viewport import Viewport, click_display_position


def small_wcs(shape=(120, 160), scale_arcsec=0.05, rotation_deg=17.0):
    """A rotated TAN WCS with East to the left (common practice for sky images)."""
    ny, nx = shape
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [210.25, -12.5]
    wcs.wcs.crpix = [nx / 2 + 3.3, ny / 2 - 7.1]
    th = math.radians(rotation_deg)
    s = scale_arcsec / 3600.0
    wcs.wcs.cd = s * np.array([[-math.cos(th), math.sin(th)], [math.sin(th), math.cos(th)]])
    wcs.wcs.set()
    return wcs


def small_cutout(shape=(120, 160), knot=None):
    ny, nx = shape
    data = np.random.default_rng(3).normal(0.0, 0.01, shape)
    if knot is not None:
        yy, xx = np.mgrid[:ny, :nx]
        data += np.exp(-((xx - knot[0]) ** 2 + (yy - knot[1]) ** 2) / (2 * 1.6**2))
    return Cutout(data=data, wcs=small_wcs(shape), header=fits.Header(), path=None,
                  hdu_index=0, zero_point=None)


VIEWPORTS = [
    Viewport.around((80, 60), 1, (120, 160), 640),
    Viewport.around((80, 60), 3, (120, 160), 500),
    Viewport.around((10, 110), 7.3, (120, 160), 451),   # clamped to a corner, odd scale
    Viewport.around((150, 5), 16, (120, 160), 720),
]


# ---------------------------------------------------------------------------- viewport
@pytest.mark.parametrize("viewport", VIEWPORTS)
def test_viewport_round_trip_and_pixel_edges(viewport):
    rng = np.random.default_rng(0)
    x = rng.uniform(viewport.x0 - 0.5, viewport.x0 + viewport.nx - 0.5, 50)
    y = rng.uniform(viewport.y0 - 0.5, viewport.y0 + viewport.ny - 0.5, 50)
    u_, v_ = viewport.cutout_to_display(x, y)
    back_x, back_y = viewport.display_to_cutout(u_, v_)
    np.testing.assert_allclose(back_x, x, rtol=0, atol=1e-9)
    np.testing.assert_allclose(back_y, y, rtol=0, atol=1e-9)
    # The picture's corners are the outer pixel edges, North up (row y0 at the bottom).
    assert viewport.display_to_cutout(0, 0) == pytest.approx(
        (viewport.x0 - 0.5, viewport.y0 + viewport.ny - 0.5))
    assert viewport.display_to_cutout(viewport.width, viewport.height) == pytest.approx(
        (viewport.x0 + viewport.nx - 0.5, viewport.y0 - 0.5))
    assert 0 <= viewport.x0 and viewport.x0 + viewport.nx <= 160
    assert 0 <= viewport.y0 and viewport.y0 + viewport.ny <= 120


@pytest.mark.parametrize("viewport", VIEWPORTS)
def test_rendered_picture_obeys_the_mapping(viewport):
    """A single bright cutout pixel lights exactly the display pixels that map into it."""
    data = np.zeros((120, 160))
    xk = viewport.x0 + viewport.nx // 3
    yk = viewport.y0 + (2 * viewport.ny) // 3
    data[yk, xk] = 1.0
    picture = render_base_layer(data, viewport, stretch="linear", limits="minmax", cmap="gray",
                                legend=False)
    assert picture.shape == (viewport.height, viewport.width, 3)
    lit_v, lit_u = np.nonzero(picture[:, :, 0] > 127)
    assert len(lit_u) > 0
    x, y = viewport.display_to_cutout(lit_u + 0.5, lit_v + 0.5)
    assert np.all(np.abs(x - xk) <= 0.5) and np.all(np.abs(y - yk) <= 0.5)
    # ... and every display pixel whose centre maps strictly inside it is lit (a centre
    # exactly on a pixel edge may go either way).
    lit = set(zip(lit_u.tolist(), lit_v.tolist()))
    centres_u = np.arange(viewport.width) + 0.5
    centres_v = np.arange(viewport.height) + 0.5
    cx, _ = viewport.display_to_cutout(centres_u, np.zeros_like(centres_u))
    _, cy = viewport.display_to_cutout(np.zeros_like(centres_v), centres_v)
    inside_u = np.nonzero(np.abs(cx - xk) < 0.5 - 1e-9)[0]
    inside_v = np.nonzero(np.abs(cy - yk) < 0.5 - 1e-9)[0]
    assert {(int(a), int(b)) for a in inside_u for b in inside_v} <= lit


def test_pan_stops_at_the_edges():
    left = Viewport.around((-500, 60), 4, (120, 160), 400)
    right = Viewport.around((10_000, 60), 4, (120, 160), 400)
    assert left.x0 == 0
    assert right.x0 + right.nx == 160
    whole = Viewport.around((3, 3), 1, (120, 160), 400)
    assert (whole.x0, whole.y0, whole.nx, whole.ny) == (0, 0, 160, 120)
    assert whole.height == 300


def test_click_position_follows_the_rendered_size():
    viewport = Viewport.around((80, 60), 1, (120, 160), 640)
    assert click_display_position({"x": 100, "y": 50, "width": 640, "height": 480},
                                  viewport) == (100.0, 50.0)
    # A picture shown at half its size: each CSS pixel covers two picture pixels.
    assert click_display_position({"x": 50, "y": 25, "width": 320, "height": 240},
                                  viewport) == (100.0, 50.0)
    assert click_display_position({"x": 50, "y": 25}, viewport) == (50.0, 25.0)


# ---------------------------------------------------------------------------- knot state
def test_click_marks_the_sky_position_of_the_cutout_pixel():
    cutout = small_cutout()
    state = {}
    page_state.init_state(state)
    for viewport in VIEWPORTS:
        x, y = viewport.x0 + 0.37 * viewport.nx, viewport.y0 + 0.61 * viewport.ny
        u_, v_ = viewport.cutout_to_display(x, y)
        mark = page_state.add_candidate_from_display_click(state, u_, v_, cutout=cutout,
                                                           viewport=viewport)
        # Reference: astropy's FITS WCS (Greisen & Calabretta 2002) for the same pixel.
        expected = cutout.wcs.pixel_to_world(x, y)
        got = SkyCoord(mark["ra"] * u.deg, mark["dec"] * u.deg)
        assert got.separation(expected).to_value(u.arcsec) < 1e-6
    assert page_state.candidate_labels(state) == ["K1", "K2", "K3", "K4"]


def test_click_outside_the_picture_marks_nothing():
    state = {}
    viewport = VIEWPORTS[1]
    assert page_state.add_candidate_from_display_click(
        state, viewport.width + 3, 10, cutout=small_cutout(), viewport=viewport) is None
    assert page_state.candidates(state) == []
    assert "outside" in state[page_state.CLICK_NOTE]


def test_snap_moves_a_click_to_the_knot_centroid():
    knot = (61.3, 47.8)
    cutout = small_cutout(knot=knot)
    viewport = VIEWPORTS[0]
    state = {}
    u_, v_ = viewport.cutout_to_display(knot[0] + 1.4, knot[1] - 1.1)
    mark = page_state.add_candidate_from_display_click(state, u_, v_, cutout=cutout,
                                                       viewport=viewport,
                                                       snap_radius=0.2 * u.arcsec)
    assert mark["snapped"]
    x, y = cutout.wcs.world_to_pixel(SkyCoord(mark["ra"] * u.deg, mark["dec"] * u.deg))
    # A noiseless-enough Gaussian's centroid is its centre (photutils centroid_2dg).
    assert math.hypot(x - knot[0], y - knot[1]) < 0.1


def test_handle_click_acts_once_and_only_on_the_current_scene():
    cutout = small_cutout()
    viewport = VIEWPORTS[0]
    state = {page_state.VIEWPORT: viewport, page_state.VIEWPORT_SCENE: "scene A"}
    click = {"x": 200, "y": 100, "width": viewport.width, "height": viewport.height,
             "unix_time": 17}
    assert page_state.handle_click(state, click, cutout=cutout, scene_key="scene A") is not None
    assert page_state.handle_click(state, click, cutout=cutout, scene_key="scene A") is None
    late = dict(click, unix_time=18)
    assert page_state.handle_click(state, late, cutout=cutout, scene_key="scene B") is None
    assert len(page_state.candidates(state)) == 1


def test_labels_relabel_and_remove():
    state = {}
    coord = SkyCoord(10 * u.deg, 20 * u.deg)
    page_state.add_candidate(state, coord, "arc knot")
    page_state.add_candidate(state, coord, "arc knot")     # taken: gets the next free label
    page_state.add_candidate(state, coord)
    assert page_state.candidate_labels(state) == ["arc knot", "K1", "K2"]
    with pytest.raises(ValueError, match="used twice"):
        page_state.relabel_candidates(state, ["a", "a", "b"])
    with pytest.raises(ValueError, match="empty"):
        page_state.relabel_candidates(state, ["a", " ", "b"])
    assert page_state.candidate_labels(state) == ["arc knot", "K1", "K2"]
    page_state.relabel_candidates(state, ["1a", "1b", "2a"])
    page_state.remove_candidates(state, [1])
    assert page_state.candidate_labels(state) == ["1a", "2a"]


# ---------------------------------------------------------------------------- the page (AppTest)
APP = str(Path(__file__).resolve().parents[1] / "app.py")


def run_page(app=None):
    from streamlit.testing.v1 import AppTest

    app = app or AppTest.from_file(APP, default_timeout=240)
    app.run()
    assert not app.exception, app.exception[0].message if app.exception else ""
    return app


def click_on(app, coord, stamp):
    """Hand the page a click on a sky position, as the click component reports it."""
    viewport = app.session_state[page_state.VIEWPORT]
    x, y = app.session_state["lv_scene"].cutout.wcs.world_to_pixel(coord)
    u_display, v_display = viewport.cutout_to_display(float(x), float(y))
    click = {"x": round(u_display), "y": round(v_display), "width": viewport.width,
             "height": viewport.height, "unix_time": stamp}
    app.session_state["lv_click"] = click
    run_page(app)
    # Where that click lands on the sky, through the page's one mapping (tested above).
    return app.session_state["lv_scene"].cutout.wcs.pixel_to_world(
        *viewport.display_to_cutout(*click_display_position(click, viewport)))


def download_buttons(app):
    """The page's download buttons (through ``get``, which every supported AppTest has)."""
    return app.get("download_button")


def shown_table(app, index=0):
    return app.table[index].value


def expected_offsets(coords, scene, z_source):
    """The library's measurement, the page's only source of numbers."""
    import lensview as lv

    return lv.measure_candidates(coords, scene.fields, z_source, cosmology=scene.cosmology)


def demo_knot(scene, k=0):
    return SkyCoord(scene.knots["ra"][k], scene.knots["dec"][k], unit=u.deg)


def test_page_opens_on_the_demo_with_its_models_and_curves():
    app = run_page()
    scene = app.session_state["lv_scene"]
    assert scene.key.startswith("demo")
    assert not app.error
    assert app.slider(key="lv_z_source").value == pytest.approx(scene.z_source)
    assert len(scene.fields) >= 2
    # Curves exist at the demo's source redshift and the picture was drawn.
    assert all(len(f.critical_curves(scene.z_source)) for f in scene.fields)
    viewport = app.session_state[page_state.VIEWPORT]
    assert (viewport.nx, viewport.ny) == scene.cutout.data.shape[::-1]
    assert any("model estimates" in w.value for w in app.warning)
    assert [d.proto.label for d in download_buttons(app)][:1] == ["Download regions"]


def test_click_adds_a_knot_measured_by_the_library():
    app = run_page()
    scene = app.session_state["lv_scene"]
    clicked = click_on(app, demo_knot(scene, 0), stamp=1)
    marks = app.session_state[page_state.CANDIDATES]
    assert len(marks) == 1 and marks[0]["label"] == "K1"
    got = SkyCoord(marks[0]["ra"], marks[0]["dec"], unit=u.deg)
    assert got.separation(clicked).to_value(u.arcsec) < 1e-6
    # The click lands within one display pixel of the knot it aimed at.
    pixel = scene.cutout.wcs.proj_plane_pixel_scales()[0].to_value(u.arcsec)
    assert got.separation(demo_knot(scene, 0)).to_value(u.arcsec) < pixel
    table = shown_table(app)
    expected = expected_offsets(got, scene, scene.z_source)
    assert list(table["model"]) == list(expected["model"])
    np.testing.assert_allclose(table["offset (arcsec)"].astype(float),
                               np.asarray(expected["offset_arcsec"]), atol=6e-5)
    np.testing.assert_allclose(table["\u03bc (signed)"].astype(float),
                               np.asarray(expected["mu"]), rtol=1e-2, atol=6e-3)
    # The spread table has one row per knot.
    assert len(shown_table(app, 1)) == 1
    # A second rerun with the same component value marks nothing new.
    run_page(app)
    assert len(app.session_state[page_state.CANDIDATES]) == 1


def test_redshift_change_updates_the_measurements_at_once():
    app = run_page()
    scene = app.session_state["lv_scene"]
    first = click_on(app, demo_knot(scene, 1), stamp=1)
    second = click_on(app, demo_knot(scene, 2), stamp=2)
    before = shown_table(app)["offset (arcsec)"].astype(float)
    z_new = round(scene.z_source + 1.1, 2)
    app.slider(key="lv_z_source").set_value(z_new)
    run_page(app)
    after = shown_table(app)
    expected = expected_offsets(SkyCoord([first, second]), scene, z_new)
    np.testing.assert_allclose(after["offset (arcsec)"].astype(float),
                               np.asarray(expected["offset_arcsec"]), atol=6e-5)
    assert np.any(np.abs(after["offset (arcsec)"].astype(float) - before) > 1e-3)


def test_source_redshift_at_the_lens_is_an_error_and_keeps_the_knots():
    app = run_page()
    scene = app.session_state["lv_scene"]
    click_on(app, demo_knot(scene, 0), stamp=1)
    app.slider(key="lv_z_source").set_value(round(scene.z_lens - 0.05, 2))
    run_page(app)
    assert any("at or below the lens" in e.value for e in app.error)
    assert len(app.session_state[page_state.CANDIDATES]) == 1


def test_downloads_are_produced_and_read_back():
    import json

    from astropy.table import Table
    from regions import PointPixelRegion, Regions

    from lensview.io import load_session
    from lensview.page.takeaway import DOWNLOADS

    app = run_page()
    scene = app.session_state["lv_scene"]
    for k in range(3):
        click_on(app, demo_knot(scene, k), stamp=k + 1)
    producers = app.session_state[DOWNLOADS]
    files = {name: produce() for name, produce in producers.items()}
    by_suffix = {Path(name).suffix: content for name, content in files.items()}
    # FITS region table read back with the regions library (its own reader).
    import io as _io
    import tempfile

    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "regions.fits"
        path.write_bytes(by_suffix[".fits"])
        regions = Regions.read(path, format="fits")
    points = [r for r in regions if isinstance(r, PointPixelRegion)]
    assert len(points) == 3
    marks = app.session_state[page_state.CANDIDATES]
    x, y = scene.cutout.wcs.world_to_pixel(SkyCoord([m["ra"] for m in marks],
                                                    [m["dec"] for m in marks], unit=u.deg))
    np.testing.assert_allclose(sorted(p.center.x for p in points), sorted(x), atol=1e-6)
    table = Table.read(by_suffix[".ecsv"].decode(), format="ascii.ecsv")
    assert len(table) == 3 * len(scene.fields)
    assert table["offset_arcsec"].unit == u.arcsec
    assert by_suffix[".png"][:8] == b"\x89PNG\r\n\x1a\n" and len(by_suffix[".png"]) > 20_000
    session = load_session(by_suffix[".json"], available_files=scene.files)
    assert [c.label for c in session.candidates] == ["K1", "K2", "K3"]
    assert json.loads(by_suffix[".json"])["z_source"] == pytest.approx(scene.z_source)


def test_session_and_catalogue_come_back():
    from lensview.page.takeaway import DOWNLOADS

    app = run_page()
    scene = app.session_state["lv_scene"]
    for k in range(2):
        click_on(app, demo_knot(scene, k), stamp=k + 1)
    app.selectbox(key="lv_stretch").set_value("sqrt")
    app.selectbox(key="lv_limits").set_value("min to max")
    app.selectbox(key="lv_cmap").set_value("magma")
    app.slider(key="lv_z_source").set_value(3.3)
    run_page(app)
    saved = app.session_state[page_state.CANDIDATES]
    session = next(p for name, p in app.session_state[DOWNLOADS].items()
                   if name.endswith(".json"))()
    app.button(key="lv_clear_knots").click()
    app.selectbox(key="lv_stretch").set_value("linear")
    app.selectbox(key="lv_limits").set_value("zscale")
    app.selectbox(key="lv_cmap").set_value("gray")
    app.slider(key="lv_z_source").set_value(2.0)
    run_page(app)
    assert app.session_state[page_state.CANDIDATES] == []
    app.file_uploader(key="lv_up_session").set_value(("mine.json", session, "application/json"))
    run_page(app)
    app.button(key="lv_restore").click()
    run_page(app)
    restored = app.session_state[page_state.CANDIDATES]
    assert [m["label"] for m in restored] == [m["label"] for m in saved]
    np.testing.assert_allclose([m["ra"] for m in restored], [m["ra"] for m in saved], atol=1e-12)
    assert (app.selectbox(key="lv_stretch").value, app.selectbox(key="lv_limits").value,
            app.selectbox(key="lv_cmap").value) == ("sqrt", "min to max", "magma")
    assert app.slider(key="lv_z_source").value == pytest.approx(3.3)
    # A session saved with another cutout says which file differs and changes nothing.
    import json

    document = json.loads(session)
    document["inputs"]["cutout"]["sha256"] = "0" * 64
    app.file_uploader(key="lv_up_session").set_value(
        ("other.json", json.dumps(document).encode(), "application/json"))
    run_page(app)
    app.button(key="lv_restore").click()
    run_page(app)
    assert any("differs" in e.value for e in app.error)
    assert len(app.session_state[page_state.CANDIDATES]) == 2
    # A catalogue of the user's own, with RA/Dec columns, replaces the knots.
    catalogue = b"RAJ2000,DEJ2000,name\n" + "\n".join(
        f"{m['ra']:.8f},{m['dec']:.8f},cat{k}" for k, m in enumerate(saved)).encode() + b"\n"
    app.file_uploader(key="lv_up_catalogue").set_value(("mine.csv", catalogue, "text/csv"))
    run_page(app)
    app.button(key="lv_cat_replace").click()
    run_page(app)
    assert [m["label"] for m in app.session_state[page_state.CANDIDATES]] == ["cat0", "cat1"]


def uploader(app, slot):
    """The current uploader of a slot ("cutout", "model_0"); its key changes after each upload."""
    return next(w for w in app.file_uploader if w.key.startswith(f"lv_up_{slot}_"))


def fits_bytes(data, wcs=None, extra=()):
    import io as _io

    hdus = [fits.PrimaryHDU(data, header=wcs.to_header() if wcs is not None else None)]
    hdus += [fits.ImageHDU(d, header=w.to_header() if w is not None else None) for d, w in extra]
    buffer = _io.BytesIO()
    fits.HDUList(hdus).writeto(buffer)
    return buffer.getvalue()


def test_bad_uploads_show_the_reason_and_keep_the_knots():
    app = run_page()
    scene = app.session_state["lv_scene"]
    click_on(app, demo_knot(scene, 0), stamp=1)
    app.radio(key="lv_source").set_value("My files")
    run_page(app)
    uploader(app, "cutout").set_value(
        ("notes.fits", b"this is not a FITS file at all", "application/fits"))
    run_page(app)
    assert any("not a readable FITS file" in e.value for e in app.error)
    assert len(app.session_state[page_state.CANDIDATES]) == 1
    # The page keeps showing the last field that loaded.
    assert app.session_state["lv_scene"].key == scene.key

    image = np.ones((40, 40), np.float32)
    uploader(app, "cutout").set_value(("plain.fits", fits_bytes(image), "application/fits"))
    run_page(app)
    assert any("WCS" in e.value for e in app.error)

    # A valid cutout with a model whose two maps differ in shape.
    wcs = small_wcs((40, 40))
    uploader(app, "cutout").set_value(("cutout.fits", fits_bytes(image, wcs), "application/fits"))
    run_page(app)
    uploader(app, "model_0").set_value([
        ("m_x.fits", fits_bytes(np.zeros((40, 40), np.float32), wcs), "application/fits"),
        ("m_y.fits", fits_bytes(np.zeros((30, 40), np.float32), small_wcs((30, 40))),
         "application/fits")])
    run_page(app)
    assert any("pixels but the y map" in e.value for e in app.error)

    # A model that lies elsewhere on the sky.
    far = small_wcs((40, 40))
    far.wcs.crval = [30.0, 40.0]
    far.wcs.set()
    alpha = np.full((40, 40), 0.5, np.float32)
    app.button(key="lv_drop_model_0").click()
    run_page(app)
    uploader(app, "model_0").set_value(
        [("far.fits", fits_bytes(alpha, far, extra=[(alpha, far)]), "application/fits")])
    run_page(app)
    # These maps carry no BUNIT: the page asks for the units instead of guessing.
    assert any("BUNIT" in e.value for e in app.error)
    app.selectbox(key="lv_units_0").set_value("arcsec")
    run_page(app)
    assert any("does not cover any part of the cutout" in e.value for e in app.error)
    assert len(app.session_state[page_state.CANDIDATES]) == 1


def test_cosmology_and_lens_redshift_reach_every_model():
    from astropy.cosmology import FlatLambdaCDM

    from lensview.page.inputs import FLAT

    app = run_page()
    scene = app.session_state["lv_scene"]
    clicked = click_on(app, demo_knot(scene, 3), stamp=1)
    planck_pc = shown_table(app)["offset (pc)"].astype(float)
    app.radio(key="lv_cosmology").set_value(FLAT)
    run_page(app)
    app.number_input(key="lv_h0").set_value(60.0)
    app.number_input(key="lv_om0").set_value(0.4)
    app.number_input(key="lv_z_lens_demo").set_value(0.5)
    run_page(app)
    flat = app.session_state["lv_scene"]
    cosmology = FlatLambdaCDM(H0=60.0, Om0=0.4, Tcmb0=0.0)
    assert all(f.cosmology == cosmology and f.z_lens == 0.5 for f in flat.fields)
    table = shown_table(app)
    # The same maps rebuilt by the library with that cosmology and lens redshift.
    import lensview as lv
    from lensview.demo import load_demo

    _, originals, _ = load_demo()
    rebuilt = [lv.DeflectionField(*f.node_deflection(slice(None), slice(None)), f.wcs,
                                  units="pixel", z_lens=0.5, z_norm=f.z_norm,
                                  cosmology=cosmology, name=f.name) for f in originals]
    expected = lv.measure_candidates(clicked, rebuilt, scene.z_source, cosmology=cosmology)
    np.testing.assert_allclose(table["offset (pc)"].astype(float),
                               np.asarray(expected["offset_pc"]), rtol=1e-3, atol=0.06)
    assert np.all(np.abs(table["offset (pc)"].astype(float) - planck_pc) > 0.05)


def test_zoomed_and_panned_view_maps_clicks_exactly_and_draws_contours():
    app = run_page()
    scene = app.session_state["lv_scene"]
    knot = demo_knot(scene, 5)
    x, y = scene.cutout.wcs.world_to_pixel(knot)
    app.select_slider(key="lv_zoom").set_value(4)
    app.number_input(key="lv_cx").set_value(float(x) + 20)
    app.number_input(key="lv_cy").set_value(float(y) - 10)
    app.checkbox(key="lv_show_contours").check()
    run_page(app)
    app.button(key="lv_pan_\u2192").click()
    run_page(app)
    viewport = app.session_state[page_state.VIEWPORT]
    ny, nx = scene.cutout.data.shape
    assert (viewport.nx, viewport.ny) == (math.ceil(nx / 4), math.ceil(ny / 4))
    assert viewport.x0 > 0 and viewport.y0 > 0
    clicked = click_on(app, knot, stamp=1)
    # Rounding the click to a whole display pixel moves it by at most half a display pixel
    # along each axis.
    arcsec_per_display_pixel = (scene.cutout.wcs.proj_plane_pixel_scales()[0].to_value(u.arcsec)
                                * viewport.nx / viewport.width)
    assert clicked.separation(knot).to_value(u.arcsec) <= (
        math.hypot(0.5, 0.5) * arcsec_per_display_pixel * (1 + 1e-6))
    expected = expected_offsets(clicked, scene, scene.z_source)
    np.testing.assert_allclose(shown_table(app)["offset (arcsec)"].astype(float),
                               np.asarray(expected["offset_arcsec"]), atol=6e-5)


def test_uploaded_cutout_and_models_are_used():
    from lensview.demo import DEMO_DIRECTORY

    app = run_page()
    demo = app.session_state["lv_scene"]
    app.radio(key="lv_source").set_value("My files")
    run_page(app)
    app.number_input(key="lv_z_lens_files").set_value(demo.z_lens)
    run_page(app)
    folder = Path(DEMO_DIRECTORY)
    uploader(app, "cutout").set_value(
        (demo.cutout_file.name, (folder / demo.cutout_file.name).read_bytes(), "application/fits"))
    run_page(app)
    app.number_input(key="lv_n_models").set_value(2)
    run_page(app)
    for k, model in enumerate(demo.model_inputs[:2]):
        uploader(app, f"model_{k}").set_value(
            [(f.name, (folder / f.name).read_bytes(), "application/fits") for f in model.files])
        run_page(app)
        if model.z_norm is not None:
            app.radio(key=f"lv_norm_{k}").set_value("made for a source redshift")
            run_page(app)
            app.number_input(key=f"lv_znorm_{k}").set_value(model.z_norm)
            run_page(app)
    assert not app.error, [e.value for e in app.error]
    scene = app.session_state["lv_scene"]
    assert scene.key.startswith("files") and len(scene.fields) == 2
    assert [f.z_norm for f in scene.fields] == [m.z_norm for m in demo.model_inputs[:2]]
    clicked = click_on(app, demo_knot(demo, 2), stamp=1)
    import lensview as lv

    # The same models as the demo loads them, through the library.
    expected = lv.measure_candidates(clicked, demo.fields[:2], demo.z_source,
                                     cosmology=demo.cosmology)
    np.testing.assert_allclose(shown_table(app)["offset (arcsec)"].astype(float),
                               np.asarray(expected["offset_arcsec"]), atol=6e-5)


def table_with(app, title):
    return next(t.value for t in app.table if title in t.value.columns)


def test_counter_image_table_shows_the_library_delays():
    import lensview as lv

    app = run_page()
    scene = app.session_state["lv_scene"]
    clicked = click_on(app, demo_knot(scene, 0), stamp=1)
    shown = table_with(app, "delay after the first image (days)")
    expected = [lv.predict_counterimages(clicked, f, scene.z_source) for f in scene.fields]
    delays = np.concatenate([np.asarray(t["time_delay_days"]) for t in expected])
    np.testing.assert_allclose(shown["delay after the first image (days)"].astype(float),
                               delays, atol=6e-3)
    orders = np.concatenate([np.asarray(t["arrival_order"]) for t in expected])
    assert list(shown["arrives"].astype(int)) == list(orders)
    assert any("scale as 1/H0" in c.value for c in app.caption)


def test_convergence_upload_and_magnification_overlay():
    app = run_page()
    app.radio(key="lv_source").set_value("My files")
    run_page(app)
    n = 120
    wcs = small_wcs((n, n), scale_arcsec=0.06, rotation_deg=0.0)
    y, x = np.mgrid[0:n, 0:n].astype(float)
    kappa = (1.5 * np.exp(-((x - 60.2) ** 2 + (y - 59.7) ** 2) / (2 * 12.0**2))).astype(np.float32)
    uploader(app, "cutout").set_value(("cutout.fits", fits_bytes(kappa, wcs), "application/fits"))
    run_page(app)
    uploader(app, "model_0").set_value([("kappa.fits", fits_bytes(kappa, wcs), "application/fits")])
    run_page(app)
    # Without LENSMAP the single map is refused as a deflection pair ...
    assert any("single 2-D map" in e.value for e in app.error)
    # ... and read as a convergence once the user says so, with the missing-mass caution.
    app.selectbox(key="lv_kind_0").set_value("convergence (\u03ba)")
    run_page(app)
    assert not app.error, [e.value for e in app.error]
    scene = app.session_state["lv_scene"]
    assert scene.key.startswith("files") and scene.notes
    assert any("mass outside the map is missing" in w.value for w in app.warning)
    curves = scene.fields[0].critical_curves(float(app.slider(key="lv_z_source").value))
    assert any(c.kind == "tangential" for c in curves)
    # A magnification map as an overlay: drawn, with the reason it is only drawn.
    mu = np.abs(scene.fields[0].grid_maps(2.0)["mu"]).astype(np.float32)
    uploader(app, "mu_overlay").set_value(("mu.fits", fits_bytes(mu, wcs), "application/fits"))
    run_page(app)
    assert not app.error, [e.value for e in app.error]
    assert any("cannot place critical curves" in c.value for c in app.caption)


def test_table_downloads_before_their_tables_exist_are_disabled_with_a_reason():
    app = run_page()
    for choice in ("per model", "spread", "pairs", "counter-images"):
        app.selectbox(key="lv_table_choice").set_value(choice)
        run_page(app)
        button = next(b for b in download_buttons(app) if b.proto.label == "Download table")
        assert button.proto.help and "mark" in button.proto.help.lower(), choice
    # One knot: the measurement tables and its counter-images exist, pairs not yet.
    scene = app.session_state["lv_scene"]
    click_on(app, demo_knot(scene, 0), stamp=1)
    for choice, disabled in (("per model", False), ("counter-images", False), ("pairs", True)):
        app.selectbox(key="lv_table_choice").set_value(choice)
        run_page(app)
        button = next(b for b in download_buttons(app) if b.proto.label == "Download table")
        assert button.proto.disabled == disabled, choice


def test_uploads_above_the_stated_limit_are_refused_before_reading():
    from streamlit import config

    app = run_page()
    click_on(app, demo_knot(app.session_state["lv_scene"], 0), stamp=1)
    app.radio(key="lv_source").set_value("My files")
    run_page(app)
    assert "MB per file" in uploader(app, "cutout").help
    previous = config.get_option("server.maxUploadSize")
    config.set_option("server.maxUploadSize", 1)
    try:
        run_page(app)
        assert "Up to 1 MB per file" in uploader(app, "cutout").help
        big = fits_bytes(np.zeros((600, 600), np.float32), small_wcs((600, 600)))
        uploader(app, "cutout").set_value(("big.fits", big, "application/fits"))
        run_page(app)
    finally:
        config.set_option("server.maxUploadSize", previous)
    assert any("upload limit of 1 MB" in e.value for e in app.error)
    assert len(app.session_state[page_state.CANDIDATES]) == 1
