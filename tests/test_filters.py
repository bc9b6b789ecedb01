"""Unit tests of ``gray`` and ``smooth``."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError

from lotproof.steps import REGISTRY
from lotproof.steps.filters import (
    GAUSSIAN_TRUNCATE,
    GRAY_WEIGHTS,
    LUMA_WEIGHTS,
    GrayParams,
    SmoothParams,
    gray,
    smooth,
)
from lotproof.steps.units import Length

SPACING = (1.0, 1.0)


def gaussian(sigma, image):
    params = SmoothParams(method="gaussian", sigma=Length(sigma, "px"))
    return smooth(params, image, spacing=(1.0,) * image.ndim)


def median(radius, image):
    params = SmoothParams(method="median", radius=Length(radius, "px"))
    return smooth(params, image, spacing=(1.0,) * image.ndim)


# --------------------------------------------------------------------------- gray


def test_gray_registration():
    kind = REGISTRY["gray"]
    assert kind.accepts_color
    assert kind.ndims == frozenset({2})
    assert GrayParams().weights == "bt601"
    assert set(GRAY_WEIGHTS) == set(LUMA_WEIGHTS)


def test_gray_weights_sum_to_one():
    # source: ITU-R BT.601 and BT.709 luma coefficients add up to 1
    for weights in LUMA_WEIGHTS.values():
        assert math.isclose(sum(weights), 1.0, abs_tol=1e-12)


def test_gray_passes_gray_image_through():
    image = np.array([[1, 2], [3, 4]], dtype=np.uint16)
    out = gray(GrayParams(), image, spacing=SPACING)
    assert out is image


def test_gray_drops_alpha_and_keeps_value_scale():
    rgba = np.array([[[200, 100, 50, 0], [200, 100, 50, 255]]], dtype=np.uint8)
    out = gray(GrayParams(), rgba, spacing=SPACING)
    assert out.dtype == np.float64
    assert out.shape == (1, 2)
    # 0.299 * 200 + 0.587 * 100 + 0.114 * 50, whatever the alpha
    np.testing.assert_allclose(out, [[124.2, 124.2]], rtol=0, atol=1e-12)
    assert out[0, 0] == out[0, 1]


def test_gray_bt709_on_uint16():
    rgb = np.array([[[65535, 0, 0], [0, 65535, 0], [0, 0, 65535]]], dtype=np.uint16)
    out = gray(GrayParams(weights="bt709"), rgb, spacing=SPACING)
    np.testing.assert_allclose(out, [[0.2126 * 65535, 0.7152 * 65535, 0.0722 * 65535]], rtol=1e-15)


def test_gray_refuses_other_shapes_and_weights():
    with pytest.raises(ValueError, match=r"got shape \(2, 2, 2\)"):
        gray(GrayParams(), np.zeros((2, 2, 2)), spacing=SPACING)
    with pytest.raises(ValidationError, match="bt601"):
        GrayParams(weights="bt2020")


# --------------------------------------------------------------------------- smooth: parameters


@pytest.mark.parametrize(
    ("params", "message"),
    [
        ({"method": "gaussian"}, "method 'gaussian' needs sigma"),
        ({"method": "gaussian", "sigma": "1 px", "radius": "1 px"}, "takes sigma, not radius"),
        ({"method": "median"}, "method 'median' needs radius"),
        ({"method": "median", "radius": "1 px", "sigma": "1 px"}, "takes radius, not sigma"),
        ({"method": "mean", "sigma": "1 px"}, "gaussian"),
        ({"method": "gaussian", "sigma": 2}, "bare number"),
        ({"method": "gaussian", "sigma": "-1 px"}, "must be > 0"),
    ],
)
def test_smooth_parameters(params, message):
    with pytest.raises(ValidationError, match=message):
        SmoothParams(**params)


def test_smooth_method_is_required():
    with pytest.raises(ValidationError, match="method"):
        SmoothParams(sigma="1 px")


def test_smooth_refuses_bool():
    with pytest.raises(ValueError, match="numeric gray image"):
        gaussian(1.0, np.zeros((3, 3), dtype=bool))


# --------------------------------------------------------------------------- gaussian


def brute_gaussian(image, sigma):
    # the definition, separable: sampled kernel exp(-x^2 / 2 sigma^2) over
    # |x| <= int(truncate * sigma + 0.5), normalised; the image mirrored about
    # the pixel edge (numpy's "symmetric" pad, d c b a | a b c d)
    half = int(GAUSSIAN_TRUNCATE * sigma + 0.5)
    x = np.arange(-half, half + 1, dtype=np.float64)
    kernel = np.exp(-(x**2) / (2 * sigma**2))
    kernel /= kernel.sum()
    out = image.astype(np.float64)
    for axis in range(out.ndim):
        pad = [(0, 0)] * out.ndim
        pad[axis] = (half, half)
        padded = np.pad(out, pad, mode="symmetric")
        out = np.apply_along_axis(
            lambda line: np.convolve(line, kernel, mode="valid"), axis, padded
        )
    return out


@pytest.mark.parametrize("sigma", [0.7, 1.0, 2.5])
def test_gaussian_matches_definition(sigma):
    rng = np.random.default_rng(3)
    image = rng.integers(0, 255, size=(9, 13)).astype(np.uint8)
    out = gaussian(sigma, image)
    assert out.dtype == np.float64
    # source: closed form of the sampled, truncated, normalised gaussian
    np.testing.assert_allclose(out, brute_gaussian(image, sigma), rtol=0, atol=1e-9)


def test_gaussian_keeps_scale_and_constant():
    image = np.full((5, 6), 4000, dtype=np.uint16)
    out = gaussian(1.5, image)
    assert out.dtype == np.float64
    np.testing.assert_allclose(out, 4000.0, rtol=1e-14)


def test_gaussian_3d():
    image = np.zeros((5, 5, 5))
    image[2, 2, 2] = 1.0
    out = gaussian(1.0, image)
    assert out.shape == (5, 5, 5)
    np.testing.assert_allclose(out, out.transpose(2, 1, 0), atol=1e-15)
    np.testing.assert_allclose(out, brute_gaussian(image, 1.0), atol=1e-12)


# --------------------------------------------------------------------------- median


def brute_median(image, radius):
    # the definition: median over {x^2 + y^2 <= r^2} on the image mirrored
    # about the pixel edge
    half = math.floor(radius)
    padded = np.pad(image, half, mode="symmetric")
    offsets = [
        (dy, dx)
        for dy in range(-half, half + 1)
        for dx in range(-half, half + 1)
        if dy * dy + dx * dx <= radius * radius
    ]
    out = np.empty_like(image)
    for y, x in np.ndindex(image.shape):
        values = [padded[y + half + dy, x + half + dx] for dy, dx in offsets]
        out[y, x] = np.median(values)
    return out


def test_median_literal_cross():
    # r = 1 px: the cross of 5 pixels; the single bright pixel has 4 dark neighbours
    image = np.zeros((3, 3), dtype=np.uint8)
    image[1, 1] = 9
    np.testing.assert_array_equal(median(1.0, image), np.zeros((3, 3), dtype=np.uint8))
    # a bright column of width 1 survives the cross (3 of 5 on the column)
    image = np.zeros((4, 5), dtype=np.uint8)
    image[:, 2] = 7
    np.testing.assert_array_equal(median(1.0, image), image)


def test_median_radius_below_one_is_identity():
    image = np.array([[3, 1], [2, 8]], dtype=np.int16)
    np.testing.assert_array_equal(median(0.6, image), image)


@settings(max_examples=25, deadline=None)
@given(
    image=hnp.arrays(
        dtype=st.sampled_from([np.uint8, np.uint16, np.float32]),
        shape=hnp.array_shapes(min_dims=2, max_dims=2, min_side=2, max_side=8),
        elements={"min_value": 0, "max_value": 200},
    ),
    radius=st.sampled_from([1.0, 1.5, 2.0, 2.3]),
)
def test_median_matches_definition(image, radius):
    # odd disk sizes only (5, 9, 13, 21 pixels): a median without averaging
    out = median(radius, image)
    assert out.dtype == image.dtype
    np.testing.assert_array_equal(out, brute_median(image, radius))


def test_median_3d_keeps_dtype():
    image = np.zeros((3, 4, 4), dtype=np.uint16)
    image[1, 1, 1] = 500
    out = median(1.0, image)
    assert out.dtype == np.uint16
    assert not out.any()
