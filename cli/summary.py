"""The tables printed at the end of a run."""

from __future__ import annotations

import sys

import numpy as np

__all__ = ["print_summary", "print_catchments", "print_sensitivity", "READING", "plus_minus",
           "SENSITIVITY_READING"]

READING = ("'on DEM' is the figure on the DEM as given; 'expected' and '5-95%' are the mean and "
           "spread over realisations (the uncertainty the DEM error causes); 'MC s.e.' is the "
           "Monte Carlo standard error of 'expected' (how precisely this run estimated it).")


def _console():
    from rich.console import Console

    return Console(file=sys.stdout, width=120)


def print_summary(table, *, kind: str, units: str, n: int, outdir, caution: str,
                  top: int = 10, settings: str = "") -> None:
    """The top features: DEM figure, expected figure with its 5-95% range,
    P(counted), P(first), edge-limited share and the Monte Carlo s.e. apart."""
    from rich.table import Table

    figure = "prominence" if kind == "peaks" else "depth"
    what = "summits" if kind == "peaks" else "depressions"
    t = Table(title=f"Top {what} by expected {figure}, {units} ({n} realisations)",
              title_justify="left")
    for col in ("rank", "id", "on DEM", "expected", "5-95%", "P(counted)", "P(first)",
                "edge-limited", "MC s.e."):
        t.add_column(col, justify="right", style="dim" if col == "MC s.e." else None)
    for _, r in table.head(top).iterrows():
        edge = r["edge_limited_share"]
        t.add_row(str(r["rank"]), str(r["feature_id"]), f"{r['unperturbed']:.2f}",
                  f"{r['expected']:.2f}", f"{r['p05']:.1f}-{r['p95']:.1f}",
                  f"{r['p_above']:.2f}", f"{r['p_first']:.2f}",
                  "-" if np.isnan(edge) else f"{edge:.0%}", f"{r['se']:.2f}")
    console = _console()
    if len(table) == 0:
        console.print(f"No {what} counted in enough realisations to be a feature.")
    else:
        console.print(t)
        console.print(READING, style="italic")
    console.print(f"{len(table)} features ({settings}); outputs in {outdir}" if settings
                  else f"{len(table)} features; outputs in {outdir}")
    console.print(caution, style="italic")


def print_catchments(summary, result, *, outdir, caution: str) -> None:
    """Per outlet and level: catchment and sub-catchment areas; where each outlet snapped."""
    from rich.table import Table

    from terrain.outlets import short
    from terrain.outputs.plot import area_text
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
                  f"(drainage area >= {area_text(result.job.channel_area)}, {result.job.conditioning}, "
                  f"D{result.job.connectivity})")
    console.print(f"outputs in {outdir}")
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
        console.print(f"{note or 'no kernel sensitivity to report'}; outputs in {outdir}")
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
    console.print(f"outputs in {outdir}")
    console.print(caution, style="italic")
