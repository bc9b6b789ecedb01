"""Compiled (numba) kernels for flat erosion and dilation, exact on the whole image.

Four kernels, all single-threaded and all working on a C-contiguous 2-D array
of rows (a 3-D volume is its ``nz * ny`` rows of ``nx`` values):

* :func:`chord_kernel` -- any footprint, as runs of consecutive pixels along
  the last axis (chords). Each input row is copied once into a buffer padded
  with the neutral value, the running extremum of every distinct chord length
  is built from the previous, shorter one (doubling while the step is more than
  twice as long, then one overlapping combination), and the row's table is
  scattered into every output row that one of its chords reaches. Only one
  row's table and the few output rows within the footprint's height are ever
  touched, so the working set stays in cache. This is the chord method of
  Urbach and Wilkinson.
* :func:`stencil_kernel` -- a small footprint given as its list of offsets,
  in one fused pass per output row: every output pixel is the extremum of up
  to eight input pixels read straight from the source rows (more offsets take
  further passes of seven plus the partial result). No row buffer, no tables:
  for a 3x3 cross this runs at about the speed of a memory copy.
* :func:`box_stencil_kernel` -- a small full rectangle, separably but fused
  per row: each input row's extremum along the row goes into a ring of rows,
  and each output row is the extremum over the ring, both by the same fused
  passes.
* :func:`box_kernel` -- a full rectangle, separably: a running extremum along
  the row (doubling), then along the columns by the van Herk / Gil-Werman
  block algorithm, three operations per pixel whatever the height.

The border rule is built in: the row buffer is padded with the neutral value
and rows outside the image are simply never scattered, which is the same as
taking the extremum over the part of the footprint inside the image.

``mode`` is 0 for the minimum (erosion) and 1 for the maximum (dilation). Every
inner loop is a plain elementwise pass that the compiler vectorises; the branch
on ``mode`` sits outside it. ``a if a < b else b`` is exactly what the SIMD
minimum instruction computes, and the kernels see no NaN (the loader refuses
them) and no ``-0.0`` (the caller replaces it by ``+0.0``), so the result does
not depend on vector width or on which of two equal values wins.

Compiled code is cached on disk (``cache=True``); :func:`warm_up` compiles or
loads every dtype ahead of the hot path, so a pool worker can call it once.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = [
    "KERNEL_DTYPES",
    "STENCIL_ARITY",
    "box_kernel",
    "box_stencil_kernel",
    "chord_kernel",
    "stencil_kernel",
    "warm_up",
]

#: The dtypes the compiled kernels are specialised for (bool is computed as uint8).
KERNEL_DTYPES: tuple[np.dtype, ...] = tuple(
    np.dtype(t)
    for t in (np.uint8, np.uint16, np.uint32, np.int16, np.int32, np.float32, np.float64)
)

_jit = numba.njit(cache=True, nogil=True, boundscheck=False)


# The helpers index with the loop counter alone and take their offsets as
# slices: an index ``a0 + j`` with a run-time ``a0`` might be negative as far as
# the compiler knows, and the wrap-around test that numba then adds to every
# access stops the loop from being vectorised (measured: 30x slower).


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _combine(mode, dst, a, b, n):
    """``dst[j] = op(a[j], b[j])`` for j < n."""
    if mode == 0:
        for j in range(n):
            u = a[j]
            v = b[j]
            dst[j] = u if u < v else v
    else:
        for j in range(n):
            u = a[j]
            v = b[j]
            dst[j] = u if u > v else v


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _update(mode, dst, a, n):
    """``dst[j] = op(dst[j], a[j])`` for j < n."""
    if mode == 0:
        for j in range(n):
            u = dst[j]
            v = a[j]
            dst[j] = u if u < v else v
    else:
        for j in range(n):
            u = dst[j]
            v = a[j]
            dst[j] = u if u > v else v


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _update2(mode, dst1, dst2, a, n):
    """``dst1[j] = op(dst1[j], a[j])`` and the same for ``dst2``, reading ``a`` once."""
    if mode == 0:
        for j in range(n):
            v = a[j]
            u = dst1[j]
            dst1[j] = u if u < v else v
            u = dst2[j]
            dst2[j] = u if u < v else v
    else:
        for j in range(n):
            v = a[j]
            u = dst1[j]
            dst1[j] = u if u > v else v
            u = dst2[j]
            dst2[j] = u if u > v else v


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _target(oz, oy, nz, ny):
    """Flat index of output row (oz, oy), or -1 outside the image."""
    if oz < 0 or oz >= nz or oy < 0 or oy >= ny:
        return -1
    return oz * ny + oy


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _copy(dst, a, n):
    for j in range(n):
        dst[j] = a[j]


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _load_row(row, buf, padl, cval, normalize):
    """``row`` into ``buf`` at ``padl``, the rest of ``buf`` = ``cval``."""
    w = row.shape[0]
    wp = buf.shape[0]
    for j in range(padl):
        buf[j] = cval
    inner = buf[padl : padl + w]
    if normalize:
        zero = row[0] - row[0]  # +0.0: the data is finite
        for j in range(w):
            # -0.0 + 0.0 is +0.0: one zero, whichever the data held
            inner[j] = row[j] + zero
    else:
        _copy(inner, row, w)
    tail = buf[padl + w :]
    for j in range(wp - padl - w):
        tail[j] = cval


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _load_segment(row, lo, buf, cval, normalize):
    """``buf[j] = row[lo + j]`` where that lies inside ``row``, else ``cval``."""
    w = row.shape[0]
    n = buf.shape[0]
    left = min(max(0, -lo), n)
    first = lo + left  # first index of row that is read
    count = max(0, min(n - left, w - first))
    for j in range(left):
        buf[j] = cval
    if count > 0:
        inner = buf[left : left + count]
        part = row[first : first + count]
        if normalize:
            zero = part[0] - part[0]  # +0.0: the data is finite
            for j in range(count):
                # -0.0 + 0.0 is +0.0: one zero, whichever the data held
                inner[j] = part[j] + zero
        else:
            _copy(inner, part, count)
    tail = buf[left + count :]
    for j in range(n - left - count):
        tail[j] = cval


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _running(mode, length, dst, tmp, have_arr, have):
    """``dst[j] = op(x[j : j + length])``, given ``have_arr[j] = op(x[j : j + have])``.

    Doubles ``have`` through the two rows of ``tmp`` while ``length > 2 * have``,
    then combines two overlapping windows. With ``wp = len(have_arr)``, entries
    j > wp - length are not written.
    """
    wp = have_arr.shape[0]
    h = have
    sel = -1  # where the current windows live: -1 have_arr, else a row of tmp
    while 2 * h < length:
        nxt = 0 if sel != 0 else 1
        n = wp - 2 * h + 1
        if sel == -1:
            _combine(mode, tmp[nxt], have_arr, have_arr[h:], n)
        else:
            cur = tmp[sel]
            _combine(mode, tmp[nxt], cur, cur[h:], n)
        sel = nxt
        h = 2 * h
    n = wp - length + 1
    if sel == -1:
        if h == length:
            _copy(dst, have_arr, n)
        else:
            _combine(mode, dst, have_arr, have_arr[length - h :], n)
    else:
        cur = tmp[sel]
        if h == length:
            _copy(dst, cur, n)
        else:
            _combine(mode, dst, cur, cur[length - h :], n)


@_jit
def chord_kernel(
    src, ny, dz, dy, start, which, partner, lengths, padl, padr, mode, cval, normalize, strip, out
):
    """Erode (mode 0) or dilate (mode 1) the rows of ``src`` by a chord decomposition.

    Parameters
    ----------
    src, out : 2-D C-contiguous arrays of one dtype, shape (nz * ny, nx)
    ny : int
        Rows per plane (``nz = src.shape[0] // ny``).
    dz, dy, start, which : 1-D int64 arrays, one entry per chord
        Plane and row offsets, offset of the first pixel along the row, and
        index into ``lengths`` of the chord's length.
    partner : 1-D int64 array, one entry per chord
        Index of a later chord with the same length and start (its table slice
        is then read once for both), -1 for none, -2 for a chord that is
        another's partner and handled with it.
    lengths : 1-D int64 array, increasing
        The distinct chord lengths.
    padl, padr : int
        Neutral padding left and right: ``padl >= -min(start)``,
        ``padr >= max(start + length - 1)``.
    mode : int
        0 minimum, 1 maximum.
    cval : scalar of the dtype
        The neutral value.
    normalize : bool
        Replace -0.0 by +0.0 while loading (floats).
    strip : int
        Width of the column strips the image is processed in, > 0: a strip's
        output rows within the footprint's height and its chord tables are
        meant to stay in the first-level cache.
    """
    nrows, w = src.shape
    nz = nrows // ny
    nl = lengths.shape[0]
    nc = dz.shape[0]
    wp = padl + min(strip, w) + padr
    buf = np.empty(wp, dtype=src.dtype)
    table = np.empty((nl, wp), dtype=src.dtype)
    tmp = np.empty((2, wp), dtype=src.dtype)
    ready = np.zeros(nrows, dtype=np.bool_)
    for x0 in range(0, w, strip):
        sw = min(strip, w - x0)
        swp = padl + sw + padr
        ready[:] = False
        # the first table is the loaded segment itself when the shortest chord is 1 pixel
        first = 1 if lengths[0] == 1 else 0
        for z in range(nz):
            for y in range(ny):
                r = z * ny + y
                seg = table[0, :swp] if first == 1 else buf[:swp]
                _load_segment(src[r], x0 - padl, seg, cval, normalize)
                if first == 0:
                    _running(mode, lengths[0], table[0, :swp], tmp[:, :swp], seg, 1)
                for k in range(1, nl):
                    _running(
                        mode,
                        lengths[k],
                        table[k, :swp],
                        tmp[:, :swp],
                        table[k - 1, :swp],
                        lengths[k - 1],
                    )
                for c in range(nc):
                    if partner[c] == -2:
                        continue
                    a0 = start[c] + padl
                    part = table[which[c], a0 : a0 + sw]
                    o1 = _target(z - dz[c], y - dy[c], nz, ny)
                    p = partner[c]
                    o2 = -1 if p < 0 else _target(z - dz[p], y - dy[p], nz, ny)
                    if o1 >= 0 and o2 >= 0 and ready[o1] and ready[o2]:
                        _update2(mode, out[o1, x0 : x0 + sw], out[o2, x0 : x0 + sw], part, sw)
                        continue
                    for o in (o1, o2):
                        if o < 0:
                            continue  # that chord reaches this row only from outside the image
                        dst = out[o, x0 : x0 + sw]
                        if ready[o]:
                            _update(mode, dst, part, sw)
                        else:
                            _copy(dst, part, sw)
                            ready[o] = True
    return out


#: Input pixels combined per pass of :func:`stencil_kernel` (the first pass;
#: later ones combine the partial result with ``STENCIL_ARITY - 1`` more).
STENCIL_ARITY = 8


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _first8(mode, dst, a0, a1, a2, a3, a4, a5, a6, a7, n):
    """``dst[j] = op(a0[j], ..., a7[j])`` for j < n."""
    if mode == 0:
        for j in range(n):
            u = a0[j]
            v = a1[j]
            u = u if u < v else v
            v = a2[j]
            u = u if u < v else v
            v = a3[j]
            u = u if u < v else v
            v = a4[j]
            u = u if u < v else v
            v = a5[j]
            u = u if u < v else v
            v = a6[j]
            u = u if u < v else v
            v = a7[j]
            dst[j] = u if u < v else v
    else:
        for j in range(n):
            u = a0[j]
            v = a1[j]
            u = u if u > v else v
            v = a2[j]
            u = u if u > v else v
            v = a3[j]
            u = u if u > v else v
            v = a4[j]
            u = u if u > v else v
            v = a5[j]
            u = u if u > v else v
            v = a6[j]
            u = u if u > v else v
            v = a7[j]
            dst[j] = u if u > v else v


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _more7(mode, dst, a0, a1, a2, a3, a4, a5, a6, n):
    """``dst[j] = op(dst[j], a0[j], ..., a6[j])`` for j < n."""
    if mode == 0:
        for j in range(n):
            u = dst[j]
            v = a0[j]
            u = u if u < v else v
            v = a1[j]
            u = u if u < v else v
            v = a2[j]
            u = u if u < v else v
            v = a3[j]
            u = u if u < v else v
            v = a4[j]
            u = u if u < v else v
            v = a5[j]
            u = u if u < v else v
            v = a6[j]
            dst[j] = u if u < v else v
    else:
        for j in range(n):
            u = dst[j]
            v = a0[j]
            u = u if u > v else v
            v = a1[j]
            u = u if u > v else v
            v = a2[j]
            u = u if u > v else v
            v = a3[j]
            u = u if u > v else v
            v = a4[j]
            u = u if u > v else v
            v = a5[j]
            u = u if u > v else v
            v = a6[j]
            dst[j] = u if u > v else v


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _frame_pixel(src, rows, cols, m, x, mode, cval, normalize, zero):
    """Extremum of ``src[rows[i], x + cols[i]]`` over i < m, outside the row ignored."""
    w = src.shape[1]
    v = cval
    for i in range(m):
        c = x + cols[i]
        if c >= 0 and c < w:
            u = src[rows[i], c]
            if mode == 0:
                v = v if v < u else u
            else:
                v = v if v > u else u
    return v + zero if normalize else v


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _passes(mode, src, rows, cols, g, dst, at, n):
    """``dst[j]`` = extremum of ``src[rows[i], cols[i] + at + j]`` over i < g, for j < n."""
    _first8(
        mode,
        dst,
        src[rows[0], cols[0] + at : cols[0] + at + n],
        src[rows[1], cols[1] + at : cols[1] + at + n],
        src[rows[2], cols[2] + at : cols[2] + at + n],
        src[rows[3], cols[3] + at : cols[3] + at + n],
        src[rows[4], cols[4] + at : cols[4] + at + n],
        src[rows[5], cols[5] + at : cols[5] + at + n],
        src[rows[6], cols[6] + at : cols[6] + at + n],
        src[rows[7], cols[7] + at : cols[7] + at + n],
        n,
    )
    for s in range(8, g, 7):
        _more7(
            mode,
            dst,
            src[rows[s], cols[s] + at : cols[s] + at + n],
            src[rows[s + 1], cols[s + 1] + at : cols[s + 1] + at + n],
            src[rows[s + 2], cols[s + 2] + at : cols[s + 2] + at + n],
            src[rows[s + 3], cols[s + 3] + at : cols[s + 3] + at + n],
            src[rows[s + 4], cols[s + 4] + at : cols[s + 4] + at + n],
            src[rows[s + 5], cols[s + 5] + at : cols[s + 5] + at + n],
            src[rows[s + 6], cols[s + 6] + at : cols[s + 6] + at + n],
            n,
        )


@numba.njit(cache=True, nogil=True, boundscheck=False, inline="always")
def _fused_row(src, rows, cols, m, lo, hi, dst_row, mode, cval, normalize, zero):
    """``dst_row[x]`` = extremum of ``src[rows[i], x + cols[i]]`` over i < m, outside ignored.

    ``[lo, hi)`` are the columns where every ``x + cols[i]`` lies inside the
    row; ``rows`` and ``cols`` need room for 8 more entries (the padding).
    """
    w = src.shape[1]
    if m == 0:
        dst_row[:] = cval
        return
    n = hi - lo
    if n > 0:
        g = 8 if m <= 8 else 8 + (m - 8 + 6) // 7 * 7
        for i in range(m, g):
            rows[i] = rows[0]
            cols[i] = cols[0]
        for i in range(g):
            cols[i] += lo
        dst = dst_row[lo:hi]
        _passes(mode, src, rows, cols, g, dst, 0, n)
        for i in range(g):
            cols[i] -= lo
        if normalize:
            for j in range(n):
                # -0.0 + 0.0 is +0.0: one zero, whichever the data held
                dst[j] = dst[j] + zero
    # the frame's columns, where some offsets fall outside the row
    for x in range(lo):
        dst_row[x] = _frame_pixel(src, rows, cols, m, x, mode, cval, normalize, zero)
    for x in range(hi, w):
        dst_row[x] = _frame_pixel(src, rows, cols, m, x, mode, cval, normalize, zero)


@_jit
def box_stencil_kernel(src, width, height, mode, cval, normalize, out):
    """Erode (mode 0) or dilate (mode 1) ``src`` by a small ``height`` x ``width`` box.

    Parameters
    ----------
    src, out : 2-D C-contiguous arrays of one dtype, shape (ny, nx)
    width, height : int
        Odd sides along the rows and the columns.
    mode : int
        0 minimum, 1 maximum.
    cval : scalar of the dtype
        The neutral value.
    normalize : bool
        Replace -0.0 by +0.0 in the result (floats).

    Notes
    -----
    Separable and fused per row: each input row's extremum over ``width``
    pixels goes into a ring of ``height`` rows as soon as it is read, and each
    output row is the extremum over the ring rows inside the image, both by the
    fused passes of :func:`stencil_kernel`. Only the last step adds +0.0.
    """
    h, w = src.shape
    a = width // 2
    half = height // 2
    ring = np.empty((height, w), dtype=src.dtype)
    rows = np.zeros(max(width, height) + 8, dtype=np.int64)
    cols = np.zeros(max(width, height) + 8, dtype=np.int64)
    zero = src[0, 0] - src[0, 0]  # +0.0 for floats: the data is finite (cval may be inf)
    lo = min(w, a)
    hi = max(lo, w - a)
    for r in range(min(half, h)):
        for i in range(width):
            rows[i] = r
            cols[i] = i - a
        _fused_row(src, rows, cols, width, lo, hi, ring[r % height], mode, cval, False, zero)
    for y in range(h):
        r = y + half
        if r < h:
            for i in range(width):
                rows[i] = r
                cols[i] = i - a
            _fused_row(src, rows, cols, width, lo, hi, ring[r % height], mode, cval, False, zero)
        m = 0
        for q in range(max(0, y - half), min(h, y + half + 1)):
            rows[m] = q % height
            cols[m] = 0
            m += 1
        _fused_row(ring, rows, cols, m, 0, w, out[y], mode, cval, normalize, zero)
    return out


@_jit
def stencil_kernel(src, dy, dx, mode, cval, normalize, out):
    """Erode (mode 0) or dilate (mode 1) ``src`` by a footprint given as its offsets.

    Parameters
    ----------
    src, out : 2-D C-contiguous arrays of one dtype, shape (ny, nx)
    dy, dx : 1-D int64 arrays, one entry per footprint pixel
        Row and column offsets from the centre; ``out[y, x]`` is the extremum
        of ``src[y + dy[k], x + dx[k]]`` over the k inside the image.
    mode : int
        0 minimum, 1 maximum.
    cval : scalar of the dtype
        The neutral value (the result where no offset lies inside, which
        cannot happen when the footprint holds its centre).
    normalize : bool
        Replace -0.0 by +0.0 in the result (floats).

    Notes
    -----
    Offsets whose row lies outside the image are dropped for that output row;
    the remaining list is padded to a multiple of the pass size by repeating its
    first entry, which leaves a minimum or maximum unchanged. Columns where
    every offset stays inside the row are computed by the fused passes, reading
    the source directly; the few columns of the frame (at most the footprint's
    half-width on each side) one pixel at a time, skipping the outside pixels.
    The extremum of finite values read raw differs from that of the values
    with -0.0 replaced by +0.0 at most in the sign of a zero result, so adding
    +0.0 to the result afterwards gives the same bits.
    """
    h, w = src.shape
    k = dy.shape[0]
    lo = min(w, max(0, -dx.min()))
    hi = max(lo, min(w, w - dx.max()))
    rows = np.empty(k + 8, dtype=np.int64)
    cols = np.empty(k + 8, dtype=np.int64)
    zero = src[0, 0] - src[0, 0]  # +0.0 for floats: the data is finite (cval may be inf)
    for y in range(h):
        m = 0
        for i in range(k):
            r = y + dy[i]
            if r >= 0 and r < h:
                rows[m] = r
                cols[m] = dx[i]
                m += 1
        _fused_row(src, rows, cols, m, lo, hi, out[y], mode, cval, normalize, zero)
    return out


@_jit
def box_kernel(src, width, height, mode, cval, normalize, out):
    """Erode (mode 0) or dilate (mode 1) ``src`` by a full ``height`` x ``width`` box.

    Parameters
    ----------
    src, out : 2-D C-contiguous arrays of one dtype, shape (n, nx)
    width, height : int
        Odd sides along the rows and the columns.
    mode : int
        0 minimum, 1 maximum.
    cval : scalar of the dtype
        The neutral value.
    normalize : bool
        Replace -0.0 by +0.0 while loading (floats).

    Notes
    -----
    Along the columns, rows are numbered in a frame padded by ``a = height // 2``
    neutral rows on each side and cut into blocks of ``height`` rows. The window
    of output row y is padded rows [y, y + height - 1]; it meets at most two
    blocks, and its extremum is ``op(S[y], P[y + height - 1])`` with ``S`` the
    suffix extremum inside y's block and ``P`` the prefix extremum inside the
    block of ``y + height - 1`` (van Herk 1992, Gil and Werman 1993).
    """
    n, w = src.shape
    a = width // 2
    half = height // 2
    wp = w + 2 * a
    buf = np.empty(wp, dtype=src.dtype)
    tmp = np.empty((2, wp), dtype=src.dtype)
    if height == 1:
        for r in range(n):
            _load_row(src[r], buf, a, cval, normalize)
            _running(mode, width, out[r], tmp, buf, 1)
        return out
    # raw[i]: padded row i of the current block, filtered along the row; pre: prefix
    # extrema of the current block; suf: suffix extrema of the previous block
    raw = np.empty((height, w), dtype=src.dtype)
    pre = np.empty((height, w), dtype=src.dtype)
    suf = np.empty((height, w), dtype=src.dtype)
    total = n + 2 * half
    nblocks = (total + height - 1) // height
    for b in range(nblocks + 1):
        base = b * height
        for i in range(height):
            r = base + i - half
            if r < 0 or r >= n:
                raw[i, :] = cval
            else:
                _load_row(src[r], buf, a, cval, normalize)
                _running(mode, width, raw[i], tmp, buf, 1)
            if i == 0:
                _copy(pre[0], raw[0], w)
            else:
                _combine(mode, pre[i], pre[i - 1], raw[i], w)
        if b > 0:
            for i in range(height):
                # output row y's window, padded rows [y, y + height - 1], is the suffix
                # of the previous block from i and the prefix of this block to i - 1
                y = base - height + i
                if y >= n:
                    break
                if i == 0:
                    _copy(out[y], suf[0], w)
                else:
                    _combine(mode, out[y], suf[i], pre[i - 1], w)
        _copy(suf[height - 1], raw[height - 1], w)
        for i in range(height - 2, -1, -1):
            _combine(mode, suf[i], suf[i + 1], raw[i], w)
    return out


def warm_up() -> None:
    """Compile (or load from the on-disk cache) both kernels for every dtype.

    Call once per process before timing-sensitive work, e.g. in a pool
    worker's initializer; later calls cost nothing.
    """
    one = np.ones(1, dtype=np.int64)
    zero = np.zeros(1, dtype=np.int64)
    for dtype in KERNEL_DTYPES:
        src = np.zeros((3, 3), dtype=dtype)
        out = np.empty_like(src)
        cval = dtype.type(0)
        for mode in (0, 1):
            chord_kernel(src, 3, zero, zero, zero, zero, -one, one, 0, 0, mode, cval, False, 2, out)
            box_kernel(src, 3, 3, mode, cval, False, out)
            stencil_kernel(src, zero, zero, mode, cval, dtype.kind == "f", out)
            box_stencil_kernel(src, 3, 3, mode, cval, dtype.kind == "f", out)
