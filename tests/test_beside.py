"""Files written in a forked copy while this process works on
(terrain.outputs.beside): the same bytes as written here, a copy that dies
leaves its file (and nothing else) to this process, an interrupted writer
takes its copy with it, and no fork while another thread runs."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from terrain.outputs import beside
from terrain.outputs.writer import _Clock

from .conftest import cli_command, smooth_terrain, write_tif

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"),
                                reason="figures are drawn in a forked copy on Linux only")


def _figure(text: str):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(2, 1), dpi=50)
    FigureCanvasAgg(fig)
    fig.text(0.1, 0.5, text)
    return fig


def test_a_forked_copy_writes_the_bytes_drawn_here(tmp_path, monkeypatch):
    figures = {"a.png": lambda: _figure("map"), "b.png": lambda: _figure("chart")}
    done = []
    for name, fork in (("forked", True), ("here", False)):
        (tmp_path / name).mkdir()
        monkeypatch.setattr(beside, "can_fork", lambda fork=fork: fork)
        clock = _Clock()
        beside.write_beside(tmp_path / name, clock, lambda name=name: done.append(name), figures)
        assert clock.forked == (["a.png"] if fork else [])  # the first figure, in the copy
        assert clock.seconds["figures"] > 0
    assert done == ["forked", "here"]
    for name in figures:
        assert (tmp_path / "forked" / name).read_bytes() == (tmp_path / "here" / name).read_bytes()


def test_a_copy_that_dies_leaves_its_figure_to_this_process(tmp_path, monkeypatch):
    parent = os.getpid()

    def dies_in_the_copy():
        if os.getpid() != parent:  # half a file, then killed
            (tmp_path / ".a.png.k3x9.part.png").write_bytes(b"\x89PNG half")
            os.kill(os.getpid(), signal.SIGKILL)
        return _figure("map")

    monkeypatch.setattr(beside, "can_fork", lambda: True)
    clock = _Clock()
    beside.write_beside(tmp_path, clock, lambda: None, {"a.png": dies_in_the_copy})
    assert clock.forked == []
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.png"]
    assert (tmp_path / "a.png").read_bytes()[:4] == b"\x89PNG"


def test_a_figure_that_fails_raises_here(tmp_path, monkeypatch):
    def broken():
        raise ValueError("no such colour map")

    monkeypatch.setattr(beside, "can_fork", lambda: True)
    clock = _Clock()
    with pytest.raises(ValueError, match="no such colour map"):
        beside.write_beside(tmp_path, clock, lambda: None, {"a.png": broken})
    assert clock.fell_back == ["figures"]  # the copy ran, failed, and it was done again here
    assert not list(tmp_path.iterdir())


def _write(path, text: str = "x"):
    def work():
        with open(path, "w") as fh:
            fh.write(text)
    return work


def test_no_fork_to_be_had_does_the_work_here(tmp_path, monkeypatch):
    import errno

    def no_fork():
        raise OSError(errno.EAGAIN, "Resource temporarily unavailable")

    monkeypatch.setattr(beside, "can_fork", lambda: True)
    monkeypatch.setattr(os, "fork", no_fork)
    clock, order = _Clock(), []
    with beside.in_a_copy(clock, "layers", lambda: order.append("work"), [tmp_path / "a"]):
        order.append("block")
    assert order == ["block", "work"] and clock.forked == [] and clock.fell_back == []


def test_a_copy_reaped_elsewhere_is_judged_by_its_report(tmp_path, monkeypatch):
    # a host process that ignores SIGCHLD: the kernel reaps the copy itself
    monkeypatch.setattr(beside, "can_fork", lambda: True)
    previous = signal.signal(signal.SIGCHLD, signal.SIG_IGN)
    try:
        clock = _Clock()
        with beside.in_a_copy(clock, "layers", _write(tmp_path / "a"), [tmp_path / "a"]):
            time.sleep(0.3)
    finally:
        signal.signal(signal.SIGCHLD, previous)
    assert clock.forked == ["a"] and (tmp_path / "a").read_text() == "x"


def test_a_copy_past_its_deadline_is_killed_and_its_work_done_here(tmp_path, monkeypatch):
    parent = os.getpid()

    def hangs_in_the_copy():
        if os.getpid() != parent:
            time.sleep(60)
        _write(tmp_path / "a", "here")()

    monkeypatch.setattr(beside, "can_fork", lambda: True)
    monkeypatch.setattr(beside, "copy_deadline", lambda seconds: 0.5)
    clock, t0 = _Clock(), time.monotonic()
    with beside.in_a_copy(clock, "layers", hangs_in_the_copy, [tmp_path / "a"]):
        pass
    assert time.monotonic() - t0 < 10
    assert clock.fell_back == ["layers"] and (tmp_path / "a").read_text() == "here"


def test_ctrl_c_as_the_copy_forks_takes_the_copy_with_it(tmp_path, monkeypatch):
    """A Ctrl-C arriving while the copy is forked (held until the copy's pid is
    kept) ends the block, and the copy is killed and reaped."""
    real_fork, pids = os.fork, []

    def fork_then_ctrl_c():
        pid = real_fork()
        if pid:
            pids.append(pid)
            # to this thread, which holds it blocked until the pid is kept (a
            # process-wide signal could go to a test runner's own thread)
            signal.pthread_kill(threading.get_ident(), signal.SIGINT)
        return pid

    monkeypatch.setattr(beside, "can_fork", lambda: True)
    monkeypatch.setattr(os, "fork", fork_then_ctrl_c)
    ran = []
    with pytest.raises(KeyboardInterrupt):
        with beside.in_a_copy(_Clock(), "layers", lambda: time.sleep(60), [tmp_path / "a"]):
            ran.append("block")
    assert not ran
    with pytest.raises(ProcessLookupError):  # killed and reaped
        os.kill(pids[0], 0)


def test_an_interrupted_writer_takes_its_copy_with_it(tmp_path, monkeypatch):
    parent, pids = os.getpid(), []

    def slow():
        if os.getpid() != parent:
            time.sleep(60)
        return _figure("map")

    def interrupted():
        raise KeyboardInterrupt

    start = beside._Copy.start

    def spy(self, *args, **kwargs):
        start(self, *args, **kwargs)
        pids.append(self.pid)

    monkeypatch.setattr(beside, "can_fork", lambda: True)
    monkeypatch.setattr(beside._Copy, "start", spy)
    t0 = time.monotonic()
    with pytest.raises(KeyboardInterrupt):
        beside.write_beside(tmp_path, _Clock(), interrupted, {"a.png": slow})
    assert time.monotonic() - t0 < 10
    with pytest.raises(ProcessLookupError):  # killed and reaped
        os.kill(pids[0], 0)
    assert not list(tmp_path.iterdir())


def test_no_fork_while_another_thread_runs():
    release = threading.Event()
    other = threading.Thread(target=release.wait)
    other.start()
    try:
        assert not beside.can_fork()
    finally:
        release.set()
        other.join()


def test_the_command_line_forks_and_writes_the_same_files(tmp_path, cairn, monkeypatch):
    """A command-line run in a process of its own (one thread: the layers are
    written in a forked copy while the features are summarised, the map in
    another while the tables are written) and the same run in this process,
    one file after another: the same figures, bytes for bytes, and the same
    layers, pixels and layout."""
    import rasterio

    dem = write_tif(tmp_path / "dem.tif", smooth_terrain((60, 70), seed=3))
    args = ["peaks", str(dem), "--rmse", "1", "-n", "6", "--workers", "1", "--seed", "5", "-q"]
    subprocess.run([*cli_command(), *args, "-o", str(tmp_path / "forked")], check=True,
                   capture_output=True, timeout=300)
    monkeypatch.setattr(beside, "can_fork", lambda: False)
    assert cairn(*args, "-o", tmp_path / "here")[0] == 0
    timings = [json.loads((tmp_path / d / "run.json").read_text())["timings"]
               for d in ("forked", "here")]
    layers = sorted(p.name for p in (tmp_path / "here").glob("*.tif"))
    assert sorted(timings[0]["forked"]) == sorted(layers + ["quicklook.png"])
    assert "forked" not in timings[1] and timings[0]["summary_s"] > 0
    for name in ("quicklook.png", "ranking.png"):
        a, b = ((tmp_path / d / name).read_bytes() for d in ("forked", "here"))
        assert a == b, name
    for name in layers:
        with rasterio.open(tmp_path / "forked" / name) as a, \
                rasterio.open(tmp_path / "here" / name) as b:
            pa, pb = ({k: v for k, v in d.profile.items() if k != "nodata"} for d in (a, b))
            assert pa == pb and a.overviews(1) == b.overviews(1) and np.isnan(a.nodata)
            assert np.array_equal(a.read(), b.read(), equal_nan=True), name
    assert np.isfinite(timings[0]["writing_share"])
