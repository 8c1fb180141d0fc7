"""``cairn catchments``: outlet membership and drainage divides under DEM error."""

from __future__ import annotations

import click

from terrain.io import read_outlets
from terrain.jobs import CatchmentJob
from terrain.outputs.manifest import file_names, help_text
from terrain.outputs.writer import write_catchment_run
from terrain.summary.catchments import catchment_table

from . import options
from .common import CAUTION, command_line, guarded
from .execute import error_model, execution, guard_memory, header, outputs, read, run_job
from .summary import print_catchments

__all__ = ["catchments_cmd"]

_EPILOG = f"""
\b
Example:
  cairn catchments dem.tif --outlets gauges.gpkg -o out --rmse 0.5 --snap 60
\b
Outlets: points in a GeoPackage, GeoJSON or Shapefile (reprojected to the
DEM's CRS), or a CSV with columns x,y (DEM's CRS) and optional id.

{help_text("catchments")}

Catchment and divide layers describe the DEM's drainage under its stated
error, not flood behaviour or where water runs in a storm.

{CAUTION}
"""


@click.command("catchments", epilog=_EPILOG)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("--outlets", required=True, type=click.Path(dir_okay=False),
              help="Outlet points (GeoPackage, GeoJSON, Shapefile, or CSV with x,y[,id]).")
@options.outdir
@click.option("--snap", type=float, default=None,
              help="Snap each outlet, per realisation, to the cell of highest flow "
                   "accumulation within this many metres [default: 2 cells].")
@options.accuracy()
@options.error_model()
@options.dem_input
@options.run()
@guarded
def catchments_cmd(dem, outlets, outdir, snap, **opts):
    """Outlet catchments and drainage divides, as probabilities under DEM error.

    Each realisation fills depressions (the edge and nodata are exits), routes
    D8 flow, snaps every outlet to its channel and records which cells drain
    to it.
    """
    model = error_model(opts)
    ex = execution(opts)
    head = header(dem, opts)
    ids, xy = read_outlets(outlets, head)  # in the DEM's CRS, from its header
    job = CatchmentJob(ids, xy, snap_m=snap, source=str(outlets))
    out = outputs(outdir, file_names("catchments", job.ids), opts, inputs=[dem, outlets])
    guard_memory(head, job, ex, opts, model=model)
    d = read(dem, opts)
    job = job.resolved(d, model)
    res = run_job(d, job, model, ex, opts, label="catchments",
                  headline=f"{len(ids)} outlet(s), snap " + (f"{snap:g} m" if snap is not None
                                                             else "2 cells"))
    table = catchment_table(res)
    write_catchment_run(out, res, table, input_path=str(dem), outlets_path=str(outlets),
                        command_line=command_line())
    if not opts["quiet"]:
        print_catchments(table, n=res.n, outdir=out, caution=CAUTION)
