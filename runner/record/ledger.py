"""The run ledger: a hash-chained, canonical JSON event log; writing and reading it.

Every run folder holds ``ledger.jsonl``: one event a line, each line the RFC 8785
canonical JSON of ``{"seq": n, "type": ..., "prev": ..., **fields}``. ``seq`` counts
from 1 (so ``seq`` is the line number); ``prev`` is the sha256 (hex) of the bytes of
the line before, without its newline, and :data:`GENESIS` for the first line. The
sha256 of the last line is the run's **seal**.

A hash chain alone can be rebuilt by whoever rewrites the whole file, and a change
to the last line shows only as a different seal. The seal is therefore printed at
the end of a run (compare it with :func:`verify_run`'s ``expected_seal``) and can be
signed with Ed25519 (:mod:`lotproof.runner.record.signing`).

Event types a run writes, in this order (fields beside ``seq``, ``type``, ``prev``):

``run-start``   tool, python, libraries, platform, cpu, command, user, host, time_utc, lot,
                cache, executor (and rerun_of on a rerun)
``recipe``      path, sha256, name, revision, git ({commit, path_in_repo, modified} or null)
``lot``         lot_id, path, customer, order, specification, sample, operator, note, station,
                sheet ({path, sha256} or null): the lot's details for its certificate
                (:mod:`lotproof.runner.recipe.lotsheet`); a detail not given is null
``recipe-approval``  file, file_sha256, sha256, name, revision, role, approver, time_utc,
                comment, key, key_file, signature: the recipe's approval found with a trust
                folder (:mod:`lotproof.runner.record.recipe_approval`); only when one was
``input``       image, input, path, size, sha256, shape, dtype, calibration
``step``        image, step, kind, version, to, key, checksum, cache ("computed"|"reused"), seconds
``image``       image, status, reason, worker, notes, folder (its safe name in the run folder)
``verdict``     limit, value, unit, over, bound, verdict
``lot-verdict`` verdict
``output``      path, sha256, size (path POSIX, relative to the run folder)
``run-end``     time_utc, exit_code

:func:`lotproof.runner.record.verify.verify_run` relies on ``output``, ``recipe`` and
``run-end``; the exports in :mod:`lotproof.runner.record.export` read the others.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import rfc8785

from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INTEGRITY, LotproofError
from lotproof.runner.evaluate.hashing import file_sha256
from lotproof.runner.files import fsync_folder, write_file
from lotproof.runner.record.layout import LEDGER_FILE, LEDGER_SUM_FILE, SUMS_FILE, safe_relative

__all__ = [
    "EVENT_TYPES",
    "GENESIS",
    "LedgerError",
    "LedgerLine",
    "LedgerWriteError",
    "LedgerWriter",
    "canonical",
    "line_hash",
    "parse_ledger",
    "write_ledger_sum",
    "write_sha256sums",
]

#: the ``prev`` of the first line: sha256 of b"lotproof ledger v1"
GENESIS = hashlib.sha256(b"lotproof ledger v1").hexdigest()
#: event types, in the order a run writes them
EVENT_TYPES = (
    "run-start",
    "recipe",
    "lot",
    "recipe-approval",
    "input",
    "step",
    "image",
    "verdict",
    "lot-verdict",
    "output",
    "run-end",
)
#: fields the writer sets on every event
_RESERVED = ("seq", "type", "prev")


class LedgerError(LotproofError, ValueError):
    """A ledger cannot be read as an intact chain (exit 4, integrity failure)."""

    exit_code = EXIT_INTEGRITY


class LedgerWriteError(LedgerError, OSError):
    """The ledger or a record file cannot be written (exit 3, like any run folder
    that cannot be written, not 4: nothing was found altered).

    The ledger is evidence: a failed write ends the run, it is never a warning.
    """

    exit_code = EXIT_BAD_INPUT


# ---------------------------------------------------------------- canonical JSON


def _plain(obj: Any) -> Any:
    """JSON-ready copy: NaN and infinities become None; tuples lists; numpy scalars Python."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, int):
        return int(obj)
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        out = {}
        for key, value in obj.items():
            if not isinstance(key, str):
                raise TypeError(f"ledger keys are text, got {key!r}")
            out[key] = _plain(value)
        return out
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    item = getattr(obj, "item", None)  # numpy scalars, without importing numpy here
    if callable(item) and getattr(obj, "shape", None) == ():
        return _plain(item())
    raise TypeError(f"cannot put a {type(obj).__name__} into the ledger: {obj!r}")


def canonical(obj: Any) -> bytes:
    """RFC 8785 (JSON Canonicalization Scheme) bytes of ``obj``.

    NaN and infinities have no JSON form; they are written as ``null`` (an undefined
    value, e.g. the median size of no objects, reads back as None). Tuples become
    arrays and numpy scalars their Python value; anything else that is not JSON
    (bytes, paths, arrays) raises ``TypeError``, so the caller decides its form.
    Integers beyond 2**53 are refused by RFC 8785 itself.
    """
    try:
        return rfc8785.dumps(_plain(obj))
    except rfc8785.CanonicalizationError as err:
        raise TypeError(f"not representable in canonical JSON: {err}") from None


def line_hash(line: bytes) -> str:
    """sha256 hex of one ledger line's bytes, without its newline."""
    return hashlib.sha256(line).hexdigest()


# ---------------------------------------------------------------- writing


class LedgerWriter:
    """Appends events to a new ledger file, one fsync'ed canonical line each.

    ``LedgerWriter(path)`` creates ``path`` exclusively; an existing file is an error
    (run folders are never rewritten). Every ``OSError`` becomes
    :class:`LedgerWriteError`. Use as a context manager, or call :meth:`close`.
    """

    def __init__(self, path: Path):
        self.path = Path(path)
        self._seq = 0
        self._size = 0
        self._last = GENESIS
        self._digest = hashlib.sha256()  # of every byte written so far
        self._seal: str | None = None
        try:
            # unbuffered: a failed write fails here, not later in close()
            self._file: io.FileIO | None = open(self.path, "xb", buffering=0)  # noqa: SIM115 - closed by close()
        except FileExistsError:
            raise LedgerWriteError(
                f"{self.path}: exists already; a ledger is never rewritten"
            ) from None
        except OSError as err:
            raise LedgerWriteError(
                f"{self.path}: cannot create the ledger ({err.strerror})"
            ) from None
        fsync_folder(self.path.parent)

    @property
    def seal(self) -> str | None:
        """sha256 hex of the last line written (None before the first)."""
        return self._seal

    @property
    def count(self) -> int:
        """Number of events written."""
        return self._seq

    def append(self, type: str, /, **fields: Any) -> str:
        """Write one event; return the sha256 hex of its line (the seal so far)."""
        return self.append_group([(type, fields)])

    def append_group(self, events: list[tuple[str, dict[str, Any]]]) -> str:
        """Write several events (type, fields) and make them durable with one fsync.

        Either every event of the group is in the record or none is: on a failed write
        the file is cut back to where the group began. Returns the seal so far.
        """
        if self._file is None:
            raise LedgerWriteError(f"{self.path}: the ledger is closed")
        lines = self._lines(events)
        last = line_hash(lines[-1]) if lines else self._last
        if not lines:
            return self._seal or GENESIS
        data = b"".join(line + b"\n" for line in lines)
        try:
            pending = memoryview(data)
            while pending:
                written = self._file.write(pending)
                if not written:
                    raise OSError(28, "nothing could be written")
                pending = pending[written:]
            os.fsync(self._file.fileno())
        except OSError as err:
            # Events that are not known to be on disk are not in the record: cut them off,
            # so that a failed run-end never leaves a ledger that verifies as intact.
            self._cut_back()
            raise LedgerWriteError(
                f"{self.path}: cannot write event {self._seq + 1} ({err.strerror}); "
                "the record is incomplete"
            ) from None
        except BaseException:
            self._cut_back()  # interrupted mid-write: no half line stays in the record
            raise
        self._seq += len(lines)
        self._size += len(data)
        self._digest.update(data)
        self._last = self._seal = last
        return self._seal

    def _cut_back(self) -> None:
        if self._file is None:
            return
        try:
            os.ftruncate(self._file.fileno(), self._size)
            self._file.seek(self._size)
        except OSError:
            pass

    def _lines(self, events: list[tuple[str, dict[str, Any]]]) -> list[bytes]:
        seq, last = self._seq, self._last
        lines = []
        for type_, fields in events:
            clash = [k for k in _RESERVED if k in fields]
            if clash:
                raise ValueError(f"event fields {clash} are set by the ledger itself")
            if not isinstance(type_, str) or not type_:
                raise ValueError(f"an event type is a non-empty text, got {type_!r}")
            seq += 1
            line = canonical({"seq": seq, "type": type_, "prev": last, **fields})
            last = line_hash(line)
            lines.append(line)
        return lines

    def append_end(self, **fields: Any) -> str:
        """Write ``ledger.sha256`` for the ledger as it will be, then the ``run-end`` event.

        The run's last line is covered by no later line of the chain; the checksum
        file, written first with the digest the whole ledger will have, covers it
        (see :func:`write_ledger_sum`). A run stopped between the two leaves a ledger
        without run-end: unfinished. Returns the seal.
        """
        write_ledger_sum(self.path.parent, self.sha256_with("run-end", **fields))
        return self.append("run-end", **fields)

    def sha256_with(self, type: str, /, **fields: Any) -> str:
        """sha256 hex of the whole ledger file as it will be once this one event is appended.

        Nothing is written: the caller records the digest elsewhere first (the ledger's
        own checksum file) and then appends the very same event.
        """
        digest = self._digest.copy()
        digest.update(self._lines([(type, fields)])[0] + b"\n")
        return digest.hexdigest()

    def close(self) -> None:
        """Close the file (idempotent)."""
        if self._file is not None:
            try:
                self._file.close()
            except OSError as err:
                raise LedgerWriteError(f"{self.path}: cannot close ({err.strerror})") from None
            finally:
                self._file = None

    def __enter__(self) -> LedgerWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def write_ledger_sum(run_dir: Path, digest: str) -> Path:
    """Write ``ledger.sha256``: the sha256 of the whole ledger, ``<hex>  ledger.jsonl``.

    It is written just before the ledger's last line, with the digest the ledger will
    have once that line is appended (:meth:`LedgerWriter.sha256_with`), so it covers the
    ``run-end`` line that the chain itself cannot: ``sha256sum -c ledger.sha256`` in the
    run folder checks it without lotproof. Never overwrites.
    """
    target = Path(run_dir) / LEDGER_SUM_FILE
    try:
        write_file(target, f"{digest}  {LEDGER_FILE}\n".encode("ascii"), replace=False)
    except FileExistsError:
        raise LedgerWriteError(
            f"{target}: exists already; run files are never overwritten"
        ) from None
    except OSError as err:
        raise LedgerWriteError(f"{target}: cannot write ({err.strerror})") from None
    return target


def write_sha256sums(run_dir: Path, files: list[str]) -> Path:
    """Write ``SHA256SUMS`` for ``files`` (POSIX paths relative to ``run_dir``).

    The format is that of coreutils ``sha256sum``: ``<hex>  <path>`` (two spaces,
    text mode), one file a line, sorted by path, so ``sha256sum -c SHA256SUMS`` in
    the run folder checks them. Names with a backslash or a newline (which
    ``sha256sum`` would escape) are refused. The file is written to a temporary
    file and renamed into place, and never overwrites an existing one.
    """
    run_dir = Path(run_dir)
    lines = []
    for name in sorted(set(files)):
        if safe_relative(name) is None or name == SUMS_FILE:
            raise ValueError(f"{name!r}: not a plain relative path inside the run folder")
        try:
            lines.append(f"{file_sha256(run_dir / name)}  {name}\n")
        except OSError as err:
            raise LedgerWriteError(f"{run_dir / name}: cannot read ({err.strerror})") from None
    target = run_dir / SUMS_FILE
    try:
        write_file(target, "".join(lines).encode("utf-8"), replace=False)
    except FileExistsError:
        raise LedgerWriteError(
            f"{target}: exists already; run files are never overwritten"
        ) from None
    except OSError as err:
        raise LedgerWriteError(f"{target}: cannot write ({err.strerror})") from None
    return target


# ---------------------------------------------------------------- reading and checking


@dataclass
class LedgerLine:
    """One line of a ledger: its number (from 1), bytes, sha256, and the event if it parsed."""

    number: int
    raw: bytes
    hash: str
    event: dict[str, Any] | None


def parse_ledger(data: bytes, problems: list[str]) -> list[LedgerLine]:
    """Split and check a ledger's bytes; every problem found goes to ``problems``.

    Checks that each line is canonical JSON, that ``seq`` is its line number and
    that ``prev`` is the hash of the line before; a line that does not parse has
    ``event`` None.
    """
    if not data:
        return []
    chunks = data.split(b"\n")
    if chunks[-1] == b"":
        chunks.pop()
    else:
        problems.append(
            f"{LEDGER_FILE} line {len(chunks)}: no newline at the end (the file was cut or altered)"
        )
    lines: list[LedgerLine] = []
    expected_prev = GENESIS
    for number, raw in enumerate(chunks, 1):
        where = f"{LEDGER_FILE} line {number}"
        digest = line_hash(raw)
        event: dict[str, Any] | None = None
        try:
            parsed = json.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            problems.append(f"{where}: not valid JSON")
            parsed = None
        if parsed is not None and not isinstance(parsed, dict):
            problems.append(f"{where}: not a JSON object")
        elif parsed is not None:
            try:
                again = canonical(parsed)
            except TypeError:
                again = b""
            if again != raw:
                problems.append(f"{where}: not in canonical form (RFC 8785); the line was edited")
            if parsed.get("seq") != number or isinstance(parsed.get("seq"), bool):
                problems.append(f"{where}: seq is {parsed.get('seq')!r}, expected {number}")
            if parsed.get("prev") != expected_prev:
                before = "the genesis value" if number == 1 else f"line {number - 1}"
                problems.append(
                    f"{where}: prev is not the hash of {before} "
                    f"(line {number - 1 if number > 1 else 1} or {number} was altered)"
                )
            if not isinstance(parsed.get("type"), str):
                problems.append(f"{where}: no event type")
            event = parsed
        lines.append(LedgerLine(number, raw, digest, event))
        expected_prev = digest
    return lines
