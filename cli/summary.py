"""The table of top features printed at the end of a run."""

from __future__ import annotations

import sys

import numpy as np


def print_summary(table: dict, *, kind: str, units: str, n: int, outdir, caution: str,
                  top: int = 10) -> None:
    from rich.console import Console
    from rich.table import Table

    figure = "prominence" if kind == "peaks" else "depth"
    what = "summits" if kind == "peaks" else "depressions"
    t = Table(title=f"Top {what} by expected {figure} ({n} realisations)", title_justify="left")
    for col, just in (("rank", "right"), ("id", "right"), (f"expected {figure} ({units})", "right"),
                      ("p05–p95", "right"), ("P(counted)", "right"), ("P(first)", "right"),
                      ("x", "right"), ("y", "right"), ("elevation", "right"), ("edge", "right")):
        t.add_column(col, justify=just)
    order = np.argsort(table["rank"], kind="stable")[:top]
    for i in order:
        t.add_row(str(table["rank"][i]), str(table["feature_id"][i]),
                  f"{table['expected'][i]:.2f} ± {table['se'][i]:.2f}",
                  f"{table['p05'][i]:.1f}–{table['p95'][i]:.1f}", f"{table['p_above'][i]:.2f}",
                  f"{table['p_first'][i]:.2f}", f"{table['x'][i]:.1f}", f"{table['y'][i]:.1f}",
                  f"{table['elevation'][i]:.1f}",
                  "–" if np.isnan(table["edge_limited_share"][i])
                  else f"{table['edge_limited_share'][i]:.0%}")
    console = Console(file=sys.stdout, width=120)
    if len(order) == 0:
        console.print(f"No {what} above the threshold in any realisation.")
    else:
        console.print(t)
    console.print(f"{len(table['rank'])} features; outputs in {outdir}")
    console.print(f"[italic]{caution}[/italic]")


def print_catchments(rows: dict, *, n: int, outdir, caution: str) -> None:
    from rich.console import Console
    from rich.table import Table

    t = Table(title=f"Catchments ({n} realisations)", title_justify="left")
    for col in ("outlet", "level", "area km²", "mean km²", "5–95% km²"):
        t.add_column(col, justify="right")
    for i in range(len(rows["outlet_id"])):
        t.add_row(rows["outlet_id"][i], f"{rows['level'][i]:.0%}", f"{rows['area_m2'][i] / 1e6:.3f}",
                  f"{rows['area_mean_m2'][i] / 1e6:.3f}",
                  f"{rows['area_p05_m2'][i] / 1e6:.3f}–{rows['area_p95_m2'][i] / 1e6:.3f}")
    console = Console(file=sys.stdout, width=120)
    console.print(t)
    console.print(f"outputs in {outdir}")
    console.print(f"[italic]{caution}[/italic]")
