"""Out-of-core runs: a DEM kept on disk gives the very DEM, regions, logs,
layers, tables and maps of one read into memory, and the per-cell counts on
disk survive a kill.

The reference is cairn's own in-memory path (itself checked against gudhi,
scikit-image and the other outside sources named in the other test files).
"""

from __future__ import annotations

import numpy as np
import pytest
import rasterio

from terrain import CreditJob, ErrorModel, run_ensemble
from terrain.errors import CheckpointError, OptionError
from terrain.io import CountStore, read_dem, scratch_folder
from terrain.layers import layer_windows
from terrain.resources import estimate_run
from terrain.runner import Execution

from .conftest import smooth_terrain, write_tif

MODEL = ErrorModel(rmse=1.0, range_m=80.0, nugget=0.2)


def _raster(tmp_path, *, dtype="float32", nodata=-9999.0, shape=(70, 83), seed=4):
    z = smooth_terrain(shape, seed=seed) + 200.0
    z[20:27, 30:41] = nodata  # a nodata hole across block lines
    z[50:58, :] = np.round(z[50:58, :] / 20) * 20  # plateaus across block lines
    return write_tif(tmp_path / "dem.tif", z, nodata=nodata, dtype=dtype)


@pytest.mark.parametrize("dtype", ["float32", "float64", "int16"])
def test_dem_on_disk_is_the_dem_read(tmp_path, dtype):
    p = _raster(tmp_path, dtype=dtype)
    want = read_dem(p, bbox=(500100.0, 6799400.0, 500700.0, 6799950.0))
    with scratch_folder(tmp_path) as f:
        got = read_dem(p, bbox=(500100.0, 6799400.0, 500700.0, 6799950.0), scratch=f)
        assert got.on_disk and got.shape == want.shape
        assert np.array_equal(got.z[:, :], want.z, equal_nan=True)
        assert got.z[:, :].dtype == want.z.dtype
        assert np.array_equal(got.nodata[:, :], want.nodata)
        assert got.checksum() == want.checksum() and got.meta == want.meta
        assert got.lowest() == want.lowest()
        cells = np.array([0, 17, got.shape[0] * got.shape[1] - 1])
        assert np.array_equal(got.values_at(cells), want.values_at(cells), equal_nan=True)


def test_dem_on_disk_with_no_valid_cell_is_refused(tmp_path):
    from terrain.errors import NoValidCellsError

    p = write_tif(tmp_path / "dem.tif", np.full((20, 20), -9999.0), nodata=-9999.0)
    with scratch_folder(tmp_path) as f, pytest.raises(NoValidCellsError, match="dem.tif"):
        read_dem(p, scratch=f)


@pytest.mark.parametrize("kind", ["peaks", "depressions"])
@pytest.mark.parametrize("backend", ["serial", pytest.param("processes", marks=pytest.mark.slow)])
def test_run_on_disk_equals_run_in_memory(tmp_path, kind, backend):
    p = _raster(tmp_path)
    want = run_ensemble(read_dem(p), CreditJob(kind), MODEL, realisations=3, seed=5,
                        backend="serial")
    with scratch_folder(tmp_path) as f:
        dem = read_dem(p, scratch=f)
        got = run_ensemble(dem, CreditJob(kind), MODEL, realisations=3, seed=5, backend=backend,
                           workers=2, block=32)
        assert np.array_equal(got.job.regions.labels[:, :], want.job.regions.labels)
        for k in want.log:
            assert want.log[k].tobytes() == got.log[k].tobytes(), k
        for name, (m, e) in want.layers.items():
            gm, ge = got.layers[name]
            assert m.tobytes() == gm.tobytes() and e.tobytes() == ge.tobytes(), name


def test_dem_on_disk_needs_blocks(tmp_path):
    with scratch_folder(tmp_path) as f:
        dem = read_dem(_raster(tmp_path), scratch=f)
        with pytest.raises(OptionError, match="block"):
            run_ensemble(dem, CreditJob("peaks"), MODEL, realisations=1, backend="serial")


def test_count_store_survives_a_kill_between_its_writes(tmp_path):
    from terrain.engine.blocked import windows

    shape, rng = (40, 50), np.random.default_rng(0)
    store = CountStore(tmp_path / "c", shape, 16)
    total = np.zeros(shape, np.int32)
    wins = windows(shape, 16)
    for i in range(2):
        for w in wins:
            c = rng.integers(0, 2, (w.r1 - w.r0, w.c1 - w.c0)).astype(np.int32)
            if i == 1 and w is wins[3]:  # killed after writing the sum, before the stamp
                store.counts[0][w.r0:w.r1, w.c0:w.c1] = store[w.r0:w.r1, w.c0:w.c1] + c
                break
            store.add(w, i, c)
            total[w.r0:w.r1, w.c0:w.c1] += c
    again = CountStore(tmp_path / "c", shape, 16, resume=True)
    again.check(1)
    rng = np.random.default_rng(0)
    total[:] = 0
    for i in range(2):  # the resumed run computes realisation 1 again: the same counts
        for w in wins:
            c = rng.integers(0, 2, (w.r1 - w.r0, w.c1 - w.c0)).astype(np.int32)
            again.add(w, i, c)
            total[w.r0:w.r1, w.c0:w.c1] += c
    again.check(2, exact=True)
    assert np.array_equal(again[:, :], total)
    moved = CountStore(tmp_path / "c", shape, 8, resume=True)  # another block: copied
    moved.check(2)
    assert np.array_equal(moved[:, :], total) and moved.counts[0].chunks == (8, 8)
    with pytest.raises(CheckpointError, match="3"):
        moved.check(3)


def test_count_store_sealed_with_blake2b_before_still_resumes(tmp_path, monkeypatch):
    """A store made before its digests became SHA-256 (BLAKE2b; its attributes
    name no seal) resumes, is verified with its own digests, and a rechunk
    copies it into SHA-256; an unknown seal is a damaged checkpoint."""
    import terrain.io.scratch as scratch
    from terrain.engine.blocked import windows

    shape, rng = (40, 50), np.random.default_rng(1)
    monkeypatch.setattr(scratch, "SEAL", "blake2b")
    old = CountStore(tmp_path / "c", shape, 16, run="r")
    tag = dict(old.group.attrs["cairn"])
    del tag["seal"]  # as the earlier code wrote it
    old.group.attrs["cairn"] = tag
    monkeypatch.undo()
    total = np.zeros(shape, np.int32)
    for w in windows(shape, 16):
        c = rng.integers(0, 3, (w.r1 - w.r0, w.c1 - w.c0)).astype(np.int32)
        old.add(w, 0, c)
        total[w.r0:w.r1, w.c0:w.c1] += c
    again = CountStore(tmp_path / "c", shape, 16, run="r", resume=True)
    assert again.seal == "blake2b"
    again.check(1, verify=True)  # each chunk against its BLAKE2b digest
    assert np.array_equal(again[:, :], total)
    moved = CountStore(tmp_path / "c", shape, 8, run="r", resume=True)
    moved.check(1)
    assert moved.seal == "sha256" and moved.group.attrs["cairn"]["seal"] == "sha256"
    moved.check(1, verify=True)
    assert np.array_equal(moved[:, :], total)
    tag = dict(moved.group.attrs["cairn"])
    moved.group.attrs["cairn"] = {**tag, "seal": "md4"}
    with pytest.raises(CheckpointError, match="damaged checkpoint.*unknown kind"):
        CountStore(tmp_path / "c", shape, 8, run="r", resume=True)


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["peaks", "depressions"])
def test_cli_on_disk_gives_the_same_files(cairn, tmp_path, kind, monkeypatch):
    import terrain.outputs.mapframe as mapframe

    monkeypatch.setattr(mapframe, "MAX_PIXELS", 30)  # the maps pool this small raster
    p = _raster(tmp_path, shape=(90, 75))
    run = (kind, p, "--rmse", "1", "--range", "60", "-n", "3", "--workers", "1", "-q")
    assert cairn(*run, "-o", tmp_path / "whole")[0] == 0
    code, _, err = cairn(*run, "-o", tmp_path / "disk", "--block", "32")
    assert code == 0, err
    for name in sorted(x.name for x in (tmp_path / "whole").iterdir()):
        a, b = tmp_path / "whole" / name, tmp_path / "disk" / name
        if name.endswith(".tif"):
            with rasterio.open(a) as x, rasterio.open(b) as y:
                assert x.read().tobytes() == y.read().tobytes(), name
                assert x.descriptions == y.descriptions and x.overviews(1) == y.overviews(1)
                assert x.tags(1)["ROLE"] == y.tags(1)["ROLE"]
        elif name.endswith(".csv"):
            assert a.read_text() == b.read_text(), name
    from matplotlib.image import imread

    png = imread(tmp_path / "disk" / "quicklook.png")
    assert png.ndim == 3 and png.std() > 0


def test_pooling_by_bands_is_pooling_the_whole():
    from terrain.outputs.mapframe import _pool, pool_bands

    rng = np.random.default_rng(1)
    a = rng.standard_normal((1031, 517))
    a[rng.random(a.shape) < 0.1] = np.nan
    for k in (1, 3, 7):
        got = pool_bands(lambda r0, r1: a[r0:r1], a.shape, k, np.nanmax)
        assert np.array_equal(got, _pool(a, k, np.nanmax), equal_nan=True)


def test_layer_windows_cover_the_grid_once():
    for shape in ((1, 1), (5000, 300), (3000, 4100), (1, 9000)):
        seen = np.zeros(shape, np.int32)
        for r0, r1, c0, c1 in layer_windows(shape, cells=1 << 20):
            seen[r0:r1, c0:c1] += 1
        assert (seen == 1).all()


def test_memory_of_a_blocked_run_does_not_grow_with_the_grid():
    from types import SimpleNamespace

    job, ex = CreditJob("depressions"), Execution(workers=2, block=2048, realisations=20)
    est = {}
    for side in (16384, 32768, 65536):
        head = SimpleNamespace(shape=(side, side), cells=side * side, value_bytes=4,
                               stored_bytes=4, source="big.tif")
        est[side] = estimate_run(head, job, ex)
    # a worker holds one block whatever the grid; this process grows with the length
    # of block boundaries (the glue), 4x from 16384^2 to 65536^2, not with the cells (16x)
    assert est[32768].worker == est[16384].worker == est[65536].worker
    assert est[65536].parent < 2 * est[16384].parent
    assert est[16384].total < 3e9


def test_counts_kept_at_a_url_give_the_same_layers_and_resume(tmp_path):
    """Counts where the client says (an fsspec URL: here fsspec's in-memory file
    system, as an object store would be): the layers equal those of counts in the
    scratch folder, bit for bit, and a checkpointed run resumes from the store at
    the URL to equal a run done in one go."""
    import fsspec

    p = _raster(tmp_path)
    url = f"memory://cairn-test/{tmp_path.name}/run.counts"
    with scratch_folder(tmp_path) as f:
        dem = read_dem(p, scratch=f)
        want = run_ensemble(dem, CreditJob("depressions"), MODEL, realisations=6, seed=5,
                            backend="serial", block=32)
        ck = tmp_path / "run.npz"
        first = run_ensemble(dem, CreditJob("depressions"), MODEL, realisations=3, seed=5,
                             backend="serial", block=32, counts=url, checkpoint=ck)
        assert first.n == 3 and fsspec.filesystem("memory").exists(url[len("memory://"):])
        got = run_ensemble(dem, CreditJob("depressions"), MODEL, realisations=6, seed=5,
                           backend="serial", block=32, counts=url, checkpoint=ck, resume=True)
        rows, cols = dem.shape
        a, b = want.layers.read(0, rows, 0, cols), got.layers.read(0, rows, 0, cols)
        assert a.keys() == b.keys()
        for name in a:
            for x, y in zip(a[name], b[name]):
                assert x.tobytes() == y.tobytes(), name
        with pytest.raises(CheckpointError, match="damaged checkpoint"):  # another place: no store
            run_ensemble(dem, CreditJob("depressions"), MODEL, realisations=8, seed=5,
                         backend="serial", block=32, counts=url + "-elsewhere", checkpoint=ck,
                         resume=True)
    fsspec.filesystem("memory").rm(f"/cairn-test/{tmp_path.name}", recursive=True)


@pytest.mark.parametrize("url, needle", [("/a/folder", "takes a URL"),
                                         ("file:///a/folder", "takes a URL"),
                                         ("nope://x", "no file system for nope")])
def test_counts_place_must_be_a_url_with_a_file_system(url, needle):
    with pytest.raises(OptionError, match=needle):
        Execution(counts=url)


def test_counts_url_refuses_a_whole_grid_run_and_a_foreign_store(tmp_path):
    import fsspec

    p = _raster(tmp_path)
    with pytest.raises(OptionError, match="keeps them in memory"):
        run_ensemble(read_dem(p), CreditJob("depressions"), MODEL, realisations=1,
                     backend="serial", counts="memory://cairn-test/whole")
    fs = fsspec.filesystem("memory")
    fs.pipe(f"/cairn-test/{tmp_path.name}/theirs/notes.txt", b"someone else's")
    with scratch_folder(tmp_path) as f, pytest.raises(CheckpointError, match="not cairn's"):
        run_ensemble(read_dem(p, scratch=f), CreditJob("depressions"), MODEL, realisations=1,
                     backend="serial", block=32, counts=f"memory://cairn-test/{tmp_path.name}/theirs")
    assert fs.cat(f"/cairn-test/{tmp_path.name}/theirs/notes.txt") == b"someone else's"
    fs.rm(f"/cairn-test/{tmp_path.name}", recursive=True)


@pytest.mark.parametrize("path, url", [("s3://bucket/run.counts", True), ("memory://x", True),
                                       ("/tmp/x://y/run.npz.counts", False),
                                       ("C://dir/run.npz.counts", False), ("run.counts", False)])
def test_only_a_scheme_makes_a_url(path, url):
    """A local path that happens to hold '://' (or a Windows drive) stays a path: its
    store gets the os checks, never fsspec's."""
    from terrain.io import is_url

    assert is_url(path) is url


def test_a_url_ending_in_a_slash_keeps_its_store_when_rechunked(tmp_path):
    """Siblings of a store (made when a resume changes the block) go beside it, not into it."""
    import fsspec

    p = _raster(tmp_path)
    url = f"memory://cairn-test/{tmp_path.name}/run.counts/"
    ck = tmp_path / "run.npz"
    with scratch_folder(tmp_path) as f:
        dem = read_dem(p, scratch=f)
        run_ensemble(dem, CreditJob("depressions"), MODEL, realisations=2, seed=5,
                     backend="serial", block=32, counts=url, checkpoint=ck)
        got = run_ensemble(dem, CreditJob("depressions"), MODEL, realisations=3, seed=5,
                           backend="serial", block=16, counts=url, checkpoint=ck, resume=True)
        assert got.n == 3
    fsspec.filesystem("memory").rm(f"/cairn-test/{tmp_path.name}", recursive=True)
