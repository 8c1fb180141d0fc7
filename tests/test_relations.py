"""Relations: parents, where depressions spill, isolation (issue 28).

Checked against closed forms and hand-built fields whose answers follow from
geometry, and against the definitions computed cell by cell with
scipy.ndimage.label (connected components) and brute force.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage
from scipy.stats import norm

from terrain.dem import Dem
from terrain.engine.blocked import blocked_pairs
from terrain.engine.isolation import isolation
from terrain.engine.persistence import pairs
from terrain.jobs.credit import CreditJob
from terrain.jobs.relations import OFF_RASTER, isolation_m
from terrain.noise import ErrorModel
from terrain.runner import run_ensemble
from terrain.summary.features import summarise_features


# --------------------------------------------------------------------------- engine
def _elder_by_definition(z, kind, conn, outlet):
    """Per pair of ``pairs()``: the first cell in the total order of the
    component holding the death cell among the cells up to it in the order
    (-1: that component touches the raster edge or nodata, i.e. has joined
    the outlet). The elder rule (Edelsbrunner, Letscher & Zomorodian 2002):
    the younger component dies into the elder, whose oldest cell is its birth."""
    nr, nc = z.shape
    zf = z.reshape(-1).astype(np.float64)
    valid = np.isfinite(zf)
    key = np.where(valid, -zf if kind == "peaks" else zf, np.inf)
    order = np.lexsort((np.arange(zf.size), key))
    rank = np.empty(zf.size, np.int64)
    rank[order] = np.arange(zf.size)
    st = np.ones((3, 3)) if conn == 8 else None
    edge = np.zeros((nr, nc), bool)
    edge[0] = edge[-1] = edge[:, 0] = edge[:, -1] = True
    edge |= ndimage.binary_dilation(~valid.reshape(nr, nc), structure=st)
    p = pairs(z, kind=kind, connectivity=conn, edge_outlet=outlet)
    out = []
    for d in p.death:
        if d < 0:
            out.append(-1)
            continue
        lab, _ = ndimage.label(((rank <= rank[d]) & valid).reshape(nr, nc), structure=st)
        comp = lab.reshape(-1) == lab.reshape(-1)[d]
        if outlet and (edge.reshape(-1) & comp).any():
            out.append(-1)
            continue
        cells = np.flatnonzero(comp)
        out.append(cells[np.argmin(rank[cells])])
    return p, np.array(out, np.int64)


@pytest.mark.parametrize("conn", [8, 4])
def test_elder_follows_the_elder_rule_whole_and_blocked(conn):
    # integer rasters: many ties and multi-way saddles; holes of nodata
    rng = np.random.default_rng(7)
    for it in range(12):
        z = rng.integers(0, 6, size=(9, 11)).astype(np.float32)
        if it % 3 == 0:
            z[3:5, 4:6] = np.nan
        for kind, outlet in (("peaks", False), ("pits", True)):
            p, ref = _elder_by_definition(z, kind, conn, outlet)
            assert np.array_equal(p.elder, ref)
            q = blocked_pairs(z, kind=kind, connectivity=conn, block=4)
            assert q.elder.tobytes() == p.elder.tobytes()


# --------------------------------------------------------------------------- parents
def _massif(delta=1.0):
    """Two one-cell crowns 20 cells apart on a 50 m high ridge, a and a + delta."""
    z = np.zeros((21, 41), np.float32)
    z[8:13, 6:35] = 50.0
    z[10, 10] = 100.0
    z[10, 30] = 100.0 + delta
    return z


def _run(z, kind, rmse, n, **kw):
    dem = Dem.from_array(z, cellsize=10.0)
    return run_ensemble(dem, CreditJob(kind), ErrorModel(rmse=rmse), realisations=n, seed=5,
                        backend="serial", **kw)


def test_two_crown_massif_parent_share_is_the_chance_of_not_holding_the_top():
    # Two competing summits of heights a and a + delta, independent Gaussian error sigma
    # per cell: P(the higher one stays higher) = Phi(delta / (sigma sqrt 2)) (difference of
    # two normals; common practice). A crown's parent is the other crown exactly when it
    # does not hold the top.
    res = _run(_massif(1.0), "peaks", 1.0, 400)
    fs = summarise_features(res)
    t = fs.table.set_index("feature_id")
    p_high = norm.cdf(1.0 / (1.0 * np.sqrt(2)))
    se = np.sqrt(p_high * (1 - p_high) / res.n)
    assert t.loc[2, "parent_id"] == 1 and t.loc[1, "parent_id"] == 2  # 1: the higher crown
    assert abs(t.loc[2, "parent_share"] - p_high) < 4 * se
    assert abs(t.loc[1, "parent_share"] - (1 - p_high)) < 4 * se
    assert t.loc[2, "parent_share_se"] == pytest.approx(
        np.sqrt(t.loc[2, "parent_share"] * (1 - t.loc[2, "parent_share"]) / res.n))
    assert t.loc[2, "unperturbed_parent_id"] == 1 and t.loc[1, "unperturbed_parent_id"] is pd.NA
    # the long table: each crown's rows carry all its realisations (no parent: the top)
    links = fs.links
    assert np.allclose(links.groupby("feature_id")["share"].sum(), 1.0)
    none = links[links["parent_id"].isna()].set_index("feature_id")["share"]
    assert none.loc[1] + none.loc[2] == pytest.approx(1.0)
    assert "parents" in fs.frames


# --------------------------------------------------------------------------- spills
def _cascade():
    """Upper lake (floor 10) behind a sill at 20 draining into a lower lake
    (floor 0) whose rim is the raster's left edge at 25; walls 45-50 elsewhere."""
    z = np.full((7, 30), 50.0, np.float32)
    z[1:6, 0] = 25.0
    z[1:6, 1:11] = 0.0
    z[1:6, 11] = 20.0
    z[1:6, 12:21] = 10.0
    z[1:6, 21:] = 45.0
    return z


@pytest.mark.parametrize("block", [None, 16])  # 16: the upper lake straddles the block line
def test_two_lake_cascade_upper_spills_into_lower_lower_off_the_raster(block):
    # geometry: the upper lake overflows at 20 into the lower one (closed up to 25),
    # which overflows over the raster edge; an error-free run (RMSE far below the relief)
    res = _run(_cascade(), "depressions", 1e-3, 20, block=block)
    fs = summarise_features(res)
    t = fs.table.set_index("feature_id")
    lower = int(res.job.regions.labels[3, 5])
    upper = int(res.job.regions.labels[3, 15])
    assert t.loc[upper, "spills_into_id"] == lower and t.loc[upper, "spills_into_share"] == 1.0
    assert t.loc[upper, "spills_into_share_se"] == 0.0
    assert t.loc[lower, "spills_into_id"] == OFF_RASTER and t.loc[lower, "spills_into_share"] == 1
    assert t.loc[upper, "unperturbed_spills_into_id"] == lower
    assert t.loc[lower, "unperturbed_spills_into_id"] == OFF_RASTER
    lines = fs.frames["spill_links"].set_index("feature_id")
    up = lines.loc[upper].geometry
    assert len(up.coords) == 3  # pit -> spill point on the sill -> the lower lake's pit
    assert 110 <= up.coords[1][0] <= 120  # the sill is column 11 (x 110-120 m)
    assert len(lines.loc[lower].geometry.coords) == 2  # leaves the raster


# --------------------------------------------------------------------------- isolation
def _cones(shape=(60, 80), cell=10.0):
    """A cone of 100 m at (20, 20) beside a taller one of 150 m at (30, 60), slope 0.5."""
    r, c = np.mgrid[: shape[0], : shape[1]].astype(np.float64)
    d1 = np.hypot(r - 20, c - 20) * cell
    d2 = np.hypot(r - 30, c - 60) * cell
    return np.maximum(np.maximum(100 - 0.5 * d1, 150 - 0.5 * d2), 0).astype(np.float32)


def test_isolation_of_a_cone_beside_a_taller_cone():
    # geometry: the nearest ground higher than the small cone's summit (100 m) is the
    # taller cone's 100 m contour, a circle of radius (150 - 100) / 0.5 = 100 m around
    # its summit, so isolation = |P1 P2| - 100 m (within one cell, 10 m)
    z = _cones()
    expected = np.hypot(10, 40) * 10.0 - 100.0
    res = _run(z, "peaks", 0.01, 10)
    fs = summarise_features(res)
    t = fs.table.set_index("feature_id")
    small = int(res.job.regions.labels[20, 20])
    assert abs(t.loc[small, "isolation_m"] - expected) <= 10.0
    assert abs(t.loc[small, "isolation_mean_m"] - expected) <= 10.0
    assert t.loc[small, "isolation_p05_m"] <= t.loc[small, "isolation_p95_m"]
    big = int(res.job.regions.labels[30, 60])
    # the highest summit: no higher cell; the distance to the nearest cell beyond the edge
    # (the right edge, 80 - 60 = 20 columns away), flagged edge-limited
    assert t.loc[big, "isolation_m"] == pytest.approx(200.0)
    assert t.loc[big, "unperturbed_isolation_edge_limited"]
    assert np.isnan(t.loc[big, "isolation_mean_m"])
    # the small cone's nearest cell beyond the edge (21 rows up, 210 m) is nearer than its
    # higher ground (312 m): higher ground could lie there on a larger extent
    assert t.loc[small, "unperturbed_isolation_edge_limited"]


def test_isolation_search_equals_brute_force():
    # definition: the nearest cell higher in the total order (value, then flat index),
    # every cell measured (brute force), on rasters with ties and nodata
    rng = np.random.default_rng(3)
    for it in range(12):
        nr, nc = rng.integers(5, 50, 2)
        z = (rng.integers(0, 30, (nr, nc)) if it % 2 else rng.standard_normal((nr, nc))
             ).astype(np.float32)
        if it % 3 == 0:
            z[rng.random((nr, nc)) < 0.05] = np.nan
        dx, dy = np.linspace(1, 2, nr), np.full(nr, 1.5)
        cells = np.flatnonzero(np.isfinite(z.reshape(-1)))[:40]
        d, c, _ = isolation(z, cells, dx, dy)
        zf = z.reshape(-1)
        ycum = np.concatenate([[0], np.cumsum((dy[1:] + dy[:-1]) / 2)])
        rr, cc = np.divmod(np.arange(zf.size), nc)
        for k, s in enumerate(cells):
            r0, c0 = divmod(int(s), int(nc))
            hi = np.isfinite(zf) & ((zf > zf[s]) | ((zf == zf[s]) & (np.arange(zf.size) < s)))
            dist = np.hypot(ycum[rr] - ycum[r0], dx[(rr + r0) // 2] * (cc - c0))
            if hi.any():
                assert d[k] == pytest.approx(dist[hi].min(), abs=1e-9)
                assert c[k] == np.flatnonzero(hi & (dist == dist[hi].min())).min()
            else:
                assert c[k] == -1


def test_isolation_does_not_depend_on_the_pyramid_tiles():
    # the search is exact: any tiling (4-cell tiles in memory, 32 on disk) gives the same
    from terrain.engine.isolation import pyramid

    z = np.random.default_rng(4).standard_normal((70, 90)).astype(np.float32)
    z[10:14, 5:40] = np.nan
    cells = np.arange(0, z.size, 7)
    ref = isolation(z, cells, np.full(70, 3.0), np.full(70, 2.0))
    for leaf in (2, 8, 32):
        got = isolation(z, cells, np.full(70, 3.0), np.full(70, 2.0), pyr=pyramid(z, leaf))
        assert all(a.tobytes() == b.tobytes() for a, b in zip(ref, got))


@pytest.mark.parametrize("leaf", [2, 4, 32])
def test_the_max_pyramid_is_each_tiles_highest_value_and_nodata_flag(leaf):
    # every level against numpy's nanmax and any(isnan) over the tile's cells (common
    # practice: a max pyramid is the tile maxima, level after level), odd shapes, all-nodata
    # tiles, float32 and float64, tile rows across the 32-tile bands the raster is read in
    from terrain.engine.isolation import pyramid

    rng = np.random.default_rng(leaf)
    for shape in [(1, 1), (5, 7), (37, 130), (131, 9)]:
        for dtype in (np.float32, np.float64, np.int16):
            z = (rng.standard_normal(shape) * 100).astype(dtype).astype(float)
            if dtype == np.int16:  # an integer raster (no nodata) goes in as it is
                zi = z.astype(np.int16)
                p = pyramid(zi, leaf)
                n = p.rows[0] * p.cols[0]
                want = [zi[a * leaf:(a + 1) * leaf, b * leaf:(b + 1) * leaf].max()
                        for a in range(p.rows[0]) for b in range(p.cols[0])]
                assert p.top[:n].tolist() == want and not p.nod[:n].any()
                continue
            z = z.astype(dtype)
            z[rng.random(shape) < 0.1] = np.nan
            z[: min(leaf, shape[0]), : min(leaf, shape[1])] = np.nan  # one whole tile of nodata
            p = pyramid(z, leaf)
            for k in range(p.rows.size):
                side = leaf << k
                top = p.top[p.start[k]:p.start[k + 1]].reshape(p.rows[k], p.cols[k])
                nod = p.nod[p.start[k]:p.start[k + 1]].reshape(p.rows[k], p.cols[k])
                for a in range(p.rows[k]):
                    for b in range(p.cols[k]):
                        tile = z[a * side:(a + 1) * side, b * side:(b + 1) * side]
                        valid = tile[np.isfinite(tile)]
                        assert top[a, b] == (valid.max() if valid.size else -np.inf)
                        assert nod[a, b] == bool(np.isnan(tile).any())


def test_isolation_on_a_geographic_grid_is_the_geodesic():
    # reference: pyproj.Geod (GeographicLib; Karney 2013, J. Geodesy 87) on WGS84
    from pyproj import Geod

    z = np.zeros((40, 50), np.float32)
    z[5, 5] = 10.0
    z[30, 40] = 20.0  # the only higher cell
    lat_top, lon_left, step = 61.0, 10.0, 0.01
    transform = (step, 0.0, lon_left, 0.0, -step, lat_top)
    dem = Dem.from_array(z, transform=transform, crs="EPSG:4326", geographic=True)
    d, e = isolation_m(z, np.array([5 * 50 + 5]), dem.cell_metres(), transform)
    lon = lambda c: lon_left + (c + 0.5) * step  # noqa: E731
    lat = lambda r: lat_top - (r + 0.5) * step  # noqa: E731
    ref = Geod(ellps="WGS84").inv(lon(5), lat(5), lon(40), lat(30))[2]
    assert d[0] == pytest.approx(ref, rel=1e-12)
    # the search's own metric (local radii of curvature) is within 0.1% of it
    d0, _, _ = isolation(z, np.array([5 * 50 + 5]), *dem.cell_metres())
    assert d0[0] == pytest.approx(ref, rel=1e-3)


@pytest.mark.slow
def test_relations_identical_across_backends_workers_and_blocks():
    z = _massif(0.5) + np.float32(0.0)
    logs = [_run(z, "peaks", 1.0, 24).log,
            _run(z, "peaks", 1.0, 24, block=16).log]
    dem = Dem.from_array(z, cellsize=10.0)
    logs.append(run_ensemble(dem, CreditJob("peaks"), ErrorModel(rmse=1.0), realisations=24,
                             seed=5, backend="processes", workers=2).log)
    for log in logs[1:]:
        for f in ("elder_region", "isolation", "isolation_edge"):
            assert log[f].tobytes() == logs[0][f].tobytes(), f


def test_pairs_counted_as_numpy_counts_records():
    """The links' (feature, target) and (pair, death) counts equal numpy's own
    ``np.unique(..., axis=1)`` of the stacked records (numpy, a general-purpose
    reference), order included, also where the int64 keys would overflow."""
    from terrain.summary.relations import _unique_pairs

    rng = np.random.default_rng(3)
    for k in range(60):
        n = int(rng.integers(1, 300))
        a = rng.integers(0, 1 + int(rng.integers(1, 40)), n)
        b = rng.integers(-2, 1 + int(rng.integers(1, 40)), n)  # -2: no relation
        if k % 20 == 0:
            a, b = a * 2**40, b * 2**30  # keys past 2**62: the records' path
        want, count = np.unique(np.stack([a, b]), axis=1, return_counts=True)
        got, got_count, inverse = _unique_pairs(a, b)
        assert np.array_equal(got, want) and np.array_equal(got_count, count)
        assert np.array_equal(got[:, inverse], np.stack([a, b]))
