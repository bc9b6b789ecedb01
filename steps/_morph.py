"""Kernels for flat erosion and dilation, exact on the whole image including its frame.

Two implementations live here:

* :func:`erode_reference` / :func:`dilate_reference`: the plain definition,
  pad with the neutral value and take the min (max) over every footprint
  offset by slicing. Slow, obviously right, and the yardstick every faster
  kernel is tested against.
* :func:`erode` / :func:`dilate`: the same numbers, fast. A full box is
  separable (one 1-D filter per axis). Any other footprint is split into
  runs of consecutive pixels along the last axis (chords); the 1-D minimum of
  each distinct chord length is computed once, growing from the previous,
  shorter length where the two overlap, and shifted into place for every chord
  of that length.

Border rule: pixels outside the image are ignored; the min (max) is taken over
the part of the footprint inside the image. Padding with the neutral value of
the operation (the dtype's largest value for erosion, smallest for dilation,
+inf / -inf for floats, True / False for masks) is the same thing, as long as
the footprint holds its centre.

Conventions, for a footprint B centred on its middle element:
erosion ``(f ⊖ B)(x) = min_{b in B} f(x + b)``, dilation
``(f ⊕ B)(x) = max_{b in B} f(x - b)``. lotproof's footprints are symmetric,
so the reflection in the dilation never shows.

Images are assumed finite (the loader refuses NaN and infinities). Float
``-0.0`` is read as ``+0.0``, so the output never depends on which of two
equal zeros a kernel happens to pick.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Callable

import numpy as np
from scipy import ndimage as ndi

__all__ = [
    "FUSED_BOX_SIDES",
    "METHODS",
    "STENCIL_MAX_PIXELS",
    "SUPPORTED_DTYPES",
    "choose_method",
    "chords",
    "dilate",
    "dilate_reference",
    "erode",
    "erode_reference",
    "neutral",
]

#: Kernels :func:`erode` and :func:`dilate` can be told to use: ``auto`` picks
#: by footprint (:func:`choose_method`); ``numba-box`` (separable, full boxes
#: only), ``numba-box-fused`` (2-D full boxes only: the rows, then the columns,
#: in fused passes per row), ``numba-chords`` and ``numba-stencil`` (2-D only:
#: one fused pass over the footprint's offsets, for small footprints) are compiled;
#: ``scipy-chords`` is the same chord decomposition by
#: ``scipy.ndimage.minimum_filter1d``; ``reference`` is the plain definition.
METHODS: tuple[str, ...] = (
    "auto",
    "numba-box",
    "numba-box-fused",
    "numba-chords",
    "numba-stencil",
    "scipy-chords",
    "reference",
)

#: ``auto`` uses ``numba-stencil`` for a 2-D footprint of at most this many
#: pixels (chosen from ``bench/bench_kernels.py``: below it the fused pass is
#: faster than the chord and box kernels, above it slower).
STENCIL_MAX_PIXELS = 15

#: ``auto`` uses ``numba-box-fused`` for a 2-D box whose sides both lie in this
#: range (measured: 12-20 % faster than ``numba-box`` for 5x5 and 7x7, slower
#: for 3x3 and from 9x9 on).
FUSED_BOX_SIDES = (5, 7)

#: The dtypes the kernels accept; each one's extreme values are exact as a
#: float64, which scipy's ``cval`` passes through.
SUPPORTED_DTYPES: tuple[np.dtype, ...] = tuple(
    np.dtype(t)
    for t in (np.bool_, np.uint8, np.uint16, np.uint32, np.int16, np.int32, np.float32, np.float64)
)


def neutral(dtype: np.dtype, operation: str) -> bool | int | float:
    """The value that never wins: the dtype's largest for ``"erode"``, smallest for ``"dilate"``.

    Parameters
    ----------
    dtype : numpy dtype
        One of :data:`SUPPORTED_DTYPES`.
    operation : {"erode", "dilate"}

    Returns
    -------
    bool, int or float
        True / False for bool, ``iinfo.max`` / ``iinfo.min`` for integers,
        +inf / -inf for floats.
    """
    dtype = np.dtype(dtype)
    if operation not in ("erode", "dilate"):
        raise ValueError(f"operation must be 'erode' or 'dilate' (got {operation!r})")
    low = operation == "dilate"
    if dtype == np.bool_:
        return not low
    if np.issubdtype(dtype, np.integer):
        info = np.iinfo(dtype)
        return int(info.min if low else info.max)
    return float("-inf" if low else "inf")


def _check(image: np.ndarray, footprint: np.ndarray) -> None:
    if not isinstance(image, np.ndarray):
        raise ValueError(f"expected a numpy array (got {type(image).__name__})")
    if image.dtype not in SUPPORTED_DTYPES:
        names = ", ".join(str(d) for d in SUPPORTED_DTYPES)
        raise ValueError(f"cannot erode or dilate data of dtype {image.dtype}; use one of {names}")
    if image.size == 0:
        raise ValueError(f"the data is empty (shape {image.shape})")
    fp = np.asarray(footprint)
    if fp.dtype != np.bool_:
        raise ValueError(f"a footprint must be a bool array (got {fp.dtype})")
    if fp.ndim != image.ndim:
        raise ValueError(
            f"the footprint has {fp.ndim} axes but the data has {image.ndim} (shape {image.shape})"
        )
    if any(n % 2 == 0 for n in fp.shape):
        raise ValueError(f"a footprint needs an odd size along every axis (got {fp.shape})")
    if not fp[tuple(n // 2 for n in fp.shape)]:
        raise ValueError("a footprint must hold its centre")


def _working_copy(image: np.ndarray) -> np.ndarray:
    """The data as the kernels compute on it: bool as 0/1 uint8, floats without -0.0."""
    if image.dtype == np.bool_:
        return image.view(np.uint8)
    if image.dtype.kind == "f":
        # -0.0 + 0.0 is +0.0; every other finite value is unchanged
        positive_zero: np.ndarray = image + image.dtype.type(0)
        return positive_zero
    return image


def _restore(result: np.ndarray, dtype: np.dtype) -> np.ndarray:
    if dtype == np.bool_:
        return result.view(np.bool_)
    return result


def _cval(dtype: np.dtype, operation: str) -> int | float:
    # bool is computed as uint8 0/1, so its neutral values are 1 and 0
    return int(neutral(dtype, operation)) if dtype == np.bool_ else neutral(dtype, operation)


# --------------------------------------------------------------------------- reference


def _reference(image: np.ndarray, offsets: np.ndarray, operation: str) -> np.ndarray:
    """min (erode) or max (dilate) of ``image[x + o]`` over the offsets ``o``; outside ignored."""
    work = _working_copy(image)
    cval = _cval(image.dtype, operation)
    reach = np.abs(offsets).max(axis=0)
    padded = np.pad(work, [(int(r), int(r)) for r in reach], mode="constant", constant_values=cval)
    out = np.full(work.shape, cval, dtype=work.dtype)
    op = np.minimum if operation == "erode" else np.maximum
    for offset in offsets:
        window = tuple(
            slice(int(r + o), int(r + o) + n)
            for r, o, n in zip(reach, offset, work.shape, strict=False)
        )
        op(out, padded[window], out=out)
    return _restore(out, image.dtype)


def _offsets(footprint: np.ndarray) -> np.ndarray:
    centre = np.array([n // 2 for n in footprint.shape])
    offsets: np.ndarray = np.argwhere(footprint) - centre
    return offsets


def erode_reference(image: np.ndarray, footprint: np.ndarray) -> np.ndarray:
    """Flat erosion by the plain definition: ``min_{b in B} f(x + b)``, outside ignored.

    Parameters
    ----------
    image : ndarray
        2-D or 3-D, one of :data:`SUPPORTED_DTYPES`, finite.
    footprint : ndarray of bool
        Same number of axes, odd sizes, holding its centre.

    Returns
    -------
    ndarray
        Same shape and dtype as ``image``.
    """
    _check(image, footprint)
    return _reference(image, _offsets(np.asarray(footprint)), "erode")


def dilate_reference(image: np.ndarray, footprint: np.ndarray) -> np.ndarray:
    """Flat dilation by the plain definition: ``max_{b in B} f(x - b)``, outside ignored.

    Parameters
    ----------
    image : ndarray
        2-D or 3-D, one of :data:`SUPPORTED_DTYPES`, finite.
    footprint : ndarray of bool
        Same number of axes, odd sizes, holding its centre.

    Returns
    -------
    ndarray
        Same shape and dtype as ``image``.
    """
    _check(image, footprint)
    return _reference(image, -_offsets(np.asarray(footprint)), "dilate")


# --------------------------------------------------------------------------- fast


def chords(footprint: np.ndarray) -> list[tuple[tuple[int, ...], int, int]]:
    """The footprint as runs of consecutive True pixels along its last axis.

    Parameters
    ----------
    footprint : ndarray of bool
        Odd sizes, centred on its middle element.

    Returns
    -------
    list of (lead, start, length)
        ``lead``: offsets along the leading axes from the centre; ``start``:
        offset of the run's first pixel along the last axis; ``length``: number
        of pixels in the run. Their union is exactly the footprint.
    """
    fp = np.asarray(footprint, dtype=bool)
    centre = [n // 2 for n in fp.shape]
    runs = []
    for lead in np.ndindex(fp.shape[:-1]):
        row = np.concatenate(([False], fp[lead], [False])).astype(np.int8)
        edges = np.diff(row)
        starts = np.flatnonzero(edges == 1)
        ends = np.flatnonzero(edges == -1)
        rel = tuple(int(i - c) for i, c in zip(lead, centre[:-1], strict=False))
        for s, e in zip(starts, ends, strict=False):
            runs.append((rel, int(s) - centre[-1], int(e - s)))
    return runs


def _accumulate(
    out: np.ndarray, g: np.ndarray, offset: tuple[int, ...], op: Callable[..., np.ndarray]
) -> None:
    """``out[x] = op(out[x], g[x + offset])`` wherever ``x + offset`` lies inside ``g``."""
    dst, src = [], []
    for o, n_out, n_g in zip(offset, out.shape, g.shape, strict=False):
        lo, hi = max(0, -o), min(n_out, n_g - o)
        if hi <= lo:
            return  # that shift reaches no pixel: outside values are ignored
        dst.append(slice(lo, hi))
        src.append(slice(lo + o, hi + o))
    view = out[tuple(dst)]
    op(view, g[tuple(src)], out=view)


def _fast(image: np.ndarray, footprint: np.ndarray, operation: str) -> np.ndarray:
    """min (erode) or max (dilate) of ``image[x + b]`` over ``b`` in ``footprint``."""
    work = _working_copy(image)
    cval = _cval(image.dtype, operation)
    op = np.minimum if operation == "erode" else np.maximum
    filt = ndi.minimum_filter1d if operation == "erode" else ndi.maximum_filter1d

    if footprint.all():
        # a box is separable; odd sizes make scipy's default centring exact
        out = work
        for axis, n in enumerate(footprint.shape):
            if n > 1:
                out = filt(out, n, axis=axis, mode="constant", cval=cval)
        return _restore(out.copy() if out is work else out, image.dtype)

    runs = chords(footprint)
    by_length: dict[int, list[tuple[int, ...]]] = defaultdict(list)
    for lead, start, length in runs:
        by_length[length].append((*lead, start))
    # a chord may start left of the frame and still reach into the image, so the
    # table of chord minima starts ``pad`` pixels before the first column
    pad = max(0, -min(start for _, start, _ in runs))
    if pad:
        widths = [(0, 0)] * (work.ndim - 1) + [(pad, 0)]
        table_in = np.pad(work, widths, mode="constant", constant_values=cval)
    else:
        table_in = work
    width = table_in.shape[-1]

    out = np.full(work.shape, cval, dtype=work.dtype)
    table: np.ndarray | None = None  # table[.., j] = extremum of table_in[.., j : j + have]
    have = 0
    for length in sorted(by_length):
        if table is not None and length <= 2 * have:
            # [j, j + length) is the union of [j, j + have) and [j + step, j + step + have)
            step = length - have
            if step < width:
                op(table[..., : width - step], table[..., step:], out=table[..., : width - step])
        elif length == 1:
            table = table_in.copy()
        else:
            table = filt(
                table_in, length, axis=-1, mode="constant", cval=cval, origin=-(length // 2)
            )
        have = length
        for offset in by_length[length]:
            shifted = (*offset[:-1], offset[-1] + pad)
            _accumulate(out, table, shifted, op)
    return _restore(out, image.dtype)


def _numba(
    image: np.ndarray, footprint: np.ndarray, operation: str, box: bool, strip: int | None = None
) -> np.ndarray:
    """The compiled kernels of :mod:`lotproof.steps._morph_numba`; ``strip`` overrides the chord strip."""
    from lotproof.steps import _morph_numba as nb

    work = np.ascontiguousarray(image)
    if work.dtype == np.bool_:
        work = work.view(np.uint8)
    cval = work.dtype.type(_cval(image.dtype, operation))
    mode = 0 if operation == "erode" else 1
    normalize = work.dtype.kind == "f"
    out = np.empty(work.shape, dtype=work.dtype)
    if box:
        if work.ndim == 2:
            nb.box_kernel(work, footprint.shape[1], footprint.shape[0], mode, cval, normalize, out)
        else:
            depth, height, width = footprint.shape
            for z in range(work.shape[0]):
                nb.box_kernel(work[z], width, height, mode, cval, normalize, out[z])
            if depth > 1:
                planes = out.reshape(work.shape[0], -1)
                # the planes are already free of -0.0; the second pass reads its own output
                nb.box_kernel(planes.copy(), 1, depth, mode, cval, False, planes)
        return _restore(out, image.dtype)
    runs = chords(footprint)
    lengths = sorted({length for _, _, length in runs})
    index = {length: i for i, length in enumerate(lengths)}
    leads = np.array([lead for lead, _, _ in runs], dtype=np.int64).reshape(len(runs), -1)
    if work.ndim == 2:
        dz, dy = np.zeros(len(runs), dtype=np.int64), leads[:, 0]
        ny = work.shape[0]
    else:
        dz, dy = leads[:, 0], leads[:, 1]
        ny = work.shape[1]
    start = np.array([s for _, s, _ in runs], dtype=np.int64)
    which = np.array([index[length] for _, _, length in runs], dtype=np.int64)
    # chords with the same length and start read the same table slice: pair them
    partner = np.full(len(runs), -1, dtype=np.int64)
    waiting: dict[tuple[int, int], int] = {}
    for c, (_, s, length) in enumerate(runs):
        key = (length, s)
        if key in waiting:
            partner[waiting.pop(key)] = c
            partner[c] = -2
        else:
            waiting[key] = c
    padl = max(0, -int(start.min()))
    padr = max(0, max(s + length - 1 for _, s, length in runs))
    nb.chord_kernel(
        work.reshape(-1, work.shape[-1]),
        ny,
        np.ascontiguousarray(dz),
        np.ascontiguousarray(dy),
        start,
        which,
        partner,
        np.array(lengths, dtype=np.int64),
        padl,
        padr,
        mode,
        cval,
        normalize,
        _strip(work, footprint, len(lengths)) if strip is None else strip,
        out.reshape(-1, work.shape[-1]),
    )
    return _restore(out, image.dtype)


def _stencil(
    image: np.ndarray, footprint: np.ndarray, operation: str, box: bool = False
) -> np.ndarray:
    """The fused kernels :func:`lotproof.steps._morph_numba.stencil_kernel` and ``box_stencil_kernel``."""
    from lotproof.steps import _morph_numba as nb

    if image.ndim != 2:
        name = "numba-box-fused" if box else "numba-stencil"
        raise ValueError(f"method {name!r} works on 2-D data only")
    work = np.ascontiguousarray(image)
    if work.dtype == np.bool_:
        work = work.view(np.uint8)
    cval = work.dtype.type(_cval(image.dtype, operation))
    out = np.empty(work.shape, dtype=work.dtype)
    if box:
        height, width = footprint.shape
        nb.box_stencil_kernel(
            work,
            width,
            height,
            0 if operation == "erode" else 1,
            cval,
            work.dtype.kind == "f",
            out,
        )
        return _restore(out, image.dtype)
    offsets = _offsets(footprint)
    nb.stencil_kernel(
        work,
        np.ascontiguousarray(offsets[:, 0]),
        np.ascontiguousarray(offsets[:, 1]),
        0 if operation == "erode" else 1,
        cval,
        work.dtype.kind == "f",
        out,
    )
    return _restore(out, image.dtype)


#: Bytes of first-level data cache the chord kernel aims to stay within.
_CACHE_BYTES = 256 * 1024


def _strip(work: np.ndarray, footprint: np.ndarray, n_lengths: int) -> int:
    """Column strip width for the chord kernel: its busy rows fit the cache, in whole vectors."""
    # output rows between the first and the last chord reaching them, plus the tables
    rows = footprint.shape[-2] + n_lengths + 4
    if work.ndim == 3:
        rows += (footprint.shape[0] - 1) * work.shape[1]
    strip = _CACHE_BYTES // (rows * work.itemsize)
    return int(min(work.shape[-1], max(64, strip - strip % 64)))


def choose_method(image: np.ndarray, footprint: np.ndarray) -> str:
    """The kernel :func:`erode` and :func:`dilate` use for ``method="auto"``.

    Parameters
    ----------
    image : ndarray
        The data (only its dtype and shape matter).
    footprint : ndarray of bool

    Returns
    -------
    str
        ``"numba-box-fused"`` for a 2-D full box with both sides within
        :data:`FUSED_BOX_SIDES`, ``"numba-box"`` for any other full box
        (square, rectangle, cube, axis-aligned line); ``"numba-stencil"`` for any other 2-D footprint of at most
        :data:`STENCIL_MAX_PIXELS` pixels (one or two fused passes per row);
        ``"numba-chords"`` for every other footprint. Each is the fastest
        measured on the cases of ``bench/bench_kernels.py`` it is chosen for.
    """
    fp = np.asarray(footprint)
    if fp.all():
        low, high = FUSED_BOX_SIDES
        if fp.ndim == 2 and all(low <= n <= high for n in fp.shape):
            return "numba-box-fused"
        return "numba-box"
    if fp.ndim == 2 and int(fp.sum()) <= STENCIL_MAX_PIXELS:
        return "numba-stencil"
    return "numba-chords"


def _dispatch(image: np.ndarray, footprint: np.ndarray, operation: str, method: str) -> np.ndarray:
    if method == "auto":
        method = choose_method(image, footprint)
    if method == "reference":
        offsets = _offsets(footprint)
        return _reference(image, offsets if operation == "erode" else -offsets, operation)
    if operation == "dilate":
        # max f(x - b) over B is max f(x + b) over the reflected footprint
        footprint = footprint[(slice(None, None, -1),) * footprint.ndim]
    if method == "scipy-chords":
        return _fast(image, footprint, operation)
    if method == "numba-chords":
        return _numba(image, footprint, operation, box=False)
    if method == "numba-stencil":
        return _stencil(image, footprint, operation)
    if method == "numba-box-fused":
        if not footprint.all():
            raise ValueError("method 'numba-box-fused' needs a footprint that is a full box")
        return _stencil(image, footprint, operation, box=True)
    if method == "numba-box":
        if not footprint.all():
            raise ValueError("method 'numba-box' needs a footprint that is a full box")
        return _numba(image, footprint, operation, box=True)
    raise ValueError(f"unknown method {method!r}; use one of {', '.join(METHODS)}")


def erode(image: np.ndarray, footprint: np.ndarray, *, method: str = "auto") -> np.ndarray:
    """Flat erosion ``min_{b in B} f(x + b)``, outside ignored; equal to :func:`erode_reference`.

    Parameters
    ----------
    image : ndarray
        2-D or 3-D, one of :data:`SUPPORTED_DTYPES`, finite.
    footprint : ndarray of bool
        Same number of axes, odd sizes, holding its centre.
    method : str
        One of :data:`METHODS`: ``"auto"`` (default, :func:`choose_method`),
        or a kernel forced by name, so tests can check each one.

    Returns
    -------
    ndarray
        Same shape and dtype as ``image``, a new array.

    Notes
    -----
    Full boxes are separable: a running minimum along the rows, then along
    the columns (and planes) by the van Herk / Gil-Werman algorithm. Small 2-D
    footprints are one fused pass per row: each output pixel is the minimum
    of the input pixels at the footprint's offsets. Other footprints are decomposed into chords along the last axis (a running
    minimum per distinct chord length, shifted into place for each chord),
    the chord method of Urbach & Wilkinson. Every method gives the same bits.

    References
    ----------
    .. [1] E. R. Urbach and M. H. F. Wilkinson, "Efficient 2-D grayscale
       morphological transformations with arbitrary flat structuring
       elements", IEEE Transactions on Image Processing 17(1), 1-8, 2008.
       https://doi.org/10.1109/TIP.2007.912582
    .. [2] M. van Herk, "A fast algorithm for local minimum and maximum
       filters on rectangular and octagonal kernels", Pattern Recognition
       Letters 13(7), 517-521, 1992. https://doi.org/10.1016/0167-8655(92)90069-C
    .. [3] J. Gil and M. Werman, "Computing 2-D min, median, and max
       filters", IEEE Transactions on Pattern Analysis and Machine
       Intelligence 15(5), 504-507, 1993. https://doi.org/10.1109/34.211471
    """
    _check(image, footprint)
    return _dispatch(image, np.asarray(footprint), "erode", method)


def dilate(image: np.ndarray, footprint: np.ndarray, *, method: str = "auto") -> np.ndarray:
    """Flat dilation ``max_{b in B} f(x - b)``, outside ignored; equal to :func:`dilate_reference`.

    Parameters
    ----------
    image : ndarray
        2-D or 3-D, one of :data:`SUPPORTED_DTYPES`, finite.
    footprint : ndarray of bool
        Same number of axes, odd sizes, holding its centre.
    method : str
        One of :data:`METHODS`; see :func:`erode`.

    Returns
    -------
    ndarray
        Same shape and dtype as ``image``, a new array.

    Notes
    -----
    The maximum over the reflected footprint, by the same kernels as
    :func:`erode`.
    """
    _check(image, footprint)
    return _dispatch(image, np.asarray(footprint), "dilate", method)
