"""Running recipes over small lots: files, verdicts, exit codes, incomplete images."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image

from lotproof import load_recipe, run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_LIMIT_FAILED, EXIT_OK

from _builders import recipe_text, spot_image, spot_lot, write_recipe

PIXEL_UM = 0.5

#: fixed threshold, spots kept; area fraction at most 0.5 per image, lot mean at most 1
RECIPE = recipe_text("spot-test", revision=2, keep=True, lot_mean=True)
#: the same with the area fraction at most 0.01 per image
STRICT_RECIPE = recipe_text("spot-test", revision=2, keep=True, lot_mean=True, max_fraction=0.01)


def _tree_digest(folder: Path) -> dict[str, str]:
    return {
        p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def test_all_pass_writes_the_run_folder(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1, 2, 3])
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    assert summary.verdicts.lot == "pass"
    assert summary.exit_code == EXIT_OK
    run = summary.run_dir
    assert run.name.endswith("-spot-test-r2")
    for name in (
        "recipe.yaml",
        "resolved.json",
        "images.csv",
        "objects.csv",
        "verdicts.json",
        "inputs.json",
    ):
        assert (run / name).is_file(), name
    assert (run / "recipe.yaml").read_bytes() == (tmp_path / "recipe.yaml").read_bytes()
    images = (run / "images.csv").read_text().splitlines()
    assert images[0].startswith("image,status,verdict,reason,pixel_size [um]")
    assert "stats.area_fraction [-]" in images[0] and "stats.ecd_max [um]" in images[0]
    assert len(images) == 4
    # 16 px per spot of 4096: exact fractions
    header = images[0].split(",")
    col = header.index("stats.area_fraction [-]")
    fractions = [float(row.split(",")[col]) for row in images[1:]]
    assert fractions == [16 / 4096, 32 / 4096, 48 / 4096]
    objects = (run / "objects.csv").read_text().splitlines()
    assert objects[0].startswith("image,step,label [-],area [um2]")
    assert len(objects) == 1 + 6
    area = float(objects[1].split(",")[3])
    assert area == pytest.approx(16 * PIXEL_UM**2)


def test_failing_limit_gives_exit_1(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1, 9])  # 9 spots: 144/4096 = 0.035
    summary = run_lot(write_recipe(tmp_path, STRICT_RECIPE), lot, tmp_path / "runs")
    assert summary.verdicts.lot == "fail"
    assert summary.exit_code == EXIT_LIMIT_FAILED
    per_image = summary.verdicts.limits["fraction"].per_image
    assert per_image["disc-00.tif"][1] == "pass"
    assert per_image["disc-01.tif"][1] == "fail"


def test_bad_image_is_incomplete_others_run(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1, 2])
    (lot / "disc-09.tif").write_bytes(b"II*\x00" + b"\x00" * 4)  # a TIFF header and nothing else
    (lot / "disc-10.tif").write_bytes(b"")
    before = _tree_digest(lot)
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    assert _tree_digest(lot) == before  # the lot folder is never changed
    assert summary.verdicts.lot == "incomplete"
    assert summary.exit_code == EXIT_BAD_INPUT
    status = {r.id: (r.status, r.reason) for r in summary.results}
    assert status["disc-00.tif"] == ("ok", "")
    assert status["disc-01.tif"] == ("ok", "")
    assert status["disc-09.tif"][0] == "incomplete" and "TIFF" in status["disc-09.tif"][1]
    assert status["disc-10.tif"] == ("incomplete", "disc-10.tif: the file is empty (0 bytes)")
    rows = (summary.run_dir / "images.csv").read_text().splitlines()
    assert any(r.startswith("disc-10.tif,incomplete,incomplete,") for r in rows)
    assert summary.verdicts.limits["mean-fraction"].verdict == "incomplete"


def test_bad_image_with_failing_limit_is_never_pass(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [9])
    (lot / "disc-05.tif").write_bytes(b"not an image at all")
    summary = run_lot(write_recipe(tmp_path, STRICT_RECIPE), lot, tmp_path / "runs")
    assert summary.verdicts.lot == "fail"
    assert summary.exit_code == EXIT_BAD_INPUT


def test_empty_lot_is_incomplete(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    assert summary.verdicts.lot == "incomplete"
    assert summary.exit_code == EXIT_BAD_INPUT


def test_kept_step_is_saved_with_its_dtype(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [2])
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    kept = summary.run_dir / "kept" / "disc-00" / "spots.tif"
    mask = tifffile.imread(kept)
    assert mask.dtype == bool
    np.testing.assert_array_equal(mask, spot_image(2) > 100)


def test_second_run_gets_a_new_folder(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1])
    recipe = load_recipe(write_recipe(tmp_path, RECIPE))
    first = run_lot(recipe, lot, tmp_path / "runs").run_dir
    first_files = _tree_digest(first)
    second = run_lot(recipe, lot, tmp_path / "runs").run_dir
    assert first != second
    assert _tree_digest(first) == first_files


def test_json_output_keys(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    lot = spot_lot(tmp_path, [1, 2])
    recipe = write_recipe(tmp_path, RECIPE)
    with pytest.raises(SystemExit) as exit_info:
        main(["run", str(recipe), str(lot), "--out", str(tmp_path / "runs"), "--json"])
    assert exit_info.value.code == EXIT_OK
    document = json.loads(capsys.readouterr().out)
    assert {"run_dir", "verdict", "images", "limits"} <= set(document)
    assert document["verdict"] == "pass"
    assert document["images"] == 2
    assert document["limits"]["mean-fraction"]["value"] == pytest.approx((16 + 32) / 2 / 4096)
    assert document["limits"]["fraction"]["verdict"] == "pass"
    assert Path(document["run_dir"]).is_dir()


def test_colour_image_needs_a_gray_step(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    rgb = np.stack([spot_image(1)] * 3, axis=-1)
    tifffile.imwrite(lot / "colour.tif", rgb, photometric="rgb")
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    (result,) = summary.results
    assert result.status == "incomplete"
    assert "colour image" in result.reason and "apply: gray" in result.reason

    with_gray = RECIPE.replace(
        "  spots:\n    apply: threshold\n    to: section",
        "  luma:\n    apply: gray\n    to: section\n  spots:\n    apply: threshold\n    to: luma",
    )
    summary = run_lot(write_recipe(tmp_path, with_gray), lot, tmp_path / "runs")
    assert summary.results[0].status == "ok"
    assert summary.results[0].values[("stats", "count")] == 1


def test_from_image_needs_a_calibration(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    tifffile.imwrite(lot / "plain.tif", spot_image(1))
    tifffile.imwrite(
        lot / "calibrated.tif",
        spot_image(1),
        resolution=(1e4 / 0.25, 1e4 / 0.25),
        resolutionunit="CENTIMETER",
    )
    text = RECIPE.replace("pixel_size: 0.5 um", "pixel_size: from-image")
    summary = run_lot(write_recipe(tmp_path, text), lot, tmp_path / "runs")
    by_id = {r.id: r for r in summary.results}
    assert by_id["plain.tif"].status == "incomplete"
    assert "no calibration" in by_id["plain.tif"].reason
    calibrated = by_id["calibrated.tif"]
    assert calibrated.status == "ok"
    assert calibrated.spacing == pytest.approx((0.25, 0.25))
    assert calibrated.values[("stats", "area_fraction")] == 16 / 4096


def test_jpeg_is_refused_unless_allowed(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    Image.fromarray(spot_image(1)).save(lot / "shot.jpg", quality=95)
    text = RECIPE.replace('"*.tif"', '"*.jpg"')
    summary = run_lot(write_recipe(tmp_path, text), lot, tmp_path / "runs")
    assert summary.results[0].status == "incomplete"
    assert "JPEG is lossy" in summary.results[0].reason
    allowed = text.replace("pixel_size: 0.5 um", "pixel_size: 0.5 um\nlossy_input: allow")
    summary = run_lot(write_recipe(tmp_path, allowed), lot, tmp_path / "runs")
    assert summary.results[0].status == "ok"


def test_png_is_read(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    Image.fromarray(spot_image(3)).save(lot / "a.png")
    text = RECIPE.replace('"*.tif"', '"*.png"')
    summary = run_lot(write_recipe(tmp_path, text), lot, tmp_path / "runs")
    assert summary.results[0].values[("stats", "count")] == 3


def test_wrong_extension_is_refused(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    Image.fromarray(spot_image(1)).save(lot / "disguised.tif", format="PNG")
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    assert summary.results[0].status == "incomplete"
    assert "content is PNG" in summary.results[0].reason


def test_threshold_level_is_recorded(tmp_path: Path) -> None:
    lot = spot_lot(tmp_path, [1])
    summary = run_lot(write_recipe(tmp_path, RECIPE), lot, tmp_path / "runs")
    assert summary.results[0].values[("spots", "level")] == 100
    header = (summary.run_dir / "images.csv").read_text().splitlines()[0]
    assert "spots.level [-]" in header


def test_resolved_parameters_in_pixels(tmp_path: Path) -> None:
    text = RECIPE.replace(
        "  stats:\n    apply: measure\n    to: spots",
        "  clean:\n    apply: open\n    to: spots\n    radius: 1 um\n"
        "  stats:\n    apply: measure\n    to: clean",
    )
    lot = spot_lot(tmp_path, [1])
    summary = run_lot(write_recipe(tmp_path, text), lot, tmp_path / "runs")
    resolved = json.loads((summary.run_dir / "resolved.json").read_text())
    clean = resolved["steps"]["clean"]
    assert clean["params"]["radius"] == "1 um"
    assert clean["params_in_pixels"][0]["params"]["radius"] == "2 px"  # 1 um / 0.5 um per px
    assert "rounding_rule" in resolved
