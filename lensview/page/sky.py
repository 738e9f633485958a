"""Main panel "Sky": the clickable cutout with curves, zoom and pan, and marking controls."""

import astropy.units as u
import numpy as np
import streamlit as st
from astropy.coordinates import SkyCoord
from streamlit_image_coordinates import streamlit_image_coordinates

from ..style import MU_LEVELS
from ..errors import LensviewInputError
from ..io.mapfiles import OVERLAY_ONLY_REASON, magnification_overlay_on, read_magnification_map
from .inputs import upload_slot
from . import state as page_state
from .picture import draw_marks, render_base_layer
from .viewport import Viewport

__all__ = ["display_settings", "process_click", "sky_panel", "STRETCH_CHOICES", "LIMIT_CHOICES",
           "COLOUR_MAPS", "ZOOMS"]

STRETCH_CHOICES = ("asinh", "sqrt", "log", "linear")
LIMIT_CHOICES = {"zscale": "zscale", "99.5 %": 99.5, "99 %": 99.0, "98 %": 98.0, "95 %": 95.0,
                 "90 %": 90.0, "min to max": 100.0}
COLOUR_MAPS = ("gray_r", "gray", "magma", "cividis", "viridis", "inferno", "bone")
ZOOMS = (1, 1.5, 2, 3, 4, 6, 8, 12, 16)
WIDTHS = (560, 720, 880, 1040)
CONTOUR_LEVELS = MU_LEVELS
CLICK_KEY = "lv_click"
CUTOUT_PICTURE = "the cutout"
COMPOSITE_PICTURE = "colour composite"


def display_settings(model_names=(), filter_names=()):
    """Sidebar panel "Display"; returns the settings as a dict."""
    sidebar = st.sidebar
    sidebar.subheader("Display")
    pictures = [CUTOUT_PICTURE]
    if len(filter_names) > 1:
        pictures += list(filter_names)
    if len(filter_names) >= 3:
        pictures.append(COMPOSITE_PICTURE)
    picture = sidebar.selectbox("Picture", pictures, key="lv_picture",
                                help="One filter, resampled onto the cutout's pixels, or a colour "
                                     "composite of the bluest, a middle and the reddest filter; "
                                     "knots stay at their sky positions.")
    left, right = sidebar.columns(2)
    stretch = left.selectbox("Stretch", STRETCH_CHOICES, key="lv_stretch")
    limits_name = right.selectbox(
        "Limits", list(LIMIT_CHOICES), key="lv_limits",
        help="Pixel values shown from the colour map's one end to the other: zscale picks a "
             "robust range around the sky level; a percentage keeps that central share of the "
             "pixel values; min to max shows all of them.")
    left, right = sidebar.columns(2)
    cmap = left.selectbox("Colour map", COLOUR_MAPS, key="lv_cmap")
    width = right.selectbox("Picture detail (px)", WIDTHS, index=1, key="lv_width",
                           help="Width of the rendered picture; it is shown at the column's width.")
    show_curves = sidebar.checkbox("Critical curves", value=True, key="lv_show_curves")
    show_contours = sidebar.checkbox("Magnification contours |\u03bc| = 3, 10, 30", value=False,
                                     key="lv_show_contours")
    contour_model = 0
    if show_contours and len(model_names) > 1:
        chosen = sidebar.selectbox("Contours of model", list(model_names), key="lv_contour_model")
        contour_model = list(model_names).index(chosen)
    with sidebar:
        overlay = upload_slot(st.session_state, "Magnification overlay (FITS, optional)",
                              "mu_overlay", help=OVERLAY_ONLY_REASON)
    if overlay:
        sidebar.caption(OVERLAY_ONLY_REASON)
    return dict(picture=picture, stretch=stretch, limits=LIMIT_CHOICES[limits_name], cmap=cmap,
                width=int(width), show_curves=show_curves, show_contours=show_contours,
                contour_model=contour_model, overlay=overlay[-1] if overlay else None)


def snap_radius(state):
    """The snapping radius the user set (None: no snapping)."""
    if not state.get("lv_snap", False):
        return None
    return float(state.get("lv_snap_radius", 0.15)) * u.arcsec


def process_click(state, scene):
    """Handle a new click on the picture drawn by the previous run.

    Runs before any widget of the marking controls is drawn, so the label
    typed for this click can be cleared for the next one.
    """
    mark = page_state.handle_click(state, state.get(CLICK_KEY), cutout=scene.cutout,
                                   scene_key=scene.key, snap_radius=snap_radius(state),
                                   label=state.get("lv_next_label"))
    if mark is not None:
        state["lv_next_label"] = ""
        state["lv_focus"] = mark["label"]
    return mark


def _view_controls(state, scene, settings):
    ny, nx = scene.cutout.data.shape
    if state.get("lv_view_scene") != scene.key:
        state["lv_view_scene"] = scene.key
        state["lv_cx"], state["lv_cy"] = float((nx - 1) // 2), float((ny - 1) // 2)
        state["lv_zoom"] = 1
    cols = st.columns([2.2, 1, 1, 2.6])
    zoom = cols[0].select_slider("Zoom", ZOOMS, key="lv_zoom")
    cols[1].number_input("Centre x (px)", 0.0, float(nx - 1), step=10.0, key="lv_cx")
    cols[2].number_input("Centre y (px)", 0.0, float(ny - 1), step=10.0, key="lv_cy")
    viewport = Viewport.around((state["lv_cx"], state["lv_cy"]), zoom, (ny, nx), settings["width"])
    with cols[3]:
        st.caption("Pan")
        pan = st.columns(5)
        step_x, step_y = max(viewport.nx // 4, 1), max(viewport.ny // 4, 1)
        for column, (label, dx, dy) in zip(pan, (("\u2190", -step_x, 0), ("\u2192", step_x, 0),
                                                  ("\u2191", 0, step_y), ("\u2193", 0, -step_y),
                                                  ("\u25ce", None, None))):
            column.button(label, key=f"lv_pan_{label}", on_click=_pan,
                          args=(state, viewport, dx, dy, nx, ny),
                          help="Re-centre on the whole image" if dx is None else None)
    return viewport


def _pan(state, viewport, dx, dy, nx, ny):
    if dx is None:
        state["lv_cx"], state["lv_cy"], state["lv_zoom"] = (float((nx - 1) // 2),
                                                           float((ny - 1) // 2), 1)
        return
    cx, cy = viewport.center
    state["lv_cx"] = float(min(max(cx + dx, 0), nx - 1))
    state["lv_cy"] = float(min(max(cy + dy, 0), ny - 1))


def centre_on(state, coord, cutout, zoom=None):
    """Callback: centre the view on a sky position."""
    x, y = cutout.wcs.world_to_pixel(coord)
    state["lv_cx"], state["lv_cy"] = float(x), float(y)
    if zoom is not None:
        state["lv_zoom"] = zoom


@st.cache_resource(max_entries=2, show_spinner=False)
def _cached_overlay(sha256, name, _content):
    import io

    buffer = io.BytesIO(_content)
    buffer.name = name
    return read_magnification_map(buffer)


@st.cache_resource(max_entries=6, show_spinner=False)
def _picture_data(scene_key, picture, _scene, _filters):
    """The cutout, one filter on the cutout's pixels, or a colour composite (display only)."""
    from ..composite import band_on_grid, colour_composite

    cutout = _scene.cutout
    by_name = {image.band.name: image for image in _filters}
    if picture in by_name:
        return band_on_grid(by_name[picture], cutout.wcs, cutout.data.shape)
    if picture == COMPOSITE_PICTURE and len(_filters) >= 3:
        ordered = sorted(_filters, key=lambda image: image.band.pivot.value)
        chosen = [ordered[0], ordered[len(ordered) // 2], ordered[-1]]
        return colour_composite(chosen, cutout.wcs, cutout.data.shape)
    return cutout.data


@st.cache_resource(max_entries=24, show_spinner=False)
def _base_layer(scene_key, viewport, stretch, limits, cmap, z_source, show_curves, show_contours,
                contour_model, overlay_sha, picture, _scene, _curves, _overlay=None,
                _filters=()):
    overlay = None
    if _overlay is not None:
        # |mu| of the user's map on the shown crop: drawn, never measured.
        mu_map = _cached_overlay(_overlay.sha256, _overlay.name, _overlay.content)
        overlay = magnification_overlay_on(mu_map, _scene.cutout.wcs[viewport.slices],
                                           (viewport.ny, viewport.nx))
    contours = None
    if show_contours:
        # |mu| of the chosen model on the shown crop, from the library's det A resampling.
        crop_wcs = _scene.cutout.wcs[viewport.slices]
        mu = _scene.fields[contour_model].magnification_map_on(
            crop_wcs, (viewport.ny, viewport.nx), z_source)
        contours = np.abs(mu)
    drawn = []
    if show_curves:
        for curve in _curves:
            drawn.append((str(curve.model), curve.kind, curve.to_pixels(_scene.cutout.wcs),
                          curve.closed))
    data = _picture_data(scene_key, picture, _scene, _filters)
    return render_base_layer(data, viewport, stretch=stretch, limits=limits,
                             cmap=cmap, curves=drawn, model_names=[f.name for f in _scene.fields],
                             contours=contours,
                             contour_levels=CONTOUR_LEVELS if show_contours else (),
                             overlay=overlay, overlay_levels=CONTOUR_LEVELS)


def sky_panel(state, scene, settings, z_source, results, filters=()):
    """The picture and the marking controls; stores the viewport it drew with."""
    viewport = _view_controls(state, scene, settings)
    curves = results.curves
    key = (scene.key, viewport, settings["stretch"], settings["limits"], settings["cmap"],
           float(z_source), settings["show_curves"] and bool(curves), settings["show_contours"],
           settings["contour_model"] if settings["show_contours"] else 0,
           settings["overlay"].sha256 if settings.get("overlay") else None,
           settings.get("picture", CUTOUT_PICTURE))
    try:
        with st.spinner("Drawing the field..."):
            base = _base_layer(*key, _scene=scene, _curves=curves, _overlay=settings.get("overlay"),
                               _filters=tuple(filters))
    except LensviewInputError as error:
        st.error(str(error))
        return viewport
    wcs = scene.cutout.wcs
    marks = page_state.candidates(state)
    knots = []
    if marks:
        x, y = wcs.world_to_pixel(page_state.candidate_coords(state))
        knots = [(m["label"], xi, yi)
                 for m, xi, yi in zip(marks, np.atleast_1d(x), np.atleast_1d(y))]
    links = [((knots[i][1], knots[i][2]), (knots[j][1], knots[j][2])) for i, j in results.links]
    images = []
    if results.counterimages is not None and len(results.counterimages):
        others = results.counterimages[~results.counterimages["is_input"]]
        if len(others):
            cx, cy = wcs.world_to_pixel(SkyCoord(others["ra"], others["dec"], frame="icrs"))
            images = list(zip(np.atleast_1d(cx), np.atleast_1d(cy)))
    picture = draw_marks(base, viewport, knots=knots, links=links, counterimages=images)
    state[page_state.VIEWPORT] = viewport
    state[page_state.VIEWPORT_SCENE] = scene.key
    streamlit_image_coordinates(picture, key=CLICK_KEY, width="stretch",
                                png_compression_level=1, cursor="crosshair")
    st.caption(
        f"Showing cutout pixels x {viewport.x0}\u2013{viewport.x0 + viewport.nx - 1}, "
        f"y {viewport.y0}\u2013{viewport.y0 + viewport.ny - 1}. Click on a knot to mark it. "
        "Circles: marked knots; squares: predicted counter-images of the selected knot; white "
        "lines: proposed mirrored pairs.")
    return viewport


def marking_controls(state, scene, focus=None):
    """Label for the next click, snapping, zoom on the selected knot, and the demo's knots."""
    st.markdown("**Next click**")
    st.text_input("Label (empty: next free K-number)", key="lv_next_label",
                  placeholder=page_state.next_label(state))
    left, right = st.columns(2)
    left.checkbox("Snap to the peak", key="lv_snap",
                  help="Move the click to the centroid of the nearby peak, if there is one.")
    right.number_input("within (arcsec)", 0.02, 2.0, 0.15, 0.01, key="lv_snap_radius")
    note = state.get(page_state.CLICK_NOTE)
    if note:
        st.caption(note)
    marks = page_state.candidates(state)
    labels = page_state.candidate_labels(state)
    if focus in labels:
        mark = marks[labels.index(focus)]
        st.button(f"Zoom in on {focus}", key="lv_centre_focus", on_click=centre_on,
                  args=(state, SkyCoord(mark["ra"] * u.deg, mark["dec"] * u.deg), scene.cutout, 4))
    if scene.knots is not None and len(scene.knots):
        st.button("Mark the demo's knots", key="lv_mark_demo", on_click=_mark_demo,
                  args=(state, scene.knots),
                  help="Adds the knots listed with the demo field to your list.")


def _mark_demo(state, knots):
    page_state.replace_candidates(state, knots, append=True)
