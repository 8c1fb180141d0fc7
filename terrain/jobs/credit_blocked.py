"""A peaks or depressions realisation computed block by block.

:func:`realise_blocked` returns bit for bit the log of
:func:`terrain.jobs.credit.realise` (and adds the same ponding counts)
while no step holds more than one block of the perturbed DEM: realisation
``i`` is read window by window from :class:`PerturbedSource` (the DEM's
window plus the error of :meth:`~terrain.noise.ErrorSampler.draw_window`,
which gives every cell the same error whatever window it is drawn in), the
pairs come from the blocked engine (:mod:`terrain.engine.blocked`: local
steps, glue, collect), and for depressions a second pass gives each cell
its fill level and depression depth (:func:`~terrain.engine.blocked.levels_from`,
reading the :class:`~terrain.engine.blocked.LevelInputs` each block's local
step kept) from which the ponding counts and the ponded area and volume per
region are counted block by block (fixed-point sums, exact in any order).

The local and second-pass steps are tasks run through ``map`` (a process
pool's or a Dask client's), each reading its own window from paths, so a
task pickles a few hundred bytes; the level inputs go from the first pass
to the second as one ``.npz`` per block in the scratch folder beside the
drawn realisation (4 bytes per cell on disk), or in memory when the tasks
run here on arrays. Memory per task: the block plus halo (4 bytes per
cell), its error (4, and the correlated field's tiles), the local step's
12-15 bytes per cell (40-44 on white noise) plus the level inputs, or the
second pass's 25; the glue's is stated per boundary cell in
:mod:`terrain.engine.blocked`.

References
----------
.. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees. Proc.
   PPoPP '13, 93-102. doi:10.1145/2442516.2442526
.. [2] Barnes, R. (2016). Parallel Priority-Flood depression filling for
   trillion cell digital elevation models on desktops or clusters.
   Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import builtins
import contextlib
import functools
import math
import os
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..dem import Dem
from ..engine.blocked import (
    LevelInputs,
    Window,
    as_float,
    collect,
    glue,
    halo,
    levels_from,
    local,
    local_and_levels,
    read_block,
    windows,
)
from ..engine.persistence import count_ponding, pits_and_levels
from ..io import (
    NpyWindows,
    create_npy,
    levels_file,
    load_scratch,
    save_scratch,
    scratch_file,
    scratch_folder,
    write_npy_window,
)
from ..layout import RunLayout, layout_of
from ..noise import ErrorSampler
from ..pairlog import AREA_QUANTUM, VOLUME_QUANTUM, pond_log
from .relations import pair_log, summit_isolation
from .thresholds import realisation_threshold

__all__ = ["PerturbedSource", "materialise", "realise_blocked", "ponding_totals", "grid_values_at",
           "WindowData", "Draw", "unperturbed_ponding"]


@dataclass(frozen=True)
class PerturbedSource:
    """Realisation ``i`` of the DEM, read by window: ``source[r0:r1, c0:c1]``
    is the DEM's window (float32, NaN on nodata) plus realisation ``i``'s
    error there, the very float32 sum :func:`~terrain.jobs.credit.realise`
    makes on the whole grid.

    ``dem`` is an array or a path to a ``.npy`` file (opened memory-mapped
    per read, so the source pickles as a path); ``reference`` is subtracted
    from its values before they become float32 (a DEM on disk holds the
    elevations as read; see :meth:`terrain.dem.Dem.reference`).
    """

    dem: Any
    sampler: ErrorSampler
    seed: int
    i: int
    reference: float = 0.0

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.sampler.shape)

    def __getitem__(self, key) -> np.ndarray:
        rs, cs = key
        r0, r1, _ = rs.indices(self.shape[0])
        c0, c1, _ = cs.indices(self.shape[1])
        e = self.sampler.draw_window(self.seed, self.i, r0, r1, c0, c1)
        z = np.asarray(_array(self.dem)[r0:r1, c0:c1])
        e += (z - self.reference if self.reference else z).astype(np.float32)
        return e


def _array(a: Any):
    """An array argument: the array itself, or a ``.npy`` path read by window."""
    return NpyWindows(a) if isinstance(a, str) else a


def _draw_task(src: PerturbedSource, out: Any, window: Window) -> None:
    """Write realisation ``src.i`` on one window into ``out`` (an array or a ``.npy`` path)."""
    r0, r1, c0, c1 = window
    vals = src[r0:r1, c0:c1]
    if isinstance(out, str):
        write_npy_window(out, r0, c0, vals)
    else:
        out[r0:r1, c0:c1] = vals


def materialise(src: PerturbedSource, wins, out: Any, map: Callable[..., Iterable]):
    """Realisation ``src.i`` drawn once, window by window, into ``out`` (a float32
    array, or the path of a ``.npy`` file, made here if need be), so the passes
    over it read values instead of drawing the error again for every window and
    its halo (a correlated field's halo would need its neighbours' field
    tiles); returns what the passes read."""
    if isinstance(out, str):
        create_npy(out, src.shape, np.float32)
    for _ in map(functools.partial(_draw_task, src, out), wins):
        pass
    return _array(out)


def _interior(vals: np.ndarray, window: Window) -> np.ndarray:
    """The window's own cells of ``vals``, the values of the window plus its halo."""
    r, c = window.r0 - max(window.r0 - 1, 0), window.c0 - max(window.c0 - 1, 0)
    return vals[r:r + window.r1 - window.r0, c:c + window.c1 - window.c0]


def _local_task(src: Any, kind: str, connectivity: int, thr: float, levels: bool, keep: Any,
                window: Window):
    """The local step of one block (``kind`` "peaks" or "pits"), the block's
    lowest value (peaks: for the base; else inf) and, with ``levels``, its
    :class:`~terrain.engine.blocked.LevelInputs` for the second pass of
    depressions: returned, or (``keep`` a folder) saved there and their path
    returned."""
    vals = read_block(src, window, src.shape)
    inputs = None
    if not levels:
        s = local(vals, window, src.shape, kind=kind, connectivity=connectivity,
                  min_persistence=thr)
    else:
        s, inputs = local_and_levels(vals, window, src.shape, connectivity=connectivity,
                                     min_persistence=thr)
        if keep is not None:
            inputs = save_scratch(levels_file(keep, window.r0, window.c0),
                                  inputs.arrays())
    lowest = math.inf
    if kind == "peaks":  # the base of the highest summit
        inner = _interior(vals, window)
        valid = inner[np.isfinite(inner)]
        lowest = float(valid.min()) if valid.size else math.inf
    return s, lowest, inputs


def _pond_task(src: Any, regions: Any, area_row: np.ndarray, thr: float, resolution, item):
    """Ponding of one block (``item``: its window and level inputs, or their
    path): its counts, and the ponded area and volume per region in fixed
    point, as (regions, area, volume) of the wet regions."""
    window, inputs = item
    if isinstance(inputs, str):
        inputs = LevelInputs(**load_scratch(inputs))
    lv, dp = levels_from(inputs, window, resolution)
    r0, r1, c0, c1 = window
    zb = np.ascontiguousarray(as_float(np.asarray(src[r0:r1, c0:c1]))).reshape(-1)
    reg = np.ascontiguousarray(_array(regions)[r0:r1, c0:c1]).reshape(-1)
    if reg.dtype not in (np.int32, np.int64):  # region labels are int32 (no copy for them)
        reg = reg.astype(np.int64)
    cnt = np.zeros(zb.size, np.int32)
    k = int(reg.max()) + 1 if reg.size else 1
    area, vol = np.zeros(k, np.int64), np.zeros(k, np.int64)
    count_ponding(zb, inputs.dest >= 0, -(inputs.dest + 1), lv, dp, thr, cnt, reg,
                  np.ascontiguousarray(area_row[r0:r1]), c1 - c0, area, vol)
    wet = np.flatnonzero(area > 0)
    return cnt.reshape(r1 - r0, c1 - c0), wet, area[wet], vol[wet]


@dataclass(frozen=True)
class WindowData:
    """A grid's values on one window, indexed in the grid's own coordinates:
    ``data[r0:r1, c0:c1]`` for any box inside the window whose top-left cell
    is (``r0``, ``c0``). What a pure block task is sent instead of a path."""

    values: np.ndarray
    r0: int
    c0: int

    def __getitem__(self, key) -> np.ndarray:
        rs, cs = key
        return self.values[rs.start - self.r0:rs.stop - self.r0, cs.start - self.c0:cs.stop - self.c0]


@dataclass(frozen=True)
class Draw:
    """What a pure block task needs to draw realisation ``i`` on its window:
    the sampler (counter-based streams: the same error whatever window or
    worker draws it), the seed, the realisation and the DEM's reference;
    and ``dem``, the DEM the task reads its window from itself (a
    :class:`~terrain.io.RasterWindows`, pickled as the file's path and
    header; ``reference`` is then the job's), or None when the task is
    sent its window's values."""

    sampler: ErrorSampler
    seed: int
    i: int
    reference: float = 0.0
    dem: Any = None

    def source(self, dem: WindowData | None) -> PerturbedSource:
        """Realisation ``i`` on the DEM window ``dem`` (None: read from ``self.dem``)."""
        return PerturbedSource(self.dem if dem is None else dem, self.sampler, self.seed, self.i,
                               self.reference)


def _shipped_local(draw: Draw, kind: str, connectivity: int, thr: float, levels: bool, spec):
    """The local step of one block as a pure task: ``spec`` is the window and
    the DEM's values on it and its halo; the error is drawn here. Returns the
    summary (with ``levels``, made for the second pass of depressions) and
    the block's lowest value (see :func:`_local_task`); the level inputs are
    not kept: the second pass makes them again."""
    window, dem = spec
    s, lowest, _ = _local_task(draw.source(dem), kind, connectivity, thr, levels, None, window)
    return s, lowest


def _shipped_pond(draw: Draw, connectivity: int, thr: float, area_row: np.ndarray, resolution,
                  spec):
    """The second pass of depressions on one block as a pure task: ``spec`` is
    the window, the DEM's values on it and its halo and the region labels on
    it. The block's local step is computed again from the drawn values (its
    level inputs are never kept between the passes), so nothing travels but
    the window's values in and the block's counts and sums out."""
    window, dem, regions = spec
    src = draw.source(dem)
    vals = read_block(src, window, src.shape)
    _, inputs = local_and_levels(vals, window, src.shape, connectivity=connectivity,
                                 min_persistence=thr)
    h = halo(window, src.shape)
    return _pond_task(WindowData(vals, h.r0, h.c0), regions, area_row, thr, resolution,
                      (window, inputs))


def _shipped_specs(dem: Any, wins, shape, regions: Any = None):
    """The specs of the pure tasks, one window at a time: the window and the
    DEM's values on it and its halo (None when ``dem`` is None: the task
    reads them itself; see :class:`Draw`), and the region labels on the window."""
    grid = None if dem is None else _array(dem)
    for w in wins:
        h = halo(w, shape)
        data = None if grid is None else WindowData(np.asarray(grid[h.r0:h.r1, h.c0:h.c1]),
                                                    h.r0, h.c0)
        if regions is None:
            yield w, data
        else:
            labels = np.asarray(_array(regions)[w.r0:w.r1, w.c0:w.c1])
            yield w, data, WindowData(labels, w.r0, w.c0)


def realise_blocked(dem: Any, sampler: ErrorSampler, job: Any, seed: int, i: int, *,
                    block: int, regions: Any, ponding: np.ndarray | None = None,
                    map: Callable[..., Iterable] = builtins.map, scratch: Any = None,
                    reference: float = 0.0, shipped: bool = False, remote: Any = None) -> dict:
    """Realisation ``i`` block by block: the log of :func:`~terrain.jobs.credit.realise`.

    Parameters
    ----------
    dem : (rows, cols) float32 array with NaN on nodata, or a path to one saved as ``.npy``
    sampler, job, seed, i
        As :func:`~terrain.jobs.credit.realise` (``job`` a resolved ``CreditJob``).
    block : int
        Block side in cells.
    regions : (rows, cols) int array or ``.npy`` path
        The unperturbed DEM's region labels (``job.regions.labels``).
    ponding : (rows, cols) int32 array, optional
        For depressions, incremented in place, block by block, where the
        cell is ponded (any array taking slice assignment: a memmap too; or
        a :class:`~terrain.io.CountStore`, whose ``add`` is told ``i``).
    map : callable
        ``map(fn, windows)`` returning results in order (a pool's or a Dask
        client's); the default runs the blocks here, one after another.
    scratch : str, optional
        Path of a ``.npy`` file to draw the realisation into (see
        :func:`materialise`). Default: a float32 array in this process when
        ``dem`` is an array, a temporary file beside ``dem`` when it is a path
        (the tasks may then run in other processes).
    reference : float
        Subtracted from ``dem``'s values (a DEM on disk, as read) to give the
        float32 frame of ``job.reference``; 0 when ``dem`` is already in it.
    shipped : bool
        Run the blocks as pure tasks (a Dask cluster): each task is sent its
        window's values (:class:`WindowData`) and draws the error there; the
        second pass of depressions computes the block's local step again;
        nothing is written to or read from a folder (``scratch`` unused), so
        the workers need no file system shared with this process. The
        results are the same bit for bit.
    remote : object read by window, optional
        With ``shipped``: the DEM as the tasks read it themselves, its values
        as the DEM's file gives them (:class:`~terrain.io.RasterWindows`,
        made by :func:`~terrain.io.dem_windows`; ``job.reference`` is
        subtracted, as from a DEM on disk), so no DEM values are sent with a
        task, only the file's path and header; the region labels of the
        second pass of depressions still are. ``dem`` is then read here only
        for summits' isolation (peaks). The results are the same bit for bit.

    Returns
    -------
    dict
        Exactly what :func:`~terrain.jobs.credit.realise` returns.

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526
    """
    src = PerturbedSource(dem, sampler, int(seed), int(i), float(reference))
    shape = src.shape
    wins = windows(shape, block)
    if shipped:
        draw = Draw(sampler, int(seed), int(i), float(reference)) if remote is None else \
            Draw(sampler, int(seed), int(i), float(job.reference or 0.0), remote)
        return _realise_shipped(dem, float(reference), wins, draw, job, regions, ponding, map)
    with contextlib.ExitStack() as scope:
        if scratch is None and isinstance(dem, str):  # tasks elsewhere: a scratch file
            folder = scope.enter_context(scratch_folder(os.path.dirname(os.path.abspath(dem))))
            scratch = scratch_file(folder, "realisation")
        src = materialise(src, wins, np.empty(shape, np.float32) if scratch is None else scratch,
                          map)
        keep = os.path.dirname(os.path.abspath(scratch)) if isinstance(scratch, str) else None
        return _realise_on(src, wins, sampler, job, seed, i, regions, ponding, map, keep)


def _realise_on(src, wins, sampler, job, seed, i, regions, ponding, map, keep) -> dict:
    """:func:`realise_blocked` on the drawn realisation ``src``; the level
    inputs of depressions kept in the folder ``keep`` (None: in memory)."""
    thr = realisation_threshold(job, sampler.kernel, seed, i)
    levels = job.kind == "depressions" and ponding is not None
    out = list(map(functools.partial(_local_task, src, "peaks" if job.kind == "peaks" else "pits",
                                     job.connectivity, thr, levels, keep), wins))
    summaries = [s for s, _, _ in out]
    lowest = min((v for _, v, _ in out), default=math.inf)
    kept = [x for _, _, x in out]
    del out

    def ponds(res):
        task = functools.partial(_pond_task, src, regions, job.area_row, thr, res)
        return map(task, zip(wins, kept))

    return _log_of(summaries, lowest, ponds, tuple(int(x) for x in src.shape), wins, job, thr, i,
                   regions, ponding, lambda: src)


def _realise_shipped(dem, reference, wins, draw: Draw, job, regions, ponding, map) -> dict:
    """:func:`realise_blocked` with pure tasks (``shipped``); ``dem`` and
    ``reference`` as this process reads the DEM."""
    shape = tuple(int(x) for x in draw.sampler.shape)
    thr = realisation_threshold(job, draw.sampler.kernel, draw.seed, draw.i)
    kind = "peaks" if job.kind == "peaks" else "pits"
    levels = job.kind == "depressions" and ponding is not None
    sent = dem if draw.dem is None else None  # the DEM's values, unless the tasks read them
    out = list(map(functools.partial(_shipped_local, draw, kind, job.connectivity, thr, levels),
                   _shipped_specs(sent, wins, shape)))
    summaries = [s for s, _ in out]
    lowest = min((v for _, v in out), default=math.inf)
    del out

    def ponds(res):
        task = functools.partial(_shipped_pond, draw, job.connectivity, thr, job.area_row, res)
        return map(task, _shipped_specs(sent, wins, shape, regions))

    with contextlib.ExitStack() as scope:
        def surface():  # summits' isolation reads the realisation: drawn here, in this process
            target = np.empty(shape, np.float32)
            if isinstance(dem, str):
                folder = scope.enter_context(scratch_folder(os.path.dirname(os.path.abspath(dem))))
                target = scratch_file(folder, "realisation")
            src = PerturbedSource(dem, draw.sampler, draw.seed, draw.i, reference)
            return materialise(src, wins, target, builtins.map)

        return _log_of(summaries, lowest, ponds, shape, wins, job, thr, draw.i, regions, ponding,
                       surface)


def _log_of(summaries, lowest, ponds, shape, wins, job, thr, i, regions, ponding,
            surface) -> dict:
    """The realisation's log from its blocks' summaries: the glue, the pairs
    and (depressions with ``ponding``) the second pass, ``ponds(resolution)``
    giving each block's counts and sums in window order; ``surface()`` gives
    the realisation's raster, read by summits' isolation."""
    res = glue(summaries)
    p = collect(summaries, res, min_persistence=thr)
    summaries.clear()  # the caller's list: nothing after the glue reads it
    log = {}
    if job.kind == "peaks":
        # the highest summit is measured to the base, or lower if the realisation is
        floor = min(job.base - (job.reference or 0.0), lowest) if p.essential.any() else 0.0
        death_value = np.where(p.essential, floor, p.death_value)
    else:
        death_value = p.death_value
        if ponding is not None:
            def add(w, cnt):
                if hasattr(ponding, "add"):  # counts on disk, stamped per block
                    ponding.add(w, i, cnt)
                else:
                    ponding[w.r0:w.r1, w.c0:w.c1] += cnt

            log = pond_log(i, *_sum_ponds(ponds(res), wins, len(job.regions) + 1, add))
    iso = summit_isolation(surface(), job) if job.kind == "peaks" else None  # relations
    return {**pair_log(p, death_value, thr, i, math.prod(shape),
                       lambda b: grid_values_at(regions, b, shape[1]), iso), **log}


def ponding_totals(source: Any, regions: Any, area_row: np.ndarray, threshold: float, *,
                   connectivity: int, k: int, block: int = 1024,
                   map: Callable[..., Iterable] = builtins.map,
                   keep: str | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Ponded area and volume per region of the surface ``source`` (read by
    window, NaN on nodata), block by block, in the fixed point of
    :func:`~terrain.engine.persistence.count_ponding` (``k`` regions + 1):
    the very sums it makes on the whole grid. Between the passes each
    block's level inputs (4 bytes per cell) are kept in memory, or in a
    scratch folder made under ``keep`` and removed at the end.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling for
       trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    wins = windows(tuple(source.shape), block)
    with contextlib.ExitStack() as scope:
        folder = None if keep is None else scope.enter_context(scratch_folder(keep))
        out = list(map(functools.partial(_local_task, source, "pits", connectivity, threshold,
                                         True, folder), wins))
        res = glue([s for s, _, _ in out])
        kept = [x for _, _, x in out]
        del out
        return _pond_sums(source, regions, area_row, threshold, res, wins, kept, k, map)


def _pond_sums(src, regions, area_row, thr, res, wins, kept, k, map, add=None):
    """The second pass of depressions over ``wins`` (``kept``: each block's
    level inputs or their path): ponded area and volume per region (fixed
    point, ``k`` entries), each block's counts handed to ``add(window, counts)``."""
    task = functools.partial(_pond_task, src, regions, area_row, thr, res)
    return _sum_ponds(map(task, zip(wins, kept)), wins, k, add)


def _sum_ponds(results, wins, k, add=None):
    """Ponded area and volume per region (fixed point, ``k`` entries) summed
    over the blocks' ``results`` (in window order), each block's counts handed
    to ``add(window, counts)``."""
    area, vol = np.zeros(k, np.int64), np.zeros(k, np.int64)
    for w, (cnt, wet, a, v) in zip(wins, results):
        if add is not None:
            add(w, cnt)
        area[wet] += a
        vol[wet] += v
    return area, vol


def grid_values_at(regions: Any, cells: np.ndarray, nc: int) -> np.ndarray:
    """Values (int32: region labels) of a grid at flat ``cells``, read 256 rows
    at a time (an array, or anything read by window)."""
    if isinstance(regions, np.ndarray):
        return regions.reshape(-1)[cells].astype(np.int32)
    out = np.empty(cells.size, np.int32)
    rows = cells // nc
    order = np.argsort(rows, kind="stable")
    srt = rows[order]
    src = _array(regions)
    lo = 0
    while lo < order.size:
        r0 = int(srt[lo])
        hi = int(np.searchsorted(srt, r0 + 256))
        sel = order[lo:hi]
        out[sel] = np.asarray(src[r0:r0 + 256, :])[rows[sel] - r0, cells[sel] % nc]
        lo = hi
    return out


def unperturbed_ponding(dem: Dem, job, layout: RunLayout | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Ponded area (m^2) and storage volume (the DEM's vertical unit x m^2; times
    ``dem.metres_per_unit`` for m^3) of every region on the DEM as given,
    indexed by region id (index 0: cells in no region).

    A cell is ponded when it lies below its depression's spill level and the
    depression is at least the job's cut-off deep; its volume is the depth
    to the filled level times the cell's area. On a DEM a water surface is
    the floor, so this is storage above the surface the DEM captured. A DEM
    on disk is worked block by block (``layout.given_block``; default:
    :func:`~terrain.layout.layout_of` the DEM).
    """
    k = len(job.regions) + 1
    block = (layout if layout is not None else layout_of(dem)).given_block
    if block is not None:
        area, volume = ponding_totals(dem.z, job.regions.labels, job.area_row, job.threshold,
                                      connectivity=job.connectivity, k=k,
                                      block=block, keep=dem.scratch)
        return area * AREA_QUANTUM, volume * VOLUME_QUANTUM
    _, fill = pits_and_levels(dem.z, connectivity=job.connectivity, mask=dem.nodata)
    area, volume = np.zeros(k, np.int64), np.zeros(k, np.int64)
    count_ponding(fill.zf, fill.valid, fill.labels, fill.level, fill.depth, job.threshold,
                  np.zeros(fill.zf.size, np.int32), job.regions.labels.reshape(-1),
                  job.area_row, dem.shape[1], area, volume)
    return area * AREA_QUANTUM, volume * VOLUME_QUANTUM
