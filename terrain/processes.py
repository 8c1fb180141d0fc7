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
    """Block SIGINT in this thread while child processes start: a child
    inherits the blocked signal, so a Ctrl-C during its start-up never
    reaches it (the parent receives it when the block ends)."""

    def __enter__(self):
        import signal
        import threading

        self.old = None
        if hasattr(signal, "pthread_sigmask") and threading.current_thread() is threading.main_thread():
            self.old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
        return self

    def __exit__(self, *exc):
        import signal

        if self.old is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, self.old)
        return False
