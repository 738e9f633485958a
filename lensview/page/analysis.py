"""The numbers behind the page, all from library calls, gathered once per rerun.

Curves come from each `~lensview.DeflectionField` (which caches them per
source redshift on top of its cached derivative terms), measurements from
`lensview.measure_candidates` and `lensview.summarize_models`, pairs from
`lensview.pair_counterparts` and counter-images from
`lensview.predict_counterimages`. Counter-images are cached per knot, model
and redshift, so a click elsewhere does not solve them again.
"""

from dataclasses import dataclass, field as dataclass_field

import astropy.units as u
import numpy as np
import streamlit as st
from astropy.table import vstack

from ..errors import LensviewInputError
from . import state as page_state

__all__ = ["Results", "analyse"]


@dataclass
class Results:
    """What one rerun computed.

    Attributes
    ----------
    curves : list of `~lensview.Curve`
        Critical curves of every model.
    table, spread, pairs, counterimages : `~astropy.table.Table` or None
        Per model and across models; counter-images of all models stacked.
    counterimage_tables : list of `~astropy.table.Table`
        Counter-images per model, with each model's verdict in ``meta``.
    links : list of (i, j)
        Knot pairs to draw: those of ``pairs_shown`` (a model name or
        "consensus", the default with several models).
    focus : str or None
        Label of the knot whose counter-images were predicted.
    errors : list of str
    """

    curves: list = dataclass_field(default_factory=list)
    table: object = None
    spread: object = None
    pairs: object = None
    counterimages: object = None
    counterimage_tables: list = dataclass_field(default_factory=list)
    links: list = dataclass_field(default_factory=list)
    pairs_shown: str = None
    focus: str = None
    errors: list = dataclass_field(default_factory=list)


@st.cache_resource(max_entries=256, show_spinner=False)
def _counterimages(scene_key, model_index, z_source, ra, dec, psf_fwhm, _field):
    from ..counterparts import predict_counterimages
    from astropy.coordinates import SkyCoord

    fwhm = psf_fwhm * u.arcsec if psf_fwhm else None
    images = predict_counterimages(SkyCoord(ra * u.deg, dec * u.deg), _field, z_source,
                                   psf_fwhm=fwhm)
    images["model"] = _field.name
    return images


def analyse(state, scene, z_source, *, psf_fwhm=None, tolerance=None):
    """Curves, measurements, pairs and counter-images for the current knots.

    Every `LensviewInputError` (e.g. a source redshift at or below the lens)
    is collected in ``errors`` instead of stopping the page.
    """
    from ..measure import measure_candidates, summarize_models

    results = Results()
    try:
        with st.spinner("Tracing critical curves..."):
            for field in scene.fields:
                results.curves.extend(field.critical_curves(z_source))
    except LensviewInputError as error:
        results.errors.append(str(error))
        return results
    marks = page_state.candidates(state)
    if not marks:
        return results
    coords = page_state.candidate_coords(state)
    labels = page_state.candidate_labels(state)
    try:
        results.table = measure_candidates(coords, scene.fields, z_source,
                                           cosmology=scene.cosmology, labels=labels)
        results.spread = summarize_models(results.table)
    except LensviewInputError as error:
        results.errors.append(str(error))
    if len(marks) >= 2:
        try:
            from ..counterparts import pair_counterparts

            tol = tolerance * u.arcsec if tolerance else None
            fwhm = psf_fwhm * u.arcsec if psf_fwhm else None
            results.pairs = pair_counterparts(coords, scene.fields, z_source, tolerance=tol,
                                              psf_fwhm=fwhm)
            shown = state.get("lv_pairs_shown")
            names = [f.name for f in scene.fields]
            if shown not in names and shown != "consensus":
                shown = "consensus" if len(names) > 1 else names[0]
            results.pairs_shown = shown
            rows = results.pairs[np.asarray(results.pairs["model"]) == shown]
            results.links = [(int(i), int(j)) for i, j in zip(rows["i"], rows["j"])]
        except LensviewInputError as error:
            results.errors.append(str(error))
    focus = state.get("lv_focus")
    if focus not in labels:
        focus = labels[-1]
    results.focus = focus
    mark = marks[labels.index(focus)]
    tables = []
    for k, field in enumerate(scene.fields):
        try:
            tables.append(_counterimages(scene.key, k, float(z_source), mark["ra"], mark["dec"],
                                         psf_fwhm, field))
        except LensviewInputError as error:
            results.errors.append(f"Counter-images of {focus} in model {field.name!r}: {error}")
    results.counterimage_tables = tables
    if tables:
        results.counterimages = vstack(tables, metadata_conflicts="silent") if len(tables) > 1 \
            else tables[0]
    return results
