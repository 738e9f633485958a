"""Matplotlib figures shared by the app and the command line.

The field figure shows the cutout on WCS axes (astropy's WCSAxes) with the
critical curves of every model, caustics if given, marked candidates with
their labels, links between paired candidates, predicted counter-images and a
scale bar in arcsec and kpc. The source-plane figure shows a delensed image
with the caustics and the ray-traced candidates.

Line styles: tangential curves solid, radial curves dashed; caustics are
thinner, dotted (tangential) and dash-dotted (radial). One colour per model
from `LENSVIEW_PALETTE`. Curves, knots, counter-images and pair links are
drawn in the styles of `lensview.style`, which the page's picture uses too.

Figures are built on `matplotlib.figure.Figure` without pyplot, so no global
state or interactive backend is involved.
"""

import math
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table
from astropy.visualization import (AsinhStretch, ImageNormalize, LinearStretch, LogStretch,
                                   MinMaxInterval, PercentileInterval, SqrtStretch, ZScaleInterval)
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales
from matplotlib import colormaps, patheffects
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from ..errors import LensviewInputError
from ..style import (COUNTERIMAGE, CURVE_NAMES, CURVE_STYLES, KNOT, model_colours, MODEL_PALETTE,
                     MU_LEVELS, MU_OVERLAY, PAIR_LINK)

__all__ = ["LENSVIEW_PALETTE", "STRETCHES", "display_norm", "model_colours",
           "render_field_figure", "render_source_plane_figure", "save_figure"]

#: Model colours (defined in `lensview.style`, shared with the page's picture).
LENSVIEW_PALETTE = MODEL_PALETTE

STRETCHES = {"linear": LinearStretch, "sqrt": SqrtStretch, "log": LogStretch, "asinh": AsinhStretch}

_CURVE_STYLES = CURVE_STYLES
_STYLE_NAMES = CURVE_NAMES
_INK = "#1A1A1A"
#: |mu| levels of a magnification map drawn as an overlay.
MU_OVERLAY_LEVELS = MU_LEVELS
_NEUTRAL = "#4D4D4D"
_HALO = [patheffects.withStroke(linewidth=2.2, foreground="white")]
_NICE_ARCSEC = (0.05, 0.1, 0.2, 0.25, 0.5, 1, 2, 2.5, 5, 10, 15, 20, 30, 60, 120, 300, 600, 1200)
_FIGURE_WIDTH_IN = 6.0
#: Room taken by tick labels, axis labels and title (inches), for the figure's aspect.
_MARGIN_X_IN, _MARGIN_Y_IN = 1.3, 1.1


# ---------------------------------------------------------------------------- display
def display_norm(data, stretch="asinh", limits="zscale"):
    """Normalisation that maps image values to display levels.

    Parameters
    ----------
    data : array-like
        Image; NaN and infinite pixels are ignored.
    stretch : {"linear", "sqrt", "log", "asinh"}
    limits : "zscale", "minmax", float or (low, high)
        ``"zscale"``: `~astropy.visualization.ZScaleInterval`; a number p in
        (0, 100]: the central p per cent of the pixel values
        (`~astropy.visualization.PercentileInterval`); two numbers: the
        values themselves.

    Returns
    -------
    `~astropy.visualization.ImageNormalize`
        Values beyond the limits map outside [0, 1], which matplotlib shows
        with the ends of the colour map (not clipped here, so that NaN pixels
        keep the colour map's "bad" colour); a flat image gets a unit-wide
        interval.
    """
    if stretch not in STRETCHES:
        raise LensviewInputError(
            f"Unknown stretch {stretch!r}; choose one of {', '.join(STRETCHES)}.")
    values = np.asarray(data, dtype=float)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise LensviewInputError("The image holds no finite pixel; check the cutout's data.")
    low, high = _limits(finite, limits)
    if not high > low:
        low, high = low - 0.5, high + 0.5
    return ImageNormalize(vmin=low, vmax=high, stretch=STRETCHES[stretch](), clip=False)


def _limits(finite, limits):
    if isinstance(limits, str):
        if limits == "zscale":
            return tuple(float(v) for v in ZScaleInterval().get_limits(finite))
        if limits == "minmax":
            return tuple(float(v) for v in MinMaxInterval().get_limits(finite))
        raise LensviewInputError(
            f"Unknown limits {limits!r}; use 'zscale', 'minmax', a percentile or (low, high).")
    if np.ndim(limits) == 0:
        percentile = float(limits)
        if not 0 < percentile <= 100:
            raise LensviewInputError(f"A percentile limit lies in (0, 100]; got {percentile}.")
        return tuple(float(v) for v in PercentileInterval(percentile).get_limits(finite))
    pair = np.asarray(limits, dtype=float)
    if pair.shape != (2,) or not np.all(np.isfinite(pair)) or not pair[1] > pair[0]:
        raise LensviewInputError(f"Limits must be two finite numbers low < high; got {limits!r}.")
    return float(pair[0]), float(pair[1])


def _colormap(cmap):
    try:
        return colormaps[cmap].with_extremes(bad="#BFBFBF")
    except KeyError as error:
        raise LensviewInputError(
            f"Unknown colour map {cmap!r}; use a matplotlib name such as 'gray_r', 'gray', "
            "'magma' or 'cividis'.") from error


# ---------------------------------------------------------------------------- figures
def render_field_figure(data, wcs, *, curves=(), candidates=None, pairs=None, counterimages=None,
                        z_lens=None, cosmology=None, stretch="asinh", limits="zscale", cmap="gray_r",
                        title=None, magnification_map=None, mu_levels=MU_OVERLAY_LEVELS):
    """The cutout with curves, candidates, pair links and a scale bar.

    Parameters
    ----------
    data : ndarray
        2-D cutout.
    wcs : `~astropy.wcs.WCS`
        Its celestial WCS.
    curves : sequence of `~lensview.lens.curves.Curve`
        Critical curves (and optionally caustics) of one or more models.
    candidates : `~astropy.table.Table` or `~astropy.coordinates.SkyCoord`, optional
        Table with ``ra``, ``dec`` (and ``label``); labels default to K1, K2...
    pairs : `~astropy.table.Table`, optional
        Rows with ``i``, ``j`` (0-based positions in ``candidates``), as
        `~lensview.pair_counterparts` returns them; drawn as thin links.
    counterimages : `~astropy.table.Table`, optional
        Predicted images with ``ra``, ``dec`` and optional ``model``.
    z_lens : float, optional
        Lens redshift; adds kpc to the scale bar.
    cosmology : `~astropy.cosmology.Cosmology`, optional
        Default Planck18.
    stretch, limits
        See `display_norm`.
    cmap : str
        Matplotlib colour map name.
    title : str, optional
    magnification_map : `~lensview.io.mapfiles.ScalarMap`, optional
        A magnification map from a file (`~lensview.io.mapfiles.read_magnification_map`),
        drawn as |mu| contours only: it cannot place critical curves.
    mu_levels : sequence of float
        |mu| levels of those contours.

    Returns
    -------
    `~matplotlib.figure.Figure`
    """
    data, wcs = _image_and_wcs(data, wcs, "cutout")
    fig, ax = _image_axes(data, wcs, stretch, limits, cmap)
    has_overlay = magnification_map is not None and len(mu_levels) > 0
    if has_overlay:
        _draw_magnification_overlay(ax, wcs, data.shape, magnification_map, mu_levels)
    colours = _draw_curves(ax, wcs, curves)
    candidate_table = None
    if candidates is not None:
        from ..io import as_candidate_table

        candidate_table = as_candidate_table(candidates)
        xy = _table_pixels(candidate_table, wcs)
        _draw_points(ax, xy, candidate_table["label"])
        if pairs is not None:
            _draw_pairs(ax, xy, pairs)
    elif pairs is not None:
        raise LensviewInputError("Pair links need the candidates they refer to; pass candidates=.")
    has_counterimages = counterimages is not None and len(counterimages) > 0
    if has_counterimages:
        _draw_counterimages(ax, wcs, counterimages, colours)
    _scale_bar(ax, wcs, data.shape, z_lens, cosmology, "lens")
    _legend(ax, curves, colours, candidate_table is not None, has_counterimages,
            mu_levels=mu_levels if has_overlay else ())
    if title:
        ax.set_title(title)
    return fig


def _draw_magnification_overlay(ax, wcs, shape, mu_map, levels):
    from ..io.mapfiles import magnification_overlay_on

    mu = magnification_overlay_on(mu_map, wcs, shape)
    ax.contour(np.where(np.isfinite(mu), mu, 0.0), levels=sorted(levels), colors=MU_OVERLAY.colour,
               linewidths=MU_OVERLAY.width, linestyles=MU_OVERLAY.dash)


def render_source_plane_figure(image, wcs, caustics, traced_candidates=None, *, z_source=None,
                               cosmology=None, stretch="asinh", limits=99.5, cmap="gray_r", title=None):
    """The delensed (source-plane) image with caustics and traced candidates.

    Parameters
    ----------
    image : ndarray
        Source-plane image, e.g. from `~lensview.source_plane_image` (NaN
        where nothing lands).
    wcs : `~astropy.wcs.WCS`
        Its WCS.
    caustics : sequence of `~lensview.lens.curves.Curve`
        Caustics (``plane="source"``) of one or more models.
    traced_candidates : `~astropy.table.Table` or `~astropy.coordinates.SkyCoord`, optional
        Ray-traced candidate positions with ``ra``, ``dec`` and ``label``.
    z_source : float, optional
        Source redshift; adds kpc in the source plane to the scale bar.
    cosmology, stretch, limits, cmap, title
        As for `render_field_figure` (limits default: central 99.5 per cent).

    Returns
    -------
    `~matplotlib.figure.Figure`
    """
    image, wcs = _image_and_wcs(image, wcs, "source-plane image")
    fig, ax = _image_axes(image, wcs, stretch, limits, cmap)
    colours = _draw_curves(ax, wcs, caustics)
    has_points = traced_candidates is not None
    if has_points:
        from ..io import as_candidate_table

        table = as_candidate_table(traced_candidates)
        _draw_points(ax, _table_pixels(table, wcs), table["label"])
    _scale_bar(ax, wcs, image.shape, z_source, cosmology, "source")
    _legend(ax, caustics, colours, has_points, False, candidate_name="traced knot")
    ax.set_title(title or "source plane")
    return fig


def save_figure(fig, path, dpi=300):
    """Save a figure as PNG or PDF.

    Parameters
    ----------
    fig : `~matplotlib.figure.Figure`
    path : str or path-like
        ``.png`` or ``.pdf``.
    dpi : int
        Resolution of the PNG (and of any raster image inside the PDF).

    Returns
    -------
    str
        The path written.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".png", ".pdf"):
        raise LensviewInputError(f"Cannot save a figure as {path.name!r}; use a .png or .pdf name.")
    if not path.parent.exists():
        raise LensviewInputError(
            f"The folder {str(path.parent)!r} does not exist; create it or choose another path.")
    if not (isinstance(dpi, (int, float)) and 10 <= dpi <= 2400):
        raise LensviewInputError(f"dpi must be a number between 10 and 2400; got {dpi!r}.")
    from .. import __version__

    creator = f"lensview {__version__}"
    metadata = {"Software": creator} if suffix == ".png" else {"Creator": creator, "CreationDate": None}
    fig.savefig(path, dpi=dpi, format=suffix[1:], metadata=metadata)
    return str(path)


# ---------------------------------------------------------------------------- drawing
def _image_and_wcs(data, wcs, what):
    data = np.asarray(data, dtype=float)
    if data.ndim != 2:
        raise LensviewInputError(f"The {what} must be a 2-D image, got shape {data.shape}.")
    if not isinstance(wcs, WCS) or not wcs.has_celestial:
        raise LensviewInputError(f"The {what} needs a celestial astropy WCS; pass the image's WCS.")
    return data, wcs.celestial


def _image_axes(data, wcs, stretch, limits, cmap):
    norm = display_norm(data, stretch, limits)
    colour_map = _colormap(cmap)
    ny, nx = data.shape
    height = min(max((_FIGURE_WIDTH_IN - _MARGIN_X_IN) * ny / nx + _MARGIN_Y_IN, 2.5), 12.0)
    fig = Figure(figsize=(_FIGURE_WIDTH_IN, height), layout="constrained")
    ax = fig.add_subplot(projection=wcs)
    ax.imshow(np.ma.masked_invalid(data), origin="lower", cmap=colour_map, norm=norm,
              interpolation="nearest")
    ax.set_xlim(-0.5, nx - 0.5)
    ax.set_ylim(-0.5, ny - 0.5)
    ax.coords[0].set_axislabel("Right ascension (ICRS)")
    ax.coords[1].set_axislabel("Declination (ICRS)")
    ax.coords[0].set_major_formatter("hh:mm:ss.s")
    ax.coords[1].set_major_formatter("dd:mm:ss")
    return fig, ax


def _draw_curves(ax, wcs, curves):
    from ..io.regions import curve_list

    curves = curve_list(curves)
    colours = model_colours(str(c.model) for c in curves)
    for curve in curves:
        xy = curve.to_pixels(wcs)
        if curve.closed and len(xy) > 2:
            xy = np.vstack([xy, xy[:1]])
        style, width = _CURVE_STYLES.get((curve.plane, curve.kind), ("-", 1.5))
        ax.plot(xy[:, 0], xy[:, 1], linestyle=style, linewidth=width, color=colours[str(curve.model)],
                solid_capstyle="round")
    return colours


def _table_pixels(table, wcs):
    x, y = wcs.world_to_pixel(SkyCoord(table["ra"], table["dec"], frame="icrs"))
    return np.column_stack([x, y])


def _mark(ax, xy, style, edge=None, zorder=5):
    """Markers of a `lensview.style.MarkStyle`: the halo under the mark, sizes in points."""
    marker = "o" if style.shape == "circle" else "s"
    size = (2 * style.radius) ** 2
    ax.scatter(xy[:, 0], xy[:, 1], s=size, marker=marker, facecolors="none",
               edgecolors=style.halo, linewidths=style.width + style.halo_width, zorder=zorder)
    ax.scatter(xy[:, 0], xy[:, 1], s=size, marker=marker, facecolors="none",
               edgecolors=edge or style.colour, linewidths=style.width, zorder=zorder + 0.1)


def _draw_points(ax, xy, labels):
    _mark(ax, xy, KNOT)
    halo = [patheffects.withStroke(linewidth=2.0, foreground=KNOT.halo)]
    for (x, y), label in zip(xy, labels):
        ax.annotate(str(label), (x, y), xytext=(KNOT.radius + 1.5, KNOT.radius), fontsize=8,
                    textcoords="offset points", color=KNOT.colour, path_effects=halo, zorder=6,
                    annotation_clip=True)


def _draw_pairs(ax, xy, pairs):
    if not isinstance(pairs, Table) or "i" not in pairs.colnames or "j" not in pairs.colnames:
        raise LensviewInputError("pairs must be a Table with columns i and j (knot positions).")
    halo = [patheffects.withStroke(linewidth=PAIR_LINK.width + PAIR_LINK.halo_width,
                                   foreground=PAIR_LINK.halo)]
    for i, j in zip(pairs["i"], pairs["j"]):
        i, j = int(i), int(j)
        if not (0 <= i < len(xy) and 0 <= j < len(xy)):
            raise LensviewInputError(
                f"Pair ({i}, {j}) refers to a knot beyond the {len(xy)} given; pass the same "
                "knots the pairs were computed for.")
        ax.plot(xy[[i, j], 0], xy[[i, j], 1], color=PAIR_LINK.colour, linewidth=PAIR_LINK.width,
                path_effects=halo, zorder=4)


def _draw_counterimages(ax, wcs, counterimages, colours):
    _mark(ax, _table_pixels(counterimages, wcs), COUNTERIMAGE)


def _scale_bar(ax, wcs, shape, redshift, cosmology, plane):
    ny, nx = shape
    arcsec_per_pixel = float(proj_plane_pixel_scales(wcs)[0] * 3600.0)
    width_arcsec = nx * arcsec_per_pixel
    fitting = [v for v in _NICE_ARCSEC if v <= 0.25 * width_arcsec]
    length = fitting[-1] if fitting else 0.25 * width_arcsec
    label = f"{length:g}\u2033"
    if redshift is not None:
        from ..cosmology import angular_scale

        kpc = (angular_scale(redshift, cosmology, unit=u.kpc) * length * u.arcsec).to_value(u.kpc)
        label += f" = {_significant(kpc)} kpc"
    x0, y0 = 0.05 * nx, 0.06 * ny
    x1 = x0 + length / arcsec_per_pixel
    ax.plot([x0, x1], [y0, y0], color=_INK, linewidth=2.2, solid_capstyle="butt",
            path_effects=[patheffects.withStroke(linewidth=4.5, foreground="white")], zorder=7)
    ax.text(0.5 * (x0 + x1), y0 + 0.025 * ny, label, ha="center", va="bottom", fontsize=8,
            color=_INK, path_effects=_HALO, zorder=7, gid=f"scale-bar-{plane}")


def _significant(value, digits=3):
    if value == 0 or not math.isfinite(value):
        return f"{value:g}"
    decimals = max(digits - 1 - int(math.floor(math.log10(abs(value)))), 0)
    return f"{value:.{decimals}f}"


def _legend_mark(style, label):
    return Line2D([], [], linestyle="none", marker="o" if style.shape == "circle" else "s",
                  markersize=2 * style.radius, markerfacecolor="none",
                  markeredgecolor=style.colour, markeredgewidth=style.width, label=label)


def _legend(ax, curves, colours, has_candidates, has_counterimages, candidate_name=KNOT.name,
            mu_levels=()):
    handles = [Line2D([], [], color=colour, linewidth=2.0, label=name) for name, colour in colours.items()]
    if len(mu_levels):
        handles.append(Line2D([], [], color=MU_OVERLAY.colour, linestyle=MU_OVERLAY.dash,
                              linewidth=MU_OVERLAY.width,
                              label="|\u03bc| = " + ", ".join(f"{v:g}" for v in sorted(mu_levels))
                              + " (uploaded map, overlay only)"))
    present = []
    for curve in curves:
        key = (curve.plane, curve.kind)
        if key in _CURVE_STYLES and key not in present:
            present.append(key)
    for key in sorted(present, key=list(_CURVE_STYLES).index):
        style, width = _CURVE_STYLES[key]
        handles.append(Line2D([], [], color=_NEUTRAL, linestyle=style, linewidth=width,
                              label=_STYLE_NAMES[key]))
    if has_candidates:
        handles.append(_legend_mark(KNOT, candidate_name))
    if has_counterimages:
        handles.append(_legend_mark(COUNTERIMAGE, COUNTERIMAGE.name))
    if handles:
        ax.legend(handles=handles, loc="upper right", fontsize=7, framealpha=0.85)
