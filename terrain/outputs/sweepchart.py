"""The figure of ``cairn sweep``: how attribution spreads as the assumed error grows.

Rendering only; the writer saves it (atomically, through :mod:`terrain.io`).
"""

from __future__ import annotations

import numpy as np

__all__ = ["sweep_figure", "SWEEP_STATISTICS"]

SWEEP_STATISTICS = (("credit_share", "credit_share_se", "share of total credit"),
                    ("p_first", "p_first_se", "P(ranks first)"))
_KERNEL_STYLE = (("o", "-"), ("s", "--"), ("^", "-."), ("D", ":"))


def sweep_figure(result, *, units: str):
    """One panel per statistic (credit share, P(ranks first)) against the error level.

    Each of the sweep's top features is a colour, each kernel a marker and
    line style; error bars are one standard error, and the kernels' points
    are set slightly apart along the (log) error axis so their bars do not
    hide each other. Legends sit outside the panels, beside the panel they
    explain, and the figure is laid out with matplotlib's constrained layout
    so nothing is cut off at one kernel or at four.

    Parameters
    ----------
    result : terrain.sweep.SweepResult
    units : str
        Vertical units of the error level (x axis).
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    rows = result.rows
    kernels = list(dict.fromkeys(rows["kernel"]))
    what = "summit" if result.job.kind == "peaks" else "depression"
    fig = Figure(figsize=(9.0, 7.4), dpi=110, layout="constrained")
    axes = fig.subplots(len(SWEEP_STATISTICS), 1, sharex=True)
    levels = sorted(set(rows["rmse"]))
    features, kernel_keys = _sweep_lines(axes, rows, result.top, kernels, what)
    for ax, (_, _, label) in zip(axes, SWEEP_STATISTICS):
        ax.set_ylabel(label, fontsize=10)
        ax.set_xscale("log")
        ax.set_xticks(levels, [f"{v:g}" for v in levels])
        ax.minorticks_off()
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=9)
    axes[-1].set_xlabel(f"assumed error RMSE ({units})", fontsize=10)
    axes[0].legend(handles=features, title=f"{what} feature", fontsize=9, title_fontsize=9,
                   loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
    axes[1].legend(handles=kernel_keys, title="error kernel", fontsize=9, title_fontsize=9,
                   loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
    fig.suptitle(f"How {what} attribution spreads as the assumed error grows\n"
                 "(error bars: 1 standard error)", fontsize=11)
    return fig


def _sweep_lines(axes, rows, top, kernels, what):
    """Draw every (feature, kernel) line on every statistic's panel; return legend handles."""
    import matplotlib
    from matplotlib.lines import Line2D

    colours = matplotlib.colormaps["tab10"]
    kern, fid = np.array(rows["kernel"]), np.array(rows["feature_id"])
    rmse = np.array(rows["rmse"], dtype=float)
    spread = 0.035 * (np.arange(len(kernels)) - (len(kernels) - 1) / 2)  # in natural-log units
    for j, kernel in enumerate(kernels):
        marker, style = _KERNEL_STYLE[j % len(_KERNEL_STYLE)]
        for n_f, f in enumerate(top):
            sel = (kern == kernel) & (fid == f)
            order = np.argsort(rmse[sel])
            x = rmse[sel][order] * np.exp(spread[j])
            for ax, (col, se, _) in zip(axes, SWEEP_STATISTICS):
                ax.errorbar(x, np.array(rows[col])[sel][order], yerr=np.array(rows[se])[sel][order],
                            marker=marker, ms=4, capsize=2, lw=1.2, ls=style,
                            color=colours(n_f % 10))
    features = [Line2D([], [], color=colours(n_f % 10), lw=2, label=f"{what} #{f}")
                for n_f, f in enumerate(top)]
    kernel_keys = [Line2D([], [], color="0.25", marker=m, ls=ls, lw=1.2, label=k)
                   for k, (m, ls) in zip(kernels, (_KERNEL_STYLE[j % len(_KERNEL_STYLE)]
                                                   for j in range(len(kernels))))]
    return features, kernel_keys
