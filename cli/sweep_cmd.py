"""``cairn sweep``: attribution across error levels and kernels."""

from __future__ import annotations

import sys

import click

from terrain.errors import OptionError
from terrain.jobs import CreditJob
from terrain.noise import rmse_from
from terrain.outputs.manifest import file_names, help_text
from terrain.runner import RunInterrupted

from . import options
from .common import CAUTION, INDEPENDENT_ERROR, command_line, flag, flush_warnings, guarded, warn
from .execute import EXEC_KEYS, error_model, execution, guard_memory, header, interrupted, outputs, read
from .progress import progress_bar
from .summary import print_sensitivity

__all__ = ["sweep_cmd"]

_EPILOG = f"""
\b
Example:
  cairn sweep dem.tif -o sweep --kind peaks --rmse 0.25,0.5,1,2,4 \\
      --kernel gaussian,epanechnikov,triangular,uniform -n 200

{help_text("sweep")}

{CAUTION}
"""


def _levels(opts) -> list[float]:
    given = [(k, opts[k]) for k in ("rmse", "le90", "a95") if opts[k] is not None]
    if len(given) != 1:
        rmse_from(**dict(given))  # raises the library's message
    name, values = given[0]
    if not values:
        raise OptionError(f"{{{name}}} needs at least one level", name)
    return [rmse_from(**{name: v}) for v in values]


def _stated(opts, levels, unit: str) -> str:
    """The error levels as given and as RMSE, e.g. ``LE90 4, 8 m = RMSE 2.43, 4.86 m``."""
    rmse = ", ".join(f"{v:.3g}" for v in levels)
    for name, label in (("le90", "LE90"), ("a95", "accuracy at 95%")):
        if opts.get(name):
            given = ", ".join(f"{v:g}" for v in opts[name])
            return f"{label} {given} {unit} = RMSE {rmse} {unit}"
    return f"RMSE {rmse} {unit}"


def _cut(job: CreditJob, levels, unit: str) -> str:
    """The sweep's cut-off as resolved, e.g. ``minimum depth 12 m (3 × the largest RMSE)``."""
    from terrain import defaults
    from terrain.outputs.plot import figure_text

    figure = "prominence" if job.kind == "peaks" else "depth"
    thr = defaults.cutoff(job.threshold, max(levels))
    rule = f" ({defaults.CUTOFF_PER_RMSE:g} × the largest RMSE)" if job.threshold is None else ""
    return f"minimum {figure} {figure_text(thr)} {unit}{rule}"


def _cutoff(kind, min_prominence, min_depth):
    wrong = min_depth if kind == "peaks" else min_prominence
    if wrong is not None:
        other = "depressions" if kind == "peaks" else "peaks"
        raise OptionError(f"this cut-off applies to {other}; give {{threshold}} for {kind}",
                          "threshold")
    return min_prominence if kind == "peaks" else min_depth


@click.command("sweep", epilog=_EPILOG)
@click.argument("dem", type=click.Path(dir_okay=False))
@options.outdir
@click.option("--kind", required=True, help="What to attribute: peaks or depressions.")
@options.cutoff("peaks", "depressions")
@options.base
@options.accuracy(many=True)
@options.error_model(many_kernels=True)
@options.attribution
@options.dem_input
@options.run(per_model=True)
@options.block
@guarded
def sweep_cmd(dem, outdir, kind, min_prominence, min_depth, base, **opts):
    """How attribution spreads as the assumed error grows, and how much the kernel matters.

    Runs the attribution at every (kernel, error level) with common random
    numbers, follows each feature across runs, and measures differences
    between kernels of equal RMSE.
    """
    from terrain.outputs.writer import write_sweep  # loaded when the command runs
    from terrain.sweep import run_checkpoint, sweep, sweep_models

    job = CreditJob(kind, threshold=_cutoff(kind, min_prominence, min_depth),
                    threshold_jitter=opts["threshold_jitter"], weight=opts["weight"],
                    connectivity=opts["connectivity"], base=base,
                    merge_level=opts["merge_level"], min_presence=opts["min_presence"])
    levels = _levels(opts)
    models = sweep_models(error_model({**opts, "kernel": "gaussian"}, rmse=levels[0]), levels,
                          opts["kernel"] or ["gaussian"])
    ex = execution(opts)
    head = header(dem, opts)
    checkpoints = [run_checkpoint(ex.checkpoint, m) for m in models] if ex.checkpoint else []
    out = outputs(outdir, file_names("sweep"), opts, inputs=[dem], checkpoints=checkpoints)
    ex, _ = guard_memory(head, job, ex, opts, model=models[-1], runs=len(models), quicklook=False)
    d = read(dem, opts)
    if not opts["quiet"]:
        click.echo(f"cairn sweep: {len(models)} error model(s) x {ex.realisations} "
                   f"realisations, seed {ex.seed}; {_stated(opts, levels, d.unit_label)}; "
                   f"{_cut(job, levels, d.unit_label)}", err=True)
    run_kw = {k: getattr(ex, k) for k in EXEC_KEYS}
    flush_warnings()
    try:
        with progress_bar(enabled=not opts["quiet"] and sys.stderr.isatty(), label="sweep") as bar:
            result = sweep(d, job, models, progress=bar, **run_kw)
    except RunInterrupted as exc:
        interrupted(exc, ex.checkpoint)
    if opts["range_m"] == 0:
        warn(INDEPENDENT_ERROR)
    write_sweep(out, result, input_path=str(dem), command_line=command_line())
    if not opts["quiet"]:
        note = result.note.render(flag) if result.note is not None else None
        print_sensitivity(result, outdir=out, caution=CAUTION, note=note, unit=d.unit_label)
