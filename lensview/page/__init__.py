"""The lensview web page (Streamlit): layout, widgets and session state only.

One module per panel: `inputs` (sidebar "Field and models"), `sky` (the
clickable picture and marking controls), `knots` (knot list and
measurements), `images` (counter-images and pairs), `source` (source plane),
`nature` (colours, temperature and what the knot can be), `takeaway`
(downloads and restore), `ensemble` (knots over many realisations);
`state` keeps the knots, `viewport` maps picture pixels to cutout pixels,
`picture` draws, and `analysis` gathers the library's numbers once per rerun.
No physics lives here.
"""

__all__ = ["main"]

TITLE = "lensview"
TABS = ("Measurements", "Counter-images and pairs", "Source plane", "Colours and nature",
        "Posterior spread", "Download and restore")


def main():
    """Build the page; `streamlit run app.py` calls this on every rerun."""
    import streamlit as st

    from . import state as page_state
    from .analysis import analyse
    from .ensemble import ensemble_panel
    from .images import images_panel, pairing_settings
    from .inputs import inputs_panel
    from .knots import knot_list, measurement_panel
    from .nature import nature_panel, scene_filters
    from .sky import display_settings, marking_controls, process_click, sky_panel
    from .source import source_panel
    from .takeaway import takeaway_panel

    st.set_page_config(page_title=TITLE, layout="wide", initial_sidebar_state="expanded")
    state = st.session_state
    page_state.init_state(state)
    st.sidebar.title(TITLE)
    st.sidebar.caption("Critical curves, magnifications and mirrored images of knots in "
                       "cluster-lensed arcs, compared across lens models.")
    scene, errors = inputs_panel(state)
    filters, _ = scene_filters(state, scene)
    settings = display_settings([f.name for f in scene.fields] if scene is not None else (),
                                [image.band.name for image in filters])
    for message in errors:
        st.error(message)
    if scene is None:
        st.info("Load an image cutout and at least one lens model in the sidebar.")
        knot_list(state)
        return
    if errors:
        st.caption(f"Still showing the last field that loaded: {scene.title}.")
    if state.get("lv_z_source_scene") != scene.key:
        state["lv_z_source_scene"] = scene.key
        state.setdefault("lv_z_source", float(scene.z_source))
    heading, slider = st.columns([1.3, 2])
    heading.markdown(f"#### {scene.title}")
    models = ", ".join(f.name for f in scene.fields)
    cosmology = scene.cosmology.name or "flat \u039bCDM"
    heading.caption(f"z_lens = {scene.z_lens:g}, {len(scene.fields)} model(s): {models}; "
                    f"{cosmology}")
    z_source = slider.slider("Source redshift", 0.05, 12.0, step=0.01, key="lv_z_source",
                             help="Curves, measurements and counter-images follow at once.")

    process_click(state, scene)
    psf_fwhm, tolerance = pairing_settings(state)
    results = analyse(state, scene, z_source, psf_fwhm=psf_fwhm, tolerance=tolerance)
    for message in results.errors:
        st.error(message)

    picture_column, side_column = st.columns([3, 1.4])
    with picture_column:
        viewport = sky_panel(state, scene, settings, z_source, results, filters=filters)
    with side_column:
        marking_controls(state, scene, results.focus)
        knot_list(state)

    measurements, images, source, nature, spread, takeaway = st.tabs(TABS)
    with measurements:
        measurement_panel(results)
    with images:
        images_panel(state, results, [f.name for f in scene.fields])
    with source:
        source_panel(state, scene, z_source, viewport, settings)
    with takeaway:
        takeaway_panel(state, scene, z_source, results, settings, viewport)
    with spread:
        ensemble_panel(state, scene, z_source, results)
    # Filled last: measuring every filter takes a moment, and the downloads above
    # must not wait for it (or be clicked while still stale).
    with nature:
        nature_panel(state, scene, z_source)
