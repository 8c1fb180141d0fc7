"""Shared fixtures: generated terrains (big data is generated, never committed)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter


def exact_p_higher_first(kernel, sigma, delta):
    """P(e1 - e2 > -delta) for iid kernel errors of standard deviation sigma: the
    probability that the higher of two summits (heights a + delta, a) stays higher.

    Gaussian: Phi(delta / (sigma sqrt 2)) (difference of two normals; scipy.stats).
    Compact kernels: int K(x) F(x + delta) dx by numerical integration (scipy.integrate).
    """
    import math

    from scipy import integrate, stats

    from terrain.noise import KERNELS

    if kernel == "gaussian":
        return stats.norm.cdf(delta / (sigma * math.sqrt(2)))
    k = KERNELS[kernel]
    h = k.halfwidth(sigma)

    def cdf(t):
        t = min(max(t, -h), h)
        return integrate.quad(lambda u: k.pdf(u, h), -h, t)[0]

    return integrate.quad(lambda x: k.pdf(x, h) * cdf(x + delta), -h, h, limit=200)[0]


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


def write_tif(path, z, *, crs="EPSG:32633", transform=None, nodata=None, dtype=None, count=1,
              units=None):
    """Write a small GeoTIFF for a test (rasterio)."""
    import rasterio
    from rasterio.transform import from_origin

    z = np.asarray(z)
    arrs = z if z.ndim == 3 else z[None]
    profile = dict(driver="GTiff", height=arrs.shape[1], width=arrs.shape[2], count=arrs.shape[0],
                   dtype=dtype or arrs.dtype.name, crs=crs,
                   transform=transform or from_origin(500000.0, 6800000.0, 10.0, 10.0))
    if nodata is not None:
        profile["nodata"] = nodata
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with rasterio.open(path, "w", **profile) as ds:
            ds.write(arrs.astype(profile["dtype"]))
            if units:
                ds.units = (units,) * arrs.shape[0]
    return path


@pytest.fixture
def cairn(monkeypatch):
    """Run the cairn CLI in-process; returns (exit code, stdout, stderr)."""
    from cairn_cli.main import run
    from click.testing import CliRunner

    def invoke(*args):
        runner = CliRunner()
        result = runner.invoke(_Entry(run), [str(a) for a in args], catch_exceptions=False)
        return result.exit_code, result.stdout, result.stderr

    return invoke


class _Entry:
    """Adapter so CliRunner can drive the console entry point (``run``)."""

    def __init__(self, fn):
        self.fn = fn
        self.name = "cairn"

    def main(self, args=None, prog_name=None, **kwargs):
        self.fn(args)
