"""Reading rasters: headers without pixels, DEMs into memory or band by band onto
disk (a :class:`~terrain.dem.DiskDem`), and the warnings a DEM's metadata calls for.
"""

from __future__ import annotations

import contextlib
import functools
import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..dem import Dem, DiskDem, RasterHeader, vertical_unit
from ..errors import (
    BandError,
    CairnError,
    CairnWarning,
    CorruptRasterError,
    DemNotFoundError,
    GeoreferenceError,
    NotARasterError,
    NoValidCellsError,
    OptionError,
    RasterTypeError,
    WindowError,
)
from ._base import short
from .scratch import NpyWindows, create_npy, write_npy_window

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
    from ..dem import BAND_ROWS, DemChecksum

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


@dataclass(frozen=True)
class RasterWindows:
    """A DEM's raster read window by window exactly as :func:`read_dem` reads
    it: ``source[r0:r1, c0:c1]`` opens the file (any path or URL GDAL opens,
    ``/vsis3/`` and ``/vsicurl/`` included), reads that window of the band
    (offset by the ``bbox`` window read) and applies the same nodata, scale
    and offset (:func:`_elevations`), giving the same values (float32 or
    float64 as :attr:`~terrain.dem.RasterHeader.value_bytes`, NaN on nodata)
    as the same window of ``read_dem(...).z``. The vertical unit is a label:
    ``read_dem`` converts no values, and neither does this. Pickles as its
    header, so a task on a Dask worker reads its own window from the file
    instead of being sent the values. Memory: the window read, 8 bytes per
    cell at most besides the stored values."""

    header: RasterHeader
    nodata: float | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(x) for x in self.header.shape)

    def __getitem__(self, key) -> np.ndarray:
        rs, cs = key
        r0, r1, _ = rs.indices(self.shape[0])
        c0, c1, _ = cs.indices(self.shape[1])
        h = self.header
        col_off, row_off = (h.window[0], h.window[1]) if h.window is not None else (0, 0)
        p = Path(h.source)
        with _open_raster(p) as ds:
            arr = _read_band(p, ds, h.band, (col_off + c0, row_off + r0, max(c1 - c0, 0),
                                             max(r1 - r0, 0)))
        z, mask, _ = _elevations(np.asarray(arr.data), np.ma.getmaskarray(arr), h, self.nodata)
        mask |= ~np.isfinite(z)
        z[mask] = np.nan
        return z


def dem_windows(dem: Dem) -> RasterWindows | None:
    """The raster ``dem`` was read from, read by window as :func:`read_dem`
    read it (:class:`RasterWindows`), or None: a DEM made from an array, or
    whose file no longer opens or no longer gives the grid, scale and offset
    read, or (a DEM in memory) whose values are no longer the file's: its
    values then have to be sent with the tasks. Reads the header, and for a
    DEM in memory the file once, band by band, to compare checksums (a
    :class:`~terrain.dem.DiskDem` was read from the file in this run)."""
    m = dem.meta
    if dem.source == "<array>" or not {"band", "scale", "offset", "window"} <= m.keys():
        return None
    given = dem.vertical_unit if dem.vertical_unit_source == "given" else None
    try:
        h = read_header(dem.source, band=m["band"], bbox=m.get("bbox"), nodata=m.get("nodata"),
                        vertical_unit=given)
    except CairnError:
        return None
    window = list(h.window) if h.window is not None else None
    if (h.shape != tuple(dem.shape) or (h.scale, h.offset) != (m["scale"], m["offset"])
            or window != m["window"] or h.dtype != m.get("dtype", h.dtype)):
        return None
    reader = RasterWindows(h, m.get("nodata"))
    if not isinstance(dem, DiskDem) and _checksum(reader) != dem.checksum():
        return None  # the values were changed after they were read
    return reader


def _checksum(reader: RasterWindows) -> str:
    """:meth:`terrain.dem.Dem.checksum` of the DEM ``reader`` reads, band by band."""
    from ..dem import BAND_ROWS, DemChecksum

    check, rows = DemChecksum(reader.shape), reader.shape[0]
    step = BAND_ROWS * 16
    for r0 in range(0, rows, step):
        z = reader[r0:r0 + step, :]
        for s in range(0, z.shape[0], BAND_ROWS):
            check.update(z[s:s + BAND_ROWS], np.isnan(z[s:s + BAND_ROWS]))
    return check.hexdigest()


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

    if not _gdal_virtual(p) and not p.exists():
        raise DemNotFoundError(f"{p}: no such file")
    if p.is_dir() and not any(p.iterdir()):
        raise NotARasterError(f"{p}: is an empty folder, not a raster")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return rasterio.open(p)
        except RasterioIOError as exc:
            raise NotARasterError(f"{p}: not a raster any driver can read ({short(exc)})") from None


def _gdal_virtual(p: Path) -> bool:
    """True for a GDAL virtual file system path (``/vsis3/...``, ``/vsicurl/...``,
    ``/vsimem/...``): opened by GDAL, not looked up on the local disk."""
    return str(p).startswith("/vsi")


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
                                 f"({short(exc)})") from None


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
