"""The content-addressed cache of step results.

Layout (like git's object database)::

    CACHE/lotproof-cache.json      {"format": "lotproof-cache/1", "hash": "sha256"}
    CACHE/objects/ab/abcdef...     one file per entry, named by its key

An entry is one file: a header line of canonical JSON, then the raw bytes of
every array in it. The header names the key, the kind of result, each array's
dtype, shape and byte length, named values as exact float text, and the result's
content checksum. Nothing is pickled; arrays are read with ``numpy.frombuffer``.

Writes go to a temporary file in the destination folder and are renamed into
place (:func:`lotproof.runner.files.write_file`): a reader sees a whole entry or
none. They are not fsync'ed: an entry that a power cut left short fails its
checksum on read and is recomputed. Two writers of the
same key write the same bytes, so whichever rename lands last is right. Every
read re-computes the content checksum; an entry that does not match (a flipped
byte, a truncated file, a missing header) is a miss, is reported once, and is
removed so that the recomputed result can take its place.

See DEVELOPERS.md, "Cache format".
"""

from __future__ import annotations

import json
import mmap
import os
import stat
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Protocol

import numpy as np

from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.evaluate.hashing import (
    canonical_json,
    content_checksum,
    float_text,
)
from lotproof.runner.files import TEMP_PREFIX, read_file, write_file
from lotproof.steps import Output, Table

__all__ = [
    "CACHE_FORMAT",
    "ENV_VAR",
    "CacheFolderError",
    "CacheStats",
    "DiskStore",
    "NullStore",
    "Store",
    "default_cache_dir",
]

CACHE_FORMAT = "lotproof-cache/1"
#: environment variable naming the cache folder
ENV_VAR = "LOTPROOF_CACHE"
_MARKER = "lotproof-cache.json"
#: an entry header longer than this is not a header
_MAX_HEADER = 16 * 1024 * 1024
#: what happens to a damaged entry of a result that was not needed (its checksum only)
_LEFT_OUT = "its checksum is left out of the record (the result was not needed)"


def default_cache_dir() -> Path:
    """``$LOTPROOF_CACHE``, else ``$XDG_CACHE_HOME/lotproof``, else ``~/.cache/lotproof``."""
    env = os.environ.get(ENV_VAR)
    if env:
        return Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = Path(xdg) if xdg else Path.home() / ".cache"
    return base / "lotproof"


class Store(Protocol):
    """What the executor needs from a cache."""

    location: str

    def get(self, key: str, max_bytes: int | None = None) -> tuple[Any, str] | None:
        """The result stored under ``key`` and its verified checksum, or ``None`` (a miss).

        An entry larger than ``max_bytes`` (what a result of this image can be) is
        damaged: it is a miss, reported, and never read into memory.
        """

    def put(self, key: str, result: Any) -> str:
        """Store ``result`` under ``key``; returns its content checksum."""

    def checksum(self, key: str, max_bytes: int | None = None) -> str | None:
        """The verified content checksum of an entry, without keeping its result in memory
        (``None``: no entry, or a damaged one)."""


class NullStore:
    """``--no-cache``: nothing is stored, every get is a miss."""

    location = "none"

    def get(self, key: str, max_bytes: int | None = None) -> tuple[Any, str] | None:
        return None

    def put(self, key: str, result: Any) -> str:
        return content_checksum(result)

    def checksum(self, key: str, max_bytes: int | None = None) -> str | None:
        return None


# ---------------------------------------------------------------- encoding


def _encode(result: Any, arrays: list[np.ndarray]) -> dict[str, Any]:
    if isinstance(result, np.ndarray):
        array = np.ascontiguousarray(result)
        arrays.append(array)
        return {
            "array": {"dtype": array.dtype.str, "shape": list(array.shape), "nbytes": array.nbytes}
        }
    if isinstance(result, Table):
        spec: dict[str, Any] = {
            "table": [
                [name, result.units[name], _encode(np.asarray(column), arrays)]
                for name, column in result.columns.items()
            ]
        }
        if not result.per_object:
            spec["rows"] = "not-objects"
        return spec
    if isinstance(result, Output):
        return {
            "output": {
                "data": _encode(result.data, arrays),
                "values": {k: float_text(v) for k, v in result.values.items()},
                "units": dict(result.units),
            }
        }
    raise TypeError(f"cannot store a {type(result).__name__} in the cache")


class _Corrupt(Exception):
    pass


def _declared_bytes(spec: Any, depth: int = 0) -> int:
    """The payload bytes a header's result spec declares (checked before anything is read)."""
    if not isinstance(spec, dict) or depth > 4:
        raise _Corrupt("malformed header")
    body = {k: v for k, v in spec.items() if k != "rows"}
    if len(body) != 1:
        raise _Corrupt("malformed header")
    ((kind, inner),) = body.items()
    if kind == "array":
        nbytes = inner.get("nbytes") if isinstance(inner, dict) else None
        if not isinstance(nbytes, int) or isinstance(nbytes, bool) or nbytes < 0:
            raise _Corrupt("malformed header")
        return nbytes
    if kind == "table" and isinstance(inner, list):
        total = 0
        for column in inner:
            if not isinstance(column, list) or len(column) != 3:
                raise _Corrupt("malformed header")
            total += _declared_bytes(column[2], depth + 1)
        return total
    if kind == "output" and isinstance(inner, dict):
        return _declared_bytes(inner.get("data"), depth + 1)
    raise _Corrupt(f"unknown entry kind {kind!r}")


def _decode(spec: Any, buffer: memoryview, offset: list[int]) -> Any:
    if not isinstance(spec, dict) or not spec:
        raise _Corrupt("malformed header")
    per_object = spec.get("rows") != "not-objects"
    spec = {k: v for k, v in spec.items() if k != "rows"}
    if len(spec) != 1:
        raise _Corrupt("malformed header")
    ((kind, body),) = spec.items()
    if kind == "array":
        dtype = np.dtype(body["dtype"])
        if dtype.hasobject:
            raise _Corrupt("object arrays are never stored")
        shape = tuple(int(n) for n in body["shape"])
        nbytes = int(body["nbytes"])
        if nbytes != int(np.prod(shape, dtype=np.int64)) * dtype.itemsize:
            raise _Corrupt("array size does not match its shape")
        start = offset[0]
        if start + nbytes > len(buffer):
            raise _Corrupt("truncated")
        offset[0] = start + nbytes
        return np.frombuffer(buffer[start : start + nbytes], dtype=dtype).reshape(shape)
    if kind == "table":
        columns: dict[str, np.ndarray] = {}
        units: dict[str, str] = {}
        for name, unit, column in body:
            columns[name] = _decode(column, buffer, offset)
            units[name] = unit
        return Table(columns=columns, units=units, per_object=per_object)
    if kind == "output":
        return Output(
            data=_decode(body["data"], buffer, offset),
            values={k: float.fromhex(v) for k, v in body["values"].items()},
            units=dict(body["units"]),
        )
    raise _Corrupt(f"unknown entry kind {kind!r}")


# ---------------------------------------------------------------- the store


class CacheFolderError(LotproofError, ValueError):
    """The folder given as the cache holds something else (exit 2); it is never written to."""

    exit_code = EXIT_INVALID


@dataclass
class CacheStats:
    location: str
    entries: int
    bytes: int
    oldest: float | None
    newest: float | None


class DiskStore:
    """The cache on disk (see the module docstring)."""

    def __init__(self, root: Path, *, on_corrupt: Callable[[str], None] | None = None):
        self.root = Path(root)
        self.location = str(self.root)
        self.objects = self.root / "objects"
        self._reported: set[str] = set()
        self._on_corrupt = on_corrupt
        self._messages: list[str] = []
        self._ready = False
        self._unwritable = False

    def check_folder(self) -> None:
        """Refuse (:class:`CacheFolderError`) a folder that is neither new, empty, nor a cache.

        Called before a run starts, so a ``--cache`` pointed at another folder ends the
        command with exit 2 before anything is written, instead of adopting the folder.
        """
        marker = self.root / _MARKER
        if marker.exists():
            self._read_marker(marker)
            return
        if not self.root.exists():
            return
        if not self.root.is_dir():
            raise CacheFolderError(f"{self.root}: not a folder; a cache is a folder")
        try:
            # a writer's temporary file (another process making the marker) is no foreign file
            found = sorted(
                p.name for p in self.root.iterdir() if not p.name.startswith(TEMP_PREFIX)
            )
        except OSError as err:
            raise CacheFolderError(f"{self.root}: cannot be read ({err.strerror})") from None
        if found and found not in (["objects"], [_MARKER], [_MARKER, "objects"]):
            shown = ", ".join(found[:5]) + (", ..." if len(found) > 5 else "")
            raise CacheFolderError(
                f"{self.root} holds other files ({shown}) and is not a lotproof cache (no "
                f"{_MARKER}); give an empty or new folder, or an existing lotproof cache"
            )

    def _read_marker(self, marker: Path) -> None:
        try:
            info = json.loads(read_file(marker, max_bytes=65536))
        except (OSError, ValueError):
            info = {}
        if not isinstance(info, dict) or info.get("format") != CACHE_FORMAT:
            raise CacheFolderError(f"{self.root} is not a {CACHE_FORMAT} cache folder ({_MARKER})")

    def _prepare(self) -> None:
        if self._ready:
            return
        self.check_folder()
        self.objects.mkdir(parents=True, exist_ok=True)
        marker = self.root / _MARKER
        if not marker.exists():
            write_file(
                marker,
                canonical_json({"format": CACHE_FORMAT, "hash": "sha256"}) + b"\n",
                replace=True,
            )
        self._ready = True

    def drain_messages(self) -> list[str]:
        """Reports of corrupt entries (each key once) and of a cache that cannot be
        written (once), since the last call."""
        messages, self._messages = self._messages, []
        return messages

    def path(self, key: str) -> Path:
        if len(key) != 64 or any(c not in "0123456789abcdef" for c in key):
            raise ValueError(f"not a cache key: {key!r}")
        return self.objects / key[:2] / key[2:]

    def _corrupt(self, key: str, path: Path, why: str, then: str = "recomputing") -> None:
        if key not in self._reported:
            self._reported.add(key)
            message = f"cache entry {path}: {why}; {then}"
            self._messages.append(message)
            if self._on_corrupt is not None:
                self._on_corrupt(message)
        try:
            path.unlink()
        except OSError:
            pass

    def _read(
        self, key: str, path: Path, max_bytes: int | None, *, keep: bool
    ) -> tuple[Any, str] | None:
        """The decoded, checksum-verified result of the entry at ``path``; None when absent.

        Only a regular file is opened for reading (a pipe in its place is damage, never
        waited on); its size must be what its header declares, and at most
        ``max_bytes``, before its payload is read. ``keep=False`` maps the file instead
        of reading it, for a checksum that needs no result in memory.
        """
        try:
            fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
        except FileNotFoundError:
            return None
        with os.fdopen(fd, "rb", closefd=True) as handle:
            info = os.fstat(handle.fileno())
            if not stat.S_ISREG(info.st_mode):
                raise _Corrupt("not a regular file")
            if max_bytes is not None and info.st_size > max_bytes:
                raise _Corrupt(
                    f"{info.st_size} bytes, more than a result of this image can hold ({max_bytes})"
                )
            os.set_blocking(handle.fileno(), True)
            line = handle.readline(_MAX_HEADER)
            if not line.endswith(b"\n"):
                raise _Corrupt("no header")
            try:
                header = json.loads(line)
            except ValueError:
                raise _Corrupt("unreadable header") from None
            if not isinstance(header, dict):
                raise _Corrupt("malformed header")
            if header.get("format") != CACHE_FORMAT or header.get("key") != key:
                raise _Corrupt("the header names another key or format")
            declared = _declared_bytes(header.get("result"))
            if len(line) + declared != info.st_size:
                raise _Corrupt(f"{info.st_size} bytes, its header declares {len(line) + declared}")
            buffer: memoryview
            if keep or not declared:
                payload = bytearray(declared)
                if declared and handle.readinto(payload) != declared:
                    raise _Corrupt("truncated")
                buffer = memoryview(payload)
            else:
                # mapped, not read: the checksum of a result that is not needed stays
                # out of memory (the pages are the file's, dropped when unmapped)
                buffer = memoryview(mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ))
                buffer = buffer[len(line) :]
            offset = [0]
            result = _decode(header.get("result"), buffer, offset)
            if offset[0] != declared:
                raise _Corrupt("trailing bytes")
            expected = header.get("checksum")
            actual = content_checksum(result)
            if actual != expected:
                raise _Corrupt(f"hash mismatch (expected {expected}, got {actual})")
        return result, actual

    def get(self, key: str, max_bytes: int | None = None) -> tuple[Any, str] | None:
        path = self.path(key)
        try:
            found = self._read(key, path, max_bytes, keep=True)
        except _Corrupt as err:
            self._corrupt(key, path, str(err))
            return None
        except (KeyError, TypeError, ValueError, OSError) as err:
            self._corrupt(key, path, f"unreadable ({type(err).__name__})")
            return None
        if found is None:
            return None
        try:
            os.utime(path)  # last use, for pruning by age
        except OSError:
            pass
        return found

    def checksum(self, key: str, max_bytes: int | None = None) -> str | None:
        path = self.path(key)
        try:
            found = self._read(key, path, max_bytes, keep=False)
        except _Corrupt as err:
            self._corrupt(key, path, str(err), _LEFT_OUT)
            return None
        except (KeyError, TypeError, ValueError, OSError) as err:
            self._corrupt(key, path, f"unreadable ({type(err).__name__})", _LEFT_OUT)
            return None
        return None if found is None else found[1]

    def put(self, key: str, result: Any) -> str:
        """Store ``result``; returns its content checksum.

        The cache is a convenience, not evidence: when an entry cannot be written
        (a full disk, a read-only folder) the result is still returned and used, the
        failure is reported once (see :meth:`drain_messages`) and nothing partial is
        left under the entry's name.
        """
        arrays: list[np.ndarray] = []
        spec = _encode(result, arrays)
        checksum = content_checksum(result)
        header = canonical_json(
            {"format": CACHE_FORMAT, "key": key, "result": spec, "checksum": checksum}
        )
        path = self.path(key)
        try:
            self._prepare()
            self._write(path, header, arrays)
        except CacheFolderError:
            raise
        except OSError as err:
            if not self._unwritable:
                self._unwritable = True
                self._messages.append(
                    f"cache {self.root}: cannot store results ({err.strerror or err}); "
                    "results are computed and recorded, but not cached"
                )
        return checksum

    def _write(self, path: Path, header: bytes, arrays: list[np.ndarray]) -> None:
        def fill(handle: BinaryIO) -> None:
            handle.write(header + b"\n")
            for array in arrays:
                if array.size:
                    handle.write(array.data.cast("B"))

        # Not durable: the rename makes the entry appear whole to other processes, and an
        # entry that a power cut left with lost bytes fails its checksum on read and is
        # recomputed. (The run folder, which is evidence, is written durably.)
        write_file(path, fill, replace=True, durable=False)

    # ------------------------------------------------------------ maintenance

    def entries(self) -> Iterator[tuple[Path, os.stat_result]]:
        if not self.objects.is_dir():
            return
        for folder in sorted(self.objects.iterdir()):
            if not folder.is_dir():
                continue
            for path in sorted(folder.iterdir()):
                if path.name.startswith(TEMP_PREFIX):
                    continue
                try:
                    yield path, path.stat()
                except OSError:
                    continue

    def stats(self) -> CacheStats:
        count = size = 0
        oldest = newest = None
        for _, info in self.entries():
            count += 1
            size += info.st_size
            oldest = info.st_mtime if oldest is None else min(oldest, info.st_mtime)
            newest = info.st_mtime if newest is None else max(newest, info.st_mtime)
        return CacheStats(self.location, count, size, oldest, newest)

    def prune(
        self,
        *,
        older_than_s: float | None = None,
        max_bytes: int | None = None,
        now: float | None = None,
    ) -> tuple[int, int]:
        """Remove entries unused for ``older_than_s`` seconds, then the least recently
        used until the cache holds at most ``max_bytes``; also stale temporary files.
        Returns (entries removed, bytes freed)."""
        now = time.time() if now is None else now
        removed = freed = 0
        kept: list[tuple[float, int, Path]] = []
        for path, info in self.entries():
            if older_than_s is not None and now - info.st_mtime > older_than_s:
                if _unlink(path):
                    removed += 1
                    freed += info.st_size
            else:
                kept.append((info.st_mtime, info.st_size, path))
        if max_bytes is not None:
            total = sum(size for _, size, _ in kept)
            for _, size, path in sorted(kept):
                if total <= max_bytes:
                    break
                if _unlink(path):
                    removed += 1
                    freed += size
                    total -= size
        if self.objects.is_dir():
            for tmp in self.objects.glob(f"*/{TEMP_PREFIX}*"):
                try:
                    if now - tmp.stat().st_mtime > 3600:
                        tmp.unlink()
                except OSError:
                    pass
        return removed, freed


def _unlink(path: Path) -> bool:
    try:
        path.unlink()
        return True
    except OSError:
        return False
