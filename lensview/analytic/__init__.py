"""Analytic lens profiles rendered onto WCS grids (tests and the demo).

Profiles live in the map's own intermediate world plane: for a TAN WCS the
plane coordinates (x East, y North, arcsec, about the reference point) are
an affine function of the pixel coordinates, plane = CD (pix - crpix), so
analytic and numerical quantities share one frame exactly. A profile centre
given on the sky is placed in that plane through the WCS.

Every profile is described for the map normalisation D_ls/D_s = 1 (its
Einstein radius, convergence scale or shear are those of a source with
D_ls/D_s = 1; multiply deflections by D_ls/D_s for a real source). Each one
evaluates on offsets (x, y) from its own centre, East and North in arcsec:

* ``deflection(x, y)`` -> (alpha_x, alpha_y) in arcsec along East, North,
* ``convergence(x, y)``,
* ``jacobian(x, y)`` -> (a11, a12, a21, a22) = d alpha_i / d theta_j, by
  complex-step differentiation (Squire & Trapp 1998, SIAM Review 40, 110):
  f'(x) = Im f(x + i h) / h has no subtractive cancellation and an error of
  order h^2 f''' / f', so with h = 1e-30 arcsec it is exact to rounding
  (relative ~1e-15) for the real-analytic deflections here.

Position angles are measured from North (y) through East (x). Singular
profiles (point mass, singular isothermal sphere and ellipsoid) give NaN at
their exact centre, where the deflection has no value.

Modules: `profiles` (the profiles) and `grids` (rendering them onto WCS
grids, and the map's intermediate world plane).
"""

from .grids import (convergence_map, deflection_maps, magnification_map, make_wcs,
                    plane_coordinates, plane_to_sky, sky_to_plane)
from .profiles import (NFW, CompositeLens, ExternalShear, IsothermalEllipsoid, IsothermalSphere,
                       PointMass)

__all__ = [
    "PointMass",
    "IsothermalSphere",
    "IsothermalEllipsoid",
    "NFW",
    "ExternalShear",
    "CompositeLens",
    "make_wcs",
    "plane_coordinates",
    "sky_to_plane",
    "plane_to_sky",
    "deflection_maps",
    "convergence_map",
    "magnification_map",
]
