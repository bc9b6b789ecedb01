"""Review and release of a run: signed, chained records beside the sealed files.

A sealed run folder is never edited. Its review and release are recorded after
the run in ``RUN/approvals.jsonl``, a file beside the sealed files (no ``output``
event names it; :func:`lotproof.runner.record.verify.verify_run` knows it by its
name and checks it with :func:`check_approvals`). One record a line, each the
RFC 8785 canonical JSON of::

    {"seq": n, "seal": SEAL, "role": "reviewed" | "released", "name": PRINTED NAME,
     "time_utc": "2026-12-02T09:14:03Z", "comment": TEXT, "prev": HASH,
     "key": FINGERPRINT, "signature": BASE64}

``seq`` is the line number (from 1); ``seal`` the run's seal (the sha256 of the
ledger's last line); ``prev`` the sha256 (hex) of the line before, without its
newline, and the run's seal for the first record, so the records chain from the
sealed ledger; ``key`` the fingerprint of the signing key
(:func:`lotproof.runner.record.signing.fingerprint`); ``signature`` the base64
of the Ed25519 signature over the canonical JSON of :func:`signed_fields` --
the seal, the role, the printed name, the UTC time, the comment and ``prev``.
The record shows what an electronic signature must show: the printed name, the
date and time, and the meaning (the role).

Rules, kept by :func:`append_approval` and checked again on every read: a
release needs a review before it; a run is released once; nothing follows the
release. A run may be reviewed more than once (by several people).

Removing a record in the middle, reordering records or altering one breaks the
chain or a signature. Removing the *last* records (or the whole file) leaves a
shorter chain that is sound in itself; like the ledger's last line, it is caught
against the record's hash, which ``lotproof approve`` prints and the rebuilt
certificate shows (``verify --approval HASH``: that record must still be there).

Writing: the whole new file, atomically. Under an exclusive lock on the run
folder (:func:`lotproof.runner.files.folder_lock`: ``flock`` on the folder
itself, so no lock file is left in it), the run's record is verified, the old
file is read and checked, the new record is signed, and the old lines plus the
new one are written with ``write_file(..., replace=True, durable=True)``. An
append with fsync would be cheaper, but a crash in the middle of an append
leaves a torn last line that a reader cannot tell from tampering; the atomic
replace leaves either the old file or the new one, whole. The lock makes two
approvers at the same moment take turns, so neither record is lost and each
chains from the other; ``verify`` takes it shared, so it never meets the
writer's temporary file.
"""

from __future__ import annotations

import base64
import binascii
import json
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from lotproof.runner.errors import EXIT_INTEGRITY, EXIT_INVALID, LotproofError, RunFolderError
from lotproof.runner.files import folder_lock, read_file, write_file
from lotproof.runner.record.layout import APPROVALS_FILE, is_within
from lotproof.runner.record.ledger import canonical, line_hash
from lotproof.runner.record.signing import sign_payload, signature_matches

if TYPE_CHECKING:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

__all__ = [
    "MAX_COMMENT_CHARS",
    "MAX_NAME_CHARS",
    "ROLES",
    "Approval",
    "ApprovalCheck",
    "ApprovalError",
    "ApprovalIntegrityError",
    "SignatureCheck",
    "append_approval",
    "check_approvals",
    "check_name",
    "parse_approvals",
    "signed_fields",
]

#: the meanings a run's approval can have, in the order they are given
ROLES = ("reviewed", "released")
#: the longest printed name and comment, in characters
MAX_NAME_CHARS = 200
MAX_COMMENT_CHARS = 2000
#: an approvals file larger than this is not one (a record is a few hundred bytes)
_MAX_FILE_BYTES = 16 * 1024 * 1024
_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_TIME = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z$")
_CONTROL = re.compile(r"[\x00-\x09\x0b-\x1f\x7f]")
_FIELDS = ("seq", "seal", "role", "name", "time_utc", "comment", "prev", "key", "signature")

SignatureCheck = Literal["valid", "invalid", "unknown key", "not checked"]


class ApprovalError(LotproofError, ValueError):
    """An approval is refused: a role out of order, a bad name, a key in the run folder (exit 2)."""

    exit_code = EXIT_INVALID


class ApprovalIntegrityError(LotproofError, ValueError):
    """The run's record or its approvals do not verify, so nothing is signed (exit 4)."""

    exit_code = EXIT_INTEGRITY


@dataclass(frozen=True)
class Approval:
    """One record of ``approvals.jsonl``; ``hash`` is the sha256 of its line."""

    seq: int
    seal: str
    role: str
    name: str
    time_utc: str
    comment: str
    prev: str
    key: str
    signature: bytes
    hash: str
    #: what checking the signature found (set by :func:`check_approvals`)
    check: SignatureCheck = "not checked"
    #: the trusted key file that verified it
    key_file: str = ""

    def as_dict(self) -> dict[str, Any]:
        return {
            "seq": self.seq,
            "role": self.role,
            "name": self.name,
            "time_utc": self.time_utc,
            "comment": self.comment,
            "key": self.key,
            "signature": self.check,
            "key_file": self.key_file,
            "hash": self.hash,
        }


@dataclass
class ApprovalCheck:
    """What :func:`check_approvals` found: the records, in order, and every problem."""

    approvals: list[Approval]
    problems: list[str]

    @property
    def last(self) -> str | None:
        """The hash of the last record (None without records)."""
        return self.approvals[-1].hash if self.approvals else None

    @property
    def released(self) -> bool:
        return any(a.role == "released" for a in self.approvals)


def signed_fields(seal: str, role: str, name: str, time_utc: str, comment: str, prev: str) -> bytes:
    """The bytes an approval's signature covers: canonical JSON of its six fields."""
    return canonical(
        {
            "seal": seal,
            "role": role,
            "name": name,
            "time_utc": time_utc,
            "comment": comment,
            "prev": prev,
        }
    )


def check_name(name: str, what: str = "--name") -> str:
    """A printed name, stripped; :class:`ApprovalError` when it is empty, too long or not text."""
    text = name.strip() if isinstance(name, str) else ""
    if not text:
        raise ApprovalError(f"{what}: the printed name of the person signing is needed")
    if _CONTROL.search(text) or "\n" in text:
        raise ApprovalError(f"{what}: one line of text, without control characters")
    if len(text) > MAX_NAME_CHARS:
        raise ApprovalError(f"{what}: at most {MAX_NAME_CHARS} characters (got {len(text)})")
    return text


def _check_comment(comment: str) -> str:
    text = comment.strip()
    if re.search(r"[\x00-\x08\x0b-\x1f\x7f]", text):
        raise ApprovalError("--comment: control characters are not allowed")
    if len(text) > MAX_COMMENT_CHARS:
        raise ApprovalError(f"--comment: at most {MAX_COMMENT_CHARS} characters (got {len(text)})")
    return text


def _role_problem(role: str, before: list[str]) -> str | None:
    """Why ``role`` cannot follow the roles ``before``, or None when it can."""
    if role not in ROLES:
        return f"{role!r} is not a role; one of {', '.join(ROLES)}"
    if "released" in before:
        return "the run is released already; a released run takes no further approval"
    if role == "released" and "reviewed" not in before:
        return "a run is released only after it is reviewed (no review is recorded)"
    return None


def parse_approvals(data: bytes, seal: str | None, problems: list[str]) -> list[Approval]:
    """The records of an approvals file, checked for form, chain and order (not signatures).

    Every problem goes to ``problems``, naming the line; a record that does not
    parse is left out (and so breaks the chain of the next).
    """
    if not data:
        problems.append(f"{APPROVALS_FILE}: empty (a file with no record is never written)")
        return []
    chunks = data.split(b"\n")
    if chunks[-1] == b"":
        chunks.pop()
    else:
        problems.append(
            f"{APPROVALS_FILE} line {len(chunks)}: no newline at the end (cut or altered)"
        )
    records: list[Approval] = []
    expected_prev = seal
    roles: list[str] = []
    for number, raw in enumerate(chunks, 1):
        where = f"{APPROVALS_FILE} line {number}"
        digest = line_hash(raw)
        record = _parse_record(raw, where, problems)
        if record is not None:
            if record.get("seq") != number:
                problems.append(f"{where}: seq is {record.get('seq')!r}, expected {number}")
            if seal is not None and record["seal"] != seal:
                problems.append(f"{where}: signs the seal {record['seal']}, not this run's {seal}")
            if record["prev"] != expected_prev:
                before = "the run's seal" if number == 1 else f"line {number - 1}"
                problems.append(
                    f"{where}: prev is not the hash of {before} (a record was removed, "
                    "reordered or altered)"
                )
            problem = _role_problem(record["role"], roles)
            if problem:
                problems.append(f"{where}: {problem}")
            roles.append(record["role"])
            records.append(
                Approval(
                    seq=number,
                    seal=record["seal"],
                    role=record["role"],
                    name=record["name"],
                    time_utc=record["time_utc"],
                    comment=record["comment"],
                    prev=record["prev"],
                    key=record["key"],
                    signature=record["signature"],
                    hash=digest,
                )
            )
        expected_prev = digest
    return records


def _parse_record(raw: bytes, where: str, problems: list[str]) -> dict[str, Any] | None:
    try:
        parsed = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        problems.append(f"{where}: not valid JSON")
        return None
    if not isinstance(parsed, dict):
        problems.append(f"{where}: not a JSON object")
        return None
    try:
        again = canonical(parsed)
    except TypeError:
        again = b""
    if again != raw:
        problems.append(f"{where}: not in canonical form (RFC 8785); the line was edited")
    if sorted(parsed) != sorted(_FIELDS):
        problems.append(f"{where}: the fields are not those of an approval record")
        return None
    texts = ("seal", "role", "name", "time_utc", "comment", "prev", "key", "signature")
    if not all(isinstance(parsed[k], str) for k in texts) or isinstance(parsed["seq"], bool):
        problems.append(f"{where}: a field has the wrong type")
        return None
    for field in ("seal", "prev", "key"):
        if not _HEX64.match(parsed[field]):
            problems.append(f"{where}: {field} is not 64 hex digits")
            return None
    if not _TIME.match(parsed["time_utc"]):
        problems.append(f"{where}: time_utc is not a UTC time (YYYY-MM-DDTHH:MM:SSZ)")
    try:
        signature = base64.b64decode(parsed["signature"], validate=True)
    except (ValueError, binascii.Error):
        signature = b""
    if len(signature) != 64:
        problems.append(f"{where}: signature is not the base64 of a 64-byte signature")
    return {**parsed, "signature": signature}


def check_approvals(
    run_dir: Path,
    seal: str | None,
    keys: Mapping[str, tuple[Ed25519PublicKey, str]] | None = None,
    *,
    trusted_only: bool = False,
) -> ApprovalCheck | None:
    """Check ``RUN/approvals.jsonl`` against the run's ``seal``; None when there is no such file.

    ``keys`` maps a fingerprint to (public key, where it came from). A record
    signed by one of them has its signature checked (``valid`` or ``invalid``);
    a record by another key is ``not checked``, or, with ``trusted_only`` (a
    trust folder was given), ``unknown key`` and a problem.
    """
    path = Path(run_dir) / APPROVALS_FILE
    if not path.exists() and not path.is_symlink():
        return None
    problems: list[str] = []
    if path.is_symlink():
        return ApprovalCheck([], [f"{APPROVALS_FILE}: is a symbolic link, not the approvals"])
    try:
        data = read_file(path, max_bytes=_MAX_FILE_BYTES)
    except OSError as err:
        return ApprovalCheck([], [f"{APPROVALS_FILE}: cannot be read ({err.strerror})"])
    records = parse_approvals(data, seal, problems)
    checked = []
    for record in records:
        where = f"{APPROVALS_FILE} line {record.seq}"
        known = (keys or {}).get(record.key)
        if known is None:
            status: SignatureCheck = "unknown key" if trusted_only else "not checked"
            if trusted_only:
                problems.append(
                    f"{where}: signed by key {record.key}, which is not in the trust folder"
                )
            checked.append(_with(record, status, ""))
            continue
        key, source = known
        payload = signed_fields(
            record.seal, record.role, record.name, record.time_utc, record.comment, record.prev
        )
        if signature_matches(key, record.signature, payload):
            checked.append(_with(record, "valid", source))
        else:
            problems.append(f"{where}: the signature does not match the record and key {source}")
            checked.append(_with(record, "invalid", source))
    return ApprovalCheck(checked, problems)


def _with(record: Approval, check: SignatureCheck, key_file: str) -> Approval:
    return replace(record, check=check, key_file=key_file)


def append_approval(
    run_dir: Path,
    seal: Callable[[], str],
    private_key: Path,
    *,
    role: str,
    name: str,
    comment: str = "",
    time_utc: str,
) -> Approval:
    """Sign a new approval of the run and add it to ``RUN/approvals.jsonl``.

    ``seal`` checks the run's record and returns its seal (or raises); it is called
    under the run folder's exclusive lock, so nothing changes between the check and
    the write. See the module docstring for how the file is written.

    Raises
    ------
    ApprovalError
        The role does not follow the approvals so far, the name or comment is
        not acceptable, or the private key lies inside the run folder.
    ApprovalIntegrityError
        The approvals file there does not check (it was altered).
    RunFolderError
        The file cannot be written (exit 3); the old one stays as it was.
    SigningError
        The private key cannot be read.
    """
    run_dir = Path(run_dir)
    if is_within(run_dir, private_key):
        raise ApprovalError(f"{private_key}: a private key must never sit in the run folder")
    name = check_name(name)
    comment = _check_comment(comment)
    path = run_dir / APPROVALS_FILE
    with folder_lock(run_dir, exclusive=True):
        checked_seal = seal()
        old = b""
        roles: list[str] = []
        prev = checked_seal
        if path.exists() or path.is_symlink():
            if path.is_symlink():
                raise ApprovalIntegrityError(f"{path}: a symbolic link, not the approvals")
            old = read_file(path, max_bytes=_MAX_FILE_BYTES)
            problems: list[str] = []
            records = parse_approvals(old, checked_seal, problems)
            if problems:
                raise ApprovalIntegrityError(
                    f"{path}: {problems[0]}; nothing was signed (see `lotproof verify`)"
                )
            roles = [r.role for r in records]
            prev = records[-1].hash if records else checked_seal
        problem = _role_problem(role, roles)
        if problem:
            raise ApprovalError(f"--role {role}: {problem}")
        payload = signed_fields(checked_seal, role, name, time_utc, comment, prev)
        signature, key = sign_payload(private_key, payload)
        line = canonical(
            {
                "seq": len(roles) + 1,
                "seal": checked_seal,
                "role": role,
                "name": name,
                "time_utc": time_utc,
                "comment": comment,
                "prev": prev,
                "key": key,
                "signature": base64.b64encode(signature).decode("ascii"),
            }
        )
        try:
            write_file(path, old + line + b"\n", replace=True, durable=True)
        except OSError as err:
            raise RunFolderError(
                f"{path}: cannot write ({err.strerror}); nothing was added"
            ) from None
    return Approval(
        seq=len(roles) + 1,
        seal=checked_seal,
        role=role,
        name=name,
        time_utc=time_utc,
        comment=comment,
        prev=prev,
        key=key,
        signature=signature,
        hash=line_hash(line),
    )
