"""The lens: a model's deflection field and what follows from it.

`stencils` (finite differences and local interpolation on the map's grid),
`field` (`DeflectionField`: derivative terms, det A, kappa, gamma, mu, ray
tracing), `curves` (critical curves and caustics as `Curve` objects) and
`loading` (`load_model`: a field from FITS files as their headers describe
them).
"""

from .curves import Curve, CurveSet, DroppedLoop
from .local import LocalFit, LocalTerms
from .field import DeflectionField
from .loading import FROM_HEADER, load_model

__all__ = ["Curve", "CurveSet", "DeflectionField", "DroppedLoop", "FROM_HEADER", "LocalFit",
           "LocalTerms", "load_model"]
