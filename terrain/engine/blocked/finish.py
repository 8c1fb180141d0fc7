"""The second pass (one task per block, reading the resolution): the filled surface
(:func:`finish`), the fill level and depression depth of each cell's basin
(:func:`levels_from`, :func:`finish_levels`).

See :mod:`terrain.engine.blocked` for the algorithm and its memory.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ...errors import OptionError
from ..basins import fill_cells
from . import kernels as _k
from .local import local_and_levels, local_engine, prepare_block
from .summaries import LevelInputs, Resolution
from .windows import BOTTOM, LEFT, RIGHT, TOP, Window


# ----------------------------------------------------------------------------
# second pass: per-cell results from the resolution
# ----------------------------------------------------------------------------
def finish(block_values: np.ndarray, window: Window | Sequence[int], resolution: Resolution) -> np.ndarray:
    """Filled surface of one block (float64, NaN on nodata), equal to the
    block's part of ``pairs_and_fill()``'s filled surface.

    Recomputes the block's local step (``block_values`` as for
    :func:`local`), maps each basin to the time its component first
    reached the block boundary and the reduced-graph vertex it then joined,
    and takes the later of that time and the vertex's resolved join with
    the outlet: ``filled = max(z, level at which the cell's component joins
    the outlet)``. Needs a resolution of pits with the edge as outlet.

    References
    ----------
    .. [1] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An
       optimal depression-filling and watershed-labeling algorithm for
       digital elevation models. Computers & Geosciences 62, 117-127.
       doi:10.1016/j.cageo.2013.04.024
    .. [2] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    if resolution.kind != "pits" or not resolution.edge_outlet:
        raise OptionError("the filled surface needs kind='pits' with the edge as outlet")
    window = Window(*(int(x) for x in window))
    blk = prepare_block(block_values, window, resolution.shape, "pits", resolution.connectivity)
    lab, minc, m, _ = local_engine(blk, resolution.connectivity, True)
    T, X = _k.basin_links(blk.zk, m.tt, m.node, m.ly, m.lo, m.lw, minc.size)
    level = _k.fill_levels(blk.zk, T, X, resolution.join_cell[window], resolution.join_key[window],
                           window.r0, window.c0, blk.nc, resolution.shape[1])
    out = np.empty(blk.nr * blk.nc, np.float64)
    fill_cells(blk.z, blk.valid, lab, level, out)
    return out.reshape(blk.nr, blk.nc)


def ring_values(resolution: Resolution, window: Window, field: str) -> np.ndarray:
    """Per position of ``window``'s halo ring (see
    :func:`~terrain.engine.blocked.kernels.ring_index`), the value at that
    cell read from the facing strip of the neighbouring block: "vertex"
    (global reduced-graph vertex), "term" (the raster minimum its steepest
    descent ends at), "level" or "depth" (that minimum's fill level and
    depression depth); -1 (NaN for level and depth) off the raster."""
    rows, cols = list(resolution.rows), list(resolution.cols)
    ends_r, ends_c = rows[1:] + [resolution.shape[0]], cols[1:] + [resolution.shape[1]]
    i, j = rows.index(window.r0), cols.index(window.c0)
    nr, nc = window.r1 - window.r0, window.c1 - window.c0
    part = "vertex" if field == "vertex" else "minimum"
    out = np.full(2 * (nc + 2) + 2 * nr, -1, np.int64)

    def side(ii, jj, q):
        return getattr(resolution.boundary[Window(rows[ii], ends_r[ii], cols[jj], ends_c[jj])], part)[q]

    for ii, base, q in ((i - 1, 0, BOTTOM), (i + 1, nc + 2, TOP)):
        if 0 <= ii < len(rows):
            out[base + 1:base + nc + 1] = side(ii, j, q)
            if j > 0:
                out[base] = side(ii, j - 1, q)[-1]
            if j + 1 < len(cols):
                out[base + nc + 1] = side(ii, j + 1, q)[0]
    if j > 0:
        out[2 * (nc + 2):2 * (nc + 2) + nr] = side(i, j - 1, RIGHT)
    if j + 1 < len(cols):
        out[2 * (nc + 2) + nr:] = side(i, j + 1, LEFT)
    if part == "vertex":
        return out
    table = getattr(resolution.minima, "cell" if field == "term" else field)
    vals = table[np.maximum(out, 0)] if table.size else np.zeros(out.size, table.dtype)
    return np.where(out >= 0, vals, -1 if field == "term" else np.nan)


def need_termini(resolution: Resolution, fill: bool = False) -> None:
    """Raise unless ``resolution`` was glued from summaries with termini
    (and, with ``fill``, of pits with the edge as outlet)."""
    if resolution.boundary is None:
        raise OptionError("this step needs block summaries made with termini=True")
    if fill and (resolution.kind != "pits" or not resolution.edge_outlet or
                 resolution.minima.level is None):
        raise OptionError("fill levels need kind='pits' with the edge as outlet")


def levels_from(inputs: LevelInputs, window: Window | Sequence[int],
                resolution: Resolution) -> tuple[np.ndarray, np.ndarray]:
    """Fill level and depression depth per row of ``inputs.dest``: the
    raster minima of the block, then its exits (read from the neighbours'
    strips). A cell's values are those of its row (``dest``); as
    :func:`~terrain.engine.persistence.count_ponding` reads them with
    ``lab = -(dest + 1)``. See :func:`finish_levels`.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    need_termini(resolution, fill=True)
    window = Window(*(int(x) for x in window))
    off = resolution.boundary[window].offset
    f = resolution.forest
    lv, dp = np.empty(inputs.tk.size), np.empty(inputs.tk.size)
    _k.levels_and_depths(inputs.tk, inputs.tc, np.where(inputs.x >= 0, inputs.x + off, inputs.x),
                         inputs.dk, f.jcell, f.jkey, f.up, f.mkey, f.vkey, lv, dp)
    return tuple(np.concatenate([v, ring_values(resolution, window, field)[inputs.ex_ring]])
                 for v, field in ((lv, "level"), (dp, "depth")))


def finish_levels(block_values: np.ndarray, window: Window | Sequence[int],
                  resolution: Resolution) -> tuple[np.ndarray, np.ndarray]:
    """Per cell of one block, the fill level and the depression depth of its
    basin: bit for bit ``level[basin]`` and ``depth[basin]`` of the
    :class:`~terrain.engine.persistence.Fill` that ``pits_and_levels()``
    returns for the whole raster (float64; NaN on nodata).

    The level is the elevation at which the cell's basin of steepest
    descent joins the outlet (-inf: never); the depth is that level minus
    the deepest cell of the depression the basin lies in -- its component
    among the cells strictly below the level, so depressions that touch
    only at the spill level stay apart (-inf: none). A cell is ponded when
    ``level - z > 0`` and the depth is at least a cut-off, as in
    :func:`~terrain.engine.persistence.count_ponding`, which accepts these
    per-cell arrays with ``lab = -(arange(n) + 1)``.

    Needs a resolution of pits with the edge as outlet glued from
    summaries made with ``termini=True``. Basins are those of steepest
    descent on the whole raster: a chain that leaves the block continues
    in the neighbour's strip, resolved by :func:`glue`.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    .. [2] Grimaud, M. (1992). New measure of contrast: the dynamics. Proc.
       SPIE 1769 (depth of a depression as the dynamics of its minimum).
    """
    need_termini(resolution, fill=True)
    window = Window(*(int(x) for x in window))
    _, inputs = local_and_levels(block_values, window, resolution.shape,
                                 connectivity=resolution.connectivity)
    nr, nc = window.r1 - window.r0, window.c1 - window.c0
    out = []
    for v in levels_from(inputs, window, resolution):
        out.append(np.where(inputs.dest >= 0, v[np.maximum(inputs.dest, 0)] if v.size else np.nan,
                            np.nan).reshape(nr, nc))
    return out[0], out[1]
