"""Benchmark: writing layers as Cloud Optimized GeoTIFFs, and its share of a run.

1. Runs ``cairn demo`` (in a temporary folder, as a user would) and prints,
   from each part's ``run.json`` timings, the seconds spent writing the
   GeoTIFF layers and all files, and their shares of the run's wall time
   (realisations + writing; the target is layers <= 10%).
2. Writes one two-band float32 layer of ``--side``² cells through
   ``terrain.io.write_layer`` (GDAL's COG driver with statistics) and, as the
   reference measured in the same run, as a plain tiled DEFLATE GeoTIFF with
   overviews added afterwards (the layout before COG); medians of 3 after a
   warm-up.

Run:  python bench/bench_writing.py [--side 2048] [--skip-demo]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from common import median_time, terrain


def demo_shares(folder: Path) -> None:
    subprocess.run([sys.executable, "-c", "from cairn_cli.main import run; run()", "demo",
                    "-o", str(folder), "-q"], check=True)
    print("cairn demo        realisations_s  layers_s  layers_share  writing_s  writing_share")
    for part in ("peaks", "depressions"):
        t = json.loads((folder / part / "run.json").read_text())["timings"]
        print(f"  {part:<15} {t['realisations_s']:>14.2f} {t['layers_s']:>9.2f} "
              f"{t['layers_share']:>13.1%} {t['writing_s']:>10.2f} {t['writing_share']:>14.1%}")


def plain_geotiff(path: Path, dem, bands) -> None:
    """The reference: a tiled DEFLATE GeoTIFF, overviews built after the image."""
    import rasterio
    from rasterio.enums import Resampling
    from rasterio.transform import Affine

    rows, cols = dem.shape
    with rasterio.open(path, "w", driver="GTiff", height=rows, width=cols, count=2,
                       dtype="float32", crs=dem.crs, transform=Affine(*dem.transform),
                       nodata=np.nan, compress="deflate", predictor=3, tiled=True,
                       blockxsize=256, blockysize=256) as ds:
        ds.write(np.stack(bands))
        factors = [f for f in (2, 4, 8, 16, 32) if min(rows, cols) // f >= 64]
        ds.build_overviews(factors, Resampling.average)


def write_ratio(side: int, folder: Path) -> None:
    from terrain.dem import Dem
    from terrain.io import write_layer

    z = terrain(side)
    dem = Dem.from_array(z, cellsize=10.0, crs="EPSG:32633")
    est = np.abs(z - z.mean()).astype(np.float64) / 100.0
    se = est / 10.0
    bands = [est.astype(np.float32), se.astype(np.float32)]
    t_cog = median_time(lambda: write_layer(folder / "cog.tif", dem, est, se, name="x",
                                            units="metre", description="bench", tags={}))
    t_ref = median_time(lambda: plain_geotiff(folder / "plain.tif", dem, bands))
    print(f"side {side}²: write_layer (COG + statistics) {t_cog:.3f} s; plain tiled GeoTIFF "
          f"+ overviews {t_ref:.3f} s; ratio COG/plain {t_cog / t_ref:.2f}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=2048)
    ap.add_argument("--skip-demo", action="store_true")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        if not a.skip_demo:
            demo_shares(Path(tmp) / "demo")
        write_ratio(a.side, Path(tmp))


if __name__ == "__main__":
    main()
