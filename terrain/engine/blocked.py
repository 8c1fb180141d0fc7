"""Blocked (out-of-core) persistence pairs: the same pairs as ``pairs()``,
one block in memory at a time.

:func:`blocked_pairs` returns exactly (bit for bit, every field, dtype and
order) what :func:`terrain.engine.persistence.pairs` returns on the whole
raster, while holding one block plus a one-cell halo, and a summary of the
block boundaries. :func:`blocked_fill` adds the depression-filled surface
of :func:`~terrain.engine.persistence.pairs_and_fill`, written block by
block; :func:`blocked_levels` the fill level and depression depth of each
cell's basin (``pits_and_levels()`` read per cell), the per-cell data of
:func:`~terrain.engine.persistence.count_ponding`. The regions of
``regions()`` are built on these steps in :mod:`terrain.engine.blocked_regions`.

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

Per-cell values that belong to a cell's *basin of steepest descent on the
whole raster* (fill level and depression depth, region) need that basin,
and near a block line the steepest neighbour may lie in the next block.
With ``local(..., termini=True)`` each block also follows every cell's
steepest descent with the halo's neighbours (:func:`descend_block`) and
hands up, per boundary cell, where the chain ends in the block: a minimum
of the raster or the neighbouring cell it leaves for; :func:`glue` follows
those chains from strip to strip to a minimum, and keeps the *merge
forest* of the reduced graph (each vertex below the root it died into, at
that cell), from which the second passes read any component's identity and
age just before any cell (:class:`Forest`). :func:`levels_from` gives
each minimum its fill level (the later of its component's first boundary
time and that vertex's join with the outlet) and its depression depth
(level minus the deepest cell of its component below the level: the
block's own merge log while the component is closed, the merge forest
after). It reads only what the first pass kept of the block
(:func:`local_and_levels`, :class:`LevelInputs`: per cell the row of the
minimum or exit its descent reaches, per minimum four numbers), so the
second pass of depressions does not redo the local step;
:func:`finish_levels` is both passes on one block.

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

With termini: the local step holds 4 more bytes per cell while it runs
(where each cell's descent ends; measured 14.5 against 11.3 bytes per
block cell, pits). Per boundary cell a summary hands up 8 more bytes
(``Strip.term``) and, for pits with the edge as outlet, 40 bytes per
distinct minimum those cells reach (:class:`Roots`): measured +8 (peaks)
and +10 (pits) bytes per boundary cell on terrain plus noise, +8 and +18
on white noise. The glue keeps 24 more bytes per reduced-graph vertex
(merge forest) and 8 per boundary cell (its global vertex and its row of
:class:`Minima`, int32 each), plus 8-24 per minimum; its measured peak
is 44 bytes per boundary cell on terrain plus noise (1024**2 blocks; 22-27
without termini) and unchanged at 145 on white noise. The level inputs
kept between the passes take 4 bytes per block cell (the descent codes,
renumbered in place) plus 32 per raster minimum of the block and 8 per
exit; the second pass of depressions holds those, the block's values and
its counts (4 each), region labels (8) and a label view (4): about 25
bytes per block cell.

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
from . import elders  # relations: the elder of each pair
from .basins import descend, fill_cells, resolve
from .grid import forward_offsets, offsets
from .persistence import KINDS, Pairs

__all__ = ["Window", "Strip", "Roots", "BlockSummary", "Forest", "Boundary", "Minima", "Resolution",
           "LevelInputs", "windows",
           "halo", "read_block", "local", "local_and_levels", "glue", "collect", "finish",
           "finish_levels", "level_inputs", "levels_from",
           "blocked_pairs", "blocked_fill", "blocked_levels", "local_summaries"]

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


# ----------------------------------------------------------------------------
# summaries
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class Strip:
    """One side of a block: per cell the reduced-graph vertex (-1: none),
    the key and the edge flag. Empty on a raster edge. With termini
    (``local(..., termini=True)``) also ``term``: where the cell's steepest
    descent ends inside its block -- the global cell of a raster minimum,
    ``-(j + 2)`` when it leaves the block for global cell ``j``, -1 on
    nodata."""

    vertex: np.ndarray
    key: np.ndarray
    edge: np.ndarray
    term: np.ndarray | None = None


@dataclass(frozen=True)
class Roots:
    """Per raster minimum that a strip cell descends to (pits with the edge
    as outlet, with termini): global ``cell``; the time its component first
    reached the block boundary (global cell ``tc``, -1: from birth, -2:
    never; key ``tk``); the reduced-graph vertex it then joined (``x``,
    block-local id; -1: the outlet, -2: none); and ``dk``, the deepest key
    of its component below ``tk`` (:func:`~terrain.engine.blocked_kernels.depression_roots`).
    What the glue needs to give these minima their fill level and
    depression depth. Sorted by ``cell``."""

    cell: np.ndarray
    tc: np.ndarray
    tk: np.ndarray
    x: np.ndarray
    dk: np.ndarray


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
    float32: bool = True
    roots: Roots | None = None
    elder: np.ndarray | None = None  # relations: per final pair, see terrain.engine.elders

    def boundary_nbytes(self) -> int:
        """Bytes of the boundary part (what :func:`glue` reads)."""
        arrs = [self.vertex_cell, self.vertex_key, self.vertex_eff, self.vertex_eff_key,
                self.edge_u, self.edge_v, self.edge_w, self.edge_key, self.edge_flag]
        arrs += [a for s in self.strips for a in (s.vertex, s.key, s.edge, s.term)
                 if a is not None]
        if self.roots is not None:
            arrs += [self.roots.cell, self.roots.tc, self.roots.tk, self.roots.x, self.roots.dk]
        return int(sum(a.nbytes for a in arrs))

    def boundary_cells(self) -> int:
        """Number of cells in the strips (cells facing another block)."""
        return int(sum(s.vertex.size for s in self.strips))


@dataclass(frozen=True)
class Forest:
    """The glued merge forest over all reduced-graph vertices (global ids;
    the last one is the outlet): per vertex its birth (``vcell``,
    ``vkey``), the root it died into (``up``, -1: never) and the cell
    and key of that merge (``mcell``, ``mkey``), and the cell and key at
    which its component joins the outlet (``jcell``, -1: never; ``jkey``).
    A vertex's component just before any cell is found by climbing
    (:func:`~terrain.engine.blocked_kernels.forest_root`). 48 bytes per
    vertex."""

    vcell: np.ndarray
    vkey: np.ndarray
    up: np.ndarray
    mcell: np.ndarray
    mkey: np.ndarray
    jcell: np.ndarray
    jkey: np.ndarray

    @property
    def out_id(self) -> int:
        """Id of the outlet vertex."""
        return int(self.vcell.size - 1)


@dataclass(frozen=True)
class Boundary:
    """One block's part of the glued boundary: the offset of its
    reduced-graph vertex ids, and per side (as its strips) the global
    vertex of each cell (``vertex``, -1: none) and the raster minimum its
    steepest descent ends at on the whole raster, as a row of
    :class:`Minima` (``minimum``, -1: nodata). 8 bytes per strip cell."""

    offset: int
    vertex: tuple
    minimum: tuple


@dataclass(frozen=True)
class Minima:
    """The raster minima that boundary cells descend to (global ``cell``,
    sorted) with, for pits with the edge as outlet, their fill ``level``
    and the ``depth`` of their depression (else None). 8-24 bytes per
    minimum."""

    cell: np.ndarray
    level: np.ndarray | None
    depth: np.ndarray | None


@dataclass(frozen=True)
class Resolution:
    """What :func:`glue` resolves globally: the undecided pairs and, per
    block window, per reduced-graph vertex, the global cell and key at
    which its component joins the outlet (-1: never).

    When the summaries carry termini, also the merge ``forest``, the
    per-window :class:`Boundary`, the :class:`Minima` the boundary cells
    descend to and the block grid (``rows``, ``cols``: first row and
    column of each row and column of blocks), which the
    per-block second passes (:func:`finish_levels`, the region steps of
    :mod:`terrain.engine.blocked_regions`) read. ``float32``: every block's
    values are exactly float32 (the whole raster's engine then works in
    float32).
    """

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
    float32: bool = True
    forest: Forest | None = None
    boundary: dict | None = None
    minima: Minima | None = None
    rows: tuple = ()
    cols: tuple = ()


# ----------------------------------------------------------------------------
# local step
# ----------------------------------------------------------------------------
class Block(NamedTuple):
    """One block ready for the local step: its cells flat (``z``, key
    ``zk``, ``valid``, ``EDGE``/``TERM`` ``flags``) and the values of the
    block plus halo (``vals``, block cell (r, c) at ``vals[r + hr, c + hc]``;
    ``hwin`` the halo window)."""

    window: Window
    shape: tuple[int, int]
    nr: int
    nc: int
    z: np.ndarray
    zk: np.ndarray
    valid: np.ndarray
    flags: np.ndarray
    vals: np.ndarray
    hr: int
    hc: int
    hwin: Window


class Merged(NamedTuple):
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
    pel: np.ndarray  # relations: elder of each final pair (local encoding, see local_merge)


def _check(kind: str, connectivity: int) -> None:
    if kind not in KINDS:
        raise OptionError(f"kind must be one of {KINDS}, got {kind!r}")
    if connectivity not in (4, 8):
        raise OptionError(f"connectivity must be 4 or 8, got {connectivity!r}")


def prepare_block(block_values, window, shape, kind, connectivity) -> Block:
    window = Window(*(int(x) for x in window))
    shape = (int(shape[0]), int(shape[1]))
    h = halo(window, shape)
    vals = as_float(np.asarray(block_values))
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
    return Block(window, shape, nr, nc, z, zk, valid, flags, vals, hr, hc, h)


def local_engine(blk: Block, connectivity: int, outlet: bool, pointers: bool = False):
    """Basins, their lowest passes and the boundary-aware merge of one block.

    Returns ``(lab, minc, merged, pointer)``: with ``pointers``, ``pointer``
    is a copy of each cell's steepest-descent pointer inside the block (what
    :func:`descend_block` starts from; 4 bytes per cell), else None.
    """
    nr, nc = blk.nr, blk.nc
    n = nr * nc
    dr, dc = offsets(connectivity)
    fr, fc = forward_offsets(connectivity)
    has_nodata = not blk.valid.all()
    lab = np.empty(n, np.int32 if n < 2**31 - 1 else np.int64)
    descend(blk.zk, blk.valid, has_nodata, nr, nc, dr, dc, lab)
    pointer = lab.astype(_code_dtype(n)) if pointers else None
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
    return lab, minc, Merged(*merged), pointer


def to_local(cells: np.ndarray, window: Window, shape: tuple[int, int]) -> np.ndarray:
    """Global flat cells to the local flat cells of ``window`` (-1 where
    the cell lies outside the window)."""
    r, c = np.divmod(np.asarray(cells, np.int64), shape[1])
    r, c = r - window.r0, c - window.c0
    nr, nc = window.r1 - window.r0, window.c1 - window.c0
    inside = (r >= 0) & (r < nr) & (c >= 0) & (c < nc) & (np.asarray(cells) >= 0)
    return np.where(inside, r * nc + c, -1)


def to_global(cells: np.ndarray, blk: Block) -> np.ndarray:
    """Local flat cells of a block to global flat cells (-1 stays -1)."""
    cells = np.asarray(cells, np.int64)
    r, c = np.divmod(cells, blk.nc)
    g = (blk.window.r0 + r) * blk.shape[1] + blk.window.c0 + c
    return np.where(cells < 0, -1, g)


def strip_cells(window: Window, shape: tuple[int, int]) -> list[np.ndarray]:
    """Local flat cells of a block's top, bottom, left and right sides, in
    strip order (empty on a raster edge)."""
    nr, nc = window.r1 - window.r0, window.c1 - window.c0
    sides = [(window.r0 == 0, np.arange(nc)), (window.r1 == shape[0], (nr - 1) * nc + np.arange(nc)),
             (window.c0 == 0, np.arange(nr) * nc), (window.c1 == shape[1], np.arange(nr) * nc + nc - 1)]
    return [idx[:0] if on_edge else idx for on_edge, idx in sides]


def ring_cells(window: Window, shape: tuple[int, int]) -> np.ndarray:
    """Global cell at each position of a block's halo ring (see
    :func:`~terrain.engine.blocked_kernels.ring_index`), -1 off the raster."""
    r0, r1, c0, c1 = window
    across = np.arange(c0 - 1, c1 + 1)
    down = np.arange(r0, r1)
    rr = np.concatenate([np.full(across.size, r0 - 1), np.full(across.size, r1), down, down])
    cc = np.concatenate([across, across, np.full(down.size, c0 - 1), np.full(down.size, c1)])
    inside = (rr >= 0) & (rr < shape[0]) & (cc >= 0) & (cc < shape[1])
    return np.where(inside, rr * shape[1] + cc, -1).astype(np.int64)


def _strips(blk: Block, lab: np.ndarray, vertex_of_basin: np.ndarray) -> tuple[Strip, ...]:
    out = []
    for idx in strip_cells(blk.window, blk.shape):
        f = blk.flags[idx]
        vid = np.full(idx.size, -1, np.int32)
        t = (f & _k.TERM) != 0
        vid[t] = vertex_of_basin[-lab[idx[t]].astype(np.int64) - 1]
        out.append(Strip(vid, blk.zk[idx].astype(np.float64), (f & _k.EDGE) != 0))
    return tuple(out)


def _code_dtype(n: int):
    """Integer type of :func:`descend_block`'s codes for a block of ``n`` cells."""
    return np.int32 if 2 * n + 2 < 2**31 else np.int64


def descend_block(blk: Block, kind: str, connectivity: int,
                  pointer: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Steepest descent of a block's cells on the whole raster (neighbours
    read from the halo), resolved inside the block: per cell the code of
    where its chain ends and per exit its halo ring position (see
    :func:`~terrain.engine.blocked_kernels.global_descend`). 4 bytes per
    cell. ``pointer``, optional: the in-block pointers of
    :func:`local_engine` (``pointers=True``), taken over as the codes
    instead of descending again."""
    n = blk.nr * blk.nc
    code = np.empty(n, _code_dtype(n)) if pointer is None else pointer
    ex_ring = np.empty(2 * (blk.nr + blk.nc) + 4, np.int64)
    dr, dc = offsets(connectivity)
    ne = _k.global_descend(blk.zk, blk.valid, not blk.valid.all(), blk.vals, kind == "peaks", blk.hr,
                           blk.hc, blk.nr, blk.nc, blk.hwin.r0, blk.hwin.c0, blk.shape[1], dr, dc,
                           code, ex_ring, pointer is not None)
    return code, ex_ring[:ne]


def _with_termini(blk: Block, strips, code, ex_ring) -> tuple[Strip, ...]:
    """The strips with ``term``: where each cell's descent ends in the block."""
    n = blk.nr * blk.nc
    ring = ring_cells(blk.window, blk.shape)
    out = []
    for s, idx in zip(strips, strip_cells(blk.window, blk.shape)):
        c = -code[idx].astype(np.int64) - 1
        term = np.full(idx.size, -1, np.int64)
        m = c < n
        term[m] = to_global(c[m], blk)
        x = (c >= n) & (c < 2 * n)
        term[x] = -(ring[ex_ring[c[x] - n]] + 2)
        out.append(Strip(s.vertex, s.key, s.edge, term))
    return tuple(out)


def _roots(blk: Block, lab, minc, m: Merged, strips, links) -> Roots:
    """Fill-level and depth data of the minima the strips descend to
    (``links``: ``basin_links`` of the block)."""
    cells = np.unique(np.concatenate([s.term[s.term >= 0] for s in strips]))
    tc, tk, x, dk = _minima_links(blk, lab, minc, m, links,
                                  to_local(cells, blk.window, blk.shape))
    return Roots(cells, tc, tk, x, dk)


def _minima_links(blk: Block, lab, minc, m: Merged, links, minima):
    """Per raster minimum (local cells ``minima``): the global cell and key
    of the time its component first reached the block boundary, the
    reduced-graph vertex it then joined and the deepest key below that time
    (``links``: ``basin_links`` of the block)."""
    basins = -lab[minima].astype(np.int64) - 1
    T, X = links
    dk = _k.depression_roots(blk.zk, minc, m.ly, m.lo, m.lw, T, basins)
    t = T[basins]
    tk = np.full(t.size, -np.inf)
    tk[t >= 0] = blk.zk[t[t >= 0]]
    return np.where(t >= 0, to_global(t, blk), t), tk, X[basins], dk


def _maybe_regions(bk, dk, merge_level: float, float32: bool) -> np.ndarray:
    """Pairs that may be regions at ``merge_level``: not below it in float64
    and, for a float32 block, not below it in float32 either (the whole
    raster's dtype is not known yet; :func:`regions` compares in it)."""
    d = dk - bk
    keep = d >= merge_level
    if float32:
        keep |= (dk.astype(np.float32) - bk.astype(np.float32)).astype(np.float64) >= merge_level
    return keep


def _persistence_of_keys(kind: str, bk: np.ndarray, dk: np.ndarray) -> np.ndarray:
    bv, dv = (-bk, -dk) if kind == "peaks" else (bk, dk)
    return np.abs(bv - dv)


def local(block_values: np.ndarray, window: Window | Sequence[int], shape: tuple[int, int], *,
          kind: str, connectivity: int = 8, edge_outlet: bool | None = None,
          min_persistence: float = 0.0, termini: bool = False,
          merge_level: float | None = None) -> BlockSummary:
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
    termini : bool
        Also hand up, per strip cell, where its steepest descent on the
        whole raster ends inside the block (``Strip.term``) and, for pits
        with the edge as outlet, the :class:`Roots` of those minima: what
        the second passes (:func:`finish_levels`, the region steps) need.
        Costs one more descent pass (4 bytes per cell, freed before return).
    merge_level : float, optional
        Keep only final pairs that may be regions at this merge level
        (see :func:`terrain.engine.persistence.regions`).

    Returns
    -------
    BlockSummary
        Final pairs of the block and its reduced graph and boundary strips.

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526
    """
    return _local(block_values, window, shape, kind, connectivity, edge_outlet, min_persistence,
                  termini, merge_level, False)[0]


def local_and_levels(block_values: np.ndarray, window: Window | Sequence[int],
                     shape: tuple[int, int], *, connectivity: int = 8,
                     min_persistence: float = 0.0) -> tuple[BlockSummary, LevelInputs]:
    """:func:`local` of pits with the edge as outlet and termini, plus the
    block's :class:`LevelInputs`: what :func:`levels_from` needs, once the
    summaries are glued, to give every cell its fill level and depression
    depth without redoing the local step (the second pass of depressions).

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    return _local(block_values, window, shape, "pits", connectivity, True, min_persistence, True,
                  None, True)


def _local(block_values, window, shape, kind, connectivity, edge_outlet, min_persistence, termini,
           merge_level, levels):
    """:func:`local`; with ``levels`` (pits, edge outlet, termini) also the
    block's :class:`LevelInputs` (else None)."""
    _check(kind, connectivity)
    outlet = bool(kind == "pits" if edge_outlet is None else edge_outlet)
    blk = prepare_block(block_values, window, shape, kind, connectivity)
    lab, minc, m, pointer = local_engine(blk, connectivity, outlet, pointers=termini)
    pb, pd, pe, esb, ese, hvb, hve = m.pb, m.pd, m.pe, m.esb, m.ese, m.hvb, m.hve
    zk = blk.zk
    f32 = blk.z.dtype == np.float32
    bk, dk = zk[pb].astype(np.float64), zk[pd].astype(np.float64)
    keep = np.ones(pb.size, bool)
    if min_persistence > 0:
        keep &= _persistence_of_keys(kind, bk, dk) >= min_persistence
    if merge_level is not None:
        keep &= _maybe_regions(bk, dk, merge_level, f32)
    pb, pd, pe, bk, dk = pb[keep], pd[keep], pe[keep], bk[keep], dk[keep]
    elder = elders.local_elders(m.pel[keep], blk, minc[m.hvb])  # relations
    vertex_of_basin = np.full(minc.size, -1, np.int64)
    vertex_of_basin[hvb] = np.arange(hvb.size)
    vb = minc[hvb]
    effk = np.full(hve.size, np.nan)
    effk[hve >= 0] = zk[hve[hve >= 0]]
    strips, roots, inputs = _strips(blk, lab, vertex_of_basin), None, None
    if termini:
        code, ex_ring = descend_block(blk, kind, connectivity, pointer)
        strips = _with_termini(blk, strips, code, ex_ring)
        if kind == "pits" and outlet:
            links = _k.basin_links(blk.zk, m.tt, m.node, m.ly, m.lo, m.lw, minc.size)
            roots = _roots(blk, lab, minc, m, strips, links)
            if levels:
                inputs = level_inputs(blk, lab, minc, m, code, ex_ring, links)
    summary = BlockSummary(
        blk.window, blk.shape, kind, connectivity, outlet,
        to_global(pb, blk), to_global(pd, blk), bk, dk, pe,
        to_global(esb, blk), zk[esb].astype(np.float64), ese,
        to_global(vb, blk), zk[vb].astype(np.float64), to_global(hve, blk), effk,
        m.hu.astype(np.int32), m.hv.astype(np.int32), to_global(m.hw, blk),
        zk[m.hw].astype(np.float64), (blk.flags[m.hw] & _k.EDGE) != 0,
        strips, bool(f32), roots, elder)
    return summary, inputs


# ----------------------------------------------------------------------------
# global step
# ----------------------------------------------------------------------------
def block_grid(summaries: Sequence[BlockSummary]):
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
    block_grid(summaries)


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
    rows, cols, at = block_grid(summaries)
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
    pb, pbk, pd, pdk, pe, esb, esk, ese, jcell, jkey, up, mcell, mkey = _k.glue_merge(
        vcell, vkey, veff, veffk, ea[order], eb[order], ew[order], ek[order], ef[order])
    n_edges = int(ew.size)
    del parts, ea, eb, ew, ek, ef, order
    s0 = summaries[0]
    wins = [s.window for s in summaries]
    forest = Forest(vcell, vkey, up, mcell, mkey, jcell, jkey)
    rows, cols, _ = block_grid(summaries)
    boundary, minima = _boundary(summaries, off, forest)
    return Resolution(s0.shape, s0.kind, s0.connectivity, s0.edge_outlet, pb, pd, pbk, pdk, pe,
                      esb, esk, ese,
                      {w: jcell[off[k]:off[k + 1]] for k, w in enumerate(wins)},
                      {w: jkey[off[k]:off[k + 1]] for k, w in enumerate(wins)},
                      nv, n_edges, int(sum(s.boundary_cells() for s in summaries)),
                      all(s.float32 for s in summaries), forest, boundary, minima,
                      tuple(rows), tuple(cols))


def _facing_entries(summaries, base, src, cells, chunk: int = 1 << 12) -> np.ndarray:
    """Flat strip entry of each global cell in ``cells``, read from the
    side of its block that faces block ``src`` (a neighbour). Done in
    chunks, so the temporaries do not grow with the boundary."""
    rows, cols, at = block_grid(summaries)
    rows, cols = np.asarray(rows), np.asarray(cols)
    ncols = summaries[0].shape[1]
    grid = np.empty((rows.size, cols.size), np.int64)
    gi, gj = np.empty(len(summaries), np.int64), np.empty(len(summaries), np.int64)
    for (i, j), k in at.items():
        grid[i, j], gi[k], gj[k] = k, i, j
    out = np.empty(cells.size, np.int64)
    for a in range(0, cells.size, chunk):
        r, c = np.divmod(cells[a:a + chunk], ncols)
        bi = np.searchsorted(rows, r, "right") - 1
        bj = np.searchsorted(cols, c, "right") - 1
        si, sj = gi[src[a:a + chunk]], gj[src[a:a + chunk]]
        side = np.where(bi < si, BOTTOM, np.where(bi > si, TOP, np.where(bj < sj, RIGHT, LEFT)))
        pos = np.where(side <= BOTTOM, c - cols[bj], r - rows[bi])
        out[a:a + chunk] = base[grid[bi, bj] * 4 + side] + pos
    return out


def _boundary(summaries, off, forest: Forest) -> tuple[dict | None, Minima | None]:
    """Per window: strip vertices made global and, per strip cell, the
    raster minimum its steepest descent ends at (chains followed across
    blocks) as a row of the :class:`Minima` table."""
    if any(st.term is None for s in summaries for st in s.strips):
        return None, None
    sizes = [st.term.size for s in summaries for st in s.strips]
    base = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    term = np.concatenate([st.term for s in summaries for st in s.strips] + [np.empty(0, np.int64)])
    small = np.int32 if term.size < 2**31 and off[-1] < 2**31 - 1 else np.int64
    nxt = np.full(term.size, -1, small)
    ex = np.flatnonzero(term < -1)
    nxt[ex] = _facing_entries(summaries, base, (np.searchsorted(base, ex, "right") - 1) // 4,
                              -term[ex] - 2)
    _k.follow_exits(term, nxt)  # term now holds the minimum of every entry
    del nxt, ex
    cells = np.unique(term[term >= 0])
    out = {}
    for k, s in enumerate(summaries):
        vert = tuple(np.where(st.vertex >= 0, st.vertex + off[k], -1).astype(small) for st in s.strips)
        mins = [term[base[4 * k + q]:base[4 * k + q + 1]] for q in range(4)]
        rows = tuple(np.where(m >= 0, np.searchsorted(cells, m), -1).astype(small) for m in mins)
        out[s.window] = Boundary(int(off[k]), vert, rows)
    del term, mins
    level = depth = None
    if all(s.roots is not None for s in summaries):
        level, depth = _root_levels(summaries, off, forest, cells)
    return out, Minima(cells, level, depth)


def _root_levels(summaries, off, forest: Forest, cells: np.ndarray):
    """Fill level and depression depth of each minimum in ``cells``, from
    the :class:`Roots` its block handed up."""
    roots = [s.roots for s in summaries]
    cell = np.concatenate([r.cell for r in roots])
    x = np.concatenate([np.where(r.x >= 0, r.x + off[k], r.x) for k, r in enumerate(roots)])
    tc, tk, dk = (np.concatenate([getattr(r, f) for r in roots]) for f in ("tc", "tk", "dk"))
    at = np.searchsorted(cell, cells) if cell.size and np.all(cell[1:] > cell[:-1]) else None
    if at is None:
        o = np.argsort(cell)
        at = o[np.searchsorted(cell[o], cells)]
    lv, dp = np.empty(at.size), np.empty(at.size)
    _k.levels_and_depths(tk[at], tc[at], x[at].astype(np.int64), dk[at], forest.jcell, forest.jkey,
                         forest.up, forest.mkey, forest.vkey, lv, dp)
    return lv, dp


def _empty_pairs(kind: str) -> Pairs:
    e = np.empty(0, np.int64)
    f = np.empty(0, np.float64)
    return Pairs(kind, e, e.copy(), f, f.copy(), f.copy(), np.empty(0, np.bool_),
                 e.copy())  # relations: elder


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
    keep = None
    if min_persistence > 0:
        keep = _persistence_of_keys(kind, pbk, pdk) >= min_persistence
        pb, pd, pbk, pdk, pe = pb[keep], pd[keep], pbk[keep], pdk[keep], pe[keep]
    pel = elders.collected_elders(summaries, resolution, pb, pd, pdk, keep)  # relations
    o = np.lexsort((pb, pbk, pd, pdk))
    pb, pd, pbk, pdk, pe, pel = pb[o], pd[o], pbk[o], pdk[o], pe[o], pel[o]
    o = np.lexsort((eb, ebk))
    eb, ebk, ee = eb[o], ebk[o], ee[o]
    bv, dv = cat([pbk, ebk]), pdk
    if kind == "peaks":  # keys are -z; negation is exact
        bv, dv = -bv, -dv
    return Pairs(kind, cat([pb, eb]).astype(np.int64),
                 cat([pd, np.full(eb.size, -1, np.int64)]).astype(np.int64),
                 bv.astype(np.float64), cat([dv, np.full(eb.size, np.nan)]).astype(np.float64),
                 cat([np.abs(bv[:pb.size] - dv), np.full(eb.size, np.inf)]),
                 cat([pe, ee]).astype(np.bool_), cat([pel, np.full(eb.size, -1, np.int64)]))


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
    :func:`~terrain.engine.blocked_kernels.ring_index`), the value at that
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


@dataclass(frozen=True)
class LevelInputs:
    """What one block's local step leaves for the second pass of
    depressions (:func:`levels_from`).

    ``dest`` (per cell, int32 or int64 as the block's labels): the row of
    where the cell's steepest descent on the whole raster ends -- row ``q``
    below ``tk.size`` for the ``q``-th raster minimum of the block (cell
    order), row ``tk.size + e`` when it leaves the block at exit ``e``
    (halo ring position ``ex_ring[e]``, see
    :func:`~terrain.engine.blocked_kernels.ring_index`); -1 on nodata. Per
    raster minimum, as :func:`~terrain.engine.blocked_kernels.levels_and_depths`
    reads them: ``tk``/``tc`` (key and global cell of the time its component
    first reached the block boundary; -1 from birth, -2 never), ``x``
    (block-local reduced-graph vertex then joined; -1 the outlet, -2 none)
    and ``dk`` (deepest key below ``tk``). 4 bytes per cell, 32 per raster
    minimum and 8 per exit.
    """

    dest: np.ndarray
    tk: np.ndarray
    tc: np.ndarray
    x: np.ndarray
    dk: np.ndarray
    ex_ring: np.ndarray

    def arrays(self) -> dict:
        """The fields by name (``LevelInputs(**inputs.arrays())`` rebuilds it)."""
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


def level_inputs(blk: Block, lab, minc, m: Merged, code, ex_ring, links) -> LevelInputs:
    """The :class:`LevelInputs` of a block from its local engine, its
    descent codes (``code`` of :func:`descend_block`, turned into ``dest``
    in place) and its ``basin_links``."""
    minima = _k.descent_rows(code, blk.nr * blk.nc)
    tc, tk, x, dk = _minima_links(blk, lab, minc, m, links, minima)
    return LevelInputs(code, tk, tc, x, dk, ex_ring)


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


# ----------------------------------------------------------------------------
# drivers
# ----------------------------------------------------------------------------
def _local_task(source, mask, shape, kind, connectivity, edge_outlet, min_persistence, window,
                termini=False, merge_level=None):
    vals = read_block(source, window, shape, mask)
    return local(vals, window, shape, kind=kind, connectivity=connectivity,
                 edge_outlet=edge_outlet, min_persistence=min_persistence, termini=termini,
                 merge_level=merge_level)


def local_summaries(source: Any, wins: list[Window], *, kind: str, connectivity: int,
                    edge_outlet: bool | None, map: Callable[..., Iterable] = builtins.map,
                    mask: Any = None, min_persistence: float = 0.0, termini: bool = False,
                    merge_level: float | None = None) -> list[BlockSummary]:
    """:func:`local` on every window of ``source`` through ``map``."""
    task = functools.partial(_local_task, source, mask, raster_shape(source), kind, connectivity,
                             edge_outlet, min_persistence, termini=termini, merge_level=merge_level)
    return list(map(task, wins))


def _finish_task(source, mask, resolution, window):
    return finish(read_block(source, window, resolution.shape, mask), window, resolution)


def raster_shape(source: Any) -> tuple[int, int]:
    """``source.shape`` as a 2-tuple of ints (a 2-D raster or OptionError)."""
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
    shape = raster_shape(source)
    wins = windows(shape, block)
    if not wins:
        return _empty_pairs(kind)
    summaries = local_summaries(source, wins, kind=kind, connectivity=connectivity,
                                edge_outlet=edge_outlet, map=map, mask=mask,
                                min_persistence=min_persistence)
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
    shape, wins = _pits_windows(source, connectivity, block)
    if out is None:
        out = np.empty(shape, np.float64)
    if not wins:
        return _empty_pairs("pits"), out
    p, res = _pits_pass_one(source, wins, connectivity, map, mask, termini=False)
    for w, filled in zip(wins, map(functools.partial(_finish_task, source, mask, res), wins)):
        out[w.r0:w.r1, w.c0:w.c1] = filled
    return p, out


def _pits_windows(source, connectivity, block):
    _check("pits", connectivity)
    shape = raster_shape(source)
    return shape, windows(shape, block)


def _pits_pass_one(source, wins, connectivity, map, mask, termini):
    """Local steps of pits with the edge as outlet, glued; the pairs and the resolution."""
    summaries = local_summaries(source, wins, kind="pits", connectivity=connectivity,
                                edge_outlet=True, map=map, mask=mask, termini=termini)
    res = glue(summaries)
    return collect(summaries, res), res


def _levels_task(source, mask, resolution, window):
    return finish_levels(read_block(source, window, resolution.shape, mask), window, resolution)


def blocked_levels(source: Any, *, connectivity: int = 8, block: int | tuple[int, int] = 1024,
                   level_out: Any = None, depth_out: Any = None,
                   map: Callable[..., Iterable] = builtins.map,
                   mask: Any = None) -> tuple[Pairs, Any, Any]:
    """Pit pairs (edge as outlet) and, per cell, the fill level and the
    depression depth of its basin, block by block: the blocked counterpart
    of ``pits_and_levels()`` read per cell (``level[basin]``,
    ``depth[basin]``; see :func:`finish_levels`).

    ``level_out`` and ``depth_out`` (default: new float64 arrays) receive
    the values by slice assignment, one block at a time, so they may be
    ``np.memmap`` or zarr arrays. Other parameters as :func:`blocked_fill`.
    Two passes over ``source``: local steps with termini, glue, then
    :func:`finish_levels` per block.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    shape, wins = _pits_windows(source, connectivity, block)
    level_out = np.empty(shape, np.float64) if level_out is None else level_out
    depth_out = np.empty(shape, np.float64) if depth_out is None else depth_out
    if not wins:
        return _empty_pairs("pits"), level_out, depth_out
    p, res = _pits_pass_one(source, wins, connectivity, map, mask, termini=True)
    for w, (lv, dp) in zip(wins, map(functools.partial(_levels_task, source, mask, res), wins)):
        level_out[w.r0:w.r1, w.c0:w.c1] = lv
        depth_out[w.r0:w.r1, w.c0:w.c1] = dp
    return p, level_out, depth_out
