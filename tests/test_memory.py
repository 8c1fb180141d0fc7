"""The memory guard against the peak resident memory of real runs.

Each case runs the command line in a fresh process and measures the peak
resident set of it and of its worker processes (Linux's ``VmHWM`` in
/proc/<pid>/status: the high-water mark of resident memory, summed over the
process tree; the kernel's own accounting, not ours). The guard's estimate,
from the DEM's header and the job's own figures (``memory_per_cell``,
``new_counts``, ``layers``), must cover it without overstating it more than
twice: measured <= estimate <= 2 x measured.
"""

from __future__ import annotations

import subprocess
import sys
import time

import numpy as np
import pytest

from terrain.io import read_header
from terrain.jobs import CatchmentJob, CreditJob
from terrain.resources import estimate_run
from terrain.runner import Execution

from .conftest import smooth_terrain, write_tif

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")]


def _tree(pid: int) -> list[int]:
    out = [pid]
    for p in out:
        try:
            for task in _listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as fh:
                    out += [int(c) for c in fh.read().split() if int(c) not in out]
        except OSError:
            continue
    return out


def _listdir(path):
    import os

    return os.listdir(path)


def _hwm(pid: int) -> int | None:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def peak_resident(args) -> tuple[int, int, str]:
    """Run the CLI; the sum over its process tree of each process's peak resident set."""
    p = subprocess.Popen([sys.executable, "-c", "from cairn_cli.main import run; run()",
                          *map(str, args)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                         text=True)
    seen: dict[int, int] = {}
    while p.poll() is None:
        for pid in _tree(p.pid):
            h = _hwm(pid)
            if h is not None:
                # the latest reading: a child caught between fork and exec still shows
                # its parent's memory; after exec its high-water mark starts afresh
                seen[pid] = h
        time.sleep(0.01)
    return sum(seen.values()), p.returncode, p.stderr.read()


@pytest.fixture(scope="module")
def dems(tmp_path_factory):
    d = tmp_path_factory.mktemp("mem")
    paths = {n: write_tif(d / f"s{n}.tif", smooth_terrain((n, n), seed=3)) for n in (250, 400)}
    rng = np.random.default_rng(0)
    for n, k in ((400, 1), (250, 100)):
        xy = np.column_stack([500000 + rng.uniform(20, n * 10 - 20, k),
                              6800000 - rng.uniform(20, n * 10 - 20, k)])
        with open(d / f"outlets{k}.csv", "w") as fh:
            fh.write("id,x,y\n" + "".join(f"o{i},{x},{y}\n" for i, (x, y) in enumerate(xy)))
        paths[f"outlets{k}"] = (d / f"outlets{k}.csv", [f"o{i}" for i in range(k)], xy)
    return paths


CASES = {  # name: (command, dem size, extra arguments, workers)
    "peaks": ("peaks", 400, ("--min-prominence", "10"), 1),
    "depressions-2-workers": ("depressions", 400, ("--min-depth", "10"), 2),
    "depressions-blocks-2-workers": ("depressions", 400, ("--min-depth", "10", "--block", "256"),
                                     2),
    "catchments-1": ("catchments", 400, (), 1),
    "catchments-100": ("catchments", 250, (), 1),
    "sweep": ("sweep", 400, ("--kind", "peaks", "--min-prominence", "10"), 1),
}


@pytest.mark.parametrize("case", list(CASES))
def test_estimate_covers_the_measured_peak_at_most_twice(dems, tmp_path, case):
    command, size, extra, workers = CASES[case]
    n = 4 * workers
    dem = dems[size]
    args = [command, dem, "-o", tmp_path / "o", "-n", n, "--workers", workers, "-q", *extra]
    runs, quicklook = 1, True
    if command == "catchments":
        path, ids, xy = dems["outlets100" if case.endswith("100") else "outlets1"]
        job = CatchmentJob(ids, xy)  # the job's own figures, whatever its layers are
        args += ["--outlets", path, "--rmse", "1"]
    elif command == "sweep":
        job, runs, quicklook = CreditJob("peaks"), 2, False
        args += ["--rmse", "1,2"]
    else:
        job = CreditJob(command)
        args += ["--rmse", "1"]
    measured, code, err = peak_resident(args)
    assert code == 0, err
    block = int(extra[extra.index("--block") + 1]) if "--block" in extra else None
    est = estimate_run(read_header(dem), job,
                       Execution(realisations=n, workers=workers, block=block),
                       runs=runs, quicklook=quicklook)
    print(f"{case}: measured {measured / 2**20:.0f} MiB, estimate {est.total / 2**20:.0f} MiB")
    assert measured <= est.total <= 2 * measured, (measured / 2**20, est.total / 2**20)
