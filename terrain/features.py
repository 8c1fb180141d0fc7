"""Features: connected credit regions, their statistics and polygons.

A *feature* is a connected region of cells holding credit (see
:func:`find_features` for the stated fractions). Each logged pair born in a
feature gives that feature a *figure* in its realisation (prominence or
depth; for the essential peak, elevation minus base); the largest figure
counts when several pairs are born in one feature, and a realisation without
one counts as 0.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from .credit import LAYERS, log_weights
from .dem import Dem

__all__ = ["COLUMNS", "find_features", "feature_table", "feature_frames"]

COLUMNS = ("feature_id", "rank", "expected", "se", "p05", "p50", "p95", "p_above", "p_first",
           "expected_rank", "x", "y", "elevation", "col_x", "col_y", "col_elevation", "area_m2",
           "edge_limited_share")


def find_features(credit: np.ndarray, nodata: np.ndarray, *, probability: np.ndarray,
                  window: int = 5, local_min: float = 0.05,
                  min_presence: float = 0.1) -> tuple[np.ndarray, int]:
    """Label credit regions.

    A cell is in a feature's core when counted pairs are born in its
    ``window`` x ``window`` neighbourhood at a rate of at least ``local_min``
    (5%) per realisation (the window sum of ``probability``). Cores are
    grown by the window's half-width, joined 8-connectedly, and the cells of
    a grown region that hold credit form the feature. A region is kept when
    a counted pair is born in it in at least ``min_presence`` (10%) of
    realisations on average. Summing births over a window keeps flat-topped
    summits and flat-floored pits, whose births are spread thin over many
    cells, while scattered births caused by the error alone stay below the
    local rate.

    Parameters
    ----------
    credit : (rows, cols) array
        The main credit layer (estimate).
    nodata : (rows, cols) bool array
    probability : (rows, cols) array
        Birth probability per cell (summit or pit probability).

    Returns
    -------
    (labels, n): int32 labels (0 = no feature, 1..n in raster order of each
    region's first cell) and the number of features.
    """
    p = np.where(nodata, 0.0, np.nan_to_num(probability))
    c = np.where(nodata, 0.0, np.nan_to_num(credit))
    local = ndimage.uniform_filter(p, size=window, mode="constant") * window * window
    core = local >= local_min
    grown = ndimage.binary_dilation(core, structure=np.ones((window, window), bool))
    lab, n = ndimage.label(grown, structure=np.ones((3, 3), int))
    lab = np.where(c > 0, lab, 0)
    keep = np.unique(lab[lab > 0])
    if keep.size:
        mass = ndimage.sum_labels(p, lab, index=keep)
        keep = keep[mass >= min_presence]
    remap = np.zeros(n + 1, np.int32)
    remap[keep] = np.arange(1, keep.size + 1, dtype=np.int32)
    return remap[lab].astype(np.int32), int(keep.size)


def feature_figures(labels: np.ndarray, n_features: int, log: dict, n_real: int, *,
                    base: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per realisation and feature: the largest figure, presence, edge flag.

    Returns three (n_real, n_features) arrays: figure (0 when absent),
    present (bool) and edge_limited (bool, of the largest pair).
    """
    k = n_features
    flat = labels.reshape(-1)
    fid = flat[log["birth"].astype(np.int64)] if log["birth"].size else np.zeros(0, np.int32)
    inside = fid > 0
    real = log["real"][inside].astype(np.int64)
    f = fid[inside].astype(np.int64) - 1
    fig = np.maximum(log_weights({key: v[inside] for key, v in log.items()}, "persistence", base), 0.0)
    edge = log["edge_limited"][inside]
    figures = np.zeros((n_real, k))
    present = np.zeros((n_real, k), bool)
    edge_rf = np.zeros((n_real, k), bool)
    if f.size:
        order = np.lexsort((fig, f, real))
        r_s, f_s, g_s, e_s = real[order], f[order], fig[order], edge[order]
        last = np.ones(order.size, bool)
        last[:-1] = (r_s[1:] != r_s[:-1]) | (f_s[1:] != f_s[:-1])
        figures[r_s[last], f_s[last]] = g_s[last]
        present[r_s[last], f_s[last]] = True
        edge_rf[r_s[last], f_s[last]] = e_s[last]
    return figures, present, edge_rf


def first_indicator(figures: np.ndarray, present: np.ndarray) -> np.ndarray:
    """(n_real, k) bool: the feature ranks first in the realisation (ties: lowest id)."""
    first = np.zeros(figures.shape, bool)
    any_present = present.any(axis=1)
    if figures.shape[1]:
        w = np.argmax(np.where(present, figures, -np.inf), axis=1)
        first[np.flatnonzero(any_present), w[any_present]] = True
    return first


def feature_table(dem: Dem, labels: np.ndarray, n_features: int, credit: np.ndarray,
                  log: dict, n_real: int, *, base: float) -> dict:
    """Per-feature statistics over realisations (columns :data:`COLUMNS`).

    ``credit`` (the main credit layer) locates each feature's most credited
    cell; everything else comes from the pair log.

    Returns a dict of equal-length arrays, one entry per feature, in
    ``feature_id`` order.
    """
    k = n_features
    flat = labels.reshape(-1)
    figures, present, edge_rf = feature_figures(labels, k, log, n_real, base=base)
    fid = flat[log["birth"].astype(np.int64)] if log["birth"].size else np.zeros(0, np.int32)
    inside = fid > 0
    f = fid[inside].astype(np.int64) - 1
    death = log["death"][inside].astype(np.int64)
    dval = log["death_value"][inside].astype(np.float64)
    n = max(n_real, 1)
    expected = figures.mean(axis=0) if n_real else np.zeros(k)
    se = figures.std(axis=0) / np.sqrt(n) if n_real else np.zeros(k)
    pct = np.percentile(figures, [5, 50, 95], axis=0) if n_real else np.zeros((3, k))
    p_above = present.mean(axis=0) if n_real else np.zeros(k)
    p_first = first_indicator(figures, present).sum(axis=0) / n
    # rank of each feature in each realisation: 1 + features with a larger figure
    ranks = 1 + (figures[:, None, :] > figures[:, :, None]).sum(axis=2) if k <= 2000 else \
        1 + np.argsort(np.argsort(-figures, axis=1, kind="stable"), axis=1)
    expected_rank = ranks.mean(axis=0) if n_real else np.zeros(k)
    with np.errstate(invalid="ignore", divide="ignore"):
        edge_share = np.where(present.sum(0) > 0, edge_rf.sum(0) / present.sum(0), np.nan)

    cflat = np.nan_to_num(credit.reshape(-1))
    zflat = dem.z.reshape(-1)
    best = np.asarray(ndimage.maximum_position(cflat, flat, index=np.arange(1, k + 1)),
                      dtype=np.int64).reshape(-1) if k else np.zeros(0, np.int64)
    bx, by = dem.xy(best)

    # most credited key col / spill point of each feature, from the log
    col_cell = np.full(k, -1, np.int64)
    col_elev = np.full(k, np.nan)
    has = death >= 0
    if has.any():
        w = log_weights({key: v[inside] for key, v in log.items()}, "persistence", base)[has]
        ff, dd, vv = f[has], death[has], dval[has]
        key = ff * flat.size + dd
        uk, inv = np.unique(key, return_inverse=True)
        wsum = np.bincount(inv, weights=w)
        vsum = np.bincount(inv, weights=vv)
        cnt = np.bincount(inv)
        uf = uk // flat.size
        order = np.lexsort((-wsum, uf))
        first = np.ones(order.size, bool)
        first[1:] = uf[order][1:] != uf[order][:-1]
        sel = order[first]
        col_cell[uf[sel]] = uk[sel] % flat.size
        col_elev[uf[sel]] = vsum[sel] / cnt[sel]
    cx, cy = dem.xy(np.maximum(col_cell, 0))
    cx = np.where(col_cell >= 0, cx, np.nan)
    cy = np.where(col_cell >= 0, cy, np.nan)

    rank = np.empty(k, np.int64)
    rank[np.lexsort((np.arange(k), -expected))] = np.arange(1, k + 1)
    return {
        "feature_id": np.arange(1, k + 1), "rank": rank, "expected": expected, "se": se,
        "p05": pct[0], "p50": pct[1], "p95": pct[2], "p_above": p_above, "p_first": p_first,
        "expected_rank": expected_rank, "x": bx, "y": by, "elevation": zflat[best].astype(np.float64),
        "col_x": cx, "col_y": cy, "col_elevation": col_elev,
        "area_m2": feature_areas(dem, labels, k), "edge_limited_share": edge_share,
    }


def feature_areas(dem: Dem, labels: np.ndarray, k: int) -> np.ndarray:
    """Area of each feature in square metres (exact ellipsoidal cell areas for a
    geographic CRS, see :meth:`Dem.cell_area_m2`; CRS units squared when there
    is no CRS)."""
    if k == 0:
        return np.zeros(0)
    area_row = dem.cell_area_m2()
    weights = np.broadcast_to(area_row[:, None], labels.shape)
    return ndimage.sum_labels(weights, labels, index=np.arange(1, k + 1))


def feature_polygons(dem: Dem, labels: np.ndarray, k: int) -> list:
    """Shapely polygons (or multipolygons) of each feature, in CRS coordinates."""
    from rasterio.features import shapes
    from rasterio.transform import Affine
    from shapely.geometry import shape
    from shapely.ops import unary_union

    parts: list[list] = [[] for _ in range(k)]
    if k:
        for geom, value in shapes(labels, mask=labels > 0, connectivity=8,
                                  transform=Affine(*dem.transform)):
            parts[int(value) - 1].append(shape(geom))
    return [unary_union(p) if p else None for p in parts]


def feature_frames(dem: Dem, table: dict, labels: np.ndarray, kind: str):
    """GeoDataFrames for the polygon and point layers of a feature table.

    Returns ``{polygon_layer: gdf, point_layer: gdf}`` with layer names
    ``summits``/``summit_points`` (peaks) or ``pits``/``pit_points`` (pits).
    """
    import geopandas as gpd
    from shapely.geometry import Point

    k = len(table["feature_id"])
    cols = {c: table[c] for c in COLUMNS}
    polys = feature_polygons(dem, labels, k)
    points = [Point(x, y) for x, y in zip(table["x"], table["y"])]
    crs = dem.crs
    names = ("summits", "summit_points") if kind == "peaks" else ("pits", "pit_points")
    order = np.argsort(table["rank"], kind="stable")
    poly = gpd.GeoDataFrame({c: np.asarray(v)[order] for c, v in cols.items()},
                            geometry=[polys[i] for i in order], crs=crs)
    pts = gpd.GeoDataFrame({c: np.asarray(v)[order] for c, v in cols.items()},
                           geometry=[points[i] for i in order], crs=crs)
    return {names[0]: poly, names[1]: pts}


def main_layer(kind: str) -> str:
    """The credit layer features are drawn from."""
    return LAYERS[kind][0]
