"""measure_ensemble: percentiles over model realisations."""

import numpy as np
import pytest

import lensview as lv
from lensview.cosmology import distance_ratio
from lensview.ensemble import measure_ensemble
from lensview.errors import LensviewInputError

from closed_form import grid, make_wcs

Z_LENS, Z_SOURCE = 0.4, 2.0


def sis_field(theta_unit, n=200):
    x, y = grid(n, n / 2, n / 2)
    r = np.hypot(x, y)
    with np.errstate(invalid="ignore", divide="ignore"):
        return lv.DeflectionField(theta_unit * x / r, theta_unit * y / r, make_wcs(n, n),
                                  units="pixel", z_lens=Z_LENS, name=f"sis {theta_unit}")


def test_percentiles_match_the_sis_distribution():
    thetas = np.linspace(40.0, 50.0, 11)
    f = distance_ratio(Z_LENS, Z_SOURCE)
    wcs = make_wcs(200, 200)
    radius = 45.0
    coords = wcs.pixel_to_world(np.array([100 + radius, 100.0]), np.array([100.0, 100 + 70.0]))
    # Callables: each realisation is built inside its own task.
    table = measure_ensemble(coords, [lambda t=t: sis_field(t) for t in thetas], Z_SOURCE,
                             labels=["near", "far"])
    assert list(table["n_realisations"]) == [11, 11]
    for row, r in zip(table, (radius, 70.0)):
        # SIS: mu = theta/(theta - theta_E) (Narayan & Bartelmann 1996); percentiles as numpy's.
        mu = np.abs(r / (r - thetas * f))
        assert row["abs_mu_p50"] == pytest.approx(np.percentile(mu, 50), rel=1e-3)
        assert row["abs_mu_p16"] == pytest.approx(np.percentile(mu, 16), rel=1e-3)
        assert row["abs_mu_p84"] == pytest.approx(np.percentile(mu, 84), rel=1e-3)
    # theta_E f spans 27.9..34.9 px (f ~ 0.7): both knots lie outside every curve.
    assert list(table["fraction_odd_parity"]) == [0.0, 0.0]


def test_parity_fraction_counts_realisations_on_each_side():
    f = distance_ratio(Z_LENS, Z_SOURCE)
    wcs = make_wcs(200, 200)
    coords = wcs.pixel_to_world(np.array([100 + 45.0 * f]), np.array([100.0]))
    thetas = [40.0, 42.0, 48.0, 50.0]  # two curves inside the knot, two outside
    table = measure_ensemble(coords, [sis_field(t) for t in thetas], Z_SOURCE, scheduler="synchronous")
    assert table["fraction_odd_parity"][0] == pytest.approx(0.5)


def test_no_realisation_is_an_error():
    with pytest.raises(LensviewInputError, match="at least one"):
        measure_ensemble(make_wcs(10, 10).pixel_to_world([1], [1]), [], Z_SOURCE)
