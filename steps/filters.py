"""Gray-level filters: ``gray`` (colour to gray) and ``smooth`` (gaussian or median)."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, model_validator
from scipy import ndimage

from lotproof.steps._registry import StepParams, step
from lotproof.steps.footprints import ball, disk
from lotproof.steps.units import Length

__all__ = [
    "GAUSSIAN_TRUNCATE",
    "GRAY_WEIGHTS",
    "LUMA_WEIGHTS",
    "SMOOTH_METHODS",
    "SMOOTH_MODE",
    "GrayParams",
    "SmoothParams",
    "gray",
    "smooth",
]

#: Names of the fixed luma weight sets ``gray`` offers.
GRAY_WEIGHTS: tuple[str, ...] = ("bt601", "bt709")

#: Weights (red, green, blue) of each set: ITU-R BT.601 and ITU-R BT.709 luma.
LUMA_WEIGHTS: dict[str, tuple[float, float, float]] = {
    "bt601": (0.299, 0.587, 0.114),
    "bt709": (0.2126, 0.7152, 0.0722),
}

#: Smoothing methods.
SMOOTH_METHODS: tuple[str, ...] = ("gaussian", "median")

#: How ``smooth`` extends the image beyond its frame (scipy.ndimage mode name):
#: mirror about the pixel edge, ``d c b a | a b c d | d c b a``. Only values
#: that exist in the image are used, and a constant image stays constant.
SMOOTH_MODE = "reflect"

#: The gaussian kernel is cut at this many sigmas on each side.
GAUSSIAN_TRUNCATE = 4.0


class GrayParams(StepParams):
    """Parameters of ``gray``."""

    weights: Literal[GRAY_WEIGHTS] = Field(  # type: ignore[valid-type]
        "bt601",
        description=(
            "luma weights for red, green, blue: bt601 = 0.299, 0.587, 0.114 (ITU-R BT.601); "
            "bt709 = 0.2126, 0.7152, 0.0722 (ITU-R BT.709); applied to the stored values"
        ),
    )


@step(
    "gray",
    params=GrayParams,
    takes=["image"],
    gives="image",
    version="1",
    ndims=(2,),
    accepts_color=True,
    libraries=("numpy",),
)
def gray(params: GrayParams, image: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Turn a colour image into a gray image with fixed luma weights.

    Each pixel becomes ``wr * R + wg * G + wb * B`` with the weights of
    ``params.weights``. The weights are applied to the stored values as they
    are: no gamma is removed or added, so the result is the luma of the
    stored (usually gamma-encoded) values, not a luminance. An alpha channel
    is dropped (not used as a weight). A gray 2D image is returned unchanged,
    with its own dtype, so a recipe can apply ``gray`` to images that may or
    may not be colour.

    Parameters
    ----------
    params : GrayParams
        ``weights``: ``"bt601"`` (default) or ``"bt709"``.
    image : ndarray, shape (H, W, 3), (H, W, 4) or (H, W)
        Colour image with channels red, green, blue (and alpha), or a gray
        image.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray of float64, shape (H, W)
        The gray image in the value scale of the input (a uint8 input gives
        values in 0..255, not 0..1). A gray input comes back as it was.

    Notes
    -----
    BT.601: ``Y = 0.299 R + 0.587 G + 0.114 B``; BT.709:
    ``Y = 0.2126 R + 0.7152 G + 0.0722 B``. The sum is taken in float64 in the
    order red, green, blue.

    References
    ----------
    ITU-R Recommendation BT.601-7, Studio encoding parameters of digital
    television for standard 4:3 and wide-screen 16:9 aspect ratios (2011).
    ITU-R Recommendation BT.709-6, Parameter values for the HDTV standards for
    production and international programme exchange (2015).
    """
    if image.ndim == 2:
        return image
    if image.ndim != 3 or image.shape[-1] not in (3, 4):
        raise ValueError(
            f"gray needs a gray (H, W) or colour (H, W, 3 or 4) image, got shape {image.shape}"
        )
    if image.dtype.kind not in "uif":
        raise ValueError(f"gray needs numeric channel values, got dtype {image.dtype}")
    wr, wg, wb = LUMA_WEIGHTS[params.weights]
    red = image[..., 0].astype(np.float64)
    green = image[..., 1].astype(np.float64)
    blue = image[..., 2].astype(np.float64)
    return (wr * red + wg * green) + wb * blue


class SmoothParams(StepParams):
    """Parameters of ``smooth``."""

    method: Literal[SMOOTH_METHODS] = Field(  # type: ignore[valid-type]
        description="gaussian (needs sigma) or median (needs radius)",
    )
    sigma: Length | None = Field(
        None,
        description="gaussian only: standard deviation of the gaussian, e.g. '1.5 um' or '2 px'",
    )
    radius: Length | None = Field(
        None,
        description=(
            "median only: radius of the disk (ball in 3D) {x^2 + y^2 <= r^2} the median "
            "is taken over, e.g. '1 um' or '2 px'"
        ),
    )

    @model_validator(mode="after")
    def _method_fields(self) -> SmoothParams:
        if self.method == "gaussian":
            if self.sigma is None:
                raise ValueError("method 'gaussian' needs sigma (e.g. sigma: 2 px)")
            if self.radius is not None:
                raise ValueError("method 'gaussian' takes sigma, not radius")
        else:
            if self.radius is None:
                raise ValueError("method 'median' needs radius (e.g. radius: 2 px)")
            if self.sigma is not None:
                raise ValueError("method 'median' takes radius, not sigma")
        return self


def _smooth_degenerate(params: SmoothParams, ndim: int) -> str | None:
    """A median over one pixel is the image itself."""
    if params.method != "median" or params.radius is None:
        return None
    radius = max(params.radius.px_axes(ndim))
    if radius >= 1:
        return None
    return (
        f"the median's disk of radius {params.radius} is a single pixel, so this step changes "
        "nothing; give a radius of at least 1 px"
    )


@step(
    "smooth",
    params=SmoothParams,
    takes=["image"],
    gives="image",
    version="1",
    ndims=(2, 3),
    libraries=("numpy", "scipy"),
    degenerate=_smooth_degenerate,
)
def smooth(params: SmoothParams, image: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Smooth an image with a gaussian or a median filter.

    ``gaussian`` convolves with a gaussian of standard deviation ``sigma``
    (the same number of pixels along every axis), cut at
    :data:`GAUSSIAN_TRUNCATE` sigmas. ``median`` replaces each pixel by the
    median over the exact digital disk of ``radius`` (a ball in 3D).
    Beyond the frame the image is mirrored about the pixel edge
    (:data:`SMOOTH_MODE`, ``d c b a | a b c d``), so only values present in the
    image enter and a constant image stays constant.

    Parameters
    ----------
    params : SmoothParams
        ``method``: ``"gaussian"`` with ``sigma`` (pixels, after resolution),
        or ``"median"`` with ``radius`` (pixels, after resolution).
    image : ndarray, 2D or 3D, numeric
        The gray image.
    spacing : tuple of float
        Pixel size per axis in um (unused: lengths arrive in pixels).

    Returns
    -------
    ndarray
        ``gaussian``: float64, in the value scale of the input (integers are
        not rescaled to 0..1). ``median``: the dtype of the input.

    Notes
    -----
    Gaussian kernel: ``g(x) = exp(-x^2 / (2 sigma^2))`` normalised to sum 1,
    applied separably along each axis, support ``|x| <= round(4 sigma)``
    (``scipy.ndimage.gaussian_filter``, ``truncate=4``). Median footprint:
    offsets ``(y, x)`` with ``x^2 + y^2 <= r^2`` (``+ z^2`` in 3D), ``r`` the
    radius in pixels, not rounded (``lotproof.steps.footprints.disk`` and ``ball``); a
    radius below 1 px leaves the image unchanged.
    """
    if image.dtype.kind not in "uif":
        raise ValueError(f"smooth needs a numeric gray image, got dtype {image.dtype}")
    if params.method == "gaussian":
        assert params.sigma is not None
        smoothed: np.ndarray = ndimage.gaussian_filter(
            image.astype(np.float64),
            sigma=params.sigma.px,
            order=0,
            mode=SMOOTH_MODE,
            truncate=GAUSSIAN_TRUNCATE,
        )
        return smoothed
    assert params.radius is not None
    footprint = disk(params.radius.px) if image.ndim == 2 else ball(params.radius.px)
    median: np.ndarray = ndimage.median_filter(
        image, footprint=footprint, mode=SMOOTH_MODE, origin=0
    )
    return median
