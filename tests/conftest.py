"""Shared fixtures: generated terrains (big data is generated, never committed)."""

from __future__ import annotations

import functools
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter

# Bytecode is cached while the tests run, whatever PYTHONDONTWRITEBYTECODE says: the
# suite starts hundreds of Python processes (command lines, pool and Dask workers),
# and without the cache each compiles cairn's modules again (~0.4 s each) and each
# test process rewrites every test module's asserts again (~4 s). Set here, before
# pytest-xdist starts its test processes, so they and their children inherit it;
# the files go to __pycache__ folders, which git ignores.
os.environ.pop("PYTHONDONTWRITEBYTECODE", None)
sys.dont_write_bytecode = False

# Ctrl-C's own handling, whatever the suite was started from: a command started in
# the background of a shell script inherits SIGINT ignored (POSIX), and Python then
# keeps it ignored, so tests that send one to this process saw no KeyboardInterrupt.
# Set in each test process (and inherited as the default action by the commands they
# start).
if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)


def pytest_configure(config):
    """Before the test processes start (in pytest-xdist's controller, or in a run
    without it), compile cairn's kernels once, in two processes at a time
    (tests/warm_kernels.py): on a fresh checkout none is cached, and every test
    process would otherwise compile the same kernels at the same time."""
    if hasattr(config, "workerinput") or config.option.collectonly:
        return
    script = Path(__file__).with_name("warm_kernels.py")
    root = str(Path(__file__).parent.parent)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [root, os.environ.get(
        "PYTHONPATH")]))}
    procs = [subprocess.Popen([sys.executable, str(script), part], env=env, cwd=root,
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
             for part in ("whole", "blocked")]
    for p in procs:
        _, err = p.communicate()
        if p.returncode:  # the tests themselves will show what is wrong
            print(f"warm_kernels.py failed:\n{err}", file=sys.stderr)


@pytest.hookimpl(trylast=True)
def pytest_collection_modifyitems(config, items):
    """Make ``--dist loadgroup`` group again under pytest 9.

    pytest-xdist (3.8) marks a grouped test by appending ``@group`` to
    ``item._nodeid``; pytest 9 reads a node's id from ``item._id`` instead, so the
    group never reaches the scheduler and the tests of an ``xdist_group`` (which
    share one expensive run through ``once``) land on both workers, each making
    the run. Set the id pytest 9 reads, once xdist has named the group."""
    if not getattr(config.option, "loadgroup", False):
        return
    try:
        from _pytest.nodeid import NodeId
    except ImportError:  # pytest < 9: xdist's own suffix already took effect
        return
    for item in items:
        names = sorted(_groups(item))
        if names and "@" not in item.nodeid:
            item._id = NodeId.parse(f"{item.nodeid}@{'_'.join(names)}")


@functools.cache  # nested quadrature: seconds a call, the same calls recur
def exact_p_higher_first(kernel, sigma, delta):
    """P(e1 - e2 > -delta) for iid kernel errors of standard deviation sigma: the
    probability that the higher of two summits (heights a + delta, a) stays higher.

    Gaussian: Phi(delta / (sigma sqrt 2)) (difference of two normals; scipy.stats).
    Compact kernels: int K(x) F(x + delta) dx by numerical integration (scipy.integrate).
    """
    import math

    from scipy import integrate, stats

    from terrain.noise import KERNELS

    if kernel == "gaussian":
        return stats.norm.cdf(delta / (sigma * math.sqrt(2)))
    k = KERNELS[kernel]
    h = k.halfwidth(sigma)

    def cdf(t):
        t = min(max(t, -h), h)
        return integrate.quad(lambda u: k.pdf(u, h), -h, t)[0]

    return integrate.quad(lambda x: k.pdf(x, h) * cdf(x + delta), -h, h, limit=200)[0]


def smooth_terrain(shape, seed=0, scales=(2, 6, 18), amp=100.0, dtype=np.float32):
    """Sum of Gaussian-filtered white noise at several scales (a generic test surface)."""
    rng = np.random.default_rng(seed)
    z = sum(gaussian_filter(rng.standard_normal(shape), s) * s for s in scales)
    return (z * amp).astype(dtype)


@pytest.fixture
def terrain():
    return smooth_terrain


@pytest.fixture(scope="session")
def usgs_dem():
    """The USGS 3 arc-second DEM shipped by matplotlib (integer metres, many ties)."""
    from matplotlib import cbook

    f = cbook.get_sample_data("jacksboro_fault_dem.npz")  # already an NpzFile
    with f:
        return np.asarray(f["elevation"]).astype(np.float32)


def said(err: str) -> list[str]:
    """A command's stderr lines, without the warnings said before its outcome."""
    return [x for x in err.strip().splitlines() if not x.startswith("cairn: warning:")]


def write_tif(path, z, *, crs="EPSG:32633", transform=None, nodata=None, dtype=None, count=1,
              units=None):
    """Write a small GeoTIFF for a test (rasterio)."""
    import rasterio
    from rasterio.transform import from_origin

    z = np.asarray(z)
    arrs = z if z.ndim == 3 else z[None]
    profile = dict(driver="GTiff", height=arrs.shape[1], width=arrs.shape[2], count=arrs.shape[0],
                   dtype=dtype or arrs.dtype.name, crs=crs,
                   transform=transform or from_origin(500000.0, 6800000.0, 10.0, 10.0))
    if nodata is not None:
        profile["nodata"] = nodata
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with rasterio.open(path, "w", **profile) as ds:
            ds.write(arrs.astype(profile["dtype"]))
            if units:
                ds.units = (units,) * arrs.shape[0]
    return path


@pytest.fixture
def cairn(monkeypatch):
    """Run the cairn CLI in-process; returns (exit code, stdout, stderr)."""
    from click.testing import CliRunner

    from cairn_cli.main import run

    def invoke(*args):
        runner = CliRunner()
        result = runner.invoke(_Entry(run), [str(a) for a in args], catch_exceptions=False)
        return result.exit_code, result.stdout, result.stderr

    return invoke


class _Entry:
    """Adapter so CliRunner can drive the console entry point (``run``)."""

    def __init__(self, fn):
        self.fn = fn
        self.name = "cairn"

    def main(self, args=None, prog_name=None, **kwargs):
        self.fn(args)


def upland(shape=(200, 260), cell=1.0):
    """An invented lidar-like upland (1 m cells, metres), built for the feature tests.

    Ground falling gently in every direction from a flat-topped hill about
    21 m high (a top of ~1,500 cells); a flat-surfaced lake about 4 m below
    its spill point (a floor of ~2,100 cells, the water surface a DEM
    records); a 10 m dome whose top carries knobs of 0.08 and 0.2 m prominence;
    a small cone-shaped hollow about 1.4 m deep. Returns (z, footprints): each feature's cells.
    """
    rows, cols = shape
    r, c = np.mgrid[0:rows, 0:cols].astype(np.float64)

    def dist(r0, c0):
        return np.hypot(r - r0, c - c0)

    ground = 80 - 0.05 * dist(60, 190)
    z = ground.copy()
    # flat-topped hill at the top of the ground
    d = dist(60, 190)
    z = np.maximum(z, np.where(d <= 22, 101.0, 101.0 - 1.2 * (d - 22)))
    # lake: a flat floor 4 m below the lowest ground around it
    d = dist(60, 60)
    floor = ground[d <= 27.5].min() - 4.0
    z = np.where(d <= 26, floor, z)
    # dome with knobs smaller than 2 x RMSE
    d = dist(150, 80)
    bump = 10.0 * np.exp(-(d / 18.0) ** 4)
    for dr, dc in ((-5, -3), (4, 5), (5, -5)):
        bump += 0.4 * np.exp(-(dist(150 + dr, 80 + dc) / 1.5) ** 2)
    z = z + bump
    # cone-shaped hollow
    d = dist(160, 200)
    z = np.where(d < 6, z - 1.7 * (1 - d / 6), z)
    feet = {"lake": dist(60, 60) <= 26, "hill": dist(60, 190) <= 22,
            "dome": dist(150, 80) <= 5, "hollow": dist(160, 200) <= 2}
    return z.astype(np.float32), feet


_ONCE: dict = {}


def once(name: str, make):
    """``make()``, made once per test process and kept (a pytest-xdist worker tears a
    module or session fixture down whenever its queue runs dry, and would make an
    expensive one again; with ``--dist loadgroup`` and an ``xdist_group`` mark the
    tests sharing it run in one process)."""
    if name not in _ONCE:
        _ONCE[name] = make()
    return _ONCE[name]


def pytest_sessionfinish(session):
    """Close what ``once`` made that needs closing (a Dask cluster) before the process ends."""
    for made in _ONCE.values():
        if hasattr(made, "close") and callable(made.close):
            made.close()
    _ONCE.clear()


def _groups(item) -> set[str]:
    """The names of ``item``'s xdist groups (none for no item)."""
    return {str(m.args[0] if m.args else m.kwargs.get("name", "default"))
            for m in item.iter_markers("xdist_group")} if item else set()


def cli_command(*, checkpoint_every: int | None = None, worker_wait: float | None = None,
                stand_in_figures: bool = False):
    """``python -c`` running cairn's command line, optionally checkpointing every
    ``checkpoint_every`` realisations (not 50), waiting ``worker_wait`` seconds for
    Dask workers and drawing blank figures (tests/stand_ins.py): for tests that run
    or interrupt a run in a process of its own."""
    patch = ""
    if stand_in_figures:
        patch += (f"import sys; sys.path.insert(0, {str(Path(__file__).parent)!r}); "
                  "import stand_ins; stand_ins.install(); ")
    if worker_wait is not None:
        patch += f"import terrain.runner.backends as b; b.WORKER_WAIT_SECONDS = {worker_wait}; "
    if checkpoint_every is not None:
        patch += ("import terrain.runner.ensemble as e; i = e.Execution.__init__; "
                  "e.Execution.__init__ = lambda s, *a, **k: (i(s, *a, **k), "
                  f"object.__setattr__(s, 'checkpoint_every', {checkpoint_every}))[0]; ")
    return [sys.executable, "-c", f"{patch}from cairn_cli.main import main; main()"]


def pytest_runtest_teardown(item, nextitem):
    """Close the shared Dask cluster once its group's tests are done: idle, its two
    worker processes still spend ~6% of a core each (heartbeats, memory checks)."""
    if "dask_cluster" in _groups(item) and "dask_cluster" not in _groups(nextitem):
        made = _ONCE.pop("dask_cluster", None)
        if made is not None:
            made.close()


@pytest.fixture
def dask_cluster():
    """A local Dask cluster, two worker processes of one thread each, made once per
    test process and kept (each start costs seconds of CPU). For tests that only run
    on it: a test that kills a worker or the scheduler makes its own. Mark its tests
    ``xdist_group("dask_cluster")`` so one test process makes it."""
    pytest.importorskip("distributed")

    def make():
        import logging

        from distributed import LocalCluster

        return LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                            dashboard_address=":0", silence_logs=logging.CRITICAL)

    return once("dask_cluster", make)


@pytest.fixture
def stand_in_figures(monkeypatch, request):
    """Runs in this test draw blank stand-ins for the quick-look figures.

    For tests about something else (refusals, checkpoints, publication): the
    figures cost seconds a run, and tests/test_pictures.py and tests/test_cli.py
    check the real ones. Every file is still written and published as in a
    real run. A test marked ``real_figures`` draws them as usual.
    """
    if not request.node.get_closest_marker("real_figures"):
        use_stand_in_figures(monkeypatch)


def use_stand_in_figures(mp: pytest.MonkeyPatch) -> None:
    """Replace the quick-look figures by blank stand-ins through ``mp``."""
    from tests.stand_ins import targets

    for module, name, stand_in in targets():
        mp.setattr(module, name, stand_in)
