"""Histograms of one knot's measurements across the realisations of a lens model.

Shared by the page; the values come from `lensview.measure_ensemble` (its
per-realisation table) and, for the marks, from `lensview.measure_candidates`
on the loaded models.
"""

import numpy as np
from matplotlib.figure import Figure

from ..errors import LensviewInputError
from ..style import model_colours

__all__ = ["render_ensemble_histograms"]

_HISTOGRAM_COLOUR = "#6B7A8F"


def render_ensemble_histograms(samples, knot, *, best=None, bins=30):
    """|mu| (log axis) and offset of one knot over the realisations.

    Parameters
    ----------
    samples : `~astropy.table.Table`
        Per-realisation rows (``candidate``, ``label``, ``abs_mu``,
        ``offset_arcsec``), as `lensview.measure_ensemble` returns them
        with ``return_samples=True``.
    knot : str or int
        The knot's label or its ``candidate`` index.
    best : `~astropy.table.Table`, optional
        `lensview.measure_candidates` rows of the best models; each model's
        value for this knot is marked by a vertical line.
    bins : int

    Returns
    -------
    `~matplotlib.figure.Figure`
    """
    rows = _rows_of(samples, knot)
    abs_mu = np.asarray(rows["abs_mu"], float)
    offset = np.asarray(rows["offset_arcsec"], float)
    held = np.isfinite(abs_mu) & np.isfinite(offset)
    label = str(rows["label"][0]) if len(rows) else str(knot)
    fig = Figure(figsize=(9.0, 3.4), layout="constrained")
    mu_axes, offset_axes = fig.subplots(1, 2)
    marks = _rows_of(best, knot) if best is not None and len(best) else None
    colours = model_colours(list(marks["model"])) if marks is not None else {}
    positive = abs_mu[held & (abs_mu > 0)]
    if len(positive):
        span = positive
        if marks is not None:  # the axis reaches the marked values too
            shown = np.asarray(marks["abs_mu"], float)
            span = np.concatenate([positive, shown[np.isfinite(shown) & (shown > 0)]])
        edges = np.geomspace(span.min() / 1.05, span.max() * 1.05, bins + 1)
        mu_axes.hist(positive, bins=edges, color=_HISTOGRAM_COLOUR, alpha=0.85)
    mu_axes.set_xscale("log")
    mu_axes.set_xlabel("|\u03bc| (magnification)")
    mu_axes.set_ylabel("realisations")
    if held.any():
        offset_axes.hist(offset[held], bins=bins, color=_HISTOGRAM_COLOUR, alpha=0.85)
    offset_axes.set_xlabel("offset from the nearest critical curve (arcsec)")
    if marks is not None:
        for row in marks:
            colour = colours[row["model"]]
            for axes, name in ((mu_axes, "abs_mu"), (offset_axes, "offset_arcsec")):
                value = float(row[name])
                if np.isfinite(value) and (name != "abs_mu" or value > 0):
                    axes.axvline(value, color=colour, lw=1.8, ls="--", label=str(row["model"]))
        if len(marks):
            mu_axes.legend(title="loaded models", fontsize="small", title_fontsize="small",
                           frameon=False)
    fig.suptitle(f"knot {label}: {int(held.sum())} of {len(rows)} realisations hold it",
                 fontsize="medium")
    return fig


def _rows_of(table, knot):
    if isinstance(knot, (int, np.integer)):
        mine = np.asarray(table["candidate"]) == knot
    else:
        mine = np.asarray(table["label"]).astype(str) == str(knot)
    if not mine.any():
        raise LensviewInputError(f"There is no knot {knot!r} in the table; pick one of its knots.")
    return table[mine]
