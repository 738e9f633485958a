"""The fold of the truth model and the images of a source near it."""

from dataclasses import dataclass

import numpy as np
import astropy.units as u
from .scenario import FOLD_TARGET, Z_SOURCE, scenario_sky



@dataclass
class _Fold:
    """The fold where the arc crosses the truth model's tangential curve, in
    the truth map's pixels: caustic point, its critical-curve point, unit
    vectors along the caustic and towards its inside, arcsec per map pixel."""

    point: np.ndarray
    image: np.ndarray
    along: np.ndarray
    inward: np.ndarray
    scale: float
    cusp_distance: float  # arcsec along the caustic to the nearest cusp

    def source(self, along, inward):
        return self.point + (along * self.along + inward * self.inward) / self.scale


def fold_frame(field):
    """Locate the fold nearest `FOLD_TARGET` on the truth model's curves."""
    curves = field.critical_curves(Z_SOURCE)
    caustics = field.caustics(Z_SOURCE)
    tx, ty = field.sky_to_pixels(scenario_sky(*FOLD_TARGET))
    best = None
    for k, curve in enumerate(curves):
        if curve.kind != "tangential" or not curve.closed:
            continue
        distance = np.hypot(curve.map_pixels[:, 0] - tx[0], curve.map_pixels[:, 1] - ty[0])
        i = int(np.argmin(distance))
        if best is None or distance[i] < best[0]:
            best = (distance[i], k, i)
    if best is None:
        raise RuntimeError("the truth model has no closed tangential critical curve")
    _, k, i = best
    caustic = caustics[k].map_pixels
    n = len(caustic)
    tangent = caustic[(i + 1) % n] - caustic[i - 1]
    tangent /= np.hypot(*tangent)
    x, y = caustic[:, 0], caustic[:, 1]
    signed_area = 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)
    # The inside of a closed curve lies to the left of its direction of travel
    # when the curve runs counter-clockwise (positive signed area).
    left = np.array([-tangent[1], tangent[0]])
    inward = left if signed_area > 0 else -left
    scale = float(field.pixel_scales[0].to_value(u.arcsec))
    steps = np.hypot(*np.diff(np.vstack([caustic, caustic[:1]]), axis=0).T)
    arc_length = np.concatenate([[0.0], np.cumsum(steps)])
    ring = arc_length[-1]
    along_ring = np.abs(arc_length[np.asarray(caustics[k].cusps, int)] - arc_length[i])
    cusp_distance = np.min(np.minimum(along_ring, ring - along_ring), initial=ring) * scale
    return _Fold(point=caustic[i].copy(), image=curves[k].map_pixels[i].copy(), along=tangent,
                 inward=inward, scale=scale, cusp_distance=float(cusp_distance))


class ImageFinder:
    """All images of a source-plane point near the fold, on the truth model.

    A grid of image-plane nodes around the fold is traced once; the node
    whose trace lies nearest the source seeds a Newton solve of the lens
    equation, and `lensview.counterparts.predict_counterimages` then finds
    every image of that source (its mirror partner included).
    """

    def __init__(self, field, fold, radius=6.0):
        self.field = field
        self.fold = fold
        self.f = field.scaling_factor(Z_SOURCE)
        self.reach = radius / fold.scale
        offsets = np.arange(-self.reach, self.reach + 1e-9, 0.25)
        gx, gy = np.meshgrid(fold.image[0] + offsets, fold.image[1] + offsets)
        self.nodes = np.column_stack([gx.ravel(), gy.ravel()])
        bx, by = field.trace_pixels(self.nodes[:, 0], self.nodes[:, 1], Z_SOURCE)
        self.traced = np.column_stack([bx, by])

    def all_images(self, beta):
        """(xy map pixels, signed mu) of every image on the map."""
        from ..counterparts import predict_counterimages

        start = self.nodes[np.nanargmin(np.sum((self.traced - beta) ** 2, axis=1))]
        first = self._newton(beta, start)
        table = predict_counterimages(self.field.pixels_to_sky(first[:1], first[1:])[0],
                                      self.field, Z_SOURCE)
        xy = np.column_stack([np.asarray(table["x_map"], float), np.asarray(table["y_map"], float)])
        return xy, np.asarray(table["mu"], float)

    def images(self, beta):
        """(xy map pixels, signed mu) of the images within the search radius,
        even parity first."""
        xy, mu = self.all_images(beta)
        near = np.hypot(*(xy - self.fold.image).T) < self.reach
        order = np.argsort(mu[near] < 0, kind="stable")
        return xy[near][order], mu[near][order]

    def pair(self, beta):
        """The two images of opposite parity nearest the fold point."""
        xy, mu = self.images(beta)
        positive = np.flatnonzero(mu > 0)
        negative = np.flatnonzero(mu < 0)
        if not len(positive) or not len(negative):
            raise RuntimeError("the source has no mirrored pair of images at the fold")
        distance = np.hypot(*(xy - self.fold.image).T)
        i = positive[np.argmin(distance[positive])]
        j = negative[np.argmin(distance[negative])]
        return xy[[i, j]], mu[[i, j]]

    def _newton(self, beta, start):
        point = np.array(start, float)
        for _ in range(100):
            terms = self.field.local_terms(point[:1], point[1:], warn=False)
            residual = point - self.f * np.array([terms.ax[0], terms.ay[0]]) - beta
            if np.hypot(*residual) < 1e-9:
                return point
            jacobian = np.array([[1 - self.f * terms.a11[0], -self.f * terms.a12[0]],
                                 [-self.f * terms.a21[0], 1 - self.f * terms.a22[0]]])
            step = np.linalg.solve(jacobian, residual)
            length = np.hypot(*step)
            point -= step * min(1.0, 0.5 / length) if length > 0 else step
        raise RuntimeError("the lens equation did not converge near the fold")


def inward_for_separation(finder, along, separation, start):
    """Distance inside the caustic (arcsec) whose fold pair has ``separation``.

    Near a fold the separation of the two merging images grows as y**1/2
    with the distance y of the source from the caustic (and their
    magnifications fall as y**-1/2; Blandford & Narayan 1986, ApJ 310, 568),
    so the steps y -> y (target / separation)**2 converge in a few rounds.
    """
    inward = start
    for _ in range(4):
        xy, _ = finder.pair(finder.fold.source(along, inward))
        inward *= (separation / (np.hypot(*(xy[0] - xy[1])) * finder.fold.scale)) ** 2
    return inward


