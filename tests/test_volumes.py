"""Volumes, voxel sizes, the calibration rule, per-axis lengths and the new measure values."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import tifffile
from pydantic import ValidationError

from lotproof import load_recipe, run_lot
from lotproof.runner.errors import RecipeError
from lotproof.runner.evaluate.image import resolve_params
from lotproof.runner.evaluate.inputs import read_image
from lotproof.steps import REGISTRY
from lotproof.steps.footprints import MorphologyParams, build_footprint
from lotproof.steps.masks import RemoveSmallParams, remove_small
from lotproof.steps.measure import (
    COLUMN_DEFINITIONS,
    COLUMN_DEFINITIONS_3D,
    IMAGE_VALUES,
    MEASURE_VALUES,
    OBJECT_COLUMNS,
    OBJECT_COLUMNS_3D,
    VALUE_DEFINITIONS,
    VOLUME_VALUES,
    MeasureParams,
    PhaseFractionParams,
    measure,
    phase_fraction,
)
from lotproof.steps.units import (
    Area,
    Length,
    Volume,
    resolve_for_spacing,
    resolve_to_px,
)

from _builders import write_recipe

VOLUME = (np.arange(6 * 8 * 10) % 200).astype(np.uint8).reshape(6, 8, 10)


# ---------------------------------------------------------------- reading volumes


def test_key_value_ome_and_page_stacks_load_as_volumes(tmp_path: Path) -> None:
    # the unit and spacing keys of the key=value text in the ImageDescription (imagej=True)
    tifffile.imwrite(
        tmp_path / "keyvalue.tif",
        VOLUME,
        imagej=True,
        resolution=(1 / 0.8, 1 / 0.8),
        metadata={"spacing": 1.2, "unit": "micron", "axes": "ZYX"},
    )
    tifffile.imwrite(
        tmp_path / "ome.tif",
        VOLUME,
        ome=True,
        metadata={"axes": "ZYX", "PhysicalSizeX": 0.8, "PhysicalSizeY": 0.8, "PhysicalSizeZ": 1.2},
    )
    with tifffile.TiffWriter(tmp_path / "pages.tif") as writer:
        for page in VOLUME:
            writer.write(page, contiguous=False)
    for name in ("keyvalue", "ome", "pages"):
        image = read_image(tmp_path / f"{name}.tif", tmp_path)
        np.testing.assert_array_equal(image.data, VOLUME)
    described = read_image(tmp_path / "keyvalue.tif", tmp_path).calibration
    assert described.pixel_size_um == pytest.approx((1.2, 0.8, 0.8))
    assert described.source == "ImageDescription unit and resolution tags"
    ome = read_image(tmp_path / "ome.tif", tmp_path).calibration
    assert ome.pixel_size_um == pytest.approx((1.2, 0.8, 0.8))
    assert ome.source == "OME-XML PhysicalSize"
    assert read_image(tmp_path / "pages.tif", tmp_path).calibration.pixel_size_um is None


def test_pages_of_different_shapes_are_refused(tmp_path: Path) -> None:
    with tifffile.TiffWriter(tmp_path / "mixed.tif") as writer:
        writer.write(VOLUME[0], contiguous=False)
        writer.write(VOLUME[0, :4], contiguous=False)
    with pytest.raises(Exception, match="image series of different shapes"):
        read_image(tmp_path / "mixed.tif", tmp_path)


# ---------------------------------------------------------------- recipe sizes

# kept here, not built by _builders.recipe_text: a 3-D recipe whose size line each test writes
BASE = """\
format: lotproof/1
name: vol-test
revision: 1
{size}
inputs:
  ct: "*.tif"
steps:
  solid:
    apply: threshold
    to: ct
    method: fixed
    level: 100
  clean:
    apply: open
    to: solid
    footprint: ball
    radius: 2 um
  stats:
    apply: measure
    to: clean
    connectivity: 26
limits:
  fraction:
    value: stats.volume_fraction
    max: 1
"""


def _recipe(tmp_path: Path, size: str) -> Path:
    return write_recipe(tmp_path, BASE.format(size=size))


def test_voxel_size_is_read_x_first(tmp_path: Path) -> None:
    recipe = load_recipe(_recipe(tmp_path, "voxel_size: [0.8 um, 0.9 um, 1.2 um]"))
    assert [str(v) for v in recipe.voxel_size] == ["0.8 um", "0.9 um", "1.2 um"]
    assert recipe.pixel_size is None and not recipe.size_from_image
    assert recipe.calibration == "image-must-agree"
    assert recipe.size_text == "[0.8 um, 0.9 um, 1.2 um]"


@pytest.mark.parametrize(
    ("size", "message"),
    [
        ("", "missing required key 'pixel_size'"),
        ("pixel_size: 1 um\nvoxel_size: [1 um, 1 um, 1 um]", "either pixel_size or voxel_size"),
        ("voxel_size: [1 um]", "at least 2"),
        ("voxel_size: [1 um, 1 px, 1 um]", "voxel size must be a physical length"),
        ("voxel_size: [1 um, 1, 1 um]", "bare number"),
        ("pixel_size: 1 um\ncalibration: image-wins", "'image-must-agree', 'recipe-wins'"),
    ],
)
def test_size_errors(tmp_path: Path, size: str, message: str) -> None:
    with pytest.raises(RecipeError, match=message):
        load_recipe(_recipe(tmp_path, size))


def _ball_volume(tmp_path: Path, spacing_zyx: tuple[float, float, float] | None) -> Path:
    lot = tmp_path / "lot"
    lot.mkdir()
    z, y, x = np.ogrid[:16, :20, :20]
    ball = ((z - 8) * 2) ** 2 + (y - 10) ** 2 + (x - 10) ** 2 <= 36
    data = np.where(ball, 200, 20).astype(np.uint8)
    if spacing_zyx is None:
        tifffile.imwrite(lot / "v.tif", data)
    else:
        dz, dy, dx = spacing_zyx
        tifffile.imwrite(
            lot / "v.tif",
            data,
            imagej=True,
            resolution=(1 / dx, 1 / dy),
            metadata={"spacing": dz, "unit": "um", "axes": "ZYX"},
        )
    return lot


def test_image_and_recipe_must_agree(tmp_path: Path) -> None:
    lot = _ball_volume(tmp_path, (2.0, 1.0, 1.0))
    agreeing = run_lot(
        load_recipe(_recipe(tmp_path, "voxel_size: [1 um, 1 um, 2 um]")), lot, tmp_path / "runs"
    )
    result = agreeing.results[0]
    assert result.status == "ok" and result.spacing == (2.0, 1.0, 1.0)
    # z 2 um per voxel: the ball of 6 voxels radius in x and y has 3 slices of radius in z
    assert result.values[("stats", "count")] == 1
    # the recipe says 1.5 um along z, the image 2 um: more than 1 % apart
    text = "voxel_size: [1 um, 1 um, 1.5 um]"
    refused = run_lot(load_recipe(_recipe(tmp_path, text)), lot, tmp_path / "runs")
    assert refused.results[0].status == "incomplete"
    assert "differ by more than 1%" in refused.results[0].reason
    assert "z 2" in refused.results[0].reason
    won = run_lot(
        load_recipe(_recipe(tmp_path, text + "\ncalibration: recipe-wins")), lot, tmp_path / "runs"
    )
    assert won.results[0].status == "ok" and won.results[0].spacing == (1.5, 1.0, 1.0)
    assert any("recipe-wins" in note for note in won.results[0].notes)
    from_image = run_lot(
        load_recipe(_recipe(tmp_path, "pixel_size: from-image")), lot, tmp_path / "runs"
    )
    assert from_image.results[0].spacing == pytest.approx((2.0, 1.0, 1.0))


def test_uncalibrated_volume_takes_the_recipe_size(tmp_path: Path) -> None:
    lot = _ball_volume(tmp_path, None)
    summary = run_lot(load_recipe(_recipe(tmp_path, "pixel_size: 1 um")), lot, tmp_path / "runs")
    assert summary.results[0].status == "ok" and summary.results[0].spacing == (1.0, 1.0, 1.0)
    two_d = run_lot(
        load_recipe(_recipe(tmp_path, "voxel_size: [1 um, 1 um]")), lot, tmp_path / "runs"
    )
    assert "write voxel_size: [x, y, z]" in two_d.results[0].reason


# ---------------------------------------------------------------- lengths per axis


def test_square_pixels_resolve_exactly_as_before() -> None:
    params = MorphologyParams(footprint="disk", radius=Length(1.5, "um"))
    resolved = resolve_params(params, (0.5, 0.5))
    assert resolved.radius == resolve_to_px(Length(1.5, "um"), 0.5) == Length(3.0, "px")
    assert resolved.model_dump(mode="json")["radius"] == "3 px"


def test_anisotropic_lengths_carry_every_axis() -> None:
    length = resolve_for_spacing(Length(5, "um"), (2.5, 1.0, 1.0))
    assert length.axes == (2.0, 5.0, 5.0) and length.value == 5.0
    assert str(length) == "[2, 5, 5] px (z, y, x)"
    with pytest.raises(ValueError, match="differs per axis"):
        _ = length.px
    assert resolve_for_spacing(Length(3, "px"), (2.5, 1.0, 1.0)) == Length(3, "px")
    # areas with the pixel area, volumes with the voxel volume (closed form)
    assert resolve_for_spacing(Area(10, "um2"), (0.5, 2.0)).px == 10.0
    assert resolve_for_spacing(Volume(60, "um3"), (3.0, 2.5, 2.5)).px == 3.2
    with pytest.raises(ValueError, match="is an area, but the data is a 3-D volume"):
        resolve_for_spacing(Area(10, "um2"), (1.0, 1.0, 1.0))
    with pytest.raises(ValueError, match="is a volume, but the data is a 2-D image"):
        resolve_for_spacing(Volume(10, "um3"), (1.0, 1.0))


def _footprint(spacing: tuple[float, ...], **params: object) -> np.ndarray:
    model = MorphologyParams.model_validate(params)
    return build_footprint(resolve_params(model, spacing), len(spacing))


def test_box_and_line_footprints_per_axis() -> None:
    # 5 um side: 5 px along x and y, 2.5 -> 3 px along z (nearest odd, ties up)
    assert _footprint((2.0, 1.0, 1.0), footprint="cube", size="5 um").shape == (3, 5, 5)
    # 3 um: 6 -> 7 px along x (dx 0.5 um), 3 px along y
    assert _footprint((1.0, 0.5), footprint="rectangle", width="3 um", height="3 um").shape == (
        3,
        7,
    )
    horizontal = _footprint((1.0, 0.5), footprint="line", length="3 um")
    np.testing.assert_array_equal(horizontal, np.ones((1, 7), bool))
    vertical = _footprint((1.0, 0.5), footprint="line", length="3 um", angle=90)
    np.testing.assert_array_equal(vertical, np.ones((3, 1), bool))
    # an ellipse: radius 2 um is 2 px along y and 4 px along x
    disk = _footprint((1.0, 0.5), footprint="disk", radius="2 um")
    assert disk.shape == (5, 9) and disk[2].all() and disk[:, 4].all() and not disk[0, 0]


def test_remove_small_by_volume() -> None:
    mask = np.zeros((4, 4, 4), bool)
    mask[0, 0, :3] = True  # 3 voxels
    mask[3, 3, 3] = True  # 1 voxel
    params = RemoveSmallParams(min_volume=Volume(3, "px3"))
    np.testing.assert_array_equal(
        remove_small(params, mask, spacing=(1.0,) * 3), mask & (np.arange(4)[:, None, None] == 0)
    )
    with pytest.raises(ValueError, match="min_volume is for 3-D masks"):
        remove_small(params, mask[0], spacing=(1.0, 1.0))
    with pytest.raises(ValidationError, match="either min_area or min_volume"):
        RemoveSmallParams(min_area="1 px2", min_volume="1 px3")


# ---------------------------------------------------------------- measure values


def test_every_value_has_a_unit_and_a_definition() -> None:
    kind = REGISTRY["measure"]
    assert dict(kind.values) == dict(MEASURE_VALUES)
    assert set(MEASURE_VALUES) == set(IMAGE_VALUES) | set(VOLUME_VALUES)
    for name in set(IMAGE_VALUES) & set(VOLUME_VALUES):
        assert IMAGE_VALUES[name] == VOLUME_VALUES[name], name
    assert set(VALUE_DEFINITIONS) == set(MEASURE_VALUES)
    assert set(COLUMN_DEFINITIONS) == set(OBJECT_COLUMNS)
    assert set(COLUMN_DEFINITIONS_3D) == set(OBJECT_COLUMNS_3D)
    assert VOLUME_VALUES["number_density_3d"] == "1/mm3"
    assert VOLUME_VALUES["surface_density"] == "1/um"


def test_area_weighted_mean_and_border_rule_2d() -> None:
    mask = np.zeros((8, 8), bool)
    mask[0:2, 0:2] = True  # 4 px, touches the frame
    mask[4:5, 4:5] = True  # 1 px
    mask[3:6, 6:7] = False
    spacing = (1.0, 1.0)
    ecd4, ecd1 = math.sqrt(16 / math.pi), math.sqrt(4 / math.pi)
    out = measure(MeasureParams(), mask, spacing=spacing)
    # source: closed form, ISO 9276-2 x_1,0 = sum(x) / n and x_1,2 = sum(A x) / sum(A)
    assert out.values["ecd_mean"] == pytest.approx((ecd4 + ecd1) / 2)
    assert out.values["ecd_area_mean"] == pytest.approx((4 * ecd4 + 1 * ecd1) / 5)
    assert out.values["size_count"] == 2
    excluded = measure(MeasureParams(border="exclude"), mask, spacing=spacing)
    assert excluded.values["size_count"] == 1 and excluded.values["count"] == 2
    assert excluded.values["ecd_max"] == pytest.approx(ecd1)
    assert excluded.values["area_fraction"] == out.values["area_fraction"] == 5 / 64
    assert excluded.data.n_rows == 2
    only_border = measure(
        MeasureParams(border="exclude"), mask & ~(np.arange(8) == 4)[:, None], spacing=spacing
    )
    assert math.isnan(only_border.values["ecd_mean"])


def test_measure_3d_literal_values() -> None:
    mask = np.zeros((4, 5, 6), bool)
    mask[1:3, 1:3, 1:3] = True  # 8 voxels inside
    mask[0, 0, 0] = True  # 1 voxel on the frame
    spacing = (2.0, 1.0, 0.5)
    out = measure(MeasureParams(connectivity=6, border="exclude"), mask, spacing=spacing)
    table = out.data.columns
    assert list(table) == list(OBJECT_COLUMNS_3D)
    # source: closed form, 1 voxel = 2 x 1 x 0.5 um3; field 120 voxels
    assert list(table["volume"]) == [1.0, 8.0]
    assert list(table["touches_border"]) == [1, 0]
    assert table["bbox_min_x"][1] == 0.25 and table["bbox_max_x"][1] == 1.25
    assert table["centroid_z"][1] == 3.0
    assert out.values["volume_fraction"] == 9 / 120
    assert out.values["number_density_3d"] == pytest.approx(2 / (120 * 1e-9))
    assert (
        out.values["esd_max"]
        == out.values["esd_mean"]
        == pytest.approx((6 * 8 / math.pi) ** (1 / 3))
    )
    assert out.values["size_count"] == 1
    assert out.values["surface_density"] > 0
    with pytest.raises(ValueError, match="connectivity 6 or 26"):
        measure(MeasureParams(connectivity=18), mask, spacing=spacing)
    empty = measure(MeasureParams(), np.zeros((4, 4, 4), bool), spacing=(1.0,) * 3)
    assert empty.values["count"] == 0 and empty.values["surface_density"] == 0
    assert math.isnan(empty.values["esd_mean"])


def test_phase_fraction() -> None:
    reference = np.zeros((2, 4, 4), bool)
    reference[:, :2] = True  # 16 of 32
    phase = np.zeros_like(reference)
    phase[0, 0, :3] = True
    phase[1, 3, 3] = True  # outside the reference: not counted
    out = phase_fraction(PhaseFractionParams(), phase, reference, spacing=(1.0,) * 3)
    assert out.values == {"fraction": 3 / 16, "reference_fraction": 0.5}
    nothing = phase_fraction(
        PhaseFractionParams(), phase, ~np.ones_like(reference), spacing=(1.0,) * 3
    )
    assert math.isnan(nothing.values["fraction"])
