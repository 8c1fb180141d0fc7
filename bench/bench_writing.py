"""Benchmark: writing's share of a run, and writing a layer as a COG vs a plain GeoTIFF.

1. Runs ``cairn peaks`` and ``cairn depressions`` (as a user would, in a
   temporary folder, ``--workers 2``) on a ``--side``² smooth terrain GeoTIFF
   (``common.terrain``, 30 m cells, RMSE 2 m) for each of ``--counts``
   realisations, and prints from each run's ``run.json`` timings the seconds
   spent on the realisations (and per realisation, in np.sorts of the
   raster measured in this run: the cost of a realisation on 2 workers,
   target <= 5), the layers, the tables and the figures, the writing's wall
   time and its share of the run (target <= 15% at 300 realisations,
   1024²). The steps overlap (the layers are written while the features
   are summarised, the map drawn while the summary is finished and the
   tables written), so the writing's wall time is less than their sum; it
   counts only what the writing adds to the summary's time.
2. Writes one two-band float32 layer of ``--layer-side``² cells through
   ``terrain.io.write_layer`` (GDAL's COG driver with statistics) and, as the
   reference measured in the same run, as a plain tiled DEFLATE GeoTIFF with
   overviews added afterwards (the layout before COG); medians of 3 after a
   warm-up.

Run:  python bench/bench_writing.py [--side 1024] [--counts 100,300,1000] [--skip-runs]
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


def write_dem(path: Path, side: int) -> None:
    import rasterio
    from rasterio.transform import from_origin

    z = terrain(side)
    with rasterio.open(path, "w", driver="GTiff", height=side, width=side, count=1,
                       dtype="float32", crs="EPSG:32633",
                       transform=from_origin(500000, 6000000, 30, 30)) as ds:
        ds.write(z, 1)


def run_shares(folder: Path, side: int, counts) -> None:
    dem = folder / "dem.tif"
    write_dem(dem, side)
    flat = terrain(side).reshape(-1)
    sort = median_time(lambda: np.sort(flat), repeat=7)
    print(f"cairn peaks/depressions on a {side}² terrain, RMSE 2, --workers 2; one np.sort of "
          f"the raster {sort * 1e3:.1f} ms (a realisation's cost in sorts: realisations_s / n "
          "over it, target <= 5)")
    print(f"  {'kind':<12} {'n':>5} {'realis. s':>10} {'sorts':>6} {'layers s':>9} "
          f"{'tables s':>9} {'figures s':>10} {'writing s':>10} {'writing share':>14}")
    for n in counts:
        for kind in ("peaks", "depressions"):
            out = folder / f"{kind}-{n}"
            subprocess.run([sys.executable, "-c", "from cairn_cli.main import main; main()", kind,
                            str(dem), "--rmse", "2", "-n", str(n), "--workers", "2", "-o",
                            str(out), "-q"], check=True, stderr=subprocess.DEVNULL)
            t = json.loads((out / "run.json").read_text())["timings"]
            per = t["realisations_s"] / n / sort
            print(f"  {kind:<12} {n:>5} {t['realisations_s']:>10.2f} {per:>6.2f} {t['layers_s']:>9.2f} "
                  f"{t['tables_s']:>9.2f} {t['figures_s']:>10.2f} {t['writing_s']:>10.2f} "
                  f"{t['writing_share']:>14.1%}", flush=True)


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
    ap.add_argument("--side", type=int, default=1024)
    ap.add_argument("--counts", default="100,300,1000")
    ap.add_argument("--layer-side", type=int, default=2048)
    ap.add_argument("--skip-runs", action="store_true")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        if not a.skip_runs:
            run_shares(Path(tmp), a.side, [int(x) for x in a.counts.split(",")])
        write_ratio(a.layer_side, Path(tmp))


if __name__ == "__main__":
    main()
