"""Plain questions about files and the machine: hashes, whether two paths are one
file, a script's source, the memory available, and the folder numba keeps
compiled kernels in.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from ._base import PART_NAME


def source_bytes(path: str | os.PathLike) -> bytes | None:
    """The bytes of a (script) file, or None when it cannot be read."""
    try:
        with open(path, "rb") as fh:
            return fh.read()
    except OSError:
        return None


def available_memory() -> int:
    """MemAvailable from /proc/meminfo (Linux), else physical pages x page size."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_AVPHYS_PAGES")


def kernel_cache_folder(version: str) -> str | None:
    """Point numba's on-disk cache of compiled kernels at a per-user folder.

    Numba's ``cache=True`` writes next to the source by default, which for an
    installed package is ``site-packages``: files that ``pip uninstall`` does
    not know and that leave an empty ``terrain`` folder behind (found as a
    namespace package ahead of a later editable install). cairn's kernels go to
    the platform's user cache folder instead, ``<cache>/cairn/numba/<version>``
    (``platformdirs``), or, when that cannot be written, to
    ``<tmp>/cairn-numba-<uid>/<version>``. Numba keys each entry by the source
    file's path and a hash of its contents, so versions, checkouts and several
    processes can share the folder. A cache folder the user chose
    (``NUMBA_CACHE_DIR``, or ``numba.config.CACHE_DIR`` set before importing
    cairn) is left alone.

    Returns the folder in use, or None when no folder could be written (numba
    then compiles without keeping the result where it cannot write).
    """
    from numba.core import config

    if config.CACHE_DIR:
        return config.CACHE_DIR
    import platformdirs

    uid = os.getuid() if hasattr(os, "getuid") else "user"
    for base in (Path(platformdirs.user_cache_dir("cairn", appauthor=False)) / "numba",
                 Path(tempfile.gettempdir()) / f"cairn-numba-{uid}"):
        folder = base / version
        try:
            os.makedirs(folder, exist_ok=True)
            tempfile.TemporaryFile(dir=folder).close()
        except OSError:
            continue
        config.CACHE_DIR = str(folder)
        return config.CACHE_DIR
    return None


def file_sha256(path: str | os.PathLike) -> str | None:
    """SHA-256 of a file's bytes (provenance); None for a GDAL virtual path
    (``/vsis3/...``, ``/vsicurl/...``: read through GDAL only, not hashed here)."""
    import hashlib

    if str(path).startswith("/vsi"):
        return None

    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True when two paths name one file (the same path, or links to one file)."""
    if os.path.realpath(a) == os.path.realpath(b):
        return True
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def resolves_into(path: str | os.PathLike, folder: str | os.PathLike) -> bool:
    """True when ``path``, links resolved, is ``folder`` or lies inside it."""
    real, top = os.path.realpath(path), os.path.realpath(folder)
    return real == top or real.startswith(top.rstrip(os.sep) + os.sep)


def file_exists(path: str | os.PathLike) -> bool:
    """True when ``path`` is an existing file."""
    return Path(path).is_file()


def remove_file(path: str | os.PathLike) -> None:
    """Remove one file (callers decide it is theirs to remove)."""
    os.unlink(path)


def replaced_beside_checkpoint(path: str | os.PathLike, checkpoint: str | os.PathLike) -> str | None:
    """What keeping ``checkpoint`` would do to ``path`` (links resolved): the name of
    the checkpoint's lock file (:func:`~terrain.io.publication.hold_checkpoint`) or of
    a temporary file of its writes that
    :func:`~terrain.io.publication.check_file_folder` removes -- None when it stays."""
    c = Path(checkpoint)
    real, folder = Path(os.path.realpath(path)), Path(os.path.realpath(c.parent))
    if real.parent != folder:
        return None
    if real.name == f".{c.name}.lock":
        return real.name
    if real.name.startswith(f".{c.name}.") and PART_NAME.match(real.name):
        return real.name
    return None
