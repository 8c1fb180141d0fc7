"""Catchment summaries as data frames: polygons at 50% and 90%, areas, outlets.

Three tables, one row per outlet (and level), each carrying every attribute
column of the outlets file (a column whose name is one of ours is renamed
``input_<name>``):

- ``catchments``: cells draining to the outlet (its whole upstream area) in
  at least 50% / 90% of realisations; ``edge_cells`` counts those on the
  raster's edge or beside nodata, and ``edge_limited`` flags a catchment
  with any: water may enter it from beyond the DEM, so its area is a lower
  bound;
- ``subcatchments``: cells whose first chosen outlet downstream is this one
  in at least 50% / 90% of realisations;
- ``outlets``: the point as given (in the outlets file's own CRS, named in
  ``crs``) and in the DEM's CRS, its most frequent snapped cell (DEM's CRS)
  with the share of realisations that chose it, and the mean snap distance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..dem import Dem, metres_per_degree
from ..layers import LAYERS, layer_name
from .features import region_polygons

__all__ = ["CATCHMENT_COLUMNS", "OUTLET_COLUMNS", "CATCHMENT_COLUMN_KINDS", "OUTLET_COLUMN_KINDS",
           "FRAME_COLUMN_KINDS", "LEVELS", "CatchmentSummary", "area_summary",
           "catchment_table", "outlet_table", "summarise_catchments", "snap_distances",
           "boundary_cells"]

CATCHMENT_COLUMNS = ("outlet_id", "layer_id", "level", "area_m2", "area_mean_m2", "area_p05_m2",
                     "area_p95_m2", "edge_cells", "edge_limited")
OUTLET_COLUMNS = ("outlet_id", "layer_id", "x", "y", "crs", "x_dem", "y_dem", "snapped_x",
                  "snapped_y", "snapped_share", "snap_distance_mean_m")
#: What each column is (decides its precision in CSV, see :mod:`terrain.outputs.tables`);
#: attribute columns from the outlets file are written as they came.
CATCHMENT_COLUMN_KINDS = {"outlet_id": "text", "layer_id": "text", "level": "probability",
                          "area_m2": "area", "area_mean_m2": "area", "area_p05_m2": "area",
                          "area_p95_m2": "area", "edge_cells": "integer", "edge_limited": "flag"}
OUTLET_COLUMN_KINDS = {"outlet_id": "text", "layer_id": "text", "x": "parameter",
                       "y": "parameter", "crs": "text", "x_dem": "coordinate",
                       "y_dem": "coordinate", "snapped_x": "coordinate", "snapped_y": "coordinate",
                       "snapped_share": "probability", "snap_distance_mean_m": "area"}
FRAME_COLUMN_KINDS = {"catchments": CATCHMENT_COLUMN_KINDS, "subcatchments": CATCHMENT_COLUMN_KINDS,
                      "outlets": OUTLET_COLUMN_KINDS}
LEVELS = (0.5, 0.9)
_AREA_FIELD = {"membership": "area", "subcatchment": "subarea"}


@dataclass(frozen=True)
class CatchmentSummary:
    """The GeoPackage layers of a catchment run: layer name -> GeoDataFrame
    (``catchments``, ``subcatchments``, ``outlets``; none without outlets)."""

    frames: dict


def area_summary(log: dict, ids, field: str = "area") -> dict:
    """Mean, 5th and 95th percentile of each outlet's catchment (``field="area"``)
    or sub-catchment (``"subarea"``) area over realisations (m^2)."""
    out = {}
    for k, oid in enumerate(ids):
        a = np.asarray(log[field])[np.asarray(log["outlet"]) == k]
        out[oid] = (float(a.mean()) if a.size else np.nan,
                    float(np.percentile(a, 5)) if a.size else np.nan,
                    float(np.percentile(a, 95)) if a.size else np.nan)
    return out


def _attach(frame: pd.DataFrame, outlet_index, attributes) -> pd.DataFrame:
    """``frame`` with each row's outlet attributes appended (clashing names get ``input_``)."""
    if attributes is None or len(attributes.columns) == 0:
        return frame
    attrs = attributes.reset_index(drop=True).iloc[list(outlet_index)].reset_index(drop=True)
    attrs.columns = attribute_names(frame.columns, attributes.columns)
    return pd.concat([frame.reset_index(drop=True), attrs], axis=1)


# names a GeoPackage layer reserves (its feature id and geometry columns)
_RESERVED = ("geometry", "geom", "fid")


def attribute_names(ours, theirs) -> list[str]:
    """Names for the outlets file's columns ``theirs`` beside a table's columns
    ``ours``: each keeps its name unless that is taken -- by one of ours, a
    name a GeoPackage reserves, or an earlier attribute, compared without
    case as SQLite does -- and then becomes ``input_<name>``, or
    ``input_<name>_2``, ``_3``, ... until it is free (a file holding both
    ``x`` and ``input_x``, e.g. cairn's own ``outlets.csv`` fed back, keeps both).

    Examples
    --------
    >>> attribute_names(["outlet_id", "x"], ["X", "input_x", "name", "Name"])
    ['input_X_2', 'input_x', 'name', 'input_Name']
    """
    taken = {str(c).lower() for c in ours} | set(_RESERVED)
    wanted = [str(c) for c in theirs]
    out = []
    for i, name in enumerate(wanted):
        # a name that is free stays; later attributes' own names are kept free for them
        later = {w.lower() for w in wanted[i + 1:]}
        new, k = name, 1
        while new.lower() in taken or (new != name and new.lower() in later):
            new = f"input_{name}" if k == 1 else f"input_{name}_{k}"
            k += 1
        taken.add(new.lower())
        out.append(new)
    return out


def boundary_cells(nodata: np.ndarray) -> np.ndarray:
    """Valid cells on the raster's edge or with a nodata cell among their 8
    neighbours: where water may come in from ground the DEM does not hold."""
    from scipy import ndimage

    near = ndimage.binary_dilation(nodata, structure=np.ones((3, 3), bool))
    near[0, :] = near[-1, :] = True
    near[:, 0] = near[:, -1] = True
    return near & ~nodata


def catchment_table(result, attributes=None, *, role: str = "membership"):
    """One row per outlet and level (50%, 90%): polygon and areas.

    ``role="membership"``: the outlet's catchment (whole upstream area);
    ``role="subcatchment"``: its sub-catchment (cells whose first chosen
    outlet downstream it is). ``area_m2`` is the area of the cells in it in
    at least that share of realisations; ``area_mean_m2`` and the 5-95%
    range are over realisations. ``edge_cells`` is how many of those cells
    lie on the raster's edge or beside nodata (:func:`boundary_cells`);
    ``edge_limited`` says there are some: the catchment may reach beyond the
    DEM, and its areas are lower bounds. ``attributes`` (one row per outlet,
    e.g. :attr:`terrain.outlets.Outlets.attributes`) are appended to each row.

    Returns
    -------
    geopandas.GeoDataFrame with columns :data:`CATCHMENT_COLUMNS`, the
    attributes and geometry.
    """
    import geopandas as gpd

    dem, job = result.dem, result.job
    spec = LAYERS[layer_name("catchments", role)]
    areas = area_summary(result.log, job.ids, _AREA_FIELD[role])
    area_row = dem.cell_area_m2()
    boundary = boundary_cells(dem.nodata)
    rows = {c: [] for c in CATCHMENT_COLUMNS}
    geoms, index = [], []
    for k, (oid, lid) in enumerate(zip(job.ids, job.layer_ids)):
        p = result.layers[spec.concrete(lid)][0]
        for level in LEVELS:
            m = (p >= level) & ~dem.nodata
            geoms.append(region_polygons(dem, m.astype(np.int32), [1],
                                         connectivity=job.connectivity)[0])
            index.append(k)
            mean, p05, p95 = areas[oid]
            edge = int(np.count_nonzero(m & boundary))
            for col, v in zip(CATCHMENT_COLUMNS, (oid, lid, level, float((m * area_row[:, None]).sum()),
                                                  mean, p05, p95, edge, edge > 0)):
                rows[col].append(v)
    frame = _attach(pd.DataFrame(rows), index, attributes)
    return gpd.GeoDataFrame(frame, geometry=geoms, crs=dem.crs)


def snap_distances(dem: Dem, x0: float, y0: float, cells: np.ndarray) -> np.ndarray:
    """Distances (m) from a point to the centres of ``cells`` (flat indices):
    CRS units times the linear unit, or on a geographic grid degrees scaled
    by the WGS84 lengths of a degree at the point's latitude."""
    x, y = dem.xy(cells)
    if dem.geographic:
        mlon, mlat = metres_per_degree(y0)
        return np.hypot((x - x0) * mlon, (y - y0) * mlat)
    return np.hypot(x - x0, y - y0) * dem.linear_unit_m


def outlet_table(result, attributes=None, *, outlets=None):
    """One row per outlet: the point as given (``x``, ``y`` in the outlets file's
    own CRS, named in ``crs``; written as given), the same point in the DEM's
    CRS (``x_dem``, ``y_dem``, and the geometry), its most frequent snapped
    cell's centre in the DEM's CRS (``snapped_x``, ``snapped_y``; lowest cell
    index on ties) with the share of realisations that chose it, and the mean
    distance (m) from the point to the snapped cell's centre over
    realisations; then the outlet's attributes. ``outlets`` (a
    :class:`terrain.outlets.Outlets`) gives the coordinates as given; without
    it they are the job's, in the DEM's CRS.

    Returns
    -------
    geopandas.GeoDataFrame with columns :data:`OUTLET_COLUMNS`, the
    attributes and point geometry.
    """
    import geopandas as gpd
    from shapely.geometry import Point

    dem, job, log = result.dem, result.job, result.log
    rows = {c: [] for c in OUTLET_COLUMNS}
    given = getattr(outlets, "given_xy", None)
    given = job.xy if given is None else np.asarray(given, np.float64)
    crs = getattr(outlets, "given_crs", None) or _crs_name(dem.crs)
    for k, (oid, lid) in enumerate(zip(job.ids, job.layer_ids)):
        x0, y0 = (float(v) for v in job.xy[k])
        cells = np.asarray(log["cell"])[np.asarray(log["outlet"]) == k]
        if cells.size:
            values, counts = np.unique(cells, return_counts=True)
            best = int(values[np.argmax(counts)])
            sx, sy = (float(v[0]) for v in dem.xy(np.array([best])))
            share, dist = float(counts.max() / cells.size), float(snap_distances(dem, x0, y0,
                                                                                 cells).mean())
        else:
            sx = sy = share = dist = np.nan
        gx, gy = (float(v) for v in given[k])
        for col, v in zip(OUTLET_COLUMNS, (oid, lid, gx, gy, crs, x0, y0, sx, sy, share, dist)):
            rows[col].append(v)
    frame = _attach(pd.DataFrame(rows), range(len(job.ids)), attributes)
    return gpd.GeoDataFrame(frame, geometry=[Point(x, y) for x, y in job.xy], crs=dem.crs)


def _crs_name(crs) -> str:
    """The DEM's CRS as a short text (``EPSG:32633``, its name, or ``none``)."""
    if crs is None:
        return "none"
    from pyproj import CRS

    c = CRS.from_user_input(crs)
    code = c.to_epsg()
    return f"EPSG:{code}" if code else c.name


def summarise_catchments(result, attributes=None, *, outlets=None) -> CatchmentSummary:
    """The ``catchments``, ``subcatchments`` and ``outlets`` tables of a run
    (no tables when the run had no outlets); ``outlets`` (the
    :class:`terrain.outlets.Outlets` read) gives the coordinates as given."""
    if not result.job.ids:
        return CatchmentSummary({})
    return CatchmentSummary({
        "catchments": catchment_table(result, attributes, role="membership"),
        "subcatchments": catchment_table(result, attributes, role="subcatchment"),
        "outlets": outlet_table(result, attributes, outlets=outlets)})
