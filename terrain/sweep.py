"""Sensitivity of attribution to the assumed error level and to the kernel.

Every (kernel, RMSE) run uses the same seed and quantile draws (one uniform
per cell mapped through each kernel's inverse CDF, scaled to the level), so
runs differ only by the kernel's shape and scale: common random numbers
across levels and kernels make the curves smooth and the paired
differences precise. Features are defined once, from the union of the credit
regions of all runs, and followed across runs.

Kernel sensitivity is reported as measured differences (a bound of the form
||f||_inf ||K1 - K2||_1 holds for the joint kernel over all cells, whose L1
distance grows with the number of cells, so it says little here).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .credit import LAYERS, CreditSettings, log_weights
from .dem import Dem
from .ensemble import Attribution, run_ensemble
from .errors import OptionError
from .features import feature_figures, feature_table, find_features, first_indicator
from .noise import ErrorModel

__all__ = ["SWEEP_COLUMNS", "SENSITIVITY_COLUMNS", "SweepResult", "sweep"]

SWEEP_COLUMNS = ("kernel", "rmse", "feature_id", "x", "y", "expected", "se", "p_above", "p_first",
                 "p_first_se", "credit_share", "credit_share_se")
SENSITIVITY_COLUMNS = ("rmse", "kernel_a", "kernel_b", "layer_max_abs_diff", "layer_max_abs_diff_se",
                       "layer_mean_abs_diff", "layer_noise_floor", "feature_id", "expected_diff",
                       "expected_diff_se", "p_first_diff", "p_first_diff_se")


@dataclass
class SweepResult:
    """All runs of a sweep and the tables made from them."""

    runs: dict  # (kernel, rmse) -> Attribution
    labels: np.ndarray
    n_features: int
    rows: dict  # column -> list (SWEEP_COLUMNS)
    sensitivity: dict  # column -> list (SENSITIVITY_COLUMNS)
    top: list  # feature ids, largest first


def sweep(dem: Dem, settings: CreditSettings, *, rmses, kernels=("gaussian",), realisations=200,
          seed: int = 0, backend: str = "processes", workers: int | None = None,
          scheduler: str | None = None, top: int = 6, progress=None) -> SweepResult:
    """Run the attribution at every (kernel, RMSE) with common random numbers.

    Parameters
    ----------
    dem : Dem
    settings : CreditSettings
        Fixed across runs (in particular the threshold).
    rmses : sequence of float
        Error levels (DEM units).
    kernels : sequence of str
    realisations, seed, backend, workers, scheduler : as for :func:`run_ensemble`
    top : int
        Features followed in the kernel-sensitivity table and the plot.
    progress : callable(done, total), optional
        Called with realisations done over all runs.

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
       Analysis. Chapman & Hall (kernels).
    """
    rmses = [float(r) for r in rmses]
    if not rmses or any(not (np.isfinite(r) and r > 0) for r in rmses):
        raise OptionError("--rmse takes a comma-separated list of positive levels, e.g. 0.25,0.5,1,2")
    kernels = list(dict.fromkeys(kernels))
    runs: dict[tuple[str, float], Attribution] = {}
    total = len(rmses) * len(kernels) * realisations
    for j, (kernel, level) in enumerate(itertools.product(kernels, sorted(rmses))):
        s = CreditSettings(**{**settings.__dict__, "kernel": kernel})
        model = ErrorModel(rmse=1.0, kernel=kernel, draw="quantile")
        cb = (lambda d, t, j=j: progress(j * realisations + d, total)) if progress else None
        res = run_ensemble(dem, s, model, realisations=realisations, seed=seed, backend=backend,
                           workers=workers, scheduler=scheduler, scale=level, progress=cb)
        # keep what the tables need: 4 float64 arrays per cell per run
        res.layers = {n: res.layers[n] for n in LAYERS[settings.kind][:3] if n != LAYERS[settings.kind][1]}
        runs[(kernel, level)] = res
    kind = settings.kind
    main, prob = LAYERS[kind][0], LAYERS[kind][2]
    labels, k = _union_features(runs, main, prob, dem)
    rows = {c: [] for c in SWEEP_COLUMNS}
    per_run = {}
    for (kernel, level), res in runs.items():
        table = feature_table(dem, labels, k, res.layers[main][0], res.log, res.n,
                              base=settings.base)
        figs, present, _ = feature_figures(labels, k, res.log, res.n, base=settings.base)
        first = first_indicator(figs, present)
        share, share_se = _credit_shares(res, labels, k, settings)
        per_run[(kernel, level)] = (figs, first, table)
        n = max(res.n, 1)
        for f in range(k):
            p1 = table["p_first"][f]
            for col, v in (("kernel", kernel), ("rmse", level), ("feature_id", f + 1),
                           ("x", table["x"][f]), ("y", table["y"][f]),
                           ("expected", table["expected"][f]), ("se", table["se"][f]),
                           ("p_above", table["p_above"][f]), ("p_first", p1),
                           ("p_first_se", float(np.sqrt(p1 * (1 - p1) / n))),
                           ("credit_share", share[f]), ("credit_share_se", share_se[f])):
                rows[col].append(v)
    expected_max = np.zeros(k)
    for _figs, _, table in per_run.values():
        expected_max = np.maximum(expected_max, table["expected"])
    top_ids = [int(i) + 1 for i in np.argsort(-expected_max, kind="stable")[:top]]
    sens = _kernel_sensitivity(runs, per_run, kernels, sorted(rmses), top_ids, main)
    return SweepResult(runs, labels, k, rows, sens, top_ids)


def _union_features(runs, main, prob, dem) -> tuple[np.ndarray, int]:
    """Features from the union of every run's credit regions.

    A connected component of the union is split between the features of the
    run that resolves the most distinct features inside it (lowest error
    level on ties), each cell going to the nearest of them; so two summits
    that are distinct at some level and bridged at another stay two features.
    """
    eight = np.ones((3, 3), int)
    per_run = []
    union = np.zeros(dem.shape, bool)
    for key in sorted(runs, key=lambda kr: (kr[1], kr[0])):
        res = runs[key]
        lab, _ = find_features(res.layers[main][0], dem.nodata, probability=res.layers[prob][0])
        per_run.append(lab)
        union |= lab > 0
    comp, nc = ndimage.label(union, structure=eight)
    best_count = np.zeros(nc + 1, np.int64)
    best_run = np.zeros(nc + 1, np.int64)
    for r, lab in enumerate(per_run):
        on = lab > 0
        pairs = np.unique(np.stack([comp[on], lab[on]]), axis=1) if on.any() else np.zeros((2, 0), int)
        count = np.bincount(pairs[0], minlength=nc + 1)
        better = count > best_count
        best_count[better] = count[better]
        best_run[better] = r
    seeds = np.zeros(dem.shape, np.int64)
    next_id = 1
    for r, lab in enumerate(per_run):
        comps = np.flatnonzero((best_run == r) & (best_count > 1))
        if comps.size == 0:
            continue
        sel = np.isin(comp, comps) & (lab > 0)
        uniq, inv = np.unique(lab[sel], return_inverse=True)
        seeds[sel] = next_id + inv
        next_id += uniq.size
    if next_id > 1:
        _, (ir, ic) = ndimage.distance_transform_edt(seeds == 0, return_indices=True)
        nearest = seeds[ir, ic]
    else:
        nearest = np.zeros(dem.shape, np.int64)
    split = best_count[comp] > 1
    key = np.where(split, (nc + 1) + nearest, comp)
    key = np.where(union, key, 0)
    # renumber 1..k in raster order of each feature's first cell
    flat = key.reshape(-1)
    nz = np.flatnonzero(flat)
    _, first_pos = np.unique(flat[nz], return_index=True)
    order = np.argsort(first_pos, kind="stable")
    vals = np.unique(flat[nz])[order]
    lut = {int(v): i + 1 for i, v in enumerate(vals)}
    labels = np.zeros(flat.size, np.int32)
    labels[nz] = np.array([lut[int(v)] for v in flat[nz]], np.int32) if nz.size else labels[nz]
    return labels.reshape(dem.shape), len(vals)


def _credit_shares(res: Attribution, labels, k, settings) -> tuple[np.ndarray, np.ndarray]:
    """Each feature's share of the total birth credit, with a delta-method SE.

    Per realisation A_f = weights born in feature f, T = all weights;
    share = mean(A_f) / mean(T), var ~ (var A - 2 R cov(A, T) + R^2 var T) / (N mean(T)^2).
    """
    n = max(res.n, 1)
    log = res.log
    w = log_weights(log, settings.weight, settings.base)
    real = log["real"].astype(np.int64)
    fid = labels.reshape(-1)[log["birth"].astype(np.int64)] if w.size else np.zeros(0, np.int32)
    t = np.bincount(real, weights=w, minlength=n)[:n]
    a = np.zeros((n, k))
    inside = fid > 0
    np.add.at(a, (real[inside], fid[inside] - 1), w[inside])
    mt = t.mean()
    if not mt > 0:
        return np.zeros(k), np.zeros(k)
    ma = a.mean(axis=0)
    r = ma / mt
    va = a.var(axis=0)
    vt = t.var()
    cov = ((a - ma) * (t - mt)[:, None]).mean(axis=0)
    var = np.maximum(va - 2 * r * cov + r * r * vt, 0.0) / (n * mt * mt)
    return r, np.sqrt(var)


def _kernel_sensitivity(runs, per_run, kernels, rmses, top_ids, main) -> dict:
    out = {c: [] for c in SENSITIVITY_COLUMNS}
    for level in rmses:
        for ka, kb in itertools.combinations(kernels, 2):
            ra, rb = runs[(ka, level)], runs[(kb, level)]
            (ea, sa), (eb, sb) = ra.layers[main], rb.layers[main]
            d = np.abs(ea - eb)
            valid = ~ra.dem.nodata
            i = int(np.argmax(np.where(valid, d, -1)))
            se_pair = np.sqrt(sa ** 2 + sb ** 2)  # conservative: ignores the CRN correlation
            fa, firsta, _ = per_run[(ka, level)]
            fb, firstb, _ = per_run[(kb, level)]
            n = max(min(ra.n, rb.n), 1)
            for f in top_ids:
                dfig = fa[:n, f - 1] - fb[:n, f - 1]  # paired by realisation (common random numbers)
                dfirst = firsta[:n, f - 1].astype(float) - firstb[:n, f - 1]
                for col, v in (("rmse", level), ("kernel_a", ka), ("kernel_b", kb),
                               ("layer_max_abs_diff", float(d.reshape(-1)[i])),
                               ("layer_max_abs_diff_se", float(se_pair.reshape(-1)[i])),
                               ("layer_mean_abs_diff", float(d[valid].mean())),
                               ("layer_noise_floor", float(se_pair[valid].mean())),
                               ("feature_id", f), ("expected_diff", float(dfig.mean())),
                               ("expected_diff_se", float(dfig.std() / np.sqrt(n))),
                               ("p_first_diff", float(dfirst.mean())),
                               ("p_first_diff_se", float(dfirst.std() / np.sqrt(n)))):
                    out[col].append(v)
    return out


def sweep_figure(result: SweepResult, *, kind: str, units: str):
    """credit_share and p_first against the error level for the top features,
    one column of panels per kernel, error bars of one standard error."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    rows = result.rows
    kernels = list(dict.fromkeys(rows["kernel"]))
    fig = Figure(figsize=(4.2 * len(kernels) + 1.5, 7.2), dpi=110)
    axes = fig.subplots(2, len(kernels), squeeze=False, sharex=True, sharey="row")
    what = "summit" if kind == "peaks" else "depression"
    colours = matplotlib.colormaps["tab10"]
    kern = np.array(rows["kernel"])
    fid = np.array(rows["feature_id"])
    rmse = np.array(rows["rmse"])
    for j, kernel in enumerate(kernels):
        for n_f, f in enumerate(result.top):
            sel = (kern == kernel) & (fid == f)
            order = np.argsort(rmse[sel])
            x = rmse[sel][order]
            for i, (col, se) in enumerate((("credit_share", "credit_share_se"),
                                           ("p_first", "p_first_se"))):
                y = np.array(rows[col])[sel][order]
                e = np.array(rows[se])[sel][order]
                axes[i, j].errorbar(x, y, yerr=e, marker="o", ms=3, capsize=2, lw=1.2,
                                    color=colours(n_f % 10), label=f"{what} #{f}")
        axes[0, j].set_title(f"{kernel} kernel", fontsize=10)
        axes[1, j].set_xlabel(f"assumed error RMSE ({units})")
        levels = sorted(set(rows["rmse"]))
        for i in range(2):
            axes[i, j].set_xscale("log")
            axes[i, j].set_xticks(levels, [f"{v:g}" for v in levels])
            axes[i, j].minorticks_off()
            axes[i, j].grid(alpha=0.3)
    axes[0, 0].set_ylabel("share of total credit")
    axes[1, 0].set_ylabel("P(ranks first)")
    axes[0, -1].legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.02, 1.0))
    fig.suptitle(f"How {what} attribution spreads as the assumed error grows "
                 "(error bars: 1 standard error)", fontsize=11)
    fig.subplots_adjust(left=0.08, right=0.84, top=0.9, bottom=0.09, wspace=0.08, hspace=0.12)
    return fig
