"""Drainage of one surface (numba): conditioning, D8/D4 flow, accumulation, outlets.

Per realisation, in this order and with these buffers:

1. *Conditioning*, in place on the perturbed float32 surface
   (:func:`condition`): either depression filling (every cell rises to the
   level at which it first connects to an exit: the persistence engine's
   basin fill levels, equal to Priority-Flood filling), or least-cost
   breaching (:func:`breach_kernel`) of every depression at most
   ``max_depth`` deep, followed by filling of whatever is left. The raster
   edge and nodata are exits.
2. *Receivers* (:func:`route`): steepest descent among the 8 neighbours
   (D8; diagonal distance sqrt(w^2 + h^2)) or the 4 edge neighbours (D4);
   cells on flats drain across the flat towards its outflow.
3. *Order and accumulation*: cells upstream-first (Kahn's algorithm on the
   receiver graph); accumulation in square metres (each cell's own area,
   geodesic on geographic grids, plus everything upstream).
4. *Outlets*: snapping to the cell of highest accumulation within the
   radius (:func:`snap_to_max`); sub-catchment labels (each cell's first
   chosen outlet downstream, ``-1`` elsewhere; :func:`subcatchment_labels`);
   membership, sub-catchment, divide and channel counts
   (:func:`count_drainage`).

Memory per cell of one realisation (independent error; grids below 2**31
cells): the perturbed surface (4 bytes), validity (1), receivers (int32,
4), order / flat queue (int32, 4), flags / in-degrees (1), accumulation
(float64, 8), labels (int32, 4) = 26 bytes; conditioning needs less at
its peak (persistence labels 4, and for breaching the search owner 4, the
back-links 1 and the channel flags 1).

References
----------
.. [1] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
   depression-filling and watershed-labeling algorithm for digital
   elevation models. Computers & Geosciences 62, 117-127.
   doi:10.1016/j.cageo.2013.04.024
.. [2] O'Callaghan, J. F., Mark, D. M. (1984). The extraction of drainage
   networks from digital elevation data. Computer Vision, Graphics, and
   Image Processing 28, 323-344. doi:10.1016/S0734-189X(84)80011-0 (D8).
.. [3] Dijkstra, E. W. (1959). A note on two problems in connexion with
   graphs. Numerische Mathematik 1, 269-271 (least-cost path search).
.. [4] Kahn, A. B. (1962). Topological sorting of large networks.
   Communications of the ACM 5(11), 558-562.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..errors import OptionError
from .grid import is_edge, neighbour, offsets
from .persistence import pits_and_levels

__all__ = ["CONDITIONING", "condition", "breach_kernel", "Flow", "route", "flow", "snap_to_max",
           "subcatchment_labels", "count_drainage"]

CONDITIONING = ("breach", "fill")


# ----------------------------------------------------------------------------
# conditioning
# ----------------------------------------------------------------------------
@njit(cache=True)
def _raise_to_levels(z, valid, lab, level):
    """Depression filling in place: every valid cell rises to its basin's fill level.

    ``lab`` (``-(basin + 1)`` per cell) and ``level`` (per basin) come from
    :func:`terrain.engine.persistence.pits_and_levels`; the levels are
    values of ``z`` itself, so float32 surfaces stay exact.
    """
    for i in range(z.size):
        if valid[i]:
            lv = level[-lab[i] - 1]
            if lv > z[i]:
                z[i] = lv


@njit(cache=True, inline="always")
def _precedes(ka, ca, kb, cb):
    """Heap order: (key ``ka``, cell ``ca``) before (``kb``, ``cb``), by key then cell index."""
    return ka < kb or (ka == kb and ca < cb)


@njit(cache=True)
def _heap_push(hk, hc, size, key, cell):
    """Push (key, cell) onto the binary min-heap ``hk``/``hc`` of ``size`` entries;
    returns the heap arrays (doubled when full)."""
    if size == hk.size:
        hk = np.concatenate((hk, np.empty(size, np.float64)))
        hc = np.concatenate((hc, np.empty(size, np.int64)))
    i = size
    while i > 0 and _precedes(key, cell, hk[(i - 1) // 2], hc[(i - 1) // 2]):
        hk[i], hc[i] = hk[(i - 1) // 2], hc[(i - 1) // 2]
        i = (i - 1) // 2
    hk[i], hc[i] = key, cell
    return hk, hc


@njit(cache=True)
def _heap_pop(hk, hc, size):
    """Remove and return the first entry of the heap of ``size`` (> 0) entries."""
    key, cell = hk[0], hc[0]
    size -= 1
    lk, lc = hk[size], hc[size]
    i = 0
    a = 1
    while a < size:
        if a + 1 < size and _precedes(hk[a + 1], hc[a + 1], hk[a], hc[a]):
            a += 1
        if not _precedes(hk[a], hc[a], lk, lc):
            break
        hk[i], hc[i] = hk[a], hc[a]
        i = a
        a = 2 * i + 1
    hk[i], hc[i] = lk, lc
    return key, cell


@njit(cache=True)
def breach_kernel(z, valid, nr, nc, dr, dc, pits, max_depth, owner, back, chan):
    """Least-cost breaching, in place: each pit, in the given order, gets a channel
    to the nearest (in cost) cell that drains.

    For pit ``p`` at level ``zp``, Dijkstra's search runs over valid cells at
    most ``max_depth`` above ``zp``; entering a cell costs the depth it must
    be lowered to ``zp`` (``max(0, z - zp)``), so the path found needs the
    least total cut (per unit cell area). The search ends at the first cell
    taken off the heap that is lower than ``zp``, lies on an earlier channel
    at or below ``zp``, or is an exit (raster edge, next to nodata); the
    cells of that path are lowered to ``zp`` and flagged in ``chan``. Ties
    are broken by cost, then cell index. A pit already lowered onto an
    earlier channel drains along it and is skipped. Scratch: ``owner``
    (int32, -1 initially; which search reached a cell), ``back`` (int8, the
    neighbour a cell was reached from).

    Returns the number of pits that now drain.
    """
    hk = np.empty(64, np.float64)
    hc = np.empty(64, np.int64)
    done = 0
    for t in range(pits.size):
        p = pits[t]
        if chan[p]:  # lowered onto an earlier channel: drains already
            done += 1
            continue
        zp = z[p]
        owner[p] = t
        size = 0
        hk, hc = _heap_push(hk, hc, size, 0.0, p)
        size = 1
        target = -1
        while size > 0:
            d, u = _heap_pop(hk, hc, size)
            size -= 1
            ur = u // nc
            uc = u - ur * nc
            if u != p and (z[u] < zp or (chan[u] and z[u] <= zp)
                           or is_edge(valid, ur, uc, nr, nc, dr, dc)):
                target = u
                break
            for k in range(dr.size):
                j = neighbour(ur, uc, k, nr, nc, dr, dc)
                if j < 0 or not valid[j] or owner[j] == t:
                    continue
                cut = z[j] - zp
                if cut > max_depth:
                    continue
                owner[j] = t
                back[j] = k
                hk, hc = _heap_push(hk, hc, size, d + (cut if cut > 0 else 0.0), j)
                size += 1
        if target < 0:
            continue
        x = target
        while x != p:
            if z[x] > zp:
                z[x] = zp
            chan[x] = True
            k = back[x]
            x -= dr[k] * nc + dc[k]
        chan[p] = True
        done += 1
    return done


def _fill(z: np.ndarray, connectivity: int) -> None:
    _, fill = pits_and_levels(z, connectivity=connectivity)
    _raise_to_levels(z.reshape(-1), fill.valid, fill.labels, fill.level)


def condition(z: np.ndarray, *, connectivity: int = 8, method: str = "breach",
              max_depth: float = math.inf) -> int:
    """Remove every depression of ``z`` in place (float32 or float64, NaN = nodata).

    ``method="fill"``: each cell rises to the lowest level at which it
    connects to an exit (Priority-Flood filling). ``method="breach"``: every
    depression at most ``max_depth`` deep (its persistence: spill level minus
    pit) gets a least-cost channel from its pit to a cell that drains
    (:func:`breach_kernel`; pits lowest first); deeper depressions, and any
    left, are then filled. No cell is lowered by more than ``max_depth``.
    The raster edge and nodata are exits.

    Returns the number of depressions breached (0 when filling).

    References
    ----------
    .. [1] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood.
       Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
    .. [2] Dijkstra, E. W. (1959). A note on two problems in connexion with
       graphs. Numerische Mathematik 1, 269-271.
    """
    if method not in CONDITIONING:
        raise OptionError(f"{{conditioning}} must be one of {', '.join(CONDITIONING)}, "
                          f"got {method!r}", "conditioning")
    if not z.flags.c_contiguous:
        raise OptionError("condition() works in place on a C-contiguous array")
    if method == "fill":
        _fill(z, connectivity)
        return 0
    p, fill = pits_and_levels(z, connectivity=connectivity)
    zf, valid = fill.zf, fill.valid
    finite = (p.death >= 0) & (p.persistence > 0) & (p.persistence <= max_depth)
    pits = p.birth[finite]
    pits = pits[np.lexsort((pits, zf[pits]))]  # lowest first, then by cell index
    done = 0
    if pits.size:
        nr, nc = z.shape
        dr, dc = offsets(connectivity)
        owner = np.full(zf.size, -1, np.int32 if pits.size < 2**31 - 1 else np.int64)
        back = np.zeros(zf.size, np.int8)
        chan = np.zeros(zf.size, np.bool_)
        done = breach_kernel(zf, valid, nr, nc, dr, dc, pits, float(max_depth), owner, back, chan)
        del owner, back, chan
        if not np.shares_memory(zf, z):  # the engine worked on an exact float32 copy
            z.reshape(-1)[:] = zf
    if done < int((p.death >= 0).sum()):  # deeper depressions (or none breached): fill
        _fill(z, connectivity)
    return done


# ----------------------------------------------------------------------------
# flow
# ----------------------------------------------------------------------------
@njit(cache=True)
def _receivers(z, valid, nr, nc, wx, hy, dr, dc, rec):
    """Steepest-descent receiver among the neighbours ``dr``/``dc`` (8: D8, 4: D4);
    -1 when none is lower.

    ``wx[r]``, ``hy[r]``: cell width and height (metres) of row ``r``;
    diagonal distance sqrt(w^2 + h^2). Of equally steep neighbours the first
    in ascending flat-index order wins.
    """
    for r in range(nr):
        w = wx[r]
        h = hy[r]
        dg = math.sqrt(w * w + h * h)
        for c in range(nc):
            i = r * nc + c
            rec[i] = -1
            if not valid[i]:
                continue
            best = 0.0
            zi = z[i]
            for k in range(dr.size):
                j = neighbour(r, c, k, nr, nc, dr, dc)
                if j < 0 or not valid[j]:
                    continue
                d = dg if (dr[k] != 0 and dc[k] != 0) else (h if dr[k] != 0 else w)
                s = (zi - z[j]) / d
                if s > best:
                    best = s
                    rec[i] = j


@njit(cache=True)
def _route_flats(z, valid, nr, nc, dr, dc, rec, queue, done):
    """Give cells without a lower neighbour a receiver across their flat.

    Breadth-first search from every cell that drains (has a receiver) or is
    an exit (on the edge or next to nodata) and touches an undrained cell of
    equal elevation: each reached cell drains to the cell it was reached
    from, i.e. along a shortest path to the flat's outflow (towards lower
    terrain). ``queue`` (int32) and ``done`` (uint8) are scratch.
    """
    m = 0
    for r in range(nr):
        for c in range(nc):
            i = r * nc + c
            done[i] = 0
            if not valid[i] or not (rec[i] >= 0 or is_edge(valid, r, c, nr, nc, dr, dc)):
                continue
            done[i] = 1
            for k in range(dr.size):
                j = neighbour(r, c, k, nr, nc, dr, dc)
                if j >= 0 and valid[j] and rec[j] < 0 and z[j] == z[i]:
                    queue[m] = i
                    m += 1
                    break
    t = 0
    while t < m:
        x = queue[t]
        t += 1
        r0 = x // nc
        c0 = x - r0 * nc
        for k in range(dr.size):
            j = neighbour(r0, c0, k, nr, nc, dr, dc)
            if j < 0:
                continue
            if valid[j] and done[j] == 0 and rec[j] < 0 and z[j] == z[x]:
                done[j] = 1
                rec[j] = x
                queue[m] = j
                m += 1


@njit(cache=True)
def _order_and_accumulate(rec, valid, nc, area_row, order, indeg, acc):
    """Cells upstream-first (Kahn's algorithm on the receiver graph) into
    ``order``, and flow accumulation in area units (each cell's own area
    ``area_row[row]`` plus all upstream cells') into ``acc``. ``indeg``
    (uint8) is scratch; returns the number of ordered (valid) cells."""
    n = rec.size
    for i in range(n):
        indeg[i] = 0
    for i in range(n):
        if valid[i] and rec[i] >= 0:
            indeg[rec[i]] += 1
    m = 0
    for i in range(n):
        acc[i] = 0.0
        if valid[i] and indeg[i] == 0:
            order[m] = i
            m += 1
    t = 0
    while t < m:
        c = order[t]
        t += 1
        acc[c] += area_row[c // nc]
        d = rec[c]
        if d >= 0:
            acc[d] += acc[c]
            indeg[d] -= 1
            if indeg[d] == 0:
                order[m] = d
                m += 1
    return m


class Flow:
    """D8 or D4 flow of one conditioned surface.

    Attributes
    ----------
    shape : (rows, cols)
    connectivity : {8, 4}
    valid : (n,) bool
    rec : (n,) int32
        Receiver of each cell (flat index), -1 for exits and nodata.
    order : (m,) int32
        Valid cells, upstream first.
    acc : (n,) float64
        Flow accumulation: the area (m^2 on georeferenced grids) draining
        through each cell, its own included.
    """

    def __init__(self, shape, connectivity, valid, rec, order, acc):
        self.shape = shape
        self.connectivity = connectivity
        self.valid = valid
        self.rec = rec
        self.order = order
        self.acc = acc


def _per_row(v, nr: int) -> np.ndarray:
    return np.broadcast_to(np.asarray(v, np.float64), (nr,)).copy()


def route(z: np.ndarray, *, cell_w, cell_h, cell_area, connectivity: int = 8) -> Flow:
    """Receivers, order and accumulation on a conditioned surface (NaN = nodata).

    Cells with a strictly lower neighbour drain by steepest descent; cells on
    flats drain across the flat towards its outflow; cells on the edge or
    next to nodata with no lower neighbour are exits.

    Parameters
    ----------
    z : (rows, cols) float array, depression-free (see :func:`condition`)
    cell_w, cell_h, cell_area : float or per-row arrays
        Cell width and height in metres, and cell area in m^2 (per row for a
        geographic CRS).
    connectivity : {8, 4}
        D8 (with diagonals) or D4.

    References
    ----------
    .. [1] O'Callaghan, J. F., Mark, D. M. (1984). The extraction of drainage
       networks from digital elevation data. CVGIP 28, 323-344.
    .. [2] Kahn, A. B. (1962). Topological sorting of large networks. CACM 5(11).
    """
    nr, nc = z.shape
    n = nr * nc
    zf = np.ascontiguousarray(z).reshape(-1)
    valid = np.isfinite(zf)
    dr, dc = offsets(connectivity)
    rec = np.empty(n, np.int32 if n < 2**31 - 1 else np.int64)
    _receivers(zf, valid, nr, nc, _per_row(cell_w, nr), _per_row(cell_h, nr), dr, dc, rec)
    queue = np.empty(n, rec.dtype)
    flags = np.empty(n, np.uint8)
    _route_flats(zf, valid, nr, nc, dr, dc, rec, queue, flags)
    acc = np.empty(n, np.float64)
    m = _order_and_accumulate(rec, valid, nc, _per_row(cell_area, nr), queue, flags, acc)
    return Flow((nr, nc), connectivity, valid, rec, queue[:m], acc)


def flow(z: np.ndarray, *, cell_w, cell_h, cell_area=None, connectivity: int = 8,
         conditioning: str = "fill", breach_cap: float = math.inf,
         mask: np.ndarray | None = None) -> Flow:
    """Condition a copy of ``z`` (fill or breach), then route D8/D4 flow on it.

    ``cell_area`` defaults to ``cell_w * cell_h``; ``mask`` marks nodata
    (True). See :func:`condition` and :func:`route`.

    References
    ----------
    .. [1] O'Callaghan, J. F., Mark, D. M. (1984). The extraction of drainage
       networks from digital elevation data. CVGIP 28, 323-344.
    .. [2] Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood.
       Computers & Geosciences 62, 117-127.
    """
    zc = np.array(z, dtype=np.float32 if np.asarray(z).dtype == np.float32 else np.float64)
    if mask is not None:
        zc[np.asarray(mask, bool)] = np.nan
    condition(zc, connectivity=connectivity, method=conditioning, max_depth=breach_cap)
    if cell_area is None:
        cell_area = np.asarray(cell_w, np.float64) * np.asarray(cell_h, np.float64)
    return route(zc, cell_w=cell_w, cell_h=cell_h, cell_area=cell_area, connectivity=connectivity)


# ----------------------------------------------------------------------------
# outlets
# ----------------------------------------------------------------------------
@njit(cache=True)
def snap_to_max(acc, cand, cand_ptr):
    """Per outlet, the candidate cell of highest accumulation (lowest index on ties)."""
    k = cand_ptr.size - 1
    out = np.empty(k, np.int64)
    for o in range(k):
        best = -1
        bv = -1.0
        for t in range(cand_ptr[o], cand_ptr[o + 1]):
            c = cand[t]
            if acc[c] > bv:
                bv = acc[c]
                best = c
        out[o] = best
    return out


@njit(cache=True)
def _label(order, rec, snapped, primary, lab):
    """Sub-catchment labels, downstream first: each valid cell gets the first
    chosen outlet at or downstream of it (of outlets sharing a cell, the
    primary one), -1 when its flow path reaches no outlet (elsewhere);
    nodata cells keep -2."""
    for i in range(lab.size):
        lab[i] = -2
    for o in range(snapped.size):
        if primary[o] == o:
            lab[snapped[o]] = o
    for t in range(order.size - 1, -1, -1):
        c = order[t]
        if lab[c] == -2:
            r = rec[c]
            lab[c] = lab[r] if r >= 0 else -1


def subcatchment_labels(fl: Flow, snapped: np.ndarray):
    """Each cell's first chosen outlet downstream, and the outlets' nesting.

    Returns ``(labels, primary, parent, alias)``: ``labels`` (int32 per
    cell; outlet index, -1 elsewhere, -2 nodata); ``primary[o]``, the first
    outlet snapped onto the same cell as ``o`` (outlets sharing a cell share
    its sub-catchment); ``parent[o]``, the next chosen outlet downstream of a
    primary outlet (-1 when none); ``alias[o]``, the next outlet sharing
    ``o``'s cell (-1 at the end of the list).
    """
    k = snapped.size
    _, first, inverse = np.unique(snapped, return_index=True, return_inverse=True)
    primary = first[inverse.reshape(-1)].astype(np.int64)
    lab = np.empty(fl.rec.size, np.int32)
    _label(fl.order, fl.rec, snapped, primary, lab)
    parent = np.full(k, -1, np.int64)
    alias = np.full(k, -1, np.int64)
    last = np.arange(k)
    for o in range(k):
        p = primary[o]
        if p != o:
            alias[last[p]] = o
            last[p] = o
        elif fl.rec[snapped[o]] >= 0:
            parent[o] = lab[fl.rec[snapped[o]]]
    return lab, primary, parent, alias


@njit(cache=True)
def count_drainage(lab, valid, acc, nr, nc, dr, dc, parent, alias, area_row, channel_area,
                   member, sub, divide, channel, area, subarea):
    """Add one realisation to the per-cell counts, in one pass over the cells.

    ``channel[i]`` += 1 where accumulation >= ``channel_area``. With outlets
    (``parent.size`` > 0; ``lab``, ``parent``, ``alias`` from
    :func:`subcatchment_labels`): ``divide[i]`` += 1 where a valid neighbour
    carries another label; ``sub[o, i]`` += 1 where ``o``'s sub-catchment
    holds the cell; ``member[o, i]`` += 1 for ``o`` and every chosen outlet
    downstream of it (nested outlets: total upstream area). ``area`` and
    ``subarea`` receive each outlet's catchment and sub-catchment area.
    """
    k = parent.size
    for r in range(nr):
        a = area_row[r]
        for c in range(nc):
            i = r * nc + c
            if not valid[i]:
                continue
            if acc[i] >= channel_area:
                channel[i] += 1
            if k == 0:
                continue
            o = lab[i]
            for q in range(dr.size):
                j = neighbour(r, c, q, nr, nc, dr, dc)
                if j >= 0 and valid[j] and lab[j] != o:
                    divide[i] += 1
                    break
            first = True
            while o >= 0:
                q = o
                while q >= 0:
                    member[q, i] += 1
                    area[q] += a
                    if first:
                        sub[q, i] += 1
                        subarea[q] += a
                    q = alias[q]
                first = False
                o = parent[o]
