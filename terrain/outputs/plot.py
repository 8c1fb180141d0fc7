"""Figures: quick-look maps and the ranking chart (the sweep's figure: :mod:`.sweepchart`).

Rendering only; every function returns a matplotlib Figure and the writer
saves it (atomically, through :mod:`terrain.io`). Every map is drawn in the
one design of :class:`terrain.outputs.mapframe.MapFrame` (hillshade, masked
nodata, aspect, scale bar, north arrow, legend, labels, footer with the
error model, the realisations and the caution); what each command's map
shows is decided here, by layer role (:mod:`terrain.layers`).
"""

from __future__ import annotations

import math
import textwrap
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import shapely

from ..dem import Dem
from ..layers import LAYERS, layer_name, read_window, spec, units
from ..outlets import short
from ..summary.features import LAYER_NAMES
from .caution import CAUTION
from .mapframe import MapFrame, hillshade, pool_bands, pooled_dem, pooling
from .style import FONT_PT, INK, OUTLINE_COLOURS, PALETTES, area_text, palette, short_unit

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from ..runner.ensemble import RunResult
    from ..summary.features import FeatureSummary

__all__ = ["quicklook", "hillshade", "feature_map", "ranking_chart", "catchment_map",
           "FeatureMapSheet", "feature_map_sheet", "draw_feature_map", "ChartSheet",
           "ranking_chart_sheet", "draw_ranking_chart",
           "LABELLED", "LABEL_PRESENCE", "RANKED", "figure_text"]

LABELLED = 12  # features labelled on a map, at most
LABEL_PRESENCE = 0.5  # ... among those counted in at least this share of realisations
RANKED = 20  # features on the ranking chart, at most
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


def cell_text(p: float) -> str:
    """A probability in a cell of the rank matrix: two decimals, with a share that
    rounds to 0 or 1 but is neither written "<.01" or ">.99" (0.9967 is not certain)."""
    if 0 < p < 0.005:
        return "<.01"
    return ">.99" if 0.995 <= p < 1 else f"{p:.2f}"


def share_text(p: float) -> str:
    """A probability as a percentage, with <1% and >99% kept apart from 0 and 1,
    rounded as its two-decimal form is (0.765 -> 0.77 -> 77%), so a share and
    the same probability written in a cell of the rank matrix agree."""
    if p <= 0:
        return "0%"
    if p >= 1:
        return "100%"
    if p < 0.01:
        return "<1%"
    return ">99%" if p > 0.99 else f"{float(f'{p:.2f}'):.0%}"


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


def _outlets(frame: MapFrame, outlets, *, labelled: bool = True) -> None:
    if outlets:
        xs, ys, names = zip(*outlets)
        frame.points(xs, ys, marker="v", face="white", label="outlet, as given", size=9)
        for x, y, name in outlets if labelled else ():
            frame.label(x, y, str(name))


@dataclass(frozen=True)
class FeatureMapSheet:
    """What a peaks or depressions map draws, gathered from a run by
    :func:`feature_map_sheet`; :func:`draw_feature_map` draws it. Gathering
    reads the run (in memory or on disk, the same way); drawing reads only
    the sheet.

    The rasters are on the grid drawn (pooled as :class:`MapFrame` pools, so
    at most :data:`terrain.layers.MAX_PIXELS` cells a side whatever the
    DEM's size): a sheet holds a few float64 arrays of at most
    :data:`terrain.layers.QUICKLOOK_CELLS` cells and the drawn features'
    outlines.
    """

    kind: str  # "peaks" or "depressions"
    grid: Dem  # the grid drawn (the DEM, or its pooled copy)
    shade: np.ndarray | None  # its hillshade (None: MapFrame shades ``grid``)
    values: np.ndarray  # the main layer (NaN: nodata)
    inside: np.ndarray | None  # depressions: on a counted feature (any cell of a pooled block)
    tops: np.ndarray | None  # peaks: on a top (any cell of a pooled block)
    drawn: object  # the table's rows drawn (DataFrame)
    outlines: list  # each drawn row's outline (shapely; None where it has none)
    groups: list  # (group id, its rows): the groups labelled, in table order
    features: int  # rows in the table
    rank_share: object  # P(rank = k) per feature (DataFrame), or None
    unit: str  # the figure's short unit (m, ft, ...)
    bar: str  # the colour bar's label
    footer: str


def feature_map_sheet(result: RunResult, features: FeatureSummary) -> FeatureMapSheet:
    """Gather what :func:`draw_feature_map` draws from a peaks or depressions run.

    The rasters are read band by band and pooled (out of core, only the map's
    main layer is computed); an in-memory run's hillshade is the one
    :func:`hillshade` keeps (made while the realisations ran), an out-of-core
    run's is made from the pooled DEM when drawn.
    """
    dem, job, table = result.dem, result.job, features.table
    main = layer_name(job.kind, _KIND[job.kind]["main"])
    groups = _label_groups(table)
    drawn = table[(table["p_above"] >= LABEL_PRESENCE)
                  | table["group"].isin([g for g, _ in groups])]
    on_disk = result.layout.on_disk
    grid, values, inside, tops = _pooled_view(result, features, main)
    geoms = features.frames[LAYER_NAMES[job.kind][0]].set_index("feature_id").geometry
    geoms = geoms.reindex(drawn["feature_id"]).to_numpy()  # None where a feature has no shape
    if job.kind == "peaks":  # a top's cells are scattered: outline them together
        geoms = shapely.buffer(geoms, ENVELOPE_CELLS * max(dem.cellsize))
    return FeatureMapSheet(
        kind=job.kind, grid=grid, shade=None if on_disk else hillshade(dem, k=pooling(dem.shape)),
        values=values, inside=inside, tops=tops, drawn=drawn, outlines=list(geoms),
        groups=groups, features=len(table), rank_share=features.rank_share,
        unit=_figure_unit(result), bar=bar_label(main, dem.unit_label),
        footer=run_footer(result, main))


def _figure_unit(result: RunResult) -> str:
    """The short unit of a peaks or depressions run's figure (prominence, depth)."""
    job = result.job
    return short_unit(units(layer_name(job.kind, "birth_credit"), result.dem.unit_label,
                            job.weight))


def feature_map(result: RunResult, features: FeatureSummary) -> Figure:
    """The quick-look of a peaks or depressions run (:func:`draw_feature_map` of
    :func:`feature_map_sheet`)."""
    return draw_feature_map(feature_map_sheet(result, features))


def draw_feature_map(sheet: FeatureMapSheet) -> Figure:
    """Draw the quick-look of a peaks or depressions run from its sheet.

    Peaks: summit probability; depressions: ponding probability with its 50%
    contour outside the features. Over it, the features counted in at least
    :data:`LABEL_PRESENCE` of realisations (and the members of each labelled
    group): each one's polygon (where the top is / the ponded extent), a
    marker at its most credited summit or pit cell and another at its most
    credited key col or spill point, tied to it by a thin line. At most
    :data:`LABELLED` labels, one per group, in table order (median rank,
    then expected figure): each names its features with their figure on the
    DEM as given (``*``: bimodal) and P(ranks first), and for a group the
    place its members trade and each one's share; members of a group are
    tied by a dotted line. Never a mean: a bimodal mean is no outcome.
    """
    kind, groups = _KIND[sheet.kind], sheet.groups
    frame = MapFrame(sheet.grid, title=kind["title"],
                     subtitle=_map_subtitle(kind, sheet.features, len(sheet.drawn)),
                     footer=sheet.footer, caution=CAUTION, shade=sheet.shade)
    values = sheet.values
    if sheet.kind == "peaks":  # elsewhere, single noise summits would speckle the whole map
        values = np.where(sheet.tops, values, 0.0)
        vmax, note = _round_up(float(np.nanmax(values, initial=0.0))), ", where the tops are"
    else:
        vmax, note = 1.0, f"; clear under {PONDING_FLOOR:.0%}"
    frame.layer(values, cmap=palette(kind["palette"]), vmax=vmax, sqrt=kind["sqrt"],
                label=sheet.bar + note, floor=0.0 if sheet.kind == "peaks" else PONDING_FLOOR)
    if sheet.kind == "depressions":
        frame.contours(np.where(sheet.inside, np.nan, values), [0.5], colour=INK,
                       label="ponded in 50% of realisations, outside the features",
                       styles=("dashed",), widths=(1.0,))
    _draw_features(frame, sheet.drawn, sheet.outlines, kind)
    frame.unplaced = "No room on the map to label {names}: see ranking.png and the table."
    for _, members in groups:
        first = members.iloc[0]
        frame.label(first["x"], first["y"], _group_label(members, sheet.rank_share, sheet.unit),
                    name="/".join(f"#{i}" for i in members["feature_id"]))
    if any(members["bimodal"].any() for _, members in groups):
        frame.symbol("*", f"bimodal {kind['figure']}: two clusters, no mean shown")
    return frame.figure()


def _label_groups(table) -> list:
    """The groups a map labels, in table order: (group id, its rows), the first
    :data:`LABELLED` groups with a member counted in at least
    :data:`LABEL_PRESENCE` of realisations."""
    out = []
    for g, members in table.sort_values("rank", kind="stable").groupby("group", sort=False):
        if (members["p_above"] >= LABEL_PRESENCE).any():
            out.append((g, members))
        if len(out) == LABELLED:
            break
    return out


def _map_subtitle(kind: dict, features: int, drawn: int) -> str:
    more = features - drawn
    place = "a top" if kind["feature"] == "summit" else "a floor"
    return (f"Drawn: the {drawn} features counted in at least {LABEL_PRESENCE:.0%} of "
            f"realisations" + (f" or labelled ({more} more in the table)" if more else "")
            + f". Labels, one per group, in table order: #id, {kind['figure']} on the DEM as "
            f"given (* bimodal: two clusters of outcomes, so no mean is shown), P(ranks first); "
            f"a group (dotted line: features that trade a place or share {place}; its label "
            "is placed at the first one it names) gives the place its members trade and each "
            "one's share.")


def _draw_features(frame: MapFrame, drawn, outlines: list, kind: dict) -> None:
    """Outlines, summit / pit and key col / spill markers of the ``drawn`` rows, each
    key col or spill point tied to its feature by a thin line, a group's members
    by a dotted one."""
    job_kind = "peaks" if kind["feature"] == "summit" else "depressions"
    frame.polygons(outlines, colour=kind["accent"], label=kind["polygons"])
    d = "col" if job_kind == "peaks" else "spill"
    n = len(drawn)
    size = 8.0 if n <= 40 else 6.0 if n <= 150 else 4.5  # crowded: smaller
    frame.lines([((a, b), (c, e)) for a, b, c, e in zip(drawn["x"], drawn["y"], drawn[f"{d}_x"],
                                                        drawn[f"{d}_y"])],
                colour=kind["accent"], lw=0.7,
                label=f"{kind['death'][1]}: tied to its {kind['feature']} by a thin line")
    # each member of a group after its first, tied to the first (in the order drawn)
    group, x, y = (drawn[c].to_numpy() for c in ("group", "x", "y"))
    ids, first = np.unique(group, return_index=True)
    lead = first[np.searchsorted(ids, group)]
    ties = [((x[j], y[j]), (x[i], y[i])) for i, j in enumerate(lead) if i != j]
    place = "a top" if job_kind == "peaks" else "a floor"
    frame.lines(ties, colour=INK, lw=1.3, ls="dotted",
                label=f"one group: features that trade a place or share {place}")
    frame.points(drawn["x"], drawn["y"], marker=kind["birth"][0], face="white",
                 label=kind["birth"][1], size=size)
    frame.points(drawn[f"{d}_x"], drawn[f"{d}_y"], marker=kind["death"][0], face=kind["accent"],
                 label=kind["death"][1], size=size * 0.75)


def _group_label(members, share, unit: str) -> str:
    """A map label for a group (one row: a feature alone): each member's id and
    figure on the DEM as given (``*``: bimodal), then (on a second line for a
    group) the place they trade and each one's share, or P(ranks first); never
    a mean."""
    from ..summary.ranks import ordinal, traded_place

    names = " | ".join(f"#{r.feature_id} {figure_text(r.unperturbed)} {unit}"
                       + ("*" if r.bimodal else "") for r in members.itertuples())
    traded = traded_place(members, share)
    firsts = members["p_first"].to_numpy(float)
    if traded is not None:
        k, shares = traded
        text = f"{names}\n{ordinal(k) if k > 1 else 'first'} " + _shares(shares)
        if k > 1 and firsts.max() >= 0.005:
            text += " · first " + _shares(firsts)
        return text
    return f"{names}{chr(10) if len(members) > 1 else ' · '}first " + _shares(firsts)


def _shares(values) -> str:
    """Shares as percentages joined by ' | ', the sign once: '80 | 20%'."""
    texts = [share_text(v) for v in values]
    return " | ".join(t[:-1] if t.endswith("%") else t for t in texts[:-1]) + (
        " | " if len(texts) > 1 else "") + texts[-1]


def _pooled_view(result: RunResult, features: FeatureSummary, main: str):
    """The DEM and the map's rasters pooled as a map pools them, read band by
    band (a run kept on disk computes only ``main`` of its layers): (the grid
    drawn, layer (max), depressions: inside a feature (any cell), peaks: on a
    top (any cell)); None for what the other kind's map does not draw. The
    grid drawn is the DEM itself when it is in memory and drawn unpooled."""
    dem = result.dem
    k, cols = pooling(dem.shape), dem.shape[1]
    ids = features.table["feature_id"].to_numpy()

    def layer(r0, r1):
        return np.where(np.isnan(dem.window(r0, r1, 0, cols)), np.nan,
                        read_window(result.layers, r0, r1, 0, cols, (main,))[main][0])

    def inside(r0, r1):
        return np.isin(np.asarray(features.regions.labels[r0:r1, 0:cols]), ids).astype(float)

    def tops(r0, r1):
        return (features.top[r0:r1, 0:cols] > 0).astype(float)

    grid = dem if k == 1 and not result.layout.on_disk else pooled_dem(dem, k)
    peaks = result.job.kind == "peaks"
    return (grid, pool_bands(layer, dem.shape, k, np.nanmax),
            None if peaks else pool_bands(inside, dem.shape, k, np.nanmax) > 0,
            pool_bands(tops, dem.shape, k, np.nanmax) > 0 if peaks else None)


def _round_up(x: float) -> float:
    """The smallest of 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1 at least ``x`` (probabilities)."""
    for step in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5):
        if x <= step:
            return step
    return 1.0


def catchment_map(result: RunResult, summary=None) -> Figure:
    """The quick-look of a catchment run.

    With outlets: the divide layer in colour, each outlet's sub-catchment
    (the cells whose first chosen outlet downstream it is; nested outlets
    split their parent) outlined where it holds in at least 50% (solid) and
    90% (dashed) of realisations, one colour per outlet; each outlet as given
    (labelled with its id) and its most frequent snapped cell, where the run
    measured, with the share of realisations that snapped there, tied by a
    thin line. Without outlets: channel probability. Layers are found by
    their role in :mod:`terrain.layers`; ``summary`` is the run's
    :class:`terrain.summary.catchments.CatchmentSummary` (made here if not given).
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
    each = len(job.ids) <= len(OUTLINE_COLOURS)  # a legend entry per outlet while colours last
    for n, (oid, lid) in enumerate(zip(job.ids, job.layer_ids)):
        name = sub.concrete(lid)
        if name in result.layers:
            drawn |= frame.contours(result.layers[name][0], (0.5, 0.9),
                                    colour=OUTLINE_COLOURS[n % len(OUTLINE_COLOURS)],
                                    label=f"sub-catchment of outlet {short(oid, 24)}",
                                    styles=("solid", "dashed"), widths=(1.8, 1.2), keyed=each)
    if drawn and not each:
        frame.key(f"sub-catchment of each outlet ({len(OUTLINE_COLOURS)} colours in turn)",
                  colour=OUTLINE_COLOURS[0])
    if drawn:
        frame.key("in at least 50% of realisations", ls="solid")
        frame.key("in at least 90% of realisations", ls="dashed")
    given = [(x, y, short(oid, 24)) for oid, (x, y) in zip(job.ids, job.xy)]
    _outlets(frame, given, labelled=False)
    snapped = _snapped(frame, _outlet_rows(result, summary))
    for oid, (x, y, name) in zip(job.ids, given):  # each outlet's id, then its snapped share,
        frame.label(x, y, name)                     # in the file's order (the map labels the
        for sx, sy, text, what in snapped.get(str(oid), ()):  # first MAX_LABELS)
            frame.label(sx, sy, text, name=what)
    return frame.figure()


def _outlet_rows(result: RunResult, summary):
    """The outlets table of a run (as given, most frequent snapped cell, share)."""
    if summary is not None and "outlets" in summary.frames:
        return summary.frames["outlets"]
    from ..summary.catchments import outlet_table

    return outlet_table(result)


def _snapped(frame: MapFrame, outlets) -> dict:
    """Each outlet's most frequent snapped cell, tied to the point as given by a
    thin line; returns each outlet's label (outlet id -> [(x, y, text, name=...)]),
    the share of realisations that snapped there, for the caller to place."""
    ok = np.isfinite(outlets["snapped_x"].to_numpy(float))
    rows = outlets[ok]
    if rows.empty:
        return {}
    # the point as given in the DEM's CRS (x, y are in the outlets file's own CRS)
    gx, gy = ("x_dem", "y_dem") if "x_dem" in rows else ("x", "y")
    frame.lines([((a, b), (c, d)) for a, b, c, d in zip(rows[gx], rows[gy], rows["snapped_x"],
                                                        rows["snapped_y"])],
                colour=INK, lw=0.8, label="outlet as given to its snapped cell")
    frame.points(rows["snapped_x"], rows["snapped_y"], marker="o", face="#f2c14e",
                 label="most frequent snapped cell (share of realisations beside it)", size=7.0)
    labels: dict = {}
    for row in rows.itertuples():
        labels.setdefault(str(row.outlet_id), []).append(
            (row.snapped_x, row.snapped_y, f"snapped {share_text(row.snapped_share)}",
             f"{short(str(row.outlet_id), 24)} snapped"))
    return labels


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


@dataclass(frozen=True)
class ChartSheet:
    """What a ranking chart draws, gathered from a run by :func:`ranking_chart_sheet`
    (the feature table, P(rank = k), the bimodal figures' clusters and the
    text); :func:`draw_ranking_chart` draws it."""

    kind: str  # "peaks" or "depressions"
    table: object  # the feature table (DataFrame)
    rank_share: object  # P(rank = k) per feature (DataFrame), or None
    clusters: object  # each bimodal figure's two clusters (DataFrame), or None
    min_presence: float
    unit: str  # the figure's short unit
    footer: str


def ranking_chart_sheet(result: RunResult, features: FeatureSummary) -> ChartSheet:
    """Gather what :func:`draw_ranking_chart` draws from a peaks or depressions run."""
    job = result.job
    return ChartSheet(kind=job.kind, table=features.table, rank_share=features.rank_share,
                      clusters=features.clusters, min_presence=job.min_presence,
                      unit=_figure_unit(result), footer=run_footer(result))


def ranking_chart(result: RunResult, features: FeatureSummary) -> Figure:
    """The ranking chart of a peaks or depressions run (:func:`draw_ranking_chart`
    of :func:`ranking_chart_sheet`)."""
    return draw_ranking_chart(ranking_chart_sheet(result, features))


def draw_ranking_chart(sheet: ChartSheet) -> Figure:
    """Which feature is first, and how sure: the ranking chart of a peaks or
    depressions run.

    The rows are every feature holding some rank k <= 10 in at least 1% of
    realisations (with the rest of its group), at most :data:`RANKED`, in
    table order (median rank, then expected figure, a group's members
    together on a shaded band, bracketed on the right with the place they
    trade and each one's share): selected by rank probability, never by a
    mean. On the left each feature's 5-95% range over realisations as a bar,
    its expected value and its value on the DEM as given; a bimodal figure
    gets one bar per cluster of outcomes, with its share, and its mean is
    drawn hollow (no realisation lies near it). On the right P(rank = k) for
    k = 1..10 (``features.rank_share``), written in the cells (blank where
    the feature never ranked k-th).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from ..summary.ranks import RANK_MASS, ordinal, ranked_rows

    table, unit, share = sheet.table, sheet.unit, sheet.rank_share
    kind = _KIND[sheet.kind]
    rows, left_out = ranked_rows(table, share, RANKED)
    n = max(len(rows), 1)
    kmax = share.shape[1] if share is not None and share.shape[1] else 1
    fig = Figure(figsize=(12.0, max(4.6, 2.8 + 0.4 * n)), dpi=CHART_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    if rows.empty:
        ax = fig.subplots()
        ax.set_axis_off()
        ax.text(0.5, 0.5, f"No {kind['feature']} feature was counted in at least "
                          f"{sheet.min_presence:.0%} of realisations.", ha="center",
                fontsize=FONT_PT + 1, transform=ax.transAxes)
    else:
        left, right = fig.subplots(1, 2, sharey=True,
                                   gridspec_kw=dict(width_ratios=[1.0, max(0.4, 0.08 * kmax)]))
        _ranges(left, rows, kind, unit, sheet.clusters)
        _rank_matrix(right, rows, share, kmax, kind)
        _group_bands((left, right), rows, share,
                     "share a top" if sheet.kind == "peaks" else "share a floor")
        left.set_ylim(n - 0.5, -0.5)
    more = (f"; {left_out} more in ranks.csv" if left_out else "")
    fig.suptitle(f"Which {kind['feature']} ranks first, and how sure?\nThe {len(rows)} of "
                 f"{len(table)} features that rank 1st-{ordinal(kmax)} in at least "
                 f"{RANK_MASS:.0%} of realisations, by median rank{more}",
                 fontsize=FONT_PT + 3, weight="bold")
    fig.supxlabel("\n".join(textwrap.wrap(sheet.footer, 150) + textwrap.wrap(CAUTION, 150)),
                  fontsize=FONT_PT, color="0.25")
    return fig


CHART_DPI = 110
GROUP_BAND = "#e9e4f2"  # the shaded band behind a group's rows


def _ranges(ax, rows, kind, unit, clusters) -> None:
    """The left panel: 5-95% bars (one per cluster where bimodal, with its share),
    expected and unperturbed markers, and their legend."""
    y = np.arange(len(rows))
    colour = palette(kind["palette"])(0.45)
    p05, p95 = rows["p05"].to_numpy(float), rows["p95"].to_numpy(float)
    split = rows["bimodal"].to_numpy(bool) & (rows["feature_id"].isin(clusters.index).to_numpy()
                                              if clusters is not None else False)
    whole = ~split
    bars = ax.hlines(y[whole], p05[whole], p95[whole], color=colour, lw=8,
                     label="5-95% of realisations")
    handles = [bars]
    values = [p05, p95, rows["unperturbed"].to_numpy(float)]
    if split.any():
        c = clusters.loc[rows["feature_id"][split]]
        for side in ("low", "high"):
            ax.hlines(y[split], c[f"{side}_p05"], c[f"{side}_p95"], color=colour, lw=8)
            values += [c[f"{side}_p05"].to_numpy(float), c[f"{side}_p95"].to_numpy(float)]
        handles.append(ax.hlines([], [], [], color=colour, lw=8,
                                 label="bimodal: each cluster's 5-95%, its share"))
    values = np.concatenate(values)
    log = _x_scale(ax, values, room=3.0 if split.any() else 1.6, zero=bool((values <= 0).any()))
    if split.any():
        _cluster_shares(ax, y[split], c, log, colour)
    mean, = ax.plot(rows["expected"][whole], y[whole], ls="none", marker="o", ms=7, mfc=INK,
                    mec="white", label="expected (mean)")
    handles.append(mean)
    if split.any():
        handles.append(ax.plot(rows["expected"][split], y[split], ls="none", marker="o", ms=7,
                               mfc="none", mec="0.45", mew=1.2,
                               label="mean of a bimodal figure (no outcome)")[0])
    given, = ax.plot(rows["unperturbed"], y, ls="none", marker="D", ms=7, mfc="none",
                     mec=kind["accent"], mew=1.8, label="on the DEM as given")
    handles.append(given)
    ax.set_xlabel(f"{kind['figure']} ({unit}{', log scale' if log else ''}"
                  f"{'; 0 where not counted' if (values <= 0).any() else ''})",
                  fontsize=FONT_PT + 1)
    ax.set_yticks(y, [f"#{i}" for i in rows["feature_id"]])
    ax.tick_params(labelsize=FONT_PT)
    ax.tick_params(which="minor", axis="y", length=0)
    ax.grid(axis="x", alpha=0.3)
    ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.01), ncols=2,
              fontsize=FONT_PT, frameon=False, borderaxespad=0.0, handlelength=1.6,
              columnspacing=1.0)


def _x_scale(ax, values: np.ndarray, room: float = 1.6, zero: bool = False) -> bool:
    """A log x axis when the positive values span more than 20 times; returns
    whether. With ``zero`` a log axis keeps a strip at its left for the figure
    0 (not counted), marked off by a dotted line and ticked "0"; ``room`` times
    the largest value is left on its right (for the clusters' shares)."""
    positive = values[np.isfinite(values) & (values > 0)]
    log = bool(positive.size) and positive.max() / positive.min() > 20
    if not log and positive.size and room > 1.6:
        ax.set_xlim(right=positive.max() * (1 + 0.12 * room))
    if log:
        from matplotlib.ticker import FixedLocator, FuncFormatter, LogLocator, NullLocator

        lo, hi = positive.min() / 1.6, positive.max() * room
        left = lo / ZERO_STRIP if zero else lo
        ax.set_xscale("log")
        ax.set_xlim(left, hi)
        ticks = [t for t in LogLocator(subs=(1.0, 2.0, 5.0)).tick_values(lo, hi) if lo <= t <= hi]
        ax.xaxis.set_major_locator(FixedLocator([math.sqrt(left * lo)] * zero + ticks))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, i: "0" if zero and i == 0
                                                   else f"{v:g}"))
        ax.xaxis.set_minor_locator(NullLocator())
        if zero:
            ax.axvline(lo, color="0.5", lw=0.8, ls="dotted", zorder=1)
    return log


ZERO_STRIP = 6.0  # on a log axis, the strip for 0 spans this factor left of the smallest value


def _cluster_shares(ax, y, c, log: bool, colour) -> None:
    """Each cluster's share of realisations beside its bar; a cluster at 0 (not
    counted) in the strip for 0 on a log axis."""
    zero = math.sqrt(ax.get_xlim()[0] * ax.get_xlim()[0] * ZERO_STRIP) if log else 0.0
    for yy, row in zip(y, c.itertuples()):
        for side in ("low", "high"):
            p95 = getattr(row, f"{side}_p95")
            text = share_text(getattr(row, f"{side}_share"))
            at = zero if (log and p95 <= 0) else p95
            if log and p95 <= 0:
                ax.plot([zero], [yy], ls="none", marker="|", ms=14, mew=8,
                        color=colour, zorder=2)
            ax.annotate(text, (at, yy), xytext=(10, 0), textcoords="offset points", ha="left",
                        va="center", fontsize=FONT_PT, color=INK, gid="cluster_share")


def _group_bands(axes, rows, share, place: str) -> None:
    """A shaded band behind each group's rows on both panels, and on the right of
    the rank matrix a bracket with the place its members trade and their shares."""
    from ..summary.ranks import ordinal, traded_place

    right = axes[-1]
    start = 0
    for _, members in rows.groupby("group", sort=False):
        end = start + len(members) - 1
        if end > start:
            for ax in axes:
                ax.axhspan(start - 0.46, end + 0.46, color=GROUP_BAND, zorder=0.1, lw=0)
            traded = traded_place(members, share)
            text = f"{ordinal(traded[0])}: {_shares(traded[1])}" if traded else place
            right.annotate("", xy=(1.02, start - 0.3), xytext=(1.02, end + 0.3),
                           xycoords=("axes fraction", "data"),
                           arrowprops=dict(arrowstyle="-[", lw=1.0, color=INK))
            right.text(1.045, (start + end) / 2, text, transform=right.get_yaxis_transform(),
                       ha="left", va="center", fontsize=FONT_PT, color=INK, gid="group_label")
        start = end + 1


def _rank_matrix(ax, rows, share, kmax, kind) -> None:
    """The right panel: P(rank = k), written in the cells."""
    from matplotlib.colors import Normalize

    ids = rows["feature_id"].to_numpy()
    m = share.reindex(ids).to_numpy(float) if share is not None else np.zeros((len(ids), kmax))
    cmap, norm = palette(kind["palette"]), Normalize(0.0, 1.0)
    ax.imshow(np.ma.masked_where(m <= 0, m), cmap=cmap, norm=norm, aspect="auto",
              interpolation="nearest", extent=(0.5, kmax + 0.5, len(ids) - 0.5, -0.5), zorder=0.5)
    for i, row in enumerate(m):
        for k, p in enumerate(row):
            if p > 0:
                r_, g_, b_, _ = cmap(norm(p))
                dark = 0.2126 * r_ + 0.7152 * g_ + 0.0722 * b_ < 0.5  # relative luminance
                ax.text(k + 1, i, cell_text(p), ha="center", va="center",
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
