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
    """Memory a new run may use: MemAvailable from /proc/meminfo (Linux), else
    physical pages x page size, and no more than the room left under the memory
    limit of this process's control group (a container's or a batch job's
    limit, which MemAvailable does not show): ``memory.max`` less
    ``memory.current`` (cgroup v2) or ``memory.limit_in_bytes`` less
    ``memory.usage_in_bytes`` (cgroup v1), the tightest along the group's
    ancestors visible here; file pages the kernel can drop (``inactive_file``
    in ``memory.stat``) count as room, as they do in MemAvailable.

    References
    ----------
    .. [1] The Linux kernel documentation (2024), "Control Group v2" (memory
       interface files) and "Memory Resource Controller" (cgroup v1).
    """
    have = None
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    have = int(line.split()[1]) * 1024
                    break
    except OSError:
        pass
    if have is None:
        have = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_AVPHYS_PAGES")
    room = cgroup_memory_room()
    return have if room is None else min(have, room)


def resident_memory(*, children: bool = False) -> int:
    """This process's anonymous resident memory in bytes (``RssAnon`` of
    ``/proc/self/status``; 0 where unknown): what it holds that MemAvailable no
    longer shows (its file-backed pages still count as available there). With
    ``children``, its child processes' too (worker processes started ahead of
    a run, from ``/proc/self/task/*/children``)."""
    total = _rss_anon("/proc/self/status")
    if children:
        import glob

        for listing in glob.glob("/proc/self/task/*/children"):
            try:
                with open(listing) as fh:
                    pids = fh.read().split()
            except OSError:
                continue
            total += sum(_rss_anon(f"/proc/{pid}/status") for pid in pids)
    return total


def _rss_anon(status: str) -> int:
    """``RssAnon`` of one ``/proc/PID/status`` file in bytes (0 where unknown)."""
    try:
        with open(status) as fh:
            for line in fh:
                if line.startswith("RssAnon:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


CGROUP_ROOT = "/sys/fs/cgroup"


def cgroup_memory_room(proc: str = "/proc/self/cgroup", root: str = CGROUP_ROOT) -> int | None:
    """Bytes left under the memory limits of this process's control group and its
    ancestors (the smallest), or None where no limit is set or none can be read."""
    try:
        with open(proc) as fh:
            entries = [line.rstrip("\n").split(":", 2) for line in fh]
    except OSError:
        return None
    rooms = []
    for _, controllers, path in (e for e in entries if len(e) == 3):
        if controllers == "":  # cgroup v2: one unified hierarchy
            base, files = (os.path.join(root, "unified") if os.path.isdir(
                os.path.join(root, "unified")) else root), ("memory.max", "memory.current")
            cache = "inactive_file"
        elif "memory" in controllers.split(","):
            base, files = os.path.join(root, "memory"), ("memory.limit_in_bytes",
                                                         "memory.usage_in_bytes")
            cache = "total_inactive_file"
        else:
            continue
        parts = [p for p in path.split("/") if p]
        for k in range(len(parts), -1, -1):  # the group, then its ancestors
            folder = os.path.join(base, *parts[:k])
            limit, used = (_read_int(os.path.join(folder, f)) for f in files)
            if limit is not None and used is not None and limit < 2**60:
                used -= min(_stat(os.path.join(folder, "memory.stat"), cache), used)
                rooms.append(max(limit - used, 0))
    return min(rooms) if rooms else None


def _stat(path: str, key: str) -> int:
    """One figure of a ``memory.stat`` file (0 when missing)."""
    try:
        with open(path) as fh:
            for line in fh:
                name, _, value = line.partition(" ")
                if name == key:
                    return int(value)
    except (OSError, ValueError):
        pass
    return 0


def _read_int(path: str) -> int | None:
    """An integer control file's value (None for "max", unreadable or missing)."""
    try:
        with open(path) as fh:
            text = fh.read().strip()
        return int(text)
    except (OSError, ValueError):
        return None


_TRIM = []  # glibc's malloc_trim, looked up once ([None] where there is none)


def release_freed_memory() -> None:
    """Hand the heap memory this process has freed back to the operating system.

    glibc keeps freed blocks below its (adaptive, up to 32 MiB) mmap threshold
    in its heaps for reuse, so a process that works through a raster window by
    window keeps the resident size of its largest phases even after their
    arrays are gone: 200-250 MiB of a 4096² out-of-core run's peak, measured.
    Called between phases and windows, never inside a realisation (reusing the
    heap there saves page faults). A no-op where the C library has no
    ``malloc_trim`` (macOS, Windows, musl).

    References
    ----------
    .. [1] The GNU C Library manual (2024), "Memory Allocation Tunables" and
       ``malloc_trim(3)``.
    """
    if not _TRIM:
        try:
            import ctypes

            # the C library already loaded into this process: ctypes.util.find_library
            # would run `ldconfig -p` in a child process, one the size of this one
            # until it execs
            _TRIM.append(ctypes.CDLL(None).malloc_trim)
        except (OSError, AttributeError, TypeError):  # TypeError: Windows wants a name
            _TRIM.append(None)
    if _TRIM[0] is not None:
        _TRIM[0](0)


def keep_freed_memory() -> None:
    """From here on :func:`release_freed_memory` does nothing: for a forked copy
    that exits when its step is done (:func:`terrain.outputs.beside.in_a_copy`),
    handing memory back is work for nothing (0.05 s of a 1024² map, measured)."""
    _TRIM[:] = [None]


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
