"""Running many realisations: backends, in-order accumulation, checkpoints.

Realisation ``i`` draws every random number from the stream of
``SeedSequence(seed, spawn_key=(i, ...))`` and its pair log is folded into
the accumulators strictly in realisation order, so a run's layers are bit
for bit the same on one core, N local processes or a Dask cluster, for any
chunking, and after any number of interruptions and resumptions.

Backends
--------
``"serial"``: in this process. ``"processes"``: a local process pool (spawn
start method; the DEM and error model reach each worker once, through the
pool initialiser). ``"dask"``: a ``dask.distributed`` client, either to a
running scheduler (``scheduler="tcp://host:port"``) or to a ``LocalCluster``
started here; the context is scattered (broadcast) once, tasks return their
chunk's pair log and ponding counts, and Dask reschedules the tasks of a
worker that dies.

Perturb-and-average: the layers are Monte Carlo estimates of the
convolution of the (unstable) attribution with the error kernel, which is
what makes them Lipschitz-stable in the input.

References
----------
.. [1] O'Neill, M. E. (2014). PCG: A family of simple fast space-efficient
   statistically good algorithms for random number generation. HMC-CS-2014-0905
   (numpy's PCG64; SeedSequence spawning for independent streams).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__
from .credit import CreditSettings
from .dem import Dem
from .errors import CheckpointError, OptionError, SchedulerError
from .io import load_npz, save_npz
from .noise import ErrorModel, ErrorSampler

__all__ = ["attribute", "run_ensemble", "Attribution", "RunInterrupted", "BACKENDS"]

BACKENDS = ("serial", "processes", "dask")


class RunInterrupted(KeyboardInterrupt):
    """Ctrl-C during realisations; ``done`` realisations are in ``checkpoint``."""

    def __init__(self, done: int, checkpoint: str | None):
        super().__init__(done, checkpoint)
        self.done = done
        self.checkpoint = checkpoint


@dataclass
class Attribution:
    """The result of a run: layers, standard errors, pair log and parameters.

    Attributes
    ----------
    layers : dict
        Layer name -> (estimate, standard error), float64 arrays on the grid.
    log : dict
        The pair log (see :data:`terrain.credit.LOG_FIELDS`).
    n : int
        Realisations done.
    params : dict
        Everything that defines the run (identifies it in checkpoints).
    info : dict
        Backend, workers, timings, whether adaptive stopping fired.
    """

    dem: Dem
    settings: CreditSettings
    model: ErrorModel
    layers: dict
    log: dict
    n: int
    params: dict
    info: dict = field(default_factory=dict)


# ----------------------------------------------------------------------------
# worker side
# ----------------------------------------------------------------------------
@dataclass
class _Context:
    z: np.ndarray  # float32, NaN on nodata
    sampler: ErrorSampler
    job: object  # CreditSettings or another job (see run_ensemble)
    seed: int
    scale: float | None = None


def _chunk(ctx: _Context, start: int, stop: int):
    """Realisations [start, stop): concatenated log and summed integer counts."""
    counts = ctx.job.new_counts(ctx.z.size)
    logs = [ctx.job.realise(ctx.z, ctx.sampler, ctx.seed, i, counts, ctx.scale)
            for i in range(start, stop)]
    log = {k: np.concatenate([g[k] for g in logs]) for k in logs[0]}
    return start, stop, log, counts


_CTX: _Context | None = None


def _init_worker(ctx: _Context) -> None:
    import signal

    global _CTX
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    _CTX = ctx


def _chunk_in_worker(start: int, stop: int):
    assert _CTX is not None
    return _chunk(_CTX, start, stop)


# ----------------------------------------------------------------------------
# runners: each yields chunk results in completion order
# ----------------------------------------------------------------------------
def _serial(ctx, chunks, workers, scheduler, stop_flag):
    for a, b in chunks:
        if stop_flag():
            return
        yield _chunk(ctx, a, b)


def _processes(ctx, chunks, workers, scheduler, stop_flag):
    import concurrent.futures as cf
    import multiprocessing as mp

    chunks = list(chunks)
    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"),
                                initializer=_init_worker, initargs=(ctx,)) as pool:
        pending = set()
        it = iter(chunks)
        try:
            while True:
                while len(pending) < 2 * workers and not stop_flag():
                    nxt = next(it, None)
                    if nxt is None:
                        break
                    pending.add(pool.submit(_chunk_in_worker, *nxt))
                if not pending:
                    return
                done, pending = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
                for f in done:
                    yield f.result()
        finally:
            for f in pending:
                f.cancel()


def _dask(ctx, chunks, workers, scheduler, stop_flag):
    import logging

    from distributed import Client, LocalCluster, as_completed

    cluster = None
    try:
        if scheduler:
            try:
                client = Client(scheduler, timeout="10s")
            except (OSError, TimeoutError) as exc:
                raise SchedulerError(f"{scheduler}: cannot reach the Dask scheduler within 10 s "
                                     f"({type(exc).__name__}); check the address or drop "
                                     "--scheduler") from None
        else:
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=logging.ERROR)
            client = Client(cluster)
        with client:
            nworkers = max(1, len(client.scheduler_info().get("workers", {})) or workers)
            ctx_f = client.scatter(ctx, broadcast=True)
            token = hashlib.sha1(f"{id(ctx)}-{time.time_ns()}".encode()).hexdigest()[:10]
            it = iter(chunks)
            ac = as_completed()
            inflight = 0

            def top_up():
                nonlocal inflight
                while inflight < 2 * nworkers and not stop_flag():
                    nxt = next(it, None)
                    if nxt is None:
                        return
                    ac.add(client.submit(_chunk, ctx_f, *nxt, key=f"cairn-{token}-{nxt[0]}",
                                         retries=3, pure=False))
                    inflight += 1

            top_up()
            for fut in ac:
                inflight -= 1
                res = fut.result()
                fut.release()
                yield res
                top_up()
    finally:
        if cluster is not None:
            cluster.close()


_RUNNERS = {"serial": _serial, "processes": _processes, "dask": _dask}


# ----------------------------------------------------------------------------
# the run
# ----------------------------------------------------------------------------
def _catch_sigint(flag: dict):
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


def run_params(dem: Dem, job, model: ErrorModel, seed: int, scale: float | None = None) -> dict:
    """The parameters that define a run's realisations (not their number)."""
    return {"version": __version__, "dem_checksum": dem.checksum(), "seed": int(seed),
            "settings": json.loads(json.dumps(job.describe(), default=str)),
            "model": model.as_dict(), "scale": scale}


def _check_checkpoint(path: Path, st: dict, params: dict) -> None:
    try:
        saved = json.loads(str(st["params_json"]))
    except (KeyError, ValueError):
        raise CheckpointError(f"{path}: not a cairn checkpoint (no parameters)") from None
    if saved.get("dem_checksum") != params["dem_checksum"]:
        raise CheckpointError(f"{path}: checkpoint was made from another DEM (checksum differs); "
                              "use a new --checkpoint file")
    for k in ("seed", "settings", "model", "scale"):
        if saved.get(k) != json.loads(json.dumps(params[k])):
            raise CheckpointError(f"{path}: checkpoint was made with different {k} "
                                  f"({saved.get(k)} vs {params[k]}); use a new --checkpoint file")


def load_checkpoint(path: str | os.PathLike, acc, params: dict) -> None:
    """Validate a checkpoint against this run and restore it into ``acc``."""
    path = Path(path)
    try:
        st = load_npz(path)
    except FileNotFoundError:
        raise CheckpointError(f"{path}: no checkpoint to resume from") from None
    except (OSError, ValueError) as exc:
        raise CheckpointError(f"{path}: damaged checkpoint ({exc}); start afresh without "
                              "--resume") from None
    _check_checkpoint(path, st, params)
    digest = st.get("digest")
    if digest is None or str(digest) != _digest(st):
        raise CheckpointError(f"{path}: checkpoint content does not match its checksum (damaged)")
    acc.restore(st)


def _digest(st: dict) -> str:
    h = hashlib.sha256()
    for k in sorted(st):
        if k == "digest":
            continue
        h.update(k.encode())
        h.update(np.ascontiguousarray(st[k]).tobytes())
    return h.hexdigest()


def save_checkpoint(path: str | os.PathLike, acc, params: dict) -> None:
    """Save accumulators, pair log, parameters and a checksum atomically (npz, no pickle)."""
    st = acc.state()
    st["params_json"] = np.array(json.dumps(params, sort_keys=True, default=str))
    st["digest"] = np.array(_digest(st))
    save_npz(path, **st)


def attribute(dem: Dem, settings: CreditSettings, model: ErrorModel, **kw) -> Attribution:
    """Perturb-and-average attribution of peaks or pits on a DEM.

    ``settings`` (kind, threshold, weight, connectivity, base) is the job; the
    keyword arguments are those of :func:`run_ensemble`.

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
       Analysis. Chapman & Hall (kernel smoothing by convolution).
    """
    return run_ensemble(dem, settings, model, **kw)


def run_ensemble(dem: Dem, job, model: ErrorModel, *, realisations: int = 200,
              seed: int = 0, backend: str = "processes", workers: int | None = None,
              scheduler: str | None = None, chunk: int | None = None,
              checkpoint: str | os.PathLike | None = None, checkpoint_every: int = 50,
              resume: bool = False, target_se: float | None = None, check_every: int = 20,
              min_realisations: int = 20, scale: float | None = None,
              progress: Callable[[int, int], None] | None = None) -> Attribution:
    """Run ``realisations`` perturbed realisations of a job and average them.

    Parameters
    ----------
    dem : Dem
    job : CreditSettings or CatchmentJob
        What a realisation computes: ``new_counts(n)``, ``realise(z, sampler,
        seed, i, counts, scale)`` returning a log dict, ``accumulator(n)``,
        ``main_layer`` and ``describe()``.
    model : ErrorModel
        How realisations are drawn.
    realisations : int
        Number of realisations (the maximum when ``target_se`` is set).
    seed : int
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
        Stop once the largest standard error of the main credit layer among
        cells holding >= 1% of its top credit is below this (checked every
        ``check_every`` realisations, after ``min_realisations``).
    scale : float, optional
        Use this RMSE with the model's unit draws (common random numbers).
    progress : callable(done, total), optional

    Returns
    -------
    Attribution

    Raises
    ------
    RunInterrupted
        On Ctrl-C, after saving the checkpoint (when one was requested).

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
       Analysis. Chapman & Hall (kernel smoothing by convolution).
    """
    if scheduler:
        backend = "dask"
    if backend not in BACKENDS:
        raise OptionError(f"unknown backend {backend!r}; choose one of {', '.join(BACKENDS)}")
    if not (isinstance(realisations, (int, np.integer)) and realisations >= 1):
        raise OptionError(f"--realisations must be a whole number >= 1, got {realisations}")
    if target_se is not None and not (math.isfinite(target_se) and target_se > 0):
        raise OptionError(f"--target-se must be positive, got {target_se}")
    workers = int(workers or os.cpu_count() or 1)
    if workers < 1:
        raise OptionError(f"--workers must be >= 1, got {workers}")
    if backend == "processes" and workers == 1:
        backend = "serial"
    t0 = time.perf_counter()
    w_m, h_m = dem.cell_metres()
    spacing = (float(np.mean(h_m)), float(np.mean(w_m)))
    sampler = ErrorSampler(model, dem.shape, spacing)
    z = np.where(dem.nodata, np.nan, dem.z).astype(np.float32)
    ctx = _Context(z, sampler, job, int(seed), scale)
    params = run_params(dem, job, model, seed, scale)
    acc = job.accumulator(z.size)
    if resume:
        if checkpoint is None:
            raise OptionError("--resume needs --checkpoint FILE")
        load_checkpoint(checkpoint, acc, params)
    start = acc.n
    if chunk is None:
        chunk = max(1, min(checkpoint_every, math.ceil(max(realisations - start, 1) / (4 * workers)), 25))
    if target_se is not None:
        # stop decisions happen at exact multiples of check_every, whatever the chunking
        chunk = math.gcd(int(chunk), int(check_every))
        if start % check_every:
            chunk = math.gcd(chunk, start % check_every)
    chunks = [(a, min(a + chunk, realisations)) for a in range(start, realisations, chunk)]
    stopped_early = False
    pending: dict[int, tuple] = {}
    last_ckpt = acc.n
    flag = {"stop": False, "interrupted": False}

    def should_stop():
        return flag["stop"] or flag["interrupted"]

    def check_target():
        if target_se is None or acc.n < min_realisations:
            return False
        m, se = acc.layers(dem.shape)[job.main_layer]
        top = np.nanmax(m)
        if not top > 0:
            return False
        sel = m >= 0.01 * top
        return bool(np.nanmax(se[sel]) < target_se)

    if progress:
        progress(acc.n, realisations)
    runner = _RUNNERS[backend](ctx, chunks, workers, scheduler, should_stop)
    restore = _catch_sigint(flag)
    try:
        for a, b, log, counts in runner:
            pending[a] = (b, log, counts)
            while acc.n in pending and not flag["stop"]:
                b, log, counts = pending.pop(acc.n)
                before = acc.n
                acc.add(log, counts, b - before)
                if progress:
                    progress(acc.n, realisations)
                if checkpoint is not None and acc.n - last_ckpt >= checkpoint_every:
                    save_checkpoint(checkpoint, acc, params)
                    last_ckpt = acc.n
                if target_se is not None and (acc.n // check_every) > (before // check_every):
                    if check_target():
                        flag["stop"] = stopped_early = True
            if flag["stop"] or acc.n >= realisations:
                flag["stop"] = True
            if flag["interrupted"]:
                raise KeyboardInterrupt
        if flag["interrupted"] and acc.n < realisations and not stopped_early:
            raise KeyboardInterrupt
    except KeyboardInterrupt:
        if checkpoint is not None:
            save_checkpoint(checkpoint, acc, params)
        raise RunInterrupted(acc.n, str(checkpoint) if checkpoint is not None else None) from None
    finally:
        restore()
        close = getattr(runner, "close", None)
        if close:
            close()
    if checkpoint is not None and acc.n != last_ckpt:
        save_checkpoint(checkpoint, acc, params)
    wall = time.perf_counter() - t0
    info = {"backend": backend, "workers": workers if backend != "serial" else 1,
            "scheduler": scheduler, "wall_seconds": round(wall, 3),
            "realisations_per_second": round((acc.n - start) / wall, 3) if wall > 0 else None,
            "resumed_from": start, "stopped_early": stopped_early,
            "embedding_factor": sampler.field.factor if sampler.field is not None else None}
    return Attribution(dem, job, model, acc.layers(dem.shape), acc.log(), acc.n, params, info)
