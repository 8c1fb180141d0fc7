"""Who is whose parent, where each depression spills, and how isolated each summit is.

Read from a finished peaks or depressions run's pair log
(:data:`terrain.jobs.relations.RELATION_FIELDS`). A feature's pair in a
realisation is the pair :mod:`terrain.summary.features` counts for it (the
largest figure born in its region); its relation in that realisation is
that pair's:

* **parent** (peaks): the feature holding the highest summit of the
  component its key col joins (the elder component at the col, by the
  elder rule of persistence); the highest summit of a realisation has none.
* **spills into** (depressions): the feature holding the deepest pit of the
  component across its spill point, or off the raster (over its edge or
  into nodata; not told apart).
* **isolation** (peaks): metres from the summit cell to the nearest higher
  cell. *Edge-limited* when higher ground could lie nearer beyond the raster
  edge or under nodata. The highest summit has no higher cell on the
  raster: on the DEM as given its ``isolation_m`` is the distance to the
  nearest cell beyond the edge or nodata (a lower bound of what a larger
  extent would give), flagged ``unperturbed_isolation_edge_limited``; in a
  realisation where it is the highest it has no isolation, so the mean and
  5-95% range are over the realisations in which higher ground lies on the
  raster (the share in which it is the highest is its ``parents`` row with
  an empty ``parent_id``), NaN when there are none.

Shares are over the realisations counting the feature (``n_f``); their
Monte Carlo standard error is sqrt(p(1 - p) / n_f). The 5-95% range of the
isolation is the spread the DEM error causes, its ``*_se`` the precision of
the mean; the two are never mixed. Codes in the id columns:
:data:`~terrain.jobs.relations.OFF_RASTER` (-1) off the raster, 0 ground in
no region of the DEM as given; a summit with no parent has an empty
``parent_id`` (the share of realisations in which it is the highest summit
is the ``parents`` row with an empty ``parent_id``).

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..jobs.credit import log_weights
from ..jobs.relations import NO_RELATION

__all__ = ["RELATION_COLUMNS", "RELATION_COLUMN_KINDS", "LINK_COLUMNS", "LINK_COLUMN_KINDS",
           "LINK_TABLE", "LINK_CSV", "feature_relations", "relation_columns", "relation_links",
           "link_frame", "relations_of"]

RELATION_COLUMNS = {
    "peaks": ("parent_id", "parent_share", "parent_share_se", "unperturbed_parent_id",
              "isolation_m", "isolation_mean_m", "isolation_mean_se_m", "isolation_p05_m",
              "isolation_p95_m", "isolation_edge_limited_share", "unperturbed_isolation_edge_limited"),
    "depressions": ("spills_into_id", "spills_into_share", "spills_into_share_se",
                    "unperturbed_spills_into_id"),
}
RELATION_COLUMN_KINDS = {
    "parent_id": "id", "parent_share": "probability", "parent_share_se": "probability",
    "unperturbed_parent_id": "id", "isolation_m": "distance", "isolation_mean_m": "distance",
    "isolation_mean_se_m": "distance", "isolation_p05_m": "distance",
    "isolation_p95_m": "distance", "isolation_edge_limited_share": "probability",
    "unperturbed_isolation_edge_limited": "flag",
    "spills_into_id": "id", "spills_into_share": "probability",
    "spills_into_share_se": "probability", "unperturbed_spills_into_id": "id",
}
#: The long table of each kind (``parents.csv`` / the ``spill_links`` layer and ``spills.csv``).
LINK_TABLE = {"peaks": "parents", "depressions": "spill_links"}
LINK_CSV = {"peaks": "parents.csv", "depressions": "spills.csv"}
_TARGET = {"peaks": "parent_id", "depressions": "spills_into_id"}
LINK_COLUMNS = {k: ("feature_id", t, "share", "share_se", "unperturbed")
                for k, t in _TARGET.items()}
LINK_COLUMN_KINDS = {"feature_id": "id", "parent_id": "id", "spills_into_id": "id",
                     "share": "probability", "share_se": "probability", "unperturbed": "flag",
                     "spill_x": "coordinate", "spill_y": "coordinate"}


def feature_relations(log: dict) -> dict:
    """Per (realisation, region) with a counted pair, the relations of the pair
    the features table counts (the largest figure born in the region; as
    :func:`terrain.jobs.credit.region_figures`): arrays ``real``, ``region``,
    ``target`` (elder region code), ``death`` (its key col / spill point),
    ``isolation`` and ``isolation_edge``, sorted by realisation, then region."""
    inside = log["region"] > 0
    real = log["real"][inside].astype(np.int64)
    reg = log["region"][inside].astype(np.int64)
    fig = log_weights({k: log[k][inside] for k in ("birth", "birth_value", "death_value")})
    order = np.lexsort((fig, reg, real))
    last = np.ones(order.size, bool)
    last[:-1] = (real[order][1:] != real[order][:-1]) | (reg[order][1:] != reg[order][:-1])
    pick = order[last]
    return {"real": real[pick], "region": reg[pick],
            "target": log["elder_region"][inside][pick].astype(np.int64),
            "death": log["death"][inside][pick].astype(np.int64),
            "isolation": log["isolation"][inside][pick].astype(np.float64),
            "isolation_edge": log["isolation_edge"][inside][pick]}


def _counts(rel: dict, ids: np.ndarray):
    """Per feature in ``ids``: realisations counting it, and the (feature,
    target) pairs with their counts and each counted entry's pair index."""
    row = np.searchsorted(ids, rel["region"])
    ok = (row < ids.size) & (ids[np.minimum(row, ids.size - 1)] == rel["region"]) if ids.size \
        else np.zeros(rel["region"].size, bool)
    n_f = np.bincount(row[ok], minlength=ids.size)
    pairs, cnt, pair = _unique_pairs(row[ok], rel["target"][ok])
    return row, ok, n_f, pairs, cnt, pair


def _unique_pairs(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``np.unique(np.stack([a, b]), axis=1, return_counts=True, return_inverse=True)``
    for two integer arrays, as one sort of int64 keys (``a`` major, ``b`` minor)
    instead of a sort of (a, b) records: the same pairs in the same (lexicographic)
    order, their counts and each element's pair index."""
    a, b = np.asarray(a, np.int64), np.asarray(b, np.int64)
    if a.size == 0:
        return np.zeros((2, 0), np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64)
    a0, b0 = int(a.min()), int(b.min())
    span = int(b.max()) - b0 + 1
    if (int(a.max()) - a0 + 1) * span >= 2**62:  # keys would not fit: records, as before
        pairs, inv, cnt = np.unique(np.stack([a, b]), axis=1, return_inverse=True,
                                    return_counts=True)
        return pairs, cnt, inv.reshape(-1)
    keys, inv, cnt = np.unique((a - a0) * span + (b - b0), return_inverse=True,
                               return_counts=True)
    return np.stack([keys // span + a0, keys % span + b0]), cnt, inv.reshape(-1)


def _modal_deaths(pair: np.ndarray, death: np.ndarray) -> np.ndarray:
    """Per (row, target) pair (``pair``: each entry's index among the pairs in the
    lexicographic order of ``np.unique``, as :func:`_counts` gives it), its most
    frequent death cell (the smallest of those tied): one sort of the log's
    (pair, death) keys, not one pass over the log per link."""
    trip, c, _ = _unique_pairs(pair, death)  # (pair, death) in order, with counts
    order = np.lexsort((trip[1], -c, trip[0]))  # per pair: most frequent, then smallest death
    trip = trip[:, order]
    first = np.ones(trip.shape[1], bool)
    first[1:] = trip[0, 1:] != trip[0, :-1]
    return trip[1, first]


def relation_links(rel: dict, ids: np.ndarray, kind: str, given) -> pd.DataFrame:
    """The long table: per feature of ``ids`` and target, the share of the
    realisations counting the feature in which the feature merges into it
    (``share``, ``share_se``), and whether it is the target on the DEM as given;
    with the most frequent key col / spill point of those realisations
    (``death``, a flat cell), by feature id then share."""
    ids = np.sort(np.asarray(ids, np.int64))
    row, ok, n_f, pairs, cnt, pair = _counts(rel, ids)
    share = cnt / np.maximum(n_f[pairs[0]], 1)
    target = pairs[1]
    on_dem = given.target[ids[pairs[0]] - 1] == target
    death = _modal_deaths(pair, rel["death"][ok])
    t = pd.array(np.where(target == NO_RELATION, 0, target), dtype="Int64")
    t[target == NO_RELATION] = pd.NA
    out = pd.DataFrame({"feature_id": ids[pairs[0]], _TARGET[kind]: t, "share": share,
                        "share_se": np.sqrt(share * (1 - share) / np.maximum(n_f[pairs[0]], 1)),
                        "unperturbed": on_dem, "death": death})
    return out.sort_values(["feature_id", "share"], ascending=[True, False],
                           kind="stable").reset_index(drop=True)


def _as_ids(codes: np.ndarray) -> pd.arrays.IntegerArray:
    out = pd.array(np.where(codes == NO_RELATION, 0, codes), dtype="Int64")
    out[codes == NO_RELATION] = pd.NA
    return out


def relation_columns(rel: dict, links: pd.DataFrame, ids: np.ndarray, kind: str, given) -> dict:
    """The relation columns (:data:`RELATION_COLUMNS`) of the features ``ids``
    (in that order): the most frequent target other than "none" with its share
    and standard error, the target on the DEM as given, and for peaks the
    isolation on the DEM, its mean (with standard error) and 5-95% range over
    the realisations counting the feature, and the edge-limited share."""
    ids = np.asarray(ids, np.int64)
    tcol = _TARGET[kind]
    real = links[links[tcol].notna()]
    best = real.drop_duplicates("feature_id", keep="first").set_index("feature_id")
    at = best.reindex(ids)
    prefix = "parent" if kind == "peaks" else "spills_into"
    out = {f"{prefix}_id": pd.array(at[tcol].to_numpy(), dtype="Int64"),
           f"{prefix}_share": at["share"].fillna(0.0).to_numpy(float),
           f"{prefix}_share_se": at["share_se"].fillna(0.0).to_numpy(float),
           f"unperturbed_{prefix}_id": _as_ids(given.target[ids - 1].astype(np.int64))}
    if kind == "peaks":
        out.update(_isolation_columns(rel, ids, given))
    return out


def _isolation_columns(rel: dict, ids: np.ndarray, given) -> dict:
    k = ids.size
    mean, se, p05, p95, edge = (np.full(k, np.nan) for _ in range(5))
    order = np.argsort(rel["region"], kind="stable")
    reg = rel["region"][order]
    for j, f in enumerate(ids):
        lo, hi = np.searchsorted(reg, f), np.searchsorted(reg, f, "right")
        if hi > lo:
            edge[j] = rel["isolation_edge"][order[lo:hi]].mean()
        d = rel["isolation"][order[lo:hi]]
        d = d[np.isfinite(d)]  # realisations with higher ground on the raster
        if d.size:
            mean[j] = d.mean()
            se[j] = d.std() / np.sqrt(d.size)
            p05[j], p95[j] = np.percentile(d, [5, 95])
    return {"isolation_m": given.isolation_m[ids - 1], "isolation_mean_m": mean,
            "isolation_mean_se_m": se, "isolation_p05_m": p05, "isolation_p95_m": p95,
            "isolation_edge_limited_share": edge,
            "unperturbed_isolation_edge_limited": given.isolation_edge[ids - 1].astype(bool)}


def link_frame(dem, regions, links: pd.DataFrame, kind: str):
    """The GeoPackage layer of the long table: ``parents`` (peaks) is a table
    without geometry; ``spill_links`` (depressions) draws each link as a line
    from the feature's pit on the DEM as given to the link's most frequent
    spill point and on to the receiving feature's pit (ending at the spill
    point when the water leaves the raster or reaches no feature), with the
    spill point's coordinates as attributes."""
    import geopandas as gpd
    from shapely.geometry import LineString

    frame = links.drop(columns="death")
    if kind == "peaks":
        return gpd.GeoDataFrame(frame)
    pit = np.asarray(regions.birth, np.int64)
    src = pit[links["feature_id"].to_numpy(np.int64) - 1]
    tgt = links["spills_into_id"].to_numpy(dtype=np.float64, na_value=0).astype(np.int64)
    far = np.where(tgt > 0, pit[np.maximum(tgt, 1) - 1], -1)
    sx, sy = dem.xy(src)
    dx, dy = dem.xy(links["death"].to_numpy(np.int64))
    fx, fy = dem.xy(np.maximum(far, 0))
    lines = [LineString([(a, b), (c, d)] + ([(e, f)] if t >= 0 else []))
             for a, b, c, d, e, f, t in zip(sx, sy, dx, dy, fx, fy, far)]
    frame = frame.assign(spill_x=dx, spill_y=dy)
    return gpd.GeoDataFrame(frame, geometry=lines, crs=dem.crs)


def relations_of(result, ids: np.ndarray) -> tuple[dict, pd.DataFrame | None]:
    """The relation columns of the features ``ids`` and the long table of a
    run (empty columns and None when the run's log carries no relations)."""
    job = result.job
    if job.given is None or "elder_region" not in result.log:
        return {}, None
    rel = feature_relations(result.log)
    links = relation_links(rel, ids, job.kind, job.given)
    return relation_columns(rel, links, ids, job.kind, job.given), links
