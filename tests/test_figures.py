"""Figures: display normalisation, curves drawn where the WCS puts them, PNG and PDF output."""

import re

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.cosmology import Planck18
from astropy.table import Table
from astropy.visualization import AsinhStretch, PercentileInterval, SqrtStretch, ZScaleInterval
from matplotlib.colors import to_rgb
from matplotlib.image import imread

from lensview.lens.curves import Curve
from lensview.errors import LensviewInputError
from lensview.figures import (LENSVIEW_PALETTE, display_norm, render_field_figure,
                              render_source_plane_figure, save_figure)

from closed_form import make_wcs

DPI = 120
SHAPE = (150, 200)


@pytest.fixture
def cutout_wcs():
    return make_wcs(SHAPE[1], SHAPE[0], scale_arcsec=0.05, rotation_deg=25.0)


@pytest.fixture
def ring(cutout_wcs):
    """A closed tangential curve: a 2.5 arcsec circle on the sky about a point off the centre."""
    centre = cutout_wcs.pixel_to_world(90.0, 70.0)
    angles = np.linspace(0, 360, 400, endpoint=False) * u.deg
    sky = centre.directional_offset_by(angles, 2.5 * u.arcsec)
    return Curve(kind="tangential", sky=sky, closed=True, model="model A", z_source=2.0, plane="image",
                 map_pixels=np.column_stack(cutout_wcs.world_to_pixel(sky)))


def _png_colours_at(fig, path, xy, half=2):
    """RGB of the PNG around the display position of data pixels xy (window 2 half + 1 wide)."""
    image = imread(path)[..., :3]
    fig.canvas.draw()
    ax = fig.axes[0]
    display = ax.transData.transform(xy)
    cols = np.floor(display[:, 0]).astype(int)
    rows = np.floor(image.shape[0] - display[:, 1]).astype(int)
    windows = np.stack([image[r - half:r + half + 1, c - half:c + half + 1].reshape(-1, 3)
                        for r, c in zip(rows, cols)])
    return image, windows, display


def _outside_legend(fig, display):
    box = fig.axes[0].get_legend().get_window_extent()
    return ~((display[:, 0] > box.x0 - 4) & (display[:, 0] < box.x1 + 4)
             & (display[:, 1] > box.y0 - 4) & (display[:, 1] < box.y1 + 4))


# ---------------------------------------------------------------------------- display_norm
def test_zscale_and_percentile_limits_follow_astropy():
    rng = np.random.default_rng(3)
    data = rng.normal(10.0, 2.0, (64, 64))
    data[5, 5] = np.nan
    norm = display_norm(data, "asinh", "zscale")
    # astropy.visualization intervals on the finite pixels (reference library)
    low, high = ZScaleInterval().get_limits(data[np.isfinite(data)])
    assert (norm.vmin, norm.vmax) == (pytest.approx(low), pytest.approx(high))
    assert isinstance(norm.stretch, AsinhStretch)
    norm = display_norm(data, "sqrt", 99.0)
    low, high = PercentileInterval(99.0).get_limits(data[np.isfinite(data)])
    assert (norm.vmin, norm.vmax) == (pytest.approx(low), pytest.approx(high))
    # central 99 per cent: numpy percentiles 0.5 and 99.5 (reference library)
    assert norm.vmin == pytest.approx(np.nanpercentile(data, 0.5), rel=1e-3)
    assert isinstance(norm.stretch, SqrtStretch)
    norm = display_norm(data, "linear", (0.0, 20.0))
    assert norm(10.0) == pytest.approx(0.5) and norm(30.0) > 1.0  # beyond: the colour map's end
    flat = display_norm(np.ones((4, 4)), "log", "zscale")
    assert flat.vmax > flat.vmin


@pytest.mark.parametrize("stretch, limits, match", [
    ("cubic", "zscale", "stretch"), ("linear", "median", "limits"), ("linear", 120.0, "percentile"),
    ("linear", (2.0, 1.0), "low < high"),
])
def test_display_norm_refuses_unknown_settings(stretch, limits, match):
    with pytest.raises(LensviewInputError, match=match):
        display_norm(np.arange(16.0).reshape(4, 4), stretch, limits)
    with pytest.raises(LensviewInputError, match="no finite pixel"):
        display_norm(np.full((3, 3), np.nan))


# ---------------------------------------------------------------------------- field figure
def test_png_shows_the_curve_where_the_wcs_puts_it(tmp_path, ring, cutout_wcs):
    fig = render_field_figure(np.zeros(SHAPE), cutout_wcs, curves=[ring], limits=(0.0, 1.0), cmap="gray_r")
    fig.set_dpi(DPI)
    path = save_figure(fig, tmp_path / "field.png", dpi=DPI)
    # projected positions of the sky vertices by astropy.wcs (reference library)
    xy = np.column_stack(cutout_wcs.world_to_pixel(ring.sky))[::10]
    image, windows, display = _png_colours_at(fig, path, xy)
    width, height = fig.get_size_inches() * DPI
    assert image.shape[:2] == (round(height), round(width))
    curve_rgb = np.array(to_rgb(LENSVIEW_PALETTE[0]))
    keep = _outside_legend(fig, display)
    assert keep.sum() >= 30
    nearest = np.min(np.linalg.norm(windows - curve_rgb, axis=2), axis=1)
    assert np.all(nearest[keep] < 0.12)
    # zero data at the low limit of matplotlib's gray_r is white (reference library):
    # inside the ring, away from the curve
    inner = np.column_stack(cutout_wcs.world_to_pixel(
        cutout_wcs.pixel_to_world(90.0, 70.0).directional_offset_by(ring_angles(), 1.2 * u.arcsec)))
    _, inside, _ = _png_colours_at(fig, path, inner)
    assert np.all(np.min(np.linalg.norm(inside - curve_rgb, axis=2), axis=1) > 0.5)
    assert np.all(inside > 0.97)


def ring_angles():
    return np.linspace(0, 360, 12, endpoint=False) * u.deg


def test_overlays_legend_and_scale_bar(ring, cutout_wcs):
    second = Curve(kind="radial", sky=ring.sky[:150], closed=False, model="model B", z_source=2.0,
                   plane="image", map_pixels=ring.map_pixels[:150])
    candidates = Table({"ra": [150.0, 150.0004] * u.deg, "dec": [2.0, 2.0003] * u.deg, "label": ["K1", "K2"]})
    pairs = Table({"i": [0], "j": [1]})
    images = Table({"ra": [149.9997] * u.deg, "dec": [1.9998] * u.deg, "model": ["model B"]})
    fig = render_field_figure(np.zeros(SHAPE), cutout_wcs, curves=[ring, second], candidates=candidates,
                              pairs=pairs, counterimages=images, z_lens=0.4, title="field")
    ax = fig.axes[0]
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend[:2] == ["model A", "model B"]
    assert {"tangential critical curve", "radial critical curve", "knot",
            "predicted counter-image"} <= set(legend)
    texts = [t.get_text() for t in ax.texts]
    assert "K1" in texts and "K2" in texts
    styles = [line.get_linestyle() for line in ax.get_lines()[:2]]
    assert styles == ["-", "--"]
    assert [line.get_color() for line in ax.get_lines()[:2]] == list(LENSVIEW_PALETTE[:2])
    bar = next(t.get_text() for t in ax.texts if "kpc" in t.get_text())
    arcsec, kpc = map(float, re.match(r"([\d.]+)\u2033 = ([\d.]+) kpc", bar).groups())
    # kpc per arcsec at z = 0.4 in Planck18 from astropy.cosmology (reference library)
    expected = (Planck18.kpc_proper_per_arcmin(0.4) * arcsec * u.arcsec).to_value(u.kpc)
    assert kpc == pytest.approx(expected, rel=5e-3)
    # the bar spans the stated angle: pixels times the pixel scale
    bar_line = [line for line in ax.get_lines() if line.get_linewidth() == 2.2][0]
    assert np.ptp(bar_line.get_xdata()) * 0.05 == pytest.approx(arcsec)


def test_pdf_and_png_are_produced_and_non_trivial(tmp_path, ring, cutout_wcs):
    data = np.random.default_rng(0).normal(size=SHAPE)
    plain = render_field_figure(data, cutout_wcs, z_lens=0.4)
    with_curve = render_field_figure(data, cutout_wcs, curves=[ring], z_lens=0.4)
    sizes = {}
    for name, fig in (("plain", plain), ("curve", with_curve)):
        for suffix in ("pdf", "png"):
            path = tmp_path / f"{name}.{suffix}"
            save_figure(fig, path)
            sizes[name, suffix] = path.stat().st_size
    assert (tmp_path / "curve.pdf").read_bytes().startswith(b"%PDF")
    assert (tmp_path / "curve.png").read_bytes().startswith(b"\x89PNG")
    assert sizes["curve", "pdf"] > 20_000 and sizes["curve", "png"] > 100_000
    # 400 vertices of vector path add to the PDF
    assert sizes["curve", "pdf"] > sizes["plain", "pdf"] + 1_000
    image = imread(tmp_path / "curve.png")
    assert image.shape[1] == round(with_curve.get_size_inches()[0] * 300)


def test_figure_inputs_are_checked(tmp_path, ring, cutout_wcs):
    with pytest.raises(LensviewInputError, match="2-D"):
        render_field_figure(np.zeros(10), cutout_wcs)
    with pytest.raises(LensviewInputError, match="colour map"):
        render_field_figure(np.zeros(SHAPE), cutout_wcs, cmap="no-such-map")
    with pytest.raises(LensviewInputError, match="beyond"):
        render_field_figure(np.zeros(SHAPE), cutout_wcs, candidates=SkyCoord([150.0] * u.deg, [2.0] * u.deg),
                            pairs=Table({"i": [0], "j": [3]}))
    fig = render_field_figure(np.zeros(SHAPE), cutout_wcs, curves=[ring])
    with pytest.raises(LensviewInputError, match="png or .pdf"):
        save_figure(fig, tmp_path / "field.jpg")
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------- source plane
def test_source_plane_figure_draws_caustics_and_traced_points(tmp_path, ring, cutout_wcs):
    caustic = Curve(kind="tangential", sky=ring.sky, closed=True, model="model A", z_source=2.0,
                    plane="source", map_pixels=ring.map_pixels)
    image = np.full(SHAPE, np.nan)
    image[40:110, 50:150] = 0.0
    traced = SkyCoord([150.0] * u.deg, [2.0] * u.deg)
    fig = render_source_plane_figure(image, cutout_wcs, [caustic], traced, z_source=2.0,
                                     limits=(0.0, 1.0))
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert legend == ["model A", "tangential caustic", "traced knot"]
    assert fig.axes[0].get_lines()[0].get_linestyle() == ":"
    fig.set_dpi(DPI)
    path = save_figure(fig, tmp_path / "source.png", dpi=DPI)
    xy = np.column_stack(cutout_wcs.world_to_pixel(ring.sky))[::25]
    # a dotted line: look a pixel further for the nearest dot
    _, windows, display = _png_colours_at(fig, path, xy, half=3)
    keep = _outside_legend(fig, display)
    nearest = np.min(np.linalg.norm(windows - np.array(to_rgb(LENSVIEW_PALETTE[0])), axis=2), axis=1)
    assert keep.sum() >= 8 and np.all(nearest[keep] < 0.15)
