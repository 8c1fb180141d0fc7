"""Blocked mode: each realisation computed block by block, its blocks run as tasks.

In the default mode a worker computes whole realisations, so each worker
holds the whole grid. In blocked mode (``run_ensemble(..., block=N)``,
``--block N``) the realisations are taken one after another and the
*blocks* of each run as tasks on the chosen backend -- this process, local
processes or a Dask cluster -- through
the job's ``realise_blocked`` (:class:`~terrain.runner.protocols.BlockedJob`), so a worker holds one
block (plus halo) at a time and the global step only the block boundaries.
The log is the same bit for bit, hence the layers: a run gives the same
layers with or without ``--block``, with any block size, workers or
backend.

With local processes the tasks read the DEM and the unperturbed DEM's
region labels from ``.npy`` files written once into a scratch folder
(memory-mapped per read), and each realisation is drawn once, block by
block, into a third file there that the passes read (4 bytes per cell on
disk), so a task pickles a few hundred bytes. The folder is removed when
the run ends.

On Dask the tasks are pure (``realise_blocked(..., shipped=True)``): each
is sent its window's values (the DEM with its halo; for the second pass of
depressions the region labels too) with the task and returns its
block's summary, or its counts and sums, through the scheduler; the error
is drawn on the worker from the counter-based streams, and the second pass
computes the block's local step again instead of reading what the first
pass kept. Nothing goes through a folder, so workers need no file system
shared with this process (no shared ``TMPDIR``).

With a DEM kept on disk (:class:`~terrain.dem.DiskDem`) the run is out of
core: the DEM and region labels are read from their files, and the
ponding counts of depressions live in a :class:`~terrain.io.CountStore`
that each realisation adds to block by block, so this process holds the
log and one block at a time. With a DEM in memory it holds what the
default mode holds (the DEM, the region labels and the ponding counts).
"""

from __future__ import annotations

import builtins
import collections
import contextlib
import functools
import itertools
import os
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import CairnError, WorkerError
from ..io import NpyWindows, save_npy, scratch_file, scratch_folder
from ..noise import ErrorSampler
from .backends import (
    DaskWatch,
    broken_pool,
    close_dask,
    dask_client,
    quiet_dask,
    result_watching,
    spawning,
    stop_pool,
    take_pool,
)

__all__ = ["BlockedContext", "blocked_runner", "scratch_arrays"]

@dataclass
class BlockedContext:
    """What the blocked runner needs: the DEM and region labels (arrays, or
    ``.npy`` paths for tasks in other processes), the sampler, the resolved
    job, the seed, the block side, the file each realisation is drawn into
    and (out-of-core depressions) the on-disk ponding counts each
    realisation adds to directly."""

    dem: Any
    regions: Any
    sampler: ErrorSampler
    job: Any
    seed: int
    block: int
    realisation: str | None = None
    ponding: Any = None
    reference: float = 0.0  # subtracted from ``dem`` (a DEM on disk, as read)
    remote: Any = None  # the DEM's file read by window (terrain.io.dem_windows), for Dask tasks


@contextlib.contextmanager
def scratch_arrays(z: np.ndarray, labels: np.ndarray, *, to_files: bool, on_disk: bool = False,
                   scratch: str | os.PathLike | None = None):
    """Yield ``(dem, regions, realisation)``: the arrays themselves and None, or
    (``to_files``) paths of ``.npy`` copies in a new scratch folder under
    ``scratch`` (default: the system's temporary folder) and the path each
    realisation is drawn into; the folder is removed on exit. Arrays already
    on disk (``on_disk``: :class:`~terrain.io.NpyWindows` of an out-of-core
    run, :attr:`terrain.layout.RunLayout.on_disk`) are passed by path, not copied."""
    if not to_files and not on_disk:
        yield z, labels, None
        return
    cells = int(np.prod(z.shape))
    need = 4 * cells if on_disk else int(z.nbytes) + int(np.asarray(labels).nbytes) + 4 * cells
    with scratch_folder(scratch, need=need, what=f"{cells:,} cells of scratch files (the DEM, "
                        "region labels and a realisation)") as folder:
        if on_disk:
            yield z.path, labels.path, scratch_file(folder, "realisation")
            return
        yield (save_npy(scratch_file(folder, "dem"), z),
               save_npy(scratch_file(folder, "regions"), labels),
               scratch_file(folder, "realisation"))


def _ahead(submit, fn, items, ahead: int, result=None):
    """``fn`` over ``items`` through ``submit(fn, item) -> future``, results in
    order, at most ``ahead`` tasks submitted and not yet taken: results are
    held only until the caller takes them (a block's counts are 4 bytes per
    block cell). ``result(future)`` waits for one (default: ``future.result()``)."""
    pending: collections.deque = collections.deque()
    it = iter(items)
    for item in itertools.islice(it, ahead):
        pending.append(submit(fn, item))
    while pending:
        fut = pending.popleft()
        result_ = fut.result() if result is None else result(fut)
        for item in itertools.islice(it, 1):
            pending.append(submit(fn, item))
        yield result_


def _probe_read(reader: Any, rows: int, cols: int, reference: float) -> np.ndarray | None:
    """On a worker: the DEM's top-left window read from ``reader``, shifted
    by ``reference`` to float32 as a task shifts it; None if it cannot be read."""
    try:
        z = np.asarray(reader[0:rows, 0:cols])
    except Exception:
        return None
    return (z - reference if reference else z).astype(np.float32)


def _workers_read(client, reader: Any, dem: Any, reference: float, shift: float) -> bool:
    """True when every worker of ``client`` reads the DEM's top-left window
    (up to 64 x 64 cells) from ``reader`` (shifted by ``shift``) as this
    process has it in ``dem`` (an array or ``.npy`` path, shifted by
    ``reference``): then the tasks may read their windows themselves. A worker
    that cannot reach the file, or finds other values there, says no."""
    rows, cols = (min(64, int(n)) for n in reader.shape)
    grid = NpyWindows(dem) if isinstance(dem, str) else dem
    want = np.asarray(grid[0:rows, 0:cols])
    want = (want - reference if reference else want).astype(np.float32)
    try:
        got = client.run(_probe_read, reader, rows, cols, shift)
    except Exception:
        return False
    return bool(got) and all(g is not None and np.array_equal(g, want, equal_nan=True)
                             for g in got.values())


@contextlib.contextmanager
def _block_map(backend: str, workers: int, scheduler: str | None, stop=lambda: False):
    """``(map, reads)``: ``map(fn, windows)`` running the block tasks on
    ``backend``, an iterator of the results in order, a few tasks ahead of
    the caller; and on Dask ``reads(reader, dem, reference, shift)``
    (:func:`_workers_read`), else None. On Dask a wait never hangs
    (:class:`~terrain.runner.backends.DaskWatch`): ``stop()`` turning true
    (Ctrl-C, SIGTERM) interrupts it at once."""
    if backend == "serial":
        yield builtins.map, None
        return
    if backend == "processes":
        from concurrent.futures.process import BrokenProcessPool

        pool = take_pool(workers)
        state = {"started": False}

        def submit(fn, item):
            with spawning():  # a submit may start a process; the caller's code runs unheld
                return pool.submit(fn, item)

        def pmap(fn, items):
            try:
                yield from _ahead(submit, fn, items, 2 * workers,
                                  functools.partial(result_watching, pool))
            except BrokenProcessPool:
                if stop():  # a worker ended by the signal the run is stopping for
                    raise KeyboardInterrupt from None
                raise broken_pool(state["started"]) from None
            state["started"] = True

        try:
            yield pmap, None
        finally:
            stop_pool(pool, {}, broken=True)  # its workers killed and reaped, signals held
        return
    with quiet_dask():
        client, cluster = dask_client(scheduler, workers)
        watch = DaskWatch(client, scheduler, stop)
        try:
            def submit(fn, item):
                # a pure task carries its window's values (a few MB for large blocks); not
                # scattered first, since a scatter waits for workers where a submit does not
                with warnings.catch_warnings():
                    warnings.filterwarnings("ignore", message="Sending large graph")
                    return client.submit(fn, item, pure=False, retries=3)

            def dmap(fn, items):
                try:
                    yield from _ahead(submit, fn, items, 2 * workers, watch.result)
                except Exception as exc:
                    if isinstance(exc, (KeyboardInterrupt, CairnError)):
                        raise
                    raise WorkerError(f"a block task failed on the Dask cluster "
                                      f"({type(exc).__name__}: {exc})") from None
            yield dmap, functools.partial(_workers_read, client)
        finally:
            close_dask(client, cluster)


def blocked_runner(ctx: BlockedContext, plan, backend: str, workers: int,
                   scheduler: str | None, stop) -> Iterator[tuple]:
    """The backend generator of blocked mode: yields ``(a, b, log, counts)``
    for chunks of realisations taken from ``plan`` while ``stop()`` is
    false, each realisation's blocks mapped over ``backend``."""
    job = ctx.job  # a BlockedJob (terrain.runner.protocols): it realises block by block
    shape = tuple(ctx.sampler.shape)
    with _block_map(backend, workers, scheduler, stop) as (bmap, reads):
        remote = None  # Dask tasks read the DEM's file themselves when every worker reads it so
        if reads is not None and ctx.remote is not None and \
                reads(ctx.remote, ctx.dem, ctx.reference, float(getattr(job, "reference", None) or 0.0)):
            remote = ctx.remote
        for a, b in plan:
            if stop():
                return
            if ctx.ponding is not None:  # counts on disk: added there, block by block
                counts, grid = {}, ctx.ponding
            else:
                counts = job.new_counts(shape[0] * shape[1])
                ponding = counts.get("ponding")
                grid = ponding.reshape(shape) if ponding is not None else None
            logs = [job.realise_blocked(ctx.dem, ctx.sampler, ctx.seed, i, block=ctx.block,
                                        regions=ctx.regions, ponding=grid, map=bmap,
                                        scratch=ctx.realisation, reference=ctx.reference,
                                        shipped=backend == "dask", remote=remote)
                    for i in range(a, b)]
            yield a, b, {k: np.concatenate([g[k] for g in logs]) for k in logs[0]}, counts
