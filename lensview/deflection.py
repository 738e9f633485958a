"""The deflection field of one lens model and everything derived from it.

A `DeflectionField` wraps the two deflection maps of a lens model on the
model's own pixel grid. All lensing quantities follow from the Jacobian
``a_ij = d alpha_i / d theta_j`` of the *unscaled* map; for a source
redshift with scaling factor ``f`` (design notes, section 4)::

    A = I - f a,   det A(f) = 1 - f T + f**2 D,
    T = a11 + a22,  D = a11 a22 - a12 a21,
    kappa = f T / 2,  gamma = f |((a11 - a22)/2, (a12 + a21)/2)|,
    lambda_t = 1 - kappa - gamma,  lambda_r = 1 - kappa + gamma,  mu = 1/det A.

(Schneider, Ehlers & Falco 1992, ch. 5; Narayan & Bartelmann 1996, sec. 2.)
det A is invariant under the linear map between sky and pixel coordinates, so
everything is computed on the map's pixel grid with alpha in pixel units.

Two evaluation paths, both free of any global spline:

* grid work in tiles of ``TILE`` x ``TILE`` cells, with fourth-order
  differences; T, D and the shear terms of each tile are cached, so a new
  source redshift costs one multiply-add per cached node;
* point work (any sky position) with a local polynomial fit of alpha whose
  analytic derivatives give the Jacobian there: the six-point Lagrange
  interpolant on float64 maps, and on float32 maps the widest least-squares
  window whose result agrees with narrower ones within the map's rounding
  noise (`lensview.precision`). det A is thus smooth near each point and mu is
  never interpolated.
"""

import os
import threading
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import astropy.units as u
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales
from scipy import ndimage

from . import cosmology as _cosmo
from .errors import LensviewInputError, OutsideFootprintWarning
from .precision import (FIT_DEGREE, WINDOW_LADDER, fit_degree, intersect_confidence, noise_aware,
                        rounding_sigma)
from .stencils import (
    LAGRANGE_NODES,
    central_difference_2,
    central_difference_4,
    fit_coefficients,
    fit_frame,
    fit_projector,
    gather_windows,
    monomials,
    window_starts,
)

__all__ = ["DeflectionField", "LocalTerms", "LocalFit", "load_model", "FROM_HEADER"]

#: Cells per tile side for grid work.
TILE = 16
#: Maps larger than this (pixels per side) locate curves on a coarse grid first.
HIERARCHY_THRESHOLD = 1024
#: Spacing of the coarse grid used to locate curves on large maps.
COARSE_STRIDE = 4
#: Relative disagreement between fourth- and second-order differences above
#: which a node counts as unresolved by the grid (e.g. a singular centre).
UNRESOLVED_TOLERANCE = 0.05
_TILE_BATCH = 2048
#: Threads for tile batches (numpy releases the GIL, so they use separate cores).
_WORKERS = min(4, os.cpu_count() or 1)
_POOL = None
_POOL_LOCK = threading.Lock()
#: Below these sizes work stays on the calling thread.
_THREADED_POINTS = 2000
_THREADED_TILES = 64
#: Points fitted at once by `DeflectionField.local_fit`.
_CHUNK_POINTS = 8192
_CURVE_CACHE_SIZE = 32


class LocalTerms:
    """Deflection (map pixels, unscaled) and its derivatives at points.

    Attributes ``ax, ay, a11, a12, a21, a22`` are arrays; with second
    derivatives requested also ``grad_T`` and ``grad_D`` (each a pair of
    arrays, d/dx and d/dy) for Newton steps on det A.
    """

    def __init__(self, frame, **arrays):
        self.frame = frame
        self.__dict__.update(arrays)

    def det_a(self, f):
        """det A for scaling factor ``f`` (design notes, section 4)."""
        trace = self.a11 + self.a22
        determinant = self.a11 * self.a22 - self.a12 * self.a21
        return 1.0 - f * trace + f * f * determinant

    def grad_det_a(self, f):
        """Gradient of det A in map pixels, as (d/dx, d/dy)."""
        return tuple(-f * gt + f * f * gd for gt, gd in zip(self.grad_T, self.grad_D))

    def convergence(self, f):
        return 0.5 * f * (self.a11 + self.a22)

    def shear(self, f):
        """Shear components (gamma1, gamma2) on the sky's axes.

        The Jacobian is taken to sky axes first (M a M^-1, M the pixel-to-
        plane matrix): trace and determinant survive the change of frame, the
        shear only when pixels are square.
        """
        return _sky_shear(self.a11, self.a12, self.a21, self.a22, self.frame, f)

    def eigenvalues(self, f):
        """(lambda_t, lambda_r) of the symmetric part of A."""
        kappa = self.convergence(f)
        gamma = np.hypot(*self.shear(f))
        return 1.0 - kappa - gamma, 1.0 - kappa + gamma


class LocalFit:
    """Polynomial fits of both deflection maps around a set of points.

    Made by `DeflectionField.local_fit`; `terms` evaluates them at the same
    points or at positions moved by up to about a pixel.
    """

    def __init__(self, field, col0, row0, window, coefficients, noise, valid):
        self.field = field
        self.col0, self.row0, self.window = col0, row0, window
        #: (2, N, d+1, d+1) tensor coefficients of the x and y maps (`stencils.fit_coefficients`)
        self.coefficients = coefficients
        #: (2, N) rounding noise (map pixels) of the two maps' node values
        self.noise = noise
        self.valid = valid

    @classmethod
    def scatter(cls, parts, members, valid):
        """Join fits made for disjoint groups of points back into point order."""
        n = len(valid)
        size = parts[0].coefficients.shape[-1]
        col0, row0, window = (np.zeros(n, np.int64) for _ in range(3))
        coefficients = np.zeros((2, n, size, size))
        noise = np.zeros((2, n))
        for part, mine in zip(parts, members):
            col0[mine], row0[mine], window[mine] = part.col0, part.row0, part.window
            coefficients[:, mine] = part.coefficients
            noise[:, mine] = part.noise
        return cls(parts[0].field, col0, row0, window, coefficients, noise, valid)

    def subset(self, index):
        """The fits of some of the points (an index array)."""
        return LocalFit(self.field, self.col0[index], self.row0[index], self.window[index],
                        self.coefficients[:, index], self.noise[:, index], self.valid[index])

    def terms(self, x, y, *, second_derivatives=False, noise=True):
        """`LocalTerms` at positions near the points the fits were made for.

        Parameters
        ----------
        x, y : array_like
            Map pixel positions, one per fitted point (any shape of that size).
        second_derivatives : bool
            Also the gradients of T and D, for Newton steps.
        noise : bool
            Also ``sigma_a`` (else None), e.g. not at every Newton step.
        """
        x = np.asarray(x, dtype=float)
        shape = x.shape
        x = x.ravel()
        y = np.asarray(y, dtype=float).ravel()
        inside = self.valid & self.field.inside(x, y)
        centre, scale = fit_frame(self.window)
        sx = (np.where(inside, x, self.col0) - self.col0 - centre) / scale
        sy = (np.where(inside, y, self.row0) - self.row0 - centre) / scale
        orders = 3 if second_derivatives else 2
        # Per order d, the monomials' d-th derivatives in pixels: d/dt = (1/scale) d/ds.
        bx = np.stack([monomials(sx, d, FIT_DEGREE) / scale[:, None] ** d for d in range(orders)], 2)
        by = np.stack([monomials(sy, d, FIT_DEGREE) / scale[:, None] ** d for d in range(orders)], 2)
        # fitted[k][n, dy, dx]: d^dy/dy^dy d^dx/dx^dx of map k at point n.
        fitted = [np.matmul(by.transpose(0, 2, 1), np.matmul(c, bx)) for c in self.coefficients]
        gram = {n: _padded_gram(int(n)) for n in (np.unique(self.window) if noise else ())}
        norms = np.empty((len(x), 2, 2))  # |weights| of (axis y, x) for orders 0, 1
        for n, g in gram.items():
            mine = self.window == n
            for axis, basis in enumerate((by, bx)):
                b = basis[mine][:, :, :2]
                norms[mine, axis] = np.sqrt(np.sum(b * np.matmul(g, b), axis=1))
        nan = np.where(inside, 0.0, np.nan)
        value = {}
        for k, label in enumerate("xy"):
            value["a" + label] = fitted[k][:, 0, 0]
            value[label + "_x"] = fitted[k][:, 0, 1]
            value[label + "_y"] = fitted[k][:, 1, 0]
            if second_derivatives:
                value[label + "_xx"] = fitted[k][:, 0, 2]
                value[label + "_xy"] = fitted[k][:, 1, 1]
                value[label + "_yy"] = fitted[k][:, 2, 0]
        value = {key: v + nan for key, v in value.items()}
        terms = dict(ax=value["ax"], ay=value["ay"], a11=value["x_x"], a12=value["x_y"],
                     a21=value["y_x"], a22=value["y_y"])
        if second_derivatives:
            a11, a12, a21, a22 = terms["a11"], terms["a12"], terms["a21"], terms["a22"]
            grad = {  # d(a_ij)/dx, d(a_ij)/dy
                "a11": (value["x_xx"], value["x_xy"]), "a12": (value["x_xy"], value["x_yy"]),
                "a21": (value["y_xx"], value["y_xy"]), "a22": (value["y_xy"], value["y_yy"]),
            }
            terms["grad_T"] = tuple(grad["a11"][k] + grad["a22"][k] for k in range(2))
            terms["grad_D"] = tuple(
                a22 * grad["a11"][k] + a11 * grad["a22"][k]
                - a21 * grad["a12"][k] - a12 * grad["a21"][k]
                for k in range(2)
            )
        # d/dx takes the x-derivative weights in x and the value weights in y, and so on.
        sx_, sy_ = norms[:, 1], norms[:, 0]
        terms["sigma_a"] = tuple(
            self.noise[k] * sy_[:, dy] * sx_[:, dx] + nan
            for k in range(2) for dy, dx in ((0, 1), (1, 0))) if noise else None
        for key, val in terms.items():
            if isinstance(val, tuple):
                terms[key] = tuple(np.reshape(v, shape) for v in val)
            elif val is not None:
                terms[key] = val.reshape(shape)
        terms["window"] = np.where(inside, self.window, 0).reshape(shape)
        return LocalTerms(self.field._frame, **terms)


class DeflectionField:
    """Deflection maps of one lens model on their own grid.

    Parameters
    ----------
    alpha_x, alpha_y : ndarray
        Deflection components along the map's own +x and +y pixel axes,
        2-D, same shape. Memory-mapped and float32 arrays are used as they
        are, without copies. NaNs mark cells without a model.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the maps.
    units : {"arcsec", "pixel"}
        Units of the deflection values.
    z_lens : float
        Redshift of the lens.
    z_norm : float or None
        None when the maps are normalised to D_ls/D_s = 1; otherwise the
        source redshift the maps were made for.
    cosmology : `~astropy.cosmology.Cosmology` or None
        Defaults to Planck18.
    name : str or None
        Model name used in tables, legends and region files.
    """

    def __init__(self, alpha_x, alpha_y, wcs, *, units="arcsec", z_lens,
                 z_norm=None, cosmology=None, name=None):
        alpha_x = _as_map(alpha_x, "alpha_x")
        alpha_y = _as_map(alpha_y, "alpha_y")
        if alpha_x.shape != alpha_y.shape:
            raise LensviewInputError(
                f"The x and y deflection maps differ in shape ({alpha_x.shape} vs "
                f"{alpha_y.shape}); supply the two components of the same model."
            )
        if min(alpha_x.shape) < LAGRANGE_NODES + 2:
            raise LensviewInputError(
                f"The deflection maps are only {alpha_x.shape} pixels; at least "
                f"{LAGRANGE_NODES + 2} pixels per side are needed to take derivatives."
            )
        if not isinstance(wcs, WCS) or not wcs.has_celestial:
            raise LensviewInputError(
                "The deflection maps need a celestial WCS (RA/Dec axes); give the "
                "WCS of the FITS header the maps came from."
            )
        if units not in ("arcsec", "pixel"):
            raise LensviewInputError(
                f"Unknown deflection units {units!r}; use 'arcsec' or 'pixel'."
            )
        self.cosmology = _cosmo.resolve_cosmology(cosmology)
        self.z_lens = _redshift(z_lens, "lens")
        if z_norm is not None:
            z_norm = _redshift(z_norm, "normalisation")
            # Raises a clear error when the reference source lies at or in front of the lens.
            _cosmo.distance_ratio(self.z_lens, z_norm, self.cosmology)
        self.z_norm = z_norm
        self.name = str(name) if name else "model"
        self.units = units
        self.wcs = wcs.celestial
        _warn_if_not_linear(self.wcs, self.name)
        self.shape = alpha_x.shape
        self._alpha = (alpha_x, alpha_y)
        self._noise_aware = noise_aware(alpha_x.dtype) or noise_aware(alpha_y.dtype)
        scales = proj_plane_pixel_scales(self.wcs) * 3600.0
        #: arcsec per pixel along the map's x and y axes
        self.pixel_scales = scales * u.arcsec
        self._to_pixels = (1.0 / scales) if units == "arcsec" else np.ones(2)
        matrix = self.wcs.pixel_scale_matrix
        matrix = matrix / np.sqrt(abs(np.linalg.det(matrix)))
        #: (M, M^-1): pixel offsets to sky-plane offsets, normalised to unit determinant
        self._frame = (matrix, np.linalg.inv(matrix))
        self._tiles = _TileCache(self)
        self._coarse_terms = None
        self._curve_cache = {}
        self._caustic_cache = {}
        self._check_not_empty()

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_fits(cls, x, y=None, *, units="arcsec", z_lens, z_norm=None,
                  cosmology=None, name=None):
        """Build a field from FITS files in any supported layout.

        Parameters
        ----------
        x, y : str, path or file-like
            Two 2-D files (x then y), or ``x`` alone holding two image HDUs or
            a cube of two planes.
        units, z_lens, z_norm, cosmology, name
            As for `DeflectionField`.
        """
        from .fitsio import read_deflection

        maps = read_deflection(x, y, units=units)
        if name is None:
            name = getattr(maps, "name", None)
        return cls(maps.alpha_x, maps.alpha_y, maps.wcs, units=maps.units,
                   z_lens=z_lens, z_norm=z_norm, cosmology=cosmology, name=name)

    def _check_not_empty(self):
        sample = np.asarray(self._alpha[0][::COARSE_STRIDE, ::COARSE_STRIDE])
        if np.isfinite(sample).any():
            return
        if not np.isfinite(np.asarray(self._alpha[0])).any():
            raise LensviewInputError(
                f"Model {self.name!r} has no finite deflection values (all NaN); "
                "check that the right file or HDU was given."
            )

    def __repr__(self):
        return (f"<DeflectionField {self.name!r} {self.shape[1]}x{self.shape[0]} "
                f"z_lens={self.z_lens} z_norm={self.z_norm}>")

    # ------------------------------------------------------------------ redshift scaling
    def scaling_factor(self, z_source):
        """Factor f that turns the stored maps into deflections for ``z_source``."""
        return _cosmo.scaling_factor(self.z_lens, z_source, self.z_norm, self.cosmology)

    # ------------------------------------------------------------------ coordinates
    def sky_to_pixels(self, coords):
        """Map pixel positions (x, y) of sky positions."""
        x, y = self.wcs.world_to_pixel(coords)
        return np.atleast_1d(np.asarray(x, float)), np.atleast_1d(np.asarray(y, float))

    def pixels_to_sky(self, x, y):
        """ICRS sky positions of map pixel positions."""
        return _icrs(self.wcs.pixel_to_world(x, y))

    def inside(self, x, y):
        """True where a pixel position lies on the map."""
        ny, nx = self.shape
        return (np.isfinite(x) & np.isfinite(y) & (x >= 0) & (x <= nx - 1)
                & (y >= 0) & (y <= ny - 1))

    def contains(self, coords):
        """True where a sky position lies on the map and the model is defined."""
        x, y = self.sky_to_pixels(coords)
        return np.isfinite(self.local_terms(x, y, warn=False).a11)

    def node_deflection(self, rows, cols):
        """Unscaled deflection in map pixels at grid nodes.

        Parameters
        ----------
        rows, cols : index
            Any numpy index into the map (integer arrays or slices).

        Returns
        -------
        ax, ay : ndarray
            float64 copies; multiply by `scaling_factor` for a source redshift.
        """
        return tuple(np.asarray(alpha[rows, cols], np.float64) * factor
                     for alpha, factor in zip(self._alpha, self._to_pixels))

    def require_overlap(self, wcs, shape, samples=17):
        """Raise `LensviewInputError` if the model covers no part of an image.

        Parameters
        ----------
        wcs : `~astropy.wcs.WCS`
            Celestial WCS of the image (e.g. the cutout).
        shape : tuple of int
            (ny, nx) of the image.
        samples : int
            The image is sampled on a ``samples`` x ``samples`` grid.
        """
        ny, nx = shape
        xs, ys = np.meshgrid(np.linspace(0, nx - 1, samples), np.linspace(0, ny - 1, samples))
        coords = wcs.celestial.pixel_to_world(xs.ravel(), ys.ravel())
        if not np.any(self.contains(coords)):
            centre = wcs.celestial.pixel_to_world((nx - 1) / 2, (ny - 1) / 2)
            raise LensviewInputError(
                f"Model {self.name!r} does not cover any part of the cutout (centred on RA "
                f"{centre.ra.deg:.5f}, Dec {centre.dec.deg:.5f}); use a model of this field, or a "
                "cutout inside the model's footprint.")

    # ------------------------------------------------------------------ point evaluation
    def local_terms(self, x, y, *, second_derivatives=False, warn=True, windows=None):
        """Deflection and Jacobian at map pixel positions.

        A shortcut for ``local_fit(x, y).terms(x, y)``; see `local_fit` for
        the choice of fit.

        Parameters
        ----------
        x, y : array_like
            Map pixel positions (0-based).
        second_derivatives : bool
            Also return the gradients of T and D, for Newton steps.
        warn : bool
            Warn when positions lie outside the map (they get NaN).
        windows : array_like of int, optional
            As for `local_fit`.

        Returns
        -------
        LocalTerms
            Also carries ``window`` (nodes per axis used at each point) and
            ``sigma_a`` (standard deviations of a11, a12, a21, a22 from the
            map's rounding noise).
        """
        return self.local_fit(x, y, warn=warn, windows=windows).terms(
            x, y, second_derivatives=second_derivatives)

    def local_fit(self, x, y, *, warn=True, windows=None):
        """Local polynomial fits of both maps around map pixel positions.

        On float64 maps the fit is the 6-node (degree-5) Lagrange
        interpolant. On maps stored with less precision (float32) each point
        gets the widest least-squares window of
        `lensview.precision.WINDOW_LADDER` whose Jacobian agrees with the
        narrower windows' within their rounding noise (`lensview.precision`).
        The fits stay valid for positions moved by up to a pixel, so Newton
        iterations evaluate them without gathering the map again.

        Parameters
        ----------
        x, y : array_like
            Map pixel positions (0-based).
        warn : bool
            Warn when positions lie outside the map (their terms are NaN).
        windows : array_like of int, optional
            Nodes per axis for each point (e.g. the ``window`` of earlier
            `LocalTerms`); skips the choice.

        Returns
        -------
        LocalFit
        """
        x = np.atleast_1d(np.asarray(x, dtype=float)).ravel()
        y = np.atleast_1d(np.asarray(y, dtype=float)).ravel()
        inside = self.inside(x, y)
        if warn and not inside.all():
            _warn_outside(self.name, int((~inside).sum()), x.size)
        if x.size > _CHUNK_POINTS:
            # Wide windows hold hundreds of nodes per point: bound the memory in flight.
            members = [np.arange(i, min(i + _CHUNK_POINTS, x.size))
                       for i in range(0, x.size, _CHUNK_POINTS)]
            given = None if windows is None else np.broadcast_to(
                np.asarray(windows, dtype=np.int64).ravel(), x.shape)
            parts = [self.local_fit(x[m], y[m], warn=False,
                                    windows=None if given is None else given[m]) for m in members]
            return LocalFit.scatter(parts, members, inside)
        xs = np.where(inside, x, 0.0)
        ys = np.where(inside, y, 0.0)
        ladder = self._window_ladder
        if windows is not None:
            windows = np.broadcast_to(np.asarray(windows, dtype=np.int64).ravel(), xs.shape)
            windows = np.where(np.isin(windows, ladder), windows, ladder[0])
        elif len(ladder) == 1:
            windows = np.full(xs.shape, ladder[0])
        else:
            windows, widest, block = self._choose_windows(xs, ys, ladder)
            # Points on the widest window share their block's fit, made for the choice.
            shared = np.nonzero(windows == ladder[-1])[0]
            rest = np.nonzero(windows != ladder[-1])[0]
            parts, members = [widest.subset(block[shared])], [shared]
            if len(rest):
                parts.append(self.local_fit(xs[rest], ys[rest], warn=False, windows=windows[rest]))
                members.append(rest)
            return LocalFit.scatter(parts, members, inside)
        groups = [(n, np.nonzero(windows == n)[0]) for n in np.unique(windows)]
        parts = _in_threads(lambda group: self._fit_window(xs[group[1]], ys[group[1]], int(group[0])),
                            groups, len(xs) >= _THREADED_POINTS)
        return LocalFit.scatter(parts, [mine for _, mine in groups], inside)

    def _choose_windows(self, xs, ys, ladder):
        """Window size per point by intersecting confidence intervals (`lensview.precision`),
        with the widest window's fits per block and each point's block index.

        The choice is made once per block of cells the widest window is shared
        by (`_fit_window`), at the block's centre: it follows how fast the field
        bends, which changes over many cells, not from point to point.
        """
        ny, nx = self.shape
        align = max(1, ladder[-1] // 6)
        block_x, block_y = np.floor(xs).astype(np.int64) // align, np.floor(ys).astype(np.int64) // align
        _, first, inverse = np.unique(block_y * nx + block_x, return_index=True, return_inverse=True)
        cx = np.clip(block_x[first] * align + 0.5 * align, 0, nx - 1)
        cy = np.clip(block_y[first] * align + 0.5 * align, 0, ny - 1)
        parts = _in_threads(lambda n: self._fit_window(cx, cy, n), ladder,
                            len(cx) >= _THREADED_POINTS)
        jacobians = [part.terms(cx, cy) for part in parts]
        keys = ("a11", "a12", "a21", "a22")
        estimates = np.array([[getattr(j, k) for k in keys] for j in jacobians])
        sigmas = np.array([j.sigma_a for j in jacobians])
        choice = intersect_confidence(estimates, sigmas)
        inverse = inverse.ravel()
        return np.asarray(ladder)[choice][inverse], parts[-1], inverse

    @property
    def _window_ladder(self):
        """Candidate window sizes for point fits on this map."""
        if not self._noise_aware:
            return (LAGRANGE_NODES,)
        return tuple(n for n in WINDOW_LADDER if n <= min(self.shape))

    def _fit_window(self, xs, ys, n_nodes):
        """Fits of both maps on n x n windows around points inside the map."""
        ny, nx = self.shape
        # Wide windows are shared by the points of small blocks of cells (a point
        # then sits within a sixth of the window's width from its centre, where a
        # least-squares fit is as good as at the centre): one fit per block.
        align = max(1, n_nodes // 6) if n_nodes > LAGRANGE_NODES else 1
        col0 = window_starts(xs, nx, n_nodes, align)
        row0 = window_starts(ys, ny, n_nodes, align)
        _, first, inverse = np.unique(row0 * nx + col0, return_index=True, return_inverse=True)
        coefficients, noise = [], []
        for alpha, factor in zip(self._alpha, self._to_pixels):
            stored = gather_windows(alpha, row0[first], col0[first], n_nodes, dtype=None)
            noise.append(rounding_sigma(stored) * factor)
            window = stored.astype(np.float64)
            if factor != 1.0:
                window *= factor
            fitted = fit_coefficients(window, n_nodes, fit_degree(n_nodes))
            # Lower-degree fits are degree-FIT_DEGREE polynomials with zero top terms.
            pad = FIT_DEGREE + 1 - fitted.shape[-1]
            fitted = np.pad(fitted, ((0, 0), (0, pad), (0, pad))) if pad else fitted
            coefficients.append(fitted[inverse])
            noise[-1] = noise[-1][inverse]
        return LocalFit(self, col0, row0, np.full(len(xs), n_nodes), np.array(coefficients),
                        np.array(noise), np.ones(len(xs), bool))

    def lens_quantities(self, coords, z_source, *, warn=True):
        """All local lensing quantities at sky positions.

        Parameters
        ----------
        coords : `~astropy.coordinates.SkyCoord`
        z_source : float
        warn : bool
            Warn when positions lie outside the map.

        Returns
        -------
        dict
            ``det_a, mu, kappa, gamma, lambda_t, lambda_r`` (arrays) and
            ``source`` (`~astropy.coordinates.SkyCoord`, ray-traced positions);
            NaN outside the footprint.
        """
        f = self.scaling_factor(z_source)
        x, y = self.sky_to_pixels(coords)
        terms = self.local_terms(x, y, warn=warn)
        det_a = terms.det_a(f)
        lambda_t, lambda_r = terms.eigenvalues(f)
        with np.errstate(divide="ignore", invalid="ignore"):
            mu = 1.0 / det_a
        return dict(
            det_a=det_a, mu=mu, kappa=terms.convergence(f),
            gamma=np.hypot(*terms.shear(f)), lambda_t=lambda_t, lambda_r=lambda_r,
            source=self.pixels_to_sky(x - f * terms.ax, y - f * terms.ay),
        )

    def magnification(self, coords, z_source):
        """Signed magnification at sky positions (negative = odd parity).

        Parameters
        ----------
        coords : `~astropy.coordinates.SkyCoord`
        z_source : float

        Returns
        -------
        ndarray
            1/det A from the locally interpolated Jacobian; NaN outside the map.
        """
        f = self.scaling_factor(z_source)
        x, y = self.sky_to_pixels(coords)
        det_a = self.local_terms(x, y).det_a(f)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.reshape(1.0 / det_a, np.shape(coords))

    def ray_trace(self, coords, z_source):
        """Source-plane positions beta = theta - alpha(theta) of sky positions.

        Returns
        -------
        `~astropy.coordinates.SkyCoord`
            ICRS; NaN outside the map.
        """
        f = self.scaling_factor(z_source)
        x, y = self.sky_to_pixels(coords)
        # Deflection values need no noise-aware window: rounding reaches them unamplified.
        terms = self.local_terms(x, y, windows=LAGRANGE_NODES)
        traced = self.pixels_to_sky(x - f * terms.ax, y - f * terms.ay)
        return traced.reshape(np.shape(coords)) if np.shape(coords) else traced[0]

    def trace_pixels(self, x, y, z_source):
        """Ray-trace map pixel positions; returns source-plane map pixels."""
        f = self.scaling_factor(z_source)
        terms = self.local_terms(x, y, warn=False, windows=LAGRANGE_NODES)
        return x - f * terms.ax, y - f * terms.ay

    # ------------------------------------------------------------------ grid evaluation
    def grid_maps(self, z_source):
        """Whole-grid maps on the model's pixel grid.

        Returns
        -------
        dict of ndarray
            ``det_a, mu, kappa, gamma, lambda_t, lambda_r`` (float32, NaN
            where the fourth-order stencil leaves the map or meets a NaN).
        """
        f = self.scaling_factor(z_source)
        all_tiles = np.argwhere(np.ones(self._tiles.grid_shape, bool))
        terms = self._tiles.terms(all_tiles)
        kappa = 0.5 * f * terms["T"]
        gamma = f * np.hypot(terms["G1"], terms["G2"])
        det_a = 1.0 - f * terms["T"] + f * f * terms["D"]
        with np.errstate(divide="ignore", invalid="ignore"):
            mu = 1.0 / det_a
        stacks = dict(det_a=det_a, mu=mu, kappa=kappa, gamma=gamma,
                      lambda_t=1 - kappa - gamma, lambda_r=1 - kappa + gamma)
        return {k: self._tiles.assemble(v) for k, v in stacks.items()}

    def magnification_map_on(self, wcs, shape, z_source):
        """Signed magnification on another pixel grid (e.g. the cutout's).

        det A is resampled bilinearly with `reproject` and inverted there, so
        mu is never interpolated; pixels outside the model are NaN.

        Parameters
        ----------
        wcs : `~astropy.wcs.WCS`
            Target celestial WCS.
        shape : tuple of int
            Target (ny, nx).
        z_source : float
        """
        from reproject import reproject_interp

        det_a = self.grid_maps(z_source)["det_a"]
        resampled, _ = reproject_interp((det_a.astype(np.float64), self.wcs),
                                        wcs.celestial, shape_out=tuple(shape),
                                        order="bilinear")
        with np.errstate(divide="ignore", invalid="ignore"):
            return 1.0 / resampled

    def coarse_det_a(self, f):
        """det A on the coarse locator grid (every COARSE_STRIDE-th node)."""
        if self._coarse_terms is None:
            step = COARSE_STRIDE
            # float32 is ample for locating tiles, and halves the work on large maps.
            ax = np.asarray(self._alpha[0][::step, ::step], np.float32) * np.float32(self._to_pixels[0])
            ay = np.asarray(self._alpha[1][::step, ::step], np.float32) * np.float32(self._to_pixels[1])
            a11 = np.gradient(ax, step, axis=1)
            a12 = np.gradient(ax, step, axis=0)
            a21 = np.gradient(ay, step, axis=1)
            a22 = np.gradient(ay, step, axis=0)
            self._coarse_terms = (a11 + a22, a11 * a22 - a12 * a21)
        trace, determinant = self._coarse_terms
        return 1.0 - f * trace + f * f * determinant

    def tiles_near_curves(self, f):
        """Indices (row, col) of tiles that may hold a critical curve.

        Small maps use every tile. Large maps evaluate det A on a coarse
        grid and keep tiles where it changes sign, comes close to zero, or
        varies too fast for the coarse grid to follow, plus one tile around.
        """
        grid = self._tiles.grid_shape
        if max(self.shape) <= HIERARCHY_THRESHOLD:
            return np.argwhere(np.ones(grid, bool))
        self.coarse_det_a(f)  # fills the cache of coarse T and D
        trace, determinant = self._coarse_terms
        half = len(trace) // 2
        bands = [(0, half + 1), (half, len(trace))]
        flagged = np.concatenate(_in_threads(
            lambda band: _flag_cells(trace[band[0]:band[1]], determinant[band[0]:band[1]], f),
            bands, trace.size >= 4 * _THREADED_POINTS))
        # Coarse cells to tiles: a tile is flagged when any of its coarse cells is
        # (cells past the last tile row or column belong to the last tile).
        per_tile = TILE // COARSE_STRIDE
        padded = np.zeros((grid[0] + 1) * per_tile, bool), np.zeros((grid[1] + 1) * per_tile, bool)
        cells = np.zeros((len(padded[0]), len(padded[1])), bool)
        cells[:flagged.shape[0], :flagged.shape[1]] = flagged
        tiles = cells.reshape(grid[0] + 1, per_tile, grid[1] + 1, per_tile).any(axis=(1, 3))
        tiles[-2, :] |= tiles[-1, :]
        tiles[:, -2] |= tiles[:, -1]
        tiles = tiles[:-1, :-1]
        tiles = ndimage.binary_dilation(tiles, structure=np.ones((3, 3), bool))
        return np.argwhere(tiles)

    # ------------------------------------------------------------------ curves
    def critical_curves(self, z_source):
        """Critical curves for a source redshift.

        Returns
        -------
        `~lensview.curves.CurveSet`
            List of `~lensview.curves.Curve` (``kind`` "tangential" or
            "radial", ``sky`` in ICRS, ``closed``, ``model``); loops dropped
            as artefacts of singular centres are listed in ``.dropped``.
        """
        from .curves import critical_curves

        self.scaling_factor(z_source)  # a clear error for a bad redshift before anything else
        key = round(float(z_source), 12)
        if key not in self._curve_cache:
            if len(self._curve_cache) >= _CURVE_CACHE_SIZE:
                self._curve_cache.pop(next(iter(self._curve_cache)))
            self._curve_cache[key] = critical_curves(self, z_source)
        return self._curve_cache[key]

    def caustics(self, z_source):
        """Caustics (source-plane images of the critical curves), cusps located."""
        from .curves import caustics

        self.scaling_factor(z_source)
        key = round(float(z_source), 12)
        if key not in self._caustic_cache:
            if len(self._caustic_cache) >= _CURVE_CACHE_SIZE:
                self._caustic_cache.pop(next(iter(self._caustic_cache)))
            self._caustic_cache[key] = caustics(self, z_source, self.critical_curves(z_source))
        return self._caustic_cache[key]

    @property
    def tiles(self):
        """The tile cache of grid terms (used by curve extraction)."""
        return self._tiles


#: Ask `load_model` to take the normalisation from the Z_NORM header keyword.
FROM_HEADER = "header"


def load_model(x, y=None, *, z_lens, units=None, z_norm=FROM_HEADER, cosmology=None, name=None):
    """A `DeflectionField` from files, reading what the headers say.

    Parameters
    ----------
    x, y : str, path, bytes or file-like
        As for `DeflectionField.from_fits`.
    z_lens : float
    units : {"arcsec", "pixel"} or None
        None takes the units from the BUNIT keyword (an error names the
        keyword when it is missing).
    z_norm : float, None or FROM_HEADER
        FROM_HEADER uses the Z_NORM keyword when present (maps made for a
        source at that redshift) and D_ls/D_s = 1 otherwise; None means
        D_ls/D_s = 1; a number is the reference source redshift.
    cosmology, name
        As for `DeflectionField`.
    """
    from .fitsio import read_deflection

    maps = read_deflection(x, y, units=units)
    if isinstance(z_norm, str) and z_norm == FROM_HEADER:
        z_norm = maps.header.get("Z_NORM")
    return DeflectionField(maps.alpha_x, maps.alpha_y, maps.wcs, units=maps.units, z_lens=z_lens,
                           z_norm=z_norm, cosmology=cosmology, name=name or maps.name)


class _TileCache:
    """Fourth-order grid terms per tile, computed once and kept.

    Each tile holds the nodes ``TILE*r .. TILE*r + TILE`` in each axis (shared
    edges are computed twice, identically). Stored per node: T, D, the two
    shear terms G1, G2 on sky axes (see `LocalTerms.shear`), and whether the
    grid resolves the field there.
    """

    NODES = TILE + 1

    def __init__(self, field):
        self.field = field
        ny, nx = field.shape
        self.grid_shape = (-(-(ny - 1) // TILE), -(-(nx - 1) // TILE))
        self.slot = np.full(self.grid_shape, -1, dtype=np.int64)
        self.store = {key: np.empty((0, self.NODES, self.NODES), np.float32)
                      for key in ("T", "D", "G1", "G2")}
        self.store["unresolved"] = np.empty((0, self.NODES, self.NODES), bool)
        self.has_shear = np.zeros(0, bool)

    def terms(self, tiles, shear=True):
        """Stacks of cached terms for tiles (computing the missing ones).

        ``shear=False`` leaves out G1 and G2 (curve extraction needs only T,
        D and the resolution flags), so they are computed only when asked for.
        """
        tiles = np.asarray(tiles, dtype=np.int64).reshape(-1, 2)
        missing = tiles[self.slot[tiles[:, 0], tiles[:, 1]] < 0]
        if len(missing):
            missing = np.unique(missing, axis=0)
            start = len(self.store["T"])
            parts = _in_threads(self._compute, _batches(missing), len(missing) >= _THREADED_TILES)
            for key in ("T", "D", "unresolved"):
                self.store[key] = np.concatenate([self.store[key]] + [p[key] for p in parts])
            self.slot[missing[:, 0], missing[:, 1]] = start + np.arange(len(missing))
        index = self.slot[tiles[:, 0], tiles[:, 1]]
        out = {key: self.store[key][index] for key in ("T", "D", "unresolved")}
        if shear:
            out.update(self._shear(tiles, index))
        return out

    def _shear(self, tiles, index):
        size = len(self.store["T"])
        for key in ("G1", "G2"):
            grown = np.full((size, self.NODES, self.NODES), np.nan, np.float32)
            grown[:len(self.store[key])] = self.store[key]
            self.store[key] = grown
        if len(self.has_shear) < size:
            self.has_shear = np.concatenate([self.has_shear, np.zeros(size - len(self.has_shear), bool)])
        lacking = np.unique(index[~self.has_shear[index]])
        if len(lacking):
            slots = np.full(self.grid_shape, -1, dtype=np.int64)
            slots[tiles[:, 0], tiles[:, 1]] = index
            where = np.argwhere(np.isin(slots, lacking))
            order = slots[where[:, 0], where[:, 1]]
            parts = _in_threads(lambda batch: self._compute(batch, shear=True), _batches(where),
                                len(where) >= _THREADED_TILES)
            for key in ("G1", "G2"):
                self.store[key][order] = np.concatenate([p[key] for p in parts])
            self.has_shear[order] = True
        return {key: self.store[key][index] for key in ("G1", "G2")}

    def origins(self, tiles):
        """Global (row, col) of the first node of each tile."""
        return tiles[:, 0] * TILE, tiles[:, 1] * TILE

    def _compute(self, tiles, shear=False):
        field = self.field
        ny, nx = field.shape
        pad = 2
        width = self.NODES + 2 * pad
        row0, col0 = self.origins(tiles)
        interior = ((row0 >= pad) & (row0 - pad + width <= ny)
                    & (col0 >= pad) & (col0 - pad + width <= nx))
        edge = np.nonzero(~interior)[0]
        offsets = np.arange(width) - pad
        rows = row0[edge, None] + offsets
        cols = col0[edge, None] + offsets
        valid = ((rows >= 0) & (rows < ny))[:, :, None] & ((cols >= 0) & (cols < nx))[:, None, :]
        rows_c = np.clip(rows, 0, ny - 1)
        cols_c = np.clip(cols, 0, nx - 1)
        windows = []
        for alpha, factor in zip(field._alpha, field._to_pixels):
            window = np.empty((len(tiles), width, width))
            if interior.any():
                # Whole window rows at a time from a strided view: no per-node index arrays.
                window[interior] = gather_windows(alpha, row0[interior] - pad, col0[interior] - pad,
                                                  width, dtype=None)
            if len(edge):
                window[edge] = alpha[rows_c[:, :, None], cols_c[:, None, :]]
                window[edge] = np.where(valid, window[edge], np.nan)
            if factor != 1.0:
                window *= factor
            windows.append(window)
        core = slice(pad, pad + self.NODES)
        derivatives4, derivatives2 = {}, {}
        for label, window in zip("xy", windows):
            across, down = window[:, core, :], window[:, :, core]
            derivatives4[label + "x"] = central_difference_4(across, 2)
            derivatives4[label + "y"] = central_difference_4(down, 1)
            derivatives2[label + "x"] = central_difference_2(across, 2)
            derivatives2[label + "y"] = central_difference_2(down, 1)
        a11, a12 = derivatives4["xx"], derivatives4["xy"]
        a21, a22 = derivatives4["yx"], derivatives4["yy"]
        if shear:
            gamma1, gamma2 = _sky_shear(a11, a12, a21, a22, field._frame, 1.0)
            return {"G1": gamma1.astype(np.float32), "G2": gamma2.astype(np.float32)}
        disagreement = np.zeros_like(a11)
        for key in derivatives4:
            with np.errstate(invalid="ignore"):
                relative = np.abs(derivatives4[key] - derivatives2[key]) / np.maximum(
                    np.abs(derivatives4[key]), 1.0)
            disagreement = np.fmax(disagreement, relative)
        return {
            "T": (a11 + a22).astype(np.float32),
            "D": (a11 * a22 - a12 * a21).astype(np.float32),
            "unresolved": disagreement > UNRESOLVED_TOLERANCE,
        }

    def assemble(self, stack):
        """Join per-tile node stacks of *every* tile (row-major) into one map."""
        ny, nx = self.field.shape
        rows, cols = self.grid_shape
        n = self.NODES
        out = np.empty((rows * TILE + 1, cols * TILE + 1), dtype=stack.dtype)
        blocks = stack.reshape(rows, cols, n, n)
        out[:-1, :-1] = blocks[:, :, :TILE, :TILE].transpose(0, 2, 1, 3).reshape(
            rows * TILE, cols * TILE)
        out[-1, :-1] = blocks[-1, :, TILE, :TILE].reshape(-1)
        out[:-1, -1] = blocks[:, -1, :TILE, TILE].reshape(-1)
        out[-1, -1] = blocks[-1, -1, TILE, TILE]
        return out[:ny, :nx]


def _flag_cells(trace, determinant, f):
    """Coarse cells where det A changes sign, comes close to zero, or varies too
    fast for the coarse grid to follow."""
    det_a = 1.0 - f * trace + f * f * determinant
    corners = (det_a[:-1, :-1], det_a[:-1, 1:], det_a[1:, :-1], det_a[1:, 1:])
    with np.errstate(invalid="ignore"):
        low = np.minimum(np.minimum(corners[0], corners[1]), np.minimum(corners[2], corners[3]))
        high = np.maximum(np.maximum(corners[0], corners[1]), np.maximum(corners[2], corners[3]))
        spread = high - low
        # Nearest corner value to zero; any sign change is flagged anyway.
        closest = np.minimum(np.abs(low), np.abs(high))
        flagged = (low <= 0) & (high >= 0)
        flagged |= closest < np.maximum(np.float32(0.02), 1.5 * spread)
    return flagged & np.isfinite(spread)


def _padded_gram(n_nodes):
    """P P^T of the fit projector on ``n_nodes``, padded to FIT_DEGREE + 1 terms:
    |weights|^2 of any evaluation is b^T (P P^T) b for its monomials b."""
    projector = fit_projector(n_nodes, fit_degree(n_nodes))
    gram = np.zeros((FIT_DEGREE + 1, FIT_DEGREE + 1))
    size = len(projector)
    gram[:size, :size] = projector @ projector.T
    return gram


def _batches(tiles):
    """Tile batches: two or more, so both cores get work, none over _TILE_BATCH."""
    count = max(2, -(-len(tiles) // _TILE_BATCH))
    size = max(1, -(-len(tiles) // count))
    return [tiles[i:i + size] for i in range(0, len(tiles), size)]


def _in_threads(work, batches, worth_it=True):
    """``work`` on each batch, in threads (numpy releases the GIL in its loops)
    when ``worth_it`` (small jobs cost more to hand over than to do)."""
    global _POOL
    if len(batches) < 2 or _WORKERS < 2 or not worth_it:
        return [work(b) for b in batches]
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(max_workers=_WORKERS, thread_name_prefix="lensview")
    return list(_POOL.map(work, batches))


def _sky_shear(a11, a12, a21, a22, frame, f):
    """Shear (gamma1, gamma2) of the pixel-frame Jacobian a, on sky axes."""
    (m11, m12), (m21, m22) = frame[0]
    (n11, n12), (n21, n22) = frame[1]
    # b = M a M^-1, written out for stacks of 2 x 2 matrices.
    c11, c12 = a11 * n11 + a12 * n21, a11 * n12 + a12 * n22
    c21, c22 = a21 * n11 + a22 * n21, a21 * n12 + a22 * n22
    b11, b12 = m11 * c11 + m12 * c21, m11 * c12 + m12 * c22
    b21, b22 = m21 * c11 + m22 * c21, m21 * c12 + m22 * c22
    return 0.5 * f * (b11 - b22), 0.5 * f * (b12 + b21)


def _as_map(values, label):
    array = values if isinstance(values, np.ndarray) else np.asarray(values)
    if array.ndim != 2:
        raise LensviewInputError(
            f"{label} must be a 2-D map, got {array.ndim} dimension(s) with shape "
            f"{array.shape}."
        )
    if not np.issubdtype(array.dtype, np.floating):
        array = array.astype(np.float64)
    return array


def _redshift(value, role):
    try:
        z = float(value)
    except (TypeError, ValueError):
        raise LensviewInputError(f"The {role} redshift {value!r} is not a number.") from None
    if not np.isfinite(z) or z <= 0:
        raise LensviewInputError(
            f"The {role} redshift must be a positive number, got {value!r}."
        )
    return z


def _icrs(coords):
    return coords if coords.frame.name == "icrs" else coords.icrs


def _warn_if_not_linear(wcs, name):
    """The lens equation is solved on the pixel grid: exact for a TAN plane without
    distortion terms, approximate otherwise."""
    projections = {ctype[5:8] for ctype in wcs.wcs.ctype}
    if projections != {"TAN"} or wcs.sip is not None or wcs.cpdis1 is not None or wcs.det2im1 is not None:
        warnings.warn(
            f"Model {name!r} has a {'/'.join(sorted(projections))} WCS"
            f"{' with distortion terms' if wcs.sip is not None else ''}; lensview treats its pixel "
            "grid as a linear (TAN) plane, which is accurate only over a small field.",
            UserWarning, stacklevel=3)


def _warn_outside(name, n_out, n_total):
    warnings.warn(
        f"{n_out} of {n_total} position(s) lie outside the footprint of model "
        f"{name!r}; their values are NaN.",
        OutsideFootprintWarning,
        stacklevel=3,
    )
