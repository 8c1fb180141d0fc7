"""Checked atomic writes: a temporary name beside the destination, the libraries'
logged and printed errors raised, the file read back, fsynced and renamed into place;
a full disk is one :class:`~terrain.errors.OutputError`.
"""

from __future__ import annotations

import contextlib
import glob
import json
import os
import re
import stat
import tempfile
import warnings
from pathlib import Path

from ..errors import (
    OutputError,
)
from ._base import (
    DISK_FULL_ERRNO,
    DISK_FULL_TEXT,
    NOFOLLOW,
    STAGING_PREFIX,
    free_bytes,
    fsync_file,
    short,
    sync_dir,
)

_IO_LIBRARIES = ("rasterio", "pyogrio", "fiona", "sqlite3", "zipfile", "PIL")
_IO_FAILURE = re.compile(r"no space|disk|quota|too large|write|writing|i/?o error|seek|flush|"
                         r"truncat|cannot open|read error", re.IGNORECASE)


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike, *, bands: int | None = None):
    """Yield a temporary path beside ``dest``; check it and rename it onto ``dest``.

    After the block the file is checked before it takes ``dest``'s name:
    errors GDAL reported while writing and text C libraries printed on the
    process's error stream are raised; the file must exist, be non-empty and
    read back (GeoTIFF: every block of every band, and ``bands`` bands when
    given; GeoPackage: its layers; PNG: complete; JSON: parses; npz: every
    member passes its CRC). Then it is fsynced and renamed, and the folder
    fsynced. On any error or interrupt the temporary file is removed and
    ``dest`` is untouched.

    Raises
    ------
    OutputError
        One line naming the file: disk full (no space, quota, file size
        limit), or the write failed or does not read back.
    """
    dest = Path(dest)
    tmp = None
    try:
        prefix, suffix = _temporary(dest)
        fd, name = tempfile.mkstemp(prefix=prefix, suffix=suffix, dir=dest.parent)
        os.close(fd)
        os.unlink(name)
        tmp = Path(name)
        failed = None
        with _NativeErrors() as seen:
            try:
                yield tmp
            except Exception as exc:
                failed = exc
        if failed is not None:
            raise write_error(dest, failed, seen.text()) from None
        problem = seen.failure() or _verify(tmp, bands)
        if problem:
            raise write_error(dest, problem, seen.text())
        seen.replay()
        fsync_file(tmp)
        replace_into(tmp, dest)
        sync_dir(dest.parent)
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise write_error(dest, exc) from None
    finally:
        if tmp is not None:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)


def _temporary(dest: Path) -> tuple[str, str]:
    """The prefix and suffix of :func:`atomic_path`'s temporary names for ``dest``."""
    return f".{dest.name}.", ".part" + dest.suffix


def discard_partial(dest: str | os.PathLike) -> None:
    """Remove the temporary files an :func:`atomic_path` for ``dest`` left
    beside it when its process was killed mid-write."""
    dest = Path(dest)
    prefix, suffix = _temporary(dest)
    for part in dest.parent.glob(f"{glob.escape(prefix)}*{glob.escape(suffix)}"):
        with contextlib.suppress(FileNotFoundError):
            os.unlink(part)


def write_error(dest: Path, problem, native: str = "") -> BaseException:
    """The one-line error for a failed write; ``problem`` is an exception or text.

    Exceptions that are not I/O (a bug) come back unchanged."""
    if isinstance(problem, OutputError):
        return problem
    if isinstance(problem, BaseException):
        lib = type(problem).__module__.split(".")[0]
        if not isinstance(problem, (OSError, MemoryError)) and lib not in _IO_LIBRARIES:
            return problem
        if isinstance(problem, MemoryError):
            return problem
        why = problem.strerror if isinstance(problem, OSError) and problem.strerror \
            else short(problem)
        full = getattr(problem, "errno", None) in DISK_FULL_ERRNO
        text = f"{problem} {native}".lower()
    else:
        why, full, text = str(problem), False, f"{problem} {native}".lower()
    folder = dest if dest.is_dir() else dest.parent
    free = free_bytes(folder)
    # a library may report a full disk as something else (sqlite: "no such table")
    full = full or any(t in text for t in DISK_FULL_TEXT) or (free is not None and free < 2**20)
    if folder.name.startswith(STAGING_PREFIX):  # name what the user chose, not our staging
        folder = folder.parent
        dest = folder / dest.name
    if full:
        if not any(t in why.lower() for t in DISK_FULL_TEXT) and free is not None:
            why = f"{free // 1024} kB left"  # rather than the library's own words
        checkpoint = dest.suffix.lower() == ".npz"  # only checkpoints are npz archives
        return OutputError(f"{folder}: disk full while writing {dest.name} ({why}); free some "
                           "space or choose another " + ("{checkpoint} file" if checkpoint else
                                                         "output folder"),
                           *(("checkpoint",) if checkpoint else ()))
    return OutputError(f"{dest}: could not be written ({why})")


class _NativeErrors:
    """Collects, while a file is written, the errors GDAL reports through
    rasterio's log and the text C libraries print on file descriptor 2
    (libtiff reports a full disk there, past Python). :meth:`replay` passes
    the text on when the write succeeded."""

    def __enter__(self):
        import logging
        import sys

        self.records: list[str] = []
        records = self.records

        class Handler(logging.Handler):
            def emit(self, record):
                msg = record.getMessage()
                # GDAL reports some harmless failures too (statistics of an all-nodata
                # band); only input/output errors mean the file is not what was written
                if "signalled an error" in msg and _IO_FAILURE.search(msg):
                    records.append(msg)

        self.logger = logging.getLogger("rasterio._env")
        self.handler = Handler(logging.INFO)
        self.level = self.logger.level
        self.logger.addHandler(self.handler)
        if not self.logger.isEnabledFor(logging.INFO):
            self.logger.setLevel(logging.INFO)
        self.captured = b""
        self.saved = self.sink = None
        with contextlib.suppress(OSError, AttributeError, ValueError):
            sys.stderr.flush()
            self.sink = os.memfd_create("cairn-stderr")  # in memory: works on a full disk
            self.saved = os.dup(2)
            os.dup2(self.sink, 2)
        return self

    def __exit__(self, *exc):
        import sys

        with contextlib.suppress(OSError, ValueError, AttributeError):
            sys.stderr.flush()
        if self.saved is not None:
            os.dup2(self.saved, 2)
            os.close(self.saved)
            with contextlib.suppress(OSError):
                os.lseek(self.sink, 0, os.SEEK_SET)
                self.captured = os.read(self.sink, 1 << 16)
        if self.sink is not None:
            os.close(self.sink)
        self.logger.removeHandler(self.handler)
        self.logger.setLevel(self.level)
        return False

    def replay(self) -> None:
        """Pass captured text on to file descriptor 2 (not ours to swallow)."""
        if self.captured:
            with contextlib.suppress(OSError):
                os.write(2, self.captured)

    def text(self) -> str:
        return self.captured.decode(errors="replace").strip()

    def failure(self) -> str | None:
        """The first error reported while writing, or None."""
        if self.records:
            msg = self.records[0]
            return msg.split("msg=", 1)[-1].strip("'\"") if "msg=" in msg else msg
        text = self.text()
        if any(t in text.lower() for t in DISK_FULL_TEXT):
            return text.splitlines()[0]
        return None


def _verify(tmp: Path, bands: int | None) -> str | None:
    """None when the written file reads back, else what is wrong with it."""
    try:
        size = tmp.stat().st_size
    except FileNotFoundError:
        return "nothing was written"
    if size == 0:
        return "the file is empty"
    check = _CHECKS.get(tmp.suffix.lower())
    try:
        return check(tmp, bands) if check is not None else None
    except MemoryError:
        raise
    except Exception as exc:  # each reader raises its own classes for a bad file
        return f"the written file does not read back: {short(exc)}"


def _check_raster(tmp: Path, bands: int | None) -> str | None:
    import rasterio

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with rasterio.open(tmp) as ds:
            if bands is not None and ds.count != bands:
                return f"the written file has {ds.count} bands, not {bands}"
            for b in range(1, ds.count + 1):
                for _, window in ds.block_windows(b):
                    ds.read(b, window=window)
    return None


def _check_gpkg(tmp: Path, bands) -> str | None:
    """Every layer reads back, and SQLite finds the database whole
    (``PRAGMA integrity_check``, SQLite's own check of every page and index)."""
    import sqlite3

    import pyogrio

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for layer, _ in pyogrio.list_layers(tmp):
            pyogrio.read_info(tmp, layer=layer)
    con = sqlite3.connect(tmp)
    try:
        rows = con.execute("PRAGMA integrity_check").fetchall()
    finally:
        con.close()
    if rows != [("ok",)]:
        return "SQLite's integrity check fails: " + "; ".join(str(r[0]) for r in rows[:3])
    return None


def _check_png(tmp: Path, bands) -> str | None:
    with open(tmp, "rb") as fh:
        head = fh.read(8)
        fh.seek(-12, os.SEEK_END)
        tail = fh.read(12)
    return None if head == b"\x89PNG\r\n\x1a\n" and tail[4:8] == b"IEND" else "incomplete PNG"


def _check_json(tmp: Path, bands) -> str | None:
    json.loads(tmp.read_text())
    return None


def _check_npz(tmp: Path, bands) -> str | None:
    import zipfile

    with zipfile.ZipFile(tmp) as zf:
        bad = zf.testzip()
    return f"member {bad} fails its CRC check" if bad else None


_CHECKS = {".tif": _check_raster, ".tiff": _check_raster, ".gpkg": _check_gpkg,
           ".png": _check_png, ".json": _check_json, ".npz": _check_npz}


def replace_into(src: Path, dest: Path) -> None:
    """Rename ``src`` onto ``dest``; a GeoPackage is replaced whole, without the
    write-ahead log or journal the file it replaces left beside it."""
    if dest.suffix.lower() == ".gpkg":
        release_sqlite(dest)
    os.replace(src, dest)


# SQLite's files beside a database, and the bytes its connections lock (os_unix.c: the
# -shm "dead man switch" byte every connection of a WAL database holds a shared lock on,
# and the main file's pending/shared range a rollback-journal writer holds)
_SQLITE_SIDECARS = ("-wal", "-shm", "-journal")


_SHM_DMS_BYTE = 128


_PENDING_BYTE, _LOCK_SPAN = 0x40000000, 512


def release_sqlite(db: Path) -> None:
    """Remove the stale ``-wal``, ``-shm`` and ``-journal`` files of the SQLite
    database (GeoPackage) ``db`` before it is replaced; refuse while another
    process has the database open (SQLite would write its log into the new file).

    Raises
    ------
    OutputError
        Another program holds the database.
    """
    sidecars = [Path(f"{db}{s}") for s in _SQLITE_SIDECARS if os.path.lexists(f"{db}{s}")]
    if not sidecars:
        return
    if _sqlite_held(db):
        raise OutputError(f"{db}: is open in another program (its SQLite log "
                          f"{Path(str(sidecars[0])).name} is in use); close it there and run "
                          "again, or choose another output folder")
    for p in sidecars:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(p)


def _sqlite_held(db: Path) -> bool:
    """True when another process holds a lock SQLite takes on ``db``: the shared
    lock of an open WAL connection on its ``-shm`` file, or a writer's lock on
    the main file (POSIX advisory locks, as SQLite's unix VFS takes them)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return False
    for path, start, span in ((Path(f"{db}-shm"), _SHM_DMS_BYTE, 1), (db, _PENDING_BYTE, _LOCK_SPAN)):
        try:
            if not stat.S_ISREG(os.lstat(path).st_mode):
                continue
            fd = os.open(path, os.O_RDWR | NOFOLLOW)
        except OSError:
            continue
        try:
            fcntl.lockf(fd, fcntl.LOCK_EX | fcntl.LOCK_NB, span, start)
        except (BlockingIOError, PermissionError):
            return True
        except OSError:  # a file system without locks: nothing to learn here
            continue
        finally:
            os.close(fd)  # closing drops the probe's lock
    return False
