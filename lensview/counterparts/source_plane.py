"""The source-plane view of a cutout.

Cutout pixels are traced to the source plane and averaged per source-plane
pixel: lensing conserves surface brightness (Schneider, Ehlers & Falco 1992,
sec. 5.2), so the mean of the image-plane samples is the source's surface
brightness there.
"""

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS

from ..checks import positive_angle, positive_int
from ..errors import LensviewInputError

#: Largest source-plane grid side (pixels) that `source_plane_image` builds.
MAX_SOURCE_PIXELS = 4096
_TRACE_CHUNK = 200_000

def source_plane_image(data, wcs, field, z_source, *, box=None, shape=(256, 256),
                       pixel_scale=None, oversample=1):
    """Delensed view: cutout pixels ray-traced and resampled onto a source-plane grid.

    Each cutout pixel inside ``box`` is split into ``oversample`` x
    ``oversample`` sub-pixels carrying the pixel's value, every sub-pixel
    centre is traced to the source plane (``beta = theta - f alpha``), and
    each source-plane pixel receives the mean of the samples landing in it.
    Lensing conserves surface brightness, so this mean estimates the source's
    surface brightness; several images of one source land on the same
    source-plane pixels and are averaged. Pixels that no sample reaches are
    NaN, as are samples on NaN data or outside the model.

    Parameters
    ----------
    data : ndarray
        2-D cutout (surface brightness per pixel, any unit).
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the cutout.
    field : `~lensview.DeflectionField`
    z_source : float
    box : `~astropy.coordinates.SkyCoord` or sequence of 4 numbers, optional
        Two opposite corners on the sky, or cutout pixel bounds
        ``(x_min, x_max, y_min, y_max)`` (inclusive, 0-based). Default: the
        whole cutout.
    shape : tuple of int
        (ny, nx) of the source-plane grid, which is fitted around the traced
        samples with square pixels. Ignored when ``pixel_scale`` is given.
    pixel_scale : `~astropy.units.Quantity`, optional
        Source-plane pixel size (angle); the grid then covers the traced
        samples at that scale.
    oversample : int
        Sub-pixels per cutout pixel side (1: pixel centres only).

    Returns
    -------
    image : ndarray
        Source-plane surface brightness, NaN where nothing lands.
    source_wcs : `~astropy.wcs.WCS`
        WCS of the source-plane grid, in the model's projection, so caustics
        and traced positions (`~lensview.DeflectionField.ray_trace`) land on
        it through ``world_to_pixel``.
    """
    data = np.asarray(data, dtype=np.float64)
    if data.ndim != 2:
        raise LensviewInputError(
            f"The cutout must be a 2-D image, got shape {data.shape}; pass one image plane.")
    if not isinstance(wcs, WCS) or not wcs.has_celestial:
        raise LensviewInputError(
            "The cutout needs a celestial WCS; pass the WCS of the image's FITS header.")
    wcs = wcs.celestial
    oversample = positive_int(oversample, "oversample")
    x_min, x_max, y_min, y_max = _cutout_box(box, wcs, data.shape)

    offsets = (np.arange(oversample) + 0.5) / oversample - 0.5
    xs = (np.arange(x_min, x_max + 1)[:, None] + offsets).ravel()
    ys = (np.arange(y_min, y_max + 1)[:, None] + offsets).ravel()
    values = np.repeat(np.repeat(data[y_min:y_max + 1, x_min:x_max + 1], oversample, axis=0),
                       oversample, axis=1).ravel()
    sample_x, sample_y = np.meshgrid(xs, ys)
    finite = np.isfinite(values)
    sample_x, sample_y, values = sample_x.ravel()[finite], sample_y.ravel()[finite], values[finite]

    mx, my = field.sky_to_pixels(wcs.pixel_to_world(sample_x, sample_y))
    bx, by = np.empty_like(mx), np.empty_like(my)
    for start in range(0, len(mx), _TRACE_CHUNK):
        chunk = slice(start, start + _TRACE_CHUNK)
        bx[chunk], by[chunk] = field.trace_pixels(mx[chunk], my[chunk], z_source)
    landed = np.isfinite(bx) & np.isfinite(by)
    if not landed.any():
        raise LensviewInputError(
            f"No pixel of the box lies on model {field.name!r} with finite data; choose a "
            "box inside both the cutout and the model footprint.")
    bx, by, values = bx[landed], by[landed], values[landed]

    scales = field.pixel_scales.to_value(u.arcsec)
    extent = np.array([np.ptp(bx) * scales[0], np.ptp(by) * scales[1]])
    if pixel_scale is not None:
        step = positive_angle(pixel_scale, "pixel_scale").to_value(u.arcsec)
        n_x, n_y = np.ceil(extent / step).astype(int) + 1
        if max(n_x, n_y) > MAX_SOURCE_PIXELS:
            raise LensviewInputError(
                f"A source-plane pixel of {step:g} arcsec needs a {n_y} x {n_x} grid for "
                f"this box (limit {MAX_SOURCE_PIXELS} per side); choose a larger pixel_scale "
                "or a smaller box.")
    else:
        n_y, n_x = _grid_shape(shape)
        step = max(extent[0] / max(n_x - 1, 1), extent[1] / max(n_y - 1, 1))
        step = step if step > 0 else float(np.min(scales))
    per_pixel = step / scales  # map pixels per source-plane pixel, along x and y
    origin = np.array([0.5 * (bx.min() + bx.max()), 0.5 * (by.min() + by.max())]) \
        - per_pixel * (np.array([n_x, n_y]) - 1) / 2.0
    col = np.floor((bx - origin[0]) / per_pixel[0] + 0.5).astype(np.int64)
    row = np.floor((by - origin[1]) / per_pixel[1] + 0.5).astype(np.int64)
    on_grid = (col >= 0) & (col < n_x) & (row >= 0) & (row < n_y)
    index = row[on_grid] * n_x + col[on_grid]
    total = np.bincount(index, weights=values[on_grid], minlength=n_x * n_y)
    count = np.bincount(index, minlength=n_x * n_y)
    with np.errstate(invalid="ignore", divide="ignore"):
        image = np.where(count > 0, total / count, np.nan).reshape(n_y, n_x)
    return image, _source_grid_wcs(field.wcs, origin, per_pixel, (n_y, n_x))


def _source_grid_wcs(map_wcs, origin, per_pixel, shape):
    """WCS of a grid whose pixel (i, j) sits at map pixel origin + per_pixel * (i, j)."""
    out = map_wcs.deepcopy()
    out.sip = None
    matrix = map_wcs.pixel_scale_matrix
    if out.wcs.has_cd():
        del out.wcs.cd
    out.wcs.pc = matrix * per_pixel[None, :]
    out.wcs.cdelt = [1.0, 1.0]
    out.wcs.cunit = ["deg", "deg"]
    out.wcs.crpix = (np.asarray(map_wcs.wcs.crpix) - 1.0 - origin) / per_pixel + 1.0
    out.wcs.set()
    out.pixel_shape = (shape[1], shape[0])
    return out


def _cutout_box(box, wcs, shape):
    ny, nx = shape
    if box is None:
        return 0, nx - 1, 0, ny - 1
    if isinstance(box, SkyCoord):
        if box.size != 2:
            raise LensviewInputError(
                f"A sky box needs exactly two corner positions, got {box.size}; pass "
                "SkyCoord([corner1, corner2]).")
        x, y = wcs.world_to_pixel(box)
        bounds = (np.min(x), np.max(x), np.min(y), np.max(y))
    else:
        try:
            bounds = tuple(float(v) for v in box)
        except (TypeError, ValueError):
            bounds = ()
        if len(bounds) != 4 or not np.all(np.isfinite(bounds)):
            raise LensviewInputError(
                f"box {box!r} is neither two SkyCoord corners nor four pixel bounds; pass "
                "(x_min, x_max, y_min, y_max) in cutout pixels.")
    x_min, x_max = max(int(np.floor(bounds[0])), 0), min(int(np.ceil(bounds[1])), nx - 1)
    y_min, y_max = max(int(np.floor(bounds[2])), 0), min(int(np.ceil(bounds[3])), ny - 1)
    if x_min > x_max or y_min > y_max:
        raise LensviewInputError(
            f"The box {bounds} does not overlap the {nx} x {ny} cutout; choose a box on the image.")
    return x_min, x_max, y_min, y_max


def _grid_shape(shape):
    try:
        n_y, n_x = (int(v) for v in shape)
    except (TypeError, ValueError):
        n_y = n_x = 0
    if not (1 < n_x <= MAX_SOURCE_PIXELS and 1 < n_y <= MAX_SOURCE_PIXELS):
        raise LensviewInputError(
            f"shape {shape!r} is not a (ny, nx) pair of sizes between 2 and "
            f"{MAX_SOURCE_PIXELS}; pass e.g. shape=(256, 256).")
    return n_y, n_x


