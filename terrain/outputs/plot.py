"""Figures: quick-look maps, the ranking chart and the sweep figure.

Rendering only; every function returns a matplotlib Figure and the writer
saves it (atomically, through :mod:`terrain.io`). Every map is drawn in the
one design of :class:`terrain.outputs.mapframe.MapFrame` (hillshade, masked
nodata, aspect, scale bar, north arrow, legend, labels, footer with the
error model, the realisations and the caution); what each command's map
shows is decided here, by layer role (:mod:`terrain.layers`).
"""

from __future__ import annotations

import textwrap
from typing import TYPE_CHECKING

import numpy as np

from ..dem import Dem
from ..layers import LAYERS, layer_name, read_window, spec, units
from ..outlets import short
from ..summary.features import LAYER_NAMES
from .caution import CAUTION
from .mapframe import (
    FONT_PT,
    INK,
    OUTLINE_COLOURS,
    PALETTES,
    MapFrame,
    hillshade,
    palette,
    pool_bands,
    pooled_dem,
    pooling,
    short_unit,
)

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from ..runner.ensemble import RunResult
    from ..summary.features import FeatureSummary

__all__ = ["quicklook", "hillshade", "feature_map", "ranking_chart", "catchment_map",
           "sweep_figure", "LABELLED", "LABEL_PRESENCE", "RANKED", "area_text", "figure_text"]

LABELLED = 12  # features labelled on a map, at most
LABEL_PRESENCE = 0.5  # ... among those counted in at least this share of realisations
RANKED = 15  # features on the ranking chart, at most
ENVELOPE_CELLS = 1.5  # the peaks map outlines a top's cells this many cells out
PONDING_FLOOR = 0.05  # ponding probability below this is left clear on the depressions map
DIVIDE_FLOOR = 0.05  # and divide probability on the catchments map

#: what a feature map of each kind draws, in a reader's words
_KIND = {
    "peaks": dict(
        feature="summit", figure="prominence", main="birth_probability", sqrt=True,
        palette="summits", accent="#0a6fa8", birth=("^", "most credited summit cell"),
        death=("D", "most credited key col"),
        title="Summits: where each top is, and how often a cell is the summit",
        polygons="where the top is (around the cells holding 90% of a feature's summits)"),
    "depressions": dict(
        feature="depression", figure="depth", main="ponding_probability", sqrt=False,
        palette="water", accent="#d8432b", birth=("v", "most credited pit cell"),
        death=("D", "most credited spill point"),
        title="Depressions: where water ponds, and where each one spills",
        polygons="ponded extent of a feature (ponded in at least 50% of realisations)"),
}


def run_footer(result: RunResult, layer: str | None = None) -> str:
    """The footer line of a run's figures: error model, vertical units, realisations,
    seed, and the note that travels with ``layer`` (:mod:`terrain.layers`), if any."""
    u = result.dem.unit_label
    text = (f"Error model: {result.model.describe(u)}{_settings(result)}; elevations in {u}; "
            f"{result.n} realisations, seed {result.params.get('seed')}.")
    note = spec(layer).note if layer else ""
    if note:
        text += f" The {' '.join(spec(layer).name.split('_{id}')[0].split('_'))} layer {note}."
    return text


def _settings(result) -> str:
    """The resolved settings a figure's footer echoes: a peaks or depressions run's
    cut-off (``, minimum depth 7.5 m (3 × RMSE)``), a catchment run's channel area
    and conditioning (``, channels from 0.1 km², breach up to 3 m``)."""
    job = result.job
    if getattr(job, "name", None) == "catchments" and job.channel_area is not None:
        how = (f"breach up to {job.breach_cap:g} {result.dem.unit_label}"
               if job.conditioning == "breach" else "fill")
        return f", channels from {area_text(job.channel_area)}, {how}"
    if getattr(job, "kind", None) not in ("peaks", "depressions") or job.threshold is None:
        return ""
    from .. import defaults

    what = "prominence" if job.kind == "peaks" else "depth"
    rule = (f" ({defaults.CUTOFF_PER_RMSE:g} × RMSE)" if "threshold" in job.from_defaults
            else "")
    return f", minimum {what} {figure_text(job.threshold)} {result.dem.unit_label}{rule}"


def bar_label(name: str, vertical_units: str | None, weight: str = "persistence") -> str:
    """A colour-bar label in words: the layer's description and its units."""
    s = spec(name)
    what = " ".join(s.name.split("_{id}")[0].split("_"))
    if s.unit == "probability":
        return f"{what}: {s.description}"
    u = units(name, vertical_units, weight)
    return f"{s.description} ({short_unit(u) if u != 'count' else 'count'})"


def figure_text(v: float) -> str:
    """A figure (prominence, depth) to three significant digits."""
    if not np.isfinite(v):
        return "-"
    return f"{v:.0f}" if abs(v) >= 100 else f"{v:.3g}"


def area_text(a: float) -> str:
    """An area as a reader writes it: ``30 km²`` from 1 km² up, else ``20,000 m²``."""
    if not np.isfinite(a):
        return "-"
    return f"{a / 1e6:.4g} km²" if a >= 1e6 else f"{a:,.4g} m²" if a < 1000 else f"{a:,.0f} m²"


def share_text(p: float) -> str:
    """A probability as a percentage, with <1% and >99% kept apart from 0 and 1."""
    if p <= 0:
        return "0%"
    if p >= 1:
        return "100%"
    if p < 0.01:
        return "<1%"
    return ">99%" if p > 0.99 else f"{p:.0%}"


def quicklook(dem: Dem, layer: np.ndarray, *, title: str, units: str, frac: float = 0.01,
              polygons=None, labels=None, outlets=None, cmap=None, vmax: float | None = None,
              show: np.ndarray | None = None, contours=None, footer: str = "",
              caution: str = CAUTION) -> Figure:
    """A map of any one layer in the shared design.

    Parameters
    ----------
    dem : Dem
    layer : (rows, cols) array
        Drawn over the hillshade where it is at least ``frac`` of ``vmax``
        (default: its maximum).
    title, units : str
        Title and colour-bar label.
    polygons : sequence of shapely geometries, optional
        Outlines (legend: "features").
    labels : sequence of (x, y, text), optional
        Labels placed without overlap near the given CRS coordinates.
    outlets : sequence of (x, y, text), optional
        Marked with a triangle and labelled.
    cmap : colour map or name, optional
        Default: the ``summits`` palette.
    show : (rows, cols) bool array, optional
        Draw the layer only where True.
    contours : sequence of (array, levels, label), optional
        Contour lines of further layers, one colour each.
    footer, caution : str
        The footer's first line(s) and the caution below them.

    Returns
    -------
    matplotlib.figure.Figure
    """
    frame = MapFrame(dem, title=title, subtitle="", footer=footer, caution=caution)
    v = np.asarray(layer, np.float64)
    top = vmax if vmax is not None else (float(np.nanmax(v)) if np.isfinite(v).any() else 0.0)
    frame.layer(v, cmap=_colour_map(cmap),
                label=units, vmax=vmax, hide=None if show is None else ~np.asarray(show, bool),
                floor=frac * top if top > 0 else 0.0)
    for n, (arr, levels, name) in enumerate(contours or []):
        frame.contours(arr, levels, colour=OUTLINE_COLOURS[n % len(OUTLINE_COLOURS)],
                       label=str(name), styles=_level_styles(levels))
    frame.polygons(polygons or [], colour=INK, label="features")
    _outlets(frame, outlets or [])
    for x, y, text in labels or []:
        frame.label(x, y, text)
    return frame.figure()


def _colour_map(cmap):
    """One of our palettes by name, any matplotlib colour map by name, or as given."""
    import matplotlib

    if cmap is None or cmap in PALETTES:
        return palette(cmap or "summits")
    return matplotlib.colormaps[cmap] if isinstance(cmap, str) else cmap


def _level_styles(levels) -> tuple:
    return tuple("dashed" if lev >= 0.9 else "dotted" if lev < 0.5 else "solid" for lev in levels)


def _outlets(frame: MapFrame, outlets) -> None:
    if outlets:
        xs, ys, names = zip(*outlets)
        frame.points(xs, ys, marker="v", face="white", label="outlet, as given", size=9)
        for x, y, name in outlets:
            frame.label(x, y, str(name))


def feature_map(result: RunResult, features: FeatureSummary) -> Figure:
    """The quick-look of a peaks or depressions run.

    Peaks: summit probability; depressions: ponding probability with its 50%
    contour outside the features. Over it, each feature's polygon (where the
    top is / the ponded extent), a marker at its most credited summit or pit
    cell and another at its most credited key col or spill point; labels
    (#id, expected figure, P(ranks first)) on at most :data:`LABELLED`
    features, the largest by expected figure among those counted in at least
    :data:`LABEL_PRESENCE` of realisations.
    """
    dem, job, table = result.dem, result.job, features.table
    kind = _KIND[job.kind]
    unit = short_unit(units(layer_name(job.kind, "birth_credit"), dem.unit_label, job.weight))
    sub = (f"labels: #id, expected {kind['figure']}, P(ranks first) - the {LABELLED} largest "
           f"features counted in at least {LABEL_PRESENCE:.0%} of realisations")
    main = layer_name(job.kind, kind["main"])
    if dem.on_disk:  # out of core: draw from rasters pooled band by band
        dem, values, inside, tops = _pooled_view(result, features, main)
    else:
        values = result.layers[main][0]
        inside = np.isin(features.regions.labels, table["feature_id"].to_numpy())
        tops = features.top[0:dem.shape[0], 0:dem.shape[1]] > 0 if job.kind == "peaks" else None
    frame = MapFrame(dem, title=kind["title"], subtitle=sub, footer=run_footer(result, main),
                     caution=CAUTION)
    if job.kind == "peaks":  # elsewhere, single noise summits would speckle the whole map
        values = np.where(tops, values, 0.0)
        vmax, note = _round_up(float(np.nanmax(values, initial=0.0))), ", where the tops are"
    else:
        vmax, note = 1.0, f"; clear under {PONDING_FLOOR:.0%}"
    frame.layer(values, cmap=palette(kind["palette"]), vmax=vmax, sqrt=kind["sqrt"],
                label=bar_label(main, dem.unit_label) + note,
                floor=0.0 if job.kind == "peaks" else PONDING_FLOOR)
    if job.kind == "depressions":
        frame.contours(np.where(inside, np.nan, values), [0.5], colour=INK,
                       label="ponded in 50% of realisations, outside the features",
                       styles=("dashed",), widths=(1.0,))
    geoms = features.frames[LAYER_NAMES[job.kind][0]].geometry
    if job.kind == "peaks":  # a top's cells are scattered: outline them together
        geoms = [g.buffer(ENVELOPE_CELLS * max(dem.cellsize)) if g is not None else None
                 for g in geoms]
    frame.polygons(geoms, colour=kind["accent"], label=kind["polygons"])
    d = "col" if job.kind == "peaks" else "spill"
    size = 8.0 if len(table) <= 40 else 6.0 if len(table) <= 150 else 4.5  # crowded: smaller
    frame.points(table["x"], table["y"], marker=kind["birth"][0], face="white",
                 label=kind["birth"][1], size=size)
    frame.points(table[f"{d}_x"], table[f"{d}_y"], marker=kind["death"][0], face=kind["accent"],
                 label=kind["death"][1], size=size * 0.75)
    shown = table[table["p_above"] >= LABEL_PRESENCE].sort_values("rank", kind="stable")
    frame.unplaced = "No room on the map to label {names}: see ranking.png and the table."
    for row in shown.head(LABELLED).itertuples():
        frame.label(row.x, row.y, f"#{row.feature_id} {figure_text(row.expected)} {unit} · "
                                  f"first {share_text(row.p_first)}", name=f"#{row.feature_id}")
    return frame.figure()


def _pooled_view(result: RunResult, features: FeatureSummary, main: str):
    """The DEM and the map's rasters pooled as a map pools them, read band by
    band from a run kept on disk: (pooled DEM, layer (max), inside a feature
    (any cell), on a top (any cell))."""
    dem = result.dem
    k, cols = pooling(dem.shape), dem.shape[1]
    ids = features.table["feature_id"].to_numpy()

    def layer(r0, r1):
        return np.where(np.isnan(dem.window(r0, r1, 0, cols)), np.nan,
                        read_window(result.layers, r0, r1, 0, cols)[main][0])

    def inside(r0, r1):
        return np.isin(np.asarray(features.regions.labels[r0:r1, 0:cols]), ids).astype(float)

    def tops(r0, r1):
        return (features.top[r0:r1, 0:cols] > 0).astype(float)

    return (pooled_dem(dem, k), pool_bands(layer, dem.shape, k, np.nanmax),
            pool_bands(inside, dem.shape, k, np.nanmax) > 0,
            pool_bands(tops, dem.shape, k, np.nanmax) > 0 if result.job.kind == "peaks" else None)


def _round_up(x: float) -> float:
    """The smallest of 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1 at least ``x`` (probabilities)."""
    for step in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5):
        if x <= step:
            return step
    return 1.0


def catchment_map(result: RunResult) -> Figure:
    """The quick-look of a catchment run.

    With outlets: the divide layer in colour, each outlet's sub-catchment
    outlined where it holds in at least 50% (solid) and 90% (dashed) of
    realisations, one colour per outlet, outlets marked as given and
    labelled. Without outlets: channel probability. Layers are found by their
    role in :mod:`terrain.layers`.
    """
    job, dem = result.job, result.dem
    how = f"{job.conditioning}, D{job.connectivity}"
    if not job.ids:
        return _drainage_map(result, how)
    main = layer_name("catchments", "divide")
    sub = LAYERS[layer_name("catchments", "subcatchment")]
    frame = MapFrame(dem, title="Sub-catchments: where each outlet's share holds, and where the "
                                "divides run",
                     subtitle="outlines: cells whose first chosen outlet downstream is this one in "
                              f"at least 50% (solid) and 90% (dashed) of realisations; {how}",
                     footer=run_footer(result, main), caution=CAUTION)
    frame.layer(result.layers[main][0], cmap=palette("divides"), vmax=1.0, floor=DIVIDE_FLOOR,
                label=bar_label(main, dem.unit_label) + f"; clear under {DIVIDE_FLOOR:.0%}")
    drawn = False
    for n, (oid, lid) in enumerate(zip(job.ids, job.layer_ids)):
        name = sub.concrete(lid)
        if name in result.layers:
            drawn |= frame.contours(result.layers[name][0], (0.5, 0.9),
                                    colour=OUTLINE_COLOURS[n % len(OUTLINE_COLOURS)],
                                    label=f"sub-catchment of outlet {short(oid, 24)}",
                                    styles=("solid", "dashed"), widths=(1.8, 1.2))
    if drawn:
        frame.key("in at least 50% of realisations", ls="solid")
        frame.key("in at least 90% of realisations", ls="dashed")
    _outlets(frame, [(x, y, short(oid, 24)) for oid, (x, y) in zip(job.ids, job.xy)])
    return frame.figure()


DRAINAGE_FLOOR = 1.0  # the drainage map leaves clear cells draining under this share of
#                        the channel area (hillslopes), so the network and its main stems show


def _drainage_map(result: RunResult, how: str) -> Figure:
    """The quick-look of a catchment run without outlets, for placing gauges: the
    median drainage area on a log scale, cells draining less than the channel area
    left clear, so the network shows and its main stems stand out."""
    job, dem = result.job, result.dem
    area = layer_name("catchments", "drainage_area")
    median = result.layers[area][0]
    cell = float(np.min(dem.cell_area_m2()))
    floor = max(DRAINAGE_FLOOR * float(job.channel_area), 2 * cell)
    frame = MapFrame(dem, title="Drainage area: where the main stems run, for placing gauges",
                     subtitle=f"median over realisations, log scale; cells draining less than "
                              f"{area_text(floor)} (the channel area) left clear; {how}",
                     footer=run_footer(result, area), caution=CAUTION)
    frame.layer(median, cmap=palette("water"), log=True, floor=floor,
                label="median drainage area over realisations (m²)")
    return frame.figure()


def ranking_chart(result: RunResult, features: FeatureSummary) -> Figure:
    """Which feature is first, and how sure: the ranking chart of a peaks or
    depressions run.

    For the top :data:`RANKED` features by expected figure: on the left each
    feature's 5-95% range over realisations as a bar, its expected value and
    its value on the DEM as given; on the right P(rank = k) for k = 1..10
    (``features.rank_share``), the probabilities written in the cells (blank
    where the feature never ranked k-th).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    job, table = result.job, features.table
    kind = _KIND[job.kind]
    unit = short_unit(units(layer_name(job.kind, "birth_credit"), result.dem.unit_label,
                            job.weight))
    rows = table.sort_values("rank", kind="stable").head(RANKED)
    n = max(len(rows), 1)
    share = features.rank_share
    kmax = share.shape[1] if share is not None and share.shape[1] else 1
    fig = Figure(figsize=(11.0, max(4.4, 2.6 + 0.4 * n)), dpi=CHART_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    if rows.empty:
        ax = fig.subplots()
        ax.set_axis_off()
        ax.text(0.5, 0.5, f"No {kind['feature']} feature was counted in at least "
                          f"{job.min_presence:.0%} of realisations.", ha="center",
                fontsize=FONT_PT + 1, transform=ax.transAxes)
    else:
        left, right = fig.subplots(1, 2, sharey=True,
                                   gridspec_kw=dict(width_ratios=[1.0, max(0.4, 0.08 * kmax)]))
        _ranges(left, rows, kind, unit)
        _rank_matrix(right, rows, share, kmax, kind)
        left.set_ylim(n - 0.5, -0.5)
    fig.suptitle(f"Which {kind['feature']} ranks first, and how sure? The {len(rows)} largest of "
                 f"{len(table)} features by expected {kind['figure']}",
                 fontsize=FONT_PT + 3, weight="bold")
    fig.supxlabel("\n".join(textwrap.wrap(run_footer(result), 150) + textwrap.wrap(CAUTION, 150)),
                  fontsize=FONT_PT, color="0.25")
    return fig


CHART_DPI = 110


def _ranges(ax, rows, kind, unit) -> None:
    """The left panel: 5-95% bars, expected and unperturbed markers, and their legend."""
    y = np.arange(len(rows))
    colour = palette(kind["palette"])(0.45)
    p05, p95 = rows["p05"].to_numpy(float), rows["p95"].to_numpy(float)
    bars = ax.hlines(y, p05, p95, color=colour, lw=8, label="5-95% of realisations")
    mean, = ax.plot(rows["expected"], y, ls="none", marker="o", ms=7, mfc=INK, mec="white",
                    label="expected (mean)")
    given, = ax.plot(rows["unperturbed"], y, ls="none", marker="D", ms=7, mfc="none",
                     mec=kind["accent"], mew=1.8, label="on the DEM as given")
    values = np.r_[p05, p95, rows["unperturbed"].to_numpy(float)]
    positive = values[values > 0]
    log = bool(positive.size) and positive.max() / positive.min() > 20
    if log:
        from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator

        ax.set_xscale("log")
        ax.set_xlim(positive.min() / 1.4, positive.max() * 1.4)
        ax.xaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xlabel(f"{kind['figure']} ({unit}{', log scale' if log else ''})", fontsize=FONT_PT + 1)
    ax.set_yticks(y, [f"#{i}" for i in rows["feature_id"]])
    ax.tick_params(labelsize=FONT_PT)
    ax.tick_params(which="minor", axis="y", length=0)
    ax.grid(axis="x", alpha=0.3)
    ax.legend(handles=[bars, mean, given], loc="lower left", bbox_to_anchor=(0.0, 1.01), ncols=3,
              fontsize=FONT_PT, frameon=False, borderaxespad=0.0)


def _rank_matrix(ax, rows, share, kmax, kind) -> None:
    """The right panel: P(rank = k), written in the cells."""
    from matplotlib.colors import Normalize

    ids = rows["feature_id"].to_numpy()
    m = share.reindex(ids).to_numpy(float) if share is not None else np.zeros((len(ids), kmax))
    cmap, norm = palette(kind["palette"]), Normalize(0.0, 1.0)
    ax.imshow(np.ma.masked_where(m <= 0, m), cmap=cmap, norm=norm, aspect="auto",
              interpolation="nearest", extent=(0.5, kmax + 0.5, len(ids) - 0.5, -0.5))
    for i, row in enumerate(m):
        for k, p in enumerate(row):
            if p > 0:
                r_, g_, b_, _ = cmap(norm(p))
                dark = 0.2126 * r_ + 0.7152 * g_ + 0.0722 * b_ < 0.5  # relative luminance
                ax.text(k + 1, i, "<.01" if p < 0.005 else f"{p:.2f}", ha="center", va="center",
                        fontsize=FONT_PT, color="white" if dark else INK,
                        gid=f"p_rank_{ids[i]}_{k + 1}")
    ax.set_xticks(np.arange(1, kmax + 1))
    ax.set_xticks(np.arange(0.5, kmax + 1), minor=True)
    ax.set_yticks(np.arange(-0.5, len(ids)), minor=True)
    ax.grid(which="minor", color="0.85", lw=0.8)
    ax.tick_params(which="both", length=0, labelsize=FONT_PT)
    ax.xaxis.set_ticks_position("top")
    ax.xaxis.set_label_position("top")
    label = "P(rank = k): share of realisations in which the feature ranks k-th"
    ax.set_xlabel("\n".join(textwrap.wrap(label, max(24, 6 * kmax))), fontsize=FONT_PT + 1)
    ax.set_xlim(0.5, kmax + 0.5)


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
    kernels = list(dict.fromkeys(rows["kernel"]))
    what = "summit" if result.job.kind == "peaks" else "depression"
    fig = Figure(figsize=(9.0, 7.4), dpi=110, layout="constrained")
    axes = fig.subplots(len(SWEEP_STATISTICS), 1, sharex=True)
    levels = sorted(set(rows["rmse"]))
    features, kernel_keys = _sweep_lines(axes, rows, result.top, kernels, what)
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
