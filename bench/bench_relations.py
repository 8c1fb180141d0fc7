"""Benchmark: the cost of relations (isolation of every counted summit) per realisation.

Smooth terrains plus independent Gaussian error (RMSE 2, so many summits) at
512^2, 1024^2 and 2048^2 (float32). For one realisation it times, in this
process (medians of >= 3 runs after a warm-up):

* ``pairs()`` for peaks (with the elders it now returns): the realisation's
  own pairing, the reference;
* one ``np.sort`` of the raster (the GUIDE's yardstick);
* one Euclidean distance transform of the raster
  (``scipy.ndimage.distance_transform_edt``): what a per-cell approach would
  pay *per summit level* -- the search never makes one;
* the isolation a realisation computes: building the max pyramid once, then
  the best-first search from the summit of each region's counted pair (the
  largest prominence born in each region of the unperturbed terrain at the
  default merge level 2 x RMSE; :func:`terrain.jobs.relations.region_pairs`);
  and, for comparison, from every summit counted at the cut-off 3 x RMSE.

It prints the numbers of summits and the ratios isolation / pairs,
isolation / np.sort and isolation / one distance transform.

Run:  python bench/bench_relations.py [--sizes 512,1024,2048] [--repeat 3]
"""

from __future__ import annotations

import argparse

import numpy as np
from common import median_time, terrain
from scipy.ndimage import distance_transform_edt

from terrain.engine.isolation import isolation, pyramid
from terrain.engine.persistence import pairs, regions
from terrain.jobs.relations import region_pairs

RMSE = 2.0


def one(n: int, repeat: int) -> dict:
    z0 = terrain(n, seed=1)
    z = z0 + np.random.default_rng(2).normal(0, RMSE, (n, n)).astype(np.float32)
    p = pairs(z, kind="peaks")
    counted = p.persistence >= 3 * RMSE
    every = p.birth[counted]
    lab = regions(z0, kind="peaks", merge_level=2 * RMSE).labels.reshape(-1)
    fig = np.where(np.isfinite(p.persistence), p.persistence, p.birth_value)[counted]
    summits = every[region_pairs(lab[every], fig)]
    dx = dy = np.full(n, 10.0)
    t_pairs = median_time(lambda: pairs(z, kind="peaks"), repeat)
    t_sort = median_time(lambda: np.sort(z, axis=None), repeat)
    t_edt = median_time(lambda: distance_transform_edt(z < np.median(z)), repeat)
    t_pyr = median_time(lambda: pyramid(z), repeat)
    pyr = pyramid(z)
    t_iso = median_time(lambda: isolation(z, summits, dx, dy, pyr=pyr), repeat) + t_pyr
    t_all = median_time(lambda: isolation(z, every, dx, dy, pyr=pyr), repeat) + t_pyr
    return {"n": n, "summits": summits.size, "every": every.size, "all/pairs": t_all / t_pairs,
            "pairs_s": t_pairs, "iso_s": t_iso,
            "iso/pairs": t_iso / t_pairs, "iso/sort": t_iso / t_sort, "iso/edt": t_iso / t_edt,
            "pyramid share": t_pyr / t_iso}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="512,1024,2048")
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    print(f"{'size':>6} {'regions':>8} {'pairs s':>8} {'iso s':>8} {'iso/pairs':>10} "
          f"{'iso/sort':>9} {'iso/EDT':>8} {'pyramid':>8} {'counted':>8} {'all/pairs':>10}")
    for n in (int(s) for s in a.sizes.split(",")):
        r = one(n, a.repeat)
        print(f"{n:>5}² {r['summits']:>8} {r['pairs_s']:>8.3f} {r['iso_s']:>8.3f} "
              f"{r['iso/pairs']:>10.3f} {r['iso/sort']:>9.3f} {r['iso/edt']:>8.3f} "
              f"{r['pyramid share']:>8.2f} {r['every']:>8} {r['all/pairs']:>10.3f}")


if __name__ == "__main__":
    main()
