"""Drainage: breaching and filling, channel probability, sub-catchments and divides.

Sources, named at each check: Priority-Flood filling (Barnes, Lehman & Mulla
2014, Computers & Geosciences 62), here by the independent reference in
``tests/reference_fill.py``; least-cost paths by Dijkstra's algorithm
(Dijkstra 1959) as computed by ``scipy.sparse.csgraph.dijkstra``; D8
(O'Callaghan & Mark 1984, CVGIP 28): steepest descent among 8 neighbours,
diagonal distance sqrt(2) x cell size, re-implemented in plain Python in
this file; D4: the same among the 4 edge neighbours (common practice, no
source); geodesic cell areas by ``pyproj.Geod`` (Karney 2013, J. Geodesy
87). The DEMs are constructed for these tests (an embankment across a
valley, a closed basin, a dammed ring, a valley with a tributary).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from terrain.dem import Dem
from terrain.engine.hydro import condition, flow
from terrain.jobs import CatchmentJob
from terrain.noise import ErrorModel
from terrain.runner import run_ensemble

from .conftest import smooth_terrain
from .reference_fill import fill_depressions

CELL = 10.0


def _run(z, outlets=(), *, rmse=1e-4, n=4, seed=0, dem=None, **job):
    dem = dem or Dem.from_array(z, cellsize=CELL)
    cells = np.array([r * z.shape[1] + c for r, c in outlets], np.int64)
    xy = np.column_stack(dem.xy(cells)) if len(outlets) else None
    job = CatchmentJob([f"o{k}" for k in range(len(outlets))], xy,
                       snap_m=0.0 if len(outlets) else None, **job)
    return run_ensemble(dem, job, ErrorModel(rmse=rmse), realisations=n, seed=seed,
                        backend="serial")


# -- breach or fill ---------------------------------------------------------------
def embankment_valley():
    """Constructed for this test: a V-shaped valley draining south (floor at
    column 20, 0.2 m fall per 10 m row, sides rising 1 m per column), a road
    embankment 2 m above the floor across rows 40-41 with no culvert, and a
    notch 5 m high from the pond behind it to the west edge at row 35 (lower
    than the embankment's crest, so filling spills the pond west)."""
    nr, nc = 60, 41
    r, c = np.mgrid[0:nr, 0:nc].astype(np.float64)
    z = np.abs(c - 20) + 0.2 * (nr - 1 - r)
    crest = 0.2 * (nr - 1 - 40) + 2.0  # 5.8 m
    z[40:42] = np.maximum(z[40:42], crest)
    z[35, :20] = np.minimum(z[35, :20], 5.0)
    return z


def test_breach_cuts_the_embankment_and_fill_ponds_behind_it():
    z = embankment_valley()
    pit = 39 * 41 + 20  # the valley floor just upstream of the embankment, 4.0 m
    breached, filled = z.copy(), z.copy()
    condition(breached, method="breach", max_depth=3.0)
    condition(filled, method="fill")
    # filling (Priority-Flood, the reference implementation) raises the pond to the
    # notch's 5 m; breaching raises nothing and cuts the embankment's two rows down
    # to the pit's level along one least-cost path (cost: 2 cells x 1.8 m)
    np.testing.assert_array_equal(filled, fill_depressions(z))
    assert filled.reshape(-1)[pit] == 5.0
    assert np.all(breached <= z)
    cut = np.argwhere(breached < z)
    assert sorted(cut[:, 0].tolist()) == [40, 41] and np.all(np.abs(cut[:, 1] - 20) <= 1)
    assert np.all(breached[breached < z] == 4.0)
    np.testing.assert_array_equal(fill_depressions(breached), breached)  # no depression left
    # the upstream valley reaches the downstream gauge only when breached
    up = (slice(0, 30), slice(17, 24))
    b = _run(z, [(50, 20)], conditioning="breach", breach_cap=3.0)
    f = _run(z, [(50, 20)], conditioning="fill")
    assert b.layers["catchment_probability_o0"][0][up].min() == 1.0
    assert f.layers["catchment_probability_o0"][0][up].max() == 0.0


def test_closed_basin_deeper_than_the_limit_is_filled_not_cut():
    # constructed: a conical basin 6 m deep in a plane tilted south, and a second,
    # 2 m deep; limit 3 m
    nr, nc = 50, 60
    r, c = np.mgrid[0:nr, 0:nc].astype(np.float64)
    z = 0.05 * (nr - 1 - r) + 0.013 * c
    z -= 6.0 * np.clip(1 - np.hypot(r - 20, c - 15) / 8, 0, None)
    z -= 2.0 * np.clip(1 - np.hypot(r - 25, c - 45) / 6, 0, None)
    out = z.copy()
    condition(out, method="breach", max_depth=3.0)
    deep = np.hypot(r - 20, c - 15) < 9
    ref = fill_depressions(z)  # Priority-Flood (Barnes et al. 2014)
    np.testing.assert_array_equal(out[deep], ref[deep])  # filled exactly, not cut
    shallow = np.hypot(r - 25, c - 45) < 7
    assert np.all(out[shallow] <= z[shallow]) and np.any(out[shallow] < z[shallow])
    assert (z - out).max() <= 3.0
    np.testing.assert_array_equal(fill_depressions(out), out)
    # without a limit, the deep basin is cut too; with a limit of 0 nothing is
    every = z.copy()
    condition(every, method="breach")
    assert np.all(every <= z) and np.any(every[deep] < z[deep])
    none = z.copy()
    condition(none, method="breach", max_depth=0.0)
    np.testing.assert_array_equal(none, ref)


@pytest.mark.parametrize("seed", [0, 1])
def test_breach_path_is_least_cost(seed):
    # constructed: a cone falling outward to the raster edges, holding a tilted basin
    # floor ringed by a bumpy dam 0.5-3 m high (the only depression); the breach must
    # cut exactly the cost of the cheapest path from the pit to a lower cell or the
    # edge, where entering a cell costs its height above the pit (Dijkstra 1959;
    # scipy.sparse.csgraph.dijkstra as the reference)
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import dijkstra

    n = 31
    r, c = np.mgrid[0:n, 0:n].astype(np.float64)
    d = np.hypot(r - 15, c - 15)
    z = 3.0 - 0.1 * d + 0.0123 * c + 0.01 * r
    z[d < 6] = 1.5 + 0.0123 * c[d < 6] + 0.01 * r[d < 6]
    ring = (d >= 6) & (d < 8)
    z[ring] += np.random.default_rng(seed).uniform(0.5, 3.0, ring.sum())
    assert np.all((fill_depressions(z) > z) <= (d < 6))  # one depression: the basin
    inside = np.flatnonzero((d < 6).reshape(-1))
    zf = z.reshape(-1)
    pit = inside[np.argmin(zf[inside])]
    out = z.copy()
    condition(out, method="breach")
    cut = (z - out).sum()
    rows, cols, w = [], [], []
    for dr in (-1, 0, 1):
        for dc in (-1, 0, 1):
            if dr or dc:
                ok = (r + dr >= 0) & (r + dr < n) & (c + dc >= 0) & (c + dc < n)
                a = np.flatnonzero(ok.reshape(-1))
                b = a + dr * n + dc
                rows += [a]
                cols += [b]
                w += [np.maximum(zf[b] - zf[pit], 0) + 1e-12]  # explicit zeros are not edges
    g = coo_matrix((np.concatenate(w), (np.concatenate(rows), np.concatenate(cols))),
                   shape=(n * n, n * n)).tocsr()
    dist = dijkstra(g, indices=pit)
    edge = ((r == 0) | (c == 0) | (r == n - 1) | (c == n - 1)).reshape(-1)
    target = (zf < zf[pit]) | edge
    assert cut == pytest.approx(dist[target].min(), abs=1e-6)
    assert cut > 0.5  # the dam was cut


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_conditioned_surfaces_are_depression_free_and_cuts_respect_the_limit(seed):
    z = smooth_terrain((40, 50), seed=seed, amp=5.0).astype(np.float64)
    z[5:8, 30:33] = np.nan
    for limit in (0.5, 2.0, math.inf):
        out = z.copy()
        condition(out, method="breach", max_depth=limit)
        ok = np.isfinite(z)
        assert np.all(np.isnan(out[~ok]))
        assert (z - out)[ok].max() <= limit
        # no depression left: Priority-Flood (reference) changes nothing
        np.testing.assert_array_equal(fill_depressions(out), out)
        # cells are only raised where the reference fill raises them, never above it
        ref = fill_depressions(z)
        assert np.all(out[ok] <= ref[ok])


def test_breach_works_in_place_on_whole_metre_float64():
    # whole metres in float64 are exact in float32, where the engine works: the result
    # must still land in the caller's array (constructed: a one-cell pit 1 m deep)
    z = np.add.outer(np.arange(9.0), np.zeros(9))
    z[4, 4] = 2.0  # its neighbours: 3, 4 and 5 m; the rows north fall to 0
    out = z.copy()
    condition(out, method="breach")
    # the cheapest cut: one cell of row 3 (3 m) lowered to 2 m, towards the rows below 2 m
    (r,), (c,) = np.nonzero(out != z)
    assert r == 3 and abs(c - 4) <= 1 and out[r, c] == 2.0
    np.testing.assert_array_equal(fill_depressions(out), out)


# -- flow: D8, D4, accumulation in square metres -----------------------------------
def test_d4_routes_to_edge_neighbours_only():
    n = 20
    r, c = np.mgrid[0:n, 0:n].astype(np.float64)
    z = 0.3 * r + 0.31 * c  # falls to the north-west
    idx = np.arange(n * n).reshape(n, n)
    d8 = flow(z, cell_w=CELL, cell_h=CELL).rec.reshape(n, n)
    d4 = flow(z, cell_w=CELL, cell_h=CELL, connectivity=4).rec.reshape(n, n)
    # D8 (O'Callaghan & Mark 1984): the diagonal drop (0.61 m over 14.1 m) is the steepest
    assert np.array_equal(d8[1:, 1:], idx[:-1, :-1])
    # D4 (common practice): the steeper of the west (0.31 m) and north (0.3 m) drops
    assert np.array_equal(d4[1:, 1:], idx[1:, :-1])


@pytest.mark.parametrize("geographic", [False, True])
def test_channel_probability_switches_at_the_analytic_row(geographic):
    # a plane tilted south: every cell drains straight down its column (D8), so its
    # accumulation is the area of the cells above it and itself; P(channel) jumps from
    # 0 to 1 at the first row where that area reaches the channel area
    nr, nc = 40, 12
    z = 0.5 * (nr - 1 - np.mgrid[0:nr, 0:nc][0]).astype(np.float64)
    if geographic:  # 0.0001 deg cells at 60 N; areas from pyproj.Geod (Karney 2013)
        from pyproj import Geod

        dem = Dem.from_array(z, transform=(1e-4, 0, 10.0, 0, -1e-4, 60.0), crs="EPSG:4326",
                             geographic=True)
        g = Geod(ellps="WGS84")
        area = np.array([abs(g.polygon_area_perimeter(
            [10.0, 10.0001, 10.0001, 10.0], [60 - 1e-4 * (i + 1)] * 2 + [60 - 1e-4 * i] * 2)[0])
            for i in range(nr)])
    else:
        dem = Dem.from_array(z, cellsize=CELL)
        area = np.full(nr, CELL * CELL)
    upslope = np.cumsum(area)
    a = float(upslope[17] + upslope[18]) / 2  # between rows 17 and 18
    res = _run(z, dem=dem, channel_area=a, rmse=1e-4, n=5)
    p = res.layers["channel_probability"][0]
    assert p[:18].max() == 0.0 and p[18:].min() == 1.0
    # no outlets: no membership layers; the drainage area comes with every run
    assert list(res.layers) == ["channel_probability", "drainage_area"]


# -- sub-catchments and divides --------------------------------------------------
def tributary_valley(nr=70, nc=61):
    """Constructed for this test: a main valley along column 30 falling south,
    a tributary valley joining it from the north-east at row 39, and outer
    hillslopes that fall straight east and west off the raster edges."""
    r, c = np.mgrid[0:nr, 0:nc].astype(np.float64)
    main = 0.3 * (nr - 1 - r) + np.abs(c - 30)
    t = np.clip(((r - 12) * 28 - (c - 50) * 20) / (28**2 + 20**2), 0, 1)
    pr, pc = 12 + 28 * t, 50 - 20 * t  # nearest point of the tributary's axis
    trib = 0.3 * (nr - 41) + 0.35 * np.hypot(pr - 40, pc - 30) + 0.9 * np.hypot(r - pr, c - pc)
    outer = 16.0 + 0.6 * np.minimum(c, nc - 1 - c)
    return np.minimum(np.minimum(main, trib), outer) + 0.001 * np.sin(0.7 * r + 1.3 * c)


def d8_reference_labels(z, outlets, cell=CELL):
    """D8 (O'Callaghan & Mark 1984) written independently: follow each cell's
    steepest downhill neighbour (diagonals at sqrt(2) x cell) until a listed
    outlet (its index) or a cell with no lower neighbour (-1)."""
    nr, nc = z.shape
    lab = np.full(z.shape, -2)

    def down(r, c):
        best, arg = 0.0, None
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                if (dr or dc) and 0 <= r + dr < nr and 0 <= c + dc < nc:
                    s = (z[r, c] - z[r + dr, c + dc]) / (cell * math.hypot(dr, dc))
                    if s > best:
                        best, arg = s, (r + dr, c + dc)
        return arg

    for r0 in range(nr):
        for c0 in range(nc):
            path, p = [], (r0, c0)
            while p is not None and p not in outlets and lab[p] == -2:
                path.append(p)
                p = down(*p)
            end = -1 if p is None else (outlets.index(p) if p in outlets else lab[p])
            for q in path:
                lab[q] = end
    for k, o in enumerate(outlets):
        lab[o] = k
    return lab


def _boundary(mask):
    """Cells of ``mask`` with a neighbour outside it, and cells outside with one inside."""
    ring = np.ones((3, 3), bool)
    return (mask & ~ndimage.binary_erosion(mask, ring, border_value=1)) | \
        (~mask & ndimage.binary_dilation(mask, ring))


def test_divides_are_quiet_on_open_hillslopes_and_mark_the_tributary():
    z = tributary_valley()
    outlets = [(37, 32), (56, 30)]  # the tributary's mouth, the main valley downstream
    ref = d8_reference_labels(z, outlets)
    res = _run(z, outlets, rmse=1e-4, n=12, seed=3)
    div = res.layers["divide_probability"][0]
    # the tributary's sub-catchment boundary (both sides) is a divide
    assert div[_boundary(ref == 0)].min() >= 0.5
    # hillslopes draining off the raster edges, away from any labelled boundary, are quiet
    any_edge = np.zeros(z.shape, bool)
    for k in (-1, 0, 1):
        any_edge |= _boundary(ref == k)
    open_slopes = (ref == -1) & ~ndimage.binary_dilation(any_edge, np.ones((3, 3), bool))
    assert open_slopes.sum() > 1500 and div[open_slopes].max() <= 0.05
    # sub-catchments and catchments agree with the reference trace
    sub_t = res.layers["subcatchment_probability_o0"][0]
    sub_m = res.layers["subcatchment_probability_o1"][0]
    member_m = res.layers["catchment_probability_o1"][0]
    np.testing.assert_array_equal(sub_t >= 0.5, ref == 0)
    np.testing.assert_array_equal(sub_m >= 0.5, ref == 1)
    np.testing.assert_array_equal(member_m >= 0.5, ref >= 0)  # nested: total upstream area
    a = res.log["area"].reshape(-1, 2)
    s = res.log["subarea"].reshape(-1, 2)
    np.testing.assert_allclose(a[:, 1], s[:, 0] + s[:, 1])
    assert a[0, 1] == pytest.approx((ref >= 0).sum() * CELL**2)
