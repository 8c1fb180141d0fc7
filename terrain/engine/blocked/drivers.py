"""Drivers: the three steps over every block through any ``map`` (processes,
Dask), results written into any array with slice assignment.

See :mod:`terrain.engine.blocked` for the algorithm and its memory.
"""

from __future__ import annotations

import builtins
import functools
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np

from ..persistence import Pairs
from .finish import finish, finish_levels
from .glue import collect, empty_pairs, glue
from .local import check_kind, local
from .summaries import BlockSummary
from .windows import Window, raster_shape, read_block, windows


# ----------------------------------------------------------------------------
# drivers
# ----------------------------------------------------------------------------
def _local_task(source, mask, shape, kind, connectivity, edge_outlet, min_persistence, window,
                termini=False, merge_level=None):
    vals = read_block(source, window, shape, mask)
    return local(vals, window, shape, kind=kind, connectivity=connectivity,
                 edge_outlet=edge_outlet, min_persistence=min_persistence, termini=termini,
                 merge_level=merge_level)


def local_summaries(source: Any, wins: list[Window], *, kind: str, connectivity: int,
                    edge_outlet: bool | None, map: Callable[..., Iterable] = builtins.map,
                    mask: Any = None, min_persistence: float = 0.0, termini: bool = False,
                    merge_level: float | None = None) -> list[BlockSummary]:
    """:func:`local` on every window of ``source`` through ``map``."""
    task = functools.partial(_local_task, source, mask, raster_shape(source), kind, connectivity,
                             edge_outlet, min_persistence, termini=termini, merge_level=merge_level)
    return list(map(task, wins))


def _finish_task(source, mask, resolution, window):
    return finish(read_block(source, window, resolution.shape, mask), window, resolution)


def blocked_pairs(source: Any, *, kind: str, connectivity: int = 8, edge_outlet: bool | None = None,
                  block: int | tuple[int, int] = 1024, min_persistence: float = 0.0,
                  map: Callable[..., Iterable] = builtins.map, mask: Any = None) -> Pairs:
    """0-dimensional persistence pairs of a raster computed block by block.

    Parameters
    ----------
    source : array-like
        Anything with ``.shape`` and 2-D slicing ``source[r0:r1, c0:c1]``
        returning values with NaN for nodata: a numpy array, ``np.memmap``,
        a zarr array, or a lazy object computing each window. (Pages of a
        plain ``np.memmap`` that were read stay mapped and count in the
        resident set, as reclaimable page cache; a reader that opens the
        file per window does not keep them.)
    kind, connectivity, edge_outlet
        As :func:`terrain.engine.persistence.pairs`.
    block : int or (rows, cols)
        Block size (the last row and column of blocks are clipped).
    min_persistence : float
        Drop finite pairs of lower persistence (the result is the filtered
        subset of the full result, in the same order). Applied in each block
        already, so the summaries carry only the pairs that are kept.
    map : callable
        ``map(fn, windows)`` returning results in order, e.g. ``executor.map``
        of a process pool, or ``lambda f, w: client.gather(client.map(f, w))``
        for a Dask client, to run the local tasks in parallel. Each task reads
        its own window from ``source``, which must then pickle cheaply (a
        path-backed reader, a zarr array; a numpy array is pickled whole).
    mask : array-like, optional
        True marks nodata, sliced like ``source``.

    Returns
    -------
    Pairs
        Bit for bit what ``pairs(source[:, :], ...)`` returns.

    References
    ----------
    .. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees.
       PPoPP '13, 93-102. doi:10.1145/2442516.2442526

    Examples
    --------
    >>> import numpy as np
    >>> from terrain.engine.persistence import pairs
    >>> z = np.random.default_rng(0).random((9, 7)).astype(np.float32)
    >>> p, q = blocked_pairs(z, kind="peaks", block=(2, 3)), pairs(z, kind="peaks")
    >>> bool(np.array_equal(p.birth, q.birth) and np.array_equal(p.death, q.death))
    True
    """
    check_kind(kind, connectivity)
    shape = raster_shape(source)
    wins = windows(shape, block)
    if not wins:
        return empty_pairs(kind)
    summaries = local_summaries(source, wins, kind=kind, connectivity=connectivity,
                                edge_outlet=edge_outlet, map=map, mask=mask,
                                min_persistence=min_persistence)
    return collect(summaries, glue(summaries), min_persistence=min_persistence)


def blocked_fill(source: Any, *, connectivity: int = 8, block: int | tuple[int, int] = 1024,
                 out: Any = None, map: Callable[..., Iterable] = builtins.map,
                 mask: Any = None) -> tuple[Pairs, Any]:
    """Pit pairs (edge as outlet) and the depression-filled surface, block
    by block: the blocked counterpart of ``pairs_and_fill()``.

    ``out`` (default: a new float64 array) receives the filled surface by
    slice assignment, one block at a time, so it may be an ``np.memmap`` or
    a zarr array. Other parameters as :func:`blocked_pairs`. Two passes over
    ``source``: local steps, glue, then :func:`finish` per block.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    shape, wins = _pits_windows(source, connectivity, block)
    if out is None:
        out = np.empty(shape, np.float64)
    if not wins:
        return empty_pairs("pits"), out
    p, res = _pits_pass_one(source, wins, connectivity, map, mask, termini=False)
    for w, filled in zip(wins, map(functools.partial(_finish_task, source, mask, res), wins)):
        out[w.r0:w.r1, w.c0:w.c1] = filled
    return p, out


def _pits_windows(source, connectivity, block):
    check_kind("pits", connectivity)
    shape = raster_shape(source)
    return shape, windows(shape, block)


def _pits_pass_one(source, wins, connectivity, map, mask, termini):
    """Local steps of pits with the edge as outlet, glued; the pairs and the resolution."""
    summaries = local_summaries(source, wins, kind="pits", connectivity=connectivity,
                                edge_outlet=True, map=map, mask=mask, termini=termini)
    res = glue(summaries)
    return collect(summaries, res), res


def _levels_task(source, mask, resolution, window):
    return finish_levels(read_block(source, window, resolution.shape, mask), window, resolution)


def blocked_levels(source: Any, *, connectivity: int = 8, block: int | tuple[int, int] = 1024,
                   level_out: Any = None, depth_out: Any = None,
                   map: Callable[..., Iterable] = builtins.map,
                   mask: Any = None) -> tuple[Pairs, Any, Any]:
    """Pit pairs (edge as outlet) and, per cell, the fill level and the
    depression depth of its basin, block by block: the blocked counterpart
    of ``pits_and_levels()`` read per cell (``level[basin]``,
    ``depth[basin]``; see :func:`finish_levels`).

    ``level_out`` and ``depth_out`` (default: new float64 arrays) receive
    the values by slice assignment, one block at a time, so they may be
    ``np.memmap`` or zarr arrays. Other parameters as :func:`blocked_fill`.
    Two passes over ``source``: local steps with termini, glue, then
    :func:`finish_levels` per block.

    References
    ----------
    .. [1] Barnes, R. (2016). Parallel Priority-Flood depression filling
       for trillion cell digital elevation models on desktops or clusters.
       Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001
    """
    shape, wins = _pits_windows(source, connectivity, block)
    level_out = np.empty(shape, np.float64) if level_out is None else level_out
    depth_out = np.empty(shape, np.float64) if depth_out is None else depth_out
    if not wins:
        return empty_pairs("pits"), level_out, depth_out
    p, res = _pits_pass_one(source, wins, connectivity, map, mask, termini=True)
    for w, (lv, dp) in zip(wins, map(functools.partial(_levels_task, source, mask, res), wins)):
        level_out[w.r0:w.r1, w.c0:w.c1] = lv
        depth_out[w.r0:w.r1, w.c0:w.c1] = dp
    return p, level_out, depth_out
