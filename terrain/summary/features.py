"""Features: the regions of the DEM as given, and what the realisations say about them.

A *feature* is a region of the unperturbed DEM's persistence-simplified
watershed (:func:`terrain.engine.persistence.regions`): the cells that climb
to a surviving summit, or drain to a surviving pit. Regions are fixed before
any realisation; a realisation's counted pair belongs to the region holding
its birth cell, and the region's *figure* in that realisation is the largest
counted figure born in it (0 when none). Every statistic is then a plain
Monte Carlo mean over realisations, with a valid standard error. A region
is a row of the tables when it is counted in at least the job's
``min_presence`` share of realisations.

A region is also a row when it holds one of the first :data:`RANKS` ranks
in some realisation, so the rank distribution (``ranks.csv``,
:mod:`terrain.summary.ranks`) names only rows. Ranks are described whole
(``median_rank``, ``p_top3``, ``p_top10``; ``expected_rank`` is a mean), a
figure that splits into two clusters of outcomes is flagged (``bimodal``),
and features that trade a rank or share a top or floor within the error
carry one ``group`` id. Rows are ordered by median rank, then expected
figure, a group's members together (``rank`` is the place in that order).

Two kinds of uncertainty are kept apart: ``p05``/``p95`` (and the other
5-95% columns) are the spread the DEM error causes; ``se`` and the ``*_se``
columns are how precisely the Monte Carlo run estimated a mean.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage

from ..dem import Dem
from ..io import release_freed_memory
from ..jobs.credit_blocked import grid_values_at, unperturbed_ponding
from ..layers import layer_name, layer_windows, read_window
from ..pairlog import log_weights, region_figures
from .ranks import (
    RANKS,
    display_order,
    expected_ranks,
    group_ids,
    median_ranks,
    ordinal_ranks,
    rank_distribution,
    rank_table,
    shared_tops,
    top_shares,
    two_clusters,
)
from .relations import LINK_TABLE, RELATION_COLUMN_KINDS, RELATION_COLUMNS, link_frame, relations_of

__all__ = ["COLUMNS", "COLUMN_KINDS", "LAYER_NAMES", "RANK_LAYER", "TOP_SHARE", "PONDED_SHARE",
           "RANKS", "FeatureSummary", "FigureMatrix", "figure_matrix", "rank_shares",
           "summarise_features", "summary_steps", "region_polygons", "unperturbed_ponding",
           "unperturbed_figures"]

TOP_SHARE = 0.9  # "where the top is": the fewest cells holding 90% of a summit's births
PONDED_SHARE = 0.5  # the ponded extent: cells ponded in at least half the realisations
RANK_LAYER = "ranks"  # the GeoPackage table (no geometry) of the rank distribution

_COMMON = ("feature_id", "rank", "group", "unperturbed", "expected", "p05", "p50", "p95", "se",
           "bimodal", "p_above", "p_above_se", "p_first", "p_first_se", "median_rank", "p_top3",
           "p_top3_se", "p_top10", "p_top10_se", "expected_rank", "x", "y", "elevation")
COLUMNS = {
    "peaks": _COMMON + ("col_x", "col_y", "col_elevation", "unperturbed_x", "unperturbed_y",
                        "unperturbed_col_x", "unperturbed_col_y", "unperturbed_col_elevation",
                        "top_area_m2", "region_area_m2", "edge_limited_share",
                        "unperturbed_edge_limited"),
    "depressions": _COMMON + ("spill_x", "spill_y", "spill_elevation", "unperturbed_x",
                              "unperturbed_y", "unperturbed_spill_x", "unperturbed_spill_y",
                              "unperturbed_spill_elevation", "ponded_area_m2",
                              "ponded_area_mean_m2", "ponded_area_p05_m2", "ponded_area_p95_m2",
                              "volume_m3", "volume_mean_m3", "volume_p05_m3", "volume_p95_m3",
                              "region_area_m2", "edge_limited_share", "unperturbed_edge_limited",
                              "extent_is_pit_cell"),
}
#: What each column is (decides its precision in CSV, see :mod:`terrain.outputs.tables`).
COLUMN_KINDS = {
    "feature_id": "id", "rank": "integer", "unperturbed": "vertical", "expected": "vertical",
    "p05": "vertical", "p50": "vertical", "p95": "vertical", "se": "vertical",
    "p_above": "probability", "p_above_se": "probability", "p_first": "probability",
    "p_first_se": "probability", "expected_rank": "mean_rank", "x": "coordinate",
    "group": "id", "bimodal": "flag", "median_rank": "integer", "p_top3": "probability",
    "p_top3_se": "probability", "p_top10": "probability", "p_top10_se": "probability",
    "extent_is_pit_cell": "flag",
    "y": "coordinate", "elevation": "vertical", "unperturbed_x": "coordinate",
    "unperturbed_y": "coordinate", "region_area_m2": "area", "edge_limited_share": "probability",
    "unperturbed_edge_limited": "flag",
    "col_x": "coordinate", "col_y": "coordinate", "col_elevation": "vertical",
    "unperturbed_col_x": "coordinate", "unperturbed_col_y": "coordinate",
    "unperturbed_col_elevation": "vertical",
    "spill_x": "coordinate", "spill_y": "coordinate", "spill_elevation": "vertical",
    "unperturbed_spill_x": "coordinate", "unperturbed_spill_y": "coordinate",
    "unperturbed_spill_elevation": "vertical",
    "top_area_m2": "area", "ponded_area_m2": "area", "ponded_area_mean_m2": "area",
    "ponded_area_p05_m2": "area", "ponded_area_p95_m2": "area", "volume_m3": "volume",
    "volume_mean_m3": "volume", "volume_p05_m3": "volume", "volume_p95_m3": "volume",
    **RELATION_COLUMN_KINDS,  # relations: parent, spills into, isolation
}
# relations: parent, spills into, isolation (extent_is_pit_cell, added last, stays last)
COLUMNS = {k: tuple(c for c in v if c != "extent_is_pit_cell") + RELATION_COLUMNS[k]
           + tuple(c for c in v if c == "extent_is_pit_cell") for k, v in COLUMNS.items()}
LAYER_NAMES = {"peaks": ("summits", "summit_points", "summit_regions", "cols"),
               "depressions": ("pits", "pit_points", "pit_regions", "spill_points")}
_DEATH = {"peaks": "col", "depressions": "spill"}


@dataclass(frozen=True)
class FigureMatrix:
    """Per realisation and region (columns ``ids``, every region with a
    counted pair in some realisation): the largest figure (0 when none), its
    presence, and whether that pair was edge-limited."""

    ids: np.ndarray
    figure: np.ndarray
    present: np.ndarray
    edge: np.ndarray

    def first(self) -> np.ndarray:
        """(n_real, k) bool: the region ranks first in the realisation (ties: lowest id)."""
        first = np.zeros(self.figure.shape, bool)
        anyp = self.present.any(axis=1)
        if self.ids.size:
            w = np.argmax(np.where(self.present, self.figure, -np.inf), axis=1)
            first[np.flatnonzero(anyp), w[anyp]] = True
        return first

    def ranks(self) -> np.ndarray:
        """(n_real, k) int32: the region's place among the regions counted in the
        realisation (1 = the largest figure; ties: lowest id, as :meth:`first`),
        0 where it is not counted (:func:`terrain.summary.ranks.ordinal_ranks`)."""
        return ordinal_ranks(self.figure, self.present)


def figure_matrix(log: dict, n_real: int, figures: tuple | None = None) -> FigureMatrix:
    """The :class:`FigureMatrix` of a run's pair log (n_real x regions present);
    ``figures``: :func:`terrain.pairlog.region_figures` of it, when already made."""
    real, reg, fig, edge = (figures if figures is not None else region_figures(log))[:4]
    ids = np.unique(reg)
    col = np.searchsorted(ids, reg)
    shape = (n_real, ids.size)
    figure, present, edge_m = np.zeros(shape), np.zeros(shape, bool), np.zeros(shape, bool)
    figure[real, col], present[real, col], edge_m[real, col] = fig, True, edge
    return FigureMatrix(ids, figure, present, edge_m)


@dataclass(frozen=True)
class FeatureSummary:
    """The features of a run.

    Attributes
    ----------
    regions : Regions
        The unperturbed DEM's regions (``labels`` per cell).
    table : pandas.DataFrame
        One row per feature, by rank (columns :data:`COLUMNS` of the kind).
    frames : dict
        GeoDataFrames by layer name (:data:`LAYER_NAMES`).
    top : SparseTop or PondedTop
        Read by window (``top[r0:r1, c0:c1]``): per cell, the feature whose
        top (peaks: where the top is, 90%) or ponded extent (depressions) it
        belongs to; 0 elsewhere.
    settings : dict
        The rules that made the rows (recorded in run.json).
    rank_share : pandas.DataFrame, optional
        P(rank = k) per feature (rows by ``feature_id``, in table order) and
        rank k = 1.. (columns), from :func:`rank_shares`.
    ranks : pandas.DataFrame, optional
        The same in long form (``ranks.csv``): columns
        :data:`terrain.summary.ranks.RANK_COLUMNS`; for every rank k the listed
        features carry its whole probability (feature 0: fewer than k counted).
    clusters : pandas.DataFrame, optional
        Per bimodal feature (index ``feature_id``): the share of realisations
        and the 5-95% range of its lower and upper cluster of outcomes.
    """

    regions: object
    table: pd.DataFrame
    frames: dict
    top: object
    settings: dict
    rank_share: pd.DataFrame | None = None
    ranks: pd.DataFrame | None = None
    clusters: pd.DataFrame | None = None
    links: pd.DataFrame | None = None  # relations: parents / spill links in long form


def _mc(share: np.ndarray, n: int) -> np.ndarray:
    return np.sqrt(share * (1 - share) / max(n, 1))


def _figure_columns(fm: FigureMatrix, cols: np.ndarray, n: int, ranks: np.ndarray) -> dict:
    f = fm.figure[:, cols]
    empty = n == 0
    p_above = fm.present[:, cols].mean(axis=0) if not empty else np.zeros(cols.size)
    p_first = fm.first()[:, cols].sum(axis=0) / max(n, 1)
    pct = np.percentile(f, [5, 50, 95], axis=0) if not empty else np.zeros((3, cols.size))
    with np.errstate(invalid="ignore", divide="ignore"):
        edge = fm.edge[:, cols].sum(0) / fm.present[:, cols].sum(0)
    r = ranks[:, cols]
    top3, top10 = top_shares(r, 3), top_shares(r, 10)
    return {"expected": f.mean(axis=0) if not empty else np.zeros(cols.size),
            "p05": pct[0], "p50": pct[1], "p95": pct[2],
            "se": f.std(axis=0) / np.sqrt(max(n, 1)),
            "p_above": p_above, "p_above_se": _mc(p_above, n),
            "p_first": p_first, "p_first_se": _mc(p_first, n),
            "median_rank": pd.array(median_ranks(r), dtype="Int64"),
            "p_top3": top3, "p_top3_se": _mc(top3, n), "p_top10": top10,
            "p_top10_se": _mc(top10, n), "expected_rank": expected_ranks(r),
            "edge_limited_share": edge}


def _most_credited_deaths(log: dict, ids: np.ndarray, n_cells: int):
    """Per region in ``ids``: the death cell credited most, its mean elevation, and its
    share of the region's death credit (NaN where no pair born in it ever died)."""
    keep = (log["region"] > 0) & (log["death"] >= 0)
    reg = log["region"][keep].astype(np.int64)
    death = log["death"][keep].astype(np.int64)
    w = log_weights({k: log[k][keep] for k in ("birth", "birth_value", "death_value")})
    cell = np.full(ids.size, -1, np.int64)
    elev, share = np.full(ids.size, np.nan), np.full(ids.size, np.nan)
    if reg.size:
        uk, inv = np.unique(reg * n_cells + death, return_inverse=True)
        wsum = np.bincount(inv, weights=w)
        vsum = np.bincount(inv, weights=log["death_value"][keep].astype(np.float64))
        cnt = np.bincount(inv)
        ur = uk // n_cells
        order = np.lexsort((-wsum, ur))
        first = np.ones(order.size, bool)
        first[1:] = ur[order][1:] != ur[order][:-1]
        sel = order[first]
        pos = np.searchsorted(ids, ur[sel])
        ok = (pos < ids.size) & (ids[np.minimum(pos, ids.size - 1)] == ur[sel])
        cell[pos[ok]] = uk[sel][ok] % n_cells
        elev[pos[ok]] = vsum[sel][ok] / cnt[sel][ok]
        total = np.bincount(np.searchsorted(ur[sel], ur), weights=wsum)
        share[pos[ok]] = wsum[sel][ok] / total[ok]
    return cell, elev, share


def _xy(dem: Dem, cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    x, y = dem.xy(np.maximum(cells, 0))
    return np.where(cells >= 0, x, np.nan), np.where(cells >= 0, y, np.nan)


def _areas(dem: Dem, labels, ids: np.ndarray) -> np.ndarray:
    """Area (m^2) of the cells labelled with each of ``ids``, summed window by window."""
    out = np.zeros(ids.size)
    if ids.size == 0:
        return out
    area = dem.cell_area_m2()
    for r0, r1, c0, c1 in layer_windows(dem.shape):
        lab = np.asarray(labels[r0:r1, c0:c1])
        out += ndimage.sum_labels(np.broadcast_to(area[r0:r1, None], lab.shape), lab, index=ids)
    return out


def _best_cells(result, labels, ids: np.ndarray) -> np.ndarray:
    """Per region in ``ids``: the cell of its largest birth credit (ties: the
    first in row-major order), found window by window."""
    name = layer_name(result.job.kind, "birth_credit")
    best_v, best = np.full(ids.size, -np.inf), np.full(ids.size, -1, np.int64)
    nc = result.dem.shape[1]
    for r0, r1, c0, c1 in layer_windows(result.dem.shape):
        lab = np.asarray(labels[r0:r1, c0:c1]).reshape(-1)
        sel = np.flatnonzero(np.isin(lab, ids))
        if not sel.size:
            continue
        v = np.nan_to_num(read_window(result.layers, r0, r1, c0, c1, (name,))[name][0])
        v = v.reshape(-1)[sel]
        rr, cc = np.divmod(sel, c1 - c0)
        flat = (rr + r0) * nc + cc + c0
        order = np.lexsort((flat, -v, lab[sel]))
        g = lab[sel][order]
        first = order[np.r_[True, g[1:] != g[:-1]]]
        k = np.searchsorted(ids, lab[sel][first])
        better = (v[first] > best_v[k]) | ((v[first] == best_v[k]) & (flat[first] < best[k]))
        best_v[k[better]], best[k[better]] = v[first][better], flat[first][better]
    return best


class SparseTop:
    """Where each summit's top is: a few cells per feature, read by window
    (``top[r0:r1, c0:c1]``: the feature id per cell, 0 elsewhere)."""

    def __init__(self, shape, cells: np.ndarray, ids: np.ndarray):
        self.shape, self.cells, self.ids = tuple(shape), cells, ids

    def __getitem__(self, key) -> np.ndarray:
        (r0, r1, _), (c0, c1, _) = (k.indices(n) for k, n in zip(key, self.shape))
        out = np.zeros((r1 - r0, c1 - c0), np.int32)
        r, c = np.divmod(self.cells, self.shape[1])
        inside = (r >= r0) & (r < r1) & (c >= c0) & (c < c1)
        out[r[inside] - r0, c[inside] - c0] = self.ids[inside]
        return out


class PondedTop:
    """Each depression's ponded extent (cells ponded in at least
    :data:`PONDED_SHARE` of realisations, inside the feature's region), read
    by window from the ponding probability layer and the region labels."""

    def __init__(self, result, labels, ids: np.ndarray):
        self.result, self.labels, self.ids = result, labels, ids
        self.shape = tuple(result.dem.shape)

    def __getitem__(self, key) -> np.ndarray:
        (r0, r1, _), (c0, c1, _) = (k.indices(n) for k, n in zip(key, self.shape))
        name = layer_name("depressions", "ponding_probability")
        p = read_window(self.result.layers, r0, r1, c0, c1, (name,))[name][0]
        lab = np.asarray(self.labels[r0:r1, c0:c1])
        return np.where((p >= PONDED_SHARE) & np.isin(lab, self.ids), lab, 0).astype(np.int32)


def _top_cells(birth: np.ndarray, labels, ids: np.ndarray, shape) -> SparseTop:
    """Per region in ``ids``: the fewest cells holding TOP_SHARE of the births
    of its figure's pair (the feature's summit in each realisation; ``birth``,
    from :func:`terrain.pairlog.region_figures`), most frequent first."""
    cells, counts = np.unique(birth, return_counts=True)
    lab = grid_values_at(labels, cells, shape[1])
    keep_ = np.isin(lab, ids)
    cand, flat, lab = cells[keep_], counts[keep_].astype(np.float64), lab[keep_]
    order = np.lexsort((cand, -flat, lab))
    g, c = lab[order], flat[order]
    start = np.r_[0, np.flatnonzero(g[1:] != g[:-1]) + 1]
    total = np.add.reduceat(c, start) if c.size else c
    group = np.repeat(np.arange(start.size), np.diff(np.r_[start, c.size]))
    before = np.cumsum(c) - c - np.r_[0, np.cumsum(c)][start][group] if c.size else c
    keep = order[before < TOP_SHARE * total[group]] if c.size else order
    return SparseTop(shape, cand[keep], lab[keep].astype(np.int32))


def unperturbed_figures(dem: Dem, job, ids: np.ndarray) -> np.ndarray:
    """Each region's figure on the DEM as given: its own pair's persistence, and for
    the highest summit (no key col) its height above the base, or above the DEM's
    lowest cell when that is lower (as realisations measure it)."""
    reg = job.regions
    k = np.asarray(ids, np.int64) - 1
    base = job.base if job.base is not None else 0.0
    return np.where(reg.death[k] < 0, reg.birth_value[k] - min(base, dem.lowest()),
                    reg.persistence[k])


def _unperturbed(dem: Dem, job, ids: np.ndarray) -> dict:
    reg = job.regions
    k = ids - 1
    death = reg.death[k]
    fig = unperturbed_figures(dem, job, ids)
    bx, by = _xy(dem, reg.birth[k])
    dx, dy = _xy(dem, death)
    d = _DEATH[job.kind]
    return {"unperturbed": fig, "unperturbed_x": bx, "unperturbed_y": by,
            f"unperturbed_{d}_x": dx, f"unperturbed_{d}_y": dy,
            f"unperturbed_{d}_elevation": reg.death_value[k],
            "unperturbed_edge_limited": reg.edge_limited[k]}


def _pond_columns(result, ids: np.ndarray) -> dict:
    """Ponded area (m^2) and volume (m^3) per region: unperturbed, and mean / 5% /
    95% over realisations (0 when a region holds no water). Volumes are summed
    in the DEM's vertical unit times m^2 and converted to m^3 with the unit's
    exact factor (1, 0.3048 or 1200/3937 m per unit)."""
    log, n = result.log, result.n
    area0, vol0 = unperturbed_ponding(result.dem, result.job, result.layout)
    to_m = result.dem.metres_per_unit
    vol0 = vol0 * to_m
    col = np.searchsorted(ids, log["pond_region"]) if ids.size else log["pond_region"]
    hit = (col < ids.size) & (ids[np.minimum(col, max(ids.size - 1, 0))] == log["pond_region"]) \
        if ids.size else np.zeros(0, bool)
    out = {"ponded_area_m2": area0[ids], "volume_m3": vol0[ids]}
    for name, values in (("ponded_area", log["pond_area"]), ("volume", log["pond_volume"] * to_m)):
        m = np.zeros((n, ids.size))
        m[log["pond_real"][hit].astype(np.int64), col[hit]] = values[hit]
        unit = "m2" if name == "ponded_area" else "m3"
        pct = np.percentile(m, [5, 95], axis=0) if n else np.zeros((2, ids.size))
        out.update({f"{name}_mean_{unit}": m.mean(axis=0) if n else np.zeros(ids.size),
                    f"{name}_p05_{unit}": pct[0], f"{name}_p95_{unit}": pct[1]})
    return out


def _table(result, fm: FigureMatrix, rows: np.ndarray, ranks: np.ndarray) -> dict:
    dem, job, n = result.dem, result.job, result.n
    ids = fm.ids[rows]
    cols = _figure_columns(fm, rows, n, ranks)
    labels = job.regions.labels
    best = _best_cells(result, labels, ids)
    bx, by = _xy(dem, best)
    dcell, delev, dshare = _most_credited_deaths(result.log, ids, dem.shape[0] * dem.shape[1])
    dx, dy = _xy(dem, dcell)
    d = _DEATH[job.kind]
    data = {"feature_id": ids, **cols, "x": bx, "y": by,
            "elevation": dem.values_at(best),
            f"{d}_x": dx, f"{d}_y": dy, f"{d}_elevation": delev + (job.reference or 0.0),
            f"{d}_share": dshare,
            **_unperturbed(dem, job, ids), "region_area_m2": _areas(dem, labels, ids)}
    if job.kind == "depressions":
        data.update(_pond_columns(result, ids))
    return data


def _groups(result, ids: np.ndarray, given: np.ndarray, split: np.ndarray,
            p: np.ndarray) -> np.ndarray:
    """Each row's group (:func:`terrain.summary.ranks.group_ids`): rows that trade a
    rank, or share a top or floor within the error (one's key col or spill
    point on the DEM as given touches the other's region, and each takes the
    other's role in some realisations: :func:`terrain.summary.ranks.shared_tops`)."""
    dem, reg = result.dem, result.job.regions
    pairs = shared_tops(reg.labels, reg.death[ids - 1], dem.shape, ids, given, split,
                        grid_values_at)
    return group_ids(ids, p, pairs)


def _clusters(fm: FigureMatrix, rows: np.ndarray, bimodal: np.ndarray,
              split: np.ndarray) -> pd.DataFrame:
    """For each row whose figure is bimodal: the share of realisations in its
    lower and upper cluster and each cluster's 5-95% range (index ``feature_id``)."""
    f = fm.figure[:, rows]
    out = {c: [] for c in ("split", "low_share", "low_p05", "low_p95", "high_share",
                           "high_p05", "high_p95")}
    for j in np.flatnonzero(bimodal):
        out["split"].append(split[j])
        for side, values in (("low", f[f[:, j] < split[j], j]), ("high", f[f[:, j] > split[j], j])):
            out[f"{side}_share"].append(values.size / f.shape[0])
            lo, hi = np.percentile(values, [5, 95])
            out[f"{side}_p05"].append(lo)
            out[f"{side}_p95"].append(hi)
    return pd.DataFrame(out, index=pd.Index(fm.ids[rows][bimodal], name="feature_id"))


def summarise_features(result) -> FeatureSummary:
    """The features of a peaks or depressions run (see the module docstring)."""
    *_, whole = summary_steps(result)
    return whole


def summary_steps(result) -> Iterator[FeatureSummary]:
    """:func:`summarise_features` in two steps, so that a map can be drawn from
    the first while the second is made.

    Yields
    ------
    FeatureSummary
        First what the figures draw: the table (by rank) without the relation
        columns, ``frames`` holding only the top polygons (the ``summits`` /
        ``pits`` layer), no ``links``; every other field (``ranks``,
        ``rank_share``, ``clusters``, ``top``) is whole. Then the whole
        summary: the relation columns, the regions' polygons (the costliest
        part), the points and key cols / spill points, the rank and link
        layers, and the links. The generator keeps nothing of its
        temporaries once the whole summary is made.
    """
    dem, job = result.dem, result.job
    # one pass over the log (a sort of every pair) serves the figures and the tops
    figures = region_figures(result.log, with_birth=job.kind == "peaks")
    fm = figure_matrix(result.log, result.n, figures)
    ranks = fm.ranks()
    p, none = rank_distribution(ranks, min(RANKS, fm.ids.size))
    p_above = fm.present.mean(axis=0) if result.n else np.zeros(fm.ids.size)
    rows = np.flatnonzero((p_above >= job.min_presence) | (p.sum(axis=1) > 0))
    data = _table(result, fm, rows, ranks)
    ids = data["feature_id"]
    bimodal, split = two_clusters(fm.figure[:, rows])
    data["bimodal"] = bimodal
    data["group"] = _groups(result, ids, data["unperturbed"], split, p[rows])
    order = display_order(data["median_rank"].to_numpy(np.float64, na_value=np.nan),
                          data["expected"], ids, data["group"])
    data["rank"] = np.empty(ids.size, np.int64)
    data["rank"][order] = np.arange(1, ids.size + 1)
    share = dict(zip(ids.tolist(), data.pop(f"{_DEATH[job.kind]}_share")))
    if job.kind == "peaks":
        top = _top_cells(figures[4], job.regions.labels, ids, dem.shape)
        data["top_area_m2"] = _areas(dem, top, ids)
    else:
        top = PondedTop(result, job.regions.labels, ids)

    def by_rank(data: dict) -> pd.DataFrame:
        return pd.DataFrame(data, columns=[c for c in COLUMNS[job.kind] if c in data]).sort_values(
            "rank", kind="stable").reset_index(drop=True)

    table = by_rank(data)
    settings = {"merge_level": job.merge_level, "min_presence": job.min_presence,
                "top_share": TOP_SHARE if job.kind == "peaks" else None,
                "ponded_share": PONDED_SHARE if job.kind == "depressions" else None,
                "regions": len(job.regions), "features": len(table)}
    tops, fallback = _top_polygons(dem, job, table, top)
    if job.kind == "depressions":
        table["extent_is_pit_cell"] = fallback
    long = rank_table(fm.ids, p, none, result.n)
    ranked, clusters = _rank_share(fm, p, table), _clusters(fm, rows, bimodal, split)
    yield FeatureSummary(job.regions, table, _frames(dem, job, table, tops, None), top, settings,
                         ranked, long, clusters)

    rel_columns, links = relations_of(result, ids)  # relations (terrain.summary.relations)
    if rel_columns:
        data.update(rel_columns)
        table = by_rank(data)
        if job.kind == "depressions":
            table["extent_is_pit_cell"] = fallback
    frames = _frames(dem, job, table, tops, table["feature_id"].map(share).to_numpy(float))
    frames[RANK_LAYER] = _attribute_table(long)
    if links is not None:  # relations
        frames[LINK_TABLE[job.kind]] = link_frame(dem, job.regions, links, job.kind)
    summary = FeatureSummary(job.regions, table, frames, top, settings, ranked, long, clusters,
                             None if links is None else links.drop(columns="death"))
    # a paused generator keeps its locals: let go of the pair log's figures, the
    # figure matrix and the columns before the tables and figures are written
    del figures, fm, ranks, p, none, data, rel_columns, links, share, tops, rows, bimodal, split
    release_freed_memory()
    yield summary


def _rank_share(fm: FigureMatrix, p: np.ndarray, table: pd.DataFrame) -> pd.DataFrame:
    """P(rank = k) of the table's rows (``p``: :func:`rank_distribution` of
    every region in ``fm``), by ``feature_id`` in table order and rank k =
    1.. (at least one column)."""
    kmax = max(p.shape[1], 1)
    ids = table["feature_id"].to_numpy()
    values = np.pad(p, ((0, 0), (0, kmax - p.shape[1])))[np.searchsorted(fm.ids, ids)] \
        if fm.ids.size else np.zeros((len(table), kmax))
    return pd.DataFrame(values, index=pd.Index(ids, name="feature_id"),
                        columns=range(1, kmax + 1))


def _attribute_table(frame: pd.DataFrame):
    """A GeoPackage table without geometry (``gpkg_contents.data_type`` attributes)."""
    import geopandas as gpd

    return gpd.GeoDataFrame(frame)


def rank_shares(fm: FigureMatrix, ids: np.ndarray, kmax: int = RANKS) -> pd.DataFrame:
    """P(rank = k) of each region in ``ids`` for k = 1..``kmax``: the share of
    realisations in which the region is counted and exactly k - 1 counted
    regions have a larger figure or an equal one and a smaller id
    (:meth:`FigureMatrix.ranks`).

    Returns
    -------
    pandas.DataFrame
        Index ``feature_id`` (in the order of ``ids``), columns 1..kmax.
    """
    ids = np.asarray(ids, np.int64)
    out = np.zeros((ids.size, kmax))
    if ids.size and fm.figure.shape[0]:
        cols = np.searchsorted(fm.ids, ids)
        out = rank_distribution(fm.ranks()[:, cols], kmax)[0]
    return pd.DataFrame(out, index=pd.Index(ids, name="feature_id"), columns=range(1, kmax + 1))


def region_polygons(dem: Dem, labels, ids, *, connectivity: int = 8) -> list:
    """Shapely (multi)polygons of the cells labelled with each of ``ids``, in CRS
    coordinates; ``labels`` is an array or anything read by window
    (``labels[r0:r1, c0:c1]``), traced window by window, joined and made valid
    (None for an id without cells)."""
    from rasterio.features import shapes
    from rasterio.transform import Affine
    from shapely.ops import unary_union

    ids = list(ids)
    where = {int(i): k for k, i in enumerate(ids)}
    parts: list[list] = [[] for _ in ids]
    t = Affine(*dem.transform)
    for r0, r1, c0, c1 in layer_windows(dem.shape):
        lab = np.asarray(labels[r0:r1, c0:c1]).astype(np.int32)
        mask = np.isin(lab, ids) & (lab > 0)
        if not mask.any():
            continue
        traced = shapes(lab, mask=mask, connectivity=connectivity,
                        transform=t * Affine.translation(c0, r0))
        while batch := list(itertools.islice(traced, POLYGON_BATCH)):
            for polygon, (_, value) in zip(_polygons([g for g, _ in batch]), batch):
                parts[where[int(value)]].append(polygon)
        release_freed_memory()  # the window's traced rings, before the next window's
    return [_valid(unary_union(p)) if p else None for p in parts]


#: traced polygons made into shapely ones at a time (their coordinate lists, ~100
#: bytes a vertex, are held until then)
POLYGON_BATCH = 4096


def _polygons(traced: list) -> np.ndarray:
    """Shapely polygons of GeoJSON-like polygons (rings of coordinate lists),
    made in bulk: the coordinates of the rings as one array, then every ring
    and polygon at once (the same coordinates as ``shapely.geometry.shape``
    of each, a third of the time)."""
    import shapely

    rings, owner = [], []
    for k, geom in enumerate(traced):
        for ring in geom["coordinates"]:
            rings.append(np.asarray(ring, dtype=np.float64))
            owner.append(k)
    if not rings:
        return np.empty(0, dtype=object)
    sizes = np.fromiter((r.shape[0] for r in rings), np.int64, len(rings))
    ring_geoms = shapely.linearrings(np.concatenate(rings),
                                     indices=np.repeat(np.arange(len(rings)), sizes))
    return shapely.polygons(ring_geoms, indices=np.asarray(owner))


def _valid(geom):
    """``geom`` made valid (OGC simple features): cells of an 8-connected region that
    touch only at a corner trace a ring that touches itself, which GEOS calls a
    self-intersection; such a ring is split at the corner into polygons that touch
    there. Only polygonal parts are kept."""
    import shapely
    from shapely.geometry import MultiPolygon

    if geom.is_valid:
        return geom
    fixed = shapely.make_valid(geom)
    parts = [g for g in getattr(fixed, "geoms", [fixed]) if g.geom_type in ("Polygon",
                                                                          "MultiPolygon")]
    flat = [q for g in parts for q in getattr(g, "geoms", [g])]
    return flat[0] if len(flat) == 1 else MultiPolygon(flat)


def _top_polygons(dem: Dem, job, table: pd.DataFrame, top) -> tuple[list, np.ndarray]:
    """The ``summits`` / ``pits`` polygons of the table's rows, and where each one
    fell back to its most credited summit or pit cell (a one-cell square)
    because the top or ponded extent is empty: a depression that holds water
    at least the cut-off deep in fewer than half the realisations. (A summit's
    top is never empty: every row was counted, so its summit was somewhere.)"""
    from rasterio.transform import Affine
    from shapely.geometry import Polygon

    polys = region_polygons(dem, top, table["feature_id"].to_numpy(),
                            connectivity=job.connectivity)
    fallback = np.array([g is None or g.is_empty for g in polys], bool)
    t = Affine(*dem.transform)
    for i in np.flatnonzero(fallback):
        col, row = (math.floor(v) for v in ~t * (table["x"].iat[i], table["y"].iat[i]))
        polys[i] = Polygon([t * (col, row), t * (col + 1, row), t * (col + 1, row + 1),
                            t * (col, row + 1)])
    return polys, fallback


def _frames(dem: Dem, job, table: pd.DataFrame, tops: list, share: np.ndarray) -> dict:
    """The GeoPackage layers (:data:`LAYER_NAMES`): the polygons (``tops``, from
    :func:`_top_polygons`) and the points of the table's rows, and a point
    layer of each feature's most credited key col / spill point (``share``: its
    share of the feature's col / spill credit); only the polygons when
    ``share`` is None."""
    import geopandas as gpd
    from shapely.geometry import Point

    top_name, point_name, region_name, death_name = LAYER_NAMES[job.kind]
    if share is None:
        return {top_name: gpd.GeoDataFrame(table, geometry=tops, crs=dem.crs)}
    ids = table["feature_id"].to_numpy()
    whole = region_polygons(dem, job.regions.labels, ids, connectivity=job.connectivity)
    points = [Point(x, y) for x, y in zip(table["x"], table["y"])]
    d = _DEATH[job.kind]
    has = (np.isfinite(table[f"{d}_x"]) & np.isfinite(share)).to_numpy()
    deaths = pd.DataFrame({"feature_id": ids[has], "rank": table["rank"].to_numpy()[has],
                           f"{d}_share": share[has],
                           f"{d}_elevation": table[f"{d}_elevation"].to_numpy()[has]})
    at = [Point(x, y) for x, y in zip(table[f"{d}_x"][has], table[f"{d}_y"][has])]
    return {top_name: gpd.GeoDataFrame(table, geometry=tops, crs=dem.crs),
            point_name: gpd.GeoDataFrame(table, geometry=points, crs=dem.crs),
            region_name: gpd.GeoDataFrame(table, geometry=whole, crs=dem.crs),
            death_name: gpd.GeoDataFrame(deaths, geometry=at, crs=dem.crs)}
