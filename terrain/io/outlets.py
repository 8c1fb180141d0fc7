"""Reading outlets (CSV or any vector format GDAL reads) into
:class:`~terrain.outlets.Outlets`: their CRS from the file, the ``crs`` option or a
sidecar, coordinates taken to the DEM's CRS.
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path

import numpy as np

from ..dem import Dem
from ..errors import (
    OutletError,
)
from ..outlets import Outlets, outlet_ids
from ._base import short

#: Sidecar files that may give a CSV of outlets its CRS, beside it (first found wins):
#: ``gauges.csv.crs``, ``gauges.crs`` (any text pyproj reads: ``EPSG:4326``, WKT, PROJ)
#: and ``gauges.prj`` (WKT, as beside a shapefile).
CRS_SIDECARS = ("{name}.crs", "{stem}.crs", "{stem}.prj")


def read_outlets(path: str | os.PathLike, dem: Dem, *, crs: str | None = None) -> Outlets:
    """Outlet points from a GeoPackage, GeoJSON, Shapefile or CSV, reprojected to
    the DEM's CRS, their coordinates as given kept beside.

    A CSV needs columns ``x`` and ``y`` and may have ``id``; its CRS is
    ``crs`` or, without it, a sidecar file (:data:`CRS_SIDECARS`); with
    neither it is taken to be the DEM's (``Outlets.crs_source`` is then
    ``"assumed"``). A vector file's points are in the CRS it declares
    (``crs`` may give one to a file that declares none, and must agree with
    one it declares). Points are reprojected to the DEM's CRS when both are
    known. Ids follow :mod:`terrain.outlets` (an outlet without one takes
    its row number); every column other than the geometry (a CSV's x and y)
    is kept as the outlets' attributes.

    Raises
    ------
    OutletError
        Missing or unreadable file, no points, non-point geometries, missing
        x/y columns, non-finite coordinates, repeated ids, an unreadable CRS
        (option or sidecar), a ``crs`` contradicting the file's own.
    """
    p = Path(path)
    if not p.exists():
        raise OutletError(f"{p}: no such outlets file")
    given = _outlet_crs_option(crs)
    try:
        if p.suffix.lower() == ".csv":
            (table, xy), (own, how) = _outlet_csv(p), _csv_crs(p, given)
        else:
            table, xy, own, how = _outlet_vector(p, given)
    except OutletError:
        raise
    except Exception as exc:  # pyogrio / pandas raise many classes for bad files
        raise OutletError(f"{p}: cannot read outlets ({short(exc)})") from None
    if xy.shape[0] == 0:
        raise OutletError(f"{p}: no outlet points in the file")
    if not np.isfinite(xy).all():
        raise OutletError(f"{p}: outlet coordinates must be finite numbers")
    id_col = _column(p, table.columns, "id")
    values = table[id_col].tolist() if id_col is not None else None
    ids, numbered = outlet_ids(values, xy.shape[0], str(p))
    attributes = table.drop(columns=[id_col]) if id_col is not None else table
    return Outlets(ids, _to_dem_crs(p, xy, own, dem), attributes.reset_index(drop=True), str(p),
                   numbered, given_xy=xy, given_crs=_crs_text(own if own is not None else dem.crs),
                   crs_source=how)


def _outlet_crs_option(crs):
    """The ``crs`` option as a pyproj CRS (None when not given)."""
    if crs is None:
        return None
    from pyproj import CRS

    try:
        return CRS.from_user_input(crs)
    except Exception as exc:
        raise OutletError(f"{{outlets_crs}} {crs!r} is not a CRS pyproj can read "
                          f"({short(exc)}); e.g. EPSG:4326", "outlets_crs") from None


def _csv_crs(p: Path, given):
    """A CSV's CRS and where it came from: the option, a sidecar, or none (assumed)."""
    if given is not None:
        return given, "option"
    from pyproj import CRS

    for pattern in CRS_SIDECARS:
        side = p.with_name(pattern.format(name=p.name, stem=p.stem))
        if side.is_file():
            try:
                return CRS.from_user_input(side.read_text().strip()), f"sidecar {side.name}"
            except Exception as exc:
                raise OutletError(f"{side}: not a CRS pyproj can read ({short(exc)})") from None
    return None, "assumed"


def _to_dem_crs(p: Path, xy: np.ndarray, own, dem: Dem) -> np.ndarray:
    """Points from their CRS ``own`` to the DEM's (as they are when either is unknown)."""
    if own is None or dem.crs is None or not xy.size:
        return xy
    from pyproj import CRS, Transformer

    target = CRS.from_user_input(dem.crs)
    if own.equals(target):
        return xy
    t = Transformer.from_crs(own, target, always_xy=True)
    x, y = t.transform(xy[:, 0], xy[:, 1])
    out = np.column_stack([x, y])
    if not np.isfinite(out).all():
        raise OutletError(f"{p}: outlet points cannot be reprojected from {_crs_text(own)} to "
                          "the DEM's CRS (check the coordinates and their CRS)")
    return out


def _crs_text(crs) -> str | None:
    """A CRS as a short text: ``EPSG:4326`` where it has a code, else its name."""
    if crs is None:
        return None
    from pyproj import CRS

    c = CRS.from_user_input(crs)
    code = c.to_epsg()
    return f"EPSG:{code}" if code else c.name


def _column(p: Path, columns, name: str):
    """The column called ``name``: spelt exactly so, else the one column equal to
    it without case and blanks (None when there is none); several such
    columns and none exact is ambiguous, and refused."""
    exact = [c for c in columns if str(c) == name]
    if exact:
        return exact[0]
    loose = [c for c in columns if str(c).lower().strip() == name]
    if len(loose) > 1:
        raise OutletError(f"{p}: columns {', '.join(map(repr, loose))} could each be the outlets' "
                          f"{name}; name one of them {name!r}")
    return loose[0] if loose else None


def _outlet_csv(p: Path):
    import pandas as pd

    head = pd.read_csv(p, nrows=0).columns
    id_col = _column(p, head, "id")
    df = pd.read_csv(p, dtype={id_col: str} if id_col is not None else None)  # ids stay text
    x, y = _column(p, df.columns, "x"), _column(p, df.columns, "y")
    if x is None or y is None:
        raise OutletError(f"{p}: a CSV of outlets needs columns x and y (and optionally id)")
    xy = df[[x, y]].to_numpy(dtype=np.float64)
    return df.drop(columns=[x, y]), xy


def _outlet_vector(p: Path, given):
    """A vector file's table, points as given, their CRS and where it came from."""
    import pyogrio
    from pyproj import CRS

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        gdf = pyogrio.read_dataframe(p)
    if len(gdf) and gdf.crs is not None:
        _check_lonlat(p, gdf)
    own, how = (CRS.from_user_input(gdf.crs), "file") if gdf.crs is not None else (given, "option")
    if own is None:
        how = "assumed"
    elif given is not None and not own.equals(given):
        raise OutletError(f"{p}: the file declares its CRS as {_crs_text(own)}, but "
                          f"{{outlets_crs}} says {_crs_text(given)}; drop the option or fix the "
                          "file", "outlets_crs")
    geom = gdf.geometry
    if len(gdf) and (geom.isna().any() or not all(t == "Point" for t in geom.geom_type)):
        kinds = sorted({str(t) for t in geom.geom_type})
        raise OutletError(f"{p}: outlets must be points, found {kinds}")
    xy = np.column_stack([geom.x, geom.y]) if len(gdf) else np.empty((0, 2))
    return gdf.drop(columns=gdf.geometry.name), xy, own, how


def _check_lonlat(p: Path, gdf) -> None:
    """Refuse points whose numbers cannot be in the file's geographic CRS (a
    GeoJSON without a ``crs`` member is WGS84 longitude/latitude, RFC 7946,
    whatever numbers it holds)."""
    from pyproj import CRS

    crs = CRS.from_user_input(gdf.crs)
    if not crs.is_geographic:
        return
    geom = gdf.geometry
    pts = geom[geom.notna() & (geom.geom_type == "Point")]
    if not len(pts):
        return
    x, y = pts.x.to_numpy(), pts.y.to_numpy()
    bad = np.flatnonzero(~((np.abs(y) <= 90) & (np.abs(x) <= 360)))
    if bad.size:
        i = int(bad[0])
        geojson = (" (a GeoJSON without a \"crs\" member is WGS84 longitude/latitude, RFC 7946)"
                   if p.suffix.lower() in (".geojson", ".json") else "")
        raise OutletError(f"{p}: point {i + 1} is ({x[i]:.10g}, {y[i]:.10g}), which is not a "
                          f"longitude/latitude, yet the file's CRS is {crs.name}{geojson}; give "
                          "the file the CRS its coordinates are in")
