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

import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ..dem import Dem
from ..errors import OptionError
from ..noise import ErrorModel, ErrorSampler
from .backends import BACKENDS, Context, refuse_in_bootstrapping_child
from .checkpoint import load_checkpoint, run_params, save_checkpoint
from .plan import InOrder, StopRule, chunk_size, chunks

__all__ = ["run_ensemble", "RunResult", "RunInterrupted", "Execution"]


class RunInterrupted(KeyboardInterrupt):
    """Ctrl-C during realisations; ``done`` realisations are in ``checkpoint``."""

    def __init__(self, done: int, checkpoint: str | None):
        super().__init__(done, checkpoint)
        self.done = done
        self.checkpoint = checkpoint


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
    """

    dem: Dem
    job: object
    model: ErrorModel
    layers: dict
    log: dict
    n: int
    params: dict
    info: dict = field(default_factory=dict)


def _catch_sigint(flag: dict) -> Callable[[], None]:
    """While a run is in progress, Ctrl-C only sets ``flag["interrupted"]``.

    The run then stops at the next chunk boundary, saves its checkpoint and
    raises :class:`RunInterrupted` (an interrupt inside compiled code would
    otherwise surface as a SystemError). A second Ctrl-C interrupts at once.
    Returns a function restoring the previous handler.
    """
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return lambda: None
    previous = signal.getsignal(signal.SIGINT)

    def handler(signum, frame):
        flag["interrupted"] = True
        signal.signal(signal.SIGINT, signal.default_int_handler)

    signal.signal(signal.SIGINT, handler)
    return lambda: signal.signal(signal.SIGINT, previous)


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

    def __post_init__(self):
        for name in ("realisations", "seed", "checkpoint_every", "check_every", "min_realisations"):
            v = getattr(self, name)
            low = 0 if name in ("seed", "min_realisations") else 1
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < low:
                raise OptionError(f"{{{name}}} must be a whole number >= {low}, got {v}", name)
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

    @property
    def n_workers(self) -> int:
        return int(self.workers) if self.workers is not None else (os.cpu_count() or 1)

    @property
    def resolved_backend(self) -> str:
        backend = "dask" if self.scheduler else self.backend
        return "serial" if backend == "processes" and self.n_workers == 1 else backend


def _fold(runner, acc, order: InOrder, realisations: int, stop: StopRule, flag: dict, *,
          on_fold: Callable[[], None]) -> bool:
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
            on_fold()
            if stop.met(before, acc):
                flag["stop"] = stopped_early = True
        if flag["stop"] or acc.n >= realisations:
            flag["stop"] = True
        if flag["interrupted"]:
            raise KeyboardInterrupt
    if flag["interrupted"] and acc.n < realisations and not stopped_early:
        raise KeyboardInterrupt
    return stopped_early


def run_ensemble(dem: Dem, job, model: ErrorModel, *, realisations: int = 200, seed: int = 0,
                 backend: str = "processes", workers: int | None = None,
                 scheduler: str | None = None, chunk: int | None = None,
                 checkpoint: str | os.PathLike | None = None, checkpoint_every: int = 50,
                 resume: bool = False, target_se: float | None = None, check_every: int = 20,
                 min_realisations: int = 20,
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

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
       Analysis. Chapman & Hall (kernel smoothing by convolution).
    """
    refuse_in_bootstrapping_child()
    ex = Execution(realisations, seed, backend, workers, scheduler, chunk, checkpoint,
                   checkpoint_every, resume, target_se, check_every, min_realisations)
    t0 = time.perf_counter()
    st = _start(dem, job, model, ex)
    acc, start = st.acc, st.acc.n
    stop = StopRule(target_se, check_every, min_realisations)
    size = chunk or chunk_size(start, realisations, workers=ex.n_workers,
                               checkpoint_every=checkpoint_every,
                               check_every=check_every if stop.active else None)
    flag = {"stop": False, "interrupted": False}
    saver = _Saver(checkpoint, checkpoint_every, acc, st.params)

    def on_fold():
        if progress:
            progress(acc.n, realisations)
        saver.maybe()

    on_fold()
    runner = BACKENDS[ex.resolved_backend](Context(st.z, st.sampler, st.job, int(seed)),
                                           chunks(start, realisations, size), ex.n_workers,
                                           scheduler, lambda: flag["stop"] or flag["interrupted"])
    restore = _catch_sigint(flag)
    try:
        stopped_early = _fold(runner, acc, InOrder(start), realisations, stop, flag,
                              on_fold=on_fold)
    except KeyboardInterrupt:
        saver.save()
        raise RunInterrupted(acc.n, str(checkpoint) if checkpoint is not None else None) from None
    finally:
        restore()
        runner.close()
    saver.save(only_if_new=True)
    wall = time.perf_counter() - t0
    info = {"backend": ex.resolved_backend,
            "workers": ex.n_workers if ex.resolved_backend != "serial" else 1,
            "scheduler": scheduler, "wall_seconds": round(wall, 3),
            "realisations_per_second": round((acc.n - start) / wall, 3) if wall > 0 else None,
            "resumed_from": start, "stopped_early": stopped_early,
            "stop_statistic": acc.stop_statistic() if stop.active else None,
            "defaults": st.used,
            "field_kernel_radius_cells": list(st.sampler.field.radius) if st.sampler.field else None}
    return RunResult(dem, st.job, model, acc.layers(dem.shape), acc.log(), acc.n, st.params, info)


@dataclass
class _Start:
    job: object
    used: dict
    sampler: ErrorSampler
    z: np.ndarray
    params: dict
    acc: object


def _start(dem: Dem, job, model: ErrorModel, ex: Execution) -> _Start:
    """Resolve the job, build the sampler and accumulator, restore a checkpoint."""
    used = job.defaults_used()
    job = job.resolved(dem, model)
    w_m, h_m = dem.cell_metres()
    sampler = ErrorSampler(model, dem.shape, (float(np.mean(h_m)), float(np.mean(w_m))))
    z = np.where(dem.nodata, np.nan, dem.z).astype(np.float32)
    params = run_params(dem, job, model, ex.seed)
    acc = job.accumulator(z.size)
    if ex.resume:
        load_checkpoint(ex.checkpoint, acc, params)
    return _Start(job, used, sampler, z, params, acc)


class _Saver:
    """Saves the checkpoint every ``every`` realisations, on interrupt and at the end."""

    def __init__(self, path, every: int, acc, params: dict):
        self.path, self.every, self.acc, self.params = path, every, acc, params
        self.last = acc.n

    def maybe(self) -> None:
        if self.path is not None and self.acc.n - self.last >= self.every:
            self.save()

    def save(self, only_if_new: bool = False) -> None:
        if self.path is None or (only_if_new and self.acc.n == self.last):
            return
        save_checkpoint(self.path, self.acc, self.params)
        self.last = self.acc.n
