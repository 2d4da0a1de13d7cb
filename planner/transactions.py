"""Run-folder transactions: one writer at a time, whole or not at all.

A command that writes a run folder holds its lock (a hidden ``.RUN.lock`` beside it,
naming the holder), builds the new folder beside the old one (``.RUN.partial-...``),
flushes it to disk and only then puts it in place: on Linux the old and the new folder
are swapped in one step (``renameat2`` with ``RENAME_EXCHANGE``), elsewhere the old one
is renamed aside first and put back by :func:`recover` if the machine stops between
the two renames. SIGTERM stops a command the way Ctrl-C does.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import shutil
import signal
import socket
import tempfile
import time
import warnings
from pathlib import Path

from planner.errors import Interrupted, RunFolderError, RunFolderWarning, Stopped
from planner.export import fsync_path, is_run_folder, process_umask


def resolve_run_path(path) -> Path:
    """The absolute run-folder path ``path`` names (``.`` and symlinks resolved)."""
    resolved = Path(path).resolve()
    if resolved.parent == resolved:
        raise RunFolderError(f"run folder {path}: is the root of the file system; name a folder below it")
    return resolved


def check_out(path, *, force: bool = False) -> tuple[Path, Path]:
    """Refuse a run folder that cannot be written: called before any work and again at the end.

    ``--force`` replaces only what veerwise made: an existing run folder, or an empty
    folder. Any other folder (the current folder, a folder of the user's files) is
    refused, so nothing a user made is ever replaced.
    """
    given = Path(path)
    path = resolve_run_path(path)
    parent = path.parent
    if not parent.is_dir():
        raise RunFolderError(f"run folder {given}: parent folder {parent} does not exist")
    if path.exists() and not path.is_dir():
        raise RunFolderError(f"run folder {given}: exists and is not a folder")
    if path.exists() and not force:
        raise RunFolderError(f"run folder {given}: already exists; choose another folder or pass write_run.force to "
                             "replace it")
    if path.exists() and not (is_run_folder(path) or not any(path.iterdir())):
        raise RunFolderError(f"run folder {given}: is not a veerwise run folder (no manifest.json of ours); "
                             "write_run.force replaces only run folders and empty folders, so nothing else is lost")
    return path, parent


# ----------------------------------------------------------------------------- locking

#: Lock files and temporary siblings live beside the run folder, named after it.
LOCK_NAME = ".{}.lock"
PARTIAL_PREFIX = ".{}.partial-"
OLD_PREFIX = ".{}.old-"
_HELD: dict[str, list] = {}


def lock_path(path) -> Path:
    """The lock file of run folder ``path``: a hidden sibling, so it survives the folder's replacement."""
    path = resolve_run_path(path)
    return path.parent / LOCK_NAME.format(path.name)


def _holder_text(fd: int) -> str:
    """Who a lock file names ("pid 12 on host yard-pc since ..."), printable, or ''."""
    os.lseek(fd, 0, os.SEEK_SET)
    raw = os.read(fd, 512).decode("utf-8", "replace")
    return "".join(ch for ch in raw.strip() if ch.isprintable())[:200]


def _acquire(lock: Path, path: Path, *, optional: bool = False) -> int | None:
    import errno
    import fcntl

    for _ in range(50):
        try:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0), 0o644)
        except OSError as err:
            if optional and err.errno in (errno.EACCES, errno.EROFS, errno.EPERM):
                return None
            raise RunFolderError(f"{path}: cannot create the lock file {lock.name} in {lock.parent} "
                                 f"({err.strerror or err}); nothing was written") from err
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _holder_text(fd) or "another process"
            os.close(fd)
            raise RunFolderError(f"{path}: in use by another veerwise command ({holder}); wait for it to end, "
                                 "or write to another folder") from None
        try:
            same = os.stat(lock, follow_symlinks=False).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if not same:  # its previous holder removed it between our open and our lock: try again
            os.close(fd)
            continue
        previous = _holder_text(fd)
        if previous:
            # The holder ended without removing its lock (killed, or the machine stopped);
            # the lock is free, since a running holder would still hold it.
            warnings.warn(f"{path}: took over the lock {lock.name} left by {previous}, which is no longer "
                          "running", RunFolderWarning, stacklevel=3)
        os.ftruncate(fd, 0)
        os.lseek(fd, 0, os.SEEK_SET)
        since = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        os.write(fd, f"pid {os.getpid()} on host {socket.gethostname()} since {since}\n".encode())
        os.fsync(fd)
        return fd
    raise RunFolderError(f"{path}: could not take the lock {lock.name} (it keeps changing hands)")


@contextlib.contextmanager
def read_lock(path):
    """The run's lock, for a command that reads run folder ``path`` and writes elsewhere.

    A run folder on read-only media (or in a folder the user may not write) is read
    without the lock: nobody who could change it is running this command either.
    """
    with run_lock(path, optional=True) as resolved:
        yield resolved


@contextlib.contextmanager
def run_lock(path, *, optional: bool = False):
    """Hold the exclusive lock of run folder ``path`` for the block (re-entrant in one process).

    The lock is a ``flock`` on a hidden sibling file holding the holder's pid, host and
    start time. A second command on the same folder is refused at once with one line
    naming the holder. A lock file left by a holder that no longer runs is taken over
    with a warning naming it. On entry, leftovers of an interrupted earlier write are
    cleaned up (see :func:`recover`).
    """
    path = resolve_run_path(path)
    lock = lock_path(path)
    key = str(lock)
    if key in _HELD:
        _HELD[key][1] += 1
        try:
            yield path
        finally:
            _HELD[key][1] -= 1
        return
    fd = _acquire(lock, path, optional=optional)
    if fd is None:
        yield path
        return
    _HELD[key] = [fd, 1]
    try:
        recover(path)
        yield path
    finally:
        del _HELD[key]
        with contextlib.suppress(OSError):
            os.unlink(lock)
        os.close(fd)


def recover(path) -> list[str]:
    """Clean up after an interrupted write of run folder ``path`` (the caller holds its lock).

    Under the lock no other command is writing, so every temporary sibling is a
    leftover: ``.NAME.partial-*`` folders are removed; a ``.NAME.old-*`` folder (the
    previous run, set aside by the two-step replacement) is put back when ``path`` is
    missing and removed otherwise. Returns the notes, also issued as warnings.
    """
    path = Path(path)
    parent = path.parent
    partial, old = PARTIAL_PREFIX.format(path.name), OLD_PREFIX.format(path.name)
    notes = []
    leftovers = sorted((p for p in parent.iterdir() if p.name.startswith((partial, old))),
                       key=lambda p: p.lstat().st_mtime, reverse=True)
    for entry in leftovers:
        if entry.name.startswith(old) and not os.path.lexists(path) and entry.is_dir() and not entry.is_symlink():
            os.rename(entry, path)
            notes.append(f"{path}: put back the previous run folder from {entry.name}, left by an interrupted "
                         "replacement")
            continue
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry, ignore_errors=True)
        else:
            entry.unlink(missing_ok=True)
        notes.append(f"{path}: removed {entry.name}, left by an interrupted write")
    for note in notes:
        warnings.warn(note, RunFolderWarning, stacklevel=3)
    return notes


# ----------------------------------------------------------------------------- atomic replacement

_AT_FDCWD = -100
_RENAME_NOREPLACE = 1
_RENAME_EXCHANGE = 2


def _renameat2(a: Path, b: Path, flags: int) -> bool:
    """``renameat2(a, b, flags)`` where the C library and file system offer it; False where not."""
    import ctypes
    import errno

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        func = libc.renameat2
    except (OSError, AttributeError):
        return False
    func.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    if func(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), flags) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP, errno.ENOTSUP):
        return False
    raise OSError(code, os.strerror(code), str(b))


def exchange(new: Path, path: Path) -> bool:
    """Swap folders ``new`` and ``path`` in one step (Linux ``RENAME_EXCHANGE``); False if unsupported."""
    return _renameat2(new, path, _RENAME_EXCHANGE)


def _commit(tmp: Path, path: Path) -> Path | None:
    """Put the complete folder ``tmp`` at ``path``; returns what to delete afterwards (the old run).

    With an old folder there, both are swapped in one step, so ``path`` always holds
    the old run or the new one. Where the system cannot swap, the old folder is first
    renamed to ``.NAME.old-*`` and the new one renamed into place; a stop between the
    two is repaired by :func:`recover` on the next command.
    """
    if os.path.lexists(path):
        if exchange(tmp, path):
            return tmp
        old = path.parent / f"{OLD_PREFIX.format(path.name)}{os.getpid()}-{secrets.token_hex(4)}"
        os.rename(path, old)
        os.rename(tmp, path)
        return old
    if not _renameat2(tmp, path, _RENAME_NOREPLACE):
        if os.path.lexists(path):
            raise RunFolderError(f"{path}: appeared while this run was written; nothing was replaced")
        os.rename(tmp, path)
    return None


def fsync_tree(folder: Path) -> None:
    """Flush every file in ``folder`` and the folder itself to disk."""
    for entry in folder.iterdir():
        if entry.is_file() and not entry.is_symlink():
            fsync_path(entry)
    fsync_path(folder)


@contextlib.contextmanager
def _signals_deferred():
    """Within the block SIGINT and SIGTERM wait (the renames that commit a folder are never cut)."""
    blockable = _main_thread() and hasattr(signal, "pthread_sigmask")
    if blockable:
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        if blockable:
            signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT, signal.SIGTERM})


@contextlib.contextmanager
def atomic_folder(path, *, force: bool = False):
    """Yield a temporary sibling folder; it replaces ``path`` only when the block ends well.

    The run folder's lock is held throughout (see :func:`run_lock`). An existing
    ``path`` is never touched unless ``force``; then it is swapped out only after the
    new folder is complete and flushed to disk. A stop (Ctrl-C, SIGTERM) or an error
    before the swap leaves ``path`` as it was; the swap itself cannot be interrupted.
    """
    with run_lock(path) as path:
        check_out(path, force=force)
        parent = path.parent
        try:
            tmp = Path(tempfile.mkdtemp(prefix=PARTIAL_PREFIX.format(path.name), dir=parent))
        except OSError as err:
            raise RunFolderError(f"{path}: cannot write in {parent} ({err.strerror or err}); "
                                 "nothing was written") from err
        existed = path.exists()
        committed = False
        try:
            os.chmod(tmp, 0o777 & ~process_umask())
            yield tmp
            fsync_tree(tmp)
            with _signals_deferred():
                leftover = _commit(tmp, path)
                committed = True
            fsync_path(parent)
            if leftover is not None:
                shutil.rmtree(leftover, ignore_errors=True)
        except KeyboardInterrupt as err:
            if committed:
                raise Interrupted(f"stopped after {path} was completely written") from err
            raise Interrupted(f"stopped while writing {path}; nothing was written"
                              + (" and the existing folder is untouched" if existed else "")) from err
        except OSError as err:
            if committed or isinstance(err, RunFolderError):
                raise
            raise RunFolderError(f"{path}: cannot write ({err.strerror or err}); nothing was written"
                                 + (" and the existing folder is untouched" if existed else "")) from err
        finally:
            if tmp.exists() and not committed:
                shutil.rmtree(tmp, ignore_errors=True)


@contextlib.contextmanager
def stop_on_sigterm():
    """Within the block, SIGTERM stops the work as Ctrl-C does (so nothing is half-written)."""

    def _on_term(signum, frame):
        raise Stopped(signum)

    previous = signal.signal(signal.SIGTERM, _on_term) if _main_thread() else None
    try:
        yield
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _main_thread() -> bool:
    import threading

    return threading.current_thread() is threading.main_thread()
