"""Exact 0-dimensional persistence pairs of a raster: peaks and pits.

Peaks come from the superlevel-set filtration (a summit is born, it dies at
its key col when it merges with an older, higher summit); pits from the
sublevel-set filtration (a pit dies at its spill point). Both are computed by
one engine that works on a sublevel filtration of a key array (``z`` for pits,
``-z`` for peaks).

Algorithm
---------
1. *Descent* (raster order): every valid cell points to its lowest neighbour
   that comes earlier in the total order; cells with none are local minima and
   open a basin.
2. *Labels* (raster order): pointer chains are followed and compressed so each
   cell holds its basin id.
3. *Candidates* (raster order): only a cell with an earlier neighbour in
   another basin (or, with an outlet, a cell on the edge or next to nodata) can
   merge components; such cells are collected.
4. *Merging*: candidates are ordered by (value, index) -- for float32 by one
   sort of a 64-bit key packing the order-preserving float bits with the cell
   index -- and merged with an elder-rule union-find over basins.

This is the usual union-find computation of 0-dimensional persistence with
the elder rule; steps 1-3 contract each steepest-descent basin to one node,
which keeps the random-access merging to basin boundaries and makes the
remaining passes sequential in memory.

Total order and ties
--------------------
Cells are ordered by (key, flat row-major index); for peaks the key is
``-z``, so of two equally high cells the one with the smaller flat index is
the higher. A plateau therefore has one well-defined summit (peaks) or pit
(pits): its first cell in raster order. Pairs of zero persistence (for
example a pit on the raster edge when the edge is an outlet) are not
reported. ``-0.0`` equals ``+0.0``. NaN, +-inf and masked cells are nodata:
they are never born and never merge.

Memory
------
Beyond the input: 4 bytes per cell of labels (8 above 2**31 cells), 4 bytes
per cell for the negated copy when ``kind="peaks"``, 8-16 bytes per
*candidate* cell (a few per cent of cells on real terrain, at most all cells
on white noise) and about 40 bytes per basin.

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule, 0-dimensional pairing).
.. [2] Tarjan, R. E. (1975). Efficiency of a good but not linear set union
   algorithm. J. ACM 22(2), 215-225. doi:10.1145/321879.321884
.. [3] Grimaud, M. (1992). New measure of contrast: the dynamics. Proc. SPIE
   1769 (dynamics of a minimum equals its persistence).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

from ..errors import OptionError
from .basins import before, descend, fill_cells, find, resolve, upsert
from .grid import forward_offsets, is_edge, neighbour, offsets

__all__ = ["Pairs", "pairs", "Fill", "pits_and_levels", "pairs_and_fill", "count_ponding",
           "AREA_QUANTUM", "VOLUME_QUANTUM", "Regions", "regions", "KINDS"]

KINDS = ("peaks", "pits")


@dataclass(frozen=True)
class Pairs:
    """0-dimensional persistence pairs of one raster.

    All arrays have one entry per pair. Cell indices are flat row-major.

    Attributes
    ----------
    kind : str
        ``"peaks"`` or ``"pits"``.
    birth : ndarray of int64
        Summit cell (peaks) or pit cell (pits).
    death : ndarray of int64
        Key col (peaks) or spill point (pits); ``-1`` for an essential class.
    birth_value, death_value : ndarray of float64
        Elevations at the two cells (``death_value`` is NaN when essential).
    persistence : ndarray of float64
        Prominence within the raster (peaks) or depth below the spill point
        (pits); ``inf`` for an essential class.
    edge_limited : ndarray of bool
        The feature's region at its death level touches the raster edge or
        nodata, so its figure may change on a larger extent. Precisely: the
        component of the birth cell among the cells strictly before the death
        cell in the total order holds a cell on the raster edge or next to
        nodata, or the death cell is such a cell (for an essential class: its
        component does). This is a property of the pair alone.
    """

    kind: str
    birth: np.ndarray
    death: np.ndarray
    birth_value: np.ndarray
    death_value: np.ndarray
    persistence: np.ndarray
    edge_limited: np.ndarray

    def __len__(self) -> int:
        return int(self.birth.size)

    @property
    def essential(self) -> np.ndarray:
        """Boolean array, True for pairs that never die (``death == -1``)."""
        return self.death < 0


# ----------------------------------------------------------------------------
# compiled kernels
# ----------------------------------------------------------------------------
@njit(cache=True)
def _boundaries(zk, valid, has_nodata, nr, nc, dr, dc, fr, fc, lab, nb, emin, cap):
    """Pass 3: lowest pass between every two adjacent basins.

    Every undirected neighbour pair is visited once (forward offsets
    ``fr, fc``); an edge between basins weighs its later cell in the total
    order, and an open-addressing table keeps the lowest weight per basin
    pair (only that edge can ever merge the two: Kruskal's argument).
    ``emin`` receives each basin's first cell (in the order) on the raster
    edge or next to nodata. Returns arrays (a, b, w) and False when the
    table of ``cap`` slots (a power of two) filled past half: call again
    with a larger one.
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
            border = r == 0 or c == 0 or last_row or c == nc - 1
            if border or (has_nodata and is_edge(valid, r, c, nr, nc, dr, dc)):
                b0 = -li - 1
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
def _rfind(rpar, a):
    """Region union-find root of basin ``a`` (path halving)."""
    while rpar[a] != a:
        rpar[a] = rpar[rpar[a]]
        a = rpar[a]
    return a


@njit(cache=True)
def _merge(zk, valid, nr, nc, dr, dc, minc, emin, ea, eb, ew, outlet, merge_level):
    """Pass 4: elder-rule union-find over basins, edges in total order.

    Basin ``nb`` is the virtual outlet (born at -inf). Edges that share their
    weight cell ``w`` form one group: every component dying at ``w`` is
    judged on the component it was just before ``w`` entered the filtration
    (its first edge cell ``emin`` is updated only when the group ends), so a
    pair's ``edge_limited`` flag does not depend on the order in which
    several components meeting at one cell are merged.

    With ``merge_level >= 0`` it also builds the persistence-simplified
    watershed: a component dying with persistence below ``merge_level`` (or
    zero) hands its region to the basin across the pass it dies at (the
    outlet's region is "none"); ``rpar`` is that region union-find over
    basins and ``pair_of[b]`` the pair at which root basin ``b`` died. For
    regions the edges of a group must come ordered by the cell across
    (:func:`_across_cells`, outlet last): which basin is "across" when
    several components meet at one cell depends on that order.

    Returns the pairs, per basin the cell at which its component joined the
    outlet (-1: never) and the root basin of that component, ``rpar`` and
    ``pair_of``.
    """
    nb = minc.size
    out_id = nb
    parent = np.arange(nb + 1).astype(np.int64)
    rpar = np.arange(nb + 1).astype(np.int64)
    pair_of = np.full(nb + 1, -1, np.int64)
    up = np.full(nb + 1, -1, np.int64)
    mt = np.full(nb + 1, -1, np.int64)
    pb = np.empty(nb, np.int64)
    pd = np.empty(nb, np.int64)
    pe = np.empty(nb, np.bool_)
    pend_old = np.empty(nb + 1, np.int64)
    pend_young = np.empty(nb + 1, np.int64)
    npairs = 0
    ne = ew.size
    t = 0
    while t < ne:
        w = ew[t]
        r = w // nc
        w_edge = is_edge(valid, r, w - r * nc, nr, nc, dr, dc)
        npend = 0
        while t < ne and ew[t] == w:
            ra = find(parent, ea[t])
            rb = find(parent, eb[t])
            t += 1
            if ra == rb:
                continue
            # elder rule: the younger component dies at w
            if ra == out_id:
                old, young = ra, rb
            elif rb == out_id:
                old, young = rb, ra
            elif before(zk, minc[ra], minc[rb]):
                old, young = ra, rb
            else:
                old, young = rb, ra
            b = minc[young]
            if zk[b] != zk[w]:
                e = emin[young]
                pb[npairs] = b
                pd[npairs] = w
                pe[npairs] = (e >= 0 and not before(zk, w, e)) or w_edge
                pair_of[young] = npairs
                npairs += 1
            if merge_level >= 0 and (zk[b] == zk[w] or zk[w] - zk[b] < merge_level):
                across = eb[t - 1] if young == ra else ea[t - 1]
                rpar[young] = _rfind(rpar, across)
            parent[young] = old
            up[young] = old
            mt[young] = w
            pend_old[npend] = old
            pend_young[npend] = young
            npend += 1
        # the group at w is done: components now include what merged at w
        for q in range(npend):
            old = pend_old[q]
            if old == out_id:
                continue
            eo = emin[old]
            ey = emin[pend_young[q]]
            if ey >= 0 and (eo < 0 or before(zk, ey, eo)):
                emin[old] = ey
    esb, ese = _essential(parent, minc, emin)
    join, jroot = _joins(zk, up, mt, nb, out_id, outlet)
    return pb[:npairs], pd[:npairs], pe[:npairs], esb, ese, join, jroot, rpar, pair_of


@njit(cache=True)
def _across_cells(zk, valid, lab, nr, nc, dr, dc, ea, eb, ew, nb):
    """Per edge, the rank of the cell across its pass cell ``w``, for ordering.

    Every edge weighing ``w`` joins ``w``'s own basin to the basin of an
    earlier neighbour of ``w``; the cell across is the earliest neighbour
    of ``w`` in that other basin. Returns, per edge, that cell's rank among
    ``w``'s neighbours in the total order (0 = lowest); edges to the outlet
    (``eb == nb``) rank last. Sorting a pass cell's edges by it makes the
    merges at one cell follow the neighbours in the total order, the same
    as visiting the cells one by one.
    """
    out = np.empty(ew.size, np.int64)
    nn = dr.size
    for t in range(ew.size):
        if eb[t] == nb:
            out[t] = nn
            continue
        w = ew[t]
        r = w // nc
        c = w - r * nc
        hub = -lab[w] - 1
        other = eb[t] if ea[t] == hub else ea[t]
        best = -1
        for k in range(nn):
            j = neighbour(r, c, k, nr, nc, dr, dc)
            if j >= 0 and valid[j] and -lab[j] - 1 == other and (best < 0 or before(zk, j, best)):
                best = j
        rank = 0
        for k in range(nn):
            j = neighbour(r, c, k, nr, nc, dr, dc)
            rank += j >= 0 and j != best and valid[j] and before(zk, j, best)
        out[t] = rank
    return out


@njit(cache=True)
def _essential(parent, minc, emin):
    """Essential classes: surviving roots that never met the outlet, with
    their edge flag."""
    nb = minc.size
    ness = 0
    for b in range(nb):
        if parent[b] == b:
            ness += 1
    esb = np.empty(ness, np.int64)
    ese = np.empty(ness, np.bool_)
    q = 0
    for b in range(nb):
        if parent[b] == b:
            esb[q] = minc[b]
            ese[q] = emin[b] >= 0
            q += 1
    return esb, ese


@njit(cache=True)
def _joins(zk, up, mt, nb, out_id, outlet):
    """Per basin: the cell at which its component joined the outlet (-1:
    never), and the root basin of the depression it lies in: the oldest
    component it reached by merges strictly below that level (its minimum is
    the depression's deepest cell). Depressions that only touch at the spill
    level stay apart, as their ponded cells do."""
    join = np.full(nb, -1, np.int64)
    droot = np.full(nb, -1, np.int64)
    if outlet:
        for b in range(nb):
            a = b
            while up[a] >= 0 and up[a] != out_id:
                a = up[a]
            if up[a] == out_id:
                join[b] = mt[a]
                level = zk[mt[a]]
                a = b
                while up[a] != out_id and zk[mt[a]] < level:
                    a = up[a]
                droot[b] = a
    return join, droot


@njit(cache=True)
def _fill_levels(zf, join, jroot, minc):
    """Per basin, the elevation at which it joins the outlet (-inf: never),
    and the depth of the filled depression it lies in (its deepest cell
    below that level; -inf: none)."""
    level = np.full(join.size, -np.inf)
    depth = np.full(join.size, -np.inf)
    for b in range(join.size):
        if join[b] >= 0:
            level[b] = zf[join[b]]
            depth[b] = level[b] - zf[minc[jroot[b]]]
    return level, depth


#: Ponded areas and volumes are summed in fixed point: each cell adds its area
#: and volume rounded to these quanta (2**-16 m^2, 2**-12 m^3) as int64, so a
#: region's sum is exact and the same in any order -- whole raster or block by
#: block (float sums would differ in the last bits). Largest sums: 1.4e14 m^2
#: and 2.2e15 m^3.
AREA_QUANTUM = 2.0 ** -16
VOLUME_QUANTUM = 2.0 ** -12


@njit(cache=True)
def count_ponding(zf, valid, lab, level, depth, min_depth, counts, region, area_row, nc,
                  r_area, r_volume):
    """Ponding of one filled surface, counted in place.

    A cell is ponded when it lies below its depression's fill level and the
    depression is at least ``min_depth`` deep (its deepest cell below the
    spill level). Adds 1 to ``counts`` at ponded cells; when ``region`` (per
    cell, 0 = none) is not empty, also adds each ponded cell's area
    (``area_row`` per row) and its water volume (depth x area) to ``r_area``
    and ``r_volume`` of its region, int64 arrays in units of
    :data:`AREA_QUANTUM` and :data:`VOLUME_QUANTUM` (exact in any order).
    ``lab``, ``level`` and ``depth`` come from :func:`pits_and_levels`; no
    dense temporary is made.
    """
    with_regions = region.size > 0
    for i in range(zf.size):
        if valid[i]:
            b = -lab[i] - 1
            d = level[b] - zf[i]
            if d > 0 and depth[b] >= min_depth:
                counts[i] += 1
                if with_regions:
                    r = region[i]
                    if r > 0:
                        a = area_row[i // nc]
                        r_area[r] += np.int64(np.round(a / AREA_QUANTUM))
                        r_volume[r] += np.int64(np.round(d * a / VOLUME_QUANTUM))


# ----------------------------------------------------------------------------
# public API
# ----------------------------------------------------------------------------
def _prepare(z, kind, connectivity, mask):
    if kind not in KINDS:
        raise OptionError(f"kind must be one of {KINDS}, got {kind!r}")
    if connectivity not in (4, 8):
        raise OptionError(f"connectivity must be 4 or 8, got {connectivity!r}")
    z = np.asarray(z)
    if z.ndim != 2:
        raise OptionError(f"expected a 2-D raster, got shape {z.shape}")
    if z.dtype != np.float32 and z.dtype != np.float64:
        # integers of up to 16 bits are exact in float32, wider ones in float64
        z = z.astype(np.float32 if z.dtype.itemsize <= 2 else np.float64)
    valid = np.isfinite(z)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != z.shape:
            raise OptionError(f"mask shape {mask.shape} differs from raster shape {z.shape}")
        valid &= ~mask
    # a float64 raster whose values are all float32 gives float32 results
    if z.dtype == np.float64:
        with np.errstate(over="ignore", invalid="ignore"):
            z32 = z.astype(np.float32)
        if np.array_equal(z32[valid], z[valid]):
            z = z32
    zk = -z if kind == "peaks" else np.ascontiguousarray(z)
    return np.ascontiguousarray(z), np.ascontiguousarray(zk), valid


def _engine(zk, valid, connectivity, outlet, merge_level=-1.0):
    nr, nc = zk.shape
    n = nr * nc
    dr, dc = offsets(connectivity)
    fr, fc = forward_offsets(connectivity)
    zf = zk.reshape(-1)
    vf = valid.reshape(-1)
    lab = np.empty(n, np.int32 if n < 2**31 - 1 else np.int64)
    has_nodata = not vf.all()
    descend(zf, vf, has_nodata, nr, nc, dr, dc, lab)
    minc = resolve(vf, lab)
    nb = minc.size
    cap = 1024
    while cap < 8 * nb:
        cap *= 2
    ok = False
    while not ok:
        emin = np.full(nb, -1, np.int64)
        ea, eb, ew, ok = _boundaries(zf, vf, has_nodata, nr, nc, dr, dc, fr, fc, lab,
                                     max(nb, 1), emin, cap)
        cap *= 4
    if outlet:
        has = np.flatnonzero(emin >= 0)
        ea = np.concatenate([ea, has])
        eb = np.concatenate([eb, np.full(has.size, nb, np.int64)])
        ew = np.concatenate([ew, emin[has]])
    if merge_level >= 0:
        # regions: edges sharing a pass cell are taken in the order of the cell across
        # (the hash table's order would otherwise decide which basin is "across")
        across = _across_cells(zf, vf, lab, nr, nc, dr, dc, ea, eb, ew, nb)
        order = np.lexsort((across, ew, zf[ew]))
    else:
        order = np.lexsort((ew, zf[ew]))
    res = _merge(zf, vf, nr, nc, dr, dc, minc, emin.copy(), ea[order], eb[order], ew[order],
                 outlet, merge_level)
    return res, lab, minc


def pairs(z: np.ndarray, *, kind: str, connectivity: int = 8,
          edge_outlet: bool | None = None, mask: np.ndarray | None = None) -> Pairs:
    """0-dimensional persistence pairs of a raster.

    Parameters
    ----------
    z : (rows, cols) array_like
        Elevations. Integer rasters are accepted; NaN and +-inf are nodata.
    kind : {"peaks", "pits"}
        ``"peaks"``: superlevel filtration, pairs (summit, key col) whose
        persistence is the prominence within the raster. ``"pits"``: sublevel
        filtration, pairs (pit, spill point) whose persistence is the depth.
    connectivity : {8, 4}
        Cell neighbourhood.
    edge_outlet : bool, optional
        Link every cell on the raster edge or next to nodata to a virtual
        outlet at -inf (+inf for peaks), so that water leaves over the edge
        and every depression dies at its spill point. Default: True for pits,
        False for peaks.
    mask : (rows, cols) bool array, optional
        True marks nodata cells (the ``numpy.ma`` convention).

    Returns
    -------
    Pairs
        Finite pairs first, ordered by death cell in the total order (pairs
        dying at one cell by birth cell), then the essential classes (one per
        connected component of valid cells that never reaches an outlet),
        ordered by birth cell. The order is canonical: it does not depend on
        how the pairs were computed.

    Notes
    -----
    Ties are broken by the total order (value, flat index) described in the
    module docstring; a float64 raster whose values are exactly float32 gives
    the same result as its float32 copy. Memory use is stated in the module
    docstring (about 4-8 bytes per cell on terrain).

    References
    ----------
    .. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
       persistence and simplification. Discrete Comput. Geom. 28, 511-533.
       doi:10.1007/s00454-002-2885-2

    Examples
    --------
    >>> import numpy as np
    >>> z = np.array([[5, 0, 0], [0, 0, 0], [0, 0, 3]], dtype=np.float32)
    >>> p = pairs(z, kind="peaks")
    >>> p.birth.tolist(), p.death.tolist(), p.persistence.tolist()
    ([8, 0], [4, -1], [3.0, inf])
    """
    z, zk, valid = _prepare(z, kind, connectivity, mask)
    if edge_outlet is None:
        edge_outlet = kind == "pits"
    (pb, pd, pe, eb, ee, *_), _lab, _minc = _engine(zk, valid, connectivity, bool(edge_outlet))
    return _assemble(z, kind, pb, pd, pe, eb, ee)


def _assemble(z, kind, pb, pd, pe, eb, ee) -> Pairs:
    zf = z.reshape(-1)
    # canonical order: finite pairs by death, then birth, in the total order;
    # essential classes by birth
    key = -zf if kind == "peaks" else zf
    o = np.lexsort((pb, key[pb], pd, key[pd]))
    pb, pd, pe = pb[o], pd[o], pe[o]
    o = np.lexsort((eb, key[eb]))
    eb, ee = eb[o], ee[o]
    birth = np.concatenate([pb, eb])
    death = np.concatenate([pd, np.full(eb.size, -1, np.int64)])
    bv = zf[birth].astype(np.float64)
    dv = np.concatenate([zf[pd].astype(np.float64), np.full(eb.size, np.nan)])
    pers = np.concatenate([np.abs(bv[:pb.size] - dv[:pd.size]), np.full(eb.size, np.inf)])
    return Pairs(kind, birth, death, bv, dv, pers, np.concatenate([pe, ee]))


@njit(cache=True)
def _region_cells(lab, valid, rpar, id_of_rep, out):
    """Per cell: the id of its basin's region (0 for none and for nodata)."""
    for i in range(lab.size):
        if valid[i]:
            out[i] = id_of_rep[_rfind(rpar, -lab[i] - 1)]
        else:
            out[i] = 0


@dataclass(frozen=True)
class Regions:
    """The persistence-simplified watershed of a raster, and each region's pair.

    Region ``k`` (1-based) is the set of cells that climb (peaks) or drain
    (pits) to the ``k``-th surviving extremum once every pair of persistence
    below ``merge_level`` is cancelled; ``labels`` holds ``k`` per cell and 0
    for nodata and, with the edge as outlet, for cells that drain off the
    edge. Regions are numbered by the persistence of their own pair,
    largest first (essential classes first), ties by the total order of
    their extremum, which is their rank among all pairs of the raster: the
    same extremum keeps its number whatever the merge level. Cells of a flat
    that is neither a summit nor a pit follow their steepest descent (ascent)
    in the raster's tie order, so such a flat joins one neighbouring region.

    Attributes (one entry per region, index ``k - 1``)
    ----------
    birth, death : int64
        Extremum cell and the cell where its pair dies (-1 when essential).
    birth_value, death_value, persistence : float64
    edge_limited : bool
        As in :class:`Pairs`.
    """

    kind: str
    merge_level: float
    labels: np.ndarray
    birth: np.ndarray
    death: np.ndarray
    birth_value: np.ndarray
    death_value: np.ndarray
    persistence: np.ndarray
    edge_limited: np.ndarray

    def __len__(self) -> int:
        return int(self.birth.size)


def regions(z: np.ndarray, *, kind: str, merge_level: float, connectivity: int = 8,
            edge_outlet: bool | None = None, mask: np.ndarray | None = None) -> Regions:
    """Regions of the persistence-simplified watershed (peaks or pits).

    Every pair of persistence below ``merge_level`` is cancelled: the dying
    component's region joins the region across the pass where it dies (for
    pits with the edge as outlet, joining the outlet means belonging to no
    region). Regions are thus the basins of steepest descent (ascent for
    peaks) merged across their lowest passes, computed by the same
    union-find as :func:`pairs`. When several components meet at one pass
    cell, the cell's earlier neighbours are taken in the total order (the
    outlet last), as if the cell joined them one by one: the first one is
    the cell's own basin, and each merge with the component of a later
    neighbour hands the younger side's region across to the other side
    (the cell's own basin, or that neighbour's basin). The labels are
    therefore a property of the raster alone (the blocked engine,
    :mod:`terrain.engine.blocked_regions`, reproduces them bit for bit).

    Parameters
    ----------
    z, kind, connectivity, edge_outlet, mask : as for :func:`pairs`
    merge_level : float
        Pairs less persistent than this are cancelled (>= 0).

    Returns
    -------
    Regions

    References
    ----------
    .. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
       persistence and simplification. Discrete Comput. Geom. 28, 511-533.
    .. [2] Najman, L., Schmitt, M. (1996). Geodesic saliency of watershed
       contours and hierarchical segmentation. IEEE TPAMI 18(12), 1163-1173
       (watershed regions merged by the dynamics of their minima).

    Examples
    --------
    >>> z = np.array([[3, 3, 3, 3, 3], [3, 0, 2, 1, 3], [3, 3, 3, 3, 3]], dtype=np.float32)
    >>> r = regions(z, kind="pits", merge_level=1.5, edge_outlet=False)
    >>> r.labels[1].tolist(), r.persistence.tolist()
    ([1, 1, 1, 1, 1], [inf])
    >>> regions(z, kind="pits", merge_level=0.5, edge_outlet=False).labels[1].tolist()
    [1, 1, 1, 2, 2]
    """
    if not (np.isfinite(merge_level) and merge_level >= 0):
        raise OptionError(f"{{merge_level}} must be >= 0 and finite, got {merge_level}",
                          "merge_level")
    z, zk, valid = _prepare(z, kind, connectivity, mask)
    if edge_outlet is None:
        edge_outlet = kind == "pits"
    (pb, pd, pe, esb, ese, _j, _jr, rpar, pair_of), lab, minc = _engine(
        zk, valid, connectivity, bool(edge_outlet), float(merge_level))
    nb = minc.size
    reps = np.array([b for b in range(nb) if rpar[b] == b], np.int64)
    k = pair_of[reps]
    birth = minc[reps]
    ess = k < 0
    death = np.where(ess, -1, pd[np.maximum(k, 0)] if pd.size else -1)
    flags = np.where(ess, np.isin(birth, esb[ese]), pe[np.maximum(k, 0)] if pe.size else False)
    zf, key = z.reshape(-1), zk.reshape(-1)
    pers = np.where(ess, np.inf, np.abs(zf[birth].astype(np.float64) - zf[np.maximum(death, 0)]))
    order = np.lexsort((birth, key[birth], -pers))
    id_of_rep = np.zeros(nb + 1, np.int32)
    id_of_rep[reps[order]] = np.arange(1, reps.size + 1, dtype=np.int32)
    labels = np.empty(zf.size, np.int32)
    _region_cells(lab, valid.reshape(-1), rpar, id_of_rep, labels)
    birth, death = birth[order], death[order]
    dv = np.where(death < 0, np.nan, zf[np.maximum(death, 0)].astype(np.float64))
    return Regions(kind, float(merge_level), labels.reshape(z.shape), birth, death,
                   zf[birth].astype(np.float64), dv, pers[order], flags[order].astype(bool))


@dataclass(frozen=True)
class Fill:
    """What the depression-filled surface of one raster is made of.

    ``zf``, ``valid``: the flat elevations and validity the engine used;
    ``labels``: per cell its basin as ``-(basin + 1)``; ``level``: per basin
    the fill level (the elevation at which it joins the outlet); ``depth``:
    per basin the depth of the filled depression it lies in. Memory: the
    labels (4 bytes per cell) and 16 bytes per basin.
    """

    zf: np.ndarray
    valid: np.ndarray
    labels: np.ndarray
    level: np.ndarray
    depth: np.ndarray


def pits_and_levels(z: np.ndarray, *, connectivity: int = 8,
                    mask: np.ndarray | None = None) -> tuple[Pairs, Fill]:
    """Pit pairs (edge as outlet) with what the filled surface needs.

    :func:`count_ponding` and :func:`pairs_and_fill` turn the :class:`Fill`
    into ponding and depths.
    """
    z, zk, valid = _prepare(z, "pits", connectivity, mask)
    (pb, pd, pe, eb, ee, join, jroot, _r, _p), lab, minc = _engine(zk, valid, connectivity, True)
    zf = z.reshape(-1)
    level, depth = _fill_levels(zf, join, jroot, minc)
    return _assemble(z, "pits", pb, pd, pe, eb, ee), Fill(zf, valid.reshape(-1), lab, level, depth)


def pairs_and_fill(z: np.ndarray, *, connectivity: int = 8,
                   mask: np.ndarray | None = None) -> tuple[Pairs, np.ndarray]:
    """Pit pairs (edge as outlet) and the depression-filled surface.

    The filled level of a cell is the lowest level at which it connects to
    the outlet in the sublevel filtration (the minimax path height to the
    edge), i.e. ``max(z, level at which the cell's basin joins the outlet)``.
    This is the surface Priority-Flood filling produces.

    Returns
    -------
    (Pairs, filled) where ``filled`` has ``z``'s shape, dtype float64, NaN on
    nodata.

    References
    ----------
    .. [1] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An
       optimal depression-filling and watershed-labeling algorithm for
       digital elevation models. Computers & Geosciences 62, 117-127.
       doi:10.1016/j.cageo.2013.04.024
    .. [2] Soille, P. (2004). Morphological Image Analysis, 2nd ed., Springer
       (fill holes by reconstruction by erosion).
    """
    p, fill = pits_and_levels(z, connectivity=connectivity, mask=mask)
    filled = np.empty(fill.zf.size, np.float64)
    fill_cells(fill.zf, fill.valid, fill.labels, fill.level, filled)
    return p, filled.reshape(np.shape(z))
