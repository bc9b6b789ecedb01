"""Unit tests of the ``split-touching`` step kind."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError
from scipy import ndimage

from lotproof.runner.evaluate.image import resolve_params
from lotproof.steps import REGISTRY
from lotproof.steps.segmentation import SplitParams, raster_relabel, split_touching
from lotproof.steps.units import Length

SPACING = (1.0, 1.0)


def M(text: str) -> np.ndarray:
    """A 2D mask from rows of '#' (foreground) and '.' (background)."""
    return np.array([[c == "#" for c in row] for row in text.split()], dtype=bool)


def split(mask, separation=3.0, connectivity=None, spacing=None, depth=1.0):
    params = SplitParams(
        min_separation=Length(separation, "px"),
        min_depth=Length(depth, "px"),
        connectivity=connectivity,
    )
    return split_touching(params, mask, spacing=spacing or (1.0,) * mask.ndim)


def disks(shape, *circles):
    """Union of the pixel-centre disks (cy, cx, r)."""
    yy, xx = np.indices(shape)
    out = np.zeros(shape, dtype=bool)
    for cy, cx, r in circles:
        out |= (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r
    return out


# --------------------------------------------------------------------------- registration


def test_registered_as_mask_to_labels_in_2d_and_3d() -> None:
    kind = REGISTRY["split-touching"]
    assert kind.takes == (frozenset({"mask"}),)
    assert kind.gives == "labels"
    assert kind.ndims == frozenset({2, 3})
    assert "scikit-image" in kind.libraries and "scipy" in kind.libraries
    assert kind.summary.startswith("Split touching particles")


def test_min_separation_is_a_required_length() -> None:
    with pytest.raises(ValidationError, match="min_separation"):
        SplitParams()
    with pytest.raises(ValidationError, match="bare number"):
        SplitParams(min_separation=6)
    with pytest.raises(ValidationError):
        SplitParams(min_separation="6 um", connectivity=5)
    with pytest.raises(ValidationError):
        SplitParams(min_separation="6 um", keep_lines=True)
    assert SplitParams(min_separation="6 um").connectivity is None
    assert SplitParams(min_separation="6 um").min_depth == Length(1.0, "px")


def test_the_runner_resolves_min_separation_to_pixels() -> None:
    params = resolve_params(SplitParams(min_separation="6 um", min_depth="2 um"), (0.8, 0.8))
    assert params.min_separation == Length(7.5, "px")
    assert params.min_depth == Length(2.5, "px")


# --------------------------------------------------------------------------- literal cases


def test_separate_objects_are_numbered_in_raster_order_and_unchanged() -> None:
    mask = M(
        """
        .....##
        ##...##
        ##.....
        .......
        ...###.
        """
    )
    expected = np.array(
        [
            [0, 0, 0, 0, 0, 1, 1],
            [2, 2, 0, 0, 0, 1, 1],
            [2, 2, 0, 0, 0, 0, 0],
            [0, 0, 0, 0, 0, 0, 0],
            [0, 0, 0, 3, 3, 3, 0],
        ],
        dtype=np.int32,
    )
    out = split(mask, separation=1.0)
    assert out.dtype == np.int32
    np.testing.assert_array_equal(out, expected)


def test_connectivity_decides_whether_corner_neighbours_are_one_object() -> None:
    mask = M(
        """
        #...
        .#..
        ....
        ...#
        """
    )
    four = split(mask, separation=5.0, connectivity=4)
    eight = split(mask, separation=5.0, connectivity=8)
    np.testing.assert_array_equal(four, [[1, 0, 0, 0], [0, 2, 0, 0], [0, 0, 0, 0], [0, 0, 0, 3]])
    np.testing.assert_array_equal(eight, [[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 0, 0], [0, 0, 0, 2]])
    np.testing.assert_array_equal(split(mask, separation=5.0), eight)  # None means 8 in 2D


def test_two_touching_squares_are_cut_at_the_neck() -> None:
    # two 5x5 squares joined by a one-pixel bridge in the middle row
    mask = M(
        """
        .............
        .#####.#####.
        .#####.#####.
        .###########.
        .#####.#####.
        .#####.#####.
        .............
        """
    )
    out = split(mask, separation=3.0)
    assert out.max() == 2
    # each square keeps its own 25 pixels; the bridge pixel goes to one of them
    left, right = out[1:6, 1:6], out[1:6, 7:12]
    assert np.all(left == 1) and np.all(right == 2)
    assert out[3, 6] in (1, 2)


def test_empty_and_full_masks() -> None:
    np.testing.assert_array_equal(split(np.zeros((3, 4), bool)), np.zeros((3, 4), np.int32))
    full = split(np.ones((3, 4), bool))
    assert full.dtype == np.int32
    np.testing.assert_array_equal(full, np.ones((3, 4), np.int32))


def test_min_separation_merges_close_maxima() -> None:
    # two overlapping disks, centres 14 px apart
    mask = disks((40, 60), (20, 22, 9.0), (20, 36, 9.0))
    assert split(mask, separation=10.0).max() == 2
    assert split(mask, separation=14.5).max() == 1


def test_min_depth_merges_shallow_maxima() -> None:
    # disks of radius 10 and 8 px, centres 15 px apart. source: closed form, the
    # common chord lies x0 = (15**2 + 8**2 - 10**2) / 30 = 6.3 px from the smaller
    # centre, so the neck is 2 w wide with w = sqrt(8**2 - 6.3**2) = 4.93 px and the
    # smaller disk rises 8 - 4.93 = 3.07 px above the pass
    mask = disks((40, 60), (20, 20, 10.0), (20, 35, 8.0))
    assert split(mask, separation=3.0, depth=2.0).max() == 2
    assert split(mask, separation=3.0, depth=4.0).max() == 1


def test_pixel_size_does_not_change_a_result_given_in_pixels() -> None:
    mask = disks((40, 60), (20, 22, 9.0), (20, 37, 8.0))
    np.testing.assert_array_equal(split(mask, 6.0, spacing=(0.8, 0.8)), split(mask, 6.0))


def test_distances_follow_the_pixel_size_per_axis() -> None:
    # rows 2 um apart, columns 1 um: two disks of radius 8 um whose centres are
    # 12 um (6 rows) apart. min_separation is a length along x (1 px = 1 um), so
    # 10 px keeps the two maxima apart although they are only 6 rows apart.
    yy, xx = np.indices((34, 30))
    y_um, x_um = 2.0 * yy, 1.0 * xx
    mask = ((y_um - 24) ** 2 + (x_um - 15) ** 2 <= 64) | ((y_um - 36) ** 2 + (x_um - 15) ** 2 <= 64)
    apart = split(mask, separation=10.0, spacing=(2.0, 1.0))
    assert apart.max() == 2
    assert np.all(apart[mask & (y_um <= 28)] == 1) and np.all(apart[mask & (y_um >= 32)] == 2)
    assert split(mask, separation=13.0, spacing=(2.0, 1.0)).max() == 1


def test_three_dimensional_touching_balls() -> None:
    zz, yy, xx = np.indices((24, 24, 40))
    mask = ((zz - 12) ** 2 + (yy - 12) ** 2 + (xx - 12) ** 2 <= 49) | (
        (zz - 12) ** 2 + (yy - 12) ** 2 + (xx - 25) ** 2 <= 49
    )
    out = split(mask, separation=4.0)
    assert out.dtype == np.int32 and out.max() == 2
    # symmetric pair: the cut is the plane half way (x = 18.5), pixels left of it go left
    assert np.all(out[mask & (xx <= 18)] == 1) and np.all(out[mask & (xx >= 19)] == 2)


def test_bad_data_is_refused() -> None:
    with pytest.raises(ValueError, match="bool mask"):
        split(np.zeros((3, 3), np.uint8))
    with pytest.raises(ValueError, match="2D or 3D"):
        split(np.zeros(5, bool), spacing=(1.0,))
    with pytest.raises(ValueError, match="does not apply to 2D"):
        split(np.zeros((3, 3), bool), connectivity=26)
    with pytest.raises(ValueError, match="pixel size"):
        split(np.zeros((3, 3), bool), spacing=(1.0, -1.0))


def test_raster_relabel() -> None:
    labels = np.array([[0, 7, 7], [3, 0, 9], [3, 9, 9]])
    np.testing.assert_array_equal(raster_relabel(labels), [[0, 1, 1], [2, 0, 3], [2, 3, 3]])
    assert raster_relabel(np.zeros((2, 2), int)).dtype == np.int32


# --------------------------------------------------------------------------- properties

masks_2d = hnp.arrays(
    dtype=np.bool_, shape=hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=14)
)


@settings(max_examples=150, deadline=None)
@given(
    mask=masks_2d, connectivity=st.sampled_from([4, 8]), separation=st.sampled_from([1.0, 2.5, 6.0])
)
def test_labels_partition_the_mask_within_its_regions(mask, connectivity, separation) -> None:
    out = split(mask, separation=separation, connectivity=connectivity)
    assert out.dtype == np.int32 and out.shape == mask.shape
    np.testing.assert_array_equal(out > 0, mask)  # every foreground pixel, nothing else
    n = int(out.max())
    # labels 1..N in raster order of their first pixel
    flat = out.ravel()
    firsts = [int(np.flatnonzero(flat == k)[0]) for k in range(1, n + 1)]
    assert firsts == sorted(firsts)
    # a label never joins two regions, and every region is split into >= 1 label
    structure = ndimage.generate_binary_structure(2, 1 if connectivity == 4 else 2)
    regions, count = ndimage.label(mask, structure=structure)
    assert n >= count
    for k in range(1, n + 1):
        assert len(np.unique(regions[out == k])) == 1
    if connectivity == 8:
        for k in range(1, n + 1):
            _, pieces = ndimage.label(out == k, structure=structure)
            assert pieces == 1
    # deterministic
    np.testing.assert_array_equal(
        split(mask, separation=separation, connectivity=connectivity), out
    )


@settings(max_examples=60, deadline=None)
@given(mask=masks_2d)
def test_a_huge_separation_gives_one_label_per_region(mask) -> None:
    # source: the definition (every region keeps exactly its highest marker); the
    # regions are those of scipy.ndimage.label with the full 3x3 neighbourhood
    out = split(mask, separation=1000.0)
    regions, _ = ndimage.label(mask, structure=np.ones((3, 3), bool))
    np.testing.assert_array_equal(out, raster_relabel(regions))
