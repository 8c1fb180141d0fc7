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

from .conftest import said, smooth_terrain, write_tif
from .reference_fill import fill_depressions

# runs here draw blank stand-ins for the figures (tests/conftest.py); a test
# marked real_figures draws them
pytestmark = pytest.mark.usefixtures("stand_in_figures")


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
    # accumulation in m^2: the whole row of 10 m x 10 m cells drains through its west cell
    assert np.array_equal(fl.acc.reshape(nr, nc)[:, 0], np.full(nr, nc * 100.0))


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
    # conservation: accumulation at the exits sums to the area of the valid cells
    assert fl.acc[(fl.rec < 0) & fl.valid].sum() == np.isfinite(z).sum() * 100.0


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


def test_boundary_cells_are_the_edge_and_the_cells_beside_nodata():
    # where water may come in from ground the DEM does not hold (our own rule: no
    # outside reference)
    from terrain.summary.catchments import boundary_cells

    nodata = np.zeros((7, 8), bool)
    nodata[3, 4] = True
    b = boundary_cells(nodata)
    want = np.zeros_like(nodata)
    want[[0, -1], :] = want[:, [0, -1]] = True
    want[2:5, 3:6] = True
    want[3, 4] = False  # nodata itself is no cell of a catchment
    assert np.array_equal(b, want)


def test_outlet_edge_cases(tmp_path):
    z, cell = _valley(20, 21)
    z[5, 5] = np.nan
    dem = Dem.from_array(z, cellsize=cell)
    with pytest.raises(OutletError, match="outside the raster"):
        CatchmentJob(["a"], [[-50.0, 10.0]], snap_m=10.0).resolved(dem, ErrorModel(rmse=1.0))
    x, y = dem.xy(np.array([5 * 21 + 5]))
    with pytest.raises(OutletError, match="nodata"):
        CatchmentJob(["a"], [[x[0], y[0]]], snap_m=10.0).resolved(dem, ErrorModel(rmse=1.0))
    with pytest.raises(OutletError, match="not unique"):
        CatchmentJob(["a", "a"], [[x[0], y[0]]] * 2, snap_m=10.0)


def test_cli_catchments_end_to_end(tmp_path, cairn):
    z, cell = _valley()
    from rasterio.transform import from_origin

    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32),
                    transform=from_origin(500000.0, 6800000.0, cell, cell))
    with rasterio.open(dem) as ds:
        (x, y), (x2, y2) = ds.xy(50, 20), ds.xy(30, 20)
    # outlets given in geographic coordinates: reprojected to the DEM's UTM grid; their
    # attribute columns travel to every table row about them
    import geopandas as gpd
    from shapely.geometry import Point

    pts = gpd.GeoDataFrame({"id": ["ford", "weir"], "name": ["Ford Gauge", "Weir Gauge"],
                            "river": ["Veld Beck", "Veld Beck"], "level": [3, 4]},
                           geometry=[Point(x, y), Point(x2, y2)], crs="EPSG:32633").to_crs(4326)
    pts.to_file(tmp_path / "o.geojson", driver="GeoJSON")
    code, out, err = cairn("catchments", dem, "--outlets", tmp_path / "o.geojson", "-o",
                           tmp_path / "out", "--rmse", "0.001", "-n", "8", "--workers", "1", "-q",
                           "--snap", "0")
    assert code == 0, err
    for name in ("catchment_probability_ford.tif", "subcatchment_probability_weir.tif",
                 "divide_probability.tif", "channel_probability.tif"):
        with rasterio.open(tmp_path / "out" / name) as ds:
            assert ds.count == 2 and "standard error (probability)" in ds.descriptions[1]
            assert "flood behaviour" in ds.tags()["note"]
    gdf = pyogrio.read_dataframe(tmp_path / "out" / "catchments.gpkg", layer="catchments")
    assert list(gdf.columns[:-1]) == ["outlet_id", "layer_id", "level", "area_m2", "area_mean_m2",
                                      "area_p05_m2", "area_p95_m2", "edge_cells", "edge_limited",
                                      "name", "river", "input_level"]
    csv = pd.read_csv(tmp_path / "out" / "catchments.csv", dtype={"outlet_id": str})
    pd.testing.assert_frame_equal(csv, rounded(pd.DataFrame(gdf.drop(columns="geometry")),
                                               CATCHMENT_COLUMN_KINDS), check_dtype=False)
    ford = gdf[gdf.outlet_id == "ford"]
    assert list(ford.name) == ["Ford Gauge"] * 2 and list(ford.input_level) == [3, 3]
    # valley worked example: 51 rows x 41 columns drain through row 50; the weir's 31 rows
    # are nested in the ford's catchment and split from its sub-catchment
    assert ford.area_m2.iloc[0] == pytest.approx(51 * 41 * 100.0, rel=0.02)
    # the valley's catchment holds the raster's top row and both sides down to row 50:
    # 41 + 2 x 50 edge cells; water could come in there, so its area is a lower bound
    assert ford.edge_cells.tolist() == [141, 141] and ford.edge_limited.all()
    assert "lower bounds" in err and "ford (141 cells)" in err
    sub = pyogrio.read_dataframe(tmp_path / "out" / "catchments.gpkg", layer="subcatchments")
    sub_ford = sub[(sub.outlet_id == "ford") & (sub.level == 0.5)]
    assert sub_ford.area_m2.iloc[0] == pytest.approx(20 * 41 * 100.0, rel=0.03)
    assert list(sub_ford.river) == ["Veld Beck"]
    outs = pyogrio.read_dataframe(tmp_path / "out" / "catchments.gpkg", layer="outlets")
    assert list(outs.outlet_id) == ["ford", "weir"] and list(outs.name) == ["Ford Gauge", "Weir Gauge"]
    assert outs.snapped_share.tolist() == [1.0, 1.0]
    # snap 0: the snapped cell is the given cell; the distance is the reprojection's round trip
    assert outs.snap_distance_mean_m.max() < 0.01
    assert np.allclose(outs[["snapped_x", "snapped_y"]].to_numpy(), [[x, y], [x2, y2]])
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["parameters"]["snap_m"] == 0.0 and run["parameters"]["conditioning"] == "breach"
    assert set(run["defaults"]) == {"channel_area", "conditioning", "breach_cap"}
    code, _, err = cairn("catchments", dem, "--help")
    assert code == 0


def test_cli_channels_without_outlets(tmp_path, cairn):
    z, cell = _valley(40, 21)
    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32))
    code, _, err = cairn("catchments", dem, "-o", tmp_path / "out", "--rmse", "0.01", "-n", "4",
                         "--workers", "1", "-q", "--channel-area", "5000", "--connectivity", "4",
                         "--conditioning", "fill")
    assert code == 0, err
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [
        "channel_probability.tif", "drainage_area.tif", "quicklook.png", "run.json"]
    with rasterio.open(tmp_path / "out" / "channel_probability.tif") as ds:
        p = ds.read(1)
    # worked example: each row's sides drain straight to the valley floor (column 10), so
    # floor cell r holds (r + 1) x 21 cells of 100 m^2, >= 5000 m^2 from row 2 on
    assert p[:2, 10].max() == 0 and p[2:, 10].min() == 1
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["parameters"]["connectivity"] == 4 and run["parameters"]["breach_cap"] is None
    assert run["parameters"]["channel_area"] == 5000


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


def _same_layers(a, b):
    assert list(a.layers) == list(b.layers) and a.n == b.n
    for name in a.layers:
        for u, v in zip(a.layers[name], b.layers[name]):
            assert np.array_equal(u, v, equal_nan=True), name
    for k in a.log:
        assert np.array_equal(a.log[k], b.log[k]), k


def _hilly_job():
    z = smooth_terrain((50, 60), seed=11).astype(np.float32)
    dem = Dem.from_array(z, cellsize=10.0)
    x, y = dem.xy(np.array([25 * 60 + 30, 10 * 60 + 12, 40 * 60 + 50]))
    job = CatchmentJob(["a", "b", "c"], np.column_stack([x, y]), snap_m=20.0, channel_area=2e4,
                       breach_cap=30.0)
    return dem, job, ErrorModel(rmse=0.5, range_m=100.0)


@pytest.mark.slow
@pytest.mark.xdist_group("dask_cluster")
def test_catchments_identical_across_backends(dask_cluster):
    # every layer (channel, divides, catchments, sub-catchments) and the log, bit for bit
    dem, job, m = _hilly_job()
    a = run_ensemble(dem, job, m, realisations=12, seed=4, backend="serial")
    _same_layers(a, run_ensemble(dem, job, m, realisations=12, seed=4, backend="processes",
                                 workers=2, chunk=5))
    _same_layers(a, run_ensemble(dem, job, m, realisations=12, seed=4,
                                 scheduler=dask_cluster.scheduler_address, chunk=7))
    assert len(a.layers) == 3 + 2 * 3 and a.log["subarea"].shape == (36,)


def test_catchments_checkpoint_resume_and_adaptive_stopping(tmp_path):
    from terrain.runner import RunInterrupted

    dem, job, m = _hilly_job()
    full = run_ensemble(dem, job, m, realisations=30, seed=2, backend="serial")
    ck = tmp_path / "ck.npz"

    def interrupt_at(done, total):
        if done >= 12:
            raise KeyboardInterrupt

    with pytest.raises(RunInterrupted):
        run_ensemble(dem, job, m, realisations=30, seed=2, backend="serial", chunk=4,
                     checkpoint=ck, checkpoint_every=4, progress=interrupt_at)
    _same_layers(full, run_ensemble(dem, job, m, realisations=30, seed=2, backend="serial",
                                    checkpoint=ck, resume=True))
    # adaptive stopping: decided at multiples of the check interval, below the target
    res = run_ensemble(dem, job, m, realisations=400, seed=2, backend="serial", target_se=0.15,
                       check_every=10, min_realisations=10)
    assert res.info["stopped_early"] and res.n % 10 == 0 and res.n < 400
    assert res.info["stop_statistic"] < 0.15
    worst = max(float(res.layers[name][1].max()) for name in res.layers
                if name != "drainage_area")  # probabilities: their standard errors
    assert worst == pytest.approx(res.info["stop_statistic"])


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


# -- outlet ids and attributes ---------------------------------------------------------
def _two_gauges(tmp_path):
    from rasterio.transform import from_origin

    z, cell = _valley(40, 21)
    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32),
                    transform=from_origin(0.0, 400.0, cell, cell))
    return dem, [(105.0, 95.0), (105.0, 295.0)]  # floor cells of rows 30 and 10


def _catchments(cairn, dem, outlets, out, *extra):
    return cairn("catchments", dem, "--outlets", outlets, "-o", out, "--rmse", "0.01", "-n", "2",
                 "--workers", "1", "-q", "--snap", "0", *extra)


def test_cli_blank_ids_are_numbered_by_row(tmp_path, cairn):
    dem, (a, b) = _two_gauges(tmp_path)
    (tmp_path / "o.csv").write_text(f"id,x,y,name\n  ,{a[0]},{a[1]},lower\n007,{b[0]},{b[1]},upper\n")
    code, _, err = _catchments(cairn, dem, tmp_path / "o.csv", tmp_path / "out")
    assert code == 0 and "row number (rows 1)" in err
    t = pd.read_csv(tmp_path / "out" / "outlets.csv", dtype={"outlet_id": str})
    assert t.outlet_id.tolist() == ["1", "007"] and t.name.tolist() == ["lower", "upper"]
    assert (tmp_path / "out" / "catchment_probability_007.tif").exists()
    # a null id in a GeoPackage is numbered the same way
    import geopandas as gpd
    from shapely.geometry import Point

    gpd.GeoDataFrame({"id": ["ford", None], "name": ["x", "y"]}, geometry=[Point(*a), Point(*b)],
                     crs="EPSG:32633").to_file(tmp_path / "o.gpkg")
    code, _, err = _catchments(cairn, dem, tmp_path / "o.gpkg", tmp_path / "out2")
    assert code == 0, err
    t = pyogrio.read_dataframe(tmp_path / "out2" / "catchments.gpkg", layer="outlets")
    assert t.outlet_id.tolist() == ["ford", "2"]


def test_cli_repeated_id_is_refused_in_one_line(tmp_path, cairn):
    dem, (a, b) = _two_gauges(tmp_path)
    (tmp_path / "o.csv").write_text(f"id,x,y\n2,{a[0]},{a[1]}\n,{b[0]},{b[1]}\n")
    code, _, err = _catchments(cairn, dem, tmp_path / "o.csv", tmp_path / "out")
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "o.csv" in err and "'2' is used more than once" in err and "row number" in err
    assert not (tmp_path / "out").exists()


def test_cli_long_and_clashing_ids_get_short_unique_file_names(tmp_path, cairn):
    dem, (a, b) = _two_gauges(tmp_path)
    long_id = ("Veld Beck at the old packhorse bridge " * 8).strip()  # 303 characters
    (tmp_path / "o.csv").write_text(f'id,x,y\n"{long_id}",{a[0]},{a[1]}\n"a b",{b[0]},{b[1]}\n'
                                    f'"a_b",{b[0] + 10},{b[1]}\n')
    code, _, err = _catchments(cairn, dem, tmp_path / "o.csv", tmp_path / "out")
    assert code == 0, err
    t = pd.read_csv(tmp_path / "out" / "outlets.csv", dtype=str)
    assert t.outlet_id.tolist() == [long_id, "a b", "a_b"]  # full ids in the tables
    names = t.layer_id.tolist()
    assert len(set(names)) == 3 and all(len(n) <= 41 for n in names)
    assert names[0].startswith("Veld_Beck_at_the_old_packhorse_b-")
    for n in names:
        assert (tmp_path / "out" / f"catchment_probability_{n}.tif").exists()
    # deterministic: the same ids give the same names
    code, _, err = _catchments(cairn, dem, tmp_path / "o.csv", tmp_path / "out", "--overwrite")
    assert pd.read_csv(tmp_path / "out" / "outlets.csv", dtype=str).layer_id.tolist() == names
    assert json.loads((tmp_path / "out" / "run.json").read_text())["layer_ids"][long_id] == names[0]


@pytest.mark.parametrize("args,needle", [
    (("--conditioning", "carve"), "--conditioning"),
    (("--channel-area", "-5"), "--channel-area"),
    (("--breach-cap", "-1"), "--breach-cap"),
    (("--connectivity", "6"), "--connectivity"),
])
def test_cli_bad_drainage_options(tmp_path, cairn, args, needle):
    dem, _ = _two_gauges(tmp_path)
    code, _, err = cairn("catchments", dem, "-o", tmp_path / "out", "--rmse", "0.1", "-n", "2",
                         *args)
    assert code == 2 and needle in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


def test_catchment_memory_is_stated_and_small(cairn, tmp_path):
    dem, _ = _two_gauges(tmp_path)
    job = CatchmentJob(["a", "b", "c"], np.zeros((3, 2)))
    parent, worker = job.memory_per_cell(4, cells=10**6)
    # as itemised in terrain/jobs/catchments.py: 49 + 8k + 2K in the accumulating process
    # (K = 145 drainage-area codes for a million cells) and 135 + 6k per worker
    assert parent == 49 + 8 * 3 + 2 * 145 == 363 and worker == 135 + 6 * 3 == 153
    # the drainage-area histogram grows by 16 bytes per cell per doubling of the grid
    assert job.memory_per_cell(4, cells=2 * 10**6)[0] == parent + 16
    code, out, _ = cairn("inspect", dem)
    assert code == 0 and f"~{worker} bytes per cell per worker" in out
    assert "memory (catchments, 3 outlets)" in out


# -- outlets: coordinates as given, their CRS, one gauge per cell, options that apply --
def _utm_valley(tmp_path):
    """The valley worked example on a UTM 33N grid (EPSG:32633), with the floor cells of
    rows 50 and 30 as gauges, in the DEM's CRS and in longitude/latitude (pyproj)."""
    from pyproj import Transformer
    from rasterio.transform import from_origin

    z, cell = _valley()
    dem = write_tif(tmp_path / "v.tif", z.astype(np.float32),
                    transform=from_origin(500000.0, 6800000.0, cell, cell), units="metre")
    with rasterio.open(dem) as ds:
        utm = [ds.xy(50, 20), ds.xy(30, 20)]
    to_geo = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    geo = [to_geo.transform(x, y) for x, y in utm]
    return dem, utm, geo


@pytest.mark.parametrize("how", ["option", "sidecar", "prj"])
def test_csv_outlets_in_another_crs_keep_their_coordinates(tmp_path, cairn, how):
    # a CSV of longitudes and latitudes: its CRS from --outlets-crs or a sidecar; the table
    # keeps the coordinates as given (and names their CRS) beside the point and the
    # snapped cell in the DEM's CRS (pyproj's transformation as the reference)
    dem, utm, geo = _utm_valley(tmp_path)
    csv = tmp_path / "gauges.csv"
    csv.write_text("id,x,y\n" + "".join(f"g{k},{x!r},{y!r}\n" for k, (x, y) in enumerate(geo)))
    extra = ()
    if how == "option":
        extra = ("--outlets-crs", "EPSG:4326")
    elif how == "sidecar":
        (tmp_path / "gauges.csv.crs").write_text("EPSG:4326\n")
    else:
        from pyproj import CRS

        (tmp_path / "gauges.prj").write_text(CRS.from_epsg(4326).to_wkt("WKT1_ESRI"))
    code, _, err = _catchments(cairn, dem, csv, tmp_path / "out", *extra)
    assert code == 0, err
    assert "taken to be in the DEM's CRS" not in err
    t = pd.read_csv(tmp_path / "out" / "outlets.csv")
    np.testing.assert_allclose(t[["x", "y"]].to_numpy(), geo, rtol=0, atol=1e-12)  # as given
    assert t.crs.tolist() == ["EPSG:4326"] * 2
    np.testing.assert_allclose(t[["x_dem", "y_dem"]].to_numpy(), utm, atol=0.01)
    np.testing.assert_allclose(t[["snapped_x", "snapped_y"]].to_numpy(), utm, atol=0.01)
    gdf = pyogrio.read_dataframe(tmp_path / "out" / "catchments.gpkg", layer="outlets")
    np.testing.assert_allclose(np.column_stack([gdf.geometry.x, gdf.geometry.y]), utm, atol=0.01)


def test_csv_outlets_without_a_crs_say_the_dems_was_assumed(tmp_path, cairn):
    dem, utm, _ = _utm_valley(tmp_path)
    csv = tmp_path / "gauges.csv"
    csv.write_text("id,x,y\n" + "".join(f"g{k},{x},{y}\n" for k, (x, y) in enumerate(utm)))
    code, _, err = _catchments(cairn, dem, csv, tmp_path / "out")
    assert code == 0, err
    said = [x for x in err.splitlines() if "DEM's CRS" in x]
    assert len(said) == 1 and "EPSG:32633" in said[0] and "--outlets-crs" in said[0]
    t = pd.read_csv(tmp_path / "out" / "outlets.csv")
    assert t.crs.tolist() == ["EPSG:32633"] * 2
    np.testing.assert_allclose(t[["x", "y"]].to_numpy(), t[["x_dem", "y_dem"]].to_numpy())


def test_vector_outlets_keep_their_own_crs(tmp_path, cairn):
    import geopandas as gpd
    from shapely.geometry import Point

    dem, utm, geo = _utm_valley(tmp_path)
    gpd.GeoDataFrame({"id": ["ford", "weir"]}, geometry=[Point(*p) for p in geo],
                     crs="EPSG:4326").to_file(tmp_path / "o.geojson", driver="GeoJSON")
    code, _, err = _catchments(cairn, dem, tmp_path / "o.geojson", tmp_path / "out")
    assert code == 0, err
    t = pd.read_csv(tmp_path / "out" / "outlets.csv")
    np.testing.assert_allclose(t[["x", "y"]].to_numpy(), geo, atol=1e-9)
    np.testing.assert_allclose(t[["x_dem", "y_dem"]].to_numpy(), utm, atol=0.01)
    # an option contradicting the file's own CRS is refused in one line
    code, _, err = _catchments(cairn, dem, tmp_path / "o.geojson", tmp_path / "o2",
                               "--outlets-crs", "EPSG:3857")
    lines = said(err)
    assert code == 2 and len(lines) == 1 and "--outlets-crs" in lines[0]


def test_two_gauges_snapped_to_one_cell_are_refused_naming_both(tmp_path, cairn):
    dem, utm, _ = _utm_valley(tmp_path)
    csv = tmp_path / "gauges.csv"
    csv.write_text("id,x,y\n" + "".join(f"{n},{x},{y}\n" for n, (x, y) in zip(("ford", "weir"),
                                                                               utm)))
    code, _, err = cairn("catchments", dem, "--outlets", csv, "-o", tmp_path / "out", "--rmse",
                         "0.01", "-n", "2", "--workers", "1", "-q", "--snap", "1e12")
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "ford" in err and "weir" in err and "--snap" in err
    assert not (tmp_path / "out" / "run.json").exists()


@pytest.mark.parametrize("args,needles", [
    (("--conditioning", "fill", "--breach-cap", "5"), ("--breach-cap", "fill")),
    (("--snap", "30"), ("--snap", "--outlets")),
    (("--outlets-crs", "EPSG:4326"), ("--outlets-crs", "--outlets")),
])
def test_options_the_run_ignores_are_refused(tmp_path, cairn, args, needles):
    dem, _ = _two_gauges(tmp_path)
    code, _, err = cairn("catchments", dem, "-o", tmp_path / "out", "--rmse", "0.1", "-n", "2",
                         *args)
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert all(n in err for n in needles)
    assert not (tmp_path / "out").exists()
