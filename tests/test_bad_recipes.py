"""The bad recipes of tests/bad_inputs/recipes/: exit 2, a positioned message, nothing written.

Every ``*.yaml`` file there is a broken recipe. Its first line says what lotproof
must answer::

    # expect: LINE:COL: text that must appear in the message

A file that cannot carry that line (an empty file, a file in UTF-16) has its
expectation in ``EXPECTED.json`` instead (``{"line", "column", "message"}``); an
entry ``{"xfail": "reason"}`` there marks a message known to be wrong, so its
test is a strict xfail until the message is fixed.

Each file is checked twice, through the command line as a user runs it:
``lotproof check FILE`` and ``lotproof run FILE LOT --out OUT --cache CACHE``.
Both must end with exit code 2, print ``FILE:LINE:COL: ... message`` on stderr,
print no traceback, and ``run`` must leave neither OUT nor CACHE behind.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import tifffile

from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INVALID, EXIT_OK, RecipeError
from lotproof.runner.recipe.load import load_recipe

from _builders import write_lot

FOLDER = Path(__file__).parent / "bad_inputs" / "recipes"
SIDECAR = FOLDER / "EXPECTED.json"
_HEADER = re.compile(rb"^# expect: (\d+)(?::(\d+))?: (.+)\n")


@dataclass(frozen=True)
class Expectation:
    line: int
    column: int | None
    message: str
    xfail: str | None = None


def expectations() -> dict[str, Expectation]:
    """Every bad recipe file and what it must give (also used by tests/reliability_table.py)."""
    sidecar = json.loads(SIDECAR.read_text(encoding="utf-8"))
    found: dict[str, Expectation] = {}
    for path in sorted(FOLDER.glob("*.yaml")):
        entry = sidecar.get(path.name, {})
        match = _HEADER.match(path.read_bytes())
        if match:
            line, column, message = match.groups()
            found[path.name] = Expectation(
                int(line),
                int(column) if column else None,
                message.decode("utf-8"),
                entry.get("xfail"),
            )
        else:
            found[path.name] = Expectation(
                entry["line"], entry.get("column"), entry["message"], entry.get("xfail")
            )
    return found


EXPECTED = expectations()
NAMES = sorted(EXPECTED)


def _marked(names: list[str]) -> list[object]:
    return [
        pytest.param(n, marks=pytest.mark.xfail(strict=True, reason=EXPECTED[n].xfail))
        if EXPECTED[n].xfail
        else n
        for n in names
    ]


def test_the_folder_holds_at_least_40_bad_recipes_each_with_one_expectation() -> None:
    assert len(NAMES) >= 40
    sidecar = json.loads(SIDECAR.read_text(encoding="utf-8"))
    assert set(sidecar) <= set(NAMES), "EXPECTED.json names a file that does not exist"
    for name, entry in sidecar.items():
        has_header = _HEADER.match((FOLDER / name).read_bytes()) is not None
        # an expectation lives in one place only; the sidecar may add an xfail reason
        assert has_header != ("message" in entry), name


def _lot(tmp_path: Path) -> Path:
    # any readable image will do: the recipe is refused before the lot is read
    return write_lot(tmp_path, {"a.tif": np.arange(64 * 64, dtype=np.uint16).reshape(64, 64)})


def _tree_digest(folder: Path) -> str:
    digest = hashlib.sha256()
    for path in sorted(folder.rglob("*")):
        digest.update(path.relative_to(folder).as_posix().encode() + b"\0")
        if path.is_file():
            digest.update(path.read_bytes())
    return digest.hexdigest()


def _exit_code(argv: list[str]) -> int | str | None:
    with pytest.raises(SystemExit) as ended:
        main(argv)
    return ended.value.code


def _positioned(err: str, path: Path, expected: Expectation) -> list[str]:
    """Lines of ``err`` that carry the expected position and text."""
    where = f"{path}:{expected.line}:" + (f"{expected.column}:" if expected.column else "")
    return [row for row in err.splitlines() if row.startswith(where) and expected.message in row]


@pytest.mark.parametrize("name", NAMES)
def test_check_exits_2_without_traceback(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    path = FOLDER / name
    assert _exit_code(["check", str(path)]) == EXIT_INVALID
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err + captured.out
    assert "internal error" not in captured.err
    assert re.search(rf"^{re.escape(str(path))}:\d+:\d+: ", captured.err, re.M), captured.err
    assert "nothing was run" in captured.err


@pytest.mark.parametrize("name", _marked(NAMES))
def test_check_message_names_the_problem_at_its_position(
    name: str, capsys: pytest.CaptureFixture[str]
) -> None:
    path = FOLDER / name
    assert _exit_code(["check", str(path)]) == EXIT_INVALID
    err = capsys.readouterr().err
    assert _positioned(err, path, EXPECTED[name]), err


@pytest.mark.parametrize("name", NAMES)
def test_run_exits_2_and_writes_nothing(
    name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = FOLDER / name
    _exit_code(["check", str(path)])
    checked = capsys.readouterr().err
    lot = _lot(tmp_path)
    before = _tree_digest(lot)
    out, cache = tmp_path / "runs", tmp_path / "cache"
    code = _exit_code(
        ["run", str(path), str(lot), "--out", str(out), "--cache", str(cache), "-j", "1"]
    )
    assert code == EXIT_INVALID
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err + captured.out
    assert not out.exists() and not cache.exists()
    assert _tree_digest(lot) == before
    # the same problems as `check`, at the expected position
    assert captured.err == checked
    expected = EXPECTED[name]
    where = f"{path}:{expected.line}:" + (f"{expected.column}:" if expected.column else "")
    assert any(row.startswith(where) for row in captured.err.splitlines()), captured.err


@pytest.mark.parametrize("name", NAMES)
def test_the_error_carries_its_pieces_as_attributes(name: str) -> None:
    with pytest.raises(RecipeError) as err:
        load_recipe(FOLDER / name)
    problems = err.value.problems
    assert problems and all(p.file == str(FOLDER / name) for p in problems)
    assert all(p.line >= 1 and p.column >= 1 for p in problems)
    assert [(p.line, p.column) for p in problems] == sorted((p.line, p.column) for p in problems)


def test_check_json_lists_the_problems(capsys: pytest.CaptureFixture[str]) -> None:
    path = FOLDER / "cycle.yaml"
    assert _exit_code(["check", "--json", str(path)]) == EXIT_INVALID
    document = json.loads(capsys.readouterr().out)
    assert document["ok"] is False
    assert {
        "file": str(path),
        "line": 11,
        "column": 9,
        "where": "steps.level.to",
        "what": "steps form a cycle: level -> pores -> stats -> level",
    } in document["problems"]


# ---------------------------------------------------------------- a recipe that does not fit its lot

FROM_IMAGE = """\
format: lotproof/1
name: from-image-test
revision: 1
pixel_size: from-image
inputs:
  section: "*.tif"
steps:
  pores:
    apply: threshold
    to: section
    method: otsu
  stats:
    apply: measure
    to: pores
limits:
  porosity:
    value: stats.area_fraction
    max: 0.9
"""


def test_from_image_recipe_on_uncalibrated_images_is_incomplete_never_pass(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # A valid recipe that cannot be known wrong before the lot is read: `check`
    # passes, the run marks every uncalibrated image incomplete and exits 3.
    recipe = tmp_path / "from-image.yaml"
    recipe.write_text(FROM_IMAGE)
    assert _exit_code(["check", str(recipe)]) == EXIT_OK
    lot = tmp_path / "lot"
    lot.mkdir()
    image = np.zeros((32, 32), np.uint8)
    image[8:16, 8:16] = 200
    tifffile.imwrite(lot / "plain.tif", image)  # no resolution tags
    tifffile.imwrite(lot / "screen.tif", image, resolution=(72, 72))  # 72 dpi: not a calibration
    capsys.readouterr()
    out = tmp_path / "runs"
    code = _exit_code(["run", str(recipe), str(lot), "--out", str(out), "--no-cache", "-j", "1"])
    assert code == EXIT_BAD_INPUT
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err
    (run,) = [p for p in out.iterdir() if p.is_dir()]  # beside them: the catalogue
    rows = (run / "images.csv").read_text().splitlines()
    assert len(rows) == 3
    for row in rows[1:]:
        assert ",incomplete," in row and "pixel_size: from-image" in row, row
    verdicts = json.loads((run / "verdicts.json").read_text())
    assert verdicts["lot_verdict"] != "pass"
    assert set(verdicts["image_verdicts"].values()) == {"incomplete"}
