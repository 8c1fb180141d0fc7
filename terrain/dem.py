"""The DEM grid: elevations, nodata mask, georeferencing and cell sizes.

Pure data; no function here opens a path (that is :mod:`terrain.io`).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from .errors import NoValidCellsError, OptionError

__all__ = ["Dem", "DiskDem", "RasterHeader", "metres_per_degree", "BAND_ROWS", "DemChecksum",
           "VERTICAL_UNITS", "UNIT_LABELS", "vertical_unit", "float32_reference"]

BAND_ROWS = 256  # rows per band when a DEM is read, hashed or reduced band by band

#: Metres per vertical unit, exact by definition: the international foot is 0.3048 m
#: and the US survey foot 1200/3937 m (NIST SP 811, 2008, appendix B.6; the US survey
#: foot was retired for new work at the end of 2022, Federal Register 85 FR 62698,
#: 2020, but older lidar collections of US states and counties use it).
VERTICAL_UNITS = {"m": 1.0, "ft": 0.3048, "us-ft": 1200 / 3937}
#: How each vertical unit is written in labels, tables and messages.
UNIT_LABELS = {"m": "m", "ft": "ft", "us-ft": "US survey ft"}
# Spellings of a band's unit type (GDAL, EPSG and UCUM names) taken to mean each unit,
# compared in lower case with "_", "-", "(", ")" and "." read as spaces.
_SPELLINGS = {
    "m": ("m", "metre", "meter", "metres", "meters", "metre s", "meter s", "m metre"),
    "ft": ("ft", "foot", "feet", "international foot", "international feet", "intl ft",
           "ft international", "foot international", "ft i", "[ft i]"),
    "us-ft": ("us ft", "ftus", "ft us", "foot us", "us foot", "us feet", "us survey foot",
              "us survey feet", "survey foot", "survey feet", "foot us survey", "ft us survey",
              "us survey ft", "usft", "ft us", "[ft us]", "foot survey us"),
}


def _spelling(text: str) -> str:
    """A unit's name as :data:`_SPELLINGS` lists it: lower case, punctuation as spaces."""
    for ch in "_-().":
        text = text.replace(ch, " ")
    return " ".join(text.lower().split())

# WGS84 ellipsoid (NIMA TR8350.2, 2000)
_A = 6378137.0
_F = 1 / 298.257223563
_E2 = _F * (2 - _F)


def metres_per_degree(lat_deg: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
    """Length of one degree of longitude and of latitude on the WGS84 ellipsoid.

    Parameters
    ----------
    lat_deg : array_like
        Geodetic latitude in degrees.

    Returns
    -------
    (m_per_deg_lon, m_per_deg_lat)

    References
    ----------
    .. [1] Snyder, J. P. (1987). Map Projections: A Working Manual. USGS
       Professional Paper 1395, eqs. 4-18 and 4-20 (radii of curvature).
    """
    phi = np.radians(np.asarray(lat_deg, dtype=np.float64))
    s2 = np.sin(phi) ** 2
    n = _A / np.sqrt(1 - _E2 * s2)  # prime vertical radius
    m = _A * (1 - _E2) / (1 - _E2 * s2) ** 1.5  # meridional radius
    return np.pi / 180 * n * np.cos(phi), np.pi / 180 * m


def vertical_unit(declared: str | None, given: str | None = None, *,
                  source: str = "the DEM") -> tuple[str, str]:
    """The DEM's vertical unit and where it came from.

    Parameters
    ----------
    declared : str or None
        The band's unit type as the file declares it (GDAL), if any.
    given : {"m", "ft", "us-ft"}, optional
        The unit a user states; it wins over the file's.
    source : str
        The file, for messages.

    Returns
    -------
    (unit, how) : a key of :data:`VERTICAL_UNITS`, and ``"given"``,
    ``"declared"`` or ``"assumed"`` (metres: the file declares none).

    Raises
    ------
    OptionError
        An unknown ``given`` unit, or a declared unit cairn cannot read
        (naming it) when none is given.

    Examples
    --------
    >>> vertical_unit("US survey foot")
    ('us-ft', 'declared')
    >>> vertical_unit(None)
    ('m', 'assumed')
    """
    if given is not None:
        if given not in VERTICAL_UNITS:
            raise OptionError(f"{{vertical_unit}} must be one of {', '.join(VERTICAL_UNITS)}, "
                              f"got {given!r}", "vertical_unit")
        return given, "given"
    if declared is None or not str(declared).strip():
        return "m", "assumed"
    text = _spelling(str(declared))
    for unit, names in _SPELLINGS.items():
        if text in {_spelling(n) for n in names}:
            return unit, "declared"
    raise OptionError(f"{source}: the file declares the vertical unit {declared!r}, which cairn "
                      "does not convert; state the unit of the values with {vertical_unit} "
                      f"({', '.join(VERTICAL_UNITS)})", "vertical_unit")


def float32_reference(bands, lowest: float, value_bytes: int, rmse: float, *,
                      source: str = "the DEM") -> float:
    """The elevation realisations are computed relative to (their float32 frame).

    Realisations are float32. A DEM read as float32 (float32 or up to 16-bit
    integer bands) is exact there, so it is used as it is (reference 0). A
    DEM read as float64 is taken relative to its lowest valid cell
    (``lowest``), so its float32 values keep the input's resolution however
    large its elevations (around 1e10 float32 steps by 1024, but not
    relative to the minimum).

    Parameters
    ----------
    bands : iterable of arrays
        The elevations (NaN on nodata), band by band (checked for float64 DEMs).
    lowest : float
        The lowest valid elevation.
    value_bytes : int
        4 (read as float32) or 8 (float64).
    rmse : float
        The error model's RMSE.

    Raises
    ------
    OptionError
        When even relative to the reference, float32 would move some
        elevation by more than a tenth of the RMSE (the input's resolution
        at the scale of the error is lost: usually an undeclared nodata value
        far from the terrain, or a very small stated error).

    Examples
    --------
    >>> z = np.array([1e10 + 0.25, 1e10 + 102.5])
    >>> float32_reference([z], float(z.min()), 8, 0.5)
    10000000000.25
    >>> float32_reference([np.array([177.0, 532.0])], 177.0, 4, 0.5)
    0.0
    """
    if value_bytes <= 4:
        return 0.0
    ref, worst, where = float(lowest), 0.0, 0.0
    for z in bands:
        rel = np.asarray(z, np.float64) - ref
        moved = np.abs(rel.astype(np.float32).astype(np.float64) - rel)
        if np.isfinite(moved).any():
            k = int(np.nanargmax(moved))
            if moved.flat[k] > worst:
                worst, where = float(moved.flat[k]), float(rel.flat[k])
    if worst > rmse / 10:
        raise OptionError(
            f"{source}: realisations are computed in float32, relative to the lowest cell "
            f"({ref:.6g}); there an elevation {where:.6g} above it moves by {worst:.3g}, more "
            f"than a tenth of the {{rmse}} ({rmse:.3g}) -- check for an undeclared nodata value "
            "({nodata}), a wrong scale or a too small {rmse}", "rmse", "nodata")
    return ref


@dataclass(frozen=True)
class RasterHeader:
    """What a raster's header says about the grid a read would return.

    Read without the pixels (:func:`terrain.io.read_header`), so the memory a
    run needs can be judged before the raster is read.

    Attributes
    ----------
    source : str
        The file.
    shape : (rows, cols)
        Of the window that would be read (the whole band without a box).
    dtype : str
        How the band is stored (e.g. ``int16``).
    value_bytes : int
        Bytes per elevation once read: 4 (float32) for bands of at most 16-bit
        integers or float32, else 8 (float64).
    transform, crs, geographic, linear_unit_m, vertical_units, vertical_unit,
    vertical_unit_source
        As for :class:`Dem`, of the window.
    band : int
        1-based band number.
    window : (col_off, row_off, width, height) or None
        The cells read from the file, or None for the whole band.
    scale, offset : float
        Stored value x scale + offset = elevation (GDAL band scale/offset).
    nodata_value : float or None
        The nodata value the file declares for the band.
    """

    source: str
    shape: tuple
    dtype: str
    value_bytes: int
    transform: tuple
    crs: str | None
    geographic: bool
    linear_unit_m: float
    vertical_units: str | None
    band: int
    window: tuple | None
    scale: float = 1.0
    offset: float = 0.0
    nodata_value: float | None = None
    vertical_unit: str = "m"
    vertical_unit_source: str = "assumed"

    @property
    def cells(self) -> int:
        return int(self.shape[0]) * int(self.shape[1])

    @property
    def stored_bytes(self) -> int:
        """Bytes per cell of the band as stored (the read's raw buffer)."""
        return np.dtype(self.dtype).itemsize


@dataclass
class Dem:
    """An elevation raster with its grid.

    Attributes
    ----------
    z : (rows, cols) float32 or float64 array
        Elevations; nodata cells hold NaN.
    nodata : (rows, cols) bool array
        True where the cell has no valid elevation.
    transform : tuple of 6 floats
        Affine (a, b, c, d, e, f) as in GDAL/rasterio: x = a*col + b*row + c.
    crs : str or None
        CRS as WKT, or None when the file declares none.
    geographic : bool
        True for a geographic (degrees) CRS.
    linear_unit_m : float
        Metres per CRS unit for projected CRSs (1.0 when unknown).
    vertical_units : str or None
        As declared by the file; None when not declared.
    vertical_unit : {"m", "ft", "us-ft"}
        The unit of the elevations (see :func:`vertical_unit`): prominences,
        depths and elevations are in it; areas are m^2 and volumes m^3.
    vertical_unit_source : {"given", "declared", "assumed"}
        Where the unit came from (assumed: metres, the file declared none).
        Left "assumed" with ``vertical_units`` set, the unit is read from
        ``vertical_units`` (source "declared"), as :func:`terrain.io.read_dem` does.
    source : str
        File the DEM came from (for messages), or "<array>".
    """

    z: np.ndarray
    nodata: np.ndarray
    transform: tuple = (1.0, 0.0, 0.0, 0.0, -1.0, 0.0)
    crs: str | None = None
    geographic: bool = False
    linear_unit_m: float = 1.0
    vertical_units: str | None = None
    source: str = "<array>"
    meta: dict = field(default_factory=dict)
    vertical_unit: str = "m"
    vertical_unit_source: str = "assumed"

    def __post_init__(self):
        self._check_unit()
        if self.z.ndim != 2:
            raise OptionError(f"{self.source}: expected a 2-D raster, got shape {self.z.shape}")
        self.nodata = np.asarray(self.nodata, bool) | ~np.isfinite(self.z)
        if self.nodata.all():
            raise NoValidCellsError(f"{self.source}: no valid cells (all nodata or non-finite)")
        if np.any(self.nodata & ~np.isnan(self.z)):
            self.z = np.where(self.nodata, np.nan, self.z).astype(self.z.dtype)

    @classmethod
    def from_array(cls, z: np.ndarray, *, cellsize: float = 1.0, **kw) -> Dem:
        """A DEM on a north-up grid with square cells of ``cellsize`` (CRS units)."""
        z = np.asarray(z)
        if z.dtype.kind != "f":
            z = z.astype(np.float32 if z.dtype.itemsize <= 2 else np.float64)
        kw.setdefault("transform", (cellsize, 0.0, 0.0, 0.0, -cellsize, z.shape[0] * cellsize))
        return cls(z=z, nodata=kw.pop("nodata", ~np.isfinite(z)), **kw)

    def _check_unit(self) -> None:
        if self.vertical_unit_source == "assumed" and self.vertical_units is not None:
            # a declared unit is the unit unless one was given: Dem(vertical_units="ft")
            # is in feet, as a file declaring it is (an unknown spelling is refused)
            self.vertical_unit, self.vertical_unit_source = vertical_unit(
                self.vertical_units, source=self.source)
        if self.vertical_unit not in VERTICAL_UNITS:
            raise OptionError(f"{{vertical_unit}} must be one of {', '.join(VERTICAL_UNITS)}, "
                              f"got {self.vertical_unit!r}", "vertical_unit")

    @property
    def metres_per_unit(self) -> float:
        """Metres per vertical unit (exact: 1, 0.3048 or 1200/3937)."""
        return VERTICAL_UNITS[self.vertical_unit]

    @property
    def unit_label(self) -> str:
        """The vertical unit as labels write it: ``m``, ``ft`` or ``US survey ft``."""
        return UNIT_LABELS[self.vertical_unit]

    @property
    def shape(self) -> tuple[int, int]:
        return self.z.shape

    @property
    def cellsize(self) -> tuple[float, float]:
        """Cell size (x, y) in CRS units, both positive."""
        a, b, _, d, e, _ = self.transform
        return float(np.hypot(a, d)), float(np.hypot(b, e))

    def row_latitudes(self) -> np.ndarray:
        """Latitude (degrees) of each row's centre for a geographic CRS."""
        a, b, c, d, e, f = self.transform
        rows = np.arange(self.shape[0]) + 0.5
        cols = self.shape[1] / 2
        return d * cols + e * rows + f

    def cell_metres(self) -> tuple[np.ndarray, np.ndarray]:
        """Cell width and height in metres, per row (arrays of length rows).

        For a geographic CRS the lengths follow the latitude of each row on
        the WGS84 ellipsoid; otherwise they are the CRS cell size times the
        CRS linear unit.
        """
        dx, dy = self.cellsize
        n = self.shape[0]
        if self.geographic:
            mlon, mlat = metres_per_degree(self.row_latitudes())
            return dx * mlon, dy * mlat
        return (np.full(n, dx * self.linear_unit_m), np.full(n, dy * self.linear_unit_m))

    def cell_area_m2(self) -> np.ndarray:
        """Area of a cell in each row, square metres.

        For a geographic CRS the exact area of the ellipsoidal quadrangle
        between the row's bounding parallels (WGS84; Snyder 1987, eq. 3-12
        for the authalic ``q``); otherwise the area of the cell's
        parallelogram, ``|a e - b d|`` (the determinant of the affine
        transform) in square CRS units, times the CRS unit squared -- on a
        rotated or sheared grid less than width x height.
        """
        if not self.geographic:
            a, b, _, d, e, _ = self.transform
            return np.full(self.shape[0], abs(a * e - b * d) * self.linear_unit_m ** 2)
        dx, dy = self.cellsize
        lat_c = self.row_latitudes()
        lo = np.radians(lat_c - dy / 2)
        hi = np.radians(lat_c + dy / 2)
        e = np.sqrt(_E2)

        def q(phi):
            s = np.sin(phi)
            return s / (1 - _E2 * s * s) - np.log((1 - e * s) / (1 + e * s)) / (2 * e)

        return np.abs(0.5 * _A * _A * (1 - _E2) * np.radians(dx) * (q(hi) - q(lo)))

    def xy(self, flat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """CRS coordinates of the centres of flat row-major cells."""
        r, c = np.divmod(np.asarray(flat, np.int64), self.shape[1])
        a, b, cc, d, e, f = self.transform
        x = a * (c + 0.5) + b * (r + 0.5) + cc
        y = d * (c + 0.5) + e * (r + 0.5) + f
        return x, y

    on_disk = False

    def bands(self, rows: int = BAND_ROWS):
        """Yield ``(r0, z, nodata)`` for bands of ``rows`` rows, top to bottom
        (views of the arrays here; reads for a :class:`DiskDem`)."""
        for r0 in range(0, self.shape[0], rows):
            yield r0, self.z[r0:r0 + rows], self.nodata[r0:r0 + rows]

    def window(self, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """Elevations of rows ``r0:r1`` and columns ``c0:c1`` (NaN on nodata)."""
        return np.asarray(self.z[r0:r1, c0:c1])

    def values_at(self, cells: np.ndarray) -> np.ndarray:
        """Elevations (float64) at flat row-major ``cells``."""
        cells = np.asarray(cells, np.int64)
        return np.asarray(self.z).reshape(-1)[cells].astype(np.float64)

    def lowest(self) -> float:
        """The lowest valid elevation."""
        return min(float(np.nanmin(np.where(nd, np.nan, z), initial=np.inf))
                   for _, z, nd in self.bands())

    def highest(self) -> float:
        """The highest valid elevation."""
        return max(float(np.nanmax(np.where(nd, np.nan, z), initial=-np.inf))
                   for _, z, nd in self.bands())

    def reference(self, rmse: float) -> float:
        """The elevation realisations are computed relative to (see
        :func:`float32_reference`; refuses elevations float32 cannot hold to a
        tenth of the RMSE)."""
        size = np.dtype(self.z.dtype).itemsize
        bands = (np.where(nd, np.nan, z) for _, z, nd in self.bands()) if size > 4 else ()
        return float32_reference(bands, self.lowest(), size, rmse, source=self.source)

    def checksum(self) -> str:
        """SHA-256 of the elevations and mask (identifies the DEM in checkpoints),
        hashed band by band, so a DEM on disk gets it while it is read."""
        h = DemChecksum(self.shape)
        for _, z, nd in self.bands():
            h.update(z, nd)
        return h.hexdigest()


class DemChecksum:
    """The DEM checksum fed band by band (bands of :data:`BAND_ROWS` rows, in order):
    the shape, then per band its elevations as float64 (0 on nodata) and its
    packed nodata mask."""

    def __init__(self, shape):
        self.h = hashlib.sha256()
        self.h.update(str(tuple(int(x) for x in shape)).encode())

    def update(self, z: np.ndarray, nodata: np.ndarray) -> None:
        self.h.update(np.ascontiguousarray(np.where(nodata, 0, z), dtype=np.float64).tobytes())
        self.h.update(np.packbits(nodata).tobytes())

    def hexdigest(self) -> str:
        return self.h.hexdigest()


class _NanMask:
    """The nodata mask of elevations on disk, read by window (NaN = nodata)."""

    def __init__(self, z):
        self.z = z

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.z.shape)

    def __getitem__(self, key) -> np.ndarray:
        return np.isnan(np.asarray(self.z[key]))


@dataclass
class DiskDem(Dem):
    """A :class:`Dem` whose elevations stay on disk (out-of-core runs).

    ``z`` reads windows (``z[r0:r1, c0:c1]`` returns an array, NaN on
    nodata) of a file written once when the DEM was read
    (:func:`terrain.io.read_dem` with ``scratch``); ``nodata`` reads the
    mask the same way. Georeferencing and cell sizes are as for
    :class:`Dem`. ``digest`` is the checksum, computed while reading;
    ``scratch`` is the folder holding the file; ``new_grid(name, shape,
    dtype)`` makes another grid-sized array on disk there (region labels).
    """

    digest: str = ""
    scratch: str = ""
    new_grid: object = None
    lowest_value: float = float("nan")
    highest_value: float = float("nan")

    on_disk = True

    def __post_init__(self):
        self._check_unit()
        self.nodata = _NanMask(self.z)

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(x) for x in self.z.shape)

    def bands(self, rows: int = BAND_ROWS):
        for r0 in range(0, self.shape[0], rows):
            z = np.asarray(self.z[r0:r0 + rows, :])
            yield r0, z, np.isnan(z)

    def values_at(self, cells: np.ndarray) -> np.ndarray:
        cells = np.asarray(cells, np.int64)
        out = np.empty(cells.size)
        rows, cols = np.divmod(cells, self.shape[1])
        for k in range(cells.size):  # a few hundred cells: one small read each
            out[k] = float(np.asarray(self.z[rows[k]:rows[k] + 1, cols[k]:cols[k] + 1])[0, 0])
        return out

    def lowest(self) -> float:
        return float(self.lowest_value)

    def highest(self) -> float:
        return float(self.highest_value)

    def checksum(self) -> str:
        return self.digest

