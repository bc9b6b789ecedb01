"""The compiled measure kernels give exactly what the numpy formulations gave.

``lotproof.steps._measure_kernels`` keeps its former numpy implementations as
``_reference_*`` functions (vectorised bincount / sort formulations, checked
against scikit-image in ``tests/reference/test_measure_reference.py``). Every
compiled kernel is compared with its reference on random label images of many
shapes -- empty, single pixels, objects on the frame, gaps in the ids,
objects made of several pieces -- and must give the same integers and the same
float64 bits, not merely close values.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from lotproof.steps import _measure_kernels as mk

PROPERTY = settings(max_examples=150, deadline=None, database=None)
MOMENT_NAMES = ("n", "row", "col", "mu_rr", "mu_cc", "mu_rc")


@pytest.fixture(scope="module", autouse=True)
def _compiled():
    # compile (or load) every kernel once, outside the examples
    mk.warm_up()


def _bits(a: np.ndarray) -> np.ndarray:
    assert a.dtype == np.float64
    return np.ascontiguousarray(a).view(np.uint64)


@st.composite
def _ids(draw, max_side: int = 24):
    """An int64 id image and a count >= its largest id (ids may have gaps)."""
    shape = (draw(st.integers(1, max_side)), draw(st.integers(1, max_side)))
    kind = draw(st.sampled_from(["noise", "blocks", "empty", "single"]))
    if kind == "empty":
        ids = np.zeros(shape, dtype=np.int64)
    elif kind == "single":
        ids = np.zeros(shape, dtype=np.int64)
        r = draw(st.integers(0, shape[0] - 1))
        c = draw(st.integers(0, shape[1] - 1))
        ids[r, c] = draw(st.integers(1, 5))
    elif kind == "noise":
        # few distinct ids: objects of many pieces, touching each other and the frame
        top = draw(st.integers(1, 6))
        ids = draw(hnp.arrays(np.int64, shape, elements=st.integers(0, top)))
    else:
        # overlapping rectangles and disks: solid objects with holes cut by later ones
        ids = np.zeros(shape, dtype=np.int64)
        yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]]
        for _k in range(draw(st.integers(1, 8))):
            value = draw(st.integers(0, 9))
            r0, c0 = draw(st.integers(-3, shape[0])), draw(st.integers(-3, shape[1]))
            r1, c1 = draw(st.integers(0, 15)), draw(st.integers(0, 15))
            if draw(st.booleans()):
                ids[max(r0, 0) : max(r0 + r1, 0), max(c0, 0) : max(c0 + c1, 0)] = value
            else:
                ids[(yy - r0) ** 2 + (xx - c0) ** 2 <= r1 * c1 / 4.0] = value
    count = int(ids.max()) + draw(st.integers(0, 3))
    return ids, count


@PROPERTY
@given(_ids())
def test_window_histograms_equal_reference(case) -> None:
    ids, count = case
    # source: the previous numpy implementation (_reference_window_histogram_by_label_2d)
    new = mk.window_histogram_by_label_2d(ids, count)
    old = mk._reference_window_histogram_by_label_2d(ids, count)
    assert new.dtype == old.dtype == np.int64
    np.testing.assert_array_equal(new, old)
    mask = ids != 0
    # source: the previous numpy implementation (_reference_window_histogram_2d)
    np.testing.assert_array_equal(
        mk.window_histogram_2d(mask), mk._reference_window_histogram_2d(mask)
    )


@PROPERTY
@given(_ids())
def test_pixel_moments_equal_reference_bit_for_bit(case) -> None:
    ids, count = case
    new = mk.pixel_moments_2d(ids, count)
    # source: the previous numpy implementation (_reference_pixel_moments_2d, bincount sums)
    old = mk._reference_pixel_moments_2d(ids, count)
    assert tuple(new) == MOMENT_NAMES
    for name in MOMENT_NAMES:
        assert new[name].shape == old[name].shape == (count,)
        assert new[name].dtype == np.float64
        reference = old[name]
        if not ids.any():
            # with no object pixel at all the reference's weighted bincounts are
            # int64 zeros (numpy's empty-input rule); the values are the same
            reference = reference.astype(np.float64)
        np.testing.assert_array_equal(_bits(new[name]), _bits(reference), err_msg=name)


@PROPERTY
@given(_ids())
def test_boxes_and_feret_equal_reference(case) -> None:
    ids, count = case
    boxes = mk.bounding_boxes(ids, count)
    # source: scipy.ndimage.find_objects (the previous implementation)
    np.testing.assert_array_equal(boxes, mk._reference_bounding_boxes(ids, count))
    assert boxes.dtype == np.int64
    # source: the previous numpy implementation (_reference_feret_max_2d)
    np.testing.assert_array_equal(
        _bits(mk.feret_max_2d(ids, boxes)), _bits(mk._reference_feret_max_2d(ids, boxes))
    )


@PROPERTY
@given(_ids(), st.integers(0, 40))
def test_compact_labels_equal_reference(case, spread) -> None:
    ids, _ = case
    labels = ids * (spread + 1)  # gaps between the label values, or none
    new_ids, new_present = mk.compact_labels(labels)
    # source: the previous numpy implementation (_reference_compact_labels, bincount + searchsorted)
    old_ids, old_present = mk._reference_compact_labels(labels)
    assert new_ids.dtype == old_ids.dtype == np.int64
    assert new_present.dtype == old_present.dtype == np.int64
    np.testing.assert_array_equal(new_ids, old_ids)
    np.testing.assert_array_equal(new_present, old_present)


def _blobs(shape: tuple[int, int], n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    ids = np.zeros(shape, dtype=np.int64)
    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]]
    for k in range(1, n + 1):
        cy, cx = rng.uniform(-10, shape[0] + 10), rng.uniform(-10, shape[1] + 10)
        a, b = rng.uniform(1, 60, size=2)
        angle = rng.uniform(0, np.pi)
        u = (yy - cy) * np.cos(angle) + (xx - cx) * np.sin(angle)
        v = -(yy - cy) * np.sin(angle) + (xx - cx) * np.cos(angle)
        ids[(u / a) ** 2 + (v / b) ** 2 <= 1.0] = k
    return ids


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_large_objects_equal_reference(seed: int) -> None:
    # ellipses up to 120 px across, cut by each other and by the frame: many
    # hull vertices per object (the reference's all-pairs path for > 128 points)
    ids = _blobs((200, 260), 40, seed)
    count = 40
    boxes = mk.bounding_boxes(ids, count)
    # source: the previous numpy implementations (_reference_*)
    np.testing.assert_array_equal(boxes, mk._reference_bounding_boxes(ids, count))
    np.testing.assert_array_equal(
        _bits(mk.feret_max_2d(ids, boxes)), _bits(mk._reference_feret_max_2d(ids, boxes))
    )
    np.testing.assert_array_equal(
        mk.window_histogram_by_label_2d(ids, count),
        mk._reference_window_histogram_by_label_2d(ids, count),
    )
    new, old = mk.pixel_moments_2d(ids, count), mk._reference_pixel_moments_2d(ids, count)
    for name in MOMENT_NAMES:
        np.testing.assert_array_equal(_bits(new[name]), _bits(old[name]), err_msg=name)


def test_literal_feret_and_quads() -> None:
    ids = np.zeros((14, 14), dtype=np.int64)
    ids[0, 0] = 1  # a single pixel on the frame
    ids[2:12, 2:12] = 2  # a 10 x 10 square
    ids[13, 0:10] = 3  # a 1 x 10 bar on the frame
    boxes = mk.bounding_boxes(ids, 3)
    np.testing.assert_array_equal(boxes, [[0, 0, 1, 1], [2, 2, 12, 12], [13, 0, 14, 10]])
    # source: closed form from the definition (edge midpoints): 1 px, sqrt(9.5^2 + 9^2)...
    # the square's farthest contour points (-0.5, 0) and (9.5, 9) in pixel units give sqrt(181)
    np.testing.assert_array_equal(mk.feret_max_2d(ids, boxes), [1.0, math.sqrt(181.0), 10.0])
    quads = mk.window_histogram_by_label_2d(ids, 3)
    # source: closed form: a lone pixel is in 4 windows, one per corner code 1, 2, 4, 8
    np.testing.assert_array_equal(np.flatnonzero(quads[1]), [1, 2, 4, 8])
    # source: closed form: a 10 x 10 square has 9 x 9 full windows and 4 x 9 edge windows
    assert quads[2, 15] == 81 and quads[2, 3] == quads[2, 12] == quads[2, 5] == quads[2, 10] == 9


def test_feret_agrees_with_scikit_image() -> None:
    from skimage.measure import regionprops

    ids = _blobs((90, 110), 12, 7)
    boxes = mk.bounding_boxes(ids, 12)
    ours = mk.feret_max_2d(ids, boxes)
    for region in regionprops(ids.astype(np.int32)):
        # source: skimage.measure.regionprops feret_diameter_max (0.26), same definition
        assert ours[region.label - 1] == pytest.approx(region.feret_diameter_max, rel=1e-12)


def test_bad_ids_are_refused() -> None:
    ids = np.array([[0, 3], [1, 0]], dtype=np.int64)
    for call in (
        lambda: mk.window_histogram_by_label_2d(ids, 2),
        lambda: mk.pixel_moments_2d(ids, 2),
        lambda: mk.bounding_boxes(ids, 2),
        lambda: mk.feret_max_2d(ids, np.zeros((2, 4), dtype=np.int64)),
        lambda: mk.pixel_moments_2d(-ids, 3),
    ):
        with pytest.raises(ValueError, match=r"ids must lie in 0\.\.[23]"):
            call()
    boxes = mk.bounding_boxes(ids, 3)
    loose = boxes.copy()
    loose[0, 2] += 1  # one row too many
    with pytest.raises(ValueError, match="bounding boxes"):
        mk.feret_max_2d(ids, loose)
    with pytest.raises(ValueError, match="bounding boxes"):
        mk.feret_max_2d(ids, np.zeros((3, 4), dtype=np.int64))
    with pytest.raises(ValueError, match=">= 0"):
        mk.compact_labels(-ids)


def test_other_dtypes_and_layouts_are_cast() -> None:
    ids = _blobs((40, 50), 6, 3)
    count = 6
    for variant in (ids.astype(np.int32), np.asfortranarray(ids), ids.T.copy().T):
        # source: the previous numpy implementations (_reference_*)
        np.testing.assert_array_equal(
            mk.window_histogram_by_label_2d(variant, count),
            mk._reference_window_histogram_by_label_2d(ids, count),
        )
        np.testing.assert_array_equal(
            mk.feret_max_2d(variant, mk.bounding_boxes(variant, count)),
            mk._reference_feret_max_2d(ids, mk._reference_bounding_boxes(ids, count)),
        )
    volume = np.stack([ids, np.roll(ids, 3, axis=0)])
    # source: scipy.ndimage.find_objects (3-D boxes still come from it)
    np.testing.assert_array_equal(
        mk.bounding_boxes(volume, count), mk._reference_bounding_boxes(volume, count)
    )
    labels3 = np.stack([ids * 2, ids * 2])
    new_ids, present = mk.compact_labels(labels3)
    old_ids, old_present = mk._reference_compact_labels(labels3)
    np.testing.assert_array_equal(new_ids, old_ids)
    np.testing.assert_array_equal(present, old_present)
