"""Memory guard: refuse runs that would not fit, before allocating."""

from __future__ import annotations

import os

from .dem import Dem
from .errors import MemoryGuardError

__all__ = ["available_bytes", "estimate_bytes", "check_memory"]

LOG_BYTES_PER_PAIR = 21  # pair log entry on grids below 2**31 cells


def available_bytes() -> int:
    """MemAvailable from /proc/meminfo (Linux), else physical pages x page size."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_AVPHYS_PAGES")


def estimate_bytes(dem: Dem, *, workers: int, realisations: int, pairs_per_real: int = 2000) -> int:
    """Bytes a run needs: each worker's realisation, the parent's accumulators and pair log.

    Per worker, :meth:`Dem.realisation_bytes` per cell plus the DEM copy; the
    parent holds 52 bytes per cell of accumulators and about 21 bytes per
    logged pair (an assumed ``pairs_per_real`` per realisation).
    """
    cells = dem.z.size
    per_worker = (dem.realisation_bytes() + dem.z.itemsize) * cells
    parent = 52 * cells + LOG_BYTES_PER_PAIR * pairs_per_real * realisations
    return workers * per_worker + parent


def check_memory(dem: Dem, *, workers: int, realisations: int, force: bool = False) -> int:
    need = estimate_bytes(dem, workers=workers, realisations=realisations)
    have = available_bytes()
    if need > have and not force:
        raise MemoryGuardError(
            f"{dem.source}: the run needs about {need / 2**30:.1f} GiB "
            f"({dem.realisation_bytes()} bytes per cell per worker x {workers} workers) but "
            f"{have / 2**30:.1f} GiB is available; use --bbox for a smaller window, fewer "
            "--workers, or --force")
    return need
