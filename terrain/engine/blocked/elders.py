"""Relations in the blocked engine: the elder of every pair, as ``pairs()`` gives it.

A pair's *elder* (:attr:`terrain.engine.persistence.Pairs.elder`) is the
birth cell of the component holding its death cell once every merge at that
cell is made; -1 for the outlet. A block's final pair knows it locally when
that component is closed in the block (its birth cell) or is the outlet;
when the component reaches another block the block hands up its
reduced-graph vertex (``-2 - its birth cell``, :func:`~terrain.engine.blocked.kernels.local_merge`),
and :func:`collected_elders` climbs the glued merge forest from it to the
root once every merge at the death cell is made. The glue's own pairs climb
from their own vertex. Memory: 8 bytes per pair; no pass over cells.

References
----------
.. [1] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule).
.. [2] Morozov, D., Weber, G. H. (2013). Distributed merge trees. PPoPP '13,
   93-102. doi:10.1145/2442516.2442526
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import kernels as _k

__all__ = ["local_elders", "collected_elders"]


def _global(cells: np.ndarray, blk: Any) -> np.ndarray:
    r, c = np.divmod(cells, blk.nc)
    return (blk.window.r0 + r) * blk.shape[1] + blk.window.c0 + c


def local_elders(pel: np.ndarray, blk: Any, vertex_minc: np.ndarray) -> np.ndarray:
    """A block's elders with global cells: a closed component's birth cell,
    -1 for the outlet, ``-2 - cell`` for a reduced-graph vertex (its birth
    cell, unique among all blocks' vertices; ``vertex_minc``: local birth
    cell of each of the block's vertices)."""
    pel = np.asarray(pel, np.int64)
    g = _global(np.maximum(pel, 0), blk)
    vx = _global(np.asarray(vertex_minc, np.int64)[np.maximum(-pel - 2, 0)], blk) \
        if vertex_minc.size else np.zeros(pel.size, np.int64)
    return np.where(pel >= 0, g, np.where(pel == -1, -1, -2 - vx))


def collected_elders(summaries, resolution, pb: np.ndarray, pd: np.ndarray, pdk: np.ndarray,
                     keep: np.ndarray | None) -> np.ndarray:
    """Elders of the collected finite pairs (the blocks' final pairs, then the
    glue's, as :func:`terrain.engine.blocked.collect` concatenates them, ``keep``
    applied), resolved through the glued merge forest where needed."""
    f = resolution.forest
    parts = [s.elder if s.elder is not None else np.full(s.birth.size, -1, np.int64)
             for s in summaries]
    parts.append(-2 - np.asarray(resolution.birth, np.int64))  # the glue's: their own vertex
    el = np.concatenate(parts)
    if keep is not None:
        el = el[keep]
    need = np.flatnonzero(el <= -2)
    if need.size:
        # a vertex is one basin: its birth cell names it among all blocks' vertices
        o = np.argsort(f.vcell[:-1], kind="stable")
        v = o[np.searchsorted(f.vcell[:-1], -el[need] - 2, sorter=o)]
        out = np.empty(need.size, np.int64)
        _k.elder_roots(f.up, f.mcell, f.mkey, v.astype(np.int64), pdk[need].astype(np.float64),
                       pd[need].astype(np.int64), f.out_id, f.vcell, out)
        el[need] = out
    return el
