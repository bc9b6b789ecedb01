"""Lot details on the run: a lot sheet and options, recorded in the ledger and verdicts.json."""

from __future__ import annotations

import getpass
import json
from pathlib import Path

import pytest

from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID
from lotproof.runner.evaluate.cache import DiskStore
from lotproof.runner.recipe.lotsheet import (
    LOT_FIELDS,
    LotDetailsError,
    LotSheetError,
    find_lot_sheet,
    lot_details,
    read_lot_sheet,
)
from lotproof.runner.record.ledger import EVENT_TYPES
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run

from _builders import RECORD_RECIPE, spot_column, spot_lot, write_recipe

SHEET = """\
# the lot's details
customer: Example Filters Ltd
order: "0412"
specification: EF-SPEC-114 rev C
sample: 2 discs from the middle of the batch
note: |
  discs polished twice
  second line
"""


def _events(run: Path) -> list[dict]:
    return RunFolder(run).events()


def test_a_sheet_in_the_lot_folder_is_read(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1])
    (lot / "lot.yaml").write_text(SHEET)
    details = lot_details(lot)
    assert details.customer == "Example Filters Ltd"
    assert details.order == "0412"  # quoted: text, with its leading zero
    assert details.specification == "EF-SPEC-114 rev C"
    assert details.note == "discs polished twice\nsecond line"
    assert details.operator == getpass.getuser()  # the login name by default
    assert details.lot_id == "lot"
    assert details.sheet is not None and details.sheet.endswith("lot/lot.yaml")
    assert details.sheet_sha256 is not None and len(details.sheet_sha256) == 64


def test_a_sheet_beside_the_lot_folder_is_read(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1], name="FD-1")
    (tmp_path / "FD-1.lot.yaml").write_text("customer: Beside Ltd\n")
    assert find_lot_sheet(lot) == tmp_path / "FD-1.lot.yaml"
    assert lot_details(lot).customer == "Beside Ltd"


def test_two_sheets_are_refused(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1], name="FD-1")
    (lot / "lot.yaml").write_text("customer: A\n")
    (tmp_path / "FD-1.lot.yaml").write_text("customer: B\n")
    with pytest.raises(LotSheetError, match="a second lot sheet"):
        lot_details(lot)


def test_options_replace_the_sheet_and_the_default_operator(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1])
    (lot / "lot.yaml").write_text(SHEET)
    details = lot_details(
        lot, options={"customer": "Other Co", "operator": "J. Tech", "order": None}, station="B2"
    )
    assert details.customer == "Other Co"
    assert details.order == "0412"  # an option not given keeps the sheet's value
    assert details.operator == "J. Tech"
    assert details.station == "B2"


@pytest.mark.parametrize(
    ("text", "line", "column", "what"),
    [
        ("customer: A\ncustomr: B\n", 2, 1, "unknown key 'customr' (did you mean 'customer'?)"),
        ("order: 0412\n", 1, 8, 'write it in quotes, order: "..."'),
        ("customer: A\ncustomer: B\n", 2, 1, "duplicate key"),
        ("sample: [1, 2]\n", 1, 9, "text belongs here"),
        ("customer: ''\n", 1, 11, "empty"),
        ("customer: A\n  bad: indentation\n", 2, 6, ""),
        ("- a list\n", 1, 1, "a lot sheet is a mapping"),
        ("format: lotproof-lot/2\n", 1, 9, "is not one of 'lotproof-lot/1'"),
    ],
)
def test_sheet_problems_name_line_and_column(
    tmp_path: Path, text: str, line: int, column: int, what: str
) -> None:
    sheet = tmp_path / "lot.yaml"
    sheet.write_text(text)
    with pytest.raises(LotSheetError) as err:
        read_lot_sheet(sheet)
    first = err.value.problems[0]
    assert (first.file, first.line, first.column) == (str(sheet), line, column), first
    assert what in first.what


def test_an_option_that_is_not_text_for_a_certificate_is_refused(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1])
    with pytest.raises(LotDetailsError, match="--spec: one line"):
        lot_details(lot, options={"specification": "A\nB"})
    with pytest.raises(LotDetailsError, match="--customer: at most 200 characters"):
        lot_details(lot, options={"customer": "x" * 201})
    with pytest.raises(LotDetailsError, match="--station: control characters"):
        lot_details(lot, station="bench\x07")


def test_the_lot_event_follows_the_recipe_event_and_verdicts_json_has_the_details(
    tmp_path: Path,
) -> None:
    lot = spot_lot(tmp_path, [1, 2], draw=spot_column)
    (lot / "lot.yaml").write_text(SHEET)
    run = run_lot(write_recipe(tmp_path, RECORD_RECIPE), lot, tmp_path / "runs").run_dir
    events = _events(run)
    assert [e["type"] for e in events[:3]] == ["run-start", "recipe", "lot"]
    assert EVENT_TYPES.index("lot") == EVENT_TYPES.index("recipe") + 1
    lot_event = events[2]
    # the names the lot catalogue reads
    for name in ("customer", "order", "specification", "operator", "sample", "note"):
        assert name in lot_event
    assert lot_event["customer"] == "Example Filters Ltd"
    assert lot_event["station"] is None
    assert lot_event["sheet"]["sha256"] == lot_details(lot).sheet_sha256
    verdicts = json.loads((run / "verdicts.json").read_text())
    assert verdicts["lot"] == {
        "lot_id": "lot",
        **{name: lot_event[name] for name in LOT_FIELDS},
        "station": None,
    }
    # the sheet is not an image of the lot, even for a pattern that matches every file
    assert {e["image"] for e in events if e["type"] == "image"} == {"disc-00.tif", "disc-01.tif"}
    assert verify_run(run).status == "intact"


def test_the_sheet_is_never_an_image_of_the_lot(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1], draw=spot_column)
    (lot / "lot.yaml").write_text(SHEET)
    recipe = write_recipe(tmp_path, RECORD_RECIPE.replace('"*.tif"', '"*"'))
    summary = run_lot(recipe, lot, tmp_path / "runs")
    assert [r.id for r in summary.results] == ["disc-00.tif"]
    assert summary.results[0].status == "ok"


def test_nothing_of_the_details_enters_a_cache_key(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1, 2], draw=spot_column)
    recipe = write_recipe(tmp_path, RECORD_RECIPE)
    store = DiskStore(tmp_path / "cache")
    first = run_lot(recipe, lot, tmp_path / "runs", store=store)
    (lot / "lot.yaml").write_text(SHEET)
    second = run_lot(recipe, lot, tmp_path / "runs", store=store)
    keys = [[(s.step, s.key) for s in r.steps] for r in first.results]
    assert keys == [[(s.step, s.key) for s in r.steps] for r in second.results]
    assert second.step_counts()["computed"] == 0  # everything reused
    assert first.details is not None and first.details.customer is None
    assert second.details is not None and second.details.customer == "Example Filters Ltd"


def test_cli_options_and_an_invalid_sheet(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    lot = spot_lot(tmp_path, [1], draw=spot_column)
    recipe = write_recipe(tmp_path, RECORD_RECIPE)
    with pytest.raises(SystemExit) as done:
        main(
            [
                "run",
                str(recipe),
                str(lot),
                "--out",
                str(tmp_path / "runs"),
                "--no-cache",
                "--quiet",
                "--customer",
                "Example Filters Ltd",
                "--order",
                "PO-1",
                "--spec",
                "EF-SPEC-114 rev C",
                "--sample",
                "one disc",
                "--operator",
                "J. Tech",
                "--note",
                "by the options",
                "--station",
                "QC bench 2",
            ]
        )
    assert done.value.code == 0
    (run,) = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    event = _events(run)[2]
    assert (event["customer"], event["order"], event["specification"]) == (
        "Example Filters Ltd",
        "PO-1",
        "EF-SPEC-114 rev C",
    )
    assert (event["sample"], event["operator"], event["note"], event["station"]) == (
        "one disc",
        "J. Tech",
        "by the options",
        "QC bench 2",
    )
    capsys.readouterr()
    (lot / "lot.yaml").write_text("customer: A\nPO: 12\n")
    with pytest.raises(SystemExit) as done:
        main(["run", str(recipe), str(lot), "--out", str(tmp_path / "again"), "--quiet"])
    assert done.value.code == EXIT_INVALID
    err = capsys.readouterr().err
    assert f"{lot / 'lot.yaml'}:2:1: PO: unknown key 'PO'" in err
    assert not (tmp_path / "again").exists()  # nothing ran


def test_the_station_comes_from_the_environment(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    lot = spot_lot(tmp_path, [1], draw=spot_column)
    recipe = write_recipe(tmp_path, RECORD_RECIPE)
    monkeypatch.setenv("LOTPROOF_STATION", "QC microscope 3")
    with pytest.raises(SystemExit):
        main(["run", str(recipe), str(lot), "--out", str(tmp_path / "runs"), "--quiet"])
    (run,) = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    assert _events(run)[2]["station"] == "QC microscope 3"


def test_a_rerun_records_the_same_lot_details(tmp_path: Path) -> None:
    from lotproof.runner.jobs.rerun import rerun

    lot = spot_lot(tmp_path, [1, 2], draw=spot_column)
    (lot / "lot.yaml").write_text(SHEET)
    run = run_lot(write_recipe(tmp_path, RECORD_RECIPE), lot, tmp_path / "runs").run_dir
    (lot / "lot.yaml").write_text("customer: Changed since\n")  # a rerun reads no lot sheet
    report = rerun(run, out=tmp_path / "reruns")
    assert report.identical
    again = _events(report.rerun.run_dir)[2]
    before = _events(run)[2]
    for name in ("customer", "order", "specification", "sample", "note", "sheet"):
        assert again[name] == before[name], name
