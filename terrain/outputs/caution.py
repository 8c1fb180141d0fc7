"""The caution every output carries, written once.

The writer puts it in ``run.json`` and the GeoTIFF tags, the command line
prints it, and every figure prints it in its footer, so it travels with the
files that get shared.
"""

from __future__ import annotations

__all__ = ["CAUTION"]

CAUTION = ("Caution: cairn's layers are analysis aids, not engineering design or official flood "
           "mapping; do not use them alone to decide flood extents, drainage design or anything "
           "that can hurt someone; defer to local codes, official flood maps and licensed "
           "professionals.")
