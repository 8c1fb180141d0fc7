"""Exceptions raised by cairn.

Every error cairn raises on purpose derives from :class:`CairnError`; the
command line turns exactly these into a one-line message and exit code 2.
Subclasses also inherit the matching built-in (``ValueError`` or ``OSError``)
so that library users can catch them the usual way. Code never matches on
message text: it catches a class.
"""

from __future__ import annotations


class CairnError(Exception):
    """Root of all errors raised by cairn on purpose."""


# --- input rasters -----------------------------------------------------------
class DemError(CairnError):
    """A problem with an input elevation raster."""


class DemNotFoundError(DemError, FileNotFoundError):
    """The DEM path does not exist."""


class NotARasterError(DemError, OSError):
    """The file exists but no raster driver can open it."""


class CorruptRasterError(DemError, OSError):
    """The raster opens but its pixels cannot be read (truncated, damaged)."""


class NoValidCellsError(DemError, ValueError):
    """Every cell of the (windowed) raster is nodata or non-finite."""


class BandError(DemError, ValueError):
    """The band choice is missing (multi-band file) or out of range."""


class WindowError(DemError, ValueError):
    """The requested bounding box does not overlap the raster."""


# --- options and models --------------------------------------------------------
class OptionError(CairnError, ValueError):
    """An option value is out of range or inconsistent with others."""


class EmbeddingError(CairnError, ValueError):
    """Circulant embedding of a covariance never became non-negative definite."""


# --- outputs, runs, resources ---------------------------------------------------
class OutputError(CairnError, OSError):
    """An output path cannot be used (exists, is a file, not writable)."""


class CheckpointError(CairnError, ValueError):
    """A checkpoint is damaged or belongs to another run."""


class MemoryGuardError(CairnError, MemoryError):
    """The run would need more memory than the machine has available."""


class SchedulerError(CairnError, OSError):
    """A Dask scheduler could not be reached."""


class OutletError(CairnError, ValueError):
    """An outlets file is empty, unreadable, or its points miss valid cells."""
