"""The run ledger: a hash-chained, canonical JSON event log, its check, and its signature.

Every run folder holds ``ledger.jsonl``: one event a line, each line the RFC 8785
canonical JSON of ``{"seq": n, "type": ..., "prev": ..., **fields}``. ``seq`` counts
from 1 (so ``seq`` is the line number); ``prev`` is the sha256 (hex) of the bytes of
the line before, without its newline, and :data:`GENESIS` for the first line. The
sha256 of the last line is the run's **seal**.

A hash chain alone can be rebuilt by whoever rewrites the whole file, and a change
to the last line shows only as a different seal. The seal is therefore printed at
the end of a run (compare it with :func:`verify_run`'s ``expected_seal``) and can be
signed with Ed25519 (:func:`write_signature`; ``seal.sig`` holds the base64 of the
64-byte signature over the seal's ASCII hex digits).

Event types a run writes, in this order (fields beside ``seq``, ``type``, ``prev``):

``run-start``   tool, python, libraries, platform, cpu, command, user, host, time_utc
``recipe``      path, sha256, name, revision, git ({commit, path_in_repo, modified} or null)
``input``       image, input, path, size, sha256, shape, dtype, calibration
``step``        image, step, kind, version, key, checksum, cache ("computed"|"reused"), seconds
``image``       image, status, reason
``verdict``     limit, value, unit, over, bound, verdict
``lot-verdict`` verdict
``output``      path, sha256, size (path POSIX, relative to the run folder)
``run-end``     time_utc, exit_code

:func:`verify_run` relies on ``output``, ``recipe`` and ``run-end``; the exports in
:mod:`lotproof.runner.record.export` read the others.
"""

from __future__ import annotations

import base64
import hashlib
import math
import os
import re
import subprocess
import tempfile
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any, Literal

import rfc8785

from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INTEGRITY, EXIT_INVALID, LotproofError
from lotproof.runner.evaluate.hashing import file_sha256

__all__ = [
    "GENESIS",
    "LEDGER_FILE",
    "SUMS_FILE",
    "SIGNATURE_FILE",
    "EVENT_TYPES",
    "LedgerError",
    "LedgerWriteError",
    "SigningError",
    "LedgerWriter",
    "VerifyReport",
    "canonical",
    "line_hash",
    "read_ledger",
    "write_sha256sums",
    "verify_run",
    "keygen",
    "sign_seal",
    "write_signature",
    "git_info",
]

#: the ``prev`` of the first line: sha256 of b"lotproof ledger v1"
GENESIS = hashlib.sha256(b"lotproof ledger v1").hexdigest()
LEDGER_FILE = "ledger.jsonl"
SUMS_FILE = "SHA256SUMS"
SIGNATURE_FILE = "seal.sig"
#: event types, in the order a run writes them
EVENT_TYPES = (
    "run-start", "recipe", "input", "step", "image", "verdict", "lot-verdict", "output", "run-end",
)
#: fields the writer sets on every event
_RESERVED = ("seq", "type", "prev")
_HEX64 = re.compile(r"^[0-9a-f]{64}$")


class LedgerError(LotproofError, ValueError):
    """A ledger cannot be read as an intact chain (exit 4, integrity failure)."""

    exit_code = EXIT_INTEGRITY


class LedgerWriteError(LedgerError, OSError):
    """The ledger or a record file cannot be written (exit 3, like any run folder
    that cannot be written, not 4: nothing was found altered).

    The ledger is evidence: a failed write ends the run, it is never a warning.
    """

    exit_code = EXIT_BAD_INPUT


class SigningError(LotproofError, ValueError):
    """A key cannot be made, read or used (exit 2: nothing was signed or checked)."""

    exit_code = EXIT_INVALID


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
        self._seal: str | None = None
        try:
            # unbuffered: a failed write fails here, not later in close()
            self._file = open(self.path, "xb", buffering=0)  # noqa: SIM115 - closed by close()
        except FileExistsError:
            raise LedgerWriteError(
                f"{self.path}: exists already; a ledger is never rewritten"
            ) from None
        except OSError as err:
            raise LedgerWriteError(f"{self.path}: cannot create the ledger ({err.strerror})") from None
        _fsync_folder(self.path.parent)

    @property
    def seal(self) -> str | None:
        """sha256 hex of the last line written (None before the first)."""
        return self._seal

    @property
    def count(self) -> int:
        """Number of events written."""
        return self._seq

    def append(self, type: str, /, **fields: Any) -> str:  # noqa: A002 - the event's field name
        """Write one event; return the sha256 hex of its line (the seal so far)."""
        return self.append_group([(type, fields)])

    def append_group(self, events: list[tuple[str, dict[str, Any]]]) -> str:
        """Write several events (type, fields) and make them durable with one fsync.

        Either every event of the group is in the record or none is: on a failed write
        the file is cut back to where the group began. Returns the seal so far.
        """
        if self._file is None:
            raise LedgerWriteError(f"{self.path}: the ledger is closed")
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
            try:
                os.ftruncate(self._file.fileno(), self._size)
                self._file.seek(self._size)
            except OSError:
                pass
            raise LedgerWriteError(
                f"{self.path}: cannot write event {self._seq + 1} ({err.strerror}); "
                "the record is incomplete"
            ) from None
        self._seq = seq
        self._size += len(data)
        self._last = self._seal = last
        return self._seal

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


def _fsync_folder(folder: Path) -> None:
    # A new file's name is durable only once its folder is synced.
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


def _safe_relative(name: str) -> PurePosixPath | None:
    """``name`` as a relative POSIX path inside a folder, or None when it would leave it."""
    if not name or "\\" in name or "\n" in name or "\r" in name or "\x00" in name:
        return None
    path = PurePosixPath(name)
    if path.is_absolute() or any(p in ("..", "") for p in path.parts) or path.parts[:1] == (".",):
        return None
    if path.as_posix() != name:
        return None
    return path


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
        if _safe_relative(name) is None or name == SUMS_FILE:
            raise ValueError(f"{name!r}: not a plain relative path inside the run folder")
        try:
            lines.append(f"{file_sha256(run_dir / name)}  {name}\n")
        except OSError as err:
            raise LedgerWriteError(f"{run_dir / name}: cannot read ({err.strerror})") from None
    target = run_dir / SUMS_FILE
    data = "".join(lines).encode("utf-8")
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=run_dir)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        # link() fails on an existing name, where rename() would replace it
        os.link(tmp, target)
    except FileExistsError:
        raise LedgerWriteError(f"{target}: exists already; run files are never overwritten") from None
    except OSError as err:
        raise LedgerWriteError(f"{target}: cannot write ({err.strerror})") from None
    finally:
        try:
            os.unlink(tmp)
        except OSError:
            pass
    return target


# ---------------------------------------------------------------- reading and checking


@dataclass
class _Line:
    number: int
    raw: bytes
    hash: str
    event: dict[str, Any] | None


def _parse_lines(data: bytes, problems: list[str]) -> list[_Line]:
    """Split and check the ledger's bytes; every problem found goes to ``problems``."""
    import json

    if not data:
        return []
    chunks = data.split(b"\n")
    if chunks[-1] == b"":
        chunks.pop()
    else:
        problems.append(
            f"{LEDGER_FILE} line {len(chunks)}: no newline at the end (the file was cut or altered)"
        )
    lines: list[_Line] = []
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
        lines.append(_Line(number, raw, digest, event))
        expected_prev = digest
    return lines


def read_ledger(run_dir: Path) -> list[dict[str, Any]]:
    """The events of ``run_dir``'s ledger, after checking the chain.

    Raises
    ------
    LedgerError
        When the ledger is missing, its chain is broken, or the run never finished
        (no ``run-end`` as the last event). Output files are not checked here; use
        :func:`verify_run` for that.
    """
    path = Path(run_dir) / LEDGER_FILE
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise LedgerError(f"{path}: no ledger; not a run folder, or the run never started") from None
    except OSError as err:
        raise LedgerError(f"{path}: cannot read ({err.strerror})") from None
    problems: list[str] = []
    lines = _parse_lines(data, problems)
    if problems:
        raise LedgerError(f"{path}: {problems[0]}")
    events = [line.event for line in lines if line.event is not None]
    if not events or events[-1].get("type") != "run-end":
        raise LedgerError(f"{path}: the run never finished (no run-end event)")
    return events


VerifyStatus = Literal["intact", "altered", "unfinished"]
SignatureStatus = Literal["valid", "invalid", "absent", "not-checked"]


@dataclass
class VerifyReport:
    """What :func:`verify_run` found.

    ``status`` is ``intact`` (every check passed and the run ended), ``altered``
    (something does not match; ``problems`` names the first failing line or file
    first) or ``unfinished`` (the chain is sound but has no ``run-end``: a run that
    never finished is never intact).
    """

    run_dir: Path
    status: VerifyStatus
    seal: str | None
    problems: list[str] = field(default_factory=list)
    checked_files: int = 0
    signature: SignatureStatus = "absent"
    events: int = 0

    @property
    def exit_code(self) -> int:
        return 0 if self.status == "intact" else EXIT_INTEGRITY

    def as_dict(self) -> dict[str, Any]:
        return {
            "run_dir": str(self.run_dir),
            "status": self.status,
            "seal": self.seal,
            "signature": self.signature,
            "events": self.events,
            "checked_files": self.checked_files,
            "problems": list(self.problems),
        }


def _check_file(run_dir: Path, name: str, sha256: Any, size: Any, where: str) -> str | None:
    path = run_dir / name
    if path.is_symlink():
        return f"{name}: is a symbolic link, not the file recorded at {where}"
    try:
        actual_size = path.stat().st_size
    except FileNotFoundError:
        return f"{name}: missing (recorded at {where})"
    except OSError as err:
        return f"{name}: cannot read ({err.strerror})"
    if not path.is_file():
        return f"{name}: not a file (recorded at {where})"
    if isinstance(size, int) and not isinstance(size, bool) and actual_size != size:
        return f"{name}: {actual_size} bytes, {where} records {size}"
    try:
        actual = file_sha256(path)
    except OSError as err:
        return f"{name}: cannot read ({err.strerror})"
    if actual != sha256:
        return f"{name}: sha256 {actual} differs from {sha256} recorded at {where}"
    return None


def _check_sums(run_dir: Path, recorded: dict[str, str], problems: list[str]) -> set[str]:
    """Check every line of SHA256SUMS; returns the names it lists."""
    listed: set[str] = set()
    try:
        text = (run_dir / SUMS_FILE).read_bytes().decode("utf-8")
    except (OSError, UnicodeDecodeError):
        problems.append(f"{SUMS_FILE}: cannot be read as text")
        return listed
    for number, line in enumerate(text.splitlines(), 1):
        match = re.fullmatch(r"([0-9a-f]{64})  (.+)", line)
        if not match or _safe_relative(match.group(2)) is None:
            problems.append(f"{SUMS_FILE} line {number}: not a '<sha256>  <path>' line")
            continue
        digest, name = match.groups()
        listed.add(name)
        if name not in recorded:
            problems.append(f"{SUMS_FILE} line {number}: {name} is in no output event of the ledger")
        elif recorded[name] != digest:
            problems.append(f"{SUMS_FILE} line {number}: {name} differs from the ledger's sha256")
    return listed


def _load_public_key(path: Path) -> Any:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
    from cryptography.hazmat.primitives.serialization import load_pem_public_key

    try:
        key = load_pem_public_key(Path(path).read_bytes())
    except OSError as err:
        raise SigningError(f"{path}: cannot read the public key ({err.strerror})") from None
    except ValueError:
        raise SigningError(f"{path}: not a PEM public key") from None
    if not isinstance(key, Ed25519PublicKey):
        raise SigningError(f"{path}: not an Ed25519 public key")
    return key


def _load_private_key(path: Path) -> Any:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import load_pem_private_key

    try:
        key = load_pem_private_key(Path(path).read_bytes(), password=None)
    except OSError as err:
        raise SigningError(f"{path}: cannot read the private key ({err.strerror})") from None
    except (ValueError, TypeError):
        raise SigningError(f"{path}: not an unencrypted PEM private key") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise SigningError(f"{path}: not an Ed25519 private key")
    return key


def _read_signature(path: Path) -> bytes | None:
    try:
        text = path.read_bytes().decode("ascii")
    except (OSError, UnicodeDecodeError):
        return None
    if not text.endswith("\n") or text.count("\n") != 1:
        return None
    try:
        raw = base64.b64decode(text[:-1], validate=True)
    except ValueError:
        return None
    return raw if len(raw) == 64 else None


def verify_run(
    run_dir: Path, public_key: Path | None = None, *, expected_seal: str | None = None
) -> VerifyReport:
    """Check a run folder against its ledger.

    Checks, in this order (``problems`` lists what fails in the same order):

    1. every ledger line parses, is canonical (re-serialising gives the same bytes),
       has ``seq`` equal to its line number and ``prev`` equal to the hash of the
       line before (:data:`GENESIS` for the first); ``run-end`` is the last event;
    2. every ``output`` event's file exists with the recorded size and sha256, and
       ``recipe.yaml`` has the sha256 of the ``recipe`` event;
    3. ``SHA256SUMS``, when it is an output, agrees with the ledger line by line;
    4. the seal equals ``expected_seal`` when one is given (the seal printed at the
       end of the run); with ``public_key``, ``seal.sig`` verifies over the seal's
       ASCII hex with Ed25519 (a missing signature is then a failure);
    5. every file in the run folder is in an output event (except the ledger and
       the signature): others are reported as "not recorded". After ``run-end``
       such a file makes the run altered; in a run that never finished it is
       expected (written after the last event) and the run is unfinished.

    The last line of the ledger is covered only by the seal: without
    ``expected_seal`` or a signature, an edit of the last line that keeps it
    canonical JSON cannot be told from the original.
    """
    run_dir = Path(run_dir)
    problems: list[str] = []
    ledger = run_dir / LEDGER_FILE
    try:
        data = ledger.read_bytes()
    except FileNotFoundError:
        return VerifyReport(run_dir, "altered", None, [f"{LEDGER_FILE}: missing; no record to verify"])
    except OSError as err:
        return VerifyReport(run_dir, "altered", None, [f"{LEDGER_FILE}: cannot read ({err.strerror})"])
    lines = _parse_lines(data, problems)
    seal = lines[-1].hash if lines else None
    events = [(line.number, line.event) for line in lines if line.event is not None]

    finished = bool(events) and events[-1][1].get("type") == "run-end" and events[-1][0] == len(lines)
    for number, event in events[:-1]:
        if event.get("type") == "run-end":
            problems.append(f"{LEDGER_FILE} line {number}: events follow the run-end event")
            break

    recorded: dict[str, str] = {}
    checked: set[str] = set()
    recipe_sha: str | None = None
    for number, event in events:
        where = f"{LEDGER_FILE} line {number}"
        if event.get("type") == "recipe" and isinstance(event.get("sha256"), str):
            recipe_sha = event["sha256"]
        if event.get("type") != "output":
            continue
        name, digest = event.get("path"), event.get("sha256")
        if not isinstance(name, str) or _safe_relative(name) is None:
            problems.append(f"{where}: output path {name!r} is not a plain path inside the run folder")
            continue
        if not isinstance(digest, str) or not _HEX64.match(digest):
            problems.append(f"{where}: output {name} has no sha256")
            continue
        if name in (LEDGER_FILE, SIGNATURE_FILE):
            problems.append(f"{where}: {name} cannot be an output of its own record")
            continue
        recorded[name] = digest
        checked.add(name)
        problem = _check_file(run_dir, name, digest, event.get("size"), where)
        if problem:
            problems.append(problem)
    if recipe_sha is not None and "recipe.yaml" in recorded and recorded["recipe.yaml"] != recipe_sha:
        problems.append("recipe.yaml: its output sha256 differs from the recipe event's sha256")

    if SUMS_FILE in recorded:
        _check_sums(run_dir, recorded, problems)

    unrecorded = [
        f"{path}: not recorded in the ledger"
        + (" (written after its last event)" if not finished else " (added after the run)")
        for path in sorted(_files_under(run_dir))
        if path not in recorded and path not in (LEDGER_FILE, SIGNATURE_FILE)
    ]

    if expected_seal is not None and seal != expected_seal.strip().lower():
        problems.append(f"seal: {seal} is not the expected seal {expected_seal}")

    signature: SignatureStatus
    sig_path = run_dir / SIGNATURE_FILE
    if public_key is None:
        signature = "not-checked" if sig_path.exists() else "absent"
    elif not sig_path.exists():
        signature = "absent"
        problems.append(f"{SIGNATURE_FILE}: missing, but a key was given to check it")
    else:
        key = _load_public_key(public_key)
        raw = _read_signature(sig_path)
        signature = "invalid"
        if raw is None:
            problems.append(f"{SIGNATURE_FILE}: not one line of base64 of a 64-byte signature")
        elif seal is None:
            problems.append(f"{SIGNATURE_FILE}: the ledger is empty; there is no seal to check")
        else:
            from cryptography.exceptions import InvalidSignature

            try:
                key.verify(raw, seal.encode("ascii"))
                signature = "valid"
            except InvalidSignature:
                problems.append(f"{SIGNATURE_FILE}: the signature does not match the seal and key")

    # A run that stopped early leaves files its ledger never reached: expected, so they
    # make it unfinished, not altered. After run-end, any such file was added later.
    status: VerifyStatus
    if problems:
        status = "altered"
        problems.extend(unrecorded)
    elif not finished:
        status = "unfinished"
        problems.append(
            f"{LEDGER_FILE}: "
            + ("empty" if not lines else f"the last event (line {len(lines)}) is not run-end")
            + "; the run never finished"
        )
        problems.extend(unrecorded)
    elif unrecorded:
        status = "altered"
        problems.extend(unrecorded)
    else:
        status = "intact"
    return VerifyReport(run_dir, status, seal, problems, len(checked), signature, len(lines))


def _files_under(run_dir: Path) -> list[str]:
    names = []
    for folder, dirs, files in os.walk(run_dir, followlinks=False):
        base = Path(folder)
        # symbolic links to folders are listed as files: they are never recorded
        for name in files + [d for d in dirs if (base / d).is_symlink()]:
            names.append((base / name).relative_to(run_dir).as_posix())
    return names


# ---------------------------------------------------------------- signing


def _inside_run_folder(path: Path) -> Path | None:
    """The run folder that contains ``path`` (a folder with a ledger), or None."""
    resolved = Path(os.path.abspath(path)).resolve()
    for folder in resolved.parents:
        if (folder / LEDGER_FILE).exists():
            return folder
    return None


def keygen(private_path: Path, public_path: Path) -> None:
    """Make an Ed25519 key pair: PEM (PKCS#8, unencrypted) private key, mode 0600.

    Never overwrites a file, and refuses a private key path inside a run folder.
    """
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import (
        Encoding,
        NoEncryption,
        PrivateFormat,
        PublicFormat,
    )

    private_path, public_path = Path(private_path), Path(public_path)
    if os.path.abspath(private_path) == os.path.abspath(public_path):
        raise SigningError("the private and public key need two different files")
    for path in (private_path, public_path):
        if path.exists() or path.is_symlink():
            raise SigningError(f"{path}: exists already; keys are never overwritten")
    run = _inside_run_folder(private_path)
    if run is not None:
        raise SigningError(f"{private_path}: inside the run folder {run}; keep private keys elsewhere")
    key = Ed25519PrivateKey.generate()
    private_pem = key.private_bytes(Encoding.PEM, PrivateFormat.PKCS8, NoEncryption())
    public_pem = key.public_key().public_bytes(Encoding.PEM, PublicFormat.SubjectPublicKeyInfo)
    _write_new(private_path, private_pem, 0o600)
    try:
        _write_new(public_path, public_pem, 0o644)
    except SigningError:
        os.unlink(private_path)
        raise


def _write_new(path: Path, data: bytes, mode: int) -> None:
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    except FileExistsError:
        raise SigningError(f"{path}: exists already; never overwritten") from None
    except OSError as err:
        raise SigningError(f"{path}: cannot create ({err.strerror})") from None
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(path, mode)  # the umask may have narrowed or the file system ignored it
    except OSError as err:
        raise SigningError(f"{path}: cannot write ({err.strerror})") from None


def sign_seal(seal: str, private_key: Path) -> bytes:
    """Ed25519 signature (64 raw bytes) over the seal's ASCII hex digits."""
    if not isinstance(seal, str) or not _HEX64.match(seal):
        raise SigningError(f"{seal!r} is not a seal (64 lower-case hex digits)")
    return _load_private_key(private_key).sign(seal.encode("ascii"))


def write_signature(run_dir: Path, seal: str, private_key: Path) -> Path:
    """Sign ``seal`` and write ``RUN/seal.sig`` (base64 text and a newline); never overwrites.

    Refuses a private key that lies inside the run folder.
    """
    run_dir = Path(run_dir)
    key_real = Path(os.path.abspath(private_key)).resolve()
    run_real = Path(os.path.abspath(run_dir)).resolve()
    if key_real == run_real or run_real in key_real.parents:
        raise SigningError(f"{private_key}: a private key must never sit in the run folder")
    signature = sign_seal(seal, private_key)
    target = run_dir / SIGNATURE_FILE
    try:
        with open(target, "xb") as handle:
            handle.write(base64.b64encode(signature) + b"\n")
            handle.flush()
            os.fsync(handle.fileno())
    except FileExistsError:
        raise LedgerWriteError(f"{target}: exists already; a signature is never replaced") from None
    except OSError as err:
        raise LedgerWriteError(f"{target}: cannot write ({err.strerror})") from None
    return target


# ---------------------------------------------------------------- git


def _git(folder: Path, *args: str) -> str | None:
    try:
        done = subprocess.run(
            ["git", "--no-optional-locks", "-C", str(folder), *args],
            capture_output=True,
            timeout=30,
            check=False,
            env={**os.environ, "LC_ALL": "C", "GIT_TERMINAL_PROMPT": "0"},
        )
    except (OSError, subprocess.SubprocessError):
        return None
    if done.returncode != 0:
        return None
    return done.stdout.decode("utf-8", errors="replace")


def git_info(path: Path) -> dict[str, Any] | None:
    """Where ``path`` (a file) sits in git: ``{commit, path_in_repo, modified}``.

    ``commit`` is the work tree's HEAD (None in a repository without commits),
    ``path_in_repo`` the file's POSIX path from the repository root, ``modified``
    True when the file differs from that commit (changed, staged, untracked or
    ignored). None outside a work tree or when git cannot be run. Runs ``git``
    without a shell and without taking optional locks.
    """
    path = Path(os.path.abspath(path))
    folder = path.parent
    top = _git(folder, "rev-parse", "--show-toplevel")
    if top is None or not top.strip():
        return None
    top_path = Path(top.strip()).resolve()
    try:
        relative = path.resolve().relative_to(top_path).as_posix()
    except ValueError:
        return None
    head = _git(folder, "rev-parse", "--verify", "--quiet", "HEAD^{commit}")
    commit = head.strip() if head and head.strip() else None
    if commit is None:
        return {"commit": None, "path_in_repo": relative, "modified": True}
    in_commit = _git(top_path, "ls-tree", "--name-only", commit, "--", relative)
    status = _git(top_path, "status", "--porcelain=v1", "--untracked-files=all", "--ignored",
                  "--", relative)
    if in_commit is None or status is None:
        return None
    modified = not in_commit.strip() or bool(status.strip())
    return {"commit": commit, "path_in_repo": relative, "modified": modified}
