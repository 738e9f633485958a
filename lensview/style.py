"""One look for every drawing: the page's picture and the matplotlib figures.

Model colours, curve line styles, and the markers of knots, predicted
counter-images and pair links are defined once here and read by
`lensview.figures` (matplotlib) and `lensview.page.picture` (PIL), so the
picture on the page and the downloaded or command-line figure agree. Sizes
are in typographic points (1/72 inch); the page converts them at its
picture resolution with `points_to_pixels`. Nothing here imports a drawing
library.
"""

from dataclasses import dataclass

__all__ = ["MODEL_PALETTE", "CURVE_STYLES", "CURVE_NAMES", "MarkStyle", "LineStyle", "KNOT",
           "COUNTERIMAGE", "PAIR_LINK", "CONTOUR", "MU_OVERLAY", "MU_LEVELS", "model_colours", "points_to_pixels", "rgb"]

#: Model colours: the colour-blind-safe set of Okabe & Ito (2008, "Color
#: Universal Design"), in an order of our own, without its yellow and black,
#: which vanish on a light background or on dark sources.
MODEL_PALETTE = ("#D55E00", "#0072B2", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")

#: (plane, kind) -> (matplotlib line style, width in points): critical curves
#: solid (tangential) and dashed (radial); caustics thinner, dotted and dash-dotted.
CURVE_STYLES = {("image", "tangential"): ("-", 1.5), ("image", "radial"): ("--", 1.5),
                ("source", "tangential"): (":", 1.1), ("source", "radial"): ("-.", 1.1)}
CURVE_NAMES = {("image", "tangential"): "tangential critical curve",
               ("image", "radial"): "radial critical curve",
               ("source", "tangential"): "tangential caustic",
               ("source", "radial"): "radial caustic"}


@dataclass(frozen=True)
class MarkStyle:
    """A marker: shape ("circle" or "square"), colours, half-size and line width in points.

    ``halo`` is drawn under the mark, ``halo_width`` points wider, so the mark
    reads on dark and light images alike.
    """

    name: str
    shape: str
    colour: str
    halo: str
    radius: float
    width: float
    halo_width: float = 1.5


@dataclass(frozen=True)
class LineStyle:
    """A line: colour, width in points, and its halo."""

    name: str
    colour: str
    width: float
    halo: str = "#141414"
    halo_width: float = 1.5
    dash: str = "-"


#: Marked knots: yellow rings with a dark halo; labels in the same ink.
KNOT = MarkStyle("knot", "circle", "#FFD600", "#141414", radius=5.8, width=1.4)
#: Predicted counter-images: cyan squares.
COUNTERIMAGE = MarkStyle("predicted counter-image", "square", "#00E5FF", "#141414",
                         radius=5.0, width=1.4)
#: Proposed mirrored pairs: white links between the two knots.
PAIR_LINK = LineStyle("proposed pair", "#FFFFFF", width=1.4)
#: Magnification contours of a model.
CONTOUR = LineStyle("|\u03bc| contour", "#7F7F7F", width=0.8, halo_width=0.0, dash=":")
#: Contours of a magnification map the user uploads (drawn only, never measured).
MU_OVERLAY = LineStyle("|\u03bc| of an uploaded map (overlay only)", "#B07AD6", width=1.0,
                       halo_width=0.0, dash="-.")
#: |mu| levels of both kinds of magnification contour.
MU_LEVELS = (3.0, 10.0, 30.0)


def model_colours(models):
    """Colour of each model name, in order of first appearance, from `MODEL_PALETTE`."""
    colours = {}
    for name in models:
        if name not in colours:
            colours[name] = MODEL_PALETTE[len(colours) % len(MODEL_PALETTE)]
    return colours


def points_to_pixels(points, dpi):
    """A size in points as pixels of a picture drawn at ``dpi`` (1 point = 1/72 inch)."""
    return points * dpi / 72.0


def rgb(colour):
    """``"#RRGGBB"`` as an (r, g, b) tuple of 0-255 integers."""
    text = colour.lstrip("#")
    return tuple(int(text[k:k + 2], 16) for k in (0, 2, 4))
