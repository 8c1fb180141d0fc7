"""The file formats cairn writes, each through :func:`~terrain.io.checked.atomic_path`:
Cloud Optimized GeoTIFF layers (whole or window by window), GeoPackage and CSV
tables (formula cells neutralised), PNG figures, JSON, and ``.npz`` checkpoints.
"""

from __future__ import annotations

import contextlib
import json
import os
import warnings
from pathlib import Path

import numpy as np

from ..dem import Dem
from ._base import short
from .checked import atomic_path
from .files import release_freed_memory


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
#: DEFLATE with the floating-point predictor at level 3 (GDAL's default is 6: measured on
#: a 1024² depressions run's four layers, level 3 writes them in 0.31 s against 0.39 s,
#: 3% larger), per-band statistics stored in the file; tiles compressed on every core
#: (the same bytes as on one: each tile is compressed alone, and written in order).
COG_OPTIONS = dict(driver="COG", compress="deflate", predictor=3, level=3, blocksize=256,
                   overview_resampling="average", statistics="YES", bigtiff="IF_SAFER",
                   num_threads="ALL_CPUS")


def one_gdal_thread() -> None:
    """Write GeoTIFFs with one GDAL thread from here on, in a forked copy of a
    process (:func:`terrain.outputs.beside.in_a_copy`): the worker threads
    GDAL started in the parent are not in the copy, and a job handed to
    them would wait for ever."""
    COG_OPTIONS["num_threads"] = "1"


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
    from ..layers import BAND_TEXT

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
                release_freed_memory()  # the window's arrays, before the next is read
            for n, ds in out.items():
                _describe(ds, name=n, **describe[n])
        for n, dest in dests.items():
            with rasterio.Env(GDAL_CACHEMAX=WINDOW_WRITE_CACHE), \
                    atomic_path(dest, bands=count[n]) as tmp, _cog_staging(tmp):
                rasterio.shutil.copy(stages[n], tmp, **COG_OPTIONS)
            release_freed_memory()  # GDAL's block cache of the copy
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
                             compress="deflate", zlevel=1, predictor=3, bigtiff="IF_SAFER",
                             num_threads=COG_OPTIONS["num_threads"])


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
    """Save a matplotlib Figure as PNG, atomically.

    zlib level 3, not Pillow's default 6: a quick-look map encodes in less than
    half the time and comes out within 1% of the size. What earlier writing
    freed is handed back first: rendering needs a few hundred MiB for a big
    map (:func:`release_freed_memory`)."""
    release_freed_memory()
    with atomic_path(dest) as tmp:
        figure.savefig(tmp, format="png", pil_kwargs={"compress_level": 3})


#: the file type of checkpoints (``.npz`` without pickles)
CHECKPOINT_SUFFIX = ".npz"


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
        raise ValueError(f"truncated or damaged archive: {short(exc)}") from None
    except Exception as exc:  # zipfile, zlib and numpy raise many classes for damage
        raise ValueError(f"truncated or damaged archive: {short(exc)}") from None
