"""The one mapping between the clickable picture and the cutout's pixels.

The picture shows a rectangle of whole cutout pixels, columns ``x0 .. x0 +
nx - 1`` and rows ``y0 .. y0 + ny - 1``, resampled to ``width`` x ``height``
display pixels with North-up image rows (cutout row ``y0`` at the bottom),
as astronomical images are shown. Pixel conventions (DEVELOPERS.md): a
cutout pixel ``(x, y)`` is centred on integer ``x, y`` and covers ``x - 0.5
.. x + 0.5``; display coordinates ``(u, v)`` are continuous, measured from
the picture's top-left corner, so display pixel ``i`` covers ``i .. i + 1``.
Pure Python (numpy only), so it is unit-tested without streamlit.
"""

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Viewport", "click_display_position"]


@dataclass(frozen=True)
class Viewport:
    """A crop of the cutout shown as a picture of ``width`` x ``height`` pixels.

    Attributes
    ----------
    x0, y0 : int
        First cutout column and row shown.
    nx, ny : int
        Number of cutout columns and rows shown.
    width, height : int
        Size of the rendered picture in display pixels.
    """

    x0: int
    y0: int
    nx: int
    ny: int
    width: int
    height: int

    @classmethod
    def around(cls, center, zoom, image_shape, display_width):
        """The crop of ``1/zoom`` of the image around a centre, kept on the image.

        Parameters
        ----------
        center : tuple of float
            Requested centre (x, y) in cutout pixels; the crop slides to stay
            inside the image, so panning past an edge stops at the edge.
        zoom : float
            1 shows the whole image; 4 shows a quarter of each side.
        image_shape : tuple of int
            (ny, nx) of the cutout.
        display_width : int
            Width of the picture in display pixels; the height follows from
            the crop's aspect ratio.
        """
        image_ny, image_nx = (int(n) for n in image_shape)
        zoom = max(float(zoom), 1.0)
        nx = max(1, min(image_nx, int(math.ceil(image_nx / zoom))))
        ny = max(1, min(image_ny, int(math.ceil(image_ny / zoom))))
        x0 = _start(center[0], nx, image_nx)
        y0 = _start(center[1], ny, image_ny)
        width = max(1, int(display_width))
        height = max(1, int(round(width * ny / nx)))
        return cls(x0=x0, y0=y0, nx=nx, ny=ny, width=width, height=height)

    @property
    def scale_x(self):
        """Display pixels per cutout pixel along x."""
        return self.width / self.nx

    @property
    def scale_y(self):
        """Display pixels per cutout pixel along y."""
        return self.height / self.ny

    @property
    def center(self):
        """Centre of the crop in cutout pixels (x, y)."""
        return self.x0 + (self.nx - 1) / 2.0, self.y0 + (self.ny - 1) / 2.0

    @property
    def slices(self):
        """Numpy index (rows, columns) of the shown part of the cutout."""
        return slice(self.y0, self.y0 + self.ny), slice(self.x0, self.x0 + self.nx)

    @property
    def extent(self):
        """(left, right, bottom, top) of the crop in cutout pixels, at the pixel edges."""
        return (self.x0 - 0.5, self.x0 + self.nx - 0.5, self.y0 - 0.5, self.y0 + self.ny - 0.5)

    def display_to_cutout(self, u, v):
        """Cutout pixel position of a display position.

        Parameters
        ----------
        u, v : float or array_like
            Display coordinates from the picture's top-left corner.

        Returns
        -------
        x, y : float or ndarray
            0-based cutout pixel position.
        """
        u = np.asarray(u, dtype=float)
        v = np.asarray(v, dtype=float)
        x = self.x0 - 0.5 + u / self.scale_x
        y = self.y0 + self.ny - 0.5 - v / self.scale_y
        return _plain(x), _plain(y)

    def cutout_to_display(self, x, y):
        """Display position of a cutout pixel position (inverse of `display_to_cutout`)."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        u = (x - self.x0 + 0.5) * self.scale_x
        v = (self.y0 + self.ny - 0.5 - y) * self.scale_y
        return _plain(u), _plain(v)

    def contains_display(self, u, v):
        """True where a display position lies on the picture."""
        u = np.asarray(u, dtype=float)
        v = np.asarray(v, dtype=float)
        return _plain((u >= 0) & (u <= self.width) & (v >= 0) & (v <= self.height))


def click_display_position(value, viewport):
    """Display position of a click, in the picture's own pixels.

    The click component reports the pointer offset within the rendered
    picture and the size the picture was rendered at (the browser may show
    it smaller or larger than it was drawn). Browsers report the offset in
    whole CSS pixels (Chromium rounds the pointer position), which is taken
    as the position itself; it is then scaled from the rendered size to the
    picture's own size.

    Parameters
    ----------
    value : dict
        ``{"x": ..., "y": ..., "width": ..., "height": ...}`` as the
        component returns it (``width``/``height`` optional).
    viewport : Viewport

    Returns
    -------
    u, v : float
        Display coordinates in the picture's own pixels.
    """
    shown_width = float(value.get("width") or viewport.width)
    shown_height = float(value.get("height") or viewport.height)
    return (float(value["x"]) * viewport.width / shown_width,
            float(value["y"]) * viewport.height / shown_height)


def _start(center, n, total):
    """First index of a window of ``n`` around ``center``, kept on ``0 .. total - 1``."""
    start = int(round(float(center) - (n - 1) / 2.0))
    return min(max(start, 0), total - n)


def _plain(value):
    return float(value) if np.ndim(value) == 0 else value
