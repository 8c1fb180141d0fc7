"""Perturb-and-average attribution checked against exact values.

Sources: the normal CDF for two competing summits, P(higher stays higher) =
Phi(delta / (sigma sqrt 2)) (difference of two independent normals); for
compact kernels the same probability by numerical integration of the
difference density (scipy.integrate.quad); Hoelder's inequality
|E_K f(x + d) - E_K f(x)| <= ||f||_inf ||K(. - d) - K||_1 for the stability bound;
Monte Carlo standard error of a proportion sqrt(p(1-p)/N) (common practice).
"""

from __future__ import annotations

import math
import os
import signal
import threading

import numpy as np
import pytest

from terrain.dem import Dem
from terrain.errors import CheckpointError
from terrain.jobs import CreditJob
from terrain.noise import KERNELS, ErrorModel
from terrain.runner import RunInterrupted, run_ensemble

from .conftest import exact_p_higher_first, smooth_terrain


def two_summits(a=50.0, delta=0.5, shape=(15, 31), ridge=None):
    """Two single-cell summits of heights a and a + delta on flat ground,
    optionally joined by a ridge of height ``ridge``."""
    z = np.zeros(shape, np.float32)
    s_low, s_high = (7, 7), (7, 23)
    if ridge is not None:
        z[7, 7:24] = ridge
    z[s_low] = a
    z[s_high] = a + delta
    return z, s_low[0] * shape[1] + s_low[1], s_high[0] * shape[1] + s_high[1]


def p_higher_first(res, high):
    log = res.log
    ess = log["death"] < 0
    return np.mean(log["birth"][ess] == high)


@pytest.mark.slow
@pytest.mark.parametrize("kernel", ["gaussian", "triangular", "epanechnikov"])
def test_two_summits_converge_to_exact_probability(kernel):
    sigma, delta, n = 1.0, 0.6, 1500
    z, low, high = two_summits(delta=delta)
    res = run_ensemble(Dem.from_array(z), CreditJob("peaks", threshold=5.0),
                    ErrorModel(rmse=sigma), realisations=n, seed=11, backend="serial")
    p = p_higher_first(res, high)
    want = exact_p_higher_first(kernel, sigma, delta)
    assert abs(p - want) <= 4 * math.sqrt(want * (1 - want) / n)
    # both cells stay summits of counted pairs in every realisation
    sp = res.layers["summit_probability"][0].reshape(-1)
    assert sp[high] == 1.0 and sp[low] == 1.0


@pytest.mark.slow
@pytest.mark.parametrize("kernel", ["gaussian", "uniform"])
def test_stability_bound_while_argmax_flips(kernel):
    sigma, n, delta, k = 1.0, 1200, 0.3, 1
    # joined by a ridge 2 below: only the highest summit clears the threshold,
    # so summit probability = P(this summit is the highest)
    z_a, low, high = two_summits(delta=0.1, ridge=48.0)
    z_b = z_a.copy()
    z_b.reshape(-1)[low] += delta  # raise k = 1 cell by delta: the argmax flips
    assert np.argmax(z_a) == high and np.argmax(z_b) == low
    s = CreditJob("peaks", threshold=5.0, weight="count")
    m = ErrorModel(rmse=sigma)
    ra = run_ensemble(Dem.from_array(z_a), s, m, realisations=n, seed=3, backend="serial")
    rb = run_ensemble(Dem.from_array(z_b), s, m, realisations=n, seed=3, backend="serial")  # CRN
    bound = 1.0 * KERNELS[kernel].lipschitz(KERNELS[kernel].halfwidth(sigma)) * k * delta
    for name in ("summit_credit", "summit_probability"):
        (ea, sa), (eb, sb) = ra.layers[name], rb.layers[name]
        slack = 4 * np.sqrt(sa ** 2 + sb ** 2)
        assert np.all(np.abs(ea - eb) <= bound + slack + 1e-12), name
    # and the layer really moved (not trivially stable)
    assert abs(ra.layers["summit_probability"][0].reshape(-1)[low]
               - rb.layers["summit_probability"][0].reshape(-1)[low]) > 0.02


def _run(backend, **kw):
    z = smooth_terrain((64, 72), seed=9)
    dem = Dem.from_array(z, cellsize=30.0)
    return run_ensemble(dem, CreditJob("depressions", threshold=2.0), ErrorModel(rmse=1.5, range_m=150,
                                                                             nugget=0.2),
                     realisations=24, seed=5, backend=backend, workers=2, **kw)


def _same(r1, r2):
    assert r1.n == r2.n
    for name in r1.layers:
        for a, b in zip(r1.layers[name], r2.layers[name]):
            assert np.array_equal(a, b), name
    for f in r1.log:
        assert np.array_equal(r1.log[f], r2.log[f], equal_nan=r1.log[f].dtype.kind == "f"), f


@pytest.mark.slow
def test_bit_identical_across_backends():
    ref = _run("serial", chunk=5)
    _same(ref, _run("processes", chunk=3))
    _same(ref, _run("dask", chunk=7))


def _kill_a_worker_mid_run(which: str):
    """A run on a two-worker LocalCluster whose worker ``which`` is killed once
    ten realisations are done: "holder" is the worker with the last copy of
    the scattered context (Dask's active memory manager, run every 50 ms
    here, keeps one copy once no task waits for it elsewhere), "other" the
    one without it. Returns the serial reference and the run."""
    import logging
    import time

    import dask
    from distributed import Client, LocalCluster

    z = smooth_terrain((96, 96), seed=4)
    dem = Dem.from_array(z, cellsize=30.0)
    s, m = CreditJob("peaks", threshold=3.0), ErrorModel(rmse=2.0)
    ref = run_ensemble(dem, s, m, realisations=60, seed=2, backend="serial")
    with dask.config.set({"distributed.scheduler.active-memory-manager.interval": "50ms"}), \
            LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                         silence_logs=logging.CRITICAL) as cluster, Client(cluster) as client:
        pids = client.run(os.getpid)
        killed = threading.Event()

        def progress(done, total):
            if done < 10 or killed.is_set():
                return
            t0 = time.monotonic()
            while time.monotonic() - t0 < 10:  # until one worker holds the only copy
                has = [w for k, ws in client.who_has().items() if k.startswith("Context-")
                       for w in ws]
                if len(has) == 1:
                    break
                time.sleep(0.05)
            assert len(has) == 1, has
            victim = has[0] if which == "holder" else next(w for w in pids if w != has[0])
            killed.set()
            os.kill(pids[victim], 9)

        got = run_ensemble(dem, s, m, realisations=60, seed=2, scheduler=cluster.scheduler_address,
                           chunk=2, progress=progress)
        assert killed.is_set()
    return ref, got


@pytest.mark.slow
@pytest.mark.parametrize("which", ["holder", "other"])
def test_dask_worker_killed_mid_run_gives_identical_layers(which):
    # the worker holding the context's last copy: its chunks are cancelled for "lost
    # dependencies", the context is scattered again and they are resubmitted
    _same(*_kill_a_worker_mid_run(which))


def test_a_signal_while_the_workers_stop_keeps_what_the_run_saved():
    # a second SIGTERM, held while the pool stopped and raised from its close,
    # once took the place of the RunInterrupted that says how many realisations
    # the checkpoint holds (our own rule: no outside reference)
    from terrain.errors import Terminated
    from terrain.runner.ensemble import _fold_or_save
    from terrain.runner.plan import InOrder, StopRule

    class Runner:
        def __init__(self, first):
            self.first = first

        def __iter__(self):
            raise self.first
            yield  # a generator, as the backends' runners are

        def close(self):
            raise Terminated()

    class Saver:
        path, has_file = "ck.npz", True

        def save(self, only_if_new=False):
            pass

    acc = type("Acc", (), {"n": 75})()
    flag = {"interrupted": signal.SIGTERM, "stop": False}
    with pytest.raises(RunInterrupted) as ei:
        _fold_or_save(Runner(KeyboardInterrupt()), acc, InOrder(0), 400, StopRule(), flag,
                      on_fold=lambda lg: None, saver=Saver())
    assert (ei.value.done, ei.value.checkpoint, ei.value.signal) == (75, "ck.npz", 15)
    # a run that ends for anything but a signal still raises the signal from its close
    flag = {"interrupted": 0, "stop": False}
    with pytest.raises(Terminated):
        _fold_or_save(Runner(ValueError("a worker's error")), acc, InOrder(0), 400, StopRule(),
                      flag, on_fold=lambda lg: None, saver=Saver())


def test_checkpoint_resume_and_extend_are_identical(tmp_path):
    z = smooth_terrain((50, 50), seed=2)
    dem = Dem.from_array(z)
    s, m = CreditJob("peaks", threshold=2.0), ErrorModel(rmse=1.0)
    full = run_ensemble(dem, s, m, realisations=40, seed=1, backend="serial")
    ck = tmp_path / "run.npz"

    def interrupt_at(n):
        def cb(done, total):
            if done >= n:
                raise KeyboardInterrupt
        return cb

    with pytest.raises(RunInterrupted) as ei:
        run_ensemble(dem, s, m, realisations=40, seed=1, backend="serial", chunk=4, checkpoint=ck,
                  checkpoint_every=8, progress=interrupt_at(12))
    assert ei.value.done == 12 and ck.exists()
    resumed = run_ensemble(dem, s, m, realisations=40, seed=1, backend="serial", checkpoint=ck,
                        resume=True)
    _same(full, resumed)
    # extend a finished 20-realisation run to 40
    ck2 = tmp_path / "short.npz"
    run_ensemble(dem, s, m, realisations=20, seed=1, backend="serial", checkpoint=ck2)
    _same(full, run_ensemble(dem, s, m, realisations=40, seed=1, backend="serial", checkpoint=ck2,
                          resume=True))


def test_checkpoint_from_another_run_is_refused(tmp_path):
    z = smooth_terrain((30, 30), seed=2)
    s, m = CreditJob("peaks", threshold=2.0), ErrorModel(rmse=1.0)
    ck = tmp_path / "run.npz"
    run_ensemble(Dem.from_array(z), s, m, realisations=4, seed=1, backend="serial", checkpoint=ck)
    with pytest.raises(CheckpointError, match="another DEM"):
        run_ensemble(Dem.from_array(z + 1), s, m, realisations=8, seed=1, backend="serial",
                  checkpoint=ck, resume=True)
    with pytest.raises(CheckpointError, match="seed"):
        run_ensemble(Dem.from_array(z), s, m, realisations=8, seed=2, backend="serial",
                  checkpoint=ck, resume=True)
    ck.write_bytes(b"not an npz")
    with pytest.raises(CheckpointError):
        run_ensemble(Dem.from_array(z), s, m, realisations=8, seed=1, backend="serial",
                  checkpoint=ck, resume=True)


def test_adaptive_stopping():
    z, low, high = two_summits(delta=3.0)
    res = run_ensemble(Dem.from_array(z), CreditJob("peaks", threshold=5.0),
                    ErrorModel(rmse=1.0), realisations=2000, seed=4, backend="serial",
                    target_se=0.5, check_every=20)
    assert res.info["stopped_early"] and res.n < 2000 and res.n % 20 == 0
    m, se = res.layers["summit_credit"]
    assert se[m >= 0.01 * m.max()].max() < 0.5


def test_credit_conservation_and_threshold_jitter():
    z = smooth_terrain((40, 40), seed=6)
    s = CreditJob("depressions", threshold=3.0, threshold_jitter=1.0)
    res = run_ensemble(Dem.from_array(z), s, ErrorModel(rmse=1.0), realisations=30, seed=0,
                    backend="serial")
    log = res.log
    depth = np.abs(log["birth_value"].astype(float) - log["death_value"])
    # total pit credit = mean total weight of counted pairs
    assert res.layers["pit_credit"][0].sum() * res.n == pytest.approx(depth.sum(), rel=1e-9)
    assert res.layers["spill_credit"][0].sum() * res.n == pytest.approx(depth.sum(), rel=1e-9)
    # jittered thresholds admit some pairs below the nominal 3.0
    assert depth.min() < 3.0


def test_layers_from_the_log_are_the_same_on_any_window():
    # the credit layers are summed from the pair log; any window holds the same numbers
    from terrain.jobs.credit import credit_layers

    z = smooth_terrain((70, 90), seed=3)
    dem = Dem.from_array(z, cellsize=10.0)
    res = run_ensemble(dem, CreditJob("peaks", threshold=5.0), ErrorModel(rmse=2.0),
                       realisations=25, seed=6, backend="serial")
    for window in ((0, 70, 0, 90), (0, 1, 0, 90), (13, 44, 20, 21), (69, 70, 89, 90), (5, 60, 7, 80)):
        r0, r1, c0, c1 = window
        part = credit_layers(res.log, res.n, res.job, 90, window)
        for name, (m, e) in part.items():
            assert np.array_equal(m, res.layers[name][0][r0:r1, c0:c1]), (name, window)
            assert np.array_equal(e, res.layers[name][1][r0:r1, c0:c1]), (name, window)
