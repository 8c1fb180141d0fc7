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
from ..io import check_file_folder, file_exists, load_npz, save_npz
from ..noise import ErrorModel
from ..version import __version__

__all__ = ["run_params", "save_checkpoint", "load_checkpoint", "is_checkpoint",
           "prepare_checkpoint"]

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
        saved = None
    if not isinstance(saved, dict):
        raise CheckpointError(f"{path}: not a cairn checkpoint (no parameters)")
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
        Missing, damaged (of any kind: empty, truncated, bit-flipped, not an
        npz archive, pickled objects), from another run, or its digest does
        not match.
    """
    path = Path(path)
    st = _load(path)
    _check_identity(path, st, params)
    digest = st.get("digest")
    if digest is None or str(digest) != _digest(st):
        raise _damaged(path, "its content does not match its checksum")
    try:
        acc.restore(st)
    except CheckpointError:
        raise
    except (KeyError, ValueError, TypeError, IndexError) as exc:
        raise _damaged(path, f"missing or malformed arrays ({type(exc).__name__})") from None


def _load(path: Path, keys=None) -> dict:
    try:
        return load_npz(path, keys)
    except FileNotFoundError:
        raise CheckpointError(f"{path}: no checkpoint to resume from") from None
    except ValueError as exc:
        raise _damaged(path, str(exc)) from None
    except OSError as exc:
        raise CheckpointError(f"{path}: cannot read the checkpoint ({exc.strerror})") from None


def _damaged(path: Path, why: str) -> CheckpointError:
    return CheckpointError(f"{path}: damaged checkpoint ({why}); start afresh without {{resume}} "
                           "or choose another {checkpoint} file", "resume", "checkpoint")


def is_checkpoint(path: str | os.PathLike) -> bool:
    """True when ``path`` loads as a cairn checkpoint (its parameters and
    digest members; the arrays are not read)."""
    try:
        st = load_npz(path, ("params_json", "digest"))
        return "dem_checksum" in json.loads(str(st["params_json"]))
    except (OSError, ValueError, TypeError):
        return False


def prepare_checkpoint(path: str | os.PathLike, *, resume: bool) -> None:
    """Before any realisation: the checkpoint can be written, and a file already
    at ``path`` is one cairn may replace.

    Raises
    ------
    OutputError
        The folder is missing or not writable.
    CheckpointError
        Without ``resume``, ``path`` holds a file that is not a cairn
        checkpoint (cairn only ever replaces its own checkpoints).
    """
    check_file_folder(path)
    if not resume and file_exists(path) and not is_checkpoint(path):
        raise CheckpointError(f"{path}: exists and is not a cairn checkpoint; cairn only replaces "
                              "its own checkpoints -- choose another {checkpoint} file",
                              "checkpoint")
