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
    order = np.argsort(table["rank"].to_numpy(), kind="stable")[:top]
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


def print_catchments(summary, result, *, outdir, caution: str) -> None:
    """Per outlet and level: catchment and sub-catchment areas; where each outlet snapped."""
    from rich.console import Console
    from rich.table import Table

    from terrain.outlets import short
    from terrain.summary.catchments import LEVELS

    console = Console(file=sys.stdout, width=120)
    frames = summary.frames
    if frames:
        t = Table(title=f"Catchments and sub-catchments ({result.n} realisations)",
                  title_justify="left")
        for col in ("outlet", "level", "catchment km²", "mean (5–95%) km²", "sub-catchment km²",
                    "snapped (share)", "snap m"):
            t.add_column(col, justify="right")
        c, sc, o = frames["catchments"], frames["subcatchments"], frames["outlets"]
        for i in range(len(c)):
            k = i // len(LEVELS)
            t.add_row(short(str(c["outlet_id"][i]), 24), f"{c['level'][i]:.0%}",
                      f"{c['area_m2'][i] / 1e6:.3f}",
                      f"{c['area_mean_m2'][i] / 1e6:.3f} ({c['area_p05_m2'][i] / 1e6:.3f}–"
                      f"{c['area_p95_m2'][i] / 1e6:.3f})", f"{sc['area_m2'][i] / 1e6:.3f}",
                      f"{o['snapped_share'][k]:.0%}", f"{o['snap_distance_mean_m'][k]:.0f}")
        console.print(t)
    name = "channel_probability"
    p = result.layers[name][0]
    share = float(np.nanmean(p[~result.dem.nodata] >= 0.5))
    console.print(f"channel in >= 50% of realisations: {share:.1%} of cells "
                  f"(drainage area >= {result.job.channel_area:g} m², {result.job.conditioning}, "
                  f"D{result.job.connectivity})")
    console.print(f"outputs in {outdir}")
    console.print(f"[italic]{caution}[/italic]")


def print_sensitivity(result, *, outdir, caution: str) -> None:
    """Per level and kernel pair: layer differences and the largest p_first difference."""
    from rich.console import Console
    from rich.table import Table

    sens = result.sensitivity
    console = Console(file=sys.stdout, width=120)
    if sens.empty:
        console.print(f"one kernel: no kernel sensitivity to report; outputs in {outdir}")
        console.print(f"[italic]{caution}[/italic]")
        return
    t = Table(title="Kernel sensitivity (equal RMSE)", title_justify="left")
    for col in ("rmse", "kernels", "layer max |Δ| ± se", "layer mean |Δ|", "noise floor",
                "max |Δ p_first| ± se (feature)"):
        t.add_column(col, justify="right")
    keys = list(dict.fromkeys(zip(sens["rmse"], sens["kernel_a"], sens["kernel_b"])))
    for key in keys:
        idx = [i for i, k in enumerate(zip(sens["rmse"], sens["kernel_a"], sens["kernel_b"]))
               if k == key]
        j = max(idx, key=lambda i: abs(sens["p_first_diff"][i]))
        i0 = idx[0]
        t.add_row(f"{key[0]:g}", f"{key[1]}–{key[2]}",
                  f"{sens['layer_max_abs_diff'][i0]:.3g} ± {sens['layer_max_abs_diff_se'][i0]:.2g}",
                  f"{sens['layer_mean_abs_diff'][i0]:.3g}", f"{sens['layer_noise_floor'][i0]:.2g}",
                  f"{abs(sens['p_first_diff'][j]):.3f} ± {sens['p_first_diff_se'][j]:.3f} "
                  f"(#{sens['feature_id'][j]})")
    console.print(t)
    console.print(f"outputs in {outdir}")
    console.print(f"[italic]{caution}[/italic]")
