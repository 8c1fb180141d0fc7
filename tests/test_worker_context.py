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
