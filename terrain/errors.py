"""Exceptions raised by cairn.

Every error cairn raises on purpose derives from :class:`CairnError`; the
command line turns exactly these into a one-line message and exit code 2.
Subclasses also inherit the matching built-in (``ValueError``, ``OSError``,
``MemoryError``) so that library users can catch them the usual way. Code
never matches on message text: it catches a class.

Messages name library parameters, never command-line flags. A message may
hold a parameter in braces, ``"{threshold} must be >= 0"``, listed in
``params``; ``str(exc)`` shows the parameter's own name and a front end shows
its name for it with :meth:`CairnError.render`.
"""

from __future__ import annotations

from collections.abc import Callable

__all__ = [
    "CairnError", "DemError", "DemNotFoundError", "NotARasterError", "CorruptRasterError",
    "NoValidCellsError", "BandError", "WindowError", "OptionError",
    "OutputError", "CheckpointError", "MemoryGuardError", "SchedulerError", "WorkerError",
    "OutletError", "RasterTypeError", "GeoreferenceError", "CairnWarning", "Terminated",
]


class _Templated:
    """A one-line message whose ``{param}`` names a front end may relabel.

    Parameters
    ----------
    message : str
        One line; parameters named in it as ``{name}`` are listed in ``params``.
    *params : str
        Library parameter names that :meth:`render` may relabel.
    """

    def __init__(self, message: str = "", *params: str):
        self.template = message
        self.params = params
        super().__init__(self.render(lambda p: p))

    def render(self, label: Callable[[str], str]) -> str:
        """The message with every ``{param}`` replaced by ``label(param)``."""
        text = self.template
        for p in self.params:
            text = text.replace("{" + p + "}", label(p))
        return text


class Terminated(KeyboardInterrupt):
    """SIGTERM: the process was asked to end (a KeyboardInterrupt, so code that
    cleans up after a Ctrl-C cleans up after it too). A run's second SIGTERM
    raises it at once, as its second Ctrl-C raises KeyboardInterrupt."""


class CairnError(_Templated, Exception):
    """Root of all errors raised by cairn on purpose (see :class:`_Templated`)."""


class CairnWarning(_Templated, UserWarning):
    """Something a user should be told once, not an error; its message may
    name parameters like a :class:`CairnError`'s."""


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
    """The requested bounding box is empty, misses the raster, or cannot
    window it (a rotated or sheared grid)."""


class RasterTypeError(DemError, TypeError):
    """The band holds values that are not real numbers (complex)."""


class GeoreferenceError(DemError, ValueError):
    """The raster's georeferencing cannot be right (a geographic grid whose rows
    lie beyond a pole)."""


# --- options and models --------------------------------------------------------
class OptionError(CairnError, ValueError):
    """A parameter value is out of range or inconsistent with others."""


# --- outputs, runs, resources ---------------------------------------------------
class OutputError(CairnError, OSError):
    """An output path cannot be used (exists, is a file, not writable, in use
    by another run) or a file could not be written (disk full)."""


class CheckpointError(CairnError, ValueError):
    """A checkpoint is damaged or belongs to another run."""


class MemoryGuardError(CairnError, MemoryError):
    """The run would need more memory than the machine has available."""


class SchedulerError(CairnError, OSError):
    """A Dask scheduler could not be reached."""


class WorkerError(CairnError, RuntimeError):
    """Worker processes could not start, or died during a run."""


class OutletError(CairnError, ValueError):
    """An outlets file is empty, unreadable, or its points miss valid cells."""
