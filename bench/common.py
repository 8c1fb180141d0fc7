"""Helpers shared by the benchmark scripts (run them from the project root)."""

from __future__ import annotations

import statistics
import time

import numpy as np
from scipy.ndimage import gaussian_filter


def terrain(n: int, seed: int = 0) -> np.ndarray:
    """A smooth float32 terrain: Gaussian-filtered noise at 4, 16 and 64 cells."""
    rng = np.random.default_rng(seed)
    z = sum(gaussian_filter(rng.standard_normal((n, n)), s) * s for s in (4, 16, 64))
    return (z * 100).astype(np.float32)


def median_time(fn, repeat: int = 3) -> float:
    """Median wall time of ``fn()`` over ``repeat`` calls after one warm-up call."""
    fn()
    ts = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return statistics.median(ts)
