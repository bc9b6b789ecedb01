"""The ledger written by runs, and `rerun`: identical, refused, or a table of differences."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import tifffile

import lotproof.runner.jobs.rerun as rerun_module
from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INTEGRITY
from lotproof.runner.evaluate.cache import DiskStore
from lotproof.runner.jobs.rerun import RerunRefused, rerun
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run
from lotproof.steps import REGISTRY

from _builders import noisy_squares, recipe_text, seeded_lot, write_recipe

#: Otsu threshold, opening, measure: three steps per image
RECIPE = recipe_text("rerun-test", method="otsu", clean=True, connectivity=None)


def _image(seed: int) -> np.ndarray:
    """80x80 uint8 noise with five bright 6x6 squares at seeded places."""
    return noisy_squares(seed, side=80, count=5, square=6, bright=220, corners=(5, 70))


@pytest.fixture()
def recorded(tmp_path: Path) -> tuple[Path, Path]:
    """A cached run of three images and one broken file (each test alters its lot or record)."""
    lot = seeded_lot(tmp_path, 3, _image, names="s{}.tif")
    (lot / "broken.tif").write_bytes(b"II*\x00\x08\x00\x00\x00")
    recipe = write_recipe(tmp_path, RECIPE)
    summary = run_lot(recipe, lot, tmp_path / "runs", store=DiskStore(tmp_path / "cache"))
    return summary.run_dir, lot


def test_a_run_writes_a_sealed_ledger(recorded: tuple[Path, Path]) -> None:
    run_dir, _ = recorded
    events = RunFolder(run_dir).events()
    types = [e["type"] for e in events]
    assert types[:2] == ["run-start", "recipe"] and types[-1] == "run-end"
    assert types.count("image") == 4 and types.count("input") == 3 and types.count("step") == 9
    assert {e["path"] for e in events if e["type"] == "output"} >= {
        "images.csv",
        "objects.csv",
        "verdicts.json",
        "recipe.yaml",
        "SHA256SUMS",
    }
    start = events[0]
    assert start["tool"]["name"] == "lotproof" and "numpy" in start["libraries"]
    assert verify_run(run_dir).status == "intact"


def test_rerun_is_identical(recorded: tuple[Path, Path], tmp_path: Path) -> None:
    run_dir, _ = recorded
    report = rerun(run_dir, out=tmp_path / "reruns")
    assert report.identical, report.differences
    assert report.exit_code == 0
    assert report.compared > 0
    assert report.rerun.run_dir.parent == tmp_path / "reruns"
    start = RunFolder(report.rerun.run_dir).events()[0]
    assert start["rerun_of"] == verify_run(run_dir).seal
    # never the cache: everything computed again
    assert report.rerun.step_counts()["reused"] == 0


def test_rerun_finds_moved_inputs_by_checksum(recorded: tuple[Path, Path], tmp_path: Path) -> None:
    run_dir, lot = recorded
    moved = tmp_path / "elsewhere" / "deep"
    moved.mkdir(parents=True)
    for i, path in enumerate(sorted(lot.glob("s*.tif"))):
        shutil.copy(path, moved / f"renamed-{i}.tif")
    shutil.rmtree(lot)
    with pytest.raises(RerunRefused) as refused:
        rerun(run_dir, out=tmp_path / "reruns")
    assert refused.value.exit_code == EXIT_BAD_INPUT
    report = rerun(run_dir, lot=tmp_path / "elsewhere", out=tmp_path / "reruns")
    ok = [r for r in report.rerun.results if r.status == "ok"]
    assert len(ok) == 3
    assert not [d for d in report.differences if "checksum" in d.what]


def test_rerun_refuses_a_replaced_input(
    recorded: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    run_dir, lot = recorded
    tifffile.imwrite(lot / "s1.tif", _image(99))
    with pytest.raises(SystemExit) as exit_info:
        main(["rerun", str(run_dir), "--out", str(tmp_path / "reruns")])
    assert exit_info.value.code == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert "changed: s1.tif" in err


def test_rerun_refuses_an_altered_record(recorded: tuple[Path, Path], tmp_path: Path) -> None:
    run_dir, _ = recorded
    recipe = run_dir / "recipe.yaml"
    recipe.write_bytes(recipe.read_bytes().replace(b"radius: 0.5 um", b"radius: 1.5 um"))
    assert verify_run(run_dir).status == "altered"
    with pytest.raises(RerunRefused) as refused:
        rerun(run_dir, out=tmp_path / "reruns")
    assert refused.value.exit_code == EXIT_INTEGRITY


def test_rerun_reports_the_first_difference_per_image(
    recorded: tuple[Path, Path],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    run_dir, _ = recorded
    kind = REGISTRY["open"]
    original = kind.func

    def drifted(params, mask, *, spacing):  # type: ignore[no-untyped-def]
        out = original(params, mask, spacing=spacing).copy()
        out[0, 0] = not out[0, 0]  # one pixel differs: a kernel that is not exact
        return out

    monkeypatch.setitem(REGISTRY, "open", type(kind)(**{**kind.__dict__, "func": drifted}))
    with pytest.raises(SystemExit) as exit_info:
        main(["rerun", str(run_dir), "--out", str(tmp_path / "reruns"), "--json"])
    assert exit_info.value.code == EXIT_INTEGRITY
    document = json.loads(capsys.readouterr().out)
    assert document["result"] == "different"
    first = {d["image"]: d["what"] for d in document["first_difference_per_image"]}
    assert first["s0.tif"] == "step clean result checksum"
    assert set(first) >= {"s0.tif", "s1.tif", "s2.tif"}


def test_strict_refuses_other_library_versions(
    recorded: tuple[Path, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    run_dir, _ = recorded
    real = rerun_module.environment

    def other() -> dict:  # type: ignore[type-arg]
        env = real()
        env["libraries"] = {**env["libraries"], "numpy": "0.0.1"}
        return env

    monkeypatch.setattr(rerun_module, "environment", other)
    with pytest.raises(RerunRefused) as refused:
        rerun(run_dir, out=tmp_path / "reruns", strict=True)
    assert refused.value.exit_code == EXIT_INTEGRITY
    assert "numpy" in str(refused.value)
    report = rerun(run_dir, out=tmp_path / "reruns")  # without --strict it runs and explains
    assert any(line.startswith("numpy ") for line in report.environment)
    assert report.identical


def test_interrupted_run_is_unfinished(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    lot = seeded_lot(tmp_path, 3, _image, names="s{}.tif")
    recipe = write_recipe(tmp_path, RECIPE)
    calls = {"n": 0}

    def stop(result):  # type: ignore[no-untyped-def]
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        run_lot(recipe, lot, tmp_path / "runs", on_image=stop)
    (run_dir,) = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    report = verify_run(run_dir)
    assert report.status == "unfinished"
    assert report.exit_code == EXIT_INTEGRITY


def test_rerun_of_the_demo_run_is_identical(tmp_path: Path) -> None:
    root = Path(__file__).resolve().parent.parent
    recorded = run_lot(
        root / "recipes" / "filter-disc-porosity.yaml",
        root / "demo_run" / "FD-2611",
        tmp_path / "runs",
        jobs=2,
    )
    report = rerun(recorded.run_dir, out=tmp_path / "reruns")
    assert report.identical, report.first_per_image()
    # every (image, step) checksum was compared: 8 images x 4 steps, plus values and verdicts
    assert report.compared > 8 * 4
