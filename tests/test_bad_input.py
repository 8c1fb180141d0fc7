"""What users throw at cairn: one clear line, exit 2, nothing written; or a defined answer.

Each case asserts the exit code, the message and the absence (or presence) of
output files.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import rasterio

from .conftest import smooth_terrain, write_tif

RUN = ("--rmse", "1", "-n", "4", "--workers", "1", "-q")


def one_line_error(code, err, *needles):
    lines = err.strip().splitlines()
    assert code == 2, err
    assert len(lines) == 1 and lines[0].startswith("cairn: error:"), err
    for n in needles:
        assert n in lines[0], (n, lines[0])


def nothing_written(out):
    assert not out.exists() or not any(out.iterdir())


@pytest.fixture
def dem(tmp_path):
    return write_tif(tmp_path / "dem.tif", smooth_terrain((40, 40), seed=1))


# -- bad input ---------------------------------------------------------------------
def test_missing_file(cairn, tmp_path):
    for cmd in (("peaks",), ("depressions",), ("inspect",)):
        extra = ("-o", tmp_path / "o", *RUN) if cmd[0] != "inspect" else ()
        code, _, err = cairn(*cmd, tmp_path / "nope.tif", *extra)
        one_line_error(code, err, "nope.tif", "no such file")
    nothing_written(tmp_path / "o")


def test_text_file_named_tif(cairn, tmp_path):
    p = tmp_path / "notes.tif"
    p.write_text("these are my field notes, not a raster\n")
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "notes.tif", "not a raster")
    nothing_written(tmp_path / "o")


def test_truncated_geotiff(cairn, tmp_path):
    full = write_tif(tmp_path / "full.tif", smooth_terrain((200, 200), seed=2))
    data = full.read_bytes()
    cut = tmp_path / "cut.tif"
    cut.write_bytes(data[: len(data) // 2])
    code, _, err = cairn("depressions", cut, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "cut.tif")
    assert "truncated" in err or "not a raster" in err
    nothing_written(tmp_path / "o")


def test_no_valid_cells(cairn, tmp_path):
    p = write_tif(tmp_path / "empty.tif", np.full((5, 6), -9999, np.int16), nodata=-9999)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "empty.tif", "no valid cells")
    nothing_written(tmp_path / "o")


@pytest.mark.parametrize("args,needle", [
    (("--rmse", "nan"), "--rmse"), (("--rmse", "inf"), "--rmse"), (("--rmse", "-1"), "--rmse"),
    (("--rmse", "0"), "--rmse"), (("--le90", "0"), "--le90"),
    (("--rmse", "1", "-n", "0"), "--realisations"), (("--rmse", "1", "-n", "-5"), "--realisations"),
    (("--rmse", "1", "--kernel", "box"), "--kernel"),
    (("--rmse", "1", "--workers", "0"), "--workers"),
    (("--rmse", "1", "--range", "-10"), "--range"),
])
def test_bad_numbers_and_choices(cairn, dem, tmp_path, args, needle):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *args)
    one_line_error(code, err, needle)
    nothing_written(tmp_path / "o")


def test_bbox_outside_raster(cairn, dem, tmp_path):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--bbox", "0,0,10,10")
    one_line_error(code, err, "dem.tif", "outside the raster")
    nothing_written(tmp_path / "o")


def test_bbox_reads_a_window(cairn, dem, tmp_path):
    code, out, _ = cairn("inspect", dem, "--bbox", "500000,6799700,500200,6800000")
    assert code == 0 and "30 rows x 20 columns" in out


def test_multiband_without_band(cairn, tmp_path):
    z = np.stack([smooth_terrain((20, 20), seed=s) for s in (1, 2, 3)])
    p = write_tif(tmp_path / "three.tif", z)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "three.tif", "3 bands", "--band")
    nothing_written(tmp_path / "o")
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN, "--band", "4")
    one_line_error(code, err, "band 4")
    assert cairn("peaks", p, "-o", tmp_path / "o", *RUN, "--band", "2")[0] == 0


def test_output_is_a_file_or_unwritable(cairn, dem, tmp_path):
    f = tmp_path / "afile"
    f.write_text("x")
    code, _, err = cairn("peaks", dem, "-o", f, *RUN)
    one_line_error(code, err, "afile", "is a file")
    code, _, err = cairn("peaks", dem, "-o", f / "sub", *RUN)
    one_line_error(code, err, "cannot create")
    code, _, err = cairn("peaks", dem, "-o", "/proc/cairn-out", *RUN)
    one_line_error(code, err, "/proc/cairn-out")


def test_checkpoint_from_another_run(cairn, dem, tmp_path):
    ck = tmp_path / "ck.npz"
    assert cairn("peaks", dem, "-o", tmp_path / "a", *RUN, "--checkpoint", ck)[0] == 0
    other = write_tif(tmp_path / "other.tif", smooth_terrain((40, 40), seed=2))
    code, _, err = cairn("peaks", other, "-o", tmp_path / "b", *RUN, "--checkpoint", ck, "--resume")
    one_line_error(code, err, "another DEM")
    nothing_written(tmp_path / "b")
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "b", *RUN, "--checkpoint", ck, "--resume",
                         "--seed", "5")
    one_line_error(code, err, "seed")
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "c", *RUN, "--checkpoint", ck)
    one_line_error(code, err, "--resume")


def test_checkpoint_is_never_unpickled(cairn, dem, tmp_path):
    import pickle

    ck = tmp_path / "evil.npz"
    np.savez(ck, params_json=np.array([object()], dtype=object))
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", ck, "--resume")
    one_line_error(code, err, "evil.npz")
    assert pickle  # the file holds a pickled object array; loading refuses it


def test_unreachable_scheduler_fails_fast(cairn, dem, tmp_path):
    t = time.time()
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--scheduler", "tcp://127.0.0.1:9")
    one_line_error(code, err, "tcp://127.0.0.1:9", "scheduler")
    assert time.time() - t < 60


def test_memory_guard(cairn, dem, tmp_path, monkeypatch):
    import terrain.resources as r

    monkeypatch.setattr(r, "available_bytes", lambda: 1000)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "bytes per cell", "--bbox", "--workers", "--force")
    assert cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--force")[0] == 0


# -- edge cases with a defined answer ------------------------------------------------
@pytest.mark.parametrize("shape", [(1, 1), (1, 9), (9, 1), (6, 7)])
@pytest.mark.parametrize("cmd", ["peaks", "depressions"])
def test_tiny_and_constant_rasters(cairn, tmp_path, shape, cmd):
    p = write_tif(tmp_path / "c.tif", np.full(shape, 100.0, np.float32))
    code, _, err = cairn(cmd, p, "-o", tmp_path / "o", *RUN)
    assert code == 0, err
    assert (tmp_path / "o" / "run.json").exists()


def test_constant_raster_single_summit_by_tie_order():
    from terrain.engine.persistence import pairs

    p = pairs(np.full((3, 3), 5.0), kind="peaks")
    assert p.birth.tolist() == [0]  # first cell in raster order (documented tie order)


def test_nan_and_inf_cells_are_nodata_and_said_once(cairn, tmp_path):
    z = smooth_terrain((30, 30), seed=3)
    z[5:8, 5:8] = np.nan
    z[20, 20] = np.inf
    z[21, 21] = -np.inf
    p = write_tif(tmp_path / "holes.tif", z)
    code, _, err = cairn("depressions", p, "-o", tmp_path / "o", *RUN)
    assert code == 0
    assert err.count("NaN or infinite") == 1 and "11 NaN or infinite cells" in err
    with rasterio.open(tmp_path / "o" / "pit_credit.tif") as ds:
        assert np.isnan(ds.read(1)[6, 6]) and np.isnan(ds.read(1)[20, 20])


def test_nodata_value_inside_elevation_range_warns(cairn, tmp_path):
    z = np.round(smooth_terrain((30, 30), seed=4) / 10).astype(np.int16)
    nd = int(np.median(z))
    p = write_tif(tmp_path / "nd.tif", z, nodata=nd)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    assert code == 0 and "inside the elevation range" in err


def test_no_crs_warns_and_still_writes(cairn, tmp_path):
    from rasterio.transform import from_origin

    p = write_tif(tmp_path / "nocrs.tif", smooth_terrain((30, 30), seed=5), crs=None,
                  transform=from_origin(0, 30, 1, 1))
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    assert code == 0 and "no CRS" in err
    import json

    assert "cell units" in json.loads((tmp_path / "o" / "run.json").read_text())["note"]


def test_geographic_crs_metres_by_latitude(cairn, tmp_path):
    from rasterio.transform import from_origin

    p = write_tif(tmp_path / "geo.tif", smooth_terrain((30, 40), seed=6), crs="EPSG:4326",
                  transform=from_origin(10.0, 61.0, 1 / 1200, 1 / 1200))
    code, out, err = cairn("inspect", p)
    assert code == 0 and "by latitude" in out
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    assert code == 0


def test_geographic_cell_area_matches_pyproj():
    # reference: pyproj.Geod (GeographicLib, Karney 2013) polygon area on WGS84
    from pyproj import Geod
    from shapely.geometry import box

    from terrain.dem import Dem

    d = Dem.from_array(np.zeros((3, 4), np.float32), transform=(0.5, 0, 10, 0, -0.5, 61.0),
                       geographic=True)
    g = Geod(ellps="WGS84")
    for r, lat in enumerate(d.row_latitudes()):
        ref = abs(g.geometry_area_perimeter(box(10, lat - 0.25, 10.5, lat + 0.25))[0])
        assert d.cell_area_m2()[r] == pytest.approx(ref, rel=1e-4)


@pytest.mark.parametrize("dtype", ["int16", "int32", "float64", "uint16"])
def test_integer_and_float64_dems(cairn, tmp_path, dtype):
    z = smooth_terrain((30, 30), seed=7)
    z = np.abs(z) if dtype.startswith("u") else z
    p = write_tif(tmp_path / "t.tif", z, dtype=dtype)
    code, _, err = cairn("depressions", p, "-o", tmp_path / "o", *RUN)
    assert code == 0, err


def test_negative_elevations_bathymetry(cairn, tmp_path):
    p = write_tif(tmp_path / "sea.tif", smooth_terrain((30, 30), seed=8) - 5000)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN, "--base", "-6000")
    assert code == 0, err


# -- nothing lost ------------------------------------------------------------------
def test_sigkill_during_writing_never_leaves_partial_outputs(tmp_path):
    z = smooth_terrain((500, 500), seed=9)
    dem = write_tif(tmp_path / "d.tif", z)
    ref = tmp_path / "ref"
    args = [sys.executable, "-c", "from cairn_cli.main import run; run()", "depressions", str(dem),
            "--rmse", "2", "-n", "3", "--workers", "1", "-q"]
    subprocess.run(args + ["-o", str(ref)], check=True, timeout=300)
    for k, delay in enumerate((0.0, 0.7, 1.4, 2.1, 2.8)):
        out = tmp_path / f"k{k}"
        p = subprocess.Popen(args + ["-o", str(out)])
        time.sleep(delay + 3.0)
        p.send_signal(signal.SIGKILL)
        p.wait()
        for name in os.listdir(out) if out.exists() else []:
            if name.startswith("."):
                continue  # temporary names, never a final output
            a, b = out / name, ref / name
            if name.endswith(".tif"):
                with rasterio.open(a) as x, rasterio.open(b) as y:
                    assert np.array_equal(x.read(), y.read(), equal_nan=True)
            elif name.endswith((".gpkg", ".csv")):
                assert a.stat().st_size > 0
                if name.endswith(".csv"):
                    assert a.read_bytes() == b.read_bytes()
