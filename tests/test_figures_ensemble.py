"""Histograms of one knot over the realisations."""

import numpy as np
import pytest
from astropy.table import Table

from lensview.errors import LensviewInputError
from lensview.figures import render_ensemble_histograms


def test_histograms_count_every_held_realisation_and_mark_the_models():
    rng = np.random.default_rng(5)
    n = 40
    samples = Table({"candidate": np.repeat([0, 1], n), "label": np.repeat(["A", "B"], n),
                     "abs_mu": np.concatenate([rng.lognormal(2, 1, n), np.full(n, np.nan)]),
                     "offset_arcsec": np.concatenate([rng.uniform(0.1, 1, n), np.full(n, np.nan)])})
    best = Table({"candidate": [0, 0], "label": ["A", "A"], "model": ["m1", "m2"],
                  "abs_mu": [7.0, 30.0], "offset_arcsec": [0.3, 0.5]})
    fig = render_ensemble_histograms(samples, "A", best=best)
    mu_axes, offset_axes = fig.axes
    assert mu_axes.get_xscale() == "log"
    assert sum(p.get_height() for p in mu_axes.patches) == n
    assert sum(p.get_height() for p in offset_axes.patches) == n
    marked = sorted(line.get_xdata()[0] for line in mu_axes.lines)
    assert marked == [7.0, 30.0]
    # A knot no realisation holds draws empty axes, not an error.
    assert len(render_ensemble_histograms(samples, 1).axes[0].patches) == 0
    with pytest.raises(LensviewInputError, match="no knot"):
        render_ensemble_histograms(samples, "C")
