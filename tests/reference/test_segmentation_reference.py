"""split-touching against closed-form geometry and scikit-image's documented watershed example."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage
from skimage.feature import peak_local_max
from skimage.segmentation import watershed

from lotproof.steps.segmentation import SplitParams, raster_relabel, split_touching
from lotproof.steps.units import Length


def split(mask, separation, depth=1.0, connectivity=None, spacing=(1.0, 1.0)):
    params = SplitParams(
        min_separation=Length(separation, "px"),
        min_depth=Length(depth, "px"),
        connectivity=connectivity,
    )
    return split_touching(params, mask, spacing=spacing)


def lens_area(r: float, d: float) -> float:
    """Area of the intersection of two circles of radius r whose centres are d apart."""
    # source: closed form, circle-circle intersection (lens) area
    return 2 * r * r * math.acos(d / (2 * r)) - 0.5 * d * math.sqrt(4 * r * r - d * d)


@pytest.mark.parametrize(
    "r, d, angle",
    [
        (20.0, 25.0, 0.0),
        (15.0, 27.0, 0.0),
        (24.0, 33.0, 90.0),
        (18.0, 29.0, 30.0),
        (30.0, 45.0, 63.0),
    ],
)
def test_two_overlapping_equal_disks_split_into_halves_of_the_union(r, d, angle) -> None:
    # source: closed form; by symmetry the cut of two equal overlapping disks is the
    # perpendicular bisector of their centres, so each label holds its disk minus half the
    # lens: pi r^2 - lens / 2
    shape = (160, 160)
    t = math.radians(angle)
    c = np.array([80.3, 79.6])
    c1 = c - 0.5 * d * np.array([math.sin(t), math.cos(t)])
    c2 = c + 0.5 * d * np.array([math.sin(t), math.cos(t)])
    yy, xx = np.indices(shape)
    in1 = (yy - c1[0]) ** 2 + (xx - c1[1]) ** 2 <= r * r
    in2 = (yy - c2[0]) ** 2 + (xx - c2[1]) ** 2 <= r * r
    out = split(in1 | in2, separation=0.5 * r)
    assert out.max() == 2
    expected = math.pi * r * r - 0.5 * lens_area(r, d)
    # tolerance: the digital disk area (Gauss circle problem) and the pixels on the
    # bisector, about one chord of the lens: sqrt(4 r^2 - d^2) px
    chord = math.sqrt(4 * r * r - d * d)
    for k in (1, 2):
        assert np.count_nonzero(out == k) == pytest.approx(expected, abs=chord + 0.02 * expected)
    # and each label is on its own side of the bisector, but for pixels near it: the cut
    # runs across a nearly flat pass of the digital distance and may wander a few pixels
    side = (yy - c[0]) * math.sin(t) + (xx - c[1]) * math.cos(t)
    near = np.abs(side) <= 4.0
    first = out[tuple(np.round(c1).astype(int))]
    assert np.all(out[(in1 | in2) & (side < 0) & ~near] == first)
    assert np.all(out[(in1 | in2) & (side > 0) & ~near] == 3 - first)


def _documented_example(image: np.ndarray) -> np.ndarray:
    """scikit-image's gallery recipe "Watershed segmentation", applied to ``image``."""
    # source: scikit-image documentation, "Watershed segmentation" example
    # (skimage.segmentation.watershed docstring / gallery): distance transform, peaks by
    # peak_local_max with a 3x3 footprint inside the labels, markers by ndi.label,
    # watershed of -distance inside the mask (its default connectivity=1, i.e. 4)
    distance = ndimage.distance_transform_edt(image)
    coords = peak_local_max(distance, footprint=np.ones((3, 3)), labels=image)
    peaks = np.zeros(distance.shape, dtype=bool)
    peaks[tuple(coords.T)] = True
    markers, _ = ndimage.label(peaks)
    return raster_relabel(watershed(-distance, markers, mask=image))


def test_the_documented_example_gives_the_same_labels() -> None:
    # the two overlapping circles of the documented example
    x, y = np.indices((80, 80))
    x1, y1, x2, y2 = 28, 28, 44, 52
    r1, r2 = 16, 20
    image = ((x - x1) ** 2 + (y - y1) ** 2 < r1**2) | ((x - x2) ** 2 + (y - y2) ** 2 < r2**2)
    expected = _documented_example(image)
    assert expected.max() == 2
    for depth in (0.001, 1.0, 3.0):
        np.testing.assert_array_equal(split(image, 3.0, depth=depth, connectivity=4), expected)


def test_pairs_of_touching_disks_agree_with_the_documented_example() -> None:
    # Touching pairs whose centres are 0.85 to 1.0 times the sum of the radii apart:
    # the documented recipe's peaks are its own (every local maximum, no depth, no
    # separation), so it over-splits some pairs along the ripples of the digital
    # distance. Where it finds the two disks, split-touching with no depth must give
    # the same labels pixel for pixel in most cases; and with its default depth (1 px)
    # it finds two objects in every pair.
    rng = np.random.default_rng(2024)
    yy, xx = np.indices((110, 110))
    same = compared = 0
    for _ in range(40):
        r1, r2 = rng.uniform(6.0, 20.0, 2)
        c1 = rng.uniform(45.0, 55.0, 2)
        t = rng.uniform(0.0, 2.0 * math.pi)
        c2 = c1 + (r1 + r2) * rng.uniform(0.85, 1.0) * np.array([math.sin(t), math.cos(t)])
        image = ((yy - c1[0]) ** 2 + (xx - c1[1]) ** 2 <= r1 * r1) | (
            (yy - c2[0]) ** 2 + (xx - c2[1]) ** 2 <= r2 * r2
        )
        assert split(image, 3.0).max() == 2
        expected = _documented_example(image)
        if expected.max() != 2:
            continue
        compared += 1
        same += bool(np.array_equal(split(image, 1.0, depth=0.001, connectivity=4), expected))
    assert compared >= 25
    assert same >= 0.9 * compared
