"""``lotproof preview``: one tile per step, the sidecar's boxes, the pictures, the cache."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image
from scipy import ndimage

import lotproof.runner.cli.show  # noqa: F401  registers report and preview on the cli group
from lotproof.runner.cli.main import main
from lotproof.runner.evaluate.cache import DiskStore
from lotproof.runner.evaluate.pictures import label_colours
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.show.preview import (
    SIDECAR_FORMAT,
    TILE_SIDE,
    PreviewError,
    make_preview,
    write_preview,
)

RECIPE = """\
format: lotproof/1
name: spot-preview
revision: 1
pixel_size: 0.5 um
inputs:
  section: "*.tif"
steps:
  spots:
    apply: threshold
    to: section
    method: fixed
    level: 100
  clean:
    apply: open
    to: spots
    footprint: square
    size: 3 px
  objects:
    apply: label
    to: clean
    connectivity: 8
  stats:
    apply: measure
    to: objects
  spare:
    apply: invert
    to: spots
limits:
  fraction:
    value: stats.area_fraction
    max: 0.5
"""


def _image() -> np.ndarray:
    """32x32 uint8: a dark field with three bright blocks, two of them touching at a corner."""
    image = np.full((32, 32), 20, np.uint8)
    image[2:6, 2:6] = 200
    image[6:9, 6:9] = 200  # meets the first block diagonally: one object with 8-connectivity
    image[20:28, 10:14] = 200
    return image


@pytest.fixture()
def case(tmp_path: Path) -> tuple[Path, Path]:
    lot = tmp_path / "lot"
    lot.mkdir()
    tifffile.imwrite(lot / "disc-00.tif", _image())
    recipe = tmp_path / "recipe.yaml"
    recipe.write_text(RECIPE)
    return recipe, lot / "disc-00.tif"


def _crop(png: Path, box: list[int]) -> np.ndarray:
    with Image.open(png) as im:
        return np.asarray(im.convert("RGB"))[box[1] : box[3], box[0] : box[2]]


def test_one_tile_per_step_with_boxes_on_the_sheet(case: tuple[Path, Path], tmp_path: Path) -> None:
    recipe, image = case
    out = tmp_path / "sheet.png"
    sheet = write_preview(recipe, image, out)
    side = json.loads(out.with_suffix(".json").read_text())
    assert side["format"] == SIDECAR_FORMAT
    order = list(load_recipe(recipe).order)
    assert order == ["spots", "clean", "objects", "stats"]  # 'spare' is not needed by anything
    assert [t["name"] for t in side["tiles"] if t["role"] == "step"] == order
    assert [t["name"] for t in side["tiles"] if t["role"] == "input"] == ["section"]
    assert side["not_run"] == ["spare"]
    assert [t["kind"] for t in side["tiles"][1:]] == ["threshold", "open", "label", "measure"]
    assert [t["data"] for t in side["tiles"][1:]] == ["mask", "mask", "labels", "table"]
    with Image.open(out) as im:
        assert im.size == (side["sheet"]["width"], side["sheet"]["height"])
    boxes = [t["box"] for t in side["tiles"]]
    for box in boxes:
        assert 0 <= box[0] < box[2] <= side["sheet"]["width"]
        assert 0 <= box[1] < box[3] <= side["sheet"]["height"]
    for i, a in enumerate(boxes):
        for b in boxes[i + 1 :]:
            assert a[2] <= b[0] or b[2] <= a[0] or a[3] <= b[1] or b[3] <= a[1], (a, b)
    assert side["tiles"][1]["params"] == {"method": "fixed", "level": 100.0}
    assert side["tiles"][-1]["rows"] == 2
    assert side["tiles"][-1]["values"]["count"] == {"value": 2.0, "unit": "-"}
    assert sheet.sidecar == side


def test_mask_and_labels_tiles_show_the_data(case: tuple[Path, Path], tmp_path: Path) -> None:
    recipe, image = case
    out = tmp_path / "sheet.png"
    write_preview(recipe, image, out)
    tiles = {t["name"]: t for t in json.loads(out.with_suffix(".json").read_text())["tiles"]}
    factor = TILE_SIDE // 32  # a small image is enlarged by a whole factor, nearest pixel
    # source: closed form, foreground = image > level (20 and 200 either side of 100)
    expected_mask = np.kron(_image() > 100, np.ones((factor, factor), bool))
    mask_px = _crop(out, tiles["spots"]["picture"])
    assert mask_px.shape[:2] == expected_mask.shape
    assert np.array_equal(mask_px[..., 0] == 255, expected_mask)
    assert set(np.unique(mask_px)) == {0, 255}
    # source: scipy.ndimage.label with the full 3x3 structure (8-connectivity)
    _labels, n = ndimage.label(_image() > 100, structure=np.ones((3, 3), int))
    assert n == 2
    label_px = _crop(out, tiles["objects"]["picture"])
    colours = {tuple(c) for c in label_px.reshape(-1, 3)} - {(0, 0, 0)}
    assert colours == {tuple(c) for c in label_colours(2)[1:]}
    # source: closed form, an overlay is the first input with outlines drawn in one colour
    overlay_px = _crop(out, tiles["stats"]["picture"])
    assert (np.all(overlay_px == (255, 200, 0), axis=-1)).any()


def test_steps_option_restricts_the_tiles_and_checks_names(
    case: tuple[Path, Path], tmp_path: Path
) -> None:
    recipe, image = case
    sheet = make_preview(recipe, image, steps=["stats", "spots"])
    assert [t["name"] for t in sheet.tiles] == ["section", "spots", "stats"]
    with pytest.raises(PreviewError, match="did you mean 'clean'"):
        make_preview(recipe, image, steps=["claen"])
    with pytest.raises(PreviewError, match="not run"):
        make_preview(recipe, image, steps=["spare"])
    with pytest.raises(SystemExit) as exit_info:
        main(
            [
                "preview",
                str(recipe),
                str(image),
                "--steps",
                "claen",
                "--out",
                str(tmp_path / "s.png"),
            ]
        )
    assert exit_info.value.code == 2
    with pytest.raises(SystemExit) as exit_info:
        main(["preview", str(recipe), str(image), "--out", str(tmp_path / "s.jpg")])
    assert exit_info.value.code == 2


def test_preview_uses_the_cache_and_is_reproducible(
    case: tuple[Path, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    recipe, image = case
    monkeypatch.setenv("LOTPROOF_CACHE", str(tmp_path / "cache"))
    out = tmp_path / "a.png"
    for _ in range(2):
        with pytest.raises(SystemExit) as exit_info:
            main(["preview", str(recipe), str(image), "--out", str(out)])
        assert exit_info.value.code == 0
        first = json.loads(out.with_suffix(".json").read_text())["steps"]
        first_png = out.read_bytes()
    assert first == {"computed": 0, "reused": 4}  # the second time every step came from the cache
    assert any((tmp_path / "cache").rglob("*"))
    with pytest.raises(SystemExit):
        main(["preview", str(recipe), str(image), "--out", str(tmp_path / "b.png"), "--no-cache"])
    assert json.loads((tmp_path / "b.json").read_text())["steps"] == {"computed": 4, "reused": 0}
    assert (tmp_path / "b.png").read_bytes() == first_png


def test_unreadable_image_is_exit_3(case: tuple[Path, Path], tmp_path: Path) -> None:
    recipe, _ = case
    bad = tmp_path / "lot" / "broken.tif"
    bad.write_bytes(b"not a tiff")
    with pytest.raises(SystemExit) as exit_info:
        main(["preview", str(recipe), str(bad), "--out", str(tmp_path / "s.png")])
    assert exit_info.value.code == 3


def test_store_argument(case: tuple[Path, Path], tmp_path: Path) -> None:
    recipe, image = case
    store = DiskStore(tmp_path / "store")
    assert make_preview(recipe, image, store=store).sidecar["steps"]["computed"] == 4
    assert make_preview(recipe, image, store=store).sidecar["steps"]["computed"] == 0


def _png_chunks(png: bytes) -> list[bytes]:
    """The chunk types of a PNG file, in order (PNG specification, section 5.3)."""
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    types, at = [], 8
    while at < len(png):
        length = int.from_bytes(png[at : at + 4], "big")
        types.append(png[at + 4 : at + 8])
        at += 12 + length
    return types


def test_the_users_matplotlib_settings_do_not_reach_the_sheet(case: tuple[Path, Path]) -> None:
    import matplotlib

    recipe, image = case
    plain = make_preview(recipe, image).png
    mine = {
        "font.size": 30,
        "font.family": "serif",
        "figure.facecolor": "red",
        "image.interpolation": "bilinear",
        "text.parse_math": True,
        "lines.linewidth": 7.0,
    }
    with matplotlib.rc_context(mine):
        assert make_preview(recipe, image).png == plain
    # nothing in the file but the picture: no text chunk naming the software or a date
    assert set(_png_chunks(plain)) == {b"IHDR", b"pHYs", b"IDAT", b"IEND"}


def test_a_file_name_with_dollar_signs_is_drawn_as_text(
    case: tuple[Path, Path], tmp_path: Path
) -> None:
    recipe, image = case
    # matplotlib would read '$...$' as mathematics, and '\frac{' there is an error
    odd = image.with_name("cost $\\frac{$ <b>&amp;.tif")
    odd.write_bytes(image.read_bytes())
    sheet = write_preview(recipe, odd, tmp_path / "odd.png")
    assert sheet.sidecar["image"] == odd.name
    with Image.open(tmp_path / "odd.png") as im:
        assert im.size == (sheet.sidecar["sheet"]["width"], sheet.sidecar["sheet"]["height"])
