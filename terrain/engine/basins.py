"""Basins and union-find: the compiled building blocks of the persistence engines.

Shared by the whole-raster engine (:mod:`terrain.engine.persistence`) and the
blocked one (:mod:`terrain.engine.blocked`): the total order of cells,
steepest-descent pointers and their resolution into basins, the saddle
candidates, union-find, and the filled surface from per-basin fill levels. Cells are ordered by (key, flat
index); keys are ``z`` for pits and ``-z`` for peaks.

The whole-raster engine uses the one-sweep form: :func:`sweep` finds each
cell's descent pointer, numbers the minima and lists the *saddle
candidates* (cells whose earlier neighbours fall apart into two or more
groups around the cell, :data:`CODES8`, :data:`CODES4`) and the edge cells
in one pass; :func:`label_of` resolves a pointer chain on demand and
:func:`resolve_all` every cell. Only a candidate can be the one pass
between two basins that the union-find needs (see
:mod:`terrain.engine.persistence`). The keys are read as ``z * s`` with
``s = -1`` for peaks, so no negated copy is made.

References
----------
.. [1] Tarjan, R. E. (1975). Efficiency of a good but not linear set union
   algorithm. J. ACM 22(2), 215-225. doi:10.1145/321879.321884
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["before", "kbefore", "elder_rule", "descend",
           "find", "fill_cells", "CODES8", "CODES4", "GROUPS8", "GROUPS4", "CANDIDATE", "MINIMUM",
           "sweep", "sweep_keeping", "label_of", "resolve_all", "NOLABEL", "earlier"]


@njit(cache=True, inline="always")
def before(zk, a, b):
    """True when cell ``a`` precedes cell ``b`` in the (key, index) order."""
    za = zk[a]
    zb = zk[b]
    return za < zb or (za == zb and a < b)


@njit(cache=True, inline="always")
def kbefore(ka, a, kb, b):
    """True when (key ``ka``, cell ``a``) precedes (key ``kb``, cell ``b``) in the total order."""
    return ka < kb or (ka == kb and a < b)


@njit(cache=True, inline="always")
def elder_rule(ra, rb, out_id, key, cell):
    """The elder rule where the distinct components ``ra`` and ``rb`` meet:
    ``(old, young)``, the younger one dying there. The outlet ``out_id``
    (born at -inf) is older than every component; otherwise the one whose
    birth (key ``key[r]``, cell ``cell[r]``) comes first in the total order
    is older. Shared by the whole-raster union-find
    (:mod:`terrain.engine.persistence`) and the blocked engine's glue
    (:func:`terrain.engine.blocked.kernels.glue_merge`).

    References
    ----------
    .. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
       persistence and simplification. Discrete Comput. Geom. 28, 511-533.
       doi:10.1007/s00454-002-2885-2 (elder rule).
    """
    if ra == out_id:
        return ra, rb
    if rb == out_id:
        return rb, ra
    if kbefore(key[ra], cell[ra], key[rb], cell[rb]):
        return ra, rb
    return rb, ra


@njit(cache=True, inline="always")
def earlier(z, s, a, b):
    """True when cell ``a`` precedes cell ``b`` in the order of keys ``z * s``."""
    za = z[a] * s
    zb = z[b] * s
    return za < zb or (za == zb and a < b)


@njit(cache=True)
def descend_inner(zk, nr, nc, conn8, lab):
    """Pass 1 on interior cells of a raster without nodata (unrolled).

    Neighbours are visited in ascending flat index with the cell itself in
    its place, so a strict ``<`` breaks ties by index. Rows are read through
    views indexed from 0 up (see :func:`_fast_row`: no wraparound, so the
    vectorised loop's overlap check covers only the rows read).
    """
    for r in range(1, nr - 1):
        o = r * nc
        up = zk[o - nc:o]
        mid = zk[o:o + nc]
        dn = zk[o + nc:o + 2 * nc]
        out = lab[o:o + nc]
        for c in range(1, nc - 1):
            i = o + c
            if conn8:
                bi = i - nc - 1
                bz = up[c - 1]
                bz, bi = (up[c], i - nc) if up[c] < bz else (bz, bi)
                bz, bi = (up[c + 1], i - nc + 1) if up[c + 1] < bz else (bz, bi)
            else:
                bi = i - nc
                bz = up[c]
            bz, bi = (mid[c - 1], i - 1) if mid[c - 1] < bz else (bz, bi)
            bz, bi = (mid[c], i) if mid[c] < bz else (bz, bi)
            bz, bi = (mid[c + 1], i + 1) if mid[c + 1] < bz else (bz, bi)
            if conn8:
                bz, bi = (dn[c - 1], i + nc - 1) if dn[c - 1] < bz else (bz, bi)
            bz, bi = (dn[c], i + nc) if dn[c] < bz else (bz, bi)
            if conn8:
                bz, bi = (dn[c + 1], i + nc + 1) if dn[c + 1] < bz else (bz, bi)
            out[c] = bi


@njit(cache=True)
def descend(zk, valid, has_nodata, nr, nc, dr, dc, lab):
    """Pass 1: each valid cell points to its lowest neighbour in the total
    order, itself included (a cell pointing to itself is a local minimum)."""
    fast = not has_nodata and nr >= 3 and nc >= 3
    if fast:
        descend_inner(zk, nr, nc, dr.size == 8, lab)
    nn = dr.size
    for r in range(nr):
        step = nc - 1 if (fast and 0 < r < nr - 1) else 1
        for c in range(0, nc, max(step, 1)):
            i = r * nc + c
            if not valid[i]:
                continue
            bi = i
            bz = zk[i]
            for k in range(nn):
                rr = r + dr[k]
                cc = c + dc[k]
                if rr < 0 or rr >= nr or cc < 0 or cc >= nc:
                    continue
                j = rr * nc + cc
                if valid[j]:
                    zj = zk[j]
                    if zj < bz or (zj == bz and j < bi):
                        bz = zj
                        bi = j
            lab[i] = bi


@njit(cache=True, inline="always")
def find(parent, a):
    """Union-find root of ``a``, compressing the path."""
    root = a
    while parent[root] != root:
        root = parent[root]
    while parent[a] != root:
        nxt = parent[a]
        parent[a] = root
        a = nxt
    return root


@njit(cache=True)
def fill_cells(zf, valid, lab, level, out):
    """Filled surface: max(z, the fill level of the cell's basin); NaN on nodata."""
    for i in range(zf.size):
        if valid[i]:
            lv = level[-lab[i] - 1]
            out[i] = lv if lv > zf[i] else zf[i]
        else:
            out[i] = np.nan


# ----------------------------------------------------------------------------
# one-sweep form (whole raster)
# ----------------------------------------------------------------------------
#: The 8 neighbours of a cell in ascending flat-index order (bit k of a mask).
_RING = ((-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1))
#: Label of a nodata cell (below every basin label).
NOLABEL = np.iinfo(np.int32).min


def _groups(conn: int) -> tuple[np.ndarray, np.ndarray]:
    """Per 8-bit mask of the neighbours earlier than a cell (bit k: neighbour
    k of :data:`_RING`), how its earlier filtration neighbours (all 8, or
    the 4 edge neighbours) fall into groups joined through earlier cells
    around it (adjacency: 8-neighbours for 8, edge neighbours for 4).

    Returns the code (:data:`MINIMUM` when there is no group,
    :data:`CANDIDATE` for two or more, else 0) and one neighbour of each
    group (ring positions, -1 padded, 4 columns).
    """
    codes = np.zeros(256, np.uint8)
    reps = np.full((256, 4), -1, np.int8)
    for m in range(256):
        cells = [k for k in range(8) if m >> k & 1]
        parent = {k: k for k in cells}

        def root(a, parent=parent):
            while parent[a] != a:
                a = parent[a]
            return a

        for a in cells:
            for b in cells:
                dr = abs(_RING[a][0] - _RING[b][0])
                dc = abs(_RING[a][1] - _RING[b][1])
                if (max(dr, dc) == 1) if conn == 8 else (dr + dc == 1):
                    parent[root(a)] = root(b)
        ends = cells if conn == 8 else [k for k in cells if k in (1, 3, 4, 6)]
        first = {}
        for k in ends:
            first.setdefault(root(k), k)
        codes[m] = MINIMUM if not first else CANDIDATE if len(first) >= 2 else 0
        reps[m, :len(first)] = sorted(first.values())
    return codes, reps


CANDIDATE = 1
MINIMUM = 2
#: :func:`_groups` for 8- and 4-connectivity: the code of each mask, and
#: one earlier neighbour per group.
CODES8, GROUPS8 = _groups(8)
CODES4, GROUPS4 = _groups(4)


@njit(cache=True, inline="always")
def _grow(a, n, extra):
    """``a`` with room for ``n + extra`` entries (doubled when short)."""
    if n + extra <= a.size:
        return a
    b = np.empty(max(2 * a.size, n + extra), a.dtype)
    b[:n] = a[:n]
    return b


@njit(cache=True, inline="always")
def _slow_cell(z, s, valid, i, r, c, nr, nc, conn8):
    """Earlier-neighbour mask, lowest earlier filtration neighbour (or ``i``)
    and edge flag of valid cell (r, c), with every bounds and nodata test."""
    zi = z[i] * s
    m = 0
    best = i
    bz = zi
    edge = r == 0 or c == 0 or r == nr - 1 or c == nc - 1
    for k in range(8):
        if k < 3:
            rr = r - 1
        elif k < 5:
            rr = r
        else:
            rr = r + 1
        cc = c + (k == 2 or k == 4 or k == 7) - (k == 0 or k == 3 or k == 5)
        filt = conn8 or k == 1 or k == 3 or k == 4 or k == 6
        if rr < 0 or rr >= nr or cc < 0 or cc >= nc:
            continue
        j = rr * nc + cc
        if not valid[j]:
            edge = edge or filt
            continue
        zj = z[j] * s
        if zj < zi or (zj == zi and k < 4):
            m |= 1 << k
            if filt and (best == i or zj < bz):
                best = j
                bz = zj
    return m, best, edge


@njit(cache=True, inline="always")
def _fast_row(z, s, o, nc, conn8, lab, mrow):
    """Interior cells of the row starting at flat index ``o`` whose 3 x 3
    neighbourhoods are all valid: pointer to the lowest of the cell and its
    filtration neighbours (ties by index: neighbours come in ascending flat
    index with the cell in its place, and only a strictly lower one wins)
    into ``lab``, mask of earlier neighbours into ``mrow``. No branches, so
    the compiler vectorises it.

    The three rows are read through views indexed from 0 up: an index the
    compiler can prove non-negative needs no negative-index wraparound, so
    its runtime check that ``lab`` and ``z`` do not overlap covers only the
    rows read. (With ``z[i - nc - 1]`` the check spanned twice ``z``'s
    length, and a ``lab`` that the allocator placed just past ``z`` sent the
    row to the scalar loop, at half the speed.)"""
    up = z[o - nc:o]
    mid = z[o:o + nc]
    dn = z[o + nc:o + 2 * nc]
    out = lab[o:o + nc]
    for c in range(1, nc - 1):
        zi = mid[c] * s
        a0 = up[c - 1] * s
        a1 = up[c] * s
        a2 = up[c + 1] * s
        a3 = mid[c - 1] * s
        a4 = mid[c + 1] * s
        a5 = dn[c - 1] * s
        a6 = dn[c] * s
        a7 = dn[c + 1] * s
        i = o + c
        if conn8:
            best = i - nc - 1
            bz = a0
            best, bz = (i - nc, a1) if a1 < bz else (best, bz)
            best, bz = (i - nc + 1, a2) if a2 < bz else (best, bz)
        else:
            best = i - nc
            bz = a1
        best, bz = (i - 1, a3) if a3 < bz else (best, bz)
        best, bz = (i, zi) if zi < bz else (best, bz)
        best, bz = (i + 1, a4) if a4 < bz else (best, bz)
        if conn8:
            best, bz = (i + nc - 1, a5) if a5 < bz else (best, bz)
            best, bz = (i + nc, a6) if a6 < bz else (best, bz)
            best = i + nc + 1 if a7 < bz else best
        else:
            best = i + nc if a6 < bz else best
        out[c] = best
        mrow[c] = ((a0 <= zi) + 2 * (a1 <= zi) + 4 * (a2 <= zi) + 8 * (a3 <= zi)
                   + 16 * (a4 < zi) + 32 * (a5 < zi) + 64 * (a6 < zi) + 128 * (a7 < zi))


@njit(cache=True, inline="always")
def _full_rows(valid, nr, nc):
    """Per row, whether every cell of it is valid."""
    rowok = np.empty(nr, np.bool_)
    for r in range(nr):
        ok = True
        for i in range(r * nc, r * nc + nc):
            ok = ok and valid[i]
        rowok[r] = ok
    return rowok


@njit(cache=True)
def sweep(z, s, valid, nr, nc, conn8, codes, lab):
    """One pass over the cells: descent pointers, minima, saddle candidates
    (:func:`sweep_keeping` keeping no raw pointers).

    ``lab[i]`` receives the steepest-descent pointer of valid cell ``i``
    (its lowest neighbour in the total order of keys ``z * s``, ties by
    index) or, for a local minimum, ``-(basin + 1)`` with basins numbered
    in raster order; nodata cells get :data:`NOLABEL`. ``codes`` is
    :data:`CODES8` or :data:`CODES4`. Returns ``minc`` (the cell of each
    basin's minimum), ``cand`` (the saddle candidates, raster order), their
    masks of earlier neighbours and ``edge`` (cells on the raster edge or
    next to nodata, raster order).
    Rows whose 3 x 3 neighbourhoods are all valid go through
    :func:`_fast_row` (vectorised), then a scan of its masks; the rest
    through :func:`_slow_cell`. Memory: the labels (4 bytes per cell) and
    8 bytes per minimum, candidate (9) and edge cell.
    """
    return sweep_keeping(z, s, valid, nr, nc, conn8, codes, lab, lab[:0])


@njit(cache=True)
def sweep_keeping(z, s, valid, nr, nc, conn8, codes, lab, pointer):
    """:func:`sweep`; with ``pointer`` of ``nr * nc`` entries (else empty),
    also each valid cell's raw steepest-descent pointer there (itself for a
    local minimum): :func:`descend`'s pointers, from the same pass
    (nodata cells are left as they are)."""
    keep = pointer.size > 0
    n = nr * nc
    minc = np.empty(max(64, n // 64), np.int64)
    cand = np.empty(max(64, n // 32), np.int64)
    cmask = np.empty(cand.size, np.uint8)
    edge = np.empty(max(64, 2 * (nr + nc)), np.int64)
    mrow = np.zeros(nc, np.uint8)
    nmin = 0
    ncand = 0
    nedge = 0
    rowok = _full_rows(valid, nr, nc)
    for r in range(nr):
        minc = _grow(minc, nmin, nc)
        cand = _grow(cand, ncand, nc)
        cmask = _grow(cmask, ncand, nc)
        edge = _grow(edge, nedge, nc)
        o = r * nc
        fast = 0 < r < nr - 1 and nc >= 3 and rowok[r - 1] and rowok[r] and rowok[r + 1]
        if fast:
            _fast_row(z, s, o, nc, conn8, lab, mrow)
            if keep:
                pointer[o + 1:o + nc - 1] = lab[o + 1:o + nc - 1]
        for c in range(nc):
            i = o + c
            if fast and 0 < c < nc - 1:
                m = mrow[c]
                code = codes[m]
            elif valid[i]:
                m, best, is_edge = _slow_cell(z, s, valid, i, r, c, nr, nc, conn8)
                lab[i] = best
                if keep:
                    pointer[i] = best
                code = codes[m]
                if is_edge:
                    edge[nedge] = i
                    nedge += 1
            else:
                lab[i] = NOLABEL
                continue
            if code == MINIMUM:
                minc[nmin] = i
                nmin += 1
                lab[i] = -nmin
                continue
            if code == CANDIDATE:
                cand[ncand] = i
                cmask[ncand] = m
                ncand += 1
            # an earlier target already holds its label or a pointer to a later
            # cell: take it, so pointers left over point forward
            p = lab[i]
            q = lab[p]
            lab[i] = q if p < i else p
    return minc[:nmin], cand[:ncand], cmask[:ncand], edge[:nedge]


@njit(cache=True, inline="always")
def label_of(lab, x):
    """The label ``-(basin + 1)`` of valid cell ``x``, following its descent
    pointers and compressing the path (after :func:`sweep`)."""
    root = lab[x]
    if root < 0:
        return root
    k = root
    while True:
        root = lab[k]
        if root < 0:
            break
        k = root
    k = x
    while True:
        nxt = lab[k]
        if nxt < 0:
            break
        lab[k] = root
        k = nxt
    return root


@njit(cache=True)
def resolve_all(lab):
    """Every valid cell's label ``-(basin + 1)`` (after :func:`sweep`), in place.

    Backwards through the raster: the sweep leaves most pointers pointing to
    later cells, whose labels are then already final (one read each); the
    others follow their chain (:func:`label_of`).
    """
    for i in range(lab.size - 1, -1, -1):
        x = lab[i]
        if x >= 0:
            y = lab[x]
            lab[i] = y if y < 0 else label_of(lab, x)
