"""Basins and union-find: the compiled building blocks of the persistence engines.

Shared by the whole-raster engine (:mod:`terrain.engine.persistence`) and the
blocked one (:mod:`terrain.engine.blocked`): the total order of cells,
steepest-descent pointers and their resolution into basins, the
open-addressing table of lowest passes between basins, union-find, and the
filled surface from per-basin fill levels. Cells are ordered by (key, flat
index); keys are ``z`` for pits and ``-z`` for peaks.

References
----------
.. [1] Tarjan, R. E. (1975). Efficiency of a good but not linear set union
   algorithm. J. ACM 22(2), 215-225. doi:10.1145/321879.321884
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["before", "lower", "descend", "resolve", "hslot", "upsert", "find", "fill_cells"]


@njit(cache=True, inline="always")
def before(zk, a, b):
    """True when cell ``a`` precedes cell ``b`` in the (key, index) order."""
    za = zk[a]
    zb = zk[b]
    return za < zb or (za == zb and a < b)


@njit(cache=True, inline="always")
def lower(zk, bz, bi, j):
    """The lower of (value ``bz``, cell ``bi``) and cell ``j`` (ties keep ``bi``)."""
    zj = zk[j]
    if zj < bz:
        return zj, j
    return bz, bi


@njit(cache=True)
def descend_inner(zk, nr, nc, conn8, lab):
    """Pass 1 on interior cells of a raster without nodata (unrolled).

    Neighbours are visited in ascending flat index with the cell itself in
    its place, so a strict ``<`` breaks ties by index.
    """
    for r in range(1, nr - 1):
        for i in range(r * nc + 1, r * nc + nc - 1):
            if conn8:
                bi = i - nc - 1
                bz = zk[bi]
                bz, bi = lower(zk, bz, bi, i - nc)
                bz, bi = lower(zk, bz, bi, i - nc + 1)
            else:
                bi = i - nc
                bz = zk[bi]
            bz, bi = lower(zk, bz, bi, i - 1)
            bz, bi = lower(zk, bz, bi, i)
            bz, bi = lower(zk, bz, bi, i + 1)
            if conn8:
                bz, bi = lower(zk, bz, bi, i + nc - 1)
            bz, bi = lower(zk, bz, bi, i + nc)
            if conn8:
                bz, bi = lower(zk, bz, bi, i + nc + 1)
            lab[i] = bi


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


@njit(cache=True)
def resolve(valid, lab):
    """Pass 2: number the minima and label every cell ``-(basin + 1)``.

    Returns the cell of each basin's minimum.
    """
    n = lab.size
    cap = max(16, n // 64)
    minc = np.empty(cap, np.int64)
    nb = 0
    for i in range(n):
        if not valid[i]:
            continue
        j = lab[i]
        if j < 0:
            continue
        if j < i:  # target already resolved: the common case
            lab[i] = lab[j]
            continue
        k = i
        while True:
            x = lab[k]
            if x < 0:
                root = x
                break
            if x == k:  # an unnumbered minimum
                if nb == cap:
                    cap *= 2
                    grown = np.empty(cap, np.int64)
                    grown[:nb] = minc[:nb]
                    minc = grown
                minc[nb] = k
                nb += 1
                root = -nb
                lab[k] = root
                break
            k = x
        k = i
        while lab[k] >= 0:
            nxt = lab[k]
            lab[k] = root
            k = nxt
    return minc[:nb]


@njit(cache=True, inline="always")
def hslot(a, b, mask):
    """Home slot of basin pair (a, b) in the open-addressing table."""
    # each basin's partners share a small region of the table: basins met
    # together in raster order stay together in cache
    return (a * 8 + (b & 7)) & mask


@njit(cache=True, inline="always")
def upsert(zk, hk, hw, hz, nb, i, j, li, lj):
    """Record edge (i, j) between basins; returns 1 when a new pair is added."""
    zi = zk[i]
    zj = zk[j]
    if zj < zi or (zj == zi and j < i):
        w = i
        zw = zi
    else:
        w = j
        zw = zj
    a = -li - 1
    b = -lj - 1
    if a > b:
        a, b = b, a
    key = a * nb + b
    mask = hk.size - 1
    s = hslot(a, b, mask)
    while True:
        kk = hk[s]
        if kk == key:
            if zw < hz[s] or (zw == hz[s] and w < hw[s]):
                hz[s] = zw
                hw[s] = w
            return 0
        if kk < 0:
            hk[s] = key
            hz[s] = zw
            hw[s] = w
            return 1
        s = (s + 1) & mask


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
