"""Malformed recipes: each gives exit 2 and a message at the right line, nothing runs."""

from __future__ import annotations

from pathlib import Path

import pytest

from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_INVALID, RecipeError
from lotproof.runner.recipe.load import load_recipe

BASE = """\
format: lotproof/1
name: disc-test
revision: 1
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background
    to: section
    features: dark
    radius: 10 um
  pores:
    apply: threshold
    to: level
    method: otsu
  stats:
    apply: measure
    to: pores
limits:
  porosity:
    value: stats.area_fraction
    max: 0.2
"""


def _edit(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new, 1)


# (case id, recipe text, expected line, expected text in the message)
CASES: list[tuple[str, str | bytes, int, str]] = [
    (
        "misspelt-method",
        _edit("method: otsu", "method: otsuu"),
        16,
        "'otsuu' is not one of 'fixed', 'otsu'",
    ),
    ("did-you-mean-method", _edit("method: otsu", "method: otsuu"), 16, "(did you mean 'otsu'?)"),
    ("bare-number-radius", _edit("radius: 10 um", "radius: 10"), 12, "write 3 px or 1.5 um"),
    (
        "area-for-length",
        _edit("radius: 10 um", "radius: 10 um2"),
        12,
        "is an area, but a length belongs here",
    ),
    ("negative-radius", _edit("radius: 10 um", "radius: -3 um"), 12, "must be > 0 um (got -3 um)"),
    ("unknown-unit", _edit("radius: 10 um", "radius: 10 inch"), 12, "unknown length unit 'inch'"),
    (
        "duplicate-key",
        _edit("    method: otsu\n", "    method: otsu\n    method: li\n"),
        17,
        "duplicate key 'method' (first at line 16)",
    ),
    (
        "unknown-kind",
        _edit("apply: threshold", "apply: threshhold"),
        14,
        "unknown step kind 'threshhold' (did you mean 'threshold'?)",
    ),
    (
        "unknown-parameter",
        _edit("    features: dark\n", "    featrues: dark\n"),
        11,
        "unknown key 'featrues' (did you mean 'features'?)",
    ),
    (
        "missing-reference",
        _edit("to: level", "to: levl"),
        15,
        "no input or step named 'levl' (did you mean 'level'?)",
    ),
    ("cycle", _edit("to: section", "to: pores"), 10, "steps form a cycle: level -> pores -> level"),
    (
        "table-into-erode",
        BASE.replace(
            "limits:", "  shrink:\n    apply: erode\n    to: stats\n    radius: 1 um\nlimits:"
        ),
        22,
        "erode takes image or mask, but 'stats' gives table",
    ),
    (
        "missing-format",
        BASE.replace("format: lotproof/1\n", ""),
        1,
        "missing required key 'format'",
    ),
    (
        "wrong-format",
        _edit("format: lotproof/1", "format: lotproof/2"),
        1,
        "'lotproof/2' is not a format this version reads",
    ),
    ("name-not-slug", _edit("name: disc-test", "name: Disc Test"), 2, "must be a slug"),
    (
        "limit-unknown-value",
        _edit("value: stats.area_fraction", "value: stats.porosity"),
        22,
        "step 'stats' (measure) gives no value 'porosity'",
    ),
    (
        "limit-bare-number-on-length",
        _edit("value: stats.area_fraction\n    max: 0.2", "value: stats.ecd_max\n    max: 60"),
        23,
        "write 60 um",
    ),
    (
        "limit-wrong-unit",
        _edit("value: stats.area_fraction\n    max: 0.2", "value: stats.ecd_max\n    max: 60 um2"),
        23,
        "unit 'um2' does not fit a value in um",
    ),
    (
        "limit-range-reversed",
        _edit("    max: 0.2", "    range: [0.3, 0.1]"),
        21,
        "the lower bound 0.3 is above the upper bound 0.1",
    ),
    ("limit-without-bound", _edit("    max: 0.2\n", ""), 21, "a limit needs min, max or range"),
    (
        "yaml11-yes-is-not-true",
        _edit("    method: otsu\n", "    method: otsu\n    keep: yes\n"),
        17,
        "true or false belongs here (got 'yes')",
    ),
    (
        "alias",
        _edit("    max: 0.2", "    max: &m 0.2\n  again:\n    value: stats.count\n    max: *m"),
        23,
        "anchors (&name) are not allowed",
    ),
    (
        "tab-indent",
        _edit("    method: otsu", "\tmethod: otsu"),
        16,
        "tab characters cannot indent YAML",
    ),
    ("two-documents", BASE + "---\nformat: lotproof/1\n", 24, "a recipe is one YAML document"),
    ("empty-file", "", 1, "the recipe is empty"),
    ("top-level-list", "- format: lotproof/1\n", 1, "a recipe is a mapping of keys"),
    ("syntax-error", _edit("    method: otsu", "    method: [otsu"), 17, "expected ',' or ']'"),
    ("not-utf8", BASE.encode() + b"# caf\xe9\n", 24, "not UTF-8 text (byte 0xe9)"),
    (
        "pixel-size-in-px",
        _edit("pixel_size: 0.5 um", "pixel_size: 1 px"),
        4,
        "the pixel size must be a physical length",
    ),
    ("step-without-to", _edit("    to: level\n", ""), 13, "missing required key 'to'"),
    ("nothing-to-run", BASE.split("  stats:")[0], 7, "nothing to run"),
    (
        "wrong-type-revision",
        _edit("revision: 1", "revision: four"),
        3,
        "a whole number belongs here",
    ),
    (
        "name-with-dot",
        _edit("  pores:\n", "  po.res:\n").replace("to: pores", "to: po.res"),
        13,
        "'po.res' is not a valid name",
    ),
]


@pytest.mark.parametrize(
    ("text", "line", "message"), [c[1:] for c in CASES], ids=[c[0] for c in CASES]
)
def test_malformed_recipe_exit_2_with_position(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], text: str | bytes, line: int, message: str
) -> None:
    path = tmp_path / "recipe.yaml"
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    with pytest.raises(SystemExit) as exit_info:
        main(["check", str(path)])
    assert exit_info.value.code == EXIT_INVALID
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err
    matching = [row for row in captured.err.splitlines() if message in row]
    assert matching, captured.err
    assert matching[0].startswith(f"{path}:{line}:"), matching[0]


def test_all_problems_are_reported_at_once(tmp_path: Path) -> None:
    text = _edit("method: otsu", "method: otsuu").replace("radius: 10 um", "radius: 10")
    path = tmp_path / "two.yaml"
    path.write_text(text)
    with pytest.raises(RecipeError) as err:
        load_recipe(path)
    lines = [p.line for p in err.value.problems]
    assert lines == [12, 16]
    assert err.value.problems[0].where == "steps.level.radius"
    assert err.value.problems[1].where == "steps.pores.method"


def test_run_with_invalid_recipe_writes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    recipe = tmp_path / "bad.yaml"
    recipe.write_text(_edit("method: otsu", "method: nope"))
    lot = tmp_path / "lot"
    lot.mkdir()
    out = tmp_path / "runs"
    with pytest.raises(SystemExit) as exit_info:
        main(["run", str(recipe), str(lot), "--out", str(out)])
    assert exit_info.value.code == EXIT_INVALID
    assert not out.exists()


def test_valid_base_recipe_checks(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    path = tmp_path / "ok.yaml"
    path.write_text(BASE)
    with pytest.raises(SystemExit) as exit_info:
        main(["check", str(path)])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    assert "disc-test r1" in out and "subtract-background" in out


def test_error_attributes_are_structured(tmp_path: Path) -> None:
    path = tmp_path / "r.yaml"
    path.write_text(_edit("radius: 10 um", "radius: -3 um"))
    with pytest.raises(RecipeError) as err:
        load_recipe(path)
    (problem,) = err.value.problems
    assert (problem.file, problem.line, problem.column) == (str(path), 12, 13)
    assert problem.where == "steps.level.radius"
    assert str(problem) == f"{path}:12:13: steps.level.radius: must be > 0 um (got -3 um)"
