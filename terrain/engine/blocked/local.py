"""The local step (one task per block, independent): steepest-descent basins,
merge edges at the saddle candidates and the elder rule inside the block, final pairs settled and a
reduced graph of the rest handed up (:func:`local`); with ``termini``, where
each boundary cell's descent ends (:func:`descend_block`).

See :mod:`terrain.engine.blocked` for the algorithm and its memory.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from ...errors import OptionError
from ..basins import CODES4, CODES8, GROUPS4, GROUPS8, resolve_all, sweep_keeping
from ..grid import offsets
from ..persistence import KINDS, event_order
from . import elders  # relations: the elder of each pair
from . import kernels as _k
from .summaries import BlockSummary, LevelInputs, Roots, Strip
from .windows import Window, as_float, halo


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


def check_kind(kind: str, connectivity: int) -> None:
    if kind not in KINDS:
        raise OptionError(f"kind must be one of {KINDS}, got {kind!r}")
    if connectivity not in (4, 8):
        raise OptionError(f"connectivity must be 4 or 8, got {connectivity!r}")


def prepare_block(block_values, window, shape, kind, connectivity) -> Block:
    window = Window(*(int(x) for x in window))
    shape = (int(shape[0]), int(shape[1]))
    h = halo(window, shape)
    # C order always (a view of an in-memory raster is not): one compiled kernel per
    # dtype, not two (numba specialises on the layout)
    vals = np.ascontiguousarray(as_float(np.asarray(block_values)))
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
    """Basins, the edges of their merges (from the saddle candidates) and the
    boundary-aware merge of one block.

    Returns ``(lab, minc, merged, pointer)``: with ``pointers``, ``pointer``
    is a copy of each cell's steepest-descent pointer inside the block (what
    :func:`descend_block` starts from; 4 bytes per cell), else None.
    """
    nr, nc = blk.nr, blk.nc
    n = nr * nc
    lab = np.empty(n, np.int32 if n < 2**31 - 1 else np.int64)
    codes, groups = (CODES8, GROUPS8) if connectivity == 8 else (CODES4, GROUPS4)
    # one pass: pointers, minima (basins numbered in raster order of their
    # minima) and saddle candidates, as the whole raster's engine makes them
    pointer = np.empty(n, _code_dtype(n)) if pointers else None
    minc, cand, cmask, _ = sweep_keeping(blk.zk, blk.zk.dtype.type(1), blk.valid, nr, nc,
                                         connectivity == 8, codes, lab,
                                         lab[:0] if pointer is None else pointer)
    resolve_all(lab)
    nb = minc.size
    emin = np.full(nb, -1, np.int64)
    term = np.zeros(nb, np.bool_)
    ea, eb, ew = _k.block_edges(blk.zk, blk.valid, blk.flags, nr, nc, lab, emin, term, cand, cmask,
                                groups)
    if outlet:
        has = np.flatnonzero(emin >= 0)
        ea = np.concatenate([ea, has])
        eb = np.concatenate([eb, np.full(has.size, nb, np.int64)])
        ew = np.concatenate([ew, emin[has]])
    order = event_order(blk.zk[ew], ew)
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
    :func:`~terrain.engine.blocked.kernels.ring_index`), -1 off the raster."""
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
    :func:`~terrain.engine.blocked.kernels.global_descend`). 4 bytes per
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


def persistence_of_keys(kind: str, bk: np.ndarray, dk: np.ndarray) -> np.ndarray:
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
    check_kind(kind, connectivity)
    outlet = bool(kind == "pits" if edge_outlet is None else edge_outlet)
    blk = prepare_block(block_values, window, shape, kind, connectivity)
    lab, minc, m, pointer = local_engine(blk, connectivity, outlet, pointers=termini)
    pb, pd, pe, esb, ese, hvb, hve = m.pb, m.pd, m.pe, m.esb, m.ese, m.hvb, m.hve
    zk = blk.zk
    f32 = blk.z.dtype == np.float32
    bk, dk = zk[pb].astype(np.float64), zk[pd].astype(np.float64)
    keep = np.ones(pb.size, bool)
    if min_persistence > 0:
        keep &= persistence_of_keys(kind, bk, dk) >= min_persistence
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


def level_inputs(blk: Block, lab, minc, m: Merged, code, ex_ring, links) -> LevelInputs:
    """The :class:`LevelInputs` of a block from its local engine, its
    descent codes (``code`` of :func:`descend_block`, turned into ``dest``
    in place) and its ``basin_links``."""
    minima = _k.descent_rows(code, blk.nr * blk.nc, minc.size)  # raster minima are local ones
    tc, tk, x, dk = _minima_links(blk, lab, minc, m, links, minima)
    return LevelInputs(code, tk, tc, x, dk, ex_ring)
