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

import dataclasses
import itertools
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import ndimage

from . import defaults
from .dem import Dem
from .errors import OptionError
from .jobs.credit import CreditJob, log_weights
from .layers import layer_name
from .noise import ErrorModel
from .runner import RunResult, run_ensemble
from .summary.features import feature_figures, feature_table, find_features, first_indicator

__all__ = ["SWEEP_COLUMNS", "SENSITIVITY_COLUMNS", "SweepResult", "sweep", "sweep_models",
           "run_checkpoint"]

SWEEP_COLUMNS = ("kernel", "rmse", "feature_id", "x", "y", "expected", "se", "p_above", "p_first",
                 "p_first_se", "credit_share", "credit_share_se")
SENSITIVITY_COLUMNS = ("rmse", "kernel_a", "kernel_b", "layer_max_abs_diff", "layer_max_abs_diff_se",
                       "layer_mean_abs_diff", "layer_noise_floor", "feature_id", "expected_diff",
                       "expected_diff_se", "p_first_diff", "p_first_diff_se")


@dataclass(frozen=True)
class SweepResult:
    """All runs of a sweep and the tables made from them."""

    runs: dict  # (kernel, rmse) -> RunResult
    job: CreditJob  # resolved (one threshold for every run)
    labels: np.ndarray
    n_features: int
    rows: pd.DataFrame  # SWEEP_COLUMNS
    sensitivity: pd.DataFrame  # SENSITIVITY_COLUMNS
    top: list  # feature ids, largest first
    defaults: dict


def sweep_models(template: ErrorModel, rmses, kernels) -> list[ErrorModel]:
    """One model per (kernel, RMSE), drawn by quantile (common random numbers)."""
    rmses = [float(r) for r in rmses]
    if not rmses:
        raise OptionError("{rmse} needs at least one level", "rmse")
    kernels = list(dict.fromkeys(kernels))
    return [dataclasses.replace(template, rmse=level, kernel=k, draw="quantile")
            for k, level in itertools.product(kernels, sorted(set(rmses)))]


def run_checkpoint(checkpoint: str | os.PathLike | None, model: ErrorModel) -> Path | None:
    """The checkpoint of one sweep run, beside the sweep's: ``ck.<kernel>-<rmse>.npz``."""
    if checkpoint is None:
        return None
    p = Path(checkpoint)
    return p.with_name(f"{p.stem}.{model.kernel}-{model.rmse:g}{p.suffix or '.npz'}")


def sweep(dem: Dem, job: CreditJob, models, *, realisations: int = 200, seed: int = 0,
          top: int = 6, progress=None, checkpoint: str | os.PathLike | None = None,
          **run_kw) -> SweepResult:
    """Run the attribution under every error model with common random numbers.

    Parameters
    ----------
    dem : Dem
    job : CreditJob
        Fixed across runs; a default threshold is 3 x the largest RMSE.
    models : sequence of ErrorModel
        Usually :func:`sweep_models` (every kernel at every level).
    realisations, seed : as for :func:`terrain.runner.run_ensemble`
    top : int
        Features followed in the kernel-sensitivity table and the plot.
    progress : callable(done, total), optional
        Called with realisations done over all runs.
    checkpoint : path, optional
        Each run checkpoints beside it (see :func:`run_checkpoint`).
    **run_kw
        Further options of :func:`terrain.runner.run_ensemble` (backend,
        workers, scheduler, resume, target_se, ...).

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
       Analysis. Chapman & Hall (kernels).
    """
    models = list(models)
    if not models:
        raise OptionError("{rmse} needs at least one level", "rmse")
    used = {"threshold": defaults.RULES["threshold"]} if job.threshold is None else {}
    job = dataclasses.replace(job, threshold=defaults.cutoff(job.threshold,
                                                             max(m.rmse for m in models)))
    runs: dict[tuple[str, float], RunResult] = {}
    total = len(models) * realisations
    for j, model in enumerate(models):
        cb = (lambda d, t, j=j: progress(j * realisations + d, total)) if progress else None
        res = run_ensemble(dem, job, model, realisations=realisations, seed=seed, progress=cb,
                           checkpoint=run_checkpoint(checkpoint, model), **run_kw)
        # keep what the tables need: 4 float64 arrays per cell per run
        keep = (layer_name(job.kind, "birth_credit"), layer_name(job.kind, "birth_probability"))
        runs[(model.kernel, model.rmse)] = dataclasses.replace(
            res, layers={n: res.layers[n] for n in keep})
    job = next(iter(runs.values())).job
    labels, k = _union_features(runs, job, dem)
    rows, per_run = _sweep_rows(runs, job, labels, k)
    expected_max = np.zeros(k)
    for _figs, _, table in per_run.values():
        expected_max = np.maximum(expected_max, table["expected"].to_numpy())
    top_ids = [int(i) + 1 for i in np.argsort(-expected_max, kind="stable")[:top]]
    kernels = list(dict.fromkeys(m.kernel for m in models))
    levels = sorted({m.rmse for m in models})
    sens = _kernel_sensitivity(runs, per_run, kernels, levels, top_ids,
                               layer_name(job.kind, "birth_credit"))
    return SweepResult(runs, job, labels, k, rows, sens, top_ids, used)


def _sweep_rows(runs, job, labels, k):
    main = layer_name(job.kind, "birth_credit")
    rows = {c: [] for c in SWEEP_COLUMNS}
    per_run = {}
    for (kernel, level), res in runs.items():
        table = feature_table(res.dem, labels, k, res.layers[main][0], res.log, res.n, base=job.base)
        figs, present, _ = feature_figures(labels, k, res.log, res.n, base=job.base)
        first = first_indicator(figs, present)
        share, share_se = _credit_shares(res, labels, k, job)
        per_run[(kernel, level)] = (figs, first, table)
        n = max(res.n, 1)
        p1 = table["p_first"].to_numpy()
        block = {"kernel": [kernel] * k, "rmse": [level] * k, "feature_id": np.arange(1, k + 1),
                 "x": table["x"], "y": table["y"], "expected": table["expected"],
                 "se": table["se"], "p_above": table["p_above"], "p_first": p1,
                 "p_first_se": np.sqrt(p1 * (1 - p1) / n), "credit_share": share,
                 "credit_share_se": share_se}
        for col in SWEEP_COLUMNS:
            rows[col].extend(np.asarray(block[col]).tolist())
    return pd.DataFrame(rows, columns=list(SWEEP_COLUMNS)), per_run


def _union_features(runs, job, dem) -> tuple[np.ndarray, int]:
    """Features from the union of every run's credit regions.

    A connected component of the union is split between the features of the
    run that resolves the most distinct features inside it (lowest error
    level on ties), each cell going to the nearest of them; so two summits
    that are distinct at some level and bridged at another stay two features.
    """
    main = layer_name(job.kind, "birth_credit")
    prob = layer_name(job.kind, "birth_probability")
    structure = np.ones((3, 3), int) if job.connectivity == 8 else None
    per_run = []
    union = np.zeros(dem.shape, bool)
    for key in sorted(runs, key=lambda kr: (kr[1], kr[0])):
        res = runs[key]
        lab, _ = find_features(res.layers[main][0], dem.nodata, probability=res.layers[prob][0],
                               connectivity=job.connectivity)
        per_run.append(lab)
        union |= lab > 0
    comp, nc = ndimage.label(union, structure=structure)
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
    return _renumber(key)


def _renumber(key: np.ndarray) -> tuple[np.ndarray, int]:
    """Labels 1..k in raster order of each key's first cell (0 stays 0)."""
    flat = key.reshape(-1)
    nz = np.flatnonzero(flat)
    vals, first_pos = np.unique(flat[nz], return_index=True)
    vals = vals[np.argsort(first_pos, kind="stable")]
    lut = {int(v): i + 1 for i, v in enumerate(vals)}
    labels = np.zeros(flat.size, np.int32)
    if nz.size:
        labels[nz] = np.array([lut[int(v)] for v in flat[nz]], np.int32)
    return labels.reshape(key.shape), len(vals)


def _credit_shares(res: RunResult, labels, k, job) -> tuple[np.ndarray, np.ndarray]:
    """Each feature's share of the total birth credit, with a delta-method SE.

    Per realisation A_f = weights born in feature f, T = all weights;
    share = mean(A_f) / mean(T), var ~ (var A - 2 R cov(A, T) + R^2 var T) / (N mean(T)^2).
    """
    n = max(res.n, 1)
    log = res.log
    w = log_weights(log, job.weight, job.base)
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
    cov = ((a - ma) * (t - mt)[:, None]).mean(axis=0)
    var = np.maximum(a.var(axis=0) - 2 * r * cov + r * r * t.var(), 0.0) / (n * mt * mt)
    return r, np.sqrt(var)


def _pair_rows(level, ka, kb, ra, rb, per_run, top_ids, main):
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
        yield (level, ka, kb, float(d.reshape(-1)[i]), float(se_pair.reshape(-1)[i]),
               float(d[valid].mean()), float(se_pair[valid].mean()), f, float(dfig.mean()),
               float(dfig.std() / np.sqrt(n)), float(dfirst.mean()),
               float(dfirst.std() / np.sqrt(n)))


def _kernel_sensitivity(runs, per_run, kernels, levels, top_ids, main) -> pd.DataFrame:
    rows = [row for level in levels for ka, kb in itertools.combinations(kernels, 2)
            for row in _pair_rows(level, ka, kb, runs[(ka, level)], runs[(kb, level)], per_run,
                                  top_ids, main)]
    return pd.DataFrame(rows, columns=list(SENSITIVITY_COLUMNS))
