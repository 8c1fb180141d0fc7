"""Ranks shown whole: rank distributions, bimodal figures, groups of competing features.

Outside references used here:
- numpy's ``quantile(..., method="inverted_cdf")`` (Hyndman & Fan 1996, "Sample
  quantiles in statistical packages", The American Statistician 50(4),
  definition 1: the smallest value whose empirical CDF reaches q) for the
  median rank, a rank some realisation produced.
- pandas' ``rank(method="first")`` for ranks with ties broken by order.
- Monte Carlo standard error of a proportion, sqrt(p (1 - p) / N) (common
  practice), for P(rank = k).
- Samples drawn by numpy's generators from named distributions (normal,
  uniform, exponential, two separated normals) for the bimodality flag: a
  unimodal sample must almost never be flagged, two clusters almost always.
- matplotlib's own artists (texts, collections) read back for the figures;
  pyogrio (a general-purpose reader) for the GeoPackage layers; the standard
  library's csv for ``ranks.csv``.
- matplotlib's sample USGS DEM (``jacksboro_fault_dem.npz``, fixture
  ``usgs_dem``) as real terrain with flat twin tops and null shapes.
"""

from __future__ import annotations

import csv
import re

import numpy as np
import pandas as pd
import pyogrio
import pytest

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.outputs import plot
from terrain.summary.features import summarise_features
from terrain.summary.ranks import (
    CLUSTER_SHARE,
    RANK_MASS,
    group_ids,
    median_ranks,
    ordinal_ranks,
    rank_distribution,
    rank_table,
    ranked_rows,
    two_clusters,
)

from .conftest import once, write_tif


# -- ranks as distributions ------------------------------------------------------------
def test_ordinal_ranks_against_pandas_and_every_rank_is_held_once():
    rng = np.random.default_rng(3)
    figure = np.round(rng.gamma(2.0, 10.0, (60, 25)))  # rounded: many ties
    present = rng.random(figure.shape) < 0.8
    ranks = ordinal_ranks(figure, present)
    for r in range(figure.shape[0]):
        s = pd.Series(np.where(present[r], figure[r], np.nan))
        want = s.rank(method="first", ascending=False)  # ties: the lower id (column) first
        np.testing.assert_array_equal(ranks[r], np.nan_to_num(want.to_numpy()).astype(int))
        held = np.sort(ranks[r][ranks[r] > 0])
        np.testing.assert_array_equal(held, np.arange(1, present[r].sum() + 1))
    p, none = rank_distribution(ranks, 10)
    np.testing.assert_allclose(p.sum(axis=0) + none, 1.0)  # each rank's whole probability
    # a realisation counting fewer than k regions gives rank k to "none"
    counted = present.sum(axis=1)
    np.testing.assert_allclose(none, [(counted < k).mean() for k in range(1, 11)])


def test_median_rank_is_numpys_inverted_cdf_quantile():
    rng = np.random.default_rng(5)
    ranks = rng.integers(1, 30, (101, 12)).astype(np.int32)
    ranks[rng.random(ranks.shape) < 0.3] = 0  # not counted: below every counted rank
    ranks[:, 0] = np.where(np.arange(101) < 60, 0, 4)  # counted in fewer than half: none
    got = median_ranks(ranks)
    r = np.where(ranks > 0, ranks, 10**6).astype(float)
    want = np.quantile(r, 0.5, axis=0, method="inverted_cdf")
    np.testing.assert_array_equal(got[1:], want[1:])
    assert np.isnan(got[0])


def test_rank_table_long_form_with_standard_errors():
    ids = np.array([3, 7, 9])
    p = np.array([[0.6, 0.4], [0.4, 0.5], [0.0, 0.02]])
    none = 1 - p.sum(axis=0)
    t = rank_table(ids, p, none, 200)
    assert list(t.columns) == ["feature_id", "rank", "p_rank", "p_rank_se"]
    assert t.groupby("rank").p_rank.sum().tolist() == pytest.approx([1.0, 1.0])
    assert t[t["rank"] == 2].feature_id.tolist() == [7, 3, 0, 9]  # largest share first
    np.testing.assert_allclose(t.p_rank_se, np.sqrt(t.p_rank * (1 - t.p_rank) / 200))
    assert (t.p_rank > 0).all()


# -- bimodal figures ----------------------------------------------------------------------
@pytest.mark.parametrize("draw", ["normal", "uniform", "exponential", "lognormal"])
def test_unimodal_figures_are_not_flagged(draw):
    rng = np.random.default_rng(11)
    f = getattr(rng, draw)(size=(200, 1000)) + 50
    assert two_clusters(f)[0].mean() <= 0.01


def test_two_clusters_are_flagged_and_split_between_them():
    rng = np.random.default_rng(12)
    n = 200
    # twin tops: the larger role (~560) in 20%, the smaller (~25) otherwise
    twin = np.where(rng.random((n, 300)) < 0.2, 560.0, 25.0) + 2 * rng.standard_normal((n, 300))
    # a feature counted in 70% of realisations, at least the cut-off of 7.5 when counted
    cut = np.where(rng.random((n, 300)) < 0.7, 7.5 + np.abs(rng.normal(0, 3.5, (n, 300))), 0.0)
    # two normal clusters 8 standard deviations apart
    apart = rng.standard_normal((n, 300)) + 8.0 * (rng.random((n, 300)) < 0.5)
    for f, rate in ((twin, 1.0), (cut, 1.0), (apart, 0.9)):
        flag, split = two_clusters(f)
        assert flag.mean() >= rate
        lo, hi = np.nanmin(f, axis=0), np.nanmax(f, axis=0)
        assert np.all((split[flag] > lo[flag]) & (split[flag] < hi[flag]))
    # a cluster smaller than CLUSTER_SHARE of the realisations is not a cluster
    rare = rng.standard_normal((n, 50))
    rare[: int(CLUSTER_SHARE * n) - 1] += 100
    assert not two_clusters(rare)[0].any()


# -- groups -------------------------------------------------------------------------------
def test_groups_join_features_that_trade_a_place():
    ids = np.array([1, 2, 3, 4, 5, 6])
    p = np.array([[0.53, 0.00, 0.47, 0.00],   # twin tops trading 1st and 3rd
                  [0.00, 1.00, 0.00, 0.00],
                  [0.47, 0.00, 0.53, 0.00],
                  [0.00, 0.00, 0.00, 0.60],   # 4th about 60/40
                  [0.00, 0.00, 0.00, 0.38],
                  [0.00, 0.00, 0.00, 0.02]])  # a rare holder is not a trader
    g = group_ids(ids, p)
    assert g.tolist() == [1, 2, 1, 4, 4, 6]
    # features that each hold 2nd and 3rd a fifth of the time (a field of similar
    # figures) are not chained into one group: no two of them hold a place half the time
    q = np.array([[0.90, 0.0, 0.0], [0.06, 0.2, 0.2], [0.04, 0.2, 0.2], [0.0, 0.2, 0.2]])
    assert group_ids(np.array([1, 2, 3, 4]), q).tolist() == [1, 1, 3, 4]
    # a given pair (a shared top) joins whatever the ranks
    assert group_ids(ids, p, [(1, 5)]).tolist() == [1, 2, 1, 4, 4, 2]


# -- the held-out case: a massif whose highest crown loses to a flat-topped twin ---------
def massif():
    """An invented field (10 m cells): a 400 m summit, a dozen cones of 100-210 m on a
    plain at 0, and a 250 m massif with two crowns 7 cells apart: crown A a single cell
    at 250 m, crown B a flat top of 5 x 5 cells at 248.8 m. On the DEM A holds the
    massif's 250 m prominence; under 1 m of independent error the highest of B's 25
    cells beats A about 3 times in 4 (the expected maximum of 25 standard normals is
    about 1.97, from memory), so A's mean falls below every cone."""
    rows, cols = 84, 136
    r, c = np.mgrid[0:rows, 0:cols].astype(float)

    def cone(r0, c0, h, top=0):
        d = (np.maximum(np.maximum(np.abs(r - r0), np.abs(c - c0)) - top, 0) if top
             else np.hypot(r - r0, c - c0))
        return np.maximum(h - 20.0 * d, 0)

    z = cone(14, 14, 400.0)
    spots = [(14 + 28 * i, 14 + 27 * j) for i in range(3) for j in range(5)][1:]
    for (r0, c0), h in zip(spots, np.arange(100.0, 220.0, 10.0)):
        z = np.maximum(z, cone(r0, c0, h))
    z = np.maximum(z, cone(70, 105, 250.0))  # crown A
    z = np.maximum(z, cone(70, 111, 248.8, top=2))  # crown B, flat-topped
    return z.astype(np.float32), (70, 105), (70, 111)


@pytest.fixture(scope="module")
def crowns():
    z, a, b = massif()
    dem = Dem.from_array(z, cellsize=10.0, crs="EPSG:32633", vertical_units="metre")
    res = run_ensemble(dem, CreditJob("peaks", threshold=10.0), ErrorModel(rmse=1.0),
                       realisations=120, seed=7, backend="serial")
    feat = summarise_features(res)
    ia, ib = (int(feat.regions.labels[p]) for p in (a, b))
    return res, feat, ia, ib


def test_crown_loses_to_flat_twin_three_times_in_four(crowns):
    _, feat, a, b = crowns
    t = feat.table.set_index("feature_id")
    share = feat.rank_share
    # the DEM as given: A holds the massif's prominence, B is a small bump beside it
    assert t.loc[a, "unperturbed"] == pytest.approx(250.0) and t.loc[b, "unperturbed"] < 50
    n = 120
    pb = share.loc[b, 2]
    assert abs(pb - 0.75) <= 4 * np.sqrt(0.75 * 0.25 / n)  # B holds 2nd about 3 in 4
    assert share.loc[a, 2] == pytest.approx(1 - pb)
    # A's mean is a mixture below a dozen other summits: a mean ranking would hide it
    assert (t.expected > t.loc[a, "expected"]).sum() >= 12
    assert t.loc[a, "bimodal"] and t.loc[b, "bimodal"]
    # one group; its id is the smallest member id and no other feature has it
    assert t.loc[a, "group"] == t.loc[b, "group"] == min(a, b)
    assert (t.group == min(a, b)).sum() == 2
    # the table puts them together, B (median rank 2) first
    order = feat.table.feature_id.tolist()
    assert order.index(a) == order.index(b) + 1 and t.loc[b, "median_rank"] == 2
    assert pd.isna(t.loc[a, "median_rank"]) or t.loc[a, "median_rank"] > 10
    # both are selected by rank mass, whatever their means
    rows, left = ranked_rows(feat.table, share, plot.RANKED)
    assert {a, b} <= set(rows.feature_id) and left == 0


def test_console_table_shows_both_crowns_in_one_bracket(crowns, capsys):
    from cairn_cli.summary import print_summary

    res, feat, a, b = crowns
    print_summary(feat.table, kind="peaks", units="m", n=res.n, outdir="out", caution="c",
                  share=feat.rank_share, clusters=feat.clusters)
    lines = capsys.readouterr().out.splitlines()
    at = {i: ln for i, ln in enumerate(lines) for f in (a, b) if re.search(rf"#{f} ", ln)}
    (i, first), (j, second) = sorted(at.items())
    assert j == i + 1 and "┌" in first and "└" in second
    assert re.search(r"2nd (7\d|8\d)%", first) and re.search(r"2nd (1\d|2\d|3\d)%", second)
    assert "*" in first and "*" in second  # bimodal: the mean is marked as no outcome


def test_rank_chart_shows_both_crowns_in_one_band(crowns):
    from .test_pictures import check_figure

    res, feat, a, b = crowns
    fig = plot.ranking_chart(res, feat)
    check_figure(fig)
    left, right = fig.axes[:2]
    ticks = [t.get_text() for t in left.get_yticklabels()]
    ia, ib = ticks.index(f"#{a}"), ticks.index(f"#{b}")
    assert ia == ib + 1
    # a shaded band spans their two rows and no other, on both panels
    r = fig.canvas.get_renderer()
    for ax in (left, right):
        rows = ax.transData.transform([(0, y) for y in np.arange(len(ticks))])[:, 1]
        spans = [p.get_window_extent(r) for p in ax.patches if p.get_facecolor()[3] > 0]
        covered = [{i for i, y in enumerate(rows) if e.y0 < y < e.y1} for e in spans]
        assert {ia, ib} in covered
    group = [t.get_text() for t in right.texts if t.get_gid() == "group_label"]
    pb, pa = feat.rank_share.loc[b, 2], feat.rank_share.loc[a, 2]
    assert group == [f"2nd: {plot.share_text(pb)[:-1]} | {plot.share_text(pa)}"]
    # the cells of the rank matrix carry the same shares
    cells = {t.get_gid(): t.get_text() for t in right.texts if t.get_gid()}
    assert cells[f"p_rank_{b}_2"] == f"{pb:.2f}"
    # their cluster shares are written beside the bars
    shares = [t.get_text() for t in left.texts if t.get_gid() == "cluster_share"]
    assert len(shares) == 4


def test_map_labels_the_group_once_with_real_outcomes(crowns):
    from .test_pictures import check_map

    res, feat, a, b = crowns
    fig = plot.feature_map(res, feat)
    ax, labels, names = check_map(fig, res.dem)
    text = next(t.get_text() for t in labels if f"#{b} " in t.get_text())
    assert f"#{a} 250 m*" in text and "2nd" in text  # the DEM's figure, never the mean
    t = feat.table.set_index("feature_id")
    assert plot.figure_text(t.loc[a, "expected"]) not in text
    assert any(n.startswith("one group") for n in names)
    ties = [c for c in ax.collections if str(c.get_label()).startswith("one group")]
    assert len(ties) == 1 and len(ties[0].get_segments()) == 1
    # the scale bar and the north arrow cover no marker
    from .test_pictures import _marker_boxes, _overlap

    r = fig.canvas.get_renderer()
    bar = next(x for x in ax.artists if x.get_gid() == "scale_bar").get_window_extent(r)
    arrow = next(x for x in ax.texts if x.get_gid() == "north_arrow")
    for box in (bar, arrow.get_window_extent(r), arrow.arrow_patch.get_window_extent(r)):
        assert not any(_overlap(box, m) for m in _marker_boxes(ax))


# -- the real DEM: matplotlib's sample USGS DEM ------------------------------------------
@pytest.fixture(scope="module")
def usgs_runs(tmp_path_factory, usgs_dem):
    """``cairn peaks --rmse 2.5 --min-prominence 30`` and ``cairn depressions --rmse 2.5
    --range 500`` on the sample DEM (3 arc-second cells, taken as 90 m)."""
    from click.testing import CliRunner
    from rasterio.transform import from_origin

    from cairn_cli.main import cli

    def make():
        tmp = tmp_path_factory.mktemp("usgs")
        dem = write_tif(tmp / "usgs.tif", usgs_dem.astype(np.int16), units="metre",
                        transform=from_origin(700000.0, 4030000.0, 90.0, 90.0))
        out = {}
        for cmd, args in (("peaks", ("--min-prominence", "30", "-n", "40")),
                          ("depressions", ("--range", "500", "-n", "20"))):
            res = CliRunner().invoke(cli, [cmd, str(dem), "-o", str(tmp / cmd), "--rmse", "2.5",
                                           "--workers", "1", "--seed", "0", *args],
                                     catch_exceptions=False)
            assert res.exit_code == 0, res.output
            out[cmd] = (tmp / cmd, res.stdout)
        return out

    return once("usgs_runs", make)


@pytest.mark.xdist_group("usgs_runs")  # one worker makes the module fixture
@pytest.mark.slow
def test_real_dem_twin_crowns_are_shown_together(usgs_runs):
    folder, stdout = usgs_runs["peaks"]
    t = pd.read_csv(folder / "summits.csv")
    # the DEM's second most prominent summit (560 m on the DEM) shares its flat top
    # with a 25 m crown that takes its role in most realisations
    second = t[t.unperturbed == 560].iloc[0]
    mates = t[(t.group == second.group) & (t.feature_id != second.feature_id)]
    assert len(mates) == 1
    twin = mates.iloc[0]
    assert twin.unperturbed == 25 and twin.median_rank == 2 and second.bimodal
    assert abs(int(twin["rank"]) - int(second["rank"])) == 1  # adjacent rows
    # the console shows both, bracketed together, though #2's mean is small
    lines = [ln for ln in stdout.splitlines() if re.search(
        rf"#({second.feature_id}|{twin.feature_id}) ", ln)]
    assert len(lines) == 2 and "┌" in lines[0] and "└" in lines[1]
    # groups: one id per group, the smallest member id
    assert (t.groupby("group").feature_id.min() == t.groupby("group").group.first()).all()
    # ranks.csv: for every k the listed features carry the whole probability
    with open(folder / "ranks.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["feature_id", "rank", "p_rank", "p_rank_se"]
    r = pd.DataFrame(rows[1:], columns=rows[0]).astype(float)
    sums = r.groupby("rank").p_rank.sum()
    assert list(sums.index) == list(range(1, 11))
    np.testing.assert_allclose(sums, 1.0, atol=0.5e-4 * r.groupby("rank").size().max())
    assert set(r.feature_id) - {0} <= set(t.feature_id)
    # every feature holding a place 1-10 in at least 1% of realisations is a table row
    held = r[(r.p_rank >= RANK_MASS) & (r.feature_id > 0)].feature_id
    assert set(held) <= set(t.feature_id)


@pytest.mark.xdist_group("usgs_runs")  # one worker makes the module fixture
@pytest.mark.slow
@pytest.mark.parametrize("cmd", ["peaks", "depressions"])
def test_real_dem_polygon_layers_have_no_null_geometry(usgs_runs, cmd):
    folder, _ = usgs_runs[cmd]
    gpkg = folder / f"{cmd}.gpkg"
    table = pd.read_csv(folder / ("summits.csv" if cmd == "peaks" else "pits.csv"))
    polygons = ("summits", "summit_regions") if cmd == "peaks" else ("pits", "pit_regions")
    for layer in polygons:
        frame = pyogrio.read_dataframe(gpkg, layer=layer)
        assert len(frame) == len(table)
        assert frame.geometry.notna().all() and not frame.geometry.is_empty.any(), layer
        assert frame.geometry.is_valid.all() and (frame.geometry.area > 0).all()
    if cmd == "depressions":  # where the ponded extent is empty: the most credited pit cell
        pits = pyogrio.read_dataframe(gpkg, layer="pits")
        fallback = pits[pits.extent_is_pit_cell.astype(bool)].reset_index(drop=True)
        assert len(fallback) and np.allclose(fallback.geometry.area, 90.0 * 90.0)
        points = pyogrio.read_dataframe(gpkg, layer="pit_points").set_index("feature_id")
        inside = fallback.geometry.contains(
            points.geometry.loc[fallback.feature_id].reset_index(drop=True), align=False)
        assert inside.all()


def test_rank_matrix_cells_never_round_a_share_to_certainty():
    # the demo's deepest hollow is first in 299 of 300 realisations: its cell reads
    # ">.99", as its map label reads ">99%", never "1.00"
    assert [plot.cell_text(p) for p in (299 / 300, 1.0, 0.5, 0.004, 0.006, 0.994)] == [
        ">.99", "1.00", "0.50", "<.01", "0.01", "0.99"]
