"""Held-out check of ambiguity shown (issue 23): twin floors of a basin, in feet.

The depressions counterpart of ``tests/test_ranks.py``'s massif, on another field,
seed and unit: the basin's deepest floor, a single cell, loses its depth to a
flat-floored twin about 3 times in 4, and its mean falls below a dozen other pits.

Sources: the share is from order statistics of independent normal error: B's 49
floor cells lie 1.45 ft above A, and B is deeper when the lowest of its 49 noisy
cells beats A's noisy cell, P(min of 49 N(0,1) + 1.45 < N(0,1)) = 0.76 (computed
here by numpy's generator, 2 x 10^5 draws); the Monte Carlo standard error of a share,
sqrt(p (1 - p) / N) (common practice); pyogrio and shapely (general-purpose readers)
for the GeoPackage layers; the standard library's csv for ``ranks.csv``.
"""

from __future__ import annotations

import csv
import re

import numpy as np
import pandas as pd
import pyogrio
import pytest

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.outputs import plot
from terrain.summary.features import summarise_features

from .conftest import write_tif

N = 120
SEED = 13


def twin_floors():
    """An invented plain at 0 (10 m cells, feet) holding a 300 ft pit, eleven cones
    80-170 ft deep and a 180 ft basin with two floors 8 cells apart: A a single cell
    at -180, B a flat 7 x 7 floor at -178.55, 40 ft below the col between them
    (whichever holds the basin's depth, the other is 40 ft deep, so A's mean is about
    0.24 x 180 + 0.76 x 41 = 74 ft, below every other pit)."""
    rows, cols = 90, 150
    r, c = np.mgrid[0:rows, 0:cols].astype(float)

    def pit(r0, c0, depth, flat=0):
        d = (np.maximum(np.maximum(np.abs(r - r0), np.abs(c - c0)) - flat, 0) if flat
             else np.hypot(r - r0, c - c0))
        return np.minimum(-depth + 20.0 * d, 0)

    z = pit(15, 15, 300.0)
    spots = [(15 + 30 * i, 15 + 30 * j) for i in range(3) for j in range(5)][1:12]
    for (r0, c0), depth in zip(spots, np.linspace(80.0, 170.0, 11)):
        z = np.minimum(z, pit(r0, c0, depth))
    z = np.minimum(z, pit(75, 112, 180.0))  # floor A
    z = np.minimum(z, pit(75, 120, 178.55, flat=3))  # floor B, flat
    return z.astype(np.float32), (75, 112), (75, 120)


def test_the_share_quoted_in_the_docstring():
    rng = np.random.default_rng(1)
    b = rng.standard_normal((200_000, 49), dtype=np.float32).min(axis=1)
    assert np.mean(b + 1.45 < rng.standard_normal(200_000)) == pytest.approx(0.76, abs=0.005)


@pytest.fixture(scope="module")
def floors(tmp_path_factory):
    from click.testing import CliRunner

    from cairn_cli.main import cli

    z, a, b = twin_floors()
    tmp = tmp_path_factory.mktemp("floors")
    dem = write_tif(tmp / "floors.tif", z, units="ft")
    res = CliRunner().invoke(cli, ["depressions", str(dem), "-o", str(tmp / "out"), "--rmse", "1",
                                   "--min-depth", "10", "-n", str(N), "--seed", str(SEED),
                                   "--workers", "1"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    d = Dem.from_array(z, cellsize=10.0, crs="EPSG:32633", vertical_units="ft")
    run = run_ensemble(d, CreditJob("depressions", threshold=10.0), ErrorModel(rmse=1.0),
                       realisations=N, seed=SEED, backend="serial")
    feat = summarise_features(run)
    ia, ib = (int(feat.regions.labels[p]) for p in (a, b))
    return tmp / "out", res.stdout, run, feat, ia, ib


@pytest.mark.slow
def test_flat_twin_takes_the_floors_depth_three_times_in_four(floors):
    out, _, _, feat, a, b = floors
    t = pd.read_csv(out / "pits.csv").set_index("feature_id")
    # the CLI's table is the library's (one seed)
    lib = feat.table.set_index("feature_id")
    np.testing.assert_allclose(t.loc[[a, b], "p_first"], lib.loc[[a, b], "p_first"], atol=1e-4)
    assert t.loc[a, "unperturbed"] == pytest.approx(180.0) and t.loc[b, "unperturbed"] < 50
    ranks = pd.read_csv(out / "ranks.csv")
    share = ranks.pivot_table(index="feature_id", columns="rank", values="p_rank", fill_value=0)
    pb = share.loc[b, 2]
    assert abs(pb - 0.76) <= 4 * np.sqrt(0.76 * 0.24 / N)
    assert share.loc[a, 2] == pytest.approx(1 - pb, abs=1e-3)
    # a mean would hide A: it falls below a dozen other pits
    assert (t.expected > t.loc[a, "expected"]).sum() >= 12
    assert t.loc[a, "bimodal"] and t.loc[b, "bimodal"]
    # one group, id the smaller member id, no one else in it, the same in the GeoPackage
    assert t.loc[a, "group"] == t.loc[b, "group"] == min(a, b)
    assert (t.group == min(a, b)).sum() == 2
    gpkg = pyogrio.read_dataframe(out / "depressions.gpkg", layer="pits").set_index("feature_id")
    assert (gpkg.loc[t.index, "group"] == t["group"]).all()
    # adjacent rows, B (median rank 2) first
    assert t.loc[a, "rank"] == t.loc[b, "rank"] + 1 and t.loc[b, "median_rank"] == 2
    # every rank carries its whole probability, and every row has a shape
    with open(out / "ranks.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    r = pd.DataFrame(rows[1:], columns=rows[0]).astype(float)
    sums = r.groupby("rank").p_rank.sum()
    assert list(sums.index) == list(range(1, 11))
    np.testing.assert_allclose(sums, 1.0, atol=0.5e-4 * r.groupby("rank").size().max())
    np.testing.assert_allclose(r.p_rank_se, np.sqrt(r.p_rank * (1 - r.p_rank) / N), atol=1e-4)
    table = pd.read_csv(out / "pits.csv")
    for layer in ("pits", "pit_regions", "pit_points", "spill_points"):
        frame = pyogrio.read_dataframe(out / "depressions.gpkg", layer=layer)
        assert len(frame) == len(table), layer
        assert frame.geometry.notna().all() and not frame.geometry.is_empty.any(), layer
        assert frame.geometry.is_valid.all(), layer
    _console_chart_and_map_show_the_twins_together_in_feet(floors)


def _console_chart_and_map_show_the_twins_together_in_feet(floors):
    from .test_pictures import check_figure, check_map

    out, stdout, run, feat, a, b = floors
    # console: both rows, bracketed, in feet
    lines = [ln for ln in stdout.splitlines() if re.search(rf"#({a}|{b}) ", ln)]
    assert len(lines) == 2 and "┌" in lines[0] and "└" in lines[1] and f"#{b} " in lines[0]
    assert "depth in ft" in stdout
    # ranking chart: adjacent rows, one group label with both shares of 2nd place
    fig = plot.ranking_chart(run, feat)
    check_figure(fig)
    ticks = [t.get_text() for t in fig.axes[0].get_yticklabels()]
    assert ticks.index(f"#{a}") == ticks.index(f"#{b}") + 1
    group = [t.get_text() for t in fig.axes[1].texts if t.get_gid() == "group_label"]
    assert len(group) == 1 and group[0].startswith("2nd: ")
    # map: one label naming both with their depths on the DEM (starred), never the means
    fig = plot.feature_map(run, feat)
    _, labels, _ = check_map(fig, run.dem)
    text = [t.get_text() for t in labels if f"#{a} " in t.get_text()]
    assert len(text) == 1 and f"#{b} " in text[0] and f"#{a} 180 ft*" in text[0]
    t = feat.table.set_index("feature_id")
    assert plot.figure_text(t.loc[a, "expected"]) not in text[0]
    # the legend draws the star as a star (a "$*$" mathtext marker printed as raw text
    # when figures are saved with mathtext off)
    legend = fig.legends[0] if fig.legends else fig.axes[0].get_legend()
    star = [h for h, x in zip(legend.legend_handles, legend.get_texts())
            if x.get_text().startswith("bimodal")]
    assert len(star) == 1 and "$" not in str(star[0].get_marker())
