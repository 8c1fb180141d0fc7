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

import contextlib
import os
import signal
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


def _private(pid: int) -> int | None:
    """A process's private memory now (Private_Clean + Private_Dirty, Linux
    kernel documentation, "The /proc Filesystem", smaps_rollup, 2024)."""
    try:
        with open(f"/proc/{pid}/smaps_rollup") as fh:
            return sum(int(line.split()[1]) * 1024 for line in fh
                       if line.startswith(("Private_Clean:", "Private_Dirty:")))
    except OSError:
        return None


def _cmdline(pid: int) -> bytes | None:
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            return fh.read()
    except OSError:
        return None


def peak_resident(args, preexec_fn=None) -> tuple[int, int, str]:
    """Run the CLI; the sum over its process tree of each process's peak resident
    set; of the forked copies of the command (one at a time), the largest's
    largest private memory seen (it shares the rest with the command)."""
    p = subprocess.Popen([sys.executable, "-c", "from cairn_cli.main import main; main()",
                          *map(str, args)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                         text=True, preexec_fn=preexec_fn)
    with _killed_if_left(p):
        return _watch(p)


@contextlib.contextmanager
def _killed_if_left(p):
    """End ``p`` and its children if the test stops before it does (Ctrl-C, a timeout)."""
    try:
        yield
    finally:
        if p.poll() is None:
            for pid in reversed(_tree(p.pid)):
                with contextlib.suppress(OSError):
                    os.kill(pid, signal.SIGKILL)
            p.wait()


def _watch(p) -> tuple[int, int, str]:
    seen: dict[int, int] = {}
    span: dict[int, list[float]] = {}
    forked: set[int] = set()
    while p.poll() is None:
        command = _cmdline(p.pid)  # read again: the first reading may precede the exec
        for pid in _tree(p.pid):
            line = _cmdline(pid)
            h = _hwm(pid) if line is not None else None  # None: it has just ended
            if pid != p.pid and h is not None and line == command:  # a forked copy
                private = _private(pid)
                h = max(seen.get(pid, 0), private) if private is not None else None
                forked.add(pid)
            elif h is not None:  # a spawned worker seen before its exec is not a copy
                forked.discard(pid)
            if h is not None:
                # the latest reading: a child caught between fork and exec still shows
                # its parent's memory; after exec its high-water mark starts afresh
                seen[pid] = h
                now = time.monotonic()
                span.setdefault(pid, [now, now])[1] = now
        time.sleep(0.01)
    # a helper a library runs for a few milliseconds (ldconfig, fc-list) may only ever be
    # seen before its exec, with its parent's memory: children are counted once they
    # have lived 0.1 s, as a worker process does
    kept = [pid for pid in seen if pid == p.pid or span[pid][1] - span[pid][0] >= 0.1]
    # forked copies run one at a time: the largest counts
    copies = [pid for pid in kept if pid in forked]
    total = sum(seen[pid] for pid in kept if pid not in forked) + max(
        (seen[pid] for pid in copies), default=0)
    return total, p.returncode, p.stderr.read()


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


class MemoryCap:
    """A memory control group of its own with a hard limit (the Linux kernel's memory
    controller, cgroup v1 or v2: Linux kernel documentation, "Memory Resource
    Controller" and "Control Group v2", 2024): a process moved into it, and every
    process it starts, is held to ``limit`` bytes together, the page cache
    included (reclaimed before anything is killed). Needs a writable cgroup
    hierarchy (root, or a delegated group); None where there is none."""

    def __init__(self, folder: str, version: int, limit: int):
        self.folder, self.version, self.limit = folder, version, limit

    @classmethod
    def make(cls, limit: int) -> MemoryCap | None:
        import os

        name = f"cairn-test-{os.getpid()}"
        for root, version, limit_file in (("/sys/fs/cgroup/memory", 1, "memory.limit_in_bytes"),
                                          ("/sys/fs/cgroup", 2, "memory.max")):
            if version == 2:
                try:
                    with open(os.path.join(root, "cgroup.subtree_control")) as fh:
                        if "memory" not in fh.read().split():
                            continue
                except OSError:
                    continue
            folder = os.path.join(root, name)
            try:
                os.mkdir(folder)
            except OSError:
                continue
            try:
                with open(os.path.join(folder, limit_file), "w") as fh:
                    fh.write(str(limit))
            except OSError:
                os.rmdir(folder)
                continue
            # no swap beyond the cap either, where the kernel accounts it (else a run
            # could swap instead of being held to the cap)
            swap = ("memory.memsw.limit_in_bytes", str(limit)) if version == 1 else (
                "memory.swap.max", "0")
            with contextlib.suppress(OSError):
                with open(os.path.join(folder, swap[0]), "w") as fh:
                    fh.write(swap[1])
            return cls(folder, version, limit)
        return None

    def enter(self) -> None:
        """Move the calling process into the group (a ``preexec_fn``)."""
        import os

        with open(os.path.join(self.folder, "cgroup.procs"), "w") as fh:
            fh.write(str(os.getpid()))

    def _read(self, name: str) -> str:
        import os

        with open(os.path.join(self.folder, name)) as fh:
            return fh.read()

    def oom_kills(self) -> int:
        """Processes the kernel killed in the group for want of memory."""
        text = self._read("memory.oom_control" if self.version == 1 else "memory.events")
        return sum(int(line.split()[1]) for line in text.splitlines()
                   if line.startswith("oom_kill "))

    def peak(self) -> int | None:
        """The group's peak usage, page cache included (None where the kernel keeps none)."""
        try:
            return int(self._read("memory.max_usage_in_bytes" if self.version == 1
                                  else "memory.peak"))
        except OSError:
            return None

    def remove(self) -> None:
        import os

        for _ in range(50):  # the group's processes have ended; the kernel lets go of it
            try:
                os.rmdir(self.folder)
                return
            except OSError:
                time.sleep(0.1)


CAP = 9 * 2**28  # 2.25 GiB: the cap the two runs below are held to


@pytest.fixture(scope="module")
def capped_dem(tmp_path_factory):
    """A 3072 x 3072 DEM (9.4e6 cells) whose whole-grid depressions run the guard puts
    above :data:`CAP` for one worker (~3.1 GiB) and for two (~4.3 GiB): an egg-box
    of hollows and knolls on a tilted plane, a few dozen depressions, so the
    summaries and figures stay quick (and it is made in a moment)."""
    y, x = np.ogrid[0:3072, 0:3072]
    z = (40 * np.sin(2 * np.pi * x / 700) * np.sin(2 * np.pi * y / 900) + 0.01 * x
         + 0.02 * y).astype(np.float32)
    return write_tif(tmp_path_factory.mktemp("cap") / "big.tif", z)


@pytest.mark.parametrize("workers", [1, 2])
def test_a_run_too_big_for_the_cap_finishes_in_blocks_under_it(capped_dem, tmp_path, workers):
    """Memory bounded on every local backend: under a hard limit a whole-grid run
    would exceed, ``cairn depressions`` (no --block given) finds the limit, turns
    to blocks by itself and finishes within it, with no process killed."""
    whole = estimate_run(read_header(capped_dem), CreditJob("depressions"),
                         Execution(realisations=2, workers=workers))
    assert whole.total > CAP, whole.total / 2**30  # the premise: a whole grid would not fit
    cap = MemoryCap.make(CAP)
    if cap is None:
        pytest.skip("no writable memory control group here (needs root or a delegated cgroup)")
    try:
        measured, code, err = peak_resident(
            ["depressions", capped_dem, "-o", tmp_path / "o", "-n", 2, "--workers", workers,
             "--rmse", "1", "-q"], preexec_fn=cap.enter)
        kills, peak = cap.oom_kills(), cap.peak()
    finally:
        cap.remove()
    print(f"workers {workers}: resident {measured / 2**20:.0f} MiB, group peak "
          f"{(peak or 0) / 2**20:.0f} MiB, cap {CAP / 2**20:.0f} MiB")
    assert code == 0, err
    assert "computing each realisation in blocks" in err
    assert kills == 0  # held to the cap by the kernel, and nothing was killed for it
    assert measured <= CAP
    assert (tmp_path / "o" / "ponding_probability.tif").exists()


def test_out_of_core_estimate_counts_each_feature_summarised_and_drawn(dems):
    """Out of core, each feature region adds its summaries and, when a quick-look is
    drawn, its drawing (measured at 16384²: the map's drawing outgrew the estimate
    without it); counted (no outside reference)."""
    from terrain.resources import DRAWN_FEATURE_BYTES, FEATURE_BYTES

    head, job = read_header(dems[400]), CreditJob("depressions")
    ex = Execution(realisations=4, workers=1, block=64)  # a single blocked run: on disk

    def total(features, quicklook=True):
        est = estimate_run(head, job, ex, quicklook=quicklook, features=features)
        assert est.on_disk
        return est.total

    n = 100_000  # enough that the writing is the largest phase
    assert total(2 * n) - total(n) == n * (FEATURE_BYTES + DRAWN_FEATURE_BYTES)
    assert total(2 * n, False) - total(n, False) == n * FEATURE_BYTES


def test_resident_memory_counts_child_processes_when_asked():
    """Worker processes started ahead of a run hold memory the second memory check
    must add back: a child holding 200 MB (counted) shows with ``children``."""
    from terrain.io import resident_memory

    child = subprocess.Popen([sys.executable, "-c", "import numpy, sys, time; a = numpy.ones("
                              "25 * 10**6); sys.stdout.write('ready\\n'); sys.stdout.flush(); "
                              "time.sleep(30)"], stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline() == "ready\n"
        assert resident_memory(children=True) - resident_memory() >= 190 * 10**6
    finally:
        child.kill()
        child.wait()
