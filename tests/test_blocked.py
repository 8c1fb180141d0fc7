"""Blocked engine: bit for bit the whole-raster engine, block by block.

The reference is ``pairs()`` / ``pairs_and_fill()`` / ``regions()`` /
``pits_and_levels()`` on the whole raster (themselves checked against
outside references in test_persistence.py and test_features.py: gudhi,
scikit-image reconstruction by erosion, and the cell-by-cell definition of
the simplified watershed in tests/reference_regions.py); small cases are
also checked directly against gudhi (The GUDHI Project, GUDHI User and
Reference Manual, 2024) and the cell-by-cell definition.
"""

from __future__ import annotations

import concurrent.futures
import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from terrain.engine.blocked import (
    LevelInputs,
    blocked_fill,
    blocked_levels,
    blocked_pairs,
    collect,
    finish,
    finish_levels,
    glue,
    levels_from,
    local,
    local_and_levels,
    read_block,
    windows,
)
from terrain.engine.blocked_regions import (
    blocked_regions,
    glue_regions,
    region_labels,
    region_step,
    region_table,
    window_reps,
)
from terrain.engine.persistence import count_ponding, pairs, pairs_and_fill, pits_and_levels, regions
from terrain.errors import OptionError
from terrain.io import load_scratch, save_scratch

from .conftest import smooth_terrain
from .reference_regions import regions_by_cells, same_partition
from .test_persistence import gudhi_pairs, values

FIELDS = ("birth", "death", "birth_value", "death_value", "persistence", "edge_limited", "elder")


def assert_identical(p, q):
    """Every field equal bit for bit, with the same dtype and order."""
    assert p.kind == q.kind
    for f in FIELDS:
        a, b = getattr(p, f), getattr(q, f)
        assert a.dtype == b.dtype and a.shape == b.shape, f
        assert a.tobytes() == b.tobytes(), f


def _plateaus(shape, seed):
    # equal-valued flats several cells wide, crossing every block line
    z = np.round(smooth_terrain(shape, seed=seed, scales=(4, 9)) / 60)
    z[5:12, :] = 2.0
    z[:, 8:11] = -1.0
    return z.astype(np.float32)


def _holes(shape, seed):
    z = smooth_terrain(shape, seed=seed)
    rng = np.random.default_rng(seed)
    z[rng.random(shape) < 0.08] = np.nan
    z[10:14, 3:25] = np.nan  # a long hole across block lines
    z[0, :] = np.inf  # +-inf is nodata too
    return z


CASES = {
    "smooth": lambda: smooth_terrain((37, 45), seed=11),
    "integer-ties": lambda: np.round(smooth_terrain((33, 29), seed=12) / 40).astype(np.int16),
    "white-noise": lambda: np.random.default_rng(13).standard_normal((31, 26)),
    "few-levels": lambda: np.random.default_rng(14).integers(0, 3, (27, 30)).astype(np.int32),
    "plateaus": lambda: _plateaus((30, 34), 15),
    "holes": lambda: _holes((32, 36), 16),
}
BLOCKS = [(1, 1000), (1000, 1), (2, 3), (5, 4), (7, 7), (16, 9), (1000, 1000)]


@pytest.mark.slow
@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("kind", ["peaks", "pits"])
@pytest.mark.parametrize("conn", [8, 4])
@pytest.mark.parametrize("outlet", [True, False])  # the default (None) is in the property tests
def test_blocked_equals_whole_raster(case, kind, conn, outlet):
    z = CASES[case]()
    ref = pairs(z, kind=kind, connectivity=conn, edge_outlet=outlet)
    for block in BLOCKS:
        got = blocked_pairs(z, kind=kind, connectivity=conn, edge_outlet=outlet, block=block)
        assert_identical(got, ref)


@pytest.mark.parametrize("kind", ["peaks", "pits"])
def test_single_cell_blocks(kind):
    # every cell its own block: everything is decided by the global step
    z = np.round(smooth_terrain((9, 11), seed=3) / 50).astype(np.float32)
    z[4, 2:6] = np.nan
    for conn in (4, 8):
        assert_identical(blocked_pairs(z, kind=kind, connectivity=conn, block=1),
                         pairs(z, kind=kind, connectivity=conn))


def test_usgs_dem(usgs_dem):
    # real integer-metre DEM full of ties, blocks of uneven size
    z = usgs_dem[:120, :150]
    for kind in ("peaks", "pits"):
        for conn in (8, 4):
            assert_identical(blocked_pairs(z, kind=kind, connectivity=conn, block=(37, 41)),
                             pairs(z, kind=kind, connectivity=conn))


@pytest.mark.parametrize("case", ["smooth", "white-noise", "few-levels"])
@pytest.mark.parametrize("kind", ["peaks", "pits"])
@pytest.mark.parametrize("conn", [8, 4])
def test_blocked_equals_gudhi(case, kind, conn):
    # outside reference: gudhi (The GUDHI Project, GUDHI User and Reference Manual, 2024);
    # CubicalComplex(top_dimensional_cells=A) is the 8-connected sublevel filtration,
    # CubicalComplex(vertices=A) the 4-connected one
    z = CASES[case]().astype(np.float64)
    outlet = kind == "pits"
    ref = gudhi_pairs(z, kind, conn, outlet)
    p = blocked_pairs(z, kind=kind, connectivity=conn, block=(6, 5))
    f = ~p.essential
    got = list(zip(p.birth_value[f], p.death_value[f], p.birth[f], p.death[f]))
    assert values(got) == values(ref)
    if case != "few-levels":  # distinct values: cells match too
        assert sorted((b, d) for *_, b, d in got) == sorted((b, d) for *_, b, d in ref)


elements = st.one_of(st.sampled_from([0.0, 1.0, 2.0, 3.0]), st.just(np.nan),
                     st.floats(-4, 4, width=32), st.just(np.inf), st.sampled_from([-0.0]))


@settings(max_examples=250, deadline=None)
@given(a=arrays(np.float32, st.tuples(st.integers(1, 12), st.integers(1, 12)), elements=elements),
       br=st.integers(1, 13), bc=st.integers(1, 13), kind=st.sampled_from(["peaks", "pits"]),
       conn=st.sampled_from([4, 8]), outlet=st.sampled_from([None, True, False]))
def test_properties_blocked_equals_whole(a, br, bc, kind, conn, outlet):
    ref = pairs(a, kind=kind, connectivity=conn, edge_outlet=outlet)
    got = blocked_pairs(a, kind=kind, connectivity=conn, edge_outlet=outlet, block=(br, bc))
    assert_identical(got, ref)


@pytest.mark.slow
@settings(max_examples=100, deadline=None)
@given(a=arrays(np.int16, st.tuples(st.integers(1, 14), st.integers(1, 14)),
                elements=st.integers(0, 3)),
       br=st.integers(1, 15), bc=st.integers(1, 15), conn=st.sampled_from([4, 8]))
def test_properties_fill_equals_whole(a, br, bc, conn):
    a = a.astype(np.float64)
    a[a == 3] = np.nan  # nodata: an outlet too
    p_ref, f_ref = pairs_and_fill(a, connectivity=conn)
    p, f = blocked_fill(a, connectivity=conn, block=(br, bc))
    assert_identical(p, p_ref)
    assert f.dtype == f_ref.dtype and f.tobytes() == f_ref.tobytes()
    # and each cell's fill level and depression depth (pits_and_levels per cell)
    lv_ref, dp_ref = _levels(a, conn)
    _, lv, dp = blocked_levels(a, connectivity=conn, block=(br, bc))
    assert lv.tobytes() == lv_ref.tobytes() and dp.tobytes() == dp_ref.tobytes()


@pytest.mark.parametrize("case", ["smooth", "integer-ties", "plateaus", "holes", "white-noise"])
@pytest.mark.parametrize("conn", [8, 4])
def test_fill_equals_whole(case, conn):
    z = CASES[case]()
    p_ref, f_ref = pairs_and_fill(z, connectivity=conn)
    for block in [(1, 1000), (1000, 1), (3, 4), (8, 11), (1000, 1000)]:
        p, f = blocked_fill(z, connectivity=conn, block=block)
        assert_identical(p, p_ref)
        assert f.tobytes() == f_ref.tobytes()


def test_fill_into_memmap(tmp_path):
    z = smooth_terrain((40, 50), seed=21)
    out = np.lib.format.open_memmap(tmp_path / "filled.npy", mode="w+", dtype=np.float64,
                                    shape=z.shape)
    _, f = blocked_fill(z, block=(16, 16), out=out)
    assert f is out
    np.testing.assert_array_equal(np.load(tmp_path / "filled.npy"), pairs_and_fill(z)[1])


class LazyTerrain:
    """Computes DEM plus noise per window; never holds the raster."""

    def __init__(self, shape, seed):
        self.shape = shape
        self.seed = seed
        self.reads = []

    def __getitem__(self, key):
        rows, cols = key
        r = np.arange(rows.start, rows.stop)[:, None]
        c = np.arange(cols.start, cols.stop)[None, :]
        self.reads.append((rows.stop - rows.start) * (cols.stop - cols.start))
        noise = np.sin(r * 12.9898 + c * 78.233 + self.seed) * 43758.5453 % 1.0
        return (np.sin(r / 7.0) * np.cos(c / 5.0) * 50 + noise).astype(np.float32)

    def full(self):
        return self[0:self.shape[0], 0:self.shape[1]]


def test_sources_memmap_lazy_and_mask(tmp_path):
    lazy = LazyTerrain((50, 61), seed=1)
    z = lazy.full()
    lazy.reads.clear()
    got = blocked_pairs(lazy, kind="peaks", block=(16, 20))
    assert_identical(got, pairs(z, kind="peaks"))
    assert max(lazy.reads) <= 18 * 22  # one block plus halo at a time
    mm = np.lib.format.open_memmap(tmp_path / "z.npy", mode="w+", dtype=z.dtype, shape=z.shape)
    mm[:] = z
    mask = np.zeros(z.shape, bool)
    mask[20:30, 5:40] = True
    assert_identical(blocked_pairs(mm, kind="pits", block=(13, 17), mask=mask),
                     pairs(z, kind="pits", mask=mask))


def test_min_persistence_is_the_filtered_subset():
    z = smooth_terrain((40, 44), seed=22)
    for kind in ("peaks", "pits"):
        full = pairs(z, kind=kind)
        keep = full.persistence >= 25.0
        got = blocked_pairs(z, kind=kind, block=(9, 13), min_persistence=25.0)
        for f in FIELDS:
            np.testing.assert_array_equal(getattr(got, f), getattr(full, f)[keep])
        assert len(got) < len(full)


def test_parallel_map_with_processes():
    z = smooth_terrain((60, 70), seed=23)
    with concurrent.futures.ProcessPoolExecutor(2) as ex:
        got = blocked_pairs(z, kind="pits", block=(25, 25), map=ex.map)
        p, f = blocked_fill(z, block=(25, 30), map=ex.map)
    assert_identical(got, pairs(z, kind="pits"))
    assert f.tobytes() == pairs_and_fill(z)[1].tobytes()


def test_pure_steps_pickle_and_any_order():
    z = smooth_terrain((45, 40), seed=24)
    wins = windows(z.shape, (12, 17))
    sums = [pickle.loads(pickle.dumps(local(read_block(z, w, z.shape), w, z.shape, kind="pits")))
            for w in wins]
    res = glue(sums[::-1])  # order of summaries does not matter
    assert_identical(collect(sums, res), pairs(z, kind="pits"))
    filled = np.empty(z.shape)
    for w in wins:
        filled[w.r0:w.r1, w.c0:w.c1] = finish(read_block(z, w, z.shape), w, pickle.loads(pickle.dumps(res)))
    assert filled.tobytes() == pairs_and_fill(z)[1].tobytes()


def test_blocks_resolve_most_pairs_and_hand_up_only_boundaries():
    z = smooth_terrain((128, 128), seed=25) + 30 * np.random.default_rng(0).standard_normal((128, 128))
    wins = windows(z.shape, 64)
    sums = [local(read_block(z, w, z.shape), w, z.shape, kind="peaks") for w in wins]
    res = glue(sums)
    total = sum(s.birth.size for s in sums) + res.birth.size
    assert res.birth.size < 0.2 * total  # most pairs are final in their block
    boundary = sum(s.boundary_cells() for s in sums)
    assert boundary == 2 * 2 * 128  # two block lines, both sides, 128 cells long
    assert sum(s.boundary_nbytes() for s in sums) < 100 * boundary  # no per-cell arrays


def test_bad_input():
    z = np.zeros((4, 4))
    with pytest.raises(OptionError):
        blocked_pairs(z, kind="hills")
    with pytest.raises(OptionError):
        blocked_pairs(z, kind="pits", connectivity=6)
    with pytest.raises(OptionError):
        blocked_pairs(z, kind="pits", block=0)
    with pytest.raises(OptionError):
        blocked_pairs(np.zeros((2, 2, 2)), kind="pits")
    wins = windows(z.shape, 2)
    sums = [local(read_block(z, w, z.shape), w, z.shape, kind="peaks") for w in wins]
    with pytest.raises(OptionError):
        glue(sums[:-1])  # a block missing
    with pytest.raises(OptionError):
        finish(read_block(z, wins[0], z.shape), wins[0], glue(sums))  # fill needs pits
    with pytest.raises(OptionError):
        local(z, wins[0], z.shape, kind="peaks")  # values must cover the window plus halo


def test_empty_and_all_nodata():
    for shape in [(0, 5), (4, 0)]:
        assert_identical(blocked_pairs(np.zeros(shape), kind="peaks"), pairs(np.zeros(shape), kind="peaks"))
    z = np.full((6, 7), np.nan)
    for kind in ("peaks", "pits"):
        assert_identical(blocked_pairs(z, kind=kind, block=3), pairs(z, kind=kind))


# ----------------------------------------------------------------------------
# regions and depression depths
# ----------------------------------------------------------------------------
REGION_FIELDS = FIELDS[:-1]  # regions carry no elder


def assert_same_regions(got, ref):
    """Table bit for bit (fields, dtypes, order) and labels equal."""
    assert (got.kind, got.merge_level, len(got)) == (ref.kind, ref.merge_level, len(ref))
    for f in REGION_FIELDS:
        a, b = getattr(got, f), getattr(ref, f)
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), f
    labels = np.asarray(got.labels)
    assert labels.dtype == ref.labels.dtype == np.int32
    assert np.array_equal(labels, ref.labels)


# merge levels 0, small and large for each raster (its relief in brackets)
LEVELS = {"smooth": (0.0, 3.0, 40.0), "integer-ties": (0.0, 1.0, 3.0),
          "white-noise": (0.0, 0.4, 2.0), "plateaus": (0.0, 1.0, 3.0), "holes": (0.0, 3.0, 40.0)}
REGION_BLOCKS = [(1, 1000), (7, 6), (1000, 1), (13, 8), (1000, 1000)]


@pytest.mark.slow
@pytest.mark.parametrize("case", sorted(LEVELS))
@pytest.mark.parametrize("kind", ["peaks", "pits"])
def test_blocked_regions_equal_whole_raster(case, kind):
    # both connectivities, with and without the outlet, merge levels 0, small and
    # large; the block shape turns with them, so every case meets slivers, small
    # blocks and the whole raster (the property test adds random ones)
    z = CASES[case]()
    turn = 0
    for conn in (8, 4):
        for outlet in (True, False):
            for level in LEVELS[case]:
                ref = regions(z, kind=kind, merge_level=level, connectivity=conn, edge_outlet=outlet)
                block = REGION_BLOCKS[turn % len(REGION_BLOCKS)]
                turn += 1
                got = blocked_regions(z, kind=kind, merge_level=level, connectivity=conn,
                                      edge_outlet=outlet, block=block)
                assert_same_regions(got, ref)


@pytest.mark.slow
@settings(max_examples=150, deadline=None)
@given(a=arrays(np.float32, st.tuples(st.integers(1, 12), st.integers(1, 12)), elements=elements),
       br=st.integers(1, 13), bc=st.integers(1, 13), kind=st.sampled_from(["peaks", "pits"]),
       conn=st.sampled_from([4, 8]), outlet=st.sampled_from([None, True, False]),
       level=st.sampled_from([0.0, 0.3, 1.0, 2.5, 100.0]))
def test_properties_blocked_regions_equal_whole(a, br, bc, kind, conn, outlet, level):
    ref = regions(a, kind=kind, merge_level=level, connectivity=conn, edge_outlet=outlet)
    got = blocked_regions(a, kind=kind, merge_level=level, connectivity=conn, edge_outlet=outlet,
                          block=(br, bc))
    assert_same_regions(got, ref)


def test_blocked_regions_equal_the_cell_by_cell_definition():
    # outside reference: the definition cell by cell (tests/reference_regions.py;
    # Edelsbrunner et al. 2002 elder rule, Najman & Schmitt 1996 merging by dynamics)
    for seed, (kind, conn, level) in enumerate([("pits", 8, 0.5), ("peaks", 4, 0.5), ("pits", 4, 0.0)]):
        z = np.random.default_rng(seed).standard_normal((17, 19)).astype(np.float32)
        z[6:9, 4:15] = np.nan
        got = blocked_regions(z, kind=kind, merge_level=level, connectivity=conn, block=(5, 6))
        assert same_partition(got.labels, regions_by_cells(z, kind, level, conn, None))


@pytest.mark.slow
def test_float64_raster_compares_in_float64():
    # one value that is not a float32 makes the whole raster work in float64:
    # blocks that are all float32 must not decide the merge level in float32
    z = np.round(smooth_terrain((24, 30), seed=31) * 8) / 8
    z = z.astype(np.float32).astype(np.float64)
    z[0, 0] += 1e-9
    for level in (0.125, 0.25, 1.0):
        for kind in ("peaks", "pits"):
            assert_same_regions(blocked_regions(z, kind=kind, merge_level=level, block=(7, 9)),
                                regions(z, kind=kind, merge_level=level))


def _levels(z, conn=8, mask=None):
    """pits_and_levels() read per cell: level[basin], depth[basin] (NaN on nodata)."""
    _, f = pits_and_levels(z, connectivity=conn, mask=mask)
    b = np.where(f.valid, -f.labels.astype(np.int64) - 1, 0)
    shape = np.shape(z)
    if f.level.size == 0:  # all nodata
        return np.full(shape, np.nan), np.full(shape, np.nan)
    return (np.where(f.valid, f.level[b], np.nan).reshape(shape),
            np.where(f.valid, f.depth[b], np.nan).reshape(shape))


@pytest.mark.parametrize("case", ["smooth", "integer-ties", "plateaus", "holes", "white-noise"])
@pytest.mark.parametrize("conn", [8, 4])
def test_levels_and_depths_equal_whole(case, conn):
    z = CASES[case]()
    lv_ref, dp_ref = _levels(z, conn)
    for block in [(1, 1000), (1000, 1), (6, 7), (1000, 1000)]:
        p, lv, dp = blocked_levels(z, connectivity=conn, block=block)
        assert_identical(p, pairs(z, kind="pits", connectivity=conn))
        assert lv.tobytes() == lv_ref.tobytes() and dp.tobytes() == dp_ref.tobytes()


@pytest.mark.parametrize("case", ["integer-ties", "holes", "white-noise"])
def test_levels_kept_from_the_local_step(case, tmp_path):
    # the second pass of depressions reads what the first pass kept (saved and
    # loaded as a file between them): per cell its row, per row a level and a depth
    z = CASES[case]()
    lv_ref, dp_ref = _levels(z, 8)
    wins = windows(z.shape, (6, 7))
    out = [local_and_levels(read_block(z, w, z.shape), w, z.shape) for w in wins]
    res = glue([s for s, _ in out])
    for w, (_, kept) in zip(wins, out):
        kept = LevelInputs(**load_scratch(save_scratch(str(tmp_path / "levels.npz"),
                                                      kept.arrays())))
        lv, dp = levels_from(kept, w, res)
        rows = kept.dest.reshape(w.r1 - w.r0, w.c1 - w.c0)
        ok = rows >= 0
        assert np.array_equal(ok, np.isfinite(z[w.r0:w.r1, w.c0:w.c1]))
        assert lv[rows[ok]].tobytes() == lv_ref[w.r0:w.r1, w.c0:w.c1][ok].tobytes()
        assert dp[rows[ok]].tobytes() == dp_ref[w.r0:w.r1, w.c0:w.c1][ok].tobytes()


def test_ponding_counted_per_block_equals_whole(usgs_dem):
    # count_ponding on each block's per-cell levels and depths, with the blocked
    # region labels, against the whole raster (ponded counts, and region areas and
    # volumes summed in fixed point, exact in any order)
    z = usgs_dem[:90, :110].astype(np.float32)
    z[40:44, 10:70] = np.nan
    reg = regions(z, kind="pits", merge_level=2.0).labels.reshape(-1)
    k = reg.max() + 1
    for cut in (0.0, 1.0, 3.0):
        _, f = pits_and_levels(z)
        want = np.zeros(z.size, np.int32)
        a_ref, v_ref = np.zeros(k, np.int64), np.zeros(k, np.int64)
        count_ponding(f.zf, f.valid, f.labels, f.level, f.depth, cut, want, reg, np.ones(90), 110,
                      a_ref, v_ref)
        got = np.zeros(z.shape, np.int32)
        area, vol = np.zeros(k, np.int64), np.zeros(k, np.int64)
        sums = [local(read_block(z, w, z.shape), w, z.shape, kind="pits", termini=True)
                for w in windows(z.shape, (32, 41))]
        res = glue(sums)
        out = blocked_regions(z, kind="pits", merge_level=2.0, block=(32, 41)).labels
        for w in windows(z.shape, (32, 41)):
            lv, dp = finish_levels(read_block(z, w, z.shape), w, res)
            zb = np.ascontiguousarray(z[w.r0:w.r1, w.c0:w.c1]).reshape(-1)
            cnt = np.zeros(zb.size, np.int32)
            count_ponding(zb, np.isfinite(zb), -(np.arange(zb.size) + 1), lv.reshape(-1),
                          dp.reshape(-1), cut, cnt, out[w.r0:w.r1, w.c0:w.c1].reshape(-1),
                          np.ones(w.r1 - w.r0), w.c1 - w.c0, area, vol)
            got[w.r0:w.r1, w.c0:w.c1] = cnt.reshape(w.r1 - w.r0, w.c1 - w.c0)
        assert np.array_equal(got.reshape(-1), want) and want.sum() > 0
        assert np.array_equal(area, a_ref) and np.array_equal(vol, v_ref)


def test_regions_into_memmap_from_lazy_source_with_mask(tmp_path):
    lazy = LazyTerrain((50, 61), seed=2)
    z = lazy.full()
    mask = np.zeros(z.shape, bool)
    mask[20:24, 3:50] = True
    out = np.lib.format.open_memmap(tmp_path / "labels.npy", mode="w+", dtype=np.int32, shape=z.shape)
    lazy.reads.clear()
    got = blocked_regions(lazy, kind="peaks", merge_level=5.0, block=(16, 20), out=out, mask=mask)
    assert got.labels is out
    assert max(lazy.reads) <= 18 * 22  # one block plus halo at a time
    ref = regions(z, kind="peaks", merge_level=5.0, mask=mask)
    out.flush()
    assert_same_regions(got, ref)
    assert np.array_equal(np.load(tmp_path / "labels.npy"), ref.labels)


def test_regions_and_levels_with_processes():
    z = smooth_terrain((60, 70), seed=26) + np.random.default_rng(1).standard_normal((60, 70))
    with concurrent.futures.ProcessPoolExecutor(2) as ex:
        got = blocked_regions(z, kind="pits", merge_level=2.0, block=(25, 25), map=ex.map)
        _, lv, dp = blocked_levels(z, block=(25, 30), map=ex.map)
    assert_same_regions(got, regions(z, kind="pits", merge_level=2.0))
    lv_ref, dp_ref = _levels(z)
    assert lv.tobytes() == lv_ref.tobytes() and dp.tobytes() == dp_ref.tobytes()


def test_region_steps_pickle_and_hand_up_only_boundaries():
    # the pure steps, pickled as for worker processes; what crosses between
    # blocks grows with the block boundaries, not with the cells
    z = smooth_terrain((128, 128), seed=27) + 3 * np.random.default_rng(2).standard_normal((128, 128))
    z = z.astype(np.float32)
    level = 8.0
    wins = windows(z.shape, 32)
    sums = [local(read_block(z, w, z.shape), w, z.shape, kind="pits", termini=True,
                  merge_level=level) for w in wins]
    res = pickle.loads(pickle.dumps(glue(sums)))
    table = region_table(collect(sums, res), level, res.float32)
    reps = window_reps(table, wins, z.shape)
    steps = [pickle.loads(pickle.dumps(region_step(read_block(z, w, z.shape), w, res, level, r)))
             for w, r in zip(wins, reps)]
    glued = pickle.loads(pickle.dumps(glue_regions(res, table, steps[::-1])))
    labels = np.empty(z.shape, np.int32)
    for w, r, s in zip(wins, reps, steps):
        lab = s.labels if s.labels is not None else region_labels(read_block(z, w, z.shape), w, glued, r)
        labels[w.r0:w.r1, w.c0:w.c1] = lab
    ref = regions(z, kind="pits", merge_level=level)
    assert np.array_equal(labels, ref.labels)
    boundary = sum(s.boundary_cells() for s in sums)
    assert boundary == 2 * 3 * 2 * 128  # three block lines each way, both sides
    handed = sum(s.source.nbytes + s.value.nbytes + s.needs.nbytes for s in steps)
    assert handed < 16 * boundary
    assert sum(s.boundary_nbytes() for s in sums) < 100 * boundary


def test_region_and_level_steps_bad_input():
    z = smooth_terrain((12, 12), seed=28)
    with pytest.raises(OptionError, match="merge_level"):
        blocked_regions(z, kind="pits", merge_level=-1.0)
    with pytest.raises(OptionError, match="merge_level"):
        blocked_regions(z, kind="pits", merge_level=np.nan)
    with pytest.raises(OptionError):
        blocked_regions(z, kind="hills", merge_level=1.0)
    wins = windows(z.shape, 6)
    plain = glue([local(read_block(z, w, z.shape), w, z.shape, kind="pits") for w in wins])
    with pytest.raises(OptionError, match="termini"):
        finish_levels(read_block(z, wins[0], z.shape), wins[0], plain)
    with pytest.raises(OptionError, match="termini"):
        region_step(read_block(z, wins[0], z.shape), wins[0], plain, 1.0,
                    (np.empty(0, np.int64), np.empty(0, np.int64)))
    peaks = glue([local(read_block(z, w, z.shape), w, z.shape, kind="peaks", termini=True)
                  for w in wins])
    with pytest.raises(OptionError, match="pits"):
        finish_levels(read_block(z, wins[0], z.shape), wins[0], peaks)


def test_regions_empty_and_all_nodata():
    for shape in [(0, 5), (4, 0)]:
        got = blocked_regions(np.zeros(shape), kind="peaks", merge_level=1.0)
        assert len(got) == 0 and got.labels.shape == shape
    z = np.full((6, 7), np.nan)
    for kind in ("peaks", "pits"):
        assert_same_regions(blocked_regions(z, kind=kind, merge_level=1.0, block=3),
                            regions(z, kind=kind, merge_level=1.0))


@pytest.mark.parametrize("conn", [4, 8])
@pytest.mark.parametrize("seed", range(6))
def test_cell_flags_follow_their_definition(conn, seed):
    # EDGE: on the raster edge or beside nodata; TERM: a valid neighbour in
    # another block (the definitions, cell by cell: common practice for
    # blocked merge trees); blocks with and without nodata, and halos with it
    from terrain.engine.blocked import kernels as K
    from terrain.engine.blocked.local import prepare_block
    from terrain.engine.blocked.windows import Window, halo
    from terrain.engine.grid import offsets

    rng = np.random.default_rng(seed)
    shape = (int(rng.integers(3, 30)), int(rng.integers(3, 30)))
    z = rng.random(shape)
    z[rng.random(shape) < [0.0, 0.02, 0.2, 0.5, 0.05, 0.9][seed]] = np.nan
    dr, dc = offsets(conn)
    r0, c0 = int(rng.integers(0, shape[0] - 2)), int(rng.integers(0, shape[1] - 2))
    w = Window(r0, int(rng.integers(r0 + 1, shape[0] + 1)), c0,
               int(rng.integers(c0 + 1, shape[1] + 1)))
    h = halo(w, shape)
    blk = prepare_block(z[h.r0:h.r1, h.c0:h.c1], w, shape, "pits", conn)
    want = np.zeros((w.r1 - w.r0, w.c1 - w.c0), np.uint8)
    for r in range(w.r0, w.r1):
        for c in range(w.c0, w.c1):
            if np.isnan(z[r, c]):
                continue
            f = 0
            for a, b in zip(dr, dc):
                rr, cc = r + a, c + b
                if not (0 <= rr < shape[0] and 0 <= cc < shape[1]) or np.isnan(z[rr, cc]):
                    f |= K.EDGE
                elif not (w.r0 <= rr < w.r1 and w.c0 <= cc < w.c1):
                    f |= K.TERM
            want[r - w.r0, c - w.c0] = f
    assert np.array_equal(blk.flags.reshape(want.shape), want)


def test_scratch_files_give_back_the_arrays_as_saved(tmp_path):
    # the level inputs kept between a realisation's passes: every dtype and shape
    # back as saved (0-d, empty, big-endian, Fortran order, strided, dates, text),
    # and no Python objects written (they would be pointers, not values)
    arrays = {"f0": np.array(3.5), "dest": np.arange(7, dtype=np.int32),
              "be": np.arange(6, dtype=">i4").reshape(2, 3),
              "fortran": np.asfortranarray(np.arange(6.0).reshape(2, 3)),
              "empty": np.zeros((0, 3), np.int64), "flags": np.array([True, False]),
              "strided": np.arange(20)[::3], "when": np.array(["2020-01-01"], "datetime64[D]"),
              "names": np.array(["é", "ab"])}
    back = load_scratch(save_scratch(str(tmp_path / "a"), arrays))
    assert list(back) == list(arrays)
    for k, v in arrays.items():
        assert back[k].dtype == v.dtype and back[k].shape == v.shape
        assert np.array_equal(back[k], v)
    with pytest.raises(TypeError, match="no Python objects"):
        save_scratch(str(tmp_path / "b"), {"o": np.array([1, None], object)})
