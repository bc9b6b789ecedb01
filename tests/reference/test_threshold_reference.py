"""Threshold levels and masks checked against OpenCV, scikit-image and closed forms.

The sample images are files bundled inside the installed scikit-image wheel
(``skimage/data/*.png``); ``skimage.data`` reads them from disk, nothing is
downloaded.
"""

from __future__ import annotations

from fractions import Fraction

import cv2
import numpy as np
import pytest
import skimage.data
import skimage.filters

from lotproof.steps.threshold import FLOAT_NBINS, ThresholdParams, threshold

SPACING = (1.0, 1.0)

# uint8 gray images shipped in the scikit-image wheel
BUNDLED = ("camera", "coins", "moon", "page", "text", "brick", "grass", "gravel", "cell", "clock")


def bundled(name: str) -> np.ndarray:
    image = getattr(skimage.data, name)()
    assert image.dtype == np.uint8 and image.ndim == 2
    return image


def run(image, method, **extra):
    return threshold(ThresholdParams(method=method, **extra), image, spacing=SPACING)


def noisy_float(name: str) -> np.ndarray:
    # a float image with no repeated values on a bin edge pattern: the uint8
    # image scaled to 0..1 with fixed gaussian noise
    rng = np.random.default_rng(20261201)
    return bundled(name) / 255.0 + rng.normal(0.0, 0.01, size=bundled(name).shape)


# --------------------------------------------------------------------------- Otsu vs OpenCV


@pytest.mark.parametrize("name", BUNDLED)
def test_otsu_matches_opencv_on_uint8(name):
    image = bundled(name)
    # source: OpenCV cv2.threshold with THRESH_BINARY + THRESH_OTSU; it returns
    # the level t and sets the pixels > t to maxval
    cv_level, cv_mask = cv2.threshold(image, 0, 255, cv2.THRESH_BINARY + cv2.THRESH_OTSU)
    out = run(image, "otsu")
    assert out.values["level"] == cv_level
    np.testing.assert_array_equal(out.data, cv_mask == 255)
    # source: OpenCV, the same mask for dark features is THRESH_BINARY_INV at that level
    _, cv_inverse = cv2.threshold(image, cv_level, 255, cv2.THRESH_BINARY_INV)
    np.testing.assert_array_equal(run(image, "otsu", features="dark").data, cv_inverse == 255)


def test_otsu_camera_level_pinned():
    # source: OpenCV 5.0 cv2.threshold(camera, 0, 255, THRESH_BINARY + THRESH_OTSU) -> 102
    assert run(bundled("camera"), "otsu").values["level"] == 102.0


# --------------------------------------------------------------------------- vs scikit-image


SKIMAGE = {
    # source: scikit-image 0.26 skimage.filters.threshold_* (foreground = image > level)
    "otsu": skimage.filters.threshold_otsu,
    "li": skimage.filters.threshold_li,
    "yen": skimage.filters.threshold_yen,
    "triangle": skimage.filters.threshold_triangle,
    "isodata": skimage.filters.threshold_isodata,
}


@pytest.mark.parametrize("method", sorted(SKIMAGE))
@pytest.mark.parametrize("name", BUNDLED)
def test_matches_skimage_on_uint8(method, name):
    # scikit-image also uses one bin per integer value on integer images
    image = bundled(name)
    expected = float(SKIMAGE[method](image))  # source: scikit-image threshold_<method>
    out = run(image, method)
    assert out.values["level"] == expected
    np.testing.assert_array_equal(out.data, image > expected)  # source: scikit-image docs


def camera16() -> np.ndarray:
    # a 16-bit image: 257 * camera + fixed noise, about 65000 one-integer bins
    rng = np.random.default_rng(5)
    noise = rng.integers(0, 257, (512, 512))
    return (bundled("camera").astype(np.int64) * 257 + noise).astype(np.uint16)


@pytest.mark.parametrize("method", ["li", "yen", "triangle", "isodata"])
def test_matches_skimage_on_uint16(method):
    image = camera16()
    expected = float(SKIMAGE[method](image))  # source: scikit-image threshold_<method>
    out = run(image, method)
    assert out.values["level"] == expected
    np.testing.assert_array_equal(out.data, image > expected)


def test_otsu_uint16_is_the_exact_maximum():
    # source: closed form, Otsu 1979: between-class variance of the split after
    # value k is (S1 N - S W1)^2 / (W1 (N - W1)) with W1, S1 the count and sum
    # of the values <= k; evaluated here in exact rational arithmetic.
    # (scikit-image 0.26 threshold_otsu gives 26571 on this image: it sums the
    # counts in float32, and its best split is 8e-9 below this one.)
    image = camera16()
    values, counts = np.unique(image, return_counts=True)
    values = [int(v) for v in values]
    counts = [int(c) for c in counts]
    n, total = sum(counts), sum(v * c for v, c in zip(values, counts, strict=False))
    best, best_level = Fraction(-1), None
    w1 = s1 = 0
    for value, count in zip(values[:-1], counts[:-1], strict=False):
        w1 += count
        s1 += value * count
        variance = Fraction((s1 * n - total * w1) ** 2, w1 * (n - w1))
        if variance > best:  # strict: the lowest level among equal maxima
            best, best_level = variance, value
    out = run(image, "otsu")
    assert out.values["level"] == best_level == 26561
    np.testing.assert_array_equal(out.data, image > best_level)


@pytest.mark.parametrize("method", ["otsu", "yen", "triangle", "isodata"])
@pytest.mark.parametrize("name", ["camera", "coins", "moon"])
def test_matches_skimage_on_float(method, name):
    # scikit-image bins float images into nbins=256 equal bins over [min, max]
    # and returns a bin centre, as we do. (Its threshold_li works on the pixel
    # values of a float image, not on the histogram, so li is left out here.)
    image = noisy_float(name)
    expected = float(SKIMAGE[method](image, nbins=FLOAT_NBINS))  # source: scikit-image
    out = run(image, method)
    assert out.values["level"] == expected
    np.testing.assert_array_equal(out.data, image > expected)


# --------------------------------------------------------------------------- closed forms


@pytest.mark.parametrize(("low", "high"), [(0, 255), (40, 41), (17, 200)])
@pytest.mark.parametrize("dtype", [np.uint8, np.int32])
def test_otsu_two_equal_classes(low, high, dtype):
    # source: closed form, Otsu 1979: with two constant classes every split
    # t in [low, high) gives the same, largest between-class variance, so the
    # mask is exactly the high class; the lowest such level is taken
    image = np.full((6, 8), low, dtype=dtype)
    image[:, 4:] = high
    out = run(image, "otsu")
    assert out.values["level"] == float(low)
    np.testing.assert_array_equal(out.data, image == high)
    np.testing.assert_array_equal(run(image, "otsu", features="dark").data, image == low)


def test_otsu_two_classes_float():
    # source: closed form, Otsu 1979, on 256 bins over [a, b]: every split
    # between the two end bins is equal; the first bin's centre a + (b - a) / 512
    a, b = 0.25, 0.75
    image = np.full((5, 6), a)
    image[2:, :] = b
    out = run(image, "otsu")
    assert out.values["level"] == a + (b - a) / (2 * FLOAT_NBINS)
    np.testing.assert_array_equal(out.data, image == b)


def test_otsu_three_levels_by_enumeration():
    # source: closed form, Otsu 1979, between-class variance w1 w2 (m1 - m2)^2
    # of the two possible splits of values 0 (x2), 5 (x1), 10 (x3):
    #   t = 0: w1 = 2, w2 = 4, m1 = 0, m2 = 35/4 -> 2 * 4 * (35/4)^2 = 612.5
    #   t = 5: w1 = 3, w2 = 3, m1 = 5/3, m2 = 10 -> 3 * 3 * (25/3)^2 = 625
    image = np.array([[0, 0, 5, 10, 10, 10]], dtype=np.uint8)
    assert run(image, "otsu").values["level"] == 5.0


@pytest.mark.parametrize(("low", "high"), [(0, 10), (100, 250)])
def test_isodata_and_li_two_equal_classes(low, high):
    # source: closed form. isodata (Ridler & Calvard 1978): t = (m1 + m2) / 2 =
    # the midpoint for every split; the integer bin with 0 <= mid - t < 1.
    # li (Li & Tam 1998) on values shifted to start at 0: the first estimate,
    # the mean, is the midpoint, after which the background mean is 0 and the
    # iteration stops: level = low + (high - low) / 2. yen (Yen et al. 1995):
    # the criterion is the same for every split between the classes.
    image = np.full((4, 4), low, dtype=np.uint8)
    image[:2] = high
    mid = (low + high) / 2
    assert run(image, "isodata").values["level"] == np.floor(mid)
    assert run(image, "li").values["level"] == mid
    for method in ("isodata", "li", "yen"):
        np.testing.assert_array_equal(run(image, method).data, image == high)
