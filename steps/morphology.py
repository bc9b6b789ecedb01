"""Flat morphology: erode, widen, open, close, outline, subtract-background.

Every step here slides a footprint (``lotproof.steps.footprints``) over a gray image or a
mask. Gray images take the min / max over the footprint; masks take the binary
erosion / dilation, which is the same thing for True > False.

Border rule: pixels outside the image are ignored. Erosion and dilation take
the min / max over the part of the footprint that lies inside the image; a
pixel near the frame is not eroded merely because it is near the frame. This
keeps erosion and dilation dual under complement everywhere, frame included:
``erode(~m) == ~widen(m)``, and for 8-bit images ``erode(255 - f) == 255 - widen(f)``.

The output has the dtype of the input. Gray images must be finite (the loader
refuses NaN and infinities); float ``-0.0`` is read as ``+0.0``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Literal

import numpy as np
from pydantic import Field

from lotproof.steps import _morph
from lotproof.steps._registry import step
from lotproof.steps.footprints import MorphologyParams, build_footprint

__all__ = [
    "FEATURES",
    "OUTLINE_MODES",
    "BackgroundParams",
    "MorphologyParams",
    "OutlineParams",
    "close",
    "erode",
    "open_",
    "outline",
    "subtract_background",
    "widen",
]

#: ``outline`` modes: full = widen - erode, inner = image - erode, outer = widen - image.
OUTLINE_MODES: tuple[str, ...] = ("full", "inner", "outer")

#: What ``subtract-background`` keeps: bright features on a darker background, or dark on bright.
FEATURES: tuple[str, ...] = ("bright", "dark")

_LIBRARIES = ("numpy", "scipy", "numba")


class OutlineParams(MorphologyParams):
    """A footprint, its size and which side of the edge to keep."""

    mode: Literal[OUTLINE_MODES] = Field(  # type: ignore[valid-type]
        "full",
        description="full: widen - erode (both sides of an edge); inner: image - erode "
        "(inside the features); outer: widen - image (just outside them)",
    )


class BackgroundParams(MorphologyParams):
    """A footprint larger than the features, its size, and whether features are bright or dark."""

    features: Literal[FEATURES] = Field(  # type: ignore[valid-type]
        description="bright: features brighter than the background (image - opening); "
        "dark: features darker than the background (closing - image). No default: a "
        "recipe must say which",
    )


def _check_data(data: np.ndarray, *, gray_only: bool = False) -> None:
    if not isinstance(data, np.ndarray):
        raise ValueError(f"expected an image or a mask (got {type(data).__name__})")
    if data.ndim not in (2, 3):
        raise ValueError(f"expected 2-D or 3-D data (got {data.ndim} axes, shape {data.shape})")
    if gray_only and data.dtype == np.bool_:
        raise ValueError("needs a gray image, not a mask")
    if data.dtype not in _morph.SUPPORTED_DTYPES:
        names = ", ".join(str(d) for d in _morph.SUPPORTED_DTYPES)
        raise ValueError(f"cannot process data of dtype {data.dtype}; use one of {names}")


def _footprint(params: MorphologyParams, data: np.ndarray) -> np.ndarray:
    return build_footprint(params, data.ndim, data.shape)


def _difference(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a - b`` for ``a >= b`` elementwise, in the dtype of ``a``; refuses to wrap around."""
    if a.dtype.kind == "i":
        # a signed difference can exceed the dtype (int32 from -2e9 to 2e9)
        wide = a.astype(np.int64) - b.astype(np.int64)
        top = np.iinfo(a.dtype).max
        if wide.size and int(wide.max()) > top:
            raise ValueError(
                f"the difference reaches {int(wide.max())}, more than {a.dtype} can hold ({top})"
            )
        return wide.astype(a.dtype)
    # unsigned: a >= b so nothing wraps; float: finite inputs
    difference: np.ndarray = a - b
    return difference


def _single_pixel(effect: str) -> Callable[[Any, int], str | None]:
    """A ``degenerate`` rule: a footprint of one pixel (or none) makes the step ``effect``."""

    def rule(params: Any, ndim: int) -> str | None:
        try:
            pixels = int(build_footprint(params, ndim).sum())
        except ValueError:
            return None  # a footprint that does not fit the data: reported where it is built
        if pixels > 1:
            return None
        return (
            f"the {params.footprint} footprint ({_size_text(params)}) is a single pixel, so "
            f"this step {effect}; give a footprint larger than one pixel"
        )

    return rule


def _size_text(params: Any) -> str:
    sizes = [
        f"{name} {getattr(params, name)}"
        for name in ("radius", "size", "width", "height", "length")
        if getattr(params, name, None) is not None
    ]
    return ", ".join(sizes) or "no size"


def _open(data: np.ndarray, footprint: np.ndarray) -> np.ndarray:
    return _morph.dilate(_morph.erode(data, footprint), footprint)


def _close(data: np.ndarray, footprint: np.ndarray) -> np.ndarray:
    return _morph.erode(_morph.dilate(data, footprint), footprint)


@step(
    "erode",
    params=MorphologyParams,
    takes=[("image", "mask")],
    gives="same",
    version="1",
    ndims=(2, 3),
    libraries=_LIBRARIES,
    degenerate=_single_pixel("changes nothing"),
)
def erode(params: MorphologyParams, data: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Erosion: the minimum over the footprint (shrinks bright regions and masks).

    Each output pixel is the smallest input value under the footprint centred
    on it; for a mask, a pixel stays True only if the whole footprint (the part
    inside the image) is True.

    Parameters
    ----------
    params : MorphologyParams
        ``footprint`` and its size in pixels.
    data : ndarray
        Gray image (uint8, uint16, uint32, int16, int32, float32, float64;
        finite) or mask (bool), 2-D or 3-D.
    spacing : tuple of float
        Pixel size per axis in um (unused: sizes arrive in pixels).

    Returns
    -------
    ndarray
        Same shape and dtype as ``data``.

    Notes
    -----
    ``(f ⊖ B)(x) = min { f(x + b) : b in B, x + b inside the image }``.

    References
    ----------
    .. [1] J. Serra, *Image Analysis and Mathematical Morphology*, Academic
       Press, 1982.
    """
    _check_data(data)
    return _morph.erode(data, _footprint(params, data))


@step(
    "widen",
    params=MorphologyParams,
    takes=[("image", "mask")],
    gives="same",
    version="1",
    ndims=(2, 3),
    libraries=_LIBRARIES,
    degenerate=_single_pixel("changes nothing"),
)
def widen(params: MorphologyParams, data: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Dilation: the maximum over the footprint (grows bright regions and masks).

    Each output pixel is the largest input value under the footprint centred
    on it; for a mask, a pixel becomes True if any pixel under the footprint
    is True.

    Parameters
    ----------
    params : MorphologyParams
        ``footprint`` and its size in pixels.
    data : ndarray
        Gray image (finite) or mask, 2-D or 3-D.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray
        Same shape and dtype as ``data``.

    Notes
    -----
    ``(f ⊕ B)(x) = max { f(x - b) : b in B, x - b inside the image }``; the
    footprints are symmetric, so ``x - b`` and ``x + b`` cover the same pixels.

    References
    ----------
    .. [1] J. Serra, *Image Analysis and Mathematical Morphology*, Academic
       Press, 1982.
    """
    _check_data(data)
    return _morph.dilate(data, _footprint(params, data))


@step(
    "open",
    params=MorphologyParams,
    takes=[("image", "mask")],
    gives="same",
    version="1",
    ndims=(2, 3),
    libraries=_LIBRARIES,
    degenerate=_single_pixel("changes nothing"),
)
def open_(params: MorphologyParams, data: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Opening: erode, then widen by the same footprint (removes bright specks smaller than it).

    Bright details (or mask parts) into which the footprint does not fit are
    removed; everything the footprint fits into is kept unchanged. The result
    is never brighter than the input, and opening twice changes nothing more.

    Parameters
    ----------
    params : MorphologyParams
        ``footprint`` and its size in pixels.
    data : ndarray
        Gray image (finite) or mask, 2-D or 3-D.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray
        Same shape and dtype as ``data``.

    Notes
    -----
    ``f ∘ B = (f ⊖ B) ⊕ B``; ``f ∘ B <= f`` and ``(f ∘ B) ∘ B = f ∘ B``.

    References
    ----------
    .. [1] J. Serra, *Image Analysis and Mathematical Morphology*, Academic
       Press, 1982.
    """
    _check_data(data)
    return _open(data, _footprint(params, data))


@step(
    "close",
    params=MorphologyParams,
    takes=[("image", "mask")],
    gives="same",
    version="1",
    ndims=(2, 3),
    libraries=_LIBRARIES,
    degenerate=_single_pixel("changes nothing"),
)
def close(params: MorphologyParams, data: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Closing: widen, then erode by the same footprint (fills dark gaps smaller than it).

    Dark details (or holes and gaps of a mask) into which the footprint does
    not fit are filled; the result is never darker than the input.

    Parameters
    ----------
    params : MorphologyParams
        ``footprint`` and its size in pixels.
    data : ndarray
        Gray image (finite) or mask, 2-D or 3-D.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray
        Same shape and dtype as ``data``.

    Notes
    -----
    ``f • B = (f ⊕ B) ⊖ B``; ``f • B >= f`` and ``(f • B) • B = f • B``.

    References
    ----------
    .. [1] J. Serra, *Image Analysis and Mathematical Morphology*, Academic
       Press, 1982.
    """
    _check_data(data)
    return _close(data, _footprint(params, data))


@step(
    "outline",
    params=OutlineParams,
    takes=[("image", "mask")],
    gives="same",
    version="1",
    ndims=(2, 3),
    libraries=_LIBRARIES,
    degenerate=_single_pixel("gives zero (or nothing) everywhere"),
)
def outline(params: OutlineParams, data: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Morphological gradient: widen - erode, or one half of it (``mode``).

    Gray images: ``full`` = widen - erode, ``inner`` = image - erode,
    ``outer`` = widen - image; each is >= 0, so the input dtype holds it.
    Masks: ``full`` = dilation and not erosion, ``inner`` = mask and not
    erosion (the mask's own boundary pixels), ``outer`` = dilation and not mask
    (the background pixels touching the mask).

    Parameters
    ----------
    params : OutlineParams
        ``footprint``, its size in pixels, and ``mode`` (full, inner, outer).
    data : ndarray
        Gray image (finite) or mask, 2-D or 3-D.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray
        Same shape and dtype as ``data``.

    Raises
    ------
    ValueError
        A signed-integer difference that the dtype cannot hold (an int32 image
        spanning more than 2**31 - 1 under one footprint).

    Notes
    -----
    ``full = (f ⊕ B) - (f ⊖ B)``, ``inner = f - (f ⊖ B)``, ``outer = (f ⊕ B) - f``.

    References
    ----------
    .. [1] J.-F. Rivest, P. Soille and S. Beucher, "Morphological gradients",
       Journal of Electronic Imaging 2(4), 326-336, 1993.
    """
    _check_data(data)
    footprint = _footprint(params, data)
    mode = params.mode
    low = _morph.erode(data, footprint) if mode in ("full", "inner") else data
    high = _morph.dilate(data, footprint) if mode in ("full", "outer") else data
    if data.dtype == np.bool_:
        edge: np.ndarray = high & ~low
        return edge
    return _difference(high, low)


@step(
    "subtract-background",
    params=BackgroundParams,
    takes=["image"],
    gives="image",
    version="1",
    ndims=(2, 3),
    libraries=_LIBRARIES,
    degenerate=_single_pixel(
        "gives zero everywhere: the background it removes is the image itself"
    ),
)
def subtract_background(
    params: BackgroundParams, image: np.ndarray, *, spacing: tuple[float, ...]
) -> np.ndarray:
    """Top-hat: remove a background that varies more slowly than the footprint is wide.

    ``features: bright`` keeps bright features on a darker, uneven background
    (image - opening, the white top-hat); ``features: dark`` keeps dark
    features such as pores on a brighter background (closing - image, the
    black top-hat), which turns them bright. Choose a footprint that does not
    fit inside the features but fits inside the background's slow variations.

    Parameters
    ----------
    params : BackgroundParams
        ``footprint``, its size in pixels, and ``features`` (bright or dark).
    image : ndarray
        Gray image (not a mask), finite, 2-D or 3-D.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray
        Same shape and dtype as ``image``; every value >= 0 (both differences
        are non-negative, so an unsigned dtype holds them).

    Raises
    ------
    ValueError
        For a mask, or a signed-integer difference the dtype cannot hold.

    Notes
    -----
    bright: ``f - (f ∘ B)``; dark: ``(f • B) - f``.

    References
    ----------
    .. [1] J. Serra, *Image Analysis and Mathematical Morphology*, Academic
       Press, 1982 (the top-hat transform).
    .. [2] P. Soille, *Morphological Image Analysis: Principles and
       Applications*, 2nd ed., Springer, 2003, section 4.4 (top-hats).
    """
    _check_data(image, gray_only=True)
    footprint = _footprint(params, image)
    if params.features == "bright":
        return _difference(image, _open(image, footprint))
    return _difference(_close(image, footprint), image)
