"""Running an ensemble of realisations: the one public entry point.

Realisation ``i`` draws every random number from its own stream
(:func:`terrain.noise.realisation_rng`) and its log is folded into the
accumulator strictly in realisation order, so a run's layers are bit for bit
the same on one core, N local processes or a Dask cluster, for any
chunking, and after any number of interruptions and resumptions.

Perturb-and-average: the layers are Monte Carlo estimates of the
convolution of the (unstable) attribution with the error kernel, which is
what makes them Lipschitz-stable in the input.

References
----------
.. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
   Analysis. Chapman & Hall (kernel smoothing by convolution).
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ..dem import Dem
from ..errors import MemoryGuardError, OptionError, Terminated
from ..io import (
    CountStore,
    available_memory,
    check_counts_url,
    count_store_file,
    dem_windows,
    hold_checkpoint,
    release_freed_memory,
    remove_orphan_scratch,
)
from ..layout import RunLayout, check_block, layout_of
from ..noise import ErrorModel, ErrorSampler
from ..noise.fields import check_range
from .backends import (
    BACKENDS,
    Context,
    check_scheduler_address,
    refuse_in_bootstrapping_child,
    refuse_unguarded,
)
from .blocked import BlockedContext, blocked_runner, scratch_arrays
from .checkpoint import (
    check_resume,
    counts_path,
    load_checkpoint,
    prepare_checkpoint,
    run_identity,
    run_params,
    save_checkpoint,
)
from .plan import InOrder, StopRule, chunk_size, chunks

__all__ = ["run_ensemble", "RunResult", "RunInterrupted", "Execution"]


class RunInterrupted(KeyboardInterrupt):
    """Ctrl-C (or SIGTERM) during realisations; ``done`` realisations are in
    ``checkpoint``; ``signal`` is the signal number (2 or 15)."""

    def __init__(self, done: int, checkpoint: str | None, signal: int = 2):
        super().__init__(done, checkpoint, signal)
        self.done = done
        self.checkpoint = checkpoint
        self.signal = signal


@dataclass(frozen=True)
class RunResult:
    """A finished run: layers with standard errors, the log and what defined it.

    Attributes
    ----------
    dem : Dem
    job : the resolved job (every default filled in)
    model : ErrorModel
    layers : mapping
        Layer name -> (estimate, standard error), float64 arrays on the grid
        (a catchment run computes each layer from its counts when read).
    log : dict
        The per-realisation log (for peaks and depressions the pair log, see
        :data:`terrain.jobs.credit.LOG_FIELDS`).
    n : int
        Realisations done.
    params : dict
        Everything that defines the run's realisations (checkpoints).
    info : dict
        Backend, workers, timings, defaults used, whether adaptive stopping fired.
    layout : RunLayout
        Whole grid or blocks, in memory or on disk (:mod:`terrain.layout`).
    """

    dem: Dem
    job: object
    model: ErrorModel
    layers: dict
    log: dict
    n: int
    params: dict
    info: dict = field(default_factory=dict)
    layout: RunLayout = field(default_factory=RunLayout)


def _terminate(signum, frame):
    raise Terminated()


def _catch_sigint(flag: dict) -> Callable[[], None]:
    """While a run is in progress, Ctrl-C and SIGTERM only set ``flag["interrupted"]``
    (to the signal number).

    The run then stops at the next chunk boundary, saves its checkpoint and
    raises :class:`RunInterrupted` (an interrupt inside compiled code would
    otherwise surface as a SystemError). A second Ctrl-C interrupts at once
    (KeyboardInterrupt), and so does a second SIGTERM
    (:class:`~terrain.errors.Terminated`): it once took the signal's default
    action, which killed the process before a front end could remove what
    it had begun (its output folder's lock). Returns a function restoring
    the previous handlers.
    """
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return lambda: None
    previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}

    def handler(signum, frame):
        flag["interrupted"] = signum
        signal.signal(signum, signal.default_int_handler if signum == signal.SIGINT
                      else _terminate)

    for s in previous:
        signal.signal(s, handler)
    return lambda: [signal.signal(s, h) for s, h in previous.items()] and None


@dataclass(frozen=True)
class Execution:
    """How a run executes: how many realisations, where, checkpoints, stopping.

    Validated on construction, so a front end can check its options before
    it touches any output. See :func:`run_ensemble` for the meaning of each.
    """

    realisations: int = 200
    seed: int = 0
    backend: str = "processes"
    workers: int | None = None
    scheduler: str | None = None
    chunk: int | None = None
    checkpoint: str | os.PathLike | None = None
    checkpoint_every: int = 50
    resume: bool = False
    target_se: float | None = None
    check_every: int = 20
    min_realisations: int = 20
    memory_check: bool = True
    block: int | None = None
    counts: str | None = None

    def __post_init__(self):
        for name in ("realisations", "seed", "checkpoint_every", "check_every", "min_realisations"):
            v = getattr(self, name)
            low = 0 if name in ("seed", "min_realisations") else 1
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < low:
                raise OptionError(f"{{{name}}} must be a whole number >= {low}, got {v}", name)
        if self.scheduler is not None:
            check_scheduler_address(self.scheduler)
        backend = "dask" if self.scheduler else self.backend
        if backend not in BACKENDS:
            raise OptionError(f"unknown {{backend}} {backend!r}; choose one of "
                              f"{', '.join(BACKENDS)}", "backend")
        if self.workers is not None and (isinstance(self.workers, bool) or int(self.workers) < 1):
            raise OptionError(f"{{workers}} must be >= 1, got {self.workers}", "workers")
        if self.chunk is not None and int(self.chunk) < 1:
            raise OptionError(f"{{chunk}} must be >= 1, got {self.chunk}", "chunk")
        if self.resume and self.checkpoint is None:
            raise OptionError("{resume} needs a {checkpoint} file to continue from", "resume",
                              "checkpoint")
        StopRule(self.target_se, self.check_every, self.min_realisations)  # validates target_se
        check_block(self.block)
        if self.counts is not None:
            check_counts_url(str(self.counts))

    @property
    def n_workers(self) -> int:
        return int(self.workers) if self.workers is not None else (os.cpu_count() or 1)

    @property
    def resolved_backend(self) -> str:
        backend = "dask" if self.scheduler else self.backend
        return "serial" if backend == "processes" and self.n_workers == 1 else backend


def _fold(runner, acc, order: InOrder, realisations: int, stop: StopRule, flag: dict, *,
          on_fold: Callable[[dict], None]) -> bool:
    """Fold chunk results into ``acc`` in realisation order until done.

    Returns True when adaptive stopping fired; raises KeyboardInterrupt after
    a Ctrl-C (at a chunk boundary).
    """
    stopped_early = False
    for a, b, log, counts in runner:
        for _a, _b, (lg, ct) in order.push(a, b, (log, counts)):
            if flag["stop"]:
                break
            before = acc.n
            acc.add(lg, ct, _b - _a)
            on_fold(lg)
            if stop.met(before, acc):
                flag["stop"] = stopped_early = True
        if flag["stop"] or acc.n >= realisations:
            flag["stop"] = True
        if flag["interrupted"]:
            raise KeyboardInterrupt
    if flag["interrupted"]:  # after the last chunk: still an interrupt (what is folded is saved)
        raise KeyboardInterrupt
    return stopped_early


def _fold_or_save(runner, acc, order: InOrder, realisations: int, stop: StopRule, flag: dict,
                  *, on_fold, saver) -> bool:
    """:func:`_fold` with Ctrl-C and SIGTERM caught; whatever ends the run, the
    realisations folded so far are saved (the accumulator is whole at chunk
    boundaries). An interrupt becomes :class:`RunInterrupted`.

    A signal that arrives while the workers stop is held until they have
    (:func:`terrain.processes.held_signals`) and raised from the runner's
    close -- unless the run is already ending for a signal, with its
    realisations saved: a second SIGTERM or Ctrl-C then changes nothing, and
    must not take the place of the :class:`RunInterrupted` that says what
    was kept (it once did, and the command's line lost the count saved)."""
    restore = _catch_sigint(flag)
    ending = None
    try:
        stopped_early = _fold(runner, acc, order, realisations, stop, flag, on_fold=on_fold)
    except BaseException as exc:
        interrupted = isinstance(exc, KeyboardInterrupt) or bool(flag["interrupted"])
        try:
            saver.save(only_if_new=True)
        except Exception:
            if interrupted:
                raise
        if interrupted:
            ending = RunInterrupted(acc.n, str(saver.path) if saver.has_file else None,
                                    int(flag["interrupted"] or 2))
            raise ending from None
        raise
    finally:
        restore()
        try:
            runner.close()
        except KeyboardInterrupt:
            if ending is None:
                raise
    saver.save(only_if_new=True)
    return stopped_early


def run_ensemble(dem: Dem, job, model: ErrorModel, *, realisations: int = 200, seed: int = 0,
                 backend: str = "processes", workers: int | None = None,
                 scheduler: str | None = None, chunk: int | None = None,
                 checkpoint: str | os.PathLike | None = None, checkpoint_every: int = 50,
                 resume: bool = False, target_se: float | None = None, check_every: int = 20,
                 min_realisations: int = 20, memory_check: bool = True,
                 block: int | None = None, counts: str | None = None,
                 progress: Callable[[int, int], None] | None = None) -> RunResult:
    """Run ``realisations`` perturbed realisations of a job and average them.

    Parameters
    ----------
    dem : Dem
    job : a :class:`~terrain.runner.protocols.Job`
        :class:`terrain.jobs.CreditJob` (peaks, depressions) or
        :class:`terrain.jobs.CatchmentJob`; its defaults are resolved here.
    model : ErrorModel
        How realisations are drawn.
    realisations : int
        Number of realisations (the maximum when ``target_se`` is set).
    seed : int
        The same seed gives the same layers bit for bit.
    backend : {"serial", "processes", "dask"}
    workers : int, optional
        Worker processes (default: all cores).
    scheduler : str, optional
        Address of a running Dask scheduler (implies ``backend="dask"``).
    chunk : int, optional
        Realisations per task (does not change the result).
    checkpoint : path, optional
        ``.npz`` saved atomically every ``checkpoint_every`` realisations and
        at the end; with ``resume`` the run continues from it (and may extend
        a finished run to more realisations).
    target_se : float, optional
        Stop once the job's Monte Carlo standard error (its accumulator's
        ``stop_statistic``; for peaks and depressions in the DEM's vertical
        units) is below this, checked every ``check_every`` realisations
        after ``min_realisations``.
    memory_check : bool
        Watch the log as it grows and stop (saving the checkpoint) before it
        would outgrow the memory available; with ``target_se`` the run only
        plans as far as its next stopping check.
    block : int, optional
        Compute each realisation in blocks of ``block`` x ``block`` cells (the
        layers are the same); see :mod:`terrain.layout`.
    counts : str, optional
        An fsspec URL (``s3://bucket/run.counts``, ``memory://...``) where an
        out-of-core depressions run keeps its per-cell ponding counts, a Zarr
        store the process running the ensemble writes (default: beside
        ``checkpoint``, or in the run's scratch folder). A store there is
        kept after the run; one that is not cairn's is refused.
    progress : callable(done, total), optional

    Returns
    -------
    RunResult

    Raises
    ------
    RunInterrupted
        On Ctrl-C, after saving the checkpoint (when one was requested).
    WorkerError
        When worker processes cannot start or die.
    MemoryGuardError
        When the log would outgrow the memory available (``memory_check``).

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
       Analysis. Chapman & Hall (kernel smoothing by convolution).
    """
    refuse_in_bootstrapping_child()
    ex = Execution(realisations, seed, backend, workers, scheduler, chunk, checkpoint,
                   checkpoint_every, resume, target_se, check_every, min_realisations,
                   memory_check, block, counts)
    if ex.resolved_backend == "processes":  # spawned workers re-import the script
        refuse_unguarded()
    layout = layout_of(dem, block, job=job, run=True)
    if counts is not None and not layout.counts_on_disk:
        raise OptionError("{counts} is where an out-of-core depressions run (in blocks, the DEM "
                          "kept on disk) keeps its per-cell counts; this run keeps them in memory",
                          "counts")
    ex = dataclasses.replace(ex, block=layout.block)
    remove_orphan_scratch()  # what a killed blocked run left in the temporary folder
    if checkpoint is not None:  # its folder can be written, before its lock is made there
        prepare_checkpoint(checkpoint, resume=resume)
    with hold_checkpoint(checkpoint) if checkpoint is not None else contextlib.nullcontext():
        return _run(dem, job, model, ex, layout, progress)


def _run(dem: Dem, job, model: ErrorModel, ex: Execution, layout: RunLayout,
         progress) -> RunResult:
    """:func:`run_ensemble` once the execution is validated and the checkpoint held."""
    realisations, block, checkpoint = ex.realisations, layout.block, ex.checkpoint
    stop = StopRule(ex.target_se, ex.check_every, ex.min_realisations)
    t0 = time.perf_counter()
    st = _start(dem, job, model, ex, layout)
    acc, start = st.acc, st.acc.n
    # blocked mode takes realisations one at a time (its tasks are the blocks), so
    # Ctrl-C stops after the realisation under way
    size = ex.chunk or (1 if layout.blocked else chunk_size(
        start, realisations, workers=ex.n_workers, checkpoint_every=ex.checkpoint_every,
        check_every=ex.check_every if stop.active else None))
    flag = {"stop": False, "interrupted": False}
    saver = _Saver(checkpoint, ex.checkpoint_every, acc, st.params, resumed=ex.resume,
                   layout=layout.checkpoint_layout())
    watch = LogWatch(dem.source, realisations, stop if stop.active else None) \
        if ex.memory_check else None

    def on_fold(log=None):
        if progress:
            progress(acc.n, realisations)
        saver.maybe()
        if watch is not None and log is not None:
            watch.add(log, acc.n)

    on_fold()
    halt = lambda: flag["stop"] or flag["interrupted"]  # noqa: E731
    with contextlib.ExitStack() as scope:
        # chunks shrink towards the end, unless adaptive stopping needs whole check intervals
        taper = ex.n_workers if (ex.resolved_backend != "serial" and not layout.blocked
                                 and ex.chunk is None and not stop.active) else 0
        runner = _runner(st, ex, layout, chunks(start, realisations, size, taper), halt, scope,
                         dem)
        stopped_early = _fold_or_save(runner, acc, InOrder(start), realisations, stop, flag,
                                      on_fold=on_fold, saver=saver)
    wall = time.perf_counter() - t0
    info = {"backend": ex.resolved_backend, "block": block,
            "workers": ex.n_workers if ex.resolved_backend != "serial" else 1,
            "scheduler": ex.scheduler, "wall_seconds": round(wall, 3),
            "realisations_per_second": round((acc.n - start) / wall, 3) if wall > 0 else None,
            "resumed_from": start, "stopped_early": stopped_early,
            "stop_statistic": acc.stop_statistic() if stop.active else None,
            "defaults": st.used,
            "field_kernel_radius_cells": list(st.sampler.field.radius) if st.sampler.field else None}
    result = RunResult(dem, st.job, model, acc.layers(dem.shape), acc.log(), acc.n, st.params,
                       info, layout)
    release_freed_memory()  # what the realisations freed, before the summaries and writing
    return result


def _runner(st, ex: Execution, layout: RunLayout, plan, halt, scope: contextlib.ExitStack,
            dem: Dem):
    """The backend generator of the run: whole realisations, or blocks of each."""
    if not layout.blocked:
        return BACKENDS[ex.resolved_backend](Context(st.z, st.sampler, st.job, int(ex.seed)),
                                             plan, ex.n_workers, ex.scheduler, halt)
    # local processes read files in a scratch folder; Dask tasks read their windows from the
    # DEM's file (dem_windows: a path or URL every worker reads) or are sent them
    remote = dem_windows(dem) if ex.resolved_backend == "dask" else None
    dem_src, reg_src, drawn = scope.enter_context(scratch_arrays(
        st.z, st.job.regions.labels, to_files=ex.resolved_backend == "processes",
        on_disk=layout.on_disk))
    ponding = st.acc.ponding if layout.counts_on_disk else None
    # a DEM on disk is read as it is stored: its values are still to shift
    return blocked_runner(BlockedContext(dem_src, reg_src, st.sampler, st.job, int(ex.seed),
                                         int(layout.block), drawn, ponding,
                                         _reference(st.job) if layout.on_disk else 0.0,
                                         remote),
                          plan, ex.resolved_backend, ex.n_workers, ex.scheduler, halt)


@dataclass
class _Start:
    job: object
    used: dict
    sampler: ErrorSampler
    z: np.ndarray
    params: dict
    acc: object


def _start(dem: Dem, job, model: ErrorModel, ex: Execution, layout: RunLayout) -> _Start:
    """Resolve the job, build the sampler and accumulator, restore a checkpoint."""
    if ex.checkpoint is not None:
        prepare_checkpoint(ex.checkpoint, resume=ex.resume)
    used = job.defaults_used()
    w_m, h_m = dem.cell_metres()
    spacing = (float(np.mean(h_m)), float(np.mean(w_m)))
    if model.correlated:
        check_range(model.range_m, spacing, dem.shape, dem.source or "the DEM")
    job = job.resolved(dem, model, layout=layout)
    params = run_params(dem, job, model, ex.seed)
    if ex.resume:  # before anything is opened: the checkpoint is this run's, in this layout
        check_resume(ex.checkpoint, params, realisations=ex.realisations,
                     counts_on_disk=layout.counts_on_disk, block=layout.block)
    sampler = ErrorSampler(model, dem.shape, spacing)
    if layout.on_disk:  # out of core: the DEM's file is read by window; counts go to disk
        z = dem.z
        acc = job.accumulator(dem.shape[0] * dem.shape[1],
                              **_count_store(dem, ex, layout, params))
    else:  # float32, relative to the job's reference elevation (terrain.dem.Dem.reference)
        ref = _reference(job)
        z = np.where(dem.nodata, np.nan, dem.z - ref if ref else dem.z).astype(np.float32)
        acc = job.accumulator(z.size)
    if ex.resume:
        load_checkpoint(ex.checkpoint, acc, params)
    return _Start(job, used, sampler, z, params, acc)


def _reference(job) -> float:
    """The elevation a resolved job's float32 realisations are relative to (0 if none)."""
    return float(getattr(job, "reference", None) or 0.0)


def _count_store(dem: Dem, ex: Execution, layout: RunLayout, params: dict) -> dict:
    """The on-disk ponding counts of an out-of-core depressions run
    (``layout.counts_on_disk``): at ``ex.counts`` (an fsspec URL) when given,
    else beside the checkpoint (``<checkpoint>.counts``, kept for a resume) or
    in the DEM's scratch folder; the store carries the run's identity."""
    if not layout.counts_on_disk:
        return {}
    path = (str(ex.counts) if ex.counts is not None else counts_path(ex.checkpoint)
            if ex.checkpoint is not None else count_store_file(dem.scratch))
    return {"ponding": CountStore(path, dem.shape, int(layout.block), resume=ex.resume,
                                  run=run_identity(params), checkpoint=ex.checkpoint)}


LOG_CHECK_BYTES = 64 * 2**20  # the log watch looks at the memory after each 64 MiB of log


class LogWatch:
    """Stops a run before its log outgrows the memory available.

    Every time the log has grown by ``step`` bytes, the bytes per realisation
    so far are projected over the realisations still planned (with adaptive
    stopping: up to the next check) and doubled for the concatenation at the
    end; more than the memory available raises :class:`MemoryGuardError`
    (the run saves its checkpoint first).
    """

    def __init__(self, source: str, realisations: int, stop: StopRule | None,
                 step: int | None = None):
        self.source, self.realisations, self.stop = source, realisations, stop
        self.step = step if step is not None else LOG_CHECK_BYTES
        self.bytes = self.n = 0
        self.next_check = self.step

    def add(self, log: dict, done: int) -> None:
        self.bytes += sum(int(v.nbytes) for v in log.values())
        if self.bytes < self.next_check:
            return
        self.next_check = self.bytes + self.step
        upto = self.realisations
        if self.stop is not None:
            upto = min(upto, (done // self.stop.every + 1) * self.stop.every)
        per = self.bytes / max(done, 1)
        need = 2 * per * max(upto - done, 0) + self.bytes
        have = available_memory()
        if need > have:
            raise MemoryGuardError(
                f"{self.source}: the run's log holds {self.bytes / 2**20:.0f} MiB after {done} "
                f"realisations and would need {need / 2**30:.1f} GiB more than the "
                f"{have / 2**30:.1f} GiB available; resume from the checkpoint with fewer "
                "{realisations} or a larger {target_se}", "realisations", "target_se")


class _Saver:
    """Saves the checkpoint every ``every`` realisations, on interrupt and at the end."""

    def __init__(self, path, every: int, acc, params: dict, *, resumed: bool = False,
                 layout: dict | None = None):
        self.path, self.every, self.acc, self.params = path, every, acc, params
        self.layout = layout
        self.last = acc.n
        self.has_file = resumed  # a checkpoint of this run exists at ``path``

    def maybe(self) -> None:
        if self.path is not None and self.acc.n - self.last >= self.every:
            self.save()

    def save(self, only_if_new: bool = False) -> None:
        if self.path is None or (only_if_new and self.acc.n == self.last):
            return
        save_checkpoint(self.path, self.acc, self.params, self.layout)
        self.last = self.acc.n
        self.has_file = True
