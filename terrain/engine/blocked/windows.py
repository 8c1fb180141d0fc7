"""Block windows: the grid of windows over a raster, the one-cell halo, reading a
block (with its halo, nodata as NaN) from any array with 2-D slicing.

See :mod:`terrain.engine.blocked` for the algorithm and its memory.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from ...errors import OptionError

TOP, BOTTOM, LEFT, RIGHT = range(4)


class Window(NamedTuple):
    """Rows ``r0:r1`` and columns ``c0:c1`` of the raster."""

    r0: int
    r1: int
    c0: int
    c1: int


def windows(shape: tuple[int, int], block: int | tuple[int, int]) -> list[Window]:
    """The grid of block windows covering a raster of ``shape``, row-major.

    ``block`` is ``(rows, cols)`` or one int for square blocks; the last
    block of each row and column is clipped to the raster.
    """
    br, bc = (block, block) if np.isscalar(block) else block
    br, bc = int(br), int(bc)
    if br < 1 or bc < 1:
        raise OptionError(f"block must be positive, got {block!r}")
    nr, nc = shape
    return [Window(r, min(r + br, nr), c, min(c + bc, nc))
            for r in range(0, nr, br) for c in range(0, nc, bc)]


def halo(window: Window, shape: tuple[int, int]) -> Window:
    """``window`` grown by one cell on every side that is not the raster edge."""
    r0, r1, c0, c1 = window
    return Window(max(r0 - 1, 0), min(r1 + 1, shape[0]), max(c0 - 1, 0), min(c1 + 1, shape[1]))


def as_float(a: np.ndarray) -> np.ndarray:
    """The conversion of ``pairs()``: integers of up to 16 bits to float32,
    wider ones to float64 (elementwise, so a block converts like the whole)."""
    if a.dtype != np.float32 and a.dtype != np.float64:
        a = a.astype(np.float32 if a.dtype.itemsize <= 2 else np.float64)
    return a


def read_block(source: Any, window: Window, shape: tuple[int, int], mask: Any = None) -> np.ndarray:
    """Values of ``window`` plus its halo from ``source`` (NaN for nodata).

    ``source`` is anything with 2-D slicing (numpy array, ``np.memmap``,
    zarr array, a lazy object); ``mask``, optional, is sliced alike (True
    marks nodata).
    """
    h = halo(window, shape)
    vals = as_float(np.asarray(source[h.r0:h.r1, h.c0:h.c1]))
    if mask is not None:
        m = np.asarray(mask[h.r0:h.r1, h.c0:h.c1], dtype=bool)
        if m.any():
            vals = np.where(m, np.nan, vals).astype(vals.dtype)
    return vals


def raster_shape(source: Any) -> tuple[int, int]:
    """``source.shape`` as a 2-tuple of ints (a 2-D raster or OptionError)."""
    shape = tuple(int(x) for x in source.shape)
    if len(shape) != 2:
        raise OptionError(f"expected a 2-D raster, got shape {shape}")
    return shape
