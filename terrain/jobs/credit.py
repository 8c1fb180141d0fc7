"""Peaks and depressions: what one realisation contributes, and the streaming means.

For realisation ``i`` the DEM is perturbed, its persistence pairs computed,
and every pair whose persistence is at or above the (possibly jittered)
threshold credits its weight to its birth cell (summit / pit) and its death
cell (key col / spill point). Weight is the persistence (prominence or
depth) or 1 (count mode); the essential peak is credited its elevation minus
the base. A realisation's contribution is *sparse*, so the per-realisation
output is a compact **pair log** (:data:`LOG_FIELDS`, 34 bytes per logged pair
on grids below 2**31 cells) plus, for depressions, ponding counts added in
place and a **pond log** (:data:`POND_FIELDS`: per region holding water, its
ponded area and volume).

Feature regions are fixed before any realisation: the persistence-simplified
watershed of the *unperturbed* DEM (:func:`terrain.engine.persistence.regions`)
at the merge level. Each logged pair carries the region of its birth cell,
so a feature's figure in a realisation is the largest counted figure born in
it. The highest summit of a realisation is measured to the base, or to the
realisation's lowest cell when that is lower, so it always has the largest
figure.

Credit layers are streaming means with standard errors, accumulated from the
log strictly in realisation order, so the float sums are the same whatever
the number of workers or how realisations were split among them; count
layers are integers and exact in any order.

Standard error of a layer: ``sqrt((mean(x^2) - mean(x)^2) / N)``, which for a
proportion is the Monte Carlo standard error sqrt(p(1-p)/N).

Memory in the accumulating process while realisations come in: the logs
(34 bytes per counted pair) and, for depressions, 4 bytes per cell of
ponding counts; the credit layers are summed from the log at the end
(:func:`credit_layers`, 48 bytes per cell of the window summed: 2 x 2
float64 moments, 1 int32 count, scratch int32 + float64) into the finished
layers, 16 bytes per cell each (96 for peaks, 116 for depressions in all;
:meth:`CreditJob.memory_per_cell`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .. import defaults
from ..dem import Dem
from ..engine.persistence import (
    Regions,
    count_ponding,
    pairs,
    pits_and_levels,
    regions,
)
from ..errors import CheckpointError, OptionError
from ..layers import layer_name, layers_of
from ..layout import RunLayout, layout_of
from ..noise import ErrorModel, ErrorSampler
from ..pairlog import (
    LOG_FIELDS,
    POND_FIELDS,
    WEIGHTS,
    concat_logs,
    log_weights,
    pond_log,
    proportion,
    region_figures,
)
from .credit_blocked import realise_blocked
from .relations import Given, given_relations, labels_at, pair_log, summit_isolation
from .thresholds import realisation_threshold

__all__ = ["KINDS", "LOG_FIELDS", "POND_FIELDS", "WEIGHTS", "CreditJob", "CreditAccumulator",
           "realise", "pair_log", "pond_log", "log_weights", "concat_logs", "proportion", "region_figures",
           "credit_layers", "CreditLayers", "dem_regions", "paired_difference", "load_kernels"]

KINDS = ("peaks", "depressions")
FILTRATION = {"peaks": "peaks", "depressions": "pits"}  # the engine's name for each kind


@dataclass(frozen=True, eq=False)
class CreditJob:
    """What a peaks or depressions realisation counts and how it weighs it.

    ``None`` settings take the library defaults (:mod:`terrain.defaults`)
    when the run resolves the job against its DEM and error model.

    Attributes
    ----------
    kind : {"peaks", "depressions"}
    threshold : float, optional
        Minimum prominence (peaks) or depth (depressions) of a counted pair,
        and the minimum depth of a ponding depression. Default: 3 x RMSE.
    threshold_jitter : float
        Standard deviation of the threshold: each realisation draws its own
        from the error model's kernel centred on ``threshold`` (clipped at
        0); 0 = a fixed threshold.
    weight : {"persistence", "count"}
    connectivity : {8, 4}
    base : float, optional
        Level the essential peak's prominence is measured to. Default: the
        lowest valid cell (peaks only).
    merge_level : float, optional
        Persistence below which the unperturbed DEM's regions merge into the
        feature around them. Default: min(2 x RMSE, threshold).
    min_presence : float
        A region is a feature (a row of the tables) when a counted pair is
        born in it in at least this share of realisations.
    regions : Regions, optional
        The unperturbed DEM's regions at ``merge_level`` (filled in by
        :meth:`resolved`, or given to share them between runs).
    reference : float, optional
        The elevation the run's float32 realisations are relative to
        (:meth:`terrain.dem.Dem.reference`: 0, or a float64 DEM's lowest
        cell); filled in by :meth:`resolved`. Logged birth and death values
        are relative to it.
    """

    kind: str
    threshold: float | None = None
    threshold_jitter: float = 0.0
    weight: str = "persistence"
    connectivity: int = 8
    base: float | None = None
    merge_level: float | None = None
    min_presence: float = defaults.MIN_PRESENCE
    regions: Regions | None = None
    area_row: np.ndarray | None = None
    from_defaults: tuple = ()
    reference: float | None = None
    cell_metres: tuple | None = None  # relations: (dx, dy) metres per row
    geo_transform: tuple | None = None  # relations: the affine of a geographic CRS
    given: Given | None = None  # relations on the DEM as given, per region

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
        for name in ("threshold", "threshold_jitter", "merge_level"):
            v = getattr(self, name)
            if v is not None and not (math.isfinite(v) and v >= 0):
                raise OptionError(f"{{{name}}} must be >= 0 and finite, got {v}", name)
        if self.base is not None and not math.isfinite(self.base):
            raise OptionError(f"{{base}} must be finite, got {self.base}", "base")
        if not 0 < self.min_presence <= 1:
            raise OptionError(f"{{min_presence}} is a share in (0, 1], got {self.min_presence}",
                              "min_presence")

    # -- the job interface (terrain.runner.protocols.Job) ---------------------------
    @property
    def name(self) -> str:
        return self.kind

    @property
    def filtration(self) -> str:
        """The engine's name for the kind: peaks or pits."""
        return FILTRATION[self.kind]

    @property
    def layers(self) -> tuple[str, ...]:
        return tuple(s.name for s in layers_of(self.kind))

    def _defaulted(self) -> tuple[str, ...]:
        names = ("threshold", "merge_level") + (("base",) if self.kind == "peaks" else ())
        return tuple(n for n in names if getattr(self, n) is None or n in self.from_defaults)

    def resolved(self, dem: Dem, model: ErrorModel, *,
                 layout: RunLayout | None = None) -> CreditJob:
        """This job with every ``None`` setting replaced by its library default
        and the unperturbed DEM's regions computed (resolving twice changes
        nothing); a DEM on disk gets them block by block, in the run's
        ``layout`` (:attr:`~terrain.layout.RunLayout.given_block`; default:
        :func:`~terrain.layout.layout_of` the DEM)."""
        layout = layout if layout is not None else layout_of(dem)
        thr = defaults.cutoff(self.threshold, model.rmse)
        merge = defaults.merge_level(self.merge_level, model.rmse, thr)
        reg = self.regions
        if reg is None or reg.merge_level != merge or tuple(reg.labels.shape) != dem.shape:
            reg = dem_regions(dem, kind=self.filtration, merge_level=merge,
                              connectivity=self.connectivity, layout=layout)
        metres = tuple(np.asarray(a, np.float64) for a in dem.cell_metres())
        geo = tuple(dem.transform)[:6] if dem.geographic else None
        given = self.given if reg is self.regions and self.given is not None else \
            dem_relations(dem, reg, self.filtration, self.connectivity, metres, geo, layout)
        return dataclasses.replace(
            self, threshold=thr, merge_level=merge, regions=reg, area_row=dem.cell_area_m2(),
            base=defaults.base_level(self.base, dem) if self.kind == "peaks" else None,
            from_defaults=self._defaulted(), reference=dem.reference(model.rmse),
            cell_metres=metres, geo_transform=geo, given=given)

    def defaults_used(self) -> dict:
        """The settings left to library defaults, with the rule each follows."""
        return {n: defaults.RULES[n] for n in self._defaulted()}

    def describe(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
             if f.name not in ("regions", "area_row", "from_defaults", "cell_metres",
                              "geo_transform", "given")}
        return {"job": self.kind, **d}

    def new_counts(self, n_cells: int) -> dict:
        """Integer per-cell counts a worker adds to (exact in any order)."""
        return {"ponding": np.zeros(n_cells, np.int32)} if self.kind == "depressions" else {}

    def realise_blocked(self, dem, sampler, seed: int, i: int, **options) -> dict:
        """Realisation ``i`` block by block, the very log of :meth:`realise`
        (:func:`terrain.jobs.credit_blocked.realise_blocked`; ``options`` as
        there). What makes this job a ``BlockedJob`` for the runner."""
        return realise_blocked(dem, sampler, self, seed, i, **options)

    def realise(self, z, sampler, seed, i, counts) -> dict:
        return realise(z, sampler, self, seed, i, counts.get("ponding"))

    def accumulator(self, n_cells: int, ponding=None) -> CreditAccumulator:
        return CreditAccumulator(n_cells, self, ponding)

    def memory_per_cell(self, value_bytes: int, cells: int | None = None) -> tuple[int, int]:
        """Accumulating process: the layers summed from the log at the end (4
        float64 moments, 1 int32 count, scratch float64 + int32), the int32
        ponding count of depressions, and the finished layers (a float64
        estimate and standard error each, 3 or 4 layers). Worker: the DEM
        copy, noise (4), the perturbed copy and the key copy the pairing sorts
        on, basin labels (4), validity (1), region labels (4), ponding counts
        (4); for peaks the isolation search's max pyramid (under 1)."""
        parent = 48 + (4 if self.kind == "depressions" else 0) + 16 * len(self.layers)
        return parent, 3 * value_bytes + 17 + (1 if self.kind == "peaks" else 0)


def dem_regions(dem: Dem, *, kind: str, merge_level: float, connectivity: int,
                layout: RunLayout | None = None) -> Regions:
    """The regions of ``dem`` as given; a DEM on disk gets them block by block
    (``layout.given_block``), its labels in a grid on disk beside it (the same
    regions, bit for bit)."""
    block = (layout if layout is not None else layout_of(dem)).given_block
    if block is None:
        return regions(dem.z, kind=kind, merge_level=merge_level, connectivity=connectivity,
                       mask=dem.nodata)
    from ..engine.blocked import blocked_regions

    return blocked_regions(dem.z, kind=kind, merge_level=merge_level, connectivity=connectivity,
                           block=block, out=dem.new_grid("regions", dem.shape, np.int32))


def dem_relations(dem: Dem, reg: Regions, filtration: str, connectivity: int, metres, geo,
                  layout: RunLayout | None = None) -> Given:
    """Relations of every region on the DEM as given (:class:`~terrain.jobs.relations.Given`):
    the DEM's pairs with their elders (block by block for a DEM on disk,
    ``layout.given_block``) and, for peaks, the isolation of each region's summit."""
    block = (layout if layout is not None else layout_of(dem)).given_block
    if block is None:
        p = pairs(dem.z, kind=filtration, connectivity=connectivity, mask=dem.nodata)
    else:
        from ..engine.blocked import blocked_pairs

        p = blocked_pairs(dem.z, kind=filtration, connectivity=connectivity, block=block)
    return given_relations(dem.z, p, reg, lambda c: labels_at(reg.labels, c), metres, geo,
                           filtration == "peaks")


def load_kernels(kind: str) -> None:
    """Load the compiled kernels a whole-grid realisation of ``kind`` calls (from
    numba's cache, or compile them) by computing one on a tiny made-up raster:
    what a worker started ahead of its run does while the DEM is read, so the
    run's first realisation does not wait for them. Nothing is kept."""
    yy, xx = np.mgrid[:12, :12]
    z = (np.sin(yy * 0.9) * np.cos(xx * 0.7) * 20.0 + xx).astype(np.float32)
    dem = Dem.from_array(z, cellsize=10.0)
    model = ErrorModel(rmse=1.0)
    job = CreditJob(kind).resolved(dem, model)
    job.realise(z - np.float32(job.reference or 0.0), ErrorSampler(model, z.shape, (10.0, 10.0)),
                0, 0, job.new_counts(z.size))


def realise(z: np.ndarray, sampler: ErrorSampler, job: CreditJob, seed: int, i: int,
            ponding: np.ndarray | None = None) -> dict:
    """Compute realisation ``i``: perturb, pair, select; return its logs.

    Parameters
    ----------
    z : (rows, cols) float32 array with NaN on nodata, relative to ``job.reference``
    sampler : ErrorSampler
    job : CreditJob (resolved)
    seed, i : the run's seed and the realisation index
    ponding : flat int32 array, optional
        For depressions, incremented in place where the cell lies in a
        depression at least the threshold deep.

    Returns
    -------
    dict of arrays: the pair log (:data:`LOG_FIELDS`) and, for depressions,
    the pond log (:data:`POND_FIELDS`).
    """
    zi = sampler.draw(seed, i)
    zi += z
    thr = realisation_threshold(job, sampler.kernel, seed, i)
    reg = job.regions.labels.reshape(-1)
    ponds = {}
    if job.kind == "peaks":
        p = pairs(zi, kind="peaks", connectivity=job.connectivity)
        # the highest summit is measured to the base, or lower if the realisation is
        floor = min(job.base - (job.reference or 0.0), float(np.nanmin(zi))) \
            if p.essential.any() else 0.0
        death_value = np.where(p.essential, floor, p.death_value)
    else:
        p, fill = pits_and_levels(zi, connectivity=job.connectivity)
        death_value = p.death_value
        if ponding is not None:
            ponds = _ponds(fill, thr, ponding, reg, job, i, z.shape[1])
    iso = summit_isolation(zi, job) if job.kind == "peaks" else None
    return {**pair_log(p, death_value, thr, i, z.size, lambda b: reg[b].astype(np.int32), iso),
            **ponds}


def _ponds(fill, thr, ponding, reg, job, i, nc) -> dict:
    """Count ponding and log each region's ponded area and volume."""
    k = len(job.regions) + 1
    area, vol = np.zeros(k, np.int64), np.zeros(k, np.int64)
    count_ponding(fill.zf, fill.valid, fill.labels, fill.level, fill.depth, thr, ponding, reg,
                  job.area_row, nc, area, vol)
    return pond_log(i, area, vol)


@njit(cache=True)
def _accumulate(real, birth, death, w, nc, r0, r1, c0, c1, bsum, bsq, dsum, dsq, bcount,
                scratch, mark):
    """Sum logged pairs into the cells of window rows ``r0:r1``, columns
    ``c0:c1`` (arrays flat over the window), realisation by realisation in
    the log's order, so every cell's sum is the same whatever window holds it.

    Birth cells are unique within a realisation; death cells may repeat (a
    col where several summits die), so their weights are summed per
    realisation before the squares are taken.
    """
    wc = c1 - c0
    n = real.size
    t = 0
    while t < n:
        r = real[t]
        u = t
        while u < n and real[u] == r:
            u += 1
        for k in range(t, u):
            br = birth[k] // nc
            bc = birth[k] - br * nc
            if r0 <= br < r1 and c0 <= bc < c1:
                b = (br - r0) * wc + bc - c0
                bsum[b] += w[k]
                bsq[b] += w[k] * w[k]
                bcount[b] += 1
        tag = r + 1
        for k in range(t, u):
            if death[k] < 0:
                continue
            dr = death[k] // nc
            dc = death[k] - dr * nc
            if r0 <= dr < r1 and c0 <= dc < c1:
                d = (dr - r0) * wc + dc - c0
                if mark[d] != tag:
                    mark[d] = tag
                    scratch[d] = 0.0
                scratch[d] += w[k]
        for k in range(t, u):
            if death[k] < 0:
                continue
            dr = death[k] // nc
            dc = death[k] - dr * nc
            if r0 <= dr < r1 and c0 <= dc < c1:
                d = (dr - r0) * wc + dc - c0
                if mark[d] == tag:
                    mark[d] = -tag  # visited once
                    dsum[d] += scratch[d]
                    dsq[d] += scratch[d] * scratch[d]
        t = u


def _moments(s, q, n):
    n = max(n, 1)
    m = s / n
    return m, np.sqrt(np.maximum(q / n - m * m, 0.0) / n)


def credit_layers(log: dict, n: int, job: CreditJob, nc: int,
                  window: tuple[int, int, int, int], names=None) -> dict:
    """The birth/death credit and birth probability layers on a window (or
    those of them named in ``names``).

    Computed from the pair log (sorted by realisation) for the cells of rows
    ``r0:r1`` and columns ``c0:c1`` of a raster ``nc`` columns wide: each
    layer's mean and Monte Carlo standard error over ``n`` realisations,
    float64 arrays of the window's shape. The same cell gets the same
    numbers from any window. Memory: 52 bytes per window cell while summing.
    """
    r0, r1, c0, c1 = window
    size = (r1 - r0) * (c1 - c0)
    bsum, bsq, dsum, dsq, scratch = (np.zeros(size) for _ in range(5))
    bcount = np.zeros(size, np.int32)
    _accumulate(log["real"], log["birth"].astype(np.int64), log["death"].astype(np.int64),
                log_weights(log, job.weight), nc, r0, r1, c0, c1, bsum, bsq, dsum, dsq, bcount,
                scratch, np.zeros(size, np.int32))
    shape = (r1 - r0, c1 - c0)
    make = {layer_name(job.kind, "birth_credit"): lambda: _moments(bsum, bsq, n),
            layer_name(job.kind, "death_credit"): lambda: _moments(dsum, dsq, n),
            layer_name(job.kind, "birth_probability"): lambda: proportion(bcount, n)}
    out = {k: f() for k, f in make.items() if names is None or k in names}
    return {k: (m.reshape(shape), e.reshape(shape)) for k, (m, e) in out.items()}


def paired_difference(log_a: dict, log_b: dict, n: int, job: CreditJob, nc: int,
                      window: tuple[int, int, int, int]) -> tuple[np.ndarray, np.ndarray]:
    """The per-cell difference of two runs' birth credit layers, with its paired
    Monte Carlo standard error.

    Realisation ``i`` of one run is paired with realisation ``i`` of the other
    (runs with common random numbers, e.g. two kernels of a sweep): per cell
    ``D_i`` = the credit born there in run a minus in run b, so the standard
    error ``sqrt((mean(D^2) - mean(D)^2) / n)`` keeps the strong correlation
    between the runs instead of adding their variances. The first ``n``
    realisations of each log are used. Returns float64 arrays of the
    window's shape (mean difference, its standard error).
    """
    logs = [(g, sign) for g, sign in ((log_a, 1.0), (log_b, -1.0))]
    real = np.concatenate([g["real"][g["real"] < n] for g, _ in logs]).astype(np.int64)
    cells = np.concatenate([g["birth"][g["real"] < n] for g, _ in logs]).astype(np.int64)
    w = np.concatenate([sign * log_weights(g, job.weight)[g["real"] < n] for g, sign in logs])
    order = np.argsort(real, kind="stable")
    r0, r1, c0, c1 = window
    size = (r1 - r0) * (c1 - c0)
    dsum, dsq, scratch = np.zeros(size), np.zeros(size), np.zeros(size)
    none = np.full(real.size, -1, np.int64)  # no birth falls in the window
    # births of both runs as "deaths": a cell may repeat within a realisation, and the
    # kernel sums its weights per realisation before squaring
    _accumulate(real[order], none, cells[order], w[order], nc, r0, r1, c0, c1,
                np.zeros(0), np.zeros(0), dsum, dsq, np.zeros(0, np.int32), scratch,
                np.zeros(size, np.int32))
    m, e = _moments(dsum, dsq, n)
    shape = (r1 - r0, c1 - c0)
    return m.reshape(shape), e.reshape(shape)


class CreditLayers:
    """A peaks or depressions run's layers, computed window by window when read
    (out-of-core runs): ``read(r0, r1, c0, c1)`` gives every layer's (mean,
    standard error) on a window, as :meth:`CreditAccumulator.window_layers`;
    ``layers[name]`` the whole grid of one (small grids, tests)."""

    def __init__(self, acc: CreditAccumulator, shape: tuple[int, int]):
        self.acc, self.shape = acc, shape
        self.names = tuple(s.name for s in layers_of(acc.job.kind))

    def read(self, r0: int, r1: int, c0: int, c1: int, names=None) -> dict:
        return self.acc.window_layers(self.shape, (r0, r1, c0, c1), names)

    def __iter__(self):
        return iter(self.names)

    def __len__(self) -> int:
        return len(self.names)

    def keys(self):
        return self.names

    def __getitem__(self, name: str):
        return self.read(0, self.shape[0], 0, self.shape[1])[name]


class CreditAccumulator:
    """What a peaks or depressions run keeps while realisations come in.

    ``add(log, counts, n)`` folds in the next ``n`` realisations (their log
    entries sorted by realisation, and their summed integer counts). It keeps
    the pair log, ponding counts (depressions) and, per region, the sum and
    sum of squares of the realisation's figure and the number of
    realisations with a counted pair (for the stop rule). The credit layers
    are computed from the log when asked for (:func:`credit_layers`), whole
    or window by window, so nothing dense but the ponding counts is held
    while the run goes on: 4 bytes per cell (depressions) plus 34 bytes per
    logged pair.
    """

    _ARRAYS = ("fsum", "fsq", "fcount")

    def __init__(self, n_cells: int, job: CreditJob, ponding=None):
        self.job = job
        self.n = 0
        self.n_cells = n_cells
        k = len(job.regions) + 1 if job.regions is not None else 1
        self.fsum, self.fsq = np.zeros(k), np.zeros(k)
        self.fcount = np.zeros(k, np.int64)
        self.ponding = None
        if job.kind == "depressions":
            self.ponding = np.zeros(n_cells, np.int32) if ponding is None else ponding
        self.logs: list[dict] = []

    @property
    def on_disk(self) -> bool:
        """True when the ponding counts live on disk (a :class:`~terrain.io.CountStore`,
        added to block by block as realisations are computed)."""
        return self.ponding is not None and not isinstance(self.ponding, np.ndarray)

    def add(self, log: dict, counts: dict, n: int) -> None:
        _, reg, fig, _ = region_figures(log)
        np.add.at(self.fsum, reg, fig)
        np.add.at(self.fsq, reg, fig * fig)
        np.add.at(self.fcount, reg, 1)
        if counts.get("ponding") is not None and self.ponding is not None:
            self.ponding += counts["ponding"]
        self.logs.append(log)
        self.n += n

    def log(self) -> dict:
        """The pair log (and pond log) so far, concatenated (kept as one array set)."""
        fields = LOG_FIELDS + (POND_FIELDS if self.job.kind == "depressions" else ())
        if len(self.logs) != 1:
            self.logs = [concat_logs(self.logs, fields)]
        return self.logs[0]

    def layers(self, shape):
        """Each layer's mean and standard error on the whole grid, or (counts on
        disk) a :class:`CreditLayers` computing them window by window when read."""
        if self.on_disk:
            self.ponding.check(self.n, exact=True)
            return CreditLayers(self, tuple(shape))
        return self.window_layers(tuple(shape), (0, shape[0], 0, shape[1]))

    def window_layers(self, shape, window, names=None) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Each layer's mean and standard error on ``window`` (r0, r1, c0, c1),
        or only those of the layers named in ``names`` (the pair log is not
        read when none of its layers is asked for)."""
        r0, r1, c0, c1 = window
        pond = layer_name(self.job.kind, "ponding_probability") if self.ponding is not None \
            else None
        out = {}
        if names is None or any(k != pond for k in names):
            out = credit_layers(self.log(), self.n, self.job, shape[1], window, names)
        if self.ponding is not None and (names is None or pond in names):
            if self.on_disk:
                cnt = self.ponding[r0:r1, c0:c1]
            else:
                cnt = self.ponding.reshape(shape)[r0:r1, c0:c1]
            out[pond] = proportion(cnt, self.n)
        return out

    def stop_statistic(self) -> float:
        """Largest Monte Carlo standard error of a feature's expected figure
        (DEM units) among the regions counted in at least ``min_presence`` of
        the realisations so far (NaN while there are none)."""
        if self.n == 0:
            return math.nan
        rows = self.fcount >= self.job.min_presence * self.n
        if not rows.any():
            return math.nan
        _, se = _moments(self.fsum[rows], self.fsq[rows], self.n)
        return float(se.max())

    # -- checkpoint state ------------------------------------------------------
    def state(self) -> dict:
        st = {"n": np.array(self.n), **{k: getattr(self, k) for k in self._ARRAYS}}
        if self.ponding is not None and not self.on_disk:  # on disk: the store is the state
            st["ponding"] = self.ponding
        st.update({f"log_{k}": v for k, v in self.log().items()})
        return st

    def restore(self, st: dict) -> None:
        if self.on_disk:  # a resume: every chunk of the store is checked against its digest
            self.ponding.check(int(st["n"]), verify=True)
        for k in self._ARRAYS + (("ponding",) if self.ponding is not None and not self.on_disk
                                 else ()):
            if k not in st or st[k].shape != getattr(self, k).shape:
                raise CheckpointError("checkpoint arrays do not match the DEM's size or regions")
            getattr(self, k)[:] = st[k]
        self.n = int(st["n"])
        fields = LOG_FIELDS + (POND_FIELDS if self.job.kind == "depressions" else ())
        if any(f"log_{k}" not in st for k in fields):
            raise CheckpointError("checkpoint from an older cairn: its pair log has no relations")
        self.logs = [{k: st[f"log_{k}"] for k in fields}]
