"""`cairn peaks`, `cairn depressions`, `cairn inspect`, `cairn demo`: outputs read back.

Outputs are read back with rasterio and pyogrio (general-purpose readers, not
ours); the GeoPackage and CSV tables must agree.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio

from terrain.outputs.tables import rounded
from terrain.summary.features import COLUMN_KINDS, COLUMNS
from terrain.summary.ranks import RANK_COLUMN_KINDS

from .conftest import cli_command, once, smooth_terrain, write_tif

# in-process runs here draw blank stand-ins for the figures (tests/conftest.py): the
# real ones are checked in test_pictures.py and by the demo run below (a subprocess)
pytestmark = pytest.mark.usefixtures("stand_in_figures")

COMMON = ("--rmse", "1.5", "-n", "12", "--seed", "3", "--workers", "1", "-q")


@pytest.fixture
def dem_tif(tmp_path):
    z = np.round(smooth_terrain((60, 70), seed=8)).astype(np.int16)
    return write_tif(tmp_path / "dem.tif", z, nodata=-9999, units="metre")


@pytest.mark.parametrize("cmd,layers,gpkg,csv,lyr", [
    ("peaks", ["summit_credit", "col_credit", "summit_probability"], "peaks.gpkg", "summits.csv",
     ["summits", "summit_points", "summit_regions", "cols", "ranks", "parents"]),
    ("depressions", ["pit_credit", "spill_credit", "pit_probability", "ponding_probability"],
     "depressions.gpkg", "pits.csv", ["pits", "pit_points", "pit_regions", "spill_points", "ranks",
                                     "spill_links"]),
])
def test_outputs_read_back(cairn, dem_tif, tmp_path, cmd, layers, gpkg, csv, lyr):
    out = tmp_path / "out"
    code, _, err = cairn(cmd, dem_tif, "-o", out, *COMMON)
    assert code == 0, err
    with rasterio.open(dem_tif) as src:
        crs, transform, shape = src.crs, src.transform, src.shape
    for name in layers:
        with rasterio.open(out / f"{name}.tif") as ds:
            assert ds.count == 2 and ds.dtypes == ("float32", "float32")
            assert ds.crs == crs and ds.transform == transform and ds.shape == shape
            assert ds.descriptions[0].startswith(name) and "standard error" in ds.descriptions[1]
            tags = ds.tags()
            assert tags["LAYER"] == name and json.loads(tags["error_model"])["rmse"] == 1.5
            assert tags["realisations"] == "12" and np.isnan(ds.nodata)
            est, se = ds.read(1), ds.read(2)
            assert np.all(se[np.isfinite(se)] >= 0)
            if name.endswith("probability"):
                assert np.nanmax(est) <= 1 and np.nanmin(est) >= 0
    listed = [n for n, _ in pyogrio.list_layers(out / gpkg)]
    assert sorted(listed) == sorted(lyr)
    for layer in lyr[:3]:  # the table's layers; the col / spill point layer: test_pictures.py
        df = pyogrio.read_dataframe(out / gpkg, layer=layer)
        assert list(df.columns[:-1]) == list(COLUMNS[cmd])
    table = pyogrio.read_dataframe(out / gpkg, layer=lyr[0])
    csv_df = pd.read_csv(out / csv)  # rounded per column kind (see test_output_formats)
    pd.testing.assert_frame_equal(csv_df, rounded(pd.DataFrame(table.drop(columns="geometry")),
                                                  COLUMN_KINDS), check_dtype=False)
    run = json.loads((out / "run.json").read_text())
    assert run["realisations_done"] == 12 and run["input"]["sha256"]
    assert run["parameters"]["seed"] == 3
    for png in ("quicklook.png", "ranking.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # ranks.csv is the GeoPackage's ranks table, rounded
    ranks = pyogrio.read_dataframe(out / gpkg, layer="ranks")
    pd.testing.assert_frame_equal(pd.read_csv(out / "ranks.csv"),
                                  rounded(pd.DataFrame(ranks), RANK_COLUMN_KINDS), check_dtype=False)
    assert not [p for p in os.listdir(out) if ".part" in p]


@pytest.mark.slow
def test_big_layer_is_tiled_with_overviews(tmp_path, cairn):
    z = smooth_terrain((300, 280), seed=1)
    dem = write_tif(tmp_path / "big.tif", z)
    code, _, err = cairn("peaks", dem, "-o", tmp_path / "o", "--rmse", "2", "-n", "2",
                         "--workers", "1", "-q")
    assert code == 0, err
    with rasterio.open(tmp_path / "o" / "summit_credit.tif") as ds:
        assert ds.profile["tiled"] and ds.block_shapes[0] == (256, 256)
        assert ds.overviews(1) and ds.compression is not None


@pytest.mark.slow
def test_existing_outputs_refused_without_overwrite(cairn, dem_tif, tmp_path):
    out = tmp_path / "out"
    assert cairn("peaks", dem_tif, "-o", out, *COMMON)[0] == 0
    code, _, err = cairn("peaks", dem_tif, "-o", out, *COMMON)
    assert code == 2 and "--overwrite" in err and len(err.strip().splitlines()) == 1
    assert cairn("peaks", dem_tif, "-o", out, *COMMON, "--overwrite")[0] == 0


def test_missing_accuracy_refused_with_typical_values(cairn, dem_tif, tmp_path):
    code, _, err = cairn("peaks", dem_tif, "-o", tmp_path / "o", "-n", "2")
    assert code == 2 and "--rmse" in err and "lidar" in err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("args,needle", [
    (("--rmse", "1", "--le90", "2"), "exactly one"),
    (("--rmse", "1", "--kernel", "cosine"), "--kernel"),
    (("--rmse", "1", "--nugget", "2"), "--nugget"),
    (("--rmse", "1", "--connectivity", "6"), "--connectivity"),
    (("--rmse", "1", "--min-prominence", "-1"), "--min-prominence"),
])
def test_bad_options_one_line_exit_2(cairn, dem_tif, tmp_path, args, needle):
    code, _, err = cairn("peaks", dem_tif, "-o", tmp_path / "o", *args)
    assert code == 2 and needle in err and len(err.strip().splitlines()) == 1


def test_help_has_example_and_caution(cairn):
    for cmd in ("peaks", "depressions", "catchments", "sweep", "demo", "inspect"):
        code, out, _ = cairn(cmd, "--help")
        assert code == 0 and "Example" in out
        if cmd != "inspect":
            assert "licensed" in out and "Caution" in out


def test_inspect(cairn, dem_tif):
    code, out, _ = cairn("inspect", dem_tif)
    assert code == 0 and "60 rows x 70 columns" in out and "EPSG:32633" in out
    assert "metre" in out and "bytes per cell" in out


def _cairn_proc(*args, every: int | None = None, **kw):
    """The CLI in a process of its own; ``every``: checkpoint every so many realisations
    (instead of 50)."""
    return subprocess.Popen(cli_command(checkpoint_every=every, stand_in_figures=True)
                            + [*map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


@pytest.mark.slow
def test_ctrl_c_saves_checkpoint_and_resume_is_identical(tmp_path):
    z = smooth_terrain((150, 150), seed=2)
    dem = write_tif(tmp_path / "d.tif", z)
    ck = tmp_path / "ck.npz"
    args = ("peaks", dem, "--rmse", "1", "-n", "100", "--seed", "9", "--workers", "1")
    p = _cairn_proc(*args, "-o", tmp_path / "a", "--checkpoint", ck, every=10)
    deadline = time.time() + 120
    while not ck.exists() and time.time() < deadline:  # first checkpoint after 10 realisations
        time.sleep(0.02)
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=120)
    assert p.returncode == 130 and "--resume" in err
    assert not (tmp_path / "a" / "summit_credit.tif").exists()  # nothing half-written
    p = _cairn_proc(*args, "-o", tmp_path / "a", "--checkpoint", ck, "--resume", "-q")
    assert p.wait(timeout=300) == 0
    p = _cairn_proc(*args, "-o", tmp_path / "b", "-q")
    assert p.wait(timeout=300) == 0
    for name in ("summit_credit", "col_credit", "summit_probability"):
        with rasterio.open(tmp_path / "a" / f"{name}.tif") as a, \
                rasterio.open(tmp_path / "b" / f"{name}.tif") as b:
            assert np.array_equal(a.read(), b.read(), equal_nan=True)


@pytest.fixture(scope="session")
def demo_out(tmp_path_factory):
    def make():
        out = tmp_path_factory.mktemp("demo")
        p = subprocess.run([sys.executable, "-c", "from cairn_cli.main import main; main()", "demo",
                            "-o", str(out), "-q"], capture_output=True, text=True, timeout=600)
        assert p.returncode == 0, p.stderr
        return out

    return once("demo", make)


@pytest.mark.xdist_group("demo")  # one worker runs the demo
@pytest.mark.slow
def test_demo_twin_summit_splits_and_knolls_spread(demo_out):
    summits = pd.read_csv(demo_out / "peaks" / "summits.csv").sort_values("rank")
    # the two flat tops of Twin Crag share p_first roughly evenly (binomial, 300 realisations)
    twins = summits.head(2)
    assert twins["p_first"].sum() > 0.95
    assert np.all(np.abs(twins["p_first"] - 0.5) < 0.12)
    # Long Edge knolls (rows of y near 6801000): their credit is spread over several cells
    with rasterio.open(demo_out / "peaks" / "summit_credit.tif") as ds:
        credit = ds.read(1)
        ridge = credit[280:330, :]
    from scipy import ndimage

    lab, n = ndimage.label(ridge > 0.01 * np.nanmax(ridge), structure=np.ones((3, 3)))
    sizes = np.bincount(lab.ravel())[1:]
    assert n >= 4 and np.sum(sizes >= 3) >= 4
    # the three kettle hollows are counted in nearly every realisation; the 1 m hollow
    # is below the merge level (2 x RMSE) and belongs to the ground around it
    pits = pd.read_csv(demo_out / "depressions" / "pits.csv").sort_values("rank")
    assert (pits["p_above"] > 0.95).sum() == 3 and len(pits) == 3
    np.testing.assert_array_equal(np.sort(pits["unperturbed"].round())[::-1][:3], [6, 4, 3])
    # no clutter: every summit row is counted in most realisations
    assert len(summits) <= 10 and (summits["p_above"] > 0.5).all()


#: Each figure the README quotes about the demo's pictures: a pattern that finds it in the
#: README (exactly once) and the names of the figures (cairn_demo_data.readme_figures) its
#: numbers are, in order.
README_FIGURES = [
    (r"#1 (\d+) m, the highest summit; #3 (\d+) m, the lower twin",
     ["twin_1_on_dem", "twin_3_on_dem"]),
    (r'"first (\d+) \| (\d+)%"', ["twin_3_first", "twin_1_first"]),
    (r"mean prominences \((\d+) m and (\d+) m\)", ["twin_3_mean", "twin_1_mean"]),
    (r'bracketed "1st: (\d+) \| (\d+)%"', ["twin_3_first", "twin_1_first"]),
    (r"about (\d+) m, the\s+lower twin's role, and about (\d+) m, the highest summit's",
     ["twin_low_cluster", "twin_high_cluster"]),
    (r"#5 and #6 swap places 5 and 6 (\d+) \| (\d+)%",
     ["knolls_5_6_place_5", "knolls_6_5_place_5"]),
    (r"#7 and #8 places 7 and 8\s+(\d+) \| (\d+)%",
     ["knolls_7_8_place_7", "knolls_8_7_place_7"]),
    (r"#1 to #3, are counted in (\d+)% of realisations", ["hollows_counted"]),
    (r"ponds at its centre in (\d+)% of\s+realisations", ["shallow_hollow_ponds"]),
    (r"deepest in nearly every\s+realisation \(([\d.]+)%\)", ["hollow_1_first"]),
    (r"trade second place (\d+) \| (\d+)%", ["hollows_2_3_place_2", "hollows_3_2_place_2"]),
    (r"expected prominence \((\d+) and (\d+) m\)", ["twin_1_mean", "twin_3_mean"]),
    (r"the highest\s+summit's, about (\d+) m, and the lower twin's, about (\d+) m",
     ["twin_high_cluster", "twin_low_cluster"]),
    (r"kettle hollows of (\d+), (\d+) and (\d+) m come out about ([\d.]+),\s+([\d.]+) and "
     r"([\d.]+) m deep", ["hollow_1_on_dem", "hollow_2_on_dem", "hollow_3_on_dem",
                          "hollow_1_mean", "hollow_2_mean", "hollow_3_mean"]),
]


def quoted_figures(text: str) -> list[tuple[str, str]]:
    """(figure name, the number as the README writes it) for every README_FIGURES entry."""
    out = []
    for pattern, names in README_FIGURES:
        found = re.findall(pattern, text)
        assert len(found) == 1, f"the README quotes {pattern!r} {len(found)} times, not once"
        values = found[0] if isinstance(found[0], tuple) else (found[0],)
        out += list(zip(names, values))
    return out


def test_readme_quotes_every_figure_it_checks():
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    assert len(quoted_figures(readme)) == 29


@pytest.mark.xdist_group("demo")  # one worker runs the demo
@pytest.mark.slow
def test_readme_figures_about_the_demo_agree_with_a_demo_run(demo_out):
    # every number the README quotes about the demo's pictures lies within Monte Carlo
    # error of the demo's outputs: three standard errors (sqrt(p (1 - p) / N) for a
    # share, the 'se' column for a mean) plus half the last digit the README writes
    from cairn_demo_data.readme_figures import readme_figures

    measured = readme_figures(demo_out)
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    for name, text in quoted_figures(readme):
        value, se = measured[name]
        digits = len(text.split(".")[1]) if "." in text else 0
        assert abs(float(text) - value) <= 3 * se + 0.5 * 10 ** -digits + 1e-9, (
            f"README quotes {name} as {text}; the demo gives {value:.3f} ± {se:.3f}")


@pytest.mark.xdist_group("demo")  # one worker runs the demo
@pytest.mark.slow
def test_demo_layers_are_valid_cogs(demo_out):
    # OGC Cloud Optimized GeoTIFF Standard (2023), via rio-cogeo's validator, statistics
    # against numpy, a window and an overview read back (test_output_formats.check_cog)
    from .test_output_formats import check_cog

    tifs = sorted(demo_out.glob("*/*.tif"))
    assert len(tifs) == 7
    for path in tifs:
        check_cog(path)


# -- one option set for every command (the structure issue) --------------------------
SHARED = {"--rmse", "--le90", "--a95", "--kernel", "--range", "--covariance", "--nugget",
          "--band", "--bbox", "--nodata", "--realisations", "--seed", "--workers", "--scheduler",
          "--checkpoint", "--resume", "--target-se", "--overwrite", "--quiet", "--force"}
ATTRIBUTION = {"--threshold-jitter", "--weight", "--connectivity"}


@pytest.mark.parametrize("name,extra", [("peaks", ATTRIBUTION | {"--min-prominence", "--base"}),
                                        ("depressions", ATTRIBUTION | {"--min-depth"}),
                                        ("catchments", {"--snap", "--outlets", "--connectivity",
                                                        "--channel-area", "--conditioning",
                                                        "--breach-cap"}),
                                        ("sweep", ATTRIBUTION | {"--min-prominence", "--min-depth",
                                                                 "--base", "--kind"})])
def test_commands_share_one_option_set(name, extra):
    from cairn_cli.main import cli

    flags = {o for p in cli.commands[name].params for o in p.opts if o.startswith("--")}
    assert SHARED | extra <= flags, sorted((SHARED | extra) - flags)


def test_run_json_records_the_command_line_and_defaults(cairn, dem_tif, tmp_path):
    out = tmp_path / "out"
    code, _, err = cairn("depressions", dem_tif, "-o", out, *COMMON)
    assert code == 0, err
    run = json.loads((out / "run.json").read_text())
    assert run["command_line"].startswith("cairn depressions ") and "--rmse 1.5" in run["command_line"]
    assert run["parameters"]["threshold"] == pytest.approx(4.5)  # the library default, 3 x RMSE
    assert "threshold" in run["defaults"] and "RMSE" in run["defaults"]["threshold"]
    assert run["parameters"]["job"] == "depressions"


def test_target_se_stops_early_and_says_its_unit(cairn, dem_tif, tmp_path):
    out = tmp_path / "out"
    code, _, err = cairn("peaks", dem_tif, "-o", out, "--rmse", "1", "-n", "2000",
                         "--target-se", "5", "--workers", "1", "-q")
    assert code == 0, err
    run = json.loads((out / "run.json").read_text())
    assert run["execution"]["stopped_early"] and run["realisations_done"] < 2000
    assert run["realisations_done"] % 20 == 0 and run["execution"]["stop_statistic"] < 5
    code, help_text, _ = cairn("peaks", "--help")
    assert "vertical units" in help_text.split("--target-se SE")[1][:400]


@pytest.mark.slow
def test_resume_says_what_it_needs(cairn, dem_tif, tmp_path):
    code, _, err = cairn("peaks", dem_tif, "-o", tmp_path / "o", *COMMON, "--resume")
    assert code == 2 and "--resume needs a --checkpoint file" in err
    # extending a finished run replaces its outputs without --overwrite
    ck = tmp_path / "ck.npz"
    assert cairn("peaks", dem_tif, "-o", tmp_path / "o", *COMMON, "--checkpoint", ck)[0] == 0
    args = [a if a != "12" else "24" for a in COMMON]
    code, _, err = cairn("peaks", dem_tif, "-o", tmp_path / "o", *args, "--checkpoint", ck,
                         "--resume")
    assert code == 0, err
    assert json.loads((tmp_path / "o" / "run.json").read_text())["realisations_done"] == 24


def test_sweep_takes_the_shared_options(cairn, dem_tif, tmp_path):
    out = tmp_path / "sw"
    code, _, err = cairn("sweep", dem_tif, "-o", out, "--kind", "depressions", "--rmse", "0.5,1",
                         "--range", "60", "--bbox", "500000,6799600,500500,6800000", "-n", "6",
                         "--workers", "1", "-q", "--checkpoint", tmp_path / "ck.npz")
    assert code == 0, err
    run = json.loads((out / "run.json").read_text())
    assert run["parameters"]["job"] == "depressions"
    assert [r["error_model"]["rmse"] for r in run["runs"]] == [0.5, 1.0]
    assert all(r["error_model"]["range_m"] == 60 for r in run["runs"])
    assert sorted(p.name for p in tmp_path.glob("ck.*.npz")) == ["ck.gaussian-0.5.npz",
                                                                "ck.gaussian-1.npz"]
    code, _, err = cairn("sweep", dem_tif, "-o", tmp_path / "x", "--kind", "peaks",
                         "--rmse", "1", "--min-depth", "2")
    assert code == 2 and "--min-prominence" in err


def test_a_signal_inside_numba_or_an_import_is_sent_again_later_and_raises_anywhere_else(
        monkeypatch):
    """Ctrl-C or SIGTERM handled while Python code runs inside numba (a kernel's first
    call loading its environment, called back from compiled code) is not raised there,
    where it crashed the process, but sent again a moment later; anywhere else it
    raises at once (our own rule: no outside reference)."""
    import numba.core.serialize

    from cairn_cli import common

    sent = []
    monkeypatch.setattr(os, "kill", lambda pid, signum: sent.append((pid, signum)))
    ns: dict = {}
    src = "import sys\ndef inside():\n    return sys._getframe()\n"
    # numba's own callback file: deferred; another file of a folder named numba is not
    exec(compile(src, numba.core.serialize.__file__, "exec"), ns)
    elsewhere: dict = {}
    exec(compile(src, os.path.join(os.sep, "envs", "numba", "lib", "x.py"), "exec"), elsewhere)
    with pytest.raises(KeyboardInterrupt):
        common._interrupt(signal.SIGINT, elsewhere["inside"]())
    for signum in (signal.SIGINT, signal.SIGTERM):
        common._interrupt(signum, ns["inside"]())  # no exception
        deadline = time.monotonic() + 5
        while not sent and time.monotonic() < deadline:
            time.sleep(0.01)
        assert sent == [(os.getpid(), signum)]
        sent.clear()
    # importlib's own frames (an import under way, its module locks held): deferred too
    frozen: dict = {}
    exec(compile(src, "<frozen importlib._bootstrap>", "exec"), frozen)
    common._interrupt(signal.SIGINT, frozen["inside"]())  # no exception
    deadline = time.monotonic() + 5
    while not sent and time.monotonic() < deadline:
        time.sleep(0.01)
    assert sent == [(os.getpid(), signal.SIGINT)]
    sent.clear()
    with pytest.raises(KeyboardInterrupt) as got:
        common._interrupt(signal.SIGINT, sys._getframe())
    assert not isinstance(got.value, common.Terminated)
    with pytest.raises(common.Terminated):
        common._interrupt(signal.SIGTERM, sys._getframe())
    assert not sent
