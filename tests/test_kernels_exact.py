"""Every erosion / dilation kernel gives the bits of the plain reference, frame included.

The reference (``_morph.erode_reference`` / ``dilate_reference``) is the
definition itself: pad with the neutral value, take the min / max over every
footprint offset by slicing. Each kernel path is forced by ``method=`` and
compared byte for byte on whole images, for every supported dtype, every
footprint family at random sizes, 2-D and 3-D, and images smaller than the
footprint.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from lotproof.steps import _morph, _morph_numba
from lotproof.steps import footprints as fps

PROPERTY = settings(max_examples=200, deadline=None)
FORCED = tuple(m for m in _morph.METHODS if m != "reference")
OPERATIONS = (
    (_morph.erode, _morph.erode_reference),
    (_morph.dilate, _morph.dilate_reference),
)
DTYPES = [np.dtype(d) for d in _morph.SUPPORTED_DTYPES]


@pytest.fixture(scope="module", autouse=True)
def _compiled():
    # compile (or load) every specialisation once, outside the hypothesis deadline
    _morph_numba.warm_up()


def _elements(dtype: np.dtype):
    if dtype.kind == "f":
        # signed zeros included: the kernels must not depend on which zero wins
        return st.one_of(
            st.sampled_from([0.0, -0.0]),
            st.floats(
                allow_nan=False,
                allow_infinity=False,
                width=dtype.itemsize * 8,
                min_value=-1e6,
                max_value=1e6,
            ),
        )
    return None  # the whole range, extremes (= padding values) included


@st.composite
def _image(draw, ndim: int):
    dtype = draw(st.sampled_from(DTYPES))
    top = 40 if ndim == 2 else 9
    shape = tuple(draw(st.integers(1, top)) for _ in range(ndim))
    return draw(hnp.arrays(dtype, shape, elements=_elements(dtype)))


@st.composite
def _footprint(draw, ndim: int, shape: tuple[int, ...]):
    """A footprint of a library family at a random size, sometimes clipped to the data."""
    big = 12.0 if ndim == 2 else 4.0
    size = draw(st.floats(0.3, big))
    other = draw(st.floats(0.3, big))
    limit = [max(n - 1, 0) for n in shape] if draw(st.booleans()) else None
    if ndim == 2:
        family = draw(st.sampled_from(fps.FOOTPRINTS_2D + ("any",)))
        if family == "disk":
            return fps.disk(size, limit=limit)
        if family == "diamond":
            return fps.diamond(size, limit=limit)
        if family == "square":
            return fps.square(size, limit=limit)
        if family == "rectangle":
            return fps.rectangle(size, other, limit=limit)
        if family == "line":
            return fps.line(size, draw(st.floats(-360.0, 360.0)), limit=limit)
    else:
        family = draw(st.sampled_from(fps.FOOTPRINTS_3D + ("any",)))
        if family == "ball":
            return fps.ball(size, limit=limit)
        if family == "cube":
            return fps.cube(size, limit=limit)
    # any shape holding its centre, lopsided ones included
    sides = tuple(2 * draw(st.integers(0, 3 if ndim == 2 else 2)) + 1 for _ in range(ndim))
    fp = draw(hnp.arrays(np.bool_, sides))
    fp[tuple(n // 2 for n in sides)] = True
    return fp


@st.composite
def _case(draw, ndim: int):
    image = draw(_image(ndim))
    return image, draw(_footprint(ndim, image.shape))


def _methods(fp: np.ndarray) -> tuple[str, ...]:
    boxes = ("numba-box", "numba-box-fused")
    methods = FORCED if fp.all() else tuple(m for m in FORCED if m not in boxes)
    # the fused kernels are 2-D only
    flat = ("numba-stencil", "numba-box-fused")
    return methods if fp.ndim == 2 else tuple(m for m in methods if m not in flat)


def _assert_every_method_exact(image: np.ndarray, fp: np.ndarray) -> None:
    for fast, slow in OPERATIONS:
        want = slow(image, fp)
        for method in _methods(fp):
            got = fast(image, fp, method=method)
            # source: the plain definition (min / max over the offsets inside the image)
            assert got.dtype == image.dtype and got.shape == image.shape, method
            assert got.tobytes() == want.tobytes(), (fast.__name__, method, fp.shape)


@given(_case(2))
@PROPERTY
def test_every_kernel_equals_reference_2d(case):
    _assert_every_method_exact(*case)


@given(_case(3))
@settings(max_examples=120, deadline=None)
def test_every_kernel_equals_reference_3d(case):
    _assert_every_method_exact(*case)


@given(_case(2), st.integers(1, 9))
@settings(max_examples=100, deadline=None)
def test_chord_kernel_in_column_strips_equals_reference(case, strip):
    image, fp = case
    # source: the plain definition; strips of any width, however the chords straddle them
    for operation, slow in (("erode", _morph.erode_reference), ("dilate", _morph.dilate_reference)):
        used = fp if operation == "erode" else fp[::-1, ::-1]
        got = _morph._numba(image, used, operation, box=False, strip=strip)
        assert got.tobytes() == slow(image, fp).tobytes()


@st.composite
def _small_footprint(draw):
    """Any footprint within 9x9 holding its centre: sparse, lopsided, one-sided, full."""
    sides = (2 * draw(st.integers(0, 4)) + 1, 2 * draw(st.integers(0, 4)) + 1)
    fp = draw(hnp.arrays(np.bool_, sides))
    shape = draw(st.sampled_from(["any", "left", "top", "corner", "full"]))
    cy, cx = sides[0] // 2, sides[1] // 2
    if shape == "left":
        fp[:, cx + 1 :] = False  # nothing right of the centre
    elif shape == "top":
        fp[cy + 1 :, :] = False
    elif shape == "corner":
        fp[:cy, :] = False
        fp[:, :cx] = False
    elif shape == "full":
        fp[:] = True
    fp[cy, cx] = True
    return fp


@given(
    st.sampled_from(DTYPES).flatmap(
        lambda d: hnp.arrays(
            d, st.tuples(st.integers(1, 20), st.integers(1, 20)), elements=_elements(d)
        )
    ),
    _small_footprint(),
)
@settings(max_examples=300, deadline=None)
def test_stencil_kernel_equals_reference(image, fp):
    # images smaller than the footprint included (sides from 1 pixel)
    for fast, slow in OPERATIONS:
        got = fast(image, fp, method="numba-stencil")
        # source: the plain definition (min / max over the offsets inside the image)
        assert got.dtype == image.dtype and got.shape == image.shape
        assert got.tobytes() == slow(image, fp).tobytes(), (fast.__name__, fp.shape)


def test_stencil_kernel_more_offsets_than_one_pass():
    # 1, 8, 9, 15, 16, 22 and 49 offsets: one pass, exactly full passes, partial last passes
    rng = np.random.default_rng(14)
    image = rng.integers(0, 255, size=(23, 31), dtype=np.uint8, endpoint=True)
    for count in (1, 8, 9, 15, 16, 22, 49):
        fp = np.zeros(49, dtype=bool)
        fp[24] = True
        others = rng.permutation(np.delete(np.arange(49), 24))[: count - 1]
        fp[others] = True
        fp = fp.reshape(7, 7)
        assert int(fp.sum()) == count
        for fast, slow in OPERATIONS:
            # source: the plain definition (min / max over the offsets inside the image)
            assert fast(image, fp, method="numba-stencil").tobytes() == slow(image, fp).tobytes()


@given(
    st.sampled_from(DTYPES).flatmap(
        lambda d: hnp.arrays(
            d, st.tuples(st.integers(1, 24), st.integers(1, 24)), elements=_elements(d)
        )
    ),
    st.integers(0, 6),
    st.integers(0, 6),
)
@settings(max_examples=200, deadline=None)
def test_fused_box_kernel_equals_reference(image, half_width, half_height):
    # boxes up to 13x13, rectangles and lines included, images smaller than the box included
    fp = np.ones((2 * half_height + 1, 2 * half_width + 1), dtype=bool)
    for fast, slow in OPERATIONS:
        got = fast(image, fp, method="numba-box-fused")
        # source: the plain definition (min / max over the offsets inside the image)
        assert got.dtype == image.dtype and got.shape == image.shape
        assert got.tobytes() == slow(image, fp).tobytes(), (fast.__name__, fp.shape)


def test_fused_kernels_refuse_volumes():
    with pytest.raises(ValueError, match="2-D data only"):
        _morph.erode(np.zeros((3, 3, 3), dtype=np.uint8), fps.ball(1.0), method="numba-stencil")
    with pytest.raises(ValueError, match="2-D data only"):
        _morph.erode(np.zeros((3, 3, 3), dtype=np.uint8), fps.cube(3.0), method="numba-box-fused")


@pytest.mark.parametrize("dtype", DTYPES, ids=str)
@pytest.mark.parametrize(
    "fp",
    [fps.disk(1.0), fps.disk(5.0), fps.square(3.0), fps.rectangle(7.0, 1.0), fps.line(9.0, 30.0)],
    ids=["disk1", "disk5", "square3", "rect7x1", "line9-30"],
)
def test_each_family_and_dtype_on_a_larger_image(dtype, fp):
    rng = np.random.default_rng(20261201)
    if dtype == np.bool_:
        image = rng.random((37, 70)) < 0.6
    elif dtype.kind == "f":
        image = (rng.standard_normal((37, 70)) * 100).astype(dtype)
    else:
        info = np.iinfo(dtype)
        image = rng.integers(info.min, info.max, size=(37, 70), dtype=dtype, endpoint=True)
    _assert_every_method_exact(image, fp)


@pytest.mark.parametrize("fp", [fps.ball(2.0), fps.cube(3.0)], ids=["ball2", "cube3"])
@pytest.mark.parametrize("dtype", ["bool", "uint8", "uint16", "float32"])
def test_volumes(fp, dtype):
    rng = np.random.default_rng(3)
    image = (rng.random((6, 11, 13)) * 60000).astype(dtype)
    _assert_every_method_exact(image, fp)


def test_tiny_literal_cross():
    image = np.array([[5, 1, 7], [3, 9, 2], [8, 4, 6]], dtype=np.uint8)
    # source: closed form, min over the 3x3 cross by hand, outside pixels ignored
    eroded = np.array([[1, 1, 1], [3, 1, 2], [3, 4, 2]], dtype=np.uint8)
    # source: closed form, max over the 3x3 cross by hand, outside pixels ignored
    dilated = np.array([[5, 9, 7], [9, 9, 9], [8, 9, 6]], dtype=np.uint8)
    for method in FORCED[:1] + ("numba-chords", "numba-stencil", "scipy-chords"):
        assert np.array_equal(_morph.erode(image, fps.disk(1.0), method=method), eroded)
        assert np.array_equal(_morph.dilate(image, fps.disk(1.0), method=method), dilated)


def test_tiny_literal_box_at_the_frame():
    image = np.array([[4, 8, 2, 9], [7, 1, 6, 3]], dtype=np.uint16)
    # source: closed form, min over the 3x3 box by hand, outside pixels ignored
    eroded = np.array([[1, 1, 1, 2], [1, 1, 1, 2]], dtype=np.uint16)
    for method in ("numba-box", "numba-box-fused", "numba-stencil"):
        got = _morph.erode(image, fps.square(3.0), method=method)
        assert np.array_equal(got, eroded), method


def test_negative_zero_becomes_positive_zero():
    image = np.array([[-0.0, 1.0, -0.0], [2.0, -0.0, 3.0]], dtype=np.float32)
    for method in ("numba-chords", "numba-box", "numba-box-fused", "numba-stencil", "scipy-chords"):
        got = _morph.erode(image, np.ones((1, 1), dtype=bool), method=method)
        # source: common practice, no source (-0.0 is read as +0.0 by the border rule's docs)
        assert not np.signbit(got).any(), method
        assert np.array_equal(got, image)


def test_strided_input_is_handled():
    rng = np.random.default_rng(8)
    base = rng.integers(0, 255, size=(30, 40), dtype=np.uint8)
    view = base[::2, ::3].T  # neither C- nor F-contiguous
    fp = fps.disk(2.5)
    for method in FORCED:
        if method in ("numba-box", "numba-box-fused"):
            continue
        got = _morph.erode(view, fp, method=method)
        # source: the plain definition on the same strided data
        assert got.tobytes() == _morph.erode_reference(np.ascontiguousarray(view), fp).tobytes()


def test_choose_method():
    image = np.zeros((8, 8), dtype=np.uint8)
    assert _morph.choose_method(image, fps.square(3.0)) == "numba-box"
    assert _morph.choose_method(image, fps.square(5.0)) == "numba-box-fused"
    assert _morph.choose_method(image, fps.square(7.0)) == "numba-box-fused"
    assert _morph.choose_method(image, fps.square(9.0)) == "numba-box"
    assert _morph.choose_method(image, fps.rectangle(9.0, 1.0)) == "numba-box"
    assert _morph.choose_method(image, fps.disk(1.0)) == "numba-stencil"
    assert _morph.choose_method(image, fps.disk(2.0)) == "numba-stencil"  # 13 pixels
    assert _morph.choose_method(image, fps.disk(3.0)) == "numba-chords"  # 29 pixels
    assert _morph.choose_method(image[None], fps.cube(3.0)) == "numba-box"
    assert _morph.choose_method(image[None], fps.ball(2.0)) == "numba-chords"


def test_bad_method_is_refused():
    image = np.zeros((5, 5), dtype=np.uint8)
    with pytest.raises(ValueError, match="unknown method 'fastest'"):
        _morph.erode(image, fps.disk(1.0), method="fastest")
    with pytest.raises(ValueError, match="needs a footprint that is a full box"):
        _morph.dilate(image, fps.disk(1.0), method="numba-box")
    with pytest.raises(ValueError, match="needs a footprint that is a full box"):
        _morph.dilate(image, fps.disk(1.0), method="numba-box-fused")


def test_result_is_a_new_array():
    image = np.arange(12, dtype=np.uint8).reshape(3, 4)
    for method in FORCED:
        got = _morph.erode(image, np.ones((1, 1), dtype=bool), method=method)
        assert not np.shares_memory(got, image), method
        assert got.flags.c_contiguous
