"""Isolation of summits: the distance to the nearest higher cell, without a distance transform.

The isolation of a summit cell ``s`` is the distance from ``s`` to the
nearest cell higher than it in the total order of :mod:`terrain.engine.persistence`
(higher, or as high with a smaller flat index). It is found by a best-first
branch-and-bound search over a *max pyramid* of the raster: tiles of 4 x 4
cells, then 8 x 8, ... up to one tile, each holding the highest valid
value below it and whether it holds nodata. Tiles are taken from a heap in
the order of a lower bound of their distance to ``s``; a tile whose highest
value is below ``s``'s (and that holds no nodata nearer than the best so far)
is never opened, so the search reads the cells of the 4 x 4 tiles that may
hold higher ground near the answer, not the raster (the 7 x 7 cells around
the summit are read first, which settles most small summits). Built once per
realisation (one pass; 9 bytes per tile, about 0.75 bytes per cell), the pyramid serves every
counted summit; a summit costs about the number of tiles crossing the circle
of its isolation whose highest value is at least its own (the highest summit:
its own tile chain).

Distances are metres: rows ``dy`` metres tall (per row) and cells ``dx``
metres wide (per row; on a geographic CRS the widths follow the latitude,
:meth:`terrain.dem.Dem.cell_metres`). Between cells ``(r0, c0)`` and
``(r, c)`` the north-south leg is the sum of the row heights between the
row centres and the east-west leg is ``|c - c0|`` widths of the middle row
(exact on a projected grid; on a geographic grid the local ellipsoidal
approximation, within about 0.1% of the geodesic below 100 km, which the
caller may replace by the geodesic of the cells found).

*Edge-limited*: higher ground may lie beyond the raster edge or under
nodata. The search also finds the nearest nodata cell and the nearest cell
beyond the edge; when either is nearer than the higher cell found (or no
higher cell exists, as for the highest summit) the isolation is flagged
edge-limited, and when no higher cell exists its value is the distance to
that nearest edge or nodata cell: a lower bound of the isolation on a larger
extent.

References
----------
.. [1] Samet, H. (1990). The Design and Analysis of Spatial Data Structures.
   Addison-Wesley (region quadtrees with maxima; best-first nearest-neighbour
   search, Hjaltason & Samet 1999, ACM TODS 24(2), 265-318,
   doi:10.1145/320248.320255).
.. [2] Snyder, J. P. (1987). Map Projections: A Working Manual. USGS
   Professional Paper 1395 (radii of curvature of the ellipsoid).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["LEAF", "DISK_LEAF", "Pyramid", "pyramid", "isolation"]

LEAF = 4  # side of the pyramid's finest tiles, cells
DISK_LEAF = 32  # the same for a raster on disk (the pyramid then takes 0.012 bytes per cell)
SEED = 3  # cells scanned around each summit before the search (a 7 x 7 window)


class Pyramid:
    """Max pyramid of one raster: per level a grid of tiles (``LEAF * 2**k``
    cells on a side) with the highest valid value (``-inf``: none) and a
    nodata flag, flattened level after level (``start``/``rows``/``cols``)."""

    def __init__(self, top, nod, start, rows, cols, leaf=LEAF):
        self.top, self.nod, self.start, self.rows, self.cols = top, nod, start, rows, cols
        self.leaf = leaf


@njit(cache=True)
def _leaf_level(z, r0, nr, nc, tc, top, nod, leaf):
    """Finest level from the band ``z`` (first row ``r0``): highest valid value, nodata flag.

    One tile row at a time: the column maxima and nodata flags of its rows
    first (a branch-free pass along each row, no division per cell), then
    each tile's ``leaf`` columns of them. ``v > m`` is false for NaN, so
    nodata never becomes a maximum."""
    m = np.empty(nc, np.float64)  # any input dtype: -inf and every value exact
    h = np.empty(nc, np.bool_)
    r = 0
    while r < nr:
        a = (r0 + r) // leaf
        end = min(nr, (a + 1) * leaf - r0)  # the band's rows in tile row a
        m[:] = -np.inf
        h[:] = False
        for rr in range(r, end):
            for c in range(nc):
                v = z[rr, c]
                m[c] = v if v > m[c] else m[c]
                h[c] = h[c] | (v != v)
        base = a * tc
        for t in range(tc):
            best = top[base + t]
            hole = False
            for c in range(t * leaf, min(t * leaf + leaf, nc)):
                if m[c] > best:
                    best = m[c]
                hole = hole | h[c]
            top[base + t] = best
            if hole:
                nod[base + t] = True
        r = end


@njit(cache=True)
def _coarser(top, nod, s0, r0, c0, s1, r1, c1):
    """Next level (``s1``: its start, ``r1`` x ``c1`` tiles) from the one at ``s0`` (``r0`` x ``c0``)."""
    for a in range(r0):
        for b in range(c0):
            t = s1 + (a // 2) * c1 + b // 2
            u = s0 + a * c0 + b
            if top[u] > top[t]:
                top[t] = top[u]
            nod[t] = nod[t] or nod[u]


def pyramid(z, leaf: int = LEAF) -> Pyramid:
    """The max pyramid of a 2-D float raster (NaN: nodata): an array, or
    anything read by window (``z[r0:r1, :]``, ``32 * leaf`` rows at a time),
    with finest tiles ``leaf`` cells on a side (the search's answer does not
    depend on it)."""
    nr, nc = z.shape
    dims = [(-(-nr // leaf), -(-nc // leaf))]
    while dims[-1] != (1, 1):
        r, c = dims[-1]
        dims.append((-(-r // 2), -(-c // 2)))
    sizes = [r * c for r, c in dims]
    start = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    top = np.full(int(start[-1]), -np.inf, np.float64)
    nod = np.zeros(int(start[-1]), np.bool_)
    for r0 in range(0, nr, 32 * leaf):
        band = np.ascontiguousarray(z[r0:r0 + 32 * leaf, :])  # one kernel: C order
        _leaf_level(band, r0, band.shape[0], nc, dims[0][1], top, nod, leaf)
    for k in range(1, len(dims)):
        _coarser(top, nod, start[k - 1], dims[k - 1][0], dims[k - 1][1], start[k], dims[k][0],
                 dims[k][1])
    return Pyramid(top, nod, start, np.array([d[0] for d in dims], np.int64),
                   np.array([d[1] for d in dims], np.int64), leaf)


@njit(cache=True, inline="always")
def _push(hk, hv, n, k, v):
    """Push ``(k, v)`` on the binary min-heap ``hk``/``hv`` of ``n`` entries (grown when full)."""
    if n == hk.size:
        gk = np.empty(2 * n, np.float64)
        gv = np.empty(2 * n, np.int64)
        gk[:n] = hk
        gv[:n] = hv
        hk, hv = gk, gv
    i = n
    while i > 0:
        p = (i - 1) // 2
        if hk[p] <= k:
            break
        hk[i] = hk[p]
        hv[i] = hv[p]
        i = p
    hk[i] = k
    hv[i] = v
    return hk, hv, n + 1


@njit(cache=True, inline="always")
def _pop(hk, hv, n):
    """Pop the least key of the binary min-heap: ``(key, value, n)``."""
    k, v = hk[0], hv[0]
    n -= 1
    x, y = hk[n], hv[n]
    i = 0
    while True:
        a = 2 * i + 1
        if a >= n:
            break
        if a + 1 < n and hk[a + 1] < hk[a]:
            a += 1
        if hk[a] >= x:
            break
        hk[i] = hk[a]
        hv[i] = hv[a]
        i = a
    if n > 0:
        hk[i] = x
        hv[i] = y
    return k, v, n


@njit(cache=True, inline="always")
def _gap(a0, a1, x):
    """Cells between ``x`` and the range ``a0..a1`` (0 inside)."""
    if x < a0:
        return a0 - x
    if x > a1:
        return x - a1
    return 0


@njit(cache=True, inline="always")
def _dist(ycum, dx, r0, c0, r, c):
    """Metres between cells (r0, c0) and (r, c) (module docstring)."""
    dy = ycum[r] - ycum[r0]
    w = dx[(r + r0) // 2] * (c - c0)
    return np.sqrt(dy * dy + w * w)


@njit(cache=True)
def _tile_bound(ycum, dxmin, r0, c0, ra, rb, ca, cb):
    """A lower bound of the metres from cell (r0, c0) to any cell of rows ra..rb, columns ca..cb."""
    if r0 < ra:
        dy = ycum[ra] - ycum[r0]
    elif r0 > rb:
        dy = ycum[r0] - ycum[rb]
    else:
        dy = 0.0
    w = dxmin * _gap(ca, cb, c0)
    return np.sqrt(dy * dy + w * w)


@njit(cache=True)
def _scan_leaf(z, nc, ra, rb, ca, cb, s, zs, ycum, dx, r0, c0, best):
    """Cells of one leaf tile: the nearest higher one (best[0], best[1]) and
    the nearest nodata cell (best[2])."""
    for r in range(ra, rb + 1):
        for c in range(ca, cb + 1):
            i = r * nc + c
            v = z[i]
            if np.isnan(v):
                d = _dist(ycum, dx, r0, c0, r, c)
                if d < best[2]:
                    best[2] = d
            elif v > zs or (v == zs and i < s):
                d = _dist(ycum, dx, r0, c0, r, c)
                if d < best[0] or (d == best[0] and i < best[1]):
                    best[0] = d
                    best[1] = i


@njit(cache=True)
def _search(z, nr, nc, top, nod, start, prow, pcol, leaf, s, ycum, dx, dxmin, best, hk, hv):
    """Best-first search from summit cell ``s`` (see the module docstring)."""
    r0 = s // nc
    c0 = s - r0 * nc
    zs = z[s]
    nl = start.size - 1
    best[0] = np.inf
    best[1] = -1
    best[2] = np.inf
    # seed the bound with the cells around the summit (most summits find higher ground
    # within a few cells), so the pyramid search opens only tiles nearer than that
    _scan_leaf(z, nc, max(r0 - SEED, 0), min(r0 + SEED, nr - 1), max(c0 - SEED, 0),
               min(c0 + SEED, nc - 1), s, zs, ycum, dx, r0, c0, best)
    n = 0
    hk, hv, n = _push(hk, hv, n, 0.0, nl - 1)  # the top level's one tile (index 0)
    while n > 0:
        lb, code, n = _pop(hk, hv, n)
        if lb > best[0]:
            break
        if lb >= best[2] and lb == best[0]:
            continue
        lev = code % nl
        t = code // nl
        tr = t // pcol[lev]
        tc = t - tr * pcol[lev]
        side = leaf << lev
        ra, ca = tr * side, tc * side
        rb, cb = min(ra + side, nr) - 1, min(ca + side, nc) - 1
        if lev == 0:
            _scan_leaf(z, nc, ra, rb, ca, cb, s, zs, ycum, dx, r0, c0, best)
            continue
        for a in range(2 * tr, min(2 * tr + 2, prow[lev - 1])):
            for b in range(2 * tc, min(2 * tc + 2, pcol[lev - 1])):
                u = start[lev - 1] + a * pcol[lev - 1] + b
                hs = leaf << (lev - 1)
                d = _tile_bound(ycum, dxmin, r0, c0, a * hs, min(a * hs + hs, nr) - 1, b * hs,
                                min(b * hs + hs, nc) - 1)
                higher = top[u] >= zs and d <= best[0]
                holes = nod[u] and d < best[2] and d < best[0]
                if higher or holes:
                    hk, hv, n = _push(hk, hv, n, d, (a * pcol[lev - 1] + b) * nl + lev - 1)
    return hk, hv


@njit(cache=True)
def _isolation(z, nr, nc, top, nod, start, prow, pcol, leaf, cells, ycum, dx, dxmin, out_d,
               out_c, out_n):
    """Per summit in ``cells``: the distance to the nearest higher cell (inf:
    none), that cell (-1: none) and the distance to the nearest nodata cell
    no farther (inf: none)."""
    best = np.empty(3, np.float64)
    hk = np.empty(64, np.float64)
    hv = np.empty(64, np.int64)
    for q in range(cells.size):
        hk, hv = _search(z, nr, nc, top, nod, start, prow, pcol, leaf, cells[q], ycum, dx, dxmin,
                         best, hk, hv)
        out_d[q] = best[0]
        out_c[q] = np.int64(best[1])
        out_n[q] = best[2]


def isolation(z, cells: np.ndarray, dx: np.ndarray, dy: np.ndarray, *,
              pyr: Pyramid | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Isolation of the summit cells ``cells`` of the raster ``z``.

    Parameters
    ----------
    z : (rows, cols) float array, NaN on nodata; or a raster on disk with a
        ``mapped()`` method giving it memory-mapped (:class:`terrain.io.NpyWindows`)
    cells : int array of flat row-major summit cells
    dx, dy : float arrays of length rows
        Cell width and height in metres per row (:meth:`terrain.dem.Dem.cell_metres`).
    pyr : Pyramid, optional
        ``pyramid(z)``, when already built for this raster. Default: built
        here, with :data:`DISK_LEAF` tiles for a raster on disk (small in
        memory), :data:`LEAF` ones otherwise; the answer is the same.

    Returns
    -------
    (distance_m, higher_cell, edge_limited)
        float64 metres (the distance to the nearest edge or nodata cell when
        no higher cell exists), the nearest higher cell (-1: none; ties: the
        smaller flat index) and the edge-limited flag, per summit.

    References
    ----------
    .. [1] Hjaltason, G. R., Samet, H. (1999). Distance browsing in spatial
       databases. ACM TODS 24(2), 265-318. doi:10.1145/320248.320255

    Examples
    --------
    >>> z = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 2]], dtype=np.float32)
    >>> d, c, e = isolation(z, np.array([0, 8]), np.ones(3), np.ones(3))
    >>> np.round(d, 3).tolist(), c.tolist(), e.tolist()
    ([2.828, 1.0], [8, -1], [True, True])
    """
    nr, nc = z.shape
    on_disk = hasattr(z, "mapped")
    pyr = pyr or pyramid(z, DISK_LEAF if on_disk else LEAF)
    z = z.mapped() if on_disk else np.asarray(z)
    dy = np.asarray(dy, np.float64)
    ycum = np.concatenate([[0.0], np.cumsum((dy[1:] + dy[:-1]) / 2)])
    dx = np.ascontiguousarray(dx, np.float64)
    cells = np.asarray(cells, np.int64)
    d, hole = np.empty(cells.size), np.empty(cells.size)
    c = np.empty(cells.size, np.int64)
    zf = z.reshape(-1)
    if zf.dtype not in (np.float32, np.float64):
        zf = zf.astype(np.float64)
    _isolation(zf, nr, nc, pyr.top, pyr.nod, pyr.start, pyr.rows, pyr.cols, pyr.leaf, cells,
               ycum, dx, float(dx.min()), d, c, hole)
    # the nearest cell beyond the raster edge: one row above or below, one column aside
    r0, c0 = np.divmod(cells, nc)
    edge = np.minimum.reduce([hole, ycum[r0] + dy[0], ycum[-1] + dy[-1] - ycum[r0],
                              dx[r0] * (c0 + 1), dx[r0] * (nc - c0)]) if cells.size else hole
    return np.where(c >= 0, d, edge), c, edge < d
