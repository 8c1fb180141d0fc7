"""The two interfaces the runner works with: a job and its accumulator.

Any object with these members can be run by
:func:`terrain.runner.run_ensemble`; :class:`terrain.jobs.CreditJob` and
:class:`terrain.jobs.CatchmentJob` are the two cairn ships.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np

__all__ = ["Job", "Accumulator", "BlockedJob"]


@runtime_checkable
class Accumulator(Protocol):
    """Folds realisations in, strictly in realisation order.

    Attributes
    ----------
    n : int
        Realisations folded in so far.
    """

    n: int

    def add(self, log: dict, counts: dict, n: int) -> None:
        """Fold in the next ``n`` realisations: their log (sorted by
        realisation) and their summed integer counts."""

    def layers(self, shape: tuple[int, int]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Each layer's estimate and standard error on the grid."""

    def log(self) -> dict:
        """The per-realisation log so far, concatenated."""

    def stop_statistic(self) -> float:
        """The Monte Carlo standard error adaptive stopping compares with its
        target (NaN while undefined)."""

    def state(self) -> dict:
        """Arrays that restore this accumulator (checkpoints; no objects)."""

    def restore(self, state: dict) -> None:
        """Load :meth:`state` output back."""


@runtime_checkable
class Job(Protocol):
    """What one realisation computes.

    A job's ``None`` settings are library defaults, filled in by
    :meth:`resolved` against the DEM and error model before the run starts;
    realisations only ever see resolved jobs. A resolved job may carry
    ``reference``: the elevation the runner subtracts from the DEM before it
    becomes the float32 values realisations read
    (:meth:`terrain.dem.Dem.reference`; 0 when absent).
    """

    name: str

    @property
    def layers(self) -> tuple[str, ...]:
        """Names of the layers the accumulator produces (see terrain.layers)."""

    def resolved(self, dem, model, *, layout=None) -> Job:
        """A copy with every default resolved (and grid arrays prepared);
        ``layout`` (:class:`~terrain.layout.RunLayout`) says whether the DEM is
        on disk and in which blocks to work on it (None: as
        :func:`terrain.layout.layout_of` states it for ``dem``)."""

    def defaults_used(self) -> dict:
        """Settings left to library defaults, with the rule each follows."""

    def describe(self) -> dict:
        """JSON-able settings that identify the job (checkpoints, run.json)."""

    def new_counts(self, n_cells: int) -> dict:
        """Fresh integer per-cell counts a worker adds to in place."""

    def realise(self, z: np.ndarray, sampler, seed: int, i: int, counts: dict) -> dict:
        """Realisation ``i``: returns its log (a dict of equal-length arrays)."""

    def accumulator(self, n_cells: int) -> Accumulator:
        """A fresh accumulator for this job."""

    def memory_per_cell(self, value_bytes: int, cells: int | None = None) -> tuple[int, int]:
        """Bytes per cell (accumulating process, each worker while realising) for
        a DEM whose values take ``value_bytes`` (4 or 8) and has ``cells`` cells
        (a figure may grow with the grid, e.g. the drainage-area histogram's
        codes); the memory guard's input.

        The accumulating process's figure covers what the job holds there at
        once: its accumulators and the finished layers of the result (all of
        them, or as many as it materialises at a time); the worker's covers
        one realisation's arrays and its chunk's counts. The guard adds the
        DEM, the runner's copies, results in flight, summaries and figures
        (:mod:`terrain.resources`)."""


@runtime_checkable
class BlockedJob(Job, Protocol):
    """A job that also realises block by block (blocked mode, ``block=N``):
    the runner knows it by this method alone, never by importing a job."""

    kind: str

    def realise_blocked(self, dem, sampler, seed: int, i: int, **options) -> dict:
        """Realisation ``i`` block by block: the very log of :meth:`Job.realise`.
        ``options``: ``block``, ``regions``, ``ponding``, ``map``, ``scratch``,
        ``reference``, ``shipped`` (see
        :func:`terrain.jobs.credit_blocked.realise_blocked`)."""
