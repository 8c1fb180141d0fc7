"""Dask block tasks read their DEM window from the DEM's file themselves.

A pure block task is given the DEM's path (any path or URL GDAL opens) and
header instead of its window's values (terrain.io.RasterWindows); the
window it reads must be the very values the client's read_dem gives there
-- band, scale and offset, nodata, the --bbox window -- so the layers stay
the same bit for bit. The reference is cairn's own whole-grid read and
serial run, themselves checked against gudhi and scikit-image in
tests/test_persistence.py and tests/test_drainage.py; GDAL's scale/offset
rule (value = stored x scale + offset) is GDAL's documented band metadata
(GDAL raster data model, gdal.org).
"""

from __future__ import annotations

import pickle
import warnings

import numpy as np
import pytest

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.engine.blocked import windows
from terrain.io import RasterWindows, dem_windows, read_dem
from terrain.jobs.credit_blocked import realise_blocked
from terrain.noise import ErrorSampler

from .conftest import smooth_terrain, write_tif

MODEL = ErrorModel(rmse=1.0, range_m=60.0, nugget=0.2)  # correlated: halos draw neighbours' tiles


def _scaled_tif(path, stored, *, scale, offset, nodata, dtype):
    """A GeoTIFF whose band declares a scale and offset (GDAL metadata)."""
    import rasterio

    write_tif(path, stored, nodata=nodata, dtype=dtype)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with rasterio.open(path, "r+") as ds:
            ds.scales, ds.offsets = (scale,), (offset,)
    return path


def _terrain_tif(tmp_path, shape=(61, 75)):
    z = smooth_terrain(shape, seed=3) + 300.0
    z[20:26, 30:44] = -9999.0  # a nodata hole across block lines
    return write_tif(tmp_path / "dem.tif", z, nodata=-9999.0, dtype="float32")


@pytest.mark.parametrize("dtype", ["int16", "float64"])
def test_a_window_read_on_a_worker_is_the_clients_read(tmp_path, dtype):
    rng = np.random.default_rng(7)
    stored = rng.integers(-200, 3000, (47, 53)).astype(dtype)
    stored[5:9, 10:30] = -32768
    stored[30, 40] = 17  # the user's extra nodata value (as stored)
    p = _scaled_tif(tmp_path / f"scaled-{dtype}.tif", stored, scale=0.25, offset=812.5,
                    nodata=-32768, dtype=dtype)
    bbox = (500000.0 + 35, 6800000.0 - 455, 500000.0 + 505, 6800000.0 - 15)  # cells 1..46, 3..50
    for box in (None, bbox):
        dem = read_dem(p, bbox=box, nodata=17)
        reader = dem_windows(dem)
        assert isinstance(reader, RasterWindows) and reader.shape == dem.shape
        reader = pickle.loads(pickle.dumps(reader))  # as a worker gets it
        assert len(pickle.dumps(reader)) < 4096  # a path and a header, not values
        rows, cols = dem.shape
        for r0, r1, c0, c1 in [(0, rows, 0, cols), (3, 11, 8, 33), (rows - 5, rows, cols - 7, cols),
                               (29, 32, 38, 42)]:
            got, want = reader[r0:r1, c0:c1], dem.z[r0:r1, c0:c1]
            assert got.dtype == want.dtype
            assert got.tobytes() == want.tobytes(), (box, r0, c0)
        assert np.isnan(reader[0:rows, 0:cols]).sum() == dem.nodata.sum()


def test_a_dem_without_its_file_has_no_reader(tmp_path):
    assert dem_windows(Dem.from_array(np.ones((5, 6), np.float32))) is None
    p = _terrain_tif(tmp_path)
    dem = read_dem(p)
    assert dem_windows(dem) is not None
    dem.z[3, 4] += 1.0  # the values changed after they were read: they must be sent
    assert dem_windows(dem) is None
    dem = read_dem(p)
    write_tif(p, np.ones((9, 9), np.float32))  # the file changed after it was read
    assert dem_windows(dem) is None


def test_a_gdal_virtual_path_is_read(tmp_path):
    from rasterio.io import MemoryFile

    p = _terrain_tif(tmp_path)
    with MemoryFile(open(p, "rb").read(), filename="dem.tif") as mem:
        dem = read_dem(mem.name)  # /vsimem/...: opened by GDAL, not looked up on disk
        assert mem.name.startswith("/vsimem/")
        assert dem.z.tobytes() == read_dem(p).z.tobytes()
        assert dem_windows(dem)[4:9, 2:70].tobytes() == dem.z[4:9, 2:70].tobytes()


@pytest.mark.parametrize("kind", ["depressions", "peaks"])
def test_pure_tasks_carry_the_path_not_the_values(tmp_path, kind):
    dem = read_dem(_terrain_tif(tmp_path))
    job = CreditJob(kind).resolved(dem, MODEL)
    sampler = ErrorSampler(MODEL, dem.shape, (10.0, 10.0))
    ref = float(job.reference or 0.0)
    z = np.where(dem.nodata, np.nan, dem.z - ref if ref else dem.z).astype(np.float32)
    sent = []

    def worker_map(fn, items):  # each task pickled as a Dask worker would get it
        for item in items:
            blob = pickle.dumps((fn, item))
            sent.append((item, len(blob)))
            f, it = pickle.loads(blob)
            yield f(it)

    n = dem.shape[0] * dem.shape[1]
    for i in range(2):
        want_counts, got_counts = np.zeros(dem.shape, np.int32), np.zeros(dem.shape, np.int32)
        want = realise_blocked(z, sampler, job, 5, i, block=24, regions=job.regions.labels,
                               ponding=want_counts)
        got = realise_blocked(z, sampler, job, 5, i, block=24, regions=job.regions.labels,
                              ponding=got_counts, map=worker_map, shipped=True,
                              remote=dem_windows(dem))
        assert want.keys() == got.keys()
        for k in want:
            assert want[k].tobytes() == got[k].tobytes(), k
        assert want_counts.tobytes() == got_counts.tobytes()
    assert all(item[1] is None for item, _ in sent)  # no DEM window sent with any task
    blocks = len(windows(dem.shape, 24))
    sizes = [size for _, size in sent[:blocks]]  # the local steps: the path, header and sampler
    assert max(sizes) < n, sizes


@pytest.mark.slow
@pytest.mark.xdist_group("dask_cluster")
def test_dask_workers_read_the_dem_from_its_path(tmp_path, monkeypatch, dask_cluster):
    from distributed import Client

    from terrain.runner import blocked
    from terrain.runner.blocked import _workers_read

    said = []  # what the run's check of the workers said (in this process)
    monkeypatch.setattr(blocked, "_workers_read",
                        lambda *a: said.append(_workers_read(*a)) or said[-1])

    p = _terrain_tif(tmp_path)
    dem = read_dem(p)
    cluster = dask_cluster
    with Client(cluster) as client:
        reader, z = dem_windows(dem), dem.z.astype(np.float32)
        assert _workers_read(client, reader, z, 0.0, 0.0)  # so the run's tasks read the file
        assert not _workers_read(client, reader, z + 1, 0.0, 0.0)  # other values: sent instead
        for kind in ("depressions", "peaks"):
            want = run_ensemble(read_dem(p), CreditJob(kind), MODEL, realisations=2, seed=9,
                                backend="serial")
            got = run_ensemble(dem, CreditJob(kind), MODEL, realisations=2, seed=9,
                               scheduler=cluster.scheduler_address, block=24)
            assert got.info["backend"] == "dask" and said[-1] is True  # the tasks read the file
            for k in want.log:
                assert want.log[k].tobytes() == got.log[k].tobytes(), (kind, k)
            for name, (m, e) in want.layers.items():
                gm, ge = got.layers[name]
                assert m.tobytes() == np.asarray(gm).tobytes() and \
                    e.tobytes() == np.asarray(ge).tobytes(), (kind, name)


@pytest.mark.slow
def test_the_cli_reads_a_gdal_virtual_path(cairn, tmp_path):
    import rasterio
    from rasterio.io import MemoryFile

    p = _terrain_tif(tmp_path)
    args = ["-n", "3", "--rmse", "1", "--workers", "1"]
    with MemoryFile(open(p, "rb").read(), filename="dem.tif") as mem:
        code, _, err = cairn("peaks", mem.name, "-o", tmp_path / "virtual", *args)
        assert code == 0, err
    assert cairn("peaks", p, "-o", tmp_path / "file", *args)[0] == 0
    for name in ("summit_credit.tif", "col_credit.tif"):
        with rasterio.open(tmp_path / "virtual" / name) as a, rasterio.open(tmp_path / "file" / name) as b:
            assert a.read().tobytes() == b.read().tobytes(), name
