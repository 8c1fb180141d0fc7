"""Quick-look maps: hillshade, a credit layer, feature outlines and labels.

Rendering only; :func:`quicklook` returns a matplotlib Figure and the caller
saves it (atomically, through :mod:`terrain.io`).
"""

from __future__ import annotations

import math

import numpy as np

from .dem import Dem

__all__ = ["quicklook", "hillshade"]


def hillshade(dem: Dem, *, azimuth: float = 315.0, altitude: float = 45.0) -> np.ndarray:
    """Hillshade in [0, 1] (matplotlib LightSource, cell sizes in metres)."""
    from matplotlib.colors import LightSource

    if min(dem.shape) < 2:  # no gradient on a single row or column: flat grey
        return np.full(dem.shape, 0.5)
    w, h = dem.cell_metres()
    z = np.where(dem.nodata, np.nanmean(dem.z), dem.z).astype(np.float64)
    ls = LightSource(azdeg=azimuth, altdeg=altitude)
    return ls.hillshade(z, vert_exag=1.0, dx=float(np.mean(w)), dy=float(np.mean(h)))


def _nice(x: float) -> float:
    e = 10 ** math.floor(math.log10(x))
    for m in (1, 2, 5, 10):
        if m * e >= x:
            return m * e
    return 10 * e


def quicklook(dem: Dem, layer: np.ndarray, *, title: str, units: str, frac: float = 0.01,
              polygons=None, labels=None, outlets=None, cmap: str = "magma_r",
              vmax: float | None = None, show: np.ndarray | None = None, contours=None):
    """A map a person can read at a glance.

    Parameters
    ----------
    dem : Dem
    layer : (rows, cols) array
        Drawn over the hillshade where it is at least ``frac`` of its maximum.
    title, units : str
        Title and colour-bar label.
    polygons : sequence of shapely geometries, optional
        Feature outlines.
    labels : sequence of (x, y, text), optional
        Text placed at the given CRS coordinates.
    outlets : sequence of (x, y, text), optional
        Marked with a triangle.
    show : (rows, cols) bool array, optional
        Draw the layer only where True (e.g. inside features).
    contours : sequence of (array, levels, label), optional
        Contour lines of further layers (e.g. membership probabilities).

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    from matplotlib.figure import Figure

    rows, cols = dem.shape
    a, _, c, _, e, f = dem.transform
    extent = (c, c + a * cols, f + e * rows, f)
    fig = Figure(figsize=(9, 9 * rows / cols * 0.88 + 1.1), dpi=110)
    ax = fig.add_axes((0.08, 0.06, 0.76, 0.82))
    cax = fig.add_axes((0.87, 0.2, 0.025, 0.6))
    ax.imshow(hillshade(dem), cmap="gray", extent=extent, vmin=0, vmax=1, interpolation="bilinear")
    v = np.where(dem.nodata, np.nan, layer).astype(np.float64)
    top = vmax if vmax is not None else (np.nanmax(v) if np.isfinite(v).any() else 1.0)
    hide = ~(v >= frac * top) | ~(v > 0)
    if show is not None:
        hide |= ~show
    shown = np.ma.masked_where(hide, v)
    from matplotlib.colors import PowerNorm

    # square-root colour scale: small credit stays visible beside a dominant feature
    im = ax.imshow(shown, cmap=cmap, extent=extent, alpha=0.85, interpolation="nearest",
                   norm=PowerNorm(0.5, vmin=0, vmax=top if top > 0 else 1))
    cb = fig.colorbar(im, cax=cax)
    cb.set_label(units + " (square-root scale)")
    colours = ["#e76f51", "#2a9d8f", "#e9c46a", "#264653", "#f4a261", "#8338ec"]
    for n, (arr, levels, label) in enumerate((contours or []) if min(dem.shape) >= 2 else []):
        a_ = np.where(dem.nodata, np.nan, arr)
        if np.nanmax(a_) >= min(levels):
            cs = ax.contour(a_, levels=levels, extent=extent,
                            origin="upper", colors=colours[n % len(colours)],
                            linewidths=[0.8, 1.6, 0.8][: len(levels)],
                            linestyles=["dotted", "solid", "dashed"][: len(levels)])
            ax.clabel(cs, fmt=lambda v, label=label: f"{label} {v:.0%}", fontsize=7)
    for geom in polygons or []:
        if geom is None:
            continue
        for g in getattr(geom, "geoms", [geom]):
            x, y = g.exterior.xy
            ax.plot(x, y, color="#00b4d8", lw=1.0)
    near_top = extent[3] - 0.06 * (extent[3] - extent[2])
    near_right = extent[1] - 0.2 * (extent[1] - extent[0])
    for x, y, text in labels or []:
        off = (6 if x < near_right else -6, -12 if y > near_top else 6)
        ax.annotate(text, (x, y), xytext=off, textcoords="offset points", fontsize=7.5,
                    ha="left" if off[0] > 0 else "right", annotation_clip=True,
                    color="black", bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none",
                                             alpha=0.8))
    for x, y, text in outlets or []:
        ax.plot([x], [y], marker="v", color="#0077b6", ms=9, mec="white")
        ax.annotate(text, (x, y), xytext=(6, -12), textcoords="offset points", fontsize=8,
                    color="#0077b6", weight="bold")
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_title(title, fontsize=10, pad=10)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    _scale_bar(ax, dem, extent)
    _north_arrow(ax)
    plt.close("all")
    return fig


def _scale_bar(ax, dem: Dem, extent) -> None:
    w_m, _ = dem.cell_metres()
    m_per_unit = float(np.mean(w_m)) / dem.cellsize[0]
    width_units = extent[1] - extent[0]
    length_m = _nice(width_units * m_per_unit / 5)
    length_units = length_m / m_per_unit
    x0 = extent[0] + 0.05 * width_units
    y0 = extent[2] + 0.05 * (extent[3] - extent[2])
    ax.plot([x0, x0 + length_units], [y0, y0], color="black", lw=4, solid_capstyle="butt")
    ax.plot([x0, x0 + length_units], [y0, y0], color="white", lw=2, solid_capstyle="butt")
    label = f"{length_m / 1000:g} km" if length_m >= 1000 else f"{length_m:g} m"
    if dem.crs is None:
        label = f"{length_units:g} cell units"
    ax.text(x0 + length_units / 2, y0, label + "\n", ha="center", va="bottom", fontsize=8,
            bbox=dict(fc="white", ec="none", alpha=0.7, pad=1))


def _north_arrow(ax) -> None:
    ax.annotate("N", xy=(0.95, 0.95), xytext=(0.95, 0.85), xycoords="axes fraction",
                ha="center", va="center", fontsize=11, weight="bold",
                arrowprops=dict(facecolor="black", width=3, headwidth=10))
