"""Bad images never pass silently: each is refused with its reason, the rest of the lot runs.

Every file of ``tests/bad_inputs/images/`` (written by ``make_bad_images.py``
there) is put into a lot beside two good images and run with ``run_lot``: the
bad one is ``incomplete`` with the reason ``EXPECTED`` names in ``images.csv``,
the good ones are analysed, the exit code is 3 and the lot verdict is not
``pass``. Cases git cannot hold (no read permission, symbolic link loops, links
out of the lot) are made here at run time. Controls show that each committed
file is refused for the one defect it was made with (the same bytes under the
right name, or with the recipe option, are analysed).
"""

from __future__ import annotations

import csv
import errno
import hashlib
import importlib.util
import json
import os
import shutil
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest
import tifffile

from lotproof import run_lot
from lotproof.runner.cli.main import main
from lotproof.runner.errors import EXIT_BAD_INPUT, InputError
from lotproof.runner.evaluate.inputs import MAX_PIXELS, MIN_SIDE, read_image
from lotproof.runner.jobs.run import RunSummary

from _builders import recipe_text, write_lot, write_recipe

IMAGES = Path(__file__).parent / "bad_inputs" / "images"
GENERATOR = IMAGES / "make_bad_images.py"


def _generator() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_bad_images", GENERATOR)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


MAKE = _generator()
EXPECTED: dict[str, str] = MAKE.EXPECTED

GOOD = ("good-a.tif", "good-b.tif")
#: the bright square of a good image: 8 x 8 of 32 x 32 pixels
GOOD_FRACTION = 64 / 1024  # source: closed form, pixel count of the square over the frame


def _recipe(folder: Path, *, gray: bool = False, lossy: bool = False) -> Path:
    """Every file of the lot (``*``), a fixed threshold, the lot mean checked."""
    text = recipe_text("bad-image-check", pattern="*", gray=gray, lot_mean=True)
    if lossy:
        text = text.replace("pixel_size: 0.5 um\n", "pixel_size: 0.5 um\nlossy_input: allow\n")
    name = "recipe-gray.yaml" if gray else "recipe-lossy.yaml" if lossy else "recipe.yaml"
    return write_recipe(folder, text, name)


def _good_lot(folder: Path) -> Path:
    # kept here: the good images are the bad-image generator's own field (MAKE._field)
    return write_lot(folder, {name: MAKE._field() for name in GOOD})


def _tree_digest(folder: Path) -> dict[str, str]:
    return {
        p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and not p.is_symlink()
    }


def _rows(summary: RunSummary) -> dict[str, dict[str, str]]:
    with open(summary.run_dir / "images.csv", newline="") as handle:
        return {row["image"]: row for row in csv.DictReader(handle)}


def _assert_refused(summary: RunSummary, name: str, reason: str) -> None:
    """``name`` incomplete with ``reason`` (also in images.csv); the good images analysed."""
    status = {r.id: (r.status, r.reason) for r in summary.results}
    assert status[name][0] == "incomplete", status[name]
    assert reason in status[name][1]
    assert name in status[name][1]  # the reason says which file
    rows = _rows(summary)
    assert rows[name]["status"] == "incomplete"
    assert rows[name]["verdict"] != "pass"
    assert reason in rows[name]["reason"]
    for good in GOOD:
        assert status[good] == ("ok", "")
        assert rows[good]["status"] == "ok" and rows[good]["verdict"] == "pass"
        assert float(rows[good]["stats.area_fraction [-]"]) == GOOD_FRACTION
    assert summary.exit_code == EXIT_BAD_INPUT
    assert summary.verdicts.lot != "pass"
    assert summary.verdicts.limits["mean-fraction"].verdict == "incomplete"


# ---------------------------------------------------------------- the committed files


def test_committed_files_are_the_generator_output(tmp_path: Path) -> None:
    written = MAKE.write_all(tmp_path)
    committed = sorted(p.name for p in IMAGES.iterdir() if p.is_file() and p.suffix != ".py")
    assert committed == sorted(written)
    for name, data in written.items():
        assert (
            hashlib.sha256((IMAGES / name).read_bytes()).hexdigest()
            == hashlib.sha256(data).hexdigest()
        ), f"{name} differs from make_bad_images.py's output; rerun the script"
    assert sorted(EXPECTED) == sorted(MAKE.FILES)


def test_at_least_fifteen_small_files() -> None:
    assert len(EXPECTED) >= 15
    for name in EXPECTED:
        assert (IMAGES / name).stat().st_size < 50 * 1024, name


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_bad_file_is_incomplete_beside_good_ones(tmp_path: Path, name: str) -> None:
    lot = _good_lot(tmp_path)
    shutil.copyfile(IMAGES / name, lot / name)
    before = _tree_digest(lot)
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    _assert_refused(summary, name, EXPECTED[name])
    assert _tree_digest(lot) == before  # nothing is written into the lot


def test_cli_json_lists_every_bad_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    lot = _good_lot(tmp_path)
    for name in EXPECTED:
        shutil.copyfile(IMAGES / name, lot / name)
    with pytest.raises(SystemExit) as exit_info:
        main(["run", str(_recipe(tmp_path)), str(lot), "--out", str(tmp_path / "runs"), "--json"])
    assert exit_info.value.code == EXIT_BAD_INPUT
    document = json.loads(capsys.readouterr().out)
    assert document["exit_code"] == EXIT_BAD_INPUT
    assert document["verdict"] != "pass"
    assert document["images"] == len(EXPECTED) + len(GOOD)
    assert sorted(document["incomplete"]) == sorted(EXPECTED)
    for name, reason in EXPECTED.items():
        assert reason in document["incomplete"][name], name
    assert {name: limit["verdict"] for name, limit in document["limits"].items()} == {
        "fraction": "incomplete",
        "mean-fraction": "incomplete",
    }
    for image, verdict in document["limits"]["fraction"]["images"].items():
        assert verdict == ("pass" if image in GOOD else "incomplete"), (image, verdict)
    with open(Path(document["run_dir"]) / "images.csv", newline="") as handle:
        rows = {row["image"]: row for row in csv.DictReader(handle)}
    for name, reason in EXPECTED.items():
        assert rows[name]["status"] == "incomplete" and reason in rows[name]["reason"]


# ---------------------------------------------------------------- controls


@pytest.mark.parametrize(
    ("name", "renamed"), [("png-named.tif", "named.png"), ("tiff-named.png", "named.tif")]
)
def test_wrong_extension_files_are_good_under_their_right_name(
    tmp_path: Path, name: str, renamed: str
) -> None:
    lot = _good_lot(tmp_path)
    shutil.copyfile(IMAGES / name, lot / renamed)
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    assert [r.status for r in summary.results] == ["ok"] * 3
    assert {r.values[("stats", "area_fraction")] for r in summary.results} == {GOOD_FRACTION}


def test_rgb_file_is_good_with_a_gray_step(tmp_path: Path) -> None:
    lot = _good_lot(tmp_path)
    shutil.copyfile(IMAGES / "rgb.tif", lot / "rgb.tif")
    summary = run_lot(_recipe(tmp_path, gray=True), lot, tmp_path / "runs")
    assert [r.status for r in summary.results] == ["ok"] * 3
    assert summary.exit_code == 0


def test_jpeg_file_is_good_when_lossy_input_is_allowed(tmp_path: Path) -> None:
    lot = _good_lot(tmp_path)
    shutil.copyfile(IMAGES / "photo.jpg", lot / "photo.jpg")
    summary = run_lot(_recipe(tmp_path, lossy=True), lot, tmp_path / "runs")
    assert [r.status for r in summary.results] == ["ok"] * 3


def test_constant_image_is_refused_before_any_step(tmp_path: Path) -> None:
    """A blank frame measured would be 0 porosity and pass a ``max`` limit: it must not run."""
    lot = _good_lot(tmp_path)
    shutil.copyfile(IMAGES / "constant.tif", lot / "constant.tif")
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    blank = next(r for r in summary.results if r.id == "constant.tif")
    assert blank.reason == (
        "constant.tif: no contrast (every pixel is 20); a blank frame cannot be measured"
    )
    assert blank.steps == [] and blank.values == {}


@pytest.mark.parametrize("dtype", ["uint8", "uint16", "float32", "bool"])
def test_constant_image_of_every_type_is_refused(tmp_path: Path, dtype: str) -> None:
    tifffile.imwrite(tmp_path / "blank.tif", np.ones((8, 8), dtype))
    with pytest.raises(InputError, match="no contrast"):
        read_image(tmp_path / "blank.tif", tmp_path)


def test_constant_colour_image_is_refused_but_a_coloured_one_is_not(tmp_path: Path) -> None:
    flat = np.zeros((8, 8, 3), np.uint8)
    flat[...] = (10, 20, 30)  # every pixel the same colour, the channels differ
    tifffile.imwrite(tmp_path / "flat.tif", flat, photometric="rgb")
    with pytest.raises(InputError, match=r"no contrast \(every pixel is \(10, 20, 30\)\)"):
        read_image(tmp_path / "flat.tif", tmp_path)
    flat[0, 0, 2] = 31  # one pixel differs in one channel: there is contrast
    tifffile.imwrite(tmp_path / "flat.tif", flat, photometric="rgb")
    assert read_image(tmp_path / "flat.tif", tmp_path).is_color


def test_smallest_accepted_side(tmp_path: Path) -> None:
    image = np.zeros((MIN_SIDE, MIN_SIDE), np.uint8)
    image[0, 0] = 1
    tifffile.imwrite(tmp_path / "small.tif", image)
    assert read_image(tmp_path / "small.tif", tmp_path).data.shape == (MIN_SIDE, MIN_SIDE)
    tifffile.imwrite(tmp_path / "small.tif", image[:, : MIN_SIDE - 1])
    with pytest.raises(InputError, match=f"smaller than {MIN_SIDE} pixels"):
        read_image(tmp_path / "small.tif", tmp_path)


def test_complete_multi_page_stack_is_a_volume(tmp_path: Path) -> None:
    """The stacks cut in the bad files read whole when they are whole."""
    stack = np.stack([MAKE._field() + i for i in range(5)])
    tifffile.imwrite(tmp_path / "whole.tif", stack)
    np.testing.assert_array_equal(read_image(tmp_path / "whole.tif", tmp_path).data, stack)
    # source: tifffile documents truncate=True as one IFD for a shaped series: not damage
    tifffile.imwrite(tmp_path / "one-ifd.tif", stack, truncate=True)
    np.testing.assert_array_equal(read_image(tmp_path / "one-ifd.tif", tmp_path).data, stack)


# ---------------------------------------------------------------- no allocation for huge headers


def _no_decoding(monkeypatch: pytest.MonkeyPatch) -> None:
    """Make every pixel-decoding entry point of tifffile and Pillow fail loudly."""
    from PIL import ImageFile

    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("pixel data decoded before the size check")

    monkeypatch.setattr(tifffile.TiffFile, "asarray", refuse)
    monkeypatch.setattr(tifffile.TiffPage, "asarray", refuse)
    monkeypatch.setattr(tifffile.TiffPageSeries, "asarray", refuse)
    monkeypatch.setattr(ImageFile.ImageFile, "load", refuse)


@pytest.mark.parametrize("name", ["huge-header.tif", "huge-header.png"])
def test_huge_header_is_refused_before_decoding(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, name: str
) -> None:
    shutil.copyfile(IMAGES / name, tmp_path / name)
    _no_decoding(monkeypatch)
    with pytest.raises(InputError) as refused:
        read_image(tmp_path / name, tmp_path)
    # a decoding attempt would have surfaced as "cannot read as ... (AssertionError ...)"
    assert f"more than the {MAX_PIXELS} pixels lotproof analyses in one image" in str(refused.value)
    assert "AssertionError" not in str(refused.value)


def test_no_decoding_patch_does_stop_a_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The patch above is not a no-op: a good file can no longer be read under it."""
    tifffile.imwrite(tmp_path / "good.tif", MAKE._field())
    _no_decoding(monkeypatch)
    with pytest.raises(InputError, match="AssertionError"):
        read_image(tmp_path / "good.tif", tmp_path)


# ---------------------------------------------------------------- made at run time


def _still_readable(path: Path) -> bool:
    try:
        os.close(os.open(path, os.O_RDONLY))
    except PermissionError:
        return False
    return True


def test_unreadable_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    lot = _good_lot(tmp_path)
    locked = lot / "locked.tif"
    tifffile.imwrite(locked, MAKE._field())
    locked.chmod(0)
    try:
        if _still_readable(locked):
            # root (as in CI) reads through chmod 000: refuse the open the way the kernel would
            real_open = os.open

            def denying_open(path: object, flags: int, *args: object, **kwargs: object) -> int:
                if Path(os.fsdecode(path)).name == "locked.tif":  # type: ignore[arg-type]
                    raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(path))
                return real_open(path, flags, *args, **kwargs)  # type: ignore[arg-type]

            monkeypatch.setattr(os, "open", denying_open)
        summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs", jobs=1)
    finally:
        monkeypatch.undo()
        locked.chmod(0o644)
    _assert_refused(summary, "locked.tif", "locked.tif: cannot open (Permission denied)")


@pytest.mark.parametrize("links", [1, 2])
def test_symbolic_link_loop(tmp_path: Path, links: int) -> None:
    lot = _good_lot(tmp_path)
    names = [f"loop-{i}.tif" for i in range(links)]
    for i, name in enumerate(names):
        (lot / name).symlink_to(names[(i + 1) % links])
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    for name in names:
        _assert_refused(summary, name, f"{name}: symbolic link loop")


def test_symbolic_link_out_of_the_lot_is_refused(tmp_path: Path) -> None:
    lot = _good_lot(tmp_path)
    outside = tmp_path / "elsewhere.tif"
    tifffile.imwrite(outside, MAKE._field())  # a perfectly good image, but not the lot's
    (lot / "link.tif").symlink_to(outside)
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    _assert_refused(summary, "link.tif", "link.tif: points outside the lot folder")


def test_symbolic_link_inside_the_lot_is_read(tmp_path: Path) -> None:
    lot = _good_lot(tmp_path)
    (lot / "sub").mkdir()
    tifffile.imwrite(lot / "sub" / "real.tif", MAKE._field())
    (lot / "link.tif").symlink_to(Path("sub") / "real.tif")
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    assert {r.id: r.status for r in summary.results} == {
        "good-a.tif": "ok",
        "good-b.tif": "ok",
        "link.tif": "ok",
    }


def test_dangling_symbolic_link(tmp_path: Path) -> None:
    lot = _good_lot(tmp_path)
    (lot / "gone.tif").symlink_to("deleted.tif")
    summary = run_lot(_recipe(tmp_path), lot, tmp_path / "runs")
    _assert_refused(summary, "gone.tif", "gone.tif: cannot open")
