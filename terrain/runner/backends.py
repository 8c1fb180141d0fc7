"""Where realisations run: in this process, in local processes, or on Dask.

Each backend is a generator ``backend(ctx, plan, workers, scheduler, stop)``
that takes chunks ``(a, b)`` from the lazy ``plan`` while ``stop()`` is
false and yields ``(a, b, log, counts)`` in completion order; the caller
folds them in realisation order.

``"processes"`` uses a local process pool with the spawn start method (the
DEM and error model reach each worker once, through the pool initialiser).
``"dask"`` uses a ``dask.distributed`` client, to a running scheduler
(``scheduler="tcp://host:port"``) or to a ``LocalCluster`` started here; the
context is scattered once and Dask reschedules the tasks of a worker that
dies. A worker pool that cannot start or breaks ends the run with a
:class:`~terrain.errors.WorkerError` at once; nothing waits forever.
"""

from __future__ import annotations

import hashlib
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from ..errors import SchedulerError, WorkerError
from ..noise import ErrorSampler

__all__ = ["BACKENDS", "Context", "run_chunk", "refuse_in_bootstrapping_child"]

MAIN_GUARD_HINT = ('a script that starts cairn\'s worker processes must do so under '
                   '`if __name__ == "__main__":` (each worker re-imports the script)')


@dataclass
class Context:
    """What every worker needs: the DEM (float32, NaN on nodata), the
    sampler, the resolved job and the seed."""

    z: np.ndarray
    sampler: ErrorSampler
    job: object
    seed: int


def run_chunk(ctx: Context, start: int, stop: int):
    """Realisations ``[start, stop)``: their concatenated log and summed integer counts."""
    counts = ctx.job.new_counts(ctx.z.size)
    logs = [ctx.job.realise(ctx.z, ctx.sampler, ctx.seed, i, counts) for i in range(start, stop)]
    log = {k: np.concatenate([g[k] for g in logs]) for k in logs[0]}
    return start, stop, log, counts


def refuse_in_bootstrapping_child() -> None:
    """Exit at once, in one line, when a worker process re-imports a script
    that starts a run at import time (no ``__main__`` guard)."""
    import multiprocessing as mp

    # set while a spawned process is still importing its parent's main module
    if getattr(mp.current_process(), "_inheriting", False):
        raise SystemExit(f"cairn: error: {MAIN_GUARD_HINT}")


# -- worker side of the process pool ------------------------------------------------
_CTX: Context | None = None


def _init_worker(ctx: Context) -> None:
    import signal

    global _CTX
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    _CTX = ctx


def _chunk_in_worker(start: int, stop: int):
    assert _CTX is not None
    return run_chunk(_CTX, start, stop)


# -- backends ------------------------------------------------------------------
def _serial(ctx, plan, workers, scheduler, stop) -> Iterator[tuple]:
    for a, b in plan:
        if stop():
            return
        yield run_chunk(ctx, a, b)


def _broken(started: bool) -> WorkerError:
    main = sys.modules.get("__main__")
    script = getattr(main, "__file__", None) and getattr(main, "__spec__", None) is None
    if not started and script:
        return WorkerError(f"worker processes exited while starting; {MAIN_GUARD_HINT}")
    return WorkerError("a worker process died (killed, or out of memory); rerun with fewer "
                       "{workers}, or resume from the checkpoint", "workers")


def _processes(ctx, plan, workers, scheduler, stop) -> Iterator[tuple]:
    import concurrent.futures as cf
    import multiprocessing as mp
    from concurrent.futures.process import BrokenProcessPool

    started = False
    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"),
                                initializer=_init_worker, initargs=(ctx,)) as pool:
        pending: set = set()
        try:
            while True:
                while len(pending) < 2 * workers and not stop():
                    nxt = next(plan, None)
                    if nxt is None:
                        break
                    pending.add(pool.submit(_chunk_in_worker, *nxt))
                if not pending:
                    return
                done, pending = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
                for f in done:
                    res = f.result()
                    started = True
                    yield res
        except BrokenProcessPool:
            raise _broken(started) from None
        finally:
            for f in pending:
                f.cancel()


def _client(scheduler: str | None, workers: int):
    import logging

    from distributed import Client, LocalCluster

    if scheduler:
        try:
            return Client(scheduler, timeout="10s"), None
        except (OSError, TimeoutError) as exc:
            raise SchedulerError(f"{scheduler}: cannot reach the Dask scheduler within 10 s "
                                 f"({type(exc).__name__}); check the address or drop "
                                 "{scheduler}", "scheduler") from None
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                           dashboard_address=None, silence_logs=logging.ERROR)
    return Client(cluster), cluster


def _dask(ctx, plan, workers, scheduler, stop) -> Iterator[tuple]:
    from distributed import as_completed

    client, cluster = _client(scheduler, workers)
    try:
        with client:
            nworkers = max(1, len(client.scheduler_info().get("workers", {})) or workers)
            ctx_f = client.scatter(ctx, broadcast=True)
            token = hashlib.sha1(f"{id(ctx)}-{time.time_ns()}".encode()).hexdigest()[:10]
            ac = as_completed()
            inflight = 0

            def top_up():
                nonlocal inflight
                while inflight < 2 * nworkers and not stop():
                    nxt = next(plan, None)
                    if nxt is None:
                        return
                    ac.add(client.submit(run_chunk, ctx_f, *nxt, key=f"cairn-{token}-{nxt[0]}",
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


BACKENDS: dict[str, Callable[..., Iterator[tuple]]] = {
    "serial": _serial, "processes": _processes, "dask": _dask}
