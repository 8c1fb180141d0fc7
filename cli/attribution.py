"""``cairn peaks``, ``cairn depressions`` and ``cairn demo``."""

from __future__ import annotations

from pathlib import Path

import click

from terrain.jobs import CreditJob
from terrain.outputs.manifest import file_names, help_text

from . import options
from .common import CAUTION, INDEPENDENT_ERROR, command_line, guarded, warn
from .execute import (
    error_model,
    execution,
    guard_memory,
    guard_summaries,
    header,
    outputs,
    read,
    run_job,
    workers_ahead,
)
from .summary import print_summary

__all__ = ["peaks_cmd", "depressions_cmd", "demo_cmd"]


def run_credit(kind: str, dem_path, outdir, opts: dict, *, threshold, base=None, label=None):
    """One peaks or depressions run, from options to files and the console table."""
    from terrain.outputs.writer import write_credit_run  # loaded when a command runs
    from terrain.summary.features import summary_steps

    model = error_model(opts)
    job = CreditJob(kind, threshold=threshold, threshold_jitter=opts["threshold_jitter"],
                    weight=opts["weight"], connectivity=opts["connectivity"], base=base,
                    merge_level=opts["merge_level"], min_presence=opts["min_presence"])
    ex = execution(opts)
    head = header(dem_path, opts)
    out = outputs(outdir, file_names(kind), opts, inputs=[dem_path])
    ex, layout = guard_memory(head, job, ex, opts, model=model)
    with workers_ahead(ex, layout, kind):  # they start while the DEM is read
        dem = read(dem_path, opts, on_disk=layout.on_disk)
        job = job.resolved(dem, model, layout=layout)
        guard_summaries(head, job, ex, opts, model=model, layout=layout)
        res = run_job(dem, job, model, ex, opts, label=label or kind,
                      headline=settings_line(job, dem.unit_label), layout=layout)
    if model.range_m == 0:
        warn(INDEPENDENT_ERROR)
    features = write_credit_run(out, res, summary_steps(res),  # layers, map beside it
                                input_path=str(dem_path), command_line=command_line())
    if not opts["quiet"]:
        print_summary(features.table, kind=kind, units=dem.unit_label, n=res.n,
                      outdir=out, caution=CAUTION, share=features.rank_share,
                      clusters=features.clusters, settings=settings_line(job, dem.unit_label))
    return res, features


def settings_line(job: CreditJob, unit: str) -> str:
    """The resolved cut-off, merge level and base as the header and the table echo
    them, e.g. ``minimum depth 7.5 m (3 × RMSE), merge level 5 m (2 × RMSE)``."""
    from terrain import defaults
    from terrain.outputs.plot import figure_text

    figure = "prominence" if job.kind == "peaks" else "depth"
    text = f"minimum {figure} {figure_text(job.threshold)} {unit}"
    if "threshold" in job.from_defaults:
        text += f" ({defaults.CUTOFF_PER_RMSE:g} × RMSE)"
    text += f", merge level {figure_text(job.merge_level)} {unit}"
    if "merge_level" in job.from_defaults:
        text += (" (the cut-off: no more than 2 × RMSE)" if job.merge_level == job.threshold
                 else f" ({defaults.MERGE_PER_RMSE:g} × RMSE)")
    if job.kind == "peaks" and job.base is not None:
        text += f", base {job.base:.6g} {unit}" + (" (lowest cell)" if "base" in job.from_defaults
                                                   else "")
    return text


def _epilog(example: str, command: str) -> str:
    return f"\b\nExample:\n  {example}\n\n{help_text(command)}\n\n{CAUTION}"


shared = options.compose(options.accuracy(), options.error_model(), options.attribution,
                         options.dem_input, options.run(), options.block)


@click.command("peaks", epilog=_epilog("cairn peaks dem.tif -o out --le90 4 --min-prominence 30 "
                                       "-n 500", "peaks"))
@click.argument("dem", type=click.Path(dir_okay=False))
@options.outdir
@options.cutoff("peaks")
@options.base
@shared
@guarded
def peaks_cmd(dem, outdir, min_prominence, base, **opts):
    """Summits, key cols and prominence, stable under DEM error.

    Perturbs DEM with its stated vertical error, pairs every summit with its
    key col in each realisation (superlevel-set persistence) and averages.
    Features are regions of the DEM as given; the table shows each one's
    prominence on the DEM, its expected prominence and 5-95% range under the
    error (the DEM uncertainty), and the Monte Carlo standard error (the
    run's precision) in a column of its own.
    """
    run_credit("peaks", dem, outdir, opts, threshold=min_prominence, base=base)


@click.command("depressions", epilog=_epilog("cairn depressions lidar.tif -o out --rmse 0.15 "
                                             "--min-depth 0.3 --range 50", "depressions"))
@click.argument("dem", type=click.Path(dir_okay=False))
@options.outdir
@options.cutoff("depressions")
@shared
@click.option("--counts-store", "counts", default=None, metavar="URL",
              help="Out of core (--block): keep the per-cell ponding counts in a Zarr store at "
                   "this URL (s3://... with s3fs installed, gs://... with gcsfs; any fsspec "
                   "file system), written by this process and kept after the run (give the "
                   "same URL with --resume). Default: beside --checkpoint, or in the scratch "
                   "folder.")
@guarded
def depressions_cmd(dem, outdir, min_depth, **opts):
    """Pits, spill points and depression depth, stable under DEM error.

    Water leaves over the raster edge and into nodata; each depression is
    paired with its spill point in each realisation (sublevel-set
    persistence) and the results are averaged. Features are regions of the
    DEM as given; the table shows each one's depth on the DEM, its expected
    depth and 5-95% range under the error (the DEM uncertainty), and the
    Monte Carlo standard error (the run's precision) in a column of its own.
    """
    run_credit("depressions", dem, outdir, opts, threshold=min_depth)


DEMO = dict(rmse=1.0, le90=None, a95=None, kernel="gaussian", range_m=0.0,
            covariance="exponential", nugget=0.0, threshold_jitter=0.5, weight="persistence",
            connectivity=8, merge_level=None, min_presence=0.1, band=None, bbox=None,
            nodata=None, realisations=300, seed=2026, scheduler=None,
            checkpoint=None, resume=False, target_se=None, force=False)
DEMO_CUTOFF = 3.0


@click.command("demo", epilog=CAUTION)
@click.option("-o", "--outdir", default="cairn-demo", show_default=True, type=click.Path(),
              help="Output folder (peaks/ and depressions/ inside).")
@click.option("--workers", type=int, default=None,
              help="Worker processes on this machine [default: all cores].")
@click.option("--overwrite", is_flag=True, help="Replace earlier demo outputs.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bar and no tables.")
@guarded
def demo_cmd(outdir, workers, overwrite, quiet):
    """Run peaks and depressions on the shipped demo DEM of Veldmarrow Fells.

    Veldmarrow Fells is an invented upland (10 m cells, integer metres): a
    flat-topped twin summit, a long ridge of near-equal knolls and flat-floored
    kettle hollows. Demo error: RMSE 1 m, Gaussian, 300 realisations, seed
    2026, minimum prominence/depth 3 m with 0.5 m threshold jitter.

    \b
    Example:
      cairn demo -o demo-out
    """
    from cairn_demo_data import DEM_PATH

    opts = dict(DEMO, workers=workers, overwrite=overwrite, quiet=quiet)
    for kind in ("peaks", "depressions"):
        run_credit(kind, DEM_PATH, Path(outdir) / kind, opts, threshold=DEMO_CUTOFF,
                   label=f"demo {kind}")
    if not quiet:
        click.echo(f"demo outputs in {outdir}/peaks and {outdir}/depressions "
                   "(open quicklook.png and ranking.png, or load the .tif and .gpkg files in "
                   "a GIS)")
