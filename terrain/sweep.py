"""Sensitivity of attribution to the assumed error level and to the kernel.

Every (kernel, RMSE) run uses the same seed and quantile draws (one uniform
per cell mapped through each kernel's inverse CDF, scaled to the level), so
runs differ only by the kernel's shape and scale: common random numbers
across levels and kernels make the curves smooth and the paired
differences precise. Every run shares one set of feature regions (the
unperturbed DEM's, at the merge level of the smallest RMSE), so a feature
resolvable at some level has its row at every level, and the sweep shows
credit spreading between features as the error grows; kernel differences
are not artefacts of splitting.

Kernel sensitivity is reported as measured differences (a bound of the form
||f||_inf ||K1 - K2||_1 holds for the joint kernel over all cells, whose L1
distance grows with the number of cells, so it says little here). Under
spatially correlated error every kernel reshapes the same Gaussian field
(:mod:`terrain.noise.model`: a Gaussian copula), so kernels differ there
too, and their runs are paired as closely as under independent error.

Every difference between two runs is paired by realisation: realisation
``i`` of one kernel and realisation ``i`` of the other come from the same
random numbers, so the standard error of a difference is that of the
per-realisation differences (:func:`terrain.jobs.credit.paired_difference`),
much smaller than the two runs' own standard errors combined. The
``layer_*`` columns describe the birth credit layer (summit or pit credit,
in the DEM's vertical unit per cell): ``layer_max_abs_diff`` is the largest
absolute difference of the two expected layers over cells, with the paired
standard error at that cell; ``layer_mean_abs_diff`` the mean absolute
difference over valid cells; ``layer_noise_floor`` the mean absolute
difference Monte Carlo noise alone would give (the mean over cells of the
paired standard error times sqrt(2/pi), the mean of |N(0, se)|), so a mean
difference near the floor says the kernels cannot be told apart with this
many realisations.
"""

from __future__ import annotations

import dataclasses
import itertools
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from . import defaults
from .dem import Dem
from .errors import CairnWarning, OptionError
from .io import CHECKPOINT_SUFFIX
from .jobs.credit import CreditJob, paired_difference
from .layers import layer_name
from .noise import ErrorModel
from .pairlog import log_weights
from .runner import RunResult, run_ensemble
from .summary.features import FigureMatrix, figure_matrix, unperturbed_figures

__all__ = ["SWEEP_COLUMNS", "SENSITIVITY_COLUMNS", "SWEEP_COLUMN_KINDS", "SENSITIVITY_COLUMN_KINDS",
           "SweepResult", "sweep", "sweep_models", "run_checkpoint"]

SWEEP_COLUMNS = ("kernel", "rmse", "feature_id", "unperturbed", "x", "y", "expected", "se",
                 "p_above", "p_above_se", "p_first", "p_first_se", "credit_share", "credit_share_se")
SENSITIVITY_COLUMNS = ("rmse", "kernel_a", "kernel_b", "layer_max_abs_diff", "layer_max_abs_diff_se",
                       "layer_mean_abs_diff", "layer_noise_floor", "feature_id", "expected_diff",
                       "expected_diff_se", "p_first_diff", "p_first_diff_se")
#: What each column is (decides its precision in CSV, see :mod:`terrain.outputs.tables`);
#: credit shares are probabilities' kin (shares of the total), the layer differences are
#: per-cell credit (their means over the raster's cells, mostly zeros, kept to 8 decimals).
SWEEP_COLUMN_KINDS = {"kernel": "text", "rmse": "parameter", "feature_id": "id",
                      "unperturbed": "vertical", "x": "coordinate", "y": "coordinate",
                      "expected": "vertical", "se": "vertical", "p_above": "probability",
                      "p_above_se": "probability", "p_first": "probability",
                      "p_first_se": "probability", "credit_share": "probability",
                      "credit_share_se": "probability"}
SENSITIVITY_COLUMN_KINDS = {"rmse": "parameter", "kernel_a": "text", "kernel_b": "text",
                            "layer_max_abs_diff": "credit", "layer_max_abs_diff_se": "credit",
                            "layer_mean_abs_diff": "cell_mean", "layer_noise_floor": "cell_mean",
                            "feature_id": "id", "expected_diff": "vertical",
                            "expected_diff_se": "vertical", "p_first_diff": "probability",
                            "p_first_diff_se": "probability"}


@dataclass(frozen=True)
class SweepResult:
    """All runs of a sweep and the tables made from them."""

    runs: dict  # (kernel, rmse) -> RunResult
    job: CreditJob  # resolved: one cut-off and one set of regions for every run
    ids: np.ndarray  # feature (region) ids with a row
    rows: pd.DataFrame  # SWEEP_COLUMNS
    sensitivity: pd.DataFrame  # SENSITIVITY_COLUMNS
    top: list  # feature ids, largest expected figure first
    defaults: dict
    note: CairnWarning | None = None  # why the kernel-sensitivity table is empty, if it is

    @property
    def row_kinds(self) -> dict:
        """The kind of each column of ``rows`` (CSV precision, terrain.outputs.tables)."""
        return SWEEP_COLUMN_KINDS

    @property
    def sensitivity_kinds(self) -> dict:
        """The kind of each column of ``sensitivity``."""
        return SENSITIVITY_COLUMN_KINDS


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
    return p.with_name(f"{p.stem}.{model.kernel}-{model.rmse:g}{p.suffix or CHECKPOINT_SUFFIX}")


def sweep(dem: Dem, job: CreditJob, models, *, realisations: int = 200, seed: int = 0,
          top: int = 6, progress=None, checkpoint: str | os.PathLike | None = None,
          **run_kw) -> SweepResult:
    """Run the attribution under every error model with common random numbers.

    Parameters
    ----------
    dem : Dem
    job : CreditJob
        Fixed across runs; a default cut-off is 3 x the largest RMSE and the
        default merge level min(2 x the smallest RMSE, cut-off).
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
    job = _shared_job(dem, job, models)
    main = layer_name(job.kind, "birth_credit")
    runs: dict[tuple[str, float], RunResult] = {}
    total = len(models) * realisations
    for j, model in enumerate(models):
        cb = (lambda d, t, j=j: progress(j * realisations + d, total)) if progress else None
        res = run_ensemble(dem, job, model, realisations=realisations, seed=seed, progress=cb,
                           checkpoint=run_checkpoint(checkpoint, model), **run_kw)
        # keep what the tables need: 2 float64 arrays per cell per run
        runs[(model.kernel, model.rmse)] = dataclasses.replace(res, layers={main: res.layers[main]})
    fms = {key: figure_matrix(r.log, r.n) for key, r in runs.items()}
    ids = _row_ids(fms, job.min_presence)
    rows, expected_max = _sweep_rows(runs, fms, job, ids)
    top_ids = [int(i) for i in ids[np.argsort(-expected_max, kind="stable")[:top]]]
    kernels = list(dict.fromkeys(m.kernel for m in models))
    levels = sorted({m.rmse for m in models})
    sens = _kernel_sensitivity(runs, fms, kernels, levels, top_ids, main)
    return SweepResult(runs, job, ids, rows, sens, top_ids, job.defaults_used(),
                       _empty_note(kernels, top_ids, job))


def _empty_note(kernels, top_ids, job) -> CairnWarning | None:
    """Why the kernel-sensitivity table has no rows (None when it has some)."""
    if len(kernels) < 2:
        return CairnWarning(f"kernel sensitivity is empty: one kernel ({kernels[0]}) was run, so "
                            "there is nothing to compare; give two or more {kernel} names to "
                            "compare kernels at equal RMSE", "kernel")
    if not top_ids:
        return CairnWarning(f"kernel sensitivity is empty: no feature was counted in at least "
                            f"{job.min_presence:.0%} of realisations of any run (lower the "
                            "{threshold} or {min_presence})", "threshold", "min_presence")
    return None


def _shared_job(dem: Dem, job: CreditJob, models) -> CreditJob:
    """The job every run shares: cut-off from the largest RMSE, regions from the smallest."""
    thr = defaults.cutoff(job.threshold, max(m.rmse for m in models))
    merge = defaults.merge_level(job.merge_level, min(m.rmse for m in models), thr)
    used = tuple(n for n, v in (("threshold", job.threshold), ("merge_level", job.merge_level))
                 if v is None)
    fixed = dataclasses.replace(job, threshold=thr, merge_level=merge,
                                from_defaults=job.from_defaults + used)
    return fixed.resolved(dem, min(models, key=lambda m: m.rmse))


def _row_ids(fms: dict, min_presence: float) -> np.ndarray:
    """Regions counted in at least ``min_presence`` of realisations in some run."""
    keep = [fm.ids[fm.present.mean(axis=0) >= min_presence] for fm in fms.values()
            if fm.present.shape[0]]
    return np.unique(np.concatenate(keep)).astype(np.int64) if keep else np.zeros(0, np.int64)


def _columns_of(fm: FigureMatrix, ids: np.ndarray) -> FigureMatrix:
    """The figure matrix restricted (and padded with absent columns) to ``ids``."""
    n = fm.figure.shape[0]
    out = [np.zeros((n, ids.size)), np.zeros((n, ids.size), bool), np.zeros((n, ids.size), bool)]
    if fm.ids.size:
        pos = np.minimum(np.searchsorted(fm.ids, ids), fm.ids.size - 1)
        has = fm.ids[pos] == ids
        for dst, src in zip(out, (fm.figure, fm.present, fm.edge)):
            dst[:, has] = src[:, pos[has]]
    return FigureMatrix(ids, *out)


def _firsts(fm: FigureMatrix, ids: np.ndarray) -> np.ndarray:
    """(n_real, len(ids)) bool: the region ranks first among all regions."""
    first = fm.first()
    return _columns_of(FigureMatrix(fm.ids, first.astype(float), first, first), ids).present


def _sweep_rows(runs, fms, job, ids):
    reg = job.regions
    dem = next(iter(runs.values())).dem
    ux, uy = dem.xy(reg.birth[ids - 1])
    unperturbed = unperturbed_figures(dem, job, ids)  # as summits.csv / pits.csv give it
    rows = {c: [] for c in SWEEP_COLUMNS}
    expected_max = np.zeros(ids.size)
    for (kernel, level), res in runs.items():
        fm = _columns_of(fms[(kernel, level)], ids)
        n = max(res.n, 1)
        p1 = _firsts(fms[(kernel, level)], ids).sum(axis=0) / n
        pa = fm.present.sum(axis=0) / n
        exp = fm.figure.sum(axis=0) / n
        expected_max = np.maximum(expected_max, exp)
        share, share_se = _credit_shares(res, ids, job)
        block = {"kernel": [kernel] * ids.size, "rmse": [level] * ids.size, "feature_id": ids,
                 "unperturbed": unperturbed, "x": ux, "y": uy, "expected": exp,
                 "se": fm.figure.std(axis=0) / np.sqrt(n) if res.n else np.zeros(ids.size),
                 "p_above": pa, "p_above_se": np.sqrt(pa * (1 - pa) / n), "p_first": p1,
                 "p_first_se": np.sqrt(p1 * (1 - p1) / n), "credit_share": share,
                 "credit_share_se": share_se}
        for col in SWEEP_COLUMNS:
            rows[col].extend(np.asarray(block[col]).tolist())
    return pd.DataFrame(rows, columns=list(SWEEP_COLUMNS)), expected_max


def _credit_shares(res: RunResult, ids: np.ndarray, job) -> tuple[np.ndarray, np.ndarray]:
    """Each feature's share of the total birth credit, with a delta-method SE.

    Per realisation A_f = weights born in feature f, T = all weights;
    share = mean(A_f) / mean(T), var ~ (var A - 2 R cov(A, T) + R^2 var T) / (N mean(T)^2).
    """
    n = max(res.n, 1)
    log = res.log
    w = log_weights(log, job.weight)
    real = log["real"].astype(np.int64)
    t = np.bincount(real, weights=w, minlength=n)[:n]
    a = np.zeros((n, ids.size))
    if ids.size:
        col = np.minimum(np.searchsorted(ids, log["region"]), ids.size - 1)
        inside = ids[col] == log["region"]
        np.add.at(a, (real[inside], col[inside]), w[inside])
    mt = t.mean()
    if not mt > 0:
        return np.zeros(ids.size), np.zeros(ids.size)
    ma = a.mean(axis=0)
    r = ma / mt
    cov = ((a - ma) * (t - mt)[:, None]).mean(axis=0)
    var = np.maximum(a.var(axis=0) - 2 * r * cov + r * r * t.var(), 0.0) / (n * mt * mt)
    return r, np.sqrt(var)


def _pair_rows(level, ka, kb, ra, rb, fms, top_ids, main):
    n = max(min(ra.n, rb.n), 1)
    shape = ra.dem.shape
    diff, se_pair = paired_difference(ra.log, rb.log, n, ra.job, shape[1],
                                      (0, shape[0], 0, shape[1]))
    d = np.abs(diff)
    valid = ~ra.dem.nodata
    i = int(np.argmax(np.where(valid, d, -1)))
    floor = se_pair * np.sqrt(2 / np.pi)  # the mean |difference| of noise alone, per cell
    ids = np.asarray(top_ids, np.int64)
    fa, fb = _columns_of(fms[(ka, level)], ids), _columns_of(fms[(kb, level)], ids)
    first_a, first_b = _firsts(fms[(ka, level)], ids), _firsts(fms[(kb, level)], ids)
    for j, f in enumerate(top_ids):
        dfig = fa.figure[:n, j] - fb.figure[:n, j]  # paired by realisation (common random numbers)
        dfirst = first_a[:n, j].astype(float) - first_b[:n, j]
        yield (level, ka, kb, float(d.reshape(-1)[i]), float(se_pair.reshape(-1)[i]),
               float(d[valid].mean()), float(floor[valid].mean()), f, float(dfig.mean()),
               float(dfig.std() / np.sqrt(n)), float(dfirst.mean()),
               float(dfirst.std() / np.sqrt(n)))


def _kernel_sensitivity(runs, fms, kernels, levels, top_ids, main) -> pd.DataFrame:
    rows = [row for level in levels for ka, kb in itertools.combinations(kernels, 2)
            for row in _pair_rows(level, ka, kb, runs[(ka, level)], runs[(kb, level)], fms,
                                  top_ids, main)]
    return pd.DataFrame(rows, columns=list(SENSITIVITY_COLUMNS))
