"""Measurements of marked candidates against one or more lens models.

For every (candidate, model) pair: the exact distance to the nearest critical
curve in a local tangent plane and its physical size in the lens plane, the
signed magnification and parity from the locally interpolated det A, the
tangential and radial eigenvalues, the fold-law coefficient, the ray-traced
source position and its distance to the nearest caustic.

Fold law (Blandford & Narayan 1986; Schneider, Ehlers & Falco 1992, ch. 6):
near a fold, det A grows linearly with the distance d from the critical
curve, so |mu| ~ A / d with A = 1 / |grad det A| at the nearest curve point.
On a tangential curve grad det A = lambda_r grad lambda_t, which makes this
the design notes' A = 1 / (|lambda_r| |grad lambda_t|).
"""

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table

from . import cosmology as _cosmo
from .errors import LensviewInputError
from .lens.curves import refine_onto_critical
from .geometry import (TangentPlane, mean_direction, nearest_on_polylines, plane_xy,
                       point_in_polygon)

__all__ = ["measure_candidates", "summarize_models"]

_REASON_OUTSIDE = "outside the model footprint"
_REASON_NO_CURVE = "the model has no critical curve at this source redshift"
_REASON_CUT = ("the nearest critical curve ends here, cut by the map edge or masked cells: "
               "the true curve may run closer, so the offset is an upper limit")


def measure_candidates(coords, fields, z_source, *, cosmology=None, labels=None):
    """Measure candidates against each lens model.

    Parameters
    ----------
    coords : `~astropy.coordinates.SkyCoord`
        Candidate positions (a scalar or an array).
    fields : `~lensview.DeflectionField` or list of them
        Lens models; each is rescaled to ``z_source``.
    z_source : float
        Source redshift.
    cosmology : `~astropy.cosmology.Cosmology`, optional
        For physical scales; defaults to each model's own cosmology.
    labels : sequence of str, optional
        Candidate labels (default "K1", "K2", ...).

    Returns
    -------
    `~astropy.table.Table`
        One row per (candidate, model), with columns ``candidate`` (0-based
        index into ``coords``), ``label``, ``model``, ``ra``, ``dec``,
        ``curve_kind``, ``curve_id``, ``offset_arcsec``, ``offset_pc``,
        ``offset_ly``, ``curve_ra``, ``curve_dec`` (nearest curve point),
        ``curve_floor_arcsec`` (the positional uncertainty the model map's own
        storage precision leaves on that curve, `Curve.position_floor`),
        ``inside_or_outside`` ("inside"/"outside" of the nearest closed
        curve, "" otherwise), ``mu``, ``parity``,
        ``kappa``, ``gamma``, ``lambda_t``, ``lambda_r``,
        ``fold_coefficient_arcsec``, ``fold_mu``, ``source_ra``,
        ``source_dec``, ``caustic_offset_arcsec``, ``caustic_offset_pc`` and
        ``reason`` (why a row holds NaN or an offset is only an upper limit,
        empty otherwise).
    """
    coords = SkyCoord(coords).icrs
    coords = coords.reshape(-1) if coords.shape else coords.reshape((1,))
    if not isinstance(fields, (list, tuple)):
        fields = [fields]
    if not fields:
        raise LensviewInputError("No lens model was given; supply at least one DeflectionField.")
    labels = _labels(labels, len(coords))
    rows = [_measure_one_model(coords, field, z_source, cosmology, labels) for field in fields]
    table = _stack(rows)
    table.meta.update(
        z_source=float(z_source),
        models=[f.name for f in fields],
        z_lens={f.name: f.z_lens for f in fields},
        cosmology=_cosmology_record(fields, cosmology),
    )
    return table


def _cosmology_record(fields, cosmology):
    """The cosmology used: one name, or one per model when the models differ."""
    used = {f.name: _cosmo.resolve_cosmology(cosmology or f.cosmology) for f in fields}
    distinct = {repr(c) for c in used.values()}
    if len(distinct) == 1:
        return next(iter(used.values())).name
    return {name: c.name or repr(c) for name, c in used.items()}


def _labels(labels, n):
    if labels is None:
        return [f"K{i + 1}" for i in range(n)]
    labels = [str(label) for label in labels]
    if len(labels) != n:
        raise LensviewInputError(
            f"{len(labels)} labels were given for {n} candidates; give one label per candidate."
        )
    return labels


def _measure_one_model(coords, field, z_source, cosmology, labels):
    cosmo = _cosmo.resolve_cosmology(cosmology or field.cosmology)
    f = field.scaling_factor(z_source)
    n = len(coords)
    local = field.lens_quantities(coords, z_source, warn=False)
    det_a, mu, source = local["det_a"], local["mu"], local["source"]
    defined = np.isfinite(det_a)

    curves = field.critical_curves(z_source)
    caustics = field.caustics(z_source)
    centre = mean_direction(coords)
    plane = TangentPlane(centre)
    offset = np.full(n, np.nan)
    caustic_offset = np.full(n, np.nan)
    kind = np.full(n, "", dtype="<U10")
    side = np.full(n, "", dtype="<U7")
    curve_id = np.full(n, -1, dtype=int)
    foot = np.full((n, 2), np.nan)
    fold = np.full(n, np.nan)
    curve_floor = np.full(n, np.nan)
    cut_short = np.zeros(n, dtype=bool)
    if len(curves):
        points = plane_xy(plane, coords)
        polylines = [plane_xy(plane, c.sky) for c in curves]
        closed = [c.closed for c in curves]
        nearest = nearest_on_polylines(points, polylines, closed)
        offset = np.asarray(nearest.distance, float)
        curve_id = np.where(np.isfinite(offset), nearest.polyline_index, -1).astype(int)
        foot = np.asarray(nearest.foot_xy, float)
        for k, curve in enumerate(curves):
            mine = curve_id == k
            if not mine.any():
                continue
            kind[mine] = curve.kind
            curve_floor[mine] = curve.position_floor.to_value(u.arcsec)
            if curve.closed:
                inside = point_in_polygon(points[mine], polylines[k])
                side[mine] = np.where(inside, "inside", "outside")
            else:
                last = len(polylines[k]) - 2
                at_end = mine & (((nearest.segment_index == 0) & (nearest.t <= 0))
                                 | ((nearest.segment_index == last) & (nearest.t >= 1)))
                cut_short[at_end] = True
        foot = _refine_feet(field, plane, foot, f)
        offset = np.hypot(*(points - foot).T)
        fold = _fold_coefficient(field, plane, foot, f)
        source_points = plane_xy(plane, source)
        caustic_lines = [plane_xy(plane, c.sky) for c in caustics]
        caustic_offset = np.asarray(
            nearest_on_polylines(source_points, caustic_lines, [c.closed for c in caustics]).distance,
            float)
    offset = np.where(defined, offset, np.nan)
    curve_floor = np.where(defined, curve_floor, np.nan)
    caustic_offset = np.where(defined, caustic_offset, np.nan)
    foot = np.where(defined[:, None], foot, np.nan)
    kind = np.where(defined, kind, "")
    side = np.where(defined, side, "")
    curve_id = np.where(defined, curve_id, -1)
    foot_sky = plane.to_sky(foot[:, 0] * u.arcsec, foot[:, 1] * u.arcsec)

    lens_scale = _cosmo.angular_scale(field.z_lens, cosmo).to(u.pc / u.arcsec)
    source_scale = _cosmo.angular_scale(z_source, cosmo).to(u.pc / u.arcsec)
    offset_pc = offset * lens_scale.value
    reason = np.where(~defined, _REASON_OUTSIDE,
                      np.where(len(curves) == 0, _REASON_NO_CURVE,
                               np.where(cut_short, _REASON_CUT, "")))
    with np.errstate(divide="ignore", invalid="ignore"):
        fold_mu = fold / offset
    parity = np.where(defined, np.sign(det_a), 0).astype(int)

    table = Table()
    table["candidate"] = np.arange(n)
    table["label"] = labels
    table["model"] = [field.name] * n
    table["ra"] = coords.ra.deg * u.deg
    table["dec"] = coords.dec.deg * u.deg
    table["curve_kind"] = kind
    table["curve_id"] = curve_id
    table["offset_arcsec"] = offset * u.arcsec
    table["offset_pc"] = offset_pc * u.pc
    table["offset_ly"] = (offset_pc * u.pc).to(u.lyr)
    table["curve_ra"] = foot_sky.ra.deg * u.deg
    table["curve_dec"] = foot_sky.dec.deg * u.deg
    table["curve_floor_arcsec"] = curve_floor * u.arcsec
    table["inside_or_outside"] = side
    table["mu"] = mu
    table["abs_mu"] = np.abs(mu)
    table["parity"] = parity
    for name in ("kappa", "gamma", "lambda_t", "lambda_r"):
        table[name] = local[name]
    table["fold_coefficient_arcsec"] = fold * u.arcsec
    table["fold_mu"] = fold_mu
    table["source_ra"] = source.ra.deg * u.deg
    table["source_dec"] = source.dec.deg * u.deg
    table["caustic_offset_arcsec"] = caustic_offset * u.arcsec
    table["caustic_offset_pc"] = caustic_offset * source_scale.value * u.pc
    table["reason"] = reason.astype(str)
    for name in ("ra", "dec", "curve_ra", "curve_dec", "source_ra", "source_dec"):
        table[name].info.format = ".7f"
    return table


def _refine_feet(field, plane, foot, f, steps=3):
    """Move the nearest polyline points onto the smooth critical curve.

    The polyline's chords sag inside the true curve by up to L^2 / 8R (about
    1e-4 arcsec for typical vertex spacings); Newton steps on det A along its
    gradient, in map pixels, put each foot back onto the curve. Its position
    along the curve is already right to first order, so the distance then
    errs only by (tangential error)^2 / 2d.
    """
    good = np.isfinite(foot).all(axis=1)
    if not good.any():
        return foot
    sky = plane.to_sky(foot[good, 0] * u.arcsec, foot[good, 1] * u.arcsec)
    x0, y0 = field.sky_to_pixels(sky)
    fx, fy = refine_onto_critical(field, np.column_stack([x0, y0]), f, steps).T
    # Keep the polyline foot where the smooth refinement is not trustworthy.
    trusted = np.isfinite(fx) & np.isfinite(fy) & (np.hypot(fx - x0, fy - y0) < 0.5)
    moved = plane_xy(plane, field.pixels_to_sky(np.where(trusted, fx, x0), np.where(trusted, fy, y0)))
    refined = foot.copy()
    refined[good] = np.where(trusted[:, None], moved, foot[good])
    return refined


def _fold_coefficient(field, plane, foot, f):
    """A = 1/|grad det A| (arcsec) at the nearest curve points."""
    good = np.isfinite(foot).all(axis=1)
    fold = np.full(len(foot), np.nan)
    if not good.any():
        return fold
    foot_sky = plane.to_sky(foot[good, 0] * u.arcsec, foot[good, 1] * u.arcsec)
    x, y = field.sky_to_pixels(foot_sky)
    terms = field.local_terms(x, y, second_derivatives=True, warn=False)
    gx, gy = terms.grad_det_a(f)
    # theta (arcsec) = M p, so grad_theta = M^-T grad_p for any pixel grid, skewed or not.
    inverse = np.linalg.inv(field.wcs.pixel_scale_matrix * 3600.0)
    ex = inverse[0, 0] * gx + inverse[1, 0] * gy
    ey = inverse[0, 1] * gx + inverse[1, 1] * gy
    fold[good] = 1.0 / np.hypot(ex, ey)
    return fold


def _stack(tables):
    from astropy.table import vstack

    return vstack(tables, metadata_conflicts="silent") if len(tables) > 1 else tables[0]


def summarize_models(table):
    """Spread across models for each candidate.

    Parameters
    ----------
    table : `~astropy.table.Table`
        Output of `measure_candidates`.

    Returns
    -------
    `~astropy.table.Table`
        One row per candidate: ``candidate``, ``label``, ``n_models`` (models
        with a finite measurement), min/median/max of ``offset_arcsec`` and of
        ``abs_mu``, ``parity_agrees`` (every model gives the same parity) and
        ``parity`` (the common parity, 0 when models disagree).
    """
    out = Table()
    candidates = np.unique(np.asarray(table["candidate"]))
    out["candidate"] = candidates
    labels, n_models, parity_agrees, parity = [], [], [], []
    stats = {key: [] for key in ("offset_min", "offset_median", "offset_max",
                                 "abs_mu_min", "abs_mu_median", "abs_mu_max")}
    for c in candidates:
        rows = table[np.asarray(table["candidate"]) == c]
        labels.append(rows["label"][0])
        offsets = np.asarray(rows["offset_arcsec"], float)
        mus = np.asarray(rows["abs_mu"], float)
        ok = np.isfinite(offsets) & np.isfinite(mus)
        n_models.append(int(ok.sum()))
        for prefix, values in (("offset", offsets[ok]), ("abs_mu", mus[ok])):
            for stat, func in (("min", np.min), ("median", np.median), ("max", np.max)):
                stats[f"{prefix}_{stat}"].append(func(values) if len(values) else np.nan)
        parities = np.asarray(rows["parity"])[ok]
        agree = len(parities) > 0 and bool(np.all(parities == parities[0]))
        parity_agrees.append(agree)
        parity.append(int(parities[0]) if agree else 0)
    out["label"] = labels
    out["n_models"] = n_models
    for key, values in stats.items():
        name = key.replace("offset_", "offset_arcsec_") if key.startswith("offset") else key
        out[name] = values
        if key.startswith("offset"):
            out[name].unit = u.arcsec
    out["parity_agrees"] = parity_agrees
    out["parity"] = parity
    out.meta.update(table.meta)
    return out
