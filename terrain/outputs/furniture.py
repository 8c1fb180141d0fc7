"""A map's scale bar and north arrow, and where on the map they go.

The scale bar has a round length (1, 2 or 5 x 10^k m, about a quarter of
the map's width; cell units without a CRS; a geographic CRS measured at the
raster's central latitude). The north arrow is drawn only when the grid is
north-up in a known CRS. Both go where the laid-out map holds the fewest
markers and labelled points (:func:`place_furniture`: a corner, or the
middle of an edge), the arrow never over the bar.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from ..dem import Dem, metres_per_degree
from .labels import box_array, boxes_overlap, marker_boxes, overlaps
from .style import FONT_PT, INK

if TYPE_CHECKING:
    from matplotlib.axes import Axes

__all__ = ["nice_length", "north_up", "scale_bar", "north_arrow", "place_furniture",
           "furniture_boxes", "PLACES", "BAR_CODES"]

#: where the scale bar and the north arrow may go, in order of preference: corners, then
#: the middles of the edges (matplotlib's legend location codes for the bar)
PLACES = ("lower left", "lower right", "upper left", "upper right", "lower center",
          "upper center", "center left", "center right")
BAR_CODES = {"upper right": 1, "upper left": 2, "lower left": 3, "lower right": 4,
             "center left": 6, "center right": 7, "lower center": 8, "upper center": 9}


def nice_length(x: float) -> float:
    """The largest round length (1, 2 or 5 x 10^k) not above ``x`` (x > 0)."""
    e = 10.0 ** math.floor(math.log10(x))
    return max(m * e for m in (1, 2, 5) if m * e <= x * (1 + 1e-9))


def north_up(dem: Dem) -> bool:
    """Whether the grid is north-up (no rotation, rows southwards) in a known CRS."""
    a, b, _, d, e, _ = dem.transform
    return dem.crs is not None and b == 0 and d == 0 and a > 0 and e < 0


def scale_bar(ax: Axes, dem: Dem, extent) -> None:
    """Add the scale bar (gid ``scale_bar``) to ``ax``, a map of ``dem`` drawn over
    ``extent`` (x0, x1, y0, y1)."""
    from matplotlib.font_manager import FontProperties
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    width = extent[1] - extent[0]
    if dem.crs is None:
        m_per_unit, unit = 1.0, " cell units"
    elif dem.geographic:
        lat = float(np.mean(dem.row_latitudes()))
        m_per_unit, unit = float(metres_per_degree(lat)[0]), None
    else:
        m_per_unit, unit = dem.linear_unit_m, None
    length = nice_length(abs(width) * m_per_unit / 4)
    if unit:
        text = f"{length:g}{unit}"
    else:
        text = f"{length / 1000:g} km" if length >= 1000 else f"{length:g} m"
    bar = AnchoredSizeBar(ax.transData, length / m_per_unit, text, "lower left",
                          pad=0.4, borderpad=0.6, sep=3, frameon=True,
                          size_vertical=abs(extent[3] - extent[2]) / 150,
                          fontproperties=FontProperties(size=FONT_PT), color=INK)
    bar.patch.set(alpha=0.8, edgecolor="none")
    bar.set_gid("scale_bar")
    ax.add_artist(bar)


def north_arrow(ax: Axes, place: str) -> None:
    """The north arrow ("N" under an arrow pointing up, gid ``north_arrow``) at
    ``place`` of the map (one of :data:`PLACES`), replacing one drawn before."""
    for t in [t for t in ax.texts if t.get_gid() == "north_arrow"]:
        t.remove()
    vertical, _, horizontal = place.partition(" ")
    x = {"left": 0.045, "center": 0.5, "right": 0.955}[horizontal]
    tip, text = {"upper": (0.965, 0.875), "center": (0.545, 0.455),
                 "lower": (0.155, 0.065)}[vertical]
    ax.annotate("N", xy=(x, tip), xytext=(x, text), xycoords="axes fraction",
                ha="center", va="center", fontsize=FONT_PT + 2, weight="bold",
                gid="north_arrow", zorder=8,
                bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.8),
                arrowprops=dict(facecolor=INK, edgecolor="white", width=3, headwidth=10,
                                lw=0.6))


def place_furniture(ax: Axes, points, *, arrow: bool) -> None:
    """Put the scale bar, then (``arrow``) the north arrow, where the laid-out map
    is emptiest: of :data:`PLACES` (the corners first, then the middles of the
    edges), the first whose box covers the fewest of ``points`` ((x, y, marker
    size in points): markers and labelled points); the arrow never covers the bar."""
    r = ax.figure.canvas.get_renderer()
    pts = marker_boxes(ax, points)
    bar = next(a for a in ax.artists if a.get_gid() == "scale_bar")

    def covered(boxes):  # how many (box, point) pairs overlap
        return int(overlaps(box_array(boxes), pts, tol=0.0).sum())

    counts = {}
    for name in PLACES:
        bar.loc = BAR_CODES[name]
        counts[name] = covered([bar.get_window_extent(r)])
    best = min(counts, key=counts.get)
    bar.loc = BAR_CODES[best]
    if not arrow:
        return
    taken, counts = bar.get_window_extent(r), {}
    for name in ("upper right",) + tuple(p for p in PLACES if p != "upper right"):
        north_arrow(ax, name)
        drawn = next(t for t in ax.texts if t.get_gid() == "north_arrow")
        boxes = [drawn.get_window_extent(r), drawn.arrow_patch.get_window_extent(r)]
        if not any(boxes_overlap(b, taken, tol=0.0) for b in boxes):
            counts[name] = covered(boxes)
    north_arrow(ax, min(counts, key=counts.get))


def furniture_boxes(ax: Axes) -> list:
    """Display boxes of the scale bar and the north arrow (with its arrow), which
    labels must keep clear of."""
    r = ax.figure.canvas.get_renderer()
    fixed = [a.get_window_extent(r) for a in ax.artists + ax.texts
             if a.get_gid() in ("scale_bar", "north_arrow")]
    fixed += [t.arrow_patch.get_window_extent(r) for t in ax.texts if t.get_gid() == "north_arrow"]
    return fixed
