"""The options every command shares, each defined once with its help text and units.

Options only parse (text to numbers and lists); every value is validated by
the library where it enters it, and errors come back naming the flag.
"""

from __future__ import annotations

import click

from terrain import defaults
from terrain.noise import COVARIANCES, KERNELS

__all__ = ["compose", "accuracy", "error_model", "cutoff", "attribution", "connectivity",
           "drainage", "dem_input", "run", "outdir", "RESUME_HELP", "TARGET_SE_HELP", "BBOX_HELP",
           "NODATA_HELP"]


def compose(*decorators):
    """Apply several option decorators as one."""
    def apply(fn):
        for d in reversed(decorators):
            fn = d(fn)
        return fn
    return apply


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


def _numbers(ctx, param, value):
    if value is None:
        return None
    try:
        return [float(v) for v in value.split(",") if v.strip()]
    except ValueError:
        raise click.BadParameter("expected comma-separated numbers, e.g. 0.25,0.5,1,2") from None


def _names(ctx, param, value):
    return None if value is None else [v.strip() for v in value.split(",") if v.strip()]


def accuracy(*, many: bool = False):
    """--rmse / --le90 / --a95: the DEM's vertical accuracy as its data sheet states it."""
    kw = dict(callback=_numbers, metavar="V1,V2,...") if many else dict(type=float)
    texts = {"rmse": "vertical RMSE of the DEM, in its vertical units (metres for most DEMs)",
             "le90": "linear error at 90% from the data sheet (= 1.6449 x RMSE; vertical units)",
             "a95": "vertical accuracy at 95% confidence (= 1.9600 x RMSE; vertical units)"}

    def text(name):
        t = texts[name]
        return f"Error levels to run, comma-separated, each a {t}." if many else \
            t[0].upper() + t[1:] + "."

    return compose(*(click.option(f"--{name}", **kw, help=text(name)) for name in texts))


def error_model(*, many_kernels: bool = False):
    """--kernel, --range, --covariance, --nugget."""
    kinds = ", ".join(KERNELS)
    return compose(
        click.option("--kernel", default="gaussian", show_default=True,
                     callback=_names if many_kernels else None,
                     metavar="K1,K2,..." if many_kernels else "KERNEL",
                     help=(f"Kernels to compare at equal RMSE, comma-separated ({kinds})."
                           if many_kernels else
                           f"Distribution of the per-cell error ({kinds}), scaled so its "
                           "standard deviation is the RMSE; with --range, the distribution "
                           "the correlated field is reshaped to.")),
        click.option("--range", "range_m", type=float, default=0.0, show_default=True,
                     help="Practical range of spatially correlated error, in metres; 0 = "
                          "independent per cell. DEM error is usually spatially correlated: "
                          "give the range when you know it."),
        click.option("--covariance", default="exponential", show_default=True,
                     help=f"Covariance model of correlated error ({', '.join(COVARIANCES)})."),
        click.option("--nugget", type=float, default=0.0, show_default=True,
                     help="Share (0 to 1) of the error variance drawn independently per cell "
                          "when --range > 0."),
    )


def cutoff(*kinds: str):
    """--min-prominence (peaks) and/or --min-depth (depressions), in vertical units."""
    opts = []
    if "peaks" in kinds:
        opts.append(click.option(
            "--min-prominence", type=float, default=None,
            help="Count peaks at least this prominent, in the DEM's vertical units "
                 "[default: 3 x RMSE; in a sweep, 3 x the largest]."))
    if "depressions" in kinds:
        opts.append(click.option(
            "--min-depth", type=float, default=None,
            help="Count depressions at least this deep, in the DEM's vertical units "
                 "[default: 3 x RMSE; in a sweep, 3 x the largest]."))
    return compose(*opts)


base = click.option("--base", type=float, default=None,
                    help="Level the highest summit's prominence is measured to, in vertical "
                         "units [default: the lowest valid cell; e.g. 0 for sea level].")

connectivity = click.option(
    "--connectivity", type=int, default=8, show_default=True,
    help="Cell neighbourhood: 8 (with diagonals) or 4 (edge neighbours only); for drainage, "
         "D8 or D4 flow.")

attribution = compose(
    click.option("--threshold-jitter", type=float, default=0.0, show_default=True,
                 help="Standard deviation (vertical units) of a cut-off drawn per realisation "
                      "around the minimum prominence or depth; 0 = a fixed cut-off."),
    click.option("--weight", default="persistence", show_default=True,
                 help="Credit a counted pair its prominence/depth (persistence) or 1 (count)."),
    connectivity,
    click.option("--merge-level", type=float, default=None,
                 help="Knobs and hollows of the DEM less persistent than this (vertical units) "
                      "belong to the feature around them [default: 2 x RMSE, or the cut-off if "
                      "lower; in a sweep, of the smallest RMSE]."),
    click.option("--min-presence", type=float, default=0.1, show_default=True,
                 help="A region is a feature (a table row) when counted in at least this share "
                      "of realisations (0 to 1)."),
)


def drainage():
    """--channel-area, --conditioning, --breach-cap (defaults stated from the library)."""
    return compose(
        click.option("--channel-area", type=float, default=None, metavar="M2",
                     help="Drainage area, in square metres, at which a cell counts as channel "
                          f"[default: {defaults.CHANNEL_AREA_M2:g} m² = 0.1 km²; common "
                          "practice, no single source]."),
        click.option("--conditioning", default=None, metavar="breach|fill",
                     help="Remove depressions by least-cost breaching (cut a channel from the "
                          "pit to lower ground) or by filling to the spill level "
                          f"[default: {defaults.CONDITIONING}]."),
        click.option("--breach-cap", type=float, default=None, metavar="DEPTH",
                     help="Breach depressions at most this deep and fill deeper ones, in the "
                          "DEM's vertical units (metres for most DEMs); no cell is cut deeper "
                          f"[default: {defaults.BREACH_CAP:g}]."),
    )


BBOX_HELP = ("Read only the cells whose area meets this box, in the DEM's CRS units (a box "
             "inside one cell reads that cell); north-up or bottom-up rasters only.")
NODATA_HELP = ("Treat cells holding this value as nodata (in the file's stored units, before its "
               "scale and offset), e.g. -9999 when the file does not declare it.")

VERTICAL_UNIT_HELP = ("Unit of the elevations: m, ft (international foot, 0.3048 m) or us-ft "
                      "(US survey foot, 1200/3937 m) [default: the unit the file declares, else "
                      "metres, said in a warning]. Prominences, depths, elevations and the "
                      "accuracy stay in this unit; areas are m², volumes m³.")

dem_input = compose(
    click.option("--band", type=int, default=None,
                 help="Band to read (1-based); required for multi-band files."),
    click.option("--bbox", callback=_bbox, default=None, metavar="XMIN,YMIN,XMAX,YMAX",
                 help=BBOX_HELP),
    click.option("--nodata", type=float, default=None, metavar="VALUE", help=NODATA_HELP),
    click.option("--vertical-unit", type=click.Choice(["m", "ft", "us-ft"]), default=None,
                 help=VERTICAL_UNIT_HELP),
)

RESUME_HELP = ("Continue the run saved in --checkpoint (same DEM, seed and options), or extend "
               "a finished one to -n realisations; replaces that run's outputs.")
TARGET_SE_HELP = ("Stop early once the run's Monte Carlo standard error is below this: the "
                  "largest standard error of a feature's expected prominence/depth, in the "
                  "DEM's vertical units (catchments: the largest over all probabilities, 0 to "
                  "1). -n is then the maximum.")


def run(*, per_model: bool = False):
    """Realisations, seed, workers, scheduler, checkpoints, stopping, overwrite, quiet, force."""
    return compose(
        click.option("--realisations", "-n", type=int, default=200, show_default=True,
                     help="Number of perturbed DEMs (realisations)"
                          + (" per error model" if per_model else "")
                          + "; the maximum with --target-se."),
        click.option("--seed", type=int, default=0, show_default=True,
                     help="Random seed (a whole number >= 0): the same seed gives the same "
                          "layers bit for bit."),
        click.option("--workers", type=int, default=None,
                     help="Worker processes on this machine [default: all cores]."),
        click.option("--scheduler", default=None, metavar="ADDRESS",
                     help="Run on a Dask scheduler at this address, e.g. "
                          "tcp://scheduler-host:8786."),
        click.option("--checkpoint", type=click.Path(dir_okay=False), default=None,
                     help="Save progress to this .npz file every 50 realisations and at the end"
                          + (" (one file per error model, named after it, beside this path)."
                             if per_model else ".")),
        click.option("--resume", is_flag=True, help=RESUME_HELP),
        click.option("--target-se", type=float, default=None, metavar="SE", help=TARGET_SE_HELP),
        click.option("--overwrite", is_flag=True,
                     help="Replace the run already in the output folder: its files "
                          "that this run does not write (another command's, as its run.json "
                          "lists them) are removed, so the folder holds one run."),
        click.option("--quiet", "-q", is_flag=True, help="No progress bar and no tables."),
        click.option("--force", is_flag=True,
                     help="Run even when the memory estimate exceeds the available memory."),
    )


block = click.option(
    "--block", type=int, default=None, metavar="CELLS",
    help="Compute each realisation block by block, in blocks of CELLS x CELLS cells (at least "
         "16; 1024 or more, a multiple of 256, is fastest: small blocks cost many times a "
         "whole-grid run): a worker then holds one block, not the whole grid, and the layers "
         "are the same bit for bit; peaks and depressions then keep the DEM, region labels and "
         "counts on disk and write window by window (out of core). Chosen (1024) when a "
         "whole-grid run would not fit in memory and blocks would. Scratch files (about 12-16 "
         "bytes per cell) go under TMPDIR; their space is checked before the run starts.")


outdir = click.option("-o", "--outdir", required=True, type=click.Path(file_okay=True),
                      help="Output folder (created if missing).")

