"""Features: regions of the DEM as given, their figures, and valid statistics.

Outside references used here:
- gudhi (The GUDHI Project, GUDHI User and Reference Manual, 2024) for the
  persistence pairs of the unperturbed DEM (every region is one of its pairs;
  every ``unperturbed`` figure is a gudhi persistence).
- Soille, P. (2004), Morphological Image Analysis, 2nd ed.: depression filling by
  reconstruction by erosion (``skimage.morphology.reconstruction``) for the ponded
  area and storage volume, on the real USGS DEM that matplotlib ships.
- Difference of two independent normals: P(the higher of two summits a + d, a
  stays higher) = Phi(d / (sigma sqrt 2)) (normal CDF from scipy.stats).
- Monte Carlo standard error of a mean, s / sqrt(N), and of a proportion,
  sqrt(p (1 - p) / N) (common practice): checked against the spread over seeds.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage, stats

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.engine.persistence import regions
from terrain.summary.features import summarise_features, unperturbed_ponding

from .conftest import smooth_terrain, upland
from .test_persistence import gudhi_pairs


def _run(z, kind, rmse=0.15, n=60, seed=1, cellsize=1.0, **kw):
    model_kw = {k: kw.pop(k) for k in ("range_m", "nugget") if k in kw}
    dem = Dem.from_array(z, cellsize=cellsize)
    res = run_ensemble(dem, CreditJob(kind, **kw), ErrorModel(rmse=rmse, **model_kw),
                       realisations=n, seed=seed, backend="serial")
    return res, summarise_features(res)


# -- regions against gudhi ------------------------------------------------------------
@pytest.mark.parametrize("kind,conn", [("peaks", 8), ("pits", 8), ("peaks", 4), ("pits", 4)])
@pytest.mark.parametrize("level", [0.0, 40.0, 150.0])
def test_regions_are_the_pairs_above_the_merge_level(kind, conn, level):
    # gudhi: the finite pairs of the DEM with persistence >= the merge level are
    # exactly the regions (plus the essential class for peaks)
    z = smooth_terrain((48, 55), seed=4)
    r = regions(z, kind=kind, merge_level=level, connectivity=conn)
    ref = sorted((round(b, 3), round(d, 3)) for b, d, *_ in gudhi_pairs(z, kind, conn, kind == "pits")
                 if abs(b - d) >= level and abs(b - d) > 0)
    got = sorted((round(b, 3), round(d, 3)) for b, d in zip(r.birth_value, r.death_value)
                 if np.isfinite(d))
    assert got == ref
    # each region holds its own extremum and no cell more extreme than it
    key = -z if kind == "peaks" else z
    for k in range(len(r)):
        cells = r.labels == k + 1
        assert cells.reshape(-1)[r.birth[k]]
        assert key[cells].min() == key.reshape(-1)[r.birth[k]]


def test_region_ids_do_not_depend_on_the_merge_level():
    z = smooth_terrain((60, 60), seed=7)
    fine, coarse = (regions(z, kind="peaks", merge_level=m) for m in (5.0, 60.0))
    assert len(coarse) < len(fine)
    # the coarse regions are the first ids of the fine ones, with the same extremum
    np.testing.assert_array_equal(coarse.birth, fine.birth[: len(coarse)])
    # and a coarse region is the union of fine ones
    for k in range(1, len(coarse) + 1):
        inside = np.unique(fine.labels[coarse.labels == k])
        assert k in inside and np.all(np.isin(fine.labels[np.isin(fine.labels, inside)], inside))


# -- the invented upland: lake, flat-topped hill, dome with knobs, hollow ---------------
@pytest.mark.slow
@pytest.mark.parametrize("rmse,range_m", [(0.15, 0.0), (0.25, 0.0), (0.15, 12.0)])
def test_lake_hill_dome_hollow_are_one_row_each(rmse, range_m):
    z, feet = upland()
    _, peaks = _run(z, "peaks", rmse=rmse, range_m=range_m, n=50)
    _, pits = _run(z, "depressions", rmse=rmse, range_m=range_m, n=50)
    for name, feat in (("hill", peaks), ("dome", peaks), ("lake", pits), ("hollow", pits)):
        ids = np.unique(feat.regions.labels[feet[name]])
        rows = feat.table[feat.table.feature_id.isin(ids)]
        assert len(rows) == 1, (name, rows)
        if name != "hollow":
            assert rows.p_above.iloc[0] >= 0.95, (name, rows.p_above.iloc[0])
    assert pits.table.iloc[0].feature_id == np.unique(pits.regions.labels[feet["lake"]])[0]
    lake = pits.table.iloc[0]
    assert lake.unperturbed == pytest.approx(4.0, abs=0.1)
    assert lake.ponded_area_m2 == pytest.approx(feet["lake"].sum(), rel=0.05)
    # the knobs (0.08 and 0.2 m) are below the merge level: the dome is one region
    assert len(peaks.table) == 2


# -- statistics that mean what they say -----------------------------------------------------
def _plain(rows, cols=61):
    """Two single-cell summits 101 and 100 m on a flat plain at 0."""
    z = np.zeros((rows, cols), np.float32)
    z[rows // 2, 15], z[rows // 2, 45] = 101.0, 100.0
    return z


@pytest.mark.slow
@pytest.mark.parametrize("rows", [3, 41])
def test_p_first_is_the_probability_of_being_highest(rows):
    # base = the lowest cell (default): realised cols may fall below it, yet the
    # feature holding the realisation's highest cell must rank first
    n, sigma = 1500, 1.0
    z = _plain(rows)
    res, feat = _run(z, "peaks", rmse=sigma, n=n, seed=3)
    high = feat.regions.labels[rows // 2, 15]
    row = feat.table[feat.table.feature_id == high].iloc[0]
    want = stats.norm.cdf(1.0 / (sigma * math.sqrt(2)))  # 0.7602
    assert abs(row.p_first - want) <= 4 * math.sqrt(want * (1 - want) / n)
    # it equals the share of realisations whose highest summit is born there
    ess = res.log["death"] < 0
    assert row.p_first == pytest.approx(np.mean(res.log["region"][ess] == high))


@pytest.mark.slow
def test_standard_errors_match_the_spread_over_seeds():
    # near-equal summits (p_first away from 0 and 1) and a knoll whose prominence
    # sits at the cut-off (p_above away from 0 and 1); 80 independent seeds
    z = np.zeros((25, 61), np.float32)
    z[12, 10], z[12, 30] = 50.0, 50.4
    z[12, 50] = 3.0
    expected, p_above, p_first = [], [], []
    se = {"expected": [], "p_above": [], "p_first": []}
    for seed in range(80):
        _, feat = _run(z, "peaks", rmse=1.0, n=100, seed=seed, threshold=3.0)
        t = feat.table.set_index("feature_id")
        ids = [feat.regions.labels[12, c] for c in (10, 30, 50)]
        expected.append(t.loc[ids[0], "expected"])
        p_first.append(t.loc[ids[1], "p_first"])
        p_above.append(t.loc[ids[2], "p_above"])
        se["expected"].append(t.loc[ids[0], "se"])
        se["p_first"].append(t.loc[ids[1], "p_first_se"])
        se["p_above"].append(t.loc[ids[2], "p_above_se"])
    for name, values in (("expected", expected), ("p_first", p_first), ("p_above", p_above)):
        ratio = np.std(values, ddof=1) / np.mean(se[name])
        assert 0.8 <= ratio <= 1.25, (name, ratio)


def test_feature_ids_are_stable():
    z = smooth_terrain((50, 60), seed=12)
    tables = [_run(z, "peaks", rmse=r, n=n, seed=s, threshold=30.0)[1].table
              for r, n, s in ((1.0, 40, 1), (1.0, 80, 2), (4.0, 40, 3))]
    where = [dict(zip(t.feature_id, zip(t.unperturbed_x, t.unperturbed_y))) for t in tables]
    for w in where[1:]:
        for fid in set(w) & set(where[0]):
            assert w[fid] == where[0][fid]
    assert len(set(where[0]) & set(where[2])) >= 3


# -- figures on the DEM as given ---------------------------------------------------------
@pytest.mark.parametrize("kind,engine_kind", [("peaks", "peaks"), ("depressions", "pits")])
def test_unperturbed_figures_are_gudhi_persistences(usgs_dem, kind, engine_kind):
    z = usgs_dem[:120, :150]
    res, feat = _run(z, kind, rmse=2.0, n=20, cellsize=90.0, threshold=10.0)
    ref = {round(abs(b - d), 3) for b, d, *_ in gudhi_pairs(z, engine_kind, 8, kind != "peaks")}
    t = feat.table
    finite = t[np.isfinite(t.unperturbed_col_elevation if kind == "peaks" else t.unperturbed_spill_elevation)]
    assert len(finite) >= 2
    assert {round(v, 3) for v in finite.unperturbed} <= ref
    if kind == "peaks":
        top = t[~np.isfinite(t.unperturbed_col_elevation)].iloc[0]
        assert top.unperturbed == pytest.approx(z.max() - z.min())


def test_ponded_area_and_volume_match_reconstruction_by_erosion(usgs_dem):
    from skimage.morphology import reconstruction

    z = usgs_dem.astype(np.float64)
    dem = Dem.from_array(z.astype(np.float32), cellsize=90.0)
    job = CreditJob("depressions", threshold=2.0).resolved(dem, ErrorModel(rmse=1.0))
    area, volume = unperturbed_ponding(dem, job)
    marker = z.copy()
    marker[1:-1, 1:-1] = z.max()
    depth = reconstruction(marker, z, method="erosion") - z  # Soille: fill holes
    lab, k = ndimage.label(depth > 0, structure=np.ones((3, 3)))
    deep = np.r_[False, ndimage.maximum(depth, lab, index=np.arange(1, k + 1)) >= 2.0]
    ponded = deep[lab] & (depth > 0)
    reg = job.regions.labels
    ref_area = np.bincount(reg[ponded], minlength=area.size) * 90.0 * 90.0
    ref_vol = np.bincount(reg[ponded], weights=depth[ponded], minlength=area.size) * 8100.0
    assert ponded.sum() > 100 and ref_area[0] == 0  # every ponded cell lies in a region
    np.testing.assert_allclose(area, ref_area, rtol=1e-9)
    np.testing.assert_allclose(volume, ref_vol, rtol=1e-6)


def test_rows_on_a_real_dem_do_not_change_when_realisations_double(usgs_dem):
    # integer metres with decimetre error: regions are fixed, so the rows counted in at
    # least half the realisations are the same features at 60 and 120 realisations
    z = usgs_dem[:160, :200]
    rows, places = [], []
    for n in (60, 120):
        _, feat = _run(z, "peaks", rmse=0.2, n=n, seed=5, cellsize=90.0)
        t = feat.table
        rows.append(set(t.feature_id[t.p_above >= 0.5]))
        places.append(dict(zip(t.feature_id, zip(t.unperturbed_x, t.unperturbed_y))))
    assert rows[0] == rows[1] and len(rows[0]) >= 100
    assert all(places[0][i] == places[1][i] for i in rows[0])


def test_edge_limited_share_flags_features_cut_by_the_edge():
    # a ridge rising off the western edge: its top is edge-limited, the interior knoll not
    r, c = np.mgrid[0:30, 0:40]
    z = (60 - 1.0 * c + 25 * np.exp(-((r - 15) ** 2 + (c - 28) ** 2) / 20.0)).astype(np.float32)
    _, feat = _run(z, "peaks", rmse=0.5, n=30)
    t = feat.table.set_index("feature_id")
    assert t.loc[feat.regions.labels[15, 0], "edge_limited_share"] == 1.0
    assert t.loc[feat.regions.labels[15, 28], "edge_limited_share"] == 0.0


def test_polygons_made_in_bulk_are_shapelys_own():
    # reference: shapely.geometry.shape of each traced polygon (shapely 2.0, 2022), on
    # regions with holes, corner-touching cells and more polygons than one batch
    import shapely
    from rasterio.features import shapes
    from scipy import ndimage
    from shapely.geometry import shape

    import terrain.summary.features as F

    rng = np.random.default_rng(4)
    lab, _ = ndimage.label(rng.random((120, 130)) < 0.45, structure=np.ones((3, 3)))
    lab[40:60, 40:60], lab[45:50, 45:50] = 7, 0  # a ring with a hole
    traced = [g for g, _ in shapes(lab.astype(np.int32), mask=lab > 0, connectivity=8)]
    assert any(len(g["coordinates"]) > 1 for g in traced)
    got = F._polygons(traced)
    assert [shapely.to_wkb(a) for a in got] == [shapely.to_wkb(shape(g)) for g in traced]
    assert F._polygons([]).size == 0


@pytest.mark.parametrize("kind", ["peaks", "depressions"])
def test_the_first_summary_step_draws_what_the_whole_summary_draws(kind, tmp_path):
    # the map is drawn from summary_steps' first step while the second is made: the
    # same table less the relation columns, the same tops, so the same PNG bytes
    from terrain.io import write_figure
    from terrain.outputs import plot
    from terrain.summary.features import LAYER_NAMES, summary_steps
    from terrain.summary.relations import RELATION_COLUMNS

    res, whole = _run(smooth_terrain((48, 56), seed=3), kind, rmse=4.0, n=40)
    first, last = summary_steps(res)
    assert whole.links is not None and first.links is None
    assert set(whole.table.columns) - set(first.table.columns) == set(RELATION_COLUMNS[kind])
    assert first.table.equals(whole.table[first.table.columns])
    assert list(first.frames) == [LAYER_NAMES[kind][0]]
    assert first.frames[LAYER_NAMES[kind][0]].geometry.geom_equals_exact(
        whole.frames[LAYER_NAMES[kind][0]].geometry, 0).all()
    assert last.table.equals(whole.table) and list(last.frames) == list(whole.frames)
    for name, draw in (("map", plot.feature_map), ("chart", plot.ranking_chart)):
        write_figure(tmp_path / f"{name}-first.png", draw(res, first))
        write_figure(tmp_path / f"{name}-whole.png", draw(res, whole))
        assert (tmp_path / f"{name}-first.png").read_bytes() == \
            (tmp_path / f"{name}-whole.png").read_bytes()
