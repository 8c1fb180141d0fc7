"""Blocked mode: realisations computed block by block give the very same logs,
layers and files as whole-grid realisations (``--block``).

The reference here is cairn's own whole-grid path, itself checked against
gudhi (tests/test_persistence.py) and scikit-image's depression filling
(tests/test_drainage.py); the blocked engine's pairs against those references
directly are in tests/test_blocked.py.
"""

from __future__ import annotations

import numpy as np
import pytest
import rasterio

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.errors import OptionError
from terrain.jobs.credit import realise
from terrain.jobs.credit_blocked import PerturbedSource, realise_blocked
from terrain.noise import ErrorSampler

from .conftest import said, smooth_terrain, write_tif

# runs here draw blank stand-ins for the figures (tests/conftest.py); a test
# marked real_figures draws them
pytestmark = pytest.mark.usefixtures("stand_in_figures")

MODELS = {"independent": ErrorModel(rmse=1.0),
          "correlated": ErrorModel(rmse=1.0, range_m=150.0, nugget=0.2),
          # a non-Gaussian kernel under correlation: the copula, window by window
          "correlated_uniform": ErrorModel(rmse=1.0, range_m=150.0, nugget=0.2, kernel="uniform")}


def _dem(shape=(90, 77), seed=3):
    z = smooth_terrain(shape, seed=seed).astype(np.float32)
    z[30:36, 20:27] = np.nan  # a nodata hole across block lines
    z[60:66, :] = np.round(z[60:66, :] / 50) * 50  # plateaus crossing block lines
    return Dem(z, ~np.isfinite(z), (10.0, 0.0, 0.0, 0.0, -10.0, 900.0), "EPSG:32633")


def _same(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for k in a:
        assert a[k].dtype == b[k].dtype and a[k].tobytes() == b[k].tobytes(), k


@pytest.mark.slow
@pytest.mark.parametrize("model", MODELS)
@pytest.mark.parametrize("kind", ["peaks", "depressions"])
@pytest.mark.parametrize("connectivity", [8, 4])
def test_blocked_realisation_equals_whole(kind, model, connectivity):
    dem = _dem()
    m = MODELS[model]
    job = CreditJob(kind, connectivity=connectivity).resolved(dem, m)
    sampler = ErrorSampler(m, dem.shape, (10.0, 10.0))
    z = np.where(dem.nodata, np.nan, dem.z).astype(np.float32)
    for i in range(2):
        want_pond = np.zeros(z.size, np.int32)
        want = realise(z, sampler, job, 11, i, want_pond if kind == "depressions" else None)
        # small blocks, uneven ones, one block (a correlated draw costs a field tile per block)
        for block in (7, 16, 40, 200) if model == "independent" else (16, 45, 200):
            pond = np.zeros(z.shape, np.int32)
            got = realise_blocked(z, sampler, job, 11, i, block=block, regions=job.regions.labels,
                                  ponding=pond if kind == "depressions" else None)
            _same(want, got)
            assert np.array_equal(pond.reshape(-1), want_pond)


def test_perturbed_source_is_the_whole_draw_by_window(tmp_path):
    dem = _dem()
    m = MODELS["correlated"]
    sampler = ErrorSampler(m, dem.shape, (10.0, 10.0))
    z = np.where(dem.nodata, np.nan, dem.z).astype(np.float32)
    whole = sampler.draw(5, 2)
    whole += z
    np.save(tmp_path / "z.npy", z)
    src = PerturbedSource(str(tmp_path / "z.npy"), sampler, 5, 2)
    assert src.shape == dem.shape
    for sl in (np.s_[0:90, 0:77], np.s_[13:41, 50:77], np.s_[89:90, 0:1]):
        assert src[sl].tobytes() == whole[sl].tobytes()


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["peaks", "depressions"])
def test_run_layers_identical_with_blocks_on_every_backend(kind):
    dem = _dem((70, 64))
    m = MODELS["correlated"]
    want = run_ensemble(dem, CreditJob(kind), m, realisations=4, seed=2, backend="serial")
    for backend, workers in (("serial", 1), ("processes", 2)):
        got = run_ensemble(dem, CreditJob(kind), m, realisations=4, seed=2, backend=backend,
                           workers=workers, block=16, chunk=1)
        assert got.info["block"] == 16
        for name, (est, se) in want.layers.items():
            assert est.tobytes() == got.layers[name][0].tobytes(), name
            assert se.tobytes() == got.layers[name][1].tobytes(), name
        _same(want.log, got.log)


@pytest.mark.slow
@pytest.mark.xdist_group("dask_cluster")
def test_blocked_run_on_dask_is_identical(dask_cluster):
    dem = _dem((48, 40))
    m = MODELS["independent"]
    want = run_ensemble(dem, CreditJob("depressions"), m, realisations=2, seed=4,
                        backend="serial")
    got = run_ensemble(dem, CreditJob("depressions"), m, realisations=2, seed=4,
                       scheduler=dask_cluster.scheduler_address, block=16)
    _same(want.log, got.log)


def test_block_is_refused_when_it_cannot_work():
    dem = _dem((40, 40))
    with pytest.raises(OptionError, match="block"):
        run_ensemble(dem, CreditJob("peaks"), MODELS["independent"], realisations=1, block=3)
    from terrain.jobs import CatchmentJob

    job = CatchmentJob(("a",), np.array([[100.0, 500.0]]))
    with pytest.raises(OptionError, match="peaks and depressions"):
        run_ensemble(dem, job, MODELS["independent"], realisations=1, block=32)


def _layers(folder):
    out = {}
    for p in sorted(folder.glob("*.tif")):
        with rasterio.open(p) as ds:
            out[p.name] = ds.read()
    return out


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["peaks", "depressions"])
def test_cli_layers_identical_with_block(cairn, tmp_path, kind):
    p = write_tif(tmp_path / "dem.tif", smooth_terrain((64, 72), seed=8))
    run = (kind, p, "--rmse", "1", "--range", "60", "-n", "4", "--workers", "1", "-q",
           "--seed", "9", "--kernel", "gaussian" if kind == "peaks" else "uniform")
    assert cairn(*run, "-o", tmp_path / "whole")[0] == 0
    code, _, err = cairn(*run, "-o", tmp_path / "blocks", "--block", "16")
    assert code == 0, err
    a, b = _layers(tmp_path / "whole"), _layers(tmp_path / "blocks")
    assert a.keys() == b.keys() and a
    for name in a:
        assert a[name].tobytes() == b[name].tobytes(), name
    ta = (tmp_path / "whole" / ("summits.csv" if kind == "peaks" else "pits.csv")).read_text()
    tb = (tmp_path / "blocks" / ("summits.csv" if kind == "peaks" else "pits.csv")).read_text()
    assert ta == tb


def test_cli_blocked_resume_is_identical(cairn, tmp_path):
    p = write_tif(tmp_path / "dem.tif", smooth_terrain((48, 56), seed=5))
    run = ("depressions", p, "--rmse", "1", "--workers", "1", "-q", "--seed", "3")
    assert cairn(*run, "-n", "4", "-o", tmp_path / "whole")[0] == 0
    ck = tmp_path / "ck.npz"
    assert cairn(*run, "-n", "2", "-o", tmp_path / "b", "--block", "16", "--checkpoint", ck)[0] == 0
    code, _, err = cairn(*run, "-n", "4", "-o", tmp_path / "b", "--block", "32", "--checkpoint",
                         ck, "--resume", "--overwrite")
    assert code == 0, err
    a, b = _layers(tmp_path / "whole"), _layers(tmp_path / "b")
    for name in a:
        assert a[name].tobytes() == b[name].tobytes(), name


def test_cli_bad_block_is_one_line(cairn, tmp_path):
    p = write_tif(tmp_path / "dem.tif", smooth_terrain((30, 30), seed=5))
    code, _, err = cairn("peaks", p, "-o", tmp_path / "o", "--rmse", "1", "-n", "2", "-q",
                         "--block", "4")
    lines = said(err)
    assert code == 2 and len(lines) == 1 and "--block" in lines[0] and "Traceback" not in err
    assert not (tmp_path / "o").exists() or not any((tmp_path / "o").iterdir())


def test_guard_chooses_blocks_when_only_they_fit(monkeypatch):
    from types import SimpleNamespace

    import terrain.resources as resources
    from terrain.runner import Execution

    head = SimpleNamespace(shape=(4000, 4000), cells=16_000_000, value_bytes=4, stored_bytes=2,
                           source="big.tif")  # what the guard reads of a header
    job, ex = CreditJob("depressions"), Execution(workers=2)
    whole = resources.estimate_run(head, job, ex)
    blocked = resources.estimate_run(head, job, Execution(workers=2, block=1024))
    assert blocked.worker < whole.worker and blocked.total < whole.total
    monkeypatch.setattr(resources, "available_bytes", lambda: (whole.total + blocked.total) // 2)
    layout = resources.choose_layout(head, job, ex)
    assert layout.block == resources.DEFAULT_BLOCK and layout.on_disk and layout.counts_on_disk
    monkeypatch.setattr(resources, "available_bytes", lambda: whole.total + 1)
    assert not resources.choose_layout(head, job, ex).blocked


def test_scratch_of_a_killed_run_is_removed_by_the_next_run(tmp_path, monkeypatch):
    # a scratch folder belongs to the lock its run holds (terrain.io.scratch_folder): a killed
    # run's lock is free, so the next run removes its folder; a folder without a lock to take
    # is not provably dead and stays (tests/test_bad_input.py has the live-run cases)
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    left = tmp_path / "cairn-blocks-999999-abc123"
    left.mkdir()
    (left / "lock").write_text("")
    (left / "dem.npy").write_bytes(b"x")
    mine = tmp_path / "cairn-blocks-notapid-x"  # no lock file: kept
    mine.mkdir()
    run_ensemble(_dem((20, 20)), CreditJob("peaks"), MODELS["independent"], realisations=1,
                 backend="serial")  # any run, blocked or not
    assert not left.exists() and mine.exists()
