"""The output folder: one run per folder (``flock`` on its lock), outputs written into
a staging folder and moved into place with signals held, the tidy-up of what a killed
run left, and what a run would replace.
"""

from __future__ import annotations

import contextlib
import errno
import glob
import json
import os
import re
import shutil
import stat
import tempfile
from pathlib import Path

from ..errors import (
    CheckpointError,
    OutputError,
)
from ..processes import held_signals
from ._base import (
    LOCK_NAME,
    NOFOLLOW,
    PART_NAME,
    PUBLISHING,
    STAGING_PREFIX,
    owned,
    short,
    sync_dir,
)
from .checked import release_sqlite, replace_into, write_error
from .files import resolves_into


# ----------------------------------------------------------------------------
# outputs
# ----------------------------------------------------------------------------
def prepare_outdir(outdir: str | os.PathLike, names: list[str], *, overwrite: bool) -> Path:
    """Check (and create) an output folder before any work starts.

    Raises :class:`OutputError` when the path is an existing file, cannot be
    created or written, or when one of ``names`` exists and ``overwrite`` is
    False (the message lists them and names the ``overwrite`` parameter).
    :func:`claim_outdir` does the same and also locks the folder.
    """
    out = Path(outdir)
    _make_outdir(out)
    _refuse_clash(out, names, overwrite)
    return out


def _make_outdir(out: Path) -> bool:
    """Create ``out`` if missing (True when this call created it); refuse files
    and folders that cannot be written."""
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is a file, not a folder; choose another output folder")
    existed = out.is_dir()
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder ({exc.strerror})") from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise OutputError(f"{out}: output folder is not writable; choose another output folder")
    return not existed


def _refuse_clash(out: Path, names: list[str], overwrite: bool) -> None:
    _refuse_folders(out, names)
    clash = [n for n in names if (out / n).exists()]
    if clash and not overwrite:
        more = f" and {len(clash) - 3} more" if len(clash) > 3 else ""
        raise OutputError(f"{out}: would overwrite {', '.join(clash[:3])}{more}; "
                          "pass {overwrite} to replace them", "overwrite")


def _refuse_folders(out: Path, names) -> None:
    """Refuse a folder (not a link) at a name the run publishes a file under: a rename
    onto it fails, which would leave the set half published."""
    for n in names:
        if os.path.isdir(out / n) and not os.path.islink(out / n):
            raise OutputError(f"{out / n}: is a folder where the run writes a file; move it or "
                              "choose another output folder")


#: what a file cairn publishes may be called: a plain name (no folder, no leading dot) with
#: one of the extensions cairn writes; a publication marker naming anything else is not cairn's
OUTPUT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,200}\.(?:tif|gpkg|csv|png|json)\Z")


_HELD: dict[str, list] = {}  # lock file (real path) -> [lock fd, depth] held by this process


@contextlib.contextmanager
def claim_outdir(outdir: str | os.PathLike, names: list[str], *, overwrite: bool):
    """Hold an output folder for one run: create and check it, lock it, tidy it.

    While the block runs no other cairn run can write into the folder (a lock
    file, released when the block ends or the process dies, even by kill -9).
    Leftovers of a killed run are cleaned first: temporary files are removed,
    and a set of outputs whose publication was cut short is completed. Then
    ``names`` are checked as :func:`prepare_outdir` does. A folder this call
    created is removed again if the run leaves it empty.

    Raises
    ------
    OutputError
        The folder cannot be used, is held by another run, holds a lock
        entry that is not cairn's (a link, a folder, a file with other
        names), or would be overwritten without ``overwrite``.
    """
    out = Path(outdir)
    created = _make_outdir(out)
    try:
        with hold_outdir(out):
            clean_leftovers(out)
            _refuse_clash(out, names, overwrite)
            yield out
    finally:
        if created:
            with contextlib.suppress(OSError):
                out.rmdir()  # only when empty


def hold_outdir(outdir: str | os.PathLike):
    """Lock ``outdir`` for this process (re-entrant); another process holding
    it makes this raise :class:`OutputError` at once."""
    out = Path(outdir)
    return _hold(out / LOCK_NAME, f"{out}: another cairn run is writing to this folder{{who}}; "
                                  "wait for it to finish or choose another output folder")


def hold_checkpoint(checkpoint: str | os.PathLike):
    """Lock a checkpoint for this process (re-entrant) with a lock file beside it
    (``.<name>.lock``); another run using it makes this raise at once.

    Raises
    ------
    CheckpointError
        Another cairn run (in any process) holds the checkpoint.
    OutputError
        The lock file cannot be made, or its name holds something that is
        not cairn's lock file.
    """
    p = Path(checkpoint)
    return _hold(p.parent / f".{p.name}.lock",
                 f"{p}: another cairn run is using this checkpoint{{who}}; wait for it to finish "
                 "or choose another {checkpoint} file", busy_error=CheckpointError,
                 params=("checkpoint",))


@contextlib.contextmanager
def _hold(path: Path, busy: str, *, busy_error=OutputError, params=()):
    """An exclusive lock on the lock file ``path`` for this process, re-entrant;
    ``busy`` (``{who}`` is filled with the holder's process number) is the
    error when another process holds it."""
    key = os.path.join(os.path.realpath(path.parent), path.name)
    held = _HELD.get(key)
    if held is not None:
        held[1] += 1
        try:
            yield path.parent
        finally:
            held[1] -= 1
        return
    fd = _lock(path, busy, busy_error, params)
    _HELD[key] = [fd, 1]
    try:
        yield path.parent
    finally:
        del _HELD[key]
        if fd is not None:
            _unlock(path, fd)


def _unlock(path: Path, fd: int) -> None:
    """Remove the lock file (while still holding it), only if the name is still ours."""
    with contextlib.suppress(OSError):
        st, mine = os.lstat(path), os.fstat(fd)
        if (st.st_ino, st.st_dev) == (mine.st_ino, mine.st_dev):
            os.unlink(path)
    os.close(fd)


def _open_lock(path: Path) -> tuple[int, bool]:
    """Open (or create) the lock file ``path`` without following a link; refuse
    anything but a regular file of this user with no other name. Returns the
    descriptor and whether this call created the file."""
    flags = os.O_RDWR | getattr(os, "O_NONBLOCK", 0) | NOFOLLOW
    created = True
    try:
        try:
            fd = os.open(path, flags | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:
            created = False
            fd = os.open(path, flags)
    except OSError as exc:
        if exc.errno == errno.ELOOP or path.is_symlink():
            raise OutputError(f"{path}: is a symbolic link, not a cairn lock file; cairn never "
                              "follows links it finds -- remove the link") from None
        if path.is_dir():
            raise OutputError(f"{path}: is a folder, not a cairn lock file; remove it") from None
        raise OutputError(f"{path}: cannot create the lock file ({exc.strerror}); choose "
                          "another folder") from None
    st = os.fstat(fd)
    why = ("it is not a regular file" if not stat.S_ISREG(st.st_mode) else
           "it has other names (hard links)" if st.st_nlink != 1 else
           "it belongs to another user" if hasattr(os, "geteuid") and st.st_uid != os.geteuid()
           else None)
    if why:
        os.close(fd)
        raise OutputError(f"{path}: is not a cairn lock file ({why}); cairn never writes "
                          "through it -- remove it")
    return fd, created


def _lock(path: Path, busy: str, busy_error=OutputError, params=()) -> int | None:
    """An exclusive ``flock`` on the lock file ``path`` (None where flock is missing
    or the file system does not support it)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return None
    for _ in range(10):
        fd, created = _open_lock(path)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            pid = os.read(fd, 32).decode(errors="replace").strip()
            os.close(fd)
            who = f" (process {pid})" if pid.isdigit() else ""
            raise busy_error(busy.replace("{who}", who), *params) from None
        except OSError:  # a file system without locks (some network mounts): go on unlocked
            os.close(fd)
            if created:
                with contextlib.suppress(OSError):
                    os.unlink(path)
            return None
        try:
            st, mine = os.lstat(path), os.fstat(fd)
            same = (st.st_ino, st.st_dev) == (mine.st_ino, mine.st_dev)
        except FileNotFoundError:
            same = False  # the previous holder removed it after we opened it
        if same:
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
                os.write(fd, f"{os.getpid()}\n".encode())
            return fd
        os.close(fd)
    raise OutputError(f"{path}: cannot take the lock; choose another folder")


def clean_leftovers(outdir: str | os.PathLike) -> list[str]:
    """Tidy what a killed run left in ``outdir`` (call while holding it).

    Temporary files of :func:`atomic_path` are removed; a staging folder is
    removed, after moving its files into place when its publication had
    begun (so the folder ends with the complete new set, never a mix).
    Only entries cairn makes are touched, and never through a link: a
    staging folder and the files it publishes must be real folders and
    regular files of this user, and a publication marker may only name
    plain file names of the kinds cairn writes (:data:`OUTPUT_NAME`) --
    (a staged file must have no other name) -- anything else found there is
    left alone. Returns the names removed or completed.
    """
    out = Path(outdir)
    done = []
    for p in sorted(out.iterdir()):
        try:
            st = os.lstat(p)
        except OSError:
            continue
        if p.name.startswith(STAGING_PREFIX) and stat.S_ISDIR(st.st_mode) and owned(st):
            done += _complete_publication(p, out)
            shutil.rmtree(p, ignore_errors=True)
            done.append(p.name)
        elif PART_NAME.match(p.name) and stat.S_ISREG(st.st_mode) and owned(st):
            with contextlib.suppress(OSError):
                p.unlink()
                done.append(p.name)
    return done


_MARKER_BYTES = 16 * 2**20  # a publication marker lists file names: larger is not cairn's


def _listed_names(path: Path, key: str | None = None) -> list[str]:
    """The file names a JSON file of this user lists (``key``: under that key of
    an object), read without following a link; only plain names of the kinds
    cairn writes (:data:`OUTPUT_NAME`) are kept, and anything unreadable, too
    large or of another shape lists none."""
    try:
        fd = os.open(path, os.O_RDONLY | NOFOLLOW)
    except OSError:
        return []
    try:
        with os.fdopen(fd, "rb") as fh:
            st = os.fstat(fh.fileno())
            if not stat.S_ISREG(st.st_mode) or not owned(st) or st.st_size > _MARKER_BYTES:
                return []
            data = json.loads(fh.read())
    except (OSError, ValueError, RecursionError):  # RecursionError: a deeply nested file
        return []
    if key is not None:
        data = data.get(key) if isinstance(data, dict) else None
    return [n for n in data if isinstance(n, str) and OUTPUT_NAME.match(n)] \
        if isinstance(data, list) else []


#: the run record each publication includes; its ``outputs`` list the set's file names
RECORD = "run.json"


def staged_names(stage: str | os.PathLike) -> list[str]:
    """The names of the files written so far into a staging folder (sorted)."""
    return sorted(p.name for p in Path(stage).iterdir())


def recorded_outputs(outdir: str | os.PathLike, patterns=()) -> list[str]:
    """The files the run published in ``outdir`` before says it wrote (the
    ``outputs`` of its :data:`RECORD`), those matching one of the glob
    ``patterns`` (the names cairn's commands write): what a new run's
    publication removes when its own set lacks them, so that the folder
    never holds two runs' files side by side. A record that is not this
    user's regular file (a link, another user's) lists nothing."""
    import fnmatch

    names = _listed_names(Path(outdir) / RECORD, "outputs")
    return [n for n in names if any(fnmatch.fnmatchcase(n, p) for p in patterns)]


def _complete_publication(stage: Path, out: Path) -> list[str]:
    """Move the files a cut-short publication listed from ``stage`` into ``out``.

    Raises
    ------
    OutputError
        A file cannot be moved into place (a GeoPackage open in another
        program, a folder at its name): nothing is moved and ``stage`` is
        kept, so the folder never holds a mix of two sets.
    """
    marker = stage / PUBLISHING
    todo = []
    for name in _listed_names(marker):
        if name in todo:
            continue
        with contextlib.suppress(OSError):
            st = os.lstat(stage / name)
            if stat.S_ISREG(st.st_mode) and st.st_nlink == 1 and owned(st):
                todo.append(name)
    try:
        _refuse_folders(out, todo)
        for name in todo:  # before anything moves: a GeoPackage open elsewhere stops it
            if name.lower().endswith(".gpkg"):
                release_sqlite(out / name)
        for name in todo:
            replace_into(stage / name, out / name)
    except OSError as exc:
        raise OutputError(f"{out}: cannot complete the publication a killed run began "
                          f"({short(exc)}); its files are kept in {stage.name} until a run "
                          "can") from None
    return todo


@contextlib.contextmanager
def staged_outputs(outdir: str | os.PathLike, *, replaces: tuple[str, ...] = (),
                   earlier: tuple[str, ...] = ()):
    """Yield a staging folder inside ``outdir``; publish its files as a set.

    Write every file of a run into the staging folder; when the block ends
    without error the files are moved into ``outdir`` together, earlier
    files matching a glob pattern in ``replaces`` that the new set does not
    include are removed, so are the files the earlier run's record lists
    (:func:`recorded_outputs`, names matching ``earlier``) that the new set
    does not include, and the staging folder goes. Ctrl-C and SIGTERM
    wait for those few steps (:class:`~terrain.processes.held_signals`) and
    are then raised, the exception's ``published`` attribute naming
    ``outdir``: the outputs are whole, and a front end can say so. On any
    error or interrupt before, the staging folder is removed and ``outdir``
    keeps its previous files untouched. Holds the folder's lock
    (:func:`hold_outdir`) throughout.
    """
    out = Path(outdir)
    _make_outdir(out)
    with hold_outdir(out):
        try:
            stage = Path(tempfile.mkdtemp(prefix=STAGING_PREFIX, dir=out))
        except OSError as exc:
            raise write_error(out, exc) from None
        try:
            yield stage
            published = False
            try:
                with held_signals():  # a signal here waits, then is raised below
                    _publish(stage, out, replaces, earlier)
                    shutil.rmtree(stage, ignore_errors=True)
                    published = True
            except KeyboardInterrupt as exc:  # Terminated too
                if published:
                    exc.published = str(out)
                raise
        finally:
            shutil.rmtree(stage, ignore_errors=True)


def _publish(stage: Path, out: Path, replaces, earlier=()) -> None:
    """Move the staged files into ``out`` as a set (the caller holds Ctrl-C and
    SIGTERM meanwhile: :func:`staged_outputs`)."""
    names = staged_names(stage)
    _refuse_folders(out, names)  # before anything moves
    before = [n for n in recorded_outputs(out, earlier) if n not in names]
    try:
        sync_dir(stage)
        for name in names:  # before anything moves: a GeoPackage open elsewhere stops it
            if name.lower().endswith(".gpkg"):
                release_sqlite(out / name)
        marker = stage / PUBLISHING
        with open(marker, "w") as fh:
            fh.write(json.dumps(names))
            fh.flush()
            os.fsync(fh.fileno())
        for pattern in replaces:
            for old in out.glob(pattern):
                st = os.lstat(old)
                if old.name not in names and stat.S_ISREG(st.st_mode) and owned(st):
                    old.unlink()
        for name in before:  # the earlier run's files this set lacks (another command's)
            with contextlib.suppress(FileNotFoundError):
                st = os.lstat(out / name)
                if stat.S_ISREG(st.st_mode) and owned(st) and st.st_nlink == 1:
                    (out / name).unlink()
        for name in names:
            replace_into(stage / name, out / name)
        sync_dir(out)
    except OSError as exc:
        raise write_error(out, exc) from None


def replaced_by(path: str | os.PathLike, outdir: str | os.PathLike, names, patterns=()) -> str | None:
    """What a run writing ``names`` into ``outdir`` would do to ``path`` (links
    resolved): the output name that replaces it, the pattern of earlier
    outputs the publication removes, or the leftover the tidy-up removes
    (a staging folder, a temporary file, the lock) -- None when it stays."""
    import fnmatch

    real, top = Path(os.path.realpath(path)), Path(os.path.realpath(outdir))
    if real.parent == top:
        name = real.name
        if name in names:
            return name
        for pattern in patterns:
            if fnmatch.fnmatchcase(name, pattern):
                return pattern
        if PART_NAME.match(name) or name == LOCK_NAME:
            return name
    if resolves_into(real, top) and real != top:
        first = real.relative_to(top).parts[0]
        if first.startswith(STAGING_PREFIX):
            return first
    return None


def check_file_folder(path: str | os.PathLike) -> Path:
    """Make sure a file can be created at ``path`` before any work is done.

    Creates (and removes) a probe file beside it, and removes temporary files
    :func:`atomic_path` left there for this name by a killed run.

    Raises
    ------
    OutputError
        The folder does not exist, is not writable, or ``path`` is a folder.
    """
    p = Path(path)
    folder = p.parent
    if p.is_dir():
        raise OutputError(f"{p}: is a folder; give a file name")
    if not folder.is_dir():
        raise OutputError(f"{p}: the folder {folder} does not exist; create it or choose "
                          "another path")
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".probe", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise OutputError(f"{p}: cannot write in {folder} ({exc.strerror}); choose another "
                          "folder") from None
    for q in folder.glob(f".{glob.escape(p.name)}.*.part*"):
        if PART_NAME.match(q.name):
            with contextlib.suppress(OSError):
                q.unlink()
    return p
