"""The steps every run command takes: model, DEM, outputs, memory, run, interrupt.

Thin: each step calls the library, which validates and raises; this module
only wires the options through and prints.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import sys
import threading
from pathlib import Path

import click

from terrain.errors import OutputError
from terrain.io import (
    claim_outdir,
    dem_warnings,
    file_exists,
    hold_checkpoint,
    read_dem,
    read_header,
    recorded_outputs,
    remove_file,
    replaced_beside_checkpoint,
    replaced_by,
    resident_memory,
    resolves_into,
    same_file,
    scratch_folder,
)
from terrain.noise import ErrorModel, rmse_from
from terrain.outputs.manifest import every_output
from terrain.resources import check_disk, check_memory, choose_layout
from terrain.runner import Execution, RunInterrupted, run_ensemble
from terrain.runner.backends import warm_workers
from terrain.runner.checkpoint import prepare_checkpoint

from .common import flush_warnings, warn, warn_later
from .progress import progress_bar

__all__ = ["EXEC_KEYS", "error_model", "read", "header", "execution", "outputs", "guard_memory",
           "guard_summaries", "run_job", "workers_ahead"]

RUN_KEYS = ("realisations", "seed", "workers", "scheduler", "checkpoint", "resume", "target_se")
EXEC_KEYS = RUN_KEYS + ("memory_check", "block", "counts")  # what run_ensemble takes from an Execution


def error_model(opts: dict, rmse: float | None = None) -> ErrorModel:
    """The error model the options describe (``rmse`` overrides the accuracy options);
    an accuracy stated as LE90 or at 95% is kept to be echoed beside the RMSE."""
    accuracy: tuple = ()
    if rmse is None:
        rmse = rmse_from(rmse=opts["rmse"], le90=opts["le90"], a95=opts["a95"])
        accuracy = next(((k, opts[k]) for k in ("le90", "a95") if opts.get(k) is not None), ())
    return ErrorModel(rmse=rmse, kernel=opts["kernel"], range_m=opts["range_m"],
                      covariance=opts["covariance"], nugget=opts["nugget"], accuracy=accuracy)


def header(path, opts: dict):
    """What the DEM's header says (grid, band, type) without reading its pixels."""
    return read_header(path, band=opts.get("band"), bbox=opts.get("bbox"), nodata=opts.get("nodata"),
                       vertical_unit=opts.get("vertical_unit"))


def read(path, opts: dict, *, on_disk: bool = False):
    """Read the DEM and say once what a user should know about it; ``on_disk``
    keeps it in a scratch folder (removed when the command ends) for an
    out-of-core run."""
    scratch = None
    if on_disk:
        scratch = click.get_current_context().with_resource(scratch_folder())
    dem = read_dem(path, band=opts.get("band"), bbox=opts.get("bbox"), nodata=opts.get("nodata"),
                   scratch=scratch, vertical_unit=opts.get("vertical_unit"))
    for line in dem_warnings(dem):
        warn_later(line)
    return dem


def execution(opts: dict) -> Execution:
    """The run's execution settings, validated before any output is touched."""
    return Execution(**{k: opts[k] for k in RUN_KEYS}, memory_check=not opts.get("force", False),
                     block=opts.get("block"), counts=opts.get("counts"))


def outputs(outdir, names: list[str], opts: dict, *, inputs=(), checkpoints=None,
            patterns=()) -> Path:
    """Claim the output folder for this command (locked until it ends), lock the
    checkpoint files and check them and the inputs against what the run
    writes, before the run starts.

    ``checkpoints`` are the files the run will save (default: ``--checkpoint``);
    ``patterns`` the glob patterns of earlier outputs the publication removes.
    The files of the run published in the folder before that this one does
    not write (another command's; its run.json lists them) count as files
    the run replaces: the publication removes them.
    """
    names = names + [n for n in recorded_outputs(outdir, every_output()) if n not in names]
    ck = opts["checkpoint"]
    cks = [Path(c) for c in (checkpoints if checkpoints is not None else [ck] if ck else [])]
    _inputs_kept(inputs, outdir, names, patterns, cks)
    _distinct(cks, inputs, [Path(outdir) / n for n in names])
    _checkpoints_kept(cks, outdir, names, patterns)
    ctx = click.get_current_context()
    out = ctx.with_resource(claim_outdir(outdir, names,
                                         overwrite=opts["overwrite"] or opts["resume"]))
    for c in cks:  # the folder is writable; a file there is a cairn checkpoint; no run uses it
        prepare_checkpoint(c, resume=opts["resume"])
        ctx.with_resource(hold_checkpoint(c))
    if opts["resume"]:
        return out
    existing = [c for c in cks if file_exists(c)]
    if existing and not opts["overwrite"]:
        raise OutputError(f"{existing[0]}: checkpoint exists; pass {{resume}} to continue it or "
                          "{overwrite} to start afresh", "resume", "overwrite")
    for c in existing:
        remove_file(c)
    return out


def _inputs_kept(inputs, outdir, names, patterns, checkpoints) -> None:
    """An input file (DEM, outlets) may never be one the run writes, replaces or removes."""
    for p in inputs:
        if p is None:
            continue
        hit = replaced_by(p, outdir, names, patterns)
        if hit is not None:
            raise OutputError(f"{p}: is an input of this run, and the run would replace it "
                              f"({hit} in the output folder {outdir}); choose another {{outdir}}",
                              "outdir")
        for c in checkpoints:
            if resolves_into(p, f"{c}.counts"):
                raise OutputError(f"{p}: is an input of this run and lies in {c}.counts, which "
                                  "the run replaces; choose another {checkpoint} file",
                                  "checkpoint")
            beside = replaced_beside_checkpoint(p, c)
            if beside is not None:
                raise OutputError(f"{p}: is an input of this run, and the run would replace it "
                                  f"({beside}, beside the checkpoint {c}); choose another "
                                  "{checkpoint} file", "checkpoint")


def _checkpoints_kept(checkpoints, outdir, names, patterns) -> None:
    """A checkpoint may never lie where the output folder's tidy-up or publication
    removes or replaces files (a staging folder, a temporary name, the lock)."""
    for c in checkpoints:
        hit = replaced_by(c, outdir, names, patterns)
        if hit is not None:
            raise OutputError(f"{c}: the checkpoint lies where the run would replace or remove "
                              f"it ({hit} in the output folder {outdir}); choose another "
                              "{checkpoint} file", "checkpoint")


def _distinct(checkpoints, inputs, outputs) -> None:
    """A checkpoint may never be an input or an output of the run."""
    for c in checkpoints:
        for what, paths in (("input", inputs), ("output", outputs)):
            for p in paths:
                if p is not None and same_file(c, p):
                    raise OutputError(f"{c}: the checkpoint would overwrite the {what} file {p}; "
                                      "choose another {checkpoint} file", "checkpoint")


def guard_memory(head, job, ex: Execution, opts: dict, *, model=None, runs: int = 1,
                 quicklook: bool = True):
    """Refuse a run that would not fit in memory, from the DEM's header alone;
    return the execution to use and its layout (``terrain.layout.RunLayout``:
    blocked mode when only that fits, said once; out of core or not)."""
    layout = choose_layout(head, job, ex, model=model, runs=runs, quicklook=quicklook)
    chosen = dataclasses.replace(ex, block=layout.block)
    check_memory(head, job, chosen, model=model, runs=runs, quicklook=quicklook,
                 force=opts["force"], layout=layout)
    check_disk(head, job, chosen, layout)  # out of core: the grids must fit on disk
    if ex.block is None and layout.blocked:
        warn(f"a whole-grid run would not fit in memory; computing each realisation in blocks "
             f"of {layout.block} x {layout.block} cells (--block; the layers are the same)")
    return chosen, layout


def guard_summaries(head, job, ex: Execution, opts: dict, *, model, layout) -> None:
    """Out of core, once the regions are made and before any realisation: refuse a
    run whose feature summaries (``len(job.regions)`` of them) would not fit beside
    the rest (no header tells how many there are)."""
    if layout.on_disk:
        check_memory(head, job, ex, model=model, force=opts["force"], layout=layout,
                     features=len(job.regions), held=resident_memory(children=True))


def _prepare_drawing(dem, layout) -> None:
    """prepare_drawing, quietly: it only saves time; whatever fails here fails again
    when the figures are drawn, and is reported then, in one line."""
    from terrain.outputs.mapframe import prepare_drawing  # looked up when the thread runs

    try:
        prepare_drawing(dem, layout)
    except Exception:  # noqa: BLE001, S110
        pass


def workers_ahead(ex: Execution, layout, kind: str | None = None):
    """Start the run's local worker processes now (``warm_workers``): they start,
    import the library and, for a whole-grid peaks or depressions run
    (``kind``), load its compiled kernels while this process reads the DEM and
    makes its regions. A no-op for a run in this process or on Dask."""
    if ex.resolved_backend != "processes":
        return contextlib.nullcontext()
    from terrain.jobs.credit import load_kernels

    warm = functools.partial(load_kernels, kind) if kind and not layout.blocked else None
    return warm_workers(ex.n_workers, warm)


def run_job(dem, job, model, ex: Execution, opts: dict, *, label: str, headline: str,
            layout=None):
    """Run the ensemble with a progress bar; Ctrl-C exits 130, SIGTERM 143. ``layout``
    (the run's RunLayout) lets the map's hillshade be made while the realisations run."""
    flush_warnings()
    if not opts["quiet"]:
        click.echo(f"cairn {label}: {dem.shape[0]}x{dem.shape[1]} cells, elevations in "
                   f"{dem.unit_label}, error {model.describe(dem.unit_label)}, {headline}, "
                   f"{ex.realisations} realisations"
                   f"{' at most' if ex.target_se is not None else ''}, seed {ex.seed}", err=True)
    # the plotting libraries load, and the map's hillshade is made, while the realisations
    # run (in worker processes)
    prep = threading.Thread(target=_prepare_drawing, args=(dem, layout),
                            name="cairn-prepare-drawing", daemon=True)
    prep.start()
    try:
        with progress_bar(enabled=not opts["quiet"] and sys.stderr.isatty(), label=label) as bar:
            result = run_ensemble(dem, job, model, progress=bar,
                                  **{k: getattr(ex, k) for k in EXEC_KEYS})
    except RunInterrupted as exc:
        interrupted(exc, ex.checkpoint)
    # its imports end before the writing's begin: CPython 3.11 can deadlock when
    # three threads import at once (seen: this thread importing adjustText, the
    # writer thread pyogrio's dependencies, the main thread adjustText again)
    prep.join()
    return result


def interrupted(exc: RunInterrupted, checkpoint=None):
    """Say what an interrupted run kept, and exit 128 + the signal."""
    what = "terminated" if exc.signal == 15 else "interrupted"
    if exc.checkpoint:
        click.echo(f"cairn: {what} after {exc.done} realisations; saved {exc.checkpoint}. "
                   "Resume with the same command plus --resume.", err=True)
    elif checkpoint:
        click.echo(f"cairn: {what} before any realisation finished; nothing written.", err=True)
    else:
        click.echo(f"cairn: {what} after {exc.done} realisations; nothing written "
                   "(use --checkpoint FILE to be able to resume).", err=True)
    sys.exit(128 + exc.signal)
