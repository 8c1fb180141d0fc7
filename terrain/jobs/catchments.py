"""Catchments under DEM error: outlet membership and drainage-divide probability.

A :class:`CatchmentJob` is run by :func:`terrain.runner.run_ensemble` like
the peak and depression attribution: realisation ``i`` perturbs the DEM,
fills its depressions, routes D8 flow, snaps each outlet to the cell of
highest flow accumulation within the snap radius (common practice, no
source), and adds 1 to each outlet's membership count for every cell
draining through it, and to the divide count for every cell with a
neighbour draining to another exit. Counts are integers, exact in any
order; the log holds each realisation's snapped cell and catchment area per
outlet.

Memory in the accumulating process: 8 bytes per cell per outlet plus 8 for
the divide count; each worker adds 4 per cell per outlet.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from .. import defaults
from ..dem import Dem
from ..engine.hydro import count_divides, count_membership, flow, snap_to_max
from ..errors import CheckpointError, OutletError
from ..layers import LAYERS, layer_name
from ..noise import ErrorModel
from .credit import concat_logs, proportion

__all__ = ["CatchmentJob", "CatchmentAccumulator", "snap_candidates", "LOG_FIELDS"]

LOG_FIELDS = ("real", "outlet", "cell", "area")


def _outlet_cell(dem: Dem, oid: str, x: float, y: float, source: str) -> tuple[int, int]:
    rows, cols = dem.shape
    a, b, c, d, e, f = dem.transform
    det = a * e - b * d
    col = (e * (x - c) - b * (y - f)) / det
    row = (-d * (x - c) + a * (y - f)) / det
    if not (0 <= row < rows and 0 <= col < cols):
        raise OutletError(f"{source}: outlet {oid} at ({x:g}, {y:g}) lies outside the raster; "
                          "check its coordinates and CRS")
    r0, c0 = int(row), int(col)
    if dem.nodata[r0, c0]:
        raise OutletError(f"{source}: outlet {oid} at ({x:g}, {y:g}) lies on a nodata cell; "
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
    return np.concatenate(cand), np.array(ptr, np.int64)


@dataclass(frozen=True, eq=False)
class CatchmentJob:
    """What a catchment realisation computes (see the module docstring).

    Attributes
    ----------
    ids : tuple of str
        Outlet ids (used in layer names).
    xy : (k, 2) array
        Outlet coordinates in the DEM's CRS.
    snap_m : float, optional
        Snap radius in metres. Default: 2 x the mean cell width.
    source : str
        Where the outlets came from (for messages).

    The grid-dependent arrays (snap candidates, cell sizes and areas) are
    filled in by :meth:`resolved`.
    """

    ids: tuple
    xy: np.ndarray
    snap_m: float | None = None
    source: str = "outlets"
    cand: np.ndarray | None = None
    cand_ptr: np.ndarray | None = None
    cell_w: np.ndarray | None = None
    cell_h: np.ndarray | None = None
    area_row: np.ndarray | None = None
    from_defaults: tuple = ()

    def __post_init__(self):
        ids = tuple(str(i) for i in self.ids)
        xy = np.asarray(self.xy, np.float64).reshape(-1, 2)
        if xy.shape[0] == 0:
            raise OutletError(f"{self.source}: no outlet points")
        if len(set(ids)) != len(ids):
            raise OutletError(f"{self.source}: outlet ids are not unique")
        if self.snap_m is not None and not (math.isfinite(self.snap_m) and self.snap_m >= 0):
            raise OutletError(f"{{snap_m}} must be >= 0 metres and finite, got {self.snap_m}",
                              "snap_m")
        object.__setattr__(self, "ids", ids)
        object.__setattr__(self, "xy", xy)

    # -- job interface ----------------------------------------------------------
    name = "catchments"

    @property
    def layers(self) -> tuple[str, ...]:
        member = LAYERS[layer_name("catchments", "membership")]
        return tuple(member.concrete(i) for i in self.ids) + (layer_name("catchments", "divide"),)

    def resolved(self, dem: Dem, model: ErrorModel) -> CatchmentJob:
        """This job with its snap radius resolved and the grid's arrays prepared."""
        snap = defaults.snap_radius(self.snap_m, dem)
        cand, ptr = snap_candidates(dem, self.ids, self.xy, snap, source=self.source)
        w, h = dem.cell_metres()
        return dataclasses.replace(self, snap_m=snap, cand=cand, cand_ptr=ptr, cell_w=w,
                                   cell_h=h, area_row=dem.cell_area_m2(),
                                   from_defaults=tuple(self.defaults_used()))

    def defaults_used(self) -> dict:
        """The settings left to library defaults, with the rule each follows."""
        used = self.snap_m is None or "snap_m" in self.from_defaults
        return {"snap_m": defaults.RULES["snap_m"]} if used else {}

    def describe(self) -> dict:
        return {"job": "catchments", "outlets": dict(zip(self.ids, self.xy.tolist())),
                "snap_m": self.snap_m}

    def new_counts(self, n_cells: int) -> dict:
        return {"member": np.zeros((len(self.ids), n_cells), np.int32),
                "divide": np.zeros(n_cells, np.int32)}

    def realise(self, z, sampler, seed, i, counts) -> dict:
        zi = sampler.draw(seed, i)
        zi += z
        nr, nc = z.shape
        fl = flow(zi, cell_w=self.cell_w, cell_h=self.cell_h)
        snapped = snap_to_max(fl.acc, self.cand, self.cand_ptr)
        area = count_membership(fl.order, fl.rec, snapped, nr, nc, self.area_row, counts["member"])
        count_divides(fl.exit, fl.valid, nr, nc, counts["divide"])
        k = len(self.ids)
        return {"real": np.full(k, i, np.int32), "outlet": np.arange(k, dtype=np.int32),
                "cell": snapped.astype(np.int64), "area": area}

    def accumulator(self, n_cells: int) -> CatchmentAccumulator:
        return CatchmentAccumulator(n_cells, self)

    def memory_per_cell(self, value_bytes: int) -> tuple[int, int]:
        """Accumulators: an int64 membership count per outlet and the divide
        count. Worker: the DEM copy and noise, filled surface, receivers, order,
        accumulation and exits (8 each), flags and queue, int32 counts per
        outlet and for divides."""
        k = len(self.ids)
        return 8 * k + 8, value_bytes + 4 + 49 + 4 * k + 4


class CatchmentAccumulator:
    """Integer membership and divide counts plus the per-realisation log."""

    def __init__(self, n_cells: int, job: CatchmentJob):
        self.job = job
        self.n = 0
        self.member = np.zeros((len(job.ids), n_cells), np.int64)
        self.divide = np.zeros(n_cells, np.int64)
        self.logs: list[dict] = []

    def add(self, log: dict, counts: dict, n: int) -> None:
        self.member += counts["member"]
        self.divide += counts["divide"]
        self.logs.append(log)
        self.n += n

    def log(self) -> dict:
        return concat_logs(self.logs, LOG_FIELDS)

    def layers(self, shape) -> dict:
        names = self.job.layers
        out = {}
        for k, name in enumerate(names[:-1]):
            p, se = proportion(self.member[k], self.n)
            out[name] = (p.reshape(shape), se.reshape(shape))
        p, se = proportion(self.divide, self.n)
        out[names[-1]] = (p.reshape(shape), se.reshape(shape))
        return out

    def stop_statistic(self) -> float:
        """Largest standard error of any membership or divide probability."""
        if self.n == 0:
            return math.nan
        # the largest p(1 - p) is at the count closest to n / 2
        closest = min(int(np.abs(2 * self.member - self.n).min()),
                      int(np.abs(2 * self.divide - self.n).min()))
        p = 0.5 - closest / (2 * self.n)
        return math.sqrt(p * (1 - p) / self.n)

    def state(self) -> dict:
        st = {"n": np.array(self.n), "member": self.member, "divide": self.divide}
        st.update({f"log_{k}": v for k, v in self.log().items()})
        return st

    def restore(self, st: dict) -> None:
        if st.get("member") is None or st["member"].shape != self.member.shape:
            raise CheckpointError("checkpoint arrays do not match this DEM and these outlets")
        self.member[:] = st["member"]
        self.divide[:] = st["divide"]
        self.n = int(st["n"])
        self.logs = [{k: st[f"log_{k}"] for k in LOG_FIELDS}]
