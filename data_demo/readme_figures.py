"""The figures the README quotes about the demo's pictures, read from a demo run.

The README describes what ``cairn demo`` draws (who shares the first place,
which knolls swap places, how deep the kettle hollows come out); every number
it quotes there is one of the figures below, measured on the demo's own
outputs, with its Monte Carlo standard error. ``tests/test_cli.py`` checks
that each quoted number lies within Monte Carlo error (three standard errors,
plus the README's rounding) of a demo run, so the README cannot drift from
what the demo draws.

Run:  python -m cairn_demo_data.readme_figures cairn-demo
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import pandas as pd

from . import make_demo

#: the demo's shallow hollow in the south (centre, metres from the upper-left corner;
#: see make_demo.build)
SHALLOW_HOLLOW = (1500.0, 3700.0)


def _share(p: float, n: int) -> tuple[float, float]:
    """A proportion in % with its Monte Carlo standard error sqrt(p (1 - p) / N)."""
    return 100 * p, 100 * math.sqrt(p * (1 - p) / max(n, 1))


def _p_rank(ranks: pd.DataFrame, fid: int, k: int) -> float:
    row = ranks[(ranks.feature_id == fid) & (ranks["rank"] == k)]
    return float(row.p_rank.iloc[0]) if len(row) else 0.0


def _ponding_at(path: Path, xy: tuple[float, float]) -> tuple[float, float]:
    import rasterio

    r, c = (int(v // make_demo.CELL) for v in (xy[1], xy[0]))
    with rasterio.open(path) as ds:
        return float(ds.read(1)[r, c]), float(ds.read(2)[r, c])


def readme_figures(outdir: str | Path) -> dict[str, tuple[float, float]]:
    """Each figure the README quotes, by name: (value, Monte Carlo standard error), in
    the unit the README quotes it (m, or % for shares and probabilities).

    ``outdir`` is a ``cairn demo`` output folder."""
    import json

    out = Path(outdir)
    s = pd.read_csv(out / "peaks" / "summits.csv").set_index("feature_id")
    sr = pd.read_csv(out / "peaks" / "ranks.csv")
    p = pd.read_csv(out / "depressions" / "pits.csv").set_index("feature_id")
    pr = pd.read_csv(out / "depressions" / "ranks.csv")
    n = int(json.loads((out / "peaks" / "run.json").read_text())["realisations_done"])
    fig: dict[str, tuple[float, float]] = {}
    # the twin summit: #1 and #3, each the highest in some realisations
    for f in (1, 3):
        fig[f"twin_{f}_on_dem"] = (float(s.loc[f, "unperturbed"]), 0.0)
        fig[f"twin_{f}_first"] = _share(float(s.loc[f, "p_first"]), n)
        fig[f"twin_{f}_mean"] = (float(s.loc[f, "expected"]), float(s.loc[f, "se"]))
    # its two clusters of outcomes: the lower twin's role (at the 5% point) and the
    # highest summit's (at the 95% point); each holds about half the realisations. Their
    # standard error is an allowance of 0.5 m for a quantile's Monte Carlo error (each
    # cluster's own 5-95% range is about 1.3 m wide)
    fig["twin_low_cluster"] = (float(s.loc[[1, 3], "p05"].mean()), 0.5)
    fig["twin_high_cluster"] = (float(s.loc[[1, 3], "p95"].mean()), 0.5)
    # the knolls of the ridge: the places each pair trades
    for a, b, k in ((5, 6, 5), (7, 8, 7)):
        fig[f"knolls_{a}_{b}_place_{k}"] = _share(_p_rank(sr, a, k), n)
        fig[f"knolls_{b}_{a}_place_{k}"] = _share(_p_rank(sr, b, k), n)
    # the kettle hollows
    fig["hollows_counted"] = _share(float(p.loc[[1, 2, 3], "p_above"].min()), n)
    fig["hollow_1_first"] = _share(float(p.loc[1, "p_first"]), n)
    fig["hollows_2_3_place_2"] = _share(_p_rank(pr, 2, 2), n)
    fig["hollows_3_2_place_2"] = _share(_p_rank(pr, 3, 2), n)
    for f in (1, 2, 3):
        fig[f"hollow_{f}_on_dem"] = (float(p.loc[f, "unperturbed"]), 0.0)
        fig[f"hollow_{f}_mean"] = (float(p.loc[f, "expected"]), float(p.loc[f, "se"]))
    value, se = _ponding_at(out / "depressions" / "ponding_probability.tif", SHALLOW_HOLLOW)
    fig["shallow_hollow_ponds"] = (100 * value, 100 * se)
    return fig


def main(argv: list[str]) -> int:
    folder = argv[0] if argv else "cairn-demo"
    for name, (value, se) in readme_figures(folder).items():
        print(f"{name:28s} {value:9.2f} ± {se:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
