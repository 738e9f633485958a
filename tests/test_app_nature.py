"""The page's "Colours and nature" tab and the filter pictures, run by AppTest."""

import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord

import lensview as lv
from lensview import demo
from lensview.page import state as page_state

from test_app import click_on, demo_knot, run_page, uploader


def nature_frame(app):
    if not app.checkbox(key="lv_nature_on").value:
        app.checkbox(key="lv_nature_on").check()
        run_page(app)
    frames = [f for f in app.dataframe if "verdict" in f.value.columns]
    assert frames, "the nature table is not shown"
    return frames[0].value


def test_nature_tab_shows_the_library_verdict_for_a_marked_knot():
    app = run_page()
    scene = app.session_state["lv_scene"]
    assert [i.band.name for i in scene.filters] == [f.name for f in demo.FILTERS]
    clicked = click_on(app, demo_knot(scene, 0), stamp=1)
    assert not app.error, [e.value for e in app.error]
    frame = nature_frame(app)
    marks = app.session_state[page_state.CANDIDATES]
    coords = SkyCoord([m["ra"] for m in marks] * u.deg, [m["dec"] for m in marks] * u.deg)
    expected = lv.knot_nature(scene.filters, coords, scene.fields, scene.z_source,
                              labels=[m["label"] for m in marks])
    assert list(frame["label"]) == ["K1"]
    assert float(frame["temperature"][0]) == pytest.approx(
        float(expected.summary["temperature"][0]), rel=1e-3)
    assert list(frame["verdict"]) == list(expected.summary["verdict"])
    assert any(str(expected.summary["verdict"][0]) in m.value for m in app.markdown)
    assert any("Cautions" in w.value for w in app.warning)
    # Dust changes the fit; the knots survive.
    app.selectbox(key="lv_nature_dust").set_value("G23")
    run_page(app)
    app.number_input(key="lv_nature_av").set_value(0.3)
    run_page(app)
    assert float(nature_frame(app)["temperature"][0]) > float(frame["temperature"][0])
    assert len(app.session_state[page_state.CANDIDATES]) == 1
    assert clicked.separation(coords[0]).arcsec < 1e-6


def test_picture_shows_one_filter_or_a_composite_with_marks_on_the_sky():
    app = run_page()
    scene = app.session_state["lv_scene"]
    click_on(app, demo_knot(scene, 1), stamp=1)
    mark = dict(app.session_state[page_state.CANDIDATES][0])
    for picture in (demo.FILTERS[0].name, "colour composite"):
        app.selectbox(key="lv_picture").set_value(picture)
        run_page(app)
        assert not app.error, [e.value for e in app.error]
        assert app.session_state[page_state.CANDIDATES][0] == mark


def test_uploaded_filters_without_a_zero_point_ask_for_it():
    import io

    from astropy.io import fits

    app = run_page()
    app.radio(key="lv_source").set_value("My files")
    run_page(app)
    folder = demo.DEMO_DIRECTORY
    data, header = fits.getdata(folder / demo.FILTERS[0].file, header=True)
    del header["PHOTZP"]
    buffer = io.BytesIO()
    fits.PrimaryHDU(data, header).writeto(buffer)
    uploader(app, "cutout").set_value(
        (demo.CUTOUT_FILE, (folder / demo.CUTOUT_FILE).read_bytes(), "application/fits"))
    run_page(app)
    grid = demo.GRIDS[0]
    uploader(app, "model_0").set_value(
        [(name, (folder / name).read_bytes(), "application/fits") for name in grid.files])
    run_page(app)
    app.number_input(key="lv_z_lens_files").set_value(demo.Z_LENS)
    run_page(app)
    uploader(app, "filters").set_value([("blue.fits", buffer.getvalue(), "application/fits")])
    run_page(app)
    scene = app.session_state["lv_scene"]
    assert len(scene.filter_files) == 2
    knots = demo.load_demo()[2]
    click_on(app, SkyCoord(float(knots["ra"][0]), float(knots["dec"][0]), unit=u.deg), stamp=1)
    app.checkbox(key="lv_nature_on").check()
    run_page(app)
    assert any("has no photometric zero point" in e.value for e in app.error)
    # Typing the zero point in the tab's filter details fixes it.
    app.text_input(key="lv_band_zp_1_blue.fits").set_value(str(demo.FILTERS[0].zero_point))
    run_page(app)
    assert not app.error, [e.value for e in app.error]
    assert len(nature_frame(app)) == 1
