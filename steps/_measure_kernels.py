"""Compiled kernels behind the ``label`` and ``measure`` step kinds.

Everything here works in pixel units on plain numpy arrays; ``lotproof.steps.measure``
applies the pixel size. Objects are addressed by *compact ids* ``1..N`` (``0`` is
background). Each public function is one single-threaded pass (or two) over
the id image, compiled with numba (``cache=True``): per-object sums and counts
are accumulated pixel by pixel in raster (C) order, and the maximum Feret
diameter builds each object's convex hull in exact integer arithmetic.

The numpy formulations these kernels replace are kept below as
``_reference_*`` functions; ``tests/test_measure_kernels_exact.py`` proves the
two give identical results (the same integers, the same float64 bits).
Float sums are identical because both add the same float64 terms in the same
(raster) order: ``np.bincount`` with weights is a plain sequential loop, and
numba compiles without fast-math, so nothing is reassociated or fused.

The 2x2 configuration code of a window follows the bit weights of
scikit-image's ``perimeter_crofton`` (so that its look-up table applies
unchanged): for a window with pixels ``TL TR / BL BR``, the code is
``8*TL + 2*TR + 4*BL + 1*BR``. Windows are taken over the array padded with one
row/column of background on every side, so every window that touches an
object is counted exactly once.

Compiled signatures are kept few: ids are int64 and masks bool, C-contiguous
(the public functions cast once, a no-op for what ``lotproof.steps.measure`` passes).
:func:`warm_up` compiles or loads them all ahead of the hot path.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from scipy import ndimage as ndi

from lotproof.steps.connectivity import structure

__all__ = [
    "CROFTON_WEIGHTS_2D",
    "EULER4_WEIGHTS_2D",
    "EULER8_WEIGHTS_2D",
    "boundary_crossings_2d",
    "bounding_boxes",
    "compact_labels",
    "feret_max_2d",
    "label_mask",
    "pixel_moments_2d",
    "warm_up",
    "window_histogram_2d",
    "window_histogram_by_label_2d",
]


_SQRT2 = np.sqrt(2.0)

_jit = numba.njit(cache=True, nogil=True, boundscheck=False)
# small helpers of the inner loops
_inline = numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")

#: Crofton perimeter contribution (pixel units) of each 2x2 configuration code,
#: four directions (0, 45, 90, 135 degrees): the table of scikit-image 0.26's
#: ``perimeter_crofton(directions=4)``, index = configuration code.
CROFTON_WEIGHTS_2D: np.ndarray = np.array(
    [
        0.0,
        np.pi / 4 * (1 + 1 / _SQRT2),
        np.pi / (4 * _SQRT2),
        np.pi / (2 * _SQRT2),
        0.0,
        np.pi / 4 * (1 + 1 / _SQRT2),
        0.0,
        np.pi / (4 * _SQRT2),
        np.pi / 4,
        np.pi / 2,
        np.pi / (4 * _SQRT2),
        np.pi / (4 * _SQRT2),
        np.pi / 4,
        np.pi / 2,
        0.0,
        0.0,
    ],
    dtype=np.float64,
)
CROFTON_WEIGHTS_2D.flags.writeable = False


def _euler_weights(diagonal: int) -> np.ndarray:
    # Gray's bit-quad counting, times 4 so that the weights are integers:
    # 4 E = n(Q1) - n(Q3) + diagonal * n(QD).
    weights = np.zeros(16, dtype=np.int64)
    for code in range(16):
        bits = bin(code).count("1")
        if bits == 1:
            weights[code] = 1
        elif bits == 3:
            weights[code] = -1
        elif code in (6, 9):  # TR+BL and TL+BR: the two diagonal pairs
            weights[code] = diagonal
    weights.flags.writeable = False
    return weights


#: ``4 * Euler number`` contribution of each configuration, 4-connected foreground.
EULER4_WEIGHTS_2D: np.ndarray = _euler_weights(+2)
#: ``4 * Euler number`` contribution of each configuration, 8-connected foreground.
EULER8_WEIGHTS_2D: np.ndarray = _euler_weights(-2)


def label_mask(mask: np.ndarray, connectivity: int) -> tuple[np.ndarray, int]:
    """Connected components of ``mask`` as int32 labels 1..N in raster order, and N."""
    labels = np.zeros(mask.shape, dtype=np.int32)
    count = ndi.label(mask, structure=structure(connectivity, mask.ndim), output=labels)
    return labels, int(count)


# --------------------------------------------------------------------------- public kernels


def _as_ids(ids: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(ids, dtype=np.int64)


def _check(ok: bool, count: int) -> None:
    if not ok:
        raise ValueError(f"object ids must lie in 0..{count} (the object count)")


def compact_labels(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Renumber a label image to ids 1..N in increasing label order.

    Returns the compact ids (int64, same shape) and the original label of each
    id (int64, length N). Labels must be non-negative; 0 is background.
    """
    if labels.size == 0:
        return _reference_compact_labels(labels)
    work = _as_ids(labels)
    low, top = _min_max(work.reshape(-1))
    if low < 0:
        raise ValueError(f"labels must be >= 0 (got {low})")
    if top > 4 * work.size + 1024:  # sparse label values: no presence table that large
        return _reference_compact_labels(labels)
    present = np.flatnonzero(_presence(work.reshape(-1), top))
    present = present[present > 0].astype(np.int64)
    if present.size == top:  # already 1..N
        return labels.astype(np.int64, copy=False), present
    lookup = np.zeros(top + 1, dtype=np.int64)
    lookup[present] = np.arange(1, present.size + 1, dtype=np.int64)
    return _renumber(work.reshape(-1), lookup).reshape(labels.shape), present


def window_histogram_2d(mask: np.ndarray) -> np.ndarray:
    """Counts (int64, length 16) of the 2x2 configuration codes of a bool mask."""
    if mask.ndim != 2:
        raise ValueError(f"window_histogram_2d needs a 2-D mask (got {mask.ndim}-D)")
    hist = np.zeros(16, dtype=np.int64)
    _quads(np.ascontiguousarray(mask, dtype=np.bool_), hist)
    return hist


def window_histogram_by_label_2d(ids: np.ndarray, count: int) -> np.ndarray:
    """Per-object counts of 2x2 configuration codes, shape (count + 1, 16), int64.

    Row ``k`` is the histogram of the windows of the indicator image
    ``ids == k`` (other objects count as background), exactly as if each
    object were cut out alone. Row 0 is unused.
    """
    hist = np.zeros((count + 1, 16), dtype=np.int64)
    if ids.size:
        _check(_label_quads(_as_ids(ids), count, hist), count)
    return hist


def boundary_crossings_2d(mask: np.ndarray) -> tuple[int, int]:
    """Phase-boundary crossings along every row (x) and every column (y) of a mask.

    A crossing is a pair of neighbouring pixels on the line with different
    values; the image frame is not a boundary.
    """
    along_x = int(np.count_nonzero(mask[:, 1:] != mask[:, :-1]))
    along_y = int(np.count_nonzero(mask[1:, :] != mask[:-1, :]))
    return along_x, along_y


def pixel_moments_2d(ids: np.ndarray, count: int) -> dict[str, np.ndarray]:
    """Pixel counts, centroids and second central moments per object (pixel units).

    Returns float64 arrays of length ``count`` (object ids 1..count):
    ``n`` (pixels), ``row``/``col`` (mean row / column index of the pixel
    centres), ``mu_rr``, ``mu_cc``, ``mu_rc`` (sums of squared / crossed
    deviations from the centroid). Two passes (mean first, then deviations)
    keep the central moments free of the cancellation of raw-moment formulas.
    """
    out = np.zeros((6, count + 1), dtype=np.float64)
    _check(_moments(_as_ids(ids), count, out), count)
    return {
        name: out[i, 1:] for i, name in enumerate(("n", "row", "col", "mu_rr", "mu_cc", "mu_rc"))
    }


def bounding_boxes(ids: np.ndarray, count: int) -> np.ndarray:
    """Bounding box per object, int64 ``(count, 2 * ndim)``: starts, then stops (exclusive).

    An id without pixels gets an all-zero box.
    """
    if ids.ndim != 2:
        return _reference_bounding_boxes(ids, count)
    boxes = np.zeros((count, 4), dtype=np.int64)
    _check(_boxes(_as_ids(ids), count, boxes), count)
    return boxes


def feret_max_2d(ids: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """Maximum Feret diameter per object in pixels (float64, length ``len(boxes)``).

    The largest distance between two points of the contour, at level 0.5, of the
    object's convex hull image: the pixels whose centres lie in the (closed)
    convex hull of the edge midpoints of the object's pixels. This is the
    definition of scikit-image 0.26's ``regionprops(...).feret_diameter_max``.
    ``boxes`` are the objects' bounding boxes (:func:`bounding_boxes`); an
    object without pixels gets 0.

    Notes
    -----
    Per object, in doubled coordinates ``(2 row, 2 col)`` where all the points
    involved are integers: the first and last pixel of every row and every
    column give the edge midpoints that can be hull vertices; the hull's left
    and right (top and bottom) boundaries are their convex envelopes (Andrew's
    monotone chain); the hull image's row (column) intervals are the pixel
    centres between them, rounded inwards by exact integer division; the
    interval ends moved out by half a pixel are the contour points, and the
    largest squared distance among the vertices of their envelopes is the
    squared diameter.
    """
    count = len(boxes)
    out = np.zeros(count, dtype=np.float64)
    if count == 0:
        return out
    status = _feret(_as_ids(ids), np.ascontiguousarray(boxes, dtype=np.int64), out)
    _check(status != 1, count)
    if status == 2:
        raise ValueError("boxes must be the bounding boxes of the objects (bounding_boxes)")
    return out


def warm_up() -> None:
    """Compile (or load from the on-disk cache) every kernel of this module.

    Call once per process before timing-sensitive work, e.g. in a pool
    worker's initializer; later calls cost nothing.
    """
    ids = np.zeros((2, 2), dtype=np.int64)
    ids[0, 0] = 1
    compact_labels(ids)
    _renumber(ids.reshape(-1), np.arange(2, dtype=np.int64))
    window_histogram_2d(ids != 0)
    window_histogram_by_label_2d(ids, 1)
    pixel_moments_2d(ids, 1)
    feret_max_2d(ids, bounding_boxes(ids, 1))


# --------------------------------------------------------------------------- compiled code
# Every kernel that indexes by id returns a failure (False; a nonzero code for
# _feret) when it meets an id outside 0..count or a pixel outside its object's
# box, before writing anywhere it should not: the wrappers raise ValueError.


@_jit
def _min_max(flat):
    low = flat[0]
    high = flat[0]
    for i in range(flat.size):
        v = flat[i]
        if v < low:
            low = v
        if v > high:
            high = v
    return low, high


@_jit
def _presence(flat, top):
    seen = np.zeros(top + 1, dtype=np.bool_)
    for i in range(flat.size):
        seen[flat[i]] = True
    return seen


@_jit
def _renumber(flat, lookup):
    out = np.empty_like(flat)
    for i in range(flat.size):
        out[i] = lookup[flat[i]]
    return out


@_jit
def _quads(mask, hist):
    height, width = mask.shape
    blank = np.zeros(width, dtype=np.bool_)
    # the codes of nearly every window, all background (0) or all foreground
    # (15), are counted in registers; the others in memory
    empty = 0
    full = 0
    for i in range(height + 1):
        up = mask[i - 1] if i > 0 else blank
        down = mask[i] if i < height else blank
        tr = 0
        br = 0
        for j in range(width):
            # the window slides right: its left column is the last one's right column
            tl = tr
            bl = br
            tr = 1 if up[j] else 0
            br = 1 if down[j] else 0
            code = 8 * tl + 2 * tr + 4 * bl + br
            if code == 0:
                empty += 1
            elif code == 15:
                full += 1
            else:
                hist[code] += 1
        hist[8 * tr + 4 * br] += 1  # the window over the right frame
    hist[0] += empty
    hist[15] += full


@_jit
def _label_quads(ids, count, hist):
    height, width = ids.shape
    blank = np.zeros(width, dtype=ids.dtype)
    touched = np.zeros(width + 1, dtype=np.bool_)
    for i in range(height + 1):
        up = ids[i - 1] if i > 0 else blank
        down = ids[i] if i < height else blank
        # which windows touch an object, and whether every id is in range: plain
        # passes the compiler vectorises (measured: 2x faster than testing each
        # window in the loop below, which then skips the empty ones)
        bad = False
        for j in range(width):
            bad |= (down[j] < 0) | (down[j] > count)
        if bad:
            return False
        touched[0] = (up[0] | down[0]) != 0
        for j in range(1, width):
            touched[j] = (up[j - 1] | down[j - 1] | up[j] | down[j]) != 0
        touched[width] = (up[width - 1] | down[width - 1]) != 0
        run_id = 0  # windows wholly inside one object, counted in a register
        run = 0
        for j in range(width + 1):
            if not touched[j]:
                continue
            tl = up[j - 1] if j > 0 else 0
            bl = down[j - 1] if j > 0 else 0
            tr = up[j] if j < width else 0
            br = down[j] if j < width else 0
            if tl == tr and tl == bl and tl == br:
                if tl != run_id:
                    hist[run_id, 15] += run
                    run_id = tl
                    run = 0
                run += 1
                continue
            # each distinct object in the window is credited once, at its first
            # position in the order TL, TR, BL, BR, with a bit wherever it occurs
            if tl != 0:
                hist[tl, 8 + 2 * (tr == tl) + 4 * (bl == tl) + (br == tl)] += 1
            if tr != 0 and tr != tl:
                hist[tr, 2 + 4 * (bl == tr) + (br == tr)] += 1
            if bl != 0 and bl != tl and bl != tr:
                hist[bl, 4 + (br == bl)] += 1
            if br != 0 and br != tl and br != tr and br != bl:
                hist[br, 1] += 1
        hist[run_id, 15] += run
    return True


@_jit
def _moments(ids, count, out):
    # out rows: n, row mean, col mean, mu_rr, mu_cc, mu_rc; float64 terms are
    # added in raster order, as np.bincount(weights=...) adds them
    height, width = ids.shape
    n = np.zeros(count + 1, dtype=np.int64)
    sum_r = out[1]
    sum_c = out[2]
    for r in range(height):
        fr = float(r)
        for c in range(width):
            k = ids[r, c]
            if k != 0:
                if k < 0 or k > count:
                    return False
                n[k] += 1
                sum_r[k] += fr
                sum_c[k] += float(c)
    for k in range(count + 1):
        out[0, k] = float(n[k])
        safe = out[0, k] if n[k] > 0 else 1.0
        out[1, k] = sum_r[k] / safe
        out[2, k] = sum_c[k] / safe
    mean_r = out[1]
    mean_c = out[2]
    mu_rr = out[3]
    mu_cc = out[4]
    mu_rc = out[5]
    for r in range(height):
        fr = float(r)
        for c in range(width):
            k = ids[r, c]
            if k != 0:
                d_r = fr - mean_r[k]
                d_c = float(c) - mean_c[k]
                mu_rr[k] += d_r * d_r
                mu_cc[k] += d_c * d_c
                mu_rc[k] += d_r * d_c
    return True


@_jit
def _boxes(ids, count, boxes):
    height, width = ids.shape
    lo_r = np.full(count + 1, height, dtype=np.int64)
    lo_c = np.full(count + 1, width, dtype=np.int64)
    hi_r = np.full(count + 1, -1, dtype=np.int64)
    hi_c = np.full(count + 1, -1, dtype=np.int64)
    for r in range(height):
        for c in range(width):
            k = ids[r, c]
            if k != 0:
                if k < 0 or k > count:
                    return False
                if r < lo_r[k]:
                    lo_r[k] = r
                if c < lo_c[k]:
                    lo_c[k] = c
                hi_r[k] = r  # raster order: the last row seen is the largest
                if c > hi_c[k]:
                    hi_c[k] = c
    for k in range(1, count + 1):
        if hi_r[k] >= 0:
            boxes[k - 1, 0] = lo_r[k]
            boxes[k - 1, 1] = lo_c[k]
            boxes[k - 1, 2] = hi_r[k] + 1
            boxes[k - 1, 3] = hi_c[k] + 1
    return True


_NONE = np.int64(-(2**62))  # an empty level / line: below every coordinate


@_inline
def _widen(low, high, t, lo_v, hi_v):
    if low[t] == _NONE or lo_v < low[t]:
        low[t] = lo_v
    if hi_v > high[t]:
        high[t] = hi_v


@_jit
def _convex_chain(ys, xs, n, side, env_y, env_x):
    """Vertices of the convex envelope of points with strictly increasing ``ys``.

    ``side=+1``: the envelope from the low-``x`` side (points on or behind a
    segment joining their neighbours dropped), ``side=-1`` from the high side.
    Returns the vertex count; the vertices are in ``env_y``, ``env_x``.
    """
    m = 0
    for i in range(n):
        y = ys[i]
        x = xs[i]
        while m >= 2:
            oy = env_y[m - 2]
            ox = env_x[m - 2]
            cross = (env_y[m - 1] - oy) * (x - ox) - (env_x[m - 1] - ox) * (y - oy)
            if side * cross <= 0:
                m -= 1
            else:
                break
        env_y[m] = y
        env_x[m] = x
        m += 1
    return m


@_jit
def _level_envelopes(low, high, n_levels, ys, xs, left_y, left_x, right_y, right_x):
    """Both envelopes of per-level extremes ``low[t]``/``high[t]`` at level ``y = t - 1``.

    Levels without points hold ``_NONE`` in ``low``. Returns the vertex counts.
    """
    n = 0
    for t in range(n_levels):
        if low[t] != _NONE:
            ys[n] = t - 1
            xs[n] = low[t]
            n += 1
    n_left = _convex_chain(ys, xs, n, 1, left_y, left_x)
    n = 0
    for t in range(n_levels):
        if low[t] != _NONE:
            ys[n] = t - 1
            xs[n] = high[t]
            n += 1
    n_right = _convex_chain(ys, xs, n, -1, right_y, right_x)
    return n_left, n_right


@_jit
def _chain_at(env_y, env_x, m, p, y, side):
    """Pixel index bound of a chain at even level ``y`` (doubled coordinates).

    ``p`` is a vertex index with ``env_y[p] < y`` (advanced and returned).
    The chain's ``x`` there is interpolated exactly and halved, rounded up
    (``side=+1``) or down (``side=-1``).
    """
    while env_y[p + 1] < y:
        p += 1
    rise = env_y[p + 1] - env_y[p]
    num = env_x[p] * rise + (env_x[p + 1] - env_x[p]) * (y - env_y[p])
    den = 2 * rise
    if side > 0:
        return -((-num) // den), p
    return num // den, p


@_jit
def _hull_lines(first, last, base, n_lines, low, high, ys, xs, ly, lx, ry, rx, lo_out, hi_out):
    """Interval of hull pixel centres on each line of one object's box.

    ``first[base + l]``/``last[base + l]`` are the first and last pixel (box
    relative) of the object on line ``l`` (-1: none). Levels are doubled
    coordinates along the lines, box relative: line ``l`` at ``2 l``, its edge
    midpoints across at ``2 l -+ 1``; values are doubled coordinates along
    the line.
    """
    n_levels = 2 * n_lines + 1
    for t in range(n_levels):
        low[t] = _NONE
        high[t] = _NONE
    for line in range(n_lines):
        a = first[base + line]
        if a < 0:
            continue
        b = last[base + line]
        t = 2 * line + 1  # level 2 l, stored at index level + 1
        _widen(low, high, t - 1, 2 * a, 2 * b)
        _widen(low, high, t, 2 * a - 1, 2 * b + 1)
        _widen(low, high, t + 1, 2 * a, 2 * b)
    n_left, n_right = _level_envelopes(low, high, n_levels, ys, xs, ly, lx, ry, rx)
    p = 0
    q = 0
    for line in range(n_lines):
        lo_out[line], p = _chain_at(ly, lx, n_left, p, 2 * line, 1)
        hi_out[line], q = _chain_at(ry, rx, n_right, q, 2 * line, -1)


@_jit
def _max_sq(ys, xs, n):
    best = 0
    for i in range(n):
        yi = ys[i]
        xi = xs[i]
        for j in range(i + 1, n):
            dy = ys[j] - yi
            dx = xs[j] - xi
            d = dy * dy + dx * dx
            if d > best:
                best = d
    return best


@_jit
def _feret(ids, boxes, out):
    height, width = ids.shape
    count = boxes.shape[0]
    # one slot per (object, row of its box) and per (object, column of its box)
    row_base = np.zeros(count + 2, dtype=np.int64)
    col_base = np.zeros(count + 2, dtype=np.int64)
    for k in range(count):
        row_base[k + 2] = row_base[k + 1] + max(boxes[k, 2] - boxes[k, 0], 0)
        col_base[k + 2] = col_base[k + 1] + max(boxes[k, 3] - boxes[k, 1], 0)
    row_first = np.full(row_base[count + 1], -1, dtype=np.int64)
    row_last = np.full(row_base[count + 1], -1, dtype=np.int64)
    col_first = np.full(col_base[count + 1], -1, dtype=np.int64)
    col_last = np.full(col_base[count + 1], -1, dtype=np.int64)
    for r in range(height):
        for c in range(width):
            k = ids[r, c]
            if k != 0:
                if k < 0 or k > count:
                    return 1
                r0 = boxes[k - 1, 0]
                c0 = boxes[k - 1, 1]
                if r < r0 or r >= boxes[k - 1, 2] or c < c0 or c >= boxes[k - 1, 3]:
                    return 2
                s = row_base[k] + r - r0
                if row_first[s] < 0:  # raster order: first seen is leftmost, last rightmost
                    row_first[s] = c - c0
                row_last[s] = c - c0
                s = col_base[k] + c - c0
                if col_first[s] < 0:
                    col_first[s] = r - r0
                col_last[s] = r - r0

    size = 2 * max(height, width) + 3
    low = np.empty(size, dtype=np.int64)
    high = np.empty(size, dtype=np.int64)
    ys = np.empty(2 * size, dtype=np.int64)  # also holds both chains at the end
    xs = np.empty(2 * size, dtype=np.int64)
    ly = np.empty(size, dtype=np.int64)
    lx = np.empty(size, dtype=np.int64)
    ry = np.empty(size, dtype=np.int64)
    rx = np.empty(size, dtype=np.int64)
    c_lo = np.empty(height, dtype=np.int64)
    c_hi = np.empty(height, dtype=np.int64)
    r_lo = np.empty(width, dtype=np.int64)
    r_hi = np.empty(width, dtype=np.int64)
    for k in range(count):
        n_rows = boxes[k, 2] - boxes[k, 0]
        n_cols = boxes[k, 3] - boxes[k, 1]
        if n_rows <= 0 or n_cols <= 0:
            continue
        # a tight box has pixels on its first and last row and column
        if (
            row_first[row_base[k + 1]] < 0
            or row_first[row_base[k + 1] + n_rows - 1] < 0
            or col_first[col_base[k + 1]] < 0
            or col_first[col_base[k + 1] + n_cols - 1] < 0
        ):
            return 2
        # the hull image, as column intervals per row and row intervals per column
        # (the same hull, built from the row extents and from the column extents)
        _hull_lines(
            row_first,
            row_last,
            row_base[k + 1],
            n_rows,
            low,
            high,
            ys,
            xs,
            ly,
            lx,
            ry,
            rx,
            c_lo,
            c_hi,
        )
        _hull_lines(
            col_first,
            col_last,
            col_base[k + 1],
            n_cols,
            low,
            high,
            ys,
            xs,
            ly,
            lx,
            ry,
            rx,
            r_lo,
            r_hi,
        )
        # its contour points at level 0.5: interval ends moved out by half a
        # pixel, at rows 2 r (doubled) and at columns 2 c; bounded, level by
        # level along the rows, by their extreme columns
        n_levels = 2 * n_rows + 1
        for t in range(n_levels):
            low[t] = _NONE
            high[t] = _NONE
        for r in range(n_rows):
            t = 2 * r + 1
            low[t] = 2 * c_lo[r] - 1
            high[t] = 2 * c_hi[r] + 1
        for c in range(n_cols):
            _widen(low, high, 2 * r_lo[c], 2 * c, 2 * c)
            _widen(low, high, 2 * r_hi[c] + 2, 2 * c, 2 * c)
        n_left, n_right = _level_envelopes(low, high, n_levels, ys, xs, ly, lx, ry, rx)
        # the farthest pair of points is a pair of hull vertices
        ys[:n_left] = ly[:n_left]
        xs[:n_left] = lx[:n_left]
        ys[n_left : n_left + n_right] = ry[:n_right]
        xs[n_left : n_left + n_right] = rx[:n_right]
        out[k] = math.sqrt(float(_max_sq(ys, xs, n_left + n_right))) / 2.0
    return 0


# --------------------------------------------------------------------------- reference
# The numpy formulations the compiled kernels replace, kept as the reference the
# exactness tests compare with. Not used by the step kinds.


def _reference_compact_labels(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Renumber a label image to ids 1..N in increasing label order.

    Returns the compact ids (int64, same shape) and the original label of each
    id (int64, length N). Labels must be non-negative; 0 is background.
    """
    flat = labels.ravel()
    top = int(flat.max()) if flat.size else 0
    if top <= 4 * flat.size + 1024:
        present = np.flatnonzero(np.bincount(flat, minlength=top + 1))
    else:  # sparse label values: avoid a huge bincount
        present = np.unique(flat)
    present = present[present > 0].astype(np.int64)
    if present.size == top:  # already 1..N
        return labels.astype(np.int64, copy=False), present
    lookup_values = np.concatenate(([0], present))
    ids = np.searchsorted(lookup_values, flat).reshape(labels.shape).astype(np.int64)
    return ids, present


def _windows_2d(array: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    padded = np.pad(array, 1, mode="constant", constant_values=0)
    return (
        padded[:-1, :-1].ravel(),
        padded[:-1, 1:].ravel(),
        padded[1:, :-1].ravel(),
        padded[1:, 1:].ravel(),
    )


def _reference_window_histogram_2d(mask: np.ndarray) -> np.ndarray:
    """Counts (int64, length 16) of the 2x2 configuration codes of a bool mask."""
    tl, tr, bl, br = (w.astype(np.int64) for w in _windows_2d(mask))
    return np.bincount(8 * tl + 2 * tr + 4 * bl + br, minlength=16)


def _reference_window_histogram_by_label_2d(ids: np.ndarray, count: int) -> np.ndarray:
    """Per-object counts of 2x2 configuration codes, shape (count + 1, 16), int64.

    Row ``k`` is the histogram of the windows of the indicator image
    ``ids == k`` (other objects count as background), exactly as if each
    object were cut out alone. Row 0 is unused.
    """
    tl, tr, bl, br = _windows_2d(ids)
    e_tl_tr = tl == tr
    e_tl_bl = tl == bl
    e_tl_br = tl == br
    e_tr_bl = tr == bl
    e_tr_br = tr == br
    e_bl_br = bl == br
    # Each distinct object in a window is credited once, at its first position
    # in the order TL, TR, BL, BR; its code has a bit wherever it occurs.
    parts_ids = []
    parts_codes = []
    sel = tl != 0
    parts_ids.append(tl[sel])
    parts_codes.append(8 + 2 * e_tl_tr[sel] + 4 * e_tl_bl[sel] + 1 * e_tl_br[sel])
    sel = (tr != 0) & ~e_tl_tr
    parts_ids.append(tr[sel])
    parts_codes.append(2 + 4 * e_tr_bl[sel] + 1 * e_tr_br[sel])
    sel = (bl != 0) & ~e_tl_bl & ~e_tr_bl
    parts_ids.append(bl[sel])
    parts_codes.append(4 + 1 * e_bl_br[sel])
    sel = (br != 0) & ~e_tl_br & ~e_tr_br & ~e_bl_br
    parts_ids.append(br[sel])
    parts_codes.append(np.ones(int(sel.sum()), dtype=np.int64))
    keys = 16 * np.concatenate(parts_ids).astype(np.int64) + np.concatenate(parts_codes)
    return np.bincount(keys, minlength=16 * (count + 1)).reshape(count + 1, 16)


def _reference_pixel_moments_2d(ids: np.ndarray, count: int) -> dict[str, np.ndarray]:
    """Pixel counts, centroids and second central moments per object (pixel units).

    Returns float64 arrays of length ``count`` (object ids 1..count):
    ``n`` (pixels), ``row``/``col`` (mean row / column index of the pixel
    centres), ``mu_rr``, ``mu_cc``, ``mu_rc`` (sums of squared / crossed
    deviations from the centroid). Two passes (mean first, then deviations)
    keep the central moments free of the cancellation of raw-moment formulas.
    """
    width = ids.shape[1]
    flat = ids.ravel()
    where = np.flatnonzero(flat)
    obj = flat[where]
    rows = (where // width).astype(np.float64)
    cols = (where % width).astype(np.float64)
    size = count + 1
    n = np.bincount(obj, minlength=size).astype(np.float64)
    safe_n = np.where(n > 0, n, 1.0)
    row_mean = np.bincount(obj, weights=rows, minlength=size) / safe_n
    col_mean = np.bincount(obj, weights=cols, minlength=size) / safe_n
    d_row = rows - row_mean[obj]
    d_col = cols - col_mean[obj]
    return {
        "n": n[1:],
        "row": row_mean[1:],
        "col": col_mean[1:],
        "mu_rr": np.bincount(obj, weights=d_row * d_row, minlength=size)[1:],
        "mu_cc": np.bincount(obj, weights=d_col * d_col, minlength=size)[1:],
        "mu_rc": np.bincount(obj, weights=d_row * d_col, minlength=size)[1:],
    }


def _row_extents(ids: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """First and last column of every (object, row) that holds object pixels.

    Returns int64 arrays ``(obj, row, first, last)`` sorted by object, then row.
    """
    height, width = ids.shape
    # One background column after every row keeps runs from wrapping to the next row.
    padded = np.zeros((height, width + 1), dtype=ids.dtype)
    padded[:, :width] = ids
    flat = padded.ravel()
    bounds = np.flatnonzero(flat[1:] != flat[:-1]) + 1
    if flat[0] != 0:
        bounds = np.concatenate(([0], bounds))
    values = flat[bounds]
    stops = np.append(bounds[1:], flat.size) - 1  # last pixel of each run
    run = values != 0
    obj = values[run].astype(np.int64)
    start, stop = bounds[run], stops[run]
    row = start // (width + 1)
    key = obj * height + row
    order = np.argsort(key, kind="stable")  # runs come by row; group them by object
    key, start, stop = key[order], start[order], stop[order]
    first_of_group = np.ones(key.size, dtype=bool)
    first_of_group[1:] = key[1:] != key[:-1]
    last_of_group = np.ones(key.size, dtype=bool)
    last_of_group[:-1] = key[1:] != key[:-1]
    group = key[first_of_group]
    return (
        group // height,
        group % height,
        (start[first_of_group] % (width + 1)).astype(np.int64),
        (stop[last_of_group] % (width + 1)).astype(np.int64),
    )


def _segment_starts(counts: np.ndarray) -> np.ndarray:
    starts = np.zeros(len(counts) + 1, dtype=np.int64)
    np.cumsum(counts, out=starts[1:])
    return starts


def _ragged_arange(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """``concatenate([arange(s, s + n) for s, n in zip(starts, counts)])`` without a loop."""
    total = int(counts.sum())
    offsets = np.arange(total, dtype=np.int64) - np.repeat(_segment_starts(counts)[:-1], counts)
    aranged: np.ndarray = np.repeat(starts, counts) + offsets
    return aranged


def _envelope(group: np.ndarray, t: np.ndarray, s: np.ndarray, side: int) -> np.ndarray:
    """Indices of the vertices of the convex envelope of each group's chain.

    Points are sorted by ``group`` (non-negative ints) then strictly increasing
    ``t``; ``s`` is the other coordinate. ``side=+1`` keeps the lower envelope
    of ``s(t)`` (the boundary of a convex set on its low-``s`` side),
    ``side=-1`` the upper one. Any interior point on or behind the segment
    joining its neighbours is dropped, all at once, until none is, working on
    again only the groups that changed. Dropping such a point only moves the
    chain outwards, so what remains is convex, lies on the outer side of every
    point and has points of the set as vertices: the envelope. Integer
    coordinates keep the test exact.
    """
    alive = np.ones(len(t), dtype=bool)
    changed = np.zeros(int(group.max(initial=0)) + 1, dtype=bool)
    current = np.arange(len(t), dtype=np.int64)
    while len(current) > 2:
        g, tt, ss = group[current], t[current], s[current]
        inner = (g[:-2] == g[1:-1]) & (g[2:] == g[1:-1])
        turn = (ss[1:-1] - ss[:-2]) * (tt[2:] - tt[:-2]) - (tt[1:-1] - tt[:-2]) * (ss[2:] - ss[:-2])
        dropped = current[1:-1][inner & (side * turn >= 0)]
        if dropped.size == 0:
            break
        alive[dropped] = False
        changed[:] = False
        changed[group[dropped]] = True
        current = current[alive[current] & changed[group[current]]]
    return np.flatnonzero(alive)


def _midpoint_chains(
    obj: np.ndarray, lines: np.ndarray, first: np.ndarray, last: np.ndarray
) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Low and high boundary chains of the convex hull of the pixels' edge midpoints.

    ``obj, lines, first, last`` give, per object and line (row, or column of
    the transposed image), the first and last pixel on it. In doubled
    coordinates, a pixel ``(l, a)`` has the edge midpoints ``(2l, 2a -+ 1)``
    and ``(2l -+ 1, 2a)``; on each level the outermost of the line-end pixels'
    midpoints bound all others. The hull is the region between the lower
    envelope of the low-side points and the upper envelope of the high-side
    points. Returns ``[(obj, level, value), (obj, level, value)]`` for the low
    and the high chain, sorted by object then level.
    """
    l2 = 2 * lines
    # Entry i continues the object on the next line when entry i + 1 is the
    # same object one line further; the shared level 2l + 1 then takes the
    # outer of the two tips, and the next entry adds no level 2l - 1.
    joined = np.zeros(len(lines), dtype=bool)
    joined[:-1] = (obj[1:] == obj[:-1]) & (lines[1:] == lines[:-1] + 1)
    starts_run = np.ones(len(lines), dtype=bool)
    starts_run[1:] = ~joined[:-1]
    chains = []
    for side, ends in ((+1, first), (-1, last)):
        tip = 2 * ends
        mid = tip - side  # the side midpoint (2l, 2a - 1) or (2l, 2b + 1)
        next_tip = np.empty_like(tip)
        next_tip[:-1] = tip[1:]
        next_tip[-1:] = tip[-1:]
        after = np.where(joined, np.minimum(side * tip, side * next_tip) * side, tip)
        # levels 2l - 1, 2l, 2l + 1 of every entry, in order; absent ones masked
        level = np.stack([l2 - 1, l2, l2 + 1], axis=1).ravel()
        value = np.stack([tip, mid, after], axis=1).ravel()
        owner = np.repeat(obj, 3)
        present = np.stack([starts_run, np.ones_like(joined), np.ones_like(joined)], axis=1).ravel()
        level, value, owner = level[present], value[present], owner[present]
        keep = _envelope(owner, level, value, side)
        chains.append((owner[keep], level[keep], value[keep]))
    return chains


def _bound_on_lines(
    chain: tuple[np.ndarray, np.ndarray, np.ndarray],
    line_obj: np.ndarray,
    line_level: np.ndarray,
    side: int,
    span: int,
) -> np.ndarray:
    """First (``side=+1``) or last (``side=-1``) pixel index ``t`` with ``2t`` inside the chain.

    Each query line (``line_obj``, doubled ``line_level``) lies strictly
    between the first and last level of its object's chain; the chain's value
    there is interpolated on the edge that spans it, and rounded inwards with
    exact integer division.
    """
    c_obj, c_level, c_value = chain
    keys = c_obj * span + (c_level + 1)
    p = np.searchsorted(keys, line_obj * span + (line_level + 1), side="right") - 1
    q = p + 1
    rise = c_level[q] - c_level[p]
    num = c_value[p] * rise + (c_value[q] - c_value[p]) * (line_level - c_level[p])
    den = 2 * rise
    if side > 0:
        ceiling: np.ndarray = -((-num) // den)  # ceil(num / den)
        return ceiling
    floor: np.ndarray = num // den  # floor(num / den)
    return floor


def _max_sq_distance_ragged(py: np.ndarray, px: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Largest squared distance between two points of each group ``starts[k]:starts[k+1]``."""
    counts = np.diff(starts)
    out = np.zeros(len(counts), dtype=np.int64)
    # Groups of similar size are padded (by repeating their last point, which
    # changes no maximum) and compared all-pairs in one array.
    for lower, width in ((0, 8), (8, 16), (16, 32), (32, 64), (64, 128)):
        group = np.flatnonzero((counts > lower) & (counts <= width))
        chunk = max(1, 2_000_000 // (width * width))
        for begin in range(0, len(group), chunk):
            part = group[begin : begin + chunk]
            index = starts[part, None] + np.minimum(np.arange(width), counts[part, None] - 1)
            y, x = py[index], px[index]
            dy = y[:, :, None] - y[:, None, :]
            dx = x[:, :, None] - x[:, None, :]
            out[part] = (dy * dy + dx * dx).reshape(len(part), -1).max(axis=1)
    for k in np.flatnonzero(counts > 128):
        y, x = py[starts[k] : starts[k + 1]], px[starts[k] : starts[k + 1]]
        for begin in range(0, len(y), 256):  # bounded memory for very large objects
            dy = y[begin : begin + 256, None] - y[None, :]
            dx = x[begin : begin + 256, None] - x[None, :]
            out[k] = max(out[k], int((dy * dy + dx * dx).max()))
    return out


def _reference_feret_max_2d(ids: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """Maximum Feret diameter per object in pixels (float64, length ``len(boxes)``).

    The largest distance between two points of the contour, at level 0.5, of the
    object's convex hull image: the pixels whose centres lie in the (closed)
    convex hull of the edge midpoints of the object's pixels. This is the
    definition of scikit-image 0.26's ``regionprops(...).feret_diameter_max``;
    here it is computed for all objects at once, with exact integer arithmetic
    on doubled coordinates ``(2 row, 2 col)``.
    """
    count = len(boxes)
    if count == 0:
        return np.zeros(0, dtype=np.float64)
    height, width = ids.shape
    span = 2 * max(height, width) + 4  # room for every doubled level, -1 .. 2 n + 1
    obj = np.arange(1, count + 1, dtype=np.int64)

    # The convex hull image, exactly: on each row of the object's box the hull
    # pixels are one interval of columns, bounded by the hull's left and right
    # chains; on each column one interval of rows, bounded by its top and
    # bottom chains (the same hull, described from the transposed image).
    n_rows = boxes[:, 2] - boxes[:, 0]
    n_cols = boxes[:, 3] - boxes[:, 1]
    row_obj = np.repeat(obj, n_rows)
    row2 = 2 * _ragged_arange(boxes[:, 0], n_rows)
    left, right = _midpoint_chains(*_row_extents(ids))
    c_lo = _bound_on_lines(left, row_obj, row2, +1, span)
    c_hi = _bound_on_lines(right, row_obj, row2, -1, span)
    col_obj = np.repeat(obj, n_cols)
    col2 = 2 * _ragged_arange(boxes[:, 1], n_cols)
    top, bottom = _midpoint_chains(*_row_extents(ids.T))
    r_lo = _bound_on_lines(top, col_obj, col2, +1, span)
    r_hi = _bound_on_lines(bottom, col_obj, col2, -1, span)

    # Contour points of the hull image at level 0.5 are the midpoints between a
    # hull pixel and an outside 4-neighbour: the ends of the row and column
    # intervals, moved out by half a pixel. The farthest pair is among the
    # vertices of their convex hull, hence among the envelopes of the four chains.
    parts = []
    for group, level, value, side, along_rows in (
        (row_obj, row2, 2 * c_lo - 1, +1, True),
        (row_obj, row2, 2 * c_hi + 1, -1, True),
        (col_obj, col2, 2 * r_lo - 1, +1, False),
        (col_obj, col2, 2 * r_hi + 1, -1, False),
    ):
        keep = _envelope(group, level, value, side)
        y, x = (level, value) if along_rows else (value, level)
        parts.append((group[keep], y[keep], x[keep]))
    cand_obj, cand_y, cand_x = (np.concatenate(column) for column in zip(*parts, strict=False))
    order = np.argsort(cand_obj, kind="stable")
    starts = _segment_starts(np.bincount(cand_obj, minlength=count + 1)[1:])
    sq = _max_sq_distance_ragged(cand_y[order], cand_x[order], starts)
    return np.sqrt(sq.astype(np.float64)) / 2.0


def _reference_bounding_boxes(ids: np.ndarray, count: int) -> np.ndarray:
    """Bounding box per object, int64 ``(count, 2 * ndim)``: starts, then stops (exclusive)."""
    boxes = np.zeros((count, 2 * ids.ndim), dtype=np.int64)
    for k, box in enumerate(ndi.find_objects(ids, max_label=count)):
        if box is not None:
            boxes[k] = [s.start for s in box] + [s.stop for s in box]
    return boxes
