"""``cairn inspect DEM``: what cairn sees in a raster before a run."""

from __future__ import annotations

import click
import numpy as np

from terrain.jobs import CatchmentJob, CreditJob
from terrain.resources import describe_memory

from . import options
from .common import guarded
from .execute import read

__all__ = ["inspect_cmd"]


@click.command("inspect")
@click.argument("dem", type=click.Path(dir_okay=False, path_type=str))
@options.dem_input
@guarded
def inspect_cmd(dem, band, bbox):
    """Describe DEM: grid, CRS, cell size, units, nodata and memory per realisation.

    \b
    Example:
      cairn inspect dem.tif --bbox 512000,6800000,514000,6802000
    """
    d = read(dem, {"band": band, "bbox": bbox})
    rows, cols = d.shape
    dx, dy = d.cellsize
    valid = ~d.nodata
    zv = d.z[valid]
    lines = [
        ("file", d.source),
        ("grid", f"{rows} rows x {cols} columns ({rows * cols:,} cells), stored as {d.meta['dtype']}"),
        ("crs", _crs_name(d.crs)),
        ("cell size", f"{dx:g} x {dy:g} {'degrees' if d.geographic else 'CRS units'}"),
    ]
    if d.geographic:
        w, h = d.cell_metres()
        lines.append(("cell size (m)", f"{w.min():.1f}-{w.max():.1f} m wide x {h.mean():.1f} m tall "
                                       "(by latitude, WGS84)"))
    elif d.crs is not None:
        lines.append(("cell size (m)", f"{dx * d.linear_unit_m:g} x {dy * d.linear_unit_m:g} m"))
    lines += [
        ("vertical units", d.vertical_units or "unknown (not declared in the file)"),
        ("nodata", f"{(~valid).mean():.2%} of cells"),
        ("elevation", f"{zv.min():g} to {zv.max():g} (mean {zv.mean():.2f})"),
        ("memory (peaks)", describe_memory(d, CreditJob("peaks"))),
        ("memory (depressions)", describe_memory(d, CreditJob("depressions"))),
        ("memory (catchments, 3 outlets)",
         describe_memory(d, CatchmentJob(("1", "2", "3"), np.zeros((3, 2))))),
    ]
    width = max(len(k) for k, _ in lines)
    for k, v in lines:
        click.echo(f"{k:<{width}}  {v}")


def _crs_name(wkt: str | None) -> str:
    if wkt is None:
        return "none declared (distances and areas in cell units)"
    from rasterio.crs import CRS

    crs = CRS.from_wkt(wkt)
    epsg = crs.to_epsg()
    name = wkt.split('"')[1] if '"' in wkt else "custom"
    return f"{name}" + (f" (EPSG:{epsg})" if epsg else "")
