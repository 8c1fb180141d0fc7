"""Benchmark: realisations per second on a 1024^2 terrain, peaks and pits.

Prints, measured in this run:
- bare pairs() on pre-perturbed DEMs (the reference) vs a full realisation
  (noise + pairing + selection + pair log + ponding) and the in-order
  accumulation: the overhead of noise and bookkeeping, as a ratio;
- realisations per second in-process and with 2 local processes, each run
  with the run's own chunk plan (as a user's run): the steady rate of a run
  of ``--n``, from its first folded chunk to its last (the progress
  callback's times), so the pool's start-up (spawn + imports + numba cache
  loading, printed apart) and the final fold are left out; the median of
  two runs each (the marginal rate of a run of n over one of n / 2, used
  before, swung from 62% to 159% on a 2-core machine whose pool start
  varied by a second); and the scaling efficiency rate_2 / (2 rate_1);
- the projected wall time of 1000 realisations of peaks and pits on 2 workers;
- feature bookkeeping: a realisation with its region lookups, ponded area and
  volume per region and the per-region figures folded, against the same
  realisation without them (error, pairs, selection, ponding counts); and the
  run's one ``regions()`` call against one ``pairs()`` call.

Run:  python bench/bench_attribution.py [--side 1024] [--n 160]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
from common import median_time, terrain


def _steady_rate(run_ensemble, dem, job, model, n, backend, workers):
    """Realisations per second of one run of ``n`` between its first folded
    chunk and its last (from the progress callback's times), so the pool's
    start-up (spawn, imports, compiled kernels) and the final fold are left
    out; and the wall time before the first chunk less that chunk's share
    (the start-up)."""
    seen = []
    t0 = time.perf_counter()
    run_ensemble(dem, job, model, realisations=n, seed=0, backend=backend, workers=workers,
                 progress=lambda done, total: seen.append((time.perf_counter(), done)))
    seen = [(t, d) for t, d in seen if d > 0]
    (t1, d1), (t2, d2) = seen[0], seen[-1]
    rate = (d2 - d1) / (t2 - t1)
    return rate, (t1 - t0) - d1 / rate


def main():
    from terrain.dem import Dem
    from terrain.engine.persistence import pairs, pits_and_levels
    from terrain.jobs.credit import CreditAccumulator, CreditJob, realise
    from terrain.noise import ErrorModel, ErrorSampler
    from terrain.runner import run_ensemble

    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=1024)
    ap.add_argument("--n", type=int, default=160)
    a = ap.parse_args()
    z = terrain(a.side)
    dem = Dem.from_array(z, cellsize=30.0)
    model = ErrorModel(rmse=2.0)
    sampler = ErrorSampler(model, z.shape, (30.0, 30.0))
    rows, book = [], []
    total_1000 = 0.0
    for kind in ("peaks", "depressions"):
        s = CreditJob(kind, threshold=6.0, base=float(z.min())).resolved(dem, model)
        book.append(_bookkeeping(z, sampler, s))
        perturbed = [z + sampler.draw(0, i) for i in range(4)]
        bare_fn = ((lambda zz: pairs(zz, kind="peaks")) if kind == "peaks"
                   else (lambda zz: pits_and_levels(zz)))
        bare_fn(perturbed[0])
        ts = []
        for _rep in range(3):
            t = time.perf_counter()
            for zz in perturbed:
                bare_fn(zz)
            ts.append((time.perf_counter() - t) / len(perturbed))
        t_bare = statistics.median(ts)
        acc = CreditAccumulator(z.size, s)
        pond = np.zeros(z.size, np.int32) if kind == "depressions" else None
        realise(z, sampler, s, 0, 0, pond)
        ts = []
        for _rep in range(3):
            t = time.perf_counter()
            for i in range(4):
                log = realise(z, sampler, s, 0, i, pond)
                acc.add(log, {}, 1)
            ts.append((time.perf_counter() - t) / 4)
        t_full = statistics.median(ts)
        rates, startup = {}, {}
        for backend, workers in (("serial", 1), ("processes", 2)):
            got = []
            for _rep in range(2):
                got.append(_steady_rate(run_ensemble, dem, s, model, a.n, backend, workers))
            rates[backend] = statistics.median(r for r, _ in got)
            startup[backend] = statistics.median(w for _, w in got)
        rows_start = startup
        eff = rates["processes"] / (2 * rates["serial"])
        total_1000 += 1000 / rates["processes"]
        rows.append((kind, t_bare, t_full, t_full / t_bare - 1, rates["serial"], rates["processes"], eff,
                     rows_start["processes"]))
    print(f"side {a.side}², rmse 2, gaussian kernel, {a.n} realisations per backend")
    print(f"{'kind':>5} {'bare s':>7} {'full s':>7} {'overhead':>9} {'real/s x1':>10} "
          f"{'real/s x2':>10} {'2-proc eff':>10} {'pool start s':>12}")
    for kind, tb, tf, ov, r1, r2, eff, st in rows:
        print(f"{kind:>5} {tb:7.3f} {tf:7.3f} {ov:8.0%} {r1:10.2f} {r2:10.2f} {eff:9.0%} {st:12.1f}")
    print(f"projected wall for 1000 realisations of peaks + pits on 2 processes: {total_1000:.0f} s")
    print("feature bookkeeping per realisation (region of each birth, ponded area and volume per "
          "region, per-region figures), and the run's one regions() call against one pairs() call")
    print(f"{'kind':>12} {'plain s':>8} {'with s':>7} {'overhead':>9} {'regions s':>10} "
          f"{'pairs s':>8} {'ratio':>6}")
    for kind, tp, tk, ov, tr, tpa in book:
        print(f"{kind:>12} {tp:8.3f} {tk:7.3f} {ov:8.0%} {tr:10.3f} {tpa:8.3f} {tr / tpa:6.2f}")


def _bookkeeping(z, sampler, job) -> tuple:
    from terrain.engine.persistence import pairs, regions
    from terrain.jobs.credit import CreditAccumulator, realise

    pond = np.zeros(z.size, np.int32) if job.kind == "depressions" else None
    t_regions = median_time(lambda: regions(z, kind=job.filtration, merge_level=job.merge_level))
    t_pairs = median_time(lambda: pairs(z, kind=job.filtration))
    t_plain = median_time(lambda: _plain(z, sampler, job))
    t_kept = median_time(lambda: CreditAccumulator(z.size, job).add(
        realise(z, sampler, job, 0, 0, pond), {}, 1))
    return job.kind, t_plain, t_kept, t_kept / t_plain - 1, t_regions, t_pairs


def _plain(z, sampler, job):
    """A realisation without feature bookkeeping: error, pairs, selection, and for
    depressions the ponding counts without per-region sums."""
    from terrain.engine.persistence import count_ponding, pairs, pits_and_levels

    zi = sampler.draw(0, 0)
    zi += z
    if job.kind == "peaks":
        p = pairs(zi, kind="peaks")
    else:
        p, f = pits_and_levels(zi)
        count_ponding(f.zf, f.valid, f.labels, f.level, f.depth, job.threshold,
                      np.zeros(z.size, np.int32), np.empty(0, np.int32), job.area_row,
                      z.shape[1], np.zeros(1, np.int64), np.zeros(1, np.int64))
    keep = p.persistence >= job.threshold
    return p.birth[keep], p.death[keep]


if __name__ == "__main__":
    main()
