"""How a run reaches its worker processes: the shared context file and the chunk plan.

Neither may change a result: the layers and the log of a run on local
processes with the default (tapering) chunks equal a serial run's bit for bit.
"""

from __future__ import annotations

import numpy as np

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.io import load_shared, save_shared
from terrain.noise import ErrorSampler
from terrain.runner.backends import Context
from terrain.runner.plan import chunk_size, chunks

from .conftest import smooth_terrain


def test_shared_context_round_trip_maps_arrays_and_keeps_writes_private(tmp_path):
    z = smooth_terrain((120, 90), seed=2)
    dem = Dem.from_array(z, cellsize=30.0)
    model = ErrorModel(rmse=1.0)
    job = CreditJob("depressions").resolved(dem, model)
    ctx = Context(z, ErrorSampler(model, z.shape, (30.0, 30.0)), job, 7)
    path = save_shared(str(tmp_path / "context.pkl"), ctx, min_bytes=1024)
    back = load_shared(path)
    assert np.array_equal(back.z, z) and back.seed == 7
    assert np.array_equal(back.job.regions.labels, job.regions.labels)
    base = back.z
    while isinstance(base, np.ndarray) and not isinstance(base, np.memmap):
        base = base.base
    assert isinstance(base, (np.memmap, memoryview))  # mapped from the file, not copied
    back.z[0, 0] += 1  # copy-on-write: the file and other readers keep the value
    assert load_shared(path).z[0, 0] == z[0, 0]


def test_tapered_chunks_cover_the_range_in_order():
    for n, workers in ((300, 2), (1000, 2), (7, 4), (1, 2), (100, 1)):
        size = chunk_size(0, n, workers=workers, checkpoint_every=50)
        got = list(chunks(0, n, size, workers))
        assert got[0][0] == 0 and got[-1][1] == n
        assert all(a1 == b0 for (_, b0), (a1, _) in zip(got, got[1:]))
        sizes = [b - a for a, b in got]
        assert max(sizes) <= size and min(sizes) >= 1
        assert sizes[-1] <= max(1, -(-n // (2 * workers)))  # the last chunk is small
    assert list(chunks(5, 17, 4)) == [(5, 9), (9, 13), (13, 17)]  # no taper: fixed size


def test_processes_with_default_chunks_equal_serial():
    z = smooth_terrain((48, 56), seed=11)
    dem = Dem.from_array(z, cellsize=30.0)
    model = ErrorModel(rmse=1.5)
    kw = dict(realisations=30, seed=3)
    ref = run_ensemble(dem, CreditJob("depressions", threshold=2.0), model, backend="serial", **kw)
    got = run_ensemble(dem, CreditJob("depressions", threshold=2.0), model, backend="processes",
                       workers=2, **kw)
    for name in ref.layers:
        for a, b in zip(ref.layers[name], got.layers[name]):
            assert np.array_equal(a, b), name
    for f in ref.log:
        assert np.array_equal(ref.log[f], got.log[f], equal_nan=ref.log[f].dtype.kind == "f"), f


def test_workers_started_ahead_serve_the_next_runs_and_change_nothing(monkeypatch):
    """Workers started before the DEM is read (as the CLI does) run the next run
    on as many workers, blocked or whole, with the layers and log of a serial
    run bit for bit; the pool is the one started ahead, and a second run after
    it starts its own."""
    import functools

    from terrain.jobs.credit import load_kernels
    from terrain.runner import backends, blocked

    taken = []

    def recording(n, real=backends.take_pool):
        taken.append(real(n))
        return taken[-1]

    monkeypatch.setattr(backends, "take_pool", recording)
    monkeypatch.setattr(blocked, "take_pool", recording)
    z = smooth_terrain((48, 56), seed=5)
    dem = Dem.from_array(z, cellsize=30.0)
    model = ErrorModel(rmse=1.5)
    kw = dict(realisations=12, seed=4)
    for kind, block in (("peaks", None), ("depressions", None), ("depressions", 16)):
        ref = run_ensemble(dem, CreditJob(kind, threshold=2.0), model, backend="serial",
                           block=block, **kw)
        warm = functools.partial(load_kernels, kind) if block is None else None
        taken.clear()
        with backends.warm_workers(2, warm):
            ahead = backends._AHEAD[0][1]
            got, again = (run_ensemble(dem, CreditJob(kind, threshold=2.0), model,
                                       backend="processes", workers=2, block=block, **kw)
                          for _ in range(2))
            assert taken[0] is ahead and taken[1] is not ahead and not backends._AHEAD
        for res in (got, again):
            for name in ref.layers:
                for a, b in zip(ref.layers[name], res.layers[name]):
                    assert np.array_equal(a, b), (kind, block, name)
            for f in ref.log:
                assert np.array_equal(ref.log[f], res.log[f],
                                      equal_nan=ref.log[f].dtype.kind == "f"), (kind, f)


def test_workers_started_ahead_and_never_used_are_stopped():
    """A pool started ahead of a run that never comes (an error reading the DEM,
    Ctrl-C) is stopped when its block ends: none of its processes outlives it."""
    import time

    import psutil

    from terrain.runner import backends

    try:
        with backends.warm_workers(2):
            pool = backends._AHEAD[0][1]
            pids = set(pool._processes)  # the pool's own (not multiprocessing's helpers)
            assert len(pids) == 2  # started
            raise KeyboardInterrupt
    except KeyboardInterrupt:
        pass
    assert not backends._AHEAD

    def alive():
        return {p for p in pids if psutil.pid_exists(p)
                and psutil.Process(p).status() != psutil.STATUS_ZOMBIE}

    deadline = time.monotonic() + 10
    while alive() and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not alive()


def test_load_kernels_runs_a_realisation_of_each_kind():
    from terrain.jobs.credit import load_kernels

    for kind in ("peaks", "depressions"):
        load_kernels(kind)  # no error, nothing returned or kept


def test_spawning_holds_a_signal_that_another_thread_receives():
    """A signal sent to the process while children start lands on any thread
    that does not block it, and Python would run its handler in this thread
    between two bytecodes: in the middle of writing a child's start-up data,
    the child then reading a cut pipe. ``spawning`` notes such a signal and
    raises it again once the block ends, with the handler it found."""
    import signal
    import threading

    from terrain.processes import spawning

    def sender(sig, go):
        def run():
            go.wait()
            signal.pthread_kill(threading.get_ident(), sig)  # to this helper thread only
        t = threading.Thread(target=run)  # started before the block: SIGINT not blocked in it
        t.start()
        return t

    steps = []
    seen = []
    old = signal.signal(signal.SIGTERM, lambda s, f: seen.append(s))
    try:
        for sig, caught in ((signal.SIGINT, KeyboardInterrupt), (signal.SIGTERM, None)):
            go = threading.Event()
            t = sender(sig, go)
            try:
                with spawning():
                    go.set()
                    t.join()
                    sum(range(10_000))  # bytecodes run here: an unheld handler would fire
                    steps.append(sig)
            except KeyboardInterrupt:
                steps.append(caught)
        assert steps == [signal.SIGINT, KeyboardInterrupt, signal.SIGTERM]
        assert seen == [signal.SIGTERM]  # raised again after the block, to its own handler
        assert signal.getsignal(signal.SIGINT) is signal.default_int_handler
    finally:
        signal.signal(signal.SIGTERM, old)
