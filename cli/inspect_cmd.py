"""``cairn inspect DEM``: what cairn sees in a raster before a run."""

from __future__ import annotations

import math

import click
import numpy as np

from terrain.jobs import CatchmentJob, CreditJob
from terrain.resources import DEFAULT_BLOCK, available_bytes, describe_memory, read_bytes
from terrain.runner import Execution

from . import options
from .common import flush_warnings, guarded
from .execute import header, read

__all__ = ["inspect_cmd"]


@click.command("inspect")
@click.argument("dem", type=click.Path(dir_okay=False, path_type=str))
@options.dem_input
@guarded
def inspect_cmd(dem, band, bbox, nodata, vertical_unit):
    """Describe DEM: grid, CRS, cell size, units, nodata and the memory a run needs.

    The header is read first; the pixels (for the elevation range and nodata
    share) only when reading them fits in memory. With --bbox, every cell
    whose area meets the box is read (a box inside one cell reads that cell);
    the window read is shown as rows and columns of the file. Memory: the
    figure the run's guard uses, for the default realisations and workers.

    \b
    Example:
      cairn inspect dem.tif --bbox 512000,6800000,514000,6802000
    """
    opts = {"band": band, "bbox": bbox, "nodata": nodata, "vertical_unit": vertical_unit}
    head = header(dem, opts)
    rows, cols = head.shape
    a, b, _, d, e, _ = head.transform
    dx, dy = math.hypot(a, d), math.hypot(b, e)
    lines = [
        ("file", head.source),
        ("grid", f"{rows} rows x {cols} columns ({rows * cols:,} cells), stored as {head.dtype}"
                 + (f", band {head.band}" if band else "")),
        ("crs", _crs_name(head.crs)),
        ("cell size", f"{dx:g} x {dy:g} {'degrees' if head.geographic else 'CRS units'}"),
    ]
    if head.window is not None:
        c0, r0, w, h = head.window
        lines.append(("window", f"rows {r0}-{r0 + h - 1}, columns {c0}-{c0 + w - 1} of the file"))
    if head.scale != 1.0 or head.offset != 0.0:
        lines.append(("scale, offset", f"elevation = stored x {head.scale:g} + {head.offset:g}"))
    lines += _pixels(dem, opts, head, dx, dy)
    ex = Execution()
    blocked = Execution(block=DEFAULT_BLOCK)
    for kind in ("peaks", "depressions"):
        lines += [(f"memory ({kind})", describe_memory(head, CreditJob(kind), ex)),
                  (f"memory ({kind}, --block {DEFAULT_BLOCK})",
                   describe_memory(head, CreditJob(kind), blocked))]
    lines.append(("memory (catchments, 3 outlets)",
                  describe_memory(head, CatchmentJob(("1", "2", "3"), np.zeros((3, 2))), ex)))
    width = max(len(k) for k, _ in lines)
    for k, v in lines:
        click.echo(f"{k:<{width}}  {v}")


def _pixels(path, opts, head, dx, dy) -> list[tuple[str, str]]:
    """Lines that need the pixels: read them only when that fits in memory."""
    need = read_bytes(head)
    if need > available_bytes():
        return [("vertical unit", _unit(head)),
                ("elevation", f"not read (reading needs {need / 2**30:.1f} GiB; more than is "
                              "available)")]
    d = read(path, opts)
    flush_warnings()
    valid = ~d.nodata
    zv = d.z[valid]
    lines = []
    if d.geographic:
        w, h = d.cell_metres()
        lines.append(("cell size (m)", f"{w.min():.1f}-{w.max():.1f} m wide x {h.mean():.1f} m tall "
                                       "(by latitude, WGS84)"))
    elif d.crs is not None:
        lines.append(("cell size (m)", f"{dx * d.linear_unit_m:g} x {dy * d.linear_unit_m:g} m"))
    return lines + [
        ("vertical unit", _unit(d)),
        ("nodata", f"{(~valid).mean():.2%} of cells"),
        ("elevation", f"{zv.min():g} to {zv.max():g} {d.unit_label} (mean {zv.mean():.2f})"),
    ]


def _unit(grid) -> str:
    """The vertical unit and where it came from (a header or a DEM)."""
    from terrain.dem import UNIT_LABELS, VERTICAL_UNITS

    label = UNIT_LABELS[grid.vertical_unit]
    how = {"given": "as given by --vertical-unit",
           "declared": f"declared by the file as {grid.vertical_units!r}",
           "assumed": "assumed: the file declares none (give --vertical-unit ft or us-ft if the "
                      "values are feet)"}[grid.vertical_unit_source]
    return f"{label} ({how}; {VERTICAL_UNITS[grid.vertical_unit]:.10g} m per unit)"


def _crs_name(wkt: str | None) -> str:
    if wkt is None:
        return "none declared (distances and areas in cell units)"
    from rasterio.crs import CRS

    crs = CRS.from_wkt(wkt)
    epsg = crs.to_epsg()
    name = wkt.split('"')[1] if '"' in wkt else "custom"
    return f"{name}" + (f" (EPSG:{epsg})" if epsg else "")
