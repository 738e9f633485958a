"""Counter-images, mirrored pairs and the source-plane view against closed-form lenses.

The deflection maps are computed here (and in tests/closed_form.py) from the
published formulas, and the same formulas evaluated at arbitrary points give
the reference solutions of the lens equation (scipy root finding).
"""

import warnings

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from scipy.optimize import root

import lensview as lv
from lensview import counterparts
from lensview.counterparts import images as counterimage_search
from lensview.cosmology import distance_ratio
from lensview.errors import LensviewInputError

from closed_form import make_wcs, sie_curve_distance

Z_LENS = 0.4
Z_SOURCE = 2.0
SCALE = 0.05  # arcsec per pixel of the model maps
F = distance_ratio(Z_LENS, Z_SOURCE)


# ---------------------------------------------------------------------------- closed-form lenses
class PointMass:
    """alpha = theta_E^2 theta / |theta|^2 (Paczynski 1986, ApJ 304, 1), map pixels."""

    def __init__(self, theta_e, x0, y0):
        self.theta_e, self.x0, self.y0 = theta_e, x0, y0

    def alpha(self, x, y):
        dx, dy = x - self.x0, y - self.y0
        r2 = dx * dx + dy * dy
        return self.theta_e**2 * dx / r2, self.theta_e**2 * dy / r2


class SIE:
    """Singular isothermal ellipsoid (Kormann, Schneider & Bartelmann 1994; Keeton 2001,
    arXiv:astro-ph/0102341), kappa = theta_e sqrt(q) / (2 sqrt(q^2 x'^2 + y'^2)), map pixels;
    the same normalisation as tests/closed_form.py."""

    def __init__(self, theta_e, q, pa, x0, y0):
        self.theta_e, self.q, self.pa, self.x0, self.y0 = theta_e, q, pa, x0, y0

    def alpha(self, x, y):
        c, s = np.cos(self.pa), np.sin(self.pa)
        dx, dy = x - self.x0, y - self.y0
        xp, yp = c * dx + s * dy, -s * dx + c * dy
        qp = np.sqrt(1 - self.q**2)
        psi = np.hypot(self.q * xp, yp)
        axp = self.theta_e * np.sqrt(self.q) / qp * np.arctan(qp * xp / psi)
        ayp = self.theta_e * np.sqrt(self.q) / qp * np.arctanh(qp * yp / psi)
        return c * axp - s * ayp, s * axp + c * ayp

    def kappa(self, x, y):
        c, s = np.cos(self.pa), np.sin(self.pa)
        dx, dy = x - self.x0, y - self.y0
        xp, yp = c * dx + s * dy, -s * dx + c * dy
        return self.theta_e * np.sqrt(self.q) / (2 * np.hypot(self.q * xp, yp))

    def to_map(self, xp, yp):
        c, s = np.cos(self.pa), np.sin(self.pa)
        return self.x0 + c * xp - s * yp, self.y0 + s * xp + c * yp


def field_of(lens, n=400, rotation_deg=0.0, name="model"):
    y, x = np.mgrid[0:n, 0:n].astype(float)
    ax, ay = lens.alpha(x, y)
    wcs = make_wcs(n, n, scale_arcsec=SCALE, rotation_deg=rotation_deg)
    return lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS, name=name), wcs


def scaled(lens, f=F):
    """The same lens for D_ls/D_s = f (deflection times f)."""
    if isinstance(lens, PointMass):
        return PointMass(lens.theta_e * np.sqrt(f), lens.x0, lens.y0)
    return SIE(lens.theta_e * f, lens.q, lens.pa, lens.x0, lens.y0)


def trace(lens, xy):
    ax, ay = lens.alpha(xy[..., 0], xy[..., 1])
    return np.stack([xy[..., 0] - ax, xy[..., 1] - ay], axis=-1)


def jacobian(lens, xy, h=1e-4):
    """A = d beta / d theta of a closed-form lens, by central differences of its formula."""
    columns = []
    for step in (np.array([h, 0.0]), np.array([0.0, h])):
        columns.append((trace(lens, xy + step) - trace(lens, xy - step)) / (2 * h))
    return np.stack(columns, axis=-1)


def solve_image(lens, beta, guess):
    solution = root(lambda t: trace(lens, t) - beta, guess, tol=1e-13)
    assert solution.success
    return solution.x


def critical_direction(lens, xy):
    """Unit eigenvector of (the symmetric part of) A with the eigenvalue closest to zero."""
    a = jacobian(lens, xy)
    values, vectors = np.linalg.eigh(0.5 * (a + a.T))
    return vectors[:, np.argmin(np.abs(values))]


def fold_pair(lens_f, phi, delta):
    """A knot `delta` pixels off the tangential critical curve of a scaled SIE, at
    parametric angle `phi` on the kappa = 1/2 ellipse, and its reference partner."""
    q = lens_f.q
    critical = np.array(lens_f.to_map(lens_f.theta_e / np.sqrt(q) * np.cos(phi),
                                      lens_f.theta_e * np.sqrt(q) * np.sin(phi)))
    direction = critical_direction(lens_f, critical)
    knot = critical + delta * direction
    beta = trace(lens_f, knot)
    partner = solve_image(lens_f, beta, critical - delta * direction)
    return knot, partner, beta


def sky(wcs, xy):
    xy = np.atleast_2d(xy)
    return wcs.pixel_to_world(xy[:, 0], xy[:, 1])


def predict_at(field, wcs, xy, **kwargs):
    return lv.predict_counterimages(sky(wcs, xy)[0], field, Z_SOURCE, **kwargs)


def table_xy(table):
    return np.column_stack([np.asarray(table["x_map"]), np.asarray(table["y_map"])])


# ---------------------------------------------------------------------------- point mass
@pytest.mark.parametrize("u_source, angle, rotation", [(0.5, 0.7, 0.0), (1.2, 2.9, 33.0),
                                                       (0.25, -2.0, -71.0)])
def test_point_mass_images_and_magnifications(u_source, angle, rotation):
    x0, y0 = 200.37, 199.71  # lens centre off the grid nodes
    lens = PointMass(60.0, x0, y0)
    field, wcs = field_of(lens, rotation_deg=rotation)
    theta_e = lens.theta_e * np.sqrt(F)
    # Images at theta_+- = (u +- sqrt(u^2 + 4)) / 2 theta_E along the source direction, with
    # mu_+- = +-(u^2 + 2) / (2 u sqrt(u^2 + 4)) + 1/2 (Paczynski 1986, ApJ 304, 1).
    root_term = np.sqrt(u_source**2 + 4)
    radii = np.array([(u_source + root_term) / 2, (u_source - root_term) / 2]) * theta_e
    expected_xy = np.column_stack([x0 + radii * np.cos(angle), y0 + radii * np.sin(angle)])
    half_total = (u_source**2 + 2) / (2 * u_source * root_term)
    expected_mu = np.array([half_total + 0.5, 0.5 - half_total])

    table = predict_at(field, wcs, expected_xy[0])
    assert len(table) == 2
    assert table["is_input"].tolist() == [True, False]
    found = sky(wcs, np.column_stack([table["x_map"], table["y_map"]])[1])[0]
    assert found.separation(sky(wcs, expected_xy[1])[0]).to_value(u.mas) < 1.0
    np.testing.assert_allclose(table["mu"], expected_mu, rtol=0.01)
    assert table["parity"].tolist() == [1, -1]
    assert np.all(table["residual_mas"] < 1.0)
    # The source lies at u theta_E from the lens along the same direction (same reference).
    source = SkyCoord(table.meta["source_ra"] * u.deg, table.meta["source_dec"] * u.deg)
    expected_source = sky(wcs, [x0 + u_source * theta_e * np.cos(angle),
                                y0 + u_source * theta_e * np.sin(angle)])[0]
    assert source.separation(expected_source).to_value(u.mas) < 1.0
    # The image separation theta_+ - theta_- = sqrt(u^2 + 4) theta_E (same reference).
    np.testing.assert_allclose(table["separation_arcsec"][1], root_term * theta_e * SCALE,
                               rtol=1e-6)
    # The root the grid cannot resolve (the singular centre) is reported as dropped.
    assert all("does not resolve" in d["reason"] for d in table.meta["dropped"])


# ---------------------------------------------------------------------------- fold and cusp
SIE_LENS = SIE(90.0, 0.7, np.radians(30.0), 200.31, 199.83)


@pytest.fixture(scope="module")
def sie_field():
    return field_of(SIE_LENS, rotation_deg=20.0, name="sie")


@pytest.mark.parametrize("phi, delta", [(0.5, 1.5), (2.0, 1.5), (1.0, 0.1), (4.0, 0.4)])
def test_sie_fold_pair_is_mirrored_about_the_curve(sie_field, phi, delta):
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    knot, partner, beta = fold_pair(lens_f, phi, delta)
    table = predict_at(field, wcs, knot, psf_fwhm=0.2 * u.arcsec)
    xy = table_xy(table)
    # A source just inside a fold of the SIE's tangential caustic has four images (two of
    # them merging at the fold); the singular centre has none (Kormann et al. 1994).
    assert len(table) == 4
    nearest = 1 + np.argmin(np.hypot(*(xy[1:] - knot).T))
    found = sky(wcs, xy[nearest])[0]
    assert found.separation(sky(wcs, partner)[0]).to_value(u.mas) < 1.0
    # Every image solves the closed-form lens equation to 1 mas.
    residual = np.hypot(*(trace(lens_f, xy) - beta).T) * SCALE * 1e3
    assert residual.max() < 1.0
    # Isothermal: gamma = kappa, so mu = 1 / (1 - 2 kappa) (Kormann et al. 1994).
    expected_mu = 1.0 / (1.0 - 2.0 * lens_f.kappa(xy[:, 0], xy[:, 1]))
    np.testing.assert_allclose(table["mu"], expected_mu, rtol=0.01)
    mu_knot, mu_partner = table["mu"][0], table["mu"][nearest]
    # Fold pair: nearly equal and opposite magnifications, midpoint on the critical curve
    # (Blandford & Narayan 1986, ApJ 310, 568; common practice when reading such pairs).
    assert mu_knot * mu_partner < 0
    assert abs(mu_knot + mu_partner) / abs(mu_knot) < 0.05
    midpoint = 0.5 * (xy[0] + xy[nearest])
    separation = np.hypot(*(xy[0] - xy[nearest]))
    offset = sie_curve_distance(midpoint[None], lens_f.theta_e, lens_f.q, lens_f.pa,
                                lens_f.x0, lens_f.y0)[0]
    assert abs(offset) < 0.02 * separation
    # The pair merges below a 0.2 arcsec PSF only when it is closer than that.
    unresolved = separation * SCALE < 0.2
    assert table.meta["unresolved"] is bool(unresolved)
    assert (table.meta["verdict"] == "single unresolved image on the curve") is bool(unresolved)
    assert table["within_psf"].tolist() == [False] + [
        bool(k == nearest and unresolved) for k in range(1, len(table))]
    np.testing.assert_allclose(table.meta["nearest_separation_arcsec"], separation * SCALE,
                               rtol=1e-6)


def test_cusp_relation_vanishes_towards_the_cusp(sie_field):
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    q = lens_f.q
    qp = np.sqrt(1 - q * q)
    # On the x' axis the SIE deflection is the constant theta_e sqrt(q)/q' arctan(q'/q)
    # (Kormann et al. 1994), so the cusp and the on-axis images follow in closed form.
    shift = lens_f.theta_e * np.sqrt(q) / qp * np.arctan(qp / q)
    critical_x = lens_f.theta_e / np.sqrt(q)
    cusp_image = np.array(lens_f.to_map(critical_x, 0.0))
    cusp_source = critical_x - shift
    relation = []
    for t in (0.2, 0.1, 0.05):
        beta_x = (1 - t) * cusp_source
        knot = np.array(lens_f.to_map(beta_x + shift, 0.0))
        table = predict_at(field, wcs, knot)
        xy = table_xy(table)
        assert len(table) == 4  # inside the astroid caustic of an SIE: four images
        beta = np.array(lens_f.to_map(beta_x, 0.0))
        assert (np.hypot(*(trace(lens_f, xy) - beta).T) * SCALE * 1e3).max() < 1.0
        triplet = np.argsort(np.hypot(*(xy - cusp_image).T))[:3]
        mu = np.asarray(table["mu"])[triplet]
        assert sorted(np.sign(mu)) in ([-1, 1, 1], [-1, -1, 1])
        relation.append(mu.sum() / np.abs(mu).sum())
    # Cusp relation R = sum(mu) / sum(|mu|) -> 0 as the source approaches the cusp, at
    # leading order linearly in the source's distance from it (Keeton, Gaudi & Petters 2003,
    # ApJ 598, 138; from memory).
    relation = np.abs(relation)
    assert relation[0] > relation[1] > relation[2]
    assert relation[2] < 0.03
    np.testing.assert_allclose(relation[:-1] / relation[1:], 2.0, rtol=0.1)


def test_block_preselection_keeps_every_triangle(sie_field):
    """The blocked search finds exactly the triangles of a scan over the whole grid."""
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    n = field.shape[0]
    y, x = np.mgrid[0:n, 0:n].astype(float)
    beta_grid = trace(lens_f, np.stack([x, y], axis=-1))
    rng = np.random.default_rng(3)
    sources = [fold_pair(lens_f, phi, 0.2)[2] for phi in (0.3, 1.7, 3.3)]
    sources += list(trace(lens_f, rng.uniform(60, 340, (3, 2))))
    for beta in sources:
        blocked = counterimage_search._triangle_seeds(field, F, beta)
        corners = [beta_grid[:-1, :-1], beta_grid[:-1, 1:], beta_grid[1:, 1:], beta_grid[1:, :-1]]
        full = 0
        for second, third in ((1, 2), (2, 3)):
            p0, p1, p2 = corners[0], corners[second], corners[third]
            full += counterimage_search._barycentric(np.moveaxis(p0, -1, 0), np.moveaxis(p1, -1, 0),
                                              np.moveaxis(p2, -1, 0), beta)[2].sum()
        assert len(blocked) == full
        assert full >= 1


# ---------------------------------------------------------------------------- pairing
def pairing_scenario(lens_f, rng):
    """Fold pairs of six sources and six unrelated knots whose sources lie apart."""
    knots, pairs = [], []
    for phi, delta in ((0.4, 3.0), (1.3, 2.0), (2.3, 4.0), (3.5, 2.5), (4.4, 3.5), (5.6, 1.5)):
        knot, partner, _ = fold_pair(lens_f, phi, delta)
        pairs.append((len(knots), len(knots) + 1))
        knots += [knot, partner]
    sources = [trace(lens_f, k) for k in knots]
    unrelated = []
    while len(unrelated) < 6:
        radius = lens_f.theta_e * rng.uniform(0.6, 1.5)
        angle = rng.uniform(0, 2 * np.pi)
        candidate = np.array([lens_f.x0 + radius * np.cos(angle),
                              lens_f.y0 + radius * np.sin(angle)])
        beta = trace(lens_f, candidate)
        # Unrelated by construction: its source is 0.5 arcsec or more from every other one.
        if min(np.hypot(*(beta - s)) for s in sources) * SCALE >= 0.5:
            unrelated.append(len(knots))
            knots.append(candidate)
            sources.append(beta)
    return np.array(knots), pairs, unrelated


def flux_of(lens_f, knots, rng, unrelated):
    a = jacobian(lens_f, knots)
    mu = np.abs(1.0 / np.linalg.det(a))
    flux = 10.0 * mu * rng.normal(1.0, 0.05, len(knots))
    flux[unrelated] = rng.uniform(50, 500, len(unrelated))
    return flux


@pytest.mark.parametrize("with_flux", [False, True])
def test_pairing_recovers_true_pairs_and_leaves_unrelated_knots(sie_field, with_flux):
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    rng = np.random.default_rng(11)
    knots, pairs, unrelated = pairing_scenario(lens_f, rng)
    order = rng.permutation(len(knots))  # knots in no particular order
    position = np.argsort(order)
    coords = sky(wcs, knots[order])
    kwargs = {}
    if with_flux:
        flux = flux_of(lens_f, knots, rng, unrelated)[order]
        kwargs = dict(fluxes=flux * u.nJy, flux_errors=0.05 * flux * u.nJy)
    table = lv.pair_counterparts(coords, field, Z_SOURCE, **kwargs)
    found = {tuple(sorted((int(order[i]), int(order[j])))) for i, j in zip(table["i"], table["j"])}
    # Constructed scenario: the true fold pairs and nothing else (common practice: mirrored
    # images share a source, have opposite parity and straddle the critical curve).
    assert found == set(pairs)
    assert not set(unrelated) & {k for pair in found for k in pair}
    assert set(table.meta["unpaired"]["sie"]) == {int(position[k]) for k in unrelated}
    assert np.all(table["curve_between"])
    assert np.all(table["parity_i"] * table["parity_j"] == -1)
    assert np.all(table["source_sep_arcsec"] < 0.01)
    assert np.all(table["midpoint_offset_arcsec"] < 0.05 * table["separation_arcsec"])
    assert np.all(table["score"] < counterparts.DEFAULT_MAX_SCORE)
    assert set(table["model"]) == {"sie"}
    if with_flux:
        # Fold pairs: flux ratio close to the magnification ratio (noise 5 % per knot).
        np.testing.assert_allclose(table["flux_ratio"], table["expected_ratio"], rtol=0.25)


def test_pairing_consensus_across_models(sie_field):
    field, wcs = sie_field
    # A close variant of the lens (critical curve moved by well under the knots' 1.5-4
    # pixel offsets) and a looser one that moves the curve past some knots, flipping
    # their parity, so that it rejects some of the pairs.
    close, _ = field_of(SIE(90.3, 0.7, np.radians(30.2), 200.4, 199.9), rotation_deg=20.0,
                        name="sie-b")
    loose, _ = field_of(SIE(89.0, 0.69, np.radians(29.5), 200.1, 200.0), rotation_deg=20.0,
                        name="sie-c")
    rng = np.random.default_rng(5)
    knots, pairs, unrelated = pairing_scenario(scaled(SIE_LENS), rng)
    table = lv.pair_counterparts(sky(wcs, knots), [field, close, loose], Z_SOURCE)
    by_model = {name: {(int(i), int(j)) for i, j, m in zip(table["i"], table["j"], table["model"])
                       if m == name} for name in ("sie", "sie-b", "sie-c", "consensus")}
    # Constructed scenario: two of the three models find exactly the true pairs.
    assert by_model["sie"] == by_model["sie-b"] == set(pairs)
    assert by_model["sie-c"] < set(pairs)
    # Consensus: the pairs a majority chose, with the number of models that chose each.
    assert by_model["consensus"] == set(pairs)
    consensus = table[table["model"] == "consensus"]
    votes = {(int(i), int(j)): int(n) for i, j, n in zip(consensus["i"], consensus["j"],
                                                       consensus["n_models"])}
    assert votes == {p: 3 if p in by_model["sie-c"] else 2 for p in pairs}
    assert not set(unrelated) & {k for pair in by_model["consensus"] for k in pair}
    # The default tolerance grows with the spread of the traced positions across models.
    assert np.all(consensus["tolerance_arcsec"] > counterparts.DEFAULT_TOLERANCE.to_value(u.arcsec))


def test_pairing_is_one_to_one(sie_field):
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    knot, partner, _ = fold_pair(lens_f, 1.1, 3.0)
    # A decoy beside the partner, on its side of the curve: also a plausible mate of the knot.
    outward = (partner - knot) / np.hypot(*(partner - knot))
    decoy = partner + 1.0 * outward + 0.5 * outward[::-1] * [1, -1]
    table = lv.pair_counterparts(sky(wcs, [knot, decoy, partner]), field, Z_SOURCE)
    candidates = lv.pair_counterparts(sky(wcs, [knot, decoy]), field, Z_SOURCE)
    assert len(candidates) == 1  # alone, the decoy would pass the gate
    # One-to-one: the knot goes with its true partner only (constructed scenario).
    assert [(int(i), int(j)) for i, j in zip(table["i"], table["j"])] == [(0, 2)]
    assert table.meta["unpaired"]["sie"] == [1]


def test_same_parity_images_are_not_mirrored(sie_field):
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    q = lens_f.q
    qp = np.sqrt(1 - q * q)
    shift = lens_f.theta_e * np.sqrt(q) / qp * np.arctan(qp / q)
    beta_x = 0.9 * (lens_f.theta_e / np.sqrt(q) - shift)
    table = predict_at(field, wcs, np.array(lens_f.to_map(beta_x + shift, 0.0)))
    xy, parity = table_xy(table), np.asarray(table["parity"])
    same = xy[parity == parity[np.argmax(np.abs(table["mu"]))]][:2]
    assert len(same) == 2
    # Two images of one source with the same parity are not a mirrored pair, however
    # close their traced positions (common practice).
    result = lv.pair_counterparts(sky(wcs, same), field, Z_SOURCE)
    assert len(result) == 0
    assert result.meta["unpaired"]["sie"] == [0, 1]


# ---------------------------------------------------------------------------- source plane
def cutout_grid(shape=(160, 200), scale=0.04, rotation=35.0, crval=(150.0, 2.0002)):
    return make_wcs(shape[1], shape[0], scale_arcsec=scale, rotation_deg=rotation, crval=crval)


def test_uniform_image_maps_to_uniform_source_plane(sie_field):
    field, _ = sie_field
    cutout_wcs = cutout_grid()
    data = np.full((160, 200), 7.25)
    image, source_wcs = lv.source_plane_image(data, cutout_wcs, field, Z_SOURCE, shape=(80, 90),
                                              oversample=2)
    assert image.shape == (80, 90)
    finite = np.isfinite(image)
    # Lensing conserves surface brightness (Schneider, Ehlers & Falco 1992, sec. 5.2).
    np.testing.assert_allclose(image[finite], 7.25, rtol=1e-12)
    assert finite.mean() > 0.3
    assert source_wcs.pixel_shape == (90, 80)


def test_source_plane_reconstructs_surface_brightness_and_position(sie_field):
    field, model_wcs = sie_field
    lens_f = scaled(SIE_LENS)
    knot, _, beta = fold_pair(lens_f, 1.0, 6.0)
    source_sigma = 4.0  # model pixels (0.2 arcsec)

    def source_profile(beta_xy):
        return np.exp(-0.5 * np.sum((beta_xy - beta) ** 2, axis=-1) / source_sigma**2)

    cutout_wcs = cutout_grid(crval=tuple(float(v) for v in model_wcs.pixel_to_world_values(*knot)))
    ny, nx = 160, 200
    y, x = np.mgrid[0:ny, 0:nx].astype(float)
    mx, my = model_wcs.world_to_pixel(cutout_wcs.pixel_to_world(x, y))
    data = source_profile(trace(lens_f, np.stack([mx, my], axis=-1)))
    image, source_wcs = lv.source_plane_image(data, cutout_wcs, field, Z_SOURCE,
                                              pixel_scale=0.02 * u.arcsec, oversample=2)
    sy, sx = np.mgrid[0:image.shape[0], 0:image.shape[1]].astype(float)
    bx, by = model_wcs.world_to_pixel(source_wcs.pixel_to_world(sx, sy))
    expected = source_profile(np.stack([bx, by], axis=-1))
    bright = np.isfinite(image) & (expected > 0.2)
    assert bright.sum() > 100
    # Surface brightness conservation: the traced mean equals the source profile there
    # (Schneider, Ehlers & Falco 1992, sec. 5.2). Each sub-pixel carries its cutout pixel's
    # centre value, up to half a pixel diagonal (0.028 arcsec, not stretched radially for an
    # isothermal lens) away in the source plane, so the error is bounded by
    # max|grad S| * 0.028 = 0.61 / 0.2 * 0.028 ~ 0.085 of the peak; typically far less.
    error = np.abs(image[bright] - expected[bright])
    assert error.max() < 0.085
    assert np.median(error) < 0.01
    # The bright source pixels sit at the traced position of the knot.
    peak = np.nanargmax(np.where(np.isfinite(image), image, -np.inf))
    peak_sky = source_wcs.pixel_to_world(sx.ravel()[peak], sy.ravel()[peak])
    traced = field.ray_trace(sky(model_wcs, knot)[0], Z_SOURCE)
    assert peak_sky.separation(traced).arcsec < 0.05


# ---------------------------------------------------------------------------- bad input
def test_bad_input_is_reported(sie_field):
    field, wcs = sie_field
    inside = sky(wcs, [250.0, 230.0])
    with pytest.raises(LensviewInputError, match="outside the footprint"):
        lv.predict_counterimages(sky(wcs, [-50.0, 20.0])[0], field, Z_SOURCE)
    with pytest.raises(LensviewInputError, match="positive angle"):
        lv.predict_counterimages(inside[0], field, Z_SOURCE, psf_fwhm=-0.1 * u.arcsec)
    with pytest.raises(LensviewInputError, match="one knot"):
        lv.predict_counterimages(sky(wcs, [[250.0, 230.0], [100.0, 120.0]]), field, Z_SOURCE)
    two = sky(wcs, [[250.0, 230.0], [120.0, 150.0]])
    with pytest.raises(LensviewInputError, match="positive angle"):
        lv.pair_counterparts(two, field, Z_SOURCE, tolerance=0.1)
    with pytest.raises(LensviewInputError, match="one flux per knot"):
        lv.pair_counterparts(two, field, Z_SOURCE, fluxes=[1.0, 2.0, 3.0])
    with pytest.raises(LensviewInputError, match="at least two knots"):
        lv.pair_counterparts(inside, field, Z_SOURCE)
    with pytest.raises(LensviewInputError, match="distinct"):
        lv.pair_counterparts(two, [field, field], Z_SOURCE)
    data = np.ones((50, 60))
    with pytest.raises(LensviewInputError, match="does not overlap"):
        lv.source_plane_image(data, cutout_grid((50, 60)), field, Z_SOURCE, box=(100, 120, 0, 10))
    with pytest.raises(LensviewInputError, match="shape"):
        lv.source_plane_image(data, cutout_grid((50, 60)), field, Z_SOURCE, shape=(1, 10))
    with pytest.raises(LensviewInputError, match="oversample"):
        lv.source_plane_image(data, cutout_grid((50, 60)), field, Z_SOURCE, oversample=0)
    far = make_wcs(60, 50, crval=(151.0, 2.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(LensviewInputError, match="footprint"):
            lv.source_plane_image(data, far, field, Z_SOURCE)


# ---------------------------------------------------------------------------- time delays
def sie_fermat_days(lens_f, xy, beta):
    """Fermat potential of the SIE in days: psi = theta . alpha for isothermal lenses
    (Keeton 2001, arXiv:astro-ph/0102341, sec. 3), t = (1+z_l)/c D_l D_s/D_ls
    (|theta - beta|^2/2 - psi) (Schneider, Ehlers & Falco 1992, eq. 5.45); distances from
    astropy's Planck18 (the field's default cosmology)."""
    import astropy.constants as const
    from astropy.cosmology import Planck18

    ax, ay = lens_f.alpha(xy[:, 0], xy[:, 1])
    dx, dy = xy[:, 0] - lens_f.x0, xy[:, 1] - lens_f.y0
    tau = 0.5 * ((xy[:, 0] - beta[0]) ** 2 + (xy[:, 1] - beta[1]) ** 2) - (dx * ax + dy * ay)
    d_l = Planck18.angular_diameter_distance(Z_LENS)
    d_s = Planck18.angular_diameter_distance(Z_SOURCE)
    d_ls = Planck18.angular_diameter_distance_z1z2(Z_LENS, Z_SOURCE)
    scale = ((1 + Z_LENS) / const.c * d_l * d_s / d_ls).to(u.day).value
    return scale * tau * (SCALE * u.arcsec).to_value(u.rad) ** 2


@pytest.mark.parametrize("phi, delta", [(0.5, 6.0), (2.0, 3.0)])
def test_sie_image_delays_and_arrival_order(sie_field, phi, delta):
    field, wcs = sie_field
    lens_f = scaled(SIE_LENS)
    knot, partner, beta = fold_pair(lens_f, phi, delta)
    table = predict_at(field, wcs, knot)
    xy = table_xy(table)
    expected = sie_fermat_days(lens_f, xy, beta)
    expected -= expected.min()
    delays = np.asarray(table["time_delay_days"])
    assert table["time_delay_days"].unit == u.day
    assert np.count_nonzero(delays == 0) == 1 and np.all(delays >= 0)
    assert sorted(table["arrival_order"]) == list(range(1, len(table) + 1))
    assert np.argmin(expected) == np.argmin(delays)
    # 0.1 % of each delay above a day, against the closed form above (Keeton 2001).
    long = expected > 1.0
    assert long.sum() >= 2
    np.testing.assert_allclose(delays[long], expected[long], rtol=1e-3)
    np.testing.assert_array_equal(np.argsort(np.argsort(expected)) + 1, table["arrival_order"])
    # The same delay between the fold pair, from pair_counterparts.
    nearest = 1 + np.argmin(np.hypot(*(xy[1:] - knot).T))
    knots = sky(wcs, np.vstack([xy[0], xy[nearest]]))
    pairs = lv.pair_counterparts(knots, field, Z_SOURCE)
    assert len(pairs) == 1
    np.testing.assert_allclose(pairs["time_delay_days"][0], delays[nearest] - delays[0],
                               rtol=1e-3, atol=1e-4)
    assert pairs["leading"][0] == (0 if delays[0] < delays[nearest] else 1)
