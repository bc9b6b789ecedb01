"""Footprints and flat morphology checked against sources outside lotproof.

Independent implementations: scipy.ndimage (grey_erosion / grey_dilation,
binary_erosion / binary_dilation) and OpenCV (cv2.erode / cv2.dilate), each
configured to the border rule "pixels outside the image are ignored" by padding
with the neutral value of the operation. Closed-form lattice-point counts for
the digital shapes. Properties from morphology theory (Serra 1982): opening is
anti-extensive and idempotent, closing extensive and idempotent, erosion and
dilation are dual under complement.
"""

from __future__ import annotations

import math
from fractions import Fraction

import cv2
import numpy as np
import pytest
import scipy.ndimage as ndi
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from lotproof.steps import _morph
from lotproof.steps import footprints as fps
from lotproof.steps import morphology as morph
from lotproof.steps.footprints import MorphologyParams

SPACING = (1.0, 1.0)
PROPERTY = settings(max_examples=150, deadline=None)

# A footprint of every 2-D family, with sizes that are integers, non-integers,
# odd and even (even sides become the next odd number by the rounding rule).
FOOTPRINTS_2D = [
    dict(footprint="disk", radius="1 px"),
    dict(footprint="disk", radius="2.3 px"),
    dict(footprint="disk", radius="4 px"),
    dict(footprint="disk", radius="6.71 px"),
    dict(footprint="diamond", radius="2 px"),
    dict(footprint="diamond", radius="3.5 px"),
    dict(footprint="square", size="3 px"),
    dict(footprint="square", size="4 px"),
    dict(footprint="rectangle", width="6 px", height="3 px"),
    dict(footprint="rectangle", width="1 px", height="7.5 px"),
    dict(footprint="line", length="7 px", angle=0),
    dict(footprint="line", length="9 px", angle=30),
    dict(footprint="line", length="8 px", angle=-60),
    dict(footprint="line", length="11 px", angle=135),
]
FOOTPRINTS_3D = [
    dict(footprint="ball", radius="1 px"),
    dict(footprint="ball", radius="2.5 px"),
    dict(footprint="cube", size="3 px"),
    dict(footprint="cube", size="2 px"),
]


def _fp(spec: dict, ndim: int) -> np.ndarray:
    return fps.build_footprint(MorphologyParams(**spec), ndim)


def _random_image(rng: np.random.Generator, shape: tuple[int, ...], dtype) -> np.ndarray:
    dtype = np.dtype(dtype)
    if dtype == np.bool_:
        return rng.random(shape) < 0.55
    if dtype.kind == "f":
        return (rng.standard_normal(shape) * 1000).astype(dtype)
    info = np.iinfo(dtype)
    # the extremes included: they are the padding values, so they must not confuse anything
    return rng.integers(info.min, info.max, size=shape, dtype=dtype, endpoint=True)


def _scipy_erode(image: np.ndarray, fp: np.ndarray) -> np.ndarray:
    if image.dtype == np.bool_:
        # source: scipy.ndimage.binary_erosion; border_value=1 ignores the outside
        return ndi.binary_erosion(image, structure=fp, border_value=1)
    # source: scipy.ndimage.grey_erosion, mode="constant" with the dtype's largest value
    return ndi.grey_erosion(
        image, footprint=fp, mode="constant", cval=_morph.neutral(image.dtype, "erode")
    )


def _scipy_dilate(image: np.ndarray, fp: np.ndarray) -> np.ndarray:
    if image.dtype == np.bool_:
        # source: scipy.ndimage.binary_dilation; border_value=0 ignores the outside
        return ndi.binary_dilation(image, structure=fp, border_value=0)
    # source: scipy.ndimage.grey_dilation, mode="constant" with the dtype's smallest value
    return ndi.grey_dilation(
        image, footprint=fp, mode="constant", cval=_morph.neutral(image.dtype, "dilate")
    )


def _run(kind, spec: dict, data: np.ndarray, **extra) -> np.ndarray:
    params_model = {
        morph.outline: morph.OutlineParams,
        morph.subtract_background: morph.BackgroundParams,
    }.get(kind, MorphologyParams)
    return kind(params_model(**spec, **extra), data, spacing=SPACING)


# --------------------------------------------------------------------------- digital shapes


def test_disk_radius_1_is_the_3x3_cross():
    # source: closed form, lattice points with x^2 + y^2 <= 1
    expected = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], dtype=bool)
    assert np.array_equal(fps.disk(1.0), expected)


def test_disk_radius_sqrt2_is_the_3x3_square():
    # source: closed form, (1, 1) has x^2 + y^2 = 2 <= r^2 = 2
    assert np.array_equal(fps.disk(math.sqrt(2.0)), np.ones((3, 3), dtype=bool))


def test_disk_radius_2():
    # source: closed form, x^2 + y^2 <= 4 by hand
    expected = np.array(
        [
            [0, 0, 1, 0, 0],
            [0, 1, 1, 1, 0],
            [1, 1, 1, 1, 1],
            [0, 1, 1, 1, 0],
            [0, 0, 1, 0, 0],
        ],
        dtype=bool,
    )
    assert np.array_equal(fps.disk(2.0), expected)


def test_disk_of_2_3_is_the_disk_of_sqrt5():
    # source: closed form, no integer x^2 + y^2 lies in (5, 5.29]; 21 points
    assert np.array_equal(fps.disk(2.3), fps.disk(math.sqrt(5.0)))
    assert int(fps.disk(2.3).sum()) == 21


@pytest.mark.parametrize(
    ("radius", "count"),
    # source: from memory, OEIS A000328 (lattice points in a circle of radius n)
    [(1, 5), (2, 13), (3, 29), (4, 49), (5, 81), (10, 317)],
)
def test_disk_point_counts(radius, count):
    assert int(fps.disk(float(radius)).sum()) == count


@pytest.mark.parametrize(
    ("radius", "count"),
    # source: from memory, OEIS A000605 (lattice points in a sphere of radius n)
    [(1, 7), (2, 33), (3, 123)],
)
def test_ball_point_counts(radius, count):
    assert int(fps.ball(float(radius)).sum()) == count


@pytest.mark.parametrize("radius", [1, 2, 3, 7.9])
def test_diamond_point_count(radius):
    h = math.floor(radius)
    # source: closed form, |x| + |y| <= h holds 2 h^2 + 2 h + 1 lattice points
    assert int(fps.diamond(float(radius)).sum()) == 2 * h * h + 2 * h + 1


def test_line_at_45_degrees():
    # source: closed form, points i = -2..2 at (round(-i/sqrt2), round(i/sqrt2))
    expected = np.array([[0, 0, 1], [0, 1, 0], [1, 0, 0]], dtype=bool)
    assert np.array_equal(fps.line(5.0, 45.0), expected)


def test_line_at_30_degrees():
    # source: closed form, (round(-i sin 30), round(i cos 30)) for i = -2..2 by hand:
    # (1, -2), (0, -1), (0, 0), (0, 1), (-1, 2)
    expected = np.array(
        [[0, 0, 0, 0, 1], [0, 1, 1, 1, 0], [1, 0, 0, 0, 0]],
        dtype=bool,
    )
    assert np.array_equal(fps.line(5.0, 30.0), expected)


@pytest.mark.parametrize(
    ("angle", "shape"), [(0, (1, 7)), (90, (7, 1)), (180, (1, 7)), (270, (7, 1))]
)
def test_axis_lines(angle, shape):
    # source: closed form, a line along an axis is a row or column of n pixels
    assert np.array_equal(fps.line(7.0, float(angle)), np.ones(shape, dtype=bool))


@given(
    radius=st.floats(min_value=0.01, max_value=12.0),
    side=st.floats(min_value=0.01, max_value=12.0),
    angle=st.floats(min_value=-720.0, max_value=720.0),
)
@PROPERTY
def test_every_footprint_is_odd_symmetric_and_centred(radius, side, angle):
    shapes = [
        fps.disk(radius),
        fps.diamond(radius),
        fps.ball(radius),
        fps.square(side),
        fps.rectangle(side, radius),
        fps.cube(side),
        fps.line(side, angle),
    ]
    for fp in shapes:
        # source: common practice, no source (B = -B makes the reflection in dilation moot)
        assert all(n % 2 == 1 for n in fp.shape)
        assert np.array_equal(fp, fp[(slice(None, None, -1),) * fp.ndim])
        assert fp[tuple(n // 2 for n in fp.shape)]


@given(radius=st.floats(min_value=0.01, max_value=15.0))
@PROPERTY
def test_disk_matches_brute_force_definition(radius):
    h = math.ceil(radius) + 1
    ys, xs = np.mgrid[-h : h + 1, -h : h + 1]
    # source: closed form, the definition {x^2 + y^2 <= r^2} in exact rational arithmetic
    r2 = Fraction(radius) ** 2
    inside = np.array(
        [[Fraction(int(y * y + x * x)) <= r2 for x in xs[0]] for y in ys[:, 0]], dtype=bool
    )
    # trim the brute-force box to the footprint's extent
    rows = np.flatnonzero(inside.any(axis=1))
    cols = np.flatnonzero(inside.any(axis=0))
    trimmed = inside[rows[0] : rows[-1] + 1, cols[0] : cols[-1] + 1]
    assert np.array_equal(fps.disk(radius), trimmed)


# --------------------------------------------------------------------------- scipy.ndimage


@pytest.mark.parametrize("spec", FOOTPRINTS_2D, ids=lambda s: "-".join(map(str, s.values())))
@pytest.mark.parametrize("dtype", ["bool", "uint8", "uint16", "int32", "float32", "float64"])
def test_erode_widen_match_scipy_2d(spec, dtype):
    rng = np.random.default_rng(20261201)
    image = _random_image(rng, (23, 31), dtype)
    fp = _fp(spec, 2)
    assert np.array_equal(_run(morph.erode, spec, image), _scipy_erode(image, fp))
    assert np.array_equal(_run(morph.widen, spec, image), _scipy_dilate(image, fp))


@pytest.mark.parametrize("spec", FOOTPRINTS_3D, ids=lambda s: "-".join(map(str, s.values())))
@pytest.mark.parametrize("dtype", ["bool", "uint16", "float32"])
def test_erode_widen_match_scipy_3d(spec, dtype):
    rng = np.random.default_rng(7)
    image = _random_image(rng, (7, 9, 11), dtype)
    fp = _fp(spec, 3)
    assert np.array_equal(_run(morph.erode, spec, image), _scipy_erode(image, fp))
    assert np.array_equal(_run(morph.widen, spec, image), _scipy_dilate(image, fp))


@pytest.mark.parametrize("spec", FOOTPRINTS_2D[::3], ids=lambda s: "-".join(map(str, s.values())))
@pytest.mark.parametrize("dtype", ["bool", "uint8", "float64"])
def test_open_close_outline_tophat_match_scipy_compositions(spec, dtype):
    rng = np.random.default_rng(3)
    image = _random_image(rng, (19, 24), dtype)
    fp = _fp(spec, 2)
    # source: scipy.ndimage erosion and dilation composed; scipy's grey_opening pads both
    # halves with one cval, which breaks the border rule, so the halves are composed here
    opened = _scipy_dilate(_scipy_erode(image, fp), fp)
    closed = _scipy_erode(_scipy_dilate(image, fp), fp)
    eroded, dilated = _scipy_erode(image, fp), _scipy_dilate(image, fp)
    assert np.array_equal(_run(morph.open_, spec, image), opened)
    assert np.array_equal(_run(morph.close, spec, image), closed)
    if dtype == "bool":
        expected = {
            "full": dilated & ~eroded,
            "inner": image & ~eroded,
            "outer": dilated & ~image,
        }
    else:
        expected = {"full": dilated - eroded, "inner": image - eroded, "outer": dilated - image}
        assert np.array_equal(
            _run(morph.subtract_background, spec, image, features="bright"), image - opened
        )
        assert np.array_equal(
            _run(morph.subtract_background, spec, image, features="dark"), closed - image
        )
    for mode, want in expected.items():
        assert np.array_equal(_run(morph.outline, spec, image, mode=mode), want)


def test_asymmetric_footprint_conventions_match_scipy():
    # scipy's grey_erosion is min f(x + b) and grey_dilation max f(x - b) (it reflects the
    # footprint); the kernels define the same, so the two agree even for a lopsided shape
    rng = np.random.default_rng(11)
    fp = rng.random((3, 5)) < 0.5
    fp[1, 2] = True
    image = _random_image(rng, (12, 13), "uint8")
    # source: scipy.ndimage.grey_erosion / grey_dilation, mode="constant"
    want_erode = ndi.grey_erosion(image, footprint=fp, mode="constant", cval=255)
    want_dilate = ndi.grey_dilation(image, footprint=fp, mode="constant", cval=0)
    assert np.array_equal(_morph.erode(image, fp), want_erode)
    assert np.array_equal(_morph.dilate(image, fp), want_dilate)


# --------------------------------------------------------------------------- OpenCV


@pytest.mark.parametrize("spec", FOOTPRINTS_2D, ids=lambda s: "-".join(map(str, s.values())))
@pytest.mark.parametrize("dtype", ["uint8", "uint16", "float32"])
def test_erode_widen_match_opencv(spec, dtype):
    rng = np.random.default_rng(99)
    image = _random_image(rng, (29, 26), dtype)
    kernel = _fp(spec, 2).astype(np.uint8)
    # source: OpenCV cv2.erode / cv2.dilate, BORDER_CONSTANT with the neutral value; OpenCV's
    # dilate is max f(x + b) (no reflection), the same here because every footprint is symmetric
    high, low = _morph.neutral(image.dtype, "erode"), _morph.neutral(image.dtype, "dilate")
    want_erode = cv2.erode(image, kernel, borderType=cv2.BORDER_CONSTANT, borderValue=high)
    want_dilate = cv2.dilate(image, kernel, borderType=cv2.BORDER_CONSTANT, borderValue=low)
    assert np.array_equal(_run(morph.erode, spec, image), want_erode)
    assert np.array_equal(_run(morph.widen, spec, image), want_dilate)


def test_large_disk_matches_opencv():
    rng = np.random.default_rng(5)
    image = _random_image(rng, (160, 150), "uint16")
    kernel = fps.disk(46.0).astype(np.uint8)
    # source: OpenCV cv2.erode, BORDER_CONSTANT with 65535; footprint wider than the image
    want = cv2.erode(image, kernel, borderType=cv2.BORDER_CONSTANT, borderValue=65535)
    assert np.array_equal(_morph.erode(image, fps.disk(46.0)), want)


# --------------------------------------------------------------------------- properties

_DTYPES = st.sampled_from([np.dtype(d) for d in _morph.SUPPORTED_DTYPES])


@st.composite
def _images(draw, ndim=None, dtype=None):
    dtype = draw(_DTYPES) if dtype is None else np.dtype(dtype)
    ndim = draw(st.sampled_from([2, 3])) if ndim is None else ndim
    sides = (1, 6) if ndim == 3 else (1, 14)
    shape = tuple(draw(st.integers(*sides)) for _ in range(ndim))
    if dtype.kind == "f":
        elements = st.floats(
            allow_nan=False,
            allow_infinity=False,
            width=dtype.itemsize * 8,
            min_value=-1e6,
            max_value=1e6,
        )
    else:
        elements = None
    return draw(hnp.arrays(dtype, shape, elements=elements))


@st.composite
def _any_footprint(draw, ndim):
    shape = tuple(2 * draw(st.integers(0, 3)) + 1 for _ in range(ndim))
    fp = draw(hnp.arrays(np.bool_, shape))
    fp[tuple(n // 2 for n in shape)] = True
    return fp


@st.composite
def _image_and_footprint(draw):
    image = draw(_images())
    return image, draw(_any_footprint(image.ndim))


@given(_image_and_footprint())
@PROPERTY
def test_fast_kernels_equal_reference_bit_for_bit(case):
    image, fp = case
    # source: the plain definition (_morph.erode_reference), any footprint holding its centre
    pairs = ((_morph.erode, _morph.erode_reference), (_morph.dilate, _morph.dilate_reference))
    for fast, slow in pairs:
        got, want = fast(image, fp), slow(image, fp)
        assert got.dtype == want.dtype == image.dtype
        assert got.tobytes() == want.tobytes()


@given(_image_and_footprint())
@PROPERTY
def test_fast_kernels_equal_scipy_for_any_footprint(case):
    image, fp = case
    # source: scipy.ndimage.grey_erosion / grey_dilation / binary_*, neutral padding
    assert np.array_equal(_morph.erode(image, fp), _scipy_erode(image, fp))
    assert np.array_equal(_morph.dilate(image, fp), _scipy_dilate(image, fp))


@given(fp=_any_footprint(2))
@PROPERTY
def test_chords_tile_the_footprint(fp):
    centre = [n // 2 for n in fp.shape]
    rebuilt = np.zeros_like(fp)
    for (dy,), start, length in _morph.chords(fp):
        x0 = centre[1] + start
        # source: common practice, no source (the runs must cover every pixel exactly once)
        assert not rebuilt[centre[0] + dy, x0 : x0 + length].any()
        rebuilt[centre[0] + dy, x0 : x0 + length] = True
    assert np.array_equal(rebuilt, fp)


def _library_footprint(ndim: int):
    if ndim == 2:
        return st.one_of(
            st.builds(fps.disk, st.floats(0.5, 4.5)),
            st.builds(fps.diamond, st.floats(0.5, 4.5)),
            st.builds(fps.square, st.floats(0.5, 6.0)),
            st.builds(fps.rectangle, st.floats(0.5, 6.0), st.floats(0.5, 6.0)),
            st.builds(fps.line, st.floats(0.5, 9.0), st.floats(-180.0, 180.0)),
        )
    return st.one_of(
        st.builds(fps.ball, st.floats(0.5, 2.5)), st.builds(fps.cube, st.floats(0.5, 4.0))
    )


@st.composite
def _image_and_library_footprint(draw, dtype=None):
    image = draw(_images(dtype=dtype))
    return image, draw(_library_footprint(image.ndim))


@given(_image_and_library_footprint())
@PROPERTY
def test_opening_below_image_below_closing_and_both_idempotent(case):
    image, fp = case

    def opening(f):
        return _morph.dilate(_morph.erode(f, fp), fp)

    def closing(f):
        return _morph.erode(_morph.dilate(f, fp), fp)

    opened, closed = opening(image), closing(image)
    # source: Serra 1982, opening is anti-extensive and idempotent, closing is extensive
    # and idempotent
    assert np.all(opened <= image) and np.all(image <= closed)
    assert np.array_equal(opening(opened), opened)
    assert np.array_equal(closing(closed), closed)


@given(_image_and_library_footprint(dtype="bool"))
@PROPERTY
def test_mask_duality_under_complement(case):
    mask, fp = case
    # source: Serra 1982, erosion of the complement is the complement of the dilation
    # (footprint symmetric); holds on the frame too under the ignore-outside rule
    assert np.array_equal(_morph.erode(~mask, fp), ~_morph.dilate(mask, fp))
    assert np.array_equal(_morph.dilate(~mask, fp), ~_morph.erode(mask, fp))


@given(_image_and_library_footprint(dtype="uint8"))
@PROPERTY
def test_uint8_duality_under_complement(case):
    image, fp = case
    # source: Serra 1982, gray duality with the complement 255 - f
    assert np.array_equal(_morph.erode(255 - image, fp), 255 - _morph.dilate(image, fp))
    assert np.array_equal(_morph.dilate(255 - image, fp), 255 - _morph.erode(image, fp))


@given(_image_and_library_footprint(dtype="float64"))
@PROPERTY
def test_float_duality_under_negation(case):
    image, fp = case
    # source: Serra 1982, gray duality with the complement -f (negation is exact in floats)
    assert np.array_equal(_morph.erode(-image, fp), -_morph.dilate(image, fp))
