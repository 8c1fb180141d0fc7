"""Pictures and point layers: every figure read back through matplotlib's own objects.

Outside references used here:
- matplotlib's artists themselves (text and marker extents from its Agg
  renderer, colour bars, legends, masked image arrays): the checks read what
  matplotlib would draw, not what cairn meant to draw.
- The length of a degree of longitude is cos(latitude) times that of a degree
  of latitude on a sphere (common practice for a map's aspect, no source), so
  a geographic map's data aspect must be 1 / cos(latitude of its centre).
- Ranks: pandas' ``rank(method="first", ascending=False)`` per realisation
  (rows in id order), an independent implementation of "1 + the number of
  larger figures, ties by id".
- The most credited key col / spill point and its share: pandas ``groupby``
  over the raw pair log, crediting each pair |birth value - death value|
  (the persistence of a finite pair, Edelsbrunner, Letscher & Zomorodian,
  "Topological persistence and simplification", 2002).
- Layers are read back with pyogrio (a general-purpose reader, not ours).
"""

from __future__ import annotations

import math
import re

import numpy as np
import pandas as pd
import pyogrio
import pytest

from terrain import CreditJob, Dem, ErrorModel, run_ensemble
from terrain.jobs.catchments import CatchmentJob
from terrain.outputs import plot
from terrain.outputs.caution import CAUTION
from terrain.summary.features import figure_matrix, summarise_features

from .conftest import smooth_terrain, write_tif

UTM = "EPSG:32633"


def _wkt(code):
    from rasterio.crs import CRS

    return CRS.from_user_input(code).to_wkt()


def _dem(z, *, geographic=False, nodata=None, crs=UTM):
    z = np.asarray(z, np.float32).copy()
    if nodata is not None:
        z[nodata] = np.nan
    if geographic:  # 1/1200 degree cells, the top edge at 60.05 N
        return Dem(z=z, nodata=~np.isfinite(z), transform=(1 / 1200, 0.0, 10.0, 0.0, -1 / 1200, 60.05),
                   crs=_wkt("EPSG:4326"), geographic=True, vertical_units="metre")
    return Dem(z=z, nodata=~np.isfinite(z), crs=_wkt(crs) if crs else None, vertical_units="metre",
               transform=(10.0, 0.0, 500000.0, 0.0, -10.0, 6800000.0 + 10.0 * z.shape[0]))


def _run(dem, kind, n=24, rmse=2.0, seed=1):
    res = run_ensemble(dem, CreditJob(kind), ErrorModel(rmse=rmse), realisations=n, seed=seed,
                       backend="serial")
    return res, summarise_features(res)


# -- what every figure must satisfy, read from matplotlib's objects ---------------------
def _renderer(fig):
    fig.canvas.draw()  # the figures carry an Agg canvas; draw once so ticks exist
    return fig.canvas.get_renderer()


def _overlap(a, b) -> bool:
    """Positive-area intersection of two display boxes (half a pixel of tolerance)."""
    return min(a.x1, b.x1) - max(a.x0, b.x0) > 0.5 and min(a.y1, b.y1) - max(a.y0, b.y0) > 0.5


def _marker_boxes(ax):
    from matplotlib.transforms import Bbox

    out = []
    for line in ax.lines:
        if line.get_marker() in ("None", None, "") or not len(line.get_xdata()):
            continue
        half = line.get_markersize() / 2 * ax.figure.dpi / 72
        xy = ax.transData.transform(np.column_stack([line.get_xdata(), line.get_ydata()]))
        out += [Bbox([[x - half, y - half], [x + half, y + half]]) for x, y in xy]
    return out


def _drawn_texts(fig):
    """Every text matplotlib draws: tick labels only for ticks inside the view limits."""
    from matplotlib.text import Text

    ticks, drawn = set(), []
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            lo, hi = sorted(axis.get_view_interval())
            eps = (hi - lo) * 1e-9
            for which in (axis.get_major_ticks(), axis.get_minor_ticks()):
                for tick in which:
                    ticks |= {id(tick.label1), id(tick.label2)}
                    if lo - eps <= tick.get_loc() <= hi + eps:
                        drawn += [lab for lab in (tick.label1, tick.label2) if lab.get_visible()]
    drawn += [t for t in fig.findobj(Text) if id(t) not in ticks and t.get_visible()]
    return [t for t in drawn if t.get_text().strip()]


def check_figure(fig):
    """Fonts >= 9 pt, nothing outside the figure, every colour bar labelled."""
    r = _renderer(fig)
    page = fig.bbox
    for t in _drawn_texts(fig):
        if True:
            assert t.get_fontsize() >= 9, (t.get_text(), t.get_fontsize())
            e = t.get_window_extent(r)
            assert e.x0 >= page.x0 - 1 and e.x1 <= page.x1 + 1, t.get_text()
            assert e.y0 >= page.y0 - 1 and e.y1 <= page.y1 + 1, t.get_text()
    bars = [a for a in fig.axes if getattr(a, "_colorbar", None) is not None]
    for cax in bars:
        assert (cax.get_ylabel() or cax.get_xlabel()).strip()
    return bars


def check_map(fig, dem):
    """The map checks of the issue; returns (map axes, label texts, legend texts)."""
    from matplotlib.collections import Collection
    from matplotlib.image import AxesImage
    from matplotlib.lines import Line2D

    bars = check_figure(fig)
    assert len(bars) == 1  # the main layer's colour bar
    ax = fig.axes[0]
    r = fig.canvas.get_renderer()
    # labels: no two overlap, none overlaps a marker, all inside the map
    labels = [t for t in ax.texts if t.get_gid() == "label"]
    boxes = [t.get_window_extent(r) for t in labels]
    for i in range(len(boxes)):
        assert not any(_overlap(boxes[i], boxes[j]) for j in range(i)), labels[i].get_text()
    for b, t in zip(boxes, labels):
        assert not any(_overlap(b, m) for m in _marker_boxes(ax)), t.get_text()
    # the legend names every artist drawn on the map
    legend = fig.legends[0] if fig.legends else ax.get_legend()
    names = {t.get_text() for t in legend.get_texts()} if legend else set()
    drawn = [a for a in ax.get_children()
             if (isinstance(a, Line2D) and len(a.get_xdata()) and a.get_gid() != "leader")
             or (isinstance(a, Collection) and len(a.get_paths()) and a.get_gid() != "halo")
             or (isinstance(a, AxesImage) and a.get_gid() != "hillshade" and a.colorbar is None)]
    for a in drawn:
        assert a.get_label() in names, (type(a).__name__, a.get_label(), names)
    # nodata masked in the hillshade and in the main layer, and shown as such
    images = {im.get_gid(): im for im in ax.get_images()}
    shade, layer = images["hillshade"].get_array(), images["layer"].get_array()
    assert np.array_equal(np.ma.getmaskarray(shade), dem.nodata)
    assert np.ma.getmaskarray(layer)[dem.nodata].all()
    if dem.nodata.any():
        assert "no data" in names and not np.ma.getmaskarray(images["nodata"].get_array())[
            dem.nodata].any()
    # the footer: error model, realisations and the caution
    foot = " ".join(t.get_text().replace("\n", " ") for t in fig.texts)
    assert CAUTION in foot and "realisations" in foot and "Error model" in foot
    # a scale bar of a round length
    bar = [a for a in ax.artists if a.get_gid() == "scale_bar"]
    assert len(bar) == 1
    text = bar[0].txt_label.get_text()
    assert re.fullmatch(r"[125]0* (m|km)|[125]0* cell units|0\.[0-9]*[125] (km)", text), text
    return ax, labels, names


# -- maps ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def upland():
    z = smooth_terrain((64, 80), seed=12) + 400.0
    hole = np.zeros(z.shape, bool)
    hole[40:52, 4:20] = True  # a block of nodata at the west edge
    return z, hole


@pytest.mark.slow
@pytest.mark.parametrize("geographic", [False, True])
@pytest.mark.parametrize("kind", ["peaks", "depressions"])
def test_feature_maps_read_back(upland, kind, geographic):
    z, hole = upland
    dem = _dem(z, geographic=geographic, nodata=hole)
    res, feat = _run(dem, kind)
    fig = plot.feature_map(res, feat)
    ax, labels, names = check_map(fig, dem)
    table = feat.table
    birth = "most credited summit cell" if kind == "peaks" else "most credited pit cell"
    assert birth in names
    if geographic:  # aspect 1 / cos(latitude of the centre): 60.05 - 32 rows of 1/1200 degree
        lat = 60.05 - dem.shape[0] / 2 / 1200
        assert ax.get_aspect() == pytest.approx(1 / math.cos(math.radians(lat)), rel=1e-9)
    else:
        assert ax.get_aspect() == 1.0
    # north-up grid in a known CRS: the north arrow is drawn
    assert [t for t in ax.texts if t.get_gid() == "north_arrow"]
    # labels: one per group, in table order (median rank, then expected figure), the first
    # 12 groups with a member counted in at least half the realisations
    groups = [m for _, m in table.sort_values("rank").groupby("group", sort=False)
              if (m.p_above >= plot.LABEL_PRESENCE).any()][:plot.LABELLED]
    assert 1 <= len(labels) <= len(groups)
    shown = {int(t.get_text().split()[0][1:]) for t in labels}
    assert shown <= {int(m.feature_id.iloc[0]) for m in groups}
    assert int(groups[0].feature_id.iloc[0]) in shown  # the first is always labelled
    # a label gives each feature's figure on the DEM as given, never its mean
    rows = table.set_index("feature_id")
    for t in labels:
        for part in re.findall(r"#(\d+) (\S+) m", t.get_text()):
            assert part[1].rstrip("*") == plot.figure_text(rows.loc[int(part[0]), "unperturbed"])
    # drawn: every feature counted in at least half the realisations, markers never clipped
    drawn = table[table.p_above >= plot.LABEL_PRESENCE]
    marker = [ln for ln in ax.lines if ln.get_label() == birth]
    assert len(marker) == 1 and len(marker[0].get_xdata()) >= len(drawn)
    assert not marker[0].get_clip_on()
    # every key col / spill point tied to its feature by a thin line
    ties = [c for c in ax.collections if "tied to its" in str(c.get_label())]
    d = "col" if kind == "peaks" else "spill"
    assert len(ties) == 1 and len(ties[0].get_segments()) == np.isfinite(
        table.loc[table.feature_id.isin(marker_ids(marker[0], table)), f"{d}_x"]).sum()
    assert any(n.startswith(("where the top is", "ponded extent")) for n in names)


def marker_ids(line, table):
    """The feature ids whose most credited summit / pit cell a marker line draws."""
    at = set(zip(np.round(line.get_xdata(), 6), np.round(line.get_ydata(), 6)))
    return [i for i, x, y in zip(table.feature_id, table.x, table.y)
            if (round(x, 6), round(y, 6)) in at]


def test_map_without_crs_has_no_north_arrow_and_names_cell_units():
    z = smooth_terrain((30, 40), seed=5)
    dem = Dem.from_array(z, cellsize=10.0)
    fig = plot.quicklook(dem, np.abs(z) / np.abs(z).max(), title="a layer", units="a unit",
                         footer="Error model: RMSE 1 (gaussian); 5 realisations.")
    ax, _, _ = check_map(fig, dem)
    assert not [t for t in ax.texts if t.get_gid() == "north_arrow"]
    assert "cell units" in ax.get_xlabel()


def test_rotated_grid_has_no_north_arrow():
    z = smooth_terrain((30, 40), seed=5)
    dem = Dem(z=z, nodata=np.zeros(z.shape, bool), crs=_wkt(UTM),
              transform=(10.0, 1.0, 500000.0, 1.0, -10.0, 6800300.0))
    fig = plot.quicklook(dem, np.abs(z) / np.abs(z).max(), title="a layer", units="a unit")
    assert not [t for t in fig.axes[0].texts if t.get_gid() == "north_arrow"]


def _scattered_points(cells: int, n: int, *, seed: int):
    """A blank map of ``cells`` x ``cells`` 10 m cells and ``n`` random points inside it
    (at least 50 m from its edges): (frame, x, y)."""
    from terrain.outputs.mapframe import MapFrame

    rng = np.random.default_rng(seed)
    dem = _dem(np.zeros((cells, cells)), crs=UTM)
    frame = MapFrame(dem, title="t", subtitle="s", footer="f", caution=CAUTION)
    side = 10.0 * cells
    x0, y0 = dem.transform[2], dem.transform[5] - side
    return frame, x0 + rng.uniform(50, side - 50, n), y0 + rng.uniform(50, side - 50, n)


def test_crowded_labels_never_overlap():
    # 40 markers and 12 labels in a small square: whatever adjustText manages, what is
    # drawn overlaps nothing, and the most important label is kept
    frame, x, y = _scattered_points(80, 20, seed=4)
    frame.points(x, y, marker="^", face="white", label="a point")
    frame.points(x + 30, y - 20, marker="D", face="grey", label="another", size=6)
    for i in range(12):
        frame.label(x[i], y[i], f"#{i + 1} {100 - i} m · first {i}%")
    fig = frame.figure()
    ax = fig.axes[0]
    r = _renderer(fig)
    labels = [t for t in ax.texts if t.get_gid() == "label"]
    assert labels and labels[0].get_text().startswith("#1 ")
    boxes = [t.get_window_extent(r) for t in labels]
    markers = _marker_boxes(ax)
    for i, b in enumerate(boxes):
        assert not any(_overlap(b, c) for c in boxes[:i]) and not any(_overlap(b, m) for m in markers)


def test_a_map_places_at_most_its_label_cap_and_counts_the_rest():
    # a hundred outlets: the map places the first MAX_LABELS labels in order of importance,
    # and the footer names a few of the rest and counts the others
    from terrain.outputs.mapframe import MAX_LABELS, NAMED_UNPLACED

    frame, x, y = _scattered_points(200, 100, seed=5)
    frame.points(x, y, marker="v", face="white", label="outlet")
    for i in range(100):
        frame.label(x[i], y[i], f"g{i}")
    fig = frame.figure()
    kept = [t.get_text() for t in fig.axes[0].texts if t.get_gid() == "label"]
    assert 0 < len(kept) <= MAX_LABELS and set(kept) <= {f"g{i}" for i in range(MAX_LABELS)}
    footer = frame.footer_text.get_text().replace("\n", " ")
    assert f"and {100 - len(kept) - NAMED_UNPLACED} more" in footer, footer


# -- the ranking chart on the two-summit case ---------------------------------------------
def _two_summits():
    """Two single-cell summits, 101 and 100 m, on a plain at 0 (as in test_features)."""
    z = np.zeros((21, 61), np.float32)
    z[10, 15], z[10, 45] = 101.0, 100.0
    return z


def test_ranking_chart_shows_both_first_place_shares():
    dem = _dem(_two_summits())
    res, feat = _run(dem, "peaks", n=200, rmse=1.0, seed=3)
    table = feat.table.sort_values("rank")
    fig = plot.ranking_chart(res, feat)
    check_figure(fig)
    ax = fig.axes[1]
    cells = {t.get_gid(): t.get_text() for t in ax.texts}
    firsts = table.head(2)
    assert 0.05 < firsts.p_first.min() and firsts.p_first.sum() == pytest.approx(1.0)
    for row in firsts.itertuples():  # both P(rank = 1) written, equal to the table's p_first
        assert cells[f"p_rank_{row.feature_id}_1"] == f"{row.p_first:.2f}"
    # left panel: one 5-95% bar per feature, expected and unperturbed markers named
    names = {t.get_text() for t in fig.axes[0].get_legend().get_texts()}
    assert names == {"5-95% of realisations", "expected (mean)", "on the DEM as given"}


def test_rank_shares_against_pandas_ranks():
    z = smooth_terrain((40, 50), seed=21) + 300
    res, feat = _run(_dem(z), "peaks", n=30, rmse=3.0, seed=2)
    fm = figure_matrix(res.log, res.n)
    long = pd.DataFrame({"real": np.repeat(np.arange(res.n), fm.ids.size),
                         "feature_id": np.tile(fm.ids, res.n), "figure": fm.figure.ravel(),
                         "present": fm.present.ravel()})
    long = long[long.present].sort_values(["real", "feature_id"])
    # ties (none expected with continuous error) rank by id, as p_first breaks them
    long["rank"] = long.groupby("real")["figure"].rank(method="first", ascending=False)
    for fid, row in feat.rank_share.iterrows():
        ranks = long.loc[long.feature_id == fid, "rank"]
        for k in row.index:
            assert row[k] == pytest.approx((ranks == k).sum() / res.n, abs=1e-12)
    first = feat.rank_share[1].reindex(feat.table.feature_id).to_numpy()
    np.testing.assert_allclose(first, feat.table.p_first.to_numpy(), atol=1e-12)


# -- catchments ----------------------------------------------------------------------------
def test_catchment_map_read_back():
    r, c = np.mgrid[0:50, 0:41]
    z = (np.abs(c - 20) * 1.0 + (49 - r) * 0.2).astype(np.float32)  # a valley draining south
    z[20:26, 0:6] = np.nan
    dem = _dem(z)
    x0, top = dem.transform[2], dem.transform[5]
    xy = np.array([[x0 + 205.0, top - 495.0], [x0 + 205.0, top - 255.0]])
    res = run_ensemble(dem, CatchmentJob(("lower ford", "upper ford"), xy, snap_m=20.0),
                       ErrorModel(rmse=0.3), realisations=12, seed=1, backend="serial")
    fig = plot.catchment_map(res)
    ax, labels, names = check_map(fig, dem)
    assert {"sub-catchment of outlet lower ford", "sub-catchment of outlet upper ford"} <= names
    assert {"outlet, as given"} <= names
    # where the run measured: each outlet's most frequent snapped cell, its share beside it
    from terrain.summary.catchments import outlet_table

    outlets = outlet_table(res)
    snapped = [ln for ln in ax.lines if ln.get_label().startswith("most frequent snapped cell")]
    assert len(snapped) == 1
    np.testing.assert_allclose(sorted(snapped[0].get_xdata()), sorted(outlets.snapped_x))
    np.testing.assert_allclose(sorted(snapped[0].get_ydata()), sorted(outlets.snapped_y))
    texts = sorted(t.get_text() for t in labels)
    assert texts == sorted(["lower ford", "upper ford"] + [f"snapped {plot.share_text(p)}"
                                                         for p in outlets.snapped_share])
    bar = [a for a in fig.axes if getattr(a, "_colorbar", None) is not None][0]
    assert "divide probability" in bar.get_ylabel()


# -- point layers ---------------------------------------------------------------------------
@pytest.mark.parametrize("cmd,layer,d", [("peaks", "cols", "col"),
                                         ("depressions", "spill_points", "spill")])
def test_death_point_layers_read_back(tmp_path, cairn, cmd, layer, d):
    z = np.round(smooth_terrain((50, 60), seed=8) + 300).astype(np.int16)
    dem = write_tif(tmp_path / "dem.tif", z, nodata=-9999, units="metre")
    out = tmp_path / "out"
    code, _, err = cairn(cmd, dem, "-o", out, "--rmse", "1.5", "-n", "16", "--seed", "3",
                         "--workers", "1", "-q")
    assert code == 0, err
    pts = pyogrio.read_dataframe(out / f"{cmd}.gpkg", layer=layer)
    polys = pyogrio.read_dataframe(out / f"{cmd}.gpkg", layer="summits" if cmd == "peaks"
                                   else "pits")
    assert list(pts.columns) == ["feature_id", "rank", f"{d}_share", f"{d}_elevation", "geometry"]
    assert set(pts.feature_id) <= set(polys.feature_id) and len(pts)
    assert (pts.geom_type == "Point").all()
    # against the raw pair log, by pandas: per feature, the death cell with the largest
    # summed persistence among pairs born in it, and its share of that feature's total
    res, feat = _rerun(tmp_path / "dem.tif", cmd)
    log = pd.DataFrame({"region": res.log["region"], "death": res.log["death"],
                        "w": np.abs(res.log["birth_value"].astype(float)
                                    - res.log["death_value"].astype(float))})
    log = log[(log.region > 0) & (log.death >= 0)]
    sums = log.groupby(["region", "death"])["w"].sum().reset_index()
    best = sums.sort_values(["region", "w", "death"], ascending=[True, False, True]) \
        .groupby("region").head(1).set_index("region")
    total = sums.groupby("region")["w"].sum()
    for row in pts.itertuples():
        cell = int(best.loc[row.feature_id, "death"])
        x, y = res.dem.xy(np.array([cell]))
        assert row.geometry.x == pytest.approx(x[0]) and row.geometry.y == pytest.approx(y[0])
        assert getattr(row, f"{d}_share") == pytest.approx(
            best.loc[row.feature_id, "w"] / total[row.feature_id], rel=1e-6)


def _rerun(path, cmd):
    from terrain.io import read_dem

    return _run(read_dem(path), cmd, n=16, rmse=1.5, seed=3)


def test_figures_of_a_run_without_features():
    dem = _dem(np.full((6, 7), 100.0))
    res, feat = _run(dem, "depressions", n=4)
    assert feat.table.empty
    check_map(plot.feature_map(res, feat), dem)
    fig = plot.ranking_chart(res, feat)
    check_figure(fig)
    assert any("No depression feature" in t.get_text() for t in fig.axes[0].texts)


def test_feature_outlines_are_the_paths_matplotlib_makes_ring_by_ring():
    # reference: matplotlib's own Path(ring, closed=True) per ring, joined by
    # Path.make_compound_path (the map's outlines are built in bulk instead)
    import shapely
    from matplotlib.path import Path

    from terrain.outputs.mapframe import _outline_paths

    holed = shapely.Polygon([(0, 0), (4, 0), (4, 4), (0, 4)],
                            [[(1, 1), (2, 1), (2, 2), (1, 1)], [(3, 3), (3.5, 3), (3.5, 3.5)]])
    geoms = [shapely.box(0, 0, 1, 1), None, holed, shapely.Polygon(),
             shapely.MultiPolygon([shapely.box(5, 5, 6, 7), holed]),
             shapely.buffer(shapely.Point(10, 10), 2.0)]
    want = [Path.make_compound_path(*[Path(np.asarray(r.coords), closed=True)
                                      for r in [g.exterior, *g.interiors]])
            for geom in geoms if geom is not None and not geom.is_empty
            for g in getattr(geom, "geoms", [geom])]
    got = _outline_paths(geoms)
    assert len(got) == len(want) == 5
    for a, b in zip(got, want):
        assert np.array_equal(a.vertices, b.vertices) and np.array_equal(a.codes, b.codes)
    assert _outline_paths([None, shapely.Polygon()]) == []
