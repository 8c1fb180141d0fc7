"""Exact 0-dimensional persistence pairs of a raster: peaks and pits.

Peaks come from the superlevel-set filtration (a summit is born, it dies at
its key col when it merges with an older, higher summit); pits from the
sublevel-set filtration (a pit dies at its spill point). Both are computed by
one engine that works on a sublevel filtration of keys (``z`` for pits,
``-z`` for peaks).

Algorithm
---------
1. *Sweep* (:func:`~terrain.engine.basins.sweep`, raster order, rows
   vectorised): every valid cell points to its lowest neighbour in the total
   order; cells with no earlier neighbour are local minima and open a basin
   (numbered in raster order). The same pass lists the *saddle candidates*:
   cells whose earlier neighbours fall into two or more groups that are not
   joined through earlier cells around the cell (a table of the 256 masks of
   earlier neighbours), and the cells on the raster edge or next to nodata.
2. *Labels*: pointer chains are followed and compressed, for every cell when
   per-cell basin labels are asked for (:func:`pits_and_levels`,
   :func:`regions`), else only where the next step reads them.
3. *Events* (raster order): each candidate with its basin and the basins of
   one earlier neighbour per group (with an outlet, also each basin's first
   edge cell); ordered by (key, index) with a stable radix sort of the key's
   order-preserving float bits.
4. *Merging*: an elder-rule union-find over basins, event by event, reading
   only per-event and per-basin arrays; the pairs come out in canonical
   order.

This is the usual union-find computation of 0-dimensional persistence with
the elder rule, contracted to steepest-descent basins. Only candidates need
merging: if the earlier neighbours of a cell ``w`` form one group, any two
of them are joined by a path of cells earlier than ``w``, so their basins
are one component before ``w`` enters and no edge weighing ``w`` can merge
anything; likewise the neighbours of one group of a candidate. Candidates
are a few per cent of the cells on terrain (about 5% under 2 m of
independent error on a 30 m grid, under 1% on a smooth surface).

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
Beyond the input: validity (1 byte per cell), labels (4 bytes per cell, 8
above 2**31 cells), no copy of the raster (for peaks the keys ``-z`` are
read as ``z * s`` with ``s = -1``); 9 bytes per candidate in the sweep,
about 30 bytes per event and 70 per basin in the merge. Measured by
``bench/bench_pairs.py`` (peaks and pits about 5.5 bytes per cell on
terrain).

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
from ..pairlog import AREA_QUANTUM, VOLUME_QUANTUM  # the fixed point of ponded sums
from .basins import (
    CODES4,
    CODES8,
    GROUPS4,
    GROUPS8,
    earlier,
    elder_rule,
    fill_cells,
    find,
    kbefore,
    label_of,
    resolve_all,
    sweep,
)
from .grid import is_edge, neighbour, offsets

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
    elder : ndarray of int64, optional
        The birth cell of the component the pair's component merges into at
        its death cell: the component holding the death cell once every
        merge there is made (its highest summit, or deepest pit); -1 for the
        outlet (pits with the edge as outlet) and for essential classes.
        Canonical (it does not depend on the order of merges at one cell);
        :mod:`terrain.summary.relations` reads it as a summit's parent or
        the depression a pit spills into.
    """

    kind: str
    birth: np.ndarray
    death: np.ndarray
    birth_value: np.ndarray
    death_value: np.ndarray
    persistence: np.ndarray
    edge_limited: np.ndarray
    elder: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.birth.size)

    @property
    def essential(self) -> np.ndarray:
        """Boolean array, True for pairs that never die (``death == -1``)."""
        return self.death < 0


# ----------------------------------------------------------------------------
# compiled kernels
# ----------------------------------------------------------------------------
@njit(cache=True, inline="always")
def _rfind(rpar, a):
    """Region union-find root of basin ``a`` (path halving)."""
    while rpar[a] != a:
        rpar[a] = rpar[rpar[a]]
        a = rpar[a]
    return a


@njit(cache=True)
def _edge_minima(z, s, lab, edge, nb):
    """Per basin, its first cell (in the order) on the raster edge or next
    to nodata (-1: none); ``edge`` lists those cells."""
    emin = np.full(nb, -1, np.int64)
    for t in range(edge.size):
        e = edge[t]
        b = -label_of(lab, e) - 1
        f = emin[b]
        if f < 0 or earlier(z, s, e, f):
            emin[b] = e
    return emin


@njit(cache=True)
def _union(a, b):
    """The union of two sorted arrays of distinct cells, sorted."""
    out = np.empty(a.size + b.size, a.dtype)
    i = j = n = 0
    while i < a.size or j < b.size:
        if j == b.size or (i < a.size and a[i] < b[j]):
            out[n] = a[i]
            i += 1
        elif i == a.size or b[j] < a[i]:
            out[n] = b[j]
            j += 1
        else:
            out[n] = a[i]
            i += 1
            j += 1
        n += 1
    return out[:n]


@njit(cache=True)
def _gather_groups(z, s, valid, nr, nc, dr, dc, lab, cand, cmask, extra, groups):
    """What the merge needs of each event, read in raster order (pairs).

    The events are the candidates ``cand`` (with their masks of earlier
    neighbours ``cmask``) and the cells ``extra`` (with an outlet: first
    edge cells, whose basin edges are all redundant), both sorted. For each
    event: its cell, key, basin, whether it lies on the raster edge or next
    to nodata, and the other basins it joins, listed from ``off[t]`` to
    ``off[t + 1]`` in ``nbr``. The earlier neighbours of a candidate fall
    into groups joined through earlier cells around it (``groups``, from
    :data:`~terrain.engine.basins.GROUPS8`); a group's basins are one
    component before the candidate enters, so one neighbour per group is
    read.
    """
    ne = cand.size + extra.size
    cells = np.empty(ne, np.int64)
    key = np.empty(ne, z.dtype)
    own = np.empty(ne, np.int32)
    edge = np.empty(ne, np.bool_)
    off = np.empty(ne + 1, np.int64)
    nbr = np.empty(max(16, 3 * cand.size), np.int32)
    ring = np.array([-nc - 1, -nc, -nc + 1, -1, 1, nc - 1, nc, nc + 1])
    i = j = t = q = 0
    off[0] = 0
    while i < cand.size or j < extra.size:
        if j == extra.size or (i < cand.size and cand[i] <= extra[j]):
            w = cand[i]
            m = np.int64(cmask[i])
            j += j < extra.size and extra[j] == w
            i += 1
        else:
            w = extra[j]
            m = -1
            j += 1
        r = w // nc
        c = w - r * nc
        cells[t] = w
        key[t] = z[w] * s
        a = -label_of(lab, w) - 1
        own[t] = a
        edge[t] = is_edge(valid, r, c, nr, nc, dr, dc)
        if q + 4 > nbr.size:
            grown = np.empty(2 * nbr.size, np.int32)
            grown[:q] = nbr[:q]
            nbr = grown
        q0 = q
        for g in range(4 if m >= 0 else 0):
            k = groups[m, g]
            if k < 0:
                break
            b = -label_of(lab, w + ring[k]) - 1
            dup = b == a
            for v in range(q0, q):
                dup = dup or nbr[v] == b
            if not dup:
                nbr[q] = b
                q += 1
        t += 1
        off[t] = q
    return cells[:t], key[:t], own[:t], edge[:t], off[:t + 1], nbr[:q]


@njit(cache=True)
def _gather(z, s, valid, nr, nc, dr, dc, lab, cells, ordered):
    """What the merge needs of each event cell, read in raster order (regions).

    For each of ``cells`` (raster order): its key, its basin, whether it
    lies on the raster edge or next to nodata, and the basins of its
    earlier neighbours other than its own (the edges of weight ``w``),
    listed from ``off[t]`` to ``off[t + 1]`` in ``nbr``; in the total order
    of those neighbours when ``ordered`` (regions), with repeats dropped.
    """
    ne = cells.size
    key = np.empty(ne, z.dtype)
    own = np.empty(ne, np.int32)
    edge = np.empty(ne, np.bool_)
    off = np.empty(ne + 1, np.int64)
    nbr = np.empty(max(16, 3 * ne), np.int32)
    xs = np.empty(8, np.int64)
    q = 0
    off[0] = 0
    for t in range(ne):
        w = cells[t]
        r = w // nc
        c = w - r * nc
        zw = z[w] * s
        key[t] = zw
        a = -label_of(lab, w) - 1
        own[t] = a
        edge[t] = is_edge(valid, r, c, nr, nc, dr, dc)
        nx = 0
        for k in range(dr.size):
            j = neighbour(r, c, k, nr, nc, dr, dc)
            if j >= 0 and valid[j]:
                zj = z[j] * s
                if zj < zw or (zj == zw and j < w):
                    xs[nx] = j
                    nx += 1
        if ordered:
            for u in range(1, nx):
                x = xs[u]
                p = u
                while p > 0 and earlier(z, s, x, xs[p - 1]):
                    xs[p] = xs[p - 1]
                    p -= 1
                xs[p] = x
        if q + nx > nbr.size:
            grown = np.empty(2 * nbr.size + nx, np.int32)
            grown[:q] = nbr[:q]
            nbr = grown
        q0 = q
        for u in range(nx):
            b = -label_of(lab, xs[u]) - 1
            dup = b == a
            for v in range(q0, q):
                dup = dup or nbr[v] == b
            if not dup:
                nbr[q] = b
                q += 1
        off[t + 1] = q
    return key, own, edge, off, nbr[:q]


@njit(cache=True, inline="always")
def _sort_group(pk, pb, pe, g0, g1):
    """Order the pairs ``g0:g1`` (one death cell) by birth in the total order."""
    for q in range(g0 + 1, g1):
        k, b, e = pk[q], pb[q], pe[q]
        p = q
        while p > g0 and kbefore(k, b, pk[p - 1], pb[p - 1]):
            pk[p] = pk[p - 1]
            pb[p] = pb[p - 1]
            pe[p] = pe[p - 1]
            p -= 1
        pk[p] = k
        pb[p] = b
        pe[p] = e


@njit(cache=True)
def _merge(minc, kmin, emin0, kemin0, order, cells, key, own, edge, off, nbr, outlet,
           merge_level):
    """Pass 2: elder-rule union-find over basins at the event cells, in order.

    The events (:func:`_gather`'s arrays, taken in the total order
    ``order``) are the saddle candidates of
    :func:`~terrain.engine.basins.sweep` and, with an outlet, each basin's
    first edge cell ``emin0`` (key ``kemin0``). At event ``w`` the basin of
    ``w`` meets the basin of every earlier neighbour (an edge of weight
    ``w``; only a candidate can join two components not already joined
    below ``w``) and, when ``w`` is its first edge cell, the virtual outlet
    (basin ``nb``, born at -inf). Basins are compared by their minima
    (``minc``, keys ``kmin``). Every component dying at ``w`` is judged on
    the component it was just before ``w`` entered the filtration (its
    first edge cell is updated only when the event ends), so a pair's
    ``edge_limited`` flag does not depend on the order in which several
    components meeting at one cell are merged; the pairs of one event are
    put in birth order, so pairs come out in canonical order (death, then
    birth). Only per-basin and per-event arrays are read: no random access
    to the raster.

    With ``merge_level >= 0`` it also builds the persistence-simplified
    watershed: a component dying with persistence below ``merge_level`` (or
    zero) hands its region to the basin across the pass it dies at (the
    outlet's region is "none"); ``rpar`` is that region union-find over
    basins and ``pair_of[b]`` the pair at which root basin ``b`` died. The
    neighbours of ``w`` then come in the total order, the outlet last
    (which basin is "across" when several components meet at one cell
    depends on that order), and the pairs are left in the order made.

    Returns the pairs, the essential classes, per basin the cell at which
    its component joined the outlet (-1: never) and the root basin of that
    component, ``rpar``, ``pair_of`` and, per pair, its *elder*: the birth
    cell of the component holding the death cell once every merge there is
    made (-1: the outlet).
    """
    nb = minc.size
    out_id = nb
    regions = merge_level >= 0
    parent = np.arange(nb + 1).astype(np.int32)
    rpar = np.arange(nb + 1 if regions else 0).astype(np.int32)
    pair_of = np.full(nb + 1 if regions else 0, -1, np.int32)
    up = np.full(nb + 1 if outlet else 0, -1, np.int32)
    mt = np.full(nb + 1 if outlet else 0, -1, np.int64)
    kmt = np.empty(nb + 1 if outlet else 0, key.dtype)
    seq = np.empty(nb + 1 if outlet else 0, np.int32)
    emin = emin0.copy()
    kemin = kemin0.copy()
    pb = np.empty(nb, np.int64)
    pk = np.empty(nb, key.dtype)
    pd = np.empty(nb, np.int64)
    pe = np.empty(nb, np.bool_)
    pel = np.empty(nb, np.int64)  # relations: the elder each pair merges into
    pend_old = np.empty(10, np.int32)
    pend_young = np.empty(10, np.int32)
    npairs = 0
    nmerged = 0
    for t in order:
        w = cells[t]
        zw = key[t]
        a = own[t]
        last = off[t + 1] + (outlet and emin0[a] == w)
        npend = 0
        g0 = npairs
        for q in range(off[t], last):
            b = nbr[q] if q < off[t + 1] else out_id
            ra = find(parent, a)
            rb = find(parent, b)
            if ra == rb:
                continue
            old, young = elder_rule(ra, rb, out_id, kmin, minc)  # the younger dies at w
            zm = kmin[young]
            if zm != zw:
                e = emin[young]
                pb[npairs] = minc[young]
                pk[npairs] = zm
                pd[npairs] = w
                pe[npairs] = (e >= 0 and not kbefore(zw, w, kemin[young], e)) or edge[t]
                if regions:
                    pair_of[young] = npairs
                npairs += 1
            if regions and (zm == zw or zw - zm < merge_level):
                rpar[young] = _rfind(rpar, b if young == ra else a)
            parent[young] = old
            if outlet:
                up[young] = old
                mt[young] = w
                kmt[young] = zw
                seq[nmerged] = young
                nmerged += 1
            pend_old[npend] = old
            pend_young[npend] = young
            npend += 1
        if not regions:  # (pair_of indexes the pairs as made)
            _sort_group(pk, pb, pe, g0, npairs)
        for q in range(g0, npairs):
            pd[q] = w
        # relations: every pair dying at w merges into the component holding w once
        # every merge at w is made (canonical whatever the merge order); -1: the outlet
        rw = find(parent, a)
        for q in range(g0, npairs):
            pel[q] = -1 if rw == out_id else minc[rw]
        # the event at w is done: components now include what merged at w
        for q in range(npend):
            old = pend_old[q]
            if old == out_id:
                continue
            y = pend_young[q]
            ey = emin[y]
            if ey >= 0 and (emin[old] < 0 or kbefore(kemin[y], ey, kemin[old], emin[old])):
                emin[old] = ey
                kemin[old] = kemin[y]
    esb, ese = _essential(parent, minc, emin)
    join, jroot = _joins(up, mt, kmt, seq[:nmerged], nb, out_id, outlet)
    return pb[:npairs], pd[:npairs], pe[:npairs], esb, ese, join, jroot, rpar, pair_of, pel[:npairs]


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
def _joins(up, mt, kmt, seq, nb, out_id, outlet):
    """Per basin: the cell at which its component joined the outlet (-1:
    never), and the root basin of the depression it lies in: the oldest
    component it reached by merges strictly below that level (its minimum is
    the depression's deepest cell). Depressions that only touch at the spill
    level stay apart, as their ponded cells do. ``seq`` lists the basins in
    the order they were merged (``up``: into which, ``mt``/``kmt``: at which
    cell and key), so one pass backwards settles each basin from the one it
    merged into."""
    join = np.full(nb, -1, np.int64)
    droot = np.full(nb, -1, np.int64)
    level = np.empty(nb if outlet else 0, kmt.dtype)
    if outlet:
        for q in range(seq.size - 1, -1, -1):
            b = seq[q]
            u = up[b]
            if u == out_id:
                join[b] = mt[b]
                level[b] = kmt[b]
                droot[b] = b
            elif join[u] >= 0:
                join[b] = join[u]
                level[b] = level[u]
                # below the join level b's component runs on into u's
                droot[b] = droot[u] if kmt[b] < level[b] else b
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
    """The raster as float32 (or float64), its key sign (-1 for peaks) and validity."""
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
    # keys are z * s: -z for peaks, compared without a negated copy
    s = z.dtype.type(-1 if kind == "peaks" else 1)
    return np.ascontiguousarray(z), s, valid


def event_order(k: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """The order of events with keys ``k`` at ``cells`` in the total order
    (key, cell), ties kept in the events' order: ``np.lexsort((cells, k))``
    (-0.0 and +0.0 one value), as a stable radix sort of the key's
    order-preserving bits (:func:`_key_order`) for float32 keys; else the
    lexsort. Events already in cell order (the whole-grid engine's, in raster
    order) are sorted as they come; others are first put in cell order by a
    stable sort (the blocked engine's edges: two runs in cell order, which
    the sort merges in one pass).

    References
    ----------
    .. [1] Knuth, D. E. (1998). The Art of Computer Programming, Vol. 3:
       Sorting and Searching, 2nd ed., section 5.2.5 (radix sorting).
    """
    if k.dtype != np.float32:
        return np.lexsort((cells, k))
    by_cell = None
    if k.size > 1 and bool((cells[1:] < cells[:-1]).any()):
        by_cell = np.argsort(cells, kind="stable")
        k = k[by_cell]
    order = np.empty(k.size, np.int32 if k.size < 2**31 else np.int64)
    order = _key_order(np.ascontiguousarray(k).view(np.uint32), order)
    return order if by_cell is None else by_cell[order]


#: bits per pass of :func:`_key_order` (three passes cover a 32-bit key)
_DIGIT = 11


@njit(cache=True)
def _key_order(bits, a):
    """The stable order of float32 keys given as their bits: least-significant
    digit first, three passes of :data:`_DIGIT` bits over the keys mapped to
    unsigned integers in the floats' order (-0.0 as +0.0; negative floats'
    bits inverted, positive ones' sign bit set); a pass whose digit is the
    same for every key is skipped (a raster's keys often share their top
    bits). ``a`` (int32 below 2**31 events) receives the order, which is
    returned (in ``a`` or in a spare array of its type). 16 bytes per event
    (keys and order, each twice). The order of one sort of 64-bit words
    packing the same bits over the event number, which it replaced: about
    4 times faster on 1.3 million events."""
    n = bits.size
    width = 1 << _DIGIT
    mask = width - 1
    ka = np.empty(n, np.uint32)
    cnt = np.zeros((3, width), np.int64)
    for i in range(n):
        u = np.int64(bits[i])
        if u == 0x80000000:
            u = 0
        u = u ^ 0xFFFFFFFF if u >= 0x80000000 else u | 0x80000000
        ka[i] = u
        a[i] = i
        cnt[0, u & mask] += 1
        cnt[1, (u >> _DIGIT) & mask] += 1
        cnt[2, u >> (2 * _DIGIT)] += 1
    kb = np.empty(n, np.uint32)
    b = np.empty_like(a)
    for p in range(3):
        shift = p * _DIGIT
        if cnt[p].max() == n:
            continue
        total = 0
        for d in range(width):
            c = cnt[p, d]
            cnt[p, d] = total
            total += c
        for i in range(n):
            u = ka[i]
            d = (np.int64(u) >> shift) & mask
            o = cnt[p, d]
            kb[o] = u
            b[o] = a[i]
            cnt[p, d] = o + 1
        ka, kb = kb, ka
        a, b = b, a
    return a


def _engine(z, s, valid, connectivity, outlet, merge_level=-1.0, labels=False, clock=None):
    """Sweep, edge minima, events gathered and put in order, merge; every
    cell's basin label is resolved when ``labels`` is asked for (the merge
    itself resolves only the cells it reads). ``clock(step)``, when given, is
    called after each step (``bench/bench_profile.py`` times them)."""
    clock = clock or (lambda step: None)
    nr, nc = z.shape
    n = nr * nc
    dr, dc = offsets(connectivity)
    zf = z.reshape(-1)
    vf = valid.reshape(-1)
    lab = np.empty(n, np.int32 if n < 2**31 - 1 else np.int64)
    codes, groups = (CODES8, GROUPS8) if connectivity == 8 else (CODES4, GROUPS4)
    minc, cand, cmask, edge = sweep(zf, s, vf, nr, nc, connectivity == 8, codes, lab)
    clock("sweep")
    if labels:
        resolve_all(lab)
        clock("labels")
    emin = _edge_minima(zf, s, lab, edge, minc.size)
    kemin = zf[np.maximum(emin, 0)] * s
    extra = np.sort(emin[emin >= 0]) if outlet else emin[:0]
    if merge_level >= 0:  # regions: every neighbour, in the total order
        cells = _union(cand, extra)
        key, own, flag, off, nbr = _gather(zf, s, vf, nr, nc, dr, dc, lab, cells, True)
    else:
        cells, key, own, flag, off, nbr = _gather_groups(zf, s, vf, nr, nc, dr, dc, lab, cand,
                                                         cmask, extra, groups)
    clock("events")
    order = event_order(key, cells)
    clock("event order")
    res = _merge(minc, zf[minc] * s, emin, kemin, order, cells, key, own, flag, off, nbr,
                 outlet, merge_level)
    clock("union-find")
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
    z, s, valid = _prepare(z, kind, connectivity, mask)
    if edge_outlet is None:
        edge_outlet = kind == "pits"
    (pb, pd, pe, eb, ee, *_, pel), _lab, _minc = _engine(z, s, valid, connectivity,
                                                          bool(edge_outlet))
    return _assemble(z, s, kind, pb, pd, pe, eb, ee, pel)


def _assemble(z, s, kind, pb, pd, pe, eb, ee, pel) -> Pairs:
    zf = z.reshape(-1)
    # canonical order: finite pairs by death, then birth, in the total order (as
    # the merge gives them); essential classes by birth
    o = np.lexsort((eb, zf[eb] * s))
    eb, ee = eb[o], ee[o]
    birth = np.concatenate([pb, eb])
    death = np.concatenate([pd, np.full(eb.size, -1, np.int64)])
    bv = zf[birth].astype(np.float64)
    dv = np.concatenate([zf[pd].astype(np.float64), np.full(eb.size, np.nan)])
    pers = np.concatenate([np.abs(bv[:pb.size] - dv[:pd.size]), np.full(eb.size, np.inf)])
    return Pairs(kind, birth, death, bv, dv, pers, np.concatenate([pe, ee]),
                 np.concatenate([pel, np.full(eb.size, -1, np.int64)]))


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
    z, s, valid = _prepare(z, kind, connectivity, mask)
    if edge_outlet is None:
        edge_outlet = kind == "pits"
    (pb, pd, pe, esb, ese, _j, _jr, rpar, pair_of, _el), lab, minc = _engine(
        z, s, valid, connectivity, bool(edge_outlet), float(merge_level), labels=True)
    nb = minc.size
    reps = np.array([b for b in range(nb) if rpar[b] == b], np.int64)
    k = pair_of[reps]
    birth = minc[reps]
    ess = k < 0
    death = np.where(ess, -1, pd[np.maximum(k, 0)] if pd.size else -1)
    flags = np.where(ess, np.isin(birth, esb[ese]), pe[np.maximum(k, 0)] if pe.size else False)
    zf = z.reshape(-1)
    pers = np.where(ess, np.inf, np.abs(zf[birth].astype(np.float64) - zf[np.maximum(death, 0)]))
    order = np.lexsort((birth, zf[birth] * s, -pers))
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
    z, s, valid = _prepare(z, "pits", connectivity, mask)
    (pb, pd, pe, eb, ee, join, jroot, _r, _p, pel), lab, minc = _engine(
        z, s, valid, connectivity, True, labels=True)
    zf = z.reshape(-1)
    level, depth = _fill_levels(zf, join, jroot, minc)
    return _assemble(z, s, "pits", pb, pd, pe, eb, ee, pel), Fill(zf, valid.reshape(-1), lab, level, depth)


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
