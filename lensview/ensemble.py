"""Many realisations of one lens model, measured in parallel on dask.

Lens modellers often publish a set of deflection maps drawn from their
posterior, not just a best fit. `measure_ensemble` measures every candidate
on every realisation (each realisation is one dask task; numpy releases the
GIL, so the threaded scheduler keeps both cores busy) and summarises the
distribution per candidate with percentiles, which is the honest way to quote
magnifications near critical curves.
"""

import dask
import numpy as np
import astropy.units as u
from astropy.table import Table

from .errors import LensviewInputError
from .measure import measure_candidates

__all__ = ["measure_ensemble", "DEFAULT_PERCENTILES"]

#: Median and the central 68 % interval.
DEFAULT_PERCENTILES = (16.0, 50.0, 84.0)

_SUMMARISED = ("offset_arcsec", "abs_mu", "caustic_offset_pc")


def _load(realisation):
    return realisation() if callable(realisation) else realisation


def _measure(realisation, coords, z_source, cosmology, labels):
    field = _load(realisation)
    table = measure_candidates(coords, field, z_source, cosmology=cosmology, labels=labels)
    return {name: np.asarray(table[name], float) for name in _SUMMARISED} | {
        "parity": np.asarray(table["parity"], int)}


def measure_ensemble(coords, realisations, z_source, *, cosmology=None, labels=None,
                     percentiles=DEFAULT_PERCENTILES, scheduler="threads"):
    """Measure candidates on many realisations of a lens model.

    Parameters
    ----------
    coords : `~astropy.coordinates.SkyCoord`
        Candidate positions.
    realisations : sequence
        `~lensview.DeflectionField` objects, or callables that return one
        (e.g. a loader of the i-th pair of FITS files), so that maps are read
        inside the parallel task and need not all sit in memory.
    z_source : float
    cosmology : `~astropy.cosmology.Cosmology`, optional
    labels : sequence of str, optional
    percentiles : sequence of float
        Percentiles reported for each summarised quantity.
    scheduler : str
        dask scheduler ("threads", "processes" or "synchronous").

    Returns
    -------
    `~astropy.table.Table`
        One row per candidate with ``candidate``, ``label``, ``n_realisations``
        (finite measurements), ``offset_arcsec_pXX``, ``abs_mu_pXX``,
        ``caustic_offset_pc_pXX`` for each percentile, and
        ``fraction_odd_parity`` (share of realisations putting the candidate
        on the negative-parity side of its curve).
    """
    realisations = list(realisations)
    if not realisations:
        raise LensviewInputError("No model realisations were given; supply at least one.")
    tasks = [dask.delayed(_measure)(r, coords, z_source, cosmology, labels) for r in realisations]
    results = dask.compute(*tasks, scheduler=scheduler)
    n = len(results[0]["abs_mu"])
    table = Table()
    table["candidate"] = np.arange(n)
    table["label"] = labels if labels is not None else [f"K{i + 1}" for i in range(n)]
    stacked = {name: np.vstack([r[name] for r in results]) for name in _SUMMARISED}
    finite = np.isfinite(stacked["abs_mu"])
    table["n_realisations"] = finite.sum(axis=0)
    units = {"offset_arcsec": u.arcsec, "caustic_offset_pc": u.pc, "abs_mu": None}
    for name, values in stacked.items():
        with np.errstate(invalid="ignore"):
            levels = np.nanpercentile(values, percentiles, axis=0) if finite.any() else \
                np.full((len(percentiles), n), np.nan)
        for p, level in zip(percentiles, levels):
            column = f"{name}_p{p:g}"
            table[column] = level
            if units[name] is not None:
                table[column].unit = units[name]
    parity = np.vstack([r["parity"] for r in results])
    with np.errstate(invalid="ignore", divide="ignore"):
        table["fraction_odd_parity"] = (parity == -1).sum(axis=0) / np.maximum(finite.sum(axis=0), 1)
    table.meta.update(z_source=float(z_source), n_realisations=len(realisations),
                      percentiles=list(percentiles))
    return table
