"""Checking a run folder against its ledger: ``lotproof verify``.

:func:`verify_run` re-hashes every file the ledger records, checks the chain,
``SHA256SUMS``, the expected seal and the signature, the review and release
records beside the sealed files (``approvals.jsonl``), and lists every file that
the ledger does not record. It reports; it never changes the folder.
"""

from __future__ import annotations

import hashlib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from lotproof.runner.errors import EXIT_INTEGRITY
from lotproof.runner.evaluate.hashing import file_sha256
from lotproof.runner.files import folder_lock
from lotproof.runner.record.approvals import Approval, check_approvals
from lotproof.runner.record.layout import (
    APPROVALS_FILE,
    BESIDE_THE_SEAL,
    LEDGER_FILE,
    LEDGER_SUM_FILE,
    PLAN_FILE,
    RECIPE_FILE,
    SIGNATURE_FILE,
    SUMS_FILE,
    safe_relative,
)
from lotproof.runner.record.reading import RunFolder, RunFolderReadError
from lotproof.runner.record.signing import (
    fingerprint,
    load_public_key,
    load_trust,
    read_signature,
    signature_matches,
)

if TYPE_CHECKING:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

__all__ = ["SignatureStatus", "VerifyReport", "VerifyStatus", "verify_run"]

_HEX64 = re.compile(r"^[0-9a-f]{64}$")


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
    #: the review and release records, in order, each with what checking its signature found
    approvals: list[Approval] = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        return 0 if self.status == "intact" else EXIT_INTEGRITY

    @property
    def last_approval(self) -> str | None:
        """The hash of the last approval record (None without approvals)."""
        return self.approvals[-1].hash if self.approvals else None

    def as_dict(self) -> dict[str, Any]:
        return {
            "run_dir": str(self.run_dir),
            "status": self.status,
            "seal": self.seal,
            "signature": self.signature,
            "events": self.events,
            "checked_files": self.checked_files,
            "approvals": [a.as_dict() for a in self.approvals],
            "last_approval": self.last_approval,
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
        text = RunFolder(run_dir).text(SUMS_FILE) or ""
    except RunFolderReadError:
        problems.append(f"{SUMS_FILE}: cannot be read as text")
        return listed
    for number, line in enumerate(text.splitlines(), 1):
        match = re.fullmatch(r"([0-9a-f]{64})  (.+)", line)
        if not match or safe_relative(match.group(2)) is None:
            problems.append(f"{SUMS_FILE} line {number}: not a '<sha256>  <path>' line")
            continue
        digest, name = match.groups()
        listed.add(name)
        if name not in recorded:
            problems.append(
                f"{SUMS_FILE} line {number}: {name} is in no output event of the ledger"
            )
        elif recorded[name] != digest:
            problems.append(f"{SUMS_FILE} line {number}: {name} differs from the ledger's sha256")
    return listed


def _check_ledger_sum(run_dir: Path, problems: list[str]) -> None:
    """``ledger.sha256`` must name the sha256 of the ledger's bytes."""
    folder = RunFolder(run_dir)
    try:
        text = folder.text(LEDGER_SUM_FILE, required=False)
        data = folder.bytes(LEDGER_FILE)
    except RunFolderReadError as err:
        problems.append(str(err))
        return
    if text is None:
        problems.append(
            f"{LEDGER_SUM_FILE}: missing; the ledger's last line (run-end) cannot be checked"
        )
        return
    match = re.fullmatch(rf"([0-9a-f]{{64}})  {re.escape(LEDGER_FILE)}\n", text)
    if match is None:
        problems.append(f"{LEDGER_SUM_FILE}: not one '<sha256>  {LEDGER_FILE}' line")
    elif match.group(1) != hashlib.sha256(data or b"").hexdigest():
        problems.append(
            f"{LEDGER_FILE}: its sha256 is not the one {LEDGER_SUM_FILE} holds (the ledger was "
            "changed after the run)"
        )


def verify_run(
    run_dir: Path,
    public_key: Path | None = None,
    *,
    expected_seal: str | None = None,
    trust: Path | None = None,
    expected_approval: str | None = None,
) -> VerifyReport:
    """Check a run folder against its ledger, and its approvals against the seal.

    Checks, in this order (``problems`` lists what fails in the same order):

    1. every ledger line parses, is canonical (re-serialising gives the same bytes),
       has ``seq`` equal to its line number and ``prev`` equal to the hash of the
       line before (:data:`GENESIS` for the first); ``run-end`` is the last event;
    2. every ``output`` event's file exists with the recorded size and sha256, and
       ``recipe.yaml`` has the sha256 of the ``recipe`` event (and, in a study folder,
       ``plan.yaml`` that of the ``plan`` event);
    3. ``SHA256SUMS``, when it is an output, agrees with the ledger line by line;
    4. the seal equals ``expected_seal`` when one is given (the seal printed at the
       end of the run); with ``public_key``, ``seal.sig`` verifies over the seal's
       ASCII hex with Ed25519 (a missing signature is then a failure);
    5. ``ledger.sha256`` holds the sha256 of the whole ledger (a finished run must
       have it: it is what covers the ``run-end`` line, which no later line chains);
    6. ``approvals.jsonl``, when there is one (see
       :mod:`lotproof.runner.record.approvals`): every record chains from the
       seal and the record before, keeps the order of roles, and, when its key
       is ``public_key`` or in the ``trust`` folder, carries a valid signature
       (with ``trust``, a record by any other key is a failure); a record with
       the hash ``expected_approval`` is among them when one is given (the hash
       ``lotproof approve`` printed: records added after it are fine, removed
       ones are not). With ``trust`` and no ``public_key``,
       ``seal.sig`` is checked when present, against every trusted key;
    7. every file in the run folder is in an output event (except the ledger and
       the files beside the seal: its checksum file, the signature and the
       approvals): others are reported as "not recorded". After ``run-end`` such
       a file makes the run altered; in a run that never finished it is expected
       (written after the last event) and the run is unfinished.

    What this can and cannot detect: any change to one file of the record, the
    ledger's last line included, and any file added or removed. Whoever rewrites
    the ledger *and* recomputes every hash that refers to it (the chain, the
    outputs' sums, ``ledger.sha256``) makes a consistent forgery that only
    ``expected_seal`` (the seal printed at the end of the run), a signature
    checked with ``public_key``, or a rerun can tell from the original. Likewise
    the last approval record is covered only by ``expected_approval``: removing it
    leaves a shorter chain that is sound in itself.

    Raises
    ------
    SigningError
        When ``public_key`` or the ``trust`` folder cannot be read (exit 2).
    """
    run_dir = Path(run_dir)
    # shared: an approval being added (under the exclusive lock) is waited for, never half seen
    with folder_lock(run_dir, exclusive=False):
        return _verify(run_dir, public_key, expected_seal, trust, expected_approval)


def _verify(
    run_dir: Path,
    public_key: Path | None,
    expected_seal: str | None,
    trust: Path | None,
    expected_approval: str | None,
) -> VerifyReport:
    keys: dict[str, tuple[Ed25519PublicKey, str]] = {}
    if trust is not None:
        keys.update({f: (t.key, str(t.path)) for f, t in load_trust(trust).items()})
    given = load_public_key(public_key) if public_key is not None else None
    if given is not None:
        keys[fingerprint(given)] = (given, str(public_key))
    problems: list[str] = []
    try:
        lines = RunFolder(run_dir).ledger_lines(problems)
    except RunFolderReadError as err:
        return VerifyReport(run_dir, "altered", None, [str(err)])
    if not lines and problems:  # no ledger at all
        return VerifyReport(run_dir, "altered", None, problems)
    seal = lines[-1].hash if lines else None
    events = [(line.number, line.event) for line in lines if line.event is not None]

    finished = (
        bool(events) and events[-1][1].get("type") == "run-end" and events[-1][0] == len(lines)
    )
    for number, event in events[:-1]:
        if event.get("type") == "run-end":
            problems.append(f"{LEDGER_FILE} line {number}: events follow the run-end event")
            break

    recorded: dict[str, str] = {}
    checked: set[str] = set()
    # the file each identity event names by its sha256: the recipe, and a study's plan
    named = {"recipe": RECIPE_FILE, "plan": PLAN_FILE}
    identities: dict[str, str] = {}
    for number, event in events:
        where = f"{LEDGER_FILE} line {number}"
        if event.get("type") in named and isinstance(event.get("sha256"), str):
            identities[named[event["type"]]] = event["sha256"]
        if event.get("type") != "output":
            continue
        name, digest = event.get("path"), event.get("sha256")
        if not isinstance(name, str) or safe_relative(name) is None:
            problems.append(
                f"{where}: output path {name!r} is not a plain path inside the run folder"
            )
            continue
        if not isinstance(digest, str) or not _HEX64.match(digest):
            problems.append(f"{where}: output {name} has no sha256")
            continue
        if name in BESIDE_THE_SEAL:
            problems.append(f"{where}: {name} cannot be an output of its own record")
            continue
        recorded[name] = digest
        checked.add(name)
        problem = _check_file(run_dir, name, digest, event.get("size"), where)
        if problem:
            problems.append(problem)
    for name, sha in identities.items():
        if name in recorded and recorded[name] != sha:
            kind = next(k for k, v in named.items() if v == name)
            problems.append(f"{name}: its output sha256 differs from the {kind} event's sha256")

    if SUMS_FILE in recorded:
        _check_sums(run_dir, recorded, problems)
    if finished:
        _check_ledger_sum(run_dir, problems)

    unrecorded = [
        f"{path}: not recorded in the ledger"
        + (" (written after its last event)" if not finished else " (added after the run)")
        for path in sorted(_files_under(run_dir))
        if path not in recorded and path not in BESIDE_THE_SEAL
    ]

    if expected_seal is not None and seal != expected_seal.strip().lower():
        problems.append(f"seal: {seal} is not the expected seal {expected_seal}")

    signature: SignatureStatus
    sig_path = run_dir / SIGNATURE_FILE
    candidates = [given] if given is not None else [key for key, _ in keys.values()]
    if not candidates:
        signature = "not-checked" if sig_path.exists() else "absent"
    elif not sig_path.exists():
        signature = "absent"
        if given is not None:
            problems.append(f"{SIGNATURE_FILE}: missing, but a key was given to check it")
    else:
        raw = read_signature(sig_path)
        signature = "invalid"
        if raw is None:
            problems.append(f"{SIGNATURE_FILE}: not one line of base64 of a 64-byte signature")
        elif seal is None:
            problems.append(f"{SIGNATURE_FILE}: the ledger is empty; there is no seal to check")
        elif any(signature_matches(key, raw, seal.encode("ascii")) for key in candidates):
            signature = "valid"
        else:
            which = "key" if given is not None else "any key of the trust folder"
            problems.append(f"{SIGNATURE_FILE}: the signature does not match the seal and {which}")

    approvals: list[Approval] = []
    check = check_approvals(run_dir, seal, keys, trusted_only=trust is not None)
    if check is not None:
        approvals = check.approvals
        problems.extend(check.problems)
    if expected_approval is not None:
        wanted = expected_approval.strip().lower()
        if wanted not in {a.hash for a in approvals}:
            problems.append(
                f"{APPROVALS_FILE}: no record has the hash {wanted} given; it was removed "
                "(with any after it) or altered"
            )

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
    return VerifyReport(
        run_dir, status, seal, problems, len(checked), signature, len(lines), approvals
    )


def _files_under(run_dir: Path) -> list[str]:
    """Every file of the run folder, and every folder that holds no file (``name/``).

    A symbolic link to a folder is listed as a file (it is never recorded), and an
    empty folder is listed too: anything the ledger does not record is an alteration.
    """
    names = []
    for folder, dirs, files in os.walk(run_dir, followlinks=False):
        base = Path(folder)
        for name in files + [d for d in dirs if (base / d).is_symlink()]:
            names.append((base / name).relative_to(run_dir).as_posix())
        if base != run_dir and not files and not any(not (base / d).is_symlink() for d in dirs):
            names.append(base.relative_to(run_dir).as_posix() + "/")
    return names
