"""Exports of a run record: in-toto Statement, DSSE envelope, PROV-JSON."""

from __future__ import annotations

import base64
import hashlib
import json
from pathlib import Path
from urllib.parse import quote

import pytest
from cryptography.hazmat.primitives.serialization import load_pem_public_key

import lotproof.runner.cli.record  # noqa: F401 - registers the record commands
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INTEGRITY, EXIT_INVALID, EXIT_OK
from lotproof.runner.record.export import (
    PAYLOAD_TYPE,
    PREDICATE_TYPE,
    STATEMENT_TYPE,
    dsse_envelope,
    in_toto_statement,
    pae,
    prov_document,
)
from lotproof.runner.record.layout import LEDGER_FILE
from lotproof.runner.record.ledger import LedgerError, canonical
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run

from _builders import copy_run


def test_statement_subjects_are_the_outputs_with_their_digests(record: Path) -> None:
    statement = in_toto_statement(record)
    assert statement["_type"] == STATEMENT_TYPE
    assert statement["predicateType"] == PREDICATE_TYPE
    names = [s["name"] for s in statement["subject"]]
    assert names == sorted(names)
    assert "recipe.yaml" in names and "SHA256SUMS" in names
    for subject in statement["subject"]:
        # source: the files themselves, hashed with hashlib
        assert subject["digest"] == {
            "sha256": hashlib.sha256((record / subject["name"]).read_bytes()).hexdigest()
        }


def test_statement_predicate(record: Path) -> None:
    predicate = in_toto_statement(record)["predicate"]
    recipe_sha = hashlib.sha256((record / "recipe.yaml").read_bytes()).hexdigest()
    assert predicate["method"]["name"] == "spot-test" and predicate["method"]["revision"] == 2
    assert predicate["method"]["recipe"]["digest"] == {"sha256": recipe_sha}
    assert predicate["seal"] == verify_run(record).seal
    assert [i["image"] for i in predicate["inputs"]] == ["disc-00.tif", "disc-01.tif"]
    assert all(len(i["digest"]["sha256"]) == 64 for i in predicate["inputs"])
    assert predicate["tool"]["name"] == "lotproof"
    assert "numpy" in predicate["libraries"]
    assert predicate["lot_verdict"] == "pass"
    assert [v["limit"] for v in predicate["verdicts"]] == ["fraction"]
    assert predicate["exit_code"] == 0
    json.dumps(predicate, allow_nan=False)


def test_pae_layout() -> None:
    assert pae("t", b"") == b"DSSEv1 1 t 0 "
    assert pae("application/x", b"{}") == b"DSSEv1 13 application/x 2 {}"
    # byte lengths, not character counts
    assert pae("é", "ü".encode()) == "DSSEv1 2 é 2 ü".encode()


def test_dsse_envelope_verifies_over_pae(record: Path, keys: tuple[Path, Path]) -> None:
    statement = in_toto_statement(record)
    envelope = dsse_envelope(statement, keys[0])
    assert envelope["payloadType"] == PAYLOAD_TYPE
    body = base64.b64decode(envelope["payload"], validate=True)
    assert body == canonical(statement)
    assert json.loads(body) == statement
    (signature,) = envelope["signatures"]
    public = load_pem_public_key(keys[1].read_bytes())
    # the same layout, spelled out again from the DSSE protocol text
    message = (
        b"DSSEv1 "
        + str(len(PAYLOAD_TYPE)).encode()
        + b" "
        + PAYLOAD_TYPE.encode()
        + b" "
        + str(len(body)).encode()
        + b" "
        + body
    )
    public.verify(base64.b64decode(signature["sig"]), message)  # type: ignore[union-attr]
    from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

    raw = public.public_bytes(Encoding.Raw, PublicFormat.Raw)
    assert signature["keyid"] == hashlib.sha256(raw).hexdigest()


def test_prov_document_structure(record: Path) -> None:
    document = prov_document(record)
    entities, activities = document["entity"], document["activity"]
    inputs = [e for e in entities if e.startswith("lp:input/")]
    results = [e for e in entities if e.startswith("lp:result/")]
    outputs = [e for e in entities if e.startswith("lp:output/")]
    steps = [e for e in RunFolder(record).events() if e["type"] == "step"]
    assert len(inputs) == 2
    assert len(results) == len(steps) == 4
    assert entities["lp:result/disc-00.tif/spots"]["lp:checksum"] == steps[0]["checksum"]
    assert "lp:output/SHA256SUMS" in outputs
    assert "lp:step/disc-01.tif/stats" in activities
    used = {(u["prov:activity"], u["prov:entity"]) for u in document["used"].values()}
    # measure uses the threshold's result; threshold uses the input image
    assert ("lp:step/disc-00.tif/stats", "lp:result/disc-00.tif/spots") in used
    assert ("lp:step/disc-00.tif/spots", "lp:input/disc-00.tif/section") in used
    generated = {
        (g["prov:entity"], g["prov:activity"]) for g in document["wasGeneratedBy"].values()
    }
    assert ("lp:result/disc-01.tif/stats", "lp:step/disc-01.tif/stats") in generated
    agents = document["agent"]
    assert any(a.startswith("lp:agent/lotproof/") for a in agents)
    user = RunFolder(record).events()[0]["user"]
    assert user is None or f"lp:agent/user/{quote(user, safe='-._~')}" in agents
    for relation in document["wasAssociatedWith"].values():
        assert relation["prov:agent"] in agents and relation["prov:activity"] in activities


def test_exports_refuse_a_broken_chain(record: Path, tmp_path: Path) -> None:
    run = copy_run(record, tmp_path, "run")
    lines = (run / LEDGER_FILE).read_bytes().splitlines(keepends=True)
    lines[2] = lines[2].replace(b'"seq":3', b'"seq":9')
    (run / LEDGER_FILE).write_bytes(b"".join(lines))
    with pytest.raises(LedgerError, match="line 3") as info:
        in_toto_statement(run)
    assert info.value.exit_code == EXIT_INTEGRITY
    with pytest.raises(LedgerError):
        prov_document(run)


def test_exports_refuse_an_unfinished_run(record: Path, tmp_path: Path) -> None:
    run = copy_run(record, tmp_path, "run")
    lines = (run / LEDGER_FILE).read_bytes().splitlines(keepends=True)
    (run / LEDGER_FILE).write_bytes(b"".join(lines[:-1]))
    with pytest.raises(LedgerError, match="never finished"):
        in_toto_statement(run)


def test_prov_reads_only_the_ledger(record: Path, tmp_path: Path) -> None:
    # Step events carry the names each step is applied to, so the PROV document is made from
    # the ledger alone; and nothing is exported from a record that does not verify: an
    # edited recipe.yaml can never change an export.
    run = copy_run(record, tmp_path, "run")
    prov_document(run)
    with open(run / "recipe.yaml", "ab") as handle:
        handle.write(b"# edited\n")
    assert verify_run(run).status == "altered"
    for export in (prov_document, in_toto_statement):
        with pytest.raises(LedgerError, match="the record is altered"):
            export(run)


def test_cli_export(
    record: Path, keys: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as done:
        main(["export", str(record), "--attestation"])
    assert done.value.code == EXIT_OK
    assert json.loads(capsys.readouterr().out) == in_toto_statement(record)
    out = tmp_path / "run.dsse.json"
    with pytest.raises(SystemExit) as done:
        main(["export", str(record), "--attestation", "--key", str(keys[0]), "--out", str(out)])
    assert done.value.code == EXIT_OK
    assert json.loads(out.read_text())["payloadType"] == PAYLOAD_TYPE
    with pytest.raises(SystemExit) as done:
        main(["export", str(record), "--prov", "--out", str(out)])
    assert done.value.code == EXIT_INVALID  # never overwritten
    with pytest.raises(SystemExit) as done:
        main(["export", str(record)])
    assert done.value.code == EXIT_INVALID
    with pytest.raises(SystemExit) as done:
        main(["export", str(record), "--prov", "--out", str(record / "prov.json")])
    assert done.value.code == EXIT_INVALID
    assert not (record / "prov.json").exists()
