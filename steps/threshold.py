"""Threshold: turn a gray image into a mask, with a fixed, automatic or local level.

Histogram policy (every automatic global method works on this histogram):

* integer images (any signed or unsigned integer dtype): one bin per integer
  value from the image's minimum to its maximum, counted exactly with
  ``np.bincount``; a bin's value is that integer;
* float images: :data:`FLOAT_NBINS` equal bins over ``[min, max]``
  (``np.histogram`` rule: each bin half-open ``[a, b)``, the last one closed);
  a bin's value is its centre.

Each method picks one bin and the level is that bin's value (Li gives a real
number). The foreground is ``image > level`` for ``features: bright`` and
``image <= level`` for ``features: dark``: the two are complements of each
other.

Degenerate inputs: a constant image is refused by every automatic method
(``otsu``, ``li``, ``yen``, ``triangle``, ``isodata``, ``local``) with "no
contrast" (``ValueError``, so the image is incomplete): there is no level to
choose, and an empty mask would measure as "no pores" and pass a ``max``
limit — the classic silent pass when an earlier step flattened the image.
``fixed`` applies its level as written. Images with NaN or infinite values, and integer images
with values beyond 2**53 (not all exact in float64), are refused.
"""

from __future__ import annotations

from typing import Literal, cast

import numpy as np
from pydantic import Field, model_validator

from lotproof.steps import _threshold_kernels as _tk
from lotproof.steps._data import Output
from lotproof.steps._registry import StepParams, step
from lotproof.steps.footprints import nearest_odd
from lotproof.steps.units import Length

__all__ = [
    "FLOAT_NBINS",
    "MAX_INTEGER_BINS",
    "THRESHOLD_FEATURES",
    "THRESHOLD_METHODS",
    "ThresholdParams",
    "threshold",
]

#: Threshold methods.
THRESHOLD_METHODS: tuple[str, ...] = ("fixed", "otsu", "li", "yen", "triangle", "isodata", "local")

#: Which side of the level is foreground: bright = above the level, dark = at or below it.
THRESHOLD_FEATURES: tuple[str, ...] = ("bright", "dark")

#: Number of equal bins over ``[min, max]`` for float images.
FLOAT_NBINS = 256

#: Largest span ``max - min + 1`` of an integer image the exact histogram accepts.
MAX_INTEGER_BINS = 2**24

# Li's iteration converges in a few tens of steps on real histograms; the cap
# only guards against a cycle.
_LI_MAX_ITERATIONS = 10_000

# Bincount in chunks: the cast to intp inside np.bincount stays in cache.
_BINCOUNT_CHUNK = 2**18


class ThresholdParams(StepParams):
    """Parameters of ``threshold``."""

    method: Literal[THRESHOLD_METHODS] = Field(  # type: ignore[valid-type]
        description=(
            "fixed (needs level), otsu, li, yen, triangle, isodata (automatic, from the "
            "histogram), or local (needs block_size; level = mean over the block - offset)"
        ),
    )
    features: Literal[THRESHOLD_FEATURES] = Field(  # type: ignore[valid-type]
        "bright",
        description="bright: foreground = image > level; dark: foreground = image <= level",
    )
    level: float | None = Field(
        None,
        allow_inf_nan=False,
        description="fixed only: the gray level, in the image's own values (e.g. 128)",
    )
    block_size: Length | None = Field(
        None,
        description=(
            "local only: side of the square (cube in 3D) block the local mean is taken over, "
            "rounded to the nearest odd number of pixels, at least 3 px (e.g. '51 px', '30 um')"
        ),
    )
    offset: float = Field(
        0.0,
        allow_inf_nan=False,
        description="local only: gray levels subtracted from the local mean to give the level",
    )

    @model_validator(mode="after")
    def _method_fields(self) -> ThresholdParams:
        method = self.method
        if method == "fixed" and self.level is None:
            raise ValueError("method 'fixed' needs level (a gray value, e.g. level: 128)")
        if method != "fixed" and self.level is not None:
            raise ValueError(f"level is only for method 'fixed' (method is {method!r})")
        if method == "local" and self.block_size is None:
            raise ValueError("method 'local' needs block_size (e.g. block_size: 51 px)")
        if method != "local" and self.block_size is not None:
            raise ValueError(f"block_size is only for method 'local' (method is {method!r})")
        if method != "local" and "offset" in self.model_fields_set:
            raise ValueError(f"offset is only for method 'local' (method is {method!r})")
        return self


# --------------------------------------------------------------------------- histogram


def _integer_histogram(image: np.ndarray, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
    span = hi - lo + 1
    if span > MAX_INTEGER_BINS:
        raise ValueError(
            f"integer image spans {span} gray values ({lo}..{hi}); the exact histogram "
            f"takes at most {MAX_INTEGER_BINS}"
        )
    flat = image.reshape(-1)
    if flat.dtype in _tk.DIRECT_DTYPES:
        # one compiled pass, a counter per gray value 0..hi
        counts = _tk.direct_histogram(flat, hi + 1)[lo:]
    else:
        counts = np.zeros(span, dtype=np.int64)
        for start in range(0, flat.size, _BINCOUNT_CHUNK):
            chunk = flat[start : start + _BINCOUNT_CHUNK]
            if flat.dtype.kind == "u":
                # no wrap-around: every value is >= lo
                chunk = (chunk - flat.dtype.type(lo)).astype(np.intp)
            else:
                # the difference is below span, so it fits whatever the dtype
                chunk = chunk.astype(np.int64) - np.int64(lo)
            counts += np.bincount(chunk, minlength=span)
    # exact below 2**53; a level is reported as a float anyway
    values = np.arange(span, dtype=np.float64) + float(lo)
    return counts, values


def _histogram(
    image: np.ndarray, low: np.number, high: np.number
) -> tuple[np.ndarray, np.ndarray, float]:
    """Counts (int64), bin values (float64) and bin width of a non-constant image.

    ``low`` and ``high`` are the image's minimum and maximum. The first and the
    last bins are never empty.
    """
    if image.dtype.kind in "ui":
        counts, values = _integer_histogram(image, int(low), int(high))
        return counts, values, 1.0
    data = image.astype(np.float64, copy=False)
    counts, edges = np.histogram(data, bins=FLOAT_NBINS, range=(float(low), float(high)))
    values = (edges[:-1] + edges[1:]) / 2
    return counts.astype(np.int64), values, float(values[1] - values[0])


# --------------------------------------------------------------------------- methods
# Each takes the histogram of a non-constant image (at least two bins, the end
# bins non-empty) and returns the level. Sums run in float64; for images up to
# about 2**53 / max_value pixels they are sums of integers and therefore exact.


def _otsu(counts: np.ndarray, values: np.ndarray) -> float:
    # between-class variance w1 w2 (m1 - m2)^2 of every split, compiled; the
    # first maximum: of equal splits (empty bins between classes) the lowest level
    return float(values[_tk.otsu_index(counts, values)])


def _li(counts: np.ndarray, values: np.ndarray, width: float) -> float:
    n = counts.astype(np.float64)
    # Li's formula takes logarithms of class means: shift so the lowest value is 0
    shifted = values - values[0]
    tolerance = width / 2
    t_next = float(np.dot(n, shifted) / n.sum())
    t_curr = -2 * tolerance
    for _ in range(_LI_MAX_ITERATIONS):
        if abs(t_next - t_curr) <= tolerance:
            break
        t_curr = t_next
        fore = shifted > t_curr
        mean_fore = np.dot(n[fore], shifted[fore]) / n[fore].sum()
        mean_back = np.dot(n[~fore], shifted[~fore]) / n[~fore].sum()
        if mean_back == 0:
            # background is the lowest value alone: log(0) is undefined, stop here
            break
        t_next = float((mean_back - mean_fore) / (np.log(mean_back) - np.log(mean_fore)))
    else:
        raise ValueError(f"Li's threshold did not converge in {_LI_MAX_ITERATIONS} iterations")
    return t_next + float(values[0])


def _yen(counts: np.ndarray, values: np.ndarray) -> float:
    n = counts.astype(np.float64)
    squares = n * n
    w1 = np.cumsum(n)[:-1]
    w2 = n.sum() - w1
    q1 = np.cumsum(squares)[:-1]
    q2 = np.cumsum(squares[::-1])[::-1][1:]
    # log of ((P1 (1 - P1))^2 / (sum_{i<=t} p_i^2 * sum_{i>t} p_i^2)); N^4 cancels
    criterion = 2 * np.log(w1 * w2) - np.log(q1) - np.log(q2)
    return float(values[int(np.argmax(criterion))])


def _triangle(counts: np.ndarray, values: np.ndarray) -> float:
    size = counts.size
    peak = int(np.argmax(counts))
    # use the longer tail; on equal tails the low one
    flip = peak < size - 1 - peak
    hist = counts[::-1] if flip else counts
    if flip:
        peak = size - 1 - peak
    height = int(hist[peak])
    width = peak
    x = np.arange(width, dtype=np.int64)
    # distance from the line (0, 0)-(width, height), times its length: exact in int64
    distance = height * x - width * hist[:width]
    index = int(np.argmax(distance))
    if flip:
        index = size - 1 - index
    return float(values[index])


def _isodata(counts: np.ndarray, values: np.ndarray, width: float) -> float:
    n = counts.astype(np.float64)
    w1 = np.cumsum(n)[:-1]
    s1 = np.cumsum(n * values)[:-1]
    lower = s1 / w1
    higher = (float(np.dot(n, values)) - s1) / (n.sum() - w1)
    distance = (lower + higher) / 2 - values[:-1]
    found = np.flatnonzero((distance >= 0) & (distance < width))
    if found.size == 0:
        # exists in exact arithmetic; only rounding can lose the lower bound
        found = np.flatnonzero(distance < width)
    return float(values[int(found[0])])


# --------------------------------------------------------------------------- local


def _local_mean(image: np.ndarray, side: int) -> np.ndarray:
    """Mean over the part of the centred ``side``-wide block that lies inside the image."""
    if image.dtype.kind in "ui" and image.dtype.itemsize <= 4:
        total = image.astype(np.int64)  # sums are exact
    else:
        total = image.astype(np.float64)
    half = side // 2
    count = np.ones((1,) * image.ndim, dtype=np.int64)
    for axis, n in enumerate(image.shape):
        index = np.arange(n)
        upper = np.minimum(index + half + 1, n)
        lower = np.maximum(index - half, 0)
        pad = [(0, 0)] * image.ndim
        pad[axis] = (1, 0)
        running = np.cumsum(np.pad(total, pad), axis=axis)
        total = np.take(running, upper, axis=axis) - np.take(running, lower, axis=axis)
        shape = [1] * image.ndim
        shape[axis] = n
        count = count * (upper - lower).reshape(shape)
    return total / count


# --------------------------------------------------------------------------- the step


def _compare(image: np.ndarray, level: float | np.ndarray, features: str) -> np.ndarray:
    # Compare in float64: a float32 image against a Python float would compare
    # in float32 and round the level.
    data = (
        image
        if image.dtype.kind in "ui" and image.dtype.itemsize <= 4
        else image.astype(np.float64, copy=False)
    )
    # a scalar level is a float (see the annotation); np.isscalar's type guard says only
    # "some numpy scalar", so the type checker is told
    bright: np.ndarray = np.greater(
        data, np.float64(cast(float, level)) if np.isscalar(level) else level
    )
    return bright if features == "bright" else ~bright


@step(
    "threshold",
    params=ThresholdParams,
    takes=["image"],
    gives="mask",
    version="2",
    values={"level": "-"},
    ndims=(2, 3),
    libraries=("numpy", "numba"),
)
def threshold(params: ThresholdParams, image: np.ndarray, *, spacing: tuple[float, ...]) -> Output:
    """Turn a gray image into a mask: foreground above (bright) or at/below (dark) a level.

    ``fixed`` uses the given level. ``otsu``, ``li``, ``yen``, ``triangle`` and
    ``isodata`` choose the level from the image's histogram (see the module
    documentation for the binning). ``local`` compares each pixel with the mean
    of the block around it, minus ``offset``. The chosen global level is
    reported as ``level``.

    Parameters
    ----------
    params : ThresholdParams
        ``method``; ``features`` (``"bright"``: ``image > level``, ``"dark"``:
        ``image <= level``); ``level`` (fixed, gray levels); ``block_size``
        (local, pixels after resolution) and ``offset`` (local, gray levels).
    image : ndarray, 2D or 3D, integer or float
        The gray image; all values finite.
    spacing : tuple of float
        Pixel size per axis in um (unused: lengths arrive in pixels).

    Returns
    -------
    Output
        ``data``: ndarray of bool, the shape of ``image``. ``values``:
        ``{"level": float}`` in the image's gray values (unit ``"-"``) for
        every method but ``local``, which has no single level and reports none.

    Notes
    -----
    With bins ``k`` of value ``v_k`` and count ``n_k``, classes ``v <= v_t``
    (weight ``w1``, mean ``m1``) and ``v > v_t`` (``w2``, ``m2``):

    * otsu: maximise ``w1 w2 (m1 - m2)^2`` (the between-class variance).
    * li: iterate ``t <- (m_b - m_f) / (ln m_b - ln m_f)`` on values shifted so
      the minimum is 0, from the mean, until ``t`` moves by at most half a bin
      (0.5 for integer images); the level is ``t`` plus the minimum, a real
      number. The same iteration as ``skimage.filters.threshold_li`` on
      integer images.
    * yen: maximise ``ln((P1 (1 - P1))^2) - ln(sum_{k<=t} p_k^2) -
      ln(sum_{k>t} p_k^2)``, ``p_k = n_k / N``, ``P1 = w1 / N``.
    * triangle: the line from the end of the longer tail (at height 0) to the
      histogram's peak; the level is the bin of the tail farthest below the
      line (as ``skimage.filters.threshold_triangle``). Equal tails: the low
      one.
    * isodata: the lowest ``v_t`` with ``0 <= (m1 + m2) / 2 - v_t < bin width``
      (as ``skimage.filters.threshold_isodata``).
    * local: ``level(x) = mean of the image over the block of side s centred
      on x, counting only pixels inside the image - offset``; ``s`` is
      ``block_size`` rounded to the nearest odd whole number,
      ``2 floor(b / 2) + 1`` (an even number rounds up; the rounding rule of
      ``lotproof.steps.footprints.nearest_odd``), at least 3. Integer images up to 32
      bits are summed exactly in int64, others in float64.

    Ties: otsu, yen and isodata take the lowest level among equal maxima;
    triangle the one farthest from the peak. The levels are computed here, not
    by calling scikit-image; the reference tests compare them with scikit-image
    and OpenCV on the same histogram.

    References
    ----------
    N. Otsu, A threshold selection method from gray-level histograms, IEEE
    Trans. Syst. Man Cybern. 9 (1979) 62-66, doi:10.1109/TSMC.1979.4310076.
    C. H. Li, C. K. Lee, Minimum cross entropy thresholding, Pattern
    Recognition 26 (1993) 617-625, doi:10.1016/0031-3203(93)90115-D.
    C. H. Li, P. K. S. Tam, An iterative algorithm for minimum cross entropy
    thresholding, Pattern Recognition Letters 19 (1998) 771-776,
    doi:10.1016/S0167-8655(98)00057-9.
    J.-C. Yen, F.-J. Chang, S. Chang, A new criterion for automatic multilevel
    thresholding, IEEE Trans. Image Process. 4 (1995) 370-378,
    doi:10.1109/83.366472.
    G. W. Zack, W. E. Rogers, S. A. Latt, Automatic measurement of sister
    chromatid exchange frequency, J. Histochem. Cytochem. 25 (1977) 741-753,
    doi:10.1177/25.7.70454.
    T. W. Ridler, S. Calvard, Picture thresholding using an iterative
    selection method, IEEE Trans. Syst. Man Cybern. 8 (1978) 630-632,
    doi:10.1109/TSMC.1978.4310039.
    """
    if image.dtype.kind not in "uif":
        raise ValueError(f"threshold needs a numeric gray image, got dtype {image.dtype}")
    if image.size == 0:
        raise ValueError("threshold got an empty image (no pixels)")
    if image.dtype.kind == "f" and not np.isfinite(image).all():
        raise ValueError("image has NaN or infinite values; threshold needs finite gray values")

    low, high = image.min(), image.max()
    if image.dtype.kind in "ui" and max(abs(int(low)), abs(int(high))) > 2**53:
        # levels are floats: beyond 2**53 not every integer has one
        raise ValueError(
            f"integer image has values beyond 2**53 ({int(low)}..{int(high)}); "
            "threshold compares in float64 and cannot do so exactly"
        )

    method = params.method
    if method == "fixed":
        assert params.level is not None
        level = float(params.level)
        return Output(_compare(image, level, params.features), {"level": level}, {"level": "-"})

    if low == high:
        # no contrast: refused, never an empty mask that passes (see the module documentation)
        raise ValueError(
            f"no contrast: every pixel of the image is {low:.6g}, so the {method} threshold has "
            "no level to choose; an earlier step may have flattened it (or the image is blank)"
        )

    if method == "local":
        assert params.block_size is not None
        side = nearest_odd(params.block_size.px)
        if side < 3:
            raise ValueError(
                f"block_size is {params.block_size.px:.6g} px; local threshold needs at least 3 px"
            )
        level_map = _local_mean(image, side) - np.float64(params.offset)
        return Output(_compare(image, level_map, params.features), {}, {})

    counts, values, width = _histogram(image, low, high)
    if method == "otsu":
        level = _otsu(counts, values)
    elif method == "li":
        level = _li(counts, values, width)
    elif method == "yen":
        level = _yen(counts, values)
    elif method == "triangle":
        level = _triangle(counts, values)
    else:
        level = _isodata(counts, values, width)
    return Output(_compare(image, level, params.features), {"level": level}, {"level": "-"})
