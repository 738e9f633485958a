"""Matplotlib figures shared by the page and the command line.

`field` (the cutout with curves, knots, pairs and counter-images; the source
plane), `ensemble` (a knot's |mu| and offset over posterior realisations) and
`knots` (a knot's SED with its fitted blackbody and its luminosity across
models). Every drawing takes its colours and markers from `lensview.style`.
"""

from .ensemble import render_ensemble_histograms
from .field import (LENSVIEW_PALETTE, MU_OVERLAY_LEVELS, STRETCHES, display_norm, model_colours,
                    render_field_figure, render_source_plane_figure, save_figure)
from .knots import render_knot_figure, render_knot_figures

__all__ = ["LENSVIEW_PALETTE", "MU_OVERLAY_LEVELS", "STRETCHES", "display_norm", "model_colours",
           "render_ensemble_histograms", "render_field_figure", "render_knot_figure",
           "render_knot_figures", "render_source_plane_figure", "save_figure"]
