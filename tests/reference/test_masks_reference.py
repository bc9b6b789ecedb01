"""Mask clean-up checked against scipy.ndimage and scikit-image; gray against BT.601 and OpenCV.

(``gray`` is checked here too: it is the one colour step and has no reference
file of its own.)
"""

from __future__ import annotations

import cv2
import numpy as np
import pytest
import skimage.segmentation
from scipy import ndimage

from lotproof.steps.filters import GrayParams, gray
from lotproof.steps.masks import (
    ClearBorderParams,
    FillHolesParams,
    RemoveSmallParams,
    clear_border,
    fill_holes,
    remove_small,
)
from lotproof.steps.units import Area

# object connectivity -> (scipy structure rank for the objects, for the background)
RANKS = {4: (1, 2), 8: (2, 1), 6: (1, 3), 18: (2, 1), 26: (3, 1)}


def random_masks(ndim: int, count: int = 12):
    rng = np.random.default_rng(1000 + ndim)
    shape = (40, 50) if ndim == 2 else (12, 20, 22)
    densities = np.linspace(0.2, 0.8, count) if ndim == 2 else np.linspace(0.05, 0.95, count)
    for density in densities:
        # smoothing random noise gives blobs, holes and thin diagonal links
        noise = ndimage.uniform_filter(rng.random(shape), size=3, mode="reflect")
        yield noise > np.quantile(noise, 1 - density)


def spacing(mask):
    return (1.0,) * mask.ndim


# --------------------------------------------------------------------------- fill-holes


@pytest.mark.parametrize(("ndim", "connectivity"), [(2, 4), (2, 8), (3, 6), (3, 18), (3, 26)])
def test_fill_holes_matches_scipy(ndim, connectivity):
    background = ndimage.generate_binary_structure(ndim, RANKS[connectivity][1])
    for mask in random_masks(ndim):
        # source: scipy.ndimage.binary_fill_holes; its structure is the
        # connectivity of the background grown in from the frame
        expected = ndimage.binary_fill_holes(mask, structure=background)
        out = fill_holes(FillHolesParams(connectivity=connectivity), mask, spacing=spacing(mask))
        np.testing.assert_array_equal(out, expected)


def test_fill_holes_default_is_scipy_cross_background():
    for mask in random_masks(2):
        # source: scipy.ndimage.binary_fill_holes default structure (the cross,
        # 4-connected background), which goes with 8-connected objects
        expected = ndimage.binary_fill_holes(mask)
        np.testing.assert_array_equal(fill_holes(FillHolesParams(), mask, spacing=(1, 1)), expected)


# --------------------------------------------------------------------------- remove-small


@pytest.mark.parametrize(("ndim", "connectivity"), [(2, 4), (2, 8), (3, 6), (3, 18), (3, 26)])
def test_remove_small_matches_independent_count(ndim, connectivity):
    structure = ndimage.generate_binary_structure(ndim, RANKS[connectivity][0])
    for mask in random_masks(ndim):
        # source: scipy.ndimage.label + scipy.ndimage.sum_labels for the sizes
        labels, count = ndimage.label(mask, structure=structure)
        if count == 0:
            continue
        sizes = ndimage.sum_labels(mask, labels, index=np.arange(1, count + 1))
        # exactly the size of an existing object: that object must stay
        min_area = float(np.sort(sizes)[count // 2])
        kept = [i + 1 for i, size in enumerate(sizes) if not size < min_area]
        expected = np.isin(labels, kept)
        params = RemoveSmallParams(min_area=Area(min_area, "px2"), connectivity=connectivity)
        out = remove_small(params, mask, spacing=spacing(mask))
        np.testing.assert_array_equal(out, expected)
        exact = labels == 1 + int(np.flatnonzero(sizes == min_area)[0])
        assert out[exact].all()


def test_remove_small_keeps_object_of_exactly_min_area():
    mask = np.zeros((6, 6), dtype=bool)
    mask[1:3, 1:4] = True  # 6 pixels
    mask[4, 4] = True  # 1 pixel
    params = RemoveSmallParams(min_area=Area(6.0, "px2"))
    # source: common practice, no source: "strictly smaller" removes 1, keeps 6
    expected = mask.copy()
    expected[4, 4] = False
    np.testing.assert_array_equal(remove_small(params, mask, spacing=(1, 1)), expected)


# --------------------------------------------------------------------------- clear-border


@pytest.mark.parametrize("ndim", [2, 3])
def test_clear_border_full_connectivity_matches_skimage(ndim):
    for mask in random_masks(ndim):
        # source: skimage.segmentation.clear_border; it relabels its input with
        # skimage.measure.label, whose default is full connectivity (8 / 26)
        expected = skimage.segmentation.clear_border(mask)
        out = clear_border(ClearBorderParams(), mask, spacing=spacing(mask))
        np.testing.assert_array_equal(out, expected)


@pytest.mark.parametrize(("ndim", "connectivity"), [(2, 4), (3, 6), (3, 18)])
def test_clear_border_lower_connectivity_matches_skimage(ndim, connectivity):
    structure = ndimage.generate_binary_structure(ndim, RANKS[connectivity][0])
    for mask in random_masks(ndim):
        # source: skimage.segmentation.clear_border on labels from
        # scipy.ndimage.label with the lower connectivity: its relabelling
        # joins only equal labels, so distinct objects stay distinct
        labels, _ = ndimage.label(mask, structure=structure)
        expected = skimage.segmentation.clear_border(labels) > 0
        params = ClearBorderParams(connectivity=connectivity)
        out = clear_border(params, mask, spacing=spacing(mask))
        np.testing.assert_array_equal(out, expected)


# --------------------------------------------------------------------------- gray


@pytest.mark.parametrize(
    ("rgb", "luma"),
    [
        # source: ITU-R BT.601 luma Y = 0.299 R + 0.587 G + 0.114 B (common practice)
        ((255, 0, 0), 76.245),
        ((0, 255, 0), 149.685),
        ((0, 0, 255), 29.07),
        ((255, 255, 255), 255.0),
        ((0, 0, 0), 0.0),
        ((128, 128, 128), 128.0),
        ((255, 255, 0), 225.93),
        ((10, 20, 30), 18.15),
    ],
)
def test_gray_bt601_literal_colours(rgb, luma):
    image = np.array([[rgb]], dtype=np.uint8)
    out = gray(GrayParams(), image, spacing=(1.0, 1.0))
    np.testing.assert_allclose(out, [[luma]], rtol=0, atol=1e-9)


def test_gray_bt709_literal_colours():
    image = np.array([[[255, 0, 0], [0, 255, 0], [0, 0, 255]]], dtype=np.uint8)
    out = gray(GrayParams(weights="bt709"), image, spacing=(1.0, 1.0))
    # source: ITU-R BT.709 luma Y = 0.2126 R + 0.7152 G + 0.0722 B
    np.testing.assert_allclose(out, [[54.213, 182.376, 18.411]], rtol=0, atol=1e-9)


def test_gray_bt601_against_opencv():
    rng = np.random.default_rng(11)
    image = rng.integers(0, 256, size=(32, 48, 3)).astype(np.uint8)
    out = gray(GrayParams(), image, spacing=(1.0, 1.0))
    # source: OpenCV cv2.cvtColor(COLOR_RGB2GRAY), Y = 0.299 R + 0.587 G + 0.114 B
    # in fixed point, rounded to uint8: within half a gray level of the exact value
    expected = cv2.cvtColor(image, cv2.COLOR_RGB2GRAY).astype(np.float64)
    assert np.abs(out - expected).max() <= 0.5 + 1e-6
