"""Drawing the clickable picture: the cutout, the curves, the knots.

Two layers, so that a click redraws only what it changed:

* the base layer (cutout with stretch, limits and colour map, critical
  curves of every model, optional magnification contours, legend) is drawn
  with matplotlib on axes that fill the whole figure, with limits equal to
  the `Viewport` extent, so picture pixels and cutout pixels obey the
  viewport mapping exactly; it is cached per viewport and settings;
* the mark layer (knots and labels, pair links, predicted counter-images) is
  drawn on a copy of it with PIL on every rerun.

Colours, line styles and markers come from `lensview.style` and the display
normalisation from `lensview.figures`, so the picture and the downloadable
figure agree.
This module only draws; every position it places comes from a library call.
"""

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from ..style import COUNTERIMAGE, CONTOUR, KNOT, MU_OVERLAY, PAIR_LINK, points_to_pixels, rgb
from ..style import CURVE_STYLES as CURVE_STYLES_BY_PLANE

__all__ = ["render_base_layer", "draw_marks", "CURVE_STYLES", "KNOT_COLOUR"]

#: Line style and width of each kind of critical curve, from `lensview.style`.
CURVE_STYLES = {kind: CURVE_STYLES_BY_PLANE[("image", kind)] for kind in ("tangential", "radial")}
#: Ink of the knot markers and labels, and of their halo.
KNOT_COLOUR = rgb(KNOT.colour)
KNOT_HALO = rgb(KNOT.halo)
COUNTERIMAGE_COLOUR = rgb(COUNTERIMAGE.colour)
PAIR_COLOUR = rgb(PAIR_LINK.colour)
#: Contours of an uploaded magnification map.
OVERLAY_COLOUR = MU_OVERLAY.colour
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
        ax.contour(xx, yy, finite, levels=sorted(contour_levels), colors=CONTOUR.colour,
                   linewidths=CONTOUR.width, linestyles=CONTOUR.dash)
    show_overlay = overlay is not None and len(overlay_levels) > 0
    if show_overlay:
        rows, cols = viewport.slices
        yy, xx = np.mgrid[rows, cols]
        ax.contour(xx, yy, np.where(np.isfinite(overlay), overlay, 0.0),
                   levels=sorted(overlay_levels), colors=OVERLAY_COLOUR, linewidths=MU_OVERLAY.width,
                   linestyles=MU_OVERLAY.dash)
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
            handles.append(Line2D([], [], color=CONTOUR.colour, linestyle=CONTOUR.dash,
                                  linewidth=CONTOUR.width, label=f"|\u03bc| = {levels}"))
        if show_overlay:
            levels = ", ".join(f"{level:g}" for level in sorted(overlay_levels))
            handles.append(Line2D([], [], color=OVERLAY_COLOUR, linestyle=MU_OVERLAY.dash,
                                  linewidth=MU_OVERLAY.width,
                                  label=f"|\u03bc| = {levels} (uploaded map, overlay only)"))
        handles += [
            Line2D([], [], linestyle="none", marker="o" if mark.shape == "circle" else "s",
                   markersize=2 * mark.radius, markerfacecolor="none", markeredgecolor=mark.colour,
                   markeredgewidth=mark.width, label=mark.name)
            for mark in (KNOT, COUNTERIMAGE)]
        ax.legend(handles=handles, loc="upper right", fontsize=8, framealpha=0.8)
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    return np.ascontiguousarray(rgba[:viewport.height, :viewport.width, :3])


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

    def px(points):
        return max(int(round(points_to_pixels(points, _DPI))), 1)

    link, link_halo = px(PAIR_LINK.width), px(PAIR_LINK.width + PAIR_LINK.halo_width)
    for start, end in links:
        u1, v1 = viewport.cutout_to_display(*start)
        u2, v2 = viewport.cutout_to_display(*end)
        pen.line([(u1, v1), (u2, v2)], fill=KNOT_HALO, width=link_halo)
        pen.line([(u1, v1), (u2, v2)], fill=PAIR_COLOUR, width=link)
    for style, points in ((COUNTERIMAGE, counterimages), (KNOT, [(x, y) for _, x, y in knots])):
        r = points_to_pixels(style.radius, _DPI)
        layers = ((rgb(style.halo), px(style.width + style.halo_width)),
                  (rgb(style.colour), px(style.width)))
        for x, y in points:
            u, v = viewport.cutout_to_display(x, y)
            if not viewport.contains_display(u, v):
                continue
            box = [u - r, v - r, u + r, v + r]
            for colour, width in layers:
                if style.shape == "circle":
                    pen.ellipse(box, outline=colour, width=width)
                else:
                    pen.rectangle(box, outline=colour, width=width)
    r = points_to_pixels(KNOT.radius, _DPI)
    for label, x, y in knots:
        u, v = viewport.cutout_to_display(x, y)
        if not viewport.contains_display(u, v):
            continue
        pen.line([(u - 2, v), (u + 2, v)], fill=KNOT_COLOUR, width=1)
        pen.text((u + r + 2, v - r - 12), str(label), fill=KNOT_COLOUR, font=font,
                 stroke_width=2, stroke_fill=KNOT_HALO)
    return picture
