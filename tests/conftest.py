"""Shared fixtures: generated terrains (big data is generated, never committed)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter


def smooth_terrain(shape, seed=0, scales=(2, 6, 18), amp=100.0, dtype=np.float32):
    """Sum of Gaussian-filtered white noise at several scales (a generic test surface)."""
    rng = np.random.default_rng(seed)
    z = sum(gaussian_filter(rng.standard_normal(shape), s) * s for s in scales)
    return (z * amp).astype(dtype)


@pytest.fixture
def terrain():
    return smooth_terrain


@pytest.fixture(scope="session")
def usgs_dem():
    """The USGS 3 arc-second DEM shipped by matplotlib (integer metres, many ties)."""
    from matplotlib import cbook

    f = cbook.get_sample_data("jacksboro_fault_dem.npz")  # already an NpzFile
    with f:
        return np.asarray(f["elevation"]).astype(np.float32)
