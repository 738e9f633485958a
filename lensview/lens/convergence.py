"""Deflection maps from a convergence (kappa) map, by FFT convolution.

The scaled deflection of a thin lens is the convolution of its convergence
with the kernel (1/pi) x/|x|^2 (Schneider, Ehlers & Falco 1992, eq. 5.9;
Narayan & Bartelmann 1996, arXiv:astro-ph/9606001, eq. 20)::

    alpha(theta) = (1/pi) Int kappa(theta') (theta - theta') / |theta - theta'|^2 d^2 theta'

On the map's pixel grid, with M the pixel-to-plane matrix (arcsec per
pixel) and G = M^T M, the kernel in pixel offsets d gives alpha in map
pixels directly: K(d) = |det M| / pi * d / (d^T G d), K(0) = 0 (the kernel
is odd, its mean over the central cell vanishes). Non-square and rotated
pixels are handled by G; the result is along the map's own +x/+y pixel
axes, as `~lensview.DeflectionField` expects.

A plain lattice sum of a kernel singular at d = 0 is off by a local term:
with kappa(p - d) = kappa(p) - g.d + ..., the sum and the integral of
(g.d) K(d) differ by w C g, where C = lim [sum_{d != 0} d d^T/(d^T G d) -
integral of the same over the summed area] is a constant of the lattice
(-1/2 G^-1 for square pixels) and w = |det M|/pi. Adding w C grad(kappa)
removes that leading error (the correction term of the Euler-Maclaurin
formula for singular integrands; common practice), so the result stays
accurate for structure only a few pixels wide. With central differences for
the gradient the correction is itself a convolution, so its four taps are
added to the kernel next to d = 0 and the FFT applies it at no extra cost.

The convolution is linear, not circular: both the map and the kernel are
zero-padded to at least twice each axis before the real FFTs
(`scipy.fft.rfft2`, in the input's precision, on all cores), so no periodic
image of the map leaks in.

Mass outside the map is missing. The deflection from a cutout of kappa
differs from the full model's by the deflection of the mass outside, a field
that is smooth (harmonic) across the map, to first order a uniform
convergence and a constant shear: curves near the map edge are the least
trustworthy. `external_deflection` adds such a sheet and shear when the user
knows them.
"""

import functools
import os
import warnings

import numpy as np
import astropy.units as u
from scipy import fft as sp_fft

from ..checks import celestial_wcs
from ..errors import LensviewInputError, MissingMassWarning

__all__ = [
    "DEFAULT_MAX_MEMORY",
    "deflection_maps_from_convergence",
    "convergence_deflection",
    "external_deflection",
    "fft_memory_bytes",
    "padded_shape",
]

#: Largest working memory `convergence_deflection` allocates unless told otherwise.
DEFAULT_MAX_MEMORY = 4 * u.GB


def padded_shape(shape):
    """FFT grid for a linear convolution of a map of ``shape``.

    Each axis is at least doubled (so offsets up to the map size never wrap)
    and rounded up to an even length the real FFT handles fast.
    """
    out = []
    for n in shape:
        length = sp_fft.next_fast_len(2 * int(n), real=True)
        while length % 2:
            length = sp_fft.next_fast_len(length + 1, real=True)
        out.append(length)
    return tuple(out)


def fft_memory_bytes(shape, dtype=np.float32):
    """Upper estimate of the working memory (bytes) of `convergence_deflection`.

    Counts, generously, what the implementation may hold at once: two
    half-spectra of the padded grid, two padded real grids, and the two output
    maps. (Measured peaks are lower: about 0.7 GB for a 4096 x 4096 float32
    map, whose estimate is 1.2 GB; see bench/bench_convergence.py.)
    """
    real = np.dtype(_work_dtype(dtype))
    ly, lx = padded_shape(shape)
    real_bytes = real.itemsize * ly * lx
    complex_bytes = 2 * real.itemsize * ly * (lx // 2 + 1)
    output = 2 * real.itemsize * int(np.prod(shape))
    return int(2 * real_bytes + 2 * complex_bytes + output)


def convergence_deflection(kappa, wcs, *, fill_nan=None, max_memory=DEFAULT_MAX_MEMORY,
                           workers=None):
    """Deflection maps (arcsec, along the map's +x/+y axes) of a convergence map.

    Parameters
    ----------
    kappa : array_like
        2-D convergence map (dimensionless), normalised as the deflection
        will be (usually D_ls/D_s = 1). float32 input is computed in float32.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the map (its pixel scale and orientation set the
        kernel).
    fill_nan : float or None
        Value for cells without data (NaN). None refuses maps with NaNs,
        since any fill puts or removes mass.
    max_memory : `~astropy.units.Quantity` or float
        Largest working memory allowed (information units, or bytes for a
        number). The need is estimated before anything is allocated.
    workers : int or None
        Threads for the FFTs; None uses every core.

    Returns
    -------
    alpha_x, alpha_y : ndarray
        Deflection in arcsec along the map's own pixel axes, of the input's
        shape and (floating) precision.

    Raises
    ------
    LensviewInputError
        For a map that is not 2-D, holds NaNs without ``fill_nan``, has no
        celestial WCS, or needs more memory than ``max_memory``.
    """
    kappa = _kappa_map(kappa, fill_nan)
    matrix = _pixel_matrix(wcs)
    limit = _memory_limit(max_memory)
    need = fft_memory_bytes(kappa.shape, kappa.dtype)
    if need > limit:
        raise LensviewInputError(
            f"The {kappa.shape[1]} x {kappa.shape[0]} convergence map needs about "
            f"{need / 1e9:.2f} GB for its zero-padded FFT (grid {padded_shape(kappa.shape)[1]} x "
            f"{padded_shape(kappa.shape)[0]}), more than the {limit / 1e9:.2f} GB allowed; pass a "
            "larger max_memory, or bin or cut the map first.")
    workers = (os.cpu_count() or 1) if workers is None else int(workers)
    dtype = kappa.dtype
    shape = padded_shape(kappa.shape)
    kappa_hat = _forward(kappa, shape, workers)
    alpha_pix = []
    product = _kernel_product(kappa_hat, shape, kappa.shape, matrix, 0, workers)
    alpha_pix.append(_inverse(product, shape, kappa.shape, workers))
    del product
    # The second product overwrites kappa's spectrum: one large buffer fewer.
    product = _kernel_product(kappa_hat, shape, kappa.shape, matrix, 1, workers, out=kappa_hat)
    del kappa_hat
    alpha_pix.append(_inverse(product, shape, kappa.shape, workers))
    del product
    scales = np.sqrt((matrix**2).sum(axis=0))  # arcsec per pixel along x and y
    alpha_pix[0] *= dtype.type(scales[0])
    alpha_pix[1] *= dtype.type(scales[1])
    return alpha_pix[0], alpha_pix[1]


def external_deflection(shape, wcs, *, kappa_ext=0.0, shear=(0.0, 0.0), reference=None,
                        dtype=np.float64):
    """Deflection (arcsec, along the map's pixel axes) of a uniform sheet and a constant shear.

    In the sky plane (x East, y North, arcsec, about ``reference``)::

        alpha_x = (kappa_ext + gamma1) x + gamma2 y
        alpha_y = gamma2 x + (kappa_ext - gamma1) y

    the deflection of the potential kappa_ext |theta|^2/2 + gamma1 (x^2 - y^2)/2
    + gamma2 x y (external shear: Keeton 2001, arXiv:astro-ph/0102341). The
    reference point only shifts the source plane as a whole, which no
    observable depends on.

    Parameters
    ----------
    shape : tuple of int
        (ny, nx) of the map.
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the map.
    kappa_ext : float
        Uniform convergence.
    shear : (float, float)
        (gamma1, gamma2) on the East/North axes.
    reference : (float, float) or None
        Map pixel (x, y) about which the terms are taken; None is the map centre.
    dtype : numpy dtype
        Precision of the result.

    Returns
    -------
    alpha_x, alpha_y : ndarray
    """
    kappa_ext = _finite(kappa_ext, "external_kappa")
    try:
        gamma1, gamma2 = (_finite(g, "external_shear") for g in shear)
    except (TypeError, ValueError):
        raise LensviewInputError(
            f"external_shear must be a pair (gamma1, gamma2) of numbers, got {shear!r}.") from None
    matrix = _pixel_matrix(wcs)
    ny, nx = shape
    x0, y0 = ((nx - 1) / 2, (ny - 1) / 2) if reference is None else map(float, reference)
    tensor = np.array([[kappa_ext + gamma1, gamma2], [gamma2, kappa_ext - gamma1]])
    # Pixel offsets -> plane (M), the linear deflection there, back to pixels (M^-1).
    linear = np.linalg.inv(matrix) @ tensor @ matrix
    scales = np.sqrt((matrix**2).sum(axis=0))
    dx = (np.arange(nx) - x0)[None, :]
    dy = (np.arange(ny) - y0)[:, None]
    alpha_x = (linear[0, 0] * dx + linear[0, 1] * dy) * scales[0]
    alpha_y = (linear[1, 0] * dx + linear[1, 1] * dy) * scales[1]
    return alpha_x.astype(dtype), alpha_y.astype(dtype)


def deflection_maps_from_convergence(kappa, wcs, *, name=None, fill_nan=None, external_kappa=0.0,
                                     external_shear=(0.0, 0.0), max_memory=DEFAULT_MAX_MEMORY):
    """The maps behind `DeflectionField.from_convergence`, with the missing-mass warning.

    Returns ``alpha_x, alpha_y`` in arcsec along the map's pixel axes: the
    deflection of the map's own mass (`convergence_deflection`) plus, when
    given, a uniform sheet ``external_kappa`` and a constant shear
    ``external_shear`` about the map centre (`external_deflection`).
    """
    alpha_x, alpha_y = convergence_deflection(kappa, wcs, fill_nan=fill_nan, max_memory=max_memory)
    external = (external_kappa, *external_shear) if np.ndim(external_shear) == 1 \
        and len(external_shear) == 2 else None
    if external is None:
        raise LensviewInputError(
            f"external_shear must be a pair (gamma1, gamma2), got {external_shear!r}.")
    if any(_finite(v, "external_kappa / external_shear") != 0 for v in external):
        ext_x, ext_y = external_deflection(alpha_x.shape, wcs, kappa_ext=external_kappa,
                                           shear=external_shear, dtype=alpha_x.dtype)
        alpha_x += ext_x
        alpha_y += ext_y
        del ext_x, ext_y
        _warn_missing_mass(name or "model", True)
    else:
        _warn_missing_mass(name or "model", False)
    return alpha_x, alpha_y


def _warn_missing_mass(name, external):
    """The caution every deflection from a convergence cutout carries."""
    hint = ("an external convergence/shear was added as given" if external else
            "pass external_kappa= / external_shear= if the mass outside is known")
    warnings.warn(
        f"Model {name!r} was built from a convergence map: mass outside the map is missing, so "
        "its deflection differs from the full model's by a smooth field and the curves near "
        f"the map edge are the least trustworthy ({hint}).",
        MissingMassWarning, stacklevel=4)


def _forward(kappa, shape, workers):
    """rfft2 of the zero-padded map; the row transforms skip the all-zero padding rows."""
    rows = sp_fft.rfft(kappa, n=shape[1], axis=1, workers=workers)
    return sp_fft.fft(rows, n=shape[0], axis=0, workers=workers, overwrite_x=True)


def _inverse(product, shape, map_shape, workers):
    """irfft2 cropped to the map; the row transforms run on the map's rows only."""
    ny, nx = map_shape
    columns = sp_fft.ifft(product, axis=0, workers=workers, overwrite_x=True)[:ny]
    full = sp_fft.irfft(columns, n=shape[1], axis=1, workers=workers)
    del columns
    return np.array(full[:, :nx])


def _kernel_product(kappa_hat, shape, map_shape, matrix, component, workers, out=None):
    """Spectrum of kappa times the spectrum of one kernel component.

    For pixel axes at right angles (G diagonal: square or rectangular pixels,
    rotated or not) the kernel is odd along its own component and even
    along the other, so its spectrum is -i times a sine transform (type I)
    along one axis and a cosine transform (type I) along the other of one
    quadrant of the kernel. Skewed pixel axes take the general path: the whole
    kernel through the real FFT. ``out`` (may be ``kappa_hat`` itself) receives
    the product on the symmetric path.
    """
    gram = matrix.T @ matrix
    if abs(gram[0, 1]) > 1e-12 * abs(gram).max():
        kernel_hat = sp_fft.rfft2(_kernel(shape, map_shape, matrix, component, kappa_hat.real.dtype),
                                  workers=workers, overwrite_x=True)
        kernel_hat *= kappa_hat
        return kernel_hat
    dtype = kappa_hat.real.dtype
    ly, lx = shape
    hy, hx = ly // 2, lx // 2
    weight = abs(np.linalg.det(matrix)) / np.pi
    taps = _correction_taps(matrix, component)
    if component == 0:
        spectrum = _quadrant(np.arange(1, hx), np.arange(hy + 1), gram, weight, dtype, along=1)
        spectrum[0, 0] += dtype.type(taps[(1, 0)])  # offset dx = 1, dy = 0
        spectrum = sp_fft.dct(spectrum, type=1, axis=0, workers=workers, overwrite_x=True)
        spectrum = sp_fft.dst(spectrum, type=1, axis=1, workers=workers, overwrite_x=True)
        product = np.empty_like(kappa_hat) if out is None else out
        np.multiply(kappa_hat[:hy + 1, 1:hx], spectrum, out=product[:hy + 1, 1:hx])
        np.multiply(kappa_hat[hy + 1:, 1:hx], spectrum[hy - 1:0:-1], out=product[hy + 1:, 1:hx])
        product[:, 0] = product[:, hx] = 0
    else:
        spectrum = _quadrant(np.arange(hx + 1), np.arange(1, hy), gram, weight, dtype, along=0)
        spectrum[0, 0] += dtype.type(taps[(0, 1)])  # offset dx = 0, dy = 1
        spectrum = sp_fft.dst(spectrum, type=1, axis=0, workers=workers, overwrite_x=True)
        spectrum = sp_fft.dct(spectrum, type=1, axis=1, workers=workers, overwrite_x=True)
        product = np.empty_like(kappa_hat) if out is None else out
        np.multiply(kappa_hat[1:hy], spectrum, out=product[1:hy])
        np.multiply(kappa_hat[hy + 1:], spectrum[::-1], out=product[hy + 1:])
        product[0] = product[hy] = 0
        product[hy + 1:] *= -1  # odd along y: H(L - m) = -H(m)
    product *= -1j
    return product


def _quadrant(dx, dy, gram, weight, dtype, along):
    """K = weight * d_along / (d^T G d) on the outer grid of offsets dx (columns), dy (rows)."""
    dx = dx.astype(dtype)
    dy = dy.astype(dtype)
    norm = np.add.outer(dtype.type(gram[1, 1]) * dy * dy, dtype.type(gram[0, 0]) * dx * dx)
    numerator = dtype.type(weight) * (dx[None, :] if along == 1 else dy[:, None])
    return np.divide(numerator, norm, out=norm)


def _kernel(shape, map_shape, matrix, component, dtype):
    """One component of K(d) = |det M|/pi * d / (d^T G d), laid out for a circular FFT.

    Offsets -(n-1) .. n-1 are stored at index d mod L; the rest stays zero,
    so the circular convolution on the padded grid equals the linear one.
    """
    ly, lx = shape
    ny, nx = map_shape
    dtype = np.dtype(dtype)
    gram = matrix.T @ matrix
    weight = dtype.type(abs(np.linalg.det(matrix)) / np.pi)
    gxx, gxy2, gyy = (dtype.type(v) for v in (gram[0, 0], 2 * gram[0, 1], gram[1, 1]))
    kernel = np.zeros(shape, dtype)
    col_parts = [(slice(0, nx), np.arange(nx, dtype=dtype)),
                 (slice(lx - nx + 1, lx), np.arange(-(nx - 1), 0, dtype=dtype))]
    row_parts = [(0, np.arange(ny, dtype=dtype)),
                 (ly - ny + 1, np.arange(-(ny - 1), 0, dtype=dtype))]
    # Row blocks keep the float temporaries small next to the padded grid.
    block = max(1, 2**21 // nx)
    for row0, dy_all in row_parts:
        for start in range(0, len(dy_all), block):
            dy = dy_all[start:start + block, None]
            rows = slice(row0 + start, row0 + start + len(dy))
            for cols, dx in col_parts:
                dx = dx[None, :]
                norm = gxx * dx * dx + gxy2 * dx * dy + gyy * dy * dy
                norm[norm == 0] = np.inf  # K(0) = 0
                numerator = dx if component == 0 else dy
                np.divide(numerator * weight, norm, out=kernel[rows, cols])
    for (dx, dy), value in _correction_taps(matrix, component).items():
        kernel[dy, dx] += dtype.type(value)
        kernel[-dy, -dx] -= dtype.type(value)
    return kernel


def _correction_taps(matrix, component):
    """Stencil taps of w C grad(kappa) for one component (module notes).

    With central differences g = (kappa(p + e) - kappa(p - e))/2 along each
    pixel axis e, the correction is a convolution whose kernel has the values
    -/+ (w C)_{c,e} / 2 at offsets +/- e; it is added to K there, so the FFT
    applies it (outside the map kappa is zero, as for the convolution itself).

    Returns
    -------
    dict
        (dx, dy) -> value, for the offsets (1, 0) and (0, 1); the offsets
        (-1, 0) and (0, -1) take the opposite values.
    """
    correction = abs(np.linalg.det(matrix)) / np.pi * _lattice_constant(matrix.T @ matrix)
    return {(1, 0): -0.5 * correction[component, 0], (0, 1): -0.5 * correction[component, 1]}


def _lattice_constant(gram):
    """C(G) = C(G / G_xx) / G_xx; the scale-free part is cached."""
    scale = float(gram[0, 0])
    ratios = tuple(round(float(v) / scale, 12) for v in (gram[0, 1], gram[1, 1]))
    return _scale_free_lattice_constant(ratios) / scale


@functools.lru_cache(maxsize=16)
def _scale_free_lattice_constant(ratios):
    return _lattice_sum_minus_integral(np.array([[1.0, ratios[0]], [ratios[0], ratios[1]]]))


def _lattice_sum_minus_integral(gram, reach=48):
    """C = sum over the lattice square |d|_inf <= R of d d^T/(d^T G d), minus the integral
    over the square of side 2R + 1 it stands for (converged to ~1e-6 at R = 48)."""
    from scipy.integrate import quad

    d = np.arange(-reach, reach + 1, dtype=float)
    dx, dy = np.meshgrid(d, d)
    norm = gram[0, 0] * dx * dx + 2 * gram[0, 1] * dx * dy + gram[1, 1] * dy * dy
    norm[reach, reach] = np.inf
    half = reach + 0.5

    def angular(phi, i, j):
        unit = (np.cos(phi), np.sin(phi))
        radius = half / max(abs(unit[0]), abs(unit[1]))
        return unit[i] * unit[j] / (gram[0, 0] * unit[0] ** 2 + 2 * gram[0, 1] * unit[0] * unit[1]
                                    + gram[1, 1] * unit[1] ** 2) * radius**2 / 2

    breaks = np.arange(9) * np.pi / 4
    constant = np.empty((2, 2))
    for i, a in enumerate((dx, dy)):
        for j, b in enumerate((dx, dy)):
            integral = sum(quad(angular, lo, hi, args=(i, j))[0]
                           for lo, hi in zip(breaks[:-1], breaks[1:]))
            constant[i, j] = np.sum(a * b / norm) - integral
    return constant


def _kappa_map(kappa, fill_nan):
    array = kappa if isinstance(kappa, np.ndarray) else np.asarray(kappa)
    if array.ndim != 2:
        raise LensviewInputError(
            f"The convergence map must be 2-D, got {array.ndim} dimension(s) with shape "
            f"{array.shape}.")
    dtype = _work_dtype(array.dtype)
    array = np.asarray(array, dtype=dtype)
    if not array.dtype.isnative:
        array = array.astype(array.dtype.newbyteorder("="))
    bad = ~np.isfinite(array)
    if bad.any():
        if fill_nan is None:
            raise LensviewInputError(
                f"The convergence map holds {int(bad.sum())} NaN or infinite cell(s); lensview "
                "will not guess the mass there. Pass fill_nan=<value> (e.g. fill_nan=0.0 for no "
                "mass) to fill them, or give a map without gaps.")
        array = np.where(bad, dtype.type(_finite(fill_nan, "fill_nan")), array)
    return array


def _work_dtype(dtype):
    return np.dtype(np.float32 if np.dtype(dtype) == np.float32 else np.float64)


def _pixel_matrix(wcs):
    """Pixel offsets to sky-plane offsets (East, North), arcsec per pixel."""
    return np.asarray(celestial_wcs(wcs, "The convergence map").pixel_scale_matrix, float) * 3600.0



def _memory_limit(max_memory):
    if isinstance(max_memory, u.Quantity):
        try:
            return float(max_memory.to_value(u.byte))
        except u.UnitsError:
            raise LensviewInputError(
                f"max_memory {max_memory} is not an amount of memory; give e.g. 4 * u.GB.") from None
    value = _finite(max_memory, "max_memory")
    if value <= 0:
        raise LensviewInputError(f"max_memory must be positive, got {max_memory!r}.")
    return value


def _finite(value, label):
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise LensviewInputError(f"{label} must be a number, got {value!r}.") from None
    if not np.isfinite(number):
        raise LensviewInputError(f"{label} must be a finite number, got {value!r}.")
    return number
