"""Features: connected credit regions, their statistics and polygons.

A *feature* is a connected region of cells holding credit (see
:func:`find_features` for the stated fractions). Each logged pair born in a
feature gives that feature a *figure* in its realisation (prominence or
depth; for the essential peak, elevation minus base); the largest figure
counts when several pairs are born in one feature, and a realisation without
one counts as 0.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage

from ..dem import Dem
from ..jobs.credit import log_weights
from ..layers import layer_name

__all__ = ["COLUMNS", "FeatureSummary", "summarise_features", "find_features", "feature_table",
           "feature_figures", "first_indicator", "region_polygons", "LAYER_NAMES"]

COLUMNS = ("feature_id", "rank", "expected", "se", "p05", "p50", "p95", "p_above", "p_first",
           "expected_rank", "x", "y", "elevation", "col_x", "col_y", "col_elevation", "area_m2",
           "edge_limited_share")
LAYER_NAMES = {"peaks": ("summits", "summit_points"), "depressions": ("pits", "pit_points")}
FEATURE_WINDOW = 5  # cells
FEATURE_LOCAL_MIN = 0.05  # births per realisation within the window
MIN_PRESENCE = 0.1  # births per realisation within the region


def _structure(connectivity: int) -> np.ndarray:
    return np.ones((3, 3), int) if connectivity == 8 else ndimage.generate_binary_structure(2, 1)


def find_features(credit: np.ndarray, nodata: np.ndarray, *, probability: np.ndarray,
                  connectivity: int = 8, window: int = FEATURE_WINDOW,
                  local_min: float = FEATURE_LOCAL_MIN,
                  min_presence: float = MIN_PRESENCE) -> tuple[np.ndarray, int]:
    """Label credit regions.

    A cell is in a feature's core when counted pairs are born in its
    ``window`` x ``window`` neighbourhood at a rate of at least ``local_min``
    per realisation (the window sum of ``probability``). Cores are grown by
    the window's half-width, joined with the run's ``connectivity``, and the
    cells of a grown region that hold credit form the feature. A region is
    kept when a counted pair is born in it in at least ``min_presence`` of
    realisations on average.

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
    lab, n = ndimage.label(grown, structure=_structure(connectivity))
    lab = np.where(c > 0, lab, 0)
    keep = np.unique(lab[lab > 0])
    if keep.size:
        mass = ndimage.sum_labels(p, lab, index=keep)
        keep = keep[mass >= min_presence]
    remap = np.zeros(n + 1, np.int32)
    remap[keep] = np.arange(1, keep.size + 1, dtype=np.int32)
    return remap[lab].astype(np.int32), int(keep.size)


def feature_figures(labels: np.ndarray, n_features: int, log: dict, n_real: int, *,
                    base: float | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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


def _most_credited_deaths(log, inside, f, k, n_cells, base):
    """Per feature: the death cell credited most, and its mean elevation."""
    death = log["death"][inside].astype(np.int64)
    dval = log["death_value"][inside].astype(np.float64)
    col_cell = np.full(k, -1, np.int64)
    col_elev = np.full(k, np.nan)
    has = death >= 0
    if has.any():
        w = log_weights({key: v[inside] for key, v in log.items()}, "persistence", base)[has]
        key = f[has] * n_cells + death[has]
        uk, inv = np.unique(key, return_inverse=True)
        wsum = np.bincount(inv, weights=w)
        vsum = np.bincount(inv, weights=dval[has])
        cnt = np.bincount(inv)
        uf = uk // n_cells
        order = np.lexsort((-wsum, uf))
        first = np.ones(order.size, bool)
        first[1:] = uf[order][1:] != uf[order][:-1]
        sel = order[first]
        col_cell[uf[sel]] = uk[sel] % n_cells
        col_elev[uf[sel]] = vsum[sel] / cnt[sel]
    return col_cell, col_elev


def _ranks(figures: np.ndarray) -> np.ndarray:
    """Rank of each feature in each realisation: 1 + features with a larger figure."""
    if figures.shape[1] <= 2000:
        return 1 + (figures[:, None, :] > figures[:, :, None]).sum(axis=2)
    return 1 + np.argsort(np.argsort(-figures, axis=1, kind="stable"), axis=1)


def feature_table(dem: Dem, labels: np.ndarray, n_features: int, credit: np.ndarray,
                  log: dict, n_real: int, *, base: float | None) -> pd.DataFrame:
    """Per-feature statistics over realisations (columns :data:`COLUMNS`).

    ``credit`` (the main credit layer) locates each feature's most credited
    cell; everything else comes from the pair log. One row per feature, in
    ``feature_id`` order.
    """
    k = n_features
    flat = labels.reshape(-1)
    figures, present, edge_rf = feature_figures(labels, k, log, n_real, base=base)
    fid = flat[log["birth"].astype(np.int64)] if log["birth"].size else np.zeros(0, np.int32)
    inside = fid > 0
    f = fid[inside].astype(np.int64) - 1
    n = max(n_real, 1)
    empty = n_real == 0
    expected = np.zeros(k) if empty else figures.mean(axis=0)
    pct = np.zeros((3, k)) if empty else np.percentile(figures, [5, 50, 95], axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        edge_share = np.where(present.sum(0) > 0, edge_rf.sum(0) / present.sum(0), np.nan)
    cflat = np.nan_to_num(credit.reshape(-1))
    best = np.asarray(ndimage.maximum_position(cflat, flat, index=np.arange(1, k + 1)),
                      dtype=np.int64).reshape(-1) if k else np.zeros(0, np.int64)
    bx, by = dem.xy(best)
    col_cell, col_elev = _most_credited_deaths(log, inside, f, k, flat.size, base)
    cx, cy = dem.xy(np.maximum(col_cell, 0))
    rank = np.empty(k, np.int64)
    rank[np.lexsort((np.arange(k), -expected))] = np.arange(1, k + 1)
    return pd.DataFrame({
        "feature_id": np.arange(1, k + 1), "rank": rank, "expected": expected,
        "se": np.zeros(k) if empty else figures.std(axis=0) / np.sqrt(n),
        "p05": pct[0], "p50": pct[1], "p95": pct[2],
        "p_above": np.zeros(k) if empty else present.mean(axis=0),
        "p_first": first_indicator(figures, present).sum(axis=0) / n,
        "expected_rank": np.zeros(k) if empty else _ranks(figures).mean(axis=0),
        "x": bx, "y": by, "elevation": dem.z.reshape(-1)[best].astype(np.float64),
        "col_x": np.where(col_cell >= 0, cx, np.nan), "col_y": np.where(col_cell >= 0, cy, np.nan),
        "col_elevation": col_elev, "area_m2": feature_areas(dem, labels, k),
        "edge_limited_share": edge_share,
    }, columns=list(COLUMNS))


def feature_areas(dem: Dem, labels: np.ndarray, k: int) -> np.ndarray:
    """Area of each feature in square metres (exact ellipsoidal cell areas for a
    geographic CRS, see :meth:`Dem.cell_area_m2`; CRS units squared when there
    is no CRS)."""
    if k == 0:
        return np.zeros(0)
    weights = np.broadcast_to(dem.cell_area_m2()[:, None], labels.shape)
    return ndimage.sum_labels(weights, labels, index=np.arange(1, k + 1))


def region_polygons(dem: Dem, labels: np.ndarray, k: int, *, connectivity: int = 8) -> list:
    """Shapely polygons (or multipolygons) of regions ``1..k``, in CRS coordinates."""
    from rasterio.features import shapes
    from rasterio.transform import Affine
    from shapely.geometry import shape
    from shapely.ops import unary_union

    parts: list[list] = [[] for _ in range(k)]
    if k:
        for geom, value in shapes(labels.astype(np.int32), mask=labels > 0,
                                  connectivity=connectivity, transform=Affine(*dem.transform)):
            parts[int(value) - 1].append(shape(geom))
    return [unary_union(p) if p else None for p in parts]


def feature_frames(dem: Dem, table: pd.DataFrame, labels: np.ndarray, kind: str, *,
                   connectivity: int = 8) -> dict:
    """GeoDataFrames for the polygon and point layers of a feature table, by rank."""
    import geopandas as gpd
    from shapely.geometry import Point

    polys = region_polygons(dem, labels, len(table), connectivity=connectivity)
    order = np.argsort(table["rank"].to_numpy(), kind="stable")
    rows = table.iloc[order].reset_index(drop=True)
    poly_name, point_name = LAYER_NAMES[kind]
    poly = gpd.GeoDataFrame(rows, geometry=[polys[i] for i in order], crs=dem.crs)
    pts = gpd.GeoDataFrame(rows, geometry=[Point(x, y) for x, y in zip(rows["x"], rows["y"])],
                           crs=dem.crs)
    return {poly_name: poly, point_name: pts}


@dataclass(frozen=True)
class FeatureSummary:
    """The features of a run: region labels, the table and its GeoPackage layers."""

    labels: np.ndarray
    table: pd.DataFrame
    frames: dict
    settings: dict


def summarise_features(result, *, min_presence: float = MIN_PRESENCE) -> FeatureSummary:
    """Features of a peaks or depressions run (see :func:`find_features`)."""
    job, dem = result.job, result.dem
    credit = result.layers[layer_name(job.kind, "birth_credit")][0]
    prob = result.layers[layer_name(job.kind, "birth_probability")][0]
    labels, k = find_features(credit, dem.nodata, probability=prob, connectivity=job.connectivity,
                              min_presence=min_presence)
    table = feature_table(dem, labels, k, credit, result.log, result.n, base=job.base)
    frames = feature_frames(dem, table, labels, job.kind, connectivity=job.connectivity)
    settings = {"feature_min_presence": min_presence, "feature_window_cells": FEATURE_WINDOW,
                "feature_local_min": FEATURE_LOCAL_MIN}
    return FeatureSummary(labels, table, frames, settings)
