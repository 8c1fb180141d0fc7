"""Entry point: the ``cairn`` command group.

Command bodies only open, call :mod:`terrain` and write; every error cairn
raises on purpose becomes one line on stderr and exit code 2.
"""

from __future__ import annotations

import functools
import sys

import click

from terrain import __version__
from terrain.errors import CairnError

CAUTION = ("Caution: cairn's layers are analysis aids, not engineering design or official flood "
           "mapping; defer to local codes, official flood maps and licensed professionals.")


CATCH_CAUTION = ("Caution: catchment probabilities are an analysis aid, not a flood or drainage "
                 "design; defer to local codes and licensed practice.")


def guarded(fn):
    """Turn cairn's own errors into one line + exit 2, and Ctrl-C into exit 130."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except CairnError as exc:
            click.echo(f"cairn: error: {exc}", err=True)
            sys.exit(2)
        except KeyboardInterrupt:
            click.echo("cairn: interrupted", err=True)
            sys.exit(130)

    return wrapper


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="cairn")
def cli():
    """cairn: stable peak and basin attribution on elevation rasters.

    Perturbs a DEM with a noise model matched to its stated vertical accuracy,
    recomputes the 0-dimensional persistence pairing for every realisation and
    averages: credit rasters with standard errors (GeoTIFF), feature summaries
    (GeoPackage, CSV) and a quick-look map.

    \b
    Caution: the layers are analysis aids, not engineering design or official
    flood mapping; defer to local codes, official flood maps and licensed
    professionals.
    """


def _register():
    from . import inspect_cmd, run_cmds  # noqa: F401  (commands attach themselves)


_register()

def run(argv=None) -> None:
    """Console entry point: click's own usage errors become one line + exit 2."""
    try:
        rv = cli.main(args=argv, prog_name="cairn", standalone_mode=False)
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
