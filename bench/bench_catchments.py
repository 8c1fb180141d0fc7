"""Benchmark: one catchment realisation vs scikit-image's reconstruction fill alone.

At 1024^2 (smooth terrain + 2 m Gaussian error, float32): our realisation
(noise, depression removal, D8 with flats routed, accumulation in m^2,
channel counts, outlet snapping, sub-catchment labels, membership and
divides for 3 outlets) with filling and with breaching (depressions up to
3 m deep), against ``skimage.morphology.reconstruction(..., method="erosion")``
on the same perturbed array; medians of 3 after a warm-up, in this process.
Then, in a fresh process per conditioning, the peak resident memory one
realisation adds, per cell, beside the job's stated worker figure.

Run:  python bench/bench_catchments.py [--side 1024]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile

import numpy as np
from common import median_time, terrain


def _setup(z: np.ndarray, conditioning: str):
    from terrain.dem import Dem
    from terrain.jobs import CatchmentJob
    from terrain.noise import ErrorModel, ErrorSampler

    side = z.shape[0]
    dem = Dem.from_array(z, cellsize=10.0)
    model = ErrorModel(rmse=2.0)
    sampler = ErrorSampler(model, z.shape, (10.0, 10.0))
    n = side
    cells = np.array([n // 4 * n + n // 4, n // 2 * n + n // 2, 3 * n // 4 * n + n // 3])
    x, y = dem.xy(cells)
    job = CatchmentJob(["a", "b", "c"], np.column_stack([x, y]), snap_m=30.0,
                       conditioning=conditioning,
                       breach_cap=3.0 if conditioning == "breach" else None).resolved(dem, model)
    return z, sampler, job


def _peak_bytes_per_cell(path: str, conditioning: str) -> tuple[float, int]:
    """A worker's bytes per cell, measured in a fresh process: the peak resident
    memory one realisation adds (kernels compiled first on a small grid, the DEM
    and the chunk's counts allocated before the baseline) plus the DEM and the
    counts; and the job's stated worker figure."""
    code = f"""
import sys
import numpy as np
sys.path.insert(0, "bench")
from bench_catchments import _setup
from common import terrain
z, s, job = _setup(terrain(64), {conditioning!r}); job.realise(z, s, 0, 1, job.new_counts(z.size))
z, s, job = _setup(np.load({path!r}), {conditioning!r})
counts = job.new_counts(z.size)
counts["member"][:] = 1; counts["sub"][:] = 1; counts["divide"][:] = 1; counts["channel"][:] = 1
rss = lambda key: int(next(l for l in open("/proc/self/status") if l.startswith(key)).split()[1])
base = rss("VmRSS:")
assert rss("VmHWM:") - base < 0.5 * z.size / 1024, "the set-up's peak hides the realisation's"
job.realise(z, s, 0, 1, counts)
held = z.nbytes + sum(a.nbytes for a in counts.values())
print(((rss("VmHWM:") - base) * 1024 + held) / z.size, job.memory_per_cell(4)[1])
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    a, b = out.stdout.split()
    return float(a), int(b)


def main():
    from skimage.morphology import reconstruction

    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=1024)
    a = ap.parse_args()
    n = a.side
    times = {}
    z0 = terrain(n)
    for method in ("fill", "breach"):
        z, sampler, job = _setup(z0, method)
        counts = job.new_counts(z.size)
        times[method] = median_time(lambda z=z, s=sampler, job=job, c=counts: job.realise(z, s, 0, 1,
                                                                                         c))
    zi = (z + sampler.draw(0, 1)).astype(np.float64)
    marker = zi.copy()
    marker[1:-1, 1:-1] = zi.max()
    t_ski = median_time(lambda: reconstruction(marker, zi, method="erosion"))
    print(f"side {n}², 3 outlets and channels: one realisation with filling {times['fill']:.3f} s, "
          f"with breaching {times['breach']:.3f} s; scikit-image reconstruction fill alone "
          f"{t_ski:.3f} s")
    print(f"ratio fill realisation / skimage fill {times['fill'] / t_ski:.2f} (target <= 1); "
          f"breach realisation / skimage fill {times['breach'] / t_ski:.2f}; "
          f"breach / fill {times['breach'] / times['fill']:.2f} (target <= 2)")
    with tempfile.TemporaryDirectory() as tmp:
        np.save(f"{tmp}/z.npy", z0)
        peaks = {m: _peak_bytes_per_cell(f"{tmp}/z.npy", m) for m in ("fill", "breach")}
    for method, (measured, stated) in peaks.items():
        print(f"{method}: worker memory measured {measured:.1f} bytes per cell (peak added by one "
              f"realisation + float32 DEM + counts), stated {stated}")


if __name__ == "__main__":
    main()
