"""Every library default, in one place, resolved against the DEM and the error model.

Settings of a run are ``None`` until resolved; the resolving job records the
value and the rule that produced it (``run.json``), so a reader can always
see what a default became.
"""

from __future__ import annotations

import numpy as np

from .dem import Dem

__all__ = ["CUTOFF_PER_RMSE", "MERGE_PER_RMSE", "MIN_PRESENCE", "SNAP_CELLS", "CHANNEL_AREA_M2",
           "CONDITIONING", "BREACH_CAP", "cutoff", "merge_level", "base_level",
           "snap_radius", "channel_area", "conditioning", "breach_cap", "RULES"]

DISK_BLOCK = 1024  # the one default block side: blocked runs the memory guard chooses, and the
#                   regions and ponding of a DEM kept on disk when no run names one
CUTOFF_PER_RMSE = 3.0  # a counted pair is at least 3 x RMSE (clearly above the noise)
MERGE_PER_RMSE = 2.0  # the smallest persistence the stated error can resolve
MIN_PRESENCE = 0.1  # a feature is a row when counted in at least 10% of realisations
SNAP_CELLS = 2.0  # outlets snap within 2 cells (common practice, no source)
# Channels begin where the area draining through a cell reaches 0.1 km^2 (10 ha):
# common practice for DEM channel networks, no single source; field-mapped channel
# heads span roughly 1e2-1e5 m^2 with slope (Montgomery & Dietrich 1988, Nature 336,
# 232-234; the range is from memory).
CHANNEL_AREA_M2 = 1.0e5
# Breach rather than fill: breaching alters the DEM less and keeps flow paths
# through road embankments and similar artificial dams (Lindsay & Creed 2005,
# Hydrological Processes 19(16), 3113-3126, doi:10.1002/hyp.5835; from memory).
CONDITIONING = "breach"
# Depressions deeper than this (vertical units) are filled, not cut: above the
# height of most road embankments and field dams on lidar DEMs, below most real
# closed basins worth keeping (common practice, no source).
BREACH_CAP = 3.0

RULES = {
    "threshold": f"{CUTOFF_PER_RMSE:g} x RMSE (the largest RMSE in a sweep)",
    "base": "lowest valid cell of the DEM",
    "merge_level": f"{MERGE_PER_RMSE:g} x RMSE, or the cut-off if lower (a sweep: its smallest RMSE)",
    "snap_m": f"{SNAP_CELLS:g} x the mean cell width",
    "channel_area": f"{CHANNEL_AREA_M2:g} m^2 (0.1 km^2; common practice for channel initiation "
                    "on DEMs, no single source)",
    "conditioning": f"{CONDITIONING} (breaching alters a DEM less than filling; Lindsay & Creed "
                    "2005, Hydrological Processes 19(16), cited from memory)",
    "breach_cap": f"{BREACH_CAP:g} vertical units (deeper depressions are filled; "
                        "common practice, no source)",
}


def cutoff(threshold: float | None, rmse: float) -> float:
    """The minimum prominence/depth of a counted pair: ``threshold`` or 3 x RMSE."""
    return CUTOFF_PER_RMSE * float(rmse) if threshold is None else float(threshold)


def merge_level(level: float | None, rmse: float, threshold: float) -> float:
    """The persistence below which feature regions merge: ``level`` or
    min(2 x RMSE, cut-off) -- knobs and hollows the stated error cannot
    resolve belong to the feature around them."""
    if level is not None:
        return float(level)
    return min(MERGE_PER_RMSE * float(rmse), float(threshold))


def base_level(base: float | None, dem: Dem) -> float:
    """The level the highest summit is measured to: ``base`` or the DEM's lowest cell."""
    if base is not None:
        return float(base)
    return dem.lowest()


def snap_radius(snap_m: float | None, dem: Dem) -> float:
    """The outlet snap radius in metres: ``snap_m`` or 2 x the mean cell width."""
    if snap_m is not None:
        return float(snap_m)
    return SNAP_CELLS * float(np.mean(dem.cell_metres()[0]))


def channel_area(area_m2: float | None) -> float:
    """The accumulation (m^2) at which a cell counts as channel: ``area_m2`` or 0.1 km^2."""
    return CHANNEL_AREA_M2 if area_m2 is None else float(area_m2)


def conditioning(method: str | None) -> str:
    """How depressions are removed: ``method`` or breaching."""
    return CONDITIONING if method is None else method


def breach_cap(depth: float | None, method: str) -> float | None:
    """The deepest depression breached (vertical units): ``depth`` or 3; None when filling."""
    if method != "breach":
        return None
    return BREACH_CAP if depth is None else float(depth)
