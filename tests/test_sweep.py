"""`cairn sweep`: attribution across error levels and kernels, against exact values.

Sources: P(higher of two summits stays higher) = Phi(delta / (sigma sqrt 2)) for
independent normal errors (difference of two normals; normal CDF from
scipy.stats); for compact kernels the same probability by numerical
integration of the difference density (scipy.integrate.quad).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from terrain.dem import Dem
from terrain.jobs import CreditJob
from terrain.noise import ErrorModel
from terrain.sweep import sweep, sweep_models

from .conftest import exact_p_higher_first, write_tif

LEVELS = (0.125, 0.25, 0.5, 1.0)
DELTA = 0.25
N = 500


@pytest.fixture(scope="module")
def ridge_sweep():
    # two single-cell summits 50 and 50.25 joined by a ridge at 48: with a 5 m
    # cut-off only the highest summit is counted, so (count weights) its credit
    # share and its p_first are both P(it is the highest)
    z = np.zeros((15, 31), np.float32)
    z[7, 7:24] = 48.0
    z[7, 7], z[7, 23] = 50.0, 50.0 + DELTA
    dem = Dem.from_array(z, cellsize=10.0)
    s = CreditJob("peaks", threshold=5.0, weight="count", base=0.0)
    models = sweep_models(ErrorModel(rmse=1.0), LEVELS, ("gaussian", "triangular", "epanechnikov"))
    res = sweep(dem, s, models, realisations=N, seed=21, backend="serial")
    df = pd.DataFrame(res.rows)
    fid_high = int(res.job.regions.labels[7, 23])
    fid_low = int(res.job.regions.labels[7, 7])
    assert fid_high and fid_low and fid_high != fid_low
    return res, df, fid_high, fid_low


@pytest.mark.slow
@pytest.mark.parametrize("kernel", ["gaussian", "triangular", "epanechnikov"])
def test_p_first_follows_exact_probability_at_every_level(ridge_sweep, kernel):
    # the two summits compete alone while the ridge (2 m below them) lies at least
    # 4 error standard deviations lower; at RMSE 1 a ridge cell can hold the highest
    # point, and the flat ridge belongs (tie order) to the lower summit's region, so
    # p_first of the higher one can only fall below the two-summit probability
    _, df, high, _ = ridge_sweep
    for level in LEVELS:
        row = df[(df.kernel == kernel) & (df.rmse == level) & (df.feature_id == high)].iloc[0]
        want = exact_p_higher_first(kernel, level, DELTA)
        tol = 4 * math.sqrt(want * (1 - want) / N) + 1e-9
        if level <= 0.5:
            assert abs(row.p_first - want) <= tol, level
        else:
            assert 0.35 <= row.p_first <= want + tol, level


def test_credit_share_moves_monotonically_to_even_split(ridge_sweep):
    _, df, high, low = ridge_sweep
    g = df[(df.kernel == "gaussian")]
    hi = g[g.feature_id == high].sort_values("rmse")
    lo = g[g.feature_id == low].sort_values("rmse")
    share = hi.credit_share.to_numpy()
    se = hi.credit_share_se.to_numpy()
    assert np.all(np.diff(share) <= 3 * np.hypot(se[1:], se[:-1]))  # non-increasing within MC error
    assert share[0] > 0.85 and abs(share[-1] - 0.5) < 0.12
    np.testing.assert_allclose(hi.credit_share.to_numpy() + lo.credit_share.to_numpy(), 1.0,
                               atol=0.01)


@pytest.mark.slow
def test_kernel_difference_matches_exact_difference(ridge_sweep):
    res, _, high, _ = ridge_sweep
    sens = pd.DataFrame(res.sensitivity)
    for level in LEVELS:
        row = sens[(sens.rmse == level) & (sens.kernel_a == "gaussian")
                   & (sens.kernel_b == "triangular") & (sens.feature_id == high)].iloc[0]
        want = (exact_p_higher_first("gaussian", level, DELTA)
                - exact_p_higher_first("triangular", level, DELTA))
        # paired (common random numbers) standard error of the difference
        assert abs(row.p_first_diff - want) <= 4 * row.p_first_diff_se + 2e-3, level


def test_cli_sweep_writes_tables_and_plot(tmp_path, cairn):
    z = np.zeros((15, 31), np.float32)
    z[7, 7:24] = 48.0
    z[7, 7], z[7, 23] = 50.0, 50.5
    dem = write_tif(tmp_path / "two.tif", z, units="metre")
    code, out, err = cairn("sweep", dem, "-o", tmp_path / "sw", "--kind", "peaks",
                           "--rmse", "0.25,0.5,1", "--kernel", "gaussian,uniform", "-n", "20",
                           "--min-prominence", "5", "--workers", "1")
    assert code == 0, err
    df = pd.read_csv(tmp_path / "sw" / "sweep.csv")
    assert list(df.columns) == ["kernel", "rmse", "feature_id", "unperturbed", "x", "y",
                                "expected", "se", "p_above", "p_above_se", "p_first",
                                "p_first_se", "credit_share", "credit_share_se"]
    assert set(df.kernel) == {"gaussian", "uniform"} and set(df.rmse) == {0.25, 0.5, 1.0}
    ks = pd.read_csv(tmp_path / "sw" / "kernel_sensitivity.csv")
    assert set(ks.rmse) == {0.25, 0.5, 1.0} and (ks.kernel_a == "gaussian").all()
    assert (tmp_path / "sw" / "sweep.png").read_bytes()[:4] == b"\x89PNG"
    assert "Kernel sensitivity" in out
    code, _, err = cairn("sweep", dem, "-o", tmp_path / "x", "--kind", "peaks", "--rmse", "1,-2")
    assert code == 2 and "--rmse" in err


def test_every_row_carries_unperturbed(ridge_sweep):
    # the highest summit too: its figure on the DEM as given is its height above the
    # base, as summits.csv gives it (50.25 m above the base 0)
    res, df, high, low = ridge_sweep
    assert df["unperturbed"].notna().all()
    assert (df[df.feature_id == high]["unperturbed"] == 50.0 + DELTA).all()
    assert (df[df.feature_id == low]["unperturbed"] == 2.0).all()  # 50 over the 48 m ridge
    from terrain.summary.features import summarise_features

    run = res.runs[("gaussian", max(LEVELS))]  # both summits are rows here
    table = summarise_features(run).table.set_index("feature_id")["unperturbed"]
    assert {high, low} <= set(table.index)
    for fid in (high, low):
        np.testing.assert_allclose(df[df.feature_id == fid]["unperturbed"], table[fid])


def test_layer_differences_are_paired_by_realisation(ridge_sweep):
    # the paired standard error of a layer difference, against plain numpy: per
    # realisation, each cell's credit in one run minus in the other, then mean and s.e.
    from terrain.jobs.credit import log_weights, paired_difference

    res, *_ = ridge_sweep
    ra, rb = res.runs[("gaussian", 0.5)], res.runs[("triangular", 0.5)]
    n, shape = ra.n, ra.dem.shape
    per = np.zeros((n, shape[0] * shape[1]))
    for log, sign in ((ra.log, 1.0), (rb.log, -1.0)):
        np.add.at(per, (log["real"].astype(int), log["birth"].astype(int)),
                  sign * log_weights(log, ra.job.weight))
    mean, se = paired_difference(ra.log, rb.log, n, ra.job, shape[1], (0, shape[0], 0, shape[1]))
    np.testing.assert_allclose(mean.reshape(-1), per.mean(axis=0), atol=1e-12)
    np.testing.assert_allclose(se.reshape(-1), per.std(axis=0) / np.sqrt(n), atol=1e-12)
    row = pd.DataFrame(res.sensitivity)
    row = row[(row.rmse == 0.5) & (row.kernel_a == "gaussian") & (row.kernel_b == "triangular")]
    i = int(np.argmax(np.abs(per.mean(axis=0))))
    assert row.layer_max_abs_diff.iloc[0] == pytest.approx(abs(per.mean(axis=0)[i]))
    assert row.layer_max_abs_diff_se.iloc[0] == pytest.approx(per.std(axis=0)[i] / np.sqrt(n))
    # the noise floor: the mean |N(0, se)| = se sqrt(2/pi), averaged over cells
    floor = (per.std(axis=0) / np.sqrt(n)).mean() * np.sqrt(2 / np.pi)
    assert row.layer_noise_floor.iloc[0] == pytest.approx(floor)


def test_kernels_differ_under_correlated_error_and_an_empty_table_says_why(cairn, tmp_path):
    # the kernel sets the marginal of correlated error too (Gaussian copula), so two kernels
    # at equal RMSE no longer give identical runs; one kernel: the table is empty and the
    # console says why
    z = np.zeros((15, 31), np.float32)
    z[7, 7:24] = 48.0
    z[7, 7], z[7, 23] = 50.0, 50.0 + DELTA
    dem = Dem.from_array(z, cellsize=10.0)
    s = CreditJob("peaks", threshold=5.0, weight="count", base=0.0)
    models = sweep_models(ErrorModel(rmse=1.0, range_m=30.0, nugget=0.5), (0.5,),
                          ("gaussian", "uniform"))
    res = sweep(dem, s, models, realisations=60, seed=5, backend="serial")
    a, b = res.runs[("gaussian", 0.5)], res.runs[("uniform", 0.5)]
    assert not np.array_equal(a.log["birth_value"], b.log["birth_value"])
    assert len(res.sensitivity) and res.note is None
    path = write_tif(tmp_path / "two.tif", z, units="metre")
    code, out, err = cairn("sweep", path, "-o", tmp_path / "sw", "--kind", "peaks", "--rmse",
                           "0.5", "-n", "5", "--min-prominence", "5", "--workers", "1",
                           "--range", "30")
    assert code == 0, err
    assert "kernel sensitivity is empty: one kernel (gaussian)" in out and "--kernel" in out
    assert "kernel_sensitivity_note" in (tmp_path / "sw" / "run.json").read_text()
