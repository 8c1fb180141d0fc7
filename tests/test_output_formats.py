"""File formats a GIS, a cloud store and a spreadsheet open well.

Sources named beside each check:
- OGC Cloud Optimized GeoTIFF Standard (OGC 21-026, 2023; the number from
  memory), checked with rio-cogeo's ``cog_validate`` (a general-purpose
  validator from the package index, the rasterio port of GDAL's
  validate_cloud_optimized_geotiff.py) and by reading a window and an
  overview back with rasterio;
- band statistics against numpy (population standard deviation, as GDAL
  stores it in ``STATISTICS_STDDEV``);
- overviews against the definition of average resampling (the mean of the
  valid cells each overview cell covers; GDAL's documentation of
  ``average``);
- OGC GeoPackage Encoding Standard 1.3 (2021): the ``gpkg_contents`` table
  has a ``description`` column per layer, read here with sqlite3;
- RFC 4180 (2005), Common Format and MIME Type for CSV Files: one header row,
  read here with the standard library's csv module.
"""

from __future__ import annotations

import csv
import json
import sqlite3
import warnings

import numpy as np
import pandas as pd
import pytest
import rasterio
from rasterio.windows import Window
from rio_cogeo.cogeo import cog_validate

from terrain.dem import Dem
from terrain.jobs import CreditJob
from terrain.layers import DRAINAGE_NOTE, LAYERS, spec
from terrain.noise import ErrorModel
from terrain.outputs.tables import AS_IS, DECIMALS, rounded
from terrain.outputs.writer import CAUTION, write_layers
from terrain.runner import run_ensemble
from terrain.summary.catchments import CATCHMENT_COLUMN_KINDS, CATCHMENT_COLUMNS
from terrain.summary.features import COLUMN_KINDS, COLUMNS
from terrain.sweep import SENSITIVITY_COLUMN_KINDS, SENSITIVITY_COLUMNS, SWEEP_COLUMN_KINDS, SWEEP_COLUMNS

from .conftest import smooth_terrain, use_stand_in_figures, write_tif

STATS = ("STATISTICS_MINIMUM", "STATISTICS_MAXIMUM", "STATISTICS_MEAN", "STATISTICS_STDDEV",
         "STATISTICS_VALID_PERCENT")


def check_cog(path) -> tuple[np.ndarray, ...]:
    """Assert ``path`` is a valid COG with stored statistics; return every band.

    Validity: OGC Cloud Optimized GeoTIFF Standard (2023) through rio-cogeo's
    cog_validate with strict=True (a warning fails too). Statistics: numpy.
    Window and overview: read back with rasterio and compared with the full
    array (the window) and with the mean of the valid cells (the overview).
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # rasterio: no-CRS rasters
        valid, errors, warns = cog_validate(path, strict=True, quiet=True)
    assert valid and not errors and not warns, (path, errors, warns)
    with rasterio.open(path) as ds:
        assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"  # GDAL's own verdict
        assert ds.compression.name == "deflate" and ds.tags(ns="IMAGE_STRUCTURE")["PREDICTOR"] == "3"
        bands = tuple(ds.read(b) for b in range(1, ds.count + 1))
        for b, arr in enumerate(bands, start=1):
            tags = ds.tags(b)
            assert set(STATS) <= set(tags), (path, b, tags)
            ok = np.isfinite(arr)
            v = arr[ok].astype(np.float64)
            want = (v.min(), v.max(), v.mean(), v.std())
            got = [float(tags[k]) for k in STATS[:4]]
            np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9 * max(1.0, abs(v).max()))
            # GDAL stores the valid percentage rounded (99.5 for 99.514 as measured here)
            assert float(tags["STATISTICS_VALID_PERCENT"]) == pytest.approx(100 * ok.mean(), abs=0.02)
        r, c = ds.height, ds.width
        win = Window(c // 3, r // 4, max(1, c // 2), max(1, r // 2))
        np.testing.assert_array_equal(ds.read(1, window=win),
                                      bands[0][win.row_off:win.row_off + win.height,
                                               win.col_off:win.col_off + win.width])
        factors = ds.overviews(1)
    if factors:
        with rasterio.open(path, overview_level=0) as ov:
            small = ov.read(1)
        f = factors[0]
        h, w = (r // f) * f, (c // f) * f  # whole blocks; GDAL's edge cells may differ
        blocks = bands[0][:h, :w].reshape(h // f, f, w // f, f)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN blocks
            mean = np.nanmean(blocks, axis=(1, 3))
        np.testing.assert_allclose(small[:h // f, :w // f], mean, rtol=1e-5, atol=1e-6)
    return bands


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """peaks and depressions from the CLI on a raster big enough for overviews, with a hole."""
    from click.testing import CliRunner

    from cairn_cli.main import cli

    tmp = tmp_path_factory.mktemp("formats")
    z = np.round(smooth_terrain((300, 270), seed=8)).astype(np.int16)
    z[140:160, 100:130] = -9999
    dem = write_tif(tmp / "dem.tif", z, nodata=-9999, units="metre")
    out = {}
    with pytest.MonkeyPatch.context() as mp:  # the layers and tables are checked here, and
        use_stand_in_figures(mp)              # the figures in test_pictures and test_cli
        for cmd in ("peaks", "depressions"):
            out[cmd] = tmp / cmd
            res = CliRunner().invoke(cli, [cmd, str(dem), "-o", str(out[cmd]), "--rmse", "1.5",
                                           "-n", "4", "--seed", "2", "--workers", "1", "-q"],
                                     catch_exceptions=False)
            assert res.exit_code == 0, res.output
    return dem, out


@pytest.mark.slow
@pytest.mark.parametrize("cmd", ["peaks", "depressions"])
def test_every_layer_is_a_valid_cog_with_statistics(runs, cmd):
    _, out = runs
    tifs = sorted(out[cmd].glob("*.tif"))
    assert len(tifs) == sum(s.job == cmd for s in LAYERS.values())
    for path in tifs:
        est, se = check_cog(path)
        assert np.isnan(est[150, 110]) and np.isnan(se[150, 110])  # the DEM's hole stays nodata
        with rasterio.open(path) as ds:
            s = spec(path.stem)
            # band descriptions, units and tags survive the COG driver's copy
            assert ds.descriptions[0].startswith(f"{path.stem} (")
            assert ds.descriptions[1].startswith(f"{path.stem} standard error (")
            assert ds.units[0] == ds.units[1] and ds.units[0] in ("m", "probability")
            tags = ds.tags()
            assert tags["LAYER"] == path.stem and tags["DESCRIPTION"] == s.description
            assert tags["caution"] == CAUTION  # the full text, not a shortened one
            assert json.loads(tags["error_model"])["rmse"] == 1.5 and tags["realisations"] == "4"
            assert ds.tags(1)["ROLE"] == "estimate" and ds.tags(2)["ROLE"] == "standard_error"
            if s.note:  # the drainage note travels in the band metadata and descriptions
                assert all(ds.tags(b)["NOTE"] == s.note for b in (1, 2))
                assert all(d.endswith(s.note) for d in ds.descriptions)
            else:
                assert "NOTE" not in ds.tags(1)
    assert not [p for p in out[cmd].iterdir() if ".tmp" in p.name or ".part" in p.name]


def test_layers_read_back_bit_identical(tmp_path):
    # reference: the float32 arrays of the run with NaN on nodata, and the same arrays
    # written by a plain tiled GeoTIFF writer in this test (the layout before COG)
    z = smooth_terrain((90, 80), seed=3)
    nodata = np.zeros(z.shape, bool)
    nodata[:5, :7] = True
    dem = Dem.from_array(np.where(nodata, np.nan, z).astype(np.float32), cellsize=10.0,
                         crs="EPSG:32633")
    res = run_ensemble(dem, CreditJob("depressions", threshold=20.0), ErrorModel(rmse=2.0),
                       realisations=3, seed=5, backend="serial")
    write_layers(tmp_path, res, command_line=None)
    for name, (est, se) in res.layers.items():
        want = [np.where(dem.nodata, np.nan, a).astype(np.float32) for a in (est, se)]
        ref = tmp_path / f"{name}.plain.tif"
        with rasterio.open(ref, "w", driver="GTiff", height=90, width=80, count=2,
                           dtype="float32", nodata=np.nan, tiled=True, blockxsize=16,
                           blockysize=16, compress="deflate", predictor=3,
                           transform=rasterio.Affine(*dem.transform)) as ds:
            ds.write(np.stack(want))
        with rasterio.open(ref) as ds:
            old = ds.read()
        got = check_cog(tmp_path / f"{name}.tif")
        for g, w, o in zip(got, want, old):
            assert np.array_equal(g.view(np.uint32), w.view(np.uint32))
            assert np.array_equal(g.view(np.uint32), o.view(np.uint32))


def test_the_validator_tells_a_plain_geotiff_from_a_cog(tmp_path):
    # negative control: a tiled GeoTIFF whose overviews are added after the image (the
    # layout cairn wrote before) is not laid out as the COG standard requires
    from rasterio.enums import Resampling

    path = tmp_path / "plain.tif"
    with rasterio.open(path, "w", driver="GTiff", height=600, width=600, count=1,
                       dtype="float32", tiled=True, blockxsize=256, blockysize=256,
                       compress="deflate", transform=rasterio.Affine(10, 0, 0, 0, -10, 6000),
                       crs="EPSG:32633") as ds:
        ds.write(smooth_terrain((600, 600), seed=1), 1)
        ds.build_overviews([2, 4], Resampling.average)
    valid, errors, _ = cog_validate(path, strict=True, quiet=True)
    assert not valid and errors


def test_geopackage_layers_are_described(runs):
    # OGC GeoPackage Encoding Standard 1.3: gpkg_contents.description, read with sqlite3
    _, out = runs
    from terrain.outputs.manifest import VECTOR_LAYERS
    from terrain.summary.features import LAYER_NAMES, RANK_LAYER
    from terrain.summary.relations import LINK_TABLE

    for cmd, gpkg in (("peaks", "peaks.gpkg"), ("depressions", "depressions.gpkg")):
        with sqlite3.connect(out[cmd] / gpkg) as con:
            rows = dict(con.execute("SELECT table_name, description FROM gpkg_contents"))
            kinds = dict(con.execute("SELECT table_name, data_type FROM gpkg_contents"))
        assert set(rows) == set(LAYER_NAMES[cmd]) | {RANK_LAYER, LINK_TABLE[cmd]}
        assert kinds[RANK_LAYER] == "attributes"  # a table without geometry
        assert kinds[LINK_TABLE[cmd]] == ("attributes" if cmd == "peaks" else "features")
        for name, text in rows.items():
            assert text.startswith(VECTOR_LAYERS[name])  # what the layer is
            assert "RMSE 1.5 m (gaussian)" in text and "4 realisations, seed 2" in text
            assert text.endswith(CAUTION)


def test_csv_is_rounded_by_column_kind(runs):
    # RFC 4180 (2005): one plain header row; read with the standard library's csv
    _, out = runs
    with open(out["depressions"] / "pits.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == list(COLUMNS["depressions"])
    assert len(rows) > 2
    for row in rows[1:]:
        for col, cell in zip(rows[0], row):
            kind = COLUMN_KINDS[col]
            if kind in AS_IS or cell == "":
                continue
            decimals = len(cell.split(".")[1]) if "." in cell else 0
            assert "e" not in cell.lower() and decimals <= DECIMALS[kind], (col, cell)
    # the same numbers as the GeoPackage, rounded (half a unit of the last decimal)
    import pyogrio

    gpkg = pyogrio.read_dataframe(out["depressions"] / "depressions.gpkg", layer="pits")
    table = pd.read_csv(out["depressions"] / "pits.csv")
    for col in COLUMNS["depressions"]:
        kind = COLUMN_KINDS[col]
        if kind in AS_IS:
            np.testing.assert_array_equal(table[col].to_numpy(), gpkg[col].to_numpy())
        else:
            np.testing.assert_allclose(table[col], gpkg[col], rtol=0,
                                       atol=0.5 * 10.0 ** -DECIMALS[kind] + 1e-9)


def test_every_table_column_has_a_known_kind():
    features = {c for cols in COLUMNS.values() for c in cols}
    from terrain.summary.ranks import RANK_COLUMN_KINDS, RANK_COLUMNS

    for columns, kinds in ((features, COLUMN_KINDS), (CATCHMENT_COLUMNS, CATCHMENT_COLUMN_KINDS),
                           (SWEEP_COLUMNS, SWEEP_COLUMN_KINDS),
                           (SENSITIVITY_COLUMNS, SENSITIVITY_COLUMN_KINDS),
                           (RANK_COLUMNS, RANK_COLUMN_KINDS)):
        assert set(kinds) == set(columns)
        assert set(kinds.values()) <= set(DECIMALS) | AS_IS


def test_rounding_follows_the_kind_not_the_value():
    # common practice (no published source): 0.01 of a projected unit is 1 cm in metres;
    # 1e-7 degree of latitude is about 1.1 cm (one degree is about 111 km)
    df = pd.DataFrame({"x": [512345.678912, 15.123456789], "p_first": [0.123456, 1 / 3],
                       "expected": [193.74609619140625, 0.004], "rank": [1, 2]})
    kinds = {"x": "coordinate", "p_first": "probability", "expected": "vertical",
             "rank": "integer"}
    r = rounded(df, kinds)
    assert r["x"].tolist() == [512345.68, 15.12] and r["p_first"].tolist() == [0.1235, 0.3333]
    assert r["expected"].tolist() == [193.75, 0.0] and r["rank"].tolist() == [1, 2]
    assert rounded(df, kinds, geographic=True)["x"].tolist() == [512345.678912, 15.1234568]
    assert rounded(df, {})["expected"].tolist() == df["expected"].tolist()


def test_run_json_records_writing_time(runs):
    _, out = runs
    t = json.loads((out["peaks"] / "run.json").read_text())["timings"]
    assert {"realisations_s", "layers_s", "tables_s", "figures_s", "writing_s", "run_s",
            "writing_share", "layers_share"} <= set(t)
    # layers and tables are written while the figures are drawn: the writing's wall
    # time is at least its longest step and at most their sum
    steps = (t["layers_s"], t["tables_s"], t["figures_s"])
    assert max(steps) - 0.01 <= t["writing_s"] <= sum(steps) + 0.01
    assert 0 < t["layers_share"] <= t["writing_share"] < 1


def test_catchment_layers_and_table_carry_the_drainage_note(tmp_path, cairn):
    z = smooth_terrain((280, 300), seed=4).astype(np.float32)
    dem = write_tif(tmp_path / "d.tif", z, units="metre")
    with rasterio.open(dem) as ds:
        x, y = ds.xy(150, 140)
    (tmp_path / "o.csv").write_text(f"id,x,y\nford,{x},{y}\n")
    code, _, err = cairn("catchments", dem, "--outlets", tmp_path / "o.csv", "-o", tmp_path / "o",
                         "--rmse", "0.5", "-n", "3", "--workers", "1", "-q")
    assert code == 0, err
    for name in ("catchment_probability_ford", "divide_probability"):
        check_cog(tmp_path / "o" / f"{name}.tif")
        with rasterio.open(tmp_path / "o" / f"{name}.tif") as ds:
            assert ds.tags(1)["NOTE"] == DRAINAGE_NOTE and DRAINAGE_NOTE in ds.descriptions[0]
    with sqlite3.connect(tmp_path / "o" / "catchments.gpkg") as con:
        (text,) = con.execute("SELECT description FROM gpkg_contents "
                              "WHERE table_name = 'catchments'").fetchone()
    assert DRAINAGE_NOTE in text and text.endswith(CAUTION)
    with open(tmp_path / "o" / "catchments.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == list(CATCHMENT_COLUMNS)
    assert all(len(c.split(".")[1]) <= 2 for r in rows[1:] for c in r[2:] if "." in c)


@pytest.mark.parametrize("kernels", [("gaussian",),
                                     ("gaussian", "epanechnikov", "triangular", "uniform")])
def test_sweep_figure_reads_at_one_kernel_and_at_four(kernels):
    # checked through matplotlib's own objects (rendered extents in pixels): nothing cut off,
    # legends outside the panels, one panel per statistic; common practice, no published source
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from terrain.outputs.sweepchart import sweep_figure
    from terrain.sweep import sweep, sweep_models

    z = np.zeros((15, 31), np.float32)
    z[7, 7:24] = 48.0
    z[7, 7], z[7, 23], z[3, 3] = 50.0, 50.25, 20.0
    dem = Dem.from_array(z, cellsize=10.0)
    models = sweep_models(ErrorModel(rmse=1.0), (0.25, 1.0), kernels)
    res = sweep(dem, CreditJob("peaks", threshold=5.0), models, realisations=8, seed=1,
                backend="serial")
    fig = sweep_figure(res, units="metre")
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    page = fig.bbox
    assert len(fig.axes) == 2  # credit share, P(ranks first)
    assert [ax.get_ylabel() for ax in fig.axes] == ["share of total credit", "P(ranks first)"]
    assert "attribution" in fig.get_suptitle()
    # everything drawn (titles, axis and tick labels, legends) lies on the page
    drawn = fig.get_tightbbox(renderer).transformed(fig.dpi_scale_trans)
    assert (drawn.x0 >= page.x0 - 1 and drawn.y0 >= page.y0 - 1 and drawn.x1 <= page.x1 + 1
            and drawn.y1 <= page.y1 + 1), (drawn, page)
    legends = [ax.get_legend() for ax in fig.axes]
    for leg in legends:
        box = leg.get_window_extent(renderer)
        assert all(not box.overlaps(ax.get_window_extent(renderer)) for ax in fig.axes)
    names = [[t.get_text() for t in leg.get_texts()] for leg in legends]
    assert names[0] == [f"summit #{f}" for f in res.top] and names[1] == list(kernels)


def test_every_geopackage_layer_has_a_description():
    from terrain.outputs.manifest import MANIFEST, VECTOR_LAYERS

    named = {lyr for files in MANIFEST.values() for f in files for lyr in f.layers}
    assert named and named <= set(VECTOR_LAYERS)
