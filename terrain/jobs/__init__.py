"""Jobs: what one realisation computes, and how its results are accumulated.

A job (see :class:`terrain.runner.protocols.Job`) is handed to
:func:`terrain.runner.run_ensemble`, which draws the realisations, runs them
on a backend and folds their results in realisation order.
"""

from .catchments import CatchmentJob
from .credit import CreditJob

__all__ = ["CreditJob", "CatchmentJob"]
