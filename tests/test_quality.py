"""Unit tests of the ``image-quality`` and ``scale-check`` step kinds."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import tifffile
from pydantic import ValidationError

from lotproof import run_lot
from lotproof.runner.errors import RecipeError
from lotproof.runner.evaluate.image import resolve_params
from lotproof.runner.recipe.load import load_recipe
from lotproof.steps import REGISTRY, Output, Table
from lotproof.steps.calibration import (
    MIN_PERIODS,
    MIN_PITCH_PX,
    SCALE_DEFINITIONS,
    SCALE_TARGETS,
    SCALE_VALUES,
    ScaleCheckParams,
    hann_offset,
    scale_check,
)
from lotproof.steps.quality import (
    FLOAT_RANGE,
    QUALITY_DEFINITIONS,
    QUALITY_VALUES,
    ImageQualityParams,
    block_edges,
    image_quality,
    immerkaer_sigma,
    order_statistics,
    stated_range,
)
from lotproof.steps.units import Length

SQUARE = (1.0, 1.0)


def quality(image: np.ndarray, **params: object) -> dict[str, float]:
    out = image_quality(ImageQualityParams(**params), image, spacing=SQUARE[: image.ndim])
    assert isinstance(out, Output) and isinstance(out.data, Table) and out.data.n_rows == 0
    assert set(out.values) == set(QUALITY_VALUES) and dict(out.units) == dict(QUALITY_VALUES)
    return dict(out.values)


def grating(h: int, w: int, pitch: float, angle: float = 0.0, phase: float = 0.0) -> np.ndarray:
    """A sinusoidal grating, normal at ``angle`` degrees counter-clockwise as shown (rows down)."""
    t = math.radians(angle)
    y, x = np.mgrid[0:h, 0:w].astype(np.float64)
    u = (x * math.cos(t) - y * math.sin(t)) / pitch + phase
    return 100.0 + 50.0 * np.cos(2.0 * np.pi * u)


def check(image: np.ndarray, pitch: str, target: str, spacing=(0.5, 0.5)) -> dict[str, float]:
    params = resolve_params(ScaleCheckParams(pitch=pitch, target=target), spacing)
    out = scale_check(params, image, spacing=spacing)
    assert isinstance(out.data, Table) and set(out.values) == set(SCALE_VALUES)
    return dict(out.values)


# --------------------------------------------------------------------------- registration


def test_image_quality_is_registered_as_image_to_values() -> None:
    kind = REGISTRY["image-quality"]
    assert kind.takes == (frozenset({"image"}),) and not kind.variadic
    assert kind.gives == "values"
    assert kind.ndims == frozenset({2, 3})
    assert dict(kind.values) == dict(QUALITY_VALUES)
    assert set(kind.definitions) == set(kind.values) == set(QUALITY_DEFINITIONS)
    assert all(kind.definitions.values())
    assert set(QUALITY_VALUES.values()) == {"-"}  # so that limits write bare numbers
    assert kind.summary.startswith("Judge the picture")


def test_scale_check_is_registered_as_image_to_values() -> None:
    kind = REGISTRY["scale-check"]
    assert kind.takes == (frozenset({"image"}),) and kind.gives == "values"
    assert kind.ndims == frozenset({2})
    assert dict(kind.values) == dict(SCALE_VALUES)
    assert set(SCALE_DEFINITIONS) == set(SCALE_VALUES) and all(SCALE_DEFINITIONS.values())
    assert SCALE_VALUES["pixel_size_x"] == "um" and SCALE_VALUES["angle"] == "deg"
    assert SCALE_TARGETS == ("lines", "dots")


def test_image_quality_parameters() -> None:
    params = ImageQualityParams()
    assert params.bit_depth is None and params.blocks == 8
    assert ImageQualityParams(bit_depth=12).bit_depth == 12
    for bad in ({"bit_depth": 0}, {"bit_depth": 33}, {"blocks": 1}, {"blocks": 65}, {"bins": 3}):
        with pytest.raises(ValidationError):
            ImageQualityParams(**bad)


def test_scale_check_parameters() -> None:
    params = ScaleCheckParams(pitch="10 um", target="dots")
    assert params.pitch == Length(10.0, "um")
    with pytest.raises(ValidationError, match="bare number"):
        ScaleCheckParams(pitch=10, target="dots")
    with pytest.raises(ValidationError, match="physical length"):
        ScaleCheckParams(pitch="12 px", target="dots")
    with pytest.raises(ValidationError, match="target"):
        ScaleCheckParams(pitch="10 um")
    with pytest.raises(ValidationError):
        ScaleCheckParams(pitch="10 um", target="checkerboard")
    resolved = resolve_params(params, (0.5, 0.5))
    assert resolved.pitch == Length(20.0, "px")
    anisotropic = resolve_params(params, (0.4, 0.5))
    assert anisotropic.pitch.px_axes(2) == (25.0, 20.0)


# --------------------------------------------------------------------------- image-quality


def test_stated_range() -> None:
    assert stated_range(np.dtype(np.uint8), None) == (0, 255)
    assert stated_range(np.dtype(np.uint16), 12) == (0, 4095)
    assert stated_range(np.dtype(np.int16), None) == (-32768, 32767)
    assert stated_range(np.dtype(np.int16), 15) == (0, 32767)
    assert stated_range(np.dtype(np.float32), None) == FLOAT_RANGE == (0.0, 1.0)
    assert stated_range(np.dtype(np.float64), 16) == (0.0, 65535.0)
    with pytest.raises(ValueError, match="holds at most 8 bits"):
        stated_range(np.dtype(np.uint8), 12)
    with pytest.raises(ValueError, match="holds at most 15 bits"):
        stated_range(np.dtype(np.int16), 16)
    with pytest.raises(ValueError, match="numeric gray image"):
        stated_range(np.dtype(bool), None)


def test_order_statistic_is_ceil_n_p_in_integers() -> None:
    values = np.arange(1, 1001)[::-1].copy()  # 1000 .. 1
    # ceil(1000 * 0.999) = 999, ceil(1000 * 0.001) = 1: exactly, no float rounding
    assert order_statistics(values, [(999, 1000)])[0] == 999.0
    assert order_statistics(values, [(1, 1000)])[0] == 1.0
    assert order_statistics(np.arange(1, 1002), [(999, 1000)])[0] == 1000.0  # ceil(1000.999)
    assert order_statistics(np.array([[7]]), [(1, 1000)])[0] == 7.0
    assert order_statistics(np.array([3, 1, 2]), [(999, 1000)])[0] == 3.0
    # several quantiles from one partial sort, in the order asked
    assert order_statistics(values, [(999, 1000), (1, 2), (1, 1000)]) == [999.0, 500.0, 1.0]


def test_block_edges() -> None:
    assert block_edges(10, 4) == [0, 2, 5, 7, 10]
    assert block_edges(16, 8) == [0, 2, 4, 6, 8, 10, 12, 14, 16]
    assert block_edges(3, 8) == [0, 1, 2, 3]  # fewer pixels than blocks: one per pixel


def test_literal_image() -> None:
    image = np.array(
        [
            [0, 255, 10, 20],
            [10, 30, 10, 40],
            [255, 10, 0, 10],
        ],
        dtype=np.uint8,
    )
    values = quality(image, blocks=2)
    assert values["saturated_fraction"] == 2 / 12
    assert values["dark_clipped_fraction"] == 2 / 12
    # 12 pixels: the order statistics 1 and ceil(11.988) = 12, min and max
    assert values["used_range"] == 1.0
    # the two interior pixels: N * I = 4*30 - 2*(255 + 10 + 10 + 10) + (0 + 10 + 255 + 0) = -185
    # and 4*10 - 2*(10 + 30 + 40 + 0) + (255 + 20 + 10 + 10) = 175
    assert values["noise_sigma"] == pytest.approx(math.sqrt(math.pi / 2) / 12 * (185 + 175))
    # Laplacians at the interior: 255 + 10 + 10 + 10 - 4*30 = 165 and 10 + 30 + 40 + 0 - 40 = 40
    laplacian_var = np.var([165.0, 40.0])
    assert values["sharpness"] == pytest.approx(laplacian_var / np.var(image.astype(float)))
    # blocks: rows [0, 1), [1, 3); columns [0, 2), [2, 4)
    means = [(0 + 255) / 2, (10 + 20) / 2, (10 + 30 + 255 + 10) / 4, (10 + 40 + 0 + 10) / 4]
    assert values["illumination_ratio"] == pytest.approx(min(means) / max(means))


def test_bit_depth_sets_the_range() -> None:
    image = np.full((10, 10), 2000, np.uint16)
    image[0, :3] = 4095
    image[1, :5] = 0
    image[2, 0] = 3000
    values = quality(image, bit_depth=12)
    assert values["saturated_fraction"] == 0.03
    assert values["dark_clipped_fraction"] == 0.05
    assert values["used_range"] == 1.0  # min 0 and max 4095 are the order statistics 1 and 100
    # the same image against the dtype's range: nothing saturated
    assert quality(image)["saturated_fraction"] == 0.0
    assert quality(image)["used_range"] == pytest.approx(4095 / 65535)
    image[5, 5] = 4096
    with pytest.raises(ValueError, match=r"outside the range 0\.\.4095 of bit_depth 12"):
        quality(image, bit_depth=12)


def test_signed_and_float_images() -> None:
    signed = np.array([[-32768, 0, 32767], [1, 2, 3], [4, 5, 6]], np.int16)
    values = quality(signed)
    assert values["saturated_fraction"] == values["dark_clipped_fraction"] == 1 / 9
    assert values["used_range"] == 1.0
    floats = np.linspace(0.0, 1.0, 25).reshape(5, 5)
    values = quality(floats)
    assert values["saturated_fraction"] == values["dark_clipped_fraction"] == 1 / 25
    assert values["used_range"] == 1.0
    values = quality(floats * 4095.0, bit_depth=12)
    assert values["saturated_fraction"] == values["dark_clipped_fraction"] == 1 / 25
    with pytest.raises(ValueError, match="state the camera's bit_depth"):
        quality(floats * 4095.0)
    with pytest.raises(ValueError, match="outside the range"):
        quality(floats - 0.5)


def test_constant_images_have_written_down_answers() -> None:
    values = quality(np.full((6, 7), 100, np.uint8))
    assert values == {
        "saturated_fraction": 0.0,
        "dark_clipped_fraction": 0.0,
        "used_range": 0.0,
        "noise_sigma": 0.0,
        "sharpness": 0.0,
        "illumination_ratio": 1.0,
    }
    black = quality(np.zeros((4, 5, 6), np.uint16))
    assert black["dark_clipped_fraction"] == 1.0 and math.isnan(black["illumination_ratio"])
    assert black["noise_sigma"] == 0.0 and black["sharpness"] == 0.0
    white = quality(np.full((3, 3), 255, np.uint8))
    assert white["saturated_fraction"] == 1.0 and white["illumination_ratio"] == 1.0


def test_negative_block_means_give_nan_illumination() -> None:
    image = np.zeros((8, 8), np.int16)
    image[:, :4] = -100
    image[:, 4:] = 100
    assert math.isnan(quality(image, blocks=2)["illumination_ratio"])


def test_volume_noise_is_the_mean_of_the_slices() -> None:
    rng = np.random.default_rng(7)
    volume = rng.integers(0, 4096, (3, 20, 30)).astype(np.uint16)
    slices = [immerkaer_sigma(s) for s in volume]
    assert quality(volume)["noise_sigma"] == pytest.approx(np.mean(slices), rel=1e-12)


def test_volume_sharpness_is_in_plane() -> None:
    # a volume that changes only along z has no in-plane structure
    volume = np.zeros((4, 6, 6), np.uint8)
    volume[1::2] = 200
    values = quality(volume)
    assert values["sharpness"] == 0.0 and values["noise_sigma"] == 0.0


def test_volume_sharpness_pools_the_slices() -> None:
    rng = np.random.default_rng(17)
    volume = rng.integers(0, 256, (5, 12, 9)).astype(np.uint8)
    data = volume.astype(np.float64)
    laplacians = [
        (p[:-2, 1:-1] + p[2:, 1:-1] + p[1:-1, :-2] + p[1:-1, 2:] - 4 * p[1:-1, 1:-1]).ravel()
        for p in data
    ]
    expected = np.var(np.concatenate(laplacians)) / np.var(data)
    assert quality(volume)["sharpness"] == pytest.approx(expected, rel=1e-12)


def test_gain_and_offset() -> None:
    rng = np.random.default_rng(3)
    image = rng.random((40, 50)) * 0.5
    base = quality(image)
    scaled = quality(0.2 + 1.5 * image)
    # the focus measure is blind to gain and offset; the noise scales with the gain
    assert scaled["sharpness"] == pytest.approx(base["sharpness"], rel=1e-9)
    assert scaled["noise_sigma"] == pytest.approx(1.5 * base["noise_sigma"], rel=1e-9)


def test_same_image_same_values() -> None:
    rng = np.random.default_rng(11)
    image = rng.integers(0, 256, (33, 47)).astype(np.uint8)
    first = quality(image)
    assert quality(image.copy()) == first


def test_image_quality_refuses_bad_images() -> None:
    with pytest.raises(ValueError, match="at least 3 x 3 pixels"):
        quality(np.zeros((2, 40), np.uint8))
    with pytest.raises(ValueError, match="at least 3 x 3 pixels"):
        quality(np.zeros((5, 40, 2), np.uint8))
    with pytest.raises(ValueError, match="empty image"):
        quality(np.zeros((0, 0), np.uint8))
    nan = np.full((4, 4), 0.5)
    nan[1, 1] = np.nan
    with pytest.raises(ValueError, match="NaN or infinite"):
        quality(nan)
    with pytest.raises(ValueError, match="numeric gray image"):
        quality(np.zeros((4, 4), bool))
    with pytest.raises(ValueError, match="beyond 2\\*\\*53"):
        quality(np.full((4, 4), 2**60, np.int64))
    with pytest.raises(ValueError, match="holds at most 8 bits"):
        quality(np.zeros((4, 4), np.uint8), bit_depth=10)


# --------------------------------------------------------------------------- scale-check


def test_hann_offset_literal_cases() -> None:
    assert hann_offset(1.0, 2.0, 1.0) == 0.0  # on the bin: neighbours W(1) = 1/2 each
    assert hann_offset(0.0, 1.0, 1.0) == 0.5  # half way: the two bins are equal
    assert hann_offset(1.0, 1.0, 0.0) == -0.5
    with pytest.raises(ValueError):
        hann_offset(0.0, 0.0, 0.0)


def test_lines_along_x_give_nan_along_y() -> None:
    values = check(grating(128, 160, 9.0), "4.5 um", "lines")
    assert values["pitch_px_x"] == pytest.approx(9.0, rel=1e-6)
    assert values["pixel_size_x"] == pytest.approx(0.5, rel=1e-6)
    assert abs(values["scale_error_x"]) < 1e-6 and values["scale_error"] < 1e-6
    for name in ("pitch_px_y", "pixel_size_y", "scale_error_y"):
        assert math.isnan(values[name]), name
    assert abs(values["angle"]) < 1e-4


def test_lines_along_y() -> None:
    values = check(grating(160, 128, 9.0, angle=90.0), "4.5 um", "lines")
    assert values["pitch_px_y"] == pytest.approx(9.0, rel=1e-6)
    assert math.isnan(values["pitch_px_x"]) and math.isnan(values["scale_error_x"])
    assert abs(values["angle"]) < 1e-4


def test_angle_is_counter_clockwise_as_shown() -> None:
    # the lines' normal turned towards the top of the image (-y): counter-clockwise on screen
    assert check(grating(128, 128, 9.0, angle=3.0), "4.5 um", "lines")["angle"] == pytest.approx(
        3.0, abs=1e-3
    )
    turned = grating(128, 128, 9.0, angle=93.0)
    assert check(turned, "4.5 um", "lines")["angle"] == pytest.approx(3.0, abs=1e-3)


def test_scale_error_is_signed() -> None:
    image = grating(128, 128, 10.0)
    # the recipe says 0.5 um per pixel: 5 um spans 10 px, the image agrees
    assert check(image, "5 um", "lines")["scale_error"] < 1e-6
    # the recipe says 0.49 um: the pixels are really 5 / 10 = 0.5 um, 2 % larger
    values = check(image, "5 um", "lines", spacing=(0.49, 0.49))
    assert values["scale_error_x"] == pytest.approx(0.5 / 0.49 - 1, abs=1e-5)
    assert values["scale_error"] == pytest.approx(0.5 / 0.49 - 1, abs=1e-5)
    values = check(image, "5 um", "lines", spacing=(0.52, 0.52))
    assert values["scale_error_x"] == pytest.approx(0.5 / 0.52 - 1, abs=1e-5)
    assert values["scale_error_x"] < 0
    assert values["scale_error"] == pytest.approx(1 - 0.5 / 0.52, abs=1e-5)


def test_grid_of_two_gratings_is_dots() -> None:
    image = grating(128, 140, 8.0) + grating(128, 140, 8.0, angle=90.0)
    values = check(image, "4 um", "dots")
    assert values["pitch_px_x"] == pytest.approx(8.0, rel=1e-6)
    assert values["pitch_px_y"] == pytest.approx(8.0, rel=1e-6)
    assert values["scale_error"] < 1e-6
    with pytest.raises(ValueError, match="it is a grid; write target: dots"):
        check(image, "4 um", "lines")


def test_lines_given_as_dots_are_refused() -> None:
    with pytest.raises(ValueError, match=r"no grating found .* for parallel lines write target"):
        check(grating(128, 128, 8.0), "4 um", "dots")


def test_no_grating_is_an_error_not_a_number() -> None:
    with pytest.raises(ValueError, match="no grating found: the image is constant"):
        check(np.full((128, 128), 7, np.uint8), "4 um", "lines")
    noise = np.random.default_rng(5).normal(100.0, 10.0, (256, 256))
    for target in SCALE_TARGETS:
        with pytest.raises(ValueError, match=r"no grating found .* times the median power"):
            check(noise, "4 um", target)
    # a grating at twice the period the recipe expects is not taken for it
    with pytest.raises(ValueError, match="no grating found"):
        check(grating(256, 256, 16.0), "4 um", "lines")


def test_scale_check_refuses_too_few_periods_or_pixels() -> None:
    with pytest.raises(ValueError, match=f"at least {MIN_PERIODS}"):
        check(grating(64, 64, 10.0), "5 um", "lines")  # 6.4 periods
    with pytest.raises(ValueError, match=f"at least {MIN_PITCH_PX:g} px per period"):
        check(grating(64, 64, 2.5), "1.25 um", "lines")
    # lines need periods only along the axis they repeat along
    tall = grating(512, 96, 10.0)
    assert check(tall, "5 um", "lines")["pitch_px_x"] == pytest.approx(10.0, rel=1e-5)
    with pytest.raises(ValueError, match="periods of the target along x"):
        check(grating(512, 64, 10.0), "5 um", "dots")
    nan = grating(128, 128, 8.0)
    nan[3, 3] = np.nan
    with pytest.raises(ValueError, match="NaN or infinite"):
        check(nan, "4 um", "lines")


# --------------------------------------------------------------------------- in a recipe

RECIPE = """\
format: lotproof/1
name: acquisition-test
revision: 1
pixel_size: 0.5 um
inputs:
  target: "*.tif"
steps:
  picture:
    apply: image-quality
    to: target
    bit_depth: 12
  scale:
    apply: scale-check
    to: target
    pitch: 5 um
    target: lines
limits:
  clipped:
    value: picture.saturated_fraction
    max: 0.001
  noise:
    value: picture.noise_sigma
    max: 20
  magnification:
    value: scale.scale_error
    max: 0.005
  rotation:
    value: scale.angle
    range: [-1 deg, 1 deg]
"""


def test_limits_on_quality_values_read_naturally(tmp_path: Path) -> None:
    path = tmp_path / "recipe.yaml"
    path.write_text(RECIPE)
    recipe = load_recipe(path)
    assert recipe.limits["noise"].high == 20.0
    assert (recipe.limits["rotation"].low, recipe.limits["rotation"].high) == (-1.0, 1.0)
    path.write_text(RECIPE.replace("range: [-1 deg, 1 deg]", "max: 1"))
    with pytest.raises(RecipeError, match=r"bare number .* write 1 deg"):
        load_recipe(path)
    path.write_text(RECIPE.replace("pitch: 5 um", "pitch: 10 px"))
    with pytest.raises(RecipeError, match=r"recipe.yaml:15:.*physical length"):
        load_recipe(path)


def test_a_lot_runs_with_quality_and_scale_limits(tmp_path: Path) -> None:
    lot = tmp_path / "lot"
    lot.mkdir()
    good = (1000 + 6 * (grating(128, 128, 10.0) - 100)).astype(np.uint16)  # 700..1300
    clipped = good.copy()
    clipped[:8] = 4095  # 1/16 of the image saturated
    tifffile.imwrite(lot / "a-good.tif", good)
    tifffile.imwrite(lot / "b-clipped.tif", clipped)
    path = tmp_path / "recipe.yaml"
    path.write_text(RECIPE)
    summary = run_lot(path, lot, tmp_path / "runs")
    by_id = {r.id: r for r in summary.results}
    assert by_id["a-good.tif"].status == "ok"
    assert by_id["a-good.tif"].values[("picture", "saturated_fraction")] == 0.0
    assert by_id["b-clipped.tif"].values[("picture", "saturated_fraction")] == 1 / 16
    per_image = summary.verdicts.limits["clipped"].per_image
    assert per_image["a-good.tif"][1] == "pass" and per_image["b-clipped.tif"][1] == "fail"
    assert summary.verdicts.limits["magnification"].per_image["a-good.tif"][1] == "pass"
    header = (summary.run_dir / "images.csv").read_text().splitlines()[0]
    assert "picture.noise_sigma [-]" in header and "scale.angle [deg]" in header
    assert "scale.pixel_size_x [um]" in header
