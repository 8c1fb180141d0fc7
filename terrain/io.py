"""Everything that touches the file system: reading DEMs, atomic writes.

This is the only module that opens paths. Every output is written to a
temporary name in the destination folder and renamed into place when it is
complete, so an interrupted run leaves either the previous file or none,
never a partial one.
"""

from __future__ import annotations

import contextlib
import errno
import functools
import glob
import json
import math
import os
import re
import shutil
import stat
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .dem import Dem, DiskDem, RasterHeader, vertical_unit
from .errors import (
    BandError,
    CairnWarning,
    CheckpointError,
    CorruptRasterError,
    DemNotFoundError,
    GeoreferenceError,
    NotARasterError,
    NoValidCellsError,
    OptionError,
    OutletError,
    OutputError,
    RasterTypeError,
    WindowError,
)
from .outlets import Outlets, outlet_ids

__all__ = ["read_dem", "read_header", "SENTINELS", "read_outlets", "dem_warnings", "atomic_path",
           "write_json", "write_layer", "prepare_outdir", "claim_outdir", "hold_outdir",
           "staged_outputs", "clean_leftovers", "write_frames", "write_csv", "write_figure",
           "save_npz", "load_npz", "file_sha256", "available_memory", "LOCK_NAME",
           "STAGING_PREFIX", "PUBLISHING", "same_file", "file_exists", "remove_file", "check_file_folder",
           "NpyWindows", "create_npy", "write_npy_window", "save_npy", "save_scratch",
           "load_scratch", "scratch_folder", "save_shared", "load_shared",
           "remove_orphan_scratch", "CountStore", "write_layers_by_window",
           "SCRATCH_PREFIX", "hold_checkpoint", "OUTPUT_NAME", "csv_cell", "csv_safe",
           "FORMULA_START", "scratch_parent", "free_bytes", "check_scratch_space",
           "is_count_store", "check_count_store_path", "COUNTS_TAG", "SCRATCH_LOCK",
           "resolves_into", "replaced_by", "kernel_cache_folder", "replaced_beside_checkpoint"]


# Common nodata values of DEM products and GIS packages that files often hold
# without declaring them (common practice, no source).
SENTINELS = (-9999.0, -99999.0, -32768.0, -32767.0, float(np.finfo(np.float32).min),
             float(np.float32(-3.4e38)))


def read_header(path: str | os.PathLike, *, band: int | None = None,
                bbox: tuple[float, float, float, float] | None = None,
                nodata: float | None = None, vertical_unit: str | None = None) -> RasterHeader:
    """What :func:`read_dem` would read, from the header alone (no pixels).

    Same parameters and errors as :func:`read_dem`; used to judge the memory
    a run needs before reading the raster.
    """
    p = Path(path)
    with _open_raster(p) as ds:
        return _header(p, ds, band, bbox, nodata, vertical_unit)


def read_dem(path: str | os.PathLike, *, band: int | None = None,
             bbox: tuple[float, float, float, float] | None = None,
             nodata: float | None = None, scratch: str | os.PathLike | None = None,
             vertical_unit: str | None = None) -> Dem:
    """Read one band of any raster GDAL can open into a :class:`~terrain.dem.Dem`.

    Parameters
    ----------
    path : path-like
        The raster file.
    band : int, optional
        1-based band number. Required for multi-band files.
    bbox : (xmin, ymin, xmax, ymax), optional
        Window in CRS units: every cell whose area meets the box is read (a
        box inside one cell reads that cell). North-up and bottom-up grids
        only; a rotated or sheared grid with a box is refused.
    nodata : float, optional
        Cells holding this value (as stored, before scale and offset) are
        nodata, in addition to any nodata value the file declares.
    scratch : path-like, optional
        A folder (see :func:`scratch_folder`): the DEM is read band by band
        into a ``.npy`` file there and stays on disk -- a
        :class:`~terrain.dem.DiskDem`, for out-of-core runs. Memory: one band
        of :data:`~terrain.dem.BAND_ROWS` x 16 rows at a time.
    vertical_unit : {"m", "ft", "us-ft"}, optional
        The unit of the elevations. Default: the band's declared unit type
        (GDAL), or metres when the file declares none (``Dem.vertical_unit_source``
        says which; :func:`dem_warnings` warns about an assumed unit).

    The band's scale and offset (GDAL metadata) are applied: elevation =
    stored value x scale + offset. ``Dem.meta`` records the band, box,
    nodata, scale, offset and window read.

    Raises
    ------
    DemNotFoundError, NotARasterError, CorruptRasterError, BandError,
    WindowError, RasterTypeError, NoValidCellsError, OptionError
        Each message names the file and the problem.
    """
    p = Path(path)
    with _open_raster(p) as ds:
        h = _header(p, ds, band, bbox, nodata, vertical_unit)
        if scratch is not None:
            return _read_to_disk(p, ds, h, nodata, bbox, Path(scratch))
        arr = _read_band(p, ds, h.band, h.window)
    data = np.asarray(arr.data)
    mask = np.ma.getmaskarray(arr)
    z, mask, huge = _elevations(data, mask, h, nodata)
    stats = _BandStats()
    stats.add(data, mask, huge)
    meta = stats.meta(h, nodata)
    del data, arr
    return Dem(z=z, nodata=mask, **_grid(h, p, meta, bbox))


def _grid(h: RasterHeader, p: Path, meta: dict, bbox) -> dict:
    """The georeferencing and metadata fields of a Dem read from ``p``."""
    return dict(transform=h.transform, crs=h.crs, geographic=h.geographic,
                linear_unit_m=h.linear_unit_m, vertical_units=h.vertical_units, source=str(p),
                vertical_unit=h.vertical_unit, vertical_unit_source=h.vertical_unit_source,
                meta={**meta, "bbox": list(bbox) if bbox is not None else None})


#: Elevations must fit the float32 realisations are computed in: a finite value
#: beyond this (e.g. 1e300 in a float64 file) is no elevation, and is read as nodata
ELEVATION_LIMIT = float(np.finfo(np.float32).max)


def _elevations(data: np.ndarray, mask: np.ndarray, h: RasterHeader, nodata):
    """Stored values to elevations (scale, offset; NaN on nodata), the full mask,
    and the count of finite values too large to be elevations (masked too)."""
    if nodata is not None and _fits(nodata, data.dtype):
        mask = mask | (data == data.dtype.type(nodata))
    z = data.astype(np.float32 if h.value_bytes == 4 else np.float64)
    if h.scale != 1.0:
        z *= z.dtype.type(h.scale)
    if h.offset != 0.0:
        z += z.dtype.type(h.offset)
    huge = 0
    if z.dtype == np.float64:
        big = np.isfinite(z) & (np.abs(z) > ELEVATION_LIMIT) & ~mask
        huge = int(big.sum())
        if huge:
            mask = mask | big
    return z, mask, huge


def _read_to_disk(p: Path, ds, h: RasterHeader, nodata, bbox, folder: Path) -> DiskDem:
    """The DEM read band by band into ``folder/dem.npy`` (NaN on nodata)."""
    from .dem import BAND_ROWS, DemChecksum

    rows, cols = h.shape
    dtype = np.float32 if h.value_bytes == 4 else np.float64
    store = folder / "dem.npy"
    create_npy(str(store), (rows, cols), dtype)
    check, stats = DemChecksum(h.shape), _BandStats()
    lo, hi = math.inf, -math.inf  # the elevations' range (scale and offset applied)
    col_off, row_off = (h.window[0], h.window[1]) if h.window is not None else (0, 0)
    step = BAND_ROWS * max(1, min(16, (64 << 20) // max(cols * 8 * BAND_ROWS, 1)))
    for r0 in range(0, rows, step):
        n = min(step, rows - r0)
        arr = _read_band(p, ds, h.band, (col_off, row_off + r0, cols, n))
        data = np.asarray(arr.data)
        z, mask, huge = _elevations(data, np.ma.getmaskarray(arr), h, nodata)
        stats.add(data, mask, huge)
        mask |= ~np.isfinite(z)
        z[mask] = np.nan
        if not mask.all():
            lo, hi = min(lo, float(np.nanmin(z))), max(hi, float(np.nanmax(z)))
        for s in range(0, n, BAND_ROWS):
            check.update(z[s:s + BAND_ROWS], mask[s:s + BAND_ROWS])
        write_npy_window(str(store), r0, 0, z)
    if stats.valid == 0:
        raise NoValidCellsError(f"{p}: no valid cells (all nodata or non-finite)")
    z = NpyWindows(str(store))
    return DiskDem(z=z, nodata=None, digest=check.hexdigest(), lowest_value=lo,
                   highest_value=hi, scratch=str(folder),
                   new_grid=functools.partial(_new_grid, folder), **_grid(h, p, stats.meta(h, nodata),
                                                                            bbox))


def _new_grid(folder: Path, name: str, shape, dtype) -> NpyWindows:
    """A grid-sized ``.npy`` array ``name`` in ``folder``, read and written by window."""
    path = str(folder / f"{name}.npy")
    create_npy(path, shape, dtype)
    return NpyWindows(path)


class _BandStats:
    """What the metadata says of the values read, summed band by band: non-finite
    cells, the valid range, counts of common nodata sentinels."""

    def __init__(self):
        self.nonfinite = self.valid = self.huge = 0
        self.lo, self.hi = math.inf, -math.inf
        self.sentinels = dict.fromkeys(SENTINELS, 0)

    def add(self, data: np.ndarray, mask: np.ndarray, huge: int = 0) -> None:
        self.huge += huge
        if data.dtype.kind == "f":
            self.nonfinite += int((~np.isfinite(data) & ~mask).sum())
        vals = data[~mask & np.isfinite(data)] if data.size else data
        self.valid += int(vals.size)
        if vals.size:
            self.lo, self.hi = min(self.lo, float(vals.min())), max(self.hi, float(vals.max()))
            for value in SENTINELS:
                if _fits(value, data.dtype):
                    self.sentinels[value] += int(np.count_nonzero(vals == value))

    def meta(self, h: RasterHeader, nodata) -> dict:
        meta = {"dtype": h.dtype, "nodata_value": h.nodata_value,
                "nonfinite_cells": self.nonfinite, "band": h.band, "nodata": nodata,
                "scale": h.scale, "offset": h.offset,
                "window": list(h.window) if h.window is not None else None}
        if self.huge:
            meta["oversized_cells"] = self.huge
        if h.nodata_value is not None and np.isfinite(h.nodata_value) and self.valid:
            meta["nodata_in_range"] = bool(self.lo <= h.nodata_value <= self.hi)
        if h.nodata_value is None and nodata is None and self.valid:
            for value, count in self.sentinels.items():
                if count:
                    meta["undeclared_sentinel"] = {"value": value, "cells": count}
                    break
        return meta


def _fits(value: float, dtype: np.dtype) -> bool:
    """True when ``value`` can be held by ``dtype`` (always for floats)."""
    if dtype.kind == "f":
        return True
    if dtype.kind == "b":
        return value in (0, 1)
    info = np.iinfo(dtype)
    return float(value).is_integer() and info.min <= value <= info.max


def _header(p: Path, ds, band: int | None, bbox, nodata, given_unit=None) -> RasterHeader:
    band = _band(p, ds, band)
    dtype = np.dtype(ds.dtypes[band - 1])
    if dtype.kind == "c":
        raise RasterTypeError(f"{p}: band {band} holds complex numbers ({dtype}); cairn needs "
                              "real elevations -- convert the band to real values first")
    if nodata is not None and not (isinstance(nodata, (int, float, np.number))
                                   and math.isfinite(nodata)):
        raise OptionError(f"{{nodata}} must be a finite number, got {nodata}", "nodata")
    window = _window(p, ds, bbox)
    transform = ds.window_transform(window) if window is not None else ds.transform
    crs = ds.crs
    geographic = bool(crs is not None and crs.is_geographic)
    if geographic:
        _check_latitudes(p, tuple(transform)[:6], window.height if window is not None
                         else ds.height, window.width if window is not None else ds.width)
    unit_m = 1.0
    if crs is not None and not geographic:
        with contextlib.suppress(Exception):
            unit_m = float(crs.linear_units_factor[1])
    small = dtype.kind == "f" and dtype.itemsize == 4 or dtype.kind in "iub" and dtype.itemsize <= 2
    scale, offset = (float(v) for v in (ds.scales[band - 1], ds.offsets[band - 1]))
    shape = (int(window.height), int(window.width)) if window is not None else (ds.height, ds.width)
    declared = ds.units[band - 1] if ds.units and ds.units[band - 1] else None
    unit, how = vertical_unit(declared, given_unit, source=str(p))
    return RasterHeader(
        source=str(p), shape=shape, dtype=str(dtype), value_bytes=4 if small else 8,
        transform=tuple(transform)[:6], crs=crs.to_wkt() if crs is not None else None,
        geographic=geographic, linear_unit_m=unit_m,
        vertical_units=declared, vertical_unit=unit, vertical_unit_source=how,
        band=band, scale=scale, offset=offset, nodata_value=ds.nodatavals[band - 1],
        window=None if window is None else (int(window.col_off), int(window.row_off),
                                            int(window.width), int(window.height)))


def _check_latitudes(p: Path, transform, rows: int, cols: int) -> None:
    """Refuse a geographic grid whose cell centres lie beyond a pole."""
    a, b, c, d, e, f = transform
    lats = [d * (j + 0.5) + e * (i + 0.5) + f for i in (0, rows - 1) for j in (0, cols - 1)]
    worst = max(lats, key=abs)
    if abs(worst) > 90 + 1e-9:
        raise GeoreferenceError(f"{p}: the CRS is geographic but the grid's cells reach latitude "
                                f"{abs(worst):.6g}°{'N' if worst > 0 else 'S'}, beyond the pole; "
                                "check the file's CRS and transform (a projected grid labelled "
                                "as degrees?)")


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
    """The cells whose area meets the box, as a rasterio Window (None: all)."""
    from rasterio.windows import Window

    if bbox is None:
        return None
    xmin, ymin, xmax, ymax = (float(v) for v in bbox)
    if not all(map(math.isfinite, (xmin, ymin, xmax, ymax))) or not (xmin < xmax and ymin < ymax):
        raise WindowError(f"{p}: bounding box {tuple(bbox)} is empty (need finite numbers with "
                          "xmin<xmax, ymin<ymax)")
    a, b, c, d, e, f = tuple(ds.transform)[:6]
    if b != 0 or d != 0:
        raise WindowError(f"{p}: the grid is rotated or sheared, so a {{bbox}} in CRS units is "
                          "not a block of rows and columns; crop or warp the raster to a "
                          "north-up grid first, or leave out {bbox}", "bbox")
    c0, c1 = _cell_span((xmin - c) / a, (xmax - c) / a, ds.width)
    r0, r1 = _cell_span((ymin - f) / e, (ymax - f) / e, ds.height)
    if c1 <= c0 or r1 <= r0:
        xs = sorted((c, c + a * ds.width))
        ys = sorted((f, f + e * ds.height))
        raise WindowError(f"{p}: bounding box {tuple(bbox)} lies outside the raster "
                          f"(bounds {xs[0]:g}, {ys[0]:g}, {xs[1]:g}, {ys[1]:g})")
    return Window(c0, r0, c1 - c0, r1 - r0)


def _cell_span(u: float, v: float, n: int) -> tuple[int, int]:
    """Cells ``[i0, i1)`` of ``0..n`` whose extent meets the interval between
    fractional cell coordinates ``u`` and ``v``. A box edge within 1e-9 cells
    of a cell edge lies on it; an interval inside one cell selects that cell."""
    lo, hi = min(u, v), max(u, v)
    if hi <= 1e-9 or lo >= n - 1e-9:
        return 0, 0
    i0 = math.floor(lo + 1e-9)
    i1 = max(math.ceil(hi - 1e-9), i0 + 1)
    return max(i0, 0), min(i1, n)


def _read_band(p: Path, ds, band: int, window):
    from rasterio.windows import Window

    window = Window(*window) if window is not None else None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return ds.read(band, window=window, masked=True)
    except MemoryError:
        raise
    except Exception as exc:  # rasterio raises several classes for damaged files
        raise CorruptRasterError(f"{p}: pixels cannot be read, file truncated or damaged "
                                 f"({_short(exc)})") from None


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


def kernel_cache_folder(version: str) -> str | None:
    """Point numba's on-disk cache of compiled kernels at a per-user folder.

    Numba's ``cache=True`` writes next to the source by default, which for an
    installed package is ``site-packages``: files that ``pip uninstall`` does
    not know and that leave an empty ``terrain`` folder behind (found as a
    namespace package ahead of a later editable install). cairn's kernels go to
    the platform's user cache folder instead, ``<cache>/cairn/numba/<version>``
    (``platformdirs``), or, when that cannot be written, to
    ``<tmp>/cairn-numba-<uid>/<version>``. Numba keys each entry by the source
    file's path and a hash of its contents, so versions, checkouts and several
    processes can share the folder. A cache folder the user chose
    (``NUMBA_CACHE_DIR``, or ``numba.config.CACHE_DIR`` set before importing
    cairn) is left alone.

    Returns the folder in use, or None when no folder could be written (numba
    then compiles without keeping the result where it cannot write).
    """
    from numba.core import config

    if config.CACHE_DIR:
        return config.CACHE_DIR
    import platformdirs

    uid = os.getuid() if hasattr(os, "getuid") else "user"
    for base in (Path(platformdirs.user_cache_dir("cairn", appauthor=False)) / "numba",
                 Path(tempfile.gettempdir()) / f"cairn-numba-{uid}"):
        folder = base / version
        try:
            os.makedirs(folder, exist_ok=True)
            tempfile.TemporaryFile(dir=folder).close()
        except OSError:
            continue
        config.CACHE_DIR = str(folder)
        return config.CACHE_DIR
    return None


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
        raise OutletError(f"{p}: cannot read outlets ({_short(exc)})") from None
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
                          f"({_short(exc)}); e.g. EPSG:4326", "outlets_crs") from None


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
                raise OutletError(f"{side}: not a CRS pyproj can read ({_short(exc)})") from None
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


def dem_warnings(dem: Dem) -> list[CairnWarning]:
    """Things about a DEM a user should be told once (not errors); a message
    may name a parameter (``{nodata}``), as errors do."""
    out: list = []
    m = dem.meta
    sentinel = m.get("undeclared_sentinel")
    if sentinel:
        v = sentinel["value"]
        out.append(CairnWarning(
            f"{dem.source}: {sentinel['cells']} cells hold {v:g}, a common nodata value, but the "
            f"file declares no nodata; they are read as elevations -- if they are voids, "
            f"declare them with {{nodata}} {v:g}", "nodata"))
    if m.get("nonfinite_cells"):
        out.append(f"{dem.source}: {m['nonfinite_cells']} NaN or infinite cells treated as nodata")
    if m.get("oversized_cells"):
        out.append(CairnWarning(
            f"{dem.source}: {m['oversized_cells']} cells hold finite values beyond "
            f"±{ELEVATION_LIMIT:.3g}, too large for an elevation; they are treated as nodata -- "
            "if they mark voids, declare their value with {nodata}", "nodata"))
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
    out += _unit_warnings(dem)
    return [w if isinstance(w, CairnWarning) else CairnWarning(w) for w in out]


def _unit_warnings(dem: Dem) -> list:
    """An assumed vertical unit, or a given one the file contradicts (one line each)."""
    if dem.vertical_unit_source == "assumed":
        return [CairnWarning(f"{dem.source}: the file declares no vertical unit; elevations are "
                             "taken to be metres (give {vertical_unit} ft or us-ft if they are "
                             "feet)", "vertical_unit")]
    if dem.vertical_unit_source == "given" and dem.vertical_units:
        try:
            declared, _ = vertical_unit(dem.vertical_units)
        except OptionError:
            declared = None
        if declared != dem.vertical_unit:
            return [CairnWarning(f"{dem.source}: the file declares the vertical unit "
                                 f"{dem.vertical_units!r}; the elevations are taken in "
                                 f"{dem.unit_label} as given by {{vertical_unit}}", "vertical_unit")]
    return []


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
    :func:`claim_outdir` does the same and also locks the folder.
    """
    out = Path(outdir)
    _make_outdir(out)
    _refuse_clash(out, names, overwrite)
    return out


def _make_outdir(out: Path) -> bool:
    """Create ``out`` if missing (True when this call created it); refuse files
    and folders that cannot be written."""
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is a file, not a folder; choose another output folder")
    existed = out.is_dir()
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder ({exc.strerror})") from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise OutputError(f"{out}: output folder is not writable; choose another output folder")
    return not existed


def _refuse_clash(out: Path, names: list[str], overwrite: bool) -> None:
    _refuse_folders(out, names)
    clash = [n for n in names if (out / n).exists()]
    if clash and not overwrite:
        more = f" and {len(clash) - 3} more" if len(clash) > 3 else ""
        raise OutputError(f"{out}: would overwrite {', '.join(clash[:3])}{more}; "
                          "pass {overwrite} to replace them", "overwrite")


def _refuse_folders(out: Path, names) -> None:
    """Refuse a folder (not a link) at a name the run publishes a file under: a rename
    onto it fails, which would leave the set half published."""
    for n in names:
        if os.path.isdir(out / n) and not os.path.islink(out / n):
            raise OutputError(f"{out / n}: is a folder where the run writes a file; move it or "
                              "choose another output folder")


# -- one run per output folder -------------------------------------------------------
LOCK_NAME = ".cairn.lock"
STAGING_PREFIX = ".cairn-staging-"
PUBLISHING = ".publishing.json"  # inside a staging folder: its files are being moved into place
_PART = re.compile(r"^\..+\.[a-z0-9_]{8}\.part(\.\w+)?$")  # atomic_path's temporary names
#: what a file cairn publishes may be called: a plain name (no folder, no leading dot) with
#: one of the extensions cairn writes; a publication marker naming anything else is not cairn's
OUTPUT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,200}\.(?:tif|gpkg|csv|png|json)\Z")
_HELD: dict[str, list] = {}  # lock file (real path) -> [lock fd, depth] held by this process
_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)


@contextlib.contextmanager
def claim_outdir(outdir: str | os.PathLike, names: list[str], *, overwrite: bool):
    """Hold an output folder for one run: create and check it, lock it, tidy it.

    While the block runs no other cairn run can write into the folder (a lock
    file, released when the block ends or the process dies, even by kill -9).
    Leftovers of a killed run are cleaned first: temporary files are removed,
    and a set of outputs whose publication was cut short is completed. Then
    ``names`` are checked as :func:`prepare_outdir` does. A folder this call
    created is removed again if the run leaves it empty.

    Raises
    ------
    OutputError
        The folder cannot be used, is held by another run, holds a lock
        entry that is not cairn's (a link, a folder, a file with other
        names), or would be overwritten without ``overwrite``.
    """
    out = Path(outdir)
    created = _make_outdir(out)
    try:
        with hold_outdir(out):
            clean_leftovers(out)
            _refuse_clash(out, names, overwrite)
            yield out
    finally:
        if created:
            with contextlib.suppress(OSError):
                out.rmdir()  # only when empty


def hold_outdir(outdir: str | os.PathLike):
    """Lock ``outdir`` for this process (re-entrant); another process holding
    it makes this raise :class:`OutputError` at once."""
    out = Path(outdir)
    return _hold(out / LOCK_NAME, f"{out}: another cairn run is writing to this folder{{who}}; "
                                  "wait for it to finish or choose another output folder")


def hold_checkpoint(checkpoint: str | os.PathLike):
    """Lock a checkpoint for this process (re-entrant) with a lock file beside it
    (``.<name>.lock``); another run using it makes this raise at once.

    Raises
    ------
    CheckpointError
        Another cairn run (in any process) holds the checkpoint.
    OutputError
        The lock file cannot be made, or its name holds something that is
        not cairn's lock file.
    """
    p = Path(checkpoint)
    return _hold(p.parent / f".{p.name}.lock",
                 f"{p}: another cairn run is using this checkpoint{{who}}; wait for it to finish "
                 "or choose another {checkpoint} file", busy_error=CheckpointError,
                 params=("checkpoint",))


@contextlib.contextmanager
def _hold(path: Path, busy: str, *, busy_error=OutputError, params=()):
    """An exclusive lock on the lock file ``path`` for this process, re-entrant;
    ``busy`` (``{who}`` is filled with the holder's process number) is the
    error when another process holds it."""
    key = os.path.join(os.path.realpath(path.parent), path.name)
    held = _HELD.get(key)
    if held is not None:
        held[1] += 1
        try:
            yield path.parent
        finally:
            held[1] -= 1
        return
    fd = _lock(path, busy, busy_error, params)
    _HELD[key] = [fd, 1]
    try:
        yield path.parent
    finally:
        del _HELD[key]
        if fd is not None:
            _unlock(path, fd)


def _unlock(path: Path, fd: int) -> None:
    """Remove the lock file (while still holding it), only if the name is still ours."""
    with contextlib.suppress(OSError):
        st, mine = os.lstat(path), os.fstat(fd)
        if (st.st_ino, st.st_dev) == (mine.st_ino, mine.st_dev):
            os.unlink(path)
    os.close(fd)


def _open_lock(path: Path) -> tuple[int, bool]:
    """Open (or create) the lock file ``path`` without following a link; refuse
    anything but a regular file of this user with no other name. Returns the
    descriptor and whether this call created the file."""
    flags = os.O_RDWR | getattr(os, "O_NONBLOCK", 0) | _NOFOLLOW
    created = True
    try:
        try:
            fd = os.open(path, flags | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:
            created = False
            fd = os.open(path, flags)
    except OSError as exc:
        if exc.errno == errno.ELOOP or path.is_symlink():
            raise OutputError(f"{path}: is a symbolic link, not a cairn lock file; cairn never "
                              "follows links it finds -- remove the link") from None
        if path.is_dir():
            raise OutputError(f"{path}: is a folder, not a cairn lock file; remove it") from None
        raise OutputError(f"{path}: cannot create the lock file ({exc.strerror}); choose "
                          "another folder") from None
    st = os.fstat(fd)
    why = ("it is not a regular file" if not stat.S_ISREG(st.st_mode) else
           "it has other names (hard links)" if st.st_nlink != 1 else
           "it belongs to another user" if hasattr(os, "geteuid") and st.st_uid != os.geteuid()
           else None)
    if why:
        os.close(fd)
        raise OutputError(f"{path}: is not a cairn lock file ({why}); cairn never writes "
                          "through it -- remove it")
    return fd, created


def _lock(path: Path, busy: str, busy_error=OutputError, params=()) -> int | None:
    """An exclusive ``flock`` on the lock file ``path`` (None where flock is missing
    or the file system does not support it)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return None
    for _ in range(10):
        fd, created = _open_lock(path)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            pid = os.read(fd, 32).decode(errors="replace").strip()
            os.close(fd)
            who = f" (process {pid})" if pid.isdigit() else ""
            raise busy_error(busy.replace("{who}", who), *params) from None
        except OSError:  # a file system without locks (some network mounts): go on unlocked
            os.close(fd)
            if created:
                with contextlib.suppress(OSError):
                    os.unlink(path)
            return None
        try:
            st, mine = os.lstat(path), os.fstat(fd)
            same = (st.st_ino, st.st_dev) == (mine.st_ino, mine.st_dev)
        except FileNotFoundError:
            same = False  # the previous holder removed it after we opened it
        if same:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
                os.write(fd, f"{os.getpid()}\n".encode())
            return fd
        os.close(fd)
    raise OutputError(f"{path}: cannot take the lock; choose another folder")


def _own(st: os.stat_result) -> bool:
    """True when an entry (from ``lstat``) belongs to this user."""
    return not hasattr(os, "geteuid") or st.st_uid == os.geteuid()


def clean_leftovers(outdir: str | os.PathLike) -> list[str]:
    """Tidy what a killed run left in ``outdir`` (call while holding it).

    Temporary files of :func:`atomic_path` are removed; a staging folder is
    removed, after moving its files into place when its publication had
    begun (so the folder ends with the complete new set, never a mix).
    Only entries cairn makes are touched, and never through a link: a
    staging folder and the files it publishes must be real folders and
    regular files of this user, and a publication marker may only name
    plain file names of the kinds cairn writes (:data:`OUTPUT_NAME`) --
    (a staged file must have no other name) -- anything else found there is
    left alone. Returns the names removed or completed.
    """
    out = Path(outdir)
    done = []
    for p in sorted(out.iterdir()):
        try:
            st = os.lstat(p)
        except OSError:
            continue
        if p.name.startswith(STAGING_PREFIX) and stat.S_ISDIR(st.st_mode) and _own(st):
            done += _complete_publication(p, out)
            shutil.rmtree(p, ignore_errors=True)
            done.append(p.name)
        elif _PART.match(p.name) and stat.S_ISREG(st.st_mode) and _own(st):
            with contextlib.suppress(OSError):
                p.unlink()
                done.append(p.name)
    return done


_MARKER_BYTES = 16 * 2**20  # a publication marker lists file names: larger is not cairn's


def _complete_publication(stage: Path, out: Path) -> list[str]:
    """Move the files a cut-short publication listed from ``stage`` into ``out``.

    Raises
    ------
    OutputError
        A file cannot be moved into place (a GeoPackage open in another
        program, a folder at its name): nothing is moved and ``stage`` is
        kept, so the folder never holds a mix of two sets.
    """
    marker = stage / PUBLISHING
    try:
        st = os.lstat(marker)
        if not stat.S_ISREG(st.st_mode) or st.st_size > _MARKER_BYTES:
            return []
        names = json.loads(marker.read_text())
    except (OSError, ValueError, RecursionError):  # RecursionError: a deeply nested marker
        return []
    todo = []
    for name in names if isinstance(names, list) else ():
        if not isinstance(name, str) or not OUTPUT_NAME.match(name) or name in todo:
            continue  # not a name cairn publishes: never followed
        with contextlib.suppress(OSError):
            st = os.lstat(stage / name)
            if stat.S_ISREG(st.st_mode) and st.st_nlink == 1 and _own(st):
                todo.append(name)
    try:
        _refuse_folders(out, todo)
        for name in todo:  # before anything moves: a GeoPackage open elsewhere stops it
            if name.lower().endswith(".gpkg"):
                _release_sqlite(out / name)
        for name in todo:
            _replace_into(stage / name, out / name)
    except OSError as exc:
        raise OutputError(f"{out}: cannot complete the publication a killed run began "
                          f"({_short(exc)}); its files are kept in {stage.name} until a run "
                          "can") from None
    return todo


@contextlib.contextmanager
def staged_outputs(outdir: str | os.PathLike, *, replaces: tuple[str, ...] = ()):
    """Yield a staging folder inside ``outdir``; publish its files as a set.

    Write every file of a run into the staging folder; when the block ends
    without error the files are moved into ``outdir`` together (Ctrl-C and
    SIGTERM wait for the few renames), earlier files matching a glob pattern
    in ``replaces`` that the new set does not include are removed, and the
    staging folder goes. On any error or interrupt the staging folder is
    removed and ``outdir`` keeps its previous files untouched. Holds the
    folder's lock (:func:`hold_outdir`) throughout.
    """
    out = Path(outdir)
    _make_outdir(out)
    with hold_outdir(out):
        try:
            stage = Path(tempfile.mkdtemp(prefix=STAGING_PREFIX, dir=out))
        except OSError as exc:
            raise _write_error(out, exc) from None
        try:
            yield stage
            _publish(stage, out, replaces)
        finally:
            shutil.rmtree(stage, ignore_errors=True)


def _publish(stage: Path, out: Path, replaces) -> None:
    names = sorted(p.name for p in stage.iterdir())
    _refuse_folders(out, names)  # before anything moves
    try:
        _sync_dir(stage)
        with _signals_held():
            for name in names:  # before anything moves: a GeoPackage open elsewhere stops it
                if name.lower().endswith(".gpkg"):
                    _release_sqlite(out / name)
            marker = stage / PUBLISHING
            with open(marker, "w") as fh:
                fh.write(json.dumps(names))
                fh.flush()
                os.fsync(fh.fileno())
            for pattern in replaces:
                for old in out.glob(pattern):
                    st = os.lstat(old)
                    if old.name not in names and stat.S_ISREG(st.st_mode) and _own(st):
                        old.unlink()
            for name in names:
                _replace_into(stage / name, out / name)
            _sync_dir(out)
    except OSError as exc:
        raise _write_error(out, exc) from None


def _replace_into(src: Path, dest: Path) -> None:
    """Rename ``src`` onto ``dest``; a GeoPackage is replaced whole, without the
    write-ahead log or journal the file it replaces left beside it."""
    if dest.suffix.lower() == ".gpkg":
        _release_sqlite(dest)
    os.replace(src, dest)


# SQLite's files beside a database, and the bytes its connections lock (os_unix.c: the
# -shm "dead man switch" byte every connection of a WAL database holds a shared lock on,
# and the main file's pending/shared range a rollback-journal writer holds)
_SQLITE_SIDECARS = ("-wal", "-shm", "-journal")
_SHM_DMS_BYTE = 128
_PENDING_BYTE, _LOCK_SPAN = 0x40000000, 512


def _release_sqlite(db: Path) -> None:
    """Remove the stale ``-wal``, ``-shm`` and ``-journal`` files of the SQLite
    database (GeoPackage) ``db`` before it is replaced; refuse while another
    process has the database open (SQLite would write its log into the new file).

    Raises
    ------
    OutputError
        Another program holds the database.
    """
    sidecars = [Path(f"{db}{s}") for s in _SQLITE_SIDECARS if os.path.lexists(f"{db}{s}")]
    if not sidecars:
        return
    if _sqlite_held(db):
        raise OutputError(f"{db}: is open in another program (its SQLite log "
                          f"{Path(str(sidecars[0])).name} is in use); close it there and run "
                          "again, or choose another output folder")
    for p in sidecars:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(p)


def _sqlite_held(db: Path) -> bool:
    """True when another process holds a lock SQLite takes on ``db``: the shared
    lock of an open WAL connection on its ``-shm`` file, or a writer's lock on
    the main file (POSIX advisory locks, as SQLite's unix VFS takes them)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return False
    for path, start, span in ((Path(f"{db}-shm"), _SHM_DMS_BYTE, 1), (db, _PENDING_BYTE, _LOCK_SPAN)):
        try:
            if not stat.S_ISREG(os.lstat(path).st_mode):
                continue
            fd = os.open(path, os.O_RDWR | _NOFOLLOW)
        except OSError:
            continue
        try:
            fcntl.lockf(fd, fcntl.LOCK_EX | fcntl.LOCK_NB, span, start)
        except (BlockingIOError, PermissionError):
            return True
        except OSError:  # a file system without locks: nothing to learn here
            continue
        finally:
            os.close(fd)  # closing drops the probe's lock
    return False


@contextlib.contextmanager
def _signals_held():
    """Ctrl-C and SIGTERM wait until the block is done (main thread only)."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []
    sigs = (signal.SIGINT, signal.SIGTERM)
    previous = {s: signal.signal(s, lambda signum, frame: caught.append(signum)) for s in sigs}
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h)
        for s in dict.fromkeys(caught):
            signal.raise_signal(s)


def _sync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):  # not every file system syncs folders
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


# -- checked writes ----------------------------------------------------------------------
_DISK_FULL_ERRNO = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG}
_DISK_FULL_TEXT = ("no space left", "disk is full", "disk full", "quota exceeded",
                   "file too large")
_IO_LIBRARIES = ("rasterio", "pyogrio", "fiona", "sqlite3", "zipfile", "PIL")
_IO_FAILURE = re.compile(r"no space|disk|quota|too large|write|writing|i/?o error|seek|flush|"
                         r"truncat|cannot open|read error", re.IGNORECASE)


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike, *, bands: int | None = None):
    """Yield a temporary path beside ``dest``; check it and rename it onto ``dest``.

    After the block the file is checked before it takes ``dest``'s name:
    errors GDAL reported while writing and text C libraries printed on the
    process's error stream are raised; the file must exist, be non-empty and
    read back (GeoTIFF: every block of every band, and ``bands`` bands when
    given; GeoPackage: its layers; PNG: complete; JSON: parses; npz: every
    member passes its CRC). Then it is fsynced and renamed, and the folder
    fsynced. On any error or interrupt the temporary file is removed and
    ``dest`` is untouched.

    Raises
    ------
    OutputError
        One line naming the file: disk full (no space, quota, file size
        limit), or the write failed or does not read back.
    """
    dest = Path(dest)
    tmp = None
    try:
        fd, name = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".part" + dest.suffix,
                                    dir=dest.parent)
        os.close(fd)
        os.unlink(name)
        tmp = Path(name)
        failed = None
        with _NativeErrors() as seen:
            try:
                yield tmp
            except Exception as exc:
                failed = exc
        if failed is not None:
            raise _write_error(dest, failed, seen.text()) from None
        problem = seen.failure() or _verify(tmp, bands)
        if problem:
            raise _write_error(dest, problem, seen.text())
        seen.replay()
        _fsync_file(tmp)
        _replace_into(tmp, dest)
        _sync_dir(dest.parent)
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise _write_error(dest, exc) from None
    finally:
        if tmp is not None:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)


def _write_error(dest: Path, problem, native: str = "") -> BaseException:
    """The one-line error for a failed write; ``problem`` is an exception or text.

    Exceptions that are not I/O (a bug) come back unchanged."""
    if isinstance(problem, OutputError):
        return problem
    if isinstance(problem, BaseException):
        lib = type(problem).__module__.split(".")[0]
        if not isinstance(problem, (OSError, MemoryError)) and lib not in _IO_LIBRARIES:
            return problem
        if isinstance(problem, MemoryError):
            return problem
        why = problem.strerror if isinstance(problem, OSError) and problem.strerror \
            else _short(problem)
        full = getattr(problem, "errno", None) in _DISK_FULL_ERRNO
        text = f"{problem} {native}".lower()
    else:
        why, full, text = str(problem), False, f"{problem} {native}".lower()
    folder = dest if dest.is_dir() else dest.parent
    free = _free_bytes(folder)
    # a library may report a full disk as something else (sqlite: "no such table")
    full = full or any(t in text for t in _DISK_FULL_TEXT) or (free is not None and free < 2**20)
    if folder.name.startswith(STAGING_PREFIX):  # name what the user chose, not our staging
        folder = folder.parent
        dest = folder / dest.name
    if full:
        if not any(t in why.lower() for t in _DISK_FULL_TEXT) and free is not None:
            why = f"{free // 1024} kB left"  # rather than the library's own words
        checkpoint = dest.suffix.lower() == ".npz"  # only checkpoints are npz archives
        return OutputError(f"{folder}: disk full while writing {dest.name} ({why}); free some "
                           "space or choose another " + ("{checkpoint} file" if checkpoint else
                                                         "output folder"),
                           *(("checkpoint",) if checkpoint else ()))
    return OutputError(f"{dest}: could not be written ({why})")


def _free_bytes(folder: Path) -> int | None:
    try:
        st = os.statvfs(folder)
    except (OSError, AttributeError):
        return None
    return st.f_bavail * st.f_frsize


class _NativeErrors:
    """Collects, while a file is written, the errors GDAL reports through
    rasterio's log and the text C libraries print on file descriptor 2
    (libtiff reports a full disk there, past Python). :meth:`replay` passes
    the text on when the write succeeded."""

    def __enter__(self):
        import logging
        import sys

        self.records: list[str] = []
        records = self.records

        class Handler(logging.Handler):
            def emit(self, record):
                msg = record.getMessage()
                # GDAL reports some harmless failures too (statistics of an all-nodata
                # band); only input/output errors mean the file is not what was written
                if "signalled an error" in msg and _IO_FAILURE.search(msg):
                    records.append(msg)

        self.logger = logging.getLogger("rasterio._env")
        self.handler = Handler(logging.INFO)
        self.level = self.logger.level
        self.logger.addHandler(self.handler)
        if not self.logger.isEnabledFor(logging.INFO):
            self.logger.setLevel(logging.INFO)
        self.captured = b""
        self.saved = self.sink = None
        with contextlib.suppress(OSError, AttributeError, ValueError):
            sys.stderr.flush()
            self.sink = os.memfd_create("cairn-stderr")  # in memory: works on a full disk
            self.saved = os.dup(2)
            os.dup2(self.sink, 2)
        return self

    def __exit__(self, *exc):
        import sys

        with contextlib.suppress(OSError, ValueError, AttributeError):
            sys.stderr.flush()
        if self.saved is not None:
            os.dup2(self.saved, 2)
            os.close(self.saved)
            with contextlib.suppress(OSError):
                os.lseek(self.sink, 0, os.SEEK_SET)
                self.captured = os.read(self.sink, 1 << 16)
        if self.sink is not None:
            os.close(self.sink)
        self.logger.removeHandler(self.handler)
        self.logger.setLevel(self.level)
        return False

    def replay(self) -> None:
        """Pass captured text on to file descriptor 2 (not ours to swallow)."""
        if self.captured:
            with contextlib.suppress(OSError):
                os.write(2, self.captured)

    def text(self) -> str:
        return self.captured.decode(errors="replace").strip()

    def failure(self) -> str | None:
        """The first error reported while writing, or None."""
        if self.records:
            msg = self.records[0]
            return msg.split("msg=", 1)[-1].strip("'\"") if "msg=" in msg else msg
        text = self.text()
        if any(t in text.lower() for t in _DISK_FULL_TEXT):
            return text.splitlines()[0]
        return None


def _verify(tmp: Path, bands: int | None) -> str | None:
    """None when the written file reads back, else what is wrong with it."""
    try:
        size = tmp.stat().st_size
    except FileNotFoundError:
        return "nothing was written"
    if size == 0:
        return "the file is empty"
    check = _CHECKS.get(tmp.suffix.lower())
    try:
        return check(tmp, bands) if check is not None else None
    except MemoryError:
        raise
    except Exception as exc:  # each reader raises its own classes for a bad file
        return f"the written file does not read back: {_short(exc)}"


def _check_raster(tmp: Path, bands: int | None) -> str | None:
    import rasterio

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with rasterio.open(tmp) as ds:
            if bands is not None and ds.count != bands:
                return f"the written file has {ds.count} bands, not {bands}"
            for b in range(1, ds.count + 1):
                for _, window in ds.block_windows(b):
                    ds.read(b, window=window)
    return None


def _check_gpkg(tmp: Path, bands) -> str | None:
    """Every layer reads back, and SQLite finds the database whole
    (``PRAGMA integrity_check``, SQLite's own check of every page and index)."""
    import sqlite3

    import pyogrio

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for layer, _ in pyogrio.list_layers(tmp):
            pyogrio.read_info(tmp, layer=layer)
    con = sqlite3.connect(tmp)
    try:
        rows = con.execute("PRAGMA integrity_check").fetchall()
    finally:
        con.close()
    if rows != [("ok",)]:
        return "SQLite's integrity check fails: " + "; ".join(str(r[0]) for r in rows[:3])
    return None


def _check_png(tmp: Path, bands) -> str | None:
    with open(tmp, "rb") as fh:
        head = fh.read(8)
        fh.seek(-12, os.SEEK_END)
        tail = fh.read(12)
    return None if head == b"\x89PNG\r\n\x1a\n" and tail[4:8] == b"IEND" else "incomplete PNG"


def _check_json(tmp: Path, bands) -> str | None:
    json.loads(tmp.read_text())
    return None


def _check_npz(tmp: Path, bands) -> str | None:
    import zipfile

    with zipfile.ZipFile(tmp) as zf:
        bad = zf.testzip()
    return f"member {bad} fails its CRC check" if bad else None


_CHECKS = {".tif": _check_raster, ".tiff": _check_raster, ".gpkg": _check_gpkg,
           ".png": _check_png, ".json": _check_json, ".npz": _check_npz}


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


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


def write_layer(dest: str | os.PathLike, dem: Dem, *bands: np.ndarray, name: str, units: str,
                description: str, tags: dict, note: str = "",
                roles: tuple = ("estimate", "standard_error")) -> None:
    """Write one layer as a float32 Cloud Optimized GeoTIFF, atomically.

    ``bands`` are the layer's bands in order, ``roles`` what each holds
    (:data:`terrain.layers.BAND_TEXT`): by default band 1 the estimate and
    band 2 its standard error; the drainage area's median, 5% and 95%. All
    on the DEM's grid, CRS and transform, nodata = NaN where the DEM has
    none. The file is
    laid out by GDAL's COG driver (:data:`COG_OPTIONS`): tiled, with internal
    overviews, DEFLATE with the floating-point predictor, and each band's
    minimum, maximum, mean, standard deviation and valid percentage stored
    as ``STATISTICS_*`` band metadata so a GIS can stretch without scanning.
    ``tags`` (the run's parameters) are dataset metadata; ``note`` (a caution
    that travels with the layer) is appended to both band descriptions and
    stored as each band's ``NOTE`` item; each band's ``ROLE`` item is its role.

    Memory: 8 bytes per cell per band while writing (the float32 bands, and
    rasterio's in-memory copy of them that the COG driver reads); the
    overviews are staged in a temporary file beside ``dest``, removed when
    done. A blocked (out-of-core) writer gets the same layout by copying a
    tiled staging GeoTIFF with the same :data:`COG_OPTIONS`.

    References
    ----------
    .. [1] Open Geospatial Consortium (2023). OGC Cloud Optimized GeoTIFF
       Standard, OGC 21-026.
    """
    if len(bands) != len(roles):
        raise ValueError(f"{name}: {len(bands)} bands for {len(roles)} roles")
    with atomic_path(dest, bands=len(bands)) as tmp, _cog_staging(tmp):
        with _open_cog(tmp, dem, len(bands)) as ds:
            for b, values in enumerate(bands, start=1):
                ds.write(np.where(dem.nodata, np.nan, values).astype(np.float32), b)
            _describe(ds, name=name, units=units, description=description, tags=tags, note=note,
                      roles=roles)


def _describe(ds, *, name: str, units: str, description: str, tags: dict, note: str,
              roles: tuple = ("estimate", "standard_error")) -> None:
    """A layer's band descriptions, units, tags and note (see :func:`write_layer`)."""
    from .layers import BAND_TEXT

    suffix = f"; {note}" if note else ""
    for band, role in enumerate(roles, start=1):
        ds.set_band_description(band, BAND_TEXT[role].format(name=name, units=units) + suffix)
    ds.units = (units,) * len(roles)
    ds.update_tags(**{k: _tag(v) for k, v in tags.items()}, LAYER=name, DESCRIPTION=description)
    for band, role in enumerate(roles, start=1):
        ds.update_tags(band, ROLE=role, **({"NOTE": note} if note else {}))


#: GDAL's block cache while layers are written window by window (bytes): the
#: default (5% of the machine's memory) would dwarf an out-of-core run's own
WINDOW_WRITE_CACHE = 256 * 2**20


def write_layers_by_window(dests: dict, dem: Dem, read, windows, describe: dict) -> None:
    """Write several layers as :func:`write_layer` does, window by window (out of core).

    ``dests`` maps layer name to path; ``read(r0, r1, c0, c1)`` returns every
    layer's bands (estimate and standard error) on a window; ``windows`` cover
    the grid; ``describe[name]`` holds :func:`write_layer`'s ``units``,
    ``description``, ``tags``, ``note`` and, optionally, ``roles``. Each layer is first written by
    window into a tiled staging GeoTIFF beside its destination (DEFLATE,
    removed when done), then copied by GDAL's COG driver with
    :data:`COG_OPTIONS`, which reads it back tile by tile, so the file is
    laid out exactly as :func:`write_layer` lays it out. Memory: the layers
    of one window (8 bytes per window cell per layer) and GDAL's block
    cache, held to :data:`WINDOW_WRITE_CACHE`.
    """
    import rasterio
    import rasterio.shutil

    stages = {n: Path(d).parent / f".{Path(d).name}.tiles.tif" for n, d in dests.items()}
    try:
        with rasterio.Env(GDAL_CACHEMAX=WINDOW_WRITE_CACHE), contextlib.ExitStack() as open_:
            count = {n: len(describe[n].get("roles", (0, 0))) for n in stages}
            out = {n: open_.enter_context(_open_tiles(p, dem, count[n]))
                   for n, p in stages.items()}
            for r0, r1, c0, c1 in windows:
                nd = np.isnan(dem.window(r0, r1, c0, c1))
                win = rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0)
                for n, bands in read(r0, r1, c0, c1).items():
                    if n in out:
                        for band, v in enumerate(bands, start=1):
                            out[n].write(np.where(nd, np.nan, v).astype(np.float32), band,
                                         window=win)
            for n, ds in out.items():
                _describe(ds, name=n, **describe[n])
        for n, dest in dests.items():
            with rasterio.Env(GDAL_CACHEMAX=WINDOW_WRITE_CACHE), \
                    atomic_path(dest, bands=count[n]) as tmp, _cog_staging(tmp):
                rasterio.shutil.copy(stages[n], tmp, **COG_OPTIONS)
    finally:
        for p in stages.values():
            with contextlib.suppress(FileNotFoundError):
                os.unlink(p)


def _open_tiles(path: Path, dem: Dem, count: int = 2):
    """A float32 tiled GeoTIFF of ``count`` bands on ``dem``'s grid, written by window."""
    import rasterio
    from rasterio.transform import Affine

    rows, cols = dem.shape
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return rasterio.open(path, "w", driver="GTiff", height=rows, width=cols, count=count,
                             dtype="float32", crs=dem.crs, transform=Affine(*dem.transform),
                             nodata=np.nan, tiled=True, blockxsize=256, blockysize=256,
                             compress="deflate", zlevel=1, predictor=3, bigtiff="IF_SAFER")


def _open_cog(tmp: Path, dem: Dem, count: int = 2):
    """A float32 writer of ``count`` bands on ``dem``'s grid that GDAL's COG driver lays
    out on close.

    rasterio buffers the bands in memory and hands them to the COG driver's
    copy when the dataset closes (the driver only creates by copying).
    """
    import rasterio
    from rasterio.transform import Affine

    rows, cols = dem.shape
    return rasterio.open(tmp, "w", height=rows, width=cols, count=count, dtype="float32",
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
    """Write a data frame (without any geometry column) as CSV, atomically.

    Text a spreadsheet program would run as a formula is neutralised
    (:func:`csv_safe`): the file is meant to be opened, and outlet ids and
    attributes come from users' files.
    """
    if "geometry" in getattr(frame, "columns", ()):
        frame = frame.drop(columns="geometry")
    frame = csv_safe(frame)
    with atomic_path(dest) as tmp:
        frame.to_csv(tmp, index=False)


#: Leading characters that make a spreadsheet treat a cell as a formula (OWASP, "CSV
#: Injection": =, +, -, @, tab, carriage return), and their full-width forms, which
#: some spreadsheet programs read the same way
FORMULA_START = ("=", "+", "-", "@", "\t", "\r", "\uff1d", "\uff0b", "\uff0d", "\uff20")


def csv_cell(value):
    """``value`` as a CSV cell a spreadsheet shows as text: text starting (after
    any blanks) with a formula character (:data:`FORMULA_START`) gets a leading
    ``'``, the OWASP recommendation, and a carriage return inside text becomes
    a line feed (so the cell is quoted whole, never split into a row of its
    own); anything else is returned as it is.

    Examples
    --------
    >>> csv_cell("=1+2"), csv_cell("@x"), csv_cell(" -cmd"), csv_cell("gauge 7"), csv_cell(-3.5)
    ("'=1+2", "'@x", "' -cmd", 'gauge 7', -3.5)

    References
    ----------
    .. [1] OWASP Foundation, "CSV Injection", owasp.org/www-community/attacks/CSV_Injection.
    """
    if not isinstance(value, str):
        return value
    if value.startswith(FORMULA_START) or value.lstrip().startswith(FORMULA_START):
        value = "'" + value
    # a bare carriage return is written unquoted and read as a new row, whose first cell
    # would start a formula: line breaks inside text are written as line feeds (quoted)
    return value.replace("\r\n", "\n").replace("\r", "\n") if "\r" in value else value


def csv_safe(frame):
    """A copy of ``frame`` whose text cells and column names are :func:`csv_cell`'d
    (numbers, negative ones included, are left as numbers)."""
    out = frame.copy()
    for col in out.columns:
        if out[col].dtype == object or str(out[col].dtype) in ("string", "str"):
            out[col] = out[col].map(csv_cell)
    out.columns = [csv_cell(str(c)) if isinstance(c, str) else c for c in out.columns]
    return out


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


def load_npz(path: str | os.PathLike, keys: tuple[str, ...] | None = None) -> dict:
    """Load an ``.npz`` with ``allow_pickle=False`` into a dict of arrays.

    ``keys`` limits the members read (all by default).

    Raises
    ------
    FileNotFoundError
        No such file.
    OSError
        The file cannot be read (permissions, a folder).
    ValueError
        Anything that is not a complete archive of plain arrays, in one line
        saying what: empty, not an npz archive, a bare ``.npy`` array, pickled
        objects (never loaded), a missing member, a damaged archive.
    """
    p = Path(path)
    with open(p, "rb") as fh:
        head = fh.read(6)
    if not head:
        raise ValueError("the file is empty")
    if not head.startswith(b"PK\x03\x04"):
        bare = head.startswith(b"\x93NUMPY")
        raise ValueError("a bare .npy array, not an npz archive" if bare else "not an npz archive")
    try:
        with np.load(p, allow_pickle=False) as f:
            return {k: f[k] for k in (f.files if keys is None else keys)}
    except MemoryError:
        raise
    except KeyError as exc:
        raise ValueError(f"member {exc.args[0]!r} is missing") from None
    except ValueError as exc:
        if "pickle" in str(exc).lower() or "object arrays" in str(exc).lower():
            raise ValueError("holds pickled (object) arrays, which cairn never loads") from None
        raise ValueError(f"truncated or damaged archive: {_short(exc)}") from None
    except Exception as exc:  # zipfile, zlib and numpy raise many classes for damage
        raise ValueError(f"truncated or damaged archive: {_short(exc)}") from None


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True when two paths name one file (the same path, or links to one file)."""
    if os.path.realpath(a) == os.path.realpath(b):
        return True
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def resolves_into(path: str | os.PathLike, folder: str | os.PathLike) -> bool:
    """True when ``path``, links resolved, is ``folder`` or lies inside it."""
    real, top = os.path.realpath(path), os.path.realpath(folder)
    return real == top or real.startswith(top.rstrip(os.sep) + os.sep)


def replaced_by(path: str | os.PathLike, outdir: str | os.PathLike, names, patterns=()) -> str | None:
    """What a run writing ``names`` into ``outdir`` would do to ``path`` (links
    resolved): the output name that replaces it, the pattern of earlier
    outputs the publication removes, or the leftover the tidy-up removes
    (a staging folder, a temporary file, the lock) -- None when it stays."""
    import fnmatch

    real, top = Path(os.path.realpath(path)), Path(os.path.realpath(outdir))
    if real.parent == top:
        name = real.name
        if name in names:
            return name
        for pattern in patterns:
            if fnmatch.fnmatchcase(name, pattern):
                return pattern
        if _PART.match(name) or name == LOCK_NAME:
            return name
    if resolves_into(real, top) and real != top:
        first = real.relative_to(top).parts[0]
        if first.startswith(STAGING_PREFIX):
            return first
    return None


def replaced_beside_checkpoint(path: str | os.PathLike, checkpoint: str | os.PathLike) -> str | None:
    """What keeping ``checkpoint`` would do to ``path`` (links resolved): the name of
    the checkpoint's lock file (:func:`hold_checkpoint`) or of a temporary file of
    its writes that :func:`check_file_folder` removes -- None when it stays."""
    c = Path(checkpoint)
    real, folder = Path(os.path.realpath(path)), Path(os.path.realpath(c.parent))
    if real.parent != folder:
        return None
    if real.name == f".{c.name}.lock":
        return real.name
    if real.name.startswith(f".{c.name}.") and _PART.match(real.name):
        return real.name
    return None


def file_exists(path: str | os.PathLike) -> bool:
    """True when ``path`` is an existing file."""
    return Path(path).is_file()


def remove_file(path: str | os.PathLike) -> None:
    """Remove one file (callers decide it is theirs to remove)."""
    os.unlink(path)


def check_file_folder(path: str | os.PathLike) -> Path:
    """Make sure a file can be created at ``path`` before any work is done.

    Creates (and removes) a probe file beside it, and removes temporary files
    :func:`atomic_path` left there for this name by a killed run.

    Raises
    ------
    OutputError
        The folder does not exist, is not writable, or ``path`` is a folder.
    """
    p = Path(path)
    folder = p.parent
    if p.is_dir():
        raise OutputError(f"{p}: is a folder; give a file name")
    if not folder.is_dir():
        raise OutputError(f"{p}: the folder {folder} does not exist; create it or choose "
                          "another path")
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".probe", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise OutputError(f"{p}: cannot write in {folder} ({exc.strerror}); choose another "
                          "folder") from None
    for q in folder.glob(f".{glob.escape(p.name)}.*.part*"):
        if _PART.match(q.name):
            with contextlib.suppress(OSError):
                q.unlink()
    return p


# -- scratch arrays of blocked runs --------------------------------------------------
SCRATCH_PREFIX = "cairn-blocks-"


@dataclass(frozen=True)
class NpyWindows:
    """A ``.npy`` raster read window by window: ``source[r0:r1, c0:c1]`` maps the
    file for the read only (so the pages read do not stay in this process's
    resident set) and returns a copy; pickles as its path, so a task in another
    process or on a Dask worker reads its own window."""

    path: str

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(x) for x in np.load(self.path, mmap_mode="r").shape)

    @property
    def dtype(self) -> np.dtype:
        return np.load(self.path, mmap_mode="r").dtype

    def __getitem__(self, key) -> np.ndarray:
        return np.array(np.load(self.path, mmap_mode="r")[key])

    def __setitem__(self, key, values) -> None:
        mm = np.load(self.path, mmap_mode="r+")
        mm[key] = values
        del mm


def _scratch_full(path, exc: OSError) -> OutputError:
    """The one-line error for scratch space running out while writing ``path``."""
    folder = Path(path).parent
    while folder.name and not folder.name.startswith(SCRATCH_PREFIX) and folder.parent != folder:
        folder = folder.parent
    where = folder.parent if folder.name.startswith(SCRATCH_PREFIX) else Path(path).parent
    return OutputError(f"{where}: disk full while writing scratch files ({exc.strerror or exc}); "
                       "free some space there or point TMPDIR at a folder with more")


def _disk_full(exc: BaseException) -> bool:
    """True for an OSError (or one it was raised from) saying the disk or quota is full."""
    while exc is not None:
        if isinstance(exc, OSError) and exc.errno in _DISK_FULL_ERRNO:
            return True
        exc = exc.__cause__ or exc.__context__
    return False


def _scratch_writes(fn):
    """Turn a full disk while ``fn(path, ...)`` writes scratch into one :class:`OutputError`."""
    @functools.wraps(fn)
    def wrapper(path, *args, **kwargs):
        try:
            return fn(path, *args, **kwargs)
        except OSError as exc:
            if _disk_full(exc) and not isinstance(exc, OutputError):
                raise _scratch_full(path, exc) from None
            raise
    return wrapper


@_scratch_writes
def create_npy(path: str, shape, dtype) -> None:
    """A ``.npy`` file of ``shape`` and ``dtype`` (contents undefined until written),
    unless ``path`` already holds one (reused: every cell is written again).

    The file's blocks are allocated at once (``posix_fallocate``), so a disk
    without the room fails here, in one :class:`OutputError`, rather than
    with a bus error when a memory-mapped write finds no block to fill."""
    try:
        a = np.load(path, mmap_mode="r")
        if a.shape == tuple(shape) and a.dtype == np.dtype(dtype):
            return
    except (OSError, ValueError, EOFError):
        pass
    np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=tuple(shape)).flush()
    if hasattr(os, "posix_fallocate"):
        fd = os.open(path, os.O_RDWR | _NOFOLLOW)
        try:
            os.posix_fallocate(fd, 0, os.fstat(fd).st_size)
        except OSError as exc:
            if _disk_full(exc):
                os.close(fd)
                fd = None
                with contextlib.suppress(OSError):
                    os.unlink(path)
                raise
        finally:
            if fd is not None:
                os.close(fd)


@_scratch_writes
def write_npy_window(path: str, r0: int, c0: int, values: np.ndarray) -> None:
    """Write ``values`` into the ``.npy`` at ``path`` from row ``r0``, column ``c0``.

    A shared mapping: other processes read the values from the page cache at
    once; no msync, as the file is scratch, never read after the run."""
    mm = np.load(path, mmap_mode="r+")
    mm[r0:r0 + values.shape[0], c0:c0 + values.shape[1]] = values
    del mm


@_scratch_writes
def save_npy(path: str, a: np.ndarray) -> str:
    """Save ``a`` as ``.npy`` at ``path``; return the path."""
    np.save(path, a)
    return path


@_scratch_writes
def save_scratch(path: str, arrays: dict) -> str:
    """Save ``arrays`` (name: array) as an uncompressed ``.npz`` scratch file at
    ``path``, read back within the run by :func:`load_scratch` (not flushed to
    disk, not checked); return the path."""
    with open(path, "wb") as fh:
        np.savez(fh, **arrays)
    return path


def load_scratch(path: str) -> dict:
    """The arrays :func:`save_scratch` wrote (no pickled objects)."""
    with np.load(path, allow_pickle=False) as f:
        return {k: f[k] for k in f.files}


_SHARED_MAGIC = b"CAIRNSH1"
_SHARED_ALIGN = 64


@_scratch_writes
def save_shared(path: str, obj, *, min_bytes: int = 1 << 16) -> str:
    """Pickle ``obj`` into the scratch file ``path`` for processes that map it:
    protocol 5, each contiguous buffer of at least ``min_bytes`` (arrays) laid
    out after the pickle, 64-byte aligned, so :func:`load_shared` maps them
    instead of copying (worker processes share the pages). Returns ``path``.
    """
    import pickle

    big: list = []

    def out_of_band(buf):
        if buf.raw().nbytes >= min_bytes:
            big.append(buf)
            return False
        return True

    data = pickle.dumps(obj, protocol=5, buffer_callback=out_of_band)
    spans, at = [], 0
    for b in big:
        spans.append((at, b.raw().nbytes))
        at += -(-b.raw().nbytes // _SHARED_ALIGN) * _SHARED_ALIGN
    head = pickle.dumps((data, spans), protocol=5)
    start = -(-(16 + len(head)) // _SHARED_ALIGN) * _SHARED_ALIGN
    with open(path, "wb") as fh:
        fh.write(_SHARED_MAGIC + len(head).to_bytes(8, "little") + head)
        for (off, _n), b in zip(spans, big):
            fh.seek(start + off)
            fh.write(b.raw())
    return path


def load_shared(path: str):
    """The object :func:`save_shared` wrote, its large arrays mapped from the
    file copy-on-write (a write stays private to this process)."""
    import pickle

    with open(path, "rb") as fh:
        if fh.read(8) != _SHARED_MAGIC:
            raise OSError(f"{path}: not a cairn shared scratch file")
        head = fh.read(int.from_bytes(fh.read(8), "little"))
    data, spans = pickle.loads(head)
    start = -(-(16 + len(head)) // _SHARED_ALIGN) * _SHARED_ALIGN
    mapped = np.memmap(path, dtype=np.uint8, mode="c") if spans else None
    bufs = [mapped[start + off:start + off + n] for off, n in spans]
    return pickle.loads(data, buffers=bufs)


def scratch_parent(parent: str | os.PathLike | None = None) -> str:
    """Where scratch folders go: ``parent``, else ``TMPDIR`` when set, else the
    system's temporary folder. A ``TMPDIR`` that is not a writable folder is
    refused rather than silently replaced by another folder (a full one
    stays the folder; the space check says it is full).

    Raises
    ------
    OutputError
        ``TMPDIR`` names no writable folder.
    """
    if parent is not None:
        return str(parent)
    env = os.environ.get("TMPDIR")
    if env:
        if not os.path.isdir(env) or not os.access(env, os.W_OK | os.X_OK):
            raise OutputError(f"TMPDIR={env}: not a writable folder; cairn keeps a blocked "
                              "run's scratch files there -- point TMPDIR at one")
        return env
    return tempfile.gettempdir()


def free_bytes(folder: str | os.PathLike) -> int | None:
    """Bytes free for this user in the file system holding ``folder`` (None if unknown)."""
    return _free_bytes(Path(folder))


SCRATCH_LOCK = "lock"  # inside a scratch folder: held by the run using it


@contextlib.contextmanager
def scratch_folder(parent: str | os.PathLike | None = None, *, need: int = 0,
                   what: str = "scratch files"):
    """A new folder for a run's scratch files under ``parent`` (default:
    :func:`scratch_parent`), removed on exit; folders of runs that are gone
    (killed) are removed first.

    The folder is owned by a lock, not a process number: the run holds an
    exclusive ``flock`` on ``lock`` inside it from before the folder takes
    its name until it is removed, and the sweep (:func:`remove_orphan_scratch`)
    removes only folders whose lock it can take -- so a live run is safe from
    any other run, on this machine or another sharing the folder, whatever
    process numbers each can see. ``need`` bytes (plus a margin) must be
    free under ``parent``.

    Raises
    ------
    OutputError
        Too little free space (saying how much is needed, for ``what``, and
        where), or the folder cannot be made.
    """
    parent = scratch_parent(parent)
    remove_orphan_scratch(parent)
    check_scratch_space(parent, need, what)
    try:
        staging = tempfile.mkdtemp(prefix="." + SCRATCH_PREFIX, dir=parent)
        fd = _take_scratch_lock(os.path.join(staging, SCRATCH_LOCK))
        folder = _rename_fresh(staging, os.path.join(parent, f"{SCRATCH_PREFIX}{os.getpid()}-"))
    except OSError as exc:
        if _disk_full(exc):
            raise _scratch_full(os.path.join(parent, SCRATCH_PREFIX), exc) from None
        raise OutputError(f"{parent}: cannot make a scratch folder ({exc.strerror}); point "
                          "TMPDIR at a writable folder") from None
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)
        if fd is not None:
            os.close(fd)


SCRATCH_MARGIN = 0.1  # free space kept beyond a scratch estimate: 10% ...
SCRATCH_MARGIN_BYTES = 64 * 2**20  # ... plus 64 MiB


def check_scratch_space(folder: str | os.PathLike, need: int, what: str = "scratch files", *,
                        hint: str | None = None, params: tuple = ("bbox",)) -> None:
    """Refuse, in one line, when ``folder`` has less free space than ``need`` bytes
    plus the margin (:data:`SCRATCH_MARGIN`, :data:`SCRATCH_MARGIN_BYTES`); the
    message says how much is needed there, for ``what``, and ``hint`` (default:
    free space, TMPDIR, or a smaller window). Nothing is checked for ``need`` 0."""
    if not need:
        return
    free = free_bytes(folder)
    want = int(need * (1 + SCRATCH_MARGIN)) + SCRATCH_MARGIN_BYTES
    if free is not None and free < want:
        hint = hint or ("free some space, point TMPDIR at a folder with more, or use {bbox} for "
                        "a smaller window")
        raise OutputError(f"{folder}: a blocked run needs about {_size(want)} of free space here "
                          f"for {what}, but {_size(free)} is free; {hint}", *params)


def _size(n: int) -> str:
    return f"{n / 2**30:.1f} GiB" if n >= 2**30 else f"{max(n, 0) / 2**20:.0f} MiB"


def _rename_fresh(src: str, prefix: str) -> str:
    """Rename the folder ``src`` to ``prefix`` + a random suffix no entry has yet."""
    import secrets

    while True:
        dest = prefix + secrets.token_hex(4)
        if not os.path.lexists(dest):
            os.rename(src, dest)  # the name appears with its lock already held
            return dest


def _take_scratch_lock(path: str) -> int | None:
    """Create and lock a scratch folder's lock file (None where flock is missing)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return None
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_EXCL | _NOFOLLOW, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:  # no locks on this file system: no sweep can take it either
        pass
    return fd


def remove_orphan_scratch(parent: str | os.PathLike | None = None) -> list[str]:
    """Remove the scratch folders of blocked runs that are gone (killed) under
    ``parent`` (default: :func:`scratch_parent`): only real folders of this
    user whose lock this call can take. A live run holds its folder's lock
    (in any process namespace or on any machine sharing the folder, as far
    as the file system carries ``flock``); a folder whose lock cannot be
    taken or tried (no lock file, a link, a file system without locks) is
    left alone. Returns the folders removed."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return []
    parent = scratch_parent(parent)
    removed = []
    for folder in [f for prefix in (SCRATCH_PREFIX, "." + SCRATCH_PREFIX)
                   for f in glob.glob(os.path.join(glob.escape(parent), prefix + "*"))]:
        try:
            st = os.lstat(folder)
            if not stat.S_ISDIR(st.st_mode) or not _own(st):
                continue
            fd = os.open(os.path.join(folder, SCRATCH_LOCK), os.O_RDWR | _NOFOLLOW)
        except OSError:
            continue
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:  # held by a live run, or not lockable here
            os.close(fd)
            continue
        try:
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
        finally:
            os.close(fd)
    return removed


_STORE_ARRAYS = ("counts_0", "counts_1", "applied", "digest_0", "digest_1")
_STORE_FILE = re.compile(r"^(?:zarr\.json|(?:counts_[01]|applied|digest_[01])/(?:zarr\.json|c(?:/\d+)+))$")
COUNTS_TAG = "cairn per-cell counts"  # the store's own attribute: it is cairn's


def is_count_store(path: str | os.PathLike) -> bool:
    """True when ``path`` is a real folder (not a link) holding nothing but a
    Zarr store laid out as a :class:`CountStore` (no file of anyone else's)."""
    p = str(path)
    try:
        if not stat.S_ISDIR(os.lstat(p).st_mode):
            return False
        with open(os.path.join(p, "zarr.json")) as fh:
            if json.load(fh).get("node_type") != "group":
                return False
    except (OSError, ValueError, AttributeError):
        return False
    for root, dirs, files in os.walk(p):
        rel = os.path.relpath(root, p)
        for name in files + [d for d in dirs if os.path.islink(os.path.join(root, d))]:
            path_rel = name if rel == "." else f"{rel}/{name}".replace(os.sep, "/")
            if not _STORE_FILE.match(path_rel) or os.path.islink(os.path.join(root, name)):
                return False
    return True


def check_count_store_path(path: str | os.PathLike, what: str = "") -> None:
    """Refuse a ``path`` where :class:`CountStore` would make its store when
    something that is not a cairn count store is there (cairn removes only
    its own).

    Raises
    ------
    CheckpointError
        Naming the path and the ``checkpoint`` parameter.
    """
    if os.path.lexists(path) and not is_count_store(path):
        kind = ("a link" if os.path.islink(path) else "a file" if not os.path.isdir(path)
                else "a folder holding other files")
        raise CheckpointError(f"{path}: exists and is not cairn's per-cell counts ({kind}); cairn "
                              "only replaces its own -- move it or choose another {checkpoint} file",
                              "checkpoint")


def _remove_store(path: str) -> None:
    check_count_store_path(path)
    shutil.rmtree(path, ignore_errors=True)


class CountStore:
    """Per-cell int32 counts of a run kept on disk (out-of-core runs): a Zarr
    group chunked by block, each chunk stamped with the realisations it holds
    and sealed by a digest.

    ``add(window, i, counts)`` adds realisation ``i``'s counts of one block
    (windows aligned to the block grid): it reads the chunk's buffer holding
    the realisations so far (checking its digest), writes the sum into the
    chunk's *other* buffer and that buffer's digest, and only then stamps
    the chunk, so a process killed between the writes leaves the old buffer,
    digest and stamp intact; a resumed run adds realisation ``i`` again only
    where the stamp says it is missing. ``store[r0:r1, c0:c1]`` reads counts
    by window. Memory: one chunk at a time; disk: 8 bytes per cell (two
    int32 buffers, compressed).

    The store is one unit with its checkpoint: its attributes carry the
    run's identity (``run``: a digest of the DEM and every parameter that
    defines the realisations) and each chunk's digest covers the identity,
    the chunk's place, its realisation count and its values. A resume
    (``resume=True``) refuses a store of another run and verifies every
    chunk: a missing, damaged or foreign chunk is a
    :class:`~terrain.errors.CheckpointError` saying "damaged checkpoint".
    ``checkpoint`` names the checkpoint file in messages.

    References
    ----------
    .. [1] Zarr storage specification, version 3 (2023), zarr-specs.readthedocs.io.
    .. [2] Aumasson, J.-P. et al. (2013). BLAKE2: simpler, smaller, fast as MD5
       (RFC 7693): the chunk digests.
    """

    def __init__(self, path: str | os.PathLike, shape, block: int, *, resume: bool = False,
                 run: str = "", checkpoint: str | os.PathLike | None = None):
        self.path, self.shape, self.block = str(path), tuple(int(x) for x in shape), int(block)
        self.run = str(run)
        self.checkpoint = str(checkpoint) if checkpoint is not None else self.path
        if resume:
            self.group, self.rechunk = self._open(), False
            self.rechunk = self.counts[0].chunks[0] != self.block  # done by check()
        else:
            self.group, self.rechunk = self._create(self.path), False
            self._arrays()

    def _damaged(self, why: str) -> CheckpointError:
        return CheckpointError(f"{self.checkpoint}: damaged checkpoint (its per-cell counts "
                               f"{self.path}: {why}); start afresh without {{resume}} or choose "
                               "another {checkpoint} file", "resume", "checkpoint")

    def _open(self):
        import zarr

        if os.path.islink(self.path) or (os.path.lexists(self.path)
                                         and not is_count_store(self.path)):
            check_count_store_path(self.path)
        try:
            group = zarr.open_group(self.path, mode="r+")
            self.group = group
            self._arrays()
            tag = dict(group.attrs).get("cairn") or {}
        except Exception as exc:  # zarr raises several classes for a missing or bad store
            raise self._damaged(f"missing or unreadable: {_short(exc)}") from None
        if tag.get("kind") != COUNTS_TAG:
            raise self._damaged("no run identity; made by an earlier cairn")
        if tag.get("run") != self.run:
            raise self._damaged("made by another run (another DEM or other parameters)")
        if self.counts[0].shape != self.shape:
            raise self._damaged("made on another grid")
        return group

    def _create(self, path: str):
        import zarr

        _remove_store(path)
        try:
            group = zarr.open_group(path, mode="w")
            for k in ("counts_0", "counts_1"):
                group.create_array(k, shape=self.shape, chunks=(self.block,) * 2, dtype="int32",
                                   fill_value=0)
            nb = tuple(-(-s // self.block) for s in self.shape)
            group.create_array("applied", shape=nb, chunks=(1, 1), dtype="int64", fill_value=0)
            for k in ("digest_0", "digest_1"):
                group.create_array(k, shape=nb, chunks=(1, 1), dtype="int64", fill_value=0)
            group.attrs["cairn"] = {"kind": COUNTS_TAG, "run": self.run}
        except OSError as exc:
            if _disk_full(exc):
                raise _scratch_full(path, exc) from None
            raise
        return group

    def _arrays(self) -> None:
        self.counts = (self.group["counts_0"], self.group["counts_1"])
        self.applied = self.group["applied"]
        self.digests = (self.group["digest_0"], self.group["digest_1"])

    def _digest(self, bi: int, bj: int, n: int, values: np.ndarray) -> int:
        """The seal of chunk (``bi``, ``bj``) holding ``n`` realisations (BLAKE2b, 63 bits)."""
        import hashlib

        h = hashlib.blake2b(digest_size=8, person=b"cairn-counts")
        h.update(self.run.encode())
        h.update(np.array([bi, bj, n], "<i8").tobytes())
        h.update(np.ascontiguousarray(values, "<i4").tobytes())
        return int.from_bytes(h.digest(), "little") >> 1

    def _chunk(self, bi: int, bj: int, n: int, b: int | None = None) -> np.ndarray:
        """Chunk (``bi``, ``bj``) of the buffer holding ``n`` realisations, its digest checked."""
        b = b or self.counts[0].chunks[0]
        r0, c0 = bi * b, bj * b
        r1, c1 = min(r0 + b, self.shape[0]), min(c0 + b, self.shape[1])
        try:
            values = np.asarray(self.counts[n % 2][r0:r1, c0:c1])
            sealed = int(self.digests[n % 2][bi, bj])
        except Exception as exc:  # zarr and its codecs raise many classes for a damaged chunk
            raise self._damaged(f"block {bi},{bj} cannot be read: {_short(exc)}") from None
        if (sealed != self._digest(bi, bj, n, values)) if n else values.any():
            raise self._damaged(f"block {bi},{bj} does not match its digest")
        return values

    def _rechunk(self, n: int) -> None:
        """Copy counts of exactly ``n`` realisations into chunks of this run's block
        (every chunk was verified by :meth:`check` first)."""
        new = self.path + ".rechunk"
        group, b = self._create(new), self.block
        for r0 in range(0, self.shape[0], b):
            for c0 in range(0, self.shape[1], b):
                r1, c1 = min(r0 + b, self.shape[0]), min(c0 + b, self.shape[1])
                values = self[r0:r1, c0:c1]
                group[f"counts_{n % 2}"][r0:r1, c0:c1] = values
                group[f"digest_{n % 2}"][r0 // b, c0 // b] = self._digest(r0 // b, c0 // b, n,
                                                                          values)
        group["applied"][:, :] = n
        old = self.path + ".old"
        _remove_store(old)
        os.replace(self.path, old)
        os.replace(new, self.path)
        shutil.rmtree(old, ignore_errors=True)
        import zarr

        self.group, self.rechunk = zarr.open_group(self.path, mode="r+"), False
        self._arrays()

    def __getstate__(self):
        raise TypeError("a CountStore stays in the process that opened it")

    def add(self, window, i: int, counts: np.ndarray) -> None:
        """Add realisation ``i``'s ``counts`` on ``window`` (one block) unless it is in already."""
        r0, r1, c0, c1 = (int(v) for v in window[:4])
        bi, bj = r0 // self.block, c0 // self.block
        done = int(self.applied[bi, bj])
        if done > i:
            return
        if done < i:
            raise self._damaged(f"block {bi},{bj} holds {done} realisations, not the {i} "
                                "before this one")
        total = self._chunk(bi, bj, done) + np.asarray(counts, np.int32)
        try:
            self.counts[(done + 1) % 2][r0:r1, c0:c1] = total
            self.digests[(done + 1) % 2][bi, bj] = self._digest(bi, bj, done + 1, total)
            self.applied[bi, bj] = done + 1
        except OSError as exc:
            if _disk_full(exc):
                raise _scratch_full(self.path, exc) from None
            raise

    def check(self, n: int, *, exact: bool = False, verify: bool = False) -> None:
        """Every chunk holds at least (``exact``: exactly) ``n`` realisations
        (``verify``: and matches its digest -- a resume checks every chunk).

        A store made with another block size is copied into chunks of this
        one first, which needs exactly ``n`` in every chunk."""
        try:
            a = np.asarray(self.applied[:, :])
        except Exception as exc:  # a damaged stamp array
            raise self._damaged(f"its stamps cannot be read: {_short(exc)}") from None
        if a.size and a.min() < n:
            raise self._damaged(f"some blocks hold {a.min()} realisations, fewer than the "
                                f"checkpoint's {n}")
        if verify:
            for (bi, bj), k in np.ndenumerate(a):
                self._chunk(bi, bj, int(k))
        if self.rechunk and a.size and a.min() == a.max() == n:
            self._rechunk(n)
            return
        if self.rechunk:
            raise CheckpointError(f"{self.checkpoint}: the per-cell counts were made with {{block}} "
                                  f"{self.counts[0].chunks[0]} and a realisation was under way; "
                                  "resume with that {block}", "block")
        if exact and a.max() != n:
            raise self._damaged(f"blocks hold {a.min()} to {a.max()} realisations, not exactly "
                                f"{n}")

    def __getitem__(self, key) -> np.ndarray:
        rs, cs = key
        r0, r1, _ = rs.indices(self.shape[0])
        c0, c1, _ = cs.indices(self.shape[1])
        out = np.empty((r1 - r0, c1 - c0), np.int32)
        b = self.counts[0].chunks[0]  # the store's own blocks (another run's, until copied)
        a = np.asarray(self.applied[r0 // b:-(-r1 // b), c0 // b:-(-c1 // b)])
        for bi in range(r0 // b, -(-r1 // b)):
            for bj in range(c0 // b, -(-c1 // b)):
                y0, y1 = max(r0, bi * b), min(r1, (bi + 1) * b)
                x0, x1 = max(c0, bj * b), min(c1, (bj + 1) * b)
                buf = self.counts[int(a[bi - r0 // b, bj - c0 // b]) % 2]
                out[y0 - r0:y1 - r0, x0 - c0:x1 - c0] = buf[y0:y1, x0:x1]
        return out
