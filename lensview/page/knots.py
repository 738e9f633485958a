"""Main panel "Knots and measurements": the marked knots, each model's numbers, the spread."""

import numpy as np
import pandas as pd
import streamlit as st

from ..errors import LensviewInputError
from . import state as page_state

__all__ = ["knot_list", "measurement_panel", "CAUTION"]

CAUTION = (
    "**Magnifications near critical curves are model estimates, not measurements.** "
    "Close to a curve |\u03bc| grows as 1/d with the distance d, so models that place the curve a "
    "little differently give very different magnifications for the same knot. Read the spread "
    "across models below rather than any single number.")

_MEASURE_COLUMNS = (
    ("label", "knot", None),
    ("model", "model", None),
    ("curve_kind", "nearest curve", None),
    ("inside_or_outside", "inside or outside the curve", None),
    ("offset_arcsec", "offset (arcsec)", "{:.4f}"),
    ("offset_pc", "offset (pc)", "{:.1f}"),
    ("offset_ly", "offset (ly)", "{:.0f}"),
    ("curve_floor_arcsec", "curve floor (arcsec)", "{:.1e}"),
    ("mu", "\u03bc (signed)", "{:.2f}"),
    ("parity", "parity", "{:+d}"),
    ("fold_mu", "|\u03bc| fold law", "{:.2f}"),
    ("caustic_offset_pc", "source offset to caustic (pc)", "{:.1f}"),
    ("reason", "note", None),
)
_SPREAD_COLUMNS = (
    ("label", "knot", None),
    ("n_models", "models", "{:d}"),
    ("offset_arcsec_min", "offset min (arcsec)", "{:.4f}"),
    ("offset_arcsec_median", "offset median (arcsec)", "{:.4f}"),
    ("offset_arcsec_max", "offset max (arcsec)", "{:.4f}"),
    ("abs_mu_min", "|\u03bc| min", "{:.2f}"),
    ("abs_mu_median", "|\u03bc| median", "{:.2f}"),
    ("abs_mu_max", "|\u03bc| max", "{:.2f}"),
    ("parity_agrees", "same parity in all models", None),
)


def formatted(table, columns):
    """A table as strings for display: the chosen columns, renamed and rounded."""
    frame = {}
    for name, title, fmt in columns:
        if name not in table.colnames:
            continue
        values = np.asarray(table[name])
        if fmt is None:
            frame[title] = [str(v) for v in values]
        else:
            frame[title] = ["\u2013" if _missing(v) else fmt.format(_plain(v)) for v in values]
    return pd.DataFrame(frame)


def _missing(value):
    return isinstance(value, (float, np.floating)) and not np.isfinite(value)


def _plain(value):
    if isinstance(value, (np.integer, bool, np.bool_)):
        return int(value)
    return float(value) if isinstance(value, np.floating) else value


def knot_list(state):
    """The knots as an editable list: relabel in place, tick to remove."""
    marks = page_state.candidates(state)
    st.markdown(f"**Marked knots ({len(marks)})**")
    if not marks:
        st.caption("No knot marked yet: click on the picture.")
        return
    frame = pd.DataFrame({
        "label": [m["label"] for m in marks],
        "RA (deg)": [f"{m['ra']:.7f}" for m in marks],
        "Dec (deg)": [f"{m['dec']:.7f}" for m in marks],
        "snapped": [bool(m["snapped"]) for m in marks],
        "remove": [False] * len(marks),
    })
    version = state.setdefault("lv_editor_version", 0)
    key = f"lv_knot_editor_{version}"
    st.data_editor(frame, key=key, hide_index=True, width="stretch",
                   disabled=["RA (deg)", "Dec (deg)", "snapped"], on_change=_apply_edits,
                   args=(state, key), column_config={
                       "label": st.column_config.TextColumn("label", required=True),
                       "remove": st.column_config.CheckboxColumn("remove")})
    error = state.pop("lv_editor_error", None)
    if error:
        st.error(error)
    st.button("Remove all knots", key="lv_clear_knots", on_click=page_state.remove_candidates,
              args=(state, range(len(marks))))


def _apply_edits(state, key):
    edits = state.get(key, {}).get("edited_rows", {})
    labels = page_state.candidate_labels(state)
    drop = []
    for row, change in edits.items():
        row = int(row)
        if "label" in change:
            labels[row] = change["label"]
        if change.get("remove"):
            drop.append(row)
    try:
        page_state.relabel_candidates(state, labels)
    except LensviewInputError as error:
        state["lv_editor_error"] = str(error)
    page_state.remove_candidates(state, drop)
    state["lv_editor_version"] = state.get("lv_editor_version", 0) + 1


def measurement_panel(results):
    """The measurement table per model and the spread across models."""
    st.warning(CAUTION)
    if results.table is None:
        st.caption("Mark knots on the picture to measure them against every model.")
        return
    st.markdown("**Per model**")
    st.table(formatted(results.table, _MEASURE_COLUMNS), border="horizontal", hide_index=True)
    st.markdown("**Spread across models**")
    st.table(formatted(results.spread, _SPREAD_COLUMNS), border="horizontal", hide_index=True)
    st.caption(
        "offset: distance to the nearest critical curve in the lens plane; \u03bc: signed "
        "magnification (negative: odd parity); fold law: |\u03bc| \u2248 A/d with the fold "
        "coefficient A at the nearest curve point; source offset: distance of the traced "
        "position to the nearest caustic in the source plane; curve floor: how precisely the "
        "model's stored maps (e.g. float32) fix that curve's position at all.")
