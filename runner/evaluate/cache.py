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
import os
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Protocol

import numpy as np

from lotproof.runner.evaluate.hashing import (
    canonical_json,
    content_checksum,
    float_text,
)
from lotproof.runner.files import TEMP_PREFIX, write_file
from lotproof.steps import Output, Table

__all__ = [
    "CACHE_FORMAT",
    "ENV_VAR",
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

    def get(self, key: str) -> tuple[Any, str] | None:
        """The result stored under ``key`` and its verified checksum, or ``None`` (a miss)."""

    def put(self, key: str, result: Any) -> str:
        """Store ``result`` under ``key``; returns its content checksum."""

    def checksum(self, key: str) -> str | None:
        """The content checksum an entry declares, without loading it (``None``: no entry)."""


class NullStore:
    """``--no-cache``: nothing is stored, every get is a miss."""

    location = "none"

    def get(self, key: str) -> tuple[Any, str] | None:
        return None

    def put(self, key: str, result: Any) -> str:
        return content_checksum(result)

    def checksum(self, key: str) -> str | None:
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


class _NotACacheFolder(OSError):
    """The folder given as the cache holds something else; never written to."""


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

    def _prepare(self) -> None:
        if self._ready:
            return
        self.objects.mkdir(parents=True, exist_ok=True)
        marker = self.root / _MARKER
        if not marker.exists():
            write_file(
                marker,
                canonical_json({"format": CACHE_FORMAT, "hash": "sha256"}) + b"\n",
                replace=True,
            )
        else:
            try:
                info = json.loads(marker.read_text())
            except (OSError, ValueError):
                info = {}
            if info.get("format") != CACHE_FORMAT:
                raise _NotACacheFolder(
                    f"{self.root} is not a {CACHE_FORMAT} cache folder ({_MARKER})"
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

    def _corrupt(self, key: str, path: Path, why: str) -> None:
        if key not in self._reported:
            self._reported.add(key)
            message = f"cache entry {path}: {why}; recomputing"
            self._messages.append(message)
            if self._on_corrupt is not None:
                self._on_corrupt(message)
        try:
            path.unlink()
        except OSError:
            pass

    def _read_header(self, path: Path) -> tuple[dict[str, Any], bytes] | None:
        try:
            with open(path, "rb") as handle:
                raw = handle.read()
        except FileNotFoundError:
            return None
        newline = raw.find(b"\n", 0, _MAX_HEADER)
        if newline < 0:
            raise _Corrupt("no header")
        try:
            header = json.loads(raw[:newline])
        except ValueError:
            raise _Corrupt("unreadable header") from None
        if not isinstance(header, dict):
            raise _Corrupt("malformed header")
        return header, raw[newline + 1 :]

    def get(self, key: str) -> tuple[Any, str] | None:
        path = self.path(key)
        try:
            found = self._read_header(path)
            if found is None:
                return None
            header, payload = found
            if header.get("format") != CACHE_FORMAT or header.get("key") != key:
                raise _Corrupt("the header names another key or format")
            offset = [0]
            result = _decode(header.get("result"), memoryview(payload), offset)
            if offset[0] != len(payload):
                raise _Corrupt("trailing bytes")
            expected = header.get("checksum")
            actual = content_checksum(result)
            if actual != expected:
                raise _Corrupt(f"hash mismatch (expected {expected}, got {actual})")
        except _Corrupt as err:
            self._corrupt(key, path, str(err))
            return None
        except (KeyError, TypeError, ValueError, OSError) as err:
            self._corrupt(key, path, f"unreadable ({type(err).__name__})")
            return None
        try:
            os.utime(path)  # last use, for pruning by age
        except OSError:
            pass
        return result, actual

    def checksum(self, key: str) -> str | None:
        path = self.path(key)
        try:
            with open(path, "rb") as handle:
                line = handle.readline(_MAX_HEADER)
            header = json.loads(line)
            value = header.get("checksum") if header.get("key") == key else None
            return value if isinstance(value, str) else None
        except (OSError, ValueError, AttributeError):
            return None

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
        except _NotACacheFolder:
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
