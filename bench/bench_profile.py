"""Benchmark: where one realisation's time goes, step by step, and memory per array.

One realisation of peaks and of depressions on a smooth terrain (``common.terrain``,
30 m cells) with 2 m of independent Gaussian error, at 1024^2 and 4096^2. Each
step is timed (median of ``--repeat`` after a warm-up) in milliseconds and in
np.sorts of the raster measured in the same run:

- worker: noise draw (``ErrorSampler.draw``), perturbed DEM (``e += z``),
  validity (``isfinite``), sweep (descent pointers, minima numbered, saddle
  candidates and edge cells: :func:`terrain.engine.basins.sweep`), labels
  (every cell's basin; depressions only, peaks resolve only what the next
  step reads), events (each candidate's basin and the basins of one earlier
  neighbour per group), event order (one sort), union-find (the elder-rule
  merge), pairs (assembled in canonical order), fill levels and ponding
  (depressions: ponding counts, ponded area and volume per region), region
  lookups (the unperturbed region of each counted birth), log (the pair log);
- parent, per realisation: transfer (pickling and unpickling a chunk's results
  as the process pool does, divided by the chunk's 25 realisations) and
  folding (``CreditAccumulator.add`` of the chunk, likewise divided).

The steps replay ``terrain.jobs.credit.realise`` through the engine's own step
hook (``persistence._engine(clock=...)``); the script checks that the replayed
log equals ``realise()``'s and prints ``realise()`` timed whole beside the sum.
Then the arrays one realisation holds, in bytes per cell of the raster (per-cell
arrays, and the per-candidate, per-event and per-basin ones at their measured
counts).

Run:  python bench/bench_profile.py [--sizes 1024,4096] [--repeat 5]
"""

from __future__ import annotations

import argparse
import pickle
import statistics
import time

import numpy as np
from common import median_time, terrain

CHUNK = 25  # realisations per chunk in a 300-realisation run on 2 processes


def replay(z, sampler, job, i, ponding, marks):
    """One realisation, step by step (as ``realise``); appends (step, seconds)."""
    from terrain.engine import persistence as P
    from terrain.jobs.credit import _ponds, pair_log, realisation_threshold
    from terrain.jobs.relations import summit_isolation

    t = [time.perf_counter()]

    def mark(step):
        now = time.perf_counter()
        marks.append((step, now - t[0]))
        t[0] = now

    zi = sampler.draw(0, i)
    mark("noise draw")
    zi += z
    mark("perturbed DEM")
    kind = job.filtration
    zz, s, valid = P._prepare(zi, kind, job.connectivity, None)
    mark("validity")
    res, lab, minc = P._engine(zz, s, valid, job.connectivity, kind == "pits",
                               labels=kind == "pits", clock=mark)
    p = P._assemble(zz, s, kind, *res[:5], res[9])
    mark("pairs")
    thr = realisation_threshold(job, sampler.kernel, 0, i)
    reg = job.regions.labels.reshape(-1)
    ponds = {}
    if kind == "peaks":
        floor = min(job.base - (job.reference or 0.0), float(np.nanmin(zi))) \
            if p.essential.any() else 0.0
        death_value = np.where(p.essential, floor, p.death_value)
    else:
        zf = zz.reshape(-1)
        level, depth = P._fill_levels(zf, res[5], res[6], minc)
        fill = P.Fill(zf, valid.reshape(-1), lab, level, depth)
        death_value = p.death_value
        mark("fill levels")
        ponds = _ponds(fill, thr, ponding, reg, job, i, z.shape[1])
        mark("ponding")
    iso = summit_isolation(zi, job) if kind == "peaks" else None
    log = {**pair_log(p, death_value, thr, i, z.size, lambda b: reg[b].astype(np.int32), iso),
           **ponds}
    mark("log, relations" + (", isolation" if kind == "peaks" else ""))
    return log


def parent_steps(job, log, counts, n_cells, marks):
    """Transfer and folding of a chunk of CHUNK copies of ``log``, per realisation."""
    from terrain.jobs.credit import CreditAccumulator

    chunk = {k: np.concatenate([v] * CHUNK) for k, v in log.items()}
    for key in ("real", "pond_real"):
        if key in chunk:
            chunk[key] = np.repeat(np.arange(CHUNK, dtype=np.int32), log[key].size)
    res = (0, CHUNK, chunk, counts)
    t = time.perf_counter()
    back = pickle.loads(pickle.dumps(res, protocol=pickle.HIGHEST_PROTOCOL))
    marks.append(("transfer (parent)", (time.perf_counter() - t) / CHUNK))
    acc = CreditAccumulator(n_cells, job)
    t = time.perf_counter()
    acc.add(back[2], back[3], CHUNK)
    marks.append(("folding (parent)", (time.perf_counter() - t) / CHUNK))


def profile(side: int, kind: str, repeat: int):
    from terrain.dem import Dem
    from terrain.jobs.credit import CreditJob, realise
    from terrain.noise import ErrorModel, ErrorSampler

    z = terrain(side)
    dem = Dem.from_array(z, cellsize=30.0)
    model = ErrorModel(rmse=2.0)
    sampler = ErrorSampler(model, z.shape, (30.0, 30.0))
    job = CreditJob(kind, threshold=6.0, base=float(z.min())).resolved(dem, model)
    pond = np.zeros(z.size, np.int32) if kind == "depressions" else None
    log = replay(z, sampler, job, 0, pond, [])  # warm-up (compiles)
    ref = realise(z, sampler, job, 0, 0, np.zeros(z.size, np.int32) if pond is not None else None)
    assert all(np.array_equal(ref[k], log[k], equal_nan=ref[k].dtype.kind == "f") for k in ref), \
        "replay differs from realise()"
    runs = []
    for _ in range(repeat):
        marks = []
        log = replay(z, sampler, job, 1, pond, marks)
        counts = {"ponding": pond} if pond is not None else {}
        parent_steps(job, log, counts, z.size, marks)
        runs.append(dict(marks))
    steps = {k: statistics.median(r[k] for r in runs) for k in runs[0]}
    whole = median_time(lambda: realise(z, sampler, job, 0, 1, pond), repeat)
    t_sort = median_time(lambda: np.sort(z, axis=None), repeat)
    return z, sampler, job, steps, whole, t_sort, log


def memory_rows(z, sampler, job, log):
    """(array, bytes per cell of the raster) for one realisation's arrays."""
    from terrain.engine import persistence as P
    from terrain.engine.basins import CODES8, GROUPS8, sweep
    from terrain.engine.grid import offsets

    kind = job.filtration
    n = z.size
    zi = sampler.draw(0, 1) + z
    zz, s, valid = P._prepare(zi, kind, 8, None)
    zf, vf = zz.reshape(-1), valid.reshape(-1)
    lab = np.empty(n, np.int32)
    minc, cand, cmask, edge = sweep(zf, s, vf, *z.shape, True, CODES8, lab)
    emin = P._edge_minima(zf, s, lab, edge, minc.size)
    extra = np.sort(emin[emin >= 0]) if kind == "pits" else emin[:0]
    dr, dc = offsets(8)
    ev = P._gather_groups(zf, s, vf, *z.shape, dr, dc, lab, cand, cmask, extra, GROUPS8)
    nb, ne = minc.size, ev[0].size
    p = P.pairs(zi, kind=kind)
    # per basin in the merge: minc 8, keys 4, first edge cell and key 8 + 4 (and a
    # working copy), union-find 4, pairs (birth 8, key 4, death 8, flag 1); with an
    # outlet the merge tree (up 4, cell 8, key 4, order 4) and its join cell,
    # root and level (8 + 8 + 4)
    per_basin = 8 + 4 + 2 * 12 + 4 + 21 + (20 + 20 if kind == "pits" else 0)
    rows = [("DEM (input, float32)", z.nbytes), ("noise, then the perturbed DEM", zi.nbytes),
            ("validity", valid.nbytes), ("labels (int32)", lab.nbytes),
            (f"candidates ({cand.size}: cell 8 + mask 1)", cand.nbytes + cmask.nbytes),
            (f"minima ({nb})", minc.nbytes), (f"edge cells ({edge.size})", edge.nbytes),
            (f"events ({ne}: cell, key, basin, flag, offsets, other basins, order)",
             sum(a.nbytes for a in ev) + 8 * ne),
            (f"merge, per basin ({per_basin} B x {nb})", per_basin * nb),
            (f"pairs ({len(p)}: 5 x 8 + 1)", 41 * len(p)),
            ("region labels of the DEM (int32, the job's)", job.regions.labels.nbytes),
            (f"pair log ({log['birth'].size} pairs)",
             sum(log[k].nbytes for k in log if not k.startswith("pond")))]
    if kind == "pits":
        rows += [("fill level and depth per basin (2 x 8)", 16 * nb),
                 ("ponding counts (int32, per chunk)", 4 * n),
                 (f"pond log ({log['pond_region'].size} regions)",
                  sum(log[k].nbytes for k in log if k.startswith("pond")))]
    return [(name, b / n) for name, b in rows]


def placement(side: int, repeat: int):
    """The sweep's time with its labels placed just past the perturbed DEM in
    memory, over its time with them placed before it. A vectorised loop's
    runtime overlap check once spanned twice the DEM's length (negative-index
    wraparound), so the first placement ran the scalar loop at half speed;
    the ratio shows it stays ~1."""
    from terrain.engine.basins import CODES8, sweep

    z = terrain(side).astype(np.float32).reshape(-1)
    valid = np.isfinite(z)
    size = z.nbytes
    buf = np.empty(5 * size + 4096, np.uint8)
    o = -buf.ctypes.data % 4096
    zz = buf[o + 2 * size:o + 3 * size].view(np.float32)
    zz[:] = z
    times = []
    for at in (0, 3 * size + 2048):  # well before the DEM; just past its end
        lab = buf[o + at:o + at + size].view(np.int32)
        times.append(median_time(lambda lab=lab: sweep(zz, np.float32(-1), valid, side, side,
                                                       True, CODES8, lab), repeat))
    print(f"\nsweep, {side}², labels just past the DEM / labels before it: "
          f"{times[1] / times[0]:.2f} ({times[1] * 1e3:.1f} / {times[0] * 1e3:.1f} ms)")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="1024,4096")
    ap.add_argument("--repeat", type=int, default=5)
    a = ap.parse_args()
    for side in (int(x) for x in a.sizes.split(",")):
        for kind in ("peaks", "depressions"):
            z, sampler, job, steps, whole, t_sort, log = profile(side, kind, a.repeat)
            worker = sum(v for k, v in steps.items() if "parent" not in k)
            print(f"\n{kind}, {side}², 2 m Gaussian error: one np.sort of the raster "
                  f"{t_sort * 1e3:.1f} ms")
            print(f"  {'step':<22} {'ms':>8} {'sorts':>6} {'share':>6}")
            for k, v in steps.items():
                share = f"{v / worker:6.0%}" if "parent" not in k else ""
                print(f"  {k:<22} {v * 1e3:8.2f} {v / t_sort:6.2f} {share}")
            print(f"  {'sum (worker)':<22} {worker * 1e3:8.2f} {worker / t_sort:6.2f}")
            print(f"  {'realise() whole':<22} {whole * 1e3:8.2f} {whole / t_sort:6.2f}")
            print(f"  {'array':<72} {'B/cell':>7}")
            for name, bpc in memory_rows(z, sampler, job, log):
                print(f"  {name:<72} {bpc:7.3f}")
        placement(side, a.repeat)


if __name__ == "__main__":
    main()
