"""Catchments under DEM error: outlet membership and drainage-divide probability.

A :class:`CatchmentJob` is run by :func:`terrain.ensemble.run_ensemble` like
the peak and pit attribution: realisation ``i`` perturbs the DEM, fills its
depressions, routes D8 flow, snaps each outlet to the cell of highest flow
accumulation within the snap radius (common practice, no source), and adds 1
to each outlet's membership count for every cell draining through it, and to
the divide count for every cell with a neighbour draining to another exit.
Counts are integers, exact in any order; the log holds each realisation's
snapped cell and catchment area per outlet.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .credit import concat_logs, proportion
from .dem import Dem
from .engine.hydro import _divides, _membership, _snap, flow
from .errors import OutletError

__all__ = ["CatchmentJob", "prepare_outlets", "CatchmentAccumulator", "catchment_layer_names"]

LOG_FIELDS = ("real", "outlet", "cell", "area")


def catchment_layer_names(ids) -> list[str]:
    return [f"catchment_probability_{i}" for i in ids] + ["divide_probability"]


def prepare_outlets(dem: Dem, ids, xy: np.ndarray, snap_m: float, *, source: str = "outlets"):
    """Check outlet points against the DEM and list each one's snap candidates.

    Returns ``(cells, cand, cand_ptr)``: each outlet's own cell, and the
    valid cells whose centres lie within ``snap_m`` metres of the point
    (always including the outlet's cell), concatenated with offsets.

    Raises
    ------
    OutletError
        A point outside the raster or on a nodata cell.
    """
    rows, cols = dem.shape
    a, b, c, d, e, f = dem.transform
    det = a * e - b * d
    w_m, h_m = dem.cell_metres()
    cells = []
    cand, ptr = [], [0]
    for oid, (x, y) in zip(ids, xy):
        col = (e * (x - c) - b * (y - f)) / det
        row = (-d * (x - c) + a * (y - f)) / det
        if not (0 <= row < rows and 0 <= col < cols):
            raise OutletError(f"{source}: outlet {oid} at ({x:g}, {y:g}) lies outside the raster; "
                              "check its coordinates and CRS")
        r0, c0 = int(row), int(col)
        if dem.nodata[r0, c0]:
            raise OutletError(f"{source}: outlet {oid} at ({x:g}, {y:g}) lies on a nodata cell; "
                              "move it onto the channel")
        cells.append(r0 * cols + c0)
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
    return np.array(cells, np.int64), np.concatenate(cand), np.array(ptr, np.int64)


@dataclass(frozen=True, eq=False)
class CatchmentJob:
    """What a catchment realisation computes (see the module docstring).

    Attributes
    ----------
    ids : tuple of str
        Outlet ids (used in layer names).
    xy : (k, 2) array
        Outlet coordinates in the DEM's CRS.
    snap_m : float
        Snap radius in metres.
    cand, cand_ptr : arrays
        Snap candidates (from :func:`prepare_outlets`).
    cell_w, cell_h, area_row : per-row cell width, height and area (metres).
    """

    ids: tuple
    xy: np.ndarray
    snap_m: float
    cand: np.ndarray
    cand_ptr: np.ndarray
    cell_w: np.ndarray
    cell_h: np.ndarray
    area_row: np.ndarray
    shape: tuple = field(default=(0, 0))

    @classmethod
    def for_dem(cls, dem: Dem, ids, xy, snap_m: float, *, source: str = "outlets") -> CatchmentJob:
        ids = tuple(str(i) for i in ids)
        xy = np.asarray(xy, np.float64).reshape(-1, 2)
        if xy.shape[0] == 0:
            raise OutletError(f"{source}: no outlet points")
        if len(set(ids)) != len(ids):
            raise OutletError(f"{source}: outlet ids are not unique")
        _, cand, ptr = prepare_outlets(dem, ids, xy, snap_m, source=source)
        w, h = dem.cell_metres()
        return cls(ids, xy, float(snap_m), cand, ptr, w, h, dem.cell_area_m2(), dem.shape)

    # -- job interface ----------------------------------------------------------
    main_layer = "divide_probability"

    def describe(self) -> dict:
        return {"job": "catchments", "outlets": dict(zip(self.ids, self.xy.tolist())),
                "snap_m": self.snap_m}

    def new_counts(self, n_cells: int) -> dict:
        return {"member": np.zeros((len(self.ids), n_cells), np.int32),
                "divide": np.zeros(n_cells, np.int32)}

    def realise(self, z, sampler, seed, i, counts, scale=None) -> dict:
        zi = sampler.draw(seed, i, scale)
        zi += z
        nr, nc = z.shape
        fl = flow(zi, cell_w=self.cell_w, cell_h=self.cell_h)
        snapped = _snap(fl.acc, self.cand, self.cand_ptr)
        area = _membership(fl.order, fl.rec, snapped, nr, nc, self.area_row, counts["member"])
        _divides(fl.exit, fl.valid, nr, nc, counts["divide"])
        k = len(self.ids)
        return {"real": np.full(k, i, np.int32), "outlet": np.arange(k, dtype=np.int32),
                "cell": snapped.astype(np.int64), "area": area}

    def accumulator(self, n_cells: int) -> CatchmentAccumulator:
        return CatchmentAccumulator(n_cells, self)


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
        out = {}
        for k, oid in enumerate(self.job.ids):
            p, se = proportion(self.member[k], self.n)
            out[f"catchment_probability_{oid}"] = (p.reshape(shape), se.reshape(shape))
        p, se = proportion(self.divide, self.n)
        out["divide_probability"] = (p.reshape(shape), se.reshape(shape))
        return out

    def state(self) -> dict:
        st = {"n": np.array(self.n), "member": self.member, "divide": self.divide}
        st.update({f"log_{k}": v for k, v in self.log().items()})
        return st

    def restore(self, st: dict) -> None:
        from .errors import CheckpointError

        if st.get("member") is None or st["member"].shape != self.member.shape:
            raise CheckpointError("checkpoint arrays do not match this DEM and these outlets")
        self.member[:] = st["member"]
        self.divide[:] = st["divide"]
        self.n = int(st["n"])
        self.logs = [{k: st[f"log_{k}"] for k in LOG_FIELDS}]


def area_summary(log: dict, ids) -> dict:
    """Mean, 5th and 95th percentile of each outlet's catchment area (m^2)."""
    out = {}
    for k, oid in enumerate(ids):
        a = log["area"][log["outlet"] == k]
        out[oid] = (float(a.mean()) if a.size else np.nan,
                    float(np.percentile(a, 5)) if a.size else np.nan,
                    float(np.percentile(a, 95)) if a.size else np.nan)
    return out

