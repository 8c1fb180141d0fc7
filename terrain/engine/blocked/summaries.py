"""What the blocked steps hand each other: a block's boundary strips, roots and
summary (:class:`BlockSummary`), the glue's merge forest and resolution
(:class:`Resolution`), and what the first pass keeps for the second pass of
depressions (:class:`LevelInputs`).

See :mod:`terrain.engine.blocked` for the algorithm and its memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .windows import Window


# ----------------------------------------------------------------------------
# summaries
# ----------------------------------------------------------------------------
@dataclass(frozen=True)
class Strip:
    """One side of a block: per cell the reduced-graph vertex (-1: none),
    the key and the edge flag. Empty on a raster edge. With termini
    (``local(..., termini=True)``) also ``term``: where the cell's steepest
    descent ends inside its block -- the global cell of a raster minimum,
    ``-(j + 2)`` when it leaves the block for global cell ``j``, -1 on
    nodata."""

    vertex: np.ndarray
    key: np.ndarray
    edge: np.ndarray
    term: np.ndarray | None = None


@dataclass(frozen=True)
class Roots:
    """Per raster minimum that a strip cell descends to (pits with the edge
    as outlet, with termini): global ``cell``; the time its component first
    reached the block boundary (global cell ``tc``, -1: from birth, -2:
    never; key ``tk``); the reduced-graph vertex it then joined (``x``,
    block-local id; -1: the outlet, -2: none); and ``dk``, the deepest key
    of its component below ``tk`` (:func:`~terrain.engine.blocked.kernels.depression_roots`).
    What the glue needs to give these minima their fill level and
    depression depth. Sorted by ``cell``."""

    cell: np.ndarray
    tc: np.ndarray
    tk: np.ndarray
    x: np.ndarray
    dk: np.ndarray


@dataclass(frozen=True)
class BlockSummary:
    """What :func:`local` hands up for one block (numpy arrays; picklable).

    Final pairs use global cells and keys (``-z`` for peaks): ``birth``,
    ``death``, ``birth_key``, ``death_key``, ``edge_limited``, and
    essential classes of components closed inside the block (``ess_*``).
    The boundary part (all the global step reads) is the reduced graph --
    vertices ``vertex_cell``/``vertex_key`` with first edge cell
    ``vertex_eff``/``vertex_eff_key``, edges ``edge_u``/``edge_v`` (vertex
    ids, -1: outlet) at cell ``edge_w`` -- and the four side ``strips``.
    """

    window: Window
    shape: tuple[int, int]
    kind: str
    connectivity: int
    edge_outlet: bool
    birth: np.ndarray
    death: np.ndarray
    birth_key: np.ndarray
    death_key: np.ndarray
    edge_limited: np.ndarray
    ess_birth: np.ndarray
    ess_key: np.ndarray
    ess_edge: np.ndarray
    vertex_cell: np.ndarray
    vertex_key: np.ndarray
    vertex_eff: np.ndarray
    vertex_eff_key: np.ndarray
    edge_u: np.ndarray
    edge_v: np.ndarray
    edge_w: np.ndarray
    edge_key: np.ndarray
    edge_flag: np.ndarray
    strips: tuple[Strip, Strip, Strip, Strip]
    float32: bool = True
    roots: Roots | None = None
    elder: np.ndarray | None = None  # relations: per final pair, see terrain.engine.blocked.elders

    def boundary_nbytes(self) -> int:
        """Bytes of the boundary part (what :func:`glue` reads)."""
        arrs = [self.vertex_cell, self.vertex_key, self.vertex_eff, self.vertex_eff_key,
                self.edge_u, self.edge_v, self.edge_w, self.edge_key, self.edge_flag]
        arrs += [a for s in self.strips for a in (s.vertex, s.key, s.edge, s.term)
                 if a is not None]
        if self.roots is not None:
            arrs += [self.roots.cell, self.roots.tc, self.roots.tk, self.roots.x, self.roots.dk]
        return int(sum(a.nbytes for a in arrs))

    def boundary_cells(self) -> int:
        """Number of cells in the strips (cells facing another block)."""
        return int(sum(s.vertex.size for s in self.strips))


@dataclass(frozen=True)
class Forest:
    """The glued merge forest over all reduced-graph vertices (global ids;
    the last one is the outlet): per vertex its birth (``vcell``,
    ``vkey``), the root it died into (``up``, -1: never) and the cell
    and key of that merge (``mcell``, ``mkey``), and the cell and key at
    which its component joins the outlet (``jcell``, -1: never; ``jkey``).
    A vertex's component just before any cell is found by climbing
    (:func:`~terrain.engine.blocked.kernels.forest_root`). 48 bytes per
    vertex."""

    vcell: np.ndarray
    vkey: np.ndarray
    up: np.ndarray
    mcell: np.ndarray
    mkey: np.ndarray
    jcell: np.ndarray
    jkey: np.ndarray

    @property
    def out_id(self) -> int:
        """Id of the outlet vertex."""
        return int(self.vcell.size - 1)


@dataclass(frozen=True)
class Boundary:
    """One block's part of the glued boundary: the offset of its
    reduced-graph vertex ids, and per side (as its strips) the global
    vertex of each cell (``vertex``, -1: none) and the raster minimum its
    steepest descent ends at on the whole raster, as a row of
    :class:`Minima` (``minimum``, -1: nodata). 8 bytes per strip cell."""

    offset: int
    vertex: tuple
    minimum: tuple


@dataclass(frozen=True)
class Minima:
    """The raster minima that boundary cells descend to (global ``cell``,
    sorted) with, for pits with the edge as outlet, their fill ``level``
    and the ``depth`` of their depression (else None). 8-24 bytes per
    minimum."""

    cell: np.ndarray
    level: np.ndarray | None
    depth: np.ndarray | None


@dataclass(frozen=True)
class Resolution:
    """What :func:`glue` resolves globally: the undecided pairs and, per
    block window, per reduced-graph vertex, the global cell and key at
    which its component joins the outlet (-1: never).

    When the summaries carry termini, also the merge ``forest``, the
    per-window :class:`Boundary`, the :class:`Minima` the boundary cells
    descend to and the block grid (``rows``, ``cols``: first row and
    column of each row and column of blocks), which the
    per-block second passes (:func:`finish_levels`, the region steps of
    :mod:`terrain.engine.blocked_regions`) read. ``float32``: every block's
    values are exactly float32 (the whole raster's engine then works in
    float32).
    """

    shape: tuple[int, int]
    kind: str
    connectivity: int
    edge_outlet: bool
    birth: np.ndarray
    death: np.ndarray
    birth_key: np.ndarray
    death_key: np.ndarray
    edge_limited: np.ndarray
    ess_birth: np.ndarray
    ess_key: np.ndarray
    ess_edge: np.ndarray
    join_cell: dict
    join_key: dict
    n_vertices: int
    n_edges: int
    n_boundary_cells: int
    float32: bool = True
    forest: Forest | None = None
    boundary: dict | None = None
    minima: Minima | None = None
    rows: tuple = ()
    cols: tuple = ()


@dataclass(frozen=True)
class LevelInputs:
    """What one block's local step leaves for the second pass of
    depressions (:func:`levels_from`).

    ``dest`` (per cell, int32 or int64 as the block's labels): the row of
    where the cell's steepest descent on the whole raster ends -- row ``q``
    below ``tk.size`` for the ``q``-th raster minimum of the block (cell
    order), row ``tk.size + e`` when it leaves the block at exit ``e``
    (halo ring position ``ex_ring[e]``, see
    :func:`~terrain.engine.blocked.kernels.ring_index`); -1 on nodata. Per
    raster minimum, as :func:`~terrain.engine.blocked.kernels.levels_and_depths`
    reads them: ``tk``/``tc`` (key and global cell of the time its component
    first reached the block boundary; -1 from birth, -2 never), ``x``
    (block-local reduced-graph vertex then joined; -1 the outlet, -2 none)
    and ``dk`` (deepest key below ``tk``). 4 bytes per cell, 32 per raster
    minimum and 8 per exit.
    """

    dest: np.ndarray
    tk: np.ndarray
    tc: np.ndarray
    x: np.ndarray
    dk: np.ndarray
    ex_ring: np.ndarray

    def arrays(self) -> dict:
        """The fields by name (``LevelInputs(**inputs.arrays())`` rebuilds it)."""
        return {k: getattr(self, k) for k in self.__dataclass_fields__}
