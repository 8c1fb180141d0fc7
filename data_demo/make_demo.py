"""Build ``veldmarrow.tif``: the invented upland of Veldmarrow Fells.

Deterministic (fixed seed). 400 x 400 cells of 10 m in a UTM grid (EPSG:32633;
the place is fictional, the coordinates arbitrary), integer metres (int16,
nodata -32768). Features, chosen so that point answers are unstable:

* Twin Crag: two flat-topped summits of exactly equal height (after rounding)
  500 m apart, joined by a col about 25 m lower -- which is "the" summit?
* Long Edge: a 2 km ridge carrying six knolls of near-equal height
  (within 1 m) separated by shallow cols.
* Three kettle hollows with flat floors, about 4.5-7 m deep below their
  spill points, and one shallow hollow (~2 m) near the southern edge.

Run:  python data_demo/make_demo.py
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy.ndimage import gaussian_filter

SHAPE = (400, 400)
CELL = 10.0
ORIGIN = (512_000.0, 6_804_000.0)  # upper-left corner, EPSG:32633


def build() -> np.ndarray:
    rng = np.random.default_rng(20261201)
    rows, cols = SHAPE
    y, x = np.mgrid[0:rows, 0:cols].astype(np.float64) * CELL  # metres from the upper-left
    # regional slope down to the south-east and gentle rolling ground
    z = 420 - 0.025 * x - 0.035 * y
    z += 6 * gaussian_filter(rng.standard_normal(SHAPE), 12) * 12
    z += 1.2 * gaussian_filter(rng.standard_normal(SHAPE), 3) * 3

    def dome(cx, cy, height, radius):
        return height * np.exp(-(np.hypot(x - cx, y - cy) / radius) ** 2)

    # Twin Crag: two domes on a shared massif, both tops cut flat at one level
    crag = z + dome(1100, 900, 150, 520) + dome(850, 900, 60, 130) + dome(1350, 900, 60, 130)
    near_a = np.hypot(x - 850, y - 900) < 100
    near_b = np.hypot(x - 1350, y - 900) < 100
    top = np.round(min(crag[near_a].max(), crag[near_b].max()) - 4.0)
    z = np.minimum(crag, top - 1)
    # two identical flat tops (discs of equal cell count) at exactly one level
    rr, cc = np.mgrid[0:rows, 0:cols]
    for c0 in (85, 135):
        z = np.where(np.hypot(rr - 90, cc - c0) <= 6, top, z)
    # Long Edge: a ridge running west-east in the south with six knolls
    ridge_y = 3000 + 120 * np.sin(x / 700)
    taper = 0.25 * (1 + np.tanh((x - 600) / 180)) * (1 + np.tanh((3500 - x) / 180))
    ridge = 95 * np.exp(-((y - ridge_y) / 170) ** 2) * taper
    z += ridge
    for k, cx in enumerate(np.linspace(900, 3300, 6)):
        cy = 3000 + 120 * np.sin(cx / 700)
        z += (7.0 + 0.15 * ((k * 7) % 5)) * np.exp(-(np.hypot(x - cx, y - cy) / 110) ** 2)
    # kettle hollows: closed below the lowest point of their rim, flat floors
    for cx, cy, depth, radius in ((2900, 1200, 9.0, 160), (3400, 1900, 6.0, 130),
                                  (2300, 1900, 4.5, 110), (1500, 3700, 1.5, 90)):
        r = np.hypot(x - cx, y - cy)
        rim = z[(r >= radius - CELL) & (r < radius + CELL)].min()
        bowl = rim - 1.0 - depth * (1 - (r / radius) ** 2)
        floor = rim - 1.0 - 0.6 * depth
        inside = r < radius
        z = np.where(inside, np.minimum(z, np.maximum(bowl, floor)), z)
    return np.round(z).astype(np.int16)


def write(path: Path) -> None:
    import rasterio
    from rasterio.transform import from_origin

    z = build()
    profile = dict(driver="GTiff", height=SHAPE[0], width=SHAPE[1], count=1, dtype="int16",
                   crs="EPSG:32633", transform=from_origin(ORIGIN[0], ORIGIN[1], CELL, CELL),
                   nodata=-32768, compress="deflate", tiled=True, blockxsize=256, blockysize=256)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(z, 1)
        ds.units = ("metre",)
        ds.set_band_description(1, "elevation")
        ds.update_tags(TITLE="Veldmarrow Fells (invented terrain for the cairn demo)",
                       MADE_BY="data_demo/make_demo.py")


if __name__ == "__main__":
    write(Path(__file__).with_name("veldmarrow.tif"))
