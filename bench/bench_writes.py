"""Benchmark: what checked, published writes cost over a plain GeoTIFF write.

The same two-band float32 GeoTIFF (tiled 256x256, DEFLATE, floating-point
predictor; a credit-like layer: mostly zeros, a few smooth bumps) is written
three ways, medians of 3 after a warm-up, in this process:

- plain: ``rasterio.open(path, "w")`` straight to its final name (the reference);
- checked: the same code inside ``terrain.io.atomic_path`` (GDAL errors and
  fd 2 collected, every block re-read, fsync, rename);
- published: the checked write inside ``terrain.io.staged_outputs`` (a
  staging folder, the lock, a marker and the move into place).

Run:  python bench/bench_writes.py [--side 2048]
"""

from __future__ import annotations

import argparse
import tempfile
import warnings
from pathlib import Path

import numpy as np
from common import median_time, terrain


def main():
    import rasterio
    from rasterio.transform import from_origin

    from terrain.io import atomic_path, staged_outputs

    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=2048)
    a = ap.parse_args()
    n = a.side
    z = terrain(n)
    est = np.where(z > np.percentile(z, 99), z - np.percentile(z, 99), 0).astype(np.float32)
    se = (est * 0.1).astype(np.float32)
    profile = dict(driver="GTiff", height=n, width=n, count=2, dtype="float32", crs="EPSG:32633",
                   transform=from_origin(500000, 6800000, 10, 10), nodata=np.nan,
                   compress="deflate", predictor=3, tiled=True, blockxsize=256, blockysize=256)

    def write(path):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with rasterio.open(path, "w", **profile) as ds:
                ds.write(est, 1)
                ds.write(se, 2)

    with tempfile.TemporaryDirectory() as d:
        root = Path(d)

        def checked():
            with atomic_path(root / "checked.tif", bands=2) as tmp:
                write(tmp)

        def published():
            with staged_outputs(root / "out") as stage, atomic_path(stage / "layer.tif",
                                                                     bands=2) as tmp:
                write(tmp)

        t_plain = median_time(lambda: write(root / "plain.tif"))
        t_checked = median_time(checked)
        t_published = median_time(published)
        size = (root / "plain.tif").stat().st_size
    print(f"side {n}² two-band layer ({size / 2**20:.1f} MiB): plain write {t_plain:.3f} s; "
          f"checked {t_checked:.3f} s (ratio {t_checked / t_plain:.2f}); checked and published "
          f"{t_published:.3f} s (ratio {t_published / t_plain:.2f})")


if __name__ == "__main__":
    main()
