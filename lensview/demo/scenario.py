"""The invented scenario: the Lantern cluster, its lens models, its source and knots.

Everything here is invented: the cluster (a name of our own), its position,
its redshift, its member galaxies, the lensed background galaxy and every
number. Nothing is taken from a real object, survey or publication.
"""

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord

from .. import analytic
from ..errors import LensviewInputError


#: Folder of the bundled demo files (next to the package).
DEMO_DIRECTORY = Path(__file__).resolve().parents[2] / "sample_images"
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

CENTRE = SkyCoord(211.9374 * u.deg, -7.4218 * u.deg)
# The scenario plane: arcsec East and North of the cluster centre.
SCENARIO_WCS = analytic.make_wcs(CENTRE, (1, 1), 1 * u.arcsec)

CUTOUT_CENTRE = (10.0, 2.5)
CUTOUT_SHAPE = (600, 600)
CUTOUT_SCALE = 0.04  # arcsec per pixel
OVERSAMPLE = 3
PSF_FWHM = 0.10  # arcsec
PSF_BETA = 3.0
ZERO_POINT = 28.0  # AB magnitude of one count per second
SKY_SIGMA = 0.015  # counts per second per pixel
# Where the arc should cross the tangential curve (scenario plane, arcsec).
FOLD_TARGET = (14.5, 4.0)

# Compact object: its two images lie this far apart (arcsec), well inside the PSF ...
COMPACT_SEPARATION = 0.06
# ... and the mirrored clump's two images lie this far apart (arcsec).
MIRROR_SEPARATION = 0.8


@dataclass(frozen=True)
class Member:
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


MEMBERS = (
    Member(0.0, 0.0, 1.8, 0.30, 17.6, 2.4, 4.0, 0.25, 32.0),  # brightest cluster galaxy
    Member(6.5, 7.5, 0.6, 0.10, 20.3, 0.55, 4.0, 0.15, 75.0),
    Member(19.5, -2.5, 0.5, 0.10, 20.6, 0.45, 3.5, 0.30, 140.0),
    Member(9.0, -6.0, 0.4, 0.08, 21.1, 0.35, 4.0, 0.10, 10.0),
    Member(19.5, 10.0, 0.35, 0.08, 21.4, 0.30, 3.0, 0.35, 55.0),
    Member(-8.0, 9.0, 0.7, 0.12, 20.0, 0.60, 4.0, 0.20, 120.0),
    Member(-11.0, -7.0, 0.5, 0.10, 20.7, 0.45, 4.0, 0.25, 95.0),
    Member(4.0, -13.0, 0.45, 0.10, 20.9, 0.40, 4.0, 0.05, 0.0),
    Member(-3.0, 14.0, 0.4, 0.08, 21.2, 0.35, 3.5, 0.30, 160.0),
)


@dataclass(frozen=True)
class Grid:
    """Where and how one model's maps are written."""

    name: str
    layout: str
    files: tuple
    centre: tuple  # scenario plane, arcsec
    size: int  # pixels per side
    scale: float  # arcsec per pixel
    rotation: float  # degrees, position angle of the map's +y axis
    z_norm: float | None


GRIDS = (
    Grid("isothermal", "two files", ("isothermal_alpha_x.fits", "isothermal_alpha_y.fits"),
          (6.0, 2.0), 640, 0.080, 20.0, None),
    Grid("NFW shear", "one file, two image HDUs", ("nfw_shear_alpha.fits",),
          (5.0, 1.0), 560, 0.090, -35.0, 2.0),
    Grid("perturbed", "one file, a cube of two planes", ("perturbed_alpha_cube.fits",),
          (7.0, 3.0), 680, 0.075, 65.0, None),
)


@dataclass(frozen=True)
class Knot:
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


HOST = dict(along=0.0, inward=0.12, mag=26.0, r_eff=0.14, sersic_n=1.0, ellip=0.4, angle=60.0)
KNOTS = (
    Knot("C", 0.0, None, 32.0, 0.0,
          "compact object just inside the caustic: two images merged on the curve"),
    Knot("M1", 0.035, None, 30.5, 0.0004, "compact clump whose two mirrored images straddle the curve"),
    Knot("M2", -0.06, 0.05, 29.0, 0.0030, "clump with two mirrored images farther from the curve"),
    Knot("M3", 0.06, 0.10, 29.2, 0.0020, "clump with two mirrored images in the arc's outer parts"),
    Knot("M4", -0.03, 0.17, 29.4, 0.0025, "clump with two mirrored images near the arc's ends"),
    Knot("", 0.03, 0.075, 29.6, 0.0020, ""),
    Knot("", 0.09, 0.14, 29.8, 0.0030, ""),
    Knot("", -0.07, 0.21, 29.9, 0.0020, ""),
    Knot("", 0.08, 0.20, 27.5, 0.050, ""),
    Knot("", -0.08, 0.13, 27.7, 0.060, ""),
)
#: Clumps smaller than this (arcsec) are drawn from their images' local lens
#: mapping; ray tracing at the sub-pixel spacing would not sample them.
TRACED_SIGMA = 0.01


def scenario_sky(east, north):
    return analytic.plane_to_sky(SCENARIO_WCS, np.asarray(east, float), np.asarray(north, float))


@dataclass(frozen=True)
class Model:
    """Parameters of one lens model (Einstein radii for D_ls/D_s = 1; positions
    in arcsec East, North of the cluster centre; angles North through East)."""

    halo: dict
    shear: dict | None = None
    subhalo: dict | None = None
    member_mass: float = 1.0
    heavier_member: tuple | None = None  # (index in MEMBERS, mass factor)


MODELS = {
    "isothermal": Model(halo=dict(kind="ellipsoid", centre=(0.0, 0.0), theta_e=19.7, q=0.72,
                                   pa=38.0, core=3.5)),
    "NFW shear": Model(halo=dict(kind="NFW", centre=(0.3, -0.2), kappa_s=0.395, r_s=45.0),
                        shear=dict(gamma=0.085, pa=128.0), member_mass=0.85),
    "perturbed": Model(halo=dict(kind="ellipsoid", centre=(0.35, -0.25), theta_e=19.1, q=0.70,
                                  pa=41.0, core=3.3),
                        subhalo=dict(centre=(17.5, 1.0), theta_e=0.3, core=0.2),
                        heavier_member=(2, 1.2)),
}


def _model_spec(model):
    if model not in MODELS:
        raise LensviewInputError(
            f"There is no demo model {model!r}; choose one of {', '.join(MODEL_NAMES)}.")
    return MODELS[model]


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
        profiles = [analytic.IsothermalEllipsoid(scenario_sky(*halo["centre"]), halo["theta_e"] * u.arcsec,
                                                 halo["q"], halo["pa"] * u.deg,
                                                 core=halo["core"] * u.arcsec)]
    else:
        profiles = [analytic.NFW(scenario_sky(*halo["centre"]), halo["kappa_s"], halo["r_s"] * u.arcsec)]
    if spec.shear:
        profiles.append(analytic.ExternalShear(spec.shear["gamma"], spec.shear["pa"] * u.deg,
                                               scenario_sky(0.0, 0.0)))
    if spec.subhalo:
        profiles.append(analytic.IsothermalSphere(scenario_sky(*spec.subhalo["centre"]),
                                                  spec.subhalo["theta_e"] * u.arcsec,
                                                  core=spec.subhalo["core"] * u.arcsec))
    for k, m in enumerate(MEMBERS):
        factor = spec.member_mass
        if spec.heavier_member and spec.heavier_member[0] == k:
            factor *= spec.heavier_member[1]
        profiles.append(analytic.IsothermalSphere(scenario_sky(m.east, m.north), m.theta_e * factor * u.arcsec,
                                                  core=m.core * u.arcsec))
    return profiles


def describe_model(model):
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
    members = f"the {len(MEMBERS)} members as cored isothermal spheres"
    if spec.member_mass != 1:
        members += f" with {spec.member_mass:g} times the truth's Einstein radii"
    if spec.heavier_member:
        k, factor = spec.heavier_member
        members += (f", the one at ({MEMBERS[k].east:+.1f}\", {MEMBERS[k].north:+.1f}\") "
                    f"{factor:g} times heavier")
    parts.append(members)
    return "; ".join(parts)




@dataclass(frozen=True)
class DemoFilter:
    """One invented filter of the demo field and the cutout taken in it.

    The knots' magnitudes in `KNOTS` and `HOST` are those of the reference
    filter; the other filters scale them by the components' SEDs."""

    name: str
    pivot_um: float
    psf_fwhm: float  # arcsec
    zero_point: float  # AB magnitude of one count per second
    scale: float  # arcsec per pixel
    rotation: float  # degrees, position angle of the cutout's +y axis
    sky_sigma: float  # counts per second per pixel
    file: str


#: The filters of the demo field (invented names), blue to red; the reference
#: filter is the original cutout `CUTOUT_FILE`, unchanged.
FILTERS = (
    DemoFilter("lantern-090", 0.90, 0.085, 27.6, 0.040, 12.0, 0.018, "lantern_arc_090.fits"),
    DemoFilter("lantern-150", 1.50, PSF_FWHM, ZERO_POINT, CUTOUT_SCALE, 0.0, SKY_SIGMA,
               CUTOUT_FILE),
    DemoFilter("lantern-240", 2.40, 0.13, 28.3, 0.050, -8.0, 0.012, "lantern_arc_240.fits"),
    DemoFilter("lantern-380", 3.80, 0.17, 28.6, 0.060, 25.0, 0.010, "lantern_arc_380.fits"),
)
REFERENCE_FILTER = "lantern-150"
#: Rest-frame blackbody temperature (K) of the compact object C.
COMPACT_TEMPERATURE = 8000.0
#: f_nu proportional to wavelength**slope, for the parts without a blackbody.
HOST_SLOPE = 1.0
CLUMP_SLOPE = 0.0
MEMBER_SLOPE = 2.0
FIELD_SLOPE = 0.7
