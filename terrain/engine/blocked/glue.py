"""The global step: the blocks' reduced graphs and the cross-block edges through
the same elder rule (:func:`glue`), the merge forest, the boundary cells'
minima, and the final pairs gathered in the order of ``pairs()`` (:func:`collect`).

See :mod:`terrain.engine.blocked` for the algorithm and its memory.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ...errors import OptionError
from ..persistence import Pairs
from . import elders  # relations: the elder of each pair
from . import kernels as _k
from .local import persistence_of_keys
from .summaries import BlockSummary, Boundary, Forest, Minima, Resolution
from .windows import BOTTOM, LEFT, RIGHT, TOP


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


def empty_pairs(kind: str) -> Pairs:
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
        keep = persistence_of_keys(kind, pbk, pdk) >= min_persistence
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
