"""Unit tests of the mask clean-up steps."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError

from lotproof.steps import REGISTRY
from lotproof.steps.connectivity import BACKGROUND_CONNECTIVITY, CONNECTIVITY_2D, CONNECTIVITY_3D
from lotproof.steps.masks import (
    COMBINE_METHODS,
    ClearBorderParams,
    CombineParams,
    FillHolesParams,
    InvertParams,
    RemoveSmallParams,
    clear_border,
    combine,
    fill_holes,
    invert,
    remove_small,
)
from lotproof.steps.units import Area

SPACING = (1.0, 1.0)


def M(text: str) -> np.ndarray:
    """A 2D mask from rows of '#' (foreground) and '.' (background)."""
    return np.array([[c == "#" for c in row] for row in text.split()], dtype=bool)


def fill(mask, connectivity=None):
    return fill_holes(FillHolesParams(connectivity=connectivity), mask, spacing=SPACING)


def small(mask, min_area, connectivity=None):
    params = RemoveSmallParams(min_area=Area(min_area, "px2"), connectivity=connectivity)
    return remove_small(params, mask, spacing=SPACING)


def border(mask, connectivity=None):
    return clear_border(ClearBorderParams(connectivity=connectivity), mask, spacing=SPACING)


def comb(method, *masks):
    return combine(CombineParams(method=method), *masks, spacing=SPACING)


masks_2d = hnp.arrays(
    dtype=np.bool_, shape=hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=10)
)


# --------------------------------------------------------------------------- parameters


def test_registration():
    for name in ("fill-holes", "remove-small", "clear-border", "invert", "combine"):
        kind = REGISTRY[name]
        assert kind.gives == "mask"
        assert kind.ndims == frozenset({2, 3})
    assert REGISTRY["combine"].variadic
    assert REGISTRY["combine"].input_count_ok(3)
    assert not REGISTRY["combine"].input_count_ok(1)


def test_connectivity_values():
    assert CONNECTIVITY_2D == (4, 8) and CONNECTIVITY_3D == (6, 18, 26)
    with pytest.raises(ValidationError, match="26"):
        FillHolesParams(connectivity=5)
    assert ClearBorderParams().connectivity is None


@pytest.mark.parametrize(
    ("func", "params", "shape", "message"),
    [
        (
            fill_holes,
            FillHolesParams(connectivity=6),
            (3, 3),
            "connectivity 6 does not apply to 2D data",
        ),
        (clear_border, ClearBorderParams(connectivity=26), (3, 3), "use one of 4, 8$"),
        (
            remove_small,
            RemoveSmallParams(min_area="2 px2", connectivity=8),
            (2, 3, 3),
            "use one of 6, 18, 26$",
        ),
    ],
)
def test_connectivity_of_the_wrong_dimension(func, params, shape, message):
    with pytest.raises(ValueError, match=message):
        func(params, np.zeros(shape, dtype=bool), spacing=(1.0,) * len(shape))


def test_remove_small_needs_an_area():
    with pytest.raises(ValidationError, match="min_area"):
        RemoveSmallParams()
    with pytest.raises(ValidationError, match="bare number"):
        RemoveSmallParams(min_area=20)
    with pytest.raises(ValidationError, match="is a length"):
        RemoveSmallParams(min_area="3 px")


def test_non_bool_masks_are_refused():
    with pytest.raises(ValueError, match="needs a bool mask, got dtype uint8"):
        fill(np.zeros((3, 3), dtype=np.uint8))
    with pytest.raises(ValueError, match=r"combine \(mask 2\) needs a bool mask"):
        comb("and", np.zeros((2, 2), bool), np.zeros((2, 2), np.uint8))


def test_combine_parameters_and_shapes():
    assert COMBINE_METHODS == ("and", "or", "xor", "minus")
    with pytest.raises(ValidationError, match="method"):
        CombineParams()
    with pytest.raises(ValidationError, match="minus"):
        CombineParams(method="nand")
    with pytest.raises(ValueError, match=r"mask 1: \(2, 2\), mask 2: \(2, 3\)"):
        comb("or", np.zeros((2, 2), bool), np.zeros((2, 3), bool))
    with pytest.raises(ValueError, match="two or more masks, got 1"):
        comb("or", np.zeros((2, 2), bool))


# --------------------------------------------------------------------------- fill-holes


def test_fill_holes_literal():
    mask = M(
        """
        .......
        .###...
        .#.#...
        .###.#.
        ....#.#
        .....#.
        """
    )
    # the square's hole is closed on every side; the diamond's centre is closed
    # only at corners: a hole for 8-connected objects (4-connected background)
    expected_8 = M(
        """
        .......
        .###...
        .###...
        .###.#.
        ....###
        .....#.
        """
    )
    np.testing.assert_array_equal(fill(mask), expected_8)
    np.testing.assert_array_equal(fill(mask, 8), expected_8)
    expected_4 = M(
        """
        .......
        .###...
        .###...
        .###.#.
        ....#.#
        .....#.
        """
    )
    np.testing.assert_array_equal(fill(mask, 4), expected_4)


def test_fill_holes_background_on_the_frame_is_not_a_hole():
    mask = M(
        """
        ###
        #.#
        ...
        """
    )
    np.testing.assert_array_equal(fill(mask), mask)


def test_background_connectivity_pairs():
    assert BACKGROUND_CONNECTIVITY == {4: 8, 8: 4, 6: 26, 18: 6, 26: 6}


def test_fill_holes_3d():
    mask = np.ones((3, 3, 3), dtype=bool)
    mask[1, 1, 1] = False
    assert fill(mask).all()
    assert fill(mask, 6).all() and fill(mask, 18).all()


# --------------------------------------------------------------------------- remove-small


def test_remove_small_strictly_smaller_rule():
    mask = M(
        """
        #..##..###
        ..........
        #.........
        .#........
        """
    )
    # objects of 1 pixel, 2 pixels, 3 pixels and (8-connected) a diagonal pair
    expected = M(
        """
        ...##..###
        ..........
        #.........
        .#........
        """
    )
    out = small(mask, 2)
    assert out.dtype == np.bool_
    np.testing.assert_array_equal(out, expected)
    # 4-connected, the diagonal pair is two single pixels
    expected_4 = M("...##..### .......... .......... ..........")
    np.testing.assert_array_equal(small(mask, 2, 4), expected_4)
    # a real-valued minimum: 2.5 px2 removes the 2-pixel objects too
    expected_25 = M(".......### .......... .......... ..........")
    np.testing.assert_array_equal(small(mask, 2.5), expected_25)


def test_remove_small_3d_counts_voxels():
    mask = np.zeros((3, 3, 3), dtype=bool)
    mask[0, 0, 0] = mask[1, 1, 1] = True  # 26-connected: one object of 2 voxels
    np.testing.assert_array_equal(small(mask, 2), mask)
    assert not small(mask, 2, connectivity=6).any()


# --------------------------------------------------------------------------- clear-border


def test_clear_border_literal():
    mask = M(
        """
        #.....
        .#....
        ...##.
        ......
        ....#.
        .....#
        """
    )
    # 8-connected: the top-left pair and the bottom-right pair touch the frame
    np.testing.assert_array_equal(border(mask), M("...... ...... ...##. ...... ...... ......"))
    # 4-connected: only the corner pixels themselves touch the frame
    np.testing.assert_array_equal(border(mask, 4), M("...... .#.... ...##. ...... ....#. ......"))


def test_clear_border_3d_first_and_last_slice_are_frame():
    mask = np.zeros((3, 5, 5), dtype=bool)
    mask[0, 2, 2] = True  # on the first slice
    mask[1, 2, 2] = True  # joined to it (6-connected)
    assert not border(mask).any()
    mask = np.zeros((3, 5, 5), dtype=bool)
    mask[1, 2, 2] = True
    np.testing.assert_array_equal(border(mask), mask)


# --------------------------------------------------------------------------- combine


def test_combine_truth_tables():
    a = np.array([[False, False, True, True]])
    b = np.array([[False, True, False, True]])
    np.testing.assert_array_equal(comb("and", a, b), [[False, False, False, True]])
    np.testing.assert_array_equal(comb("or", a, b), [[False, True, True, True]])
    np.testing.assert_array_equal(comb("xor", a, b), [[False, True, True, False]])
    np.testing.assert_array_equal(comb("minus", a, b), [[False, False, True, False]])


def test_combine_three_masks():
    a = np.array([[1, 1, 1, 1, 0, 0, 0, 0]], dtype=bool)
    b = np.array([[1, 1, 0, 0, 1, 1, 0, 0]], dtype=bool)
    c = np.array([[1, 0, 1, 0, 1, 0, 1, 0]], dtype=bool)
    np.testing.assert_array_equal(comb("and", a, b, c), [[1, 0, 0, 0, 0, 0, 0, 0]])
    np.testing.assert_array_equal(comb("or", a, b, c), [[1, 1, 1, 1, 1, 1, 1, 0]])
    # odd number of masks
    np.testing.assert_array_equal(comb("xor", a, b, c), [[1, 0, 0, 1, 0, 1, 1, 0]])
    # in a, in neither b nor c
    np.testing.assert_array_equal(comb("minus", a, b, c), [[0, 0, 0, 1, 0, 0, 0, 0]])


# --------------------------------------------------------------------------- degenerate


@pytest.mark.parametrize("shape", [(4, 5), (3, 4, 5)])
@pytest.mark.parametrize("full", [False, True])
def test_empty_and_full_masks(shape, full):
    mask = np.full(shape, full, dtype=bool)
    spacing = (1.0,) * len(shape)
    # empty: all background reaches the frame; full: there is no background
    np.testing.assert_array_equal(fill_holes(FillHolesParams(), mask, spacing=spacing), mask)
    params = RemoveSmallParams(min_area="3 px2")
    np.testing.assert_array_equal(remove_small(params, mask, spacing=spacing), mask)
    # a full mask is one object on the frame
    assert not clear_border(ClearBorderParams(), mask, spacing=spacing).any()
    np.testing.assert_array_equal(invert(InvertParams(), mask, spacing=spacing), ~mask)
    for method in COMBINE_METHODS:
        out = combine(CombineParams(method=method), mask, mask, spacing=spacing)
        assert out.dtype == np.bool_ and out.shape == shape


# --------------------------------------------------------------------------- properties


@settings(max_examples=60, deadline=None)
@given(mask=masks_2d, connectivity=st.sampled_from([None, 4, 8]))
def test_fill_holes_properties(mask, connectivity):
    out = fill(mask, connectivity)
    assert out.dtype == np.bool_ and out.shape == mask.shape
    assert (out >= mask).all()  # only adds
    np.testing.assert_array_equal(fill(out, connectivity), out)  # idempotent
    # the frame is never changed: frame background always reaches the frame
    frame = np.ones(mask.shape, dtype=bool)
    frame[1:-1, 1:-1] = False
    np.testing.assert_array_equal(out[frame], mask[frame])


@settings(max_examples=60, deadline=None)
@given(
    mask=masks_2d,
    connectivity=st.sampled_from([None, 4, 8]),
    min_area=st.integers(min_value=1, max_value=6),
)
def test_remove_small_and_clear_border_properties(mask, connectivity, min_area):
    out = small(mask, min_area, connectivity)
    assert (out <= mask).all()
    np.testing.assert_array_equal(small(out, min_area, connectivity), out)
    if min_area == 1:
        np.testing.assert_array_equal(out, mask)  # every object has at least 1 pixel
    cleared = border(mask, connectivity)
    assert (cleared <= mask).all()
    assert not cleared[[0, -1], :].any() and not cleared[:, [0, -1]].any()
    np.testing.assert_array_equal(border(cleared, connectivity), cleared)


@settings(max_examples=40, deadline=None)
@given(data=st.data(), shape=hnp.array_shapes(min_dims=2, max_dims=3, max_side=6))
def test_combine_minus_is_and_with_inverted_or(data, shape):
    masks = [data.draw(hnp.arrays(np.bool_, shape)) for _ in range(3)]
    spacing = (1.0,) * len(shape)
    union = comb("or", *masks[1:])
    inverted = invert(InvertParams(), union, spacing=spacing)
    np.testing.assert_array_equal(comb("minus", *masks), comb("and", masks[0], inverted))
