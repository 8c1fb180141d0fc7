"""Every file each command writes, listed once.

The overwrite check (before a run starts), the writer and the command-line
help all read these lists, so they cannot drift apart. ``{id}`` in a name
stands for an outlet id.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..layers import layers_of

__all__ = ["OutputFile", "MANIFEST", "VECTOR_LAYERS", "file_names", "help_text",
           "replace_patterns", "every_output"]


@dataclass(frozen=True)
class OutputFile:
    """One output file: its name, what it holds, its layers (GeoPackage), and
    whether only a catchment run with outlets writes it."""

    name: str
    what: str
    layers: tuple[str, ...] = ()
    needs_outlets: bool = False


_BANDS = {("estimate", "standard_error"): " (band 1), its standard error (band 2)",
          ("median", "p05", "p95"): ", in m²: median (band 1), 5% (band 2) and 95% (band 3)"}


def _rasters(job: str) -> list[OutputFile]:
    return [OutputFile(s.name + ".tif", s.description + _BANDS[s.bands],
                       needs_outlets=s.needs_outlets)
            for s in layers_of(job)]


_COMMON = [OutputFile("quicklook.png", "quick-look map: the main layer over a hillshade, features, "
                                       "legend, error model and caution"),
           OutputFile("run.json", "provenance: input checksum, command line, every parameter "
                                  "and default, timings")]

_RANKING = OutputFile("ranking.png", "ranking chart: the features that rank 1st-10th in at "
                                     "least 1% of realisations, by median rank, groups together: "
                                     "each one's 5-95% range (per cluster where bimodal) and "
                                     "P(rank = k) for k = 1..10")
_RANKS = OutputFile("ranks.csv", "the rank distribution in long form: feature, rank k = 1..10, "
                                 "P(rank = k) and its Monte Carlo standard error")
_PARENTS = OutputFile("parents.csv", "each summit feature's parents in long form: feature, parent "
                                     "(empty: the highest summit), share of the realisations "
                                     "counting the feature and its Monte Carlo standard error, "
                                     "whether it is the parent on the DEM as given")
_SPILLS = OutputFile("spills.csv", "where each depression feature spills, in long form: feature, "
                                   "receiving feature (-1: off the raster), share and its Monte "
                                   "Carlo standard error, on the DEM as given, the spill point")

MANIFEST: dict[str, list[OutputFile]] = {
    "peaks": _rasters("peaks") + [
        OutputFile("peaks.gpkg", "summit features: polygons and points with their statistics, "
                                 "each feature's most credited key col, and the rank "
                                 "distribution", ("summits", "summit_points", "summit_regions",
                                                  "cols", "ranks", "parents")),
        OutputFile("summits.csv", "the summit feature table"), _RANKS, _RANKING,
        _PARENTS] + _COMMON,
    "depressions": _rasters("depressions") + [
        OutputFile("depressions.gpkg", "depression features: polygons and points with their "
                                       "statistics, each feature's most credited spill point, "
                                       "and the rank distribution",
                   ("pits", "pit_points", "pit_regions", "spill_points", "ranks", "spill_links")),
        OutputFile("pits.csv", "the depression feature table"), _RANKS, _RANKING,
        _SPILLS] + _COMMON,
    "catchments": _rasters("catchments") + [
        OutputFile("catchments.gpkg", "per outlet: 50% and 90% catchment and sub-catchment "
                                      "polygons with areas, and the outlet as given and snapped, "
                                      "each with the outlets file's attributes",
                   ("catchments", "subcatchments", "outlets"), True),
        OutputFile("catchments.csv", "the catchments layer as a table", needs_outlets=True),
        OutputFile("subcatchments.csv", "the subcatchments layer as a table", needs_outlets=True),
        OutputFile("outlets.csv", "the outlets layer as a table", needs_outlets=True),
    ] + _COMMON,
    "sweep": [
        OutputFile("sweep.csv", "per error model and feature: expected figure, P(counted), "
                                "P(first), credit share, with standard errors"),
        OutputFile("kernel_sensitivity.csv", "differences between kernels of equal RMSE"),
        OutputFile("sweep.png", "credit share and P(first) against the error level"),
        _COMMON[1]],
}

#: What each GeoPackage layer holds: the start of its ``gpkg_contents.description`` (the
#: writer adds the error model and the caution).
VECTOR_LAYERS: dict[str, str] = {
    "summits": "Summit features of a peaks run: where each top is (the fewest cells holding 90% "
               "of the summit births of its region of the DEM as given), one polygon per "
               "feature, by rank, with its prominence on the DEM as given, expected prominence "
               "and its spread, and the probabilities of being counted and of ranking first",
    "summit_points": "Summit features of a peaks run as points at each feature's most credited "
                     "summit cell, by rank, with the same statistics as the summits layer",
    "summit_regions": "Summit features of a peaks run: each feature's whole region of the DEM "
                      "as given (the cells that climb to its summit), by rank, with the same "
                      "statistics as the summits layer",
    "pits": "Depression features of a depressions run: each feature's ponded extent (cells of "
            "its region that hold water in at least half the realisations; where none does, "
            "its most credited pit cell, flagged extent_is_pit_cell), one polygon per "
            "feature, by rank, with its depth on the DEM as given, expected depth and its "
            "spread, ponded area and volume, and the probabilities of being counted and of "
            "ranking first",
    "pit_points": "Depression features of a depressions run as points at each feature's most "
                  "credited pit cell, by rank, with the same statistics as the pits layer",
    "pit_regions": "Depression features of a depressions run: each feature's whole region of "
                   "the DEM as given (the cells that drain to its pit), by rank, with the same "
                   "statistics as the pits layer",
    "cols": "Each summit feature's most credited key col (the cell where its pairs died most, "
            "by credit), with feature_id and rank to join the summits layer, col_share (its "
            "share of the feature's col credit) and col_elevation (mean over the realisations "
            "in which it was the col)",
    "spill_points": "Each depression feature's most credited spill point (the cell where its "
                    "pairs died most, by credit), with feature_id and rank to join the pits "
                    "layer, spill_share (its share of the feature's spill credit) and "
                    "spill_elevation (mean over the realisations in which it was the spill "
                    "point)",
    "ranks": "The rank distribution of a run's features (a table without geometry): one row "
             "per rank k = 1..10 (fewer when fewer features were counted) and feature that held "
             "it in some realisation, with p_rank = P(rank = k) and its Monte Carlo standard "
             "error p_rank_se; for every k the rows carry the whole probability, feature_id 0 "
             "holding the share of realisations in which fewer than k features were counted. "
             "Join feature_id to the other layers",
    "parents": "Each summit feature's parent in long form (a table without geometry): the "
               "feature holding the highest summit of the component its key col joins (by the "
               "elder rule), one row per feature and parent with share (of the realisations "
               "counting the feature) and share_se (its Monte Carlo standard error); an empty "
               "parent_id is the share in which it is the highest summit; unperturbed marks the "
               "parent on the DEM as given. Join feature_id to the other layers",
    "spill_links": "Where each depression feature's water goes when it overflows: one line per "
                   "feature and receiving feature, from the feature's pit on the DEM as given "
                   "to its most frequent spill point for that link and on to the receiving "
                   "feature's pit (ending at the spill point when the water leaves the raster, "
                   "spills_into_id -1, or reaches no feature, 0), with share (of the "
                   "realisations counting the feature), share_se (its Monte Carlo standard "
                   "error) and unperturbed (the link on the DEM as given)",
    "catchments": "Cells draining to each outlet in at least 50% and at least 90% of "
                  "realisations, one polygon per outlet and level, with its area and the mean "
                  "and 5-95% range of the catchment area over realisations (nested outlets "
                  "included), and the outlets file's attributes",
    "subcatchments": "Cells whose first chosen outlet downstream is each outlet in at least 50% "
                     "and at least 90% of realisations (nested outlets split their parent), one "
                     "polygon per outlet and level, with its area and the mean and 5-95% range "
                     "of the sub-catchment area, and the outlets file's attributes",
    "outlets": "Each outlet as given, with its most frequent snapped cell, the share of "
               "realisations that snapped there and the mean snap distance in metres, and the "
               "outlets file's attributes",
}


def file_names(command: str, ids=()) -> list[str]:
    """The concrete file names ``command`` writes (one per outlet where a name
    holds ``{id}``; ``ids`` are file-name ids, and without any the files that
    need outlets are left out)."""
    out = []
    for f in MANIFEST[command]:
        if "{id}" in f.name:
            out += [f.name.replace("{id}", str(i)) for i in ids]
        elif ids or not f.needs_outlets:
            out.append(f.name)
    return out


def replace_patterns(command: str) -> tuple[str, ...]:
    """Glob patterns of ``command``'s per-outlet files (``{id}`` as ``*``): earlier
    files matching them that a new set lacks are removed when it is published."""
    return tuple(f.name.replace("{id}", "*") for f in MANIFEST[command] if "{id}" in f.name)


def every_output() -> tuple[str, ...]:
    """Glob patterns of every file any command writes (``{id}`` as ``*``): the names an
    earlier run's record may list for a new run's publication to remove
    (:func:`terrain.io.recorded_outputs`)."""
    return tuple(sorted({f.name.replace("{id}", "*") for files in MANIFEST.values()
                         for f in files}))


def help_text(command: str) -> str:
    """A plain list of the files ``command`` writes, for the help text."""
    def names(files):
        return ", ".join(f"{f.name.replace('{id}', '<id>')} ({', '.join(f.layers)})" if f.layers
                         else f.name.replace("{id}", "<id>") for f in files)

    always = [f for f in MANIFEST[command] if not f.needs_outlets]
    extra = [f for f in MANIFEST[command] if f.needs_outlets]
    return "Writes " + names(always) + (f"; with outlets also {names(extra)}" if extra else "") + "."


