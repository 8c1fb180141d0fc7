"""cairn: stable peak and basin attribution on elevation rasters.

The library behind the ``cairn`` command. Compute functions take arrays and
return arrays; :mod:`terrain.io` is the only module that opens paths.

>>> from terrain import Dem, CreditJob, ErrorModel, run_ensemble
"""

# before any kernel is compiled: numba's cache goes to a per-user folder, not the package
from .io import kernel_cache_folder as _kernel_cache_folder  # noqa: I001
from .version import __version__

_kernel_cache_folder(__version__)

from .dem import Dem  # noqa: E402
from .engine.persistence import Pairs, pairs  # noqa: E402
from .errors import CairnError  # noqa: E402
from .jobs import CatchmentJob, CreditJob  # noqa: E402
from .noise import ErrorModel, rmse_from  # noqa: E402
from .runner import RunResult, run_ensemble  # noqa: E402

__all__ = ["Dem", "CairnError", "Pairs", "pairs", "CreditJob", "CatchmentJob", "ErrorModel",
           "rmse_from", "run_ensemble", "RunResult", "__version__"]
