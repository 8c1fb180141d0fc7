"""The blocked regions, kept importable here: the code is in
:mod:`terrain.engine.blocked.regions`."""

from .blocked.regions import (
    RegionResolution,
    RegionSummary,
    blocked_regions,
    glue_regions,
    region_labels,
    region_step,
    region_table,
    window_reps,
)

__all__ = ["RegionSummary", "RegionResolution", "region_table", "window_reps", "region_step",
           "glue_regions", "region_labels", "blocked_regions"]
