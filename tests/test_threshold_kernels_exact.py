"""The compiled threshold kernels give exactly what the numpy formulations gave.

``lotproof.steps._threshold_kernels`` keeps the numpy formulations it replaced
(``np.bincount`` histogram, Otsu's between-class variance over ``np.cumsum``
and ``np.dot``) as ``_reference_*`` functions; the kernels must pick the same
bin on every histogram -- integer images, float images' bin centres, values
large enough that the exact-sum shortcut does not apply -- and count the same.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from lotproof.steps import _threshold_kernels as tk
from lotproof.steps import threshold as thr

PROPERTY = settings(max_examples=200, deadline=None, database=None)


@pytest.fixture(scope="module", autouse=True)
def _compiled():
    tk.warm_up()


@PROPERTY
@given(
    hnp.arrays(
        st.sampled_from(tk.DIRECT_DTYPES),
        hnp.array_shapes(min_dims=1, max_dims=3, min_side=0, max_side=30),
    ),
    st.integers(0, 5),
)
def test_direct_histogram_equals_bincount(image, extra) -> None:
    length = (int(image.max()) + 1 if image.size else 1) + extra
    # source: np.bincount (the previous implementation, _reference_direct_histogram)
    expected = tk._reference_direct_histogram(image, length)
    got = tk.direct_histogram(image, length)
    assert got.dtype == np.int64
    np.testing.assert_array_equal(got, expected)


@st.composite
def _histogram(draw):
    """Counts with non-empty end bins and their bin values, of several kinds."""
    size = draw(st.integers(2, 300))
    counts = draw(hnp.arrays(np.int64, size, elements=st.integers(0, 10**6)))
    counts[0] = max(counts[0], 1)
    counts[-1] = max(counts[-1], 1)
    if draw(st.booleans()):
        counts[1:-1] *= draw(hnp.arrays(np.int64, size - 2, elements=st.integers(0, 1)))
    kind = draw(st.sampled_from(["integer", "shifted", "centres", "huge"]))
    if kind == "integer":  # gray values lo..hi of an integer image
        lo = draw(st.integers(0, 60000))
        values = np.arange(size, dtype=np.float64) + float(lo)
    elif kind == "shifted":  # a signed integer image
        lo = draw(st.integers(-(2**31), 2**31))
        values = np.arange(size, dtype=np.float64) + float(lo)
    elif kind == "centres":  # bin centres of a float image: not integers
        low = draw(st.floats(-1e6, 1e6))
        high = low + draw(st.floats(1e-3, 1e6))
        edges = np.linspace(low, high, size + 1)
        values = (edges[:-1] + edges[1:]) / 2
    else:  # integers too large for exact sums: the np.dot path
        lo = draw(st.integers(2**45, 2**50))
        values = np.arange(size, dtype=np.float64) + float(lo)
    return counts, values


@PROPERTY
@given(_histogram())
def test_otsu_index_equals_numpy_formulation(case) -> None:
    counts, values = case
    # source: Otsu (1979) as the numpy expression steps/threshold.py evaluated
    # before the kernel (_reference_otsu_index)
    assert tk.otsu_index(counts, values) == tk._reference_otsu_index(counts, values)


@st.composite
def _image(draw):
    dtype = np.dtype(draw(st.sampled_from([np.uint8, np.uint16, np.int16, np.float32])))
    shape = (draw(st.integers(2, 40)), draw(st.integers(2, 40)))
    # finite values only: the step refuses NaN and infinity before any histogram
    elements = st.floats(-1e6, 1e6, width=32) if dtype.kind == "f" else None
    return draw(hnp.arrays(dtype, shape, elements=elements))


@settings(max_examples=60, deadline=None, database=None)
@given(_image())
def test_otsu_level_of_the_step_is_unchanged(image) -> None:
    if image.min() == image.max():
        return
    low, high = image.min(), image.max()
    counts, values, _ = thr._histogram(image, low, high)
    # source: the previous numpy implementation of the histogram and of Otsu's level
    if image.dtype in tk.DIRECT_DTYPES:
        np.testing.assert_array_equal(
            counts, tk._reference_direct_histogram(image, int(high) + 1)[int(low) :]
        )
    expected = float(values[tk._reference_otsu_index(counts, values)])
    out = thr.threshold(thr.ThresholdParams(method="otsu"), image, spacing=(1.0, 1.0))
    assert out.values["level"] == expected


def test_literal_otsu_split() -> None:
    # source: closed form: two equal spikes at 10 and 20 with nothing between
    # are split anywhere from 10 to 19 with the same variance; the first wins
    counts = np.zeros(11, dtype=np.int64)
    counts[0] = counts[10] = 50
    values = np.arange(10.0, 21.0)
    assert tk.otsu_index(counts, values) == 0
    # source: closed form: 1 pixel at 0, 3 at 1, 1 at 2: the between-class
    # variance is 1 * 4 * (0 - 1.25)^2 = 6.25 after bin 0 and 4 * 1 * (0.75 - 2)^2
    # = 6.25 after bin 1; the first maximum, bin 0
    assert tk.otsu_index(np.array([1, 3, 1]), np.array([0.0, 1.0, 2.0])) == 0


def test_histogram_arguments_are_checked() -> None:
    with pytest.raises(ValueError, match="uint8 or uint16"):
        tk.direct_histogram(np.zeros(3, dtype=np.int32), 4)
    with pytest.raises(ValueError, match="needs 8 bins"):
        tk.direct_histogram(np.array([7], dtype=np.uint8), 5)
