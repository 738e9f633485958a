"""The web page: the picture-to-sky mapping, the knot state, and the page run by AppTest."""

import math

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs import WCS

from lensview.fitsio import Cutout
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


def test_click_position_is_the_centre_of_the_css_pixel_and_follows_the_rendered_size():
    viewport = Viewport.around((80, 60), 1, (120, 160), 640)
    # Whole and fractional pointer offsets within one CSS pixel give the same position.
    a = click_display_position({"x": 100, "y": 50, "width": 640, "height": 480}, viewport)
    b = click_display_position({"x": 100.7, "y": 50.2, "width": 640, "height": 480}, viewport)
    assert a == b == (100.5, 50.5)
    # A picture shown at half its size: CSS pixels are twice as large.
    c = click_display_position({"x": 50, "y": 25, "width": 320, "height": 240}, viewport)
    assert c == (101.0, 51.0)


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
