"""Compiled kernels behind the ``threshold`` step kind: the exact histogram and Otsu's level.

Both are single-threaded numba functions (``cache=True``) that give exactly
what the numpy formulations they replace give:

* :func:`direct_histogram` counts a uint8 / uint16 image in one pass, one
  counter per gray value (``np.bincount`` needs a cast of every value to
  ``intp`` first; measured 1.5 ms against 7 ms on a 2048^2 uint16 image).
  Counts are integers: any order gives the same.
* :func:`otsu_index` evaluates Otsu's between-class variance for every split
  with the same float64 operations, in the same order, as the numpy
  expression ``w1 * w2 * (m1 - m2) ** 2`` over ``np.cumsum`` sums (sequential,
  like a loop; numba compiles without fast-math, so nothing is reassociated
  or fused). The one sum numpy does not form sequentially, the total
  ``sum(n * value)`` (``np.dot``), is computed here only when every partial
  sum is an integer below 2**53 -- then it is exact in any order; otherwise
  the caller passes ``np.dot``'s value. That also spares ``np.dot``'s
  threaded BLAS call on a 65536-bin histogram, which cost from 0.6 ms to
  16 ms depending on what else the machine ran.

``tests/test_threshold_kernels_exact.py`` compares both with the numpy
formulations (:func:`_reference_direct_histogram`,
:func:`_reference_otsu_index`) bit for bit.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["DIRECT_DTYPES", "direct_histogram", "otsu_index", "warm_up"]

#: Dtypes :func:`direct_histogram` counts (one compiled signature each).
DIRECT_DTYPES: tuple[np.dtype, ...] = (np.dtype(np.uint8), np.dtype(np.uint16))

_jit = numba.njit(cache=True, nogil=True, boundscheck=False)

# Sums of integers stay exact in float64 below this bound.
_EXACT = 2.0**53


def direct_histogram(image: np.ndarray, length: int) -> np.ndarray:
    """Counts (int64, ``length``) of each value ``0 .. length - 1`` of a uint8 / uint16 image.

    ``length`` must exceed the image's maximum (``max + 1``).
    """
    if image.dtype not in DIRECT_DTYPES:
        raise ValueError(f"direct_histogram counts uint8 or uint16 images (got {image.dtype})")
    counts = np.zeros(length, dtype=np.int64)
    flat = np.ascontiguousarray(image).reshape(-1)
    if flat.size and int(flat.max()) >= length:
        raise ValueError(f"the histogram needs {int(flat.max()) + 1} bins (got {length})")
    _count(flat, counts)
    return counts


def otsu_index(counts: np.ndarray, values: np.ndarray) -> int:
    """Index of the bin Otsu's method picks: the first maximum of the between-class variance.

    ``counts`` (int64) and ``values`` (float64) describe a histogram with at
    least two bins whose end bins are not empty. Splitting after bin ``i``
    gives the classes' weights ``w1, w2`` and means ``m1, m2``; the variance
    is ``w1 w2 (m1 - m2)^2`` (Otsu 1979, doi:10.1109/TSMC.1979.4310076).
    """
    n = counts.astype(np.float64)
    values = np.ascontiguousarray(values, dtype=np.float64)
    integral = bool(np.all(values == np.floor(values)))
    bound = float(n.sum()) * float(np.max(np.abs(values)))
    if integral and bound < _EXACT:
        total_sum = np.nan  # the kernel sums exactly
    else:
        total_sum = float(np.dot(n, values))
    return int(_otsu(n, values, total_sum))


def warm_up() -> None:
    """Compile (or load from the on-disk cache) every kernel of this module."""
    for dtype in DIRECT_DTYPES:
        direct_histogram(np.zeros(2, dtype=dtype), 1)
    otsu_index(np.array([1, 1], dtype=np.int64), np.array([0.0, 1.0]))


@_jit
def _count(flat, counts):
    for i in range(flat.size):
        counts[flat[i]] += 1


@_jit
def _otsu(n, values, total_sum):
    size = n.size
    if total_sum != total_sum:  # NaN: every partial sum is exact, sum here
        total_sum = 0.0
        for i in range(size):
            total_sum += n[i] * values[i]
    # total = n.sum(): counts are integers, far below 2**53, exact in any order
    total = 0.0
    for i in range(size):
        total += n[i]
    w1 = 0.0
    s1 = 0.0
    best = -np.inf
    index = 0
    for i in range(size - 1):
        w1 += n[i]
        s1 += n[i] * values[i]
        w2 = total - w1
        m1 = s1 / w1
        m2 = (total_sum - s1) / w2
        d = m1 - m2
        between = w1 * w2 * (d * d)
        if between > best:  # strictly: the first maximum wins
            best = between
            index = i
    return index


# --------------------------------------------------------------------------- reference
# The numpy formulations the kernels replace (steps/threshold.py before them),
# kept as the reference the exactness tests compare with.


def _reference_direct_histogram(image: np.ndarray, length: int) -> np.ndarray:
    counts = np.zeros(length, dtype=np.int64)
    flat = image.reshape(-1)
    for start in range(0, flat.size, 2**18):
        counts += np.bincount(flat[start : start + 2**18], minlength=length)
    return counts


def _reference_otsu_index(counts: np.ndarray, values: np.ndarray) -> int:
    n = counts.astype(np.float64)
    w1 = np.cumsum(n)[:-1]
    s1 = np.cumsum(n * values)[:-1]
    total, total_sum = n.sum(), float(np.dot(n, values))
    w2 = total - w1
    m1 = s1 / w1
    m2 = (total_sum - s1) / w2
    between = w1 * w2 * (m1 - m2) ** 2
    return int(np.argmax(between))
