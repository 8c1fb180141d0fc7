"""Everything that touches the file system: reading DEMs, atomic writes.

This is the only module that opens paths. Every output is written to a
temporary name in the destination folder and renamed into place when it is
complete, so an interrupted run leaves either the previous file or none,
never a partial one.
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np

from .dem import Dem
from .errors import (
    BandError,
    CorruptRasterError,
    DemNotFoundError,
    NotARasterError,
    OutletError,
    OutputError,
    WindowError,
)
from .outlets import Outlets, outlet_ids

__all__ = ["read_dem", "read_outlets", "dem_warnings", "atomic_path", "write_json", "write_layer",
           "prepare_outdir", "write_frames", "write_csv", "write_figure", "save_npz", "load_npz",
           "file_sha256", "available_memory"]


def read_dem(path: str | os.PathLike, *, band: int | None = None,
             bbox: tuple[float, float, float, float] | None = None) -> Dem:
    """Read one band of any raster GDAL can open into a :class:`~terrain.dem.Dem`.

    Parameters
    ----------
    path : path-like
        The raster file.
    band : int, optional
        1-based band number. Required for multi-band files.
    bbox : (xmin, ymin, xmax, ymax), optional
        Window in CRS units; cells whose area meets the box are read.

    Raises
    ------
    DemNotFoundError, NotARasterError, CorruptRasterError, BandError,
    WindowError, NoValidCellsError
        Each message names the file and the problem.
    """
    p = Path(path)
    with _open_raster(p) as ds:
        band = _band(p, ds, band)
        window = _window(p, ds, bbox)
        arr = _read_band(p, ds, band, window)
        transform = ds.window_transform(window) if window is not None else ds.transform
        crs = ds.crs
        units = ds.units[band - 1] if ds.units and ds.units[band - 1] else None
        nodata_value = ds.nodatavals[band - 1]
        dtype = np.dtype(ds.dtypes[band - 1])
    data = np.asarray(arr.data)
    mask = np.ma.getmaskarray(arr)
    small = dtype.kind == "f" and dtype.itemsize == 4 or dtype.kind in "iub" and dtype.itemsize <= 2
    z = data.astype(np.float32 if small else np.float64)
    geographic = bool(crs is not None and crs.is_geographic)
    unit_m = 1.0
    if crs is not None and not geographic:
        with contextlib.suppress(Exception):
            unit_m = float(crs.linear_units_factor[1])
    return Dem(z=z, nodata=mask, transform=tuple(transform)[:6],
               crs=crs.to_wkt() if crs is not None else None, geographic=geographic,
               linear_unit_m=unit_m, vertical_units=units, source=str(p),
               meta=_meta(data, mask, dtype, nodata_value, band))


def _open_raster(p: Path):
    import rasterio
    from rasterio.errors import RasterioIOError

    if not p.exists():
        raise DemNotFoundError(f"{p}: no such file")
    if p.is_dir() and not any(p.iterdir()):
        raise NotARasterError(f"{p}: is an empty folder, not a raster")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return rasterio.open(p)
        except RasterioIOError as exc:
            raise NotARasterError(f"{p}: not a raster any driver can read ({_short(exc)})") from None


def _band(p: Path, ds, band: int | None) -> int:
    if band is None:
        if ds.count > 1:
            names = ", ".join(f"{i}={d or 'unnamed'}" for i, d in
                              zip(range(1, ds.count + 1), ds.descriptions))
            raise BandError(f"{p}: has {ds.count} bands ({names}); choose one with {{band}}",
                            "band")
        return 1
    if not 1 <= band <= ds.count:
        raise BandError(f"{p}: band {band} does not exist (the file has {ds.count})")
    return band


def _window(p: Path, ds, bbox):
    from rasterio.windows import from_bounds

    if bbox is None:
        return None
    xmin, ymin, xmax, ymax = bbox
    l, b, r, t = ds.bounds
    if not (xmin < xmax and ymin < ymax):
        raise WindowError(f"{p}: bounding box {bbox} is empty (need xmin<xmax, ymin<ymax)")
    if xmax <= l or xmin >= r or ymax <= b or ymin >= t:
        raise WindowError(f"{p}: bounding box {bbox} lies outside the raster "
                          f"(bounds {l:g}, {b:g}, {r:g}, {t:g})")
    return from_bounds(max(xmin, l), max(ymin, b), min(xmax, r), min(ymax, t),
                       ds.transform).round_offsets().round_lengths()


def _read_band(p: Path, ds, band: int, window):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return ds.read(band, window=window, masked=True)
    except Exception as exc:  # rasterio raises several classes for damaged files
        raise CorruptRasterError(f"{p}: pixels cannot be read, file truncated or damaged "
                                 f"({_short(exc)})") from None


def _meta(data, mask, dtype, nodata_value, band) -> dict:
    nonfinite = int((~np.isfinite(data) & ~mask).sum()) if data.dtype.kind == "f" else 0
    meta = {"dtype": str(dtype), "nodata_value": nodata_value, "nonfinite_cells": nonfinite,
            "band": band}
    valid_vals = data[~mask & np.isfinite(data)] if data.size else data
    if nodata_value is not None and np.isfinite(nodata_value) and valid_vals.size:
        lo, hi = float(valid_vals.min()), float(valid_vals.max())
        meta["nodata_in_range"] = bool(lo <= nodata_value <= hi)
    return meta


def available_memory() -> int:
    """MemAvailable from /proc/meminfo (Linux), else physical pages x page size."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_AVPHYS_PAGES")


def read_outlets(path: str | os.PathLike, dem: Dem) -> Outlets:
    """Outlet points from a GeoPackage, GeoJSON, Shapefile or CSV, in the DEM's CRS.

    A CSV needs columns ``x`` and ``y`` (the DEM's CRS) and may have ``id``.
    Vector files are reprojected to the DEM's CRS when both declare one.
    Ids follow :mod:`terrain.outlets` (an outlet without one takes its row
    number); every column other than the geometry (a CSV's x and y) is
    kept as the outlets' attributes.

    Raises
    ------
    OutletError
        Missing or unreadable file, no points, non-point geometries, missing
        x/y columns, non-finite coordinates, repeated ids.
    """
    p = Path(path)
    if not p.exists():
        raise OutletError(f"{p}: no such outlets file")
    try:
        table, xy = _outlet_csv(p) if p.suffix.lower() == ".csv" else _outlet_vector(p, dem)
    except OutletError:
        raise
    except Exception as exc:  # pyogrio / pandas raise many classes for bad files
        raise OutletError(f"{p}: cannot read outlets ({_short(exc)})") from None
    if xy.shape[0] == 0:
        raise OutletError(f"{p}: no outlet points in the file")
    if not np.isfinite(xy).all():
        raise OutletError(f"{p}: outlet coordinates must be finite numbers")
    cols = {str(c).lower().strip(): c for c in table.columns}
    values = table[cols["id"]].tolist() if "id" in cols else None
    ids, numbered = outlet_ids(values, xy.shape[0], str(p))
    attributes = table.drop(columns=[cols["id"]]) if "id" in cols else table
    return Outlets(ids, xy, attributes.reset_index(drop=True), str(p), numbered)


def _outlet_csv(p: Path):
    import pandas as pd

    head = pd.read_csv(p, nrows=0).columns
    ids = [c for c in head if str(c).lower().strip() == "id"]
    df = pd.read_csv(p, dtype={c: str for c in ids})  # ids stay text ("007")
    cols = {str(c).lower().strip(): c for c in df.columns}
    if "x" not in cols or "y" not in cols:
        raise OutletError(f"{p}: a CSV of outlets needs columns x and y (and optionally id)")
    xy = df[[cols["x"], cols["y"]]].to_numpy(dtype=np.float64)
    return df.drop(columns=[cols["x"], cols["y"]]), xy


def _outlet_vector(p: Path, dem: Dem):
    import pyogrio
    from pyproj import CRS

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        gdf = pyogrio.read_dataframe(p)
    if len(gdf) and dem.crs is not None and gdf.crs is not None and \
            not CRS.from_user_input(gdf.crs).equals(CRS.from_user_input(dem.crs)):
        gdf = gdf.to_crs(dem.crs)
    geom = gdf.geometry
    if len(gdf) and (geom.isna().any() or not all(t == "Point" for t in geom.geom_type)):
        kinds = sorted({str(t) for t in geom.geom_type})
        raise OutletError(f"{p}: outlets must be points, found {kinds}")
    xy = np.column_stack([geom.x, geom.y]) if len(gdf) else np.empty((0, 2))
    return gdf.drop(columns=gdf.geometry.name), xy


def dem_warnings(dem: Dem) -> list[str]:
    """Things about a DEM a user should be told once (not errors)."""
    out = []
    m = dem.meta
    if m.get("nonfinite_cells"):
        out.append(f"{dem.source}: {m['nonfinite_cells']} NaN or infinite cells treated as nodata")
    if m.get("nodata_in_range"):
        out.append(f"{dem.source}: the nodata value {m['nodata_value']:g} lies inside the "
                   "elevation range; cells equal to it are treated as nodata -- check the file's "
                   "nodata setting")
    if dem.crs is None:
        out.append(f"{dem.source}: no CRS declared; distances and areas are in cell units "
                   "(area_m2 holds squared CRS units)")
    if dem.geographic:
        out.append(f"{dem.source}: geographic CRS; cell sizes in metres follow the latitude "
                   "of each row (WGS84)")
    return out


def _short(exc: BaseException) -> str:
    return str(exc).strip().splitlines()[0][:160] if str(exc).strip() else type(exc).__name__


# ----------------------------------------------------------------------------
# outputs
# ----------------------------------------------------------------------------
def prepare_outdir(outdir: str | os.PathLike, names: list[str], *, overwrite: bool) -> Path:
    """Check (and create) an output folder before any work starts.

    Raises :class:`OutputError` when the path is an existing file, cannot be
    created or written, or when one of ``names`` exists and ``overwrite`` is
    False (the message lists them and names the ``overwrite`` parameter).
    """
    out = Path(outdir)
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is a file, not a folder; choose another output folder")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder ({exc.strerror})") from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise OutputError(f"{out}: output folder is not writable; choose another output folder")
    clash = [n for n in names if (out / n).exists()]
    if clash and not overwrite:
        more = f" and {len(clash) - 3} more" if len(clash) > 3 else ""
        raise OutputError(f"{out}: would overwrite {', '.join(clash[:3])}{more}; "
                          "pass {overwrite} to replace them", "overwrite")
    return out


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike):
    """Yield a temporary path beside ``dest``; rename it onto ``dest`` on success.

    On any exception (or interrupt) the temporary file is removed and
    ``dest`` is untouched.
    """
    dest = Path(dest)
    fd, tmp = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".part" + dest.suffix,
                               dir=dest.parent)
    os.close(fd)
    os.unlink(tmp)
    try:
        yield Path(tmp)
        os.replace(tmp, dest)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)


def write_json(dest: str | os.PathLike, obj: dict) -> None:
    """Write ``obj`` as indented JSON, atomically."""
    with atomic_path(dest) as tmp:
        tmp.write_text(json.dumps(obj, indent=2, default=_json_default) + "\n")


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(type(o).__name__)


#: How every raster layer is laid out: a Cloud Optimized GeoTIFF written by GDAL's COG
#: driver (OGC Cloud Optimized GeoTIFF standard, 2023): 256x256 internal tiles, internal
#: overviews (average of valid cells) down to one tile, placed as the standard requires,
#: DEFLATE with the floating-point predictor, per-band statistics stored in the file.
COG_OPTIONS = dict(driver="COG", compress="deflate", predictor=3, blocksize=256,
                   overview_resampling="average", statistics="YES", bigtiff="IF_SAFER")


def write_layer(dest: str | os.PathLike, dem: Dem, estimate: np.ndarray, se: np.ndarray, *,
                name: str, units: str, description: str, tags: dict, note: str = "") -> None:
    """Write one layer as a two-band float32 Cloud Optimized GeoTIFF, atomically.

    Band 1 is the estimate, band 2 its standard error, both on the DEM's
    grid, CRS and transform, nodata = NaN where the DEM has none. The file is
    laid out by GDAL's COG driver (:data:`COG_OPTIONS`): tiled, with internal
    overviews, DEFLATE with the floating-point predictor, and each band's
    minimum, maximum, mean, standard deviation and valid percentage stored
    as ``STATISTICS_*`` band metadata so a GIS can stretch without scanning.
    ``tags`` (the run's parameters) are dataset metadata; ``note`` (a caution
    that travels with the layer) is appended to both band descriptions and
    stored as each band's ``NOTE`` item.

    Memory: 16 bytes per cell while writing (the two float32 bands, and
    rasterio's in-memory copy of them that the COG driver reads); the
    overviews are staged in a temporary file beside ``dest``, removed when
    done. A blocked (out-of-core) writer gets the same layout by copying a
    tiled staging GeoTIFF with the same :data:`COG_OPTIONS`.

    References
    ----------
    .. [1] Open Geospatial Consortium (2023). OGC Cloud Optimized GeoTIFF
       Standard, OGC 21-026.
    """
    e = np.where(dem.nodata, np.nan, estimate).astype(np.float32)
    s = np.where(dem.nodata, np.nan, se).astype(np.float32)
    suffix = f"; {note}" if note else ""
    with atomic_path(dest) as tmp, _cog_staging(tmp):
        with _open_cog(tmp, dem) as ds:
            ds.write(e, 1)
            ds.write(s, 2)
            ds.set_band_description(1, f"{name} ({units}){suffix}")
            ds.set_band_description(2, f"{name} standard error ({units}){suffix}")
            ds.units = (units, units)
            ds.update_tags(**{k: _tag(v) for k, v in tags.items()},
                           LAYER=name, DESCRIPTION=description)
            for band, role in ((1, "estimate"), (2, "standard_error")):
                ds.update_tags(band, ROLE=role, **({"NOTE": note} if note else {}))


def _open_cog(tmp: Path, dem: Dem):
    """A two-band float32 writer on ``dem``'s grid that GDAL's COG driver lays out on close.

    rasterio buffers the bands in memory and hands them to the COG driver's
    copy when the dataset closes (the driver only creates by copying).
    """
    import rasterio
    from rasterio.transform import Affine

    rows, cols = dem.shape
    return rasterio.open(tmp, "w", height=rows, width=cols, count=2, dtype="float32",
                         crs=dem.crs, transform=Affine(*dem.transform), nodata=np.nan,
                         **COG_OPTIONS)


@contextlib.contextmanager
def _cog_staging(tmp: Path):
    """Silence rasterio's no-CRS warning; remove the COG driver's overview staging files.

    GDAL's COG driver stages overviews in ``<file>.ovr.tmp`` (and
    ``<file>.msk.ovr.tmp``) beside the file it writes and deletes them
    itself; this makes sure none is left after an error either.
    """
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # no-CRS rasters warn in rasterio
            yield
    finally:
        for extra in (".ovr.tmp", ".msk.ovr.tmp"):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(f"{tmp}{extra}")


def _tag(v) -> str:
    if isinstance(v, (dict, list, tuple)):
        return json.dumps(v, default=_json_default)
    return str(v)


def write_frames(dest: str | os.PathLike, frames: dict, descriptions: dict | None = None) -> None:
    """Write data frames as the layers of one GeoPackage, atomically.

    ``frames`` maps layer name to GeoDataFrame; ``descriptions`` maps layer
    name to the text stored in the layer's ``gpkg_contents.description``
    (the ``gpkg_contents`` table of the OGC GeoPackage Encoding Standard
    1.3), which a GIS shows as the layer's abstract; GDAL's GPKG driver
    writes it from the ``DESCRIPTION`` layer creation option.
    """
    descriptions = descriptions or {}
    with atomic_path(dest) as tmp, warnings.catch_warnings():
        # a DEM without CRS was already reported once; pyogrio would repeat it
        warnings.filterwarnings("ignore", "'crs' was not provided", UserWarning)
        for layer, gdf in frames.items():
            options = {"DESCRIPTION": descriptions[layer]} if layer in descriptions else None
            gdf.to_file(tmp, layer=layer, driver="GPKG", engine="pyogrio", layer_options=options)


def write_csv(dest: str | os.PathLike, frame) -> None:
    """Write a data frame (without any geometry column) as CSV, atomically."""
    if "geometry" in getattr(frame, "columns", ()):
        frame = frame.drop(columns="geometry")
    with atomic_path(dest) as tmp:
        frame.to_csv(tmp, index=False)


def write_figure(dest: str | os.PathLike, figure) -> None:
    """Save a matplotlib Figure as PNG, atomically."""
    with atomic_path(dest) as tmp:
        figure.savefig(tmp, format="png")


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes (provenance)."""
    import hashlib

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def save_npz(dest: str | os.PathLike, **arrays) -> None:
    """Save arrays to an uncompressed ``.npz`` atomically (no pickled objects)."""
    with atomic_path(dest) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
            fh.flush()
            os.fsync(fh.fileno())


def load_npz(path: str | os.PathLike) -> dict:
    """Load an ``.npz`` with ``allow_pickle=False`` into a dict of arrays."""
    with np.load(path, allow_pickle=False) as f:
        return {k: f[k] for k in f.files}
