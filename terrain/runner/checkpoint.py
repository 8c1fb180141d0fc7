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
from ..io import check_count_store_path, check_file_folder, file_exists, load_npz, save_npz
from ..noise import ErrorModel
from ..version import __version__

__all__ = ["run_params", "save_checkpoint", "load_checkpoint", "is_checkpoint",
           "prepare_checkpoint", "check_resume", "run_identity", "counts_path"]

_IDENTITY = ("seed", "model", "settings")


def run_params(dem: Dem, job, model: ErrorModel, seed: int) -> dict:
    """The parameters that define a run's realisations (not their number)."""
    return {"version": __version__, "dem_checksum": dem.checksum(), "seed": int(seed),
            "settings": json.loads(json.dumps(job.describe(), default=str)),
            "model": model.as_dict()}


def run_identity(params: dict) -> str:
    """A digest of what defines a run's realisations (DEM, seed, settings, model;
    not cairn's version): the identity an on-disk count store carries."""
    key = {k: params.get(k) for k in ("dem_checksum",) + _IDENTITY}
    return hashlib.sha256(json.dumps(key, sort_keys=True, default=str).encode()).hexdigest()[:32]


def counts_path(checkpoint: str | os.PathLike) -> str:
    """Where a checkpoint's per-cell counts live (out-of-core runs): ``<checkpoint>.counts``."""
    return f"{checkpoint}.counts"


def _digest(st: dict) -> str:
    h = hashlib.sha256()
    for k in sorted(st):
        if k == "digest":
            continue
        h.update(k.encode())
        h.update(np.ascontiguousarray(st[k]).tobytes())
    return h.hexdigest()


def save_checkpoint(path: str | os.PathLike, acc, params: dict, layout: dict | None = None) -> None:
    """Save accumulators, pair log, parameters and a digest atomically (npz, no pickle).

    ``layout`` says where the run keeps its per-cell counts (``counts_on_disk``,
    ``block``), so a resume in the other mode is refused by name."""
    st = acc.state()
    st["params_json"] = np.array(json.dumps(params, sort_keys=True, default=str))
    if layout is not None:
        st["layout_json"] = np.array(json.dumps(layout, sort_keys=True))
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
        now = json.loads(json.dumps(params[k], default=str))
        if saved.get(k) != now:
            raise CheckpointError(f"{path}: checkpoint was made with another {_WHAT[k]} "
                                  f"({_differences(saved.get(k), now)}); use a new "
                                  "{checkpoint} file, or resume with the same options",
                                  "checkpoint")


_WHAT = {"seed": "seed", "settings": "job setting", "model": "error model"}


def _differences(saved, now, limit: int = 3) -> str:
    """The values that differ, as ``name 1, now 2``, at most ``limit`` of them."""
    if not (isinstance(saved, dict) and isinstance(now, dict)):
        return f"{saved}, now {now}"
    keys = [k for k in sorted(set(saved) | set(now)) if saved.get(k) != now.get(k)]
    text = "; ".join(f"{k} {saved.get(k)}, now {now.get(k)}" for k in keys[:limit])
    return text + (f" and {len(keys) - limit} more" if len(keys) > limit else "")


def check_resume(path: str | os.PathLike, params: dict, *, realisations: int,
                 counts_on_disk: bool, block: int | None) -> None:
    """Before anything is computed or opened for a resume: the checkpoint belongs
    to this run (DEM, seed, settings, model), holds no more realisations than
    asked for, and keeps its per-cell counts where this run keeps them.

    Raises
    ------
    CheckpointError
        Naming the checkpoint and the option to change.
    """
    path = Path(path)
    st = _load(path, ("params_json", "n"))
    _check_identity(path, st, params)
    n = int(st["n"])
    if n > realisations:
        raise CheckpointError(f"{path}: the checkpoint holds {n} realisations, more than the "
                              f"{realisations} asked for; resume with {{realisations}} {n} or "
                              "more (a run never drops realisations)", "realisations")
    try:
        layout = json.loads(str(load_npz(path, ("layout_json",))["layout_json"]))
    except (OSError, ValueError, TypeError):
        layout = None
    if layout is None or bool(layout.get("counts_on_disk")) == counts_on_disk:
        return
    if counts_on_disk:
        raise CheckpointError(f"{path}: the checkpoint was made by a whole-grid run (its per-cell "
                              "counts are inside it); resume it without {block} (with {force} "
                              "if the memory guard chose blocks)", "block", "force")
    raise CheckpointError(f"{path}: the checkpoint was made by a blocked run ({{block}} "
                          f"{layout.get('block')}; its per-cell counts are in "
                          f"{counts_path(path)}); resume it with {{block}}", "block")


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
        checkpoint (cairn only ever replaces its own checkpoints); or
        ``<path>.counts`` holds something that is not a cairn count store (a
        link, a file, a folder of other files).
    """
    check_file_folder(path)
    check_count_store_path(counts_path(path))
    if not resume and file_exists(path) and not is_checkpoint(path):
        raise CheckpointError(f"{path}: exists and is not a cairn checkpoint; cairn only replaces "
                              "its own checkpoints -- choose another {checkpoint} file",
                              "checkpoint")
