"""A blocked run on Dask needs no file system shared with its workers.

The workers run in a mount namespace of their own (``unshare -rm``, as a
container would) with a fresh tmpfs over ``/tmp`` and ``TMPDIR`` pointing
into it, so nothing the client writes under its ``/tmp`` -- the DEM read onto
disk, the region labels, the counts -- is visible to them (checked on the
workers). Their network namespace is the machine's, so they reach the
scheduler on the loopback address. The run must equal the local (serial)
run bit for bit: the log and every layer.

The reference is cairn's own serial path, itself checked against gudhi and
scikit-image in tests/test_persistence.py and tests/test_drainage.py.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from terrain import CreditJob, ErrorModel, run_ensemble
from terrain.io import read_dem, scratch_folder

from .conftest import smooth_terrain, write_tif

MODEL = ErrorModel(rmse=1.0, range_m=80.0, nugget=0.2)  # correlated: halos draw neighbours' tiles


def _can_unshare(tmp_path) -> bool:
    probe = tmp_path / "probe"
    probe.mkdir()
    r = subprocess.run(["unshare", "-rm", "sh", "-c", f"mount -t tmpfs -o size=64k tmpfs {probe}"],
                       capture_output=True)
    return r.returncode == 0


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def private_workers(tmp_path):
    """A scheduler on the loopback address and two workers whose /tmp is a private tmpfs."""
    pytest.importorskip("distributed")
    import terrain

    tmp = Path("/tmp").resolve()
    if any(tmp in Path(p).resolve().parents for p in (sys.prefix, terrain.__file__)):
        pytest.skip("Python or cairn is installed under /tmp, which this test hides from its "
                    "workers (clone and install elsewhere to run it)")
    if not _can_unshare(tmp_path):
        pytest.skip("cannot make a private mount namespace here (needs unshare -rm)")
    from distributed import Client

    address = f"tcp://127.0.0.1:{_free_port()}"
    bin_dir = os.path.dirname(sys.executable)
    procs = [subprocess.Popen([os.path.join(bin_dir, "dask"), "scheduler", "--host", "127.0.0.1",
                               "--port", address.rsplit(":", 1)[1], "--no-dashboard"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                              start_new_session=True)]
    worker = (f"mount -t tmpfs tmpfs /tmp && mkdir /tmp/private && TMPDIR=/tmp/private exec "
              f"'{os.path.join(bin_dir, 'dask')}' worker {address} --nworkers 2 --nthreads 1 "
              "--no-dashboard")
    procs.append(subprocess.Popen(["unshare", "-rm", "sh", "-c", worker],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                  start_new_session=True))
    try:
        deadline = time.time() + 60
        while True:
            try:
                client = Client(address, timeout="5s")
                break
            except OSError:
                if time.time() > deadline:
                    raise
                time.sleep(0.5)
        with client:
            client.wait_for_workers(2, timeout=60)
            yield address, client
    finally:
        for p in procs:
            os.killpg(p.pid, signal.SIGTERM)
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)
                p.wait()


def _same(want, got) -> None:
    assert want.log.keys() == got.log.keys()
    for k in want.log:
        a, b = want.log[k], got.log[k]
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), k
    assert set(want.layers) == set(got.layers)
    for name in want.layers:
        (m, e), (gm, ge) = want.layers[name], got.layers[name]
        assert m.tobytes() == np.asarray(gm).tobytes(), name
        assert e.tobytes() == np.asarray(ge).tobytes(), name


@pytest.mark.slow
def test_dask_workers_that_cannot_see_the_clients_tmp(tmp_path, private_workers):
    address, client = private_workers
    z = smooth_terrain((70, 83), seed=4) + 200.0
    z[20:27, 30:41] = -9999.0  # a nodata hole across block lines
    p = write_tif(tmp_path / "dem.tif", z, nodata=-9999.0, dtype="float32")
    with scratch_folder(tmp_path) as folder:
        dem = read_dem(p, scratch=folder)  # the DEM on the client's disk, under its /tmp
        seen = client.run(os.path.exists, str(p)) | client.run(os.path.exists, dem.z.path)
        assert not any(seen.values()), seen  # the workers cannot see the client's files
        for kind in ("depressions", "peaks"):
            want = run_ensemble(read_dem(p), CreditJob(kind), MODEL, realisations=3, seed=5,
                                backend="serial")
            got = run_ensemble(dem, CreditJob(kind), MODEL, realisations=3, seed=5,
                               scheduler=address, block=32)
            assert got.info["backend"] == "dask"
            _same(want, got)
    # a DEM in memory, on the same workers
    want = run_ensemble(read_dem(p), CreditJob("depressions"), MODEL, realisations=2, seed=1,
                        backend="serial")
    got = run_ensemble(read_dem(p), CreditJob("depressions"), MODEL, realisations=2, seed=1,
                       scheduler=address, block=24)
    _same(want, got)
