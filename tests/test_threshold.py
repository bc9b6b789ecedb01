"""Unit tests of the threshold step: parameters, degenerate inputs, dtypes, local mean."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError

from lotproof.steps import REGISTRY
from lotproof.steps._data import Output
from lotproof.steps.threshold import (
    FLOAT_NBINS,
    THRESHOLD_FEATURES,
    THRESHOLD_METHODS,
    ThresholdParams,
    threshold,
)
from lotproof.steps.units import Length

SPACING = (1.0, 1.0)
AUTOMATIC = tuple(m for m in THRESHOLD_METHODS if m not in ("fixed", "local"))


def run(image, **params):
    return threshold(ThresholdParams(**params), image, spacing=SPACING)


def local_params(block, **extra):
    # what the runner hands the step: lengths already in pixels
    return ThresholdParams(method="local", block_size=Length(block, "px"), **extra)


# --------------------------------------------------------------------------- parameters


def test_registered_with_level_value():
    kind = REGISTRY["threshold"]
    assert kind.gives == "mask"
    assert dict(kind.values) == {"level": "-"}
    assert kind.ndims == frozenset({2, 3})


def test_method_is_required():
    with pytest.raises(ValidationError, match="method"):
        ThresholdParams()


def test_unknown_method_and_unknown_key_are_refused():
    with pytest.raises(ValidationError, match="otsu"):
        ThresholdParams(method="otsu2")
    with pytest.raises(ValidationError, match="Extra inputs are not permitted"):
        ThresholdParams(method="otsu", keep="above")


@pytest.mark.parametrize(
    ("params", "message"),
    [
        ({"method": "fixed"}, "method 'fixed' needs level"),
        ({"method": "otsu", "level": 10}, "level is only for method 'fixed'"),
        ({"method": "local"}, "method 'local' needs block_size"),
        ({"method": "li", "block_size": "5 px"}, "block_size is only for method 'local'"),
        ({"method": "yen", "offset": 2}, "offset is only for method 'local'"),
        ({"method": "fixed", "level": 3, "offset": 0}, "offset is only for method 'local'"),
    ],
)
def test_method_fields(params, message):
    with pytest.raises(ValidationError, match=message):
        ThresholdParams(**params)


def test_level_must_be_finite_and_block_size_needs_a_unit():
    with pytest.raises(ValidationError, match="finite"):
        ThresholdParams(method="fixed", level=float("nan"))
    with pytest.raises(ValidationError, match="bare number"):
        ThresholdParams(method="local", block_size=15)


def test_defaults():
    params = ThresholdParams(method="otsu")
    assert params.features == "bright"
    assert params.offset == 0.0
    assert THRESHOLD_FEATURES == ("bright", "dark")


# --------------------------------------------------------------------------- fixed


def test_fixed_bright_and_dark_on_literal_array():
    image = np.array([[0, 5, 10], [11, 200, 5]], dtype=np.uint8)
    out = run(image, method="fixed", level=5)
    assert isinstance(out, Output)
    assert out.data.dtype == np.bool_
    np.testing.assert_array_equal(out.data, [[False, False, True], [True, True, False]])
    assert out.values == {"level": 5.0}
    assert out.units == {"level": "-"}
    dark = run(image, method="fixed", level=5, features="dark")
    np.testing.assert_array_equal(dark.data, [[True, True, False], [False, False, True]])


def test_fixed_level_outside_the_dtype_range():
    image = np.array([[0, 255]], dtype=np.uint8)
    np.testing.assert_array_equal(run(image, method="fixed", level=-1).data, [[True, True]])
    np.testing.assert_array_equal(run(image, method="fixed", level=300).data, [[False, False]])


def test_fixed_compares_float32_values_exactly():
    # float32(0.1) = 0.100000001490116... is above the float64 level 0.1; a
    # comparison in float32 would round the level to the same float32 and say no.
    image = np.array([[0.1, 0.0]], dtype=np.float32)
    np.testing.assert_array_equal(run(image, method="fixed", level=0.1).data, [[True, False]])


def test_fixed_on_constant_image_applies_its_level():
    image = np.full((3, 3), 7, dtype=np.uint8)
    assert run(image, method="fixed", level=7).data.sum() == 0
    assert run(image, method="fixed", level=7, features="dark").data.all()


# --------------------------------------------------------------------------- automatic


@pytest.mark.parametrize("method", AUTOMATIC + ("local",))
@pytest.mark.parametrize("features", THRESHOLD_FEATURES)
@pytest.mark.parametrize("dtype", [np.uint8, np.int16, np.float32, np.float64])
def test_a_constant_image_has_no_contrast_to_threshold(method, features, dtype):
    # an empty mask would measure as "no pores" and pass a max limit: it is refused instead
    image = np.full((4, 5), 3, dtype=dtype)
    with pytest.raises(ValueError, match="no contrast: every pixel of the image is 3"):
        if method == "local":
            threshold(local_params(3, features=features), image, spacing=SPACING)
        else:
            run(image, method=method, features=features)


def test_otsu_two_values():
    # two classes 0 and 10: every t in [0, 10) separates; the lowest is taken
    image = np.array([[0, 0, 0], [10, 10, 10]], dtype=np.uint8)
    out = run(image, method="otsu")
    assert out.values["level"] == 0.0
    np.testing.assert_array_equal(out.data, image == 10)


def test_li_two_values_by_hand():
    # shifted values 0 (x3) and 10 (x1): start t = mean = 2.5; the background is
    # then only 0, log(0) is undefined, the iteration stops at 2.5
    image = np.array([[0, 0, 0, 10]], dtype=np.uint8)
    out = run(image, method="li")
    assert out.values["level"] == 2.5
    np.testing.assert_array_equal(out.data, [[False, False, False, True]])


def test_isodata_two_values_by_hand():
    # (m1 + m2) / 2 = 5 for every t in [0, 10); 0 <= 5 - t < 1 only for t = 5
    image = np.array([[0, 10, 10, 0]], dtype=np.int32)
    assert run(image, method="isodata").values["level"] == 5.0


def test_integer_histogram_of_signed_image():
    image = np.array([[-300, -300, 200, 200]], dtype=np.int16)
    out = run(image, method="otsu")
    assert out.values["level"] == -300.0
    np.testing.assert_array_equal(out.data, [[False, False, True, True]])


def test_float_image_level_is_a_bin_centre():
    image = np.array([[0.0, 0.0, 1.0, 1.0]])
    out = run(image, method="otsu")
    # first of 256 bins over [0, 1]: centre 1 / 512
    assert out.values["level"] == 1 / (2 * FLOAT_NBINS)
    np.testing.assert_array_equal(out.data, [[False, False, True, True]])


def test_3d_image():
    image = np.zeros((2, 3, 3), dtype=np.uint16)
    image[1, 1, 1] = 900
    out = run(image, method="otsu")
    assert out.data.shape == (2, 3, 3)
    assert out.data.sum() == 1 and out.data[1, 1, 1]


@pytest.mark.parametrize("method", AUTOMATIC)
def test_level_is_a_python_float(method):
    image = np.array([[0, 1, 2, 9], [3, 8, 8, 9]], dtype=np.uint8)
    level = run(image, method=method).values["level"]
    assert type(level) is float


# --------------------------------------------------------------------------- refused input


def test_bad_images_are_refused():
    with pytest.raises(ValueError, match="NaN or infinite"):
        run(np.array([[0.0, np.nan]]), method="otsu")
    with pytest.raises(ValueError, match="NaN or infinite"):
        run(np.array([[0.0, np.inf]]), method="fixed", level=1)
    with pytest.raises(ValueError, match="numeric gray image, got dtype bool"):
        run(np.array([[True, False]]), method="otsu")
    with pytest.raises(ValueError, match="empty image"):
        run(np.zeros((0, 3), dtype=np.uint8), method="otsu")


def test_integers_beyond_float64_precision_are_refused():
    image = np.array([[0, 2**53 + 1]], dtype=np.uint64)
    with pytest.raises(ValueError, match="values beyond 2\\*\\*53"):
        run(image, method="fixed", level=1)


def test_uint64_and_int8_histograms():
    big = np.array([[2**40 + 1, 2**40 + 5, 2**40 + 5]], dtype=np.uint64)
    assert run(big, method="otsu").values["level"] == float(2**40 + 1)
    small = np.array([[-128, 127, 127]], dtype=np.int8)
    out = run(small, method="otsu")
    assert out.values["level"] == -128.0
    np.testing.assert_array_equal(out.data, [[False, True, True]])


def test_huge_integer_span_is_refused():
    image = np.array([[0, 2**30]], dtype=np.int32)
    with pytest.raises(ValueError, match="spans 1073741825 gray values"):
        run(image, method="otsu")


# --------------------------------------------------------------------------- local


def brute_local_mean(image, side):
    # the definition, pixel by pixel: mean over the block part inside the image
    half = side // 2
    out = np.empty(image.shape, dtype=np.float64)
    for index in np.ndindex(image.shape):
        window = tuple(slice(max(i - half, 0), i + half + 1) for i in index)
        out[index] = image[window].astype(np.float64).mean()
    return out


def test_local_literal():
    image = np.array([[0, 0, 9, 0, 0]], dtype=np.uint8)
    # local means (block 3, outside ignored): 0, 3, 3, 3, 0
    out = threshold(local_params(3), image, spacing=SPACING)
    np.testing.assert_array_equal(out.data, [[False, False, True, False, False]])
    assert out.values == {}
    raised = threshold(local_params(3, offset=-6.5), image, spacing=SPACING)
    np.testing.assert_array_equal(raised.data, [[False, False, False, False, False]])
    dark = threshold(local_params(3, features="dark"), image, spacing=SPACING)
    np.testing.assert_array_equal(dark.data, [[True, True, False, True, True]])


@pytest.mark.parametrize(("block", "side"), [(3, 3), (2, 3), (4, 5), (5.9, 5), (6, 7), (7.2, 7)])
def test_local_block_rounds_to_nearest_odd(block, side):
    rng = np.random.default_rng(7)
    image = rng.integers(0, 50, size=(9, 11)).astype(np.uint8)
    out = threshold(local_params(block), image, spacing=SPACING)
    np.testing.assert_array_equal(out.data, image > brute_local_mean(image, side))


def test_local_block_below_3_px_is_refused():
    image = np.array([[0, 1], [2, 3]], dtype=np.uint8)
    with pytest.raises(ValueError, match="needs at least 3 px"):
        threshold(local_params(1.9), image, spacing=SPACING)


@settings(max_examples=40, deadline=None)
@given(
    image=hnp.arrays(
        dtype=st.sampled_from([np.uint8, np.int16, np.float64]),
        shape=hnp.array_shapes(min_dims=2, max_dims=3, min_side=1, max_side=7),
        elements={"min_value": 0, "max_value": 100},
    ),
    side=st.sampled_from([3, 5, 7, 9]),
    offset=st.sampled_from([0.0, 1.5, -2.0]),
)
def test_local_matches_definition(image, side, offset):
    if image.min() == image.max():  # no contrast: refused (tested above)
        with pytest.raises(ValueError, match="no contrast"):
            threshold(local_params(side, offset=offset), image, spacing=(1.0,) * image.ndim)
        return
    out = threshold(local_params(side, offset=offset), image, spacing=(1.0,) * image.ndim)
    expected = image.astype(np.float64) > brute_local_mean(image, side) - offset
    # float sums may differ in the last bit from the pixel-by-pixel mean: only
    # pixels on the level itself could disagree
    level = brute_local_mean(image, side) - offset
    close = np.isclose(image.astype(np.float64), level, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(out.data[~close], expected[~close])


# --------------------------------------------------------------------------- properties


@settings(max_examples=60, deadline=None)
@given(
    image=hnp.arrays(
        dtype=st.sampled_from([np.uint8, np.uint16, np.int32, np.float32, np.float64]),
        shape=hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=12),
        elements={"min_value": 0, "max_value": 255},
    ),
    method=st.sampled_from(AUTOMATIC),
)
def test_dark_is_the_complement_of_bright(image, method):
    if image.min() == image.max():  # no contrast: refused (tested above)
        return
    bright = run(image, method=method)
    dark = run(image, method=method, features="dark")
    level = bright.values["level"]
    assert dark.values["level"] == level
    assert float(image.min()) <= level <= float(image.max())
    np.testing.assert_array_equal(dark.data, ~bright.data)
    np.testing.assert_array_equal(bright.data, image.astype(np.float64) > level)


@settings(max_examples=60, deadline=None)
@given(
    image=hnp.arrays(
        dtype=st.sampled_from([np.uint16, np.int32, np.float64]),
        shape=hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=12),
        elements={"min_value": 0, "max_value": 1000},
    ),
)
def test_otsu_splits_every_non_constant_image(image):
    # Otsu picks one of the splits between the lowest and the highest bin:
    # the minimum is background and the maximum foreground
    if image.min() == image.max():  # no contrast: refused (tested above)
        return
    out = run(image, method="otsu")
    assert not out.data[image == image.min()].any()
    assert out.data[image == image.max()].all()
