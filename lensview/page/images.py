"""Main panel "Counter-images and pairs": where else a knot appears, and which knots mirror."""

import numpy as np
import streamlit as st

from . import state as page_state
from .knots import formatted

__all__ = ["pairing_settings", "images_panel"]

_IMAGE_COLUMNS = (
    ("model", "model", None),
    ("image", "image", "{:d}"),
    ("is_input", "the knot itself", None),
    ("ra", "RA (deg)", "{:.7f}"),
    ("dec", "Dec (deg)", "{:.7f}"),
    ("mu", "\u03bc (signed)", "{:.2f}"),
    ("parity", "parity", "{:+d}"),
    ("mu_ratio", "flux relative to the knot", "{:.2f}"),
    ("separation_arcsec", "separation (arcsec)", "{:.3f}"),
    ("within_psf", "blended with the knot", None),
    ("arrival_order", "arrives", "{:d}"),
    ("time_delay_days", "delay after the first image (days)", "{:.2f}"),
)
_PAIR_COLUMNS = (
    ("knot_i", "knot", None),
    ("knot_j", "mirrored by", None),
    ("model", "model", None),
    ("score", "score (0 best, gate 9)", "{:.2f}"),
    ("source_sep_arcsec", "source-plane separation (arcsec)", "{:.3f}"),
    ("tolerance_arcsec", "tolerance (arcsec)", "{:.3f}"),
    ("separation_arcsec", "image separation (arcsec)", "{:.3f}"),
    ("midpoint_offset_arcsec", "midpoint to curve (arcsec)", "{:.3f}"),
    ("curve_between", "curve between", None),
    ("n_models", "models choosing it", "{:d}"),
    ("leading_knot", "seen first", None),
    ("time_delay_days", "delay (days)", "{:.2f}"),
)
_DELAY_NOTE = ("Delays come from the Fermat potential of each model (only differences of the "
               "lensing potential matter); they scale as 1/H0 and with the chosen cosmology. "
               "\u201carrives\u201d 1 is the first image to show a change of the source.")


def pairing_settings(state):
    """Resolution and source-plane tolerance, read before the analysis runs."""
    psf = float(state.get("lv_psf_fwhm", 0.0) or 0.0)
    tolerance = float(state.get("lv_tolerance", 0.0) or 0.0)
    return (psf if psf > 0 else None), (tolerance if tolerance > 0 else None)


def images_panel(state, results, models):
    labels = page_state.candidate_labels(state)
    left, middle, right = st.columns([1.4, 1, 1])
    if labels:
        if state.get("lv_focus") not in labels:
            state["lv_focus"] = results.focus or labels[-1]
        left.selectbox("Predict the counter-images of", labels, key="lv_focus")
    middle.number_input("PSF FWHM (arcsec, 0: not set)", 0.0, 5.0, 0.0, 0.01, key="lv_psf_fwhm",
                        help="PSF FWHM: knots whose predicted images lie closer than this merge "
                             "into one unresolved image on the curve (as `lensview pair "
                             "--psf-fwhm`).")
    right.number_input("Pairing tolerance (arcsec, 0: from the model spread)", 0.0, 10.0, 0.0,
                       0.01, key="lv_tolerance",
                       help="The largest source-plane separation of two traced knots that can "
                            "still be one source (as `lensview pair --tolerance`).")
    if not labels:
        st.caption("Mark knots on the picture to predict their counter-images and pairs.")
        return
    st.markdown(f"**Predicted images of the source of {results.focus}**")
    for images in results.counterimage_tables:
        verdict = images.meta.get("verdict")
        n = images.meta.get("n_images", len(images))
        line = f"{images.meta.get('model')}: {n} image(s) of the source"
        st.markdown(f"- {line}" + (f" \u2014 {verdict}" if verdict else ""))
    if results.counterimages is not None and len(results.counterimages):
        st.table(formatted(results.counterimages, _IMAGE_COLUMNS), border="horizontal",
                 hide_index=True)
        st.caption(_DELAY_NOTE)
    st.markdown("**Proposed mirrored pairs**")
    if results.pairs is None:
        st.caption("Pairs need at least two marked knots.")
        return
    if not len(results.pairs):
        st.caption("No pair passes the gate (opposite parity and a score of at most 9): no "
                   "two knots look like images of one source.")
        return
    choices = (["consensus"] if len(models) > 1 else []) + list(models)
    if state.get("lv_pairs_shown") not in choices:
        state["lv_pairs_shown"] = results.pairs_shown or choices[0]
    st.selectbox("Pairs drawn on the picture", choices, key="lv_pairs_shown",
                 help="The consensus holds the pairs chosen by most models.")
    if not results.links:
        st.caption(f"No pair of {state['lv_pairs_shown']} to draw.")
    pairs = results.pairs.copy()
    pairs["knot_i"] = [labels[int(i)] for i in pairs["i"]]
    pairs["knot_j"] = [labels[int(j)] for j in pairs["j"]]
    pairs["leading_knot"] = [labels[int(k)] if k >= 0 else "\u2013" for k in pairs["leading"]]
    st.table(formatted(pairs, _PAIR_COLUMNS), border="horizontal", hide_index=True)
    unpaired = results.pairs.meta.get("unpaired", {})
    alone = sorted({labels[k] for ks in unpaired.values() for k in ks
                    if all(k in v for v in unpaired.values())})
    if alone:
        st.caption("Left unpaired by every model: " + ", ".join(alone))
    st.caption("Score: 0 is a perfect match, lower is better; a chi-square-like sum of the "
               "source-plane separation of the traced positions over the tolerance, the "
               "midpoint's distance from the critical curve, and a penalty when no curve lies "
               "between the two images. The gate lets through only opposite-parity pairs "
               "scoring at most 9; consensus rows are pairs chosen by most models.")
    if np.any(~np.asarray(results.pairs["curve_between"], bool)):
        st.caption("Some pairs have no critical curve between them: treat those with care.")
