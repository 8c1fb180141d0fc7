"""Checkpoints: a run's accumulators, pair log and parameters in one ``.npz``.

Saved atomically through :mod:`terrain.io` (no pickled objects), identified
by the run's parameters and the DEM's checksum, and sealed by a SHA-256
digest of the content, so a checkpoint from another run or a damaged file
is refused rather than silently continued.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np

from ..dem import Dem
from ..errors import CheckpointError
from ..io import load_npz, save_npz
from ..noise import ErrorModel
from ..version import __version__

__all__ = ["run_params", "save_checkpoint", "load_checkpoint"]

_IDENTITY = ("seed", "settings", "model")


def run_params(dem: Dem, job, model: ErrorModel, seed: int) -> dict:
    """The parameters that define a run's realisations (not their number)."""
    return {"version": __version__, "dem_checksum": dem.checksum(), "seed": int(seed),
            "settings": json.loads(json.dumps(job.describe(), default=str)),
            "model": model.as_dict()}


def _digest(st: dict) -> str:
    h = hashlib.sha256()
    for k in sorted(st):
        if k == "digest":
            continue
        h.update(k.encode())
        h.update(np.ascontiguousarray(st[k]).tobytes())
    return h.hexdigest()


def save_checkpoint(path: str | os.PathLike, acc, params: dict) -> None:
    """Save accumulators, pair log, parameters and a digest atomically (npz, no pickle)."""
    st = acc.state()
    st["params_json"] = np.array(json.dumps(params, sort_keys=True, default=str))
    st["digest"] = np.array(_digest(st))
    save_npz(path, **st)


def _check_identity(path: Path, st: dict, params: dict) -> None:
    try:
        saved = json.loads(str(st["params_json"]))
    except (KeyError, ValueError):
        raise CheckpointError(f"{path}: not a cairn checkpoint (no parameters)") from None
    if saved.get("dem_checksum") != params["dem_checksum"]:
        raise CheckpointError(f"{path}: checkpoint was made from another DEM (checksum differs); "
                              "use a new {checkpoint} file", "checkpoint")
    for k in _IDENTITY:
        if saved.get(k) != json.loads(json.dumps(params[k])):
            raise CheckpointError(f"{path}: checkpoint was made with different {k} "
                                  f"({saved.get(k)} vs {params[k]}); use a new {{checkpoint}} file",
                                  "checkpoint")


def load_checkpoint(path: str | os.PathLike, acc, params: dict) -> None:
    """Validate a checkpoint against this run and restore it into ``acc``.

    Raises
    ------
    CheckpointError
        Missing, damaged, from another run, or its digest does not match.
    """
    path = Path(path)
    try:
        st = load_npz(path)
    except FileNotFoundError:
        raise CheckpointError(f"{path}: no checkpoint to resume from") from None
    except (OSError, ValueError) as exc:
        raise CheckpointError(f"{path}: damaged checkpoint ({exc}); start afresh without "
                              "{resume}", "resume") from None
    _check_identity(path, st, params)
    digest = st.get("digest")
    if digest is None or str(digest) != _digest(st):
        raise CheckpointError(f"{path}: checkpoint content does not match its checksum (damaged)")
    acc.restore(st)
