"""Compile cairn's numba kernels into the per-user cache, once, before tests start.

Run by tests/conftest.py in two processes at the start of a session (one for the
whole-grid engines and catchments, one for the blocked ones, each on a float32 and a
float64 raster; then each makes one out-of-core run, which reaches the kernels of
regions and counts kept on disk), so the test processes load the kernels from the
cache instead of each compiling the same ones at the same time (a fresh checkout
has none cached: numba keys its cache by the source's path).
Usage: ``python tests/warm_kernels.py whole|blocked``.
"""

from __future__ import annotations

import sys

import numpy as np


def main(part: str) -> None:
    import tempfile

    from scipy.ndimage import gaussian_filter

    from terrain import CreditJob, Dem, ErrorModel, run_ensemble
    from terrain.io import read_dem, scratch_folder
    from terrain.jobs.catchments import CatchmentJob
    from terrain.summary.features import summarise_features
    from tests.conftest import write_tif

    rng = np.random.default_rng(0)
    z64 = gaussian_filter(rng.standard_normal((40, 40)), 2) * 100  # not float32 values
    z = z64.astype(np.float32)
    model = ErrorModel(rmse=1.0)
    block = 16 if part == "blocked" else None
    dem, dem64 = (Dem.from_array(a, cellsize=10.0, crs="EPSG:32633") for a in (z, z64))
    # float32 and float64 rasters (a float64 raster whose values are not all float32 is
    # worked in float64: kernels of their own); the whole-grid process starts with
    # float64, the blocked one with float32, so the two seldom compile the same kernel
    # at the same time (the later one finds it cached)
    x0, top = dem.transform[2], dem.transform[5]
    for d in ((dem64, dem) if part == "whole" else (dem, dem64)):
        if part == "whole":
            for job in (CatchmentJob(("a",), np.array([[x0 + 205.0, top - 205.0]])),
                        CatchmentJob()):  # with an outlet; channels and drainage area alone
                run_ensemble(d, job, model, realisations=2, seed=0, backend="serial")
        for kind in ("peaks", "depressions"):
            res = run_ensemble(d, CreditJob(kind), model, realisations=2, seed=0,
                               backend="serial", block=block)
            summarise_features(res)
    # out of core (the DEM, region labels and counts on disk: blocked regions), one kind in
    # each process, after the rest (by then the other process has compiled what they share)
    kind = "depressions" if part == "whole" else "peaks"
    with tempfile.TemporaryDirectory() as tmp, scratch_folder(tmp) as f:
        path = str(write_tif(f"{tmp}/dem.tif", z))
        res = run_ensemble(read_dem(path, scratch=f), CreditJob(kind), model, realisations=2,
                           seed=0, backend="serial", block=16)
        summarise_features(res)


if __name__ == "__main__":
    main(sys.argv[1])
