"""Outlet points: ids, the ids used in file names, and the attributes that travel with them.

Pure data; reading a file is :func:`terrain.io.read_outlets`.

Id rules
--------
- An outlet's id is the ``id`` column's text (whole numbers stored as
  floats, e.g. ``3.0``, read as ``3``); an outlet without one (no ``id``
  column, an empty or blank cell, a null) takes its 1-based row number in
  the file.
- Ids must be unique after that.
- In file and layer names (:func:`layer_ids`) characters other than letters,
  digits, ``-`` and ``_`` become ``_``; an id that is then longer than 40
  characters, or that collides with another outlet's, is cut to its first
  32 characters and suffixed with ``-`` and 8 hex digits of the SHA-1 of
  the full id. Tables always carry the full id (``outlet_id``) beside the
  file-name id (``layer_id``).
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field

import numpy as np

from .errors import OutletError

__all__ = ["Outlets", "outlet_ids", "layer_ids", "short", "MAX_NAME"]

MAX_NAME = 40  # characters of an outlet id in a file name


@dataclass(frozen=True, eq=False)
class Outlets:
    """Outlet points read from a file.

    Attributes
    ----------
    ids : tuple of str
        Full ids (see the module docstring for the rules).
    xy : (k, 2) float64 array
        Coordinates in the DEM's CRS.
    attributes : pandas.DataFrame
        Every other column of the file (not the geometry, nor a CSV's x and
        y), one row per outlet, in file order.
    source : str
        The file (for messages).
    numbered : tuple of int
        1-based rows whose id was missing and became the row number.
    given_xy : (k, 2) float64 array, optional
        The coordinates as the file gives them, in ``given_crs``.
    given_crs : str, optional
        The file's CRS (``EPSG:4326``, or its name), or the DEM's when assumed.
    crs_source : str
        Where the points' CRS came from: ``file``, ``option``, ``sidecar
        <name>``, or ``assumed`` (a CSV with neither: the DEM's CRS).
    """

    ids: tuple
    xy: np.ndarray
    attributes: object = None
    source: str = "outlets"
    numbered: tuple = field(default=())
    given_xy: np.ndarray | None = None
    given_crs: str | None = None
    crs_source: str = "file"


def _text(v) -> str | None:
    """An id cell as text, or None when it is empty or null."""
    if v is None:
        return None
    if isinstance(v, float):
        if math.isnan(v):
            return None
        if v.is_integer():
            return str(int(v))
    if isinstance(v, (np.floating,)):
        return _text(float(v))
    text = str(v).strip()
    return text if text and text.lower() not in ("nan", "none", "<na>", "nat") else None


def outlet_ids(values, n: int, source: str) -> tuple[tuple[str, ...], tuple[int, ...]]:
    """Full ids from an id column (``None`` when the file has none).

    Returns the ids and the 1-based rows that were numbered.

    Raises
    ------
    OutletError
        Two outlets share an id (the message names it and the file).
    """
    raw = [None] * n if values is None else [_text(v) for v in values]
    numbered = tuple(i + 1 for i, v in enumerate(raw) if v is None)
    ids = tuple(v if v is not None else str(i + 1) for i, v in enumerate(raw))
    seen: set[str] = set()
    for i in ids:
        if i in seen:
            extra = " (outlets without an id take their row number)" if numbered else ""
            raise OutletError(f"{source}: outlet id {short(i)!r} is used more than once{extra}; "
                              "give every outlet its own id")
        seen.add(i)
    return ids, numbered


def _safe(i: str) -> str:
    return "".join(ch if (ch.isascii() and ch.isalnum()) or ch in "-_" else "_" for ch in i) or "_"


def _hashed(i: str) -> str:
    return _safe(i)[:32] + "-" + hashlib.sha1(i.encode("utf-8")).hexdigest()[:8]


def layer_ids(ids) -> tuple[str, ...]:
    """The ids used in file and layer names: safe characters, at most 40 long,
    unique (see the module docstring); deterministic."""
    safe = [_safe(i) for i in ids]
    count: dict[str, int] = {}
    for s in safe:
        count[s] = count.get(s, 0) + 1
    out = tuple(_hashed(i) if len(s) > MAX_NAME or count[s] > 1 else s
                for i, s in zip(ids, safe))
    if len(set(out)) < len(out):  # only when an id spells another's hashed name
        raise OutletError("outlet ids give the same file name twice; rename one of them")
    return out


def short(i: str, n: int = 40) -> str:
    """An id cut for a one-line message."""
    return i if len(i) <= n else i[: n - 1] + "…"
