"""The tables printed at the end of a run."""

from __future__ import annotations

import sys

import numpy as np

__all__ = ["print_summary", "print_catchments", "print_sensitivity", "READING", "plus_minus",
           "SENSITIVITY_READING"]

READING = ("'on DEM' is the figure on the DEM as given; 'expected' and '5-95%' are the mean and "
           "spread over realisations (the uncertainty the DEM error causes); 'MC s.e.' is the "
           "Monte Carlo standard error of 'expected' (how precisely this run estimated it). "
           "'median rank' is a rank realisations produced ('-': counted in fewer than half); "
           "'ranks held' gives the likeliest places 1-10 and how often each is held. A bracket "
           "joins a group: features that trade a rank or share a top or floor within the error. "
           "* bimodal: the figure falls into two clusters of outcomes (5-95% shows each), so its "
           "mean lies between them and no realisation produced it.")
ROWS = 20  # rows of the console table, at most (whole groups)


def _console():
    """The console the tables go to; text from users' files (outlet ids, folder names) is
    printed as it is, never read as rich markup or emoji codes (``[/x]`` would raise)."""
    from rich.console import Console

    return Console(file=sys.stdout, width=120, markup=False, emoji=False)


#: control characters (C0, DEL, C1) shown as U+FFFD: an id from a user's file never moves
#: the cursor, clears the screen or retitles the terminal
_CONTROLS = {c: "\ufffd" for c in [*range(32), *range(127, 160)]}


def _plain(text) -> str:
    return str(text).translate(_CONTROLS)


def _bracket(position: int, size: int) -> str:
    if size == 1:
        return ""
    return "┌" if position == 0 else "└" if position == size - 1 else "│"


def _held(share_row) -> str:
    """The likeliest ranks 1-10 a feature holds, at most two, as '2nd 80%'."""
    from terrain.summary.ranks import RANK_MASS, ordinal

    if share_row is None:
        return ""
    best = share_row[share_row >= RANK_MASS].sort_values(ascending=False, kind="stable").head(2)
    return ", ".join(f"{ordinal(int(k))} {_percent(p)}" for k, p in best.items())


def _percent(p: float) -> str:
    """A share as a percentage, as the figures write it (``share_text``)."""
    from terrain.outputs.plot import share_text

    return share_text(p)


def _spread(r, clusters) -> str:
    """5-95% over realisations; for a bimodal figure each cluster's 5-95%."""
    from terrain.outputs.plot import figure_text

    if not r["bimodal"] or clusters is None or r["feature_id"] not in clusters.index:
        return f"{r['p05']:.1f}-{r['p95']:.1f}"
    c = clusters.loc[r["feature_id"]]

    def one(lo, hi):  # three significant digits: two clusters are far apart
        a, b = figure_text(lo), figure_text(hi)
        return a if a == b else f"{a}-{b}"

    return f"{one(c['low_p05'], c['low_p95'])} | {one(c['high_p05'], c['high_p95'])}"


def print_summary(table, *, kind: str, units: str, n: int, outdir, caution: str,
                  share=None, clusters=None, top: int = ROWS, settings: str = "") -> None:
    """The features that rank 1st-10th in at least 1% of realisations, by median
    rank then expected figure, a group's members together under one bracket:
    DEM figure, median rank, likeliest ranks held, P(rank <= 3), expected figure
    (* bimodal) with its 5-95% range (per cluster where bimodal), P(counted),
    edge-limited share and the Monte Carlo s.e. apart."""
    from rich.table import Table

    from terrain.summary.ranks import RANK_MASS, ranked_rows

    figure = "prominence" if kind == "peaks" else "depth"
    what = "summits" if kind == "peaks" else "depressions"
    rows, left = ranked_rows(table, share, top)
    t = Table(title=f"{what.capitalize()} ranking 1st-10th in at least {RANK_MASS:.0%} of "
                    f"realisations, by median rank; {figure} in {units} ({n} realisations)",
              title_justify="left", show_edge=False)
    for col in ("", "id", "on DEM", "median\nrank", "ranks held", "P(top 3)", "expected",
                "5-95%", "P(counted)", "edge-\nlimited", "MC\ns.e."):
        t.add_column(col, justify="left" if col in ("", "ranks held") else "right",
                     style="dim" if col == "MC\ns.e." else None,
                     no_wrap=col in ("5-95%", "ranks held"))
    for _, g in rows.groupby("group", sort=False):
        for i, (_, r) in enumerate(g.iterrows()):
            edge, med = r["edge_limited_share"], r["median_rank"]
            t.add_row(_bracket(i, len(g)), f"#{r['feature_id']}", f"{r['unperturbed']:.2f}",
                      "-" if med is None or med is np.nan or str(med) == "<NA>" else str(med),
                      _held(share.loc[r["feature_id"]] if share is not None else None),
                      f"{r['p_top3']:.2f}", f"{r['expected']:.2f}" + ("*" if r["bimodal"] else ""),
                      _spread(r, clusters), f"{r['p_above']:.2f}",
                      "-" if np.isnan(edge) else f"{edge:.0%}", f"{r['se']:.2f}")
    console = _console()
    if len(table) == 0:
        console.print(f"No {what} counted in enough realisations to be a feature.")
    else:
        console.print(t)
        if left:
            console.print(f"{left} more features rank 1st-10th in at least {RANK_MASS:.0%} of "
                          "realisations; see ranks.csv.")
        console.print(READING, style="italic")
    console.print(f"{len(table)} features ({settings}); outputs in {_plain(outdir)}" if settings
                  else f"{len(table)} features; outputs in {_plain(outdir)}")
    console.print(caution, style="italic")


def print_catchments(summary, result, *, outdir, caution: str) -> None:
    """Per outlet and level: catchment and sub-catchment areas; where each outlet snapped."""
    from rich.table import Table

    from terrain.outlets import short
    from terrain.outputs.style import area_text
    from terrain.summary.catchments import LEVELS

    console = _console()
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
            t.add_row(short(_plain(c["outlet_id"][i]), 24), f"{c['level'][i]:.0%}",
                      ("≥ " if c["edge_limited"][i] else "") + f"{c['area_m2'][i] / 1e6:.3f}",
                      f"{c['area_mean_m2'][i] / 1e6:.3f} ({c['area_p05_m2'][i] / 1e6:.3f}–"
                      f"{c['area_p95_m2'][i] / 1e6:.3f})", f"{sc['area_m2'][i] / 1e6:.3f}",
                      f"{o['snapped_share'][k]:.0%}", f"{o['snap_distance_mean_m'][k]:.0f}")
        console.print(t)
    name = "channel_probability"
    p = result.layers[name][0]
    share = float(np.nanmean(p[~result.dem.nodata] >= 0.5))
    console.print(f"channel in >= 50% of realisations: {share:.1%} of cells "
                  f"(drainage area >= {area_text(result.job.channel_area)}, {result.job.conditioning}, "
                  f"D{result.job.connectivity})")
    if frames and frames["catchments"]["edge_limited"].any():
        console.print("≥: the catchment reaches the raster's edge or nodata; its area is a lower "
                      "bound")
    console.print(f"outputs in {_plain(outdir)}")
    console.print(caution, style="italic")


SENSITIVITY_READING = (
    "Differences are paired by realisation (common random numbers), so '± se' is the Monte "
    "Carlo standard error of the difference itself. 'layer max |Δ|': the largest difference of "
    "the two expected {credit} layers over cells ({unit} per cell); 'layer mean |Δ|': its mean "
    "over cells; 'noise floor': the mean |Δ| Monte Carlo noise alone would give -- a mean near "
    "it means the kernels cannot be told apart with this many realisations.")


def plus_minus(value: float, se: float) -> str:
    """``value ± se`` with the standard error to two significant digits and the value
    to the same decimal place (honest precision: ``0.017 ± 0.0031`` -> ``0.0174 ± 0.0031``)."""
    if not (np.isfinite(value) and np.isfinite(se)):
        return f"{value:.3g} ± {se:.2g}"
    if se <= 0:
        return f"{value:.3g} ± 0"
    places = max(0, 1 - int(np.floor(np.log10(se))))
    return f"{value:.{places}f} ± {se:.{places}f}"


def print_sensitivity(result, *, outdir, caution: str, note: str | None = None,
                      unit: str = "") -> None:
    """Per level and kernel pair: layer differences and the largest p_first difference;
    ``note`` says why the table is empty when it is."""
    from rich.table import Table

    sens = result.sensitivity
    console = _console()
    if sens.empty:
        console.print(f"{note or 'no kernel sensitivity to report'}; outputs in {_plain(outdir)}")
        console.print(caution, style="italic")
        return
    t = Table(title="Kernel sensitivity (equal RMSE)", title_justify="left")
    for col in ("rmse", "kernels", "layer max |Δ| ± se", "layer mean |Δ|", "noise floor",
                "max |Δ p_first| ± se (feature)"):
        t.add_column(col, justify="right")
    for (rmse, ka, kb), g in sens.groupby(["rmse", "kernel_a", "kernel_b"], sort=False):
        j = g["p_first_diff"].abs().idxmax()
        i0 = g.index[0]
        floor = sens["layer_noise_floor"][i0]
        t.add_row(f"{rmse:.3g} {unit}".strip(), f"{ka}–{kb}",
                  plus_minus(sens["layer_max_abs_diff"][i0], sens["layer_max_abs_diff_se"][i0]),
                  f"{sens['layer_mean_abs_diff'][i0]:.2g}", f"{floor:.2g}",
                  f"{plus_minus(abs(sens['p_first_diff'][j]), sens['p_first_diff_se'][j])} "
                  f"(#{sens['feature_id'][j]})")
    console.print(t)
    credit = "summit" if result.job.kind == "peaks" else "pit"
    console.print(SENSITIVITY_READING.format(credit=f"{credit} credit", unit=unit or "DEM units"),
                  style="italic")
    console.print(f"outputs in {_plain(outdir)}")
    console.print(caution, style="italic")
