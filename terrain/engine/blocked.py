"""Blocked (out-of-core) persistence pairs: the same pairs as ``pairs()``,
one block in memory at a time.

:func:`blocked_pairs` returns exactly (bit for bit, every field, dtype and
order) what :func:`terrain.engine.persistence.pairs` returns on the whole
raster, while holding one block plus a one-cell halo, and a summary of the
block boundaries. :func:`blocked_fill` adds the depression-filled surface
of :func:`~terrain.engine.persistence.pairs_and_fill`, written block by
block.

Algorithm
---------
The raster is cut into a grid of blocks. Three pure steps, each on arrays:

1. :func:`local` (one task per block, independent): steepest-descent
   basins *inside the block*, the lowest pass between adjacent basins and
   the elder-rule union-find of ``persistence.py``, with one change. A
   basin is *terminal* when it holds a cell with a valid neighbour in
   another block (read from the halo; the virtual outlet is terminal in
   every block). When two components meet at cell ``w`` and the younger
   one is not terminal, it dies at ``w`` for good: no cell outside the
   block touches it, and its partner only gets older when more cells are
   added. Such pairs are final and leave the block with the summary. A
   merge in which the younger component is terminal is not decided
   locally, since a merge in another block may change which side is elder;
   it is handed up as an edge of a *reduced graph* whose vertices are the
   terminal basins and the birth basin of every older closed component
   that joins a terminal one (its birth may win the global elder rule).
   As in distributed merge trees [1]_, a block settles what its boundary
   cannot affect and hands up only the part of its merge tree that
   touches the block boundary.
2. :func:`glue` (global, one task): the reduced graphs of all blocks plus
   the cross-block neighbour edges (one per pair of facing boundary
   cells, built from the blocks' boundary strips, lowest kept per vertex
   pair) go through the same elder-rule union-find. Its pairs are the
   undecided ones; it also resolves, per reduced-graph vertex, the cell at
   which its component joins the outlet.
3. :func:`finish` (one task per block, needs the resolution): recomputes
   the block's local step, maps every basin to (time it first reached the
   boundary, reduced-graph vertex it then joined), and from the resolved
   value of that vertex computes a per-cell array -- the filled surface.

Ties use the global flat index throughout (inside a block the local
row-major order equals the global one). Whether a cell is on the raster
edge or next to nodata, and whether it faces a valid cell of another block,
is read from the one-cell halo. ``edge_limited`` follows the definition of
``pairs()`` independently of merge order: a component's first edge cell is
counted from the time it joined (the later of the cell and the merge), and
a pair dying at ``w`` is edge-limited when that time is before ``w`` or
``w`` is an edge cell.

Why it is exact: the pairs of a graph filtration are those of its minimum
spanning forest (Kruskal), so the blocks' local forests plus the
cross-block edges give the global pairs; a non-terminal component that
dies locally is closed to the rest of the raster and is younger than a
component that contains its partner, whatever that partner grows into; and
a terminal component's evolution, birth and first edge cell are carried by
its reduced-graph vertices with the same merge times [1]_, [2]_.

Memory
------
Local step, beyond the block's values with halo: as ``pairs()`` on one
block (labels 4 bytes per cell, the negated key 4 for peaks, validity and
flags 1 each) plus per-basin tables; measured 12-15 bytes per block cell on
terrain plus noise, 40-44 on white noise (``bench/bench_blocked.py``).

Global step: it never sees a cell that is not on a block boundary. Per
boundary cell (a cell facing another block) a summary hands up 13 bytes
of strip (vertex id, key, edge flag); per reduced-graph vertex 32 bytes
(cell, key, first edge cell and its key) and per reduced edge 25 bytes.
Measured per boundary cell on a 4096**2 raster, the same for 1024**2 and
256**2 blocks: handed up 19 bytes (terrain plus noise) to 40 (white noise,
the worst case: nearly every boundary cell is its own basin); peak memory
of :func:`glue` 21-30 bytes (terrain plus noise) to 135 (white noise).
For 2e9 cells in 1024**2 blocks (7.7e6 boundary cells) that is at most
about 1 GB. The final pairs are the output; they travel in the summaries
and are merged by :func:`collect`, which the glue does not need.

References
----------
.. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees. Proc.
   18th ACM SIGPLAN Symposium on Principles and Practice of Parallel
   Programming (PPoPP '13), 93-102. doi:10.1145/2442516.2442526
.. [2] Carr, H. A., Weber, G. H., Sewell, C. M., Ahrens, J. P. (2016).
   Parallel peak pruning for scalable SMP contour tree computation. IEEE
   6th Symposium on Large Data Analysis and Visualization (LDAV), 75-84.
   doi:10.1109/LDAV.2016.7874312 (merge trees computed in parallel by
   pruning extrema, a Boruvka-like contraction of the minimum spanning
   forest).
.. [3] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule).
.. [4] Kruskal, J. B. (1956). On the shortest spanning subtree of a graph
   and the traveling salesman problem. Proc. AMS 7(1), 48-50.
   doi:10.1090/S0002-9939-1956-0078686-7
.. [5] Barnes, R. (2016). Parallel Priority-Flood depression filling for
   trillion cell digital elevation models on desktops or clusters.
   Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001 (tiles
   filled from a graph of spill levels between tile edges).
"""

from __future__ import annotations

import builtins
import functools
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from ..errors import OptionError
from . import blocked_kernels as _k
from .basins import descend, fill_cells, resolve
from .grid import forward_offsets, offsets
from .persistence import KINDS, Pairs

__all__ = ["Window", "Strip", "BlockSummary", "Resolution", "windows", "halo", "read_block", "local",
           "glue", "collect", "finish", "blocked_pairs", "blocked_fill"]

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


def _as_float(a: np.ndarray) -> np.ndarray:
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
    vals = _as_float(np.asarray(source[h.r0:h.r1, h.c0:h.c1]))
    if mask is not None:
        m = np.asarray(mask[h.r0:h.r1, h.c0:h.c1], dtype=bool)
        if m.any():
            vals = np.where(m, np.nan, vals).astype(vals.dtype)
    return vals


# ----------------------------------------------------------------------------
# summaries
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class Strip:
    """One side of a block: per cell the reduced-graph vertex (-1: none),
    the key and the edge flag. Empty on a raster edge."""

    vertex: np.ndarray
    key: np.ndarray
    edge: np.ndarray


@dataclass(frozen=True)
class BlockSummary:
    """What :func:`local` hands up for one block (numpy arrays; picklable).

    Final pairs use global cells and keys (``-z`` for peaks): ``birth``,
    ``death``, ``birth_key``, ``death_key``, ``edge_limited``, and
    essential classes of components closed inside the block (``ess_*``).
    The boundary part (all the global step reads) is the reduced graph --
    vertices ``vertex_cell``/``vertex_key`` with first edge cell
    ``vertex_eff``/``vertex_eff_key``, edges ``edge_u``/``edge_v`` (vertex
    ids, -1: outlet) at cell ``edge_w`` -- and the four side ``strips``.
    """

    window: Window
    shape: tuple[int, int]
    kind: str
    connectivity: int
    edge_outlet: bool
    birth: np.ndarray
    death: np.ndarray
    birth_key: np.ndarray
    death_key: np.ndarray
    edge_limited: np.ndarray
    ess_birth: np.ndarray
    ess_key: np.ndarray
    ess_edge: np.ndarray
    vertex_cell: np.ndarray
    vertex_key: np.ndarray
    vertex_eff: np.ndarray
    vertex_eff_key: np.ndarray
    edge_u: np.ndarray
    edge_v: np.ndarray
    edge_w: np.ndarray
    edge_key: np.ndarray
    edge_flag: np.ndarray
    strips: tuple[Strip, Strip, Strip, Strip]

    def boundary_nbytes(self) -> int:
        """Bytes of the boundary part (what :func:`glue` reads)."""
        arrs = [self.vertex_cell, self.vertex_key, self.vertex_eff, self.vertex_eff_key,
                self.edge_u, self.edge_v, self.edge_w, self.edge_key, self.edge_flag]
        arrs += [a for s in self.strips for a in (s.vertex, s.key, s.edge)]
        return int(sum(a.nbytes for a in arrs))

    def boundary_cells(self) -> int:
        """Number of cells in the strips (cells facing another block)."""
        return int(sum(s.vertex.size for s in self.strips))


@dataclass(frozen=True)
class Resolution:
    """What :func:`glue` resolves globally: the undecided pairs and, per
    block window, per reduced-graph vertex, the global cell and key at
    which its component joins the outlet (-1: never)."""

    shape: tuple[int, int]
    kind: str
    connectivity: int
    edge_outlet: bool
    birth: np.ndarray
    death: np.ndarray
    birth_key: np.ndarray
    death_key: np.ndarray
    edge_limited: np.ndarray
    ess_birth: np.ndarray
    ess_key: np.ndarray
    ess_edge: np.ndarray
    join_cell: dict
    join_key: dict
    n_vertices: int
    n_edges: int
    n_boundary_cells: int


# ----------------------------------------------------------------------------
# local step
# ----------------------------------------------------------------------------
class _Block(NamedTuple):
    window: Window
    shape: tuple[int, int]
    nr: int
    nc: int
    z: np.ndarray
    zk: np.ndarray
    valid: np.ndarray
    flags: np.ndarray


class _Merged(NamedTuple):
    """What ``local_merge`` returns (see its docstring)."""

    pb: np.ndarray
    pd: np.ndarray
    pe: np.ndarray
    esb: np.ndarray
    ese: np.ndarray
    hvb: np.ndarray
    hve: np.ndarray
    hu: np.ndarray
    hv: np.ndarray
    hw: np.ndarray
    tt: np.ndarray
    node: np.ndarray
    ly: np.ndarray
    lo: np.ndarray
    lw: np.ndarray


def _check(kind: str, connectivity: int) -> None:
    if kind not in KINDS:
        raise OptionError(f"kind must be one of {KINDS}, got {kind!r}")
    if connectivity not in (4, 8):
        raise OptionError(f"connectivity must be 4 or 8, got {connectivity!r}")


def _prepare_block(block_values, window, shape, kind, connectivity) -> _Block:
    window = Window(*(int(x) for x in window))
    shape = (int(shape[0]), int(shape[1]))
    h = halo(window, shape)
    vals = _as_float(np.asarray(block_values))
    if vals.shape != (h.r1 - h.r0, h.c1 - h.c0):
        raise OptionError(f"block values of shape {vals.shape} do not cover {h} (window plus halo)")
    vh = np.isfinite(vals)
    hr, hc = window.r0 - h.r0, window.c0 - h.c0
    nr, nc = window.r1 - window.r0, window.c1 - window.c0
    z = vals[hr:hr + nr, hc:hc + nc]
    valid = np.ascontiguousarray(vh[hr:hr + nr, hc:hc + nc]).reshape(-1)
    if z.dtype == np.float64:
        # as pairs(): values that are all float32 give float32 work (same order)
        with np.errstate(over="ignore", invalid="ignore"):
            z32 = z.astype(np.float32)
        if np.array_equal(z32.reshape(-1)[valid], z.reshape(-1)[valid]):
            z = z32
    z = np.ascontiguousarray(z).reshape(-1)
    zk = -z if kind == "peaks" else z
    flags = np.empty(nr * nc, np.uint8)
    sides = np.array([window.r0 == 0, window.r1 == shape[0], window.c0 == 0, window.c1 == shape[1]])
    dr, dc = offsets(connectivity)
    _k.cell_flags(vh, nr, nc, hr, hc, sides, dr, dc, bool(vh.all()), flags)
    return _Block(window, shape, nr, nc, z, zk, valid, flags)


def _local_engine(blk: _Block, connectivity: int, outlet: bool):
    """Basins, their lowest passes and the boundary-aware merge of one block."""
    nr, nc = blk.nr, blk.nc
    n = nr * nc
    dr, dc = offsets(connectivity)
    fr, fc = forward_offsets(connectivity)
    has_nodata = not blk.valid.all()
    lab = np.empty(n, np.int32 if n < 2**31 - 1 else np.int64)
    descend(blk.zk, blk.valid, has_nodata, nr, nc, dr, dc, lab)
    minc = resolve(blk.valid, lab)
    nb = minc.size
    cap = 1024
    while cap < 8 * nb:
        cap *= 2
    ok = False
    while not ok:
        emin = np.full(nb, -1, np.int64)
        term = np.zeros(nb, np.bool_)
        ea, eb, ew, ok = _k.block_boundaries(blk.zk, blk.valid, blk.flags, has_nodata, nr, nc, fr, fc,
                                             lab, max(nb, 1), emin, term, cap)
        cap *= 4
    if outlet:
        has = np.flatnonzero(emin >= 0)
        ea = np.concatenate([ea, has])
        eb = np.concatenate([eb, np.full(has.size, nb, np.int64)])
        ew = np.concatenate([ew, emin[has]])
    order = np.lexsort((ew, blk.zk[ew]))
    merged = _k.local_merge(blk.zk, blk.flags, minc, emin, term, ea[order], eb[order], ew[order])
    return lab, minc, _Merged(*merged)


def _to_global(cells: np.ndarray, blk: _Block) -> np.ndarray:
    """Local flat cells of a block to global flat cells (-1 stays -1)."""
    cells = np.asarray(cells, np.int64)
    r, c = np.divmod(cells, blk.nc)
    g = (blk.window.r0 + r) * blk.shape[1] + blk.window.c0 + c
    return np.where(cells < 0, -1, g)


def _strips(blk: _Block, lab: np.ndarray, vertex_of_basin: np.ndarray) -> tuple[Strip, ...]:
    nr, nc = blk.nr, blk.nc
    w, shape = blk.window, blk.shape
    sides = [(w.r0 == 0, np.arange(nc)), (w.r1 == shape[0], (nr - 1) * nc + np.arange(nc)),
             (w.c0 == 0, np.arange(nr) * nc), (w.c1 == shape[1], np.arange(nr) * nc + nc - 1)]
    out = []
    for on_edge, idx in sides:
        if on_edge:
            idx = idx[:0]
        f = blk.flags[idx]
        vid = np.full(idx.size, -1, np.int32)
        t = (f & _k.TERM) != 0
        vid[t] = vertex_of_basin[-lab[idx[t]].astype(np.int64) - 1]
        out.append(Strip(vid, blk.zk[idx].astype(np.float64), (f & _k.EDGE) != 0))
    return tuple(out)


def _persistence_of_keys(kind: str, bk: np.ndarray, dk: np.ndarray) -> np.ndarray:
    bv, dv = (-bk, -dk) if kind == "peaks" else (bk, dk)
    return np.abs(bv - dv)


def local(block_values: np.ndarray, window: Window | Sequence[int], shape: tuple[int, int], *,
          kind: str, connectivity: int = 8, edge_outlet: bool | None = None,
          min_persistence: float = 0.0) -> BlockSummary:
    """Local step: resolve one block, hand up its boundary part.

    Parameters
    ----------
    block_values : 2-D array
        Values of ``halo(window, shape)`` (the window plus a one-cell halo
        where the raster continues), NaN or +-inf for nodata, e.g. from
        :func:`read_block`.
    window : Window
        The block ``(r0, r1, c0, c1)``; ``shape`` is the raster's.
    kind, connectivity, edge_outlet
        As :func:`terrain.engine.persistence.pairs`.
    min_persistence : float
        Final pairs of lower persistence are dropped here already.

    Returns
    -------
    BlockSummary
        Final pairs of the block and its reduced graph and boundary strips.

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526
    """
    _check(kind, connectivity)
    outlet = bool(kind == "pits" if edge_outlet is None else edge_outlet)
    blk = _prepare_block(block_values, window, shape, kind, connectivity)
    lab, minc, m = _local_engine(blk, connectivity, outlet)
    pb, pd, pe, esb, ese, hvb, hve = m.pb, m.pd, m.pe, m.esb, m.ese, m.hvb, m.hve
    zk = blk.zk
    bk, dk = zk[pb].astype(np.float64), zk[pd].astype(np.float64)
    if min_persistence > 0:
        keep = _persistence_of_keys(kind, bk, dk) >= min_persistence
        pb, pd, pe, bk, dk = pb[keep], pd[keep], pe[keep], bk[keep], dk[keep]
    vertex_of_basin = np.full(minc.size, -1, np.int64)
    vertex_of_basin[hvb] = np.arange(hvb.size)
    vb = minc[hvb]
    effk = np.full(hve.size, np.nan)
    effk[hve >= 0] = zk[hve[hve >= 0]]
    return BlockSummary(
        blk.window, blk.shape, kind, connectivity, outlet,
        _to_global(pb, blk), _to_global(pd, blk), bk, dk, pe,
        _to_global(esb, blk), zk[esb].astype(np.float64), ese,
        _to_global(vb, blk), zk[vb].astype(np.float64), _to_global(hve, blk), effk,
        m.hu.astype(np.int32), m.hv.astype(np.int32), _to_global(m.hw, blk),
        zk[m.hw].astype(np.float64), (blk.flags[m.hw] & _k.EDGE) != 0,
        _strips(blk, lab, vertex_of_basin))


# ----------------------------------------------------------------------------
# global step
# ----------------------------------------------------------------------------
def _grid(summaries: Sequence[BlockSummary]):
    """Block rows and columns of a full grid tiling; (i, j) -> summary index."""
    nr, nc = summaries[0].shape
    rows = sorted({s.window.r0 for s in summaries})
    cols = sorted({s.window.c0 for s in summaries})
    ri = {r: i for i, r in enumerate(rows)}
    ci = {c: j for j, c in enumerate(cols)}
    at = {(ri[s.window.r0], ci[s.window.c0]): k for k, s in enumerate(summaries)}
    ends_r, ends_c = rows[1:] + [nr], cols[1:] + [nc]
    if len(at) != len(summaries) or len(at) != len(rows) * len(cols) or rows[0] != 0 or \
            cols[0] != 0 or any(s.window.r1 != ends_r[ri[s.window.r0]] or
                                s.window.c1 != ends_c[ci[s.window.c0]] for s in summaries):
        raise OptionError("block summaries do not tile the raster as a grid")
    return rows, cols, at


def _check_same(summaries: Sequence[BlockSummary]) -> None:
    if not summaries:
        raise OptionError("no block summaries to glue")
    s0 = summaries[0]
    for s in summaries:
        if (s.shape, s.kind, s.connectivity, s.edge_outlet) != (
                s0.shape, s0.kind, s0.connectivity, s0.edge_outlet):
            raise OptionError("block summaries disagree on shape, kind, connectivity or edge_outlet")
    _grid(summaries)


def _strip_line(summaries, ks, side, off):
    """Concatenate one side's strips of blocks ``ks`` (vertex ids made global)."""
    va = [np.where(summaries[k].strips[side].vertex >= 0,
                   summaries[k].strips[side].vertex.astype(np.int64) + off[k], -1) for k in ks]
    ka = [summaries[k].strips[side].key for k in ks]
    fa = [summaries[k].strips[side].edge for k in ks]
    return np.concatenate(va), np.concatenate(ka), np.concatenate(fa)


def _cross(summaries, off, nv) -> list[tuple[np.ndarray, ...]]:
    """Cross-block edges: across each horizontal block line (full width,
    diagonals through block corners included), then across each vertical
    line within one block row."""
    rows, cols, at = _grid(summaries)
    ncols = summaries[0].shape[1]
    conn8 = summaries[0].connectivity == 8
    out = []
    for i in range(1, len(rows)):
        a = _strip_line(summaries, [at[i - 1, j] for j in range(len(cols))], BOTTOM, off)
        b = _strip_line(summaries, [at[i, j] for j in range(len(cols))], TOP, off)
        out.append(_k.cross_edges(*a, (rows[i] - 1) * ncols, *b, rows[i] * ncols, 1, conn8, nv))
    for i in range(len(rows)):
        for j in range(1, len(cols)):
            r0 = rows[i]
            a = _strip_line(summaries, [at[i, j - 1]], RIGHT, off)
            b = _strip_line(summaries, [at[i, j]], LEFT, off)
            out.append(_k.cross_edges(*a, r0 * ncols + cols[j] - 1, *b, r0 * ncols + cols[j],
                                      ncols, conn8, nv))
    return out


def _reduced_edges(summaries, off, out_id) -> tuple[np.ndarray, ...]:
    def glob(u, k):
        return np.where(u < 0, out_id, u.astype(np.int64) + off[k])

    ea = [glob(s.edge_u, k) for k, s in enumerate(summaries)]
    eb = [glob(s.edge_v, k) for k, s in enumerate(summaries)]
    return (ea, eb, [s.edge_w for s in summaries], [s.edge_key for s in summaries],
            [s.edge_flag for s in summaries])


def glue(summaries: Sequence[BlockSummary]) -> Resolution:
    """Global step: glue the blocks' reduced graphs with the cross-block
    edges and resolve them with the elder rule.

    Reads only the boundary part of each summary; its memory grows with
    the total length of block boundaries (see the module docstring).

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526
    """
    summaries = list(summaries)
    _check_same(summaries)
    off = np.concatenate([[0], np.cumsum([s.vertex_cell.size for s in summaries])]).astype(np.int64)
    out_id = int(off[-1])
    nv = out_id + 1
    vcell = np.concatenate([s.vertex_cell for s in summaries] + [np.array([-1], np.int64)])
    vkey = np.concatenate([s.vertex_key for s in summaries] + [np.array([-np.inf])])
    veff = np.concatenate([s.vertex_eff for s in summaries] + [np.array([-1], np.int64)])
    veffk = np.concatenate([s.vertex_eff_key for s in summaries] + [np.array([np.nan])])
    parts = list(zip(*_reduced_edges(summaries, off, out_id)))
    parts += [(a, b, w, k, f) for a, b, w, k, f in _cross(summaries, off, nv)]
    ea, eb, ew, ek, ef = (np.concatenate([p[q] for p in parts]) if parts else np.empty(0)
                          for q in range(5))
    ea, eb, ew = (np.asarray(x, np.int64) for x in (ea, eb, ew))
    ek, ef = np.asarray(ek, np.float64), np.asarray(ef, np.bool_)
    order = np.lexsort((ew, ek))
    pb, pbk, pd, pdk, pe, esb, esk, ese, jcell, jkey = _k.glue_merge(
        vcell, vkey, veff, veffk, ea[order], eb[order], ew[order], ek[order], ef[order])
    s0 = summaries[0]
    wins = [s.window for s in summaries]
    return Resolution(s0.shape, s0.kind, s0.connectivity, s0.edge_outlet, pb, pd, pbk, pdk, pe,
                      esb, esk, ese,
                      {w: jcell[off[k]:off[k + 1]] for k, w in enumerate(wins)},
                      {w: jkey[off[k]:off[k + 1]] for k, w in enumerate(wins)},
                      nv, int(ew.size), int(sum(s.boundary_cells() for s in summaries)))


def _empty_pairs(kind: str) -> Pairs:
    e = np.empty(0, np.int64)
    f = np.empty(0, np.float64)
    return Pairs(kind, e, e.copy(), f, f.copy(), f.copy(), np.empty(0, np.bool_))


def collect(summaries: Sequence[BlockSummary], resolution: Resolution, *,
            min_persistence: float = 0.0) -> Pairs:
    """All pairs, in the canonical order of ``pairs()``: the blocks' final
    pairs plus those the glue resolved (finite pairs by death then birth in
    the total order, then essential classes by birth)."""
    kind = resolution.kind
    cat = np.concatenate
    pb = cat([s.birth for s in summaries] + [resolution.birth])
    pd = cat([s.death for s in summaries] + [resolution.death])
    pbk = cat([s.birth_key for s in summaries] + [resolution.birth_key])
    pdk = cat([s.death_key for s in summaries] + [resolution.death_key])
    pe = cat([s.edge_limited for s in summaries] + [resolution.edge_limited])
    eb = cat([s.ess_birth for s in summaries] + [resolution.ess_birth])
    ebk = cat([s.ess_key for s in summaries] + [resolution.ess_key])
    ee = cat([s.ess_edge for s in summaries] + [resolution.ess_edge])
    if min_persistence > 0:
        keep = _persistence_of_keys(kind, pbk, pdk) >= min_persistence
        pb, pd, pbk, pdk, pe = pb[keep], pd[keep], pbk[keep], pdk[keep], pe[keep]
    o = np.lexsort((pb, pbk, pd, pdk))
    pb, pd, pbk, pdk, pe = pb[o], pd[o], pbk[o], pdk[o], pe[o]
    o = np.lexsort((eb, ebk))
    eb, ebk, ee = eb[o], ebk[o], ee[o]
    bv, dv = cat([pbk, ebk]), pdk
    if kind == "peaks":  # keys are -z; negation is exact
        bv, dv = -bv, -dv
    return Pairs(kind, cat([pb, eb]).astype(np.int64),
                 cat([pd, np.full(eb.size, -1, np.int64)]).astype(np.int64),
                 bv.astype(np.float64), cat([dv, np.full(eb.size, np.nan)]).astype(np.float64),
                 cat([np.abs(bv[:pb.size] - dv), np.full(eb.size, np.inf)]),
                 cat([pe, ee]).astype(np.bool_))


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
    blk = _prepare_block(block_values, window, resolution.shape, "pits", resolution.connectivity)
    lab, minc, m = _local_engine(blk, resolution.connectivity, True)
    T, X = _k.basin_links(blk.zk, m.tt, m.node, m.ly, m.lo, m.lw, minc.size)
    level = _k.fill_levels(blk.zk, T, X, resolution.join_cell[window], resolution.join_key[window],
                           window.r0, window.c0, blk.nc, resolution.shape[1])
    out = np.empty(blk.nr * blk.nc, np.float64)
    fill_cells(blk.z, blk.valid, lab, level, out)
    return out.reshape(blk.nr, blk.nc)


# ----------------------------------------------------------------------------
# drivers
# ----------------------------------------------------------------------------
def _local_task(source, mask, shape, kind, connectivity, edge_outlet, min_persistence, window):
    vals = read_block(source, window, shape, mask)
    return local(vals, window, shape, kind=kind, connectivity=connectivity,
                 edge_outlet=edge_outlet, min_persistence=min_persistence)


def _finish_task(source, mask, resolution, window):
    return finish(read_block(source, window, resolution.shape, mask), window, resolution)


def _shape_of(source: Any) -> tuple[int, int]:
    shape = tuple(int(x) for x in source.shape)
    if len(shape) != 2:
        raise OptionError(f"expected a 2-D raster, got shape {shape}")
    return shape


def blocked_pairs(source: Any, *, kind: str, connectivity: int = 8, edge_outlet: bool | None = None,
                  block: int | tuple[int, int] = 1024, min_persistence: float = 0.0,
                  map: Callable[..., Iterable] = builtins.map, mask: Any = None) -> Pairs:
    """0-dimensional persistence pairs of a raster computed block by block.

    Parameters
    ----------
    source : array-like
        Anything with ``.shape`` and 2-D slicing ``source[r0:r1, c0:c1]``
        returning values with NaN for nodata: a numpy array, ``np.memmap``,
        a zarr array, or a lazy object computing each window. (Pages of a
        plain ``np.memmap`` that were read stay mapped and count in the
        resident set, as reclaimable page cache; a reader that opens the
        file per window does not keep them.)
    kind, connectivity, edge_outlet
        As :func:`terrain.engine.persistence.pairs`.
    block : int or (rows, cols)
        Block size (the last row and column of blocks are clipped).
    min_persistence : float
        Drop finite pairs of lower persistence (the result is the filtered
        subset of the full result, in the same order). Applied in each block
        already, so the summaries carry only the pairs that are kept.
    map : callable
        ``map(fn, windows)`` returning results in order, e.g. ``executor.map``
        of a process pool, or ``lambda f, w: client.gather(client.map(f, w))``
        for a Dask client, to run the local tasks in parallel. Each task reads
        its own window from ``source``, which must then pickle cheaply (a
        path-backed reader, a zarr array; a numpy array is pickled whole).
    mask : array-like, optional
        True marks nodata, sliced like ``source``.

    Returns
    -------
    Pairs
        Bit for bit what ``pairs(source[:, :], ...)`` returns.

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526

    Examples
    --------
    >>> import numpy as np
    >>> from terrain.engine.persistence import pairs
    >>> z = np.random.default_rng(0).random((9, 7)).astype(np.float32)
    >>> p, q = blocked_pairs(z, kind="peaks", block=(2, 3)), pairs(z, kind="peaks")
    >>> bool(np.array_equal(p.birth, q.birth) and np.array_equal(p.death, q.death))
    True
    """
    _check(kind, connectivity)
    shape = _shape_of(source)
    wins = windows(shape, block)
    if not wins:
        return _empty_pairs(kind)
    task = functools.partial(_local_task, source, mask, shape, kind, connectivity, edge_outlet,
                             min_persistence)
    summaries = list(map(task, wins))
    return collect(summaries, glue(summaries), min_persistence=min_persistence)


def blocked_fill(source: Any, *, connectivity: int = 8, block: int | tuple[int, int] = 1024,
                 out: Any = None, map: Callable[..., Iterable] = builtins.map,
                 mask: Any = None) -> tuple[Pairs, Any]:
    """Pit pairs (edge as outlet) and the depression-filled surface, block
    by block: the blocked counterpart of ``pairs_and_fill()``.

    ``out`` (default: a new float64 array) receives the filled surface by
    slice assignment, one block at a time, so it may be an ``np.memmap`` or
    a zarr array. Other parameters as :func:`blocked_pairs`. Two passes over
    ``source``: local steps, glue, then :func:`finish` per block.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    _check("pits", connectivity)
    shape = _shape_of(source)
    wins = windows(shape, block)
    if out is None:
        out = np.empty(shape, np.float64)
    if not wins:
        return _empty_pairs("pits"), out
    task = functools.partial(_local_task, source, mask, shape, "pits", connectivity, True, 0.0)
    summaries = list(map(task, wins))
    res = glue(summaries)
    p = collect(summaries, res)
    del summaries
    for w, filled in zip(wins, map(functools.partial(_finish_task, source, mask, res), wins)):
        out[w.r0:w.r1, w.c0:w.c1] = filled
    return p, out
