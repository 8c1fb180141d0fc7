"""Depression filling, D8 and outlet catchments checked against outside references.

Sources: Priority-Flood (Barnes, Lehman & Mulla 2014, Computers & Geosciences
62) equals morphological reconstruction by erosion (Soille 2004, Morphological
Image Analysis), computed by ``skimage.morphology.reconstruction``; D8
(O'Callaghan & Mark 1984): steepest descent among 8 neighbours with diagonal
distance sqrt(2) x cell size; worked analytic surfaces (tilted plane, cone,
V-shaped valley) whose drainage and catchment areas follow from geometry.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio

from terrain.dem import Dem
from terrain.engine.hydro import flow
from terrain.engine.persistence import pairs_and_fill
from terrain.errors import OutletError
from terrain.jobs import CatchmentJob
from terrain.noise import ErrorModel
from terrain.outputs.tables import rounded
from terrain.runner import run_ensemble
from terrain.summary.catchments import CATCHMENT_COLUMN_KINDS

from .conftest import smooth_terrain, write_tif
from .reference_fill import fill_depressions


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("ties", [False, True])
def test_priority_flood_equals_reconstruction_by_erosion(seed, ties):
    from skimage.morphology import reconstruction

    z = smooth_terrain((48, 57), seed=seed).astype(np.float64)
    if ties:
        z = np.round(z / 30)
    marker = z.copy()
    marker[1:-1, 1:-1] = z.max()
    ref = reconstruction(marker, z, method="erosion")  # Soille: fill holes
    np.testing.assert_array_equal(fill_depressions(z), ref)
    np.testing.assert_array_equal(pairs_and_fill(z)[1], ref)  # the engine's fill agrees
    eps = fill_depressions(z, epsilon=True)
    assert np.all(eps >= ref) and np.all(eps - ref < 1e-9)


def _valley(nr=80, nc=41, s=1.0, t=0.2, cell=10.0):
    """z = s|c - c0| + t (nr - 1 - r): a V-shaped valley draining south."""
    r, c = np.mgrid[0:nr, 0:nc]
    return (s * np.abs(c - nc // 2) + t * (nr - 1 - r)).astype(np.float64), cell


def test_tilted_plane_drains_to_low_edge():
    nr, nc = 20, 30
    z = 0.1 * np.mgrid[0:nr, 0:nc][1].astype(np.float64)  # rises to the east
    fl = flow(z, cell_w=10.0, cell_h=10.0)
    rec = fl.rec.reshape(nr, nc)
    idx = np.arange(nr * nc).reshape(nr, nc)
    # every cell off the west edge drains to its west neighbour (straight drop 0.1/10
    # beats the diagonal 0.1/(10 sqrt 2))
    assert np.array_equal(rec[:, 1:], idx[:, :-1])
    assert np.all(rec[:, 0] == -1)
    assert np.array_equal(fl.acc.reshape(nr, nc)[:, 0], np.full(nr, float(nc)))


def test_cone_drains_radially():
    n = 41
    r, c = np.mgrid[0:n, 0:n]
    d = np.hypot(r - 20, c - 20)
    fl = flow(100 - d, cell_w=5.0, cell_h=5.0)
    dist = d.reshape(-1)
    has = fl.rec >= 0
    assert np.all(dist[fl.rec[has]] > dist[has])  # every step moves away from the apex
    ring = (r == 0) | (c == 0) | (r == n - 1) | (c == n - 1)
    assert set(np.flatnonzero(fl.rec < 0)) <= set(np.flatnonzero(ring.reshape(-1)))


def test_flow_accumulation_is_conserved_with_nodata_holes():
    z = smooth_terrain((60, 70), seed=3).astype(np.float64)
    z[20:25, 30:40] = np.nan
    z[50, 5] = np.nan
    fl = flow(z, cell_w=10.0, cell_h=10.0)
    # conservation: accumulation at the exits sums to the number of valid cells
    assert fl.acc[(fl.rec < 0) & fl.valid].sum() == np.isfinite(z).sum()


def _run_valley(outlets_rc, n=30, rmse=1e-3, seed=0, snap=0.0):
    z, cell = _valley()
    dem = Dem.from_array(z, cellsize=cell)
    xy = np.array([dem.xy(np.array([r * z.shape[1] + c]))
                   for r, c in outlets_rc]).reshape(-1, 2)
    job = CatchmentJob([f"o{k}" for k in range(len(outlets_rc))], xy, snap_m=snap)
    res = run_ensemble(dem, job, ErrorModel(rmse=rmse), realisations=n, seed=seed, backend="serial")
    return dem, z, res


def test_valley_catchment_matches_analytic_area():
    dem, z, res = _run_valley([(50, 20)])
    p = res.layers["catchment_probability_o0"][0]
    nr, nc = z.shape
    inside = np.zeros_like(p, bool)
    inside[:51, :] = True  # every cell upstream of row 50 drains through the floor cell
    assert p[inside].min() > 0.99 and p[~inside].max() < 0.01
    area50 = ((p >= 0.5) * 100.0).sum()
    assert area50 == pytest.approx(51 * nc * 100.0, rel=0.02)
    assert res.log["area"].mean() == pytest.approx(51 * nc * 100.0, rel=0.02)


def test_snapping_finds_the_channel():
    # an outlet placed one cell off the valley floor snaps to the floor cell of
    # highest accumulation within 15 m (common practice, no source)
    dem, z, res = _run_valley([(50, 21)], n=5, snap=15.0)
    cells = res.log["cell"]
    rows, cols = np.divmod(cells, z.shape[1])
    assert np.all(cols == 20) and np.all(rows == 51)


def test_nested_outlets():
    dem, z, res = _run_valley([(30, 20), (60, 20)])
    up = res.layers["catchment_probability_o0"][0]
    down = res.layers["catchment_probability_o1"][0]
    assert np.all(up <= down + 1e-12) and up.sum() < down.sum()
    a = res.log["area"].reshape(-1, 2)
    assert np.all(a[:, 0] < a[:, 1])


def test_outlet_edge_cases(tmp_path):
    z, cell = _valley(20, 21)
    z[5, 5] = np.nan
    dem = Dem.from_array(z, cellsize=cell)
    with pytest.raises(OutletError, match="outside the raster"):
        CatchmentJob(["a"], [[-50.0, 10.0]], snap_m=10.0).resolved(dem, ErrorModel(rmse=1.0))
    x, y = dem.xy(np.array([5 * 21 + 5]))
    with pytest.raises(OutletError, match="nodata"):
        CatchmentJob(["a"], [[x[0], y[0]]], snap_m=10.0).resolved(dem, ErrorModel(rmse=1.0))
    with pytest.raises(OutletError, match="no outlet"):
        CatchmentJob([], np.empty((0, 2)), snap_m=10.0)


def test_cli_catchments_end_to_end(tmp_path, cairn):
    z, cell = _valley()
    from rasterio.transform import from_origin

    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32),
                    transform=from_origin(500000.0, 6800000.0, cell, cell))
    with rasterio.open(dem) as ds:
        x, y = ds.xy(50, 20)
    # outlets given in geographic coordinates: reprojected to the DEM's UTM grid
    import geopandas as gpd
    from shapely.geometry import Point

    pts = gpd.GeoDataFrame({"id": ["ford"]}, geometry=[Point(x, y)], crs="EPSG:32633").to_crs(4326)
    pts.to_file(tmp_path / "o.geojson", driver="GeoJSON")
    code, out, err = cairn("catchments", dem, "--outlets", tmp_path / "o.geojson", "-o",
                           tmp_path / "out", "--rmse", "0.001", "-n", "8", "--workers", "1", "-q",
                           "--snap", "0")
    assert code == 0, err
    for name in ("catchment_probability_ford.tif", "divide_probability.tif"):
        with rasterio.open(tmp_path / "out" / name) as ds:
            assert ds.count == 2 and "standard error (probability)" in ds.descriptions[1]
    gdf = pyogrio.read_dataframe(tmp_path / "out" / "catchments.gpkg", layer="catchments")
    assert list(gdf.columns[:-1]) == ["outlet_id", "level", "area_m2", "area_mean_m2",
                                      "area_p05_m2", "area_p95_m2"]
    csv = pd.read_csv(tmp_path / "out" / "catchments.csv", dtype={"outlet_id": str})
    pd.testing.assert_frame_equal(csv, rounded(pd.DataFrame(gdf.drop(columns="geometry")),
                                               CATCHMENT_COLUMN_KINDS), check_dtype=False)
    assert gdf.area_m2.iloc[0] == pytest.approx(51 * 41 * 100.0, rel=0.02)
    assert json.loads((tmp_path / "out" / "run.json").read_text())["parameters"]["snap_m"] == 0.0
    code, _, err = cairn("catchments", dem, "--help")
    assert code == 0


@pytest.mark.parametrize("content,needle", [
    ("id,x,y\n", "no outlet points"),
    ("a,b\n1,2\n", "columns x and y"),
    ("id,x,y\nfar,0,0\n", "outside the raster"),
])
def test_cli_bad_outlets(tmp_path, cairn, content, needle):
    z, cell = _valley(20, 21)
    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32))
    (tmp_path / "o.csv").write_text(content)
    code, _, err = cairn("catchments", dem, "--outlets", tmp_path / "o.csv", "-o", tmp_path / "out",
                         "--rmse", "0.1", "-n", "2", "--workers", "1")
    assert code == 2 and needle in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


def test_catchments_identical_across_backends():
    z = smooth_terrain((50, 60), seed=11).astype(np.float32)
    dem = Dem.from_array(z, cellsize=10.0)
    x, y = dem.xy(np.array([25 * 60 + 30, 10 * 60 + 12]))
    job = CatchmentJob(["a", "b"], np.column_stack([x, y]), snap_m=20.0)
    m = ErrorModel(rmse=0.5, range_m=100.0)
    a = run_ensemble(dem, job, m, realisations=12, seed=4, backend="serial")
    b = run_ensemble(dem, job, m, realisations=12, seed=4, backend="processes", workers=2, chunk=5)
    for name in a.layers:
        for u, v in zip(a.layers[name], b.layers[name]):
            assert np.array_equal(u, v)
    assert np.array_equal(a.log["area"], b.log["area"])


def test_cli_outlet_on_nodata(tmp_path, cairn):
    z, cell = _valley(20, 21)
    z[5, 5] = -9999
    from rasterio.transform import from_origin

    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32), nodata=-9999,
                    transform=from_origin(0.0, 200.0, 10.0, 10.0))
    (tmp_path / "o.csv").write_text("id,x,y\nhole,55,145\n")
    code, _, err = cairn("catchments", dem, "--outlets", tmp_path / "o.csv", "-o", tmp_path / "out",
                         "--rmse", "0.1", "-n", "2", "--workers", "1")
    assert code == 2 and "nodata" in err and "hole" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("shape", [(1, 1), (1, 7), (7, 1)])
def test_cli_catchments_tiny_rasters(tmp_path, cairn, shape):
    from rasterio.transform import from_origin

    dem = write_tif(tmp_path / "t.tif", np.full(shape, 5.0, np.float32),
                    transform=from_origin(0.0, 10.0 * shape[0], 10.0, 10.0))
    (tmp_path / "o.csv").write_text("x,y\n5,5\n")
    code, _, err = cairn("catchments", dem, "--outlets", tmp_path / "o.csv", "-o", tmp_path / "out",
                         "--rmse", "0.1", "-n", "2", "--workers", "1", "-q")
    assert code == 0, err
    assert (tmp_path / "out" / "catchments.gpkg").exists()


def test_quicklook_contours_are_not_flipped():
    from terrain.outputs.plot import quicklook

    dem = Dem.from_array(np.zeros((40, 40), np.float32), cellsize=10.0)  # y from 0 (south) to 400
    layer = np.zeros((40, 40))
    layer[2:10, 2:10] = 1.0  # north-west corner (rows near the top)
    fig = quicklook(dem, np.zeros((40, 40)), title="t", units="u", contours=[(layer, [0.5], "x")])
    ax = fig.axes[0]
    ys = np.concatenate([p.vertices[:, 1] for c in ax.collections for p in c.get_paths()
                         if len(p.vertices)])
    assert ys.size and ys.min() > 250  # drawn in the north, where the cells are
