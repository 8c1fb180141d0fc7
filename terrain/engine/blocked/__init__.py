"""Blocked (out-of-core) persistence pairs: the same pairs as ``pairs()``,
one block in memory at a time.

:func:`blocked_pairs` returns exactly (bit for bit, every field, dtype and
order) what :func:`terrain.engine.persistence.pairs` returns on the whole
raster, while holding one block plus a one-cell halo, and a summary of the
block boundaries. :func:`blocked_fill` adds the depression-filled surface
of :func:`~terrain.engine.persistence.pairs_and_fill`, written block by
block; :func:`blocked_levels` the fill level and depression depth of each
cell's basin (``pits_and_levels()`` read per cell), the per-cell data of
:func:`~terrain.engine.persistence.count_ponding`. The regions of
``regions()`` are built on these steps in :mod:`terrain.engine.blocked.regions`.

Algorithm
---------
The raster is cut into a grid of blocks. Three pure steps, each on arrays:

1. :func:`local` (one task per block, independent): steepest-descent basins
   *inside the block*, the merge edges at its saddle candidates (the block
   read as a raster of its own) and the elder-rule union-find of
   ``persistence.py``, with one change. A basin is *terminal* when it holds
   a cell with a valid neighbour in another block (read from the halo; the
   virtual outlet is terminal in every block). When two components meet at
   cell ``w`` and the younger one is not terminal, it dies at ``w`` for
   good: no cell outside the block touches it, and its partner only gets
   older when more cells are added. Such pairs are final and leave the
   block with the summary. A merge in which the younger component is
   terminal is not decided locally, since a merge in another block may
   change which side is elder; it is handed up as an edge of a *reduced
   graph* whose vertices are the terminal basins and the birth basin of
   every older closed component that joins a terminal one (its birth may
   win the global elder rule). As in distributed merge trees [1]_, a block
   settles what its boundary cannot affect and hands up only the part of
   its merge tree that touches the block boundary.
2. :func:`glue` (global, one task): the reduced graphs of all blocks plus
   the cross-block neighbour edges (one per pair of facing boundary
   cells, built from the blocks' boundary strips, lowest kept per vertex
   pair) go through the same elder-rule union-find. Its pairs are the
   undecided ones; it also resolves, per reduced-graph vertex, the cell at
   which its component joins the outlet.
3. :func:`finish` (one task per block, needs the resolution): recomputes
   the block's local step, maps every basin to (time it first reached the
   boundary, reduced-graph vertex it then joined), and from the resolved
   value of that vertex computes a per-cell array -- the filled surface.

Per-cell values that belong to a cell's *basin of steepest descent on the
whole raster* (fill level and depression depth, region) need that basin,
and near a block line the steepest neighbour may lie in the next block.
With ``local(..., termini=True)`` each block also follows every cell's
steepest descent with the halo's neighbours (:func:`descend_block`) and
hands up, per boundary cell, where the chain ends in the block: a minimum
of the raster or the neighbouring cell it leaves for; :func:`glue` follows
those chains from strip to strip to a minimum, and keeps the *merge
forest* of the reduced graph (each vertex below the root it died into, at
that cell), from which the second passes read any component's identity and
age just before any cell (:class:`Forest`). :func:`levels_from` gives
each minimum its fill level (the later of its component's first boundary
time and that vertex's join with the outlet) and its depression depth
(level minus the deepest cell of its component below the level: the
block's own merge log while the component is closed, the merge forest
after). It reads only what the first pass kept of the block
(:func:`local_and_levels`, :class:`LevelInputs`: per cell the row of the
minimum or exit its descent reaches, per minimum four numbers), so the
second pass of depressions does not redo the local step;
:func:`finish_levels` is both passes on one block.

Ties use the global flat index throughout (inside a block the local
row-major order equals the global one). Whether a cell is on the raster
edge or next to nodata, and whether it faces a valid cell of another block,
is read from the one-cell halo. ``edge_limited`` follows the definition of
``pairs()`` independently of merge order: a component's first edge cell is
counted from the time it joined (the later of the cell and the merge), and
a pair dying at ``w`` is edge-limited when that time is before ``w`` or
``w`` is an edge cell.

Why it is exact: the pairs of a graph filtration are those of its minimum
spanning forest (Kruskal), so the blocks' local forests plus the
cross-block edges give the global pairs; a non-terminal component that
dies locally is closed to the rest of the raster and is younger than a
component that contains its partner, whatever that partner grows into; and
a terminal component's evolution, birth and first edge cell are carried by
its reduced-graph vertices with the same merge times [1]_, [2]_.

Memory
------
Local step, beyond the block's values with halo: as ``pairs()`` on one
block (labels 4 bytes per cell, the negated key 4 for peaks, validity and
flags 1 each) plus per-basin tables; measured 12-15 bytes per block cell on
terrain plus noise, 40-44 on white noise (``bench/bench_blocked.py``).

Global step: it never sees a cell that is not on a block boundary. Per
boundary cell (a cell facing another block) a summary hands up 13 bytes
of strip (vertex id, key, edge flag); per reduced-graph vertex 32 bytes
(cell, key, first edge cell and its key) and per reduced edge 25 bytes.
Measured per boundary cell on a 4096**2 raster, the same for 1024**2 and
256**2 blocks: handed up 19 bytes (terrain plus noise) to 40 (white noise,
the worst case: nearly every boundary cell is its own basin); peak memory
of :func:`glue` 21-30 bytes (terrain plus noise) to 135 (white noise).
For 2e9 cells in 1024**2 blocks (7.7e6 boundary cells) that is at most
about 1 GB. The final pairs are the output; they travel in the summaries
and are merged by :func:`collect`, which the glue does not need.

With termini: the local step holds 4 more bytes per cell while it runs
(where each cell's descent ends; measured 14.5 against 11.3 bytes per
block cell, pits). Per boundary cell a summary hands up 8 more bytes
(``Strip.term``) and, for pits with the edge as outlet, 40 bytes per
distinct minimum those cells reach (:class:`Roots`): measured +8 (peaks)
and +10 (pits) bytes per boundary cell on terrain plus noise, +8 and +18
on white noise. The glue keeps 24 more bytes per reduced-graph vertex
(merge forest) and 8 per boundary cell (its global vertex and its row of
:class:`Minima`, int32 each), plus 8-24 per minimum; its measured peak
is 44 bytes per boundary cell on terrain plus noise (1024**2 blocks; 22-27
without termini) and unchanged at 145 on white noise. The level inputs
kept between the passes take 4 bytes per block cell (the descent codes,
renumbered in place) plus 32 per raster minimum of the block and 8 per
exit; the second pass of depressions holds those, the block's values and
its counts (4 each), region labels (8) and a label view (4): about 25
bytes per block cell.

Modules
-------
``windows`` (block windows, halo, reading a block), ``summaries``
(what the steps hand each other), ``local`` (step 1), ``glue`` (step 2),
``finish`` (step 3 and the per-cell levels), ``drivers`` (the steps over
every block through a ``map``), ``regions`` (the regions of ``regions()``
block by block), ``kernels`` and ``region_kernels`` (compiled kernels).

References
----------
.. [1] Morozov, D., Weber, G. H. (2013). Distributed merge trees. Proc.
   18th ACM SIGPLAN Symposium on Principles and Practice of Parallel
   Programming (PPoPP '13), 93-102. doi:10.1145/2442516.2442526
.. [2] Carr, H. A., Weber, G. H., Sewell, C. M., Ahrens, J. P. (2016).
   Parallel peak pruning for scalable SMP contour tree computation. IEEE
   6th Symposium on Large Data Analysis and Visualization (LDAV), 75-84.
   doi:10.1109/LDAV.2016.7874312 (merge trees computed in parallel by
   pruning extrema, a Boruvka-like contraction of the minimum spanning
   forest).
.. [3] Edelsbrunner, H., Letscher, D., Zomorodian, A. (2002). Topological
   persistence and simplification. Discrete Comput. Geom. 28, 511-533.
   doi:10.1007/s00454-002-2885-2 (elder rule).
.. [4] Kruskal, J. B. (1956). On the shortest spanning subtree of a graph
   and the traveling salesman problem. Proc. AMS 7(1), 48-50.
   doi:10.1090/S0002-9939-1956-0078686-7
.. [5] Barnes, R. (2016). Parallel Priority-Flood depression filling for
   trillion cell digital elevation models on desktops or clusters.
   Computers & Geosciences. doi:10.1016/j.cageo.2016.07.001 (tiles
   filled from a graph of spill levels between tile edges).
"""

from .drivers import blocked_fill, blocked_levels, blocked_pairs, local_summaries
from .finish import finish, finish_levels, levels_from, need_termini, ring_values
from .glue import collect, glue
from .local import (
    descend_block,
    level_inputs,
    local,
    local_and_levels,
    local_engine,
    prepare_block,
    strip_cells,
    to_local,
)
from .regions import (
    RegionResolution,
    RegionSummary,
    blocked_regions,
    glue_regions,
    region_labels,
    region_step,
    region_table,
    window_reps,
)
from .summaries import (
    BlockSummary,
    Boundary,
    Forest,
    LevelInputs,
    Minima,
    Resolution,
    Roots,
    Strip,
)
from .windows import Window, as_float, halo, raster_shape, read_block, windows

__all__ = ["Window", "Strip", "Roots", "BlockSummary", "Forest", "Boundary", "Minima", "Resolution",
           "LevelInputs", "windows",
           "halo", "read_block", "local", "local_and_levels", "glue", "collect", "finish",
           "finish_levels", "level_inputs", "levels_from",
           "blocked_pairs", "blocked_fill", "blocked_levels", "local_summaries",
           "as_float", "raster_shape", "prepare_block", "local_engine", "descend_block",
           "strip_cells", "to_local", "need_termini", "ring_values",
           "RegionSummary", "RegionResolution", "region_table", "window_reps", "region_step",
           "glue_regions", "region_labels", "blocked_regions"]
