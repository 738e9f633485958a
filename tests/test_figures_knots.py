"""The per-knot figure: SED points with the fitted curve, luminosity across models."""

import numpy as np
import pytest
import astropy.units as u
from astropy.table import Table

import lensview as lv
from lensview import demo
from lensview.figures import render_knot_figure, render_knot_figures


@pytest.fixture(scope="module")
def result():
    _, _, candidates = demo.load_demo()
    coords = lv.read_candidates(demo.DEMO_DIRECTORY / demo.CANDIDATE_FILE)[:2]
    from astropy.coordinates import SkyCoord

    sky = SkyCoord(np.asarray(coords["ra"]) * u.deg, np.asarray(coords["dec"]) * u.deg)
    mu = Table(dict(candidate=[0, 0, 1], model=["a", "b", "a"], mu=[800.0, -3000.0, 40.0]))
    return lv.knot_nature(demo.load_demo_filters(), sky, mu, demo.Z_SOURCE,
                          labels=list(coords["label"]))


def test_figure_draws_the_measured_points_the_fit_and_each_model(result):
    fig = render_knot_figure(result, 0)
    sed, lum = fig.axes[:2]
    points = [line for line in sed.lines if line.get_marker() == "s"]
    assert len(points[0].get_xdata()) == len(demo.FILTERS)
    # The curve is the fitted model itself.
    curve = next(line for line in sed.lines if line.get_marker() in ("None", None, ""))
    x = np.asarray(curve.get_xdata())
    expected = result.fits[0].model(x * u.um).to_value(u.uJy)
    assert np.allclose(curve.get_ydata(), expected)
    assert lum.get_xscale() == "log"
    shown = [line for line in lum.lines if line.get_marker() == "o"]
    values = sorted(float(line.get_xdata()[0]) for line in shown)
    per = result.per_model[result.per_model["candidate"] == 0]
    assert np.allclose(values, sorted(np.asarray(per["luminosity"])))


def test_one_figure_per_knot_and_unknown_knot_is_an_error(result):
    figures = render_knot_figures(result)
    assert [label for label, _ in figures] == list(result.summary["label"])
    with pytest.raises(lv.LensviewInputError, match="no knot 7"):
        render_knot_figure(result, 7)
