"""Benchmark: one catchment realisation vs scikit-image's reconstruction fill alone.

At 1024^2 (smooth terrain + 2 m Gaussian error, float32): our realisation
(noise, depression filling, D8 with flats routed, accumulation, outlet
snapping and membership for 3 outlets, divides) against
``skimage.morphology.reconstruction(..., method="erosion")`` on the same
perturbed array, medians of 3 after a warm-up, in this process.

Run:  python bench/bench_catchments.py [--side 1024]
"""

from __future__ import annotations

import argparse

import numpy as np
from common import median_time, terrain


def main():
    from skimage.morphology import reconstruction

    from terrain.dem import Dem
    from terrain.jobs import CatchmentJob
    from terrain.noise import ErrorModel, ErrorSampler

    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=1024)
    a = ap.parse_args()
    z = terrain(a.side)
    dem = Dem.from_array(z, cellsize=10.0)
    model = ErrorModel(rmse=2.0)
    sampler = ErrorSampler(model, z.shape, (10.0, 10.0))
    n = a.side
    cells = np.array([n // 4 * n + n // 4, n // 2 * n + n // 2, 3 * n // 4 * n + n // 3])
    x, y = dem.xy(cells)
    job = CatchmentJob(["a", "b", "c"], np.column_stack([x, y]), snap_m=30.0).resolved(dem, model)
    counts = job.new_counts(z.size)
    t_ours = median_time(lambda: job.realise(z, sampler, 0, 1, counts))
    zi = (z + sampler.draw(0, 1)).astype(np.float64)
    marker = zi.copy()
    marker[1:-1, 1:-1] = zi.max()
    t_ski = median_time(lambda: reconstruction(marker, zi, method="erosion"))
    print(f"side {n}²: one catchment realisation {t_ours:.3f} s; scikit-image reconstruction "
          f"fill alone {t_ski:.3f} s; ratio ours/skimage {t_ours / t_ski:.2f} (target <= 1)")


if __name__ == "__main__":
    main()
