"""Mirrored pairs among marked knots.

Candidate pairs are scored by a chi-square-like sum of normalised terms
(see `pair_counterparts`) and a one-to-one set is chosen with
`scipy.optimize.linear_sum_assignment`, per model and as a consensus.
"""

import warnings

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table
from scipy.optimize import linear_sum_assignment

from ..checks import positive_angle
from ..errors import LensviewInputError
from ..geometry import nearest_on_polylines
from ..lens.timedelay import pair_time_delay


#: Default source-plane tolerance for pairing.
DEFAULT_TOLERANCE = 0.1 * u.arcsec
#: Default gate on the pair score.
DEFAULT_MAX_SCORE = 9.0
#: Scale of the midpoint-to-curve distance, as a fraction of the pair separation.
CURVE_FRACTION = 0.25
#: Added to the score when no critical curve crosses the segment between the pair.
CROSSING_PENALTY = 4.0
#: Scatter (natural log) of a model's magnification ratio, for the flux term.
MAGNIFICATION_RATIO_SCATTER = 0.5
_GATED = 1e12


def pair_counterparts(coords, field_or_fields, z_source, *, tolerance=None, fluxes=None,
                      flux_errors=None, psf_fwhm=None, max_score=DEFAULT_MAX_SCORE):
    """Propose mirrored pairs among marked knots, per model and as a consensus.

    Every pair (i, j) of knots of opposite parity is scored, for one model, by
    a chi-square-like sum of normalised terms::

        score = (d_src / tol)**2                       source-plane separation
              + (d_mid / s_curve)**2                   midpoint off the critical curve
              + CROSSING_PENALTY * [no curve crosses the segment i-j]
              + (ln(F_i/F_j / |mu_i/mu_j|) / s_flux)**2    only with fluxes

    with ``d_src`` the separation of the two traced positions, ``d_mid`` the
    distance from the midpoint of the segment i-j to the nearest critical
    curve, ``s_curve = hypot(CURVE_FRACTION * separation, s_pos)`` where
    ``s_pos`` is the PSF FWHM when given, else the base tolerance (the images
    of a fold pair straddle the curve with their midpoint on it: Blandford &
    Narayan 1986), and ``s_flux = hypot(sigma_F_i/F_i, sigma_F_j/F_j,
    MAGNIFICATION_RATIO_SCATTER)``. Same-parity pairs, pairs with a knot
    outside the model and pairs scoring above ``max_score`` are gated out.
    Since every pair then joins an even-parity knot to an odd-parity one, the
    one-to-one set is a bipartite assignment, solved exactly with
    `scipy.optimize.linear_sum_assignment`: it minimises the summed score of
    the chosen pairs plus ``max_score`` for every even-parity knot left
    alone, so any pair under the gate is preferred to none and, among
    competing pairs, the set with the lowest total wins.

    With several models, pairs chosen by a strict majority of the models are
    reported again with ``model`` "consensus", their numbers the medians over
    the models that chose them (``score``: the median over all models).

    Parameters
    ----------
    coords : `~astropy.coordinates.SkyCoord`
        Positions of the marked knots (at least two).
    field_or_fields : `~lensview.DeflectionField` or list of them
    z_source : float
        Source redshift.
    tolerance : `~astropy.units.Quantity`, optional
        Source-plane tolerance (angle). By default 0.1 arcsec combined in
        quadrature with the model spread of the two traced positions (the rms
        scatter of each knot's traced position across the models, after
        removing the overall shift between the models' source planes, which
        no image position constrains).
    fluxes, flux_errors : array_like or `~astropy.units.Quantity`, optional
        Fluxes of the knots (any one unit) and their uncertainties.
    psf_fwhm : `~astropy.units.Quantity`, optional
        Resolution (angle): sets the positional scale of the curve term and
        fills the ``resolved`` column.
    max_score : float
        Gate on the score.

    Returns
    -------
    `~astropy.table.Table`
        One row per proposed pair, with ``i``, ``j`` (0-based positions in
        ``coords``, i < j), ``model``, ``score``, ``source_term``,
        ``curve_term``, ``flux_term``, ``source_sep_arcsec``,
        ``tolerance_arcsec``, ``separation_arcsec`` (image plane),
        ``midpoint_offset_arcsec``, ``curve_kind`` (of the nearest curve),
        ``curve_between``, ``parity_i``, ``parity_j``, ``mu_i``, ``mu_j``,
        ``n_models`` (how many models chose the pair), ``time_delay_days``
        (t_j - t_i: positive when knot i leads; the two knots taken as images
        of one source at the mean of their traced positions; see
        `lensview.lens.timedelay`, delays scale as 1/H0), ``leading`` (the knot
        seen first, i or j; -1 if unknown) and, with fluxes,
        ``flux_ratio`` (F_i/F_j) and ``expected_ratio`` (|mu_i/mu_j|); with
        a PSF, ``resolved``. ``meta`` holds ``z_source``, ``models``,
        ``max_score`` and ``unpaired`` (model name -> knots left alone).
    """
    coords = _coord_array(coords)
    n = len(coords)
    fields = list(field_or_fields) if isinstance(field_or_fields, (list, tuple)) \
        else [field_or_fields]
    if not fields:
        raise LensviewInputError(
            "No lens model was given; pass a DeflectionField or a list of them.")
    names = [fld.name for fld in fields]
    if len(set(names)) != len(names) or "consensus" in names:
        raise LensviewInputError(
            f"Model names {names} must be distinct and not 'consensus'; give each "
            "DeflectionField its own name.")
    base = DEFAULT_TOLERANCE if tolerance is None else positive_angle(tolerance, "tolerance")
    fwhm = positive_angle(psf_fwhm, "psf_fwhm", allow_none=True)
    flux, flux_error = _fluxes(fluxes, flux_errors, n)
    try:
        max_score = float(max_score)
    except (TypeError, ValueError):
        max_score = np.nan
    if not np.isfinite(max_score) or max_score <= 0:
        raise LensviewInputError(
            f"max_score must be a positive number, got {max_score!r}; the default is "
            f"{DEFAULT_MAX_SCORE}.")

    models = [_model_view(coords, fld, z_source) for fld in fields]
    base_arcsec = base.to_value(u.arcsec)
    if tolerance is None:
        spread = _source_spread(models)
        tol = np.sqrt(base_arcsec**2 + spread[:, None]**2 + spread[None, :]**2)
    else:
        tol = np.full((n, n), base_arcsec)
    position_scale = fwhm.to_value(u.arcsec) if fwhm is not None else base_arcsec

    per_model = [_score_pairs(m, tol, flux, flux_error, position_scale, max_score) for m in models]
    chosen = [_one_to_one(s["score"], s["parity"], max_score) for s in per_model]
    for fld, scores, pairs in zip(fields, per_model, chosen):
        scores["delay"] = _pair_delays(coords, fld, z_source, pairs)
    votes = {}
    for pairs in chosen:
        for pair in pairs:
            votes[pair] = votes.get(pair, 0) + 1

    rows = []
    for model, scores, pairs in zip(models, per_model, chosen):
        for i, j in sorted(pairs, key=lambda p: scores["score"][p]):
            rows.append(_pair_row(model["name"], i, j, [scores], votes[(i, j)], flux))
    if len(fields) > 1:
        consensus = [p for p, v in votes.items() if v > len(fields) / 2]
        medians = {p: float(np.median([s["score"][p] for s in per_model])) for p in consensus}
        for i, j in sorted(consensus, key=lambda p: medians[p]):
            agreeing = [s for s, pairs in zip(per_model, chosen) if (i, j) in pairs]
            row = _pair_row("consensus", i, j, agreeing, votes[(i, j)], flux)
            row["score"] = medians[(i, j)]
            rows.append(row)

    table = _pair_table(rows, flux is not None, fwhm)
    table.meta.update(
        z_source=float(z_source), models=names, max_score=float(max_score),
        unpaired={m["name"]: [k for k in range(n) if not any(k in p for p in pairs)]
                  for m, pairs in zip(models, chosen)})
    return table


def _model_view(coords, field, z_source):
    """Per-model positions (model TAN plane, arcsec), traced positions, mu and curves."""
    f = field.scaling_factor(z_source)
    x, y = field.sky_to_pixels(coords)
    terms = field.local_terms(x, y)
    det_a = terms.det_a(f)
    bx, by = x - f * terms.ax, y - f * terms.ay
    to_arcsec = field.wcs.pixel_scale_matrix * 3600.0
    curves = field.critical_curves(z_source)
    with np.errstate(divide="ignore", invalid="ignore"):
        mu = 1.0 / det_a
    return dict(
        name=field.name,
        wcs=field.wcs,
        image=np.column_stack([x, y]) @ to_arcsec.T,
        source=np.column_stack([bx, by]) @ to_arcsec.T,
        source_sky=field.pixels_to_sky(bx, by),
        mu=mu,
        parity=np.where(np.isfinite(det_a), np.sign(det_a), 0).astype(int),
        curves=[c.map_pixels @ to_arcsec.T for c in curves],
        closed=[c.closed for c in curves],
        kinds=[c.kind for c in curves],
    )


def _pair_delays(coords, field, z_source, pairs):
    """t_j - t_i (days) of each chosen pair, the two knots taken as images of one source."""
    delay = np.full((len(coords), len(coords)), np.nan)
    x, y = field.sky_to_pixels(coords)
    for i, j in pairs:
        delay[i, j] = pair_time_delay(field, x[[i, j]], y[[i, j]], z_source).to_value(u.day)
    return delay


def _source_spread(models):
    """Rms scatter (arcsec) of each knot's traced position across models.

    Positions are compared in the first model's tangent plane; the common
    shift of each model's source plane (the mean over knots traced by every
    model) is removed first.
    """
    n = len(models[0]["mu"])
    if len(models) < 2:
        return np.zeros(n)
    wcs = models[0]["wcs"]
    to_arcsec = wcs.pixel_scale_matrix * 3600.0
    xy = np.stack([np.column_stack(wcs.world_to_pixel(m["source_sky"])) @ to_arcsec.T
                   for m in models])  # (models, knots, 2)
    common = np.isfinite(xy).all(axis=(0, 2))
    if common.any():
        xy = xy - xy[:, common].mean(axis=1, keepdims=True)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # knots outside every model: NaN
        scatter = np.nanmean(np.sum((xy - np.nanmean(xy, axis=0)) ** 2, axis=2), axis=0)
    return np.sqrt(np.nan_to_num(scatter))


def _score_pairs(model, tol, flux, flux_error, position_scale, max_score):
    """Score terms of every pair for one model (matrices, inf where gated)."""
    n = len(model["mu"])
    image, source, parity = model["image"], model["source"], model["parity"]
    source_sep = np.hypot(*(source[:, None, :] - source[None, :, :]).transpose(2, 0, 1))
    separation = np.hypot(*(image[:, None, :] - image[None, :, :]).transpose(2, 0, 1))
    source_term = (source_sep / tol) ** 2
    with np.errstate(invalid="ignore"):
        allowed = (parity[:, None] * parity[None, :] == -1) & np.triu(np.ones((n, n), bool), 1)
        allowed &= source_term <= max_score
    out = {key: np.full((n, n), np.nan) for key in
           ("curve_term", "flux_term", "midpoint", "crossing", "flux_ratio", "expected")}
    out["kind"] = np.full((n, n), "", dtype="<U10")
    i, j = np.nonzero(allowed)
    if len(i) and model["curves"]:
        midpoint = 0.5 * (image[i] + image[j])
        nearest = _nearest_on_curves(midpoint, model["curves"], model["closed"])
        out["midpoint"][i, j] = nearest[0]
        out["kind"][i, j] = np.asarray(model["kinds"])[nearest[1]]
        out["crossing"][i, j] = _segments_cross(image[i], image[j], model["curves"],
                                                model["closed"])
        scale = np.hypot(CURVE_FRACTION * separation[i, j], position_scale)
        out["curve_term"][i, j] = ((nearest[0] / scale) ** 2
                                   + CROSSING_PENALTY * (out["crossing"][i, j] == 0))
    elif len(i):
        out["crossing"][i, j] = 0.0
        out["curve_term"][i, j] = np.inf  # no critical curve: no mirrored pair
    if flux is not None and len(i):
        expected = np.abs(model["mu"][i] / model["mu"][j])
        ratio = flux[i] / flux[j]
        relative = np.hypot(flux_error[i] / flux[i], flux_error[j] / flux[j])
        sigma = np.hypot(relative, MAGNIFICATION_RATIO_SCATTER)
        with np.errstate(invalid="ignore", divide="ignore"):
            term = (np.log(ratio / expected) / sigma) ** 2
        out["flux_ratio"][i, j], out["expected"][i, j] = ratio, expected
        out["flux_term"][i, j] = np.where(np.isfinite(term), term, 0.0)
    else:
        out["flux_term"][i, j] = 0.0
    score = np.full((n, n), np.inf)
    score[i, j] = source_term[i, j] + out["curve_term"][i, j] + out["flux_term"][i, j]
    score[j, i] = score[i, j]
    out.update(score=score, source_term=source_term, source_sep=source_sep, separation=separation,
               tol=tol, mu=model["mu"], parity=parity)
    return out


def _one_to_one(score, parity, max_score):
    """The best one-to-one set of pairs (i < j) with score <= max_score.

    Mirrored images have opposite parity, so every pair joins an even-parity
    knot to an odd-parity one: a bipartite assignment, solved exactly by
    `scipy.optimize.linear_sum_assignment` with one extra "unpaired" column
    per even knot at the cost ``max_score``.
    """
    even, odd = np.nonzero(parity > 0)[0], np.nonzero(parity < 0)[0]
    if not len(even) or not len(odd):
        return set()
    block = score[np.ix_(even, odd)]
    cost = np.hstack([np.where(block <= max_score, block, _GATED),
                      np.full((len(even), len(even)), float(max_score))])
    rows, cols = linear_sum_assignment(cost)
    return {(int(min(even[r], odd[c])), int(max(even[r], odd[c])))
            for r, c in zip(rows, cols) if c < len(odd) and block[r, c] <= max_score}


def _pair_row(name, i, j, scores, n_models, flux):
    """One output row; numbers are medians over ``scores`` (one per agreeing model)."""
    def median(key, a=i, b=j):
        return float(np.median([s[key][a, b] for s in scores]))

    mu_i = float(np.median([s["mu"][i] for s in scores]))
    mu_j = float(np.median([s["mu"][j] for s in scores]))
    kinds = [s["kind"][i, j] for s in scores]
    row = dict(
        i=i, j=j, model=name, score=median("score"), source_term=median("source_term"),
        curve_term=median("curve_term"), flux_term=median("flux_term"),
        source_sep_arcsec=median("source_sep"), tolerance_arcsec=median("tol"),
        separation_arcsec=median("separation"), midpoint_offset_arcsec=median("midpoint"),
        curve_kind=max(sorted(set(kinds)), key=kinds.count),
        curve_between=bool(np.mean([s["crossing"][i, j] > 0 for s in scores]) > 0.5),
        parity_i=int(np.sign(mu_i)), parity_j=int(np.sign(mu_j)), mu_i=mu_i, mu_j=mu_j,
        n_models=int(n_models),
    )
    delays = [s["delay"][i, j] for s in scores if np.isfinite(s["delay"][i, j])]
    row["time_delay_days"] = float(np.median(delays)) if delays else np.nan
    row["leading"] = (i if row["time_delay_days"] >= 0 else j) if delays else -1
    if flux is not None:
        row.update(flux_ratio=median("flux_ratio"), expected_ratio=median("expected"))
    return row


def _pair_table(rows, with_flux, fwhm):
    names = ["i", "j", "model", "score", "source_term", "curve_term", "flux_term",
             "source_sep_arcsec", "tolerance_arcsec", "separation_arcsec",
             "midpoint_offset_arcsec", "curve_kind", "curve_between", "parity_i", "parity_j",
             "mu_i", "mu_j", "n_models", "time_delay_days", "leading"]
    if with_flux:
        names += ["flux_ratio", "expected_ratio"]
    dtypes = {"i": int, "j": int, "model": str, "curve_kind": str, "curve_between": bool,
              "parity_i": int, "parity_j": int, "n_models": int, "leading": int}
    table = Table()
    for name in names:
        values = [row[name] for row in rows]
        table[name] = np.array(values, dtype=dtypes.get(name, float)) if values \
            else np.zeros(0, dtype=dtypes.get(name, float))
        if name.endswith("_arcsec"):
            table[name].unit = u.arcsec
    table["time_delay_days"].unit = u.day
    if fwhm is not None:
        table["resolved"] = np.asarray(table["separation_arcsec"]) >= fwhm.to_value(u.arcsec)
    return table


def _nearest_on_curves(points, curves, closed):
    """Distance from points to the nearest curve and that curve's index (one plane)."""
    nearest = nearest_on_polylines(points, curves, closed)
    return np.asarray(nearest.distance, float), np.asarray(nearest.polyline_index, int)


def _curve_edges(curves, closed):
    """(start, end) vertex arrays of the edges of each curve."""
    edges = []
    for xy, is_closed in zip(curves, closed):
        xy = xy[np.isfinite(xy).all(axis=1)]
        if is_closed and len(xy) > 2:
            xy = np.vstack([xy, xy[:1]])
        edges.append((xy[:-1], xy[1:]))
    return edges


def _segments_cross(start, end, curves, closed):
    """Number of curve edges crossed by each segment start-end (all in one plane)."""
    edges = _curve_edges(curves, closed)
    a = np.vstack([e[0] for e in edges])[None]
    b = np.vstack([e[1] for e in edges])[None]
    p, q = start[:, None, :], end[:, None, :]

    def orient(o, s, t):
        return (s[..., 0] - o[..., 0]) * (t[..., 1] - o[..., 1]) \
            - (s[..., 1] - o[..., 1]) * (t[..., 0] - o[..., 0])

    # Half-open rule on the edge ends, so a segment through a vertex counts once.
    crosses = ((orient(p, q, a) >= 0) != (orient(p, q, b) >= 0)) \
        & (orient(a, b, p) * orient(a, b, q) < 0)
    return crosses.sum(axis=1).astype(float)


def _coord_array(coords):
    if not isinstance(coords, SkyCoord):
        raise LensviewInputError(
            f"Knot positions must be a SkyCoord array, got {type(coords).__name__}; build "
            "one with SkyCoord(ra, dec, unit='deg').")
    coords = coords.icrs.reshape(-1)
    if len(coords) < 2:
        raise LensviewInputError(
            f"Pairing needs at least two knots, got {len(coords)}; mark more knots.")
    return coords


def _fluxes(fluxes, flux_errors, n):
    if fluxes is None:
        if flux_errors is not None:
            raise LensviewInputError("flux_errors were given without fluxes; pass both or neither.")
        return None, None
    unit = fluxes.unit if isinstance(fluxes, u.Quantity) else None
    flux = np.asarray(fluxes.value if unit is not None else fluxes, dtype=float).reshape(-1)
    if len(flux) != n:
        raise LensviewInputError(
            f"{len(flux)} fluxes were given for {n} knots; give one flux per knot "
            "(NaN if unknown).")
    if flux_errors is None:
        error = np.zeros(n)
    else:
        if isinstance(flux_errors, u.Quantity):
            if unit is None:
                raise LensviewInputError(
                    "flux_errors carry a unit but fluxes do not; give both in the same unit.")
            try:
                error = flux_errors.to_value(unit)
            except u.UnitsError:
                raise LensviewInputError(
                    f"flux_errors in {flux_errors.unit} cannot be compared with fluxes in "
                    f"{unit}; give both in the same unit.") from None
        else:
            error = flux_errors
        error = np.asarray(error, dtype=float).reshape(-1)
        if len(error) != n:
            raise LensviewInputError(
                f"{len(error)} flux errors were given for {n} knots; give one per knot.")
        if np.any(error < 0):
            raise LensviewInputError("flux_errors must not be negative.")
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(flux) & (flux > 0)
    flux = np.where(usable, flux, np.nan)
    return flux, np.nan_to_num(error)
