"""Neighbourhoods and edge tests shared by the compiled engines.

Cells are addressed by flat row-major index ``i = r * cols + c``. The 8- and
4-neighbourhoods are listed in ascending flat-index order (the cell itself
would sit between offsets 3 and 4 of the 8-neighbourhood), and each has a
*forward half* that visits every undirected neighbour pair exactly once.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["offsets", "forward_offsets", "is_edge", "neighbour", "DR8", "DC8"]

DR8 = np.array([-1, -1, -1, 0, 0, 1, 1, 1], np.int64)
DC8 = np.array([-1, 0, 1, -1, 1, -1, 0, 1], np.int64)
DR4 = np.array([-1, 0, 0, 1], np.int64)
DC4 = np.array([0, -1, 1, 0], np.int64)
# forward half of each neighbourhood: every undirected pair visited once
_FR8 = np.array([0, 1, 1, 1], np.int64)
_FC8 = np.array([1, -1, 0, 1], np.int64)
_FR4 = np.array([0, 1], np.int64)
_FC4 = np.array([1, 0], np.int64)


def offsets(connectivity: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column offsets of the 8- or 4-neighbourhood (ascending flat index)."""
    return (DR8, DC8) if connectivity == 8 else (DR4, DC4)


def forward_offsets(connectivity: int) -> tuple[np.ndarray, np.ndarray]:
    """The forward half of the neighbourhood: right, and the row below."""
    return (_FR8, _FC8) if connectivity == 8 else (_FR4, _FC4)


@njit(cache=True, inline="always")
def is_edge(valid, r, c, nr, nc, dr, dc):
    """True when cell (r, c) lies on the raster edge or has a nodata neighbour."""
    if r == 0 or c == 0 or r == nr - 1 or c == nc - 1:
        return True
    for k in range(dr.size):
        if not valid[(r + dr[k]) * nc + c + dc[k]]:
            return True
    return False


@njit(cache=True, inline="always")
def neighbour(r, c, k, nr, nc, dr, dc):
    """Flat index of neighbour ``k`` of cell (r, c), or -1 off the raster."""
    rr = r + dr[k]
    cc = c + dc[k]
    if rr < 0 or rr >= nr or cc < 0 or cc >= nc:
        return -1
    return rr * nc + cc
