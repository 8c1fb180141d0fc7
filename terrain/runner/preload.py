"""What the fork server behind cairn's worker pools loads once, before it forks workers.

A worker forked from the server starts with Python, numpy, numba and cairn's
jobs already imported and numba's compiler already set up, instead of doing
all of it again (about two seconds of CPU a worker with the spawn start
method). SIGINT is blocked here, so a worker inherits it blocked: a Ctrl-C
while it starts reaches only the run's own process, which handles it
(:func:`terrain.runner.backends.init_worker` then ignores it for good).

Nothing here may fail: the fork server would die with it and take the pool
along, so an error only means that the workers load what they need themselves.
"""

from __future__ import annotations

import signal

__all__: list[str] = []

try:
    signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
except (AttributeError, OSError, ValueError):  # pragma: no cover - no POSIX signal masks
    pass

try:
    import numba

    import terrain  # noqa: F401  (numpy, numba, the jobs and their engines, the backends)

    numba.njit(lambda x: x + 1)(1)  # numba's compiler and LLVM, set up once for every worker
except Exception:  # pragma: no cover - see the module's docstring
    pass
