"""The steps every run command takes: model, DEM, outputs, memory, run, interrupt.

Thin: each step calls the library, which validates and raises; this module
only wires the options through and prints.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import click

from terrain.errors import OutputError
from terrain.io import dem_warnings, prepare_outdir, read_dem
from terrain.noise import ErrorModel, rmse_from
from terrain.resources import check_memory
from terrain.runner import Execution, RunInterrupted, run_ensemble

from .common import warn
from .progress import progress_bar

__all__ = ["error_model", "read", "execution", "outputs", "run_job"]

RUN_KEYS = ("realisations", "seed", "workers", "scheduler", "checkpoint", "resume", "target_se")


def error_model(opts: dict, rmse: float | None = None) -> ErrorModel:
    """The error model the options describe (``rmse`` overrides the accuracy options)."""
    if rmse is None:
        rmse = rmse_from(rmse=opts["rmse"], le90=opts["le90"], a95=opts["a95"])
    return ErrorModel(rmse=rmse, kernel=opts["kernel"], range_m=opts["range_m"],
                      covariance=opts["covariance"], nugget=opts["nugget"])


def read(path, opts: dict):
    """Read the DEM and say once what a user should know about it."""
    dem = read_dem(path, band=opts.get("band"), bbox=opts.get("bbox"))
    for line in dem_warnings(dem):
        warn(line)
    return dem


def execution(opts: dict) -> Execution:
    """The run's execution settings, validated before any output is touched."""
    return Execution(**{k: opts[k] for k in RUN_KEYS})


def outputs(outdir, names: list[str], opts: dict) -> Path:
    """Check the output folder (and the checkpoint) before the run starts."""
    out = prepare_outdir(outdir, names, overwrite=opts["overwrite"] or opts["resume"])
    ck = opts["checkpoint"]
    if ck and Path(ck).exists() and not opts["resume"]:
        if not opts["overwrite"]:
            raise OutputError(f"{ck}: checkpoint exists; pass {{resume}} to continue it or "
                              "{overwrite} to start afresh", "resume", "overwrite")
        os.unlink(ck)
    return out


def run_job(dem, job, model, ex: Execution, opts: dict, *, label: str, headline: str):
    """Check memory, run the ensemble with a progress bar, turn Ctrl-C into exit 130."""
    check_memory(dem, job, workers=ex.n_workers, force=opts["force"],
                 realisations=ex.realisations)
    if not opts["quiet"]:
        click.echo(f"cairn {label}: {dem.shape[0]}x{dem.shape[1]} cells, error "
                   f"{model.describe()}, {headline}, {ex.realisations} realisations, "
                   f"seed {ex.seed}", err=True)
    try:
        with progress_bar(enabled=not opts["quiet"] and sys.stderr.isatty(), label=label) as bar:
            return run_ensemble(dem, job, model, progress=bar,
                                **{k: getattr(ex, k) for k in RUN_KEYS})
    except RunInterrupted as exc:
        if exc.checkpoint:
            click.echo(f"cairn: interrupted after {exc.done} realisations; saved {exc.checkpoint}. "
                       "Resume with the same command plus --resume.", err=True)
        else:
            click.echo(f"cairn: interrupted after {exc.done} realisations; nothing written "
                       "(use --checkpoint FILE to be able to resume).", err=True)
        sys.exit(130)
