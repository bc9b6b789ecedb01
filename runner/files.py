"""Writing files whole or not at all, and reading only regular files: one helper each.

A file is written to a temporary name (``.tmp-*``) in its destination folder and
then given its name in one step, so a reader sees either no file or the whole
file, never a part, whatever stops the writer (a kill, a full disk, a power cut
before the name appeared). Readers never open ``.tmp-*`` files; ``lotproof cache
prune`` removes stale ones.

Two choices are the caller's, and each caller states them:

``replace``
    ``False`` (run files, keys, signatures, exports): an existing file is never
    overwritten; the name is given with ``link()``, which fails on an existing
    name where ``rename()`` would replace it, so two writers cannot both win.
    ``True`` (cache entries, a rebuilt report, a preview sheet): ``rename()``.
``durable``
    ``True``: the data is fsync'ed before the name appears and the folder after,
    so a file that has its name survives a power cut (everything in a run
    folder: it is evidence). ``False`` (cache entries): no fsync; an entry a
    power cut left short fails its checksum on read and is recomputed.

Errors are plain :class:`OSError` (:class:`FileExistsError` when ``replace`` is
``False`` and the name exists); each caller says what the file was for.

:func:`read_file` reads a file that must be a regular file: a pipe, a device or
a socket under that name is refused before it is opened for reading, so nothing
lotproof reads can make it wait forever.

:func:`folder_lock` takes an advisory lock on a folder itself (``flock`` on the
folder; no lock file is made in it): exclusive for one who adds a file beside a
run's sealed files, shared for one who checks the folder, so a check never sees
a writer's temporary file.
"""

from __future__ import annotations

import os
import stat
import tempfile
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO

__all__ = [
    "TEMP_PREFIX",
    "NotARegularFile",
    "folder_lock",
    "fsync_folder",
    "read_file",
    "write_file",
]

#: prefix of the temporary files a write leaves only when it is killed
TEMP_PREFIX = ".tmp-"


def write_file(
    path: Path,
    data: bytes | Callable[[BinaryIO], None],
    *,
    replace: bool,
    durable: bool = True,
    mode: int | None = None,
) -> None:
    """Write ``data`` to ``path`` atomically.

    Parameters
    ----------
    path
        The file to write; its folder is created when missing.
    data
        The bytes, or a function that writes them to the open binary file (for
        output streamed row by row, which is never held whole in memory).
    replace
        Replace an existing file (``True``) or refuse to (``False``).
    durable
        fsync the data before the file gets its name, and the folder after.
    mode
        Permission bits of the new file; ``None`` gives those of a file made by
        ``open()`` (0o666 less the umask). Private keys pass 0o600.

    Raises
    ------
    FileExistsError
        ``replace`` is ``False`` and ``path`` exists.
    OSError
        Anything else that stopped the write; no partial file is left under ``path``.
    """
    path = Path(path)
    if not replace and (path.exists() or path.is_symlink()):
        raise FileExistsError(17, "exists already", str(path))
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=TEMP_PREFIX, dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            if callable(data):
                data(handle)
            else:
                handle.write(data)
            handle.flush()
            os.chmod(tmp, _umasked() if mode is None else mode)
            if durable:
                os.fsync(handle.fileno())
        if replace:
            os.replace(tmp, path)
        else:
            os.link(tmp, path)  # fails on an existing name, where rename() would replace it
            os.unlink(tmp)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    if durable:
        fsync_folder(path.parent)


class NotARegularFile(OSError):
    """A name that is a pipe, a device, a socket or a folder where a file belongs."""


def read_file(path: Path, max_bytes: int | None = None) -> bytes:
    """The bytes of the regular file ``path`` (symbolic links followed).

    Parameters
    ----------
    path
        The file.
    max_bytes
        Refuse a larger file (``OSError`` with ``EFBIG``) instead of reading it.

    Raises
    ------
    NotARegularFile
        ``path`` is not a regular file; it was not read.
    FileNotFoundError, OSError
        As ``open()`` raises them.
    """
    path = Path(path)
    # O_NONBLOCK: opening a FIFO for reading would wait for a writer; fstat then refuses it
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            what = "a folder" if stat.S_ISDIR(info.st_mode) else "a pipe, device or socket"
            raise NotARegularFile(
                21 if stat.S_ISDIR(info.st_mode) else 22, f"not a regular file ({what})", str(path)
            )
        if max_bytes is not None and info.st_size > max_bytes:
            raise OSError(27, f"{info.st_size} bytes, more than {max_bytes}", str(path))
        os.set_blocking(fd, True)
        with os.fdopen(fd, "rb", closefd=True) as handle:
            fd = -1
            data = handle.read() if max_bytes is None else handle.read(max_bytes + 1)
    finally:
        if fd >= 0:
            os.close(fd)
    if max_bytes is not None and len(data) > max_bytes:
        raise OSError(27, f"more than {max_bytes} bytes", str(path))
    return data


def fsync_folder(folder: Path) -> None:
    """Make the names in ``folder`` durable (a new file's name is on disk once its folder is synced).

    Best effort: file systems that cannot sync a folder are left as they are.
    """
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


_HELD = threading.local()


@contextmanager
def folder_lock(folder: Path, *, exclusive: bool) -> Iterator[None]:
    """Hold an advisory ``flock`` on ``folder`` itself: exclusive, or shared with other readers.

    Re-entrant within one thread (a check made while this thread holds the
    exclusive lock does not wait for itself); other threads and processes take
    turns. Best effort: where the file system has no locks, nothing is held.
    """
    import fcntl

    key = os.path.abspath(folder)
    held: set[str] = getattr(_HELD, "folders", set())
    _HELD.folders = held
    if key in held:
        yield
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        yield
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH)
        except OSError:
            pass  # no locks on this file system
        held.add(key)
        try:
            yield
        finally:
            held.discard(key)
    finally:
        os.close(fd)  # closing releases the lock


def _umasked() -> int:
    # The umask can only be read by setting it; done once, it is put straight back.
    global _UMASK
    if _UMASK is None:
        _UMASK = os.umask(0o022)
        os.umask(_UMASK)
    return 0o666 & ~_UMASK


_UMASK: int | None = None
