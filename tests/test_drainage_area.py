"""The drainage-area layer: per cell the median, 5% and 95% upslope area over realisations.

Sources: D8 (O'Callaghan & Mark 1984, CVGIP 28): steepest descent among 8
neighbours, diagonal distance sqrt(w^2 + h^2), re-implemented here in plain
Python as an independent accumulation (each cell adds its area to every cell
on its path down); geodesic cell areas and lengths by ``pyproj.Geod``
(Karney 2013, J. Geodesy 87); sample quantiles by numpy's ``inverted_cdf``
(Hyndman & Fan 1996, The American Statistician 50(4), definition 1).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import rasterio

from terrain.dem import Dem
from terrain.engine.hydro import condition, route
from terrain.jobs import CatchmentJob
from terrain.jobs.drainage_area import AreaCodes
from terrain.noise import ErrorModel, ErrorSampler
from terrain.outputs.plot import catchment_map
from terrain.runner import run_ensemble

from .conftest import smooth_terrain, write_tif
from .reference_fill import fill_depressions
from .test_drainage import tributary_valley

CELL = 10.0
STEP = 2 ** (1 / 16) - 1  # half an eighth of an octave: 4.4%


def d8_accumulation(z, width, height, area):
    """D8 written independently: every cell follows its steepest downhill neighbour
    (diagonals at sqrt(w^2 + h^2); ``width``, ``height``, ``area`` per row) until a
    cell with no lower neighbour, adding its own area to each cell on the way."""
    nr, nc = z.shape
    down = {}
    for r in range(nr):
        for c in range(nc):
            best, arg = 0.0, None
            for dr in (-1, 0, 1):
                for dc in (-1, 0, 1):
                    if (dr or dc) and 0 <= r + dr < nr and 0 <= c + dc < nc:
                        dist = math.hypot(width[r] * (dc != 0), height[r] * (dr != 0))
                        s = (z[r, c] - z[r + dr, c + dc]) / dist
                        if s > best:
                            best, arg = s, (r + dr, c + dc)
            down[(r, c)] = arg
    acc = np.zeros(z.shape)
    for r in range(nr):
        for c in range(nc):
            p = (r, c)
            while p is not None:
                acc[p] += area[r]
                p = down[p]
    return acc


def test_cli_layer_equals_an_independent_d8_accumulation(tmp_path, cairn):
    # an error-free run (RMSE far below float32's step at these elevations: every
    # realisation is the DEM itself) on a surface without depressions or flats
    z = tributary_valley().astype(np.float32)
    np.testing.assert_array_equal(fill_depressions(z.astype(np.float64)), z)  # no depression
    dem = write_tif(tmp_path / "v.tif", z, units="metre")
    code, _, err = cairn("catchments", dem, "-o", tmp_path / "out", "--rmse", "1e-9", "-n", "3",
                         "--workers", "1", "-q")
    assert code == 0, err
    nr = z.shape[0]
    ref = d8_accumulation(z, [CELL] * nr, [CELL] * nr, [CELL * CELL] * nr)
    from .test_output_formats import check_cog

    bands = check_cog(tmp_path / "out" / "drainage_area.tif")  # COG, statistics stored
    assert len(bands) == 3
    for b in bands:  # median, 5% and 95% all equal the D8 accumulation, cell for cell
        np.testing.assert_array_equal(b, ref.astype(np.float32))
    with rasterio.open(tmp_path / "out" / "drainage_area.tif") as ds:
        assert [ds.tags(b)["ROLE"] for b in (1, 2, 3)] == ["median", "p05", "p95"]
        assert "median" in ds.descriptions[0] and "5%" in ds.descriptions[1]
        assert "95%" in ds.descriptions[2] and ds.units == ("m²",) * 3
        assert all("not flood behaviour" in ds.tags(b)["NOTE"] for b in (1, 2, 3))
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["realisations_done"] == 3


def test_geographic_layer_equals_an_independent_d8_accumulation():
    from pyproj import Geod

    z = tributary_valley(40, 31).astype(np.float32)
    d = 1e-4  # degrees, at 60 N: cells about 5.6 m wide and 11.1 m tall
    dem = Dem.from_array(z, transform=(d, 0, 10.0, 0, -d, 60.0), crs="EPSG:4326",
                         geographic=True)
    g = Geod(ellps="WGS84")
    nr = z.shape[0]
    lat = [60 - d * (i + 0.5) for i in range(nr)]
    width = [g.inv(10.0, la, 10.0 + d, la)[2] for la in lat]
    height = [g.inv(10.0, la + d / 2, 10.0, la - d / 2)[2] for la in lat]
    area = [abs(g.polygon_area_perimeter([10.0, 10.0 + d, 10.0 + d, 10.0],
                                         [60 - d * (i + 1)] * 2 + [60 - d * i] * 2)[0])
            for i in range(nr)]
    res = run_ensemble(dem, CatchmentJob(), ErrorModel(rmse=1e-9), realisations=2, seed=1,
                       backend="serial")
    ref = d8_accumulation(z, width, height, area)
    for b in res.layers["drainage_area"]:
        np.testing.assert_allclose(b, ref, rtol=1e-6)


def test_quantiles_are_the_sample_quantiles_within_half_a_step():
    # a noisy run: per cell the realisations' areas spread over orders of magnitude; the
    # layer's bands are numpy's inverted-CDF sample quantiles of the very accumulations
    # the realisations made, exactly up to 16 cells and where all realisations agree,
    # else within half an eighth of an octave
    z = smooth_terrain((40, 48), seed=6, amp=30.0)
    dem = Dem.from_array(z, cellsize=CELL)
    model = ErrorModel(rmse=1.0)
    n, seed = 41, 3
    res = run_ensemble(dem, CatchmentJob(), model, realisations=n, seed=seed, backend="serial")
    sampler = ErrorSampler(model, dem.shape, (CELL, CELL))
    accs = []
    for i in range(n):
        zi = sampler.draw(seed, i)
        zi += z
        condition(zi, method="breach", max_depth=3.0)
        accs.append(route(zi, cell_w=CELL, cell_h=CELL, cell_area=CELL * CELL).acc)
    a = np.array(accs).reshape(n, *z.shape)
    exact = np.quantile(a, [0.5, 0.05, 0.95], axis=0, method="inverted_cdf")
    spread = np.log2(a.max(axis=0) / a.min(axis=0))
    assert np.median(spread) > 2  # the realisations disagree a lot: a real test
    between = 0  # cells whose quantile is neither small nor an extreme: the 4.4% case
    for got, want in zip(res.layers["drainage_area"], exact):
        got = got.astype(np.float32).astype(np.float64)
        want32 = want.astype(np.float32).astype(np.float64)
        assert np.all(np.abs(got / want - 1) <= STEP + 1e-6)
        small = want <= 16 * CELL * CELL
        extreme = a.min(axis=0) == a.max(axis=0)
        np.testing.assert_array_equal(got[small | extreme], want32[small | extreme])
        between += int((~small & ~extreme).sum())
    assert between > 50


def test_quantiles_on_the_usgs_dem(usgs_dem):
    # real terrain (matplotlib's USGS 3 arc-second DEM: integer metres, flats, geographic
    # cells of latitude-dependent area): the bands are numpy's inverted-CDF quantiles of
    # the realisations' own accumulations to within half a step, ordered p05 <= median <=
    # p95, and where every realisation agrees they are exact
    z = usgs_dem[:90, :110].astype(np.float32)
    d = 0.00083333
    dem = Dem.from_array(z, transform=(d, 0, -84.41375, 0, -d, 36.73291667), crs="EPSG:4326",
                         geographic=True)
    model = ErrorModel(rmse=2.0, range_m=500.0)
    n, seed = 25, 7
    res = run_ensemble(dem, CatchmentJob(), model, realisations=n, seed=seed, backend="serial")
    w, h = dem.cell_metres()
    sampler = ErrorSampler(model, dem.shape, (float(np.mean(h)), float(np.mean(w))))
    accs = []
    for i in range(n):
        zi = sampler.draw(seed, i)
        zi += z
        condition(zi, method="breach", max_depth=3.0)
        accs.append(route(zi, cell_w=w, cell_h=h, cell_area=dem.cell_area_m2()).acc)
    a = np.array(accs).reshape(n, *z.shape)
    exact = np.quantile(a, [0.5, 0.05, 0.95], axis=0, method="inverted_cdf")
    median, p05, p95 = res.layers["drainage_area"]
    assert np.all(p05 <= median) and np.all(median <= p95)
    agree = a.min(axis=0) == a.max(axis=0)
    for got, want in zip((median, p05, p95), exact):
        assert np.all(np.abs(got / want - 1) <= STEP + 1e-6)
        np.testing.assert_array_equal(got[agree].astype(np.float32), want[agree].astype(np.float32))
    assert agree.any() and (~agree).mean() > 0.5


def test_codes_cover_the_grid():
    # 16 exact codes, then 8 per octave up to the grid's whole area
    assert AreaCodes.codes_for(16).size == 17
    assert AreaCodes.codes_for(1e6).size == 16 + 8 * math.ceil(math.log2(1e6 / 16.5)) + 1
    assert AreaCodes.codes_for(2 ** 40).size == 255  # capped below the nodata code
    codes = AreaCodes.codes_for(1e6)
    assert [codes.value(c) for c in (0, 15)] == [1.0, 16.0]
    assert codes.value(17) / codes.value(16) == pytest.approx(2 ** (1 / 8))


def test_quicklook_without_outlets_shows_drainage_area_on_a_log_scale():
    z = tributary_valley(40, 31)
    dem = Dem.from_array(z, cellsize=CELL, crs="EPSG:32633")
    res = run_ensemble(dem, CatchmentJob(channel_area=3e7), ErrorModel(rmse=0.01),
                       realisations=2, backend="serial")
    fig = catchment_map(res)
    bar = [a for a in fig.axes if getattr(a, "_colorbar", None) is not None][0]
    label = bar.get_ylabel().replace("\n", " ")
    assert "drainage area" in label and "log scale" in label and "m²" in label
    texts = " ".join(t.get_text() for t in fig.texts)
    assert "30 km²" in texts and "3e+07" not in texts  # the channel area in words


def test_log_colour_bar_ticks_read_as_powers_of_ten_in_plain_text():
    # figures are saved with mathtext off (terrain.outputs.writer): matplotlib's own log
    # ticks ('$\mathdefault{10^{5}}$') were then printed as raw TeX on the colour bar
    import matplotlib

    from terrain.outputs.mapframe import power_of_ten

    assert [power_of_ten(v) for v in (1e5, 1e8, 1.0, 10.0, 0.01, 3e5)] == [
        "10⁵", "10⁸", "1", "10", "10⁻²", "300000"]
    z = tributary_valley(40, 31)
    dem = Dem.from_array(z, cellsize=CELL, crs="EPSG:32633")
    res = run_ensemble(dem, CatchmentJob(channel_area=2e4), ErrorModel(rmse=0.01),
                       realisations=2, backend="serial")
    with matplotlib.rc_context({"text.parse_math": False}):
        fig = catchment_map(res)
        fig.canvas.draw()
    bar = [a for a in fig.axes if getattr(a, "_colorbar", None) is not None][0]
    ticks = [t.get_text() for t in bar.get_yticklabels() if t.get_text()]
    assert ticks and all("$" not in t and "\\" not in t for t in ticks)
    assert all(t.startswith("10") for t in ticks), ticks
