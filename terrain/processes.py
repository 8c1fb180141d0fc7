"""What this package's child processes share: dying with the parent, and a
Ctrl-C that cannot reach a child while it starts.

The realisations' pool workers (:mod:`terrain.runner.backends`) use both;
the forked copies that write a run's files (:mod:`terrain.outputs.beside`)
die with their parent too (and block SIGTERM as well while they fork).
"""

from __future__ import annotations

import sys

__all__ = ["die_with_parent", "spawning"]


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


class spawning:
    """Start child processes with no signal able to cut a start in half.

    SIGINT is blocked in this thread, so each child inherits it blocked and a
    Ctrl-C during its start-up never reaches it. And SIGINT and SIGTERM are
    held in this process: their Python handlers only note them until the
    block ends, then each noted signal is raised again. Blocking alone is not
    enough: a signal sent to this process lands on any thread that does not
    block it (a pool's manager thread, say), and Python then runs its handler
    in this thread between two bytecodes, which could be in the middle of
    writing a child's start-up data to its pipe; the child would then read a
    cut pipe and print a traceback. Only the main thread holds (it alone can
    set handlers); elsewhere this is a no-op.
    """

    _HELD = ("SIGINT", "SIGTERM")

    def __enter__(self):
        import signal
        import threading

        self.old = None
        self.handlers: dict = {}
        self.noted: list[int] = []
        if not (hasattr(signal, "pthread_sigmask")
                and threading.current_thread() is threading.main_thread()):
            return self
        self.old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
        for name in self._HELD:
            sig = getattr(signal, name)
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
