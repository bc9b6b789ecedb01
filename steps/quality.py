"""Acquisition quality: the ``image-quality`` step kind.

Before a number is measured on an image, the picture itself can be judged:
is it clipped at either end of the camera's range, does it use the range, how
noisy is it, is it in focus, is it evenly lit. ``image-quality`` gives one
value for each, so that acceptance limits can refuse an image (or a lot) whose
acquisition was faulty before any measurement on it is believed.

The stated range
----------------
Clipping and range use are fractions of the range the image is stored in:

* an integer image: its dtype's range (``uint8``: 0..255, ``uint16``:
  0..65535, ``int16``: -32768..32767), or ``0 .. 2**bit_depth - 1`` when the
  recipe states the camera's ``bit_depth`` (a 12-bit camera writing
  ``uint16`` files: 0..4095);
* a float image: ``0 .. 1``, or ``0 .. 2**bit_depth - 1`` with ``bit_depth``.

A pixel outside the stated range is refused (a ``ValueError`` naming the
value): it means the bit depth is wrong or the image was rescaled, and a
fraction of a wrong range would be a wrong figure. ``bit_depth`` larger than
the dtype holds is refused too.

Degenerate inputs
-----------------
A constant image: no noise (``noise_sigma`` 0), no structure (``sharpness``
0), ``used_range`` 0, ``illumination_ratio`` 1 (0 / 0 is NaN: an image that is
0 everywhere has no light to compare). An image smaller than 3 x 3 pixels
(per slice) is refused: the noise and focus operators need a 3 x 3
neighbourhood. NaN and infinite values are refused; so are integer values
beyond 2**53 (not all exact in float64).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from types import MappingProxyType

import numpy as np
from pydantic import Field

from lotproof.steps._data import Output, Table
from lotproof.steps._registry import StepParams, step

__all__ = [
    "FLOAT_RANGE",
    "QUALITY_DEFINITIONS",
    "QUALITY_VALUES",
    "RANGE_PERCENTILES",
    "ImageQualityParams",
    "block_edges",
    "image_quality",
    "immerkaer_sigma",
    "order_statistics",
    "stated_range",
]

#: Values of ``image-quality``: name -> unit. Gray levels are given as ``"-"``,
#: as ``threshold``'s ``level`` is, so that a limit writes ``max: 20``.
QUALITY_VALUES: Mapping[str, str] = MappingProxyType(
    {
        "saturated_fraction": "-",
        "dark_clipped_fraction": "-",
        "used_range": "-",
        "noise_sigma": "-",
        "sharpness": "-",
        "illumination_ratio": "-",
    }
)

#: One-line definition of each value (``lotproof steps image-quality``).
QUALITY_DEFINITIONS: Mapping[str, str] = MappingProxyType(
    {
        "saturated_fraction": "fraction of pixels at the top of the stated range (dtype range, "
        "2**bit_depth - 1, or 1 for float images)",
        "dark_clipped_fraction": "fraction of pixels at the bottom of the stated range (0, or "
        "the dtype's minimum for signed integers)",
        "used_range": "(99.9th - 0.1th percentile) / (top - bottom of the stated range); "
        "percentiles are order statistics x_(ceil(n p)) (Hyndman & Fan 1996, definition 1)",
        "noise_sigma": "standard deviation of the noise in gray levels, Immerkær's fast "
        "estimate (CVIU 1996, doi:10.1006/cviu.1996.0060); volumes: over every slice",
        "sharpness": "variance of the 4-neighbour Laplacian / variance of the image (focus "
        "measure LAPV of Pertuz et al. 2013, doi:10.1016/j.patcog.2012.11.011, normalised); "
        "relative: compare like with like",
        "illumination_ratio": "smallest / largest mean of the blocks of a grid of blocks x "
        "blocks (x blocks in 3-D): 1 is even lighting",
    }
)

#: The percentiles ``used_range`` spans, as exact fractions (numerator, denominator).
RANGE_PERCENTILES: tuple[tuple[int, int], tuple[int, int]] = ((1, 1000), (999, 1000))

#: The stated range of a float image without ``bit_depth``.
FLOAT_RANGE: tuple[float, float] = (0.0, 1.0)

# Integer gray values above this are not all exact in float64.
_EXACT_LIMIT = 2**53


class ImageQualityParams(StepParams):
    """Parameters of ``image-quality``."""

    bit_depth: int | None = Field(
        None,
        ge=1,
        le=32,
        description=(
            "bits the camera delivers (e.g. 12): the stated range is 0 .. 2**bit_depth - 1. "
            "Default: the dtype's range for integer images, 0 .. 1 for float images"
        ),
    )
    blocks: int = Field(
        8,
        ge=2,
        le=64,
        description=(
            "illumination_ratio: the image is cut into blocks x blocks near-equal blocks "
            "(blocks per axis, also along z in 3-D; fewer when an axis has fewer pixels) "
            "and the block means compared; default 8"
        ),
    )


# --------------------------------------------------------------------------- helpers


def stated_range(dtype: np.dtype, bit_depth: int | None) -> tuple[int, int] | tuple[float, float]:
    """The bottom and top of the range an image of ``dtype`` is stored in.

    Parameters
    ----------
    dtype : numpy dtype
        Integer or float.
    bit_depth : int or None
        The camera's bits, if the recipe states them.

    Returns
    -------
    (int, int) or (float, float)
        ``(0, 2**bit_depth - 1)`` with ``bit_depth``; otherwise the dtype's
        ``(min, max)`` for integers and :data:`FLOAT_RANGE` for floats.
        Integers for an integer dtype (exact even for 64-bit types).

    Raises
    ------
    ValueError
        For a ``bit_depth`` the integer dtype cannot hold, or a dtype that is
        neither integer nor float.
    """
    if dtype.kind not in "uif":
        raise ValueError(f"image-quality needs a numeric gray image, got dtype {dtype}")
    if dtype.kind in "ui":
        info = np.iinfo(dtype)
        if bit_depth is None:
            return int(info.min), int(info.max)
        holds = info.bits - (1 if dtype.kind == "i" else 0)
        if bit_depth > holds:
            raise ValueError(
                f"bit_depth is {bit_depth}, but a {dtype} image holds at most {holds} bits"
            )
        return 0, 2**bit_depth - 1
    if bit_depth is None:
        return FLOAT_RANGE
    return 0.0, float(2**bit_depth - 1)


def order_statistics(values: np.ndarray, fractions: Sequence[tuple[int, int]]) -> list[float]:
    """Quantiles ``p = numerator / denominator`` as order statistics, exactly.

    For each ``p`` the ``k``-th smallest value with ``k = max(1, ceil(n p))``
    (1-based): the inverse of the empirical distribution function,
    definition 1 of Hyndman & Fan (1996), what
    ``numpy.percentile(..., method="inverted_cdf")`` computes. ``k`` is
    computed in integers, so no rounding of ``n p`` can move it; each value
    is one of the image's own values. One partial sort serves every ``p``.
    """
    flat = values.reshape(-1)
    n = flat.size
    ranks = [max(1, -(-n * numerator // denominator)) - 1 for numerator, denominator in fractions]
    ordered = np.partition(flat, sorted(set(ranks)))
    return [float(ordered[k]) for k in ranks]


def _slices(image: np.ndarray) -> list[np.ndarray]:
    return [image] if image.ndim == 2 else list(image)


def _second_differences(plane: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(d2/dy2, d2/dx2) of a float64 plane at its interior pixels, kernel [1, -2, 1]."""
    d2y = plane[:-2, 1:-1] - 2.0 * plane[1:-1, 1:-1] + plane[2:, 1:-1]
    d2x = plane[1:-1, :-2] - 2.0 * plane[1:-1, 1:-1] + plane[1:-1, 2:]
    return d2y, d2x


def immerkaer_sigma(image: np.ndarray) -> float:
    """Immerkær's noise estimate of a 2-D image or of every slice of a volume, pooled.

    ``sigma = sqrt(pi / 2) / (6 (W - 2) (H - 2) Z) * sum |I * N|`` over the
    interior pixels of the ``Z`` slices (``Z = 1`` in 2-D), with
    ``N = [[1, -2, 1], [-2, 4, -2], [1, -2, 1]]``. Pooling the sums of equal
    slices is the mean of the slices' estimates.
    """
    total = 0.0
    count = 0
    for plane in _slices(image):
        data = plane.astype(np.float64, copy=False)
        # N is the outer product of [1, -2, 1] with itself: second difference
        # along x, then along y (integer-valued data stay exact).
        along_x = data[:, :-2] - 2.0 * data[:, 1:-1] + data[:, 2:]
        both = along_x[:-2] - 2.0 * along_x[1:-1] + along_x[2:]
        total += float(np.sum(np.abs(both)))
        count += both.size
    return math.sqrt(math.pi / 2.0) / 6.0 * total / count


def _pooled_variance(parts: list[tuple[int, float, float]]) -> float:
    """Population variance from ``(count, mean, sum of squared deviations)`` of disjoint parts.

    ``M2 = sum_i M2_i + sum_i n_i (mean_i - mean)^2`` (Chan, Golub & LeVeque's
    pairwise update, all parts at once): one slice in memory at a time.
    """
    n = sum(count for count, _, _ in parts)
    mean = math.fsum(count * m for count, m, _ in parts) / n
    spread = math.fsum(m2 for _, _, m2 in parts)
    spread += math.fsum(count * (m - mean) ** 2 for count, m, _ in parts)
    return spread / n


def _moments(values: np.ndarray) -> tuple[int, float, float]:
    data = values.astype(np.float64, copy=False)
    mean = float(np.mean(data))
    return data.size, mean, float(np.sum(np.square(data - mean)))


def _sharpness(image: np.ndarray) -> float:
    """var(Laplacian at the interior pixels of every slice) / var(image), population variances."""
    planes = _slices(image)
    variance = _pooled_variance([_moments(plane) for plane in planes])
    if variance == 0.0:
        return 0.0  # a constant image: no structure to be sharp
    laplacian = []
    for plane in planes:
        d2y, d2x = _second_differences(plane.astype(np.float64, copy=False))
        laplacian.append(_moments(d2y + d2x))
    return _pooled_variance(laplacian) / variance


def block_edges(size: int, blocks: int) -> list[int]:
    """Edges ``floor(i size / g)``, ``i = 0 .. g``, of ``g = min(blocks, size)`` near-equal blocks."""
    g = min(blocks, size)
    return [i * size // g for i in range(g + 1)]


def _illumination_ratio(image: np.ndarray, blocks: int) -> float:
    sums = image
    counts = np.ones((1,) * image.ndim)
    for axis in range(image.ndim):
        edges = block_edges(image.shape[axis], blocks)
        # float64 sums straight from the stored values: no float copy of a volume
        sums = np.add.reduceat(sums, edges[:-1], axis=axis, dtype=np.float64)
        shape = [1] * image.ndim
        shape[axis] = len(edges) - 1
        counts = counts * np.diff(edges).astype(np.float64).reshape(shape)
    means = sums / counts
    low, high = float(means.min()), float(means.max())
    if low < 0.0 or high <= 0.0:
        return math.nan  # not light: negative gray values, or none at all
    return low / high


# --------------------------------------------------------------------------- the step


@step(
    "image-quality",
    params=ImageQualityParams,
    takes=["image"],
    gives="values",
    version="1",
    values=QUALITY_VALUES,
    definitions=QUALITY_DEFINITIONS,
    ndims=(2, 3),
)
def image_quality(
    params: ImageQualityParams, image: np.ndarray, *, spacing: tuple[float, ...]
) -> Output:
    """Judge the picture: clipping, range used, noise, focus and evenness of lighting.

    Six values an acceptance limit can test before any measurement on the
    image is believed: how much of the image is clipped at the top and the
    bottom of its stated range (see the module documentation), how much of
    the range it uses, the standard deviation of its noise, how sharp it is,
    and how evenly it is lit. All are computed in float64 from the stored
    values; the same image always gives the same values.

    Parameters
    ----------
    params : ImageQualityParams
        ``bit_depth`` (bits, or None: the dtype's range, 0..1 for float
        images) and ``blocks`` (blocks per axis for ``illumination_ratio``).
    image : ndarray, 2D or 3D, integer or float
        The gray image as acquired (before background correction or
        smoothing, which change what is judged); all values finite and
        inside the stated range, at least 3 x 3 pixels per slice.
    spacing : tuple of float
        Pixel size per axis in um (unused: every value is per pixel).

    Returns
    -------
    Output
        ``data`` an empty :class:`~lotproof.steps._data.Table`; ``values``
        (all float, see :data:`QUALITY_DEFINITIONS`):

        * ``saturated_fraction``, ``dark_clipped_fraction``: fractions of
          all pixels (voxels) equal to the top / bottom of the stated range;
        * ``used_range``: ``(q(0.999) - q(0.001)) / (top - bottom)``;
        * ``noise_sigma``: gray levels;
        * ``sharpness``: dimensionless, 0 for a constant image;
        * ``illumination_ratio``: in (0, 1], NaN when a block mean is
          negative or every block mean is 0.

    Raises
    ------
    ValueError
        For a non-numeric or empty image, NaN or infinite values, integer
        values beyond 2**53, fewer than 3 x 3 pixels per slice, a
        ``bit_depth`` the dtype cannot hold, or values outside the stated
        range.

    Notes
    -----
    With ``n`` pixels ``I_i``, the stated range ``[lo, hi]`` and the order
    statistics ``x_(1) <= ... <= x_(n)``:

    * ``saturated_fraction = #{I_i >= hi} / n``,
      ``dark_clipped_fraction = #{I_i <= lo} / n`` (values outside the range
      are refused, so these count the pixels at its ends);
    * ``used_range = (x_(ceil(0.999 n)) - x_(max(1, ceil(0.001 n)))) / (hi - lo)``,
      the inverse empirical distribution function (Hyndman & Fan's
      definition 1), ``ceil`` taken in integers;
    * ``noise_sigma = sqrt(pi/2) / (6 Z (W-2)(H-2)) * sum |I * N|`` with
      ``N = [[1,-2,1],[-2,4,-2],[1,-2,1]]`` over the interior pixels of each
      of the ``Z`` slices (Immerkær 1996). ``N`` is the difference of two
      Laplacians, blind to any image that is linear along x or along y
      (planes, ramps); ``N`` applied to white noise of standard deviation
      ``s`` has standard deviation ``6 s``, and ``E|X| = sqrt(2/pi) 6 s``.
      Texture and edges add to the estimate (it is an upper bound on busy
      images); on a volume the slices' sums are pooled, which is the mean of
      the slices' estimates;
    * ``sharpness = var(L) / var(I)``, ``L = I(y-1,x) + I(y+1,x) + I(y,x-1)
      + I(y,x+1) - 4 I(y,x)`` at the interior pixels of each slice (in-plane
      on a volume, so that z spacing does not enter), both variances
      population variances (``ddof = 0``), the image's over all pixels. The
      variance of the Laplacian (LAPV) is among the best focus operators
      Pertuz et al. compared; dividing by the gray-level variance makes it
      blind to gain and offset (exposure), so that images of one kind of
      sample under one magnification can be compared. It lies in [0, 64]
      and white noise alone gives about 20: noise raises it;
    * ``illumination_ratio = min_b m_b / max_b m_b``, ``m_b`` the mean of
      block ``b`` of the grid whose edges along an axis of ``n`` pixels are
      ``floor(i n / g)``, ``i = 0 .. g``, ``g = min(blocks, n)``. The block
      means are a strong low-pass of the image (the shading a background
      step must remove). Objects enter the block means too: on a sample
      whose content differs much from block to block the ratio is lower
      than the lighting alone; judge lighting on a blank field or with a
      bound that allows for the content.

    References
    ----------
    .. [1] J. Immerkær, Fast noise variance estimation, Computer Vision and
       Image Understanding 64(2) (1996) 300-302, doi:10.1006/cviu.1996.0060.
    .. [2] S. Pertuz, D. Puig, M. A. Garcia, Analysis of focus measure
       operators for shape-from-focus, Pattern Recognition 46(5) (2013)
       1415-1432, doi:10.1016/j.patcog.2012.11.011.
    .. [3] R. J. Hyndman, Y. Fan, Sample quantiles in statistical packages,
       The American Statistician 50(4) (1996) 361-365,
       doi:10.1080/00031305.1996.10473566.
    .. [4] T. F. Chan, G. H. Golub, R. J. LeVeque, Algorithms for computing
       the sample variance: analysis and recommendations, The American
       Statistician 37(3) (1983) 242-247, doi:10.1080/00031305.1983.10483115.
    """
    low, high = stated_range(image.dtype, params.bit_depth)
    if image.size == 0:
        raise ValueError("image-quality got an empty image (no pixels)")
    if image.shape[-1] < 3 or image.shape[-2] < 3:
        raise ValueError(
            f"image-quality needs at least 3 x 3 pixels per slice (got shape {image.shape})"
        )
    if image.dtype.kind == "f" and not np.isfinite(image).all():
        raise ValueError("image has NaN or infinite values; image-quality needs finite values")
    smallest, largest = image.min(), image.max()
    if image.dtype.kind in "ui" and max(abs(int(smallest)), abs(int(largest))) > _EXACT_LIMIT:
        raise ValueError(
            f"integer image has values beyond 2**53 ({int(smallest)}..{int(largest)}); "
            "image-quality computes in float64 and cannot do so exactly"
        )
    if smallest < low or largest > high:
        found = f"the image has values {float(smallest):.6g}..{float(largest):.6g}"
        if params.bit_depth is not None:
            raise ValueError(
                f"{found}, outside the range {low:.6g}..{high:.6g} of bit_depth "
                f"{params.bit_depth}: the bit depth is wrong or the image was rescaled"
            )
        raise ValueError(
            f"{found}, outside the range 0..1 a float image without bit_depth is taken to "
            "lie in; state the camera's bit_depth (range 0 .. 2**bit_depth - 1)"
        )

    n = image.size
    q_low, q_high = order_statistics(image, RANGE_PERCENTILES)
    values = {
        "saturated_fraction": int(np.count_nonzero(image >= high)) / n,
        "dark_clipped_fraction": int(np.count_nonzero(image <= low)) / n,
        "used_range": (q_high - q_low) / (high - low),
        "noise_sigma": immerkaer_sigma(image),
        "sharpness": _sharpness(image),
        "illumination_ratio": _illumination_ratio(image, params.blocks),
    }
    return Output(data=Table(columns={}, units={}), values=values, units=dict(QUALITY_VALUES))
