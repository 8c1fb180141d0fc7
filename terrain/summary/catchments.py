"""Catchment summaries: membership polygons at 50% and 90%, areas over realisations."""

from __future__ import annotations

import numpy as np

from ..layers import LAYERS, layer_name
from .features import region_polygons

__all__ = ["CATCHMENT_COLUMNS", "CATCHMENT_COLUMN_KINDS", "LEVELS", "area_summary", "catchment_table"]

CATCHMENT_COLUMNS = ("outlet_id", "level", "area_m2", "area_mean_m2", "area_p05_m2", "area_p95_m2")
#: What each column is (decides its precision in CSV, see :mod:`terrain.outputs.tables`).
CATCHMENT_COLUMN_KINDS = {"outlet_id": "text", "level": "probability", "area_m2": "area",
                          "area_mean_m2": "area", "area_p05_m2": "area", "area_p95_m2": "area"}
LEVELS = (0.5, 0.9)


def area_summary(log: dict, ids) -> dict:
    """Mean, 5th and 95th percentile of each outlet's catchment area (m^2)."""
    out = {}
    for k, oid in enumerate(ids):
        a = log["area"][log["outlet"] == k]
        out[oid] = (float(a.mean()) if a.size else np.nan,
                    float(np.percentile(a, 5)) if a.size else np.nan,
                    float(np.percentile(a, 95)) if a.size else np.nan)
    return out


def catchment_table(result):
    """One row per outlet and membership level (50%, 90%): polygon and areas.

    ``area_m2`` is the area of the cells draining to the outlet in at least
    that share of realisations; ``area_mean_m2`` and the 5-95% range are
    over realisations.

    Returns
    -------
    geopandas.GeoDataFrame with columns :data:`CATCHMENT_COLUMNS` and geometry.
    """
    import geopandas as gpd

    dem, job = result.dem, result.job
    member = LAYERS[layer_name("catchments", "membership")]
    areas = area_summary(result.log, job.ids)
    area_row = dem.cell_area_m2()
    rows = {c: [] for c in CATCHMENT_COLUMNS}
    geoms = []
    for oid in job.ids:
        p = result.layers[member.concrete(oid)][0]
        for level in LEVELS:
            m = (p >= level) & ~dem.nodata
            geoms.append(region_polygons(dem, m.astype(np.int32), [1])[0])
            mean, p05, p95 = areas[oid]
            for col, v in zip(CATCHMENT_COLUMNS, (oid, level, float((m * area_row[:, None]).sum()),
                                                  mean, p05, p95)):
                rows[col].append(v)
    return gpd.GeoDataFrame(rows, geometry=geoms, crs=dem.crs)
