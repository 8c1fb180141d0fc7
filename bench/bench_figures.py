"""Benchmark: drawing and saving the pictures vs a bare matplotlib image of the same raster.

On the demo DEM (400², a peaks and a depressions run of 60 realisations,
serial), and on a generated terrain of ``--side``² (pooled before drawing
above 1600 cells a side): the quick-look map and the ranking chart, built and
saved as PNG, against the reference of one ``imshow`` of the DEM in a figure
of the same size saved the same way (the least any map costs). Medians of 3
after a warm-up, in this process.

Run:  python bench/bench_figures.py [--side 3000]
"""

from __future__ import annotations

import argparse
import io

import numpy as np
from common import median_time, terrain


def _reference(z, size):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, dpi=120)
    FigureCanvasAgg(fig)
    fig.add_axes((0.1, 0.1, 0.8, 0.8)).imshow(z, cmap="gray")
    fig.savefig(io.BytesIO(), format="png")


def _saved(fig):
    fig.savefig(io.BytesIO(), format="png")
    return fig


def main():
    from cairn_demo_data import DEM_PATH
    from terrain import CreditJob, Dem, ErrorModel, run_ensemble
    from terrain.io import read_dem
    from terrain.outputs import plot
    from terrain.summary.features import summarise_features

    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=3000)
    a = ap.parse_args()
    dem = read_dem(DEM_PATH)
    print("figure                        seconds  reference  ratio")
    for kind in ("peaks", "depressions"):
        res = run_ensemble(dem, CreditJob(kind), ErrorModel(rmse=1.0), realisations=60, seed=1,
                           backend="serial")
        feat = summarise_features(res)
        size = tuple(plot.feature_map(res, feat).get_size_inches())
        t_ref = median_time(lambda size=size: _reference(dem.z, size))
        for name, fn in (("quicklook", plot.feature_map), ("ranking", plot.ranking_chart)):
            t = median_time(lambda fn=fn, res=res, feat=feat: _saved(fn(res, feat)))
            print(f"demo {kind:11s} {name:10s} {t:8.2f} {t_ref:10.2f} {t / t_ref:6.1f}")
    z = terrain(a.side)
    big = Dem.from_array(z, cellsize=10.0, crs="EPSG:32633")
    layer = np.abs(z) / np.abs(z).max()
    t = median_time(lambda: _saved(plot.quicklook(big, layer, title="t", units="u")), repeat=1)
    t_ref = median_time(lambda: _reference(z, (10, 10)), repeat=1)
    print(f"{a.side}² quicklook (pooled)      {t:8.2f} {t_ref:10.2f} {t / t_ref:6.1f}")


if __name__ == "__main__":
    main()
