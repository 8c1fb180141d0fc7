"""Compiled kernels of the blocked engine (see :mod:`terrain.engine.blocked`).

Local step (one block, flat row-major *local* indices; inside one block the
local order of cells equals their global order, so ties break the same way):
:func:`cell_flags`, :func:`block_edges`, :func:`local_merge`,
:func:`basin_links`, :func:`global_descend` (steepest descent over the whole
raster's neighbourhood, read from the halo), :func:`depression_roots`,
:func:`descent_rows`.
Global step (flat *global* indices): :func:`cross_edges`, :func:`glue_merge`,
:func:`follow_exits`, :func:`levels_and_depths`, :func:`forest_root`.

Conventions: a *time* is a cell, compared in the total order (key, index);
``-1`` stands for "before every cell" (-inf) where a time may be absent.
In the reduced graph handed up by a block, vertex id ``OUT`` (-1) is the
virtual outlet and ``NOTERM`` (-2) marks "no vertex / never on a boundary".

References
----------
.. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees. PPoPP '13,
   93-102. doi:10.1145/2442516.2442526
.. [2] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ..basins import before, descend, elder_rule, find, kbefore

EDGE = 1  # cell on the raster edge or next to nodata
TERM = 2  # valid cell with a valid neighbour in another block
OUT = -1
NOTERM = -2


# ----------------------------------------------------------------------------
# local step
# ----------------------------------------------------------------------------
@njit(cache=True, inline="always")
def _flag_cell(vh, r, c, nr, nc, hr, hc, sides, dr, dc):
    """``EDGE``/``TERM`` bits of valid block cell (r, c); see :func:`cell_flags`."""
    hnr, hnc = vh.shape
    f = 0
    if (r == 0 and sides[0]) or (r == nr - 1 and sides[1]) or \
            (c == 0 and sides[2]) or (c == nc - 1 and sides[3]):
        f = EDGE
    for k in range(dr.size):
        rr = r + dr[k]
        cc = c + dc[k]
        hrr = rr + hr
        hcc = cc + hc
        if hrr < 0 or hrr >= hnr or hcc < 0 or hcc >= hnc:
            continue  # off the raster
        if not vh[hrr, hcc]:
            f |= EDGE
        elif rr < 0 or rr >= nr or cc < 0 or cc >= nc:
            f |= TERM
    return f


@njit(cache=True)
def cell_flags(vh, nr, nc, hr, hc, sides, dr, dc, all_valid, flags):
    """Per block cell: ``EDGE`` (raster edge or a nodata neighbour) and
    ``TERM`` (a valid neighbour in another block), read from the validity
    ``vh`` of the block plus its one-cell halo.

    The block's cell (r, c) is ``vh[r + hr, c + hc]``; ``sides`` tells which
    of the block's top, bottom, left and right sides lie on the raster edge.
    Only the block's outer ring and the cells next to a nodata cell of the
    block can carry a flag (an inner cell's neighbours are all in the
    block): the ring is read cell by cell, then each nodata cell marks its
    valid inner neighbours ``EDGE`` (neighbourhoods are symmetric), unless
    ``all_valid``. Nodata cells get 0.
    """
    flags[:] = 0
    for r in range(nr):
        step = 1 if (r == 0 or r == nr - 1) else max(nc - 1, 1)
        for c in range(0, nc, step):
            if vh[r + hr, c + hc]:
                flags[r * nc + c] = _flag_cell(vh, r, c, nr, nc, hr, hc, sides, dr, dc)
    if all_valid:
        return
    for r in range(nr):
        for c in range(nc):
            if vh[r + hr, c + hc]:
                continue
            for k in range(dr.size):
                rr = r + dr[k]
                cc = c + dc[k]
                if 0 < rr < nr - 1 and 0 < cc < nc - 1 and vh[rr + hr, cc + hc]:
                    flags[rr * nc + cc] = EDGE


@njit(cache=True)
def block_edges(zk, valid, flags, nr, nc, lab, emin, term, cand, cmask, groups):
    """The merges' edges of one block, from its saddle candidates.

    Only a saddle candidate (:func:`terrain.engine.basins.sweep_keeping`, the
    block read as a raster of its own) can join two components: the earlier
    neighbours of any other cell are one component before it enters. Each
    candidate ``w`` gives an edge, weighing ``w``, from its own basin to the
    basin of one neighbour of each group of its earlier neighbours (its own
    basin and basins already listed left out), as the whole-raster engine's
    events do (:func:`terrain.engine.persistence._gather_groups`); the
    union-find meets the same merges as with every basin pair's lowest
    pass, in a fraction of the time. ``emin`` receives each basin's first
    ``EDGE`` cell and ``term`` is set for basins holding a ``TERM`` cell.
    ``lab`` holds every valid cell's label ``-(basin + 1)``. Returns
    (a, b, w) in candidate order.
    """
    n = nr * nc
    for i in range(n):
        f = flags[i]
        if f and valid[i]:
            b0 = -lab[i] - 1
            if f & TERM:
                term[b0] = True
            if f & EDGE:
                e = emin[b0]
                if e < 0 or zk[i] < zk[e] or (zk[i] == zk[e] and i < e):
                    emin[b0] = i
    ring = np.array([-nc - 1, -nc, -nc + 1, -1, 1, nc - 1, nc, nc + 1])
    ea = np.empty(3 * cand.size, np.int64)
    eb = np.empty(3 * cand.size, np.int64)
    ew = np.empty(3 * cand.size, np.int64)
    q = 0
    for t in range(cand.size):
        w = cand[t]
        m = np.int64(cmask[t])
        a = -lab[w] - 1
        q0 = q
        for g in range(4):
            k = groups[m, g]
            if k < 0:
                break
            b = -lab[w + ring[k]] - 1
            dup = b == a
            for v in range(q0, q):
                dup = dup or eb[v] == b
            if not dup:
                ea[q] = a
                eb[q] = b
                ew[q] = w
                q += 1
    return ea[:q], eb[:q], ew[:q]


@njit(cache=True, inline="always")
def _later(zk, e, w):
    """The later of cell ``e`` (-1: none) and cell ``w``; -1 when ``e`` is none."""
    if e < 0:
        return -1
    return w if before(zk, e, w) else e


@njit(cache=True)
def local_merge(zk, flags, minc, emin, term, ea, eb, ew):
    """Elder-rule union-find over the basins of one block, boundary-aware.

    Edges come sorted in the total order of their weight cell; basin
    ``nb = minc.size`` is the virtual outlet (born at -inf, on the
    boundary of every block). A component is *terminal* once it holds a
    basin with a ``TERM`` cell or the outlet. When two components meet at
    ``w`` the younger one dies there for good if it is not terminal (no
    cell outside the block can reach it, and the other one is older than
    it whatever joins it outside): the pair is final. Otherwise the merge
    is handed up as an edge of the reduced graph, whose vertices are the
    terminal basins plus the birth basin of every older, non-terminal
    component that joins a terminal one.

    ``eff`` is a component's first edge cell, each one counted from the
    time it joined (the later of the cell and the merge): a pair dying at
    ``w`` is edge-limited when ``eff < w`` or ``w`` is an edge cell, which
    judges it on its component just before ``w`` whatever the merge order.

    Returns final pairs (pb, pd, pe), essential classes of non-terminal
    components (esb, ese), the reduced graph: vertex basins and first edge
    cells (hvb, hve), edges (hu, hv, hw) in vertex ids (``OUT``: outlet),
    and per basin the time its component became terminal (``tt``:
    ``NOTERM`` never, -1 from birth) with the vertex it then joined
    (``node``), and the merge log (ly, lo, lw) that :func:`basin_links` reads.
    """
    nb = minc.size
    out_id = nb
    parent = np.arange(nb + 1).astype(np.int64)
    eff = np.full(nb + 1, -1, np.int64)
    eff[:nb] = emin
    tt = np.full(nb + 1, NOTERM, np.int64)
    node = np.full(nb + 1, NOTERM, np.int64)
    nt = 0
    for b in range(nb):
        if term[b]:
            nt += 1
    hvb = np.empty(nt + nb, np.int64)
    hve = np.empty(nt + nb, np.int64)
    nv = 0
    for b in range(nb):
        if term[b]:
            tt[b] = -1
            node[b] = nv
            hvb[nv] = b
            hve[nv] = emin[b]
            nv += 1
    tt[out_id] = -1
    node[out_id] = OUT
    hu = np.empty(nb + 1, np.int64)
    hv = np.empty(nb + 1, np.int64)
    hw = np.empty(nb + 1, np.int64)
    pb = np.empty(nb, np.int64)
    pd = np.empty(nb, np.int64)
    pe = np.empty(nb, np.bool_)
    pel = np.empty(nb, np.int64)  # relations: each final pair's elder (see below)
    g0 = 0
    ly = np.empty(nb + 1, np.int64)
    lo = np.empty(nb + 1, np.int64)
    lw = np.empty(nb + 1, np.int64)
    npairs = 0
    ne_h = 0
    nlog = 0
    for t in range(ew.size):
        if t > 0 and ew[t] != ew[t - 1]:
            _elders(parent, tt, node, minc, out_id, find(parent, ea[t - 1]), pel, g0, npairs)
            g0 = npairs
        w = ew[t]
        ra = find(parent, ea[t])
        rb = find(parent, eb[t])
        if ra == rb:
            continue
        if ra == out_id:
            old, young = ra, rb
        elif rb == out_id:
            old, young = rb, ra
        elif before(zk, minc[ra], minc[rb]):
            old, young = ra, rb
        else:
            old, young = rb, ra
        ey = _later(zk, eff[young], w)
        if tt[young] == NOTERM:
            # final: the younger component never reaches another block
            b = minc[young]
            if zk[b] != zk[w]:
                pb[npairs] = b
                pd[npairs] = w
                e = eff[young]
                pe[npairs] = (e >= 0 and before(zk, e, w)) or (flags[w] & EDGE) != 0
                npairs += 1
            if ey >= 0 and tt[old] != NOTERM and old != out_id:
                x = node[old]
                if hve[x] < 0 or before(zk, ey, hve[x]):
                    hve[x] = ey
        elif tt[old] == NOTERM:
            # an older closed component joins a terminal one: its birth goes up
            hvb[nv] = old
            hve[nv] = eff[old]
            hu[ne_h] = nv
            hv[ne_h] = node[young]
            hw[ne_h] = w
            ne_h += 1
            nv += 1
            tt[old] = w
            node[old] = node[young]
        else:
            hu[ne_h] = node[old]
            hv[ne_h] = node[young]
            hw[ne_h] = w
            ne_h += 1
        if ey >= 0 and (eff[old] < 0 or before(zk, ey, eff[old])):
            eff[old] = ey
        parent[young] = old
        ly[nlog] = young
        lo[nlog] = old
        lw[nlog] = w
        nlog += 1
    if ew.size:
        _elders(parent, tt, node, minc, out_id, find(parent, ea[ew.size - 1]), pel, g0, npairs)
    ness = 0
    for b in range(nb):
        if parent[b] == b and tt[b] == NOTERM:
            ness += 1
    esb = np.empty(ness, np.int64)
    ese = np.empty(ness, np.bool_)
    q = 0
    for b in range(nb):
        if parent[b] == b and tt[b] == NOTERM:
            esb[q] = minc[b]
            ese[q] = eff[b] >= 0
            q += 1
    return (pb[:npairs], pd[:npairs], pe[:npairs], esb, ese, hvb[:nv], hve[:nv],
            hu[:ne_h], hv[:ne_h], hw[:ne_h], tt, node, ly[:nlog], lo[:nlog], lw[:nlog],
            pel[:npairs])


@njit(cache=True)
def _elders(parent, tt, node, minc, out_id, root, pel, g0, g1):
    """Relations: the elder of final pairs ``g0:g1`` (one death cell), from
    the root of the component holding it once every local merge there is
    made: its birth cell (a closed component), -1 (the outlet), or
    ``-2 - vertex`` when the component reaches another block (the glued
    merge forest resolves it, :func:`elder_roots`)."""
    if root == out_id:
        e = -1
    elif tt[root] == NOTERM:
        e = minc[root]
    else:
        e = -2 - node[root]
    for q in range(g0, g1):
        pel[q] = e


@njit(cache=True)
def elder_roots(up, mcell, mkey, v, wk, wc, out_id, vcell, out):
    """Relations: per entry the birth cell of vertex ``v[q]``'s glued
    component once every merge at cell (``wk[q]``, ``wc[q]``) is made (-1:
    the outlet): the merge forest climbed while merges come at or before it."""
    for q in range(v.size):
        x = v[q]
        while up[x] >= 0 and (mkey[x] < wk[q] or (mkey[x] == wk[q] and mcell[x] <= wc[q])):
            x = up[x]
        out[q] = -1 if x == out_id else vcell[x]


@njit(cache=True)
def basin_links(zk, tt, node, ly, lo, lw, nb):
    """Per basin, the time its component first became terminal and a vertex
    of the reduced graph it was then connected to.

    Returns (T, X): ``T`` a local cell (-1: from birth, ``NOTERM``: never)
    and ``X`` a vertex id (``OUT``: the outlet). Every per-cell quantity that
    depends on the global resolution of a component at a level (the fill
    level; later, a region id) is then a function of ``T`` and the resolved
    value of ``X``. The merge log is read backwards, so each component's
    answer is known before the components merged into it ask for it.
    """
    T = np.full(nb, NOTERM, np.int64)
    X = np.full(nb, NOTERM, np.int64)
    for b in range(nb):
        if tt[b] != NOTERM:
            T[b] = tt[b]
            X[b] = node[b]
    for q in range(ly.size - 1, -1, -1):
        y = ly[q]
        if tt[y] != NOTERM:
            continue
        o = lo[q]
        w = lw[q]
        if tt[o] != NOTERM:
            # o's component held a boundary cell at tt[o] (-1: from birth)
            T[y] = w if (tt[o] < 0 or before(zk, tt[o], w)) else tt[o]
            X[y] = node[o]
        else:
            T[y] = T[o]
            X[y] = X[o]
    return T, X


@njit(cache=True)
def fill_levels(zk, T, X, jcell, jkey, r0, c0, nc, ncols):
    """Per basin of a block, the elevation at which it joins the outlet.

    The join is the later of ``T`` (local cell; -1: -inf) and the resolved
    join of vertex ``X`` (global cell ``jcell`` with key ``jkey``; -1:
    never; ``OUT``: the outlet itself, -inf). Local cell ``t`` is global
    cell ``(r0 + t // nc) * ncols + c0 + t % nc``. -inf when never.
    """
    nb = T.size
    out = np.full(nb, -np.inf)
    for b in range(nb):
        x = X[b]
        if x == NOTERM:
            continue
        t = T[b]
        if x == OUT:
            if t >= 0:
                out[b] = zk[t]
            continue
        jc = jcell[x]
        if jc < 0:
            continue
        jk = jkey[x]
        if t >= 0:
            tk = zk[t]
            tc = (r0 + t // nc) * ncols + c0 + t % nc
            if jk < tk or (jk == tk and jc < tc):
                out[b] = tk
                continue
        out[b] = jk
    return out


# ----------------------------------------------------------------------------
# global step
# ----------------------------------------------------------------------------
@njit(cache=True)
def cross_edges(va, ka, fa, base_a, vb, kb, fb, base_b, stride, conn8, nv):
    """Edges between two facing strips of boundary cells of adjacent blocks.

    Cell ``j`` of strip a is global cell ``base_a + j * stride`` with
    reduced-graph vertex ``va[j]`` (-1: none), key ``ka[j]`` and edge flag
    ``fa[j]``; likewise strip b. Cell ``j`` of a faces cells ``j - 1, j,
    j + 1`` of b (8-connectivity) or ``j`` (4-connectivity). An edge weighs
    its later cell; an open-addressing table keeps the lowest edge per
    vertex pair (Kruskal: only that one can merge the two). Returns
    (a, b, w, key of w, edge flag of w).
    """
    n = va.size
    nd = 3 if conn8 else 1
    cap = 16
    while cap < 2 * n * nd:
        cap *= 2
    mask = cap - 1
    hk = np.full(cap, -1, np.int64)
    hw = np.empty(cap, np.int64)
    hz = np.empty(cap, np.float64)
    hf = np.empty(cap, np.bool_)
    used = 0
    for j in range(n):
        a = va[j]
        if a < 0:
            continue
        for d in range(nd):
            m = j + d - 1 if conn8 else j
            if m < 0 or m >= n:
                continue
            b = vb[m]
            if b < 0:
                continue
            ia = base_a + j * stride
            ib = base_b + m * stride
            if kbefore(ka[j], ia, kb[m], ib):
                w, wk, wf = ib, kb[m], fb[m]
            else:
                w, wk, wf = ia, ka[j], fa[j]
            key = min(a, b) * nv + max(a, b)
            s = ((key ^ (key >> 29)) * 0x5BD1E995) & mask
            while True:
                if hk[s] == key:
                    if kbefore(wk, w, hz[s], hw[s]):
                        hz[s] = wk
                        hw[s] = w
                        hf[s] = wf
                    break
                if hk[s] < 0:
                    hk[s] = key
                    hz[s] = wk
                    hw[s] = w
                    hf[s] = wf
                    used += 1
                    break
                s = (s + 1) & mask
    oa = np.empty(used, np.int64)
    ob = np.empty(used, np.int64)
    ow = np.empty(used, np.int64)
    ok = np.empty(used, np.float64)
    of = np.empty(used, np.bool_)
    q = 0
    for s in range(cap):
        if hk[s] >= 0:
            oa[q] = hk[s] // nv
            ob[q] = hk[s] - oa[q] * nv
            ow[q] = hw[s]
            ok[q] = hz[s]
            of[q] = hf[s]
            q += 1
    return oa, ob, ow, ok, of


@njit(cache=True)
def glue_merge(vcell, vkey, veff, veffk, ea, eb, ew, ewk, ewf):
    """Elder-rule union-find over the glued reduced graphs of all blocks.

    Vertex ``vcell.size - 1`` is the outlet (born at -inf). Edges come
    sorted by (key, cell) of their weight cell. First edge cells follow the
    same rule as in :func:`local_merge` (each counted from the time it
    joined). Returns pairs (birth cell, birth key, death cell, death key,
    edge-limited), essential classes (cell, key, edge-limited), per
    vertex the cell and key at which its component joins the outlet
    (-1: never), and the merge forest: per vertex the root it died into
    (``up``, -1: never died) and the cell and key of that merge. The
    component of a vertex just before cell ``w`` is found by climbing the
    forest while merges come before ``w`` (:func:`forest_root`).
    """
    nv = vcell.size
    out_id = nv - 1
    parent = np.arange(nv).astype(np.int64)
    eff = veff.copy()
    effk = veffk.copy()
    pb = np.empty(nv, np.int64)
    pd = np.empty(nv, np.int64)
    pbk = np.empty(nv, np.float64)
    pdk = np.empty(nv, np.float64)
    pe = np.empty(nv, np.bool_)
    ly = np.empty(nv, np.int64)
    lo = np.empty(nv, np.int64)
    lt = np.empty(nv, np.int64)
    npairs = 0
    nlog = 0
    for t in range(ew.size):
        w = ew[t]
        wk = ewk[t]
        ra = find(parent, ea[t])
        rb = find(parent, eb[t])
        if ra == rb:
            continue
        old, young = elder_rule(ra, rb, out_id, vkey, vcell)
        e = eff[young]
        if vkey[young] != wk:
            pb[npairs] = vcell[young]
            pbk[npairs] = vkey[young]
            pd[npairs] = w
            pdk[npairs] = wk
            pe[npairs] = (e >= 0 and kbefore(effk[young], e, wk, w)) or ewf[t]
            npairs += 1
        if e >= 0:
            ek = effk[young]
            if kbefore(ek, e, wk, w):
                e, ek = w, wk
            if eff[old] < 0 or kbefore(ek, e, effk[old], eff[old]):
                eff[old] = e
                effk[old] = ek
        parent[young] = old
        ly[nlog] = young
        lo[nlog] = old
        lt[nlog] = t
        nlog += 1
    ness = 0
    for v in range(out_id):
        if parent[v] == v:
            ness += 1
    esb = np.empty(ness, np.int64)
    esk = np.empty(ness, np.float64)
    ese = np.empty(ness, np.bool_)
    q = 0
    for v in range(out_id):
        if parent[v] == v:
            esb[q] = vcell[v]
            esk[q] = vkey[v]
            ese[q] = eff[v] >= 0
            q += 1
    # join with the outlet, read backwards: the outlet is always its
    # component's root, so a vertex joins when its root first hangs below it
    jt = np.full(nv, -1, np.int64)
    for q in range(nlog - 1, -1, -1):
        jt[ly[q]] = lt[q] if lo[q] == out_id else jt[lo[q]]
    jcell = np.full(nv, -1, np.int64)
    jkey = np.full(nv, np.nan)
    for v in range(nv):
        if jt[v] >= 0:
            jcell[v] = ew[jt[v]]
            jkey[v] = ewk[jt[v]]
    # the merge forest: each vertex hangs below the root it died into, at that cell
    up = np.full(nv, -1, np.int64)
    mcell = np.full(nv, -1, np.int64)
    mkey = np.full(nv, np.inf)
    for q in range(nlog):
        up[ly[q]] = lo[q]
        mcell[ly[q]] = ew[lt[q]]
        mkey[ly[q]] = ewk[lt[q]]
    return (pb[:npairs], pbk[:npairs], pd[:npairs], pdk[:npairs], pe[:npairs], esb, esk, ese,
            jcell, jkey, up, mcell, mkey)


# ----------------------------------------------------------------------------
# steepest descent across block lines, fill levels and depression depths
# ----------------------------------------------------------------------------
@njit(cache=True, inline="always")
def ring_index(rr, cc, nr, nc):
    """Position of halo cell (rr, cc) (block coordinates, outside the block)
    in the block's halo ring: the row above (cc = -1..nc), the row below,
    then the column left (rr = 0..nr-1) and the column right; length
    ``2 * (nc + 2) + 2 * nr``."""
    if rr < 0:
        return cc + 1
    if rr >= nr:
        return nc + 3 + cc
    if cc < 0:
        return 2 * (nc + 2) + rr
    return 2 * (nc + 2) + nr + rr


@njit(cache=True, inline="always")
def _point(code, ex_ring, ne, i, r, c, bR, bC, hr, hc, nr, nc):
    """Record cell ``i``'s lowest neighbour at frame (bR, bC) in ``code``
    (self, block cell or exit); returns the number of exits."""
    rr = bR - hr
    cc = bC - hc
    if rr == r and cc == c:
        code[i] = -(i + 1)
    elif 0 <= rr < nr and 0 <= cc < nc:
        code[i] = rr * nc + cc
    else:
        code[i] = -(nr * nc + 1 + ne)
        ex_ring[ne] = ring_index(rr, cc, nr, nc)
        ne += 1
    return ne


@njit(cache=True, inline="always")
def frame_neighbour(vals, sgn, R, C, k, dr, dc, hr0, hc0, ncols):
    """Neighbour ``k`` of frame cell (R, C): (valid, key, global cell, row,
    column); not valid when off the frame (the raster) or nodata."""
    RR = R + dr[k]
    CC = C + dc[k]
    if RR < 0 or RR >= vals.shape[0] or CC < 0 or CC >= vals.shape[1]:
        return False, 0.0, -1, RR, CC
    zz = vals[RR, CC] * sgn
    return np.isfinite(zz), zz, (hr0 + RR) * ncols + hc0 + CC, RR, CC


@njit(cache=True)
def _ring_pointer(vals, sgn, R, C, hr0, hc0, ncols, dr, dc):
    """Frame (row, column) of the lowest neighbour of frame cell (R, C), itself
    included, in the total order (key, global index)."""
    bz = vals[R, C] * sgn
    bg = (hr0 + R) * ncols + hc0 + C
    bR = R
    bC = C
    for k in range(dr.size):
        ok, zz, gg, RR, CC = frame_neighbour(vals, sgn, R, C, k, dr, dc, hr0, hc0, ncols)
        if ok and (zz < bz or (zz == bz and gg < bg)):
            bz = zz
            bg = gg
            bR = RR
            bC = CC
    return bR, bC


@njit(cache=True)
def global_descend(zk, valid, has_nodata, vals, neg, hr, hc, nr, nc, hr0, hc0, ncols, dr, dc,
                   code, ex_ring, pointed=False):
    """Steepest descent of a block's cells on the whole raster, resolved to
    where each chain ends inside the block.

    Each valid cell points to its lowest neighbour in the total order (key,
    global index), itself included -- exactly ``basins.descend`` on the
    whole raster, so chains that stay in the block follow the raster's own
    basins. Cells off the block's outer ring see only block cells, so
    ``basins.descend`` on the block (``zk``, ``valid``) gives their pointer;
    the outer ring is redone with the halo: ``vals`` holds the block plus
    halo (NaN: nodata; ``neg``: the key is ``-vals``), block cell (r, c) is
    ``vals[r + hr, c + hc]`` and frame cell (R, C) is global cell
    ``(hr0 + R) * ncols + hc0 + C``. ``code[i]`` ends as ``-(t + 1)`` when
    the chain of cell ``i`` ends at block cell ``t`` with no lower
    neighbour (a minimum of the raster), ``-(n + 1 + e)`` when it leaves
    the block at exit ``e`` (a block cell whose lowest neighbour is the
    halo cell at ring position ``ex_ring[e]``, see :func:`ring_index`),
    ``-(2 n + 1)`` on nodata. Returns the number of exits. With ``pointed``,
    ``code`` already holds the pointers of ``basins.descend`` on the block.
    """
    n = nr * nc
    sgn = -1.0 if neg else 1.0
    if not pointed:
        descend(zk, valid, has_nodata, nr, nc, dr, dc, code)
    # the outer ring first (its codes set whole: self, block cell or exit), so
    # one forward pass can then mark the rest and start every chain
    ne = 0
    for r in range(nr):
        step = 1 if (r == 0 or r == nr - 1) else max(nc - 1, 1)
        for c in range(0, nc, step):
            i = r * nc + c
            if valid[i]:
                bR, bC = _ring_pointer(vals, sgn, r + hr, c + hc, hr0, hc0, ncols, dr, dc)
                ne = _point(code, ex_ring, ne, i, r, c, bR, bC, hr, hc, nr, nc)
    # every chain to its end: forward, nodata and minima marked and a pointer
    # to an earlier cell takes what that cell holds (its end, or a pointer to
    # a later cell); then backward, most pointers reach a cell already ended
    # (one read), the rest are followed
    for i in range(n):
        p = code[i]
        if not valid[i]:
            code[i] = -(2 * n + 1)
        elif p == i:
            code[i] = -(i + 1)
        elif 0 <= p < i:
            code[i] = code[p]
    for i in range(n - 1, -1, -1):
        p = code[i]
        if p >= 0:
            q = code[p]
            if q < 0:
                code[i] = q
                continue
            k = p
            while code[k] >= 0:
                k = code[k]
            end = code[k]
            k = i
            while code[k] >= 0:
                nxt = code[k]
                code[k] = end
                k = nxt
    return ne


@njit(cache=True)
def descent_rows(code, n, most):
    """Turn the codes of :func:`global_descend` into rows of a table, in place.

    The raster minima of the block (cells whose chain ends at themselves;
    at most ``most``, the block's local minima) get rows ``0..m-1`` in cell
    order, the exits rows ``m + e``; each cell gets the row of where its
    chain ends, -1 on nodata. Returns the minima (local cells, the table's
    first ``m`` rows). No temporary per cell.
    """
    minima = np.empty(most, np.int64)
    m = 0
    for i in range(n):
        if code[i] == -(i + 1):
            code[i] = m
            minima[m] = i
            m += 1
    minima = minima[:m]
    for i in range(n):
        v = code[i]
        if v >= 0:
            continue  # a minimum, numbered above
        c = -v - 1
        if c < n:
            code[i] = code[c]
        elif c < 2 * n:
            code[i] = m + c - n
        else:
            code[i] = -1
    return minima


@njit(cache=True)
def depression_roots(zk, minc, ly, lo, lw, T, basins):
    """Per basin in ``basins``: the key of the deepest cell of its component
    among the cells strictly below the key of ``T[b]`` (the time its
    component first reached the block boundary, :func:`basin_links`), read
    from the local merge log. Up to that time the component is closed, so
    this is the whole raster's answer; for ``T[b] < 0`` the basin's own
    minimum is returned (unused)."""
    nb = minc.size
    up = np.full(nb + 1, -1, np.int64)
    mt = np.full(nb + 1, -1, np.int64)
    for q in range(ly.size):
        up[ly[q]] = lo[q]
        mt[ly[q]] = lw[q]
    out = np.empty(basins.size)
    for k in range(basins.size):
        a = basins[k]
        t = T[a]
        if t >= 0:
            lim = zk[t]
            while up[a] >= 0 and up[a] != nb and zk[mt[a]] < lim:
                a = up[a]
        out[k] = zk[minc[a]]
    return out


@njit(cache=True, inline="always")
def forest_root(up, mcell, mkey, v, wk, wc):
    """Root of vertex ``v``'s glued component just before cell (``wk``,
    ``wc``): climb the merge forest while the merge comes earlier."""
    while up[v] >= 0 and (mkey[v] < wk or (mkey[v] == wk and mcell[v] < wc)):
        v = up[v]
    return v


@njit(cache=True)
def levels_and_depths(tk, tc, xv, dk, jcell, jkey, up, mkey, vkey, level, depth):
    """Per depression root: the fill level and the depth of its depression.

    Entry ``q`` describes a raster minimum by its component's time of first
    reaching a block boundary (global cell ``tc[q]`` with key ``tk[q]``; -1:
    from birth; ``NOTERM``: never), the reduced-graph vertex it then joined
    (global id ``xv[q]``; ``OUT``: the outlet) and ``dk[q]`` from
    :func:`depression_roots`. The level is the later of that time and the
    vertex's join with the outlet (as :func:`fill_levels`); the depth is
    level minus the deepest key of the component among the cells strictly
    below the level: the glued component's root (the merge forest climbed
    while merges lie below the level) when the component had reached the
    boundary below the level, else ``dk[q]``. Both -inf when the minimum
    never drains (as ``persistence._fill_levels``).
    """
    for q in range(tk.size):
        x = xv[q]
        lv = -np.inf
        if x == OUT:
            if tc[q] >= 0:
                lv = tk[q]
        elif x >= 0 and jcell[x] >= 0:
            jk = jkey[x]
            if tc[q] >= 0 and (jk < tk[q] or (jk == tk[q] and jcell[x] < tc[q])):
                lv = tk[q]
            else:
                lv = jk
        level[q] = lv
        if lv == -np.inf:
            depth[q] = -np.inf
        elif tc[q] < 0 or tk[q] < lv:
            v = x
            while up[v] >= 0 and mkey[v] < lv:
                v = up[v]
            depth[q] = lv - vkey[v]
        else:
            depth[q] = lv - dk[q]


@njit(cache=True)
def follow_exits(out, nxt):
    """Resolve chains between boundary cells, in place: ``out[e] >= 0`` is
    a raster minimum, -1 nodata, < -1 an exit continuing at entry
    ``nxt[e]``; each entry ends as the minimum its chain ends at (chains
    of steepest descent are acyclic)."""
    for e in range(out.size):
        if out[e] >= -1:
            continue
        k = e
        while out[k] < -1:
            k = nxt[k]
        end = out[k]
        k = e
        while out[k] < -1:
            x = nxt[k]
            out[k] = end
            k = x


@njit(cache=True)
def per_cell(code, lab, n, bval, xval, fill, out):
    """Per cell, a value of where its steepest descent ends: ``bval`` of the
    block basin holding the chain's minimum, or ``xval`` of its exit;
    ``fill`` on nodata (``code`` from :func:`global_descend`)."""
    for i in range(n):
        c = -code[i] - 1
        if c < n:
            out[i] = bval[-lab[c] - 1]
        elif c < 2 * n:
            out[i] = xval[c - n]
        else:
            out[i] = fill
