"""What every command shares: the caution, one-line errors, parameter-to-flag names.

Library messages name library parameters (``{threshold}``); this module is
the one place that says which flag sets each, so errors read in the
command line's own words.
"""

from __future__ import annotations

import functools
import os
import shlex
import sys

import click

from terrain.errors import CairnError, CairnWarning, Terminated
from terrain.outputs.caution import CAUTION

__all__ = ["CAUTION", "INDEPENDENT_ERROR", "guarded", "flag", "command_line", "warn",
           "warn_later", "flush_warnings", "Terminated", "on_sigterm_terminate"]

INDEPENDENT_ERROR = (
    "independent per-cell error deepens flat floors and raises flat tops (the lowest of n noisy "
    "cells lies about RMSE x sqrt(2 ln n) below a flat floor); compare with the figure on "
    "the DEM as given ('unperturbed'), and give --range when the DEM's error is spatially "
    "correlated, as it usually is "
    "(Holmes, Chadwick & Kyriakidis 2000, J. Hydrology 233; review: Wechsler 2007, HESS 11)")

FLAGS = {
    "rmse": "--rmse", "le90": "--le90", "a95": "--a95", "kernel": "--kernel",
    "range_m": "--range", "covariance": "--covariance", "nugget": "--nugget",
    "threshold_jitter": "--threshold-jitter", "weight": "--weight",
    "connectivity": "--connectivity", "base": "--base", "band": "--band", "bbox": "--bbox",
    "realisations": "--realisations", "seed": "--seed", "workers": "--workers",
    "scheduler": "--scheduler", "checkpoint": "--checkpoint", "resume": "--resume",
    "target_se": "--target-se", "overwrite": "--overwrite", "force": "--force",
    "snap_m": "--snap", "outlets": "--outlets", "kind": "--kind", "backend": "--workers",
    "draw": "--kernel", "merge_level": "--merge-level", "min_presence": "--min-presence",
    "channel_area": "--channel-area", "conditioning": "--conditioning",
    "breach_cap": "--breach-cap", "nodata": "--nodata", "memory_check": "--force",
    "block": "--block", "vertical_unit": "--vertical-unit", "accuracy": "--le90/--a95",
    "outlets_crs": "--outlets-crs", "outdir": "-o/--outdir", "counts": "--counts-store",
}
_CUTOFF = {"peaks": "--min-prominence", "depressions": "--min-depth"}


def flag(param: str, kind: str | None = None) -> str:
    """The command-line flag that sets library parameter ``param``."""
    if param == "threshold":
        return _CUTOFF.get(kind or "", "--min-prominence/--min-depth")
    return FLAGS.get(param, param)


def _kind() -> str | None:
    ctx = click.get_current_context(silent=True)
    if ctx is None:
        return None
    return ctx.params.get("kind") or (ctx.command.name if ctx.command.name in _CUTOFF else None)


#: a signal handled while compiled code calls back into Python is sent again this much later
RETRY_SECONDS = 0.05


@functools.lru_cache(maxsize=1)
def _numba_folder() -> str:
    """numba's own package folder (not any folder that happens to be named numba)."""
    import numba

    return os.path.join(os.path.dirname(os.path.realpath(numba.__file__)), "")


def _interrupt(signum, frame):
    """Ctrl-C or SIGTERM outside a run's realisations: raise KeyboardInterrupt or
    :class:`Terminated` -- except while Python code of numba's own package runs (a
    kernel's first call unpickles its environment from the cache, called back
    from compiled code): an exception raised there is not one numba can pass on,
    and the process crashed (a segmentation fault or a traceback, in about a third
    of the Ctrl-Cs sent while a run's first kernels loaded) -- and while an import
    runs (importlib's own frames): raised inside importlib's module locks while
    another thread imports (the map's preparation thread), the exception was
    swallowed ("Exception ignored in _get_module_lock") and the run went on, or
    hung on a lock left held. The signal is then sent again
    :data:`RETRY_SECONDS` later, when that code is over (so on a cold kernel
    cache it waits for the compiling, and in an import for the import)."""
    import signal
    import threading

    inside = _numba_folder()
    f = frame
    while f is not None:
        name = f.f_code.co_filename
        if name.startswith("<frozen importlib") or os.path.realpath(name).startswith(inside):
            again = threading.Timer(RETRY_SECONDS, os.kill, (os.getpid(), signum))
            again.daemon = True
            again.start()
            return
        f = f.f_back
    raise Terminated() if signum == signal.SIGTERM else KeyboardInterrupt()


def guarded(fn):
    """Turn cairn's own errors, a full disk and running out of memory into one line + exit 2,
    Ctrl-C into exit 130 and SIGTERM into exit 143 (outputs in progress are
    dropped whole: see terrain.io.staged_outputs)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        previous = _on_signals(_interrupt)
        try:
            try:
                return fn(*args, **kwargs)
            finally:
                _release_resources()
        except CairnError as exc:
            kind = _kind()
            click.echo(f"cairn: error: {exc.render(lambda p: flag(p, kind))}", err=True)
            sys.exit(2)
        except OSError as exc:
            if not _disk_full(exc):
                raise
            where = f" writing {exc.filename}" if exc.filename else ""
            click.echo(f"cairn: error: disk full{where} ({exc.strerror or exc}); free some space "
                       "or choose other folders (TMPDIR for scratch files)", err=True)
            sys.exit(2)
        except MemoryError:
            click.echo("cairn: error: out of memory (the machine could not provide what the run "
                       f"needed); use {flag('bbox')} for a smaller window or fewer "
                       f"{flag('workers')}", err=True)
            sys.exit(2)
        except KeyboardInterrupt as exc:
            term = isinstance(exc, Terminated)
            click.echo(f"cairn: {'terminated' if term else 'interrupted'}{_kept(exc)}", err=True)
            sys.exit(143 if term else 130)
        finally:
            _restore_signals(previous)

    return wrapper


def _kept(exc: BaseException) -> str:
    """What a signal outside the realisations leaves, for its one line: outputs
    published whole while it waited (``staged_outputs`` marks the exception),
    or else nothing written, and the checkpoint that holds the realisations."""
    published = getattr(exc, "published", None)
    if published:
        return f" once its outputs were published in {published} (they are whole)"
    ctx = click.get_current_context(silent=True)
    ck = ctx.params.get("checkpoint") if ctx is not None else None
    if ck and os.path.isfile(ck):
        return (f"; nothing written. {ck} holds the realisations done: the same command plus "
                f"{flag('resume')} continues from it")
    return ""


def _disk_full(exc: BaseException) -> bool:
    """True for an OSError (or one it came from) saying a disk or quota is full."""
    import errno

    while exc is not None:
        if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
            return True
        exc = exc.__cause__ or exc.__context__
    return False


def _release_resources() -> None:
    """Release what the command holds (the output folder's lock, checkpoint
    locks, a scratch folder) here, inside :func:`guarded`, rather than when
    click closes the context afterwards, and with Ctrl-C and SIGTERM
    ignored meanwhile: once the command has published or failed there is
    nothing left to interrupt, and a signal must not cut a folder's removal
    short or kill the process with its lock still in place."""
    import signal
    import threading

    ctx = click.get_current_context(silent=True)
    if ctx is None:
        return
    if threading.current_thread() is not threading.main_thread():
        ctx.close()
        return
    sigs = (signal.SIGINT, signal.SIGTERM)
    previous = {s: signal.signal(s, signal.SIG_IGN) for s in sigs}
    try:
        ctx.close()  # click's own close at the context's end then finds nothing left
    finally:
        if not CONSOLE:  # the console entry keeps them ignored: the command is over
            for s, h in previous.items():
                signal.signal(s, h)


#: set by the console entry (:func:`cairn_cli.main.main`): the process ends with the
#: command, so signals stay ignored once its resources are released; an in-process
#: caller of ``run()`` gets its handlers back
CONSOLE = False


def on_sigterm_terminate():
    """SIGTERM raises :class:`Terminated` from here on (main thread only, see
    :func:`_interrupt`); returns the previous handlers."""
    return _on_signals(_interrupt, signals=("SIGTERM",))


def _on_signals(handler, signals=("SIGINT", "SIGTERM")):
    """Install ``handler`` for ``signals`` (main thread only); returns the previous
    handlers by name, for :func:`_restore_signals`."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        return None
    return {name: signal.signal(getattr(signal, name), handler) for name in signals}


def _restore_signals(previous) -> None:
    """Put back the handlers :func:`_on_signals` returned (None: nothing was installed)."""
    import signal

    for name, handler in (previous or {}).items():
        signal.signal(getattr(signal, name), handler)


def command_line() -> str:
    """The command line of this invocation, shell-quoted (for run.json and tags)."""
    ctx = click.get_current_context(silent=True)
    argv = (ctx.find_root().obj or {}).get("argv") if ctx else None
    return shlex.join(["cairn", *(argv if argv is not None else sys.argv[1:])])


def warn(line) -> None:
    """Print a warning once; a :class:`terrain.errors.CairnWarning` names flags."""
    text = line.render(flag) if isinstance(line, CairnWarning) else str(line)
    click.echo(f"cairn: warning: {text}", err=True)


def warn_later(line) -> None:
    """Hold a warning until the run starts (:func:`flush_warnings`), so that input
    refused while the run is set up ends with its one error line alone."""
    ctx = click.get_current_context(silent=True)
    if ctx is None:
        warn(line)
        return
    ctx.meta.setdefault("cairn_warnings", []).append(line)


def flush_warnings() -> None:
    """Print the warnings held by :func:`warn_later`, once."""
    ctx = click.get_current_context(silent=True)
    for line in ctx.meta.pop("cairn_warnings", []) if ctx is not None else []:
        warn(line)
