"""Relations of a counted pair: what it merges into, and a summit's isolation.

Each logged pair carries (:data:`RELATION_FIELDS`):

``elder_region``
    The region (of the DEM as given) holding the birth cell of the
    component the pair's component merges into at its death cell
    (:attr:`terrain.engine.persistence.Pairs.elder`): for a summit its
    *parent*, the feature holding the higher ground its key col leads to
    (the highest summit of the component across the col); for a depression
    the feature it *spills into*, the one holding the deepest pit of the
    component across its spill point. :data:`OFF_RASTER` (-1): the
    overflow leaves the raster (over its edge or into nodata);
    :data:`NO_RELATION` (-2): no merge (the highest summit; a depression
    that never spills); 0: ground that is no region on the DEM as given.
``isolation``
    For peaks, metres from the summit cell to the nearest higher cell
    (:mod:`terrain.engine.isolation`; the geodesic on the WGS84 ellipsoid
    for a geographic CRS), float32; NaN when the raster holds no higher
    cell (the realisation's highest summit) and for depressions. Computed
    only for each region's pair (the largest figure born in it, the one the
    feature tables read, :func:`region_pairs`); NaN for the other pairs.
``isolation_edge``
    Higher ground could lie nearer beyond the raster edge or under nodata
    (always for a summit with no higher cell on the raster). On the DEM as
    given (:class:`Given`) such a summit's isolation is the distance to the
    nearest cell beyond the edge or nodata, a lower bound.

Memory: 9 bytes more per logged pair; per realisation of peaks the max
pyramid of the isolation search (about 0.75 bytes per cell).

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule: the younger component merges
   into the elder).
.. [2] Karney, C. F. F. (2013). Algorithms for geodesics. J. Geodesy 87,
   43-55. doi:10.1007/s00190-012-0578-z (pyproj.Geod).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..engine.isolation import isolation
from ..pairlog import RELATION_FIELDS, log_weights
from ..pairlog import pair_log as _pairs_only

__all__ = ["RELATION_FIELDS", "pair_log", "summit_isolation", "OFF_RASTER", "NO_RELATION", "Given",
           "relation_log", "region_pairs",
           "isolation_m", "given_relations", "labels_at"]

OFF_RASTER = -1
NO_RELATION = -2


@dataclass(frozen=True)
class Given:
    """Relations on the DEM as given, per region (index ``id - 1``): the
    region its own pair merges into (``target``, codes as ``elder_region``),
    and for peaks its isolation in metres and edge-limited flag (NaN / False
    for depressions)."""

    target: np.ndarray
    isolation_m: np.ndarray
    isolation_edge: np.ndarray


def isolation_m(z, cells: np.ndarray, cell_metres, geo_transform, *,
                lower_bound: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Isolation (metres) and its edge-limited flag of summit ``cells`` of the
    raster ``z`` (:func:`terrain.engine.isolation.isolation`); with a
    geographic ``geo_transform`` (the affine of longitude/latitude degrees) the
    distance to the higher cell found is the geodesic on WGS84 (pyproj). A
    summit with no higher cell on the raster gets the distance to the nearest
    cell beyond the edge or nodata (a lower bound), or NaN without
    ``lower_bound``."""
    dx, dy = cell_metres
    d, c, e = isolation(z, cells, dx, dy)
    if not lower_bound:
        d[c < 0] = np.nan
    if geo_transform is not None and (c >= 0).any():
        from pyproj import Geod

        a, b, x0, dd, ee, y0 = geo_transform
        at = np.flatnonzero(c >= 0)
        nc = z.shape[1]

        def lonlat(flat):
            r, q = np.divmod(flat, nc)
            return a * (q + 0.5) + b * (r + 0.5) + x0, dd * (q + 0.5) + ee * (r + 0.5) + y0

        lon0, lat0 = lonlat(cells[at])
        lon1, lat1 = lonlat(c[at])
        d[at] = Geod(ellps="WGS84").inv(lon0, lat0, lon1, lat1)[2]
    return d, e


def region_pairs(region: np.ndarray, figure: np.ndarray) -> np.ndarray:
    """Mask of each region's pair in one realisation's log: the largest figure
    born in the region (ties: the last in log order), as the feature tables
    count it (:func:`terrain.summary.relations.feature_relations`)."""
    order = np.lexsort((figure, region))
    last = np.ones(order.size, bool)
    last[:-1] = region[order][1:] != region[order][:-1]
    out = np.zeros(region.size, bool)
    out[order[last]] = True
    return out & (region > 0)


def relation_log(p, keep: np.ndarray, region, iso=None, only: np.ndarray | None = None) -> dict:
    """The relation fields (:data:`RELATION_FIELDS`) of the pairs ``p[keep]``;
    ``region(cells)`` gives the DEM's region of cells, ``iso(births)`` the
    isolation and its flag (peaks; None: NaN), computed for the pairs where
    ``only`` is True (default: all; the others get NaN and False)."""
    elder = np.asarray(p.elder[keep], np.int64)
    out = np.full(elder.size, NO_RELATION, np.int32)
    out[elder == -1] = OFF_RASTER
    inside = elder >= 0
    if inside.any():
        out[inside] = region(elder[inside])
    out[p.death[keep] < 0] = NO_RELATION
    dist = np.full(elder.size, np.nan, np.float32)
    edge = np.zeros(elder.size, np.bool_)
    at = np.arange(elder.size) if only is None else np.flatnonzero(only)
    if iso is not None and at.size:
        d, e = iso(np.asarray(p.birth[keep], np.int64)[at])
        dist[at], edge[at] = d.astype(np.float32), e
    return {"elder_region": out, "isolation": dist, "isolation_edge": edge}


def given_relations(z, p, regions, region, cell_metres, geo_transform, peaks: bool) -> Given:
    """:class:`Given` from the pairs ``p`` of the DEM as given (``z``, with
    elders) and its ``regions``; ``region(cells)`` reads their labels."""
    k = len(regions)
    order = np.argsort(p.birth, kind="stable")
    at = order[np.searchsorted(p.birth, regions.birth, sorter=order)] if k else np.empty(0, int)
    rel = relation_log(p, at, region)
    iso_d, iso_e = np.full(k, np.nan), np.zeros(k, bool)
    if peaks and k:
        iso_d, iso_e = isolation_m(z, np.asarray(regions.birth, np.int64), cell_metres,
                                   geo_transform)
    return Given(rel["elder_region"], iso_d, iso_e)


def labels_at(labels, cells: np.ndarray) -> np.ndarray:
    """Region labels (int32) at flat ``cells`` of a label grid: an array, or
    anything read by window (one row read per distinct row; few cells)."""
    cells = np.asarray(cells, np.int64)
    if isinstance(labels, np.ndarray):
        return labels.reshape(-1)[cells].astype(np.int32)
    nc = labels.shape[1]
    rows, cols = np.divmod(cells, nc)
    out = np.empty(cells.size, np.int32)
    for r in np.unique(rows):
        at = rows == r
        out[at] = np.asarray(labels[int(r):int(r) + 1, :])[0, cols[at]]
    return out


def summit_isolation(z, job):
    """``births -> (isolation metres, edge-limited)`` on the realisation ``z``
    (:func:`isolation_m`) for a credit job (its cell sizes and transform)."""
    return lambda b: isolation_m(z, b, job.cell_metres, job.geo_transform, lower_bound=False)


def pair_log(p, death_value: np.ndarray, thr: float, i: int, n_cells: int, region,
             iso=None) -> dict:
    """The pair log (:data:`terrain.pairlog.LOG_FIELDS`) of realisation ``i``: the
    pairs of ``p`` at least ``thr`` persistent, with ``death_value`` for their
    death values and ``region(cells)`` for the unperturbed DEM's region of each
    birth (and of each elder); ``iso(births)`` gives summits' isolation
    (:func:`relation_log`)."""
    log = _pairs_only(p, death_value, thr, i, n_cells, region)
    keep = p.persistence >= thr
    only = region_pairs(log["region"], log_weights(log)) if iso is not None else None
    return {**log, **relation_log(p, keep, region, iso, only)}
