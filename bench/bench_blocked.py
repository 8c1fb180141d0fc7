"""Benchmark: blocked engine vs one whole-raster pairs() call.

Raster: 4096^2 smooth float32 terrain (bench/common.py, relief ~ +-150)
plus white noise of standard deviation 1 -- hundreds of thousands of pairs.
Times are medians of >= 3 runs after a warm-up, all measured in this
process: whole-raster ``pairs()`` and ``blocked_pairs()`` with 1024^2
blocks run one after the other (builtin map, one core), so the ratio
compares like with like. A second blocked column runs the local tasks in
2 worker processes reading their windows from a ``.npy`` file on /tmp.

Local step memory: peak resident-set growth of a fresh subprocess running
``local()`` on one interior 1024^2 block whose values it already holds,
per block cell. Global step memory: peak resident-set growth (VmHWM, reset through
/proc/self/clear_refs; Linux only) of a fresh subprocess running ``glue()``
on summaries it already holds, divided by the number of boundary cells
(cells facing another block), for 1024^2 and 256^2 blocks; next to it the
summaries' boundary part (what glue reads) per boundary cell.

``--large N`` adds a run on an N^2 raster (e.g. 16384): a smooth terrain
upsampled to N^2 plus white noise, written tile by tile to a ``.npy`` on
/tmp. A fresh process runs ``blocked_pairs`` reading one window at a time,
another loads the raster and runs ``pairs()``; each prints wall time and
peak RSS (optionally ``--min-persistence`` to keep fewer output pairs).

Run:  python bench/bench_blocked.py [--side 4096] [--block 1024] [--repeat 3] [--large 16384]
"""

from __future__ import annotations

import argparse
import concurrent.futures
import os
import pickle
import subprocess
import sys
import tempfile
import time

import numpy as np
from common import median_time, terrain


def noisy_terrain(n: int, sigma: float = 1.0, seed: int = 0) -> np.ndarray:
    """Smooth terrain plus white noise of standard deviation ``sigma`` (float32)."""
    z = terrain(n, seed)
    z += np.random.default_rng(seed + 1).standard_normal(z.shape, dtype=np.float32) * sigma
    return z


class NpyWindows:
    """A ``.npy`` file read one window at a time (opened per read, so no
    mapped pages stay in the process); pickles as its path."""

    def __init__(self, path: str):
        self.path = path
        mm = np.load(path, mmap_mode="r")
        self.shape, self.dtype = mm.shape, mm.dtype
        del mm

    def __getitem__(self, key):
        mm = np.load(self.path, mmap_mode="r")
        out = np.array(mm[key])
        del mm
        return out


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(field)


def _reset_peak() -> int:
    # Linux: writing 5 to clear_refs resets the peak-RSS mark (VmHWM)
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    return _status_kib("VmRSS")


def _glue_child(path: str) -> None:
    from terrain.engine.blocked import glue, local, read_block, windows

    with open(path, "rb") as fh:
        summaries = pickle.load(fh)
    z = noisy_terrain(64)
    kind = summaries[0].kind
    glue([local(read_block(z, w, z.shape), w, z.shape, kind=kind)
          for w in windows(z.shape, 16)])  # warm-up on a tiny raster: compiled code loaded
    before = _reset_peak()
    res = glue(summaries)
    grown = (_status_kib("VmHWM") - before) * 1024
    print(grown / res.n_boundary_cells)


def _local_child(path: str, block: int, kind: str) -> None:
    from terrain.engine.blocked import local, read_block, windows

    src = NpyWindows(path)
    w = windows(src.shape, block)[len(windows(src.shape, block)) // 2 + 1]  # an interior block
    z = noisy_terrain(64)
    local(read_block(z, windows(z.shape, 16)[5], z.shape), windows(z.shape, 16)[5], z.shape,
          kind=kind)  # warm-up: compiled code loaded
    vals = read_block(src, w, src.shape)
    before = _reset_peak()
    local(vals, w, src.shape, kind=kind)
    print((_status_kib("VmHWM") - before) * 1024 / ((w.r1 - w.r0) * (w.c1 - w.c0)))


def _large_child(path: str, block: int, min_pers: float, whole: bool) -> None:
    from terrain.engine.blocked import blocked_pairs
    from terrain.engine.persistence import pairs

    src = NpyWindows(path)
    blocked_pairs(np.zeros((64, 64), np.float32), kind="peaks", block=32)  # compiled code loaded
    before = _reset_peak()
    t = time.perf_counter()
    if whole:
        z = np.load(path)
        p = pairs(z, kind="peaks")
        if min_pers > 0:
            p = p.persistence[p.persistence >= min_pers]
    else:
        p = blocked_pairs(src, kind="peaks", block=block, min_persistence=min_pers)
    t = time.perf_counter() - t
    print(f"{t:.1f} {_status_kib('VmHWM') / 1024:.0f} {(_status_kib('VmHWM') - before) / 1024:.0f} {len(p)}")


def _write_large(path: str, n: int, tile: int = 2048) -> None:
    """An n^2 float32 .npy written tile by tile: a 4096^2 smooth terrain
    bilinearly upsampled to n^2 (``map_coordinates`` at global coordinates,
    so tiles agree), plus white noise of sd 1 seeded per tile."""
    from scipy.ndimage import map_coordinates

    base = terrain(4096, seed=7)
    f = (base.shape[0] - 1) / max(n - 1, 1)
    mm = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n, n))
    for r in range(0, n, tile):
        for c in range(0, n, tile):
            rr, cc = np.meshgrid(np.arange(r, min(r + tile, n)) * f, np.arange(c, min(c + tile, n)) * f,
                                 indexing="ij")
            win = map_coordinates(base, [rr, cc], order=1).astype(np.float32)
            rng = np.random.default_rng([r, c])
            mm[r:r + tile, c:c + tile] = win + rng.standard_normal(win.shape, dtype=np.float32)
    mm.flush()
    del mm


def glue_bytes_per_boundary_cell(z, block, kind):
    from terrain.engine.blocked import local, read_block, windows

    wins = windows(z.shape, block)
    sums = [local(read_block(z, w, z.shape), w, z.shape, kind=kind) for w in wins]
    cells = sum(s.boundary_cells() for s in sums)
    handed = sum(s.boundary_nbytes() for s in sums) / cells
    with tempfile.TemporaryDirectory() as d:
        path = f"{d}/sums.pkl"
        with open(path, "wb") as fh:
            pickle.dump(sums, fh)
        # a fixed mmap threshold: every large array is fresh memory, none reuses freed heap
        env = dict(os.environ, MALLOC_MMAP_THRESHOLD_="65536")
        out = subprocess.run([sys.executable, __file__, "--glue-child", path],
                             capture_output=True, text=True, check=True, env=env)
    return cells, handed, float(out.stdout.strip())


def timing_table(z, block, repeat, npy):
    from terrain.engine.blocked import blocked_pairs
    from terrain.engine.persistence import pairs

    print(f"{z.shape[0]}^2 smooth terrain + white noise (sd 1), blocks {block}^2")
    print(f"{'kind':>5} {'pairs':>8} {'whole s':>8} {'blocked s':>10} {'blocked/whole':>14} "
          f"{'2 procs s':>10} {'2 procs/whole':>14}")
    src = NpyWindows(npy)
    with concurrent.futures.ProcessPoolExecutor(2) as ex:
        for kind in ("peaks", "pits"):
            n = len(pairs(z, kind=kind))
            t_whole = median_time(lambda kind=kind: pairs(z, kind=kind), repeat)
            t_blk = median_time(lambda kind=kind: blocked_pairs(z, kind=kind, block=block), repeat)
            t_par = median_time(lambda kind=kind: blocked_pairs(src, kind=kind, block=block,
                                                                map=ex.map), repeat)
            print(f"{kind:>5} {n:>8} {t_whole:8.2f} {t_blk:10.2f} {t_blk / t_whole:13.2f}x "
                  f"{t_par:10.2f} {t_par / t_whole:13.2f}x", flush=True)


def local_bytes_per_cell(npy, block, kind):
    env = dict(os.environ, MALLOC_MMAP_THRESHOLD_="65536")
    out = subprocess.run([sys.executable, __file__, "--local-child", f"{npy},{block},{kind}"],
                         capture_output=True, text=True, check=True, env=env)
    return float(out.stdout.strip())


def memory_table(z, npy, block):
    print(f"\nlocal step memory per block cell ({block}^2 block, values with halo already read)")
    for kind in ("peaks", "pits"):
        print(f"{kind:>5} {local_bytes_per_cell(npy, block, kind):8.1f} B", flush=True)
    print("\nglobal step (glue) memory per boundary cell")
    print(f"{'kind':>5} {'block':>6} {'boundary cells':>15} {'handed up B':>12} {'glue peak B':>12}")
    for block in (1024, 256):
        for kind in ("peaks", "pits"):
            cells, handed, peak = glue_bytes_per_boundary_cell(z, block, kind)
            print(f"{kind:>5} {block:>6} {cells:>15} {handed:12.1f} {peak:12.1f}", flush=True)


def large_run(n, block, min_pers):
    print(f"\n{n}^2 peaks from a .npy on /tmp ({n * n * 4 / 2**20:.0f} MiB), read one window at a "
          f"time; min_persistence {min_pers}; fresh process each")
    print(f"{'engine':>22} {'wall s':>7} {'pairs':>9} {'peak RSS MiB':>13} {'growth MiB':>11}")
    with tempfile.TemporaryDirectory(dir="/tmp") as d:
        path = f"{d}/z.npy"
        _write_large(path, n)
        for whole in (False, True):
            out = subprocess.run([sys.executable, __file__, "--large-child",
                                  f"{path},{block},{min_pers},{int(whole)}"],
                                 capture_output=True, text=True, check=True)
            t, hwm, grown, npairs = out.stdout.split()
            name = "pairs() whole raster" if whole else f"blocked_pairs {block}^2"
            print(f"{name:>22} {t:>7} {npairs:>9} {hwm:>13} {grown:>11}", flush=True)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=4096)
    ap.add_argument("--block", type=int, default=1024)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--large", type=int, default=0)
    ap.add_argument("--min-persistence", type=float, default=0.0)
    ap.add_argument("--glue-child", default=None)
    ap.add_argument("--large-child", default=None)
    ap.add_argument("--local-child", default=None)
    a = ap.parse_args()
    if a.glue_child:
        return _glue_child(a.glue_child)
    if a.local_child:
        path, block, kind = a.local_child.split(",")
        return _local_child(path, int(block), kind)
    if a.large_child:
        path, block, mp, whole = a.large_child.split(",")
        return _large_child(path, int(block), float(mp), whole == "1")
    z = noisy_terrain(a.side)
    with tempfile.TemporaryDirectory(dir="/tmp") as d:
        npy = os.path.join(d, "z.npy")
        np.save(npy, z)
        timing_table(z, a.block, a.repeat, npy)
        memory_table(z, npy, a.block)
    if a.large:
        large_run(a.large, a.block, a.min_persistence)


if __name__ == "__main__":
    main()
