"""0-dimensional persistence pairs checked against outside references.

References used here:
- gudhi (The GUDHI Project, GUDHI User and Reference Manual, 2024):
  ``CubicalComplex(top_dimensional_cells=A)`` is the 8-connected sublevel
  filtration, ``CubicalComplex(vertices=A)`` the 4-connected one.
- Soille, P. (2004), Morphological Image Analysis, 2nd ed.: filling holes by
  morphological reconstruction by erosion, as computed by
  ``skimage.morphology.reconstruction(seed, z, method="erosion")``.
- Prominence by its definition (height of a summit above its key col; the
  highest summit measured to a base), by brute-force threshold search.
"""

from __future__ import annotations

import gudhi
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import ndimage

from terrain.engine.persistence import pairs, pairs_and_fill, regions

from .conftest import smooth_terrain
from .reference_regions import regions_by_cells, same_partition


def gudhi_pairs(a, kind, conn, outlet):
    """Finite (birth value, death value) pairs from gudhi, plus birth/death cells."""
    z = (-a if kind == "peaks" else a).astype(np.float64)
    pad = 1 if outlet else 0
    if outlet:
        lo = np.nanmin(z) - 1
        z = np.pad(z, 1, constant_values=lo)
    cc = (gudhi.CubicalComplex(top_dimensional_cells=z) if conn == 8
          else gudhi.CubicalComplex(vertices=z))
    cc.compute_persistence(homology_coeff_field=2, min_persistence=-1)
    if conn == 8:
        reg = cc.cofaces_of_persistence_pairs()[0]
    else:
        reg = cc.vertices_of_persistence_pairs()[0]
    out = []
    if len(reg):
        fin = np.asarray(reg[0]).reshape(-1, 2)
        # gudhi numbers cells in column-major order (first axis fastest)
        br, bc = np.unravel_index(fin[:, 0], z.shape, order="F")
        dr, dc = np.unravel_index(fin[:, 1], z.shape, order="F")
        for b0, b1, d0, d1 in zip(br, bc, dr, dc):
            bv, dv = z[b0, b1], z[d0, d1]
            if bv == dv or (outlet and bv == lo):
                continue
            sign = -1 if kind == "peaks" else 1
            shape = a.shape
            out.append((sign * bv, sign * dv, (b0 - pad) * shape[1] + b1 - pad,
                        (d0 - pad) * shape[1] + d1 - pad))
    return out


def ours(a, kind, conn, outlet):
    p = pairs(a, kind=kind, connectivity=conn, edge_outlet=outlet)
    f = ~p.essential
    return list(zip(p.birth_value[f], p.death_value[f], p.birth[f], p.death[f]))


def values(lst):
    return sorted((float(b), float(d)) for b, d, *_ in lst)


CASES = {
    "smooth": lambda: smooth_terrain((61, 61), seed=1),
    "non-square": lambda: smooth_terrain((23, 70), seed=2),
    "integer-ties": lambda: np.round(smooth_terrain((50, 41), seed=3) / 40).astype(np.float32),
    "white-noise": lambda: np.random.default_rng(4).standard_normal((37, 29)).astype(np.float32),
}


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("kind", ["peaks", "pits"])
@pytest.mark.parametrize("conn", [8, 4])
@pytest.mark.parametrize("outlet", [False, True])
def test_pairs_equal_gudhi(case, kind, conn, outlet):
    a = CASES[case]()
    ref = gudhi_pairs(a, kind, conn, outlet)
    got = ours(a, kind, conn, outlet)
    assert values(got) == values(ref)
    if case in ("smooth", "non-square", "white-noise"):  # distinct values: cells match too
        assert sorted((b, d) for *_, b, d in got) == sorted((b, d) for *_, b, d in ref)


@pytest.mark.parametrize("kind", ["peaks", "pits"])
@pytest.mark.parametrize("conn", [8, 4])
def test_pairs_equal_gudhi_on_usgs_dem(usgs_dem, kind, conn):
    # real USGS 3 arc-second DEM shipped with matplotlib: integer metres, full of ties
    assert values(ours(usgs_dem, kind, conn, kind == "pits")) == values(
        gudhi_pairs(usgs_dem, kind, conn, kind == "pits"))


def test_essential_peak_is_global_max():
    z = smooth_terrain((40, 40), seed=5)
    p = pairs(z, kind="peaks")
    assert p.essential.sum() == 1
    assert p.birth[p.essential][0] == np.argmax(z)
    assert np.isinf(p.persistence[p.essential][0]) and np.isnan(p.death_value[p.essential][0])


def test_pits_with_outlet_have_no_essential_class_and_border_pit_is_dropped():
    z = np.array([[5, 5, 5, 5], [5, 1, 5, 5], [5, 5, 5, 0], [5, 5, 5, 5]], np.float32)
    p = pairs(z, kind="pits")
    assert not p.essential.any()
    # interior pit of depth 4 spills over the rim; the border pit (cell 11) has depth 0
    assert p.birth.tolist() == [5] and p.persistence.tolist() == [4.0]
    assert p.edge_limited.tolist() == [True]


def _brute_prominence(z):
    """Prominence by definition: z(s) minus the highest level at which s still
    connects to strictly higher ground (8-connected); None for the highest."""
    out = {}
    levels = np.unique(z)
    for s in zip(*np.nonzero(z == ndimage.maximum_filter(z, 3))):
        higher = z > z[s]
        if not higher.any():
            continue
        for t in levels[::-1]:
            if t > z[s]:
                continue
            lab, _ = ndimage.label(z >= t, structure=np.ones((3, 3)))
            if np.any(lab[higher] == lab[s]):
                out[s[0] * z.shape[1] + s[1]] = float(z[s] - t)
                break
    return {k: v for k, v in out.items() if v > 0}


@pytest.mark.parametrize("seed", range(4))
def test_prominence_matches_definition(seed):
    z = np.random.default_rng(seed).permutation(144).reshape(12, 12).astype(np.float32)
    z = ndimage.uniform_filter(z, 2) + np.arange(144).reshape(12, 12) * 1e-3  # distinct
    z = z.astype(np.float64)
    p = pairs(z, kind="peaks")
    f = ~p.essential
    got = {int(b): float(v) for b, v in zip(p.birth[f], p.persistence[f])}
    ref = _brute_prominence(z)
    assert got.keys() == ref.keys()
    for k in ref:
        assert got[k] == pytest.approx(ref[k], abs=1e-9)


@pytest.mark.parametrize("seed", range(5))
def test_depth_and_fill_match_reconstruction_by_erosion(seed):
    from skimage.morphology import reconstruction

    z = smooth_terrain((45, 52), seed=seed).astype(np.float64)
    if seed % 2:
        z = np.round(z / 25)  # ties
    seed_img = z.copy()
    seed_img[1:-1, 1:-1] = z.max()
    filled_ref = reconstruction(seed_img, z, method="erosion")  # Soille: fill holes
    p, filled = pairs_and_fill(z)
    np.testing.assert_array_equal(filled, filled_ref)
    depth = filled_ref - z
    lab, n = ndimage.label(depth > 0, structure=np.ones((3, 3)))
    births = lab.reshape(-1)[p.birth]
    for k in range(1, n + 1):
        inside = p.persistence[births == k]
        assert inside.size and inside.max() == pytest.approx(depth[lab == k].max())
    assert not np.any(births == 0)  # every pit with depth > 0 lies in a filled region


finite_or_not = st.one_of(st.floats(-5, 5, width=32), st.just(np.nan), st.sampled_from([0.0, 1.0]),
                          st.just(np.inf), st.just(-np.inf))


@settings(max_examples=150, deadline=None)
@given(a=arrays(np.float32, st.tuples(st.integers(1, 9), st.integers(1, 9)), elements=finite_or_not),
       kind=st.sampled_from(["peaks", "pits"]), conn=st.sampled_from([4, 8]),
       outlet=st.booleans())
def test_properties(a, kind, conn, outlet):
    valid = np.isfinite(a)
    if not valid.any():
        p = pairs(a, kind=kind, connectivity=conn, edge_outlet=outlet)
        assert len(p) == 0
        return
    p = pairs(a, kind=kind, connectivity=conn, edge_outlet=outlet)
    assert np.all(p.persistence >= 0)
    assert len(np.unique(p.birth)) == len(p.birth)  # each cell born at most once
    assert valid.reshape(-1)[p.birth].all()
    assert valid.reshape(-1)[p.death[p.death >= 0]].all()
    # every birth cell is a local extremum in the total order (value, index)
    key = (-a if kind == "peaks" else a).reshape(-1)
    rows, cols = a.shape
    for b in p.birth:
        r, c = divmod(int(b), cols)
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                if (dr, dc) == (0, 0) or (conn == 4 and dr and dc):
                    continue
                rr, cc = r + dr, c + dc
                if 0 <= rr < rows and 0 <= cc < cols and valid[rr, cc]:
                    j = rr * cols + cc
                    assert (key[b], b) < (key[j], j)
    # float64 input with the same values gives the same pairs
    q = pairs(a.astype(np.float64), kind=kind, connectivity=conn, edge_outlet=outlet)
    for f in ("birth", "death", "persistence", "edge_limited"):
        np.testing.assert_array_equal(getattr(p, f), getattr(q, f))
    # essential classes: one per connected component of valid cells without an outlet
    if not outlet:
        ncomp = ndimage.label(valid, structure=np.ones((3, 3)) if conn == 8 else None)[1]
        assert p.essential.sum() == ncomp


def test_constant_raster_has_single_summit_at_first_cell():
    p = pairs(np.full((4, 5), 7.0), kind="peaks")
    assert p.birth.tolist() == [0] and p.essential.tolist() == [True]
    assert len(pairs(np.full((4, 5), 7.0), kind="pits")) == 0


def test_integer_input_accepted():
    z = np.array([[1, 2, 1], [2, 9, 2], [1, 2, 1]], dtype=np.int16)
    assert pairs(z, kind="peaks").birth.tolist() == [4]


def test_bad_kind_and_connectivity():
    from terrain.errors import OptionError

    with pytest.raises(OptionError):
        pairs(np.zeros((2, 2)), kind="hills")
    with pytest.raises(OptionError):
        pairs(np.zeros((2, 2)), kind="pits", connectivity=6)


def _brute_edge_limited(a, kind, conn, b, d):
    """By definition: the component of the birth cell among the valid cells
    strictly before the death cell in the total order (key, flat index)
    touches the raster edge or nodata, or the death cell itself does
    (written here with scipy.ndimage.label, independently of the engine)."""
    valid = np.isfinite(a)
    key = np.where(valid, -a if kind == "peaks" else a, np.inf)
    rows, cols = a.shape
    idx = np.arange(a.size).reshape(a.shape)
    structure = np.ones((3, 3)) if conn == 8 else None
    edge = np.zeros(a.shape, bool)
    edge[0, :] = edge[-1, :] = edge[:, 0] = edge[:, -1] = True
    nd = ndimage.binary_dilation(~valid, structure=np.ones((3, 3)) if conn == 8 else None)
    edge |= nd
    edge &= valid
    if d < 0:
        before = valid
    else:
        kd = key.reshape(-1)[d]
        before = valid & ((key < kd) | ((key == kd) & (idx < d)))
        if edge.reshape(-1)[d]:
            return True
    lab, _ = ndimage.label(before, structure=structure)
    comp = lab.reshape(-1)[b]
    return bool(np.any(edge & (lab == comp)))


ties_or_holes = st.one_of(st.sampled_from([0.0, 1.0, 2.0, 3.0]), st.just(np.nan))


@settings(max_examples=300, deadline=None)
@given(a=arrays(np.float32, st.tuples(st.integers(3, 8), st.integers(3, 8)), elements=ties_or_holes),
       kind=st.sampled_from(["peaks", "pits"]), conn=st.sampled_from([4, 8]),
       outlet=st.booleans())
def test_edge_limited_is_a_property_of_the_pair(a, kind, conn, outlet):
    # equal-valued merges (three components meeting at one cell) and nodata holes:
    # the flag must match the definition whatever order the engine merged in
    p = pairs(a, kind=kind, connectivity=conn, edge_outlet=outlet)
    for b, d, e in zip(p.birth, p.death, p.edge_limited):
        assert bool(e) == _brute_edge_limited(a, kind, conn, int(b), int(d)), (b, d)


def test_three_components_meeting_at_one_cell():
    # found by a random search against the brute-force definition: with
    # 4-connectivity the pit at (2, 1) dies at (1, 1), where three components
    # meet; neither cell touches the edge or nodata, but a component that
    # merged first at the same cell did, and once flagged the pair
    n = np.nan
    z = np.array([[n, 2, n, 2], [2, 3, 2, 0], [3, 0, 3, n], [2, 3, 3, 2], [n, 1, 0, 3]],
                 np.float32)
    p = pairs(z, kind="pits", connectivity=4, edge_outlet=False)
    flags = {(int(b), int(d)): bool(e) for b, d, e in zip(p.birth, p.death, p.edge_limited)}
    assert flags[(9, 5)] is False
    assert _brute_edge_limited(z, "pits", 4, 9, 5) is False


def test_pairs_come_in_canonical_order():
    z = smooth_terrain((40, 50), seed=8)
    for kind in ("peaks", "pits"):
        p = pairs(z, kind=kind)
        key = (-z if kind == "peaks" else z).reshape(-1)
        f = ~p.essential
        d, b = p.death[f], p.birth[f]
        o = np.lexsort((b, key[b], d, key[d]))
        assert np.array_equal(o, np.arange(o.size))


def test_region_overflow_goes_to_the_lowest_neighbour_across():
    # worked by hand from the definition: cell 9 (value 3) is the pass of the
    # pit at cell 4 (value 2; persistence 1 < 1.5); its earlier neighbours in
    # order are 4 (its own basin), 10 (value 2, draining to the pit at 11)
    # and 6 (value 3, draining to the pit at 2), both already one older
    # component. The overflow crosses to cell 10, so the pit's region joins
    # the region of the pit at 11, not that of 2 (before the fix the choice
    # followed the order in which the engine had hashed the basin pairs)
    z = np.array([[4, 4, 1, 3], [2, 4, 3, 4], [3, 3, 2, 1]], np.float32)
    r = regions(z, kind="pits", merge_level=1.5, edge_outlet=False)
    assert r.labels.tolist() == [[2, 1, 1, 1], [2, 1, 1, 1], [2, 2, 2, 2]]
    assert r.birth.tolist() == [2, 11] and r.death.tolist() == [-1, 6]


@settings(max_examples=200, deadline=None)
@given(a=arrays(np.float32, st.tuples(st.integers(1, 10), st.integers(1, 10)),
                elements=st.one_of(st.sampled_from([0.0, 1.0, 2.0, 3.0]), st.just(np.nan),
                                   st.floats(-3, 3, width=32))),
       kind=st.sampled_from(["peaks", "pits"]), conn=st.sampled_from([4, 8]),
       outlet=st.sampled_from([None, True, False]), level=st.sampled_from([0.0, 0.5, 1.5, 100.0]))
def test_regions_equal_the_cell_by_cell_definition(a, kind, conn, outlet, level):
    # independent implementation written for the tests (tests/reference_regions.py):
    # cells enter one by one, the elder rule decides who dies, a cancelled
    # component's region crosses the pass (Edelsbrunner et al. 2002; Najman &
    # Schmitt 1996); the engine must split the cells the same way
    r = regions(a, kind=kind, merge_level=level, connectivity=conn, edge_outlet=outlet)
    assert same_partition(r.labels, regions_by_cells(a, kind, level, conn, outlet))
    # each region holds its own extremum
    flat = r.labels.reshape(-1)
    assert flat[r.birth].tolist() == list(range(1, len(r) + 1))


@pytest.mark.parametrize("conn", [8, 4])
def test_the_sweep_keeps_the_descent_pointers(conn):
    # the blocked engine's local step takes its pointers, minima and candidates from
    # one sweep_keeping: its raw pointers are basins.descend's (the lowest neighbour
    # in the total order, itself for a minimum), its labels and candidates sweep's,
    # on rasters with ties, nodata and thin shapes
    from terrain.engine.basins import CODES4, CODES8, descend, sweep, sweep_keeping
    from terrain.engine.grid import offsets

    codes = CODES8 if conn == 8 else CODES4
    dr, dc = offsets(conn)
    rng = np.random.default_rng(conn)
    for it in range(60):
        nr, nc = (int(v) for v in rng.integers(1, 40, 2))
        z = (rng.integers(0, 5, (nr, nc)) if it % 2 else rng.standard_normal((nr, nc))
             ).astype(np.float32).reshape(-1)
        valid = np.ones(z.size, bool) if it % 3 else rng.random(z.size) > 0.2
        z[~valid] = np.nan
        zk = z * np.float32(-1) if it % 4 == 1 else z
        want = np.full(z.size, -7, np.int32)
        descend(zk, valid, not valid.all(), nr, nc, dr, dc, want)
        lab, lab2 = np.empty(z.size, np.int32), np.empty(z.size, np.int32)
        got = np.full(z.size, -7, np.int32)
        out = sweep_keeping(zk, np.float32(1), valid, nr, nc, conn == 8, codes, lab, got)
        ref = sweep(zk, np.float32(1), valid, nr, nc, conn == 8, codes, lab2)
        assert np.array_equal(got[valid], want[valid]) and (got[~valid] == -7).all()
        assert np.array_equal(lab, lab2) and all(np.array_equal(a, b) for a, b in zip(out, ref))


@pytest.mark.parametrize("seed", range(6))
def test_event_order_is_the_lexsort_of_key_then_cell(seed):
    # the packed sort against numpy's lexsort (stable: equal (key, cell) keep their
    # order): keys with ties, -0.0 beside +0.0, cells in order and out of it, repeated
    from terrain.engine.persistence import event_order

    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 5000))
    k = rng.integers(-4, 5, n).astype(np.float32) * np.float32(0.5)
    k[rng.random(n) < 0.1] = -0.0
    sorted_cells = np.sort(rng.integers(0, n // 2 + 1, n))
    unsorted = np.concatenate([sorted_cells[: n // 2], rng.integers(0, n, n - n // 2)])
    for cells in (sorted_cells, unsorted):
        assert np.array_equal(event_order(k, cells), np.lexsort((cells, k)))
        assert np.array_equal(event_order(k.astype(np.float64), cells), np.lexsort((cells, k)))


@pytest.mark.parametrize("spread", ["narrow", "wide", "one value"])
def test_event_order_radix_passes_against_lexsort(spread):
    # the radix sort's three passes, and a pass skipped where every key shares its
    # digit (keys of a narrow elevation range share their top bits; one value skips
    # all three), against numpy's lexsort: signed zeros, infinities, subnormals
    from terrain.engine.persistence import event_order

    rng = np.random.default_rng(len(spread))
    n = 300_000
    if spread == "narrow":
        k = np.float32(1100.0) + rng.integers(0, 5000, n).astype(np.float32) * np.float32(0.01)
    elif spread == "wide":
        k = (rng.standard_normal(n) * rng.choice([1e-3, 1.0, 1e4], n)).astype(np.float32)
        for v, share in ((0.0, 0.1), (-0.0, 0.1), (np.inf, 0.02), (-np.inf, 0.02), (-1e-40, 0.05)):
            k[rng.random(n) < share] = np.float32(v)
    else:
        k = np.full(n, np.float32(7.5))
    cells = np.sort(rng.integers(0, n, n))
    for c in (cells, np.concatenate([cells[::2], cells[1::2]])):  # the blocked engine's two runs
        assert np.array_equal(event_order(k, c), np.lexsort((c, k)))
