"""Comparing two run folders: per-image deltas, verdict changes, lot values."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import lotproof.runner.cli.record  # noqa: F401 - registers the record commands
from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_OK, InputError
from lotproof.runner.record.compare import ValueDelta, compare_runs

from _builders import recipe_text, spot_column, write_lot, write_recipe


def _run(
    tmp_path: Path, name: str, spots: dict[str, int], revision: int = 1, max_fraction: float = 0.05
) -> Path:
    """A run of images with ``spots`` squares each (:func:`_builders.spot_column`)."""
    lot = write_lot(
        tmp_path, {image: spot_column(n) for image, n in spots.items()}, name=f"lot-{name}"
    )
    text = recipe_text("spot-test", revision=revision, max_fraction=max_fraction, lot_mean=True)
    recipe = write_recipe(tmp_path, text, f"recipe-{name}.yaml")
    return run_lot(recipe, lot, tmp_path / f"runs-{name}").run_dir


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("compare")
    a = _run(folder, "a", {"d1.tif": 1, "d2.tif": 2, "d3.tif": 3})
    b = _run(folder, "b", {"d1.tif": 1, "d2.tif": 4, "d4.tif": 1}, revision=2, max_fraction=0.06)
    return a, b


def test_same_run_is_identical(runs: tuple[Path, Path]) -> None:
    a, _ = runs
    result = compare_runs(a, a)
    assert result.identical and result.same_recipe
    assert result.changed_values == [] and result.verdict_changes == []
    assert len(result.values) > 0


def test_images_only_in_one_run(runs: tuple[Path, Path]) -> None:
    result = compare_runs(*runs)
    assert result.images_only_a == ["d3.tif"]
    assert result.images_only_b == ["d4.tif"]
    assert not result.same_recipe and not result.identical


def test_per_image_deltas(runs: tuple[Path, Path]) -> None:
    result = compare_runs(*runs)
    by_key = {(v.image, v.column): v for v in result.values}
    fraction = by_key[("d2.tif", "stats.area_fraction")]
    # source: closed form, 2 and 4 squares of 16 px in 1024 px
    assert (fraction.a, fraction.b) == (2 * 16 / 1024, 4 * 16 / 1024)
    assert fraction.absolute == pytest.approx(2 * 16 / 1024)
    assert fraction.relative == pytest.approx(1.0)
    count = by_key[("d2.tif", "stats.count")]
    assert (count.a, count.b, count.absolute) == (2, 4, 2)
    assert by_key[("d1.tif", "stats.area_fraction")].equal
    assert {v.image for v in result.changed_values} == {"d2.tif"}
    assert all(v.unit for v in result.values)


def test_verdict_changes_and_lot_values(runs: tuple[Path, Path]) -> None:
    result = compare_runs(*runs)
    # d2: 4 squares = 0.0625 > 0.06 fails in b; 2 squares = 0.03125 passed in a
    assert [(c.image, c.what, c.a, c.b) for c in result.verdict_changes] == [
        ("d2.tif", "verdict", "pass", "fail"),
        ("d2.tif", "limit fraction", "pass", "fail"),
    ]
    assert (result.lot_verdict_a, result.lot_verdict_b) == ("pass", "fail")
    limits = {lim.name: lim for lim in result.limits}
    mean = limits["mean-fraction"]
    # source: closed form, lot means (1+2+3)*16/1024/3 and (1+4+1)*16/1024/3
    assert mean.value_a == pytest.approx(2 * 16 / 1024)
    assert mean.value_b == pytest.approx(2 * 16 / 1024)
    assert limits["fraction"].value_a is None  # over: each has no lot value
    assert (limits["fraction"].bound_a, limits["fraction"].bound_b) == ("<= 0.05", "<= 0.06")
    assert limits["fraction"].changed


def test_value_delta_edge_cases() -> None:
    assert ValueDelta("i", "v", "-", None, None).equal
    assert not ValueDelta("i", "v", "-", None, 1.0).equal
    nan = float("nan")
    both_nan = ValueDelta("i", "v", "-", nan, nan)
    assert both_nan.equal and both_nan.absolute is None
    zero = ValueDelta("i", "v", "-", 0.0, 2.0)
    assert zero.absolute == 2.0 and zero.relative is None
    assert ValueDelta("i", "v", "-", -2.0, -1.0).relative == 0.5
    # bit for bit: one ulp apart is a difference
    assert not ValueDelta("i", "v", "-", 0.1, np.nextafter(0.1, 1.0)).equal


def test_not_a_run_folder(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="missing"):
        compare_runs(tmp_path, tmp_path)


def test_cli_compare(
    runs: tuple[Path, Path],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setenv("COLUMNS", "200")
    a, b = runs
    with pytest.raises(SystemExit) as done:
        main(["compare", str(a), str(b), "--json"])
    assert done.value.code == EXIT_OK
    document = json.loads(capsys.readouterr().out)
    assert document["images_only_in_a"] == ["d3.tif"]
    assert document["lot_verdict"] == ["pass", "fail"]
    with pytest.raises(SystemExit) as done:
        main(["compare", str(a), str(b)])
    out = capsys.readouterr().out
    assert "d2.tif" in out and "stats.area_fraction" in out and "+100.000%" in out
    with pytest.raises(SystemExit) as done:
        main(["compare", str(a), str(a)])
    assert capsys.readouterr().out.rstrip().endswith("identical")
    with pytest.raises(SystemExit) as done:
        main(["compare", str(tmp_path), str(a)])
    assert done.value.code == EXIT_BAD_INPUT
