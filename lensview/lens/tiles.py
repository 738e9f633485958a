"""Grid terms per tile (T, D, shear, resolution flags) from fourth-order
differences, computed once per tile and kept."""

import weakref

import numpy as np

from .local import sky_shear
from .parallel import THREADED_TILES, in_threads
from .stencils import TILE, central_difference_2, central_difference_4, gather_windows

__all__ = ["TileCache", "UNRESOLVED_TOLERANCE"]

#: Relative disagreement between fourth- and second-order differences above
#: which a node counts as unresolved by the grid (e.g. a singular centre).
UNRESOLVED_TOLERANCE = 0.05
#: Tiles differenced at once: the float64 window stacks of a batch are the largest
#: temporaries of curve extraction (256 tiles: ~10 MiB per map component).
_TILE_BATCH = 256


class TileCache:
    """Fourth-order grid terms per tile, computed once and kept.

    Each tile holds the nodes ``TILE*r .. TILE*r + TILE`` in each axis (shared
    edges are computed twice, identically). Stored per node: T, D, the two
    shear terms G1, G2 on sky axes (see `LocalTerms.shear`), and whether the
    grid resolves the field there.
    """

    NODES = TILE + 1

    def __init__(self, field):
        # A weak reference: no cycle with the field, so its maps are freed with its last user.
        self.field = weakref.proxy(field)
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
            parts = in_threads(self._compute, _batches(missing), len(missing) >= THREADED_TILES)
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
            parts = in_threads(lambda batch: self._compute(batch, shear=True), _batches(where),
                                len(where) >= THREADED_TILES)
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
            gamma1, gamma2 = sky_shear(a11, a12, a21, a22, field._frame, 1.0)
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


def _batches(tiles):
    """Tile batches: two or more, so both cores get work, none over _TILE_BATCH."""
    count = max(2, -(-len(tiles) // _TILE_BATCH))
    size = max(1, -(-len(tiles) // count))
    return [tiles[i:i + size] for i in range(0, len(tiles), size)]
