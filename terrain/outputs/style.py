"""The house style of every figure: text sizes, ink, palettes, number and unit text.

Colour maps are slices of matplotlib's perceptually uniform maps, each
running from light to dark, so they read in greyscale and by colour-blind
readers (matplotlib's maps were designed for both; van der Walt & Smith,
"A Better Default Colormap for Matplotlib", SciPy 2015; Nuñez, Anderton &
Renslow, "Optimizing colormaps with consideration for color vision
deficiency", PLoS ONE 13, 2018, for ``cividis``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from matplotlib.colors import Colormap

__all__ = ["FONT_PT", "DPI", "INK", "NODATA", "HALO_PT", "PALETTES", "OUTLINE_COLOURS", "palette",
           "halo", "short_unit", "power_of_ten", "area_text"]

FONT_PT = 9.0  # the smallest text on any figure, at the saved size
DPI = 120
INK = "#1a1a1a"
NODATA = "#ece6da"
HALO_PT = 2.6

#: name -> (matplotlib map, start, end): light (low values) to dark (high values)
PALETTES = {"summits": ("magma", 0.97, 0.22), "water": ("cividis", 0.97, 0.08),
            "divides": ("viridis", 0.97, 0.12)}
#: outline colours for catchments, told apart by lightness as well as hue
OUTLINE_COLOURS = ("#1f5fa8", "#d1600a", "#6a3d9a", "#127a5c", "#b0124a", "#7a5c00",
                   "#0092b8", "#505050")


def palette(name: str) -> Colormap:
    """A named colour map of :data:`PALETTES` (light = low, dark = high).

    References
    ----------
    .. [1] van der Walt, S. & Smith, N. (2015). A Better Default Colormap for
       Matplotlib. SciPy 2015 (the perceptually uniform maps sliced here).
    """
    import matplotlib
    from matplotlib.colors import ListedColormap

    base, start, end = PALETTES[name]
    return ListedColormap(matplotlib.colormaps[base](np.linspace(start, end, 256)), name=name)


def short_unit(unit: str | None) -> str:
    """A vertical unit as a reader writes it (``metre`` -> ``m``)."""
    u = (unit or "").strip().lower()
    return {"metre": "m", "meter": "m", "metres": "m", "meters": "m", "m": "m",
            "foot": "ft", "feet": "ft", "ft": "ft", "us survey foot": "US survey ft",
            "us-ft": "US survey ft"}.get(u, unit or "DEM units")



_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def power_of_ten(v: float) -> str:
    """A tick of a log scale as plain text: 1e5 -> '10⁵' (mathtext is off in figures,
    so matplotlib's own '$10^{5}$' would be printed as it is); other values as numbers."""
    if v <= 0 or not np.isfinite(v):
        return ""
    e = round(float(np.log10(v)))
    if abs(v - 10.0 ** e) > 1e-9 * v:
        return f"{v:g}"
    return "1" if e == 0 else "10" if e == 1 else "10" + str(e).translate(_SUPERSCRIPT)


def halo(width: float):
    """A white halo behind text or lines ``width`` points wide, so they read on any map."""
    from matplotlib import patheffects

    return [patheffects.Stroke(linewidth=width, foreground="white", alpha=0.85),
            patheffects.Normal()]


def area_text(a: float) -> str:
    """An area as a reader writes it: ``30 km²`` from 1 km² up, else ``20,000 m²``."""
    if not np.isfinite(a):
        return "-"
    return f"{a / 1e6:.4g} km²" if a >= 1e6 else f"{a:,.4g} m²" if a < 1000 else f"{a:,.0f} m²"
