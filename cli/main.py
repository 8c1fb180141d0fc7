"""Entry point: the ``cairn`` command group.

Command bodies only open, call :mod:`terrain` and write; every error cairn
raises on purpose becomes one line on stderr and exit code 2. The command
modules do not import this one (no import circle): it collects them.
"""

from __future__ import annotations

import sys

import click

from terrain import __version__

from .attribution import demo_cmd, depressions_cmd, peaks_cmd
from .catchments_cmd import catchments_cmd
from .common import CAUTION
from .inspect_cmd import inspect_cmd
from .sweep_cmd import sweep_cmd

__all__ = ["cli", "run"]


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
    except click.exceptions.Abort:
        click.echo("cairn: interrupted", err=True)
        sys.exit(130)
    sys.exit(rv if isinstance(rv, int) else 0)


if __name__ == "__main__":  # pragma: no cover
    run()
