"""Compiled kernels of the blocked engine (see :mod:`terrain.engine.blocked`).

Local step (one block, flat row-major *local* indices; inside one block the
local order of cells equals their global order, so ties break the same way):
:func:`cell_flags`, :func:`block_boundaries`, :func:`local_merge`,
:func:`basin_links`. Global step (flat *global* indices): :func:`cross_edges`,
:func:`glue_merge`.

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

from .basins import before, find, upsert

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
    When ``all_valid`` only the block's outer ring can carry a flag.
    """
    if all_valid:
        flags[:] = 0
        for r in range(nr):
            step = 1 if (r == 0 or r == nr - 1) else max(nc - 1, 1)
            for c in range(0, nc, step):
                flags[r * nc + c] = _flag_cell(vh, r, c, nr, nc, hr, hc, sides, dr, dc)
        return
    for r in range(nr):
        for c in range(nc):
            if vh[r + hr, c + hc]:
                flags[r * nc + c] = _flag_cell(vh, r, c, nr, nc, hr, hc, sides, dr, dc)
            else:
                flags[r * nc + c] = 0


@njit(cache=True)
def block_boundaries(zk, valid, flags, has_nodata, nr, nc, fr, fc, lab, nb, emin, term, cap):
    """Lowest pass between every two adjacent basins of one block.

    As ``persistence._boundaries`` (every neighbour pair inside the block
    visited once, an edge weighs its later cell, an open-addressing table
    keeps the lowest per basin pair) with the edge test read from ``flags``:
    ``emin`` receives each basin's first ``EDGE`` cell and ``term`` is set
    for basins holding a ``TERM`` cell. Returns (a, b, w, ok); ``ok`` is
    False when the table of ``cap`` slots filled past half.
    """
    hk = np.full(cap, -1, np.int64)
    hw = np.empty(cap, np.int64)
    hz = np.empty(cap, zk.dtype)
    used = 0
    nf = fr.size
    conn8 = nf == 4
    fast = not has_nodata and nc >= 3
    for r in range(nr):
        last_row = r == nr - 1
        for c in range(nc):
            i = r * nc + c
            if not valid[i]:
                continue
            li = lab[i]
            if fast and not last_row and 0 < c < nc - 1:
                j = i + 1
                if lab[j] != li:
                    used += upsert(zk, hk, hw, hz, nb, i, j, li, lab[j])
                if conn8:
                    j = i + nc - 1
                    if lab[j] != li:
                        used += upsert(zk, hk, hw, hz, nb, i, j, li, lab[j])
                j = i + nc
                if lab[j] != li:
                    used += upsert(zk, hk, hw, hz, nb, i, j, li, lab[j])
                if conn8:
                    j = i + nc + 1
                    if lab[j] != li:
                        used += upsert(zk, hk, hw, hz, nb, i, j, li, lab[j])
            else:
                for k in range(nf):
                    rr = r + fr[k]
                    cc = c + fc[k]
                    if rr >= nr or cc < 0 or cc >= nc:
                        continue
                    j = rr * nc + cc
                    if valid[j] and lab[j] != li:
                        used += upsert(zk, hk, hw, hz, nb, i, j, li, lab[j])
            if 2 * used > cap:
                return hk[:0], hk[:0], hk[:0], False
            f = flags[i]
            if f:
                b0 = -li - 1
                if f & TERM:
                    term[b0] = True
                if f & EDGE:
                    e = emin[b0]
                    if e < 0 or zk[i] < zk[e] or (zk[i] == zk[e] and i < e):
                        emin[b0] = i
    ea = np.empty(used, np.int64)
    eb = np.empty(used, np.int64)
    ew = np.empty(used, np.int64)
    q = 0
    for t in range(hk.size):
        if hk[t] >= 0:
            ea[q] = hk[t] // nb
            eb[q] = hk[t] - ea[q] * nb
            ew[q] = hw[t]
            q += 1
    return ea, eb, ew, True


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
    ly = np.empty(nb + 1, np.int64)
    lo = np.empty(nb + 1, np.int64)
    lw = np.empty(nb + 1, np.int64)
    npairs = 0
    ne_h = 0
    nlog = 0
    for t in range(ew.size):
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
            hu[:ne_h], hv[:ne_h], hw[:ne_h], tt, node, ly[:nlog], lo[:nlog], lw[:nlog])


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
@njit(cache=True, inline="always")
def _kbefore(ka, ia, kb, ib):
    """True when the cell (key ``ka``, index ``ia``) precedes (``kb``, ``ib``)."""
    return ka < kb or (ka == kb and ia < ib)


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
            if _kbefore(ka[j], ia, kb[m], ib):
                w, wk, wf = ib, kb[m], fb[m]
            else:
                w, wk, wf = ia, ka[j], fa[j]
            key = min(a, b) * nv + max(a, b)
            s = ((key ^ (key >> 29)) * 0x5BD1E995) & mask
            while True:
                if hk[s] == key:
                    if _kbefore(wk, w, hz[s], hw[s]):
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
    edge-limited), essential classes (cell, key, edge-limited) and, per
    vertex, the cell and key at which its component joins the outlet
    (-1: never).
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
        if ra == out_id:
            old, young = ra, rb
        elif rb == out_id:
            old, young = rb, ra
        elif _kbefore(vkey[ra], vcell[ra], vkey[rb], vcell[rb]):
            old, young = ra, rb
        else:
            old, young = rb, ra
        e = eff[young]
        if vkey[young] != wk:
            pb[npairs] = vcell[young]
            pbk[npairs] = vkey[young]
            pd[npairs] = w
            pdk[npairs] = wk
            pe[npairs] = (e >= 0 and _kbefore(effk[young], e, wk, w)) or ewf[t]
            npairs += 1
        if e >= 0:
            ek = effk[young]
            if _kbefore(ek, e, wk, w):
                e, ek = w, wk
            if eff[old] < 0 or _kbefore(ek, e, effk[old], eff[old]):
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
    return (pb[:npairs], pbk[:npairs], pd[:npairs], pdk[:npairs], pe[:npairs], esb, esk, ese,
            jcell, jkey)
