"""Blocked (out-of-core) regions: the persistence-simplified watershed of
``regions()``, bit for bit, one block in memory at a time.

:func:`blocked_regions` returns the table of
:func:`terrain.engine.persistence.regions` (every field, dtype and order)
and writes its per-cell labels into any array-like with 2-D slice
assignment, block by block. It builds on the blocked pairs of
:mod:`terrain.engine.blocked`.

Algorithm
---------
A cell's label is the region of its basin of steepest descent; a basin's
region is its own when its minimum's pair is at least ``merge_level``
persistent (or essential), else the region of the basin across the pass
where its component died (the outlet: none). So labels are the roots of a
forest over raster minima -- each cancelled minimum links to the minimum
of the basin across its pass -- read through the steepest descent of each
cell. Four steps:

1. :func:`~terrain.engine.blocked.local` with ``termini=True`` (pass one
   over the raster) and :func:`~terrain.engine.blocked.glue`: the pairs,
   as for :func:`~terrain.engine.blocked.blocked_pairs`, plus the merge
   forest of the reduced graph and, per boundary cell, the raster minimum
   its steepest descent reaches (chains that cross block lines followed
   along the strips). The table is the pairs that survive the merge level
   (:func:`region_table`), in the order of ``regions()``.
2. :func:`region_step` (pass two, per block): replays the merges at every
   cell of the block where components meet -- the cell's earlier
   neighbours, halo included, in the total order, as ``regions()`` takes
   them -- knowing each component's identity and age on the whole raster:
   a component still closed in the block from the block's own
   union-find, one that reached another block from the glued merge forest
   just before that cell. Every component dying there with persistence
   below the merge level gives a link. Links are followed inside the
   block; what stays open (a minimum whose link another block decides, or
   that lies in another block) is handed up with the links other blocks
   may need.
3. :func:`glue_regions`: follows the handed-up links to region ids.
4. :func:`region_labels` (pass three, per block, only where step 2 left
   open ends): the block's labels.

Every merge happens at one cell, so exactly one block decides it, and its
replay sees what the whole-raster union-find sees at that cell.

Memory
------
Per block: the local step again plus where each cell's descent ends (4
bytes per cell) and the region links of the block's cancelled pairs (16
bytes each); measured 15.2 bytes per block cell for the region step on
terrain plus noise (11.3 for the local step alone,
``bench/bench_blocked.py``). Per boundary cell: the termini of the local
step and glue (:mod:`terrain.engine.blocked`, about 8-10 bytes handed up
and 44 at the glue's peak on terrain plus noise), and what the region step
hands up -- 16 bytes per link that leaves its block and 8 per open end:
measured 0.8 bytes per boundary cell on terrain plus noise and 3.6 on
white noise. All of it grows with the length of block boundaries, not
with the number of cells. The table (one row per region) is the output;
the local steps already drop the pairs that cannot be regions at the
merge level.

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2
.. [2] Najman, L., Schmitt, M. (1996). Geodesic saliency of watershed
   contours and hierarchical segmentation. IEEE TPAMI 18(12), 1163-1173.
.. [3] Morozov, D., Weber, G. H. (2013). Distributed merge trees. PPoPP
   '13, 93-102. doi:10.1145/2442516.2442526
"""

from __future__ import annotations

import builtins
import functools
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from ...errors import OptionError
from ..grid import offsets
from ..persistence import KINDS, Pairs, Regions
from . import kernels as _k
from . import region_kernels as _rk
from .drivers import local_summaries
from .finish import need_termini, ring_values
from .glue import collect, glue
from .local import descend_block, local_engine, prepare_block, strip_cells, to_local
from .summaries import Resolution
from .windows import Window, raster_shape, read_block, windows

__all__ = ["RegionSummary", "RegionResolution", "region_table", "window_reps", "region_step",
           "glue_regions", "region_labels", "blocked_regions"]

Reps = tuple[np.ndarray, np.ndarray]


def region_table(pairs: Pairs, merge_level: float, float32: bool) -> Regions:
    """The regions of ``regions()`` from all the raster's pairs: the pairs
    not cancelled at ``merge_level`` (persistence below it, computed in the
    raster's dtype -- float32 when ``float32`` -- as ``regions()`` does),
    numbered by persistence (essential first), ties by the total order of
    the extremum. ``labels`` is left empty."""
    key_b = -pairs.birth_value if pairs.kind == "peaks" else pairs.birth_value
    key_d = -pairs.death_value if pairs.kind == "peaks" else pairs.death_value
    fin = pairs.death >= 0
    d = np.full(pairs.birth.size, np.inf)
    if float32:
        d[fin] = (key_d[fin].astype(np.float32) - key_b[fin].astype(np.float32)).astype(np.float64)
    else:
        d[fin] = key_d[fin] - key_b[fin]
    keep = ~(fin & ((key_b == key_d) | (d < merge_level)))
    birth, pers = pairs.birth[keep], pairs.persistence[keep]
    o = np.lexsort((birth, key_b[keep], -pers))
    return Regions(pairs.kind, float(merge_level), np.empty((0, 0), np.int32), birth[o],
                   pairs.death[keep][o], pairs.birth_value[keep][o], pairs.death_value[keep][o],
                   pers[o], pairs.edge_limited[keep][o])


def window_reps(table: Regions, wins: Sequence[Window], shape: tuple[int, int]) -> list[Reps]:
    """Per window (a full grid from :func:`windows`, row-major): the global
    cells of the regions' extrema inside it and their region ids."""
    rows = np.unique([w.r0 for w in wins])
    cols = np.unique([w.c0 for w in wins])
    r, c = np.divmod(table.birth, shape[1])
    k = (np.searchsorted(rows, r, "right") - 1) * cols.size + np.searchsorted(cols, c, "right") - 1
    o = np.argsort(k, kind="stable")
    cuts = np.searchsorted(k[o], np.arange(len(wins) + 1))
    ids = np.arange(1, table.birth.size + 1, dtype=np.int64)
    return [(table.birth[o[a:b]], ids[o[a:b]]) for a, b in zip(cuts[:-1], cuts[1:])]


@dataclass(frozen=True)
class RegionSummary:
    """What :func:`region_step` hands up for one block: region links
    ``source -> value`` (global raster minima; value a region id, 0 for
    none, or ``-(g + 1)``: the region of minimum ``g``) that other blocks
    may need, the minima whose region the block's own labels wait for
    (``needs``, sorted), and the labels when they wait for none."""

    window: Window
    source: np.ndarray
    value: np.ndarray
    needs: np.ndarray
    labels: np.ndarray | None


@dataclass(frozen=True)
class RegionResolution:
    """The glued regions: the pairs' resolution, the merge level and, per
    window, its ``needs`` with their region ids."""

    resolution: Resolution
    merge_level: float
    answers: dict


class _Open(NamedTuple):
    """One block's region values before the glue (see :func:`_block_links`)."""

    shape: tuple[int, int]
    code: np.ndarray
    lab: np.ndarray
    basin: np.ndarray
    exit: np.ndarray
    source: np.ndarray
    value: np.ndarray
    needs: np.ndarray


def _handed_up(blk, lab, code, src, tval, res) -> tuple[np.ndarray, np.ndarray]:
    """Links other blocks may need: those whose minimum lies outside the
    block, and those of minima that the block's boundary cells descend to."""
    n = blk.nr * blk.nc
    outside = to_local(src, blk.window, blk.shape) < 0
    idx = np.concatenate(strip_cells(blk.window, blk.shape))
    t = -code[idx].astype(np.int64) - 1
    t = np.unique(t[t < n])
    r, c = np.divmod(t, blk.nc)
    g = (blk.window.r0 + r) * blk.shape[1] + blk.window.c0 + c
    mine = np.isin(g, src[~outside])
    return (np.concatenate([src[outside], g[mine]]),
            np.concatenate([tval[outside], res[-lab[t[mine]].astype(np.int64) - 1]]))


def _block_links(block_values, window, resolution: Resolution, merge_level: float,
                 reps: Reps) -> _Open:
    """Replay one block's merges and follow its region links (steps 2/4)."""
    need_termini(resolution)
    window = Window(*(int(x) for x in window))
    kind, conn, shape = resolution.kind, resolution.connectivity, resolution.shape
    blk = prepare_block(block_values, window, shape, kind, conn)
    lab, minc, m, pointer = local_engine(blk, conn, resolution.edge_outlet, pointers=True)
    code, ex_ring = descend_block(blk, kind, conn, pointer)
    ring_term = ring_values(resolution, window, "term")
    term_cells = np.flatnonzero(blk.flags & _k.TERM)
    term_cells = term_cells[np.lexsort((term_cells, blk.zk[term_cells]))]
    f, dr, dc = resolution.forest, *offsets(conn)
    src, dst = _rk.replay(blk.zk, blk.flags, blk.vals, kind == "peaks", blk.hr, blk.hc, blk.nr,
                          blk.nc, blk.hwin.r0, blk.hwin.c0, shape[1], dr, dc, lab, minc, m.tt,
                          m.node, m.ly, m.lo, m.lw, term_cells, ring_values(resolution, window, "vertex"),
                          resolution.boundary[window].offset, f.up, f.mcell, f.mkey, f.vcell, f.vkey,
                          code, ex_ring, ring_term, resolution.edge_outlet, float(merge_level),
                          resolution.float32)
    del m
    res, tval = _rk.resolve_basins(lab, minc, code, src, dst, *reps, window.r0, window.c0, blk.nr,
                                   blk.nc, shape[1])
    xg = ring_term[ex_ring]
    xl = to_local(xg, window, shape)
    xval = -(xg + 1)
    xval[xl >= 0] = res[-lab[xl[xl >= 0]].astype(np.int64) - 1]
    hsrc, hval = _handed_up(blk, lab, code, src, tval, res)
    gmin = code[minc] == -(minc + 1)
    opened = np.concatenate([res[gmin], xval])
    needs = np.unique(-opened[opened < 0] - 1)
    return _Open((blk.nr, blk.nc), code, lab, res, xval, hsrc, hval, needs)


def _labels(o: _Open, answers: Reps | None) -> np.ndarray:
    """The block's int32 labels, open ends read from ``answers``."""
    bval, xval = o.basin, o.exit
    if o.needs.size:
        if answers is None or not np.array_equal(answers[0], o.needs):
            raise OptionError("the region resolution does not answer this block")
        needs, ids = answers

        def close(v):
            v = v.copy()
            g = -v[v < 0] - 1
            v[v < 0] = ids[np.searchsorted(needs, g)]
            return v
        bval, xval = close(bval), close(xval)
    n = o.shape[0] * o.shape[1]
    out = np.empty(n, np.int32)
    _k.per_cell(o.code, o.lab, n, bval.astype(np.int32), xval.astype(np.int32), 0, out)
    return out.reshape(o.shape)


def region_step(block_values: np.ndarray, window: Window | Sequence[int], resolution: Resolution,
                merge_level: float, reps: Reps) -> RegionSummary:
    """Pass two of the blocked regions, for one block.

    Parameters
    ----------
    block_values : 2-D array
        The window plus its halo, as for :func:`~terrain.engine.blocked.local`.
    window : Window
    resolution : Resolution
        From :func:`~terrain.engine.blocked.glue` of summaries made with
        ``termini=True``.
    merge_level : float
        As :func:`~terrain.engine.persistence.regions`.
    reps : (cells, ids)
        The regions whose extremum lies in the window (:func:`window_reps`).

    Returns
    -------
    RegionSummary
        Region links other blocks may need, the block's open ends, and its
        labels when it has none.

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526
    """
    o = _block_links(block_values, window, resolution, merge_level, reps)
    labels = _labels(o, None) if o.needs.size == 0 else None
    return RegionSummary(Window(*(int(x) for x in window)), o.source, o.value, o.needs, labels)


def glue_regions(resolution: Resolution, table: Regions,
                 summaries: Sequence[RegionSummary]) -> RegionResolution:
    """Global step of the blocked regions: follow the links handed up by
    :func:`region_step` to the region id of every block's open ends.
    Memory grows with the number of handed-up links and open ends (block
    boundaries), not with the number of cells."""
    src = np.concatenate([s.source for s in summaries] + [np.empty(0, np.int64)])
    val = np.concatenate([s.value for s in summaries] + [np.empty(0, np.int64)])
    o = np.argsort(src, kind="stable")
    src, val = src[o], val[o]
    ro = np.argsort(table.birth)
    rep_cells, rep_ids = table.birth[ro], (ro + 1).astype(np.int64)
    answers = {}
    for s in summaries:
        if s.needs.size:
            ids, ok = _rk.resolve_needs(s.needs, src, val, rep_cells, rep_ids)
            if not ok:
                raise RuntimeError("blocked regions: a region link is missing (engine error)")
            answers[s.window] = (s.needs, ids)
    return RegionResolution(resolution, float(table.merge_level), answers)


def region_labels(block_values: np.ndarray, window: Window | Sequence[int],
                  resolution: RegionResolution, reps: Reps) -> np.ndarray:
    """The int32 region labels of one block (0: nodata or no region), equal
    to the block's part of ``regions(...).labels``: :func:`region_step`
    again, its open ends read from the glued ``resolution``."""
    o = _block_links(block_values, window, resolution.resolution, resolution.merge_level, reps)
    return _labels(o, resolution.answers.get(Window(*(int(x) for x in window))))


def _step_task(source, mask, resolution, merge_level, item):
    window, reps = item
    return region_step(read_block(source, window, resolution.shape, mask), window, resolution,
                       merge_level, reps)


def _labels_task(source, mask, resolution, item):
    window, reps = item
    return region_labels(read_block(source, window, resolution.resolution.shape, mask), window,
                         resolution, reps)


def blocked_regions(source: Any, *, kind: str, merge_level: float, connectivity: int = 8,
                    edge_outlet: bool | None = None, block: int | tuple[int, int] = 1024,
                    out: Any = None, map: Callable[..., Iterable] = builtins.map,
                    mask: Any = None) -> Regions:
    """Regions of the persistence-simplified watershed, block by block.

    Parameters
    ----------
    source, kind, connectivity, edge_outlet, block, map, mask
        As :func:`~terrain.engine.blocked.blocked_pairs` (``map`` runs the
        per-block tasks, e.g. on worker processes or Dask).
    merge_level : float
        As :func:`~terrain.engine.persistence.regions` (>= 0).
    out : array-like, optional
        Receives the int32 labels by 2-D slice assignment, one block at a
        time (a numpy array, ``np.memmap`` or zarr array); default a new
        array.

    Returns
    -------
    Regions
        Bit for bit what ``regions(source[:, :], ...)`` returns, with
        ``labels`` being ``out``. Up to three passes over ``source`` (the
        third only for blocks whose labels depend on other blocks).

    References
    ----------
    .. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002).
       Topological persistence and simplification. Discrete Comput. Geom.
       28, 511-533. doi:10.1007/s00454-002-2885-2
    .. [2] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526
    """
    if not (np.isfinite(merge_level) and merge_level >= 0):
        raise OptionError(f"{{merge_level}} must be >= 0 and finite, got {merge_level}",
                          "merge_level")
    if kind not in KINDS:
        raise OptionError(f"kind must be one of {KINDS}, got {kind!r}")
    shape = raster_shape(source)
    out = np.zeros(shape, np.int32) if out is None else out
    outlet = bool(kind == "pits" if edge_outlet is None else edge_outlet)
    wins = windows(shape, block)
    if not wins:
        e = np.empty(0, np.int64)
        return Regions(kind, float(merge_level), out, e, e, e * 1.0, e * 1.0, e * 1.0, e > 0)
    sums = local_summaries(source, wins, kind=kind, connectivity=connectivity, edge_outlet=outlet,
                           map=map, mask=mask, termini=True, merge_level=float(merge_level))
    res = glue(sums)
    table = region_table(collect(sums, res), float(merge_level), res.float32)
    del sums
    items = list(zip(wins, window_reps(table, wins, shape)))
    steps = []
    for (w, _), s in zip(items, map(functools.partial(_step_task, source, mask, res, merge_level),
                                    items)):
        if s.labels is not None:
            out[w.r0:w.r1, w.c0:w.c1] = s.labels
        steps.append(RegionSummary(s.window, s.source, s.value, s.needs, None))
    glued = glue_regions(res, table, steps)
    todo = [it for it, s in zip(items, steps) if s.needs.size]
    for (w, _), lab in zip(todo, map(functools.partial(_labels_task, source, mask, glued), todo)):
        out[w.r0:w.r1, w.c0:w.c1] = lab
    return Regions(kind, float(merge_level), out, table.birth, table.death, table.birth_value,
                   table.death_value, table.persistence, table.edge_limited)
