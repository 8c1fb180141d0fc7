"""Every library default, in one place, resolved against the DEM and the error model.

Settings of a run are ``None`` until resolved; the resolving job records the
value and the rule that produced it (``run.json``), so a reader can always
see what a default became.
"""

from __future__ import annotations

import numpy as np

from .dem import Dem

__all__ = ["CUTOFF_PER_RMSE", "MERGE_PER_RMSE", "MIN_PRESENCE", "SNAP_CELLS", "cutoff",
           "merge_level", "base_level", "snap_radius", "RULES"]

CUTOFF_PER_RMSE = 3.0  # a counted pair is at least 3 x RMSE (clearly above the noise)
MERGE_PER_RMSE = 2.0  # the smallest persistence the stated error can resolve
MIN_PRESENCE = 0.1  # a feature is a row when counted in at least 10% of realisations
SNAP_CELLS = 2.0  # outlets snap within 2 cells (common practice, no source)

RULES = {
    "threshold": f"{CUTOFF_PER_RMSE:g} x RMSE (the largest RMSE in a sweep)",
    "base": "lowest valid cell of the DEM",
    "merge_level": f"{MERGE_PER_RMSE:g} x RMSE, or the cut-off if lower (a sweep: its smallest RMSE)",
    "snap_m": f"{SNAP_CELLS:g} x the mean cell width",
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
    return float(np.nanmin(np.where(dem.nodata, np.nan, dem.z)))


def snap_radius(snap_m: float | None, dem: Dem) -> float:
    """The outlet snap radius in metres: ``snap_m`` or 2 x the mean cell width."""
    if snap_m is not None:
        return float(snap_m)
    return SNAP_CELLS * float(np.mean(dem.cell_metres()[0]))
