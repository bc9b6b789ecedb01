"""Approved recipes: a detached approval of the exact bytes; runs that require one."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from lotproof import load_recipe, run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID
from lotproof.runner.jobs.approve import approve_recipe
from lotproof.runner.record.approvals import ApprovalError
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.recipe_approval import (
    RecipeNotApproved,
    approval_path,
    find_recipe_approval,
    read_recipe_approval,
)
from lotproof.runner.record.signing import SigningError, fingerprint, load_private_key, load_trust
from lotproof.runner.show.report import build_report

from _builders import RECORD_RECIPE, signers, spot_column, spot_lot, write_recipe


@pytest.fixture()
def world(tmp_path: Path) -> dict[str, Path]:
    people = signers(tmp_path / "people", ("approver", "stranger"))
    (people["trust"] / "stranger.pub").unlink()  # the stranger's key is not trusted
    return {
        **people,
        "recipe": write_recipe(tmp_path, RECORD_RECIPE),
        "lot": spot_lot(tmp_path, [1, 2], draw=spot_column),
        "runs": tmp_path / "runs",
    }


def _main(*args: str) -> int:
    with pytest.raises(SystemExit) as done:
        main(list(args))
    code = done.value.code
    return code if isinstance(code, int) else 1


def test_the_approval_is_beside_the_recipe_and_names_its_bytes(world: dict[str, Path]) -> None:
    approved = approve_recipe(world["recipe"], world["approver"], name="Dr. Mira Approver")
    recipe = load_recipe(world["recipe"])
    assert approved.path == world["recipe"].parent / "spot-test-r2.approval.json"
    assert approved.path == approval_path(recipe)
    document = json.loads(approved.path.read_text())
    assert document["recipe"] == {"sha256": recipe.sha256, "name": "spot-test", "revision": 2}
    assert document["approver"] == "Dr. Mira Approver"
    assert document["key"] == fingerprint(load_private_key(world["approver"]))
    found = find_recipe_approval(recipe, load_trust(world["trust"]))
    assert found.approver == "Dr. Mira Approver"
    assert found.key_file.endswith("approver.pub")
    with pytest.raises(ApprovalError, match="never replaced"):
        approve_recipe(world["recipe"], world["approver"], name="Again")


def test_require_approved_refuses_without_running_anything(world: dict[str, Path]) -> None:
    with pytest.raises(RecipeNotApproved, match="needs a trust folder"):
        run_lot(world["recipe"], world["lot"], world["runs"], require_approved=True)
    with pytest.raises(RecipeNotApproved, match="no approval of this recipe revision"):
        run_lot(
            world["recipe"],
            world["lot"],
            world["runs"],
            trust=world["trust"],
            require_approved=True,
        )
    assert not world["runs"].exists()


def test_an_approved_recipe_records_its_approval_and_the_report_shows_it(
    world: dict[str, Path],
) -> None:
    approve_recipe(world["recipe"], world["approver"], name="Dr. Mira Approver", comment="RS-7")
    summary = run_lot(
        world["recipe"], world["lot"], world["runs"], trust=world["trust"], require_approved=True
    )
    events = RunFolder(summary.run_dir).events()
    assert [e["type"] for e in events[:4]] == ["run-start", "recipe", "lot", "recipe-approval"]
    event = events[3]
    assert event["sha256"] == events[1]["sha256"]
    assert (event["approver"], event["comment"], event["role"]) == (
        "Dr. Mira Approver",
        "RS-7",
        "approved",
    )
    assert event["key_file"] == "approver.pub"
    html = build_report(summary.run_dir).decode()
    assert "approved by Dr. Mira Approver at " + event["time_utc"] in html
    assert event["key"] in html


def test_without_require_a_missing_approval_is_noted_not_fatal(world: dict[str, Path]) -> None:
    summary = run_lot(world["recipe"], world["lot"], world["runs"], trust=world["trust"])
    assert summary.recipe_approval is None
    assert "no approval of this recipe revision" in summary.approval_note
    types = [e["type"] for e in RunFolder(summary.run_dir).events()]
    assert "recipe-approval" not in types


def test_changed_bytes_a_stranger_and_a_forged_approval_are_refused(
    world: dict[str, Path], tmp_path: Path
) -> None:
    recipe_path = world["recipe"]
    approve_recipe(recipe_path, world["approver"], name="Dr. Mira Approver")
    trust = load_trust(world["trust"])
    # a comment added after the approval changes the bytes: the revision needs a new approval
    recipe_path.write_text(RECORD_RECIPE + "# tidied\n")
    with pytest.raises(RecipeNotApproved, match="approves other bytes"):
        find_recipe_approval(load_recipe(recipe_path), trust)
    recipe_path.write_text(RECORD_RECIPE)
    approval = approval_path(load_recipe(recipe_path))
    document = json.loads(approval.read_text())
    forged = dict(document, approver="Someone Else")
    approval.write_text(json.dumps(forged))
    with pytest.raises(RecipeNotApproved, match="signature does not match"):
        find_recipe_approval(load_recipe(recipe_path), trust)
    approval.unlink()
    approve_recipe(recipe_path, world["stranger"], name="Not Trusted")
    with pytest.raises(RecipeNotApproved, match="not in the trust folder"):
        find_recipe_approval(load_recipe(recipe_path), trust)
    assert read_recipe_approval(approval).approver == "Not Trusted"


def test_an_invalid_recipe_is_never_approved(world: dict[str, Path], tmp_path: Path) -> None:
    bad = write_recipe(
        tmp_path, RECORD_RECIPE.replace("apply: measure", "apply: mesure"), "bad.yaml"
    )
    assert (
        _main("approve", str(bad), "--key", str(world["approver"]), "--name", "A") == EXIT_INVALID
    )
    assert not list(tmp_path.glob("*.approval.json"))


def test_a_private_key_in_the_trust_folder_is_refused(world: dict[str, Path]) -> None:
    (world["trust"] / "oops.pem").write_bytes(world["approver"].read_bytes())
    with pytest.raises(SigningError, match="a private key in the trust folder"):
        load_trust(world["trust"])


def test_cli_approve_recipe_and_require_approved(
    world: dict[str, Path], monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    recipe, lot, runs = str(world["recipe"]), str(world["lot"]), str(world["runs"])
    monkeypatch.setenv("LOTPROOF_TRUST", str(world["trust"]))
    assert _main("run", recipe, lot, "--out", runs, "--require-approved", "-q") == EXIT_INVALID
    assert "is not approved" in capsys.readouterr().err
    assert not world["runs"].exists()
    assert _main("approve", recipe, "--key", str(world["approver"]), "--role", "reviewed",
                 "--name", "A") == EXIT_INVALID  # fmt: skip
    assert _main("approve", recipe, "--key", str(world["approver"]), "--name", "Dr. A") == 0
    assert "spot-test r2 approved by Dr. A" in capsys.readouterr().out
    assert _main("run", recipe, lot, "--out", runs, "--require-approved", "--no-cache") == 0
    assert "recipe approved by Dr. A" in capsys.readouterr().out
