"""Catchments under DEM error: channels, sub-catchments, outlet membership, divides.

A :class:`CatchmentJob` is run by :func:`terrain.runner.run_ensemble` like
the peak and depression attribution. Realisation ``i`` perturbs the DEM,
removes its depressions (least-cost breaching with a depth limit, or
filling), routes D8 or D4 flow, accumulates drainage area in m^2, keeps
each cell's drainage area as a one-byte code for the drainage-area layer
(median, 5% and 95% over realisations; :mod:`terrain.jobs.drainage_area`)
and adds 1 to:

- ``channel`` where the area draining through the cell reaches the channel
  area;

and, with outlets (each snapped, per realisation, to the cell of highest
accumulation within the snap radius; common practice, no source):

- ``sub[o]`` where outlet ``o`` is the first chosen outlet downstream (its
  sub-catchment; nested outlets split their parent);
- ``member[o]`` where the cell drains through ``o`` (its whole catchment);
- ``divide`` where a neighbour lies in another sub-catchment; cells that
  reach no chosen outlet share one label (elsewhere), so hillslopes
  draining off the raster edge are not divides.

Counts are integers, exact in any order; the log holds each realisation's
snapped cell, catchment and sub-catchment area per outlet.

Memory per cell (stated by :meth:`CatchmentJob.memory_per_cell`), for k
outlets: per worker, the run's float32 DEM (4 bytes), one realisation's
drainage (26, see :mod:`terrain.engine.hydro`) and its chunk's results:
uint8 counts (2k + 2; widened should a chunk exceed 255 realisations, which
the default chunks of at most 25 never do), the area codes (25, one byte per
realisation of a chunk of up to 25) and the chunk's smallest and largest
areas (8), counted three times: the worker's own and up to two finished
chunks awaiting their turn in the accumulating process: 135 + 6k bytes, 153
for 3 outlets. The accumulating process holds the DEM (its value bytes + 1
for the mask) and the float32 run copy (4), int32 counts (4 x (2k + 2); at
most 2**31 - 1 realisations), the drainage-area histogram (2 bytes per code,
K codes: 145 for a million cells, 8 more per doubling of the cells) and its
extremes (8), and, while the outputs are written, one layer's bands (24, the
drainage area's three): for a float32 DEM 49 + 8k + 2K bytes, 363 for 3
outlets on a million cells.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from .. import defaults
from ..dem import Dem
from ..engine.grid import offsets
from ..engine.hydro import (
    CONDITIONING,
    condition,
    count_drainage,
    flow,
    route,
    snap_to_max,
    subcatchment_labels,
)
from ..errors import CheckpointError, OptionError, OutletError
from ..layers import LAYERS, layer_name
from ..noise import ErrorModel
from ..outlets import layer_ids, short
from .credit import concat_logs
from .drainage_area import (
    CHUNK_ROWS,
    NO_CODE,
    QUANTILES,
    AreaCodes,
    area_quantiles,
    encode_areas,
    fold_codes,
)

__all__ = ["CatchmentJob", "CatchmentAccumulator", "ProbabilityLayers", "snap_candidates",
           "LOG_FIELDS", "COUNTS", "RUN_LIMIT"]

LOG_FIELDS = ("real", "outlet", "cell", "area", "subarea")
COUNTS = ("channel", "divide", "member", "sub")
RUN_LIMIT = 2**31 - 1  # realisations the accumulator counts in int32
_ROUTING_BYTES = 26  # one realisation's drainage per cell (terrain.engine.hydro)


def _outlet_cell(dem: Dem, oid: str, x: float, y: float, source: str) -> tuple[int, int]:
    rows, cols = dem.shape
    a, b, c, d, e, f = dem.transform
    det = a * e - b * d
    col = (e * (x - c) - b * (y - f)) / det
    row = (-d * (x - c) + a * (y - f)) / det
    if not (0 <= row < rows and 0 <= col < cols):
        raise OutletError(f"{source}: outlet {short(oid)} at ({x:g}, {y:g}) lies outside the raster; "
                          "check its coordinates and CRS")
    r0, c0 = int(row), int(col)
    if dem.nodata[r0, c0]:
        raise OutletError(f"{source}: outlet {short(oid)} at ({x:g}, {y:g}) lies on a nodata cell; "
                          "move it onto the channel")
    return r0, c0


def snap_candidates(dem: Dem, ids, xy: np.ndarray, snap_m: float, *,
                    source: str = "outlets") -> tuple[np.ndarray, np.ndarray]:
    """Each outlet's snap candidates: valid cells whose centres lie within
    ``snap_m`` metres of the outlet's cell (always including that cell).

    Returns ``(cand, cand_ptr)``: the candidates of all outlets concatenated,
    and the offsets of each outlet's run.

    Raises
    ------
    OutletError
        A point outside the raster or on a nodata cell.
    """
    rows, cols = dem.shape
    w_m, h_m = dem.cell_metres()
    cand, ptr = [], [0]
    for oid, (x, y) in zip(ids, xy):
        r0, c0 = _outlet_cell(dem, oid, x, y, source)
        wr, hr = float(w_m[r0]), float(h_m[r0])
        kr = int(np.ceil(snap_m / hr)) if snap_m > 0 else 0
        kc = int(np.ceil(snap_m / wr)) if snap_m > 0 else 0
        rr, cc = np.mgrid[max(r0 - kr, 0):min(r0 + kr, rows - 1) + 1,
                          max(c0 - kc, 0):min(c0 + kc, cols - 1) + 1]
        dist = np.hypot((rr - r0) * hr, (cc - c0) * wr)
        ok = (dist <= snap_m) & ~dem.nodata[rr, cc]
        ok[r0 - rr[0, 0], c0 - cc[0, 0]] = True
        cand.append(np.sort((rr[ok] * cols + cc[ok]).astype(np.int64)))
        ptr.append(ptr[-1] + cand[-1].size)
    return np.concatenate(cand) if cand else np.empty(0, np.int64), np.array(ptr, np.int64)


@dataclass(frozen=True, eq=False)
class CatchmentJob:
    """What a catchment realisation computes (see the module docstring).

    Attributes
    ----------
    ids : tuple of str
        Outlet ids, in full (tables); file and layer names use
        :attr:`layer_ids` (see :func:`terrain.outlets.layer_ids`). Empty:
        the run computes channel probability only.
    xy : (k, 2) array
        Outlet coordinates in the DEM's CRS.
    snap_m : float, optional
        Snap radius in metres. Default: 2 x the mean cell width.
    channel_area : float, optional
        Drainage area (m^2) at which a cell counts as channel. Default 0.1 km^2.
    conditioning : {"breach", "fill"}, optional
        How depressions are removed. Default: breach.
    breach_cap : float, optional
        Depressions deeper than this (vertical units) are filled, not
        breached; no cell is lowered by more. Default 3; ``inf`` breaches
        every depression.
    connectivity : {8, 4}
        D8 (steepest of 8 neighbours, diagonals included) or D4 (of the 4
        edge neighbours); depressions, flats and divides use the same
        neighbourhood.
    source : str
        Where the outlets came from (for messages).
    reference : float, optional
        The elevation the float32 realisations are relative to (filled in by
        :meth:`resolved`; see :meth:`terrain.dem.Dem.reference`).

    The grid-dependent arrays (snap candidates, cell sizes and areas) are
    filled in by :meth:`resolved`.
    """

    ids: tuple = ()
    xy: np.ndarray | None = None
    snap_m: float | None = None
    channel_area: float | None = None
    conditioning: str | None = None
    breach_cap: float | None = None
    connectivity: int = 8
    source: str = "outlets"
    cand: np.ndarray | None = None
    cand_ptr: np.ndarray | None = None
    cell_w: np.ndarray | None = None
    cell_h: np.ndarray | None = None
    area_row: np.ndarray | None = None
    from_defaults: tuple = ()
    reference: float | None = None
    area_codes: AreaCodes | None = None
    layer_ids: tuple = field(init=False, default=())

    def __post_init__(self):
        ids = tuple(str(i) for i in self.ids)
        xy = np.asarray(self.xy if self.xy is not None else np.empty((0, 2)),
                        np.float64).reshape(-1, 2)
        if xy.shape[0] != len(ids):
            raise OutletError(f"{self.source}: {len(ids)} ids for {xy.shape[0]} outlet points")
        if len(set(ids)) != len(ids):
            raise OutletError(f"{self.source}: outlet ids are not unique")
        _check(self)
        object.__setattr__(self, "ids", ids)
        object.__setattr__(self, "xy", xy)
        object.__setattr__(self, "layer_ids", layer_ids(ids))

    # -- job interface ----------------------------------------------------------
    name = "catchments"

    @property
    def layers(self) -> tuple[str, ...]:
        """Channel and drainage area; with outlets also divides, then membership and
        sub-catchment per outlet."""
        names = [layer_name("catchments", "channel"), layer_name("catchments", "drainage_area")]
        if self.ids:
            names.append(layer_name("catchments", "divide"))
            for role in ("membership", "subcatchment"):
                names += [LAYERS[layer_name("catchments", role)].concrete(i) for i in self.layer_ids]
        return tuple(names)

    def resolved(self, dem: Dem, model: ErrorModel, *, layout=None) -> CatchmentJob:
        """This job with its defaults resolved and the grid's arrays prepared
        (the whole grid in memory, whatever the ``layout``: catchments have no
        blocked mode).

        The first time (no snap candidates yet), outlets that snap to one cell on
        the DEM as given are refused (:func:`refuse_shared_cells`)."""
        method = defaults.conditioning(self.conditioning)
        snap = defaults.snap_radius(self.snap_m, dem) if self.ids else self.snap_m
        cand, ptr = snap_candidates(dem, self.ids, self.xy, snap or 0.0, source=self.source)
        w, h = dem.cell_metres()
        cap = defaults.breach_cap(self.breach_cap, method)
        if self.cand is None and len(self.ids) > 1:
            refuse_shared_cells(dem, self, cand, ptr, method=method, cap=cap)
        area_row = dem.cell_area_m2()
        valid = sum(int((~nd).sum()) for _, _, nd in dem.bands())
        return dataclasses.replace(
            self, snap_m=snap, cand=cand, cand_ptr=ptr, cell_w=w, cell_h=h,
            area_row=area_row, area_codes=AreaCodes.for_grid(area_row, valid),
            channel_area=defaults.channel_area(self.channel_area),
            conditioning=method, breach_cap=cap,
            from_defaults=tuple(self.defaults_used()), reference=dem.reference(model.rmse))

    def defaults_used(self) -> dict:
        """The settings left to library defaults, with the rule each follows."""
        names = (["snap_m"] if self.ids else []) + ["channel_area", "conditioning"]
        if defaults.conditioning(self.conditioning) == "breach":
            names.append("breach_cap")
        return {n: defaults.RULES[n] for n in names
                if getattr(self, n) is None or n in self.from_defaults}

    def describe(self) -> dict:
        return {"job": "catchments", "outlets": dict(zip(self.ids, self.xy.tolist())),
                "snap_m": self.snap_m, "channel_area": self.channel_area,
                "conditioning": self.conditioning, "breach_cap": self.breach_cap,
                "connectivity": self.connectivity, "reference": self.reference}

    def new_counts(self, n_cells: int) -> dict:
        """uint8 counts for one chunk (widened to uint16, then uint32, should a chunk
        hold more than 255, then 65535 realisations); the area codes of each of its
        realisations (room for :data:`~terrain.jobs.drainage_area.CHUNK_ROWS`, grown
        if need be) and their smallest and largest areas."""
        k = len(self.ids) if self.ids else 0
        m = n_cells if k else 0
        return {"channel": np.zeros(n_cells, np.uint8), "divide": np.zeros(m, np.uint8),
                "member": np.zeros((k, m), np.uint8), "sub": np.zeros((k, m), np.uint8),
                "area_codes": np.full((CHUNK_ROWS, n_cells), NO_CODE, np.uint8),
                "area_lo": np.full(n_cells, np.inf, np.float32),
                "area_hi": np.full(n_cells, -np.inf, np.float32),
                "realised": np.zeros(1, np.int64)}

    def realise(self, z, sampler, seed, i, counts) -> dict:
        _make_room(counts)
        zi = sampler.draw(seed, i)
        zi += z
        condition(zi, connectivity=self.connectivity, method=self.conditioning,
                  max_depth=math.inf if self.breach_cap is None else self.breach_cap)
        fl = route(zi, cell_w=self.cell_w, cell_h=self.cell_h, cell_area=self.area_row,
                   connectivity=self.connectivity)
        del zi
        k = len(self.ids)
        snapped = snap_to_max(fl.acc, self.cand, self.cand_ptr)
        if k:
            lab, _, parent, alias = subcatchment_labels(fl, snapped)
        else:
            lab, parent, alias = np.empty(0, np.int32), np.empty(0, np.int64), np.empty(0, np.int64)
        row = int(counts["realised"][0]) - 1
        encode_areas(fl.acc, fl.valid, self.area_row, z.shape[1], self.area_codes.size,
                     counts["area_codes"][row], counts["area_lo"], counts["area_hi"])
        area, subarea = np.zeros(k), np.zeros(k)
        dr, dc = offsets(self.connectivity)
        count_drainage(lab, fl.valid, fl.acc, *z.shape, dr, dc, parent, alias, self.area_row,
                       float(self.channel_area), counts["member"], counts["sub"], counts["divide"],
                       counts["channel"], area, subarea)
        return {"real": np.full(k, i, np.int32), "outlet": np.arange(k, dtype=np.int32),
                "cell": snapped.astype(np.int64), "area": area, "subarea": subarea}

    def accumulator(self, n_cells: int) -> CatchmentAccumulator:
        return CatchmentAccumulator(n_cells, self)

    def memory_per_cell(self, value_bytes: int, cells: int | None = None) -> tuple[int, int]:
        """Bytes per cell (accumulating process, each worker), as itemised in the
        module docstring: the process holds the DEM, its float32 copy, int32
        counts, the drainage-area histogram of a grid of ``cells`` cells (its
        codes, or a grid of 2**24 cells when not given) and one layer being
        written; per worker, the float32 DEM, one realisation's drainage and
        three chunk results (the worker's, and up to two finished chunks
        awaiting their turn to be folded in). Not counted: an error field's FFT
        work arrays (correlated error) and a figure's rendering."""
        counters = 2 * len(self.ids) + (2 if self.ids else 1)
        codes = self.area_codes or AreaCodes.codes_for(cells if cells else 2 ** 24)
        chunk = counters + CHUNK_ROWS + 8
        return (value_bytes + 1 + 4 + 4 * counters + 2 * codes.size + 8 + 24,
                4 + _ROUTING_BYTES + 3 * chunk)


def refuse_shared_cells(dem: Dem, job: CatchmentJob, cand: np.ndarray, ptr: np.ndarray, *,
                        method: str, cap: float | None) -> None:
    """Refuse outlets that snap to one cell on the DEM as given (conditioned and
    routed as a realisation is, without error): two gauges on one cell would
    share one catchment, so one of them is misplaced or the snap radius too
    large.

    Raises
    ------
    OutletError
        Naming both outlets and the cell.
    """
    w, h = dem.cell_metres()
    fl = flow(dem.z, cell_w=w, cell_h=h, cell_area=dem.cell_area_m2(),
              connectivity=job.connectivity, conditioning=method,
              breach_cap=math.inf if cap is None else cap, mask=dem.nodata)
    snapped = snap_to_max(fl.acc, cand, ptr)
    seen: dict[int, int] = {}
    for k, cell in enumerate(snapped.tolist()):
        if cell in seen:
            a, b = job.ids[seen[cell]], job.ids[k]
            x, y = (float(v[0]) for v in dem.xy(np.array([cell])))
            raise OutletError(f"{job.source}: outlets {short(a)} and {short(b)} snap to the same "
                              f"cell ({x:.6g}, {y:.6g}) on the DEM as given; move one of them or "
                              "give a smaller {snap_m}", "snap_m")
        seen[cell] = k


def _make_room(counts: dict) -> None:
    """Count one more realisation in ``counts``: widen its arrays when full, and
    give the area codes another row."""
    full = np.iinfo(counts["channel"].dtype).max
    if counts["realised"][0] >= full:
        wider = np.uint16 if full < 2**16 - 1 else np.uint32
        for name in COUNTS:
            counts[name] = counts[name].astype(wider)
    codes = counts["area_codes"]
    if counts["realised"][0] >= codes.shape[0]:
        counts["area_codes"] = np.concatenate([codes, np.full_like(codes, NO_CODE)])
    counts["realised"][0] += 1


def _check(job: CatchmentJob) -> None:
    """Validate a job's settings (each error names its parameter)."""
    if job.snap_m is not None and not (math.isfinite(job.snap_m) and job.snap_m >= 0):
        raise OutletError(f"{{snap_m}} must be >= 0 metres and finite, got {job.snap_m}", "snap_m")
    if job.channel_area is not None and not (math.isfinite(job.channel_area)
                                             and job.channel_area > 0):
        raise OptionError(f"{{channel_area}} must be a positive area in m^2, got "
                          f"{job.channel_area}", "channel_area")
    if job.conditioning is not None and job.conditioning not in CONDITIONING:
        raise OptionError(f"{{conditioning}} must be one of {', '.join(CONDITIONING)}, got "
                          f"{job.conditioning!r}", "conditioning")
    if job.breach_cap is not None and not job.breach_cap >= 0:
        raise OptionError(f"{{breach_cap}} must be >= 0 (vertical units), got "
                          f"{job.breach_cap}", "breach_cap")
    if job.breach_cap is not None and job.conditioning == "fill":
        raise OptionError("{breach_cap} limits breaching, which {conditioning} fill does not do; "
                          "drop it, or choose {conditioning} breach", "breach_cap", "conditioning")
    if job.snap_m is not None and not job.ids:
        raise OptionError("{snap_m} snaps outlets, and there are none; drop it or give "
                          "{outlets}", "snap_m", "outlets")
    if job.connectivity not in (4, 8):
        raise OptionError(f"{{connectivity}} must be 4 or 8, got {job.connectivity!r}",
                          "connectivity")


class ProbabilityLayers(Mapping):
    """Layers computed from integer counts when read: name -> (share, standard error).

    Nothing is held but the counts, so a run with many outlets never has all
    its float layers in memory at once; each access returns new float64
    arrays on the grid (the Monte Carlo standard error is sqrt(p(1-p)/N)).
    ``computed`` adds layers made by a function when read (the drainage area:
    its median, 5% and 95% bands); ``order`` is the order of the names.
    """

    def __init__(self, counts: dict, n: int, shape, computed: dict | None = None,
                 order: tuple = ()):
        self._counts, self._n, self._shape = counts, n, tuple(shape)
        self._computed = computed or {}
        self._order = tuple(order) or tuple(counts) + tuple(self._computed)

    def __getitem__(self, name):
        if name in self._computed:
            return self._computed[name]()
        c = self._counts[name]
        n = max(self._n, 1)
        p = np.divide(c, n, dtype=np.float64).reshape(self._shape)
        se = 1.0 - p
        se *= p
        se /= n
        np.sqrt(se, out=se)
        return p, se

    def __iter__(self):
        return iter(self._order)

    def __len__(self):
        return len(self._order)


_AREA_STATE = ("area_hist", "area_lo", "area_hi")


class CatchmentAccumulator:
    """int32 channel, divide, membership and sub-catchment counts, the drainage-area
    histogram and extremes (:mod:`terrain.jobs.drainage_area`), plus the log."""

    def __init__(self, n_cells: int, job: CatchmentJob):
        self.job = job
        self.n = 0
        k = len(job.ids)
        m = n_cells if k else 0
        self.channel = np.zeros(n_cells, np.int32)
        self.divide = np.zeros(m, np.int32)
        self.member = np.zeros((k, m), np.int32)
        self.sub = np.zeros((k, m), np.int32)
        size = job.area_codes.size if job.area_codes is not None else 1
        self.area_hist = np.zeros((n_cells, size), np.uint16)
        self.area_lo = np.full(n_cells, np.inf, np.float32)
        self.area_hi = np.full(n_cells, -np.inf, np.float32)
        self.logs: list[dict] = []

    def add(self, log: dict, counts: dict, n: int) -> None:
        if self.n + n > RUN_LIMIT:
            raise OptionError(f"{{realisations}} must be at most {RUN_LIMIT} for catchments",
                              "realisations")
        for name in COUNTS:
            getattr(self, name).__iadd__(counts[name])
        if self.n + n > np.iinfo(self.area_hist.dtype).max:
            self.area_hist = self.area_hist.astype(np.uint32)
        fold_codes(counts["area_codes"], n, self.area_hist)
        np.minimum(self.area_lo, counts["area_lo"], out=self.area_lo)
        np.maximum(self.area_hi, counts["area_hi"], out=self.area_hi)
        self.logs.append(log)
        self.n += n

    def drainage_area(self, shape) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The drainage-area layer's bands on the grid: median, 5% and 95% of the
        realisations' upslope areas (m^2, float64; NaN on nodata), at the exact
        ranks ``ceil(p N)`` (see :mod:`terrain.jobs.drainage_area`)."""
        n = max(self.n, 1)
        ranks = np.array(sorted({max(math.ceil(p * n - 1e-9), 1) for p in QUANTILES}), np.int64)
        out = np.empty((ranks.size, self.area_hist.shape[0]))
        area_quantiles(self.area_hist, self.area_lo, self.area_hi, self.job.area_row, shape[1],
                       ranks, out)
        pick = {r: out[j].reshape(shape) for j, r in enumerate(ranks.tolist())}
        return tuple(pick[max(math.ceil(p * n - 1e-9), 1)] for p in QUANTILES)

    def log(self) -> dict:
        return concat_logs(self.logs, LOG_FIELDS)

    def _named(self) -> dict:
        """The count layers by name (every layer but the drainage area)."""
        area = layer_name("catchments", "drainage_area")
        names = [n for n in self.job.layers if n != area]
        k = len(self.job.ids)
        arrays = [self.channel] + ([self.divide] + list(self.member) + list(self.sub) if k else [])
        return dict(zip(names, arrays))

    def layers(self, shape) -> Mapping:
        area = layer_name("catchments", "drainage_area")
        return ProbabilityLayers(self._named(), self.n, shape,
                                 {area: lambda: self.drainage_area(shape)}, self.job.layers)

    def stop_statistic(self) -> float:
        """Largest standard error of any channel, divide, membership or sub-catchment
        probability."""
        if self.n == 0:
            return math.nan
        # the largest p(1 - p) is at the count closest to n / 2
        closest = min(int(np.abs(2 * a.astype(np.int64) - self.n).min())
                      for a in self._named().values() if a.size)
        p = 0.5 - closest / (2 * self.n)
        return math.sqrt(p * (1 - p) / self.n)

    def state(self) -> dict:
        st = {"n": np.array(self.n), "channel": self.channel, "divide": self.divide,
              "member": self.member, "sub": self.sub,
              **{name: getattr(self, name) for name in _AREA_STATE}}
        st.update({f"log_{k}": v for k, v in self.log().items()})
        return st

    def restore(self, st: dict) -> None:
        for name in COUNTS + _AREA_STATE:
            have = getattr(self, name)
            if st.get(name) is None or st[name].shape != have.shape:
                raise CheckpointError("checkpoint arrays do not match this DEM and these outlets")
            if name == "area_hist":  # kept uint32 once past 65535 realisations
                self.area_hist = np.array(st[name], dtype=st[name].dtype)
            else:
                have[:] = st[name]
        self.n = int(st["n"])
        self.logs = [{k: st[f"log_{k}"] for k in LOG_FIELDS}]
