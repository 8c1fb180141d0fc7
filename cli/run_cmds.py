"""``cairn peaks``, ``cairn depressions`` and ``cairn demo``."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import click
import numpy as np

from terrain.credit import CreditSettings
from terrain.errors import OptionError, OutputError
from terrain.io import dem_warnings, prepare_outdir, read_dem
from terrain.noise import ErrorModel, rmse_from

from .main import CATCH_CAUTION, CAUTION, cli, guarded
from .options import attribution_options, common_options
from .progress import progress_bar
from .summary import print_catchments, print_sensitivity, print_summary

_TYPICAL = ("state the DEM's vertical accuracy with --rmse, --le90 or --a95 (typical: global "
            "30 m DEMs a few metres, e.g. --le90 4 or --rmse 5; airborne lidar decimetres, "
            "e.g. --rmse 0.15)")


def _model(opts) -> ErrorModel:
    if all(opts[k] is None for k in ("rmse", "le90", "a95")):
        raise OptionError(f"no vertical accuracy given: {_TYPICAL}")
    rmse = rmse_from(rmse=opts["rmse"], le90=opts["le90"], a95=opts["a95"])
    if opts["realisations"] < 1:
        raise OptionError(f"--realisations must be >= 1, got {opts['realisations']}")
    if opts["workers"] is not None and opts["workers"] < 1:
        raise OptionError(f"--workers must be >= 1, got {opts['workers']}")
    return ErrorModel(rmse=rmse, kernel=opts["kernel"], range_m=opts["range_m"],
                      covariance=opts["covariance"], nugget=opts["nugget"])


def _read(dem_path, opts):
    dem = read_dem(dem_path, band=opts["band"], bbox=opts["bbox"])
    for line in dem_warnings(dem):
        click.echo(f"cairn: warning: {line}", err=True)
    return dem


def _execute(dem, job, model, outdir, names, opts, *, command, headline):
    """Check outputs and memory, run the ensemble with a progress bar, handle Ctrl-C."""
    from terrain.ensemble import RunInterrupted, run_ensemble
    from terrain.resources import check_memory

    out = prepare_outdir(outdir, names, overwrite=opts["overwrite"])
    ck = opts["checkpoint"]
    if ck and Path(ck).exists() and not opts["resume"]:
        if not opts["overwrite"]:
            raise OutputError(f"{ck}: checkpoint exists; pass --resume to continue it or "
                              "--overwrite to start afresh")
        os.unlink(ck)
    workers = opts["workers"] or os.cpu_count() or 1
    check_memory(dem, workers=workers, force=opts["force"], realisations=opts["realisations"])
    quiet = opts["quiet"]
    if not quiet:
        click.echo(f"cairn {command}: {dem.shape[0]}x{dem.shape[1]} cells, error "
                   f"{model.describe()}, {headline}, {opts['realisations']} realisations, "
                   f"seed {opts['seed']}", err=True)
    try:
        with progress_bar(enabled=not quiet and sys.stderr.isatty(), label=command) as bar:
            res = run_ensemble(dem, job, model, realisations=opts["realisations"],
                               seed=opts["seed"], backend="processes", workers=workers,
                               scheduler=opts["scheduler"], checkpoint=ck, resume=opts["resume"],
                               target_se=opts["target_se"], progress=bar)
    except RunInterrupted as exc:
        if exc.checkpoint:
            click.echo(f"cairn: interrupted after {exc.done} realisations; saved {exc.checkpoint}. "
                       f"Resume with the same command plus --resume.", err=True)
        else:
            click.echo(f"cairn: interrupted after {exc.done} realisations; nothing written "
                       "(use --checkpoint FILE to be able to resume).", err=True)
        sys.exit(130)
    return out, res


def _run(kind, dem_path, outdir, opts, *, threshold, base=None, command):
    from terrain.report import outputs_for, write_outputs

    model = _model(opts)
    dem = _read(dem_path, opts)
    thr = 3 * model.rmse if threshold is None else threshold
    if base is None:
        base = float(np.nanmin(dem.z[~dem.nodata]))
    settings = CreditSettings(kind, threshold=float(thr), threshold_jitter=opts["threshold_jitter"],
                              weight=opts["weight"], connectivity=int(opts["connectivity"]),
                              base=float(base), kernel=opts["kernel"])
    figure = "prominence" if kind == "peaks" else "depth"
    out, res = _execute(dem, settings, model, outdir, outputs_for(kind), opts, command=command,
                        headline=f"minimum {figure} {thr:g}")
    table = write_outputs(out, res, input_path=str(dem_path), command=command)
    if not opts["quiet"]:
        print_summary(table, kind=kind, units=dem.vertical_units or "DEM units", n=res.n,
                      outdir=out, caution=CAUTION)
    return res, table


_EXAMPLE_PEAKS = """
\b
Example:
  cairn peaks dem.tif -o out --le90 4 --min-prominence 30 -n 500
\b
Writes summit_credit.tif, col_credit.tif, summit_probability.tif (band 1
estimate, band 2 standard error), peaks.gpkg (summits, summit_points),
summits.csv, quicklook.png and run.json.
"""

_EXAMPLE_DEP = """
\b
Example:
  cairn depressions lidar.tif -o out --rmse 0.15 --min-depth 0.3 --range 50
\b
Writes pit_credit.tif, spill_credit.tif, pit_probability.tif,
ponding_probability.tif, depressions.gpkg (pits, pit_points), pits.csv,
quicklook.png and run.json.
"""


@cli.command("peaks", epilog=_EXAMPLE_PEAKS + "\n\b\n" + CAUTION)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("-o", "--outdir", required=True, type=click.Path(), help="Output folder.")
@click.option("--min-prominence", type=float, default=None,
              help="Count peaks at least this prominent [default: 3 x RMSE].")
@click.option("--base", type=float, default=None,
              help="Level the highest summit's prominence is measured to "
                   "[default: the lowest valid cell; e.g. 0 for sea level].")
@attribution_options
@guarded
def peaks_cmd(dem, outdir, min_prominence, base, **opts):
    """Summits, key cols and prominence, stable under DEM error.

    Perturbs DEM with its stated vertical error, pairs every summit with its
    key col in each realisation (superlevel-set persistence) and averages.
    """
    _check_nonneg("--min-prominence", min_prominence)
    _run("peaks", dem, outdir, opts, threshold=min_prominence, base=base, command="peaks")


@cli.command("depressions", epilog=_EXAMPLE_DEP + "\n\b\n" + CAUTION)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("-o", "--outdir", required=True, type=click.Path(), help="Output folder.")
@click.option("--min-depth", type=float, default=None,
              help="Count depressions at least this deep, and ponding at least this deep "
                   "[default: 3 x RMSE].")
@attribution_options
@guarded
def depressions_cmd(dem, outdir, min_depth, **opts):
    """Pits, spill points and depression depth, stable under DEM error.

    Water leaves over the raster edge and into nodata; each depression is
    paired with its spill point in each realisation (sublevel-set
    persistence) and the results are averaged.
    """
    _check_nonneg("--min-depth", min_depth)
    _run("pits", dem, outdir, opts, threshold=min_depth, command="depressions")


def _check_nonneg(name, v):
    import math

    if v is not None and not (math.isfinite(v) and v >= 0):
        raise OptionError(f"{name} must be >= 0 and finite, got {v}")


DEMO_SETTINGS = dict(rmse=1.0, le90=None, a95=None, kernel="gaussian", range_m=0.0,
                     covariance="exponential", nugget=0.0, threshold_jitter=0.5,
                     weight="persistence", connectivity="8", band=None, bbox=None,
                     realisations=300, seed=2026, scheduler=None, checkpoint=None, resume=False,
                     target_se=None, force=False)


_EXAMPLE_CATCH = """
\b
Example:
  cairn catchments dem.tif --outlets gauges.gpkg -o out --rmse 0.5 --snap 60
\b
Outlets: points in a GeoPackage, GeoJSON or Shapefile (reprojected to the
DEM's CRS), or a CSV with columns x,y (DEM's CRS) and optional id. Writes
catchment_probability_<id>.tif per outlet, divide_probability.tif,
catchments.gpkg / catchments.csv (50% and 90% membership polygons, area
mean and 5-95% range), quicklook.png and run.json.
"""


@cli.command("catchments", epilog=_EXAMPLE_CATCH + "\n\b\n" + CATCH_CAUTION)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("--outlets", required=True, type=click.Path(dir_okay=False),
              help="Outlet points (GeoPackage, GeoJSON, Shapefile, or CSV with x,y[,id]).")
@click.option("-o", "--outdir", required=True, type=click.Path(), help="Output folder.")
@click.option("--snap", type=float, default=None,
              help="Snap each outlet, per realisation, to the cell of highest flow "
                   "accumulation within this many metres [default: 2 cells].")
@common_options
@guarded
def catchments_cmd(dem, outlets, outdir, snap, **opts):
    """Outlet catchments and drainage divides, as probabilities under DEM error.

    Each realisation fills depressions (the edge and nodata are exits), routes
    D8 flow, snaps every outlet to its channel and records which cells drain
    to it.
    """
    from terrain.catchments import CatchmentJob
    from terrain.io import read_outlets
    from terrain.report import catchment_outputs, write_catchment_outputs

    model = _model(opts)
    d = _read(dem, opts)
    if snap is None:
        snap = 2 * float(np.mean(d.cell_metres()[0]))
    _check_nonneg("--snap", snap)
    ids, xy = read_outlets(outlets, d)
    job = CatchmentJob.for_dem(d, ids, xy, snap, source=str(outlets))
    out, res = _execute(d, job, model, outdir, catchment_outputs(job.ids), opts,
                        command="catchments",
                        headline=f"{len(ids)} outlet(s), snap {snap:g} m")
    rows = write_catchment_outputs(out, res, input_path=str(dem), outlets_path=str(outlets))
    if not opts["quiet"]:
        print_catchments(rows, n=res.n, outdir=out, caution=CATCH_CAUTION)


_EXAMPLE_SWEEP = """
\b
Example:
  cairn sweep dem.tif -o sweep --kind peaks --rmse 0.25,0.5,1,2,4 \\
      --kernels gaussian,epanechnikov,triangular,uniform -n 200
\b
Writes sweep.csv (one row per kernel, error level and feature),
kernel_sensitivity.csv (differences between kernels of equal RMSE),
sweep.png and run.json.
"""


def _float_list(ctx, param, value):
    try:
        out = [float(v) for v in value.split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter("expected comma-separated numbers, e.g. 0.25,0.5,1,2,4") from None
    if not out or any(not (np.isfinite(v) and v > 0) for v in out):
        raise click.BadParameter("levels must be positive finite numbers")
    return sorted(set(out))


def _kernel_list(ctx, param, value):
    from terrain.noise import KERNELS

    out = [v.strip() for v in value.split(",") if v.strip()]
    bad = [v for v in out if v not in KERNELS]
    if bad or not out:
        raise click.BadParameter(f"unknown kernel(s) {', '.join(bad) or '(none)'}; "
                                 f"choose from {', '.join(KERNELS)}")
    return out


@cli.command("sweep", epilog=_EXAMPLE_SWEEP + "\n\b\n" + CAUTION)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("-o", "--outdir", required=True, type=click.Path(), help="Output folder.")
@click.option("--kind", type=click.Choice(["peaks", "depressions"]), required=True)
@click.option("--rmse", "levels", required=True, callback=_float_list, metavar="R1,R2,...",
              help="Error levels (RMSE, DEM units) to run.")
@click.option("--kernels", default="gaussian", show_default=True, callback=_kernel_list,
              metavar="K1,K2,...", help="Kernels to compare at equal RMSE.")
@click.option("--min-size", type=float, default=None,
              help="Minimum prominence/depth, fixed across levels [default: 3 x largest RMSE].")
@click.option("--base", type=float, default=None, help="Base level for peaks (see cairn peaks).")
@click.option("--weight", type=click.Choice(["persistence", "count"]), default="persistence",
              show_default=True)
@click.option("--connectivity", type=click.Choice(["8", "4"]), default="8", show_default=True)
@click.option("--realisations", "-n", type=int, default=200, show_default=True,
              help="Realisations per (kernel, level).")
@click.option("--seed", type=int, default=0, show_default=True)
@click.option("--workers", type=int, default=None, help="Worker processes (default: all cores).")
@click.option("--scheduler", default=None, metavar="ADDRESS", help="Dask scheduler address.")
@click.option("--band", type=click.IntRange(min=1), default=None, help="Band to read.")
@click.option("--overwrite", is_flag=True, help="Replace existing outputs.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bar or tables.")
@guarded
def sweep_cmd(dem, outdir, kind, levels, kernels, min_size, base, weight, connectivity,
              realisations, seed, workers, scheduler, band, overwrite, quiet):
    """How attribution spreads as the assumed error grows, and how much the kernel matters.

    Runs the attribution at every (kernel, error level) with common random
    numbers, follows each feature across runs, and measures differences
    between kernels of equal RMSE.
    """
    from terrain.report import sweep_outputs, write_sweep_outputs
    from terrain.sweep import sweep

    _check_nonneg("--min-size", min_size)
    if realisations < 1:
        raise OptionError(f"--realisations must be >= 1, got {realisations}")
    if workers is not None and workers < 1:
        raise OptionError(f"--workers must be >= 1, got {workers}")
    d = _read(dem, {"band": band, "bbox": None})
    k = "peaks" if kind == "peaks" else "pits"
    thr = 3 * max(levels) if min_size is None else min_size
    if base is None:
        base = float(np.nanmin(d.z[~d.nodata]))
    settings = CreditSettings(k, threshold=float(thr), weight=weight,
                              connectivity=int(connectivity), base=float(base))
    out = prepare_outdir(outdir, sweep_outputs(), overwrite=overwrite)
    if not quiet:
        click.echo(f"cairn sweep: {len(kernels)} kernel(s) x {len(levels)} level(s) x "
                   f"{realisations} realisations, minimum size {thr:g}, seed {seed}", err=True)
    with progress_bar(enabled=not quiet and sys.stderr.isatty(), label="sweep") as bar:
        result = sweep(d, settings, rmses=levels, kernels=kernels, realisations=realisations,
                       seed=seed, workers=workers, scheduler=scheduler, progress=bar)
    write_sweep_outputs(out, result, kind=k, input_path=str(dem), settings=settings, rmses=levels,
                        kernels=kernels)
    if not quiet:
        print_sensitivity(result, outdir=out, caution=CAUTION)


@cli.command("demo", epilog="\b\n" + CAUTION)
@click.option("-o", "--outdir", default="cairn-demo", show_default=True, type=click.Path(),
              help="Output folder (peaks/ and depressions/ inside).")
@click.option("--workers", type=int, default=None, help="Worker processes (default: all cores).")
@click.option("--overwrite", is_flag=True, help="Replace existing outputs.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bar or tables.")
@guarded
def demo_cmd(outdir, workers, overwrite, quiet):
    """Run peaks and depressions on the shipped demo DEM of Veldmarrow Fells.

    Veldmarrow Fells is an invented upland (10 m cells, integer metres): a
    flat-topped twin summit, a long ridge of near-equal knolls and flat-floored
    sinks. Demo error: RMSE 1 m, Gaussian, 300 realisations, seed 2026,
    minimum prominence/depth 3 m with 0.5 m threshold jitter.

    \b
    Example:
      cairn demo -o demo-out
    """
    from cairn_demo_data import DEM_PATH

    opts = dict(DEMO_SETTINGS, workers=workers, overwrite=overwrite, quiet=quiet)
    for kind, sub, cmd in (("peaks", "peaks", "demo peaks"),
                           ("pits", "depressions", "demo depressions")):
        _run(kind, DEM_PATH, Path(outdir) / sub, opts, threshold=3.0, command=cmd)
    if not quiet:
        click.echo(f"demo outputs in {outdir}/peaks and {outdir}/depressions "
                   "(open quicklook.png, or load the .tif and .gpkg files in a GIS)")
