"""Validation studies: the plan's checks, the moved recipes, the study folder, the cache, the CLI.

The studies here are small and exact: every image is a 32 x 32 field of 4 x 4 bright squares
(and one 2 x 2 speck), so the recipe measures an area fraction of exactly n / 64 and every
statistic can be checked against the designed numbers.
"""

from __future__ import annotations

import csv
import json
import re
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import tifffile

from lotproof.runner.cli.main import main
from lotproof.runner.errors import InputError
from lotproof.runner.evaluate.cache import DiskStore, NullStore
from lotproof.runner.record.layout import (
    LEDGER_FILE,
    LEDGER_SUM_FILE,
    MEASUREMENTS_FILE,
    PLAN_FILE,
    REPORT_FILE,
    SUMS_FILE,
    VALIDATION_FILE,
)
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run
from lotproof.runner.study import stats
from lotproof.runner.study.criteria import Criterion, judge, parse_rule, study_verdict
from lotproof.runner.study.plan import PlanError, load_plan
from lotproof.runner.study.run import run_study
from lotproof.runner.study.variants import MoveError, build_move

RECIPE = """\
format: lotproof/1
name: squares
revision: 1
summary: area fraction of bright squares
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background   # keeps the squares, removes the field
    to: section
    features: bright
    footprint: disk
    radius: 4 px
  spots:
    apply: threshold
    to: level
    method: fixed
    level: 100
  clean:
    apply: open                  # removes the 2 x 2 speck, keeps the 4 x 4 squares
    to: spots
    footprint: disk
    radius: 1.5 px
  stats:
    apply: measure
    to: clean
    connectivity: 8
limits:
  fraction:
    value: stats.area_fraction
    range: [0.01, 0.2]
"""

#: squares per image: part -> operator -> replicates
DESIGN = {
    "P1": {"A": [3, 4], "B": [4, 4]},
    "P2": {"A": [6, 6], "B": [7, 6]},
    "P3": {"A": [9, 10], "B": [9, 9]},
    "P4": {"A": [12, 12], "B": [12, 11]},
}
#: references: name -> (squares, the known value's offset below n / 64 per image)
REFERENCES = {
    "R1": (4, [0.001, 0.002, 0.0015]),
    "R2": (8, [0.0005, -0.0005, 0.001]),
    "R3": (12, [0.002, 0.003, 0.0025]),
}


def squares(n: int, mark: int) -> np.ndarray:
    """32 x 32 uint8: ``n`` bright 4 x 4 squares on a 4 x 4 grid of pitch 8, and a 2 x 2 speck.

    One corner pixel is ``20 + mark``, far below the threshold: no two images have the same
    bytes, so no image takes another's results from the cache.
    """
    image = np.full((32, 32), 20, np.uint8)
    for i in range(n):
        y, x = 2 + 8 * (i // 4), 2 + 8 * (i % 4)
        image[y : y + 4, x : x + 4] = 200
    image[7:9, 7:9] = 200
    image[31, 0] = 20 + mark
    return image


def _tiff(path: Path, image: np.ndarray) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, image, metadata=None, software=False, datetime=False)


PLAN = """\
format: lotproof-study/1
name: squares-validation
revision: 1
summary: {summary}
recipe: recipe.yaml
values: [stats.area_fraction]
precision:
  folder: precision
  table: precision.csv
trueness:
  folder: reference
  table: reference.csv
  source: constructed
robustness:
  parameters:
    clean.radius: ±0.5 px
    spots.level: ±10 %
criteria:
  gauge: "%GRR of tolerance <= 50"
  categories: ndc >= 2
  trueness: "|bias| <= 5 % of reference"
{extra}"""


def make_study(
    folder: Path, *, extra: str = "  robust: no verdict flips\n", summary: str = "squares"
) -> Path:
    """A study folder tree: recipe, plan, design tables and images; returns the plan's path."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "recipe.yaml").write_text(RECIPE, encoding="utf-8")
    rows = [["image", "part", "operator", "replicate"]]
    for part, operators in DESIGN.items():
        for operator, counts in operators.items():
            for replicate, n in enumerate(counts, 1):
                name = f"{operator}/{part}-{replicate}.tif"
                _tiff(folder / "precision" / name, squares(n, len(rows)))
                rows.append([name, part, operator, str(replicate)])
    with open(folder / "precision.csv", "w", newline="", encoding="utf-8") as handle:
        csv.writer(handle, lineterminator="\n").writerows(rows)
    rows = [["image", "reference", "stats.area_fraction [-]"]]
    for reference, (n, offsets) in REFERENCES.items():
        for i, offset in enumerate(offsets, 1):
            name = f"{reference}-{i}.tif"
            _tiff(folder / "reference" / name, squares(n, 20 + len(rows)))
            rows.append([name, reference, repr(n / 64 - offset)])
    with open(folder / "reference.csv", "w", newline="", encoding="utf-8") as handle:
        csv.writer(handle, lineterminator="\n").writerows(rows)
    plan = folder / "plan.yaml"
    plan.write_text(PLAN.format(extra=extra, summary=summary), encoding="utf-8")
    return plan


def designed() -> np.ndarray:
    return np.array([list(ops.values()) for ops in DESIGN.values()]) / 64


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """One study run with a fresh disk cache, shared by the tests that only read it."""
    root = tmp_path_factory.mktemp("study")
    plan = make_study(root / "plan")
    cache = DiskStore(root / "cache")
    summary = run_study(plan, root / "out", store=cache)
    return {"root": root, "plan": plan, "cache": cache, "summary": summary}


# ---------------------------------------------------------------- the folder


def test_the_study_folder_verifies_and_holds_every_file(study: dict[str, Any]) -> None:
    summary = study["summary"]
    report = verify_run(summary.study_dir)
    assert report.status == "intact", report.problems
    assert report.seal == summary.seal
    names = {p.relative_to(summary.study_dir).as_posix() for p in summary.study_dir.rglob("*")}
    for name in (
        PLAN_FILE,
        "recipe.yaml",
        MEASUREMENTS_FILE,
        VALIDATION_FILE,
        "robustness.csv",
        REPORT_FILE,
        SUMS_FILE,
        "design/precision.csv",
        "design/trueness.csv",
        "variants/clean.radius.minus.yaml",
        "variants/spots.level.plus.yaml",
    ):
        assert name in names, name
    assert (summary.study_dir / PLAN_FILE).read_bytes() == study["plan"].read_bytes()


def test_measurements_are_the_designed_values(study: dict[str, Any]) -> None:
    header, rows = RunFolder(study["summary"].study_dir).csv(MEASUREMENTS_FILE)
    assert header[:9] == [
        "set",
        "image",
        "status",
        "verdict",
        "reason",
        "part",
        "operator",
        "replicate",
        "reference",
    ]
    assert "stats.area_fraction [-]" in header and "known stats.area_fraction [-]" in header
    at = header.index("stats.area_fraction [-]")
    precision = [r for r in rows if r[0] == "precision"]
    assert len(precision) == 16 and all(r[2] == "ok" for r in rows)
    for row in precision:
        part, operator, replicate = row[5], row[6], int(row[7])
        assert float(row[at]) == DESIGN[part][operator][replicate - 1] / 64


def test_the_statistics_are_those_of_the_designed_values(study: dict[str, Any]) -> None:
    doc = study["summary"].validation["values"]["stats.area_fraction"]
    expected = stats.gauge_rr(designed(), tolerance=0.2 - 0.01).as_dict()
    for key in ("repeatability_sd", "reproducibility_sd", "grr_sd", "part_sd", "ndc", "anova"):
        assert doc[key] == expected[key], key
    assert doc["tolerance_source"].startswith("the recipe's limit 'fraction'")
    biases = {b["name"]: b for b in doc["bias"]}
    for reference, (n, offsets) in REFERENCES.items():
        known = [n / 64 - o for o in offsets]
        result = stats.bias_test([n / 64] * len(known), known)
        assert biases[reference]["bias"] == pytest.approx(result.bias, abs=1e-15)
        assert biases[reference]["ci_low"] == pytest.approx(result.ci_low, abs=1e-15)
    assert doc["linearity"]["n"] == 9


def test_robustness_finds_the_sensitive_parameter(study: dict[str, Any]) -> None:
    doc = study["summary"].validation
    clean = doc["robustness"]["parameters"]["clean.radius"]
    # 2 px removes every 4 x 4 square (0 is below the limit); at 1 px the disk is a cross,
    # which removes the 2 x 2 speck as 1.5 px does and cuts the 4 corners of each square
    # (0.5 px would be a single pixel: no recipe may have that)
    assert clean["plus"]["value"] == "2 px" and clean["minus"]["value"] == "1 px"
    change = clean["changes"]["stats.area_fraction"]
    assert change["minus_shift"] < 0
    assert len(clean["flips"]) == 16 + 9  # every image passed as written and fails at 2 px
    assert all(f["plus"] == "fail" and f["baseline"] == "pass" for f in clean["flips"])
    level = doc["robustness"]["parameters"]["spots.level"]
    assert level["flips"] == [] and level["changes"]["stats.area_fraction"]["change_per_step"] == 0
    assert doc["criteria"]["robust"]["verdict"] == "fail"
    assert doc["verdict"] == "fail" and study["summary"].exit_code == 1


def test_a_moved_parameter_recomputes_only_the_steps_after_it(study: dict[str, Any]) -> None:
    events = RunFolder(study["summary"].study_dir).ledger_events()
    steps = [e for e in events if e["type"] == "step"]
    computed: dict[str, set[str]] = {}
    for event in steps:
        if event["cache"] == "computed":
            computed.setdefault(event["variant"], set()).add(event["step"])
    assert computed["baseline"] == {"level", "spots", "clean", "stats"}
    # the opening moved: the background and the threshold come from the cache
    assert computed["clean.radius minus"] == computed["clean.radius plus"] == {"clean", "stats"}
    assert computed["spots.level minus"] == {"spots", "clean", "stats"}
    counts = study["summary"].steps
    images = 16 + 9
    assert counts["baseline"] == {"computed": 4 * images, "reused": 0}
    assert counts["clean.radius plus"] == {"computed": 2 * images, "reused": 2 * images}


def test_without_a_cache_every_step_is_computed(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan")
    summary = run_study(plan, tmp_path / "out", store=NullStore())
    assert all(c["reused"] == 0 for c in summary.steps.values())


def test_the_ledger_records_plan_variants_criteria_and_verdict(study: dict[str, Any]) -> None:
    summary = study["summary"]
    events = RunFolder(summary.study_dir).ledger_events()
    types = [e["type"] for e in events]
    assert types[:3] == ["run-start", "plan", "recipe"]
    assert types[-1] == "run-end" and events[-1]["exit_code"] == 1
    plan_event = events[1]
    assert plan_event["sha256"] == summary.plan.sha256
    variants = [e for e in events if e["type"] == "variant"]
    assert {(e["parameter"], e["direction"]) for e in variants} == {
        ("clean.radius", "minus"),
        ("clean.radius", "plus"),
        ("spots.level", "minus"),
        ("spots.level", "plus"),
    }
    inputs = [e for e in events if e["type"] == "input"]
    assert len(inputs) == 25 and len({e["image"] for e in inputs}) == 25
    criteria = {e["criterion"]: e["verdict"] for e in events if e["type"] == "criterion"}
    assert criteria == {k: v["verdict"] for k, v in summary.validation["criteria"].items()}
    assert [e["verdict"] for e in events if e["type"] == "study-verdict"] == ["fail"]


def test_an_altered_study_folder_is_found(study: dict[str, Any], tmp_path: Path) -> None:
    copy = tmp_path / study["summary"].study_dir.name
    shutil.copytree(study["summary"].study_dir, copy)
    document = json.loads((copy / VALIDATION_FILE).read_text(encoding="utf-8"))
    document["verdict"] = "pass"
    (copy / VALIDATION_FILE).write_text(json.dumps(document), encoding="utf-8")
    report = verify_run(copy)
    assert report.status == "altered"
    assert any(p.startswith(f"{VALIDATION_FILE}:") for p in report.problems)


def test_verify_checks_the_plan_against_its_event(study: dict[str, Any], tmp_path: Path) -> None:
    # a plan swapped together with its output event and SHA256SUMS line still differs from
    # the plan event: verify names it
    copy = tmp_path / study["summary"].study_dir.name
    shutil.copytree(study["summary"].study_dir, copy)
    lines = (copy / LEDGER_FILE).read_bytes().splitlines()
    events = [json.loads(line) for line in lines]
    plan_at = next(i for i, e in enumerate(events) if e["type"] == "plan")
    events[plan_at]["sha256"] = "0" * 64
    from lotproof.runner.record.ledger import GENESIS, canonical, line_hash

    previous = GENESIS
    rebuilt = []
    for event in events:
        event["prev"] = previous
        line = canonical(event)
        previous = line_hash(line)
        rebuilt.append(line)
    (copy / LEDGER_FILE).write_bytes(b"\n".join(rebuilt) + b"\n")
    report = verify_run(copy)
    assert report.status == "altered"
    assert "plan.yaml: its output sha256 differs from the plan event's sha256" in report.problems


def test_the_same_plan_gives_the_same_files_again(study: dict[str, Any]) -> None:
    # a second run over the same plan and images, the cache now warm: every file but the
    # ledger (times, host, cache use) is the same, and the report differs only in its time
    again = run_study(study["plan"], study["root"] / "again", store=study["cache"])
    first = study["summary"].study_dir
    assert sum(c["computed"] for c in again.steps.values()) == 0
    names = sorted(p.relative_to(first).as_posix() for p in first.rglob("*") if p.is_file())
    assert names == sorted(
        p.relative_to(again.study_dir).as_posix() for p in again.study_dir.rglob("*") if p.is_file()
    )
    timeless = re.compile(rb'<time class="study-time">[^<]*</time>')
    for name in names:
        a, b = (first / name).read_bytes(), (again.study_dir / name).read_bytes()
        if name in (LEDGER_FILE, LEDGER_SUM_FILE):  # times: the ledger, and its digest
            assert a != b
        elif name == REPORT_FILE:
            assert a != b and timeless.sub(b"", a) == timeless.sub(b"", b)
        elif name == SUMS_FILE:
            differ = [x for x, y in zip(a.splitlines(), b.splitlines(), strict=True) if x != y]
            assert [line.split()[1] for line in differ] == [REPORT_FILE.encode()]
        else:
            assert a == b, name


def test_the_report_escapes_the_plan_and_shows_the_verdict(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan", summary="'<script>alert(1)</script>'")
    summary = run_study(plan, tmp_path / "out")
    html = (summary.study_dir / REPORT_FILE).read_text(encoding="utf-8")
    assert "<script>" not in html and "&lt;script&gt;" in html
    assert 'id="study-verdict" data-verdict="fail"' in html
    assert 'data-criterion="robust" data-verdict="fail"' in html
    assert 'data-parameter="clean.radius" data-flips="25"' in html
    assert "support, and do not replace" in html
    assert summary.validation["caution"].startswith("These results support, and do not replace")


# ---------------------------------------------------------------- bad data


def test_an_image_that_cannot_be_analysed_makes_the_study_incomplete(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan", extra="")
    (tmp_path / "plan" / "precision" / "A" / "P2-1.tif").write_bytes(b"not an image at all")
    summary = run_study(plan, tmp_path / "out")
    assert summary.exit_code == 3
    assert summary.validation["verdict"] == "incomplete"
    assert "precision/A/P2-1.tif" in summary.validation["images"]["incomplete"]
    doc = summary.validation["values"]["stats.area_fraction"]
    assert doc["grr_sd"] is None and "not computed" in doc["precision_problem"]
    assert summary.validation["criteria"]["gauge"]["verdict"] == "incomplete"
    assert verify_run(summary.study_dir).status == "intact"


def test_a_missing_image_is_bad_input_and_nothing_runs(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan")
    (tmp_path / "plan" / "reference" / "R2-2.tif").unlink()
    with pytest.raises(InputError, match=r"R2-2\.tif"):
        run_study(plan, tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_the_study_never_writes_into_its_images(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan")
    with pytest.raises(ValueError, match="never writes into the images"):
        run_study(plan, tmp_path / "plan" / "precision" / "out")


def test_a_passing_study_exits_0(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan", extra="")
    summary = run_study(plan, tmp_path / "out")
    assert summary.validation["verdict"] == "pass" and summary.exit_code == 0


# ---------------------------------------------------------------- the plan's checks


def _problems(plan: Path) -> list[str]:
    with pytest.raises(PlanError) as info:
        load_plan(plan)
    return [str(p) for p in info.value.problems]


@pytest.mark.parametrize(
    ("edit", "expected"),
    [
        (
            ("format: lotproof-study/1", "format: lotproof-study/9"),
            r":1:9: format: .*lotproof-study/1",
        ),
        (
            ("summary:", "sumary:"),
            r":4:1: sumary: unknown key 'sumary' \(did you mean 'summary'\?\)",
        ),
        (
            ("[stats.area_fraction]", "[stats.area_fractio]"),
            r":6:10: values\.0: .*did you mean 'area_fraction'",
        ),
        (
            ("clean.radius: ±0.5 px", "clean.radius: ±1"),
            r":16:19: robustness\.parameters\.clean\.radius: a bare number moves a length",
        ),
        (
            ("clean.radius: ±0.5 px", "clean.footprint: ±1 px"),
            r"robustness\.parameters\.clean\.footprint: steps\.clean\.footprint is 'disk', not a number",
        ),
        (
            ("clean.radius: ±0.5 px", "stats.connectivity: ±1"),
            r"steps\.stats\.connectivity is 8, not a number",
        ),
        (("spots.level: ±10 %", "spots.level: ±2 px"), r"spots\.level is a plain number"),
        (
            ("clean.radius: ±0.5 px", "clean.radius: ±0.75 um"),
            r"minus \(radius: 0 px\) is not a valid recipe: steps\.clean\.radius: must be > 0",
        ),
        (("clean.radius: ±0.5 px", "level.radius: 3 %"), r"cannot read '3 %' as a move"),
        (("ndc >= 2", "ndc > = 2"), r":20:15: criteria\.categories: cannot read 'ndc > = 2'"),
        (
            (
                "folder: precision\n",
                "folder: precision\n  tolerance: {stats.area_fraction: 2 um}\n",
            ),
            r"precision\.tolerance\.stats\.area_fraction: the value is dimensionless",
        ),
        (
            ("  source: constructed\n", "  source: constructed\n  confidence: 1.5\n"),
            r"trueness\.confidence: must be < 1",
        ),
        (
            ("recipe: recipe.yaml", "recipe: nothing.yaml"),
            r"recipe: the recipe .*nothing\.yaml is not valid",
        ),
    ],
)
def test_plan_problems_are_positioned(tmp_path: Path, edit: tuple[str, str], expected: str) -> None:
    plan = make_study(tmp_path)
    text = plan.read_text(encoding="utf-8")
    assert edit[0] in text
    plan.write_text(text.replace(edit[0], edit[1], 1), encoding="utf-8")
    problems = _problems(plan)
    assert any(re.search(expected, p) for p in problems), problems
    assert all(re.match(r"^.+:\d+:\d+: ", p) for p in problems), problems


def test_a_criterion_without_its_section_is_refused(tmp_path: Path) -> None:
    plan = make_study(tmp_path, extra="  robust: no verdict flips\n")
    text = plan.read_text(encoding="utf-8")
    start, end = text.index("robustness:"), text.index("criteria:")
    plan.write_text(text[:start] + text[end:], encoding="utf-8")
    assert any("needs the plan's robustness section" in p for p in _problems(plan))


def test_an_unbalanced_design_is_refused_with_its_gaps(tmp_path: Path) -> None:
    plan = make_study(tmp_path)
    table = tmp_path / "precision.csv"
    lines = table.read_text(encoding="utf-8").splitlines()
    table.write_text("\n".join(lines[:-1]) + "\n", encoding="utf-8")  # P4, B, 2 gone
    problems = _problems(plan)
    assert any("not balanced" in p and "part P4/operator B: 1" in p for p in problems), problems


def test_design_table_problems_name_the_table_row(tmp_path: Path) -> None:
    plan = make_study(tmp_path)
    table = tmp_path / "precision.csv"
    lines = table.read_text(encoding="utf-8").splitlines()
    lines[3] = lines[1]  # a duplicate image
    lines[5] = "../outside.tif,P9,A,1"
    table.write_text("\n".join(lines) + "\n", encoding="utf-8")
    problems = _problems(plan)
    assert any(
        p.startswith(f"{table}:4:1: row 4: image A/P1-1.tif is listed twice") for p in problems
    ), problems
    assert any(
        p.startswith(f"{table}:6:1: row 6: '../outside.tif' is not a path inside") for p in problems
    ), problems


def test_a_missing_column_is_named(tmp_path: Path) -> None:
    plan = make_study(tmp_path)
    table = tmp_path / "reference.csv"
    text = table.read_text(encoding="utf-8").replace("reference,", "ref,", 1)
    table.write_text(text, encoding="utf-8")
    assert any("no column 'reference'" in p for p in _problems(plan))


def test_a_template_design_is_read_from_the_file_names(tmp_path: Path) -> None:
    plan = make_study(tmp_path)
    text = plan.read_text(encoding="utf-8").replace(
        "  table: precision.csv\n", '  files: "{operator}/{part}-{replicate}.tif"\n'
    )
    plan.write_text(text, encoding="utf-8")
    checked = load_plan(plan)
    assert checked.precision is not None
    assert checked.precision.parts == ("P1", "P2", "P3", "P4")
    assert checked.precision.operators == ("A", "B") and checked.precision.replicates == 2
    text = text.replace('"{operator}/{part}-{replicate}.tif"', '"{operator}/{part}-{run}.tif"')
    plan.write_text(text, encoding="utf-8")
    assert any("unknown field {run}" in p for p in _problems(plan))


# ---------------------------------------------------------------- moves


def _recipe(tmp_path: Path, text: str = RECIPE) -> Any:
    from lotproof.runner.recipe.load import load_recipe

    path = tmp_path / "r.yaml"
    path.write_text(text, encoding="utf-8")
    return load_recipe(path)


def test_a_move_changes_one_value_and_keeps_every_other_byte(tmp_path: Path) -> None:
    recipe = _recipe(tmp_path)
    move = build_move(recipe, "level.radius", "±1 um")
    minus, plus = (v.recipe.raw.decode() for v in move.variants)
    # 1 um is 2 px at 0.5 um per pixel; the value keeps its own unit
    assert move.variant("minus").value_text == "2 px" and move.variant("plus").value_text == "6 px"
    assert minus == RECIPE.replace("    radius: 4 px\n", "    radius: 2 px\n")
    assert plus == RECIPE.replace("    radius: 4 px\n", "    radius: 6 px\n")
    assert move.baseline_text == "4 px"


@pytest.mark.parametrize(
    ("parameter", "written", "expected"),
    [
        ("spots.level", "±10 %", ("90", "110")),
        ("spots.level", "±7.5", ("92.5", "107.5")),
        ("clean.radius", "+-0.5 px", ("1 px", "2 px")),
        ("clean.radius", "+/-0.25 um", ("1 px", "2 px")),
        ("level.radius", "±25 %", ("3 px", "5 px")),
    ],
)
def test_moves_relative_and_absolute(
    tmp_path: Path, parameter: str, written: str, expected: tuple[str, str]
) -> None:
    move = build_move(_recipe(tmp_path), parameter, written)
    assert tuple(v.value_text for v in move.variants) == expected
    step, _, param = parameter.partition(".")
    for variant, text in zip(move.variants, expected, strict=True):
        value = getattr(variant.recipe.steps[step].params, param)
        assert str(value) == text if " " in text else value == float(text)


def test_a_pixel_move_of_a_physical_length_needs_one_pixel_size(tmp_path: Path) -> None:
    text = RECIPE.replace("pixel_size: 0.5 um", "pixel_size: from-image").replace(
        "radius: 4 px", "radius: 2 um"
    )
    recipe = _recipe(tmp_path, text)
    with pytest.raises(MoveError, match="needs one pixel size"):
        build_move(recipe, "level.radius", "±1 px")
    assert build_move(recipe, "level.radius", "±500 nm").variant("plus").value_text == "2.5 um"


def test_a_parameter_left_at_its_default_cannot_be_moved(tmp_path: Path) -> None:
    with pytest.raises(MoveError, match="not written in the recipe"):
        build_move(_recipe(tmp_path), "spots.offset", "±1")


# ---------------------------------------------------------------- criteria


def test_rules_are_read_with_their_units() -> None:
    assert parse_rule("%GRR of tolerance <= 10", {"a.b": "-"}) == (
        "grr_percent_tolerance",
        {"a.b": 10.0},
    )
    assert parse_rule("ndc ≥ 5", {"a.b": "-"}) == ("ndc", {"a.b": 5.0})
    assert parse_rule("|bias| <= 0.5 mm", {"a.ecd": "um"}) == ("bias_absolute", {"a.ecd": 500.0})
    assert parse_rule("|change per step| <= 5 % of tolerance", {"a.b": "-"})[0] == (
        "change_percent_tolerance"
    )
    from lotproof.runner.study.criteria import RuleError

    with pytest.raises(RuleError, match="bare number"):
        parse_rule("|bias| <= 0.5", {"a.ecd": "um"})


def test_judging_passes_fails_and_is_incomplete() -> None:
    doc: dict[str, Any] = {
        "values": {
            "a.b": {"grr_percent_tolerance": 12.0, "ndc": 7, "grr_sd": 1.0, "bias": []},
            "a.c": {"grr_percent_tolerance": None, "ndc": None, "grr_sd": None, "bias": []},
        },
        "robustness": None,
    }
    gauge = Criterion(
        "g", "%GRR of tolerance <= 10", "grr_percent_tolerance", {"a.b": 10.0}, ("a.b",)
    )
    assert judge(gauge, doc)["verdict"] == "fail"
    categories = Criterion("n", "ndc >= 5", "ndc", {"a.b": 5.0, "a.c": 5.0}, ("a.b", "a.c"))
    entry = judge(categories, doc)
    assert entry["results"]["a.b"]["verdict"] == "pass"
    assert entry["results"]["a.c"]["verdict"] == "incomplete" and entry["verdict"] == "incomplete"
    assert study_verdict({"g": {"verdict": "pass"}}, 1) == "incomplete"
    assert study_verdict({}, 0) == "pass"


# ---------------------------------------------------------------- the command


def test_validate_prints_the_study_and_exits_with_its_verdict(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = make_study(tmp_path / "plan")
    with pytest.raises(SystemExit) as exit_info:
        main(["validate", str(plan), "--out", str(tmp_path / "out"), "--no-cache", "--json"])
    assert exit_info.value.code == 1
    document = json.loads(capsys.readouterr().out)
    assert document["verdict"] == "fail" and document["exit_code"] == 1
    assert document["criteria"]["robust"] == {"rule": "no verdict flips", "verdict": "fail"}
    assert verify_run(Path(document["study_dir"])).status == "intact"
    with pytest.raises(SystemExit) as exit_info:
        main(["verify", document["study_dir"]])
    assert exit_info.value.code == 0


def test_validate_of_a_passing_plan_exits_0(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = make_study(tmp_path / "plan", extra="")
    with pytest.raises(SystemExit) as exit_info:
        main(["validate", str(plan), "--out", str(tmp_path / "out"), "--no-cache", "-q"])
    assert exit_info.value.code == 0
    out = capsys.readouterr().out
    assert "study verdict: PASS" in out and "%GRR of tolerance" in out and "seal:" in out


def test_validate_of_an_invalid_plan_exits_2_with_positions(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = make_study(tmp_path / "plan")
    plan.write_text(plan.read_text(encoding="utf-8").replace("revision: 1", "revision: 0"))
    with pytest.raises(SystemExit) as exit_info:
        main(["validate", str(plan), "--out", str(tmp_path / "out")])
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert f"{plan}:3:11: revision: must be >= 1 (got 0)" in err
    assert not (tmp_path / "out").exists()


def test_validate_of_a_missing_image_exits_3(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    plan = make_study(tmp_path / "plan")
    (tmp_path / "plan" / "precision" / "B" / "P3-2.tif").unlink()
    with pytest.raises(SystemExit) as exit_info:
        main(["validate", str(plan), "--out", str(tmp_path / "out"), "--no-cache"])
    assert exit_info.value.code == 3
    assert "P3-2.tif" in capsys.readouterr().err


def test_a_pool_of_processes_gives_the_same_files(tmp_path: Path) -> None:
    plan = make_study(tmp_path / "plan", extra="")
    text = plan.read_text(encoding="utf-8")
    plan.write_text(text[: text.index("robustness:")] + text[text.index("criteria:") :])
    alone = run_study(plan, tmp_path / "alone", jobs=1)
    pooled = run_study(plan, tmp_path / "pooled", jobs=2)
    for name in (MEASUREMENTS_FILE, VALIDATION_FILE, REPORT_FILE):
        a, b = (alone.study_dir / name).read_bytes(), (pooled.study_dir / name).read_bytes()
        if name == REPORT_FILE:
            timeless = re.compile(rb'<time class="study-time">[^<]*</time>')
            a, b = timeless.sub(b"", a), timeless.sub(b"", b)
        assert a == b, name
    starts = [
        next(e for e in RunFolder(s.study_dir).ledger_events() if e["type"] == "run-start")
        for s in (alone, pooled)
    ]
    assert [e["executor"] for e in starts] == ["local, 1 process", "local, 2 processes"]
