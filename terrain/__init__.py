"""cairn: stable peak and basin attribution on elevation rasters.

The library behind the ``cairn`` command. Compute functions take arrays and
return arrays; :mod:`terrain.io` is the only module that opens paths.

>>> from terrain import Dem, CreditJob, ErrorModel, run_ensemble
"""

from .dem import Dem
from .engine.persistence import Pairs, pairs
from .errors import CairnError
from .jobs import CatchmentJob, CreditJob
from .noise import ErrorModel, rmse_from
from .runner import RunResult, run_ensemble
from .version import __version__

__all__ = ["Dem", "CairnError", "Pairs", "pairs", "CreditJob", "CatchmentJob", "ErrorModel",
           "rmse_from", "run_ensemble", "RunResult", "__version__"]
