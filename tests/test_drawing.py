"""The figures' second process (terrain.outputs.drawing): the same figures, byte for
byte, whether it draws them or the writer does; and when it fails, the writer draws
them itself, so a failure costs time and nothing else."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import pytest

from terrain import CreditJob, ErrorModel, run_ensemble
from terrain.outputs import drawing, plot
from terrain.outputs.writer import write_credit_run
from terrain.summary.features import summarise_features

FIGURES = ("quicklook.png", "ranking.png")


@pytest.fixture(scope="module", params=["peaks", "depressions"])
def demo_run(request):
    from cairn_demo_data import DEM_PATH
    from terrain.io import read_dem

    res = run_ensemble(read_dem(DEM_PATH), CreditJob(request.param), ErrorModel(rmse=1.0),
                       realisations=12, seed=3, backend="serial")
    return res, summarise_features(res)


def _write(folder, run, drawer=None):
    res, feat = run
    write_credit_run(folder, res, feat, input_path=None, drawer=drawer)
    return {name: (folder / name).read_bytes() for name in FIGURES}


@pytest.mark.real_figures
def test_the_process_draws_the_same_figures_as_the_writer(tmp_path, demo_run):
    here = _write(tmp_path / "here", demo_run)
    with drawing.start_figure_process() as drawer:
        there = _write(tmp_path / "there", demo_run, drawer)
        assert sorted(drawer.seconds) == sorted(FIGURES)  # the process made both
    assert drawer.proc.returncode is not None  # and is gone
    for name in FIGURES:
        assert here[name] == there[name], name


@pytest.mark.real_figures
def test_a_process_that_died_leaves_the_figures_to_the_writer(tmp_path, demo_run):
    here = _write(tmp_path / "here", demo_run)
    drawer = drawing.start_figure_process()
    drawer.proc.kill()
    drawer.proc.wait()
    there = _write(tmp_path / "there", demo_run, drawer)
    assert drawer.seconds == {}
    assert here == there


@pytest.mark.real_figures
def test_a_figure_the_process_cannot_draw_fails_in_the_writer(tmp_path, demo_run, monkeypatch):
    """A sheet that cannot be made is made again by the writer, which raises it;
    nothing of the run is published."""

    def broken(*args):
        raise ValueError("no sheet")

    monkeypatch.setattr(plot, "ranking_chart_sheet", broken)
    with drawing.start_figure_process() as drawer, pytest.raises(ValueError, match="no sheet"):
        _write(tmp_path / "out", demo_run, drawer)
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_a_process_that_cannot_start_is_none(monkeypatch):
    def no_process(*args, **kwargs):
        raise OSError("no python here")

    monkeypatch.setattr(drawing.subprocess, "Popen", no_process)
    assert drawing.start_figure_process() is None


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_the_process_ends_with_a_killed_command_line(tmp_path):
    """Its command line killed outright (nothing runs its clean-up), the figures'
    process reads the end of its pipe and ends."""
    from cairn_demo_data import DEM_PATH

    p = subprocess.Popen([sys.executable, "-c", "from cairn_cli.main import main; main()",
                          "peaks", DEM_PATH, "-o", str(tmp_path / "o"), "--rmse", "1", "-n", "4000",
                          "-q"], stderr=subprocess.DEVNULL)
    try:
        deadline, figures = time.time() + 60, None
        while figures is None and time.time() < deadline:
            figures = next((k for k in _children(p.pid) if b"terrain.outputs.drawing"
                            in Path(f"/proc/{k}/cmdline").read_bytes()), None)
            time.sleep(0.05)
        assert figures is not None
    finally:
        p.kill()
        p.wait()
    deadline = time.time() + 30
    while _running(figures) and time.time() < deadline:
        time.sleep(0.05)
    assert not _running(figures)


def _children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        out += [int(c) for c in (task / "children").read_text().split()]
    return out


def _running(pid: int) -> bool:
    try:
        return "State:\tZ" not in Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return False
