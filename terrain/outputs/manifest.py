"""Every file each command writes, listed once.

The overwrite check (before a run starts), the writer and the command-line
help all read these lists, so they cannot drift apart. ``{id}`` in a name
stands for an outlet id.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..layers import layers_of

__all__ = ["OutputFile", "MANIFEST", "file_names", "help_text"]


@dataclass(frozen=True)
class OutputFile:
    """One output file: its name, what it holds, and its layers (GeoPackage)."""

    name: str
    what: str
    layers: tuple[str, ...] = ()


def _rasters(job: str) -> list[OutputFile]:
    return [OutputFile(s.name + ".tif", s.description + " (band 1), its standard error (band 2)")
            for s in layers_of(job)]


_COMMON = [OutputFile("quicklook.png", "quick-look map: the main layer over a hillshade, features, "
                                       "legend, error model and caution"),
           OutputFile("run.json", "provenance: input checksum, command line, every parameter "
                                  "and default, timings")]

_RANKING = OutputFile("ranking.png", "ranking chart: each top feature's 5-95% range and "
                                     "P(rank = k) for k = 1..10")

MANIFEST: dict[str, list[OutputFile]] = {
    "peaks": _rasters("peaks") + [
        OutputFile("peaks.gpkg", "summit features: polygons and points with their statistics, "
                                 "and each feature's most credited key col",
                   ("summits", "summit_points", "summit_regions", "cols")),
        OutputFile("summits.csv", "the summit feature table"), _RANKING] + _COMMON,
    "depressions": _rasters("depressions") + [
        OutputFile("depressions.gpkg", "depression features: polygons and points with their "
                                       "statistics, and each feature's most credited spill point",
                   ("pits", "pit_points", "pit_regions", "spill_points")),
        OutputFile("pits.csv", "the depression feature table"), _RANKING] + _COMMON,
    "catchments": _rasters("catchments") + [
        OutputFile("catchments.gpkg", "50% and 90% membership polygons per outlet with areas",
                   ("catchments",)),
        OutputFile("catchments.csv", "the catchment table")] + _COMMON,
    "sweep": [
        OutputFile("sweep.csv", "per error model and feature: expected figure, P(counted), "
                                "P(first), credit share, with standard errors"),
        OutputFile("kernel_sensitivity.csv", "differences between kernels of equal RMSE"),
        OutputFile("sweep.png", "credit share and P(first) against the error level"),
        _COMMON[1]],
}


def file_names(command: str, ids=()) -> list[str]:
    """The concrete file names ``command`` writes (one per outlet where a name holds ``{id}``)."""
    out = []
    for f in MANIFEST[command]:
        if "{id}" in f.name:
            out += [f.name.replace("{id}", str(i)) for i in ids]
        else:
            out.append(f.name)
    return out


def help_text(command: str) -> str:
    """A plain list of the files ``command`` writes, for the help text."""
    names = []
    for f in MANIFEST[command]:
        name = f.name.replace("{id}", "<id>")
        names.append(f"{name} ({', '.join(f.layers)})" if f.layers else name)
    return "Writes " + ", ".join(names) + "."


