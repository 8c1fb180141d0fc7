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
    # warnings said before the error (e.g. about independent error) are not part of it
    lines = [line for line in err.strip().splitlines() if not line.startswith("cairn: warning:")]
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
    for k, delay in enumerate((0.0, 1.4, 2.8)):
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
    # outputs are published as a set: a killed run leaves all of them or none, and a plain
    # rerun into a folder left with none is not refused and tidies the killed run's leftovers
    for k in range(3):
        out = tmp_path / f"k{k}"
        names = {n for n in os.listdir(out) if not n.startswith(".")} if out.exists() else set()
        assert names in (set(), set(os.listdir(ref))), names
    empty = [tmp_path / f"k{k}" for k in range(3)
             if (tmp_path / f"k{k}").exists() and not any(
                 not n.startswith(".") for n in os.listdir(tmp_path / f"k{k}"))]
    if empty:
        r = subprocess.run(args + ["-o", str(empty[-1])], capture_output=True, text=True,
                           timeout=300)
        assert r.returncode == 0, r.stderr
        assert sorted(os.listdir(empty[-1])) == sorted(os.listdir(ref))


# =====================================================================================
# Issue 14: nothing lost, nothing silently wrong. Each case: exit code, the one line,
# no traceback, and what is left on disk (nothing, or the previous complete set).
# =====================================================================================
CLI = [sys.executable, "-c", "from cairn_cli.main import run; run()"]


def no_traceback(err):
    assert "Traceback" not in err and "allow_pickle" not in err, err


def snapshot(folder):
    """Every file's bytes, by name (dot-files included, a lock file not)."""
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())
            if p.is_file() and p.name != ".cairn.lock"}


@pytest.fixture
def done(cairn, dem, tmp_path):
    """A complete peaks run in tmp_path/o (the 'previous set')."""
    out = tmp_path / "o"
    assert cairn("peaks", dem, "-o", out, *RUN)[0] == 0
    return out


# -- writes are checked, then published as a set ---------------------------------------
def _can_mount_tmpfs(tmp_path) -> bool:
    probe = tmp_path / "probe"
    probe.mkdir()
    r = subprocess.run(["unshare", "-rm", "sh", "-c", f"mount -t tmpfs -o size=64k tmpfs {probe}"],
                       capture_output=True)
    return r.returncode == 0


def test_disk_full_on_a_small_filesystem(tmp_path):
    # a real size-limited file system: a 64 kB tmpfs in a private mount namespace
    if not _can_mount_tmpfs(tmp_path):
        pytest.skip("cannot mount a tmpfs here (needs unshare -rm); see the injected test below")
    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((60, 60), seed=1))
    full = tmp_path / "full"
    full.mkdir()
    run = " ".join(f"'{a}'" for a in CLI)
    script = (f"mount -t tmpfs -o size=64k tmpfs {full} && "
              f"{run} peaks {dem} -o {full}/o --rmse 1 -n 20 --workers 1 -q; echo rc=$?; "
              f"ls -A {full}")
    r = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True,
                       timeout=300)
    no_traceback(r.stderr)
    one_line_error(2, r.stderr, "disk full", str(full / "o"))
    assert "rc=2" in r.stdout
    assert r.stdout.split("rc=2", 1)[1].split() == []  # nothing left: not even the folder


def test_write_failure_keeps_the_previous_set(cairn, dem, done, monkeypatch):
    # a disk filling up while the quick-look is saved, injected (os error ENOSPC)
    import errno

    from matplotlib.figure import Figure

    before = snapshot(done)

    def full(self, *a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(Figure, "savefig", full)
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "7", "--overwrite")
    no_traceback(err)
    one_line_error(code, err, "disk full", "quicklook.png", "No space left on device")
    assert snapshot(done) == before  # the layers written before it were never published


def test_gdal_write_error_is_raised_not_renamed(cairn, dem, tmp_path, monkeypatch):
    # GDAL reports some write errors only through its log (a full disk: TIFFAppendToStrip);
    # injected here as such a log record
    import logging

    import rasterio as rio

    real = rio.open

    def logging_open(path, mode="r", **kw):
        if mode == "w":
            logging.getLogger("rasterio._env").info(
                "GDAL signalled an error: err_no=1, msg='TIFFAppendToStrip:Write error at scanline 3'")
        return real(path, mode, **kw)

    monkeypatch.setattr(rio, "open", logging_open)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "g", *RUN)
    no_traceback(err)
    one_line_error(code, err, "summit_credit.tif", "TIFFAppendToStrip")
    assert not (tmp_path / "g").exists()


def test_harmless_gdal_error_does_not_fail_a_write(cairn, dem, tmp_path, monkeypatch):
    # GDAL also logs failures that leave the file whole (the COG driver on an all-nodata
    # band: no statistics); those are not write errors
    import logging

    import rasterio as rio

    real = rio.open

    def logging_open(path, mode="r", **kw):
        if mode == "w":
            logging.getLogger("rasterio._env").info(
                "GDAL signalled an error: err_no=1, msg='Failed to compute statistics, no valid "
                "pixels found in sampling.'")
        return real(path, mode, **kw)

    monkeypatch.setattr(rio, "open", logging_open)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "g", *RUN)
    assert code == 0, err


def test_interrupt_while_writing_keeps_the_previous_set(cairn, dem, done, monkeypatch):
    import terrain.outputs.plot as plot

    before = snapshot(done)

    def ctrl_c(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(plot, "feature_map", ctrl_c)
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "7", "--overwrite")
    assert code == 130 and err.strip().splitlines()[-1] == "cairn: interrupted", err
    no_traceback(err)
    assert snapshot(done) == before


def test_a_second_run_into_a_folder_in_use_is_refused(cairn, dem, done):
    before = snapshot(done)
    holder = subprocess.Popen(  # another process holding the folder's lock, as a running cairn does
        [sys.executable, "-c", "import fcntl, os, sys, time; "
         f"fd = os.open({str(done / '.cairn.lock')!r}, os.O_RDWR | os.O_CREAT); "
         "os.write(fd, b'4242'); fcntl.flock(fd, fcntl.LOCK_EX); print('held', flush=True); "
         "time.sleep(60)"], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        for extra in ((), ("--overwrite",)):
            code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "2", *extra)
            one_line_error(code, err, "another cairn run is writing to this folder",
                           "process 4242")
        assert snapshot(done) == before
    finally:
        holder.kill()
        holder.wait()
    assert cairn("peaks", dem, "-o", done, *RUN, "--seed", "2", "--overwrite")[0] == 0
    assert not (done / ".cairn.lock").exists()


def test_leftovers_of_a_killed_run_are_cleaned_by_the_next(cairn, dem, tmp_path):
    out = tmp_path / "o"
    (out / ".cairn-staging-k1ll3d0").mkdir(parents=True)
    (out / ".cairn-staging-k1ll3d0" / "summit_credit.tif").write_bytes(b"half")
    (out / ".run.json.abcd1234.part.json").write_text("{")
    (out / ".cairn.lock").write_text("999999\n")  # its process is gone: the lock is free
    code, _, err = cairn("peaks", dem, "-o", out, *RUN)  # a plain rerun is not refused
    assert code == 0, err
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".")) == []


def test_interrupted_publication_is_completed_never_mixed(tmp_path):
    from terrain.io import PUBLISHING, clean_leftovers

    out = tmp_path / "o"
    stage = out / ".cairn-staging-x"
    stage.mkdir(parents=True)
    for name, text in (("run.json", "old"), ("a.csv", "old")):
        (out / name).write_text(text)
    (stage / "a.csv").write_text("new")  # run.json was already moved when the run was killed
    (stage / PUBLISHING).write_text('["a.csv", "run.json"]')
    (out / "run.json").write_text("new")
    clean_leftovers(out)
    assert {p.name: p.read_text() for p in out.iterdir()} == {"run.json": "new", "a.csv": "new"}


# -- checkpoints ----------------------------------------------------------------------
@pytest.fixture
def checkpoint(cairn, dem, tmp_path):
    ck = tmp_path / "good.npz"
    assert cairn("peaks", dem, "-o", tmp_path / "ck-run", *RUN, "--checkpoint", ck)[0] == 0
    return ck


def _damage(good, bad, kind):
    data = good.read_bytes()
    if kind == "truncated":
        bad.write_bytes(data[: len(data) // 2])
    elif kind == "bit-flipped":
        b = bytearray(data)
        b[len(b) // 3] ^= 0x10
        bad.write_bytes(bytes(b))
    elif kind == "npy":
        np.save(bad.with_suffix(".npy"), np.arange(5))
        os.replace(bad.with_suffix(".npy"), bad)
    elif kind == "empty":
        bad.write_bytes(b"")
    elif kind == "text":
        bad.write_text("my notes, not a checkpoint\n")
    elif kind == "pickled":
        np.savez(bad, params_json=np.array([object()], dtype=object))
        os.replace(str(bad) + ".npz", bad) if not bad.exists() else None


@pytest.mark.parametrize("kind", ["truncated", "bit-flipped", "npy", "empty", "text", "pickled"])
def test_damaged_checkpoints(cairn, dem, tmp_path, checkpoint, kind):
    bad = tmp_path / "bad.npz"
    _damage(checkpoint, bad, kind)
    before = bad.read_bytes()
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "r", *RUN, "--checkpoint", bad, "--resume")
    no_traceback(err)
    one_line_error(code, err, str(bad), "damaged checkpoint")
    assert bad.read_bytes() == before
    nothing_written(tmp_path / "r")


def test_checkpoint_may_not_be_an_input_or_output(cairn, dem, tmp_path, done):
    before = dem.read_bytes()
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "x", *RUN, "--checkpoint", dem,
                         "--overwrite")
    one_line_error(code, err, "dem.tif", "the input file", "--checkpoint")
    assert dem.read_bytes() == before  # the DEM is still the DEM
    nothing_written(tmp_path / "x")
    json_before = (done / "run.json").read_bytes()
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--checkpoint", done / "run.json",
                         "--overwrite")
    one_line_error(code, err, "run.json", "the output file")
    assert (done / "run.json").read_bytes() == json_before


def test_only_cairn_checkpoints_are_ever_replaced(cairn, dem, tmp_path):
    notes = tmp_path / "notes.npz"
    notes.write_text("field notes\n")
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", notes,
                         "--overwrite")
    one_line_error(code, err, "notes.npz", "not a cairn checkpoint")
    assert notes.read_text() == "field notes\n"
    nothing_written(tmp_path / "o")


@pytest.mark.parametrize("where", ["missing/ck.npz", "/proc/ck.npz"])
def test_unwritable_checkpoint_folder_refused_before_computing(cairn, dem, tmp_path, where,
                                                             monkeypatch):
    import terrain.runner.ensemble as ens

    called = []
    monkeypatch.setattr(ens, "_fold", lambda *a, **k: called.append(1))
    ck = tmp_path / where if not where.startswith("/") else where
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", ck)
    one_line_error(code, err, "ck.npz")
    assert not called  # refused before any realisation
    nothing_written(tmp_path / "o")


# -- georeferencing is honest ------------------------------------------------------------
def _affine(a, b, c, d, e, f):
    from rasterio.transform import Affine

    return Affine(a, b, c, d, e, f)


@pytest.mark.parametrize("name,transform", [
    ("rotated", (10 * np.cos(0.3), -10 * np.sin(0.3), 500000, -10 * np.sin(0.3),
                 -10 * np.cos(0.3), 6800000)),
    ("sheared", (10, 3, 500000, 0, -10, 6800000))])
def test_bbox_on_rotated_or_sheared_grid_refused(cairn, tmp_path, name, transform):
    p = write_tif(tmp_path / f"{name}.tif", smooth_terrain((40, 40), seed=1),
                  transform=_affine(*transform))
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN, "--bbox",
                         "500000,6799700,500200,6800000")
    one_line_error(code, err, f"{name}.tif", "rotated or sheared", "--bbox")
    nothing_written(tmp_path / "o")
    assert cairn("peaks", p, "-o", tmp_path / "o", *RUN)[0] == 0  # without a box it runs


def test_bbox_on_bottom_up_raster_and_box_inside_one_cell(tmp_path):
    from terrain.io import read_dem

    z = smooth_terrain((40, 40), seed=1)
    top = write_tif(tmp_path / "top.tif", z)
    bottom = write_tif(tmp_path / "bottom.tif", z[::-1],
                       transform=_affine(10, 0, 500000, 0, 10, 6800000 - 400))
    box = (500000, 6799700, 500200, 6800000)
    a, b = read_dem(top, bbox=box), read_dem(bottom, bbox=box)
    assert a.shape == b.shape == (30, 20)
    assert np.array_equal(a.z, b.z[::-1])  # the same cells, stored the other way up
    # the window's own georeferencing: its first cell's corner is the box's corner
    assert a.transform[2:6:3] == (500000, 6800000) and b.transform[2:6:3] == (500000, 6799700)
    one = read_dem(top, bbox=(500011, 6799981, 500012, 6799982))  # inside cell (row 1, col 1)
    assert one.shape == (1, 1) and one.z[0, 0] == z[1, 1]
    edge = read_dem(top, bbox=(500010, 6799980, 500020, 6799990))  # exactly one cell's edges
    assert edge.shape == (1, 1) and edge.z[0, 0] == z[1, 1]


def test_cell_area_is_the_parallelogram():
    # reference: shapely's polygon area of the cell's four corners (a general-purpose library)
    from shapely.geometry import Polygon

    from terrain.dem import Dem

    for t in ((10, 3, 0, 0, -10, 0), (8.6, -5, 0, -5, -8.6, 0), (10, 0, 0, 0, 10, 0)):
        d = Dem.from_array(np.zeros((3, 4), np.float32), transform=t)
        a, b, c, dd, e, f = t
        corners = [(a * i + b * j + c, dd * i + e * j + f) for i, j in ((0, 0), (1, 0), (1, 1), (0, 1))]
        assert d.cell_area_m2() == pytest.approx(Polygon(corners).area)


# -- values are what the file means -----------------------------------------------------------
def test_scale_and_offset_applied_and_recorded(cairn, tmp_path):
    import json

    z = smooth_terrain((40, 40), seed=1) + 500
    metres = write_tif(tmp_path / "m.tif", np.round(z, 1), dtype="float32")
    dm = write_tif(tmp_path / "dm.tif", np.round((z - 100) * 10), dtype="int16")
    with rasterio.open(dm, "r+") as ds:  # stored decimetres above 100 m
        ds.scales, ds.offsets = (0.1,), (100.0,)
    for p, o in ((metres, "a"), (dm, "b")):
        assert cairn("peaks", p, "-o", tmp_path / o, *RUN)[0] == 0
    with rasterio.open(tmp_path / "a" / "summit_credit.tif") as a, \
            rasterio.open(tmp_path / "b" / "summit_credit.tif") as b:
        assert np.nanmax(b.read(1)) == pytest.approx(np.nanmax(a.read(1)), rel=1e-3)
    run = json.loads((tmp_path / "b" / "run.json").read_text())["input"]
    assert run["scale"] == 0.1 and run["offset"] == 100.0


def test_undeclared_sentinel_warned_and_declared(cairn, tmp_path):
    import json

    z = smooth_terrain((40, 40), seed=1)
    z[:3, :4] = -9999
    p = write_tif(tmp_path / "s.tif", z)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "a", *RUN)
    assert code == 0
    warnings_ = [line for line in err.splitlines() if "-9999" in line]
    assert len(warnings_) == 1 and "12 cells" in warnings_[0] and "--nodata -9999" in warnings_[0]
    code, _, err = cairn("peaks", p, "-o", tmp_path / "b", *RUN, "--nodata", "-9999")
    assert code == 0 and "-9999" not in err, err
    with rasterio.open(tmp_path / "b" / "summit_credit.tif") as ds:
        assert np.isnan(ds.read(1)[:3, :4]).all()
    run = json.loads((tmp_path / "b" / "run.json").read_text())["input"]
    assert run["nodata"] == -9999 and run["band"] == 1 and run["bbox"] is None


def test_complex_raster_refused(cairn, tmp_path):
    p = write_tif(tmp_path / "c.tif", smooth_terrain((20, 20), seed=1).astype(np.complex64),
                  dtype="complex64")
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "c.tif", "complex")
    nothing_written(tmp_path / "o")


# -- the memory guard reads the header first -----------------------------------------------------
def test_huge_header_refused_before_reading(cairn, tmp_path):
    p = tmp_path / "huge.tif"
    with rasterio.open(p, "w", driver="GTiff", width=200000, height=200000, count=1,
                       dtype="float32", tiled=True, sparse_ok=True, crs="EPSG:32633",
                       transform=_affine(10, 0, 0, 0, -10, 2e6)):
        pass  # a header with no pixels written: a few kB on disk
    t = time.time()
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "huge.tif", "needs", "GiB", "--bbox")
    nothing_written(tmp_path / "o")
    code, out, err = cairn("inspect", p)
    assert code == 0 and "not read" in out and "200000 rows" in out, err
    assert time.time() - t < 60


def test_any_memory_error_is_one_line(cairn, dem, tmp_path, monkeypatch):
    import cairn_cli.execute as ex

    def boom(*a, **k):
        raise MemoryError("Unable to allocate 3.07 EiB")

    monkeypatch.setattr(ex, "run_ensemble", boom)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN)
    one_line_error(code, err, "out of memory", "--bbox")
    nothing_written(tmp_path / "o")


def test_target_se_plans_lazily(cairn, dem, tmp_path):
    from terrain.io import read_header
    from terrain.jobs import CreditJob
    from terrain.resources import estimate_run
    from terrain.runner import Execution

    head = read_header(dem)
    lazy = estimate_run(head, CreditJob("peaks"), Execution(realisations=10**6, target_se=0.5))
    short = estimate_run(head, CreditJob("peaks"), Execution(realisations=20))
    assert lazy.total == short.total  # the log is planned to the first stopping check
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", "--rmse", "1", "-n", "1000000",
                         "--target-se", "1e9", "--workers", "1", "-q")
    assert code == 0, err


def test_growing_log_stops_the_run_in_one_line(cairn, dem, tmp_path, monkeypatch):
    import terrain.runner.ensemble as ens

    monkeypatch.setattr(ens, "available_memory", lambda: 1000)
    monkeypatch.setattr(ens, "LOG_CHECK_BYTES", 1)  # look after every chunk
    ck = tmp_path / "ck.npz"
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", "--rmse", "1", "-n", "60",
                         "--workers", "1", "-q", "--checkpoint", ck)
    one_line_error(code, err, "log", "--realisations", "--target-se")
    assert ck.exists()  # the realisations done are kept
    nothing_written(tmp_path / "o")


# -- the scheduler address ------------------------------------------------------------------------
@pytest.mark.parametrize("address,needle", [
    ("http://127.0.0.1:8787", "dashboard"), ("garbage::x", "not a Dask scheduler address"),
    ("tcp://host:99999", "not a Dask scheduler address")])
def test_malformed_scheduler_address(cairn, dem, tmp_path, address, needle):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--scheduler", address)
    no_traceback(err)
    one_line_error(code, err, address, needle, "--scheduler")
    nothing_written(tmp_path / "o")


@pytest.mark.parametrize("reply", [b"", b"HTTP/1.0 200 OK\r\n\r\n" + b"x" * 64,
                                   b"\xff" * 8 + b"garbage"])
def test_scheduler_that_is_not_dask(cairn, dem, tmp_path, monkeypatch, reply):
    # a silent service (e.g. an HTTP server waiting for a request), an HTTP answer, garbage
    import socket
    import threading

    import terrain.runner.backends as backends

    monkeypatch.setattr(backends, "HANDSHAKE_SECONDS", 2.0)
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(4)
    conns = []

    def serve():
        while True:
            try:
                c, _ = srv.accept()
            except OSError:
                return
            conns.append(c)
            if reply:
                c.sendall(reply)

    threading.Thread(target=serve, daemon=True).start()
    address = f"tcp://127.0.0.1:{srv.getsockname()[1]}"
    t = time.time()
    try:
        code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--scheduler", address)
    finally:
        srv.close()
        for c in conns:
            c.close()
    no_traceback(err)
    one_line_error(code, err, address, "cannot reach a Dask scheduler", "--scheduler")
    assert time.time() - t < 30
    nothing_written(tmp_path / "o")


# -- clean shutdown ----------------------------------------------------------------------------------
def _children(pid):
    out = []
    for task in os.listdir(f"/proc/{pid}/task"):
        with open(f"/proc/{pid}/task/{task}/children") as fh:
            out += [int(c) for c in fh.read().split()]
    return out


def _alive(pid):
    try:
        with open(f"/proc/{pid}/status") as fh:
            return "State:\tZ" not in fh.read()
    except OSError:
        return False


@pytest.fixture
def big_dem(tmp_path):
    return write_tif(tmp_path / "big.tif", smooth_terrain((200, 200), seed=4))


def _start_two_workers(dem, out, *extra):
    p = subprocess.Popen(CLI + ["peaks", str(dem), "-o", str(out), "--rmse", "1", "-n", "400",
                                "--workers", "2", "-q", *map(str, extra)],
                         stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 120
    while time.time() < deadline and len(_children(p.pid)) < 2:
        time.sleep(0.01)  # the workers are being spawned
    return p, _children(p.pid)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_ctrl_c_while_workers_spawn(big_dem, tmp_path):
    p, kids = _start_two_workers(big_dem, tmp_path / "o")
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 130, err
    no_traceback(err)
    lines = [x for x in err.strip().splitlines() if not x.startswith("cairn: warning:")]
    assert lines[0].startswith("cairn: interrupted") and len(lines) == 1
    time.sleep(1)
    assert not [k for k in kids if _alive(k)]
    nothing_written(tmp_path / "o")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_sigterm_saves_and_exits_143_and_a_killed_parent_takes_its_workers(big_dem, tmp_path):
    ck = tmp_path / "ck.npz"
    p, kids = _start_two_workers(big_dem, tmp_path / "o", "--checkpoint", ck)
    deadline = time.time() + 120
    while not ck.exists() and time.time() < deadline:  # first checkpoint after 50 realisations
        time.sleep(0.1)
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 143 and "terminated after" in err and "--resume" in err, err
    no_traceback(err)
    time.sleep(1)
    assert not [k for k in kids if _alive(k)]
    p, kids = _start_two_workers(big_dem, tmp_path / "o2")
    time.sleep(2)
    p.kill()
    p.wait()
    deadline = time.time() + 10
    while [k for k in kids if _alive(k)] and time.time() < deadline:
        time.sleep(0.1)
    assert not [k for k in kids if _alive(k)]  # they die with their parent


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_dead_worker_ends_the_run_in_one_line(big_dem, tmp_path):
    ck = tmp_path / "ck.npz"
    p, kids = _start_two_workers(big_dem, tmp_path / "o", "--checkpoint", ck)
    deadline = time.time() + 120
    while not ck.exists() and time.time() < deadline:
        time.sleep(0.1)
    os.kill(kids[-1], signal.SIGKILL)
    _, err = p.communicate(timeout=60)
    one_line_error(p.returncode, err, "worker process died", "--workers")
    assert ck.exists()
    nothing_written(tmp_path / "o")


# -- every traceback above is one line ------------------------------------------------------------------
def test_negative_seed(cairn, dem, tmp_path):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--seed", "-1")
    one_line_error(code, err, "--seed")
    nothing_written(tmp_path / "o")


def test_sweep_on_a_plane_without_features(cairn, tmp_path):
    plane = write_tif(tmp_path / "plane.tif", np.add.outer(np.arange(30.0), np.arange(30.0)))
    code, _, err = cairn("sweep", plane, "-o", tmp_path / "o", "--kind", "depressions",
                         "--rmse", "0.01,0.02", "-n", "4", "--workers", "1", "-q")
    assert code == 0, err
    assert {p.name for p in (tmp_path / "o").iterdir()} == {
        "sweep.csv", "kernel_sensitivity.csv", "sweep.png", "run.json"}


@pytest.mark.parametrize("shape", [(100, 1), (1000, 1), (1, 1000)])
def test_quicklook_of_a_strip_stays_small(cairn, tmp_path, shape):
    from PIL import Image

    p = write_tif(tmp_path / "strip.tif", smooth_terrain(shape, seed=1))
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    assert code == 0, err
    with Image.open(tmp_path / "o" / "quicklook.png") as im:
        assert max(im.size) < 3000 and min(im.size) > 300, im.size


def test_nugget_without_range_refused(cairn, dem, tmp_path):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--nugget", "0.3")
    one_line_error(code, err, "--nugget", "--range")
    nothing_written(tmp_path / "o")


def test_quicklook_of_a_big_grid_is_drawn_in_blocks(cairn, dem, tmp_path, monkeypatch):
    # reference: scikit-image's block_reduce (a general-purpose library) for the blocks
    from PIL import Image
    from skimage.measure import block_reduce

    import terrain.outputs.mapframe as mapframe

    z = smooth_terrain((23, 17), seed=2)
    nodata = np.zeros(z.shape, bool)
    nodata[3, 4] = True
    ref = block_reduce(np.where(nodata, np.nan, z), (5, 5), func=np.nanmax, cval=np.nan)
    assert np.allclose(mapframe._pool(np.where(nodata, np.nan, z), 5, np.nanmax), ref,
                       equal_nan=True)
    monkeypatch.setattr(mapframe, "MAX_PIXELS", 10)  # the 40 x 40 test DEM now needs blocks
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN)
    assert code == 0, err
    with Image.open(tmp_path / "o" / "quicklook.png") as im:
        assert im.size[0] > 300
