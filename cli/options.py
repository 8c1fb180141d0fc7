"""Options shared by several commands, defined once."""

from __future__ import annotations

import click


def _bbox(ctx, param, value):
    if value is None:
        return None
    try:
        parts = tuple(float(v) for v in value.split(","))
    except ValueError:
        raise click.BadParameter("expected four numbers XMIN,YMIN,XMAX,YMAX") from None
    if len(parts) != 4:
        raise click.BadParameter("expected four numbers XMIN,YMIN,XMAX,YMAX")
    return parts


band_option = click.option("--band", type=click.IntRange(min=1), default=None,
                           help="Band to read (1-based); required for multi-band files.")
bbox_option = click.option("--bbox", callback=_bbox, default=None, metavar="XMIN,YMIN,XMAX,YMAX",
                           help="Read only this window (CRS units).")


def _positive_float(name):
    def cb(ctx, param, value):
        if value is None:
            return None
        import math

        if not math.isfinite(value) or value <= 0:
            raise click.BadParameter(f"must be a positive finite number, got {value}")
        return value
    return cb


def _nonneg_float(ctx, param, value):
    import math

    if value is not None and (not math.isfinite(value) or value < 0):
        raise click.BadParameter(f"must be >= 0 and finite, got {value}")
    return value


def _compose(*decorators):
    def apply(fn):
        for d in reversed(decorators):
            fn = d(fn)
        return fn
    return apply


accuracy_options = _compose(
    click.option("--rmse", type=float, callback=_positive_float("rmse"),
                 help="Vertical RMSE of the DEM (DEM units)."),
    click.option("--le90", type=float, callback=_positive_float("le90"),
                 help="Linear error at 90% (= 1.6449 RMSE)."),
    click.option("--a95", type=float, callback=_positive_float("a95"),
                 help="Vertical accuracy at 95% confidence (= 1.9600 RMSE)."),
)

error_model_options = _compose(
    accuracy_options,
    click.option("--kernel", type=click.Choice(["gaussian", "epanechnikov", "triangular", "uniform"]),
                 default="gaussian", show_default=True,
                 help="Distribution of independent per-cell error (scaled to the RMSE)."),
    click.option("--range", "range_m", type=float, default=0.0, show_default=True,
                 callback=_nonneg_float,
                 help="Practical range of spatially correlated error, metres; 0 = independent."),
    click.option("--covariance", type=click.Choice(["exponential", "gaussian", "spherical"]),
                 default="exponential", show_default=True, help="Covariance of correlated error."),
    click.option("--nugget", type=click.FloatRange(0, 1), default=0.0, show_default=True,
                 help="Share of the error variance drawn independently when --range > 0."),
)

run_options = _compose(
    click.option("--realisations", "-n", type=int, default=200, show_default=True,
                 help="Number of perturbed DEMs (the maximum with --target-se)."),
    click.option("--seed", type=int, default=0, show_default=True,
                 help="Seed: the same seed gives the same layers bit for bit."),
    click.option("--workers", type=int, default=None,
                 help="Worker processes (default: all cores)."),
    click.option("--scheduler", default=None, metavar="ADDRESS",
                 help="Run on a Dask scheduler, e.g. tcp://scheduler-host:8786."),
    click.option("--checkpoint", type=click.Path(dir_okay=False), default=None,
                 help="Save progress to this .npz every 50 realisations and at the end."),
    click.option("--resume", is_flag=True,
                 help="Continue (or extend to --realisations) the run in --checkpoint."),
    click.option("--target-se", type=float, default=None, callback=_positive_float("target-se"),
                 help="Stop early once the largest standard error of the main credit layer "
                      "(cells with >= 1% of the top credit) is below this."),
    click.option("--overwrite", is_flag=True, help="Replace existing outputs."),
    click.option("--quiet", "-q", is_flag=True, help="No progress bar or tables."),
    click.option("--force", is_flag=True, help="Run even when the memory estimate exceeds "
                                               "the available memory."),
)

common_options = _compose(error_model_options, band_option, bbox_option, run_options)

attribution_options = _compose(
    common_options,
    click.option("--threshold-jitter", type=float, default=0.0, show_default=True,
                 callback=_nonneg_float,
                 help="Standard deviation of a per-realisation threshold drawn around the "
                      "minimum prominence/depth (a hard cut-off is another unstable choice)."),
    click.option("--weight", type=click.Choice(["persistence", "count"]), default="persistence",
                 show_default=True, help="Credit a pair its prominence/depth, or 1."),
    click.option("--connectivity", type=click.Choice(["8", "4"]), default="8", show_default=True,
                 help="Cell neighbourhood."),
)
