"""Figures: quick-look maps (hillshade, a layer, features) and the sweep figure.

Rendering only; every function returns a matplotlib Figure and the writer
saves it (atomically, through :mod:`terrain.io`).
"""

from __future__ import annotations

import functools
import math
import warnings

import numpy as np

from ..dem import Dem
from ..layers import LAYERS, layer_name, units
from ..outlets import short

MAX_ASPECT = 2.5  # quick-look pages are at most 2.5 times taller than wide (or wider than tall)
QUICKLOOK_CELLS = 2 ** 21  # a quick-look draws at most ~2.1 million cells (blocks of a bigger grid)

__all__ = ["quicklook", "hillshade", "blocks", "block_step", "QUICKLOOK_CELLS", "feature_map",
           "catchment_map", "sweep_figure"]


def hillshade(dem: Dem, *, azimuth: float = 315.0, altitude: float = 45.0,
              step: int = 1) -> np.ndarray:
    """Hillshade in [0, 1] (matplotlib LightSource, cell sizes in metres), of
    the grid averaged over ``step`` x ``step`` blocks (see :func:`blocks`)."""
    from matplotlib.colors import LightSource

    z = blocks(dem.z, dem.nodata, step, np.nanmean).astype(np.float64)
    if min(z.shape) < 2:  # no gradient on a single row or column: flat grey
        return np.full(z.shape, 0.5)
    z = np.where(np.isnan(z), np.nanmean(z), z)
    w, h = dem.cell_metres()
    ls = LightSource(azdeg=azimuth, altdeg=altitude)
    return ls.hillshade(z, vert_exag=1.0, dx=float(np.mean(w)) * step, dy=float(np.mean(h)) * step)


def blocks(a: np.ndarray, nodata: np.ndarray, step: int, how) -> np.ndarray:
    """``a`` with NaN on ``nodata``, reduced over ``step`` x ``step`` blocks by
    ``how`` (``np.nanmax`` keeps a single credited cell visible, ``np.nanmean``
    smooths), as float32; the last blocks are padded with NaN. ``step`` 1
    returns the grid itself (as float32, NaN on nodata)."""
    v = np.array(a, dtype=np.float32)
    v[nodata] = np.nan
    if step == 1:
        return v
    r, c = v.shape
    rr, cc = -(-r // step), -(-c // step)
    pad = np.full((rr * step, cc * step), np.nan, np.float32)
    pad[:r, :c] = v
    del v
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # blocks of nodata only
        return how(pad.reshape(rr, step, cc, step), axis=(1, 3))


def block_step(shape) -> int:
    """Cells per block side so that a quick-look draws at most
    :data:`QUICKLOOK_CELLS` blocks (1 for grids up to that size)."""
    return max(1, math.ceil(math.sqrt(shape[0] * shape[1] / QUICKLOOK_CELLS)))


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
        Contour lines of further layers (e.g. membership probabilities); an
        array may be given as a function returning it, called when drawn.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    rows, cols = dem.shape
    a, _, c, _, e, f = dem.transform
    extent = (c, c + a * cols, f + e * rows, f)
    step = block_step(dem.shape)  # big grids are drawn in blocks: memory stays bounded
    sr, sc = -(-rows // step) * step, -(-cols // step) * step
    drawn = (c, c + a * sc, f + e * sr, f)  # the blocks' extent (the last ones padded)
    ratio = rows * abs(e) / (cols * abs(a)) if a and e else rows / cols
    shown = min(max(ratio, 1 / MAX_ASPECT), MAX_ASPECT)  # a strip of cells stays a readable page
    fig = Figure(figsize=(9, 9 * shown * 0.88 + 1.1), dpi=110)
    ax = fig.add_axes((0.08, 0.06, 0.76, 0.82))
    cax = fig.add_axes((0.87, 0.2, 0.025, 0.6))
    ax.imshow(hillshade(dem, step=step), cmap="gray", extent=drawn, vmin=0, vmax=1,
              interpolation="bilinear")
    _draw_layer(fig, ax, cax, dem, layer, drawn, frac=frac, vmax=vmax, show=show, cmap=cmap,
                units=units, step=step)
    _draw_contours(ax, dem, contours or [], drawn, step)
    _draw_outlines(ax, polygons or [])
    _draw_labels(ax, labels or [], outlets or [], extent)
    ax.set_xlim(*sorted(extent[:2]))
    ax.set_ylim(*sorted(extent[2:]))  # north up, bottom-up rasters included
    if shown != ratio:
        ax.set_aspect("auto")
        title += " (stretched: the raster is a thin strip)"
    ax.set_title(title, fontsize=10, pad=10)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    _scale_bar(ax, dem, extent)
    _north_arrow(ax)
    return fig


def _draw_layer(fig, ax, cax, dem, layer, extent, *, frac, vmax, show, cmap, units, step):
    from matplotlib.colors import PowerNorm

    v = blocks(layer, dem.nodata, step, np.nanmax)
    top = vmax if vmax is not None else (np.nanmax(v) if np.isfinite(v).any() else 1.0)
    hide = ~(v >= frac * top) | ~(v > 0)
    if show is not None:
        hide |= ~(blocks(show, np.zeros(show.shape, bool), step, np.nanmax) > 0)
    # square-root colour scale: small credit stays visible beside a dominant feature
    im = ax.imshow(np.ma.masked_where(hide, v), cmap=cmap, extent=extent, alpha=0.85,
                   interpolation="nearest", norm=PowerNorm(0.5, vmin=0, vmax=top if top > 0 else 1))
    fig.colorbar(im, cax=cax).set_label(units + " (square-root scale)")


_CONTOUR_STYLE = {0.1: ("dotted", 0.8), 0.5: ("solid", 1.6), 0.9: ("dashed", 1.0)}


def _draw_contours(ax, dem, contours, extent, step):
    colours = ["#e76f51", "#2a9d8f", "#e9c46a", "#264653", "#f4a261", "#8338ec"]
    for n, (arr, levels, label) in enumerate(contours if min(dem.shape) >= 2 else []):
        a_ = blocks(arr() if callable(arr) else arr, dem.nodata, step, np.nanmean)
        if np.nanmax(a_) >= min(levels):
            style = [_CONTOUR_STYLE.get(v, ("solid", 1.0)) for v in levels]
            cs = ax.contour(a_, levels=levels, extent=extent,
                            origin="upper", colors=colours[n % len(colours)],
                            linewidths=[w for _, w in style], linestyles=[s for s, _ in style])
            ax.clabel(cs, fmt=lambda v, label=label: f"{label} {v:.0%}", fontsize=7)
            # the lines are drawn; matplotlib's contour generator would keep its own
            # float64 copies of the grid (~28 bytes per cell per contoured layer)
            if hasattr(cs, "_contour_generator"):
                cs._contour_generator = None


def _draw_outlines(ax, polygons):
    for geom in polygons:
        if geom is None:
            continue
        for g in getattr(geom, "geoms", [geom]):
            x, y = g.exterior.xy
            ax.plot(x, y, color="#00b4d8", lw=1.0)


def _draw_labels(ax, labels, outlets, extent):
    near_top = extent[3] - 0.06 * (extent[3] - extent[2])
    near_right = extent[1] - 0.2 * (extent[1] - extent[0])
    for x, y, text in labels:
        off = (6 if x < near_right else -6, -12 if y > near_top else 6)
        ax.annotate(text, (x, y), xytext=off, textcoords="offset points", fontsize=7.5,
                    ha="left" if off[0] > 0 else "right", annotation_clip=True,
                    color="black", bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none",
                                             alpha=0.8))
    for x, y, text in outlets:
        ax.plot([x], [y], marker="v", color="#0077b6", ms=9, mec="white")
        ax.annotate(text, (x, y), xytext=(6, -12), textcoords="offset points", fontsize=8,
                    color="#0077b6", weight="bold")


def feature_map(result, features):
    """The quick-look of a peaks or depressions run: its summit/pit credit over
    a hillshade, feature outlines and the top features labelled."""
    dem, job = result.dem, result.job
    main = layer_name(job.kind, "birth_credit")
    unit = units(main, dem.vertical_units, job.weight)
    figure = "prominence" if job.kind == "peaks" else "depth"
    table = features.table
    order = np.arange(min(len(table), 12))
    labels = [(table["x"].iloc[i], table["y"].iloc[i],
               f"#{table['feature_id'].iloc[i]} {table['expected'].iloc[i]:.1f} · "
               f"p₁ {table['p_first'].iloc[i]:.2f}") for i in order]
    poly = next(iter(features.frames.values())).geometry.tolist()
    title = (f"{main.replace('_', ' ')} — {result.n} realisations, error "
             f"{result.model.describe()}\nlabels: #id, expected {figure} ({unit}), "
             "p₁ = probability of ranking first")
    return quicklook(dem, result.layers[main][0], title=title,
                     units=f"{main.replace('_', ' ')} ({unit})", polygons=poly, labels=labels,
                     show=np.isin(features.regions.labels, table["feature_id"].to_numpy()))


def catchment_map(result):
    """The quick-look of a catchment run: divide probability with each outlet's
    sub-catchment outlined where it holds in 50% (solid) and 90% (dashed) of
    realisations, outlets marked; without outlets, channel probability."""
    job, dem = result.job, result.dem
    what = f"{result.n} realisations, error {result.model.describe()}, {job.conditioning}, " \
           f"D{job.connectivity}"
    if not job.ids:
        name = layer_name("catchments", "channel")
        return quicklook(dem, result.layers[name][0], vmax=1.0, cmap="Blues",
                         units="channel probability",
                         title=f"channel probability (drainage area >= {job.channel_area:g} m²)"
                               f"\n{what}")
    sub = LAYERS[layer_name("catchments", "subcatchment")]
    # each layer is computed from its counts when drawn: one at a time in memory
    contours = [(functools.partial(_first, result.layers, sub.concrete(lid)), [0.5, 0.9],
                 short(oid, 24)) for oid, lid in zip(job.ids, job.layer_ids)]
    return quicklook(dem, result.layers[layer_name("catchments", "divide")][0],
                     title=f"divide probability; sub-catchments held in 50% (solid) and 90% "
                           f"(dashed) of realisations\n{what}",
                     units="divide probability", cmap="Purples", contours=contours,
                     outlets=[(x, y, short(oid, 24)) for oid, (x, y) in zip(job.ids, job.xy)],
                     vmax=1.0)


def _first(layers, name):
    """A layer's estimate (computed when drawn, see catchment_map)."""
    return layers[name][0]


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


SWEEP_STATISTICS = (("credit_share", "credit_share_se", "share of total credit"),
                    ("p_first", "p_first_se", "P(ranks first)"))
_KERNEL_STYLE = (("o", "-"), ("s", "--"), ("^", "-."), ("D", ":"))


def sweep_figure(result, *, units: str):
    """One panel per statistic (credit share, P(ranks first)) against the error level.

    Each of the sweep's top features is a colour, each kernel a marker and
    line style; error bars are one standard error, and the kernels' points
    are set slightly apart along the (log) error axis so their bars do not
    hide each other. Legends sit outside the panels, beside the panel they
    explain, and the figure is laid out with matplotlib's constrained layout
    so nothing is cut off at one kernel or at four.

    Parameters
    ----------
    result : terrain.sweep.SweepResult
    units : str
        Vertical units of the error level (x axis).
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    rows = result.rows
    kernels = list(dict.fromkeys(kernel for kernel, _ in result.runs))  # rows may be empty
    what = "summit" if result.job.kind == "peaks" else "depression"
    fig = Figure(figsize=(9.0, 7.4), dpi=110, layout="constrained")
    axes = fig.subplots(len(SWEEP_STATISTICS), 1, sharex=True)
    levels = sorted({level for _, level in result.runs})
    features, kernel_keys = _sweep_lines(axes, rows, result.top, kernels, what)
    if not result.top:
        axes[0].text(0.5, 0.5, f"no {what}s above the cut-off in any run", ha="center",
                     va="center", transform=axes[0].transAxes)
    for ax, (_, _, label) in zip(axes, SWEEP_STATISTICS):
        ax.set_ylabel(label, fontsize=10)
        ax.set_xscale("log")
        ax.set_xticks(levels, [f"{v:g}" for v in levels])
        ax.minorticks_off()
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=9)
    axes[-1].set_xlabel(f"assumed error RMSE ({units})", fontsize=10)
    axes[0].legend(handles=features, title=f"{what} feature", fontsize=9, title_fontsize=9,
                   loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
    axes[1].legend(handles=kernel_keys, title="error kernel", fontsize=9, title_fontsize=9,
                   loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
    fig.suptitle(f"How {what} attribution spreads as the assumed error grows\n"
                 "(error bars: 1 standard error)", fontsize=11)
    return fig


def _sweep_lines(axes, rows, top, kernels, what):
    """Draw every (feature, kernel) line on every statistic's panel; return legend handles."""
    import matplotlib
    from matplotlib.lines import Line2D

    colours = matplotlib.colormaps["tab10"]
    kern, fid = np.array(rows["kernel"]), np.array(rows["feature_id"])
    rmse = np.array(rows["rmse"], dtype=float)
    spread = 0.035 * (np.arange(len(kernels)) - (len(kernels) - 1) / 2)  # in natural-log units
    for j, kernel in enumerate(kernels):
        marker, style = _KERNEL_STYLE[j % len(_KERNEL_STYLE)]
        for n_f, f in enumerate(top):
            sel = (kern == kernel) & (fid == f)
            order = np.argsort(rmse[sel])
            x = rmse[sel][order] * np.exp(spread[j])
            for ax, (col, se, _) in zip(axes, SWEEP_STATISTICS):
                ax.errorbar(x, np.array(rows[col])[sel][order], yerr=np.array(rows[se])[sel][order],
                            marker=marker, ms=4, capsize=2, lw=1.2, ls=style,
                            color=colours(n_f % 10))
    features = [Line2D([], [], color=colours(n_f % 10), lw=2, label=f"{what} #{f}")
                for n_f, f in enumerate(top)]
    kernel_keys = [Line2D([], [], color="0.25", marker=m, ls=ls, lw=1.2, label=k)
                   for k, (m, ls) in zip(kernels, (_KERNEL_STYLE[j % len(_KERNEL_STYLE)]
                                                   for j in range(len(kernels))))]
    return features, kernel_keys
