"""A run's layout: whole grid or blocks, in memory or on disk -- decided once.

A run computes each realisation either on the whole grid or block by block
(blocked mode, ``block`` cells a side, :mod:`terrain.runner.blocked`); a
single blocked run keeps the DEM and its region labels on disk (out of
core, :class:`~terrain.dem.DiskDem`), and depressions add their ponding
counts to a store on disk. :class:`RunLayout` carries that decision, and
every part that depends on it -- the memory guard, reading the DEM,
resolving a job, the runner, the checkpoint, the feature summary, the
writer and the quick-look -- reads it from there instead of deciding again
from a block size, a grid size or the DEM's type:

- :func:`plan_layout` makes it from the grid's shape, the job, the block
  asked for and the number of runs (what a DEM's header gives);
- :func:`candidates` lists what the memory guard tries, in order
  (:func:`terrain.resources.choose_layout` keeps the first that fits);
- :func:`layout_of` states it for a DEM already read (a DEM on disk is out
  of core; a run of one needs a block).

``tests/test_architecture.py`` checks that no other module compares a grid
with a block or reads the default block side.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .defaults import DISK_BLOCK
from .errors import OptionError

__all__ = ["RunLayout", "plan_layout", "candidates", "layout_of", "check_block",
           "effective_block", "MIN_BLOCK", "DEFAULT_BLOCK", "BLOCKED_KINDS"]

MIN_BLOCK = 16  # cells a side, at least
DEFAULT_BLOCK = DISK_BLOCK  # the block side when none is given (the one default)
BLOCKED_KINDS = ("peaks", "depressions")  # jobs with a blocked mode


@dataclass(frozen=True)
class RunLayout:
    """Where a run keeps its grids and how it cuts a realisation.

    Attributes
    ----------
    block : int or None
        The block side each realisation is computed in (no larger than the
        grid's longer side); None: the whole grid at once.
    on_disk : bool
        The DEM and the region labels live on disk and are read by window
        (out of core); the layers, the summary and the quick-look are then
        made window by window.
    counts_on_disk : bool
        Depressions' ponding counts live in a count store on disk
        (:class:`~terrain.io.CountStore`), added to block by block.
    one_block : bool
        Blocked, and the grid fits in one block (blocks save nothing).
    """

    block: int | None = None
    on_disk: bool = False
    counts_on_disk: bool = False
    one_block: bool = False

    @property
    def blocked(self) -> bool:
        """True when each realisation is computed block by block."""
        return self.block is not None

    @property
    def given_block(self) -> int | None:
        """The block side the DEM as given is worked in (its regions, relations
        and own ponding): the run's block for a DEM on disk (so the glue holds
        no more boundary than the run's own; :data:`DEFAULT_BLOCK` when none
        was given), None (the whole grid) for a DEM in memory."""
        if not self.on_disk:
            return None
        return self.block or DEFAULT_BLOCK

    def checkpoint_layout(self) -> dict:
        """What a checkpoint records of the layout (``layout_json``)."""
        return {"counts_on_disk": self.counts_on_disk, "block": self.block}


def _kind(job) -> str | None:
    return getattr(job, "kind", None)


def check_block(block: int | None, job=None) -> None:
    """Refuse a block size below :data:`MIN_BLOCK` or (given) a job that has no blocked mode."""
    if block is None:
        return
    if isinstance(block, bool) or int(block) != block or block < MIN_BLOCK:
        raise OptionError(f"{{block}} must be a whole number of cells >= {MIN_BLOCK}, got {block}",
                          "block")
    if job is not None and _kind(job) not in BLOCKED_KINDS:
        raise OptionError("{block} is for peaks and depressions runs (catchments need the "
                          "whole grid's flow directions)", "block")


def effective_block(block: int | None, shape) -> int | None:
    """The block side a run uses: ``block``, but no larger than the grid's longer
    side (a block larger than the grid is one block, whatever number was
    given; the layers do not depend on it) and never below :data:`MIN_BLOCK`.
    Values that are not a whole number are returned for :func:`check_block`
    to refuse."""
    if block is None or isinstance(block, bool) or not isinstance(block, (int, np.integer)):
        return block
    if block < MIN_BLOCK:
        return block
    return int(max(MIN_BLOCK, min(int(block), max(int(v) for v in shape))))


def plan_layout(shape, block: int | None = None, *, job=None, runs: int = 1) -> RunLayout:
    """The layout of ``runs`` runs of ``job`` on a grid of ``shape`` cells with
    ``block`` asked for: blocked with the effective block side when a block
    is given; a single blocked run keeps its grids on disk (a sweep's runs
    share one DEM in memory)."""
    side = _side(shape, block, job)
    return _layout(shape, block, side, job, side is not None and runs == 1)


def candidates(shape, block: int | None = None, *, job=None, runs: int = 1) -> tuple[RunLayout, ...]:
    """The layouts the memory guard tries, in order: the one asked for and,
    when no block was asked and the job has a blocked mode, blocks of
    :data:`DEFAULT_BLOCK`."""
    asked = plan_layout(shape, block, job=job, runs=runs)
    if asked.blocked or _kind(job) not in BLOCKED_KINDS:
        return (asked,)
    return asked, plan_layout(shape, DEFAULT_BLOCK, job=job, runs=runs)


def layout_of(dem, block: int | None = None, *, job=None, run: bool = False) -> RunLayout:
    """The layout of work on ``dem`` as read: out of core when the DEM is on
    disk (:class:`~terrain.dem.DiskDem`), blocked when ``block`` is given.
    A run (``run``) of a DEM on disk needs a block."""
    side = _side(dem.shape, block, job)
    if run and dem.on_disk and side is None:
        raise OptionError(f"{dem.source}: a DEM kept on disk is run block by block; give "
                          "{block}", "block")
    return _layout(dem.shape, block, side, job, bool(dem.on_disk))


def _side(shape, block, job) -> int | None:
    """The block side a run uses (:func:`effective_block`), checked (:func:`check_block`)."""
    side = effective_block(block, shape)
    check_block(side, job)
    return side


def _layout(shape, asked, side, job, on_disk: bool) -> RunLayout:
    one = side is not None and all(int(v) <= asked for v in shape)
    return RunLayout(side, on_disk, on_disk and _kind(job) == "depressions", one)
