"""cairn: stable peak and basin attribution on elevation rasters.

The library behind the ``cairn`` command. Compute functions take arrays and
return arrays; :mod:`terrain.io` is the only module that opens paths.
"""

from .dem import Dem
from .engine.persistence import Pairs, pairs
from .errors import CairnError

__version__ = "0.1.0"

__all__ = ["Dem", "CairnError", "Pairs", "pairs", "__version__"]
