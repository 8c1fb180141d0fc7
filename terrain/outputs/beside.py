"""Writing a run's files on both cores: a step in a forked copy of the process.

Drawing a figure and summarising features hold the interpreter's lock, so
in one process they and the writing of layers and tables take turns on one
core. On Linux, in a process running no other thread, :func:`in_a_copy`
forks: the copy does one writing step (a run's layers while its features
are summarised; with :func:`write_beside`, the map while the tables are
written, the chart drawn and, for peaks and depressions, the summary's
second step made) and this process the rest, each on a core of its own.
The copy imports nothing and starts in milliseconds (its memory is this
process's, shared until either side writes to a page), works from the
same arrays with the same code, so its files are the bytes this process
would write. It dies with this process and ignores Ctrl-C (this process
handles it and kills the copy), and when it fails or dies this process does
its step itself, so an error is raised here as every other writing error is.

Elsewhere (no ``fork``, or another thread running: a fork copies only the
calling thread, and a lock another thread held would stay held in the copy
for ever) the step runs here after the rest, one after the other. (Writing
the files in a second thread while the figures were drawn was tried and
dropped: Python's warning filters are one list for all threads, and
``warnings.catch_warnings`` in two threads at once can leave a filter set
or lose one.)
"""

from __future__ import annotations

import contextlib
import os
import struct
import sys
import threading
import time
import warnings
from collections.abc import Callable
from pathlib import Path

from ..io import discard_partial, write_figure
from ..processes import die_with_parent

__all__ = ["write_beside", "in_a_copy", "copy_deadline", "plain_text", "can_fork"]


@contextlib.contextmanager
def plain_text():
    """Figures made and saved in this block show text as given: a ``$`` in an
    outlet id or attribute is not matplotlib's math markup (an unbalanced one
    would fail the figure), and a character the font lacks is drawn as a
    box, not announced as a warning."""
    import matplotlib

    with matplotlib.rc_context({"text.parse_math": False}), warnings.catch_warnings():
        warnings.filterwarnings("ignore", r"Glyph \d+ .*missing from", UserWarning)
        yield


def can_fork() -> bool:
    """Whether a writing step may run in a forked copy: on Linux, with no
    other Python thread running in this process."""
    return sys.platform.startswith("linux") and hasattr(os, "fork") \
        and threading.active_count() == 1


def write_beside(out: Path, clock, files: Callable[[], None],
                 figures: dict[str, Callable[[], object]]) -> None:
    """Run ``files()`` (layers and tables, and whatever must come before them)
    and save each of ``figures`` (file name: a function returning a
    matplotlib Figure) as ``out / name``, side by side: the first figure (put
    the costliest first) in a forked copy (:func:`in_a_copy`), the others
    here once the files are written.
    ``clock(step)`` times each step (``figures`` for the figures, in both
    processes).

    Returns when every file is written; raises what ``files()`` or a figure
    raised (a figure's error after the layers and tables are written).
    """
    first, *rest = figures.items()
    with in_a_copy(clock, "figures", lambda: _save(out, [first]), [out / first[0]]):
        files()
        _save(out, rest, clock)


def _save(out: Path, figures, clock=None) -> None:
    with clock("figures") if clock else contextlib.nullcontext(), plain_text():
        for name, make in figures:
            write_figure(out / name, make())


@contextlib.contextmanager
def in_a_copy(clock, step: str, work: Callable[[], None], outputs: list[Path]):
    """Run ``work()``, which writes the files ``outputs``, in a forked copy of
    this process while the block runs here (:func:`can_fork`); without a
    fork, here after the block.

    The copy's seconds go to ``clock.record(step, ...)``, with the names it
    wrote; here ``clock(step)`` times ``work()``. When the copy cannot start
    (no memory or processes left to fork), fails, dies or outlives
    :func:`copy_deadline`, what it left half-written is removed and
    ``work()`` runs here after the block, raising what fails as any writing
    error (``clock.fell_back`` names the step); when the block raises or is
    interrupted the copy is killed (and reaped) first. GDAL in the copy
    writes with one thread: its worker threads, if this process started
    any, are not in the copy; and the copy hands no freed memory back (it
    exits when done).
    """
    copy = _Copy() if can_fork() else None
    if copy is not None:
        try:
            copy.start(work)
        except BaseException:
            copy.stop()
            raise
    if copy is None or copy.pid is None:  # no fork, or none to be had
        if copy is not None:
            copy.stop()
        yield
        with clock(step):
            work()
        return
    try:
        began = time.perf_counter()
        yield
        seconds = copy.wait(copy_deadline(time.perf_counter() - began))
    finally:
        copy.stop()
    if seconds is not None:
        clock.record(step, seconds, copy.started, copy.ended,
                     files=tuple(p.name for p in outputs))
        return
    clock.fell_back.append(step)
    for path in outputs:
        discard_partial(path)
    with clock(step):
        work()


def copy_deadline(block_seconds: float) -> float:
    """Seconds to wait for a forked copy once this process's own part is done:
    5 minutes and ten times that part. A copy that takes longer is taken to
    hang (a lock a native thread of this process held at the fork, say) and
    is killed; its work is done here."""
    return 300.0 + 10.0 * block_seconds


class _Copy:
    """A forked copy of this process that runs ``work()`` and reports the
    seconds it took through a pipe (8 bytes), then exits; it exits with
    status 1 and reports nothing when anything fails. ``pid`` is None until
    it runs (and when the fork failed)."""

    def __init__(self):
        self.pid: int | None = None
        self.read: int | None = None
        self.started = self.ended = time.perf_counter()

    def start(self, work: Callable[[], None]) -> None:
        """Fork. Ctrl-C and SIGTERM are blocked from before the fork until
        the pid is kept and the copy has set its own handlers, so neither
        can reach the copy while it still runs this process's code (a
        handler raising there would run the caller's ``finally`` blocks
        in the copy) nor leave a copy nobody knows of. A fork that fails
        (ENOMEM, EAGAIN) leaves ``pid`` None."""
        import signal

        parent = os.getpid()
        blocked = {signal.SIGINT, signal.SIGTERM}
        old = signal.pthread_sigmask(signal.SIG_BLOCK, blocked)
        try:
            try:
                self.read, write = os.pipe()
            except OSError:
                return
            with warnings.catch_warnings():
                # Python 3.12+ warns of a fork with any thread of the process
                # running; the only others are idle native pools (OpenBLAS, GDAL)
                # that the copy leaves alone (GDAL writes with one thread there)
                warnings.filterwarnings("ignore", r".*multi-threaded, use of fork\(\)",
                                        DeprecationWarning)
                try:
                    pid = os.fork()
                except OSError:
                    os.close(write)
                    return
            if pid == 0:
                try:
                    _in_copy(parent, write, work, old)
                finally:
                    os._exit(1)
            self.pid = pid
            self.started = time.perf_counter()
            os.close(write)
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)

    def wait(self, deadline: float) -> float | None:
        """Wait for the copy, at most ``deadline`` seconds (then kill it); its
        seconds, or None when it failed, died or was killed. A copy reaped
        elsewhere (SIGCHLD ignored) is judged by its report alone."""
        import errno

        end, ok = time.monotonic() + deadline, True
        while True:
            try:
                pid, status = os.waitpid(self.pid, os.WNOHANG)
            except ChildProcessError as exc:  # reaped by someone else
                if exc.errno != errno.ECHILD:
                    raise
                pid, status = self.pid, 0
            if pid:
                ok = os.WIFEXITED(status) and os.WEXITSTATUS(status) == 0
                break
            if time.monotonic() > end:
                self.stop()
                return None
            time.sleep(0.01)
        self.pid = None
        self.ended = time.perf_counter()
        report = os.read(self.read, 8)
        return struct.unpack("d", report)[0] if ok and len(report) == 8 else None

    def stop(self) -> None:
        """Kill the copy if it still runs (this process failed or was
        interrupted, or the copy outlived its deadline), reap it, close
        the pipe."""
        import signal

        if self.pid is not None:
            with contextlib.suppress(ProcessLookupError):
                os.kill(self.pid, signal.SIGKILL)
            with contextlib.suppress(ChildProcessError):
                os.waitpid(self.pid, 0)
            self.pid = None
        if self.read is not None:
            os.close(self.read)
            self.read = None


def _in_copy(parent: int, write: int, work: Callable[[], None], mask) -> None:
    """The forked copy's whole life: work, report, exit. Nothing of the
    parent's stack below the fork runs here (``os._exit``: no ``finally``,
    no ``atexit``, no buffers flushed twice). Starts with Ctrl-C and SIGTERM
    blocked; sets its own handlers (Ctrl-C ignored: the parent handles it
    and kills the copy; SIGTERM ends it) before ``mask`` is restored."""
    status = 1
    try:
        import signal

        from ..io import keep_freed_memory, one_gdal_thread

        signal.signal(signal.SIGINT, signal.SIG_IGN)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        signal.pthread_sigmask(signal.SIG_SETMASK, mask)
        die_with_parent(parent)
        one_gdal_thread()
        keep_freed_memory()
        t0 = time.perf_counter()
        work()
        os.write(write, struct.pack("d", time.perf_counter() - t0))
        status = 0
    except BaseException:  # the parent does the work again and raises what fails
        pass
    finally:
        os._exit(status)
