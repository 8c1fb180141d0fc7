"""Ranks as distributions, figures that split in two, and groups of competing features.

A feature's rank differs from one realisation to the next, and where two
features trade a role (the twin tops of a flat summit, each the highest in
some realisations) its figure falls into two clusters: a mean of either is a
number no realisation produced. This module describes them whole, as pure
functions on the per-realisation figures of :class:`FigureMatrix`-like arrays
(rows: realisations, columns: regions):

- :func:`ordinal_ranks`: each region's place among the regions counted in a
  realisation (1 = the largest figure; ties by region id, as ``p_first``
  breaks them), 0 where it is not counted; so every rank up to the number
  of counted regions is held by exactly one region;
- :func:`rank_distribution`: P(rank = k) with its Monte Carlo standard error,
  and :func:`rank_table` the long form written to ``ranks.csv``, in which
  the regions listed for each k carry its whole probability (id 0: fewer
  than k regions counted);
- :func:`median_ranks`, :func:`top_shares`: summaries that a bimodal rank
  does not break (the median is a rank some realisation produced);
- :func:`two_clusters`: whether a figure splits into two clusters of
  outcomes (then its mean lies between them);
- :func:`group_ids`: features that trade a rank or share a top or floor
  within the error, one id per group;
- :func:`ranked_rows`: the rows a ranking shows, selected by rank
  probability, never by a mean.

References
----------
.. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
   Analysis. Chapman & Hall, section 3.4.2 (the rule-of-thumb bandwidth
   0.9 min(sd, IQR / 1.34) n^(-1/5); here from the IQR alone, which a
   second cluster does not inflate).
.. [2] Tarjan, R. E. (1975). Efficiency of a good but not linear set union
   algorithm. J. ACM 22(2) (union-find, for the groups).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

__all__ = ["RANKS", "RANK_MASS", "TRADE_SHARE", "TRADE_JOINT", "CLUSTER_SHARE", "CLUSTER_GAP",
           "RANK_COLUMNS", "RANK_COLUMN_KINDS", "ordinal_ranks", "rank_distribution",
           "rank_table", "median_ranks", "top_shares", "expected_ranks", "two_clusters",
           "shared_tops", "group_ids", "display_order", "ordinal", "ranked_rows", "traded_place"]

RANKS = 10  # ranks 1..RANKS are described in full (fewer when fewer regions are counted)
RANK_MASS = 0.01  # a feature is shown when it holds some rank <= RANKS this often
TRADE_SHARE = 0.05  # two features trade a rank when both hold it at least this often
TRADE_JOINT = 0.5  # ... and together hold it in at least this share of realisations
CLUSTER_SHARE = 0.05  # each cluster of a bimodal figure holds at least this share
CLUSTER_GAP = 3.0  # ... and the empty gap between them is this many times their bandwidths

RANK_COLUMNS = ("feature_id", "rank", "p_rank", "p_rank_se")
#: What each column of ``ranks.csv`` is (its precision, see :mod:`terrain.outputs.tables`).
RANK_COLUMN_KINDS = {"feature_id": "id", "rank": "integer", "p_rank": "probability",
                     "p_rank_se": "probability"}


def ordinal_ranks(figure: np.ndarray, present: np.ndarray) -> np.ndarray:
    """Per realisation (row) and region (column, in id order): 1 + the number
    of counted regions with a larger figure or an equal figure and a smaller
    id; 0 where the region is not counted.

    Examples
    --------
    >>> ordinal_ranks(np.array([[5.0, 9.0, 5.0], [0.0, 2.0, 3.0]]),
    ...               np.array([[True, True, True], [False, True, True]]))
    array([[2, 1, 3],
           [0, 2, 1]], dtype=int32)
    """
    out = np.zeros(figure.shape, np.int32)
    if not figure.size:
        return out
    key = np.where(present, -np.asarray(figure, np.float64), np.inf)
    order = np.argsort(key, axis=1, kind="stable")  # stable: ties keep id order
    np.put_along_axis(out, order, np.arange(1, figure.shape[1] + 1, dtype=np.int32)[None, :],
                      axis=1)
    return np.where(present, out, 0).astype(np.int32)


def rank_distribution(ranks: np.ndarray, kmax: int) -> tuple[np.ndarray, np.ndarray]:
    """P(rank = k) for k = 1..``kmax`` per region (columns of ``ranks``), and the
    share of realisations in which fewer than k regions were counted.

    Returns
    -------
    p : (regions, kmax) float64
    none : (kmax,) float64
        So that ``p.sum(axis=0) + none == 1`` for every k (when there are realisations).
    """
    n = ranks.shape[0]
    p = np.zeros((ranks.shape[1], kmax))
    for k in range(1, kmax + 1):
        p[:, k - 1] = (ranks == k).sum(axis=0) / max(n, 1)
    none = np.clip(1.0 - p.sum(axis=0), 0.0, 1.0) if n else np.zeros(kmax)
    return p, none


def rank_table(ids: np.ndarray, p: np.ndarray, none: np.ndarray, n: int) -> pd.DataFrame:
    """The long form of a rank distribution (``ranks.csv``): one row per rank k and
    region that held it in some realisation, with P(rank = k) and its Monte
    Carlo standard error sqrt(p (1 - p) / N); id 0 holds the share of
    realisations in which fewer than k regions were counted. Rows by rank,
    then by probability (largest first), then id."""
    ids = np.asarray(ids, np.int64)
    kmax = p.shape[1]
    fid = np.concatenate([np.repeat(ids, kmax), np.zeros(kmax, np.int64)])
    rank = np.concatenate([np.tile(np.arange(1, kmax + 1), ids.size), np.arange(1, kmax + 1)])
    share = np.concatenate([p.reshape(-1), none])
    keep = share > 0
    fid, rank, share = fid[keep], rank[keep], share[keep]
    order = np.lexsort((fid, -share, rank))
    share = share[order]
    return pd.DataFrame({"feature_id": fid[order], "rank": rank[order], "p_rank": share,
                         "p_rank_se": np.sqrt(share * (1 - share) / max(n, 1))},
                        columns=list(RANK_COLUMNS))


def median_ranks(ranks: np.ndarray) -> np.ndarray:
    """The lower median of each region's rank over realisations (a rank some
    realisation produced): the smallest k with P(rank <= k) >= 1/2, a region
    not counted ranking below every counted one; NaN when the region is
    counted in fewer than half the realisations."""
    n = ranks.shape[0]
    if n == 0:
        return np.full(ranks.shape[1], np.nan)
    r = np.where(ranks > 0, ranks, np.iinfo(np.int32).max)
    mid = np.partition(r, (n + 1) // 2 - 1, axis=0)[(n + 1) // 2 - 1]
    return np.where(mid == np.iinfo(np.int32).max, np.nan, mid.astype(np.float64))


def top_shares(ranks: np.ndarray, k: int) -> np.ndarray:
    """P(rank <= k): the share of realisations in which the region is counted
    and holds one of the first k ranks."""
    return ((ranks > 0) & (ranks <= k)).sum(axis=0) / max(ranks.shape[0], 1)


def expected_ranks(ranks: np.ndarray) -> np.ndarray:
    """The mean rank over realisations, a region not counted taking 1 + the
    number of regions counted in that realisation (a mean: misleading where the
    rank is bimodal; see :func:`median_ranks`)."""
    if ranks.shape[0] == 0:
        return np.zeros(ranks.shape[1])
    below = 1 + (ranks > 0).sum(axis=1, keepdims=True)
    return np.where(ranks > 0, ranks, below).mean(axis=0)


def _quantile_of_runs(v: np.ndarray, start: np.ndarray, length: np.ndarray, q: float):
    """Linear-interpolation quantile ``q`` of the sorted runs ``v[start:start + length]``
    (one run per row of ``start``/``length``, every column of ``v``)."""
    pos = start + q * (length - 1)
    lo = np.floor(pos).astype(np.int64)
    hi = np.minimum(lo + 1, start + length - 1)
    frac = (pos - lo)[:, None]
    return v[lo] + frac * (v[hi] - v[lo])


def _bandwidth(v: np.ndarray, start: np.ndarray, length: np.ndarray) -> np.ndarray:
    """Silverman's rule-of-thumb bandwidth, from the interquartile range, of each run
    ``v[start:start + length]``: 0.9 (IQR / 1.34) length^(-1/5)."""
    iqr = (_quantile_of_runs(v, start, length, 0.75)
           - _quantile_of_runs(v, start, length, 0.25))
    return 0.9 * iqr / 1.34 * (length[:, None] ** -0.2)


def two_clusters(figure: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Whether each column (a region's figure over realisations, 0 where not
    counted) falls into two clusters of outcomes, and where they part.

    Sorted, the values are split at every place leaving at least
    :data:`CLUSTER_SHARE` of the realisations (and two) on each side; a column
    is bimodal when at some split the empty interval between the two sides is
    wider than :data:`CLUSTER_GAP` times the sum of the two sides' kernel
    density bandwidths (Silverman's rule of thumb from each side's
    interquartile range), so that a density estimate of either side is
    nearly zero across it: the 5-95% range then spans two clusters, and the
    mean lies between outcomes. Flats at one value (a figure of 0 where the
    feature is not counted) are a cluster of their own. The widest such
    interval is where they part. Unimodal samples (normal, uniform,
    exponential) of 50 or more realisations are flagged in well under 1% of
    cases; two normal clusters 8 standard deviations apart, or a cluster
    above the cut-off beside the realisations that do not count the feature,
    in most (tested in ``tests/test_ranks.py``).

    Returns
    -------
    bimodal : (regions,) bool
    split : (regions,) float64
        The middle of that interval (NaN where not bimodal).

    Examples
    --------
    >>> f = np.array([[0.0, 5.0], [0.0, 5.2], [560.0, 5.1], [561.0, 4.9], [559.0, 5.3]])
    >>> two_clusters(f)[0]
    array([ True, False])
    """
    n, k = figure.shape
    bimodal, split = np.zeros(k, bool), np.full(k, np.nan)
    m = max(2, math.ceil(CLUSTER_SHARE * n - 1e-9))
    if n < 2 * m or k == 0:
        return bimodal, split
    step = max(1, (1 << 21) // n)  # columns at a time: a few arrays of 2^21 values
    for c0 in range(0, k, step):
        bimodal[c0:c0 + step], split[c0:c0 + step] = _split(figure[:, c0:c0 + step], m)
    return bimodal, split


def _split(figure: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`two_clusters` of a few columns (``m``: the fewest values on a side)."""
    n, k = figure.shape
    v = np.sort(np.asarray(figure, np.float64), axis=0)
    s = np.arange(m, n - m + 1)  # the low side holds v[:s], the high side v[s:]
    width = _bandwidth(v, np.zeros_like(s), s) + _bandwidth(v, s, n - s)
    gap = v[s] - v[s - 1]
    ok = (gap > CLUSTER_GAP * width) & (gap > 0)
    bimodal = ok.any(axis=0)
    best = np.argmax(np.where(ok, gap, -1.0), axis=0)
    cols = np.arange(k)
    mid = (v[s[best], cols] + v[s[best] - 1, cols]) / 2
    return bimodal, np.where(bimodal, mid, np.nan)


def shared_tops(labels, cells: np.ndarray, shape: tuple[int, int], ids: np.ndarray,
                given: np.ndarray, split: np.ndarray, values_at) -> list[tuple[int, int]]:
    """Pairs of features (row indices) that share a top, or a floor, within the error.

    A pair is a candidate when one feature's key col or spill point on the DEM
    as given (flat cell ``cells[j]``, -1 for none) touches the other's region
    (8 neighbours of the cell, in ``labels``). It shares a top when each takes
    the other's role in some realisations: both figures fall into two clusters
    (``split``: where they part, from :func:`two_clusters`; NaN when not
    bimodal) and both parting lines lie between the two figures on the DEM as
    given (``given``). So twin crowns on one flat top, whichever the error
    makes higher, are a pair; neighbours whose figures merely overlap, or that
    the error never swaps, are not. ``values_at(labels, flat_cells, columns)``
    reads labels at flat cells (an array or a grid read by window).
    """
    ids = np.asarray(ids, np.int64)
    nr, nc = shape
    has = np.flatnonzero((np.asarray(cells) >= 0) & np.isfinite(split))
    if not has.size:
        return []
    r, c = np.divmod(np.asarray(cells)[has], nc)
    dr, dc = np.meshgrid([-1, 0, 1], [-1, 0, 1], indexing="ij")
    rr, cc = r[:, None] + dr.reshape(1, -1), c[:, None] + dc.reshape(1, -1)
    inside = (rr >= 0) & (rr < nr) & (cc >= 0) & (cc < nc)
    lab = np.zeros(rr.shape, np.int64)
    lab[inside] = values_at(labels, (rr * nc + cc)[inside], nc)
    where = {int(v): i for i, v in enumerate(ids)}
    pairs = set()
    for j, row in zip(has, lab):
        for other in set(row.tolist()) - {0, int(ids[j])}:
            i = where.get(other)
            if i is None:
                continue
            lo, hi = sorted((given[i], given[j]))
            if lo < split[i] < hi and lo < split[j] < hi:
                pairs.add((min(i, j), max(i, j)))
    return sorted(pairs)


def group_ids(ids: np.ndarray, p: np.ndarray, pairs=()) -> np.ndarray:
    """One id per group of features: two features that trade a rank (both hold
    some rank k <= ``p.shape[1]`` in at least :data:`TRADE_SHARE` of
    realisations, and together in at least :data:`TRADE_JOINT`: "this place is
    k-th; which of them holds it is 80/20") or form one of ``pairs`` (row
    indices; e.g. :func:`shared_tops`) are in one group, joined transitively;
    a group's id is the smallest feature id in it (a feature alone is a group
    of one).

    The joint share keeps a group to the features competing for one place:
    where many features' figures overlap broadly (correlated error on a field
    of similar depressions), each holds several ranks a little, and linking
    every two that ever share a rank would chain them all into one group.

    Examples
    --------
    >>> p = np.array([[0.53, 0.0, 0.47], [0.0, 1.0, 0.0], [0.47, 0.0, 0.53]])
    >>> group_ids(np.array([1, 2, 3]), p).tolist()
    [1, 2, 1]
    """
    ids = np.asarray(ids, np.int64)
    parent = np.arange(ids.size)

    def find(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    links = list(pairs)
    for k in range(p.shape[1]):
        held = np.flatnonzero(p[:, k] >= TRADE_SHARE)
        links += [(a, b) for i, a in enumerate(held) for b in held[i + 1:]
                  if p[a, k] + p[b, k] >= TRADE_JOINT]
    for a, b in links:
        ra, rb = find(int(a)), find(int(b))
        if ra != rb:
            parent[max(ra, rb)] = min(ra, rb)
    roots = np.array([find(a) for a in range(ids.size)], np.int64)
    smallest = pd.Series(ids).groupby(roots).transform("min").to_numpy()
    return smallest.astype(np.int64)


def display_order(median: np.ndarray, expected: np.ndarray, ids: np.ndarray,
                  group: np.ndarray) -> np.ndarray:
    """Row order of the tables and figures: features by median rank (those
    counted in fewer than half the realisations last), then expected figure
    (largest first), then id; a group's members together, the group where
    its first member falls."""
    med = np.where(np.isnan(median), np.inf, median)
    order = np.lexsort((ids, -np.asarray(expected, np.float64), med))
    place = np.empty(ids.size, np.int64)
    place[order] = np.arange(ids.size)
    first = pd.Series(place).groupby(np.asarray(group)).transform("min").to_numpy()
    return np.lexsort((place, first))


def ordinal(k: int) -> str:
    """1 -> '1st', 2 -> '2nd', 11 -> '11th', 23 -> '23rd'."""
    suffix = "th" if 10 <= k % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(k % 10, "th")
    return f"{k}{suffix}"


def ranked_rows(table: pd.DataFrame, share: pd.DataFrame | None,
                limit: int) -> tuple[pd.DataFrame, int]:
    """The rows a ranking shows: every feature holding some rank k <= RANKS in at
    least :data:`RANK_MASS` of realisations, with the other members of its
    group, in table order (by median rank, then expected figure, a group's
    members together); whole groups while at most ``limit`` rows (the first
    group always, cut at ``limit``). Returns the rows and how many features that hold such a
    rank were left out."""
    if table.empty or share is None or share.empty:
        return table.iloc[:0], 0
    held = (share.reindex(table["feature_id"]).fillna(0.0).to_numpy() >= RANK_MASS).any(axis=1)
    wanted = table[table["group"].isin(set(table["group"][held]))].sort_values("rank",
                                                                               kind="stable")
    sizes = wanted.groupby("group", sort=False).size()
    keep, total = [], 0
    for g, size in sizes.items():
        if keep and total + size > limit:
            break
        keep.append(g)
        total += size
    rows = wanted[wanted["group"].isin(keep)].head(limit)
    return rows, int(held.sum() - np.isin(table["feature_id"][held], rows["feature_id"]).sum())


def traded_place(rows: pd.DataFrame, share: pd.DataFrame | None) -> tuple[int, list] | None:
    """The place a group's members trade most (``rows``: its members, in order):
    the rank k <= RANKS that at least two of them hold in at least
    :data:`TRADE_SHARE` of realisations and together in :data:`TRADE_JOINT`,
    with the largest share held between them, and each member's
    P(rank = k); None when they trade none (they share a top or floor)."""
    if share is None or share.empty or len(rows) < 2:
        return None
    m = share.reindex(rows["feature_id"]).fillna(0.0).to_numpy()
    trade = ((m >= TRADE_SHARE).sum(axis=0) >= 2) & (np.where(m >= TRADE_SHARE, m, 0).sum(0)
                                                     >= TRADE_JOINT)
    if not trade.any():
        return None
    total = np.where(trade, m.sum(axis=0), -1.0)
    k = int(np.flatnonzero(total >= total.max() - 0.005)[0])  # near-ties: the better place
    return int(share.columns[k]), m[:, k].tolist()
