"""Drawing the clickable picture: the cutout, the curves, the knots.

Two layers, so that a click redraws only what it changed:

* the base layer (cutout with stretch, limits and colour map, critical
  curves of every model, optional magnification contours, legend) is drawn
  with matplotlib on axes that fill the whole figure, with limits equal to
  the `Viewport` extent, so picture pixels and cutout pixels obey the
  viewport mapping exactly; it is cached per viewport and settings;
* the mark layer (knots and labels, pair links, predicted counter-images) is
  drawn on a copy of it with PIL on every rerun.

Colours, line styles and the display normalisation come from
`lensview.figures`, so the picture and the downloadable figure agree.
This module only draws; every position it places comes from a library call.
"""

import numpy as np
from PIL import Image, ImageDraw, ImageFont

__all__ = ["render_base_layer", "draw_marks", "CURVE_STYLES", "KNOT_COLOUR"]

#: Line style and width of each kind of curve (tangential solid, radial dashed),
#: as in the downloadable figure.
CURVE_STYLES = {"tangential": ("-", 1.6), "radial": ("--", 1.4)}
#: Ink of the knot markers and labels, and of their halo.
KNOT_COLOUR = (255, 214, 0)
KNOT_HALO = (20, 20, 20)
COUNTERIMAGE_COLOUR = (0, 229, 255)
PAIR_COLOUR = (255, 255, 255)
#: Contours of an uploaded magnification map.
OVERLAY_COLOUR = "#B07AD6"
_DPI = 100


def render_base_layer(data, viewport, *, stretch, limits, cmap, curves=(), model_names=(),
                      contours=None, contour_levels=(), overlay=None, overlay_levels=(),
                      legend=True):
    """The base layer as an RGB array of the viewport's size.

    Parameters
    ----------
    data : ndarray
        The whole cutout, or an (ny, nx, 3) RGB composite on its pixels; only
        the viewport's crop is drawn.
    viewport : `~lensview.page.viewport.Viewport`
    stretch, limits, cmap
        Display settings (see `lensview.figures.display_norm`).
    curves : sequence of (model name, kind, (N, 2) cutout pixel array, closed)
        Curves to draw, already in cutout pixels.
    model_names : sequence of str
        All models, in order (sets the colours and the legend).
    contours : ndarray or None
        |mu| on the crop's pixels (viewport.ny, viewport.nx), for contours.
    contour_levels : sequence of float
        |mu| levels of the contours.
    overlay : ndarray or None
        |mu| of a magnification map from a file, on the crop's pixels: drawn
        as contours of its own colour (an overlay only, never a model).
    overlay_levels : sequence of float
        |mu| levels of the overlay contours.
    legend : bool

    Returns
    -------
    ndarray
        (height, width, 3) uint8.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    from matplotlib import colormaps

    from ..figures import display_norm, model_colours

    fig = Figure(figsize=(viewport.width / _DPI, viewport.height / _DPI), dpi=_DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0, 0, 1, 1))
    ax.set_axis_off()
    left, right, bottom, top = viewport.extent
    if np.ndim(data) == 3:
        # A colour composite, already RGB on the cutout's pixels.
        ax.imshow(np.asarray(data[viewport.slices]), origin="lower", extent=viewport.extent,
                  interpolation="nearest", resample=False)
    else:
        crop = np.asarray(data[viewport.slices], dtype=float)
        norm = display_norm(crop, stretch, limits)
        ax.imshow(crop, origin="lower", extent=viewport.extent, norm=norm,
                  cmap=colormaps[cmap].with_extremes(bad="#BFBFBF"), interpolation="nearest",
                  resample=False)
    colours = model_colours(model_names)
    if contours is not None and len(contour_levels):
        rows, cols = viewport.slices
        yy, xx = np.mgrid[rows, cols]
        finite = np.where(np.isfinite(contours), contours, 0.0)
        ax.contour(xx, yy, finite, levels=sorted(contour_levels), colors="#7F7F7F",
                   linewidths=0.8, linestyles=":")
    show_overlay = overlay is not None and len(overlay_levels) > 0
    if show_overlay:
        rows, cols = viewport.slices
        yy, xx = np.mgrid[rows, cols]
        ax.contour(xx, yy, np.where(np.isfinite(overlay), overlay, 0.0),
                   levels=sorted(overlay_levels), colors=OVERLAY_COLOUR, linewidths=1.0,
                   linestyles="-.")
    for model, kind, xy, closed in curves:
        if len(xy) < 2:
            continue
        if closed:
            xy = np.vstack([xy, xy[:1]])
        style, width = CURVE_STYLES.get(kind, ("-", 1.4))
        ax.plot(xy[:, 0], xy[:, 1], linestyle=style, linewidth=width,
                color=colours.get(model, "#FFFFFF"), solid_capstyle="round")
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    if legend and model_names:
        handles = [Line2D([], [], color=colours[name], linewidth=2.0, label=name)
                   for name in model_names]
        kinds = sorted({kind for _, kind, _, _ in curves}, key=list(CURVE_STYLES).index)
        handles += [Line2D([], [], color="#9A9A9A", linestyle=CURVE_STYLES[kind][0],
                           linewidth=CURVE_STYLES[kind][1], label=f"{kind} critical curve")
                    for kind in kinds]
        if contours is not None and len(contour_levels):
            levels = ", ".join(f"{level:g}" for level in sorted(contour_levels))
            handles.append(Line2D([], [], color="#7F7F7F", linestyle=":", linewidth=0.8,
                                  label=f"|\u03bc| = {levels}"))
        if show_overlay:
            levels = ", ".join(f"{level:g}" for level in sorted(overlay_levels))
            handles.append(Line2D([], [], color=OVERLAY_COLOUR, linestyle="-.", linewidth=1.0,
                                  label=f"|\u03bc| = {levels} (uploaded map, overlay only)"))
        handles += [
            Line2D([], [], linestyle="none", marker="o", markersize=7, markerfacecolor="none",
                   markeredgecolor=_hex(KNOT_COLOUR), markeredgewidth=1.5, label="marked knot"),
            Line2D([], [], linestyle="none", marker="s", markersize=7, markerfacecolor="none",
                   markeredgecolor=_hex(COUNTERIMAGE_COLOUR), markeredgewidth=1.5,
                   label="predicted counter-image"),
        ]
        ax.legend(handles=handles, loc="upper right", fontsize=8, framealpha=0.8)
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    return np.ascontiguousarray(rgba[:viewport.height, :viewport.width, :3])


def _hex(rgb):
    return "#" + "".join(f"{c:02X}" for c in rgb)


def draw_marks(base, viewport, knots=(), links=(), counterimages=()):
    """Knots, pair links and counter-images on a copy of the base layer.

    Parameters
    ----------
    base : ndarray
        The base layer (height, width, 3).
    viewport : `~lensview.page.viewport.Viewport`
    knots : sequence of (label, x, y)
        Knots in cutout pixels.
    links : sequence of ((x1, y1), (x2, y2))
        Pair links in cutout pixels.
    counterimages : sequence of (x, y)
        Predicted counter-images in cutout pixels.

    Returns
    -------
    `PIL.Image.Image`
    """
    picture = Image.fromarray(base)
    pen = ImageDraw.Draw(picture)
    font = ImageFont.load_default(size=13)
    for start, end in links:
        u1, v1 = viewport.cutout_to_display(*start)
        u2, v2 = viewport.cutout_to_display(*end)
        pen.line([(u1, v1), (u2, v2)], fill=KNOT_HALO, width=4)
        pen.line([(u1, v1), (u2, v2)], fill=PAIR_COLOUR, width=2)
    for x, y in counterimages:
        u, v = viewport.cutout_to_display(x, y)
        for colour, grow in ((KNOT_HALO, 1), (COUNTERIMAGE_COLOUR, 0)):
            r = 7 + grow
            pen.rectangle([u - r, v - r, u + r, v + r], outline=colour, width=2 + grow)
    for label, x, y in knots:
        u, v = viewport.cutout_to_display(x, y)
        if not viewport.contains_display(u, v):
            continue
        for colour, width in ((KNOT_HALO, 4), (KNOT_COLOUR, 2)):
            pen.ellipse([u - 8, v - 8, u + 8, v + 8], outline=colour, width=width)
        pen.line([(u - 2, v), (u + 2, v)], fill=KNOT_COLOUR, width=1)
        pen.text((u + 10, v - 20), str(label), fill=KNOT_COLOUR, font=font,
                 stroke_width=2, stroke_fill=KNOT_HALO)
    return picture
