"""Entry point: the ``cairn`` command group.

Command bodies only open, call :mod:`terrain` and write; every error cairn
raises on purpose becomes one line on stderr and exit code 2. The command
modules do not import this one (no import circle): it collects them.
"""

from __future__ import annotations

import os
import signal
import sys


def _quit_while_loading(signum, frame):  # pragma: no cover - timing dependent
    """Ctrl-C or SIGTERM while the libraries load: nothing is started yet, so
    say so in one line and leave (no traceback from half-imported modules)."""
    os.write(2, b"cairn: interrupted\n" if signum == signal.SIGINT else b"cairn: terminated\n")
    os._exit(130 if signum == signal.SIGINT else 143)


def _while_loading():
    """Install :func:`_quit_while_loading` (main thread only); returns the handlers to restore."""
    import threading

    if threading.current_thread() is not threading.main_thread():
        return {}
    return {s: signal.signal(s, _quit_while_loading) for s in (signal.SIGINT, signal.SIGTERM)}


_LOADING = _while_loading()

import click  # noqa: E402

from terrain import __version__  # noqa: E402

from . import common  # noqa: E402
from .attribution import demo_cmd, depressions_cmd, peaks_cmd  # noqa: E402
from .catchments_cmd import catchments_cmd  # noqa: E402
from .common import CAUTION, Terminated  # noqa: E402
from .inspect_cmd import inspect_cmd  # noqa: E402
from .sweep_cmd import sweep_cmd  # noqa: E402

for _signum, _handler in _LOADING.items():  # loaded: the commands handle signals from here
    signal.signal(_signum, _handler)

__all__ = ["cli", "main", "run"]


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100},
             epilog=CAUTION)
@click.version_option(__version__, prog_name="cairn")
def cli():
    """cairn: stable peak and basin attribution on elevation rasters.

    Perturbs a DEM with a noise model matched to its stated vertical accuracy,
    recomputes the 0-dimensional persistence pairing for every realisation and
    averages: credit rasters with standard errors (GeoTIFF), feature summaries
    (GeoPackage, CSV) and a quick-look map.
    """


for _command in (inspect_cmd, peaks_cmd, depressions_cmd, catchments_cmd, sweep_cmd, demo_cmd):
    cli.add_command(_command)


def run(argv=None) -> None:
    """Console entry point: click's own usage errors become one line + exit 2."""
    args = sys.argv[1:] if argv is None else list(argv)
    try:
        rv = cli.main(args=args, prog_name="cairn", standalone_mode=False, obj={"argv": args})
    except click.exceptions.NoArgsIsHelpError as exc:
        click.echo(exc.ctx.get_help() if exc.ctx else str(exc))
        sys.exit(2)
    except click.UsageError as exc:
        hint = f" (see: {exc.ctx.command_path} --help)" if exc.ctx else ""
        click.echo(f"cairn: error: {exc.format_message()}{hint}", err=True)
        sys.exit(2)
    except click.ClickException as exc:
        click.echo(f"cairn: error: {exc.format_message()}", err=True)
        sys.exit(exc.exit_code)
    except click.exceptions.Abort as exc:  # a signal outside a command's own handling
        term = isinstance(exc.__cause__, Terminated)
        click.echo(f"cairn: {'terminated' if term else 'interrupted'}", err=True)
        sys.exit(143 if term else 130)
    sys.exit(rv if isinstance(rv, int) else 0)


def main() -> None:
    """The ``cairn`` command: :func:`run`, then leave with its exit code.

    Once the command is over (its outputs published, or its error said),
    Ctrl-C and SIGTERM are ignored: the interpreter's shutdown gives signals
    with a Python handler back their default action, so one arriving in its
    last fraction of a second would otherwise kill a finished run by signal
    instead of letting it exit with its code. Before that, SIGTERM ends the
    command in one line, as Ctrl-C does. (Blocking the signals in the
    main thread is not enough: any other thread still alive, such as a
    library's worker thread, would take the signal.)
    """
    common.CONSOLE = True
    common.on_sigterm_terminate()  # SIGTERM ends the command in one line, like Ctrl-C
    try:
        run()
    finally:
        for signum in (signal.SIGINT, signal.SIGTERM):
            signal.signal(signum, signal.SIG_IGN)


if __name__ == "__main__":  # pragma: no cover
    main()
