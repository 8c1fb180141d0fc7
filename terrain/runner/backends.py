"""Where realisations run: in this process, in local processes, or on Dask.

Each backend is a generator ``backend(ctx, plan, workers, scheduler, stop)``
that takes chunks ``(a, b)`` from the lazy ``plan`` while ``stop()`` is
false and yields ``(a, b, log, counts)`` in completion order; the caller
folds them in realisation order.

``"processes"`` uses a local process pool with the spawn start method (the
DEM and error model reach each worker once, through the pool initialiser).
``"dask"`` uses a ``dask.distributed`` client, to a running scheduler
(``scheduler="tcp://host:port"``) or to a ``LocalCluster`` started here; the
context is scattered to every worker and Dask reschedules the tasks of a
worker that dies (scattering the context again when its last copy died
with it). A worker pool that cannot start or breaks ends the run with a
:class:`~terrain.errors.WorkerError` at once; nothing waits forever: on Dask
(:class:`DaskWatch`) a cluster without workers for
:data:`WORKER_WAIT_SECONDS` (none joined, or all left), a lost scheduler and
a lost worker holding data the run needs are each one error, and Ctrl-C or
SIGTERM ends the wait within :data:`POLL_SECONDS`.
"""

from __future__ import annotations

import asyncio
import contextlib
import hashlib
import os
import re
import socket
import struct
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np

from ..errors import CairnError, SchedulerError, WorkerError
from ..io import load_shared, save_shared, scratch_folder, source_bytes
from ..noise import ErrorSampler
from ..processes import die_with_parent, held_signals, spawning

__all__ = ["BACKENDS", "Context", "run_chunk", "refuse_in_bootstrapping_child", "refuse_unguarded",
           "check_scheduler_address", "HANDSHAKE_SECONDS", "broken_pool", "dask_client",
           "init_worker", "new_pool", "take_pool", "warm_workers", "spawning", "held_signals",
           "DaskWatch", "check_workers", "result_watching", "stop_pool", "WORKER_WAIT_SECONDS",
           "POLL_SECONDS", "close_dask", "quiet_dask"]

HANDSHAKE_SECONDS = 10.0  # connecting to a scheduler and its handshake, at most
WORKER_WAIT_SECONDS = 60.0  # a Dask cluster without any worker (none joined, all left), at most
POLL_SECONDS = 0.5  # waits look at signals, workers (and on Dask the scheduler) this often
RESCATTERS = 3  # a whole-grid Dask run scatters its context again this often at most
_ADDRESS = re.compile(r"^(?:(?P<scheme>[a-z]+)://)?(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+)"
                      r":(?P<port>\d{1,5})/?$")
_SCHEMES = ("tcp", "tls", "ws", "wss", "ucx")
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


def refuse_unguarded() -> None:
    """Before any work: refuse, with :data:`MAIN_GUARD_HINT`, a run that a script
    starts from its top level with no ``if __name__ == "__main__":`` around it.

    Each spawned worker re-imports the script, which would start the run again;
    the pool breaks once the workers try, but only after this process has read
    the DEM and compiled its kernels (tens of seconds on a cold kernel cache).
    The test reads the script's own source (:mod:`ast`) and finds the top-level
    statement running now (its frame's file is the script's). The run is
    refused only when nothing around the running line is conditional (an
    ``if``, a conditional expression, ``and`` / ``or``, ``match``, ``while``)
    and the statement does not mention ``__name__`` or ``__spec__`` (a guard
    decorator): a plain top-level call, directly or through functions, a
    ``with``, ``for`` or ``try``. Everything else is left alone, and a case
    this misses still ends with the pool's own one-line error: a run started
    from a function called later, ``exec`` or ``eval`` of other code, a
    debugger or console prompt, a notebook, ``python -c``, a package's
    ``__main__.py`` (which multiprocessing does not run again in its
    workers), a script changed on disk since it started, or a script whose
    source cannot be read or parsed.

    Raises
    ------
    WorkerError
        When the call comes from the script's top level, with no guard around it.
    """
    main = sys.modules.get("__main__")
    path = getattr(main, "__file__", None)
    if not path or os.path.basename(str(path)).lower().startswith("ipython"):
        return  # multiprocessing's own rule: it re-runs every other main file
    name = getattr(getattr(main, "__spec__", None), "name", None) or ""
    if name == "__main__" or name.endswith(".__main__"):
        return  # python -m package: multiprocessing never runs a package's __main__ again
    frame = sys._getframe(1)
    while frame is not None and not (frame.f_globals is vars(main)
                                     and frame.f_code.co_name == "<module>"
                                     and _same_file(frame.f_code.co_filename, str(path))):
        frame = frame.f_back
    if frame is None:  # the script's top level is not running: called later, or from exec
        return
    try:
        line = _unguarded_line(str(path), frame)
    except Exception:  # noqa: BLE001  (the check itself must never stop a run)
        return
    if line is not None:
        raise WorkerError(f"{path}, line {line}: {MAIN_GUARD_HINT}")


def _same_file(a: str, b: str) -> bool:
    return a == b or os.path.abspath(a) == os.path.abspath(b)


_CONDITIONAL = ("If", "IfExp", "BoolOp", "Match", "While")


def _unguarded_line(path: str, frame) -> int | None:
    """The running line of the script's top level when nothing guards it, else None
    (also None when the source on disk is not the code that runs)."""
    import ast

    source = source_bytes(path)
    if source is None:
        return None
    code = compile(source, path, "exec", dont_inherit=True)
    if (code.co_code != frame.f_code.co_code
            or list(code.co_lines()) != list(frame.f_code.co_lines())):
        return None  # changed on disk since it started: its lines cannot be trusted
    line = frame.f_lineno
    for stmt in ast.parse(source, filename=path).body:
        first = min([stmt.lineno] + [d.lineno for d in getattr(stmt, "decorator_list", [])])
        if not first <= line <= (stmt.end_lineno or stmt.lineno):
            continue
        for node in ast.walk(stmt):
            if isinstance(node, ast.Name) and node.id in ("__name__", "__spec__"):
                return None
            if (type(node).__name__ in _CONDITIONAL and hasattr(node, "lineno")
                    and node.lineno <= line <= (node.end_lineno or node.lineno)):
                return None
        return line
    return None


# -- worker side of the process pool ------------------------------------------------
_CTX: dict = {}  # the run's context in a worker, under the path it was loaded from


def init_worker(warm: Callable[[], object] | None, parent: int) -> None:
    """Set up a pool worker: signals, death with the parent, then ``warm()``
    (e.g. loading the compiled kernels a job will call), if given."""
    import signal

    # Ctrl-C and SIGTERM are the parent's to handle: the worker was started with
    # both blocked (see spawning), keeps SIGTERM blocked and ignores SIGINT too
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    die_with_parent(parent)  # or exit, if the parent died before we were ready
    if warm is not None:
        try:
            warm()
        except Exception:  # noqa: BLE001, S110  (it only saves time: the run loads them anyway)
            pass


def _chunk_in_worker(shared: str, start: int, stop: int):
    """Realisations ``start:stop`` of the run whose context is the
    :func:`~terrain.io.save_shared` file ``shared`` (loaded once per worker)."""
    if shared not in _CTX:
        _CTX.clear()
        _CTX[shared] = load_shared(shared)
    return run_chunk(_CTX[shared], start, stop)


# -- worker pools, started by a run or ahead of it -----------------------------------
_AHEAD: list = []  # [(workers, pool)]: the pool warm_workers started, until a run takes it


def new_pool(workers: int, warm: Callable[[], object] | None = None):
    """A local pool of ``workers`` spawned processes (started under
    :class:`~terrain.processes.spawning`, so no signal cuts a start in half),
    each set up by :func:`init_worker`."""
    import concurrent.futures as cf
    import multiprocessing as mp
    import os

    with spawning():
        return cf.ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"),
                                      initializer=init_worker, initargs=(warm, os.getpid()))


def take_pool(workers: int):
    """The pool :func:`warm_workers` started, if it has ``workers`` processes and no
    run took it yet; else a new one."""
    for i, (n, pool) in enumerate(_AHEAD):
        if n == workers:
            del _AHEAD[i]
            return pool
    return new_pool(workers)


def _started(_: int) -> None:
    """A task that only makes the pool start a process (and wait for its set-up)."""


@contextlib.contextmanager
def warm_workers(workers: int, warm: Callable[[], object] | None = None):
    """Start ``workers`` local worker processes now, for the next run in this
    process on local processes with as many workers (whole grid or blocks),
    so that they start, import the library and run ``warm()`` while this
    process reads the DEM and makes its regions, instead of after. A pool no
    run took is stopped on leaving; the workers die with this process.

    ``warm`` must be picklable (a module-level function, or a
    :func:`functools.partial` of one) and must not depend on the run.

    Raises
    ------
    WorkerError
        From a script's top level with no ``__main__`` guard, as
        :func:`~terrain.runner.run_ensemble` does.
    """
    refuse_in_bootstrapping_child()
    refuse_unguarded()
    pool = new_pool(workers, warm)
    with spawning():
        for i in range(workers):  # a process started per task until there are ``workers``
            pool.submit(_started, i)
    _AHEAD.append((workers, pool))
    try:
        yield
    finally:
        for i, (_, p) in enumerate(_AHEAD):
            if p is pool:  # not taken: nothing uses it
                del _AHEAD[i]
                stop_pool(pool, {}, broken=True)
                break


# -- backends ------------------------------------------------------------------
def _serial(ctx, plan, workers, scheduler, stop) -> Iterator[tuple]:
    for a, b in plan:
        if stop():
            return
        yield run_chunk(ctx, a, b)


def broken_pool(started: bool) -> WorkerError:
    main = sys.modules.get("__main__")
    script = getattr(main, "__file__", None) and getattr(main, "__spec__", None) is None
    if not started and script:
        return WorkerError(f"worker processes exited while starting; {MAIN_GUARD_HINT}")
    return WorkerError("a worker process died (killed, or out of memory); rerun with fewer "
                       "{workers}, or resume from the checkpoint", "workers")


def _processes(ctx, plan, workers, scheduler, stop) -> Iterator[tuple]:
    import os

    # the context goes to the workers as a scratch file they map (its arrays shared):
    # pickled into each worker's start-up pipe, it held this process until that
    # worker had imported everything, so workers started one after another
    with scratch_folder() as folder:
        yield from _pool(save_shared(os.path.join(folder, "context.pkl"), ctx), plan, workers,
                         stop)


def _pool(shared: str, plan, workers, stop) -> Iterator[tuple]:
    import concurrent.futures as cf
    from concurrent.futures.process import BrokenProcessPool

    started = broken = False
    pool = take_pool(workers)
    window = _Window(2 * workers)
    pending: dict = {}
    try:
        while True:
            while window.room(pending) and not stop():
                nxt = next(plan, None)
                if nxt is None:
                    break
                with spawning():
                    pending[pool.submit(_chunk_in_worker, shared, *nxt)] = nxt[0]
            if not pending:
                return
            done, _ = cf.wait(pending, timeout=POLL_SECONDS, return_when=cf.FIRST_COMPLETED)
            if not done:
                check_workers(pool)
            for f in sorted(done, key=pending.get):
                res = f.result()
                del pending[f]
                started = True
                window.yielded(res[0])
                yield res
    except BrokenProcessPool:
        broken = True
        if stop():  # a worker ended by the signal the run is stopping for: the run saves
            return  # what it folded and reports the signal
        raise broken_pool(started) from None
    finally:
        stop_pool(pool, pending, broken)


def check_workers(pool) -> None:
    """Raise BrokenProcessPool if a worker of ``pool`` has died. The pool's
    own check runs in its manager thread, and a worker killed while it sent a
    result leaves that thread reading the rest of the message for ever (this
    process holds the pipe's write end too, so no end of file comes): its
    futures then never end, and a run waiting on them alone hung. Waits
    look here every :data:`POLL_SECONDS`."""
    from concurrent.futures.process import BrokenProcessPool

    procs = getattr(pool, "_processes", None) or {}
    if any(p.exitcode is not None for p in list(procs.values())):
        raise BrokenProcessPool("a worker process died")


def result_watching(pool, fut):
    """``fut.result()``, looking every :data:`POLL_SECONDS` whether a worker of
    ``pool`` died meanwhile (:func:`check_workers`)."""
    import concurrent.futures as cf

    while True:
        try:
            return fut.result(timeout=POLL_SECONDS)
        except cf.TimeoutError:
            check_workers(pool)


class _Window:
    """At most ``size`` chunk results alive in the parent at once: submitted
    and not yet returned, or returned but held by the in-order fold because
    an earlier chunk is still out (their starts exceed the lowest pending)."""

    def __init__(self, size: int):
        self.size = size
        self.out: list[int] = []  # starts of chunks returned, possibly held

    def yielded(self, start: int) -> None:
        self.out.append(start)

    def room(self, pending: dict) -> bool:
        low = min(pending.values()) if pending else None
        self.out = [a for a in self.out if low is not None and a > low]
        return len(pending) + len(self.out) < self.size


def stop_pool(pool, pending, broken: bool = False) -> None:
    """Shut the pool down without waiting for chunks nobody will fold: when
    the run ends early (interrupt, error, a broken pool) the workers are
    killed and reaped, so no process outlives the run and nothing waits on
    a worker that will never answer. Ctrl-C and SIGTERM wait for it
    (:class:`~terrain.processes.held_signals`): a second one cut it short, a
    worker lived on, and the interpreter's exit waited on it for ever."""
    with held_signals():
        _stop_pool_now(pool, pending, broken)


def _stop_pool_now(pool, pending, broken: bool) -> None:
    early = broken or any(not f.done() for f in pending)
    # the futures not begun are cancelled by the shutdown below (cancel_futures), in the
    # pool's manager thread, which then forgets them: cancelled here, a manager thread
    # that next finds the pool broken failed to mark them ("InvalidStateError" printed)
    procs = list((getattr(pool, "_processes", None) or {}).values())
    # taken before the shutdown, which drops the pool's references to them
    manager = getattr(pool, "_executor_manager_thread", None)
    results = getattr(getattr(pool, "_result_queue", None), "_writer", None)
    if early:
        for proc in procs:
            with contextlib.suppress(Exception):
                proc.kill()
    pool.shutdown(wait=not early, cancel_futures=True)
    for proc in procs if early else ():
        with contextlib.suppress(Exception):
            proc.join(5)
    # the pool's manager thread ends once it sees its workers gone; wait for it, or the
    # interpreter's exit (a signal's exit follows at once) races it closing its wake-up
    # pipe and prints "Exception ignored ... Bad file descriptor" (Python 3.11)
    if early and manager is not None:
        manager.join(0.5)
        if manager.is_alive():
            # a worker killed while it was sending a result leaves the manager thread
            # reading the rest of it for ever (this process holds the pipe's write end
            # too, so no end of file comes), and the interpreter's exit joins that thread:
            # the run would hang after its message. Closing that end ends the read; the
            # thread then sees a broken pool and stops.
            with contextlib.suppress(Exception):
                results.close()
        manager.join(5)


def check_scheduler_address(address: str) -> str:
    """Refuse a scheduler address that is not ``[scheme://]host:port`` with a
    Dask scheme (tcp, tls, ws, wss, ucx); returns it unchanged.

    Raises
    ------
    SchedulerError
        Naming the address and what a valid one looks like.
    """
    m = _ADDRESS.match(str(address).strip())
    scheme = m and m.group("scheme")
    if m is None or (scheme and scheme not in _SCHEMES) or not 0 < int(m.group("port")) < 65536:
        hint = " (an http address is a dashboard, not the scheduler)" \
            if str(address).lower().startswith(("http://", "https://")) else ""
        raise SchedulerError(f"{address}: not a Dask scheduler address{hint}; give "
                             "tcp://host:port, e.g. tcp://scheduler-host:8786, to {scheduler}",
                             "scheduler")
    return address


def _unreachable(address: str, why: str) -> SchedulerError:
    return SchedulerError(f"{address}: cannot reach a Dask scheduler within "
                          f"{HANDSHAKE_SECONDS:g} s ({why}); check the address or drop "
                          "{scheduler}", "scheduler")


def _probe(address: str) -> None:
    """Connect and read the scheduler's opening handshake within
    :data:`HANDSHAKE_SECONDS` (tcp only): a Dask comm sends it at once, as
    an 8-byte frame length and a small frame. Silence, a refusal or bytes
    that are not such a frame raise :class:`SchedulerError`."""
    m = _ADDRESS.match(address.strip())
    if m is None or (m.group("scheme") or "tcp") != "tcp":
        return
    host, port = m.group("host").strip("[]"), int(m.group("port"))
    deadline = time.monotonic() + HANDSHAKE_SECONDS
    try:
        with socket.create_connection((host, port), timeout=HANDSHAKE_SECONDS) as sock:
            head = _recv(sock, 8, deadline)
            (size,) = struct.unpack("<Q", head)
            if not 0 < size < 1 << 20:
                raise _unreachable(address, "it does not answer like a Dask scheduler")
            _recv(sock, size, deadline)
    except SchedulerError:
        raise
    except TimeoutError:
        raise _unreachable(address, "no Dask handshake") from None
    except OSError as exc:
        raise _unreachable(address, exc.strerror or type(exc).__name__) from None


def _recv(sock, n: int, deadline: float) -> bytes:
    buf = b""
    while len(buf) < n:
        left = deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError
        sock.settimeout(left)
        got = sock.recv(n - len(buf))
        if not got:
            raise ConnectionResetError("connection closed during the handshake")
        buf += got
    return buf


def dask_client(scheduler: str | None, workers: int):
    """A Dask client (and the LocalCluster started for it, or None) with at least
    one worker, waited for at most :data:`WORKER_WAIT_SECONDS`.

    Raises
    ------
    SchedulerError
        The scheduler cannot be reached, or has no worker within the wait.
    """
    import logging

    from distributed import Client, LocalCluster

    if scheduler:
        check_scheduler_address(scheduler)
        _probe(scheduler)
        try:
            client, cluster = Client(scheduler, timeout=f"{HANDSHAKE_SECONDS:g}s"), None
        except Exception as exc:  # distributed raises many classes for a bad peer
            raise _unreachable(scheduler, type(exc).__name__) from None
    else:
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               dashboard_address=":0", silence_logs=logging.ERROR)
        client = Client(cluster)
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT_SECONDS)
    except BaseException as exc:
        close_dask(client, cluster)
        if isinstance(exc, (TimeoutError, asyncio.TimeoutError)):
            raise SchedulerError(f"{_where(scheduler)}: the Dask scheduler has no workers (none "
                                 f"joined within {WORKER_WAIT_SECONDS:g} s); start workers for it "
                                 "or drop {scheduler}", "scheduler") from None
        if isinstance(exc, Exception):
            raise DaskWatch(client, scheduler, lambda: False).error(exc) from None
        raise
    return client, cluster


def close_dask(client, cluster) -> None:
    """Close a client and its local cluster without waiting on a peer that is gone
    (what Dask has to say about the waits it abandoned is collected here, quietly)."""
    import gc

    with quiet_dask():
        with contextlib.suppress(Exception):
            client.close(timeout=HANDSHAKE_SECONDS)
        if cluster is not None:
            with contextlib.suppress(Exception):
                cluster.close(timeout=HANDSHAKE_SECONDS)
        gc.collect()


def _where(scheduler: str | None) -> str:
    return scheduler or "the local Dask cluster"


@contextlib.contextmanager
def quiet_dask():
    """distributed logs the tracebacks of a lost peer itself; cairn says what
    happened in one line, so its loggers are silenced for the block."""
    import logging

    import distributed  # noqa: F401  (its loggers exist, with the levels its config gives them)

    names = ["distributed", "asyncio"] + [n for n in logging.root.manager.loggerDict
                                          if n.startswith("distributed.")]
    loggers = [logging.getLogger(n) for n in names]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.CRITICAL + 1)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)


class DaskWatch:
    """Waits on Dask futures without ever hanging.

    Every :data:`POLL_SECONDS` a wait looks at ``stop()`` (Ctrl-C, SIGTERM),
    the scheduler's connection and the workers: a cluster without workers
    for :data:`WORKER_WAIT_SECONDS`, or a scheduler that stays lost, ends the
    wait with one :class:`~terrain.errors.WorkerError` or
    :class:`~terrain.errors.SchedulerError`; so do the errors Dask raises for
    a lost scheduler, a lost worker's data or a task that kept killing its
    workers (:meth:`error`). The caller's checkpoint holds what was done.
    """

    def __init__(self, client, scheduler: str | None, stop: Callable[[], bool]):
        self.client, self.scheduler, self.stop = client, scheduler, stop
        self.since: float | None = None  # when the cluster was first seen without workers

    def result(self, fut, *, on_stop: Callable[[], None] | None = None):
        """``fut``'s result; ``on_stop()`` is called (it should raise) when ``stop()``
        becomes true during the wait (default: raise KeyboardInterrupt). A result
        that is done still has to be fetched from a worker, which may be gone:
        the wait is the same."""
        while True:
            try:
                return fut.result(timeout=POLL_SECONDS)
            except (TimeoutError, asyncio.TimeoutError):
                pass
            except Exception as exc:
                raise self.error(exc) from None
            if self.stop():
                (on_stop or _interrupt)()
            self.check()

    def first_done(self, futs) -> list | None:
        """The futures of ``futs`` that are done, once at least one is; None when
        ``stop()`` became true first. (Polled: ``distributed.wait`` would use the
        process's default client, which need not be the one these belong to.)"""
        while True:
            t0 = time.monotonic()
            while time.monotonic() - t0 < POLL_SECONDS:
                done = [f for f in futs if f.done()]
                if done:
                    return done
                if self.stop():
                    return None
                time.sleep(0.02)
            self.check()

    def check(self) -> None:
        """Raise once the cluster has had no worker, or no scheduler connection,
        for :data:`WORKER_WAIT_SECONDS`."""
        connected = getattr(self.client, "status", "running") == "running"
        workers = 0
        if connected:
            try:
                workers = len(self.client.nthreads())
            except Exception:
                connected = False
        now = time.monotonic()
        if connected and workers:
            self.since = None
            return
        self.since = self.since if self.since is not None else now
        if now - self.since < WORKER_WAIT_SECONDS:
            return
        if not connected:
            raise self._lost("no connection")
        raise WorkerError(f"{_where(self.scheduler)}: all Dask workers left the cluster (none for "
                          f"{WORKER_WAIT_SECONDS:g} s); what was done is in the checkpoint -- "
                          "start workers and rerun with {resume}", "resume")

    def _lost(self, why: str) -> SchedulerError:
        return SchedulerError(f"{_where(self.scheduler)}: lost the Dask scheduler ({why}); what "
                              "was done is in the checkpoint -- rerun with {resume} when the "
                              "scheduler is back", "resume")

    def error(self, exc: BaseException) -> BaseException:
        """The one-line error for what Dask raised while waiting (cairn's own
        errors raised in a task, and bugs, come back unchanged)."""
        if isinstance(exc, CairnError):
            return exc
        name = type(exc).__name__
        text = str(exc).strip().splitlines()[0][:160] if str(exc).strip() else name
        if name in ("FutureCancelledError", "FuturesCancelledError", "CancelledError"):
            if "scheduler-connection-lost" in str(exc) or getattr(self.client, "status",
                                                                  "running") != "running":
                return self._lost("the connection closed")
            why = re.search(r"for reason: ([^.\n]+)", str(exc))
            return WorkerError(f"{_where(self.scheduler)}: a Dask worker was lost with data the "
                               "run needed (its tasks were cancelled"
                               f"{': ' + why.group(1).strip() if why else ''}); what was done is "
                               "in the checkpoint -- rerun with {resume}", "resume")
        if name == "KilledWorker":
            return WorkerError(f"{_where(self.scheduler)}: a task kept ending its Dask workers "
                               "(killed, or out of memory); give the workers more memory, use a "
                               "smaller {block}, and rerun with {resume}", "block", "resume")
        if name == "CommClosedError" or (isinstance(exc, OSError)
                                         and type(exc).__module__.startswith("distributed")):
            return self._lost(text)
        return exc


def _interrupt() -> None:
    raise KeyboardInterrupt


def _dask(ctx, plan, workers, scheduler, stop) -> Iterator[tuple]:
    with quiet_dask():
        client, cluster = dask_client(scheduler, workers)
        try:
            yield from _dask_chunks(client, DaskWatch(client, scheduler, stop), ctx, plan,
                                    workers, stop)
        finally:
            close_dask(client, cluster)


def _dask_chunks(client, watch: DaskWatch, ctx, plan, workers, stop) -> Iterator[tuple]:
    """The whole-grid Dask backend's chunks, in completion order (see :func:`_dask`).

    The context is scattered to every worker, but Dask's active memory manager
    keeps as few copies of a key as its waiting tasks need, so the last copy can
    sit on a worker that then dies; Dask cancels the chunks that needed it
    ("lost dependencies") rather than recompute data it was handed. The context
    is then scattered again and every pending chunk resubmitted (a chunk's
    result depends only on the context and its realisations, so the layers do
    not change), at most :data:`RESCATTERS` times a run.
    """
    try:
        nworkers = max(1, len(client.scheduler_info().get("workers", {})) or workers)
    except Exception as exc:
        raise watch.error(exc) from None
    token = hashlib.sha1(f"{id(ctx)}-{time.time_ns()}".encode()).hexdigest()[:10]
    window = _Window(2 * nworkers)
    pending: dict = {}  # future -> start
    chunks: dict = {}  # start -> the plan's chunk, while it is pending
    state = {"ctx": _scatter(client, watch, ctx, broadcast=True), "round": 0}
    if state["ctx"] is None:
        return

    def submit(nxt):
        key = f"cairn-{token}-{state['round']}-{nxt[0]}"
        pending[client.submit(run_chunk, state["ctx"], *nxt, key=key, retries=3,
                              pure=False)] = nxt[0]

    def top_up():
        while window.room(pending) and not stop():
            nxt = next(plan, None)
            if nxt is None:
                return
            chunks[nxt[0]] = nxt
            submit(nxt)

    top_up()
    while pending:
        done = watch.first_done(list(pending))
        if done is None:  # Ctrl-C or SIGTERM: the run saves what it folded
            return
        for fut in sorted(done, key=pending.get):
            try:
                res = watch.result(fut)
            except WorkerError:
                if not _context_lost(client, state["ctx"]):
                    raise
                if state["round"] >= RESCATTERS:  # the workers holding it keep dying
                    raise WorkerError(
                        f"{_where(watch.scheduler)}: the Dask workers holding the run's data "
                        f"died {RESCATTERS + 1} times (a task may be ending its workers: out "
                        "of memory?); give the workers more memory or use a smaller {block}, "
                        "and rerun with {resume}", "block", "resume") from None
                for f in pending:
                    f.release()
                starts = sorted(pending.values())
                pending.clear()
                state["round"] += 1
                state["ctx"] = _scatter(client, watch, ctx, broadcast=False)
                if state["ctx"] is None:  # Ctrl-C or SIGTERM while it was being sent
                    return
                for a in starts:
                    submit(chunks[a])
                break
            del pending[fut], chunks[res[0]]
            fut.release()
            window.yielded(res[0])
            yield res
        top_up()


def _context_lost(client, ctx_f) -> bool:
    """Whether no worker holds the scattered context any more: its future is no
    longer finished, or the scheduler knows no copy of it (asked, since the
    cancelled chunks can be seen before the context's own news)."""
    if ctx_f.status != "finished":
        return True
    try:
        return not client.who_has([ctx_f]).get(ctx_f.key)
    except Exception as exc:  # cancelled meanwhile: lost; the scheduler gone: the error stands
        return "Cancelled" in type(exc).__name__


def _scatter(client, watch: DaskWatch, ctx, *, broadcast: bool):
    """``ctx`` scattered (to every worker with ``broadcast``; a scatter again
    after a loss goes to one worker, and the others fetch it as their tasks
    need it: a broadcast waits for good on a worker that dies while it
    copies), once there is a worker (a scatter without one gives up after
    Dask's own timeout, with Dask's words); None when ``stop()`` became true
    first. Every wait, for a worker and for the scatter (in a thread), looks
    at ``stop()`` and :meth:`DaskWatch.check` each :data:`POLL_SECONDS`."""
    while True:
        try:
            client.wait_for_workers(1, timeout=POLL_SECONDS)
            break
        except (TimeoutError, asyncio.TimeoutError):
            if watch.stop():
                return None
            watch.check()
        except Exception as exc:
            raise watch.error(exc) from None
    box: dict = {}

    def send():
        try:
            box["future"] = client.scatter(ctx, broadcast=broadcast, hash=False)
        except BaseException as exc:  # handed to the waiting thread
            box["error"] = exc

    sender = threading.Thread(target=send, name="cairn-scatter", daemon=True)
    sender.start()
    while sender.is_alive():
        sender.join(POLL_SECONDS)
        if sender.is_alive():
            if watch.stop():
                return None  # the sender ends with the client, closed by the caller
            watch.check()
    if "error" in box:
        raise watch.error(box["error"]) from None
    return box["future"]


BACKENDS: dict[str, Callable[..., Iterator[tuple]]] = {
    "serial": _serial, "processes": _processes, "dask": _dask}
