"""``cairn catchments``: channels, sub-catchments, outlet membership and divides under DEM error."""

from __future__ import annotations

from pathlib import Path

import click

from terrain.errors import OptionError, OutletError
from terrain.io import read_outlets
from terrain.jobs import CatchmentJob
from terrain.outputs.manifest import file_names, help_text, replace_patterns
from terrain.outputs.style import area_text

from . import options
from .common import CAUTION, command_line, guarded, warn, warn_later
from .execute import error_model, execution, guard_memory, header, outputs, read, run_job
from .summary import print_catchments

__all__ = ["catchments_cmd"]

_EPILOG = f"""
\b
Examples:
  cairn catchments dem.tif --outlets gauges.gpkg -o out --rmse 0.5 --snap 60
  cairn catchments lidar.tif -o channels --rmse 0.15 --channel-area 20000
\b
Outlets: points in a GeoPackage, GeoJSON or Shapefile (in the CRS the file
declares, reprojected to the DEM's), or a CSV with columns x,y and optional
id, in the CRS given by --outlets-crs or a sidecar file (gauges.csv.crs,
gauges.crs or gauges.prj), else taken to be the DEM's CRS (said in a
warning); an outlet without an id takes its row number. The outlets table
keeps the coordinates as given and their CRS beside the point and the
snapped cell in the DEM's CRS. Two outlets that snap to one cell on the DEM
as given are refused. Every other column travels with the outlet into
catchments.gpkg and the CSV tables. Without --outlets only the channel and
drainage-area layers are computed.

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


def catchment_settings(job: CatchmentJob, unit: str) -> str:
    """The resolved settings as the header echoes them, e.g. ``3 outlet(s), snap 20 m
    (2 cells), breach up to 3 m deep (default), D8, channels from 0.1 km² (default)``."""
    used = set(job.from_defaults)

    def note(name, rule=" (default)"):
        return rule if name in used else ""

    what = (f"{len(job.ids)} outlet(s), snap {job.snap_m:.4g} m{note('snap_m', ' (2 cells)')}"
            if job.ids else "no outlets")
    how = (f"breach up to {job.breach_cap:g} {unit} deep{note('breach_cap')}, fill deeper"
           if job.conditioning == "breach" else "fill")
    return (f"{what}, {how}, D{job.connectivity}, channels from "
            f"{area_text(job.channel_area)}{note('channel_area')}")


def edge_warning(summary) -> str | None:
    """One line naming the outlets whose 50% catchment reaches the raster's edge or
    nodata (its area is then a lower bound), or None."""
    from terrain.outlets import short
    from terrain.summary.catchments import LEVELS

    c = summary.frames.get("catchments")
    if c is None:
        return None
    hit = c[(c["level"] == LEVELS[0]) & c["edge_limited"].astype(bool)]
    if hit.empty:
        return None
    named = ", ".join(f"{short(str(o), 24)} ({n:,} cells)"
                      for o, n in zip(hit["outlet_id"][:5], hit["edge_cells"][:5]))
    more = f" and {len(hit) - 5} more" if len(hit) > 5 else ""
    return (f"the 50% catchment of {len(hit)} outlet(s) reaches the raster's edge or nodata: "
            f"{named}{more}; water may come in from beyond the DEM, so those areas are lower "
            "bounds (edge_limited in catchments.csv): give a DEM that holds the whole catchment")


@click.command("catchments", epilog=_EPILOG)
@click.argument("dem", type=click.Path(dir_okay=False))
@click.option("--outlets", type=click.Path(dir_okay=False), default=None,
              help="Outlet points (GeoPackage, GeoJSON, Shapefile, or CSV with x,y[,id]); "
                   "without it only channel probability and drainage area are computed.")
@click.option("--outlets-crs", default=None, metavar="CRS",
              help="CRS of a CSV of outlets (e.g. EPSG:4326), or of a vector file that "
                   "declares none [default: a sidecar gauges.csv.crs, gauges.crs or gauges.prj, "
                   "else the DEM's CRS, said in a warning].")
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
def catchments_cmd(dem, outlets, outlets_crs, outdir, snap, channel_area, conditioning,
                   breach_cap, connectivity, **opts):
    """Channels, outlet catchments, sub-catchments and divides, as probabilities
    under DEM error.

    Analysis aids, not engineering design: see the caution below.
    """
    from terrain.outputs.writer import write_catchment_run  # loaded when the command runs
    from terrain.summary.catchments import summarise_catchments

    model = error_model(opts)
    ex = execution(opts)
    head = header(dem, opts)
    if outlets is None and outlets_crs is not None:
        raise OptionError("{outlets_crs} gives the CRS of the outlets, and there are none; drop "
                          "it or give {outlets}", "outlets_crs", "outlets")
    pts = read_outlets(outlets, head, crs=outlets_crs) if outlets is not None else None
    if pts is not None and pts.crs_source == "assumed" and head.crs is not None:
        warn_later(f"{outlets}: no CRS given for the outlets (no --outlets-crs, no sidecar "
             f"{Path(outlets).name}.crs); their coordinates are taken to be in the DEM's CRS "
             f"({pts.given_crs})")
    if pts is not None and pts.numbered:
        rows = ", ".join(map(str, pts.numbered[:5])) + (" ..." if len(pts.numbered) > 5 else "")
        warn_later(f"{outlets}: {len(pts.numbered)} outlet(s) without an id take their row number "
             f"(rows {rows})")
    job = CatchmentJob(pts.ids if pts else (), pts.xy if pts else None, snap_m=snap,
                       channel_area=channel_area, conditioning=conditioning,
                       breach_cap=breach_cap, connectivity=connectivity,
                       source=str(outlets))
    out = outputs(outdir, file_names("catchments", job.layer_ids), opts,
                  inputs=[dem] + ([outlets] if outlets else []),
                  patterns=replace_patterns("catchments"))
    _, layout = guard_memory(head, job, ex, opts, model=model)
    d = read(dem, opts)
    try:
        job = job.resolved(d, model)
    except OutletError as e:  # the held warning would be lost: the error line says it
        if pts is None or pts.crs_source != "assumed":
            raise
        hint = (" (no CRS was given for the outlets, so the DEM's was assumed: give "
                "{outlets_crs} or a sidecar " + Path(outlets).name + ".crs)")
        raise OutletError(e.template + hint, *e.params, "outlets_crs") from None
    res = run_job(d, job, model, ex, opts, label="catchments",
                  headline=catchment_settings(job, d.unit_label), layout=layout)
    summary = summarise_catchments(res, pts.attributes if pts else None, outlets=pts)
    write_catchment_run(out, res, summary, input_path=str(dem),
                        outlets_path=str(outlets) if outlets else None, command_line=command_line())
    cut = edge_warning(summary)
    if cut:
        warn(cut)
    if not opts["quiet"]:
        print_catchments(summary, res, outdir=out, caution=CAUTION)
