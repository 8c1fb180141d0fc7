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
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .dem import Dem, DiskDem, RasterHeader
from .errors import (
    BandError,
    CairnWarning,
    CheckpointError,
    CorruptRasterError,
    DemNotFoundError,
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
           "SCRATCH_PREFIX"]


# Common nodata values of DEM products and GIS packages that files often hold
# without declaring them (common practice, no source).
SENTINELS = (-9999.0, -99999.0, -32768.0, -32767.0, float(np.finfo(np.float32).min),
             float(np.float32(-3.4e38)))


def read_header(path: str | os.PathLike, *, band: int | None = None,
                bbox: tuple[float, float, float, float] | None = None,
                nodata: float | None = None) -> RasterHeader:
    """What :func:`read_dem` would read, from the header alone (no pixels).

    Same parameters and errors as :func:`read_dem`; used to judge the memory
    a run needs before reading the raster.
    """
    p = Path(path)
    with _open_raster(p) as ds:
        return _header(p, ds, band, bbox, nodata)


def read_dem(path: str | os.PathLike, *, band: int | None = None,
             bbox: tuple[float, float, float, float] | None = None,
             nodata: float | None = None, scratch: str | os.PathLike | None = None) -> Dem:
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
        h = _header(p, ds, band, bbox, nodata)
        if scratch is not None:
            return _read_to_disk(p, ds, h, nodata, bbox, Path(scratch))
        arr = _read_band(p, ds, h.band, h.window)
    data = np.asarray(arr.data)
    mask = np.ma.getmaskarray(arr)
    z, mask = _elevations(data, mask, h, nodata)
    stats = _BandStats()
    stats.add(data, mask)
    meta = stats.meta(h, nodata)
    del data, arr
    return Dem(z=z, nodata=mask, **_grid(h, p, meta, bbox))


def _grid(h: RasterHeader, p: Path, meta: dict, bbox) -> dict:
    """The georeferencing and metadata fields of a Dem read from ``p``."""
    return dict(transform=h.transform, crs=h.crs, geographic=h.geographic,
                linear_unit_m=h.linear_unit_m, vertical_units=h.vertical_units, source=str(p),
                meta={**meta, "bbox": list(bbox) if bbox is not None else None})


def _elevations(data: np.ndarray, mask: np.ndarray, h: RasterHeader, nodata):
    """Stored values to elevations (scale, offset; NaN on nodata) and the full mask."""
    if nodata is not None and _fits(nodata, data.dtype):
        mask = mask | (data == data.dtype.type(nodata))
    z = data.astype(np.float32 if h.value_bytes == 4 else np.float64)
    if h.scale != 1.0:
        z *= z.dtype.type(h.scale)
    if h.offset != 0.0:
        z += z.dtype.type(h.offset)
    return z, mask


def _read_to_disk(p: Path, ds, h: RasterHeader, nodata, bbox, folder: Path) -> DiskDem:
    """The DEM read band by band into ``folder/dem.npy`` (NaN on nodata)."""
    from .dem import BAND_ROWS, DemChecksum

    rows, cols = h.shape
    dtype = np.float32 if h.value_bytes == 4 else np.float64
    store = folder / "dem.npy"
    create_npy(str(store), (rows, cols), dtype)
    check, stats = DemChecksum(h.shape), _BandStats()
    col_off, row_off = (h.window[0], h.window[1]) if h.window is not None else (0, 0)
    step = BAND_ROWS * max(1, min(16, (64 << 20) // max(cols * 8 * BAND_ROWS, 1)))
    for r0 in range(0, rows, step):
        n = min(step, rows - r0)
        arr = _read_band(p, ds, h.band, (col_off, row_off + r0, cols, n))
        data = np.asarray(arr.data)
        z, mask = _elevations(data, np.ma.getmaskarray(arr), h, nodata)
        stats.add(data, mask)
        mask |= ~np.isfinite(z)
        z[mask] = np.nan
        for s in range(0, n, BAND_ROWS):
            check.update(z[s:s + BAND_ROWS], mask[s:s + BAND_ROWS])
        write_npy_window(str(store), r0, 0, z)
    if stats.valid == 0:
        raise NoValidCellsError(f"{p}: no valid cells (all nodata or non-finite)")
    z = NpyWindows(str(store))
    return DiskDem(z=z, nodata=None, digest=check.hexdigest(), lowest_value=stats.lo,
                   scratch=str(folder),
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
        self.nonfinite = self.valid = 0
        self.lo, self.hi = math.inf, -math.inf
        self.sentinels = dict.fromkeys(SENTINELS, 0)

    def add(self, data: np.ndarray, mask: np.ndarray) -> None:
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


def _header(p: Path, ds, band: int | None, bbox, nodata) -> RasterHeader:
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
    unit_m = 1.0
    if crs is not None and not geographic:
        with contextlib.suppress(Exception):
            unit_m = float(crs.linear_units_factor[1])
    small = dtype.kind == "f" and dtype.itemsize == 4 or dtype.kind in "iub" and dtype.itemsize <= 2
    scale, offset = (float(v) for v in (ds.scales[band - 1], ds.offsets[band - 1]))
    shape = (int(window.height), int(window.width)) if window is not None else (ds.height, ds.width)
    return RasterHeader(
        source=str(p), shape=shape, dtype=str(dtype), value_bytes=4 if small else 8,
        transform=tuple(transform)[:6], crs=crs.to_wkt() if crs is not None else None,
        geographic=geographic, linear_unit_m=unit_m,
        vertical_units=ds.units[band - 1] if ds.units and ds.units[band - 1] else None,
        band=band, scale=scale, offset=offset, nodata_value=ds.nodatavals[band - 1],
        window=None if window is None else (int(window.col_off), int(window.row_off),
                                            int(window.width), int(window.height)))


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
    return [w if isinstance(w, CairnWarning) else CairnWarning(w) for w in out]


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
    clash = [n for n in names if (out / n).exists()]
    if clash and not overwrite:
        more = f" and {len(clash) - 3} more" if len(clash) > 3 else ""
        raise OutputError(f"{out}: would overwrite {', '.join(clash[:3])}{more}; "
                          "pass {overwrite} to replace them", "overwrite")


# -- one run per output folder -------------------------------------------------------
LOCK_NAME = ".cairn.lock"
STAGING_PREFIX = ".cairn-staging-"
PUBLISHING = ".publishing.json"  # inside a staging folder: its files are being moved into place
_PART = re.compile(r"^\..+\.[a-z0-9_]{8}\.part(\.\w+)?$")  # atomic_path's temporary names
_HELD: dict[str, list] = {}  # output folder (real path) -> [lock fd, depth] held by this process


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
        The folder cannot be used, is held by another run, or would be
        overwritten without ``overwrite``.
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


@contextlib.contextmanager
def hold_outdir(outdir: str | os.PathLike):
    """Lock ``outdir`` for this process (re-entrant); another process holding
    it makes this raise :class:`OutputError` at once."""
    out = Path(outdir)
    key = os.path.realpath(out)
    held = _HELD.get(key)
    if held is not None:
        held[1] += 1
        try:
            yield out
        finally:
            held[1] -= 1
        return
    fd = _lock(out)
    _HELD[key] = [fd, 1]
    try:
        yield out
    finally:
        del _HELD[key]
        if fd is not None:
            with contextlib.suppress(OSError):
                os.unlink(out / LOCK_NAME)  # while still holding it
            os.close(fd)


def _lock(out: Path) -> int | None:
    """An exclusive ``flock`` on ``out/.cairn.lock`` (None where flock is missing
    or the file system does not support it)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return None
    path = out / LOCK_NAME
    for _ in range(10):
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise OutputError(f"{out}: cannot create its lock file ({exc.strerror}); choose "
                              "another output folder") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            pid = os.read(fd, 32).decode(errors="replace").strip()
            os.close(fd)
            who = f" (process {pid})" if pid.isdigit() else ""
            raise OutputError(f"{out}: another cairn run is writing to this folder{who}; wait "
                              "for it to finish or choose another output folder") from None
        except OSError:  # a file system without locks (some network mounts): go on unlocked
            os.close(fd)
            with contextlib.suppress(OSError):
                os.unlink(path)
            return None
        try:
            same = os.fstat(fd).st_ino == os.stat(path).st_ino
        except FileNotFoundError:
            same = False  # the previous holder removed it after we opened it
        if same:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
                os.write(fd, f"{os.getpid()}\n".encode())
            return fd
        os.close(fd)
    raise OutputError(f"{out}: cannot lock the output folder; choose another output folder")


def clean_leftovers(outdir: str | os.PathLike) -> list[str]:
    """Tidy what a killed run left in ``outdir`` (call while holding it).

    Temporary files of :func:`atomic_path` are removed; a staging folder is
    removed, after moving its files into place when its publication had
    begun (so the folder ends with the complete new set, never a mix).
    Returns the names removed or completed.
    """
    out = Path(outdir)
    done = []
    for p in sorted(out.iterdir()):
        if p.is_dir() and p.name.startswith(STAGING_PREFIX):
            marker = p / PUBLISHING
            if marker.is_file():
                with contextlib.suppress(OSError, ValueError):
                    for name in json.loads(marker.read_text()):
                        if (p / name).is_file():
                            os.replace(p / name, out / name)
                            done.append(name)
            shutil.rmtree(p, ignore_errors=True)
            done.append(p.name)
        elif p.is_file() and _PART.match(p.name):
            with contextlib.suppress(OSError):
                p.unlink()
                done.append(p.name)
    return done


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
    try:
        _sync_dir(stage)
        with _signals_held():
            marker = stage / PUBLISHING
            with open(marker, "w") as fh:
                fh.write(json.dumps(names))
                fh.flush()
                os.fsync(fh.fileno())
            for pattern in replaces:
                for old in out.glob(pattern):
                    if old.name not in names and old.is_file():
                        old.unlink()
            for name in names:
                os.replace(stage / name, out / name)
            _sync_dir(out)
    except OSError as exc:
        raise _write_error(out, exc) from None


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
        os.replace(tmp, dest)
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
        return OutputError(f"{folder}: disk full while writing {dest.name} ({why}); free some "
                           "space or choose another output folder")
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
    import pyogrio

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for layer, _ in pyogrio.list_layers(tmp):
            pyogrio.read_info(tmp, layer=layer)
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
    with atomic_path(dest, bands=2) as tmp, _cog_staging(tmp):
        with _open_cog(tmp, dem) as ds:
            ds.write(e, 1)
            ds.write(s, 2)
            _describe(ds, name=name, units=units, description=description, tags=tags, note=note)


def _describe(ds, *, name: str, units: str, description: str, tags: dict, note: str) -> None:
    """A layer's band descriptions, units, tags and note (see :func:`write_layer`)."""
    suffix = f"; {note}" if note else ""
    ds.set_band_description(1, f"{name} ({units}){suffix}")
    ds.set_band_description(2, f"{name} standard error ({units}){suffix}")
    ds.units = (units, units)
    ds.update_tags(**{k: _tag(v) for k, v in tags.items()}, LAYER=name, DESCRIPTION=description)
    for band, role in ((1, "estimate"), (2, "standard_error")):
        ds.update_tags(band, ROLE=role, **({"NOTE": note} if note else {}))


#: GDAL's block cache while layers are written window by window (bytes): the
#: default (5% of the machine's memory) would dwarf an out-of-core run's own
WINDOW_WRITE_CACHE = 256 * 2**20


def write_layers_by_window(dests: dict, dem: Dem, read, windows, describe: dict) -> None:
    """Write several layers as :func:`write_layer` does, window by window (out of core).

    ``dests`` maps layer name to path; ``read(r0, r1, c0, c1)`` returns every
    layer's (estimate, standard error) on a window; ``windows`` cover the
    grid; ``describe[name]`` holds :func:`write_layer`'s ``units``,
    ``description``, ``tags`` and ``note``. Each layer is first written by
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
            out = {n: open_.enter_context(_open_tiles(p, dem)) for n, p in stages.items()}
            for r0, r1, c0, c1 in windows:
                nd = np.isnan(dem.window(r0, r1, c0, c1))
                win = rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0)
                for n, (est, se) in read(r0, r1, c0, c1).items():
                    if n in out:
                        for band, v in ((1, est), (2, se)):
                            out[n].write(np.where(nd, np.nan, v).astype(np.float32), band,
                                         window=win)
            for n, ds in out.items():
                _describe(ds, name=n, **describe[n])
        for n, dest in dests.items():
            with rasterio.Env(GDAL_CACHEMAX=WINDOW_WRITE_CACHE), \
                    atomic_path(dest, bands=2) as tmp, _cog_staging(tmp):
                rasterio.shutil.copy(stages[n], tmp, **COG_OPTIONS)
    finally:
        for p in stages.values():
            with contextlib.suppress(FileNotFoundError):
                os.unlink(p)


def _open_tiles(path: Path, dem: Dem):
    """A two-band float32 tiled GeoTIFF on ``dem``'s grid, written by window."""
    import rasterio
    from rasterio.transform import Affine

    rows, cols = dem.shape
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return rasterio.open(path, "w", driver="GTiff", height=rows, width=cols, count=2,
                             dtype="float32", crs=dem.crs, transform=Affine(*dem.transform),
                             nodata=np.nan, tiled=True, blockxsize=256, blockysize=256,
                             compress="deflate", zlevel=1, predictor=3, bigtiff="IF_SAFER")


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


def create_npy(path: str, shape, dtype) -> None:
    """A ``.npy`` file of ``shape`` and ``dtype`` (contents undefined until written),
    unless ``path`` already holds one (reused: every cell is written again)."""
    try:
        a = np.load(path, mmap_mode="r")
        if a.shape == tuple(shape) and a.dtype == np.dtype(dtype):
            return
    except (OSError, ValueError, EOFError):
        pass
    np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=tuple(shape)).flush()


def write_npy_window(path: str, r0: int, c0: int, values: np.ndarray) -> None:
    """Write ``values`` into the ``.npy`` at ``path`` from row ``r0``, column ``c0``.

    A shared mapping: other processes read the values from the page cache at
    once; no msync, as the file is scratch, never read after the run."""
    mm = np.load(path, mmap_mode="r+")
    mm[r0:r0 + values.shape[0], c0:c0 + values.shape[1]] = values
    del mm


def save_npy(path: str, a: np.ndarray) -> str:
    """Save ``a`` as ``.npy`` at ``path``; return the path."""
    np.save(path, a)
    return path


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


@contextlib.contextmanager
def scratch_folder(parent: str | os.PathLike | None = None):
    """A new folder for a run's scratch files under ``parent`` (default: the
    system's temporary folder), removed on exit; folders left by runs whose
    process is gone (killed) are removed first."""
    parent = str(parent) if parent is not None else tempfile.gettempdir()
    remove_orphan_scratch(parent)
    folder = tempfile.mkdtemp(prefix=f"{SCRATCH_PREFIX}{os.getpid()}-", dir=parent)
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def remove_orphan_scratch(parent: str | os.PathLike | None = None) -> None:
    """Remove the scratch folders of blocked runs whose process is gone (killed)
    under ``parent`` (default: the system's temporary folder). A folder whose
    process number was reused by a live process stays until that one ends."""
    parent = str(parent) if parent is not None else tempfile.gettempdir()
    for folder in glob.glob(os.path.join(glob.escape(parent), SCRATCH_PREFIX + "*-*")):
        pid = os.path.basename(folder)[len(SCRATCH_PREFIX):].split("-")[0]
        if pid.isdigit() and int(pid) != os.getpid() and not _alive(int(pid)):
            shutil.rmtree(folder, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # another user's live process
        return True
    return True


class CountStore:
    """Per-cell int32 counts of a run kept on disk (out-of-core runs): a Zarr
    group chunked by block, each chunk stamped with the realisations it holds.

    ``add(window, i, counts)`` adds realisation ``i``'s counts of one block
    (windows aligned to the block grid): it reads the chunk's buffer holding
    the realisations so far, writes the sum into the chunk's *other* buffer
    and only then stamps the chunk, so a process killed between the writes
    leaves the old buffer and stamp intact; a resumed run adds realisation
    ``i`` again only where the stamp says it is missing. ``store[r0:r1,
    c0:c1]`` reads counts by window. Memory: one chunk at a time; disk: 8
    bytes per cell (two int32 buffers, compressed).

    References
    ----------
    .. [1] Zarr storage specification, version 3 (2023), zarr-specs.readthedocs.io.
    """

    def __init__(self, path: str | os.PathLike, shape, block: int, *, resume: bool = False):
        import zarr

        self.path, self.shape, self.block = str(path), tuple(int(x) for x in shape), int(block)
        if resume:
            try:
                self.group = zarr.open_group(self.path, mode="r+")
                arrays = [self.group[k] for k in ("counts_0", "counts_1", "applied")]
            except Exception as exc:  # zarr raises several classes for a missing or bad store
                raise CheckpointError(f"{self.path}: the run's per-cell counts are missing or "
                                      f"damaged ({_short(exc)}); start afresh without "
                                      "{resume}", "resume") from None
            if arrays[0].shape != self.shape:
                raise CheckpointError(f"{self.path}: the per-cell counts were made on another "
                                      "grid; start afresh without {resume}", "resume")
            self.rechunk = arrays[0].chunks[0] != self.block  # done by check()
        else:
            self.group, self.rechunk = self._create(self.path), False
        self._arrays()

    def _create(self, path: str):
        import zarr

        shutil.rmtree(path, ignore_errors=True)
        group = zarr.open_group(path, mode="w")
        for k in ("counts_0", "counts_1"):
            group.create_array(k, shape=self.shape, chunks=(self.block,) * 2, dtype="int32",
                               fill_value=0)
        nb = tuple(-(-s // self.block) for s in self.shape)
        group.create_array("applied", shape=nb, chunks=(1, 1), dtype="int64", fill_value=0)
        return group

    def _arrays(self) -> None:
        self.counts = (self.group["counts_0"], self.group["counts_1"])
        self.applied = self.group["applied"]

    def _rechunk(self, n: int) -> None:
        """Copy counts of exactly ``n`` realisations into chunks of this run's block."""
        new = self.path + ".rechunk"
        group, b = self._create(new), self.block
        for r0 in range(0, self.shape[0], b):
            for c0 in range(0, self.shape[1], b):
                r1, c1 = min(r0 + b, self.shape[0]), min(c0 + b, self.shape[1])
                group[f"counts_{n % 2}"][r0:r1, c0:c1] = self[r0:r1, c0:c1]
        group["applied"][:, :] = n
        old = self.path + ".old"
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
            raise CheckpointError(f"{self.path}: block {bi},{bj} holds {done} realisations, "
                                  f"not the {i} before this one; start afresh without {{resume}}",
                                  "resume")
        total = self.counts[done % 2][r0:r1, c0:c1] + np.asarray(counts, np.int32)
        self.counts[(done + 1) % 2][r0:r1, c0:c1] = total
        self.applied[bi, bj] = done + 1

    def check(self, n: int, *, exact: bool = False) -> None:
        """Every chunk holds at least (``exact``: exactly) ``n`` realisations.

        A store made with another block size is copied into chunks of this
        one first, which needs exactly ``n`` in every chunk."""
        a = np.asarray(self.applied[:, :])
        if self.rechunk and a.size and a.min() == a.max() == n:
            self._rechunk(n)
            return
        if self.rechunk:
            raise CheckpointError(f"{self.path}: the per-cell counts were made with {{block}} "
                                  f"{self.counts[0].chunks[0]} and a realisation was under way; "
                                  "resume with that {block}", "block")
        if a.min() < n or (exact and a.max() != n):
            raise CheckpointError(f"{self.path}: the per-cell counts hold {a.min()} to {a.max()} "
                                  f"realisations, not the checkpoint's {n}; start afresh without "
                                  "{resume}", "resume")

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

