"""Held-out variants of the bad-input catalogue's issue-25 cases (tests/test_bad_input.py).

A red-team pass tried each case of the catalogue again in another form (another spelling of
a path, another phase, another kind of file); each variant that failed is kept here: the exit
code, the one line, what is left on disk and that nothing outside the output folder changed.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from .conftest import smooth_terrain, write_tif
from .test_bad_input import RUN, no_traceback, one_line_error, outputs_of, tree  # noqa: F401

# runs here draw blank stand-ins for the figures (tests/conftest.py); a test
# marked real_figures draws them
pytestmark = pytest.mark.usefixtures("stand_in_figures")


@pytest.fixture
def dem(tmp_path):
    return write_tif(tmp_path / "dem.tif", smooth_terrain((40, 40), seed=1))


@pytest.fixture
def outside(tmp_path):
    """A folder beside the output folder holding a user's files (the victims)."""
    v = tmp_path / "outside"
    v.mkdir()
    (v / "victim.txt").write_text("the user's own text\n")
    (v / "notes.csv").write_text("a,b\n1,2\n")
    return v


# -- 3. inputs are sacred: the files kept beside a checkpoint ------------------------------------------
@pytest.mark.parametrize("name", [".ck.npz.lock", ".ck.npz.abcd1234.part", ".ck.npz.abcd1234.part.npz"])
def test_an_input_at_a_name_the_checkpoint_uses_is_refused(cairn, tmp_path, name):
    # the checkpoint's lock file is truncated and removed, its temporary names are swept
    proj = tmp_path / "proj"
    proj.mkdir()
    dem = write_tif(proj / name, smooth_terrain((40, 40), seed=1))
    before = tree(tmp_path)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", proj / "ck.npz")
    one_line_error(code, err, name, "input", "beside the checkpoint", "--checkpoint")
    assert tree(tmp_path) == before


@pytest.mark.parametrize("where", [".ck.abcd1234.part", ".cairn-staging-mine/ck.npz", ".cairn.lock",
                                   "summits.csv"])
@pytest.mark.parametrize("resume", [False, pytest.param(True, marks=pytest.mark.slow)])
def test_a_checkpoint_where_the_tidy_up_or_publication_would_remove_it(cairn, dem, tmp_path, where,
                                                                      resume):
    out = tmp_path / "o"
    ck = out / where
    if resume:  # a checkpoint of hours of work, made with another output folder
        ck.parent.mkdir(parents=True)
        assert cairn("peaks", dem, "-o", tmp_path / "first", *RUN, "--checkpoint", ck)[0] == 0
    before = tree(tmp_path)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN, "--checkpoint", ck,
                         *(("--resume", "-n", "6") if resume else ()))
    one_line_error(code, err, str(ck), "--checkpoint")
    assert tree(tmp_path) == before  # the checkpoint is still there, nothing was tidied


# -- a set is published whole or not at all ------------------------------------------------------------
def test_a_folder_at_an_output_name_is_refused_before_computing(cairn, dem, tmp_path, outside):
    # a rename onto a folder fails: found when the set was half moved in, the folder held a mix
    out = tmp_path / "o"
    (out / "run.json").mkdir(parents=True)
    (out / "run.json" / "mine.txt").write_text("mine\n")
    (out / "summits.csv").symlink_to(outside / "notes.csv")  # a link is replaced, not followed
    before = tree(tmp_path)
    code, _, err = cairn("peaks", dem, "-o", out, *RUN, "--overwrite")
    one_line_error(code, err, str(out / "run.json"), "is a folder where the run writes a file")
    assert tree(tmp_path) == before


@pytest.mark.slow
def test_a_folder_appearing_at_an_output_name_stops_the_publication_before_anything_moves(
        cairn, dem, tmp_path, monkeypatch):
    import terrain.outputs.writer as writer

    out = tmp_path / "o"
    assert cairn("peaks", dem, "-o", out, *RUN)[0] == 0
    first = tree(out)
    real = writer.write_credit_run

    def plant(out_, *a, **k):  # a folder appears at an output name while the run computes
        (out_ / "summits.csv").unlink()
        (out_ / "summits.csv").mkdir()
        return real(out_, *a, **k)

    monkeypatch.setattr(writer, "write_credit_run", plant)  # the command loads it when it runs
    code, _, err = cairn("peaks", dem, "-o", out, *RUN, "--seed", "7", "--overwrite")
    one_line_error(code, err, "summits.csv", "is a folder where the run writes a file")
    after = tree(out)
    assert after.pop("summits.csv") == ("dir", None) and first.pop("summits.csv")
    assert after == first  # the earlier set, no file of the new one moved in


_HOLD_WAL = """
import sqlite3, sys, time
con = sqlite3.connect(sys.argv[1], isolation_level=None)
con.execute("PRAGMA journal_mode=WAL")
con.execute("BEGIN")
con.execute("SELECT count(*) FROM sqlite_master").fetchall()
print("held", flush=True)
time.sleep(120)
"""


def _sqlite_file(path, text):
    import sqlite3

    con = sqlite3.connect(path)
    con.execute("CREATE TABLE t (v TEXT)")
    con.execute("INSERT INTO t VALUES (?)", (text,))
    con.commit()
    con.close()


def test_a_cut_short_publication_is_completed_whole_or_kept(tmp_path):
    # a killed run's publication is completed by the next run; a GeoPackage of it held open in
    # a GIS used to stop only that file, and the staging folder went: a mix of two sets for good
    from terrain.errors import OutputError
    from terrain.io import clean_leftovers

    out = tmp_path / "o"
    stage = out / ".cairn-staging-cut"
    stage.mkdir(parents=True)
    _sqlite_file(out / "peaks.gpkg", "old")
    _sqlite_file(stage / "peaks.gpkg", "new")
    (out / "summits.csv").write_text("old\n")
    (stage / "summits.csv").write_text("new\n")
    (stage / ".publishing.json").write_text(json.dumps(["peaks.gpkg", "summits.csv"]))
    holder = subprocess.Popen([sys.executable, "-c", _HOLD_WAL, str(out / "peaks.gpkg")],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(OutputError, match="cannot complete the publication.*kept in "
                                              ".cairn-staging-cut"):
            clean_leftovers(out)
        assert (out / "summits.csv").read_text() == "old\n" and stage.is_dir()  # nothing moved
    finally:
        holder.kill()
        holder.wait()
    assert "peaks.gpkg" in clean_leftovers(out)  # once the GIS is gone: completed, whole
    assert (out / "summits.csv").read_text() == "new\n" and not stage.exists()
    import sqlite3

    con = sqlite3.connect(out / "peaks.gpkg")
    assert con.execute("SELECT v FROM t").fetchall() == [("new",)]
    con.close()


@pytest.mark.parametrize("marker", [b"[" * 100000 + b"]" * 100000, b'["run.json\xff"]',
                                    json.dumps(["run.json"]).encode("utf-16"), b"[" + b"9" * 5000 + b"]",
                                    json.dumps(["run.json", "run.json"]).encode(),
                                    json.dumps([{"n": 1}, ["x"], "run.json"]).encode()])
def test_a_publication_marker_that_cannot_be_read_is_left_unfollowed(tmp_path, marker):
    from terrain.io import clean_leftovers

    out = tmp_path / "o"
    stage = out / ".cairn-staging-x"
    stage.mkdir(parents=True)
    (stage / ".publishing.json").write_bytes(marker)
    (stage / "run.json").write_text("{}")
    clean_leftovers(out)  # no RecursionError from a deeply nested list
    assert not stage.exists()


# -- 10. the guard counts the kernel: ranges no float grid can hold ------------------------------------
@pytest.mark.parametrize("cmd,rng", [("peaks", "1e200"), ("peaks", "1e306"), ("depressions", "1e308"),
                                     ("catchments", "1.7e308"), ("sweep", "1e308")])
def test_a_range_too_long_for_any_grid_is_one_line(cairn, dem, tmp_path, cmd, rng):
    # was: OverflowError from sizing the kernel's periodic grid, or minutes searching its FFT length
    import time

    extra = ("--kind", "peaks", "--rmse", "1,2", "-n", "2", "--workers", "1", "-q") \
        if cmd == "sweep" else RUN
    t = time.time()
    code, _, err = cairn(cmd, dem, "-o", tmp_path / "o", *extra, "--range", rng)
    no_traceback(err)
    one_line_error(code, err, "dem.tif", "--range", "longer than the grid's extent (400 m)",
                   "at most 400 m")
    assert time.time() - t < 30
    assert not (tmp_path / "o").exists()


# -- 14. outlet ids are text: in the console too -------------------------------------------------------
@pytest.mark.slow
def test_outlet_ids_and_folder_names_are_printed_as_text(cairn, tmp_path):
    # rich read "[/x]" as a closing tag and raised after every realisation (a traceback, exit 1);
    # an escape sequence in an id reached the terminal (clearing it, retitling it)
    import csv

    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((40, 40), seed=1))
    ids = ["[/x]", "[link=http://example.invalid]click[/link]", "\x1b[2J\x1b]0;title\x07:smile:"]
    with open(tmp_path / "outlets.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "x", "y"])
        for k, i in enumerate(ids):
            w.writerow([i, 500105.0 + 30 * k, 6799705.0 + 15 * k])
    out = tmp_path / "o[/y]"
    code, stdout, err = cairn("catchments", dem, "--outlets", tmp_path / "outlets.csv", "-o", out,
                              "--rmse", "1", "-n", "4", "--workers", "1")
    assert code == 0, err
    no_traceback(err)
    assert "[/x]" in stdout and "[link=http://example" in stdout  # ids are cut at 24
    assert "\x1b" not in stdout and "\x07" not in stdout and ":smile:" in stdout
    assert f"outputs in {out}" in stdout


# -- 10. a full TMPDIR in every phase: the workers' shared context of a whole-grid run ----------------
def test_a_full_disk_under_the_workers_context_names_the_folder():
    # a whole-grid run with --workers 2 writes its context for the workers under TMPDIR; a full
    # disk there said only "disk full" (no folder); /dev/full fails every write with ENOSPC
    import numpy as np

    from terrain.errors import OutputError
    from terrain.io import save_shared

    with pytest.raises(OutputError, match=r"^/dev: disk full while writing scratch files .*TMPDIR"):
        save_shared("/dev/full", {"dem": np.zeros((300, 300))})


@pytest.mark.slow
def test_a_full_tmpdir_in_a_whole_grid_run_with_workers_is_one_line(tmp_path):
    from .test_bad_input import CLI, _can_mount_tmpfs

    if not _can_mount_tmpfs(tmp_path):
        pytest.skip("cannot mount a tmpfs here (needs unshare -rm)")
    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((150, 150), seed=1))
    full = tmp_path / "full"
    full.mkdir()
    run = " ".join(f"'{a}'" for a in CLI)
    script = (f"mount -t tmpfs -o size=8k tmpfs {full} && export TMPDIR={full} && {run} peaks {dem} "
              f"-o {tmp_path}/o --rmse 1 -n 4 --workers 2 -q; echo rc=$?; ls -A {full}")
    r = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True,
                       timeout=300)
    no_traceback(r.stderr)
    one_line_error(2, r.stderr, str(full), "disk full", "TMPDIR")
    assert "rc=2" in r.stdout and r.stdout.split("rc=2", 1)[1].split() == [], r.stdout
    assert not (tmp_path / "o").exists()


def test_a_full_disk_under_the_checkpoint_names_the_option(cairn, dem, tmp_path, monkeypatch):
    # was: "... choose another output folder" for the checkpoint's own folder
    import errno

    import numpy as np

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(np, "savez", full)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", *RUN, "--checkpoint", tmp_path / "ck.npz")
    one_line_error(code, err, f"{tmp_path}: disk full while writing ck.npz", "--checkpoint file")
    assert not (tmp_path / "o").exists()
    assert [p.name for p in tmp_path.iterdir() if "ck" in p.name] == []
