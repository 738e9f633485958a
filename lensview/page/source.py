"""Main panel "Source plane": caustics, traced knots and the delensed view of the shown crop."""

import io

import streamlit as st
from astropy.table import Table

from ..errors import LensviewInputError
from . import state as page_state

__all__ = ["source_panel"]


@st.cache_resource(max_entries=8, show_spinner=False)
def _delensed(scene_key, model_index, z_source, box, _scene):
    from ..counterparts import source_plane_image

    field = _scene.fields[model_index]
    return source_plane_image(_scene.cutout.data, _scene.cutout.wcs, field, z_source, box=box,
                              shape=(256, 256))


@st.cache_resource(max_entries=8, show_spinner=False)
def _figure_png(scene_key, model_index, z_source, box, knots, stretch, cmap, _scene):
    from ..figures import render_source_plane_figure

    field = _scene.fields[model_index]
    image, wcs = _delensed(scene_key, model_index, z_source, box, _scene)
    traced = None
    if knots:
        from astropy.coordinates import SkyCoord
        import astropy.units as u

        coords = SkyCoord([k[1] for k in knots] * u.deg, [k[2] for k in knots] * u.deg)
        beta = field.ray_trace(coords, z_source)
        traced = Table({"ra": beta.ra.deg, "dec": beta.dec.deg, "label": [k[0] for k in knots]})
    fig = render_source_plane_figure(image, wcs, field.caustics(z_source), traced,
                                     z_source=z_source, cosmology=field.cosmology,
                                     stretch=stretch, cmap=cmap,
                                     title=f"source plane of {field.name}, z = {z_source:g}")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()


def source_panel(state, scene, z_source, viewport, settings):
    show = st.toggle("Show the source plane", key="lv_show_source",
                     help="Ray-traces the shown part of the cutout to the source plane and draws "
                          "the caustics and the traced knots on it.")
    if not show or viewport is None:
        st.caption("The delensed view is drawn on request, for the part of the cutout shown on "
                   "the picture; zoom in on an arc first for a sharper view.")
        return
    names = [f.name for f in scene.fields]
    index = names.index(st.selectbox("Model", names, key="lv_source_model")) \
        if len(names) > 1 else 0
    box = (viewport.x0, viewport.x0 + viewport.nx - 1, viewport.y0, viewport.y0 + viewport.ny - 1)
    knots = tuple((m["label"], m["ra"], m["dec"]) for m in page_state.candidates(state))
    try:
        with st.spinner("Ray-tracing the shown pixels to the source plane..."):
            png = _figure_png(scene.key, index, float(z_source), box, knots, settings["stretch"],
                              settings["cmap"], scene)
    except LensviewInputError as error:
        st.error(str(error))
        return
    st.image(png, width=620)
    st.caption("Surface brightness is conserved by lensing, so each source-plane pixel shows the "
               "mean of the cutout pixels that land on it; images of one source overlap here.")
