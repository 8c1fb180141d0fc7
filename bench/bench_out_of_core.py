"""Benchmark: out-of-core runs of rasters larger than a whole-grid run can hold.

Each raster is generated here window by window (never whole in memory) and
written as a tiled float32 GeoTIFF under ``--tmp``: smooth terrain from three
octaves of bilinearly interpolated random grids (1024, 128 and 32 cells
apart), rounded to 0.1 m (ties and plateaus), with a round nodata hole;
10 m cells. Nothing is committed.

1. ``cairn depressions big.tif -n 20 --block 2048`` on a 16384^2 raster (2.7e8
   cells; ``--side``) with 1 and with 2 worker processes: wall time and the
   peak resident memory of all its processes together (the sum of the process
   tree's RSS, sampled every 0.1 s), against the 3 GB bound and the memory
   guard's estimate (from the header, and counting the run's features as the
   guard does once the regions are made); the two runs' layers must be equal.
2. The same command with ``--scheduler`` on a Dask LocalCluster of 2 workers
   limited to 1.5 GB each (one thread each): whether any worker was
   restarted (its process id changed) and the peak memory of the command
   plus the cluster's workers; the layers must equal those of run 1.
3. A 32768^2 raster (1.07e9 cells) through the library in a process of its
   own: read onto disk, its regions made, one depressions (pits) realisation
   with ``block=2048`` on 2 worker processes (no files written): the peak
   memory, and the realisation's time per 10^8 cells next to one whole-grid
   pits realisation (:func:`terrain.jobs.credit.realise`, with ponding
   counts) of a 4096^2 raster measured in this process.
4. Where a blocked realisation's time goes: the ``--side``^2 raster read onto
   disk, its regions made, then ``--profile-n`` depressions realisations
   with ``block=2048`` in one process (serial: every step's seconds are its
   own) under cProfile; per step (the cumulative time of the functions that
   do it: the error drawn, the realisation written to and read from its
   scratch ``.npy``, the local step's basins and merges, its descent codes
   and level inputs, those inputs to and from scratch, the glue, the fill
   levels and ponding counts of the second pass, the on-disk count store's
   updates, the pair log) its seconds per realisation, per block and share
   of the realisation, and the same per 10^8 cells next to one whole-grid
   pits realisation of a 4096^2 raster.

Run:  python bench/bench_out_of_core.py [--tmp /var/tmp] [--side 16384] [-n 20] [--skip-32k]
      [--skip-dask] [--profile-n 2] [--skip-profile]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np
import psutil
from common import median_time

OCTAVES = ((1024, 300.0), (128, 40.0), (32, 6.0))  # (spacing in cells, amplitude in m)
CELL = 10.0
GB = 1e9


def _weights(n0: int, n1: int, spacing: int) -> tuple[np.ndarray, int]:
    """Bilinear weights of cells n0..n1 on grid nodes ``spacing`` cells apart:
    a (n1 - n0, k) matrix and the first node's index."""
    y = (np.arange(n0, n1) + 0.5) / spacing
    i0 = np.floor(y).astype(np.int64)
    t = y - i0
    first = int(i0[0])
    w = np.zeros((n1 - n0, int(i0[-1]) - first + 2))
    w[np.arange(n1 - n0), i0 - first] = 1 - t
    w[np.arange(n1 - n0), i0 - first + 1] = t
    return w, first


def write_terrain(path: str, side: int, seed: int = 7, tile: int = 2048) -> None:
    """The benchmark raster, generated and written window by window."""
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    rng = np.random.default_rng(seed)
    grids = [(s, a, rng.standard_normal((side // s + 2, side // s + 2))) for s, a in OCTAVES]
    profile = dict(driver="GTiff", width=side, height=side, count=1, dtype="float32",
                   crs="EPSG:32633", transform=from_origin(500000, 7000000, CELL, CELL),
                   nodata=-9999.0, tiled=True, blockxsize=512, blockysize=512,
                   compress="deflate", predictor=3, bigtiff="YES")
    hole = (0.7 * side, 0.3 * side, 0.04 * side)
    with rasterio.open(path, "w", **profile) as ds:
        for r0 in range(0, side, tile):
            wr, fr = zip(*(_weights(r0, min(r0 + tile, side), s) for s, _, _ in grids))
            for c0 in range(0, side, tile):
                r1, c1 = min(r0 + tile, side), min(c0 + tile, side)
                z = np.zeros((r1 - r0, c1 - c0))
                for (s, a, g), w_r, f_r in zip(grids, wr, fr):
                    w_c, f_c = _weights(c0, c1, s)
                    z += a * (w_r @ g[f_r:f_r + w_r.shape[1], f_c:f_c + w_c.shape[1]] @ w_c.T)
                z = np.round(z + 1000.0, 1)
                rr, cc = np.mgrid[r0:r1, c0:c1]
                z[(rr - hole[0]) ** 2 + (cc - hole[1]) ** 2 < hole[2] ** 2] = -9999.0
                ds.write(z.astype(np.float32), 1, window=Window(c0, r0, c1 - c0, r1 - r0))


class PeakMemory:
    """Samples the summed RSS of process trees every ``every`` seconds; ``peak`` in bytes."""

    def __init__(self, roots, every: float = 0.1):
        self.roots, self.every, self.peak = list(roots), every, 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        while not self._stop.is_set():
            total, seen = 0, set()
            for root in self.roots:
                try:
                    procs = [root] + root.children(recursive=True)
                except psutil.Error:
                    continue
                for p in procs:
                    if p.pid in seen:
                        continue
                    seen.add(p.pid)
                    try:
                        total += p.memory_info().rss
                    except psutil.Error:
                        pass
            self.peak = max(self.peak, total)
            self._stop.wait(self.every)

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()


def cairn(args: list[str], extra_roots=()) -> tuple[float, int, str]:
    """Run the cairn command; (wall seconds, peak bytes of its tree + ``extra_roots``, stderr)."""
    exe = shutil.which("cairn") or sys.exit("the cairn command is not installed")
    t0 = time.perf_counter()
    proc = psutil.Popen([exe, *args, "-q"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                        text=True)
    with PeakMemory([proc, *extra_roots]) as mem:
        _, err = proc.communicate()
    wall = time.perf_counter() - t0
    if proc.returncode:
        sys.exit(f"cairn {' '.join(args)} failed ({proc.returncode}):\n{err}")
    return wall, mem.peak, err


def layers_equal(a: str, b: str) -> bool:
    import rasterio

    for name in sorted(os.listdir(a)):
        if name.endswith(".tif"):
            with rasterio.open(os.path.join(a, name)) as x, rasterio.open(os.path.join(b, name)) as y:
                for band in (1, 2):
                    for _, w in x.block_windows(band):
                        if not np.array_equal(x.read(band, window=w), y.read(band, window=w),
                                              equal_nan=True):
                            return False
    return True


def whole_pits_seconds(side: int = 4096) -> float:
    """One whole-grid pits realisation (with ponding counts) of a ``side``^2 raster."""
    import rasterio

    from terrain import CreditJob, Dem, ErrorModel
    from terrain.jobs.credit import realise
    from terrain.noise import ErrorSampler

    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "small.tif")
        write_terrain(path, side)
        with rasterio.open(path) as ds:
            z = ds.read(1, masked=True).filled(np.nan)
    dem = Dem.from_array(z, cellsize=CELL)
    model = ErrorModel(rmse=1.0)
    job = CreditJob("depressions").resolved(dem, model)
    sampler = ErrorSampler(model, z.shape, (CELL, CELL))
    return median_time(lambda: realise(z, sampler, job, 1, 0, np.zeros(z.size, np.int32)),
                       repeat=2)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tmp", default=tempfile.gettempdir())
    ap.add_argument("--side", type=int, default=16384)
    ap.add_argument("--big", type=int, default=32768)
    ap.add_argument("-n", type=int, default=20, help="realisations of runs 1 and 2")
    ap.add_argument("--skip-dask", action="store_true")
    ap.add_argument("--skip-32k", action="store_true")
    ap.add_argument("--profile-n", type=int, default=2,
                    help="realisations profiled step by step (part 4)")
    ap.add_argument("--skip-profile", action="store_true")
    ap.add_argument("--skip-processes", action="store_true",
                    help="leave out run 1 (the Dask run's layers are then not compared)")
    a = ap.parse_args()
    work = tempfile.mkdtemp(prefix="cairn-bench-ooc-", dir=a.tmp)
    env_tmp = {"TMPDIR": work}
    os.environ.update(env_tmp)
    try:
        dem = os.path.join(work, "big.tif")
        t0 = time.perf_counter()
        write_terrain(dem, a.side)
        print(f"generated {a.side}^2 raster in {time.perf_counter() - t0:.0f} s")
        run = ["depressions", dem, "--rmse", "1", "-n", str(a.n), "--block", "2048", "--seed", "1"]
        print("\n| run | cells | wall s | realisations s | peak RSS, all processes | bound "
              "| guard's estimate: from the header; counting the table's features |")
        print("|---|---|---|---|---|---|---|")
        if not a.skip_processes:
            for workers in (1, 2):
                out = os.path.join(work, "out" if workers == 2 else "out-1")
                wall, peak, _ = cairn([*run, "-o", out, "--workers", str(workers)])
                rs = json.load(open(os.path.join(out, "run.json")))["timings"]
                rows = features(out)
                same = "" if workers == 1 else (
                    f"; layers equal to 1 process: {layers_equal(os.path.join(work, 'out-1'), out)}")
                print(f"| depressions -n {a.n} --block 2048, {workers} process"
                      f"{'es' if workers > 1 else ''} | {a.side}^2 | {wall:.0f} | "
                      f"{rs['realisations_s']:.0f} | {peak / GB:.2f} GB | < 3 GB: "
                      f"{'yes' if peak < 3 * GB else 'NO'}{same} | "
                      f"{guard_estimate(dem, a.n, workers) / GB:.2f} GB; "
                      f"{guard_estimate(dem, a.n, workers, rows) / GB:.2f} GB ({rows:,}) |",
                      flush=True)
        if not a.skip_dask:
            dask_run(a, work, run, dem)
        if not a.skip_profile:
            step_profile(a, dem)
        if not a.skip_32k:
            big_run(a, work)
    finally:
        shutil.rmtree(work, ignore_errors=True)


def guard_estimate(dem: str, n: int, workers: int, features: int = 0) -> int:
    """The memory guard's estimate (bytes, every process) of the run above: from the
    header, or (``features``) as the guard checks it again once the regions are made
    (it counts every region; the table's rows, given here, are those counted in
    enough realisations, so this is a lower bound of that check)."""
    from terrain.io import read_header
    from terrain.jobs import CreditJob
    from terrain.resources import estimate_run
    from terrain.runner import Execution

    return estimate_run(read_header(dem), CreditJob("depressions"),
                        Execution(realisations=n, workers=workers, block=2048),
                        features=features).total


def features(out: str) -> int:
    """The rows of a depressions run's feature table."""
    import pyogrio

    return int(pyogrio.read_info(os.path.join(out, "depressions.gpkg"), layer="pits")["features"])


def dask_run(a, work: str, run: list[str], dem: str) -> None:
    from dask.distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, memory_limit="1.5GB",
                      processes=True, dashboard_address=None) as cluster, Client(cluster) as client:
        before = client.run(os.getpid)
        roots = [psutil.Process(p) for p in before.values()]
        wall, peak, _ = cairn([*run, "-o", os.path.join(work, "out-dask"), "--scheduler",
                               cluster.scheduler_address], extra_roots=roots)
        after = client.run(os.getpid)
        restarted = sorted(set(before.values()) ^ set(after.values()))
        same = (layers_equal(os.path.join(work, "out"), os.path.join(work, "out-dask"))
                if os.path.isdir(os.path.join(work, "out")) else "not compared")
    rs = json.load(open(os.path.join(work, "out-dask", "run.json")))["timings"]
    print(f"| the same on a Dask LocalCluster, 2 workers x 1.5 GB | {a.side}^2 | {wall:.0f} | "
          f"{rs['realisations_s']:.0f} | {peak / GB:.2f} GB (command + workers) | workers "
          f"restarted: {len(restarted) // 2}; layers equal to 2 processes: {same} | - |",
          flush=True)


#: the head of both scripts below: the DEM read onto disk in ``folder``, its
#: depressions job resolved with 2048^2 blocks (seconds of each into ``t``)
ON_DISK = """
import cProfile, json, pstats, sys, time
from terrain import CreditJob, ErrorModel, run_ensemble
from terrain.io import read_dem, scratch_folder
from terrain.layout import plan_layout
def on_disk(path, folder, t):
    t0 = time.perf_counter()
    dem = read_dem(path, scratch=folder)
    t["read_s"] = time.perf_counter() - t0
    model = ErrorModel(rmse=1.0)
    t0 = time.perf_counter()
    job = CreditJob("depressions")
    job = job.resolved(dem, model, layout=plan_layout(dem.shape, 2048, job=job))
    t["regions_s"] = time.perf_counter() - t0
    return dem, model, job
"""

ONE_REALISATION = ON_DISK + """
if __name__ == "__main__":
    t = {}
    with scratch_folder() as f:
        dem, model, job = on_disk(sys.argv[1], f, t)
        res = run_ensemble(dem, job, model, realisations=1, seed=1, block=2048, workers=2,
                           backend="processes")
        t["realisation_s"] = res.info["wall_seconds"]
        t["pairs"] = int(res.log["birth"].size)
    print(json.dumps(t))
"""


def big_run(a, work: str) -> None:
    """One depressions realisation of the 32768^2 raster, out of core, through the
    library (the DEM read onto disk, its regions, one realisation with ponding
    counts on disk; no files written), in a process of its own."""
    dem = os.path.join(work, "huge.tif")
    t0 = time.perf_counter()
    write_terrain(dem, a.big)
    gen = time.perf_counter() - t0
    print(f"generated {a.big}^2 raster in {gen:.0f} s", flush=True)
    t0 = time.perf_counter()
    proc = psutil.Popen([sys.executable, "-c", ONE_REALISATION, dem], stdout=subprocess.PIPE,
                        stderr=subprocess.PIPE, text=True)
    with PeakMemory([proc]) as mem:
        out, err = proc.communicate()
    wall = time.perf_counter() - t0
    if proc.returncode:
        sys.exit(f"the {a.big}^2 realisation failed:\n{err}")
    t = json.loads(out.strip().splitlines()[-1])
    os.unlink(dem)
    per = t["realisation_s"] / (a.big ** 2 / 1e8)
    whole = whole_pits_seconds(4096)
    print(f"| read + regions + 1 depressions realisation, --block 2048, 2 processes | {a.big}^2 | "
          f"{wall:.0f} | {t['realisation_s']:.0f} | {mem.peak / GB:.2f} GB | < 3 GB: "
          f"{'yes' if mem.peak < 3 * GB else 'NO'} |")
    print(f"\nread {t['read_s']:.0f} s, regions {t['regions_s']:.0f} s, {t['pairs']} pairs "
          f"logged. One pits realisation per 10^8 cells: blocked {a.big}^2 (2 processes) "
          f"{per:.1f} s; whole grid 4096^2 (one core) {whole / (4096 ** 2 / 1e8):.1f} s")


PROFILE = ON_DISK + """
if __name__ == "__main__":
    n, steps = int(sys.argv[2]), json.loads(sys.argv[3])
    with scratch_folder() as f:
        dem, model, job = on_disk(sys.argv[1], f, {})
        run_ensemble(dem, job, model, realisations=1, seed=2, block=2048, workers=1,
                     backend="serial")  # compiled kernels loaded, caches warm
        prof = cProfile.Profile()
        prof.enable()
        res = run_ensemble(dem, job, model, realisations=n, seed=1, block=2048, workers=1,
                           backend="serial")
        prof.disable()
    stats = pstats.Stats(prof).stats
    out = {"wall_s": res.info["wall_seconds"], "steps": {}}
    for label, names in steps:
        out["steps"][label] = sum(v[3] for (path, _, fn), v in stats.items()
                                  if any(path.endswith(m) and fn == f for m, f in names))
    print(json.dumps(out))
"""

#: the steps of a blocked depressions realisation, each the cumulative time of
#: the functions doing it (file suffix, function name); disjoint calls
STEPS = [
    ("error field drawn", [("noise/model.py", "draw_window")]),
    ("realisation written to scratch .npy", [("io/scratch.py", "write_npy_window")]),
    ("scratch .npy read by window (DEM, realisation)", [("io/scratch.py", "__getitem__")]),
    ("local step: basins and merges", [("blocked/local.py", "local_engine")]),
    ("local step: descent codes", [("blocked/local.py", "descend_block")]),
    ("local step: level inputs", [("blocked/local.py", "level_inputs")]),
    ("level inputs to and from a scratch file", [("io/scratch.py", "save_scratch"),
                                              ("io/scratch.py", "load_scratch")]),
    ("glue over block boundaries, pairs", [("blocked/glue.py", "glue"),
                                           ("blocked/glue.py", "collect")]),
    ("second pass: fill levels", [("blocked/finish.py", "levels_from")]),
    ("second pass: ponding counts", [("engine/persistence.py", "count_ponding")]),
    ("count store: read, digest check, add, write, seal", [("io/scratch.py", "add")]),
    ("pair log", [("pairlog.py", "pair_log"), ("pairlog.py", "pond_log")]),
]


def step_profile(a, dem: str) -> None:
    """Part 4: a blocked realisation of ``dem`` step by step, in one process."""
    proc = subprocess.run([sys.executable, "-c", PROFILE, dem, str(a.profile_n), json.dumps(STEPS)],
                          capture_output=True, text=True)
    if proc.returncode:
        sys.exit(f"the profiled realisations failed:\n{proc.stderr}")
    t = json.loads(proc.stdout.strip().splitlines()[-1])
    n, cells = a.profile_n, a.side ** 2
    blocks = (-(-a.side // 2048)) ** 2
    per = t["wall_s"] / n
    whole = whole_pits_seconds(4096) / (4096 ** 2 / 1e8)
    print(f"\nOne depressions realisation of the {a.side}^2 raster, --block 2048 ({blocks} blocks), "
          f"one process, profiled ({n} realisations; cProfile adds its own overhead):")
    print("| step | s per realisation | ms per block | share | s per 10^8 cells |")
    print("|---|---|---|---|---|")
    rest = per
    for label, _ in STEPS:
        s = t["steps"][label] / n
        rest -= s
        print(f"| {label} | {s:.2f} | {1e3 * s / blocks:.0f} | {s / per:.1%} | "
              f"{s / (cells / 1e8):.2f} |")
    print(f"| everything else | {rest:.2f} | {1e3 * rest / blocks:.0f} | {rest / per:.1%} | "
          f"{rest / (cells / 1e8):.2f} |")
    print(f"| **the realisation** | {per:.2f} | {1e3 * per / blocks:.0f} | 100% | "
          f"{per / (cells / 1e8):.2f} |")
    print(f"\nOne whole-grid pits realisation of a 4096^2 raster (one core, no profiler): "
          f"{whole:.2f} s per 10^8 cells; the blocked one above is "
          f"{per / (cells / 1e8) / whole:.2f}x that (with the profiler's overhead).")


if __name__ == "__main__":
    main()
