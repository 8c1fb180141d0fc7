"""What this package's child processes share: dying with the parent, and a
Ctrl-C that cannot reach a child while it starts.

The realisations' pool workers (:mod:`terrain.runner.backends`) use both;
the forked copies that write a run's files (:mod:`terrain.outputs.beside`)
die with their parent too (and block SIGTERM as well while they fork).
"""

from __future__ import annotations

import sys

__all__ = ["die_with_parent", "held_signals", "spawning"]


def die_with_parent(parent: int) -> None:
    """Ask Linux to kill this process when its parent dies (prctl
    PR_SET_PDEATHSIG; elsewhere that is a no-op), and exit at once (status 1)
    if the parent, ``parent`` by pid, is already gone: the request only
    watches a parent alive when it is made."""
    import os

    if sys.platform.startswith("linux"):
        import ctypes
        import signal

        try:
            ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):
            pass
    if os.getppid() != parent:
        os._exit(1)


class held_signals:
    """Hold SIGINT and SIGTERM while a short step runs that must not be cut in
    half (a child's start, stopping a pool of workers): their Python handlers
    only note them until the block ends, then each noted signal is raised
    again, to the handler that was there before. Only the main thread holds
    (it alone can set handlers); elsewhere this is a no-op.

    A second Ctrl-C during the stop of a pool once cut that stop short: a
    worker was left unkilled, and the interpreter's exit waited on it for
    ever (or it printed a traceback, its start-up data gone with the parent).
    """

    _block = False  # the same signals also blocked in this thread (spawning)

    def __enter__(self):
        import signal
        import threading

        self.old = None
        self.handlers: dict = {}
        self.noted: list[int] = []
        if threading.current_thread() is not threading.main_thread():
            return self
        held = (signal.SIGINT, signal.SIGTERM)
        if self._block and hasattr(signal, "pthread_sigmask"):
            self.old = signal.pthread_sigmask(signal.SIG_BLOCK, held)
        for sig in held:
            if signal.getsignal(sig) is not None:  # None: set outside Python, left alone
                self.handlers[sig] = signal.signal(sig, self._note)
        return self

    def _note(self, signum, frame) -> None:
        self.noted.append(signum)

    def __exit__(self, *exc):
        import signal

        for sig, handler in self.handlers.items():
            signal.signal(sig, handler)
        if self.old is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, self.old)
        for sig in dict.fromkeys(self.noted):
            signal.raise_signal(sig)
        return False


class spawning(held_signals):
    """Start child processes with no signal able to cut a start in half.

    SIGINT and SIGTERM are blocked in this thread, so each child inherits
    them blocked: a Ctrl-C or a SIGTERM sent to the whole process group
    never reaches it (a worker ignores SIGINT from then on and keeps SIGTERM
    blocked; the parent handles both and kills its workers when it stops
    early, and they die with it). And both are held in this process
    (:class:`held_signals`). Blocking alone is not enough: a signal sent to
    this process lands on any thread that does not block it (a pool's
    manager thread, say), and Python then runs its handler in this thread
    between two bytecodes, which could be in the middle of writing a child's
    start-up data to its pipe; the child would then read a cut pipe and
    print a traceback.
    """

    _block = True
