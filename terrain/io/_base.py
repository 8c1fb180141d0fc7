"""Small pieces the io modules share: short error text, lock-file flags, ownership,
fsync of folders, free space and what a full disk looks like, and the names of the
output folder's own files (its lock, staging folders, atomic writes' temporary names).
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
from pathlib import Path


def short(exc: BaseException) -> str:
    return str(exc).strip().splitlines()[0][:160] if str(exc).strip() else type(exc).__name__


# -- one run per output folder -------------------------------------------------------
LOCK_NAME = ".cairn.lock"


STAGING_PREFIX = ".cairn-staging-"


PUBLISHING = ".publishing.json"  # inside a staging folder: its files are being moved into place


PART_NAME = re.compile(r"^\..+\.[a-z0-9_]{8}\.part(\.\w+)?$")  # atomic_path's temporary names


NOFOLLOW = getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)


def owned(st: os.stat_result) -> bool:
    """True when an entry (from ``lstat``) belongs to this user."""
    return not hasattr(os, "geteuid") or st.st_uid == os.geteuid()


def sync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):  # not every file system syncs folders
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


# -- checked writes ----------------------------------------------------------------------
DISK_FULL_ERRNO = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG}


DISK_FULL_TEXT = ("no space left", "disk is full", "disk full", "quota exceeded",
                   "file too large")




def _free_bytes(folder: Path) -> int | None:
    try:
        st = os.statvfs(folder)
    except (OSError, AttributeError):
        return None
    return st.f_bavail * st.f_frsize


def fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def disk_full(exc: BaseException) -> bool:
    """True for an OSError (or one it was raised from) saying the disk or quota is full."""
    while exc is not None:
        if isinstance(exc, OSError) and exc.errno in DISK_FULL_ERRNO:
            return True
        exc = exc.__cause__ or exc.__context__
    return False


def free_bytes(folder: str | os.PathLike) -> int | None:
    """Bytes free for this user in the file system holding ``folder`` (None if unknown)."""
    return _free_bytes(Path(folder))
