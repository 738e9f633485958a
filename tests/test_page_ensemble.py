"""The "Posterior spread" panel, run by AppTest on the demo field."""

import numpy as np
from astropy.coordinates import SkyCoord
from astropy.io import fits

import lensview as lv
from lensview.page import state as page_state
from lensview.page.ensemble import ENSEMBLE

from test_app import demo_knot, download_buttons, run_page


def write_realisations(folder, field, factors):
    """Realisations of a loaded model: its deflection scaled by each factor."""
    ax, ay = field.node_deflection(slice(None), slice(None))
    header = field.wcs.to_header()
    header["BUNIT"] = "pixel"
    if field.z_norm is not None:
        header["Z_NORM"] = field.z_norm
    for k, factor in enumerate(factors):
        fits.writeto(folder / f"draw{k}_x.fits", (factor * ax).astype(np.float32), header)
        fits.writeto(folder / f"draw{k}_y.fits", (factor * ay).astype(np.float32), header)


def test_the_panel_measures_the_knots_over_a_folder_of_realisations(tmp_path):
    app = run_page()
    scene = app.session_state["lv_scene"]
    write_realisations(tmp_path, scene.fields[0], (0.97, 1.0, 1.03))
    knots = [demo_knot(scene, 0), demo_knot(scene, 1)]
    app.session_state[page_state.CANDIDATES] = [
        {"label": f"K{k + 1}", "ra": float(c.ra.deg), "dec": float(c.dec.deg), "snapped": False}
        for k, c in enumerate(knots)]
    run_page(app)
    app.text_input(key="lv_ens_folder").set_value(str(tmp_path / "*.fits"))
    app.text_input(key="lv_ens_thresholds").set_value("5, 50")
    app.button(key="lv_ens_run").click()
    run_page(app)
    assert not app.error, app.error[0].value
    run = app.session_state[ENSEMBLE]
    # The page's numbers are the library's.
    expected = lv.measure_ensemble(SkyCoord(knots), tmp_path,
                                   scene.z_source, z_lens=scene.z_lens, cosmology=scene.cosmology,
                                   labels=["K1", "K2"], mu_thresholds=(5, 50))
    for name in ("abs_mu_p50", "offset_arcsec_p16", "fraction_abs_mu_gt_5"):
        np.testing.assert_allclose(run["summary"][name], expected[name], rtol=1e-9)
    assert len(run["samples"]) == 6
    labels = [d.proto.label for d in download_buttons(app)]
    assert "Download the summary" in labels and "Download every realisation's rows" in labels
    app.selectbox(key="lv_ens_knot").set_value("K2")
    run_page(app)
    assert len(app.session_state[page_state.CANDIDATES]) == 2


def test_a_bad_folder_is_a_message_and_the_knots_stay(tmp_path):
    app = run_page()
    scene = app.session_state["lv_scene"]
    coord = demo_knot(scene, 0)
    app.session_state[page_state.CANDIDATES] = [
        {"label": "K1", "ra": float(coord.ra.deg), "dec": float(coord.dec.deg), "snapped": False}]
    run_page(app)
    app.text_input(key="lv_ens_folder").set_value(str(tmp_path))
    app.button(key="lv_ens_run").click()
    run_page(app)
    assert any("holds no FITS files" in e.value for e in app.error)
    assert len(app.session_state[page_state.CANDIDATES]) == 1
