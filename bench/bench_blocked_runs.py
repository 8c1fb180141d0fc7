"""Benchmark: one realisation computed block by block against the whole grid.

Raster: ``--side``^2 smooth float32 terrain (bench/common.py), 10 m cells.
For peaks and depressions (with ponding counts), under independent and
spatially correlated error (RMSE 1 m; range 200 m), the time of one
realisation of :func:`terrain.jobs.credit.realise` on the whole grid and of
:func:`terrain.jobs.credit_blocked.realise_blocked` with ``--block``^2
blocks, one after the other in this process on one core (median of
``--repeat`` after a warm-up), so the ratio compares like with like. A last
column runs the blocked realisation's block tasks on 2 worker processes
(reading the DEM and region labels from ``.npy`` files on /tmp) against the
same one-core whole-grid time. Every blocked log is checked equal to the
whole-grid log before it is timed.

Run:  python bench/bench_blocked_runs.py [--side 4096] [--block 1024] [--repeat 2]
"""

from __future__ import annotations

import argparse
import concurrent.futures
import multiprocessing
import os
import shutil
import tempfile

import numpy as np
from common import median_time, terrain

from terrain import CreditJob, Dem, ErrorModel
from terrain.jobs.credit import realise
from terrain.jobs.credit_blocked import realise_blocked
from terrain.noise import ErrorSampler


def case(z, dem, tmp, kind, model, block, repeat, pool) -> tuple[float, float, float]:
    """Seconds of one realisation: whole grid, blocked on one core, blocked on ``pool``."""
    job = CreditJob(kind).resolved(dem, model)
    rpath = os.path.join(tmp, f"regions-{kind}.npy")
    np.save(rpath, job.regions.labels)
    zpath = os.path.join(tmp, "dem.npy")
    sampler = ErrorSampler(model, z.shape, (10.0, 10.0))
    dep = kind == "depressions"

    def whole():
        pond = np.zeros(z.size, np.int32) if dep else None
        return realise(z, sampler, job, 1, 0, pond)

    def blocked(mapper=map, src=z, reg=job.regions.labels):
        pond = np.zeros(z.shape, np.int32) if dep else None
        return realise_blocked(src, sampler, job, 1, 0, block=block, regions=reg, ponding=pond,
                               map=mapper)

    a, b = whole(), blocked()
    assert all(a[k].tobytes() == b[k].tobytes() for k in a), "blocked log differs"
    del a, b
    return (median_time(whole, repeat), median_time(blocked, repeat),
            median_time(lambda: blocked(mapper=pool.map, src=zpath, reg=rpath), repeat))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=4096)
    ap.add_argument("--block", type=int, default=1024)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    n = args.side
    z = terrain(n, 7)
    dem = Dem(z, np.zeros(z.shape, bool), (10.0, 0.0, 0.0, 0.0, -10.0, n * 10.0), "EPSG:32633")
    tmp = tempfile.mkdtemp(prefix="cairn-bench-")
    np.save(os.path.join(tmp, "dem.npy"), z)
    print(f"one realisation on {n}x{n} cells ({n * n / 1e6:.1f} M), blocks of "
          f"{args.block}x{args.block}; whole grid vs blocked, seconds (median of {args.repeat})")
    print(f"{'kind':<12} {'error':<11} {'whole':>7} {'blocked':>8} {'ratio':>6} "
          f"{'2 procs':>8} {'ratio':>6}")
    ctx = multiprocessing.get_context("spawn")
    with concurrent.futures.ProcessPoolExecutor(2, mp_context=ctx) as pool:
        for kind in ("peaks", "depressions"):
            for label, model in (("independent", ErrorModel(rmse=1.0)),
                                 ("correlated", ErrorModel(rmse=1.0, range_m=200.0))):
                tw, tb, tp = case(z, dem, tmp, kind, model, args.block, args.repeat, pool)
                print(f"{kind:<12} {label:<11} {tw:7.2f} {tb:8.2f} {tb / tw:6.2f} {tp:8.2f} "
                      f"{tp / tw:6.2f}")
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
