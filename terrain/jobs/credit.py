"""Peaks and depressions: what one realisation contributes, and the streaming means.

For realisation ``i`` the DEM is perturbed, its persistence pairs computed,
and every pair whose persistence is at or above the (possibly jittered)
threshold credits its weight to its birth cell (summit / pit) and its death
cell (key col / spill point). Weight is the persistence (prominence or
depth) or 1 (count mode); the essential peak is credited its elevation minus
the base. A realisation's contribution is *sparse*, so the per-realisation
output is a compact **pair log** (:data:`LOG_FIELDS`, 21 bytes per logged pair
on grids below 2**31 cells) plus, for depressions, ponding counts added in
place.

Credit layers are streaming means with standard errors, accumulated from the
log strictly in realisation order, so the float sums are the same whatever
the number of workers or how realisations were split among them; count
layers are integers and exact in any order.

Standard error of a layer: ``sqrt((mean(x^2) - mean(x)^2) / N)``, which for a
proportion is the Monte Carlo standard error sqrt(p(1-p)/N).

Memory in the accumulating process: 2 x 2 float64 moments + 1 int32 count
(+ 1 int32 ponding count for depressions) + scratch (int32 + float64) =
48-52 bytes per cell.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .. import defaults
from ..dem import Dem
from ..engine.persistence import count_ponding, pairs, pits_and_levels
from ..errors import CheckpointError, OptionError
from ..layers import layer_name, layers_of
from ..noise import ErrorModel, ErrorSampler, Kernel, realisation_rng

__all__ = ["KINDS", "LOG_FIELDS", "WEIGHTS", "CreditJob", "CreditAccumulator", "realise",
           "log_weights", "concat_logs", "proportion"]

KINDS = ("peaks", "depressions")
FILTRATION = {"peaks": "peaks", "depressions": "pits"}  # the engine's name for each kind
LOG_FIELDS = ("real", "birth", "death", "birth_value", "death_value", "edge_limited")
WEIGHTS = ("persistence", "count")


@dataclass(frozen=True)
class CreditJob:
    """What a peaks or depressions realisation counts and how it weighs it.

    ``None`` settings take the library defaults (:mod:`terrain.defaults`)
    when the run resolves the job against its DEM and error model.

    Attributes
    ----------
    kind : {"peaks", "depressions"}
    threshold : float, optional
        Minimum prominence (peaks) or depth (depressions) of a counted pair,
        and the minimum ponding depth. Default: 3 x RMSE.
    threshold_jitter : float
        Standard deviation of the threshold: each realisation draws its own
        from the error model's kernel centred on ``threshold`` (clipped at
        0); 0 = a fixed threshold.
    weight : {"persistence", "count"}
    connectivity : {8, 4}
    base : float, optional
        Level the essential peak's prominence is measured to. Default: the
        lowest valid cell (peaks only).
    """

    kind: str
    threshold: float | None = None
    threshold_jitter: float = 0.0
    weight: str = "persistence"
    connectivity: int = 8
    base: float | None = None
    from_defaults: tuple = ()

    def __post_init__(self):
        if self.kind not in KINDS:
            raise OptionError(f"{{kind}} must be one of {', '.join(KINDS)}, got {self.kind!r}",
                              "kind")
        if self.weight not in WEIGHTS:
            raise OptionError(f"{{weight}} must be one of {', '.join(WEIGHTS)}, got {self.weight!r}",
                              "weight")
        if self.connectivity not in (4, 8):
            raise OptionError(f"{{connectivity}} must be 8 or 4, got {self.connectivity}",
                              "connectivity")
        for name in ("threshold", "threshold_jitter"):
            v = getattr(self, name)
            if v is not None and not (math.isfinite(v) and v >= 0):
                raise OptionError(f"{{{name}}} must be >= 0 and finite, got {v}", name)
        if self.base is not None and not math.isfinite(self.base):
            raise OptionError(f"{{base}} must be finite, got {self.base}", "base")

    # -- the job interface (terrain.runner.protocols.Job) ---------------------------
    @property
    def name(self) -> str:
        return self.kind

    @property
    def layers(self) -> tuple[str, ...]:
        return tuple(s.name for s in layers_of(self.kind))

    def _defaulted(self) -> tuple[str, ...]:
        names = ("threshold", "base") if self.kind == "peaks" else ("threshold",)
        return tuple(n for n in names if getattr(self, n) is None or n in self.from_defaults)

    def resolved(self, dem: Dem, model: ErrorModel) -> CreditJob:
        """This job with every ``None`` setting replaced by its library default
        (resolving twice changes nothing)."""
        return dataclasses.replace(
            self, threshold=defaults.cutoff(self.threshold, model.rmse),
            base=defaults.base_level(self.base, dem) if self.kind == "peaks" else None,
            from_defaults=self._defaulted())

    def defaults_used(self) -> dict:
        """The settings left to library defaults, with the rule each follows."""
        return {n: defaults.RULES[n] for n in self._defaulted()}

    def describe(self) -> dict:
        d = dataclasses.asdict(self)
        d.pop("from_defaults")
        return {"job": self.kind, **d}

    def new_counts(self, n_cells: int) -> dict:
        """Integer per-cell counts a worker adds to (exact in any order)."""
        return {"ponding": np.zeros(n_cells, np.int32)} if self.kind == "depressions" else {}

    def realise(self, z, sampler, seed, i, counts) -> dict:
        return realise(z, sampler, self, seed, i, counts.get("ponding"))

    def accumulator(self, n_cells: int) -> CreditAccumulator:
        return CreditAccumulator(n_cells, self)

    def memory_per_cell(self, value_bytes: int) -> tuple[int, int]:
        """Accumulators: 4 float64 moments, 1 int32 count, scratch (float64 +
        int32), + 1 int32 ponding count for depressions. Worker: the DEM copy,
        noise (4), the perturbed copy and the key copy the pairing sorts on,
        basin labels (4), validity (1), ponding counts (4)."""
        parent = 48 + (4 if self.kind == "depressions" else 0)
        return parent, 3 * value_bytes + 13


def realisation_threshold(job: CreditJob, kernel: Kernel, seed: int, i: int) -> float:
    """The threshold of realisation ``i`` (drawn from its own stream when jittered)."""
    if job.threshold_jitter <= 0:
        return job.threshold
    u = float(kernel.sample(realisation_rng(seed, i, 2), 1, np.float64)[0])
    # u has unit bandwidth; scale so the threshold's standard deviation is the jitter
    return max(0.0, job.threshold + u * kernel.halfwidth(job.threshold_jitter))


def realise(z: np.ndarray, sampler: ErrorSampler, job: CreditJob, seed: int, i: int,
            ponding: np.ndarray | None = None) -> dict:
    """Compute realisation ``i``: perturb, pair, select; return its pair log.

    Parameters
    ----------
    z : (rows, cols) float32 array with NaN on nodata
    sampler : ErrorSampler
    job : CreditJob (resolved)
    seed, i : the run's seed and the realisation index
    ponding : flat int32 array, optional
        For depressions, incremented in place where the cell holds water at
        least the threshold deep after depression filling.

    Returns
    -------
    dict of arrays named :data:`LOG_FIELDS`.
    """
    zi = sampler.draw(seed, i)
    zi += z
    thr = realisation_threshold(job, sampler.kernel, seed, i)
    if job.kind == "peaks":
        p = pairs(zi, kind="peaks", connectivity=job.connectivity)
    else:
        p, zf, valid, lab, level = pits_and_levels(zi, connectivity=job.connectivity)
        if ponding is not None:
            count_ponding(zf, valid, lab, level, thr, ponding)
    keep = p.persistence >= thr
    cell_t = np.int32 if z.size < 2**31 - 1 else np.int64
    return {
        "real": np.full(int(keep.sum()), i, np.int32),
        "birth": p.birth[keep].astype(cell_t),
        "death": p.death[keep].astype(cell_t),
        "birth_value": p.birth_value[keep].astype(np.float32),
        "death_value": p.death_value[keep].astype(np.float32),
        "edge_limited": p.edge_limited[keep],
    }


def concat_logs(logs: list[dict], fields) -> dict:
    """Concatenate per-chunk logs field by field (empty arrays when none)."""
    if not logs:
        return {k: np.empty(0) for k in fields}
    return {k: np.concatenate([g[k] for g in logs]) for k in fields}


def proportion(count: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Share and its Monte Carlo standard error sqrt(p(1-p)/N)."""
    p = count / max(n, 1)
    return p, np.sqrt(p * (1 - p) / max(n, 1))


def log_weights(log: dict, weight: str, base: float | None) -> np.ndarray:
    """Weight of each logged pair: persistence (essential: elevation - base) or 1."""
    if weight == "count":
        return np.ones(log["birth"].size)
    bv = log["birth_value"].astype(np.float64)
    dv = log["death_value"].astype(np.float64)
    ess = log["death"] < 0
    b = 0.0 if base is None else base
    return np.where(ess, np.maximum(bv - b, 0.0), np.abs(bv - np.where(ess, 0.0, dv)))


@njit(cache=True)
def _accumulate(real, birth, death, w, bsum, bsq, dsum, dsq, bcount, scratch, mark):
    """Add logged pairs, realisation by realisation in the given order.

    Birth cells are unique within a realisation; death cells may repeat (a
    col where several summits die), so their weights are summed per
    realisation before the squares are taken.
    """
    n = real.size
    t = 0
    while t < n:
        r = real[t]
        u = t
        while u < n and real[u] == r:
            u += 1
        for k in range(t, u):
            b = birth[k]
            bsum[b] += w[k]
            bsq[b] += w[k] * w[k]
            bcount[b] += 1
        tag = r + 1
        for k in range(t, u):
            d = death[k]
            if d < 0:
                continue
            if mark[d] != tag:
                mark[d] = tag
                scratch[d] = 0.0
            scratch[d] += w[k]
        for k in range(t, u):
            d = death[k]
            if d >= 0 and mark[d] == tag:
                mark[d] = -tag  # visited once
                dsum[d] += scratch[d]
                dsq[d] += scratch[d] * scratch[d]
        t = u


class CreditAccumulator:
    """Streaming sums for one run's layers, fed in realisation order.

    ``add(log, counts, n)`` folds in the next ``n`` realisations (their log
    entries sorted by realisation, and their summed integer counts).
    """

    _ARRAYS = ("bsum", "bsq", "dsum", "dsq", "bcount")

    def __init__(self, n_cells: int, job: CreditJob):
        self.job = job
        self.n = 0
        self.bsum = np.zeros(n_cells)
        self.bsq = np.zeros(n_cells)
        self.dsum = np.zeros(n_cells)
        self.dsq = np.zeros(n_cells)
        self.bcount = np.zeros(n_cells, np.int32)
        self.ponding = np.zeros(n_cells, np.int32) if job.kind == "depressions" else None
        self._scratch = np.zeros(n_cells)
        self._mark = np.zeros(n_cells, np.int32)
        self.logs: list[dict] = []

    def add(self, log: dict, counts: dict, n: int) -> None:
        w = log_weights(log, self.job.weight, self.job.base)
        _accumulate(log["real"], log["birth"].astype(np.int64), log["death"].astype(np.int64), w,
                    self.bsum, self.bsq, self.dsum, self.dsq, self.bcount, self._scratch, self._mark)
        if counts.get("ponding") is not None and self.ponding is not None:
            self.ponding += counts["ponding"]
        self.logs.append(log)
        self.n += n

    def log(self) -> dict:
        """All logged pairs so far, concatenated."""
        return concat_logs(self.logs, LOG_FIELDS)

    def _moments(self, s, q):
        n = max(self.n, 1)
        m = s / n
        return m, np.sqrt(np.maximum(q / n - m * m, 0.0) / n)

    def layers(self, shape) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Each layer's mean and standard error, reshaped to the grid."""
        kind = self.job.kind
        out = {layer_name(kind, "birth_credit"): self._moments(self.bsum, self.bsq),
               layer_name(kind, "death_credit"): self._moments(self.dsum, self.dsq),
               layer_name(kind, "birth_probability"): proportion(self.bcount, self.n)}
        if self.ponding is not None:
            out[layer_name(kind, "ponding_probability")] = proportion(self.ponding, self.n)
        return {k: (m.reshape(shape), e.reshape(shape)) for k, (m, e) in out.items()}

    def stop_statistic(self) -> float:
        """Largest standard error of the summit/pit credit among cells holding
        at least 1% of the top credit (DEM units; NaN before any credit)."""
        m, se = self._moments(self.bsum, self.bsq)
        top = np.nanmax(m) if m.size else 0.0
        if not top > 0:
            return math.nan
        return float(np.nanmax(se[m >= 0.01 * top]))

    # -- checkpoint state ------------------------------------------------------
    def state(self) -> dict:
        st = {"n": np.array(self.n), **{k: getattr(self, k) for k in self._ARRAYS}}
        if self.ponding is not None:
            st["ponding"] = self.ponding
        st.update({f"log_{k}": v for k, v in self.log().items()})
        return st

    def restore(self, st: dict) -> None:
        for k in self._ARRAYS + (("ponding",) if self.ponding is not None else ()):
            if k not in st or st[k].shape != getattr(self, k).shape:
                raise CheckpointError("checkpoint arrays do not match the DEM's size")
            getattr(self, k)[:] = st[k]
        self.n = int(st["n"])
        self.logs = [{k: st[f"log_{k}"] for k in LOG_FIELDS}]
