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
  noise (`lensview.lens.precision`). det A is thus smooth near each point and mu is
  never interpolated.
"""

import warnings

import numpy as np
import astropy.units as u
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales
from scipy import ndimage

from .. import cosmology as _cosmo
from ..checks import deflection_units, positive_redshift
from ..errors import LensviewInputError, OutsideFootprintWarning
from ..io.fits import read_deflection
from .curves import caustics, critical_curves
from .local import LocalFit, LocalTerms
from .parallel import THREADED_POINTS, in_threads
from .precision import (
    FIT_DEGREE,
    WINDOW_LADDER,
    fit_degree,
    intersect_confidence,
    noise_aware,
    rounding_sigma,
)
from .stencils import (
    LAGRANGE_NODES,
    TILE,
    fit_coefficients,
    gather_windows,
    interpolate_values,
    window_starts,
)
from .tiles import TileCache

__all__ = ["DeflectionField", "LocalTerms", "LocalFit"]

#: Maps larger than this (pixels per side) locate curves on a coarse grid first.
HIERARCHY_THRESHOLD = 1024
#: Spacing of the coarse grid used to locate curves on large maps.
COARSE_STRIDE = 4
#: Points fitted at once by `DeflectionField.local_fit`.
_CHUNK_POINTS = 8192
_CURVE_CACHE_SIZE = 32


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
        deflection_units(units)
        self.cosmology = _cosmo.resolve_cosmology(cosmology)
        self.z_lens = positive_redshift(z_lens, "lens redshift")
        if z_norm is not None:
            z_norm = positive_redshift(z_norm, "normalisation redshift")
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
        self._tiles = TileCache(self)
        self._coarse_terms = None
        self._curve_cache = {}
        self._caustic_cache = {}
        #: Lensing potential (arcsec^2, unscaled, on the map grid) when the model came as one.
        self.potential = None
        #: What the model was made from: "deflection", "convergence" or "potential".
        self.map_kind = "deflection"
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

        maps = read_deflection(x, y, units=units)
        if name is None:
            name = getattr(maps, "name", None)
        return cls(maps.alpha_x, maps.alpha_y, maps.wcs, units=maps.units,
                   z_lens=z_lens, z_norm=z_norm, cosmology=cosmology, name=name)

    @classmethod
    def from_convergence(cls, kappa, wcs, *, z_lens, z_norm=None, cosmology=None, name=None,
                         fill_nan=None, external_kappa=0.0, external_shear=(0.0, 0.0),
                         max_memory=None):
        """Build a field from a convergence (kappa) map, by zero-padded FFT convolution.

        Mass outside the map is missing (a `~lensview.errors.MissingMassWarning`
        says so): the deflection differs from the full model's by a smooth
        field, and curves near the map edge are the least trustworthy. See
        `lensview.lens.convergence`.

        Parameters
        ----------
        kappa : array_like
            2-D convergence, normalised like a deflection map (``z_norm``).
        wcs : `~astropy.wcs.WCS`
            Celestial WCS of the map.
        z_lens, z_norm, cosmology, name
            As for `DeflectionField`.
        fill_nan : float or None
            Value for NaN cells; None refuses maps with NaNs.
        external_kappa : float
            Uniform convergence added (a mass sheet), at the normalisation of the map.
        external_shear : (float, float)
            Constant shear (gamma1, gamma2) on the East/North axes, added.
        max_memory : `~astropy.units.Quantity`, float or None
            Working-memory limit of the FFT (None: 4 GB).
        """
        from .convergence import DEFAULT_MAX_MEMORY, deflection_maps_from_convergence

        alpha_x, alpha_y = deflection_maps_from_convergence(
            kappa, wcs, name=name, fill_nan=fill_nan, external_kappa=external_kappa,
            external_shear=external_shear,
            max_memory=DEFAULT_MAX_MEMORY if max_memory is None else max_memory)
        field = cls(alpha_x, alpha_y, wcs, units="arcsec", z_lens=z_lens, z_norm=z_norm,
                    cosmology=cosmology, name=name)
        field.map_kind = "convergence"
        return field

    @classmethod
    def from_potential(cls, psi, wcs, *, z_lens, z_norm=None, cosmology=None, name=None):
        """Build a field from a lensing-potential map (arcsec^2 on the map's grid).

        The deflection is grad psi by fourth-order differences (two edge cells
        on each side have none); psi is kept as ``potential`` for time delays.
        See `lensview.lens.potential`.
        """
        from .potential import potential_deflection, potential_map

        psi = potential_map(psi)
        alpha_x, alpha_y = potential_deflection(psi, wcs)
        field = cls(alpha_x, alpha_y, wcs, units="arcsec", z_lens=z_lens, z_norm=z_norm,
                    cosmology=cosmology, name=name)
        field.potential = psi
        field.map_kind = "potential"
        return field

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
        `lensview.lens.precision.WINDOW_LADDER` whose Jacobian agrees with the
        narrower windows' within their rounding noise (`lensview.lens.precision`).
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
        parts = in_threads(lambda group: self._fit_window(xs[group[1]], ys[group[1]], int(group[0])),
                            groups, len(xs) >= THREADED_POINTS)
        return LocalFit.scatter(parts, [mine for _, mine in groups], inside)

    def _choose_windows(self, xs, ys, ladder):
        """Window size per point by intersecting confidence intervals (`lensview.lens.precision`),
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
        parts = in_threads(lambda n: self._fit_window(cx, cy, n), ladder,
                            len(cx) >= THREADED_POINTS)
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

    def deflection_pixels(self, x, y):
        """Unscaled deflection (map pixels along +x, +y) at map pixel positions.

        Values only, by the six-point interpolant (their rounding noise is not
        amplified); NaN off the map or on masked cells.
        """
        return tuple(interpolate_values(alpha, x, y) * factor
                     for alpha, factor in zip(self._alpha, self._to_pixels))

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
        flagged = np.concatenate(in_threads(
            lambda band: _flag_cells(trace[band[0]:band[1]], determinant[band[0]:band[1]], f),
            bands, trace.size >= 4 * THREADED_POINTS))
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
        `~lensview.lens.curves.CurveSet`
            List of `~lensview.lens.curves.Curve` (``kind`` "tangential" or
            "radial", ``sky`` in ICRS, ``closed``, ``model``); loops dropped
            as artefacts of singular centres are listed in ``.dropped``.
        """
        self.scaling_factor(z_source)  # a clear error for a bad redshift before anything else
        key = round(float(z_source), 12)
        if key not in self._curve_cache:
            if len(self._curve_cache) >= _CURVE_CACHE_SIZE:
                self._curve_cache.pop(next(iter(self._curve_cache)))
            self._curve_cache[key] = critical_curves(self, z_source)
        return self._curve_cache[key]

    def caustics(self, z_source):
        """Caustics (source-plane images of the critical curves), cusps located."""
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
