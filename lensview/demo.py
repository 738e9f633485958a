"""The invented demo scenario in ``sample_images/``.

Everything here is invented: the cluster (the "Lantern cluster", a name of
our own), its position, its redshift, its member galaxies, the lensed
background galaxy and every number below. Nothing is taken from a real
object, survey or publication.

The scenario
    A massive cluster at z = 0.45 lenses a clumpy star-forming galaxy at
    z = 2.9 into a giant arc that crosses the tangential critical curve at a
    fold. Three deliberately different lens models of the cluster are written
    as deflection maps, each on its own grid, pixel scale and rotated WCS, one
    in each file layout that `lensview.fitsio` reads:

    * ``isothermal`` (the truth): a cored isothermal ellipsoid halo plus
      cored isothermal member galaxies; two files, normalised to
      D_ls/D_s = 1;
    * ``NFW shear``: an NFW halo, external shear and lighter members; one
      file with two image HDUs, normalised to a source at z = 2.0
      (``Z_NORM`` in the headers);
    * ``perturbed``: the truth with a shifted, rotated halo, a heavier
      member near the arc and a dark subhalo; a two-plane cube, normalised
      to D_ls/D_s = 1.

    The cutout is rendered by ray tracing its pixels (supersampled) through
    the truth model to the source (a Sersic disk with Gaussian star-forming
    clumps; clumps too small for the sub-pixels are drawn through the local
    lens mapping at each of their images), adding a compact unresolved
    object placed just inside the fold caustic, whose two images merge on
    the critical curve, the cluster members' light (Sersic profiles) and
    faint field galaxies, convolving with a Moffat PSF and adding sky noise
    from a seeded generator. Positions that matter (the fold, the compact
    object's distance from the caustic, the mirrored clump's images) are
    computed with the library itself, on the truth model's float32 maps as
    they are written to disk.

`generate_demo` writes the files deterministically: the same seed gives the
same bytes (no dates or checksums in the headers). `load_demo` reads them
back through `lensview.fitsio` and `lensview.export`.
"""

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.modeling.models import Sersic2D
from astropy.table import Table
from scipy.signal import fftconvolve
from scipy.special import gamma as gamma_function, gammaincinv

from . import analytic
from .cosmology import angular_scale, distance_ratio
from .errors import LensviewInputError

__all__ = [
    "DEMO_DIRECTORY",
    "DEFAULT_SEED",
    "CLUSTER_NAME",
    "Z_LENS",
    "Z_SOURCE",
    "TRUTH_MODEL",
    "MODEL_NAMES",
    "generate_demo",
    "load_demo",
    "lens_profiles",
    "library_versions",
]

#: Folder of the bundled demo files (next to the package).
DEMO_DIRECTORY = Path(__file__).resolve().parent.parent / "sample_images"
#: Seed of the sky noise and field galaxies of the bundled files.
DEFAULT_SEED = 7316
CLUSTER_NAME = "Lantern cluster"
Z_LENS = 0.45
Z_SOURCE = 2.9
TRUTH_MODEL = "isothermal"
MODEL_NAMES = ("isothermal", "NFW shear", "perturbed")

CUTOUT_FILE = "lantern_arc_cutout.fits"
CANDIDATE_FILE = "candidates.ecsv"
README_FILE = "README.md"
#: The numerical libraries' versions (and machine) that wrote the files: other
#: releases round differently in the last bits, so only the same versions
#: regenerate the files bit for bit.
VERSIONS_FILE = "library_versions.json"

_CENTRE = SkyCoord(211.9374 * u.deg, -7.4218 * u.deg)
# The scenario plane: arcsec East and North of the cluster centre.
_SCENARIO_WCS = analytic.make_wcs(_CENTRE, (1, 1), 1 * u.arcsec)

_CUTOUT_CENTRE = (10.0, 2.5)
_CUTOUT_SHAPE = (600, 600)
_CUTOUT_SCALE = 0.04  # arcsec per pixel
_OVERSAMPLE = 3
_PSF_FWHM = 0.10  # arcsec
_PSF_BETA = 3.0
_ZERO_POINT = 28.0  # AB magnitude of one count per second
_SKY_SIGMA = 0.015  # counts per second per pixel
# Where the arc should cross the tangential curve (scenario plane, arcsec).
_FOLD_TARGET = (14.5, 4.0)

# Compact object: its two images lie this far apart (arcsec), well inside the PSF ...
_COMPACT_SEPARATION = 0.06
# ... and the mirrored clump's two images lie this far apart (arcsec).
_MIRROR_SEPARATION = 0.8


@dataclass(frozen=True)
class _Member:
    """A cluster member: position (arcsec East, North of the centre), mass
    (cored isothermal sphere, Einstein radius for D_ls/D_s = 1) and light."""

    east: float
    north: float
    theta_e: float
    core: float
    mag: float
    r_eff: float
    sersic_n: float
    ellip: float
    pa: float  # degrees, North through East


_MEMBERS = (
    _Member(0.0, 0.0, 1.8, 0.30, 17.6, 2.4, 4.0, 0.25, 32.0),  # brightest cluster galaxy
    _Member(6.5, 7.5, 0.6, 0.10, 20.3, 0.55, 4.0, 0.15, 75.0),
    _Member(19.5, -2.5, 0.5, 0.10, 20.6, 0.45, 3.5, 0.30, 140.0),
    _Member(9.0, -6.0, 0.4, 0.08, 21.1, 0.35, 4.0, 0.10, 10.0),
    _Member(19.5, 10.0, 0.35, 0.08, 21.4, 0.30, 3.0, 0.35, 55.0),
    _Member(-8.0, 9.0, 0.7, 0.12, 20.0, 0.60, 4.0, 0.20, 120.0),
    _Member(-11.0, -7.0, 0.5, 0.10, 20.7, 0.45, 4.0, 0.25, 95.0),
    _Member(4.0, -13.0, 0.45, 0.10, 20.9, 0.40, 4.0, 0.05, 0.0),
    _Member(-3.0, 14.0, 0.4, 0.08, 21.2, 0.35, 3.5, 0.30, 160.0),
)


@dataclass(frozen=True)
class _Grid:
    """Where and how one model's maps are written."""

    name: str
    layout: str
    files: tuple
    centre: tuple  # scenario plane, arcsec
    size: int  # pixels per side
    scale: float  # arcsec per pixel
    rotation: float  # degrees, position angle of the map's +y axis
    z_norm: float | None


_GRIDS = (
    _Grid("isothermal", "two files", ("isothermal_alpha_x.fits", "isothermal_alpha_y.fits"),
          (6.0, 2.0), 640, 0.080, 20.0, None),
    _Grid("NFW shear", "one file, two image HDUs", ("nfw_shear_alpha.fits",),
          (5.0, 1.0), 560, 0.090, -35.0, 2.0),
    _Grid("perturbed", "one file, a cube of two planes", ("perturbed_alpha_cube.fits",),
          (7.0, 3.0), 680, 0.075, 65.0, None),
)


@dataclass(frozen=True)
class _Knot:
    """A Gaussian clump of the source (or the point-like compact object),
    placed in the fold frame: ``along`` the caustic and ``inward`` (towards
    its inside), arcsec from the fold point. ``inward=None`` means computed
    (the compact object and the mirrored clump)."""

    label: str
    along: float
    inward: float | None
    mag: float
    sigma: float  # arcsec; 0 = unresolved
    note: str


_HOST = dict(along=0.0, inward=0.12, mag=26.0, r_eff=0.14, sersic_n=1.0, ellip=0.4, angle=60.0)
_KNOTS = (
    _Knot("C", 0.0, None, 32.0, 0.0,
          "compact object just inside the caustic: two images merged on the curve"),
    _Knot("M1", 0.035, None, 30.5, 0.0004, "compact clump whose two mirrored images straddle the curve"),
    _Knot("M2", -0.06, 0.05, 29.0, 0.0030, "clump with two mirrored images farther from the curve"),
    _Knot("M3", 0.06, 0.10, 29.2, 0.0020, "clump with two mirrored images in the arc's outer parts"),
    _Knot("M4", -0.03, 0.17, 29.4, 0.0025, "clump with two mirrored images near the arc's ends"),
    _Knot("", 0.03, 0.075, 29.6, 0.0020, ""),
    _Knot("", 0.09, 0.14, 29.8, 0.0030, ""),
    _Knot("", -0.07, 0.21, 29.9, 0.0020, ""),
    _Knot("", 0.08, 0.20, 27.5, 0.050, ""),
    _Knot("", -0.08, 0.13, 27.7, 0.060, ""),
)
#: Clumps smaller than this (arcsec) are drawn from their images' local lens
#: mapping; ray tracing at the sub-pixel spacing would not sample them.
_TRACED_SIGMA = 0.01


# ============================================================================ lens models
def _sky(east, north):
    return analytic.plane_to_sky(_SCENARIO_WCS, np.asarray(east, float), np.asarray(north, float))


@dataclass(frozen=True)
class _Model:
    """Parameters of one lens model (Einstein radii for D_ls/D_s = 1; positions
    in arcsec East, North of the cluster centre; angles North through East)."""

    halo: dict
    shear: dict | None = None
    subhalo: dict | None = None
    member_mass: float = 1.0
    heavier_member: tuple | None = None  # (index in _MEMBERS, mass factor)


_MODELS = {
    "isothermal": _Model(halo=dict(kind="ellipsoid", centre=(0.0, 0.0), theta_e=19.7, q=0.72,
                                   pa=38.0, core=3.5)),
    "NFW shear": _Model(halo=dict(kind="NFW", centre=(0.3, -0.2), kappa_s=0.395, r_s=45.0),
                        shear=dict(gamma=0.085, pa=128.0), member_mass=0.85),
    "perturbed": _Model(halo=dict(kind="ellipsoid", centre=(0.35, -0.25), theta_e=19.1, q=0.70,
                                  pa=41.0, core=3.3),
                        subhalo=dict(centre=(17.5, 1.0), theta_e=0.3, core=0.2),
                        heavier_member=(2, 1.2)),
}


def _model_spec(model):
    if model not in _MODELS:
        raise LensviewInputError(
            f"There is no demo model {model!r}; choose one of {', '.join(MODEL_NAMES)}.")
    return _MODELS[model]


def lens_profiles(model):
    """Analytic profiles of one demo lens model (normalised to D_ls/D_s = 1).

    Parameters
    ----------
    model : str
        One of `MODEL_NAMES`.

    Returns
    -------
    list
        `lensview.analytic` profiles; their deflections, summed, are the
        model's maps (for D_ls/D_s = 1).

    Raises
    ------
    LensviewInputError
        For a name that is not one of `MODEL_NAMES`.
    """
    spec = _model_spec(model)
    halo = spec.halo
    if halo["kind"] == "ellipsoid":
        profiles = [analytic.IsothermalEllipsoid(_sky(*halo["centre"]), halo["theta_e"] * u.arcsec,
                                                 halo["q"], halo["pa"] * u.deg,
                                                 core=halo["core"] * u.arcsec)]
    else:
        profiles = [analytic.NFW(_sky(*halo["centre"]), halo["kappa_s"], halo["r_s"] * u.arcsec)]
    if spec.shear:
        profiles.append(analytic.ExternalShear(spec.shear["gamma"], spec.shear["pa"] * u.deg,
                                               _sky(0.0, 0.0)))
    if spec.subhalo:
        profiles.append(analytic.IsothermalSphere(_sky(*spec.subhalo["centre"]),
                                                  spec.subhalo["theta_e"] * u.arcsec,
                                                  core=spec.subhalo["core"] * u.arcsec))
    for k, m in enumerate(_MEMBERS):
        factor = spec.member_mass
        if spec.heavier_member and spec.heavier_member[0] == k:
            factor *= spec.heavier_member[1]
        profiles.append(analytic.IsothermalSphere(_sky(m.east, m.north), m.theta_e * factor * u.arcsec,
                                                  core=m.core * u.arcsec))
    return profiles


def _describe_model(model):
    """One sentence on a model's ingredients, for the README."""
    spec = _model_spec(model)
    halo = spec.halo
    where = f"at ({halo['centre'][0]:+.2f}\", {halo['centre'][1]:+.2f}\") from the centre"
    if halo["kind"] == "ellipsoid":
        parts = [f"a cored isothermal ellipsoid halo (theta_E = {halo['theta_e']}\", q = {halo['q']}, "
                 f"PA {halo['pa']:.0f} deg, core {halo['core']}\") {where}"]
    else:
        parts = [f"an NFW halo (kappa_s = {halo['kappa_s']}, r_s = {halo['r_s']:.0f}\") {where}"]
    if spec.shear:
        parts.append(f"external shear {spec.shear['gamma']} at PA {spec.shear['pa']:.0f} deg")
    if spec.subhalo:
        sub = spec.subhalo
        parts.append(f"a dark subhalo (cored isothermal sphere, theta_E = {sub['theta_e']}\", "
                     f"core {sub['core']}\") at ({sub['centre'][0]:+.1f}\", "
                     f"{sub['centre'][1]:+.1f}\") near the arc")
    members = f"the {len(_MEMBERS)} members as cored isothermal spheres"
    if spec.member_mass != 1:
        members += f" with {spec.member_mass:g} times the truth's Einstein radii"
    if spec.heavier_member:
        k, factor = spec.heavier_member
        members += (f", the one at ({_MEMBERS[k].east:+.1f}\", {_MEMBERS[k].north:+.1f}\") "
                    f"{factor:g} times heavier")
    parts.append(members)
    return "; ".join(parts)


# ============================================================================ maps on disk
def _map_grid(grid, size_factor):
    """WCS and shape of one model's maps (same field of view at any size)."""
    n = _scaled_size(grid.size, size_factor)
    wcs = analytic.make_wcs(_sky(*grid.centre), (n, n), grid.scale * grid.size / n * u.arcsec,
                            rotation=grid.rotation * u.deg)
    return wcs, (n, n)


def _scaled_size(size, size_factor):
    return max(int(round(size * size_factor)), 32)


def _model_maps(grid, size_factor):
    """float32 deflection maps (arcsec along the map's pixel axes) as written."""
    wcs, shape = _map_grid(grid, size_factor)
    alpha_x, alpha_y = analytic.deflection_maps(lens_profiles(grid.name), wcs, shape)
    if grid.z_norm is not None:
        # Maps made for a source at z_norm hold ratio(z_norm) times the D_ls/D_s = 1 maps.
        ratio = distance_ratio(Z_LENS, grid.z_norm)
        alpha_x, alpha_y = alpha_x * ratio, alpha_y * ratio
    return alpha_x.astype(np.float32), alpha_y.astype(np.float32), wcs


def _map_header(grid, wcs, component=None):
    header = wcs.to_header()
    header["BUNIT"] = ("arcsec", "deflection along the map's own pixel axes")
    header["OBJECT"] = (CLUSTER_NAME, "invented demo cluster")
    header["MODEL"] = (grid.name, "lens model (invented)")
    header["Z_LENS"] = (Z_LENS, "lens redshift")
    if grid.z_norm is None:
        header["DLS_DS"] = (1.0, "maps normalised to D_ls/D_s = 1")
    else:
        header["Z_NORM"] = (grid.z_norm, "maps are the deflections for a source at this z")
    if component is not None:
        header["COMPONEN"] = (component, "deflection component along this pixel axis")
    header["ORIGIN"] = ("lensview demo", "invented data, see sample_images/README.md")
    return header


def _write_model(directory, grid, alpha_x, alpha_y, wcs):
    paths = [directory / name for name in grid.files]
    if grid.layout == "two files":
        for path, data, component in zip(paths, (alpha_x, alpha_y), ("x", "y")):
            fits.PrimaryHDU(data, _map_header(grid, wcs, component)).writeto(path, overwrite=True)
    elif grid.layout.startswith("one file, two"):
        hdus = [fits.PrimaryHDU(header=_map_header(grid, wcs))]
        for data, component in ((alpha_x, "x"), (alpha_y, "y")):
            hdus.append(fits.ImageHDU(data, _map_header(grid, wcs, component),
                                      name=f"ALPHA_{component.upper()}"))
        fits.HDUList(hdus).writeto(paths[0], overwrite=True)
    else:
        header = _map_header(grid, wcs)
        header["PLANE1"] = ("x", "first plane: deflection along pixel axis 1")
        header["PLANE2"] = ("y", "second plane: deflection along pixel axis 2")
        fits.PrimaryHDU(np.stack([alpha_x, alpha_y]), header).writeto(paths[0], overwrite=True)
    return paths


# ============================================================================ the fold
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


def _fold_frame(field):
    """Locate the fold nearest `_FOLD_TARGET` on the truth model's curves."""
    curves = field.critical_curves(Z_SOURCE)
    caustics = field.caustics(Z_SOURCE)
    tx, ty = field.sky_to_pixels(_sky(*_FOLD_TARGET))
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


# ============================================================================ images of a source
class _ImageFinder:
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
        from .counterparts import predict_counterimages

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


def _inward_for_separation(finder, along, separation, start):
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


# ============================================================================ the cutout
def _flux(mag):
    """Counts per second of an AB magnitude at the cutout's zero point."""
    return 10.0 ** (-0.4 * (mag - _ZERO_POINT))


def _sersic_amplitude(total, r_eff, n, ellip):
    """Surface brightness at r_eff of a Sersic profile of given total flux:
    L = 2 pi n Gamma(2n) e^b / b^(2n) I_e r_e^2 q (Graham & Driver 2005,
    PASA 22, 118), b from Gamma(2n) = 2 gamma(2n, b)."""
    b = gammaincinv(2 * n, 0.5)
    return total * b ** (2 * n) / (2 * np.pi * n * gamma_function(2 * n) * np.exp(b)
                                   * r_eff ** 2 * (1 - ellip))


def _source_brightness(uv_along, uv_inward, knots):
    """Surface brightness (counts/s/arcsec^2) of the source at fold-frame offsets."""
    host = _HOST
    total = _flux(host["mag"])
    brightness = Sersic2D.evaluate(uv_along, uv_inward,
                                   _sersic_amplitude(total, host["r_eff"], host["sersic_n"],
                                                     host["ellip"]),
                                   host["r_eff"], host["sersic_n"], host["along"], host["inward"],
                                   host["ellip"], np.radians(host["angle"]))
    for knot, inward in knots:
        if knot.sigma < _TRACED_SIGMA:
            continue
        r2 = (uv_along - knot.along) ** 2 + (uv_inward - inward) ** 2
        brightness = brightness + _flux(knot.mag) / (2 * np.pi * knot.sigma ** 2) * np.exp(
            -0.5 * r2 / knot.sigma ** 2)
    return brightness


def _cutout_wcs(size_factor):
    n = _scaled_size(_CUTOUT_SHAPE[0], size_factor)
    scale = _CUTOUT_SCALE * _CUTOUT_SHAPE[0] / n
    return analytic.make_wcs(_sky(*_CUTOUT_CENTRE), (n, n), scale * u.arcsec), (n, n), scale


def _subpixel_grid(shape):
    """Centres of the supersampled sub-pixels in cutout pixel coordinates."""
    ny, nx = shape
    sub_x = (np.arange(nx * _OVERSAMPLE) + 0.5) / _OVERSAMPLE - 0.5
    sub_y = (np.arange(ny * _OVERSAMPLE) + 0.5) / _OVERSAMPLE - 0.5
    return np.meshgrid(sub_x, sub_y)


def _lensed_source(field, fold, knots, cutout_wcs, shape, scale):
    """Supersampled lensed source: ray tracing through the truth model,
    surface brightness conserved (Schneider, Ehlers & Falco 1992, sec. 5.2)."""
    sub_x, sub_y = _subpixel_grid(shape)
    out = np.zeros(sub_x.size)
    chunk = 250_000
    flat_x, flat_y = sub_x.ravel(), sub_y.ravel()
    for start in range(0, flat_x.size, chunk):
        sky = cutout_wcs.pixel_to_world(flat_x[start:start + chunk], flat_y[start:start + chunk])
        mx, my = field.sky_to_pixels(sky)
        bx, by = field.trace_pixels(mx, my, Z_SOURCE)
        offset = np.column_stack([bx, by]) - fold.point
        along = offset @ fold.along * fold.scale
        inward = offset @ fold.inward * fold.scale
        values = _source_brightness(along, inward, knots)
        out[start:start + chunk] = np.where(np.isfinite(values), values, 0.0)
    return out.reshape(sub_x.shape) * (scale / _OVERSAMPLE) ** 2


def _map_to_cutout(field, cutout_wcs):
    """Linear map from truth-map pixel offsets to cutout pixel offsets."""
    return np.linalg.solve(cutout_wcs.celestial.pixel_scale_matrix, field.wcs.pixel_scale_matrix)


def _add_knot_images(image, finder, knot, beta, cutout_wcs):
    """Add the images of a small clump, each an elliptical Gaussian from the
    local linear lens mapping beta - beta_i = A (theta - theta_i), which
    keeps surface brightness and gives each image |mu| times the flux
    (Schneider, Ehlers & Falco 1992, sec. 5.2)."""
    field = finder.field
    xy, mu = finder.all_images(beta)
    terms = field.local_terms(xy[:, 0], xy[:, 1], warn=False)
    centres = np.column_stack(cutout_wcs.world_to_pixel(field.pixels_to_sky(xy[:, 0], xy[:, 1])))
    to_cutout = _map_to_cutout(field, cutout_wcs) * _OVERSAMPLE
    sigma = knot.sigma / finder.fold.scale
    f = finder.f
    for k in range(len(xy)):
        jacobian = np.array([[1 - f * terms.a11[k], -f * terms.a12[k]],
                             [-f * terms.a21[k], 1 - f * terms.a22[k]]])
        if not np.isfinite(jacobian).all():
            continue
        inverse = to_cutout @ np.linalg.inv(jacobian)
        # Image-plane covariance in sub-pixels, plus the variance of a sub-pixel box.
        covariance = sigma ** 2 * inverse @ inverse.T + np.eye(2) / 12
        _add_gaussian(image, (centres[k] + 0.5) * _OVERSAMPLE - 0.5, covariance,
                      abs(mu[k]) * _flux(knot.mag))


def _add_gaussian(image, centre, covariance, flux):
    """Add a normalised 2-D Gaussian stamp (sub-pixel units) of total ``flux``."""
    half = int(np.ceil(5 * np.sqrt(np.linalg.eigvalsh(covariance).max()))) + 1
    ix, iy = int(round(centre[0])), int(round(centre[1]))
    xs = np.arange(ix - half, ix + half + 1)
    ys = np.arange(iy - half, iy + half + 1)
    dx, dy = np.meshgrid(xs - centre[0], ys - centre[1])
    precision = np.linalg.inv(covariance)
    stamp = np.exp(-0.5 * (precision[0, 0] * dx * dx + 2 * precision[0, 1] * dx * dy
                           + precision[1, 1] * dy * dy))
    stamp *= flux / stamp.sum()
    keep_y = (ys >= 0) & (ys < image.shape[0])
    keep_x = (xs >= 0) & (xs < image.shape[1])
    if keep_x.any() and keep_y.any():
        image[np.ix_(ys[keep_y], xs[keep_x])] += stamp[np.ix_(keep_y, keep_x)]


def _position_angle_to_theta(wcs, pa_deg):
    """Sersic2D rotation angle (from +x, counter-clockwise in pixels) of a
    major axis at position angle ``pa_deg`` (North through East)."""
    matrix = wcs.celestial.pixel_scale_matrix
    east, north = np.sin(np.radians(pa_deg)), np.cos(np.radians(pa_deg))
    # Plane x is East; in a TAN WCS RA grows along the first world axis.
    px, py = np.linalg.solve(matrix, [east, north])
    return float(np.arctan2(py, px))


def _sersic_on_subgrid(sub_x, sub_y, x0, y0, mag, r_eff_pix, n, ellip, theta):
    return Sersic2D.evaluate(sub_x, sub_y, _sersic_amplitude(_flux(mag), r_eff_pix, n, ellip)
                             / _OVERSAMPLE ** 2, r_eff_pix, n, x0, y0, ellip, theta)


def _galaxies(cutout_wcs, shape, scale, arc_mask, rng):
    """Member galaxies where the models put them, and faint unlensed field
    galaxies at random places away from the arc (supersampled counts/s)."""
    sub_x, sub_y = _subpixel_grid(shape)
    image = np.zeros(sub_x.shape)
    for m in _MEMBERS:
        x0, y0 = cutout_wcs.world_to_pixel(_sky(m.east, m.north))
        x0, y0 = float(x0), float(y0)
        reach = 12 * m.r_eff / scale
        if not (-reach < x0 < shape[1] + reach and -reach < y0 < shape[0] + reach):
            continue
        image += _sersic_on_subgrid(sub_x, sub_y, x0, y0, m.mag, m.r_eff / scale, m.sersic_n,
                                    m.ellip, _position_angle_to_theta(cutout_wcs, m.pa))
    placed = 0
    ny, nx = shape
    while placed < 12:
        x0, y0 = rng.uniform(0, nx - 1), rng.uniform(0, ny - 1)
        mag = rng.uniform(24.0, 27.5)
        r_eff = rng.uniform(0.08, 0.30) / scale
        n = rng.choice([0.8, 1.0, 1.5, 2.5])
        ellip = rng.uniform(0.0, 0.6)
        theta = rng.uniform(0.0, np.pi)
        if arc_mask[int(round(y0)), int(round(x0))]:
            continue
        image += _sersic_on_subgrid(sub_x, sub_y, x0, y0, mag, r_eff, n, ellip, theta)
        placed += 1
    return image


def _deposit_points(image, positions, fluxes):
    """Add unresolved images to the supersampled grid (bilinear weights)."""
    for (x, y), flux in zip(positions, fluxes):
        gx, gy = (x + 0.5) * _OVERSAMPLE - 0.5, (y + 0.5) * _OVERSAMPLE - 0.5
        ix, iy = int(np.floor(gx)), int(np.floor(gy))
        fx, fy = gx - ix, gy - iy
        for dy, wy in ((0, 1 - fy), (1, fy)):
            for dx, wx in ((0, 1 - fx), (1, fx)):
                if 0 <= iy + dy < image.shape[0] and 0 <= ix + dx < image.shape[1]:
                    image[iy + dy, ix + dx] += flux * wx * wy


def _psf_kernel(scale):
    """Moffat PSF (Moffat 1969, A&A 3, 455) of FWHM `_PSF_FWHM`, on the
    supersampled grid, normalised to unit sum."""
    sub = scale / _OVERSAMPLE
    alpha = _PSF_FWHM / (2 * np.sqrt(2 ** (1 / _PSF_BETA) - 1))
    half = int(np.ceil(1.2 / sub))
    r = np.arange(-half, half + 1) * sub
    rx, ry = np.meshgrid(r, r)
    kernel = (1 + (rx ** 2 + ry ** 2) / alpha ** 2) ** (-_PSF_BETA)
    return kernel / kernel.sum()


def _bin(image):
    ny, nx = image.shape[0] // _OVERSAMPLE, image.shape[1] // _OVERSAMPLE
    return image.reshape(ny, _OVERSAMPLE, nx, _OVERSAMPLE).sum(axis=(1, 3))


def _cutout_header(wcs, seed):
    header = wcs.to_header()
    header["BUNIT"] = ("count/s", "invented detector counts per second")
    header["PHOTZP"] = (_ZERO_POINT, "AB magnitude of 1 count/s")
    header["PSF_FWHM"] = (_PSF_FWHM, "[arcsec] Moffat PSF FWHM")
    header["PSF_BETA"] = (_PSF_BETA, "Moffat PSF index")
    header["SKYSIGMA"] = (_SKY_SIGMA, "[count/s] Gaussian sky noise per pixel")
    header["OBJECT"] = (CLUSTER_NAME, "invented demo cluster")
    header["Z_LENS"] = (Z_LENS, "cluster redshift")
    header["Z_ARC"] = (Z_SOURCE, "redshift of the lensed galaxy")
    header["DEMOSEED"] = (seed, "seed of the sky noise and field galaxies")
    header["ORIGIN"] = ("lensview demo", "invented data, see sample_images/README.md")
    return header


# ============================================================================ generation
def _check_options(seed, size_factor):
    if seed is None:
        seed = DEFAULT_SEED
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise LensviewInputError(f"The demo seed must be a non-negative whole number; got {seed!r}.")
    try:
        size_factor = float(size_factor)
    except (TypeError, ValueError):
        size_factor = float("nan")
    if not 0.2 <= size_factor <= 2.0:
        raise LensviewInputError(
            f"size_factor must be a number from 0.2 to 2 (1 = the bundled files); got {size_factor!r}.")
    return int(seed), size_factor


def generate_demo(directory=DEMO_DIRECTORY, seed=None, *, size_factor=1.0):
    """Write the invented demo scenario (deterministic for a given seed).

    Parameters
    ----------
    directory : str or path-like
        Folder to write into (created if needed); files there with the demo's
        names are replaced.
    seed : int, optional
        Seed of the sky noise and the field galaxies (default `DEFAULT_SEED`,
        that of the bundled files). The lens models, the source and the
        members do not depend on it.
    size_factor : float
        Pixel counts of the cutout and the maps relative to the bundled files
        (0.2 to 2), over the same fields of view; smaller is faster.

    Returns
    -------
    list of `pathlib.Path`
        The files written: model maps, cutout, candidate list, README, library versions.

    Raises
    ------
    LensviewInputError
        For a seed that is not a non-negative integer or a size factor out of range.
    """
    seed, size_factor = _check_options(seed, size_factor)
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    from .deflection import DeflectionField

    written, fields = [], []
    for grid in _GRIDS:
        alpha_x, alpha_y, wcs = _model_maps(grid, size_factor)
        written += _write_model(directory, grid, alpha_x, alpha_y, wcs)
        fields.append(DeflectionField(alpha_x, alpha_y, wcs, z_lens=Z_LENS, z_norm=grid.z_norm,
                                      name=grid.name))
    truth = fields[MODEL_NAMES.index(TRUTH_MODEL)]
    fold = _fold_frame(truth)
    finder = _ImageFinder(truth, fold)

    knots = []
    for knot in _KNOTS:
        inward = knot.inward
        if knot.label == "C":
            inward = _inward_for_separation(finder, knot.along, _COMPACT_SEPARATION, 1e-5)
        elif knot.label == "M1":
            inward = _inward_for_separation(finder, knot.along, _MIRROR_SEPARATION, 2e-3)
        knots.append((knot, inward))

    images = {knot.label: finder.pair(fold.source(knot.along, inward))
              for knot, inward in knots if knot.label}
    image, cutout_wcs, arc_mu = _render_cutout(finder, knots, images["C"], size_factor, seed)
    cutout_path = directory / CUTOUT_FILE
    fits.PrimaryHDU(image, _cutout_header(cutout_wcs, seed)).writeto(cutout_path, overwrite=True)
    written.append(cutout_path)

    truth_values = _truth_values(fields, fold, knots, images, arc_mu)
    candidates = _candidate_table(truth, images, knots, truth_values)
    candidate_path = directory / CANDIDATE_FILE
    candidates.write(candidate_path, format="ascii.ecsv", overwrite=True)
    written.append(candidate_path)
    readme_path = directory / README_FILE
    readme_path.write_text(_readme(fields, truth_values, candidates, size_factor, seed),
                           encoding="utf-8")
    written.append(readme_path)
    versions_path = directory / VERSIONS_FILE
    versions_path.write_text(json.dumps(library_versions(), indent=1) + "\n", encoding="utf-8")
    written.append(versions_path)
    return written


def library_versions():
    """The versions of the libraries whose arithmetic the demo files depend on.

    Returns
    -------
    dict
        ``numpy``, ``scipy``, ``astropy`` versions and the machine
        architecture; the same values regenerate the files bit for bit.
    """
    import platform

    import astropy
    import scipy

    return {"numpy": np.__version__, "scipy": scipy.__version__,
            "astropy": astropy.__version__, "machine": platform.machine()}


def _render_cutout(finder, knots, compact_images, size_factor, seed):
    """The observed image (float32), its WCS and the arc's total magnification
    (lensed over intrinsic flux of the extended source, noise free)."""
    truth, fold = finder.field, finder.fold
    cutout_wcs, shape, scale = _cutout_wcs(size_factor)
    lensed = _lensed_source(truth, fold, knots, cutout_wcs, shape, scale)
    for knot, inward in knots:
        if 0 < knot.sigma < _TRACED_SIGMA:
            _add_knot_images(lensed, finder, knot, fold.source(knot.along, inward), cutout_wcs)
    intrinsic = _flux(_HOST["mag"]) + sum(_flux(k.mag) for k, _ in knots if k.sigma > 0)
    arc_mu = float(lensed.sum() / intrinsic)
    compact_xy, compact_mu = compact_images
    cx, cy = cutout_wcs.world_to_pixel(truth.pixels_to_sky(compact_xy[:, 0], compact_xy[:, 1]))
    compact = next(k for k, _ in knots if k.label == "C")
    _deposit_points(lensed, np.column_stack([cx, cy]), np.abs(compact_mu) * _flux(compact.mag))

    rng = np.random.default_rng(seed)
    galaxies = _galaxies(cutout_wcs, shape, scale, _arc_mask(_bin(lensed), scale), rng)
    model_image = _bin(fftconvolve(lensed + galaxies, _psf_kernel(scale), mode="same"))
    image = (model_image + rng.normal(0.0, _SKY_SIGMA, shape)).astype(np.float32)
    return image, cutout_wcs, arc_mu


def _arc_mask(arc, scale):
    """Pixels of the lensed galaxy (above a tenth of the sky noise), grown by 1 arcsec."""
    from scipy import ndimage

    grow = int(np.ceil(1.0 / scale))
    return ndimage.binary_dilation(arc > 0.1 * _SKY_SIGMA, iterations=grow)


# ============================================================================ true values
def _truth_values(fields, fold, knots, images, arc_mu):
    """The numbers the README and the candidate list report, from the maps."""
    from .counterparts import predict_counterimages
    from .measure import measure_candidates

    truth = fields[MODEL_NAMES.index(TRUTH_MODEL)]
    pc_per_arcsec_source = angular_scale(Z_SOURCE).to_value(u.pc / u.arcsec)
    fold_image = truth.pixels_to_sky(*fold.image)
    at_fold = measure_candidates(fold_image, fields, Z_SOURCE)
    values = dict(
        fold_source=truth.pixels_to_sky(*fold.point),
        fold_image=fold_image,
        cusp_distance=fold.cusp_distance,
        scaling=truth.scaling_factor(Z_SOURCE),
        arc_mu=arc_mu,
        pc_per_arcsec_lens=angular_scale(Z_LENS).to_value(u.pc / u.arcsec),
        pc_per_arcsec_source=pc_per_arcsec_source,
        curve_offsets_at_fold={row["model"]: float(row["offset_arcsec"]) for row in at_fold},
        knots={},
    )
    for knot, inward in knots:
        if not knot.label:
            continue
        xy, mu = images[knot.label]
        sky = truth.pixels_to_sky(xy[:, 0], xy[:, 1])
        measured = measure_candidates(sky, [truth], Z_SOURCE)
        midpoint = measure_candidates(truth.pixels_to_sky(*xy.mean(axis=0)), [truth], Z_SOURCE)
        values["knots"][knot.label] = dict(
            knot=knot, inward=inward, images=sky, mu=mu,
            separation=float(sky[0].separation(sky[1]).arcsec),
            curve_offsets=np.asarray(measured["offset_arcsec"], float),
            midpoint_offset=float(midpoint["offset_arcsec"][0]),
            source=truth.pixels_to_sky(*fold.source(knot.along, inward)),
            caustic_offset_pc=inward * pc_per_arcsec_source,
        )
    outer = images["M4"][0][0]
    values["source_images"] = predict_counterimages(
        truth.pixels_to_sky(outer[:1], outer[1:])[0], truth, Z_SOURCE)
    return values


def _candidate_table(truth, images, knots, values):
    rows = []
    pair_id = 0
    for knot, _ in knots:
        if not knot.label:
            continue
        xy, mu = images[knot.label]
        if knot.label == "C":
            # The two images blend into one knot; a user marks its light centre.
            weights = np.abs(mu) / np.abs(mu).sum()
            merged = truth.pixels_to_sky(*(weights @ xy))
            rows.append((merged.ra.deg, merged.dec.deg, "C", -1, knot.note))
            continue
        pair_id += 1
        sky = truth.pixels_to_sky(xy[:, 0], xy[:, 1])
        for suffix, coord, parity in zip("ab", sky, ("even", "odd")):
            rows.append((coord.ra.deg, coord.dec.deg, knot.label + suffix, pair_id,
                         f"{knot.note} ({parity} parity)"))
    table = Table(rows=rows, names=("ra", "dec", "label", "pair_id", "note"),
                  dtype=(float, float, str, np.int64, str))
    table["ra"].unit = u.deg
    table["dec"].unit = u.deg
    compact = values["knots"]["C"]
    table.meta.update(
        scenario=f"{CLUSTER_NAME} (invented demo data)",
        z_lens=Z_LENS,
        z_source=Z_SOURCE,
        truth_model=TRUTH_MODEL,
        cosmology="Planck18",
        compact_images_ra=[float(v) for v in compact["images"].ra.deg],
        compact_images_dec=[float(v) for v in compact["images"].dec.deg],
        compact_images_mu=[float(v) for v in compact["mu"]],
        compact_source_ra=float(compact["source"].ra.deg),
        compact_source_dec=float(compact["source"].dec.deg),
    )
    return table


# ============================================================================ loading
def load_demo(directory=None):
    """Load the demo scenario through `lensview.fitsio` and `lensview.export`.

    Parameters
    ----------
    directory : str or path-like, optional
        Folder written by `generate_demo`; default `DEMO_DIRECTORY`.

    Returns
    -------
    cutout : `~lensview.fitsio.Cutout`
        The image of the arc.
    fields : list of `~lensview.DeflectionField`
        The three lens models, in the order of `MODEL_NAMES`, with the lens
        redshift and normalisation read from the map headers (``Z_LENS``,
        ``Z_NORM``).
    candidates : `~astropy.table.Table`
        The marked knots (``ra``, ``dec``, ``label``, ``pair_id``, ``note``);
        ``meta`` holds the redshifts and the truth model's compact-object
        images.

    Raises
    ------
    LensviewInputError
        If a demo file is missing.
    """
    from .deflection import DeflectionField
    from .export import read_candidates
    from .fitsio import read_cutout

    directory = DEMO_DIRECTORY if directory is None else Path(directory)
    needed = [directory / name for grid in _GRIDS for name in grid.files]
    needed += [directory / CUTOUT_FILE, directory / CANDIDATE_FILE]
    missing = [p.name for p in needed if not p.is_file()]
    if missing:
        raise LensviewInputError(
            f"The demo files {', '.join(missing)} are missing from {directory}; write them with "
            f"`lensview demo {directory}` (or lensview.demo.generate_demo).")
    cutout = read_cutout(directory / CUTOUT_FILE)
    fields = []
    for grid in _GRIDS:
        paths = [directory / name for name in grid.files]
        header = fits.getheader(paths[0], ext=0)
        z_norm = header.get("Z_NORM")
        fields.append(DeflectionField.from_fits(
            *paths, units="arcsec", z_lens=float(header["Z_LENS"]),
            z_norm=None if z_norm is None else float(z_norm), name=grid.name))
    candidates = read_candidates(directory / CANDIDATE_FILE)
    written = Table.read(directory / CANDIDATE_FILE, format="ascii.ecsv")
    candidates["note"] = written["note"]
    candidates.meta.update(written.meta)
    return cutout, fields, candidates


# ============================================================================ README
def _radec(coord):
    return f"{coord.ra.deg:.7f}, {coord.dec.deg:+.7f}"


def _readme(fields, values, candidates, size_factor, seed):
    from .measure import measure_candidates

    grids = "\n".join(
        f"| `{'`, `'.join(g.files)}` | {g.name} | {g.layout} | "
        f"{'D_ls/D_s = 1' if g.z_norm is None else f'source at z = {g.z_norm} (`Z_NORM`)'} | "
        f"{_scaled_size(g.size, size_factor)}^2 pixels of "
        f"{g.scale * g.size / _scaled_size(g.size, size_factor):.4g}\", "
        f"+y axis at PA {g.rotation:+.0f} deg |"
        for g in _GRIDS)
    models = "\n".join(f"* `{name}`{' (the truth)' if name == TRUTH_MODEL else ''}: "
                       f"{_describe_model(name)}." for name in MODEL_NAMES)
    members = ", ".join(f"({m.east:+.1f}\", {m.north:+.1f}\")" for m in _MEMBERS)
    cutout_n = _scaled_size(_CUTOUT_SHAPE[0], size_factor)
    cutout_scale = _CUTOUT_SCALE * _CUTOUT_SHAPE[0] / cutout_n
    knots = values["knots"]
    compact, mirror = knots["C"], knots["M1"]
    pairs = "\n".join(
        f"| {label} | {k['inward'] * 1e3:.4g} mas ({k['caustic_offset_pc']:.4g} pc) | "
        f"{k['knot'].mag} | {k['knot'].sigma * 1e3:g} mas | {k['separation']:.3f}\" | "
        f"{k['mu'][0]:+.1f} / {k['mu'][1]:+.1f} | "
        f"{k['curve_offsets'][0]:.3f}\" / {k['curve_offsets'][1]:.3f}\" | "
        f"{k['midpoint_offset'] * 1e3:.1f} mas |"
        for label, k in knots.items())
    outer_mu = np.abs(np.concatenate([knots[label]["mu"] for label in ("M2", "M3", "M4")]))
    coords = SkyCoord(np.asarray(candidates["ra"]) * u.deg, np.asarray(candidates["dec"]) * u.deg)
    spread = measure_candidates(coords, fields, Z_SOURCE, labels=list(candidates["label"]))
    by_key = {(row["label"], row["model"]): row for row in spread}
    header = " | ".join(f"mu, offset ({name})" for name in MODEL_NAMES)
    spread_rows = "\n".join(
        f"| {row['label']} | {row['ra']:.7f} | {row['dec']:+.7f} | {row['pair_id']} | "
        + " | ".join(_mu_offset(by_key[(row['label'], name)]) for name in MODEL_NAMES) + " |"
        for row in candidates)
    source_rows = "\n".join(f"| {i} | {row['ra']:.7f} | {row['dec']:+.7f} | {row['mu']:+.2f} |"
                            for i, row in enumerate(values["source_images"]))
    lens_pc, source_pc = values["pc_per_arcsec_lens"], values["pc_per_arcsec_source"]
    c_offsets, c_mu = compact["curve_offsets"], compact["mu"]
    fold_offsets = ", ".join(f"{name} {values['curve_offsets_at_fold'][name]:.3f}\""
                             for name in MODEL_NAMES)
    return f"""# Demo scenario: the {CLUSTER_NAME} (invented data)

Everything in this folder is invented and was written by `lensview.demo`:
the cluster, its name, position and redshift, its galaxies, the lensed
galaxy and every number below. No real object, survey or publication is
behind any of it. The app opens on these files, and the README examples and
end-to-end tests use them:

```python
from lensview.demo import load_demo
cutout, fields, candidates = load_demo()   # fitsio.Cutout, 3 DeflectionFields, Table
```

Regenerate them (the bundled files use seed {seed}) with
`lensview demo sample_images`, or `lensview.demo.generate_demo("sample_images")`:
bit for bit with the library versions in `{VERSIONS_FILE}`; other releases
round differently, far below the noise and a micro-arcsecond.

## The scenario

A massive cluster at **z_lens = {Z_LENS}** (centre RA, Dec = {_radec(_CENTRE)} deg)
lenses a clumpy star-forming galaxy at **z_source = {Z_SOURCE}** into a giant arc
that crosses the tangential critical curve at a fold. Cosmology: Planck18
(D_ls/D_s = {values['scaling']:.4f} for the source; 1\" = {lens_pc:.0f} pc in the lens plane and
{source_pc:.0f} pc in the source plane).

Lens models of the same cluster, deliberately different (Einstein radii for
D_ls/D_s = 1; positions in arcsec East and North of the cluster centre):

{models}

Member galaxies at {members}; the first is the brightest cluster galaxy.
Near the arc the models' tangential curves lie apart: the truth's fold point
is {fold_offsets} from each model's nearest critical curve.

The source, in the source plane, is set out from the fold point of the
caustic (offsets along the caustic and towards its inside): an exponential
disk (half-light radius {_HOST['r_eff']}\" = {_HOST['r_eff'] * source_pc:.0f} pc, intrinsic AB
{_HOST['mag']}) with Gaussian star-forming clumps, and a compact unresolved object (intrinsic AB
{_KNOTS[0].mag}) just inside the caustic.

The cutout `{CUTOUT_FILE}` has {cutout_n} x {cutout_n} pixels of {cutout_scale:.4g}\", North up
and East left (celestial TAN WCS), in counts per second with the AB zero point
`PHOTZP = {_ZERO_POINT}`. It was ray traced through the truth model with
{_OVERSAMPLE} x {_OVERSAMPLE} sub-pixels per pixel (surface brightness conserved); clumps
smaller than the sub-pixels were drawn from their images' local lens
mapping, and the compact object's two images as point sources with their
magnifications. Member galaxies are Sersic profiles at the models' member
positions, and there are twelve faint unlensed field galaxies. The image is
convolved with a Moffat PSF (FWHM {_PSF_FWHM}\", beta = {_PSF_BETA}) and carries Gaussian sky
noise (sigma = {_SKY_SIGMA} count/s per pixel) from seed {seed}.

## Files

| files | model | layout | normalisation | grid |
| --- | --- | --- | --- | --- |
{grids}

Deflections are in arcsec along each map's own +x and +y pixel axes
(`BUNIT = 'arcsec'`). Every map header holds `Z_LENS`, and `Z_NORM` where the
maps are normalised to a reference source redshift instead of D_ls/D_s = 1.
`{CANDIDATE_FILE}` lists the knots a user would mark (`ra`, `dec`, `label`,
`pair_id`, `note`); its metadata hold the redshifts and the true images of the
compact object.

## True values (truth model `{TRUTH_MODEL}`, z_source = {Z_SOURCE})

The arc crosses the tangential critical curve at {_radec(values['fold_image'])}; the
fold point of the caustic is {_radec(values['fold_source'])}, {values['cusp_distance']:.2f}\" along the
caustic from the nearest cusp.

**Compact object C**: {compact['inward'] * 1e6:.1f} micro-arcsec ({compact['caustic_offset_pc']:.3f} pc)
inside the caustic. Its two images lie {compact['separation']:.3f}\" apart (well inside the PSF,
so they merge into one knot on the curve), {c_offsets[0]:.3f}\" and {c_offsets[1]:.3f}\" from
the critical curve, with mu = {c_mu[0]:+.0f} and {c_mu[1]:+.0f}: **total magnification
{np.abs(c_mu).sum():.0f}**. The images are at {_radec(compact['images'][0])} and
{_radec(compact['images'][1])}.

**Mirrored clump M1**: {mirror['inward'] * 1e3:.2f} mas inside the caustic. Its two images lie
{mirror['separation']:.3f}\" apart on either side of the curve, with opposite parity (mu =
{mirror['mu'][0]:+.1f} and {mirror['mu'][1]:+.1f}); their midpoint is
{mirror['midpoint_offset'] * 1e3:.1f} mas from the curve.

| knot | inside the caustic by | intrinsic AB | sigma | image separation | mu (even / odd) \
| images' offsets from the curve | midpoint to curve |
| --- | --- | --- | --- | --- | --- | --- | --- |
{pairs}

The lensed galaxy's total magnification in the cutout (lensed flux over
intrinsic flux, without the compact object, noise free) is **{values['arc_mu']:.1f}**; the
clumps' images away from the curve (M2-M4) are magnified {outer_mu.min():.0f}-{outer_mu.max():.0f} times,
as cluster arcs typically are.

All images of the source of M4 on the truth map, counter-images outside the
cutout included (`lensview.predict_counterimages`):

| image | ra | dec | mu |
| --- | --- | --- | --- |
{source_rows}

## Candidate list and model spread

Magnification and offset from each model's nearest critical curve
(`lensview.measure_candidates`):

| label | ra | dec | pair_id | {header} |
| --- | --- | --- | --- | {' | '.join('---' for _ in MODEL_NAMES)} |
{spread_rows}
"""


def _mu_offset(row):
    mu = float(row["mu"])
    text = f"{mu:+.3g}" if abs(mu) < 1e4 else "on the curve"
    return f"{text}, {float(row['offset_arcsec']):.3f}\""
