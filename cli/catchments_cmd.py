"""``cairn catchments``: channels, sub-catchments, outlet membership and divides under DEM error."""

from __future__ import annotations

import click

from terrain.io import read_outlets
from terrain.jobs import CatchmentJob
from terrain.outputs.manifest import file_names, help_text, replace_patterns
from terrain.outputs.writer import write_catchment_run
from terrain.summary.catchments import summarise_catchments

from . import options
from .common import CAUTION, command_line, guarded, warn
from .execute import error_model, execution, guard_memory, header, outputs, read, run_job
from .summary import print_catchments

__all__ = ["catchments_cmd"]

_EPILOG = f"""
\b
Examples:
  cairn catchments dem.tif --outlets gauges.gpkg -o out --rmse 0.5 --snap 60
  cairn catchments lidar.tif -o channels --rmse 0.15 --channel-area 20000
\b
Outlets: points in a GeoPackage, GeoJSON or Shapefile (reprojected to the
DEM's CRS), or a CSV with columns x,y (DEM's CRS) and optional id; an outlet
without an id takes its row number. Every other column travels with the
outlet into catchments.gpkg and the CSV tables. Without --outlets only the
channel layer is computed.

\b
Each realisation removes depressions (breaching cuts a least-cost channel
from a pit through the lowest-cost barrier, e.g. a road embankment without
a culvert; depressions deeper than --breach-cap are filled), routes
D8 flow (D4 with --connectivity 4; the same neighbourhood is used for
depressions, flats and divides), and counts: channel cells (drainage area
>= --channel-area), each cell's sub-catchment (the first chosen outlet
downstream; nested outlets split their parent; cells reaching no outlet
share one label), membership of each outlet's whole catchment, and divides
(a neighbour in another sub-catchment).

{help_text("catchments")}

Channel, catchment and divide layers describe the DEM's drainage under its
stated error, not flood behaviour or where water runs in a storm.

{CAUTION}
"""


@click.command("catchments", epilog=_EPILOG)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("--outlets", type=click.Path(dir_okay=False), default=None,
              help="Outlet points (GeoPackage, GeoJSON, Shapefile, or CSV with x,y[,id]); "
                   "without it only channel probability is computed.")
@options.outdir
@click.option("--snap", type=float, default=None,
              help="Snap each outlet, per realisation, to the cell of highest flow "
                   "accumulation within this many metres [default: 2 cells].")
@options.drainage()
@options.connectivity
@options.accuracy()
@options.error_model()
@options.dem_input
@options.run()
@guarded
def catchments_cmd(dem, outlets, outdir, snap, channel_area, conditioning, breach_cap,
                   connectivity, **opts):
    """Channels, outlet catchments, sub-catchments and divides, as probabilities
    under DEM error.

    Analysis aids, not engineering design: see the caution below.
    """
    model = error_model(opts)
    ex = execution(opts)
    head = header(dem, opts)
    pts = read_outlets(outlets, head) if outlets is not None else None  # DEM's CRS, from its header
    if pts is not None and pts.numbered:
        rows = ", ".join(map(str, pts.numbered[:5])) + (" ..." if len(pts.numbered) > 5 else "")
        warn(f"{outlets}: {len(pts.numbered)} outlet(s) without an id take their row number "
             f"(rows {rows})")
    job = CatchmentJob(pts.ids if pts else (), pts.xy if pts else None, snap_m=snap,
                       channel_area=channel_area, conditioning=conditioning,
                       breach_cap=breach_cap, connectivity=connectivity,
                       source=str(outlets))
    out = outputs(outdir, file_names("catchments", job.layer_ids), opts,
                  inputs=[dem] + ([outlets] if outlets else []),
                  patterns=replace_patterns("catchments"))
    guard_memory(head, job, ex, opts, model=model)
    d = read(dem, opts)
    job = job.resolved(d, model)
    what = f"{len(job.ids)} outlet(s), snap {job.snap_m:g} m" if job.ids else "no outlets"
    res = run_job(d, job, model, ex, opts, label="catchments",
                  headline=f"{what}, {job.conditioning}, D{job.connectivity}, channels from "
                           f"{job.channel_area:g} m²")
    summary = summarise_catchments(res, pts.attributes if pts else None)
    write_catchment_run(out, res, summary, input_path=str(dem),
                        outlets_path=str(outlets) if outlets else None, command_line=command_line())
    if not opts["quiet"]:
        print_catchments(summary, res, outdir=out, caution=CAUTION)
