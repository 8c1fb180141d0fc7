"""Memory guard: refuse runs that would not fit, before allocating."""

from __future__ import annotations

from .dem import Dem
from .errors import MemoryGuardError
from .io import available_memory

__all__ = ["available_bytes", "estimate_bytes", "check_memory", "describe_memory"]

LOG_BYTES_PER_PAIR = 21  # pair log entry on grids below 2**31 cells


def available_bytes() -> int:
    """Memory available to a new run (see :func:`terrain.io.available_memory`)."""
    return available_memory()


def estimate_bytes(dem: Dem, job, *, workers: int, realisations: int,
                   pairs_per_real: int = 2000) -> int:
    """Bytes a run needs: each worker's realisation, the parent's accumulators and log.

    Per cell, the job states what the accumulating process and each worker
    hold (:meth:`memory_per_cell`); the parent also keeps about 21 bytes per
    logged pair (an assumed ``pairs_per_real`` per realisation).
    """
    cells = dem.z.size
    parent, worker = job.memory_per_cell(dem.z.itemsize)
    return workers * worker * cells + parent * cells + \
        LOG_BYTES_PER_PAIR * pairs_per_real * realisations


def check_memory(dem: Dem, job, *, workers: int, realisations: int, force: bool = False) -> int:
    """Estimated bytes of the run; raises :class:`MemoryGuardError` when they exceed
    the available memory (unless ``force``)."""
    need = estimate_bytes(dem, job, workers=workers, realisations=realisations)
    have = available_bytes()
    if need > have and not force:
        _, worker = job.memory_per_cell(dem.z.itemsize)
        raise MemoryGuardError(
            f"{dem.source}: the run needs about {need / 2**30:.1f} GiB "
            f"({worker} bytes per cell per worker x {workers} workers) but "
            f"{have / 2**30:.1f} GiB is available; use {{bbox}} for a smaller window, fewer "
            "{workers}, or {force}", "bbox", "workers", "force")
    return need


def describe_memory(dem: Dem, job) -> str:
    """One line on the memory a run of ``job`` on ``dem`` needs (for ``inspect``)."""
    cells = dem.z.size
    parent, worker = job.memory_per_cell(dem.z.itemsize)
    return (f"~{worker} bytes per cell per worker = {worker * cells / 2**20:.1f} MiB per worker, "
            f"plus {parent} bytes per cell = {parent * cells / 2**20:.1f} MiB in the accumulating "
            "process")
