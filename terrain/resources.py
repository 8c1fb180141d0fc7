"""Memory guard: judge, from the DEM's header, whether a run fits before it starts.

:func:`estimate_run` counts what a run holds at its peak, in every process it
uses, from the grid's size and types (:func:`terrain.io.read_header`; the
pixels are not read), the job's own bytes per cell
(:meth:`~terrain.runner.protocols.Job.memory_per_cell`: its accumulators and
finished layers in the accumulating process, one realisation in a worker),
its per-cell chunk counts (``new_counts``), the error model and the
execution:

- a process's own footprint (interpreter and libraries; measured);
- reading: the band as stored, its mask and the elevations;
- running: the DEM, the workers' copy of it, the job's figure, one
  realisation's work where realisations run, the chunk results in flight
  (at most two per worker, see :mod:`terrain.runner.backends`) and the log;
- finishing: the same while the layers' means and standard errors are
  computed;
- writing: the DEM, the job's figure, summaries, GeoTIFF encoding and the
  quick-look figure (measured per cell; a quick-look draws at most
  :data:`~terrain.layers.QUICKLOOK_CELLS` pooled cells of a bigger grid).

The peak is the largest of these phases, plus each worker process's own
footprint and arrays. ``cairn inspect`` prints the same figure the guard
compares with the memory available.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .dem import BAND_ROWS, Dem, RasterHeader, metres_per_degree
from .errors import MemoryGuardError
from .io import WINDOW_WRITE_CACHE, available_memory, check_scratch_space, scratch_parent
from .layers import PRESHADE_CELLS, QUICKLOOK_CELLS, WINDOW_CELLS
from .layout import DEFAULT_BLOCK, RunLayout, candidates, plan_layout
from .noise import ErrorModel
from .noise.fields import check_range, kernel_memory
from .runner import Execution
from .runner.protocols import Job

__all__ = ["MemoryEstimate", "estimate_run", "check_memory", "choose_layout", "DEFAULT_BLOCK",
           "describe_memory", "read_bytes", "available_bytes", "PROCESS_BYTES", "DRAWING_BYTES",
           "WORKER_PROCESS_BYTES", "LOG_BYTES_PER_PAIR", "grid_spacing", "field_bytes",
           "check_field", "scratch_bytes", "check_disk"]

KiB, MiB = 2 ** 10, 2 ** 20
# Resident size of the processes before their arrays (interpreter, numpy, GDAL,
# numba's compiled kernels, GeoPandas), measured with cairn's own runs on Linux
# x86-64, Python 3.11 (the peak of small runs, rounded up): the footprint depends
# on the installed wheels and on the machine -- a fresh install from the package
# index measured 60-90 MiB more per process than an older environment, and the
# CI machine 80 MiB more than the development machine with the same wheels --
# so these are the larger figures.
PROCESS_BYTES = 480 * MiB
WORKER_PROCESS_BYTES = 240 * MiB
# ... and what drawing the quick-look maps adds to this process: matplotlib,
# adjustText and the font list (measured: 55-60 MiB resident after the first
# figure is saved; rounded up).
DRAWING_BYTES = 64 * MiB
# Bytes per cell (measured or counted, as noted).
READ_SCRATCH = 4  # nodata mask and boolean temporaries while reading (counted)
CHECKSUM_SCRATCH = 13  # float64 copy of the DEM while it is hashed (counted)
CONTEXT = 4  # the float32 DEM the realisations read (counted)
MOMENTS_SCRATCH = 24  # float64 temporaries of a layer's mean and standard error (counted)
SUMMARY_SCRATCH = 100  # feature or catchment summaries and GeoTIFF encoding (measured)
BLOCKS_SCRATCH = 32  # the quick-look's float64 copy of a layer and its padded copy while it is
#                      pooled, or the hillshade's nearest-cell indices (counted)
QUICKLOOK_SCRATCH = 130  # per cell drawn by the quick-look: hillshade, images, rendering (measured)
PRESHADE = 73  # the map's hillshade made while the realisations run: float64 elevations,
#               matplotlib's gradients and normals, the shade (peak measured with tracemalloc)
# A forked copy of the writing process (terrain.outputs.beside: the layers written
# while the features are summarised, then the map while the summary is finished and
# the tables written; one at a time): its own arrays and the pages the parent writes
# to while it lives, which stop being shared. Measured (private memory, the larger
# copy): 67 MiB at 400², 116 MiB at 1024² (depressions; peaks 117 MiB at 1024²);
# 83-89 MiB at 400² in another check, the same with the map's copy beside the
# tables alone and beside the summary's second step too.
FORKED_COPY_BYTES = 60 * MiB
FORKED_COPY = 80  # bytes per cell
SWEEP_KEPT = 2 * 16  # a sweep keeps two float64 layers (and errors) of each finished run
FIELD_DRAW = 24  # correlated error: a draw's float64 field and noise tiles, float32 copy (counted)
COPULA_DRAW = 16  # ... and a non-Gaussian kernel's copula: quantiles and their temporaries (counted)
LOG_BYTES_PER_PAIR = 30  # one logged pair on grids below 2**31 cells (counted; 9 of relations)
# Blocked mode (terrain.runner.blocked), per cell of a block task: block plus halo
# (4), its error and the noise tiles it is drawn from (4 + 8), the local step on
# white noise, the worst case (44) plus the level inputs kept for the second
# pass of depressions (4 + up to 32 / 9 per raster minimum), or that pass (25),
# the summary handed up (8): counted from the stated figures of
# terrain.engine.blocked, rounded up.
BLOCK_TASK = 80
# The glue, per boundary cell (cells facing another block), white noise (145,
# measured in bench/bench_blocked.py), and the summaries it reads (40).
GLUE_PER_BOUNDARY_CELL = 185
# Out of core, per cell of a window of layers while summarising and writing: the
# log summed on the window (52), the layers (4 x 16), float32 copies (8), the DEM
# window and mask (9), labels (4) and the features' temporaries (20) (counted).
WINDOW_BYTES = 160
PAIRS_PER_REALISATION = 2000  # assumed; the run re-checks its log as it grows
# Out of core, per feature region of the DEM as given, while its summaries are made
# and held through the writing: its table and rank rows, outline polygons and
# their tracing (measured: 11-13 KiB per depression of rugged 4096^2 test DEMs,
# 16,856 and 36,430 of them; rounded up). Known once the regions are made.
FEATURE_BYTES = 16 * KiB
# Out of core, per feature region too, while the quick-look draws it: its outline's
# path, markers and tie line, and what matplotlib makes of them while laying out and
# rendering the map. Measured at 16384² (cairn depressions -n 2 --block 2048
# --workers 1, sampled every 0.25 s): the drawing took the one process from 1.53 to
# 2.58 GB, with all 4,471 feature regions drawn; that peak is 226 KB per feature
# above the estimate without them (rounded up, with FEATURE_BYTES). Every region is
# counted as drawn: which ones are is known only once the realisations are done.
DRAWN_FEATURE_BYTES = 224 * KiB


def available_bytes() -> int:
    """Memory available to a new run (see :func:`terrain.io.available_memory`)."""
    return available_memory()


@dataclass(frozen=True)
class MemoryEstimate:
    """Bytes a run holds at its peak.

    Attributes
    ----------
    total : int
        All processes together (what the guard compares).
    parent : int
        The process that reads, accumulates and writes.
    worker : int
        Each worker process (0 when realisations run in the parent).
    workers : int
        Worker processes on this machine.
    cells : int
    per_cell : dict
        Bytes per cell of each phase of the parent and of a worker.
    """

    total: int
    parent: int
    worker: int
    workers: int
    cells: int
    per_cell: dict
    block: int | None = None
    kernel: int = 0
    on_disk: bool = False
    features: int = 0
    feature_bytes: int = 0  # what ``features`` add: their summaries, and drawing them

    def describe(self) -> str:
        """One line, e.g. ``~1.20 GiB = 0.60 GiB + 2 workers x 0.30 GiB (250 bytes
        per cell at the peak)``."""
        text = f"~{_gib(self.total)}"
        if self.workers:
            text += f" = {_gib(self.parent)} + {self.workers} workers x {_gib(self.worker)}"
        if self.kernel > self.total / 10:
            text += f", of which {_gib(self.kernel)} to compute the correlated error's kernel"
        peak = max(v for k, v in self.per_cell.items() if k != "worker")
        if self.on_disk:
            drawless = self.features * FEATURE_BYTES
            summaries = (f"; the summaries of its {self.features:,} features"
                         f"{', and drawing them' if self.feature_bytes > drawless else ''}"
                         f": {_gib(self.feature_bytes)}" if self.features else "")
            return text + (f" (out of core: the DEM, region labels and counts stay on disk; "
                           f"a worker holds one block of {self.block} x {self.block}{summaries})")
        if self.block:
            return text + (f" ({peak:,} bytes per cell at the peak in the accumulating process; "
                           f"a worker holds one block of {self.block} x {self.block})")
        return text + f" ({peak:,} bytes per cell at the peak)"


def _gib(n: int) -> str:
    return f"{n / 2**30:.2f} GiB" if n < 100 * 2**30 else f"{n / 2**30:,.0f} GiB"


def _grid(grid) -> tuple[int, int, int]:
    """(cells, bytes per elevation once read, bytes per stored value) of a
    :class:`~terrain.dem.RasterHeader` or a :class:`~terrain.dem.Dem`."""
    if hasattr(grid, "value_bytes"):
        return grid.cells, grid.value_bytes, grid.stored_bytes
    return int(grid.z.size), int(grid.z.itemsize), int(grid.z.itemsize)


def read_bytes(grid: RasterHeader | Dem) -> int:
    """Bytes the read of the DEM itself needs at its peak (``inspect``)."""
    cells, value, stored = _grid(grid)
    return (2 * stored + value + READ_SCRATCH) * cells


def _planned(ex) -> int:
    """Realisations the log is planned for: all of them, or with a target
    standard error those up to the first stopping check (planned lazily: the
    run watches its log as it grows)."""
    if ex.target_se is None:
        return ex.realisations
    first = max(ex.check_every, -(-ex.min_realisations // ex.check_every) * ex.check_every)
    return min(ex.realisations, first)


def estimate_run(grid: RasterHeader | Dem, job: Job, ex: Execution | None = None, *,
                 model: ErrorModel | None = None, runs: int = 1,
                 quicklook: bool = True, layout: RunLayout | None = None,
                 features: int = 0) -> MemoryEstimate:
    """The bytes a run of ``job`` on ``grid`` needs at its peak, in every process.

    Parameters
    ----------
    grid : RasterHeader or Dem
        The grid read (a header is enough: the pixels are not needed).
    job : a :class:`~terrain.runner.protocols.Job`
        Its ``memory_per_cell`` and ``new_counts`` are read.
    ex : Execution, optional
        Workers, backend and realisations (default: ``Execution()``).
    model : ErrorModel, optional
        A spatially correlated model adds its circulant-embedding arrays.
    runs : int
        Runs one after another (a sweep keeps two layers of each).
    quicklook : bool
        Whether the run draws a quick-look map of the grid (a sweep does not).
    layout : RunLayout, optional
        Whole grid or blocks, in memory or on disk (default: as
        :func:`terrain.layout.plan_layout` makes it from ``ex.block`` and ``runs``).
    features : int
        Out of core: the feature regions of the DEM as given, once they are
        made (``len(job.regions)``), whose summaries are held from the summary
        phase through the writing (:data:`FEATURE_BYTES` each) and which the
        quick-look may draw (:data:`DRAWN_FEATURE_BYTES` each); 0 before.
    """
    ex = ex if ex is not None else Execution()
    layout = layout if layout is not None else plan_layout(grid.shape, ex.block, job=job,
                                                           runs=runs)
    cells, value, stored = _grid(grid)
    field = field_bytes(grid, model)
    parent_job, worker_job = job.memory_per_cell(value, cells=cells)
    counts = sum(a.nbytes for a in job.new_counts(1).values())  # one chunk result per cell
    kept, draw = 0, _draw_bytes(model)
    backend = ex.resolved_backend
    local = 0 if backend == "serial" or (backend == "dask" and ex.scheduler) else ex.n_workers
    dem = value + 1
    block = layout.block
    if layout.on_disk:  # DEM, region labels and counts on disk
        return _out_of_core(grid, job, ex, block, cells, value, stored, draw, local, runs,
                            quicklook, field, features)
    labels = 4 if block else 0  # blocked: the region labels, read at birth cells
    held = dem + CONTEXT + kept + labels + parent_job + SWEEP_KEPT * (runs - 1)
    here = 0  # bytes of this process that do not scale with the grid's cells
    if block:  # a sweep's blocked runs: a worker holds one block task; this process the glue
        task, glue = _block_bytes(grid, cells, int(block), draw)
        running = held + max(CHECKSUM_SCRATCH, counts)
        worker_cell, worker_bytes = math.ceil(task / max(cells, 1)), task
        here = glue + (0 if local else task)
    elif backend == "serial":
        running = held + max(CHECKSUM_SCRATCH, worker_job + draw)
    else:  # results in flight, one more being unpickled, the DEM pickled for a worker
        running = held + max(CHECKSUM_SCRATCH, (2 * ex.n_workers + 1) * counts + CONTEXT + kept)
    if not block:
        worker_cell = CONTEXT + kept + worker_job + draw + 2 * counts if local else 0
        worker_bytes = worker_cell * cells
    drawn = min(cells, QUICKLOOK_CELLS) / max(cells, 1)  # a big grid is drawn in blocks
    if quicklook and cells <= PRESHADE_CELLS:  # the hillshade made while the realisations run
        running += PRESHADE
    phases = {"read": 2 * stored + value + READ_SCRATCH, "running": running,
              "finishing": held + MOMENTS_SCRATCH,
              "writing": dem + parent_job + SUMMARY_SCRATCH + SWEEP_KEPT * (runs - 1)
              + quicklook * (BLOCKS_SCRATCH + math.ceil(QUICKLOOK_SCRATCH * drawn)
                             + FORKED_COPY)}
    log = 2 * LOG_BYTES_PER_PAIR * PAIRS_PER_REALISATION * _planned(ex) * runs
    build, kept, tile = field
    parent = (PROCESS_BYTES + quicklook * (DRAWING_BYTES + FORKED_COPY_BYTES)
              + max(max(phases.values()) * cells, dem * cells + build) + log + here
              + kept + (0 if local else tile))
    worker = WORKER_PROCESS_BYTES + worker_bytes + kept + tile if local else 0
    return MemoryEstimate(total=parent + local * worker, parent=parent, worker=worker,
                          workers=local, cells=cells, per_cell={**phases, "worker": worker_cell},
                          block=int(block) if block else None, kernel=build)


def _draw_bytes(model: ErrorModel | None) -> int:
    """Bytes per cell of one correlated draw's work arrays (0 for independent error)."""
    if model is None or not model.correlated:
        return 0
    return FIELD_DRAW + (COPULA_DRAW if model.kernel != "gaussian" else 0)


def _out_of_core(grid, job, ex, block, cells, value, stored, draw, local, runs, quicklook,
                 field, features=0):
    """Blocked mode keeps the DEM, region labels and counts on disk: this
    process holds one band of the DEM while reading it, the glue of the block
    boundaries with one block task (region labels and the DEM's own ponding
    are made here, in the run's blocks), one window of layers while
    summarising and writing (and GDAL's block cache) and, while the quick-look
    is drawn beside the writing, a second window its pooled rasters are read
    through, the quick-look's pooled rasters, and the log; a worker holds one
    block task. The feature summaries (table and outline polygons) grow with
    the number of features, which no header tells: counted once the regions
    are made (``features``), held through the writing."""
    rows, cols = grid.shape if hasattr(grid, "shape") else (cells, 1)
    task, glue = _block_bytes(grid, cells, int(block), draw)
    band = min(rows, BAND_ROWS * max(1, min(16, (64 * MiB) // max(cols * 8 * BAND_ROWS, 1))))
    window = min(cells, WINDOW_CELLS)
    feature_bytes = features * (FEATURE_BYTES + quicklook * DRAWN_FEATURE_BYTES)
    phases = {"read": band * cols * (2 * stored + value + READ_SCRATCH),
              "regions": glue + task,  # the same blocks (terrain.jobs.credit.dem_regions)
              "running": glue + (0 if local else task),
              # the writer's window and, while the map is drawn beside it, the map's
              "writing": (1 + quicklook) * window * WINDOW_BYTES + WINDOW_WRITE_CACHE
              + quicklook * min(cells, QUICKLOOK_CELLS) * QUICKLOOK_SCRATCH
              + feature_bytes}
    log = 2 * LOG_BYTES_PER_PAIR * PAIRS_PER_REALISATION * _planned(ex) * runs
    build, kept, tile = field
    parent = (PROCESS_BYTES + quicklook * (DRAWING_BYTES + FORKED_COPY_BYTES)
              + max(max(phases.values()), build) + log
              + kept + (0 if local else tile))
    worker = WORKER_PROCESS_BYTES + task + kept + tile if local else 0
    per = {k: math.ceil(v / max(cells, 1)) for k, v in phases.items()}
    return MemoryEstimate(total=parent + local * worker, parent=parent, worker=worker,
                          workers=local, cells=cells,
                          per_cell={**per, "worker": math.ceil(task / max(cells, 1))},
                          block=int(block), kernel=build, on_disk=True, features=features,
                          feature_bytes=feature_bytes)


def _block_bytes(grid, cells: int, b: int, draw: int) -> tuple[int, int]:
    """Blocked mode: the bytes of one block task and of the glue of the block
    boundaries (both sides of every block line)."""
    rows, cols = grid.shape if hasattr(grid, "shape") else (cells, 1)
    nbr, nbc = -(-rows // b), -(-cols // b)
    boundary = 2 * ((nbr - 1) * cols + (nbc - 1) * rows)
    return (BLOCK_TASK + draw) * min(b, rows) * min(b, cols), GLUE_PER_BOUNDARY_CELL * boundary


def choose_layout(grid: RasterHeader | Dem, job: Job, ex: Execution, *,
                  model: ErrorModel | None = None, runs: int = 1,
                  quicklook: bool = True) -> RunLayout:
    """The run's layout, decided once (:mod:`terrain.layout`): the one asked for
    when ``ex`` names a block (or the job has no blocked mode); else the whole
    grid when it fits in memory, blocks of :data:`DEFAULT_BLOCK` when only
    they fit, and the whole grid when neither does (:func:`check_memory`
    then refuses it)."""
    options = candidates(grid.shape, ex.block, job=job, runs=runs)
    if len(options) == 1:
        return options[0]
    have = available_bytes()
    for layout in options:
        if estimate_run(grid, job, ex, model=model, runs=runs, quicklook=quicklook,
                        layout=layout).total <= have:
            return layout
    return options[0]


def check_memory(grid: RasterHeader | Dem, job: Job, ex: Execution | None = None, *,
                 model: ErrorModel | None = None, runs: int = 1, quicklook: bool = True,
                 force: bool = False, layout: RunLayout | None = None,
                 features: int = 0, held: int = 0) -> MemoryEstimate:
    """The run's :func:`estimate_run` (in ``layout``, with ``features``, see there);
    raises :class:`MemoryGuardError` when it exceeds the memory available (unless
    ``force``). ``held``: bytes this process holds already, which the estimate
    counts and the memory available no longer shows (a check made mid-run)."""
    check_field(grid, model)
    est = estimate_run(grid, job, ex, model=model, runs=runs, quicklook=quicklook, layout=layout,
                       features=features)
    have = available_bytes() + held
    source = getattr(grid, "source", "the DEM")
    if est.kernel > have and not force:
        raise MemoryGuardError(
            f"{source}: the correlated error's kernel for {{range_m}} {model.range_m:g} m needs "
            f"{_gib(est.kernel)} to compute (on a grid 16 ranges wide) but {_gib(have)} is "
            "available; give a shorter {range_m}", "range_m")
    if est.total > have and not force:
        raise MemoryGuardError(
            f"{source}: the run needs {est.describe()} for {est.cells:,} cells but "
            f"{_gib(have)} is available; use {{bbox}} for a smaller window, fewer "
            "{workers}, or {force}", "bbox", "workers", "force")
    return est


def describe_memory(grid: RasterHeader | Dem, job: Job, ex: Execution | None = None, *,
                    model: ErrorModel | None = None) -> str:
    """One line on the memory a run of ``job`` needs: the guard's own figure."""
    ex = ex if ex is not None else Execution()
    layout = plan_layout(grid.shape, ex.block, job=job)
    est = estimate_run(grid, job, ex, model=model, layout=layout)
    cells, value, _ = _grid(grid)
    parent, worker = job.memory_per_cell(value, cells=cells)
    if layout.blocked:
        text = (f"{est.describe()} for {ex.realisations} realisations (the guard's estimate; "
                f"{_gib(available_bytes())} available); ~{BLOCK_TASK} bytes per block cell "
                "per worker")
        if layout.one_block:
            text += "; the grid fits in one block, so blocks save nothing here"
        return text
    return (f"{est.describe()} for {ex.realisations} realisations (the guard's estimate; "
            f"{_gib(available_bytes())} available); the job itself: ~{worker} bytes per cell "
            f"per worker, {parent} in the accumulating process")


def grid_spacing(grid: RasterHeader | Dem) -> tuple[float, float] | None:
    """Mean cell height and width in metres, as the error sampler takes them
    (None for a grid without a transform)."""
    if hasattr(grid, "cell_metres"):
        w, h = grid.cell_metres()
        return float(np.mean(h)), float(np.mean(w))
    if getattr(grid, "transform", None) is None:
        return None
    a, b, _, d, e, f = grid.transform
    dx, dy = math.hypot(a, d), math.hypot(b, e)
    if grid.geographic:
        lat = d * grid.shape[1] / 2 + e * (np.arange(grid.shape[0]) + 0.5) + f
        mlon, mlat = metres_per_degree(lat)
        return float(np.mean(dy * mlat)), float(np.mean(dx * mlon))
    return dy * grid.linear_unit_m, dx * grid.linear_unit_m


def field_bytes(grid: RasterHeader | Dem, model: ErrorModel | None) -> tuple[int, int, int]:
    """A correlated error model's (kernel computation, kernel kept, one field
    tile drawn) bytes on ``grid`` (zeros for independent error); see
    :func:`terrain.noise.fields.kernel_memory`."""
    spacing = grid_spacing(grid) if model is not None and model.correlated else None
    if spacing is None:
        return 0, 0, 0
    check_range(model.range_m, spacing, grid.shape, getattr(grid, "source", "the DEM"))  # first:
    return kernel_memory(spacing, model.range_m, grid.shape)  # a range past the grid's is refused


def check_field(grid: RasterHeader | Dem, model: ErrorModel | None) -> None:
    """Refuse a correlation range longer than the grid (see
    :func:`terrain.noise.fields.check_range`)."""
    spacing = grid_spacing(grid) if model is not None and model.correlated else None
    if spacing is not None:
        check_range(model.range_m, spacing, grid.shape, getattr(grid, "source", "the DEM"))


def scratch_bytes(grid: RasterHeader | Dem, job: Job, ex: Execution) -> dict[str, int]:
    """Disk a blocked (out-of-core) run writes, in bytes: ``scratch`` under TMPDIR
    (the DEM as read, region labels, the realisation drawn, and for
    depressions what the first pass keeps for the second and -- without a
    checkpoint -- the ponding counts) and ``checkpoint``, the ponding counts
    kept beside a checkpoint. Counted from the files' types (README, "Disk"):
    the counts at their uncompressed 8 bytes per cell."""
    cells, value, _ = _grid(grid)
    depressions = getattr(job, "kind", None) == "depressions"
    counts = 8 * cells if depressions else 0
    beside = counts if ex.checkpoint is not None or ex.counts is not None else 0
    scratch = (value + 4 + 4 + (4 if depressions else 0)) * cells + (counts - beside)
    return {"scratch": scratch, "checkpoint": beside}


def check_disk(grid: RasterHeader | Dem, job: Job, ex: Execution, layout: RunLayout) -> None:
    """Refuse an out-of-core run (``layout.on_disk``) whose scratch files (under
    TMPDIR) or counts (beside the checkpoint) would not fit on their disks,
    before anything is read.

    Raises
    ------
    OutputError
        How much is needed, where, and what is free.
    """
    if not layout.on_disk:
        return
    need = scratch_bytes(grid, job, ex)
    what = (f"{grid.cells if hasattr(grid, 'cells') else _grid(grid)[0]:,} cells of scratch "
            "files (the DEM, region labels, a realisation"
            + (", depression levels and counts)" if getattr(job, "kind", None) == "depressions"
               else ")"))
    check_scratch_space(scratch_parent(), need["scratch"], what)
    if need["checkpoint"] and ex.counts is None:  # a URL's space is not ours to see
        import os

        folder = os.path.dirname(os.path.abspath(ex.checkpoint))
        check_scratch_space(folder, need["checkpoint"], "the per-cell counts kept beside the "
                            "checkpoint", hint="free some space or choose another {checkpoint} "
                            "folder", params=("checkpoint",))
