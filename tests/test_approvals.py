"""Review and release: signed, chained records beside the sealed files, checked by verify."""

from __future__ import annotations

import json
import threading
from pathlib import Path

import pytest

from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INTEGRITY, EXIT_INVALID
from lotproof.runner.jobs.approve import approve_run
from lotproof.runner.record.approvals import (
    ApprovalError,
    ApprovalIntegrityError,
    signed_fields,
)
from lotproof.runner.record.layout import APPROVALS_FILE
from lotproof.runner.record.ledger import canonical, line_hash
from lotproof.runner.record.signing import load_public_key
from lotproof.runner.record.verify import verify_run

from _builders import copy_run, signers


@pytest.fixture(scope="module")
def people(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    return signers(tmp_path_factory.mktemp("people"), ("reviewer", "releaser", "stranger"))


@pytest.fixture()
def trust(people: dict[str, Path], tmp_path: Path) -> Path:
    """A trust folder of the reviewer and the releaser (not the stranger)."""
    folder = tmp_path / "trust"
    folder.mkdir()
    for name in ("reviewer", "releaser"):
        (folder / f"{name}.pub").write_bytes((people["trust"] / f"{name}.pub").read_bytes())
    return folder


@pytest.fixture()
def released(record_copy: Path, people: dict[str, Path]) -> Path:
    """A copy of the shared record, reviewed and then released."""
    approve_run(record_copy, people["reviewer"], role="reviewed", name="Ann Reviewer")
    approve_run(
        record_copy, people["releaser"], role="released", name="Rui Leaser", comment="to customer"
    )
    return record_copy


def _lines(run: Path) -> list[bytes]:
    return (run / APPROVALS_FILE).read_bytes().splitlines(keepends=True)


def test_records_chain_from_the_seal_and_are_signed(released: Path, trust: Path) -> None:
    seal = verify_run(released).seal
    lines = [line.rstrip(b"\n") for line in _lines(released)]
    first, second = (json.loads(line) for line in lines)
    assert first["prev"] == seal and first["seal"] == seal
    assert second["prev"] == line_hash(lines[0])
    assert (first["role"], first["name"]) == ("reviewed", "Ann Reviewer")
    assert (second["role"], second["name"], second["comment"]) == (
        "released",
        "Rui Leaser",
        "to customer",
    )
    for line in lines:
        assert canonical(json.loads(line)) == line  # RFC 8785 bytes, like the ledger
    report = verify_run(released, trust=trust)
    assert report.status == "intact", report.problems
    assert [(a.role, a.name, a.check) for a in report.approvals] == [
        ("reviewed", "Ann Reviewer", "valid"),
        ("released", "Rui Leaser", "valid"),
    ]
    assert report.last_approval == line_hash(lines[1])
    # the signature covers the six fields, as canonical JSON, and verifies with the public key
    key = load_public_key(trust / "releaser.pub")
    import base64

    key.verify(
        base64.b64decode(second["signature"]),
        signed_fields(
            seal, "released", "Rui Leaser", second["time_utc"], "to customer", second["prev"]
        ),
    )


def test_the_sealed_files_are_untouched(record_copy: Path, people: dict[str, Path]) -> None:
    before = {p.name: p.read_bytes() for p in record_copy.iterdir() if p.is_file()}
    approve_run(record_copy, people["reviewer"], role="reviewed", name="Ann Reviewer")
    after = {p.name: p.read_bytes() for p in record_copy.iterdir() if p.is_file()}
    assert set(after) - set(before) == {APPROVALS_FILE}
    assert {k: after[k] for k in before} == before
    assert verify_run(record_copy).status == "intact"  # not an unrecorded file


def test_released_before_reviewed_and_twice_are_refused(
    record_copy: Path, people: dict[str, Path]
) -> None:
    with pytest.raises(ApprovalError, match="only after it is reviewed"):
        approve_run(record_copy, people["releaser"], role="released", name="Rui Leaser")
    assert not (record_copy / APPROVALS_FILE).exists()
    approve_run(record_copy, people["reviewer"], role="reviewed", name="Ann Reviewer")
    approve_run(record_copy, people["reviewer"], role="reviewed", name="Second Reviewer")
    approve_run(record_copy, people["releaser"], role="released", name="Rui Leaser")
    with pytest.raises(ApprovalError, match="released already"):
        approve_run(record_copy, people["releaser"], role="released", name="Rui Leaser")
    with pytest.raises(ApprovalError, match="released already"):
        approve_run(record_copy, people["reviewer"], role="reviewed", name="Late Reviewer")
    assert len(_lines(record_copy)) == 3


@pytest.mark.parametrize("name", ["", "   ", "two\nlines", "x" * 201])
def test_a_printed_name_is_needed(record_copy: Path, people: dict[str, Path], name: str) -> None:
    with pytest.raises(ApprovalError, match="--name"):
        approve_run(record_copy, people["reviewer"], role="reviewed", name=name)


def test_an_altered_run_is_never_signed(record_copy: Path, people: dict[str, Path]) -> None:
    images = record_copy / "images.csv"
    images.write_bytes(images.read_bytes() + b"x")
    with pytest.raises(ApprovalIntegrityError, match="altered"):
        approve_run(record_copy, people["reviewer"], role="reviewed", name="Ann Reviewer")
    assert not (record_copy / APPROVALS_FILE).exists()


def test_a_private_key_inside_the_run_folder_is_refused(
    record_copy: Path, people: dict[str, Path]
) -> None:
    inside = record_copy.parent / record_copy.name / "kept" / "me.key"
    inside.write_bytes(people["reviewer"].read_bytes())
    with pytest.raises(ApprovalError, match="never sit in the run folder"):
        approve_run(record_copy, inside, role="reviewed", name="Ann Reviewer")


def test_removing_reordering_or_altering_a_record_is_detected(
    released: Path, trust: Path, tmp_path: Path
) -> None:
    first, second = _lines(released)
    cases = {
        "removed first": [second],
        "reordered": [second, first],
        "name altered": [first.replace(b"Ann Reviewer", b"Anne Reviewer"), second],
        "role altered": [first, second.replace(b'"released"', b'"reviewed"')],
        "time altered": [first, second.replace(b'"time_utc":"20', b'"time_utc":"19')],
        "cut": [first, second[:-5]],
    }
    for what, lines in cases.items():
        run = copy_run(released, tmp_path / what.replace(" ", "-"))
        (run / APPROVALS_FILE).write_bytes(b"".join(lines))
        report = verify_run(run, trust=trust)
        assert report.status == "altered", what
        assert report.exit_code == EXIT_INTEGRITY, what
        assert any(APPROVALS_FILE in p for p in report.problems), (what, report.problems)


def test_removing_the_last_records_is_caught_against_the_printed_hash(
    released: Path, trust: Path, tmp_path: Path
) -> None:
    last = verify_run(released).last_approval
    first_hash = verify_run(released).approvals[0].hash
    assert last is not None
    cut = copy_run(released, tmp_path / "cut")
    (cut / APPROVALS_FILE).write_bytes(_lines(released)[0])
    # the shorter chain is sound in itself ...
    assert verify_run(cut, trust=trust).status == "intact"
    # ... but the hash approve printed for the release is no longer there
    report = verify_run(cut, trust=trust, expected_approval=last)
    assert report.status == "altered" and "no record has the hash" in report.problems[0]
    gone = copy_run(released, tmp_path / "gone")
    (gone / APPROVALS_FILE).unlink()
    assert verify_run(gone, expected_approval=last).status == "altered"
    # an earlier record's hash still checks once more records follow it
    assert verify_run(released, expected_approval=first_hash).status == "intact"


def test_a_signer_outside_the_trust_folder_fails_and_one_key_checks_its_own(
    record_copy: Path, people: dict[str, Path], trust: Path
) -> None:
    approve_run(record_copy, people["stranger"], role="reviewed", name="Who Knows")
    report = verify_run(record_copy, trust=trust)
    assert report.status == "altered"
    assert report.approvals[0].check == "unknown key"
    assert "not in the trust folder" in report.problems[0]
    # without a trust folder: the chain is checked, the signature only with its own key
    assert verify_run(record_copy).approvals[0].check == "not checked"
    assert verify_run(record_copy).status == "intact"


def test_a_forged_signature_is_invalid(
    record_copy: Path, people: dict[str, Path], trust: Path
) -> None:
    approve_run(record_copy, people["reviewer"], role="reviewed", name="Ann Reviewer")
    record = json.loads(_lines(record_copy)[0])
    signature = bytearray(__import__("base64").b64decode(record["signature"]))
    signature[0] ^= 1
    record["signature"] = __import__("base64").b64encode(bytes(signature)).decode()
    (record_copy / APPROVALS_FILE).write_bytes(canonical(record) + b"\n")
    report = verify_run(record_copy, trust=trust)
    assert report.status == "altered"
    assert report.approvals[0].check == "invalid"


def test_approvers_at_the_same_moment_take_turns(
    record_copy: Path, people: dict[str, Path], trust: Path
) -> None:
    errors: list[BaseException] = []

    def sign(n: int) -> None:
        try:
            approve_run(record_copy, people["reviewer"], role="reviewed", name=f"Reviewer {n}")
        except BaseException as err:  # pragma: no cover - reported below
            errors.append(err)

    threads = [threading.Thread(target=sign, args=(n,)) for n in range(6)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == []
    report = verify_run(record_copy, trust=trust)
    assert report.status == "intact", report.problems
    assert sorted(a.name for a in report.approvals) == [f"Reviewer {n}" for n in range(6)]


def test_cli_approve_and_verify(
    record_copy: Path, people: dict[str, Path], trust: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    def run(*args: str) -> int:
        with pytest.raises(SystemExit) as done:
            main(list(args))
        code = done.value.code
        return code if isinstance(code, int) else 1

    key = str(people["releaser"])
    assert run("approve", str(record_copy), "--key", key, "--role", "released", "--name", "R") == (
        EXIT_INVALID
    )
    assert "only after it is reviewed" in capsys.readouterr().err
    assert run("approve", str(record_copy), "--key", key, "--name", "R") == EXIT_INVALID
    assert "--role" in capsys.readouterr().err
    reviewer = str(people["reviewer"])
    assert run("approve", str(record_copy), "--key", reviewer, "--role", "reviewed",
               "--name", "Ann Reviewer", "--comment", "images checked") == 0  # fmt: skip
    printed = capsys.readouterr().out
    assert "reviewed by Ann Reviewer" in printed
    assert run("approve", str(record_copy), "--key", key, "--role", "released", "--name", "Rui",
               "--json") == 0  # fmt: skip
    document = json.loads(capsys.readouterr().out)
    assert document["role"] == "released" and len(document["key"]) == 64
    assert run("verify", str(record_copy), "--trust", str(trust)) == 0
    out = capsys.readouterr().out
    assert "1. reviewed by Ann Reviewer at " in out and "signature valid (" in out
    assert "2. released by Rui at " in out
    assert f"last approval: {document['hash']}" in out
    assert run("verify", str(record_copy), "--approval", document["hash"], "--json") == 0
    verified = json.loads(capsys.readouterr().out)
    assert [a["role"] for a in verified["approvals"]] == ["reviewed", "released"]
    (record_copy / APPROVALS_FILE).write_bytes(_lines(record_copy)[1])
    assert run("verify", str(record_copy)) == EXIT_INTEGRITY
    assert "prev is not the hash of the run's seal" in capsys.readouterr().out


def test_the_trust_folder_comes_from_the_environment(
    released: Path, people: dict[str, Path], monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    only_reviewer = tmp_path / "only-reviewer"
    only_reviewer.mkdir()
    (only_reviewer / "reviewer.pub").write_bytes((people["trust"] / "reviewer.pub").read_bytes())
    monkeypatch.setenv("LOTPROOF_TRUST", str(only_reviewer))
    with pytest.raises(SystemExit) as done:
        main(["verify", str(released)])
    assert done.value.code == EXIT_INTEGRITY  # the releaser's key is not trusted there
