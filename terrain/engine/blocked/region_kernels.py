"""Compiled kernels of the blocked regions (see :mod:`terrain.engine.blocked_regions`).

Second pass, one block (flat row-major *local* cells; global cells where a
value leaves the block): :func:`replay` re-runs the merges at every cell of
the block where components can meet, with each component's identity and
age taken from the whole raster (the block's own union-find for components
closed inside the block, the glued merge forest for the others), and
records the region links of the components that die there;
:func:`resolve_basins` follows those links inside the block. Global step:
:func:`resolve_needs`.

A *region link* ``g -> h`` says that raster minimum ``g`` (the deepest cell
of a component that died with persistence below the merge level) belongs to
the region of raster minimum ``h`` (the minimum of the basin across the pass
where it died); ``h = -1`` is the outlet (no region). Region values are
``>= 0`` (a region id, 0 for none) or ``-(g + 1)``: "the region of minimum
``g``", not known inside this block.

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule).
.. [2] Morozov, D., Weber, G. H. (2013). Distributed merge trees. PPoPP '13,
   93-102. doi:10.1145/2442516.2442526
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..basins import before, find
from .kernels import EDGE, NOTERM, forest_root, frame_neighbour, ring_index

NOLINK = -3


@njit(cache=True, inline="always")
def _component(loc, lab, ring_vertex, parent, tt, node, minc, zk, i, voff, up, mcell, mkey, vcell,
               vkey, wk, wg, r0, c0, nc, ncols):
    """(id, key, cell) of the raster component holding cell ``loc`` (local;
    ``-(ring + 1)``: a halo cell) just before block cell ``i`` (key ``wk``,
    global cell ``wg``): id -1 for the outlet, ``r`` for a component closed
    in the block (root basin ``r``), ``nb + 1 + v`` for glued root vertex
    ``v`` (a halo cell's strip vertex, or the vertex a block component
    joined on reaching the boundary); key and cell of its deepest cell
    (its age in the elder rule)."""
    nb = minc.size
    if loc < 0:
        v = ring_vertex[-loc - 1]
    else:
        r = find(parent, -lab[loc] - 1)
        if r == nb:
            return -1, -np.inf, -1
        t = tt[r]
        if t == NOTERM or (t >= 0 and not before(zk, t, i)):
            m = minc[r]
            return r, np.float64(zk[m]), (r0 + m // nc) * ncols + c0 + m % nc
        v = voff + node[r]
    v = forest_root(up, mcell, mkey, v, wk, wg)
    if v == vcell.size - 1:
        return -1, -np.inf, -1
    return nb + 1 + v, vkey[v], vcell[v]


@njit(cache=True, inline="always")
def _minimum_of(loc, code, n, ex_ring, ring_term, r0, c0, nc, ncols):
    """Raster minimum that cell ``loc`` (local; ``-(ring + 1)``: a halo
    cell) descends to on the whole raster (global cell)."""
    if loc < 0:
        return ring_term[-loc - 1]
    c = -code[loc] - 1
    if c < n:
        return (r0 + c // nc) * ncols + c0 + c % nc
    return ring_term[ex_ring[c - n]]


@njit(cache=True, inline="always")
def _push(src, dst, nl, a, b):
    """Append link (a, b), growing the buffers by doubling."""
    if nl == src.size:
        src = np.concatenate((src, np.empty(src.size, np.int64)))
        dst = np.concatenate((dst, np.empty(dst.size, np.int64)))
    src[nl] = a
    dst[nl] = b
    return src, dst, nl + 1


@njit(cache=True, inline="always")
def _low(wk, kb, merge_level, f32):
    """The whole raster's test: dying at key ``wk`` from depth ``kb`` is
    below the merge level (or zero), computed in the raster's dtype."""
    if kb == wk:
        return True
    if f32:
        return np.float32(wk) - np.float32(kb) < merge_level
    return wk - kb < merge_level


@njit(cache=True)
def replay(zk, flags, vals, neg, hr, hc, nr, nc, hr0, hc0, ncols, dr, dc, lab, minc, tt, node,
           ly, lo, lw, term_cells, ring_vertex, voff, up, mcell, mkey, vcell, vkey, code, ex_ring,
           ring_term, outlet, merge_level, f32):
    """Region links of every component dying at a cell of the block.

    Candidate cells, in the total order: the cells of the block's merge
    log (``ly, lo, lw`` from ``local_merge``: components met there inside
    the block) and ``term_cells`` (cells with a neighbour in another block;
    sorted). At each, its earlier neighbours (halo included, ``vals`` with
    ``neg`` as in ``global_descend``) are taken in the total order; the
    cell joins the first one's component, then each later neighbour in
    another component merges by the elder rule: the younger side dies and
    hands its region across -- to the cell's own basin when the
    neighbour's side dies, to the neighbour's basin when the cell's side
    dies -- and with an outlet an edge cell finally joins it (this is
    ``persistence._merge`` with the edges ordered by ``_across_cells``).
    Components are identified on the whole raster: a block component
    closed so far is itself (root basin, via the replayed union-find);
    one that reached another block (``tt``/``node`` of ``local_merge``) is
    its glued vertex's root just before the cell in the merge forest
    (``up, mcell, mkey``, vertex ids offset by ``voff``); a halo cell is
    its strip vertex (``ring_vertex``). A link is recorded when the dying
    side's persistence is below ``merge_level`` or zero (``f32``: computed
    in float32). Targets are raster minima from ``code``/``ex_ring``/
    ``ring_term`` (``global_descend`` and the glued strip termini).

    Returns (src, dst): global cells of the dying minima and of the minima
    of the basins across (-1: the outlet).
    """
    n = nr * nc
    nb = minc.size
    r0 = hr0 + hr
    c0 = hc0 + hc
    sgn = -1.0 if neg else 1.0
    parent = np.arange(nb + 1).astype(np.int64)
    src = np.empty(64, np.int64)
    dst = np.empty(64, np.int64)
    nl = 0
    nk = np.empty(9)
    ng = np.empty(9, np.int64)
    nloc = np.empty(9, np.int64)
    seen = np.empty(10, np.int64)
    q = 0
    p = 0
    nlog = lw.size
    nterm = term_cells.size
    while q < nlog or p < nterm:
        if p >= nterm or (q < nlog and before(zk, lw[q], term_cells[p])):
            i = lw[q]
        else:
            i = term_cells[p]
        r = i // nc
        R = r + hr
        C = i - r * nc + hc
        wk = vals[R, C] * sgn
        wg = (hr0 + R) * ncols + hc0 + C
        cnt = 0
        for k in range(dr.size):
            ok, zz, gg, RR, CC = frame_neighbour(vals, sgn, R, C, k, dr, dc, hr0, hc0, ncols)
            if not ok or not (zz < wk or (zz == wk and gg < wg)):
                continue
            rr = RR - hr
            cc = CC - hc
            if 0 <= rr < nr and 0 <= cc < nc:
                loc = rr * nc + cc
            else:
                loc = -(ring_index(rr, cc, nr, nc) + 1)
            s = cnt
            while s > 0 and (nk[s - 1] > zz or (nk[s - 1] == zz and ng[s - 1] > gg)):
                nk[s] = nk[s - 1]
                ng[s] = ng[s - 1]
                nloc[s] = nloc[s - 1]
                s -= 1
            nk[s] = zz
            ng[s] = gg
            nloc[s] = loc
            cnt += 1
        cid, ck, cg = _component(nloc[0] if cnt > 0 else i, lab, ring_vertex, parent, tt, node,
                                 minc, zk, i, voff, up, mcell, mkey, vcell, vkey, wk, wg, r0, c0,
                                 nc, ncols)
        seen[0] = cid
        ns = 1
        for s in range(1, cnt):
            loc = nloc[s]
            did, dk, dg = _component(loc, lab, ring_vertex, parent, tt, node, minc, zk, i, voff, up,
                                     mcell, mkey, vcell, vkey, wk, wg, r0, c0, nc, ncols)
            known = False
            for u in range(ns):
                if seen[u] == did:
                    known = True
            if known:
                continue
            seen[ns] = did
            ns += 1
            if cid == -1 or (did != -1 and (ck < dk or (ck == dk and cg < dg))):
                yk, yg, tgt = dk, dg, i  # the neighbour's side dies: across is the cell's basin
            else:
                yk, yg, tgt = ck, cg, loc  # the cell's side dies: across is the neighbour's basin
                cid, ck, cg = did, dk, dg
            if _low(wk, yk, merge_level, f32):
                src, dst, nl = _push(src, dst, nl, yg,
                                     _minimum_of(tgt, code, n, ex_ring, ring_term, r0, c0, nc, ncols))
        if outlet and (flags[i] & EDGE) != 0 and cid != -1 and _low(wk, ck, merge_level, f32):
            # no side met here was the outlet's (cid != -1): the cell's side dies into it
            src, dst, nl = _push(src, dst, nl, cg, -1)
        while q < nlog and lw[q] == i:
            parent[ly[q]] = lo[q]
            q += 1
        if p < nterm and term_cells[p] == i:
            p += 1
    return src[:nl], dst[:nl]


@njit(cache=True, inline="always")
def _local_of(g, r0, c0, nr, nc, ncols):
    """Local cell of global cell ``g`` in the block, -1 outside."""
    r = g // ncols - r0
    c = g % ncols - c0
    if g < 0 or r < 0 or r >= nr or c < 0 or c >= nc:
        return -1
    return r * nc + c


@njit(cache=True)
def resolve_basins(lab, minc, code, src, dst, rep_cells, rep_ids, r0, c0, nr, nc, ncols):
    """Region value of every block basin whose minimum is a raster minimum,
    following the block's region links inside the block.

    ``src, dst``: the links from :func:`replay`; ``rep_cells`` (sorted,
    global) and ``rep_ids``: the regions whose minimum lies in the block.
    A basin's value is its region id, 0 when its link leads to the outlet,
    or ``-(g + 1)`` when the chain reaches minimum ``g`` whose link this
    block does not know (outside the block, or decided elsewhere).
    Returns (per-basin values, per link the value of its target).
    """
    nb = minc.size
    link = np.full(nb, NOLINK, np.int64)
    for q in range(src.size):
        ls = _local_of(src[q], r0, c0, nr, nc, ncols)
        if ls >= 0:
            link[-lab[ls] - 1] = dst[q]
    rep = np.full(nb, -1, np.int64)
    for q in range(rep_cells.size):
        rep[-lab[_local_of(rep_cells[q], r0, c0, nr, nc, ncols)] - 1] = rep_ids[q]
    res = np.zeros(nb, np.int64)
    done = np.zeros(nb, np.bool_)
    stack = np.empty(nb, np.int64)
    for b0 in range(nb):
        m0 = minc[b0]
        if done[b0] or code[m0] != -(m0 + 1):
            continue
        top = 0
        stack[0] = b0
        while top >= 0:
            b = stack[top]
            m = minc[b]
            d = link[b]
            if rep[b] >= 0:
                v = rep[b]
            elif d == NOLINK:
                v = -((r0 + m // nc) * ncols + c0 + m % nc + 1)
            elif d == -1:
                v = 0
            else:
                ld = _local_of(d, r0, c0, nr, nc, ncols)
                if ld < 0:
                    v = -(d + 1)
                else:
                    y = -lab[ld] - 1
                    if not done[y]:
                        top += 1
                        stack[top] = y
                        continue
                    v = res[y]
            res[b] = v
            done[b] = True
            top -= 1
    tv = np.empty(dst.size, np.int64)
    for q in range(dst.size):
        d = dst[q]
        ld = _local_of(d, r0, c0, nr, nc, ncols)
        tv[q] = 0 if d == -1 else (res[-lab[ld] - 1] if ld >= 0 else -(d + 1))
    return res, tv


@njit(cache=True)
def resolve_needs(needs, hsrc, hval, rep_cells, rep_ids):
    """Global step: the region id of each minimum in ``needs``, following
    the links handed up by the blocks (``hsrc`` sorted, ``hval`` region
    values) until a region's own minimum (``rep_cells`` sorted, ids
    ``rep_ids``) or a final value. Returns (ids, ok); ``ok`` is False when
    a chain breaks (a minimum neither a region nor linked)."""
    out = np.zeros(needs.size, np.int64)
    for q in range(needs.size):
        g = needs[q]
        while True:
            k = np.searchsorted(rep_cells, g)
            if k < rep_cells.size and rep_cells[k] == g:
                out[q] = rep_ids[k]
                break
            k = np.searchsorted(hsrc, g)
            if k >= hsrc.size or hsrc[k] != g:
                return out, False
            v = hval[k]
            if v >= 0:
                out[q] = v
                break
            g = -v - 1
    return out, True
