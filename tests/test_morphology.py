"""Unit tests of the footprint parameters and the morphology step kinds."""

from __future__ import annotations

import numpy as np
import pytest
from pydantic import ValidationError

from lotproof.steps import _morph
from lotproof.steps import footprints as fps
from lotproof.steps import morphology as morph
from lotproof.steps._registry import get_kind
from lotproof.steps.footprints import (
    FOOTPRINT_NEEDS,
    FOOTPRINTS,
    FOOTPRINTS_2D,
    FOOTPRINTS_3D,
    MorphologyParams,
)

SPACING = (1.0, 1.0)
KINDS = ("erode", "widen", "open", "close", "outline", "subtract-background")
CROSS = dict(footprint="disk", radius="1 px")  # the 3x3 cross


def _message(excinfo: pytest.ExceptionInfo) -> str:
    return "; ".join(e["msg"] for e in excinfo.value.errors())


# --------------------------------------------------------------------------- parameters


def test_footprint_constants():
    assert FOOTPRINTS == FOOTPRINTS_2D + FOOTPRINTS_3D
    assert set(FOOTPRINT_NEEDS) == set(FOOTPRINTS)


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        (dict(footprint="disk"), "footprint 'disk' needs radius (e.g. radius: 3 px)"),
        (dict(), "footprint 'disk' needs radius (e.g. radius: 3 px)"),
        (dict(footprint="ball"), "footprint 'ball' needs radius (e.g. radius: 3 px)"),
        (dict(footprint="square"), "footprint 'square' needs size (e.g. size: 5 px)"),
        (
            dict(footprint="rectangle"),
            "footprint 'rectangle' needs width and height (e.g. width: 7 px, height: 3 px)",
        ),
        (dict(footprint="rectangle", width="3 px"), "footprint 'rectangle' needs height"),
        (dict(footprint="line", angle=30), "footprint 'line' needs length (e.g. length: 9 px)"),
        (dict(footprint="disk", radius="3 px", size="3 px"), "footprint 'disk' does not use size"),
        (
            dict(footprint="cube", size="3 px", radius="1 px", length="2 px"),
            "footprint 'cube' does not use radius, length",
        ),
        (dict(footprint="square", size="3 px", angle=10), "footprint 'square' does not use angle"),
    ],
)
def test_footprint_sizes_are_checked(spec, message):
    with pytest.raises(ValidationError) as excinfo:
        MorphologyParams(**spec)
    assert message in _message(excinfo)


def test_missing_and_unused_are_reported_together():
    with pytest.raises(ValidationError) as excinfo:
        MorphologyParams(footprint="square", radius="2 px")
    text = _message(excinfo)
    assert "footprint 'square' needs size" in text
    assert "footprint 'square' does not use radius" in text


def test_bare_number_and_unknown_keys_are_refused():
    with pytest.raises(ValidationError) as excinfo:
        MorphologyParams(footprint="disk", radius=3)
    assert "write 3 px or 1.5 um" in _message(excinfo)
    with pytest.raises(ValidationError):
        MorphologyParams(footprint="disk", radius="3 px", iterations=2)
    with pytest.raises(ValidationError):
        MorphologyParams(footprint="octagon", radius="3 px")


def test_angle_must_be_finite():
    with pytest.raises(ValidationError):
        MorphologyParams(footprint="line", length="5 px", angle=float("nan"))


def test_valid_params_and_defaults():
    params = MorphologyParams(radius="1.5 um")
    assert params.footprint == "disk" and params.angle == 0.0
    assert str(params.radius) == "1.5 um"
    assert MorphologyParams(footprint="line", length="9 px", angle=0).length.px == 9.0
    assert morph.OutlineParams(**CROSS).mode == "full"
    with pytest.raises(ValidationError):
        morph.OutlineParams(**CROSS, mode="middle")


def test_subtract_background_requires_features():
    with pytest.raises(ValidationError) as excinfo:
        morph.BackgroundParams(footprint="disk", radius="5 px")
    assert excinfo.value.errors()[0]["loc"] == ("features",)
    assert morph.BackgroundParams(**CROSS, features="dark").features == "dark"
    with pytest.raises(ValidationError):
        morph.BackgroundParams(**CROSS, features="grey")


def test_every_field_is_described():
    for model in (MorphologyParams, morph.OutlineParams, morph.BackgroundParams):
        for name, field in model.model_fields.items():
            assert field.description, f"{model.__name__}.{name}"


# --------------------------------------------------------------------------- footprints


@pytest.mark.parametrize(
    ("value", "odd"),
    [(0.5, 1), (1.0, 1), (1.99, 1), (2.0, 3), (3.0, 3), (3.9, 3), (4.0, 5), (4.1, 5)],
)
def test_rounding_rule(value, odd):
    assert fps.nearest_odd(value) == odd


def test_box_shapes():
    assert fps.square(4.0).shape == (5, 5)
    assert fps.rectangle(6.0, 3.0).shape == (3, 7)  # (height, width)
    assert fps.cube(2.0).shape == (3, 3, 3)
    assert fps.rectangle(1.0, 1.0).shape == (1, 1)


def test_small_radius_is_one_pixel():
    assert np.array_equal(fps.disk(0.5), np.ones((1, 1), dtype=bool))
    assert np.array_equal(fps.diamond(0.99), np.ones((1, 1), dtype=bool))


@pytest.mark.parametrize("bad", [0.0, -1.0, float("inf"), float("nan")])
def test_builders_refuse_bad_sizes(bad):
    with pytest.raises(ValueError):
        fps.disk(bad)
    with pytest.raises(ValueError):
        fps.nearest_odd(bad)


def test_two_d_footprint_on_a_volume_is_an_error():
    volume = np.zeros((3, 4, 5), dtype=np.uint8)
    with pytest.raises(ValueError, match="footprint 'disk' is 2-D but the data is a 3-D volume"):
        morph.erode(MorphologyParams(**CROSS), volume, spacing=(1.0, 1.0, 1.0))
    with pytest.raises(ValueError, match="footprint 'ball' is 3-D but the data is 2-D"):
        morph.erode(MorphologyParams(footprint="ball", radius="1 px"), volume[0], spacing=SPACING)


def test_footprint_is_clipped_to_the_data():
    params = MorphologyParams(footprint="disk", radius="1e9 px")
    fp = fps.build_footprint(params, 2, (3, 4))
    assert fp.shape == (5, 7) and fp.all()
    long_line = MorphologyParams(footprint="line", length="1e9 px", angle=30)
    line = fps.build_footprint(long_line, 2, (3, 4))
    assert line.shape == (5, 7)
    assert np.array_equal(line, line[::-1, ::-1])


def test_huge_radius_erodes_to_the_global_minimum():
    image = np.array([[5, 7, 9, 4], [8, 6, 3, 9], [7, 7, 8, 8]], dtype=np.uint16)
    params = MorphologyParams(footprint="disk", radius="1e9 px")
    assert np.array_equal(morph.erode(params, image, spacing=SPACING), np.full((3, 4), 3))
    assert np.array_equal(morph.widen(params, image, spacing=SPACING), np.full((3, 4), 9))


# --------------------------------------------------------------------------- step kinds


def test_registered_kinds():
    for name in KINDS:
        kind = get_kind(name)
        assert kind.version == "1"
        assert kind.ndims == frozenset({2, 3})
        assert kind.libraries == (
            "numpy",
            "scipy",
            "numba",
        )  # numba compiles the kernels: its version is in every key
        assert kind.summary
    for name in ("erode", "widen", "open", "close", "outline"):
        assert get_kind(name).takes == (frozenset({"image", "mask"}),)
        assert get_kind(name).gives == "same"
    # a mask into subtract-background is refused when the recipe is checked
    assert get_kind("subtract-background").takes == (frozenset({"image"}),)


def _call(name: str, data: np.ndarray, **extra) -> np.ndarray:
    kind = get_kind(name)
    spacing = (1.0,) * data.ndim
    if data.ndim == 3:
        spec = dict(footprint="ball", radius="1 px")
    else:
        spec = dict(CROSS)
    return kind.func(kind.params(**spec, **extra), data, spacing=spacing)


@pytest.mark.parametrize(
    ("name", "dtype"),
    [
        (name, d.name)
        for name in KINDS
        for d in _morph.SUPPORTED_DTYPES
        # a mask into subtract-background is refused (test_unsupported_data_is_refused)
        if not (name == "subtract-background" and d == np.bool_)
    ],
)
@pytest.mark.parametrize("ndim", [2, 3])
def test_dtype_and_shape_are_kept(name, dtype, ndim):
    rng = np.random.default_rng(1)
    shape = (6, 7) if ndim == 2 else (4, 5, 6)
    data = (rng.random(shape) * 100).astype(dtype) if dtype != "bool" else rng.random(shape) < 0.5
    extra = {"features": "bright"} if name == "subtract-background" else {}
    out = _call(name, data, **extra)
    assert out.dtype == data.dtype and out.shape == data.shape
    assert out is not data


def test_unsupported_data_is_refused():
    with pytest.raises(ValueError, match="dtype float16"):
        _call("erode", np.zeros((4, 4), dtype=np.float16))
    with pytest.raises(ValueError, match="dtype int64"):
        _call("erode", np.zeros((4, 4), dtype=np.int64))
    with pytest.raises(ValueError, match="2-D or 3-D"):
        _call("erode", np.zeros(4, dtype=np.uint8))
    with pytest.raises(ValueError, match="needs a gray image, not a mask"):
        _call("subtract-background", np.zeros((4, 4), dtype=bool), features="dark")


def test_erosion_by_a_3x3_square_literal():
    image = np.array([[1, 2, 3], [4, 5, 6], [7, 8, 9]], dtype=np.uint8)
    params = MorphologyParams(footprint="square", size="3 px")
    # outside pixels are ignored: each corner takes the min of its own 2x2 block
    assert np.array_equal(
        morph.erode(params, image, spacing=SPACING), [[1, 1, 2], [1, 1, 2], [4, 4, 5]]
    )
    assert np.array_equal(
        morph.widen(params, image, spacing=SPACING), [[5, 6, 6], [8, 9, 9], [8, 9, 9]]
    )


def test_frame_does_not_erode_or_widen():
    full = np.ones((4, 5), dtype=bool)
    params = MorphologyParams(footprint="disk", radius="2 px")
    assert morph.erode(params, full, spacing=SPACING).all()
    assert not morph.widen(params, ~full, spacing=SPACING).any()
    flat = np.full((4, 5), 7.5, dtype=np.float32)
    assert np.array_equal(morph.erode(params, flat, spacing=SPACING), flat)


SQUARE_MASK = np.array(
    [
        [0, 0, 0, 0, 0],
        [0, 1, 1, 1, 0],
        [0, 1, 1, 1, 0],
        [0, 1, 1, 1, 0],
        [0, 0, 0, 0, 0],
    ],
    dtype=bool,
)


@pytest.mark.parametrize(
    ("mode", "expected"),
    [
        # dilation by the cross, minus the erosion (the centre pixel)
        (
            "full",
            [
                [0, 1, 1, 1, 0],
                [1, 1, 1, 1, 1],
                [1, 1, 0, 1, 1],
                [1, 1, 1, 1, 1],
                [0, 1, 1, 1, 0],
            ],
        ),
        # the square's own boundary ring
        (
            "inner",
            [
                [0, 0, 0, 0, 0],
                [0, 1, 1, 1, 0],
                [0, 1, 0, 1, 0],
                [0, 1, 1, 1, 0],
                [0, 0, 0, 0, 0],
            ],
        ),
        # the background pixels 4-adjacent to the square
        (
            "outer",
            [
                [0, 1, 1, 1, 0],
                [1, 0, 0, 0, 1],
                [1, 0, 0, 0, 1],
                [1, 0, 0, 0, 1],
                [0, 1, 1, 1, 0],
            ],
        ),
    ],
)
def test_outline_modes_on_a_mask(mode, expected):
    out = morph.outline(morph.OutlineParams(**CROSS, mode=mode), SQUARE_MASK, spacing=SPACING)
    assert out.dtype == np.bool_
    assert np.array_equal(out, np.array(expected, dtype=bool))


def test_outline_modes_on_a_gray_step_edge():
    image = np.array([[10, 10, 40, 40, 40]], dtype=np.uint8)
    params = dict(footprint="rectangle", width="3 px", height="1 px")

    def run(mode):
        return morph.outline(morph.OutlineParams(**params, mode=mode), image, spacing=SPACING)

    assert np.array_equal(run("full"), [[0, 30, 30, 0, 0]])
    assert np.array_equal(run("inner"), [[0, 0, 30, 0, 0]])
    assert np.array_equal(run("outer"), [[0, 30, 0, 0, 0]])


def test_outline_refuses_a_signed_overflow():
    image = np.array([[-2_000_000_000, 2_000_000_000]], dtype=np.int32)
    params = morph.OutlineParams(footprint="square", size="3 px")
    with pytest.raises(ValueError, match="more than int32 can hold"):
        morph.outline(params, image, spacing=SPACING)
    small = np.array([[-5, 7]], dtype=np.int32)
    assert np.array_equal(morph.outline(params, small, spacing=SPACING), [[12, 12]])


def _flat_with_pit(dtype) -> np.ndarray:
    image = np.full((9, 9), 200, dtype=dtype)
    image[3:6, 4:6] = 170  # a dark pit 30 deep, 3 x 2 pixels
    return image


@pytest.mark.parametrize("dtype", ["uint8", "uint16", "int16", "float32"])
def test_dark_top_hat_recovers_the_pit_depth(dtype):
    image = _flat_with_pit(dtype)
    params = morph.BackgroundParams(footprint="disk", radius="3 px", features="dark")
    out = morph.subtract_background(params, image, spacing=SPACING)
    expected = np.zeros((9, 9), dtype=dtype)
    expected[3:6, 4:6] = 30
    assert out.dtype == np.dtype(dtype)
    assert np.array_equal(out, expected)
    # the pit is dark, so a bright top-hat finds nothing
    bright = morph.BackgroundParams(footprint="disk", radius="3 px", features="bright")
    assert not morph.subtract_background(bright, image, spacing=SPACING).any()


def test_bright_top_hat_recovers_a_speck_on_a_flat_field():
    image = np.full((7, 8), 12, dtype=np.uint16)
    image[2, 5] = 1012
    params = morph.BackgroundParams(footprint="square", size="3 px", features="bright")
    out = morph.subtract_background(params, image, spacing=SPACING)
    expected = np.zeros((7, 8), dtype=np.uint16)
    expected[2, 5] = 1000
    assert np.array_equal(out, expected)


def test_top_hat_on_a_sloping_background():
    # a ramp of one gray level per column: the closing by a 3x3 square fills the pit
    # from its neighbours and leaves the ramp alone, except in the first column, where
    # the window holds only columns 0 and 1 (outside ignored) and the closing gives 101
    ramp = np.tile(np.arange(100, 112, dtype=np.uint8), (5, 1))
    image = ramp.copy()
    image[2, 6] -= 20
    params = morph.BackgroundParams(footprint="square", size="3 px", features="dark")
    out = morph.subtract_background(params, image, spacing=SPACING)
    expected = np.zeros((5, 12), dtype=np.uint8)
    expected[:, 0] = 1
    expected[2, 6] = 20
    assert np.array_equal(out, expected)


def test_open_and_close_on_a_mask_literal():
    mask = np.array(
        [
            [1, 1, 1, 0, 0, 0],
            [1, 1, 1, 0, 1, 0],
            [1, 1, 1, 0, 0, 0],
        ],
        dtype=bool,
    )
    params = MorphologyParams(footprint="square", size="3 px")
    # the isolated pixel is removed; the 3x3 block at the frame survives (outside ignored)
    opened = morph.open_(params, mask, spacing=SPACING)
    assert np.array_equal(opened, mask & (np.arange(6) < 3))
    holed = np.ones((5, 5), dtype=bool)
    holed[2, 2] = False
    assert morph.close(params, holed, spacing=SPACING).all()
    # a hole at the corner is filled too: outside pixels take no part in the closing
    holed[2, 2], holed[0, 0] = True, False
    assert morph.close(params, holed, spacing=SPACING).all()


def test_no_negative_zero_in_float_output():
    image = np.array([[-0.0, 0.0, -0.0], [0.0, -0.0, 0.0]], dtype=np.float64)
    for name in ("erode", "widen", "open", "close"):
        out = _call(name, image)
        assert not np.signbit(out).any()


def test_input_is_not_modified():
    image = np.arange(30, dtype=np.float32).reshape(5, 6)
    image[0, 0] = -0.0
    before = image.tobytes()
    for name in ("erode", "widen", "open", "close", "outline"):
        _call(name, image)
    _call("subtract-background", image, features="dark")
    assert image.tobytes() == before
