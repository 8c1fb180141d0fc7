"""What one realisation contributes, and the streaming means over realisations.

For realisation ``i`` the DEM is perturbed, its persistence pairs computed,
and every pair whose persistence is at or above the (possibly jittered)
threshold credits its weight to its birth cell (summit / pit) and its death
cell (key col / spill point). Weight is the persistence (prominence or
depth) or 1 (count mode); the essential peak is credited its elevation minus
the base. A realisation's contribution is *sparse*, so the per-realisation
output is a compact **pair log** (:data:`LOG_FIELDS`, 21 bytes per logged pair
on grids below 2**31 cells) plus, for pits, ponding counts added in place.

Credit layers are streaming means with standard errors, accumulated from the
log strictly in realisation order, so the float sums are the same whatever
the number of workers or how realisations were split among them; count
layers are integers and exact in any order.

Standard error of a layer: ``sqrt((mean(x^2) - mean(x)^2) / N)``, which for a
proportion is the Monte Carlo standard error sqrt(p(1-p)/N).

Memory in the accumulating process: 2 x 2 float64 moments + 1 int32 count
(+ 1 int32 ponding count for pits) + scratch (int32 + float64) = 48-52 bytes
per cell.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .engine.persistence import count_ponding, pairs, pits_and_levels
from .errors import OptionError
from .noise import ErrorSampler, kernel_halfwidth, realisation_rng, sample_kernel

__all__ = ["LAYERS", "LOG_FIELDS", "CreditSettings", "realise", "Accumulator", "layer_units"]

LAYERS = {
    "peaks": ("summit_credit", "col_credit", "summit_probability"),
    "pits": ("pit_credit", "spill_credit", "pit_probability", "ponding_probability"),
}
LOG_FIELDS = ("real", "birth", "death", "birth_value", "death_value", "edge_limited")
WEIGHTS = ("persistence", "count")


@dataclass(frozen=True)
class CreditSettings:
    """What a realisation counts and how it weighs it.

    Attributes
    ----------
    kind : {"peaks", "pits"}
    threshold : float
        Minimum prominence (peaks) or depth (pits) of a counted pair, and the
        minimum ponding depth.
    threshold_jitter : float
        Standard deviation of the threshold: each realisation draws its own
        from the error model's kernel centred on ``threshold`` (clipped at
        0); 0 = a fixed threshold.
    weight : {"persistence", "count"}
    connectivity : {8, 4}
    base : float
        Level the essential peak's prominence is measured to.
    kernel : str
        Kernel used for the threshold jitter.
    """

    kind: str
    threshold: float
    threshold_jitter: float = 0.0
    weight: str = "persistence"
    connectivity: int = 8
    base: float = 0.0
    kernel: str = "gaussian"

    # -- the job interface used by terrain.ensemble ------------------------------
    @property
    def main_layer(self) -> str:
        return LAYERS[self.kind][0]

    def describe(self) -> dict:
        return {"job": "pairs", **self.__dict__}

    def new_counts(self, n_cells: int) -> dict:
        """Integer per-cell counts a worker adds to (exact in any order)."""
        return {"ponding": np.zeros(n_cells, np.int32)} if self.kind == "pits" else {}

    def realise(self, z, sampler, seed, i, counts, scale=None) -> dict:
        return realise(z, sampler, self, seed, i, counts.get("ponding"), scale)

    def accumulator(self, n_cells: int) -> Accumulator:
        return Accumulator(n_cells, self)

    def __post_init__(self):
        if self.kind not in LAYERS:
            raise OptionError(f"kind must be peaks or pits, got {self.kind!r}")
        if self.weight not in WEIGHTS:
            raise OptionError(f"--weight must be one of {', '.join(WEIGHTS)}, got {self.weight!r}")
        for name in ("threshold", "threshold_jitter"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0):
                raise OptionError(f"{name.replace('_', '-')} must be >= 0 and finite, got {v}")
        if self.connectivity not in (4, 8):
            raise OptionError(f"--connectivity must be 8 or 4, got {self.connectivity}")
        if not math.isfinite(self.base):
            raise OptionError(f"--base must be finite, got {self.base}")


def layer_units(name: str, vertical_units: str | None, weight: str) -> str:
    """Units of a layer: probabilities are unitless; credit is in DEM units."""
    if name.endswith("probability"):
        return "probability"
    if weight == "count":
        return "count"
    return vertical_units or "DEM units"


def realisation_threshold(settings: CreditSettings, seed: int, i: int) -> float:
    """The threshold of realisation ``i`` (drawn from its own stream when jittered)."""
    if settings.threshold_jitter <= 0:
        return settings.threshold
    u = float(sample_kernel(settings.kernel, realisation_rng(seed, i, 2), 1, np.float64)[0])
    # u has unit bandwidth; scale so the threshold's standard deviation is the jitter
    return max(0.0, settings.threshold + u * kernel_halfwidth(settings.kernel, settings.threshold_jitter))


def realise(z: np.ndarray, sampler: ErrorSampler, settings: CreditSettings, seed: int, i: int,
            ponding: np.ndarray | None = None, scale: float | None = None) -> dict:
    """Compute realisation ``i``: perturb, pair, select; return its pair log.

    Parameters
    ----------
    z : (rows, cols) float32 array with NaN on nodata
    sampler : ErrorSampler
    settings : CreditSettings
    seed, i : the run's seed and the realisation index
    ponding : flat int32 array, optional
        For pits, incremented in place where the cell holds water at least
        the threshold deep after depression filling.
    scale : float, optional
        Error RMSE to use instead of the model's (common random numbers).

    Returns
    -------
    dict of arrays named :data:`LOG_FIELDS`.
    """
    zi = sampler.draw(seed, i, scale)
    zi += z
    thr = realisation_threshold(settings, seed, i)
    if settings.kind == "peaks":
        p = pairs(zi, kind="peaks", connectivity=settings.connectivity)
    else:
        p, zf, valid, lab, level = pits_and_levels(zi, connectivity=settings.connectivity)
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


def log_weights(log: dict, weight: str, base: float) -> np.ndarray:
    """Weight of each logged pair: persistence (essential: elevation - base) or 1."""
    if weight == "count":
        return np.ones(log["birth"].size)
    bv = log["birth_value"].astype(np.float64)
    dv = log["death_value"].astype(np.float64)
    ess = log["death"] < 0
    return np.where(ess, np.maximum(bv - base, 0.0), np.abs(bv - np.where(ess, 0.0, dv)))


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


class Accumulator:
    """Streaming sums for one run's layers, fed in realisation order.

    ``add(log, counts, n)`` folds in the next ``n`` realisations (their log
    entries sorted by realisation, and their summed integer counts).
    """

    def __init__(self, n_cells: int, settings: CreditSettings):
        self.settings = settings
        self.n = 0
        self.bsum = np.zeros(n_cells)
        self.bsq = np.zeros(n_cells)
        self.dsum = np.zeros(n_cells)
        self.dsq = np.zeros(n_cells)
        self.bcount = np.zeros(n_cells, np.int32)
        self.ponding = np.zeros(n_cells, np.int32) if settings.kind == "pits" else None
        self._scratch = np.zeros(n_cells)
        self._mark = np.zeros(n_cells, np.int32)
        self.logs: list[dict] = []

    def add(self, log: dict, counts: dict, n: int) -> None:
        s = self.settings
        w = log_weights(log, s.weight, s.base)
        _accumulate(log["real"], log["birth"].astype(np.int64), log["death"].astype(np.int64), w,
                    self.bsum, self.bsq, self.dsum, self.dsq, self.bcount, self._scratch, self._mark)
        if counts.get("ponding") is not None and self.ponding is not None:
            self.ponding += counts["ponding"]
        self.logs.append(log)
        self.n += n

    def log(self) -> dict:
        """All logged pairs so far, concatenated."""
        return concat_logs(self.logs, LOG_FIELDS)

    def layers(self, shape) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Each layer's mean and standard error, reshaped to the grid."""
        n = max(self.n, 1)
        names = LAYERS[self.settings.kind]

        def moments(s, q):
            m = s / n
            return m, np.sqrt(np.maximum(q / n - m * m, 0.0) / n)

        out = {names[0]: moments(self.bsum, self.bsq), names[1]: moments(self.dsum, self.dsq),
               names[2]: proportion(self.bcount, n)}
        if self.ponding is not None:
            out[names[3]] = proportion(self.ponding, n)
        return {k: (m.reshape(shape), e.reshape(shape)) for k, (m, e) in out.items()}

    # -- checkpoint state ------------------------------------------------------
    def state(self) -> dict:
        st = {"n": np.array(self.n), "bsum": self.bsum, "bsq": self.bsq, "dsum": self.dsum,
              "dsq": self.dsq, "bcount": self.bcount}
        if self.ponding is not None:
            st["ponding"] = self.ponding
        st.update({f"log_{k}": v for k, v in self.log().items()})
        return st

    def restore(self, st: dict) -> None:
        for k in ("bsum", "bsq", "dsum", "dsq", "bcount"):
            if st[k].shape != getattr(self, k).shape:
                from .errors import CheckpointError

                raise CheckpointError("checkpoint arrays do not match the DEM's size")
            getattr(self, k)[:] = st[k]
        if self.ponding is not None:
            self.ponding[:] = st["ponding"]
        self.n = int(st["n"])
        self.logs = [{k: st[f"log_{k}"] for k in LOG_FIELDS}]
