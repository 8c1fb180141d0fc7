"""Held-out checks of units, kernels under correlated error, sweeps, outlets' CRS and the
float32 frame: fields, CRSs and options the other tests do not use.

Sources: the US survey foot is 1200/3937 m exactly, the international foot 0.3048 m
(NIST Special Publication 811, 2008, appendix B); LE90 = 1.6449 RMSE for normal error
(FGDC-STD-007.3-1998, NSSDA); a uniform density on [-h, h] has variance h²/3 and excess
kurtosis -6/5, a triangular one variance h²/6 and excess kurtosis -3/5 (Silverman 1986,
Density Estimation; the kurtoses are the textbook moments of those densities, from
memory, and checked here against scipy.stats); coordinates between CRSs by pyproj (PROJ);
matplotlib's sample USGS DEM (fixture ``usgs_dem``) as real terrain.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import rasterio
from rasterio.transform import from_origin
from scipy import stats

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.noise import ErrorSampler
from terrain.summary.features import summarise_features

from .conftest import smooth_terrain, write_tif

# runs here draw blank stand-ins for the figures (tests/conftest.py); a test
# marked real_figures draws them
pytestmark = pytest.mark.usefixtures("stand_in_figures")

US_FOOT = 1200 / 3937  # m, exact (NIST SP 811)


# -- a lake on a state-plane grid in US survey feet, horizontally and vertically -----------
def stepped_lake(n=44):
    """Constructed here: a square lake 12 x 12 cells whose floor has two steps (an inner
    4 x 4 pool at 80, the rest at 90), ringed by a rim at 100 two cells wide, outside
    which the ground falls 0.5 per cell to the edges. Depth 20 (spill 100 - deepest
    floor 80); ponded area 144 cells; storage 16 x 20 + 128 x 10 = 1600 cell-units."""
    r, c = np.mgrid[0:n, 0:n].astype(np.float64)
    d = np.maximum(np.abs(r - (n - 1) / 2), np.abs(c - (n - 1) / 2))
    z = 100.0 - 0.5 * np.maximum(d - 8, 0)
    lo = (n - 12) // 2
    z[lo:lo + 12, lo:lo + 12] = 90.0
    z[lo + 4:lo + 8, lo + 4:lo + 8] = 80.0
    return z.astype(np.float32), 144, 1600.0


def test_state_plane_lake_in_us_survey_feet(tmp_path, cairn):
    # NAD83 / North Carolina (ftUS), EPSG:2264: cells of 10 US survey feet, elevations in
    # US survey feet, as many US county lidar DEMs are delivered; areas and volumes in SI
    z, cells, storage = stepped_lake()
    dem = write_tif(tmp_path / "lake.tif", z, crs="EPSG:2264", units="US survey foot",
                    transform=from_origin(2_000_000.0, 700_000.0, 10.0, 10.0))
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "out", "--le90", "0.02",
                         "--min-depth", "5", "-n", "3", "--workers", "1")
    assert code == 0, err
    # the header echoes the numbers used, in the file's unit
    assert "elevations in US survey ft" in err
    assert f"LE90 0.02 US survey ft = RMSE {0.02 / 1.6449:.3g} US survey ft" in err
    row = pd.read_csv(tmp_path / "out" / "pits.csv").iloc[0]
    cell_m2 = (10 * US_FOOT) ** 2
    assert row["unperturbed"] == 20.0  # US survey ft, as stored
    assert row["ponded_area_m2"] == round(cells * cell_m2, 2)  # 1337.8 m², not 14400
    assert row["volume_m3"] == round(storage * US_FOOT * cell_m2, 2)
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["input"]["vertical_unit"] == "us-ft"
    assert run["input"]["metres_per_vertical_unit"] == US_FOOT
    import sqlite3

    with sqlite3.connect(tmp_path / "out" / "depressions.gpkg") as db:
        (text,) = db.execute("SELECT description FROM gpkg_contents WHERE table_name = 'pits'"
                             ).fetchone()
    assert "depths and elevations in US survey ft" in text and "volumes in m³" in text


# -- the USGS DEM stored in US survey feet gives the metre run's figures, scaled ----------
@pytest.mark.slow
def test_usgs_dem_in_feet_gives_the_metre_runs_figures(usgs_dem):
    # the same terrain and the same error (RMSE 2.5 m = 8.2 US survey ft, one seed): every
    # depth is the metre run's x 3937/1200 and every area and volume the same in SI units
    z = usgs_dem[100:200, 150:270].astype(np.float64)
    runs = {}
    for unit, k in (("metre", 1.0), ("US survey foot", 3937 / 1200)):
        dem = Dem.from_array((z * k).astype(np.float32), cellsize=90.0, crs="EPSG:32616",
                             vertical_units=unit)
        res = run_ensemble(dem, CreditJob("depressions", threshold=7.5 * k),
                           ErrorModel(rmse=2.5 * k, range_m=500.0), realisations=8, seed=3,
                           backend="serial")
        # features by their pit on the DEM: ids rank equal depths (integer metres) in an
        # order that float32 rounding of the feet may change
        t = summarise_features(res).table
        runs[unit] = t.set_index(["unperturbed_x", "unperturbed_y"]).sort_index()
    m, ft = runs["metre"], runs["US survey foot"]
    assert len(m) > 5 and list(m.index) == list(ft.index)  # the same features
    k = 3937 / 1200
    np.testing.assert_allclose(ft["unperturbed"], m["unperturbed"] * k, rtol=1e-5)
    np.testing.assert_allclose(ft["expected"], m["expected"] * k, rtol=1e-3, atol=1e-3)
    for col in ("ponded_area_m2", "volume_m3", "volume_mean_m3", "region_area_m2"):
        np.testing.assert_allclose(ft[col], m[col], rtol=1e-3, atol=0.01, err_msg=col)
    assert (m["volume_m3"] > 0).any()


# -- the kernel sets the marginal under other covariance models ---------------------------
@pytest.mark.parametrize("kernel,bound,kurtosis", [("uniform", math.sqrt(3), -1.2),
                                                   ("triangular", math.sqrt(6), -0.6)])
def test_compact_kernels_under_spherical_covariance_without_nugget(kernel, bound, kurtosis):
    # spherical model, no nugget, another grid and seed than tests/test_noise.py: the
    # error never leaves the kernel's support (uniform sqrt(3) RMSE, triangular sqrt(6)
    # RMSE: variances h²/3 and h²/6) and its excess kurtosis is the kernel's
    rmse = 0.4
    assert stats.uniform(-1, 2).stats(moments="k") == pytest.approx(-1.2)
    assert stats.triang(0.5, -1, 2).stats(moments="k") == pytest.approx(-0.6)
    s = ErrorSampler(ErrorModel(rmse=rmse, kernel=kernel, range_m=120.0,
                                covariance="spherical", nugget=0.0), (320, 256), (15.0, 15.0))
    e = np.concatenate([s.draw(2027, i).ravel() for i in range(4)]).astype(np.float64)
    assert np.abs(e).max() <= bound * rmse * (1 + 1e-6)
    assert e.std() == pytest.approx(rmse, rel=0.04)
    assert stats.kurtosis(e) == pytest.approx(kurtosis, abs=0.1)


def test_correlated_kernel_is_accepted_and_recorded(tmp_path, cairn):
    # `cairn peaks --range 500 --kernel uniform`: the kernel is used and run.json says so
    z = np.round(smooth_terrain((50, 60), seed=12)).astype(np.int16)
    dem = write_tif(tmp_path / "d.tif", z, units="metre")
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "p", "--rmse", "1", "--range", "500",
                         "--kernel", "uniform", "-n", "2", "--workers", "1")
    assert code == 0, err
    assert "RMSE 1 m (uniform, exponential range 500 m)" in err
    run = json.loads((tmp_path / "p" / "run.json").read_text())
    assert run["parameters"]["error_model"]["kernel"] == "uniform"
    assert run["parameters"]["error_model"]["range_m"] == 500.0


# -- a sweep under correlated error on real terrain ----------------------------------------
@pytest.mark.slow
def test_sweep_with_correlated_error_on_the_usgs_dem(tmp_path, cairn, usgs_dem):
    dem = write_tif(tmp_path / "usgs.tif", usgs_dem[:120, :140].astype(np.int16),
                    units="metre", transform=from_origin(700000.0, 4030000.0, 90.0, 90.0))
    code, out, err = cairn("sweep", dem, "-o", tmp_path / "s", "--kind", "peaks",
                           "--rmse", "1,4", "--kernel", "gaussian,uniform", "--range", "500",
                           "-n", "12", "--workers", "1")
    assert code == 0, err
    sweep = pd.read_csv(tmp_path / "s" / "sweep.csv")
    assert sweep["unperturbed"].notna().all()
    # one unperturbed figure per feature, the same at every level and kernel
    assert (sweep.groupby("feature_id")["unperturbed"].nunique() == 1).all()
    summits = sweep.pivot_table(index="feature_id", values="unperturbed", aggfunc="first")
    assert (summits["unperturbed"] > 0).all()
    sens = pd.read_csv(tmp_path / "s" / "kernel_sensitivity.csv")
    assert len(sens) > 0 and set(sens["rmse"]) == {1, 4}
    assert (sens["layer_max_abs_diff"] > 0).all()  # the kernels differ under --range
    assert sens["layer_max_abs_diff_se"].notna().all()
    assert "±" in out + err


# -- outlets in a third CRS ----------------------------------------------------------------
def _valley_dem(tmp_path):
    """A V-shaped valley draining south on a UTM 33N grid (10 m cells), and two floor
    cells as gauges (DEM's CRS)."""
    r, c = np.mgrid[0:80, 0:41]
    z = (np.abs(c - 20) + 0.2 * (79 - r)).astype(np.float32)
    dem = write_tif(tmp_path / "v.tif", z, transform=from_origin(500000.0, 6800000.0, 10, 10),
                    units="metre")
    with rasterio.open(dem) as ds:
        return dem, [ds.xy(60, 20), ds.xy(25, 20)]


@pytest.mark.real_figures
def test_outlets_in_web_mercator_keep_their_coordinates_and_the_map_ties_them(tmp_path, cairn):
    import geopandas as gpd
    from pyproj import Transformer
    from shapely.geometry import Point

    from terrain.io import read_dem, read_outlets
    from terrain.jobs import CatchmentJob
    from terrain.outputs.plot import catchment_map
    from terrain.summary.catchments import summarise_catchments

    dem, utm = _valley_dem(tmp_path)
    merc = [Transformer.from_crs("EPSG:32633", "EPSG:3857", always_xy=True).transform(*p)
            for p in utm]
    gpd.GeoDataFrame({"id": ["low", "high"]}, geometry=[Point(*p) for p in merc],
                     crs="EPSG:3857").to_file(tmp_path / "g.gpkg", driver="GPKG")
    code, _, err = cairn("catchments", dem, "--outlets", tmp_path / "g.gpkg", "-o",
                         tmp_path / "out", "--rmse", "0.05", "-n", "2", "--workers", "1", "-q")
    assert code == 0, err
    t = pd.read_csv(tmp_path / "out" / "outlets.csv")
    np.testing.assert_allclose(t[["x", "y"]].to_numpy(), merc, atol=1e-6)
    assert (t["crs"] == "EPSG:3857").all()
    np.testing.assert_allclose(t[["x_dem", "y_dem"]].to_numpy(), utm, atol=0.01)
    # the map ties each outlet as given (in the DEM's CRS) to its snapped cell: no tie
    # runs off to the point's Web Mercator coordinates
    d = read_dem(dem)
    pts = read_outlets(tmp_path / "g.gpkg", d)
    res = run_ensemble(d, CatchmentJob(pts.ids, pts.xy), ErrorModel(rmse=0.05),
                       realisations=2, backend="serial")
    fig = catchment_map(res, summarise_catchments(res, pts.attributes, outlets=pts))
    ax = fig.axes[0]
    ties = [c for c in ax.collections if c.get_label() == "outlet as given to its snapped cell"]
    assert len(ties) == 1
    ends = np.concatenate(ties[0].get_segments())
    # the DEM spans x 500000-500410, y 6799200-6800000
    assert (ends[:, 0] >= 500000 - 1).all() and (ends[:, 0] <= 500410 + 1).all()
    assert (ends[:, 1] >= 6799200 - 1).all() and (ends[:, 1] <= 6800000 + 1).all()


def test_csv_outlets_off_the_raster_in_an_assumed_crs_say_it_was_assumed(tmp_path, cairn):
    # longitudes and latitudes in a CSV with no CRS are taken in the DEM's CRS (UTM) and
    # miss the raster: the one error line says the CRS was assumed and how to give it
    from pyproj import Transformer

    dem, utm = _valley_dem(tmp_path)
    geo = [Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True).transform(*p)
           for p in utm]
    (tmp_path / "g.csv").write_text("id,x,y\n" + "".join(f"g{i},{x},{y}\n"
                                                         for i, (x, y) in enumerate(geo)))
    code, _, err = cairn("catchments", dem, "--outlets", tmp_path / "g.csv", "-o",
                         tmp_path / "out", "--rmse", "0.05", "-n", "2", "--workers", "1")
    lines = [x for x in err.strip().splitlines() if not x.startswith("cairn: warning:")]
    assert code == 2 and len(lines) == 1
    assert "outside the raster" in lines[0] and "assumed" in lines[0]
    assert "--outlets-crs" in lines[0] and "g.csv.crs" in lines[0]
    assert not (tmp_path / "out" / "outlets.csv").exists()


# -- the float32 frame: peaks on a float64 DEM far above zero ------------------------------
def test_peaks_on_a_float64_dem_around_1e8_keep_centimetres():
    # float32 steps by 8 at 1e8 (24-bit significand, IEEE 754): without the reference
    # elevation a 5 cm RMSE would be lost; relative to the lowest cell the figures are
    # those of the same relief near zero
    assert float(np.spacing(np.float32(1e8))) == 8.0
    z = smooth_terrain((50, 50), seed=21).astype(np.float64)
    tables = []
    for offset in (0.0, 1e8):
        dem = Dem.from_array(z + offset, cellsize=10.0)
        res = run_ensemble(dem, CreditJob("peaks", threshold=1.0), ErrorModel(rmse=0.05),
                           realisations=4, seed=5, backend="serial")
        tables.append(summarise_features(res).table)
    a, b = tables
    np.testing.assert_allclose(b["unperturbed"], a["unperturbed"], atol=1e-4)
    np.testing.assert_allclose(b["expected"], a["expected"], atol=1e-3)
    np.testing.assert_allclose(b["elevation"] - 1e8, a["elevation"], atol=1e-3)


def test_a_library_dem_declaring_feet_is_in_feet():
    # Dem(vertical_units=...) is the declaration a file would carry: it sets the unit
    # (it was ignored, so volumes of a DEM in feet came out 3.28 times too large)
    from terrain.errors import OptionError

    z = np.zeros((4, 4), np.float32)
    d = Dem.from_array(z, vertical_units="US survey foot")
    assert (d.vertical_unit, d.vertical_unit_source) == ("us-ft", "declared")
    assert d.metres_per_unit == US_FOOT
    given = Dem.from_array(z, vertical_units="metre", vertical_unit="ft",
                           vertical_unit_source="given")
    assert given.vertical_unit == "ft"
    assert Dem.from_array(z).vertical_unit_source == "assumed"
    with pytest.raises(OptionError, match="'cm'"):
        Dem.from_array(z, vertical_units="cm")
