"""Tab "Colours and nature": the knots in every filter, their temperature, luminosity and verdict.

The numbers come from `lensview.knot_nature`; this module only gathers the
user's choices (band details of uploaded filters, dust, aperture), shows the
tables, the verdict with its cautions and the per-knot figure of
`lensview.figures.knots`. The filters the picture can show come from
`scene_filters` too.
"""

import io

import numpy as np
import streamlit as st

from ..errors import LensviewInputError
from . import state as page_state

__all__ = ["TAB", "scene_filters", "nature_panel", "DUST_CHOICES"]

TAB = "Colours and nature"
NO_DUST = "no dust"
DUST_CHOICES = (NO_DUST, "G23", "F99", "CCM89")
_FIELDS = (("name", "Filter name"), ("pivot", "Pivot (micron)"), ("zp", "AB zero point"),
           ("psf", "PSF FWHM (arcsec)"))


def _override_key(index, field, name):
    return f"lv_band_{field}_{index}_{name}"


def _overrides(state, index, held_name):
    """The band details typed for one uploaded filter (empty: from the header)."""
    import astropy.units as u

    values = {}
    for field, label in _FIELDS:
        text = str(state.get(_override_key(index, field, held_name), "") or "").strip()
        if not text:
            continue
        if field == "name":
            values["name"] = text
            continue
        try:
            number = float(text)
        except ValueError:
            raise LensviewInputError(
                f"{label} of {held_name} must be a number; got {text!r}.") from None
        if field == "pivot":
            values["pivot"] = number * u.um
        elif field == "zp":
            values["zero_point"] = number
        else:
            values["psf_fwhm"] = number * u.arcsec
    return values


def scene_filters(state, scene):
    """The field's filters as BandImages, and the messages of those that failed."""
    if scene is None:
        return [], []
    if scene.filters:
        return list(scene.filters), []
    if len(scene.filter_files) < 2:
        # One image has no colour: its band is not needed, so a header without
        # FILTER or pivot keywords is no error yet.
        return [], []
    from ..photometry import band_image
    from .inputs import _cached_cutout

    images, errors = [], []
    for index, held in enumerate(scene.filter_files):
        try:
            cutout = _cached_cutout(held.sha256, held.name, held.content)
            images.append(band_image(cutout, **_overrides(state, index, held.name)))
        except LensviewInputError as error:
            errors.append(f"{held.name}: {error}")
    return images, errors


@st.cache_resource(max_entries=8, show_spinner=False)
def _cached_nature(scene_key, positions, labels, z_source, dust, radius, band_key, _images,
                   _fields):
    import astropy.units as u
    from astropy.coordinates import SkyCoord

    from ..nature import knot_nature
    from ..sed import Dust

    coords = SkyCoord([p[0] for p in positions] * u.deg, [p[1] for p in positions] * u.deg)
    return knot_nature(_images, coords, _fields, z_source, labels=list(labels),
                       radius=None if radius is None else radius * u.arcsec,
                       dust=None if dust is None else Dust(a_v=dust[1], law=dust[0]))


def _band_details(state, scene):
    if scene.filters or len(scene.filter_files) < 2:
        return
    with st.expander("Filter details (empty boxes: from the header)", expanded=False):
        for index, held in enumerate(scene.filter_files):
            st.caption(held.name)
            columns = st.columns(len(_FIELDS))
            for column, (field, label) in zip(columns, _FIELDS):
                column.text_input(label, key=_override_key(index, field, held.name))


def _figure_png(result, candidate):
    from ..figures import render_knot_figure

    buffer = io.BytesIO()
    render_knot_figure(result, candidate).savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()


def nature_panel(state, scene, z_source):
    """The tab's content."""
    from ..nature import CAUTIONS

    st.caption("Forced aperture photometry of the marked knots in every filter at the same sky "
               "position, a redshifted blackbody fit, and each model's delensed luminosity and "
               "radius compared with what one star can be.")
    _band_details(state, scene)
    if not st.checkbox("Measure the knots in every filter", value=False, key="lv_nature_on",
                       help="Forced photometry, the blackbody fit and the verdict are redone at "
                            "every change of the knots (about a second); switch on when needed."):
        st.info("Switch on \u2018Measure the knots in every filter\u2019 to see colours, "
                "temperatures and what each knot can be.")
        return
    images, errors = scene_filters(state, scene)
    for message in errors:
        st.error(message)
    if len(images) < 2:
        st.info("Load the field in at least two filters (upload more filters in the sidebar) "
                "to measure colours and a temperature.")
        return
    st.caption("Filters: " + ", ".join(
        f"{i.band.name} ({i.band.pivot.value:g} micron)" for i in images))
    left, middle, right = st.columns(3)
    law = left.selectbox("Dust in the knot's rest frame", DUST_CHOICES, key="lv_nature_dust")
    a_v = middle.number_input("A_V (mag)", 0.0, 10.0, 0.0, 0.05, key="lv_nature_av",
                              disabled=law == NO_DUST)
    radius = right.number_input("Aperture radius (arcsec, 0 = 1.5 PSF FWHM)", 0.0, 5.0, 0.0,
                                0.01, key="lv_nature_radius")
    marks = page_state.candidates(state)
    if not marks:
        st.info("Mark knots on the picture to measure them here.")
        return
    positions = tuple((float(m["ra"]), float(m["dec"])) for m in marks)
    labels = tuple(str(m["label"]) for m in marks)
    dust = None if law == NO_DUST or a_v == 0 else (law, float(a_v))
    band_key = tuple((i.band.name, i.band.pivot.value, i.band.zero_point,
                      None if i.band.psf_fwhm is None else i.band.psf_fwhm.value) for i in images)
    try:
        with st.spinner("Measuring the knots in every filter..."):
            result = _cached_nature(scene.key, positions, labels, float(z_source), dust,
                                    float(radius) if radius > 0 else None, band_key,
                                    _images=images, _fields=scene.fields)
    except LensviewInputError as error:
        st.error(str(error))
        return
    summary = result.summary
    shown = summary["label", "temperature", "temperature_err", "luminosity_min",
                    "luminosity_max", "radius_min", "radius_max", "source_radius_pc",
                    "source_radius_kind", "verdict", "note"]
    st.dataframe(_plain(shown), hide_index=True, key="lv_nature_table")
    for row in summary:
        st.markdown(f"**{row['label']}**: {row['verdict']}")
    with st.expander("Colours (AB, blue minus red)"):
        st.dataframe(_plain(result.colours), hide_index=True)
    with st.expander("Per model"):
        st.dataframe(_plain(result.per_model), hide_index=True)
    with st.expander("Limits used"):
        for line in summary.meta["limits"]:
            st.markdown(f"- {line}")
    st.warning("Cautions: " + " ".join(CAUTIONS))
    chosen = st.selectbox("Figure of knot", list(labels), key="lv_nature_knot")
    st.image(_figure_png(result, list(labels).index(chosen)),
             caption=f"Knot {chosen}: measured fluxes with the fitted blackbody, and the "
                     "delensed luminosity of each model against single-star limits.")


def _plain(table):
    """A table as a dict of plain columns (numbers rounded for reading)."""
    out = {}
    for name in table.colnames:
        column = np.asarray(table[name])
        if column.dtype.kind == "f":
            column = np.array([float(f"{v:.4g}") if np.isfinite(v) else np.nan for v in column])
        out[name] = column.tolist()
    return out
