"""Labels beside their points on a map, never overlapping: adjustText, then the nearest free spot.

:func:`place_labels` places labels in order of importance: each starts
beside its point and adjustText (Flyamer et al., Zenodo, 2024) pushes it off
every marker and every other label; one that still overlaps starts again
from another side (:data:`LABEL_STARTS`), a less important label giving way
to a more important one; the last resort is the nearest free spot within
:data:`SEARCH_PX` pixels, else the label is left out (its marker stays). A
label that ends up away from its point gets a leader line.
"""

from __future__ import annotations

import logging
import math
import warnings
from typing import TYPE_CHECKING

import numpy as np

from .style import FONT_PT, HALO_PT, INK, halo

if TYPE_CHECKING:
    from matplotlib.axes import Axes

__all__ = ["place_labels", "boxes_overlap", "box_array", "overlaps", "marker_boxes", "LABEL_STARTS",
           "SEARCH_PX"]

#: where a label starts in each placement (pixels right and up of its point, alignment) and
#: where adjustText may move it: right of it, anywhere; labels that still overlap start left
#: of it, above it moving only up, below it moving only down, then at the four diagonals,
#: then further out; :func:`place_labels` tries the first ADJUST_STARTS of them with adjustText
#: and then looks for the nearest free spot (cheaper than more adjustText passes)
LABEL_STARTS = ((9.0, 0.0, "left", "center", "xy"), (-9.0, 0.0, "right", "center", "xy"),
                (0.0, 9.0, "center", "bottom", "y+"), (0.0, -9.0, "center", "top", "y-"),
                (8.0, -8.0, "left", "top", "xy"), (-8.0, -8.0, "right", "top", "xy"),
                (8.0, 8.0, "left", "bottom", "xy"), (-8.0, 8.0, "right", "bottom", "xy"),
                (0.0, -40.0, "center", "top", "y-"), (0.0, 40.0, "center", "bottom", "y+"))
ADJUST = dict(expand=(1.12, 1.45), iter_lim=60, force_text=(0.3, 0.4), force_static=(0.3, 0.4))
LEADER_PX = 6.0  # a label further than this from its marker gets a leader line
ADJUST_STARTS = 2  # adjustText placements before the search for a free spot
SEARCH_PX = 260.0  # the last resort looks for a free spot this far from a label's point


def place_labels(ax: Axes, items, avoid, *, fixed=(), fontsize: float = FONT_PT) -> list:
    """Place text labels by their points without overlap (adjustText).

    Each label starts beside its point and is pushed off every marker and
    every other label. Labels come in order of importance. After the
    placement, a label that still overlaps a more important label, a marker
    or a ``fixed`` box is placed again from another start, through
    :data:`LABEL_STARTS` (the first :data:`ADJUST_STARTS`); a less important
    label in the way gives way (it is placed again in the next round), so
    importance decides who keeps a place. One that still overlaps after the
    last start goes to the nearest free spot within :data:`SEARCH_PX` pixels,
    or is left out (its marker stays), so what is drawn never overlaps. A label that ends up
    away from its point gets a leader line.

    Parameters
    ----------
    ax : Axes
        With its final position (lay the figure out first).
    items : sequence of (x, y, text)
    avoid : sequence of (x, y, marker size in points)
    fixed : sequence of display boxes
        Further places to keep clear (the scale bar, the north arrow).

    Returns
    -------
    list of the Text objects kept, in the order of ``items``.

    References
    ----------
    .. [1] adjustText (Flyamer et al., Zenodo, 2024): iterative repulsion of
       text bounding boxes from each other and from given objects.
    """
    r = ax.figure.canvas.get_renderer()
    items = list(items)
    if items and not _fits(ax, r, items[0][2], fontsize):
        items = []  # a thin strip of a map: no label fits inside it (the footer names them)
    if not items:
        return []
    clear = np.vstack([marker_boxes(ax, avoid), box_array(list(fixed))])
    kept: dict[int, object] = {}
    # a label with no free spot near its point among the markers and the fixed boxes
    # has none later either (labels kept only add obstacles): it is left out at once,
    # instead of costing every adjustText pass on a crowded map
    todo = [i for i, item in enumerate(items) if _free_spot(ax, item, clear, fontsize, probe=True)]
    with _only_labels(ax):  # adjustText draws the figure; nothing else moves the labels
        for start in LABEL_STARTS[:ADJUST_STARTS]:
            if not todo:
                break
            # labels kept so far that are more important than every label to place are
            # fixed; a less important one gives way if a more important label needs its room
            fixed_kept = [kept[i].get_window_extent(r) for i in kept if i < todo[0]]
            near = _near(ax, [items[i] for i in todo], np.vstack([clear, box_array(fixed_kept)]))
            texts = _adjust(ax, [items[i] for i in todo], near, fontsize, start)
            evicted = _clear(ax, dict(zip(todo, texts)), clear, kept)
            for i, t in zip(todo, texts):
                if kept.get(i) is not t:
                    t.remove()
            todo = sorted(set(i for i in todo if i not in kept) | set(evicted))
        for i in todo:  # the last resort: the nearest free spot within SEARCH_PX
            taken = box_array([t.get_window_extent(r) for t in kept.values()])
            text = _free_spot(ax, items[i], np.vstack([clear, taken]), fontsize)
            if text is not None:
                kept[i] = text
    size = {(x, y): s for x, y, s in avoid}
    for i, t in kept.items():
        _leader(ax, t, items[i][:2], size.get(items[i][:2], 0.0))
    return [kept[i] for i in sorted(kept)]


def _free_spot(ax, item, obstacles: np.ndarray, fontsize: float, *, probe: bool = False):
    """A label for ``item`` at the free spot nearest its point (in rings of 12
    pixels out to :data:`SEARCH_PX`, 24 directions each) where it lies inside
    the axes and overlaps none of the ``obstacles`` (display boxes as
    :func:`box_array`); None when there is none. ``probe``: only whether there
    is one (the label is not kept)."""
    r = ax.figure.canvas.get_renderer()
    x, y, label = item
    t = ax.text(x, y, label, fontsize=fontsize, color=INK, zorder=7, ha="center", va="center",
                gid="label", path_effects=halo(HALO_PT))
    t.set_in_layout(False)
    box, frame = t.get_window_extent(r), ax.get_window_extent(r)
    px, py = ax.transData.transform((x, y))
    w, h = box.width / 2, box.height / 2
    # every candidate centre at once, in the order of the search (ring by ring, 24
    # directions each), tested against every obstacle as arrays (boxes_overlap's rule)
    radius = np.repeat(np.arange(12.0, SEARCH_PX + 1, 12.0), 24)
    a = np.tile(np.linspace(0, 2 * np.pi, 24, endpoint=False), radius.size // 24)
    cx, cy = px + radius * np.cos(a), py + radius * np.sin(a)
    dx, dy = cx - (box.x0 + w), cy - (box.y0 + h)
    x0, x1, y0, y1 = box.x0 + dx, box.x1 + dx, box.y0 + dy, box.y1 + dy
    ok = (frame.x0 <= x0) & (x1 <= frame.x1) & (frame.y0 <= y0) & (y1 <= frame.y1)
    spots, o = np.column_stack([x0, x1, y0, y1]), obstacles
    for start in range(0, o.shape[0], 256):  # at most 528 x 256 at a time
        ok[ok] &= ~overlaps(spots[ok], o[start:start + 256]).any(axis=1)
    free = np.flatnonzero(ok)
    if free.size and not probe:
        k = free[0]
        t.set_position(ax.transData.inverted().transform((cx[k], cy[k])))
        return t
    t.remove()
    return bool(free.size) if probe else None


def _fits(ax: Axes, r, text: str, fontsize: float) -> bool:
    """Whether a label like ``text`` fits inside the map's axes (with room to move)."""
    t = ax.text(0, 0, text, fontsize=fontsize, transform=None)
    box = t.get_window_extent(r)
    t.remove()
    axes = ax.get_window_extent(r)
    return axes.height >= 2 * box.height and axes.width >= box.width


class _only_labels:
    """Hide every artist of the figure but the map's texts for a while (adjustText
    draws the whole figure each time it starts; the rest only costs time)."""

    def __init__(self, ax):
        fig = ax.figure
        others = [a for a in fig.axes if a is not ax] + list(fig.legends) + list(fig.texts)
        mine = [a for a in ax.get_children() if a not in ax.texts and a is not ax.patch]
        self.hidden = [a for a in others + mine if a.get_visible()]

    def __enter__(self):
        for a in self.hidden:
            a.set_visible(False)
        return self

    def __exit__(self, *exc):
        for a in self.hidden:
            a.set_visible(True)
        return False


def _adjust(ax, items, obstacles, fontsize, start) -> list:
    """One adjustText placement of ``items`` away from ``obstacles`` (display
    boxes), each label starting at ``start`` (offset in pixels, alignment, the
    directions it may move) from its point; returns the texts."""
    from adjustText import adjust_text
    from matplotlib.transforms import Bbox

    dx, dy, ha, va, move = start
    xy = np.array([(x, y) for x, y, _ in items], float)
    inv = ax.transData.inverted()
    at = inv.transform(ax.transData.transform(xy) + np.array([dx, dy]))
    texts = [ax.text(sx, sy, s, fontsize=fontsize, color=INK, zorder=7, ha=ha, va=va, gid="label",
                     path_effects=halo(HALO_PT)) for (sx, sy), (_, _, s) in zip(at, items)]
    for t in texts:
        t.set_in_layout(False)
    objects = [Bbox(inv.transform(b.get_points())) for b in obstacles]
    # adjustText logs when labels cannot fit (a thin strip of a map); the labels it
    # cannot clear are left out and named in the footer, so its message is not ours
    log = logging.getLogger("adjustText")
    level = log.level
    log.setLevel(logging.ERROR)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            adjust_text(texts, objects=objects or None, ax=ax, avoid_self=False,
                        target_x=xy[:, 0], target_y=xy[:, 1], **ADJUST,
                        only_move={"text": move, "static": move, "explode": move, "pull": "xy"})
    finally:
        log.setLevel(level)
    return texts


def _leader(ax, text, xy, marker_pt: float) -> None:
    """A straight leader line from the edge of ``text`` to its point, when the label
    stands more than :data:`LEADER_PX` pixels off the point's marker."""
    r = ax.figure.canvas.get_renderer()
    box = text.get_window_extent(r).padded(2.0)
    px, py = ax.transData.transform(xy)
    qx, qy = min(max(px, box.x0), box.x1), min(max(py, box.y0), box.y1)  # nearest point of the box
    gap = math.hypot(px - qx, py - qy) - marker_pt / 2 * ax.figure.dpi / 72.0
    if gap <= LEADER_PX:
        return
    shrink = (marker_pt / 2 * ax.figure.dpi / 72.0 + 2.0) / math.hypot(px - qx, py - qy)
    end = (px + (qx - px) * shrink, py + (qy - py) * shrink)
    (x0, y0), (x1, y1) = ax.transData.inverted().transform([(qx, qy), end])
    ax.plot([x0, x1], [y0, y1], color=INK, lw=0.7, zorder=6, gid="leader", label="_leader")


def _near(ax, items, boxes: np.ndarray, reach: float = 160.0, most: int = 160) -> list:
    """The boxes adjustText is given: of ``boxes`` (display boxes as :func:`box_array`),
    those within ``reach`` pixels of a labelled point, at most ``most`` of them, nearest
    first (its cost grows with the square of the obstacles; labels do not travel far,
    and :func:`_clear` checks them all), as matplotlib Bboxes."""
    from matplotlib.transforms import Bbox

    if not len(boxes):
        return []
    pts = ax.transData.transform(np.array([(x, y) for x, y, _ in items], float))
    centres = np.column_stack([(boxes[:, 0] + boxes[:, 1]) / 2, (boxes[:, 2] + boxes[:, 3]) / 2])
    d = np.abs(centres[:, None, :] - pts[None, :, :]).max(axis=2).min(axis=1)
    order = np.argsort(d, kind="stable")[:most]
    return [Bbox.from_extents(boxes[i, 0], boxes[i, 2], boxes[i, 1], boxes[i, 3])
            for i in order if d[i] <= reach]


def marker_boxes(ax, avoid) -> np.ndarray:
    """Display boxes of the markers at ``avoid`` ((x, y, size in points)), a pixel
    wider, as :func:`box_array` gives them (one row per marker, no Bbox objects:
    a map holds thousands)."""
    if not avoid:
        return np.empty((0, 4))
    xys = np.array(avoid, float).reshape(-1, 3)
    xy = ax.transData.transform(xys[:, :2])
    half = xys[:, 2] / 2 * ax.figure.dpi / 72.0 + 1.0
    return np.column_stack([xy[:, 0] - half, xy[:, 0] + half, xy[:, 1] - half,
                            xy[:, 1] + half])


def boxes_overlap(a, b, tol: float = 0.5) -> bool:
    """Whether two display boxes share an area wider and taller than ``tol`` pixels."""
    return (min(a.x1, b.x1) - max(a.x0, b.x0) > tol) and (min(a.y1, b.y1) - max(a.y0, b.y0) > tol)


def box_array(boxes) -> np.ndarray:
    """Display boxes as an (n, 4) array of x0, x1, y0, y1."""
    return np.array([(b.x0, b.x1, b.y0, b.y1) for b in boxes], float).reshape(-1, 4)


def overlaps(a: np.ndarray, b: np.ndarray, tol: float = 0.5) -> np.ndarray:
    """:func:`boxes_overlap` of every box of ``a`` with every box of ``b`` ((n, 4) and
    (m, 4) arrays of x0, x1, y0, y1, as :func:`box_array`): an (n, m) boolean array."""
    wide = np.minimum(a[:, None, 1], b[:, 1]) - np.maximum(a[:, None, 0], b[:, 0]) > tol
    tall = np.minimum(a[:, None, 3], b[:, 3]) - np.maximum(a[:, None, 2], b[:, 2]) > tol
    return wide & tall


def _clear(ax, texts: dict, obstacles: np.ndarray, kept: dict) -> list:
    """Keep those of ``texts`` (index of importance -> text, 0 the most important)
    that lie inside the axes and overlap no obstacle (display boxes as
    :func:`box_array`), no more important label
    kept, and no more important text of this pass; a less important label kept
    earlier that a new one overlaps is taken out (removed from the axes and
    from ``kept``) to be placed again. Updates ``kept``; returns the indices
    taken out."""
    r = ax.figure.canvas.get_renderer()
    frame = ax.get_window_extent(r)
    evicted = []
    for i in sorted(texts):
        e = texts[i].get_window_extent(r)
        inside = (frame.x0 - 1 <= e.x0 and e.x1 <= frame.x1 + 1 and frame.y0 - 1 <= e.y0
                  and e.y1 <= frame.y1 + 1)
        if not inside or overlaps(box_array([e]), obstacles).any():
            continue
        if any(boxes_overlap(e, kept[j].get_window_extent(r)) for j in kept if j < i):
            continue
        for j in [j for j in kept if j > i and boxes_overlap(e, kept[j].get_window_extent(r))]:
            kept.pop(j).remove()
            evicted.append(j)
        kept[i] = texts[i]
    return [j for j in evicted if j not in kept]
