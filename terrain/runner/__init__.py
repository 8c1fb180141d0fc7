"""The runner: realisations on a backend, folded in order, checkpointed, stopped early.

:func:`run_ensemble` is the one public way to run a job; the parts it is
made of live in :mod:`.plan` (chunks, in-order folding, adaptive stopping),
:mod:`.backends` (serial, local processes, Dask), :mod:`.checkpoint` and
:mod:`.protocols` (the job and accumulator interfaces).
"""

from .backends import BACKENDS
from .ensemble import Execution, RunInterrupted, RunResult, run_ensemble
from .protocols import Accumulator, Job

__all__ = ["run_ensemble", "Execution", "RunResult", "RunInterrupted", "BACKENDS", "Job",
           "Accumulator"]
