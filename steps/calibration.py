"""Calibration of the pixel size: the ``scale-check`` step kind.

An image of a calibration target of certified period (a line grating, a grid
of dots) tells the pixel size the microscope really had: the period in
pixels, measured to a small fraction of a pixel, divided into the certified
period. ``scale-check`` measures it along x and y and compares it with the
pixel size the recipe states, so that an acceptance limit can refuse a run
whose magnification was not what the recipe assumed (a wrong objective, a
changed camera adapter, a drifted zoom).

Targets
-------
``lines``: parallel lines (a stage micrometer), periodic along one direction
within :data:`SEARCH_ANGLE` degrees of the x or of the y axis; the other
axis's values are NaN. ``dots``: a square grid, periodic along both axes with
one pitch: dots, holes or crossed lines (not a checkerboard, whose period
runs along the diagonals).

Degenerate inputs
-----------------
An image without a grating near the expected period (a constant image,
noise, a wrong target, a pixel size off by more than a factor
:data:`SEARCH_FACTOR`) raises ``ValueError("no grating found: ...")`` naming
what was searched and what was seen: the image is incomplete rather than
given a number. Too few periods across the image (fewer than
:data:`MIN_PERIODS`) or too few pixels per period (fewer than
:data:`MIN_PITCH_PX`) are refused likewise. NaN and infinite values are
refused.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Literal

import numpy as np
from pydantic import Field, field_validator

from lotproof.steps._data import Output, Table
from lotproof.steps._registry import StepParams, step
from lotproof.steps.units import Length

__all__ = [
    "FAMILY_BALANCE",
    "MIN_PEAK_SHARE",
    "MIN_PERIODS",
    "MIN_PITCH_PX",
    "PEAK_TO_BACKGROUND",
    "SCALE_DEFINITIONS",
    "SCALE_TARGETS",
    "SCALE_VALUES",
    "SEARCH_ANGLE",
    "SEARCH_FACTOR",
    "ScaleCheckParams",
    "hann_offset",
    "scale_check",
]

#: Calibration targets: parallel lines, or a square grid (dots, holes, crossed lines).
SCALE_TARGETS: tuple[str, ...] = ("lines", "dots")

#: Values of ``scale-check``: name -> unit.
SCALE_VALUES: Mapping[str, str] = MappingProxyType(
    {
        "pitch_px_x": "px",
        "pitch_px_y": "px",
        "pixel_size_x": "um",
        "pixel_size_y": "um",
        "scale_error_x": "-",
        "scale_error_y": "-",
        "scale_error": "-",
        "angle": "deg",
    }
)

#: One-line definition of each value (``lotproof steps scale-check``).
SCALE_DEFINITIONS: Mapping[str, str] = MappingProxyType(
    {
        "pitch_px_x": "the target's period along x in pixels, pitch / pixel_size_x (NaN for "
        "lines along y)",
        "pitch_px_y": "the target's period along y in pixels, pitch / pixel_size_y (NaN for "
        "lines along x)",
        "pixel_size_x": "pixel size along x measured on the target: its certified pitch over "
        "its period in pixels (Fourier peak of the Hann-windowed image, interpolated)",
        "pixel_size_y": "pixel size along y measured on the target (as pixel_size_x)",
        "scale_error_x": "pixel_size_x / the recipe's pixel size along x - 1 (signed)",
        "scale_error_y": "pixel_size_y / the recipe's pixel size along y - 1 (signed)",
        "scale_error": "the larger of |scale_error_x| and |scale_error_y| over the measured axes",
        "angle": "rotation of the target against the image axes, degrees counter-clockwise "
        "as the image is shown (rows down); the mean of both directions for dots",
    }
)

#: The period is searched between pitch / SEARCH_FACTOR and pitch * SEARCH_FACTOR
#: (the pitch at the recipe's pixel size): a second harmonic (pitch / 2) and a
#: grid's diagonal (pitch / sqrt 2) stay outside.
SEARCH_FACTOR = math.sqrt(2.0)

#: The grating's direction is searched within this many degrees of each image axis.
SEARCH_ANGLE = 20.0

#: A peak counts as a grating when its power is at least this many times the
#: median power of the searched part of the spectrum (20 dB). Noise alone gives
#: about ln(M) / ln(2) for M searched frequencies, under 25 for any image size
#: a camera makes.
PEAK_TO_BACKGROUND = 100.0

#: A peak counts as a grating only when it also holds at least this fraction
#: of the power of the whole spectrum (the windowed image's variance): the
#: side lobes of a grating at another period, or of the frame, hold far less.
MIN_PEAK_SHARE = 1e-4

#: For ``dots``, the weaker direction's peak power must be at least this
#: fraction of the stronger's; for ``lines``, a second direction this strong
#: means the target is a grid.
FAMILY_BALANCE = 0.01

#: Fewest periods of the target across the image along a measured axis.
MIN_PERIODS = 8

#: Fewest pixels per period (the search reaches pitch / SEARCH_FACTOR, which
#: must stay below the Nyquist frequency).
MIN_PITCH_PX = 3.0


class ScaleCheckParams(StepParams):
    """Parameters of ``scale-check``."""

    pitch: Length = Field(
        description=(
            "the target's certified period, a physical length (e.g. 10 um): line to line "
            "for lines, dot to dot along a row for dots"
        ),
    )
    target: Literal[SCALE_TARGETS] = Field(  # type: ignore[valid-type]
        description=(
            "lines: parallel lines, periodic along x or y (the other axis gives NaN); "
            "dots: a square grid periodic along both x and y (dots, holes, crossed lines)"
        ),
    )

    @field_validator("pitch")
    @classmethod
    def _physical(cls, value: Length) -> Length:
        if value.unit == "px":
            raise ValueError(
                f"the pitch of a calibration target is a physical length (got {value}); "
                "write its certified period, e.g. 10 um"
            )
        return value


# --------------------------------------------------------------------------- spectrum


def _hann(n: int) -> np.ndarray:
    """The periodic (DFT-even) Hann window ``0.5 - 0.5 cos(2 pi k / n)``."""
    return 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)


def hann_offset(below: float, peak: float, above: float) -> float:
    """Offset in bins, in [-0.5, 0.5], of a sinusoid's frequency from its peak DFT bin.

    ``below``, ``peak``, ``above`` are the magnitudes of the DFT of the
    Hann-windowed signal at the peak bin and its two neighbours. The
    periodic Hann window's transform is ``W(d) ~ sin(pi d) / (pi d (1 - d^2))``,
    so the ratio ``a`` of the larger neighbour to the peak is
    ``(1 + d) / (2 - d)`` and ``d = (2 a - 1) / (a + 1)``, towards that
    neighbour (Grandke 1983): exact for one sinusoid, up to ``O(1 / n^2)``.
    """
    if peak <= 0.0:
        raise ValueError("the peak of a spectrum must be > 0")
    if above >= below:
        ratio = above / peak
        return (2.0 * ratio - 1.0) / (ratio + 1.0)
    ratio = below / peak
    return -(2.0 * ratio - 1.0) / (ratio + 1.0)


@dataclass(frozen=True)
class _Peak:
    fx: float  # cycles per pixel along x (columns)
    fy: float  # cycles per pixel along y (rows)
    power: float


def _find(
    power: np.ndarray, magnitude: np.ndarray, axis: str, expected_px: float
) -> tuple[_Peak | None, str]:
    """The strongest peak of a grating family near ``expected_px`` along ``axis``, or why not."""
    h, w = power.shape
    fy = np.fft.fftfreq(h)[:, None]
    fx = np.fft.fftfreq(w)[None, :]
    radius = np.hypot(fx, fy)
    f0 = 1.0 / expected_px
    ring = (radius >= f0 / SEARCH_FACTOR) & (radius <= f0 * SEARCH_FACTOR)
    slope = math.tan(math.radians(SEARCH_ANGLE))
    # one of the two conjugate peaks: the normal points along +x, or up (-y, rows down)
    if axis == "x":
        sector = (fx > 0) & (np.abs(fy) <= slope * fx)
    else:
        sector = (fy < 0) & (np.abs(fx) <= slope * -fy)
    region = ring & sector
    searched = (
        f"near the expected pitch of {expected_px:.4g} px along {axis} (periods "
        f"{expected_px / SEARCH_FACTOR:.4g} to {expected_px * SEARCH_FACTOR:.4g} px, within "
        f"{SEARCH_ANGLE:g} degrees of the {axis} axis)"
    )
    inside = power[region]
    if inside.size == 0 or not inside.max() > 0.0:
        return None, f"no grating found {searched}: the spectrum there is empty"
    index = int(np.argmax(np.where(region, power, -1.0)))
    ky, kx = divmod(index, w)
    peak = float(power[ky, kx])
    around = power[np.ix_([(ky - 1) % h, ky, (ky + 1) % h], [(kx - 1) % w, kx, (kx + 1) % w])]
    if around.max() > peak:
        return None, (
            f"no grating found {searched}: the strongest response there is the flank of a "
            "peak outside it (a different target, or a pixel size off by more than a factor "
            f"{SEARCH_FACTOR:.3g})"
        )
    background = float(np.median(inside))
    if background > 0.0 and peak < PEAK_TO_BACKGROUND * background:
        return None, (
            f"no grating found {searched}: the strongest peak there is only "
            f"{peak / background:.3g} times the median power of that part of the spectrum "
            f"(at least {PEAK_TO_BACKGROUND:g} needed)"
        )
    share = peak / float(np.sum(power))
    if share < MIN_PEAK_SHARE:
        return None, (
            f"no grating found {searched}: the strongest peak there holds only {share:.2g} of "
            f"the power of the image's spectrum (at least {MIN_PEAK_SHARE:g} needed)"
        )
    dx = hann_offset(
        float(magnitude[ky, (kx - 1) % w]),
        float(magnitude[ky, kx]),
        float(magnitude[ky, (kx + 1) % w]),
    )
    dy = hann_offset(
        float(magnitude[(ky - 1) % h, kx]),
        float(magnitude[ky, kx]),
        float(magnitude[(ky + 1) % h, kx]),
    )
    signed_x = kx - w if kx > w // 2 else kx
    signed_y = ky - h if ky > h // 2 else ky
    return _Peak((signed_x + dx) / w, (signed_y + dy) / h, peak), ""


# --------------------------------------------------------------------------- the step


@step(
    "scale-check",
    params=ScaleCheckParams,
    takes=["image"],
    gives="values",
    version="1",
    values=SCALE_VALUES,
    definitions=SCALE_DEFINITIONS,
    ndims=(2,),
)
def scale_check(
    params: ScaleCheckParams, image: np.ndarray, *, spacing: tuple[float, ...]
) -> Output:
    """Measure the pixel size on an image of a calibration target and compare it with the recipe's.

    The target's period is found in the spectrum of the image as the
    strongest peak near the period the recipe's pixel size makes of the
    certified ``pitch``, to a small fraction of a frequency bin; its
    position gives the period in pixels and the target's rotation. The
    pixel size is the certified pitch over the period in pixels, along x
    and y, and the scale error its relative difference from the recipe's.

    Parameters
    ----------
    params : ScaleCheckParams
        ``pitch`` (after resolution, in pixels at the recipe's pixel size
        along each axis) and ``target`` (lines or dots).
    image : ndarray, 2D, integer or float
        The image of the target; all values finite. At least
        :data:`MIN_PERIODS` periods across it along each measured axis.
    spacing : tuple of float
        The recipe's pixel size ``(dy, dx)`` in um: what the measured size is
        compared with.

    Returns
    -------
    Output
        ``data`` an empty :class:`~lotproof.steps._data.Table`; ``values``
        (see :data:`SCALE_DEFINITIONS`): ``pitch_px_x``, ``pitch_px_y`` (px),
        ``pixel_size_x``, ``pixel_size_y`` (um), ``scale_error_x``,
        ``scale_error_y``, ``scale_error`` (-) and ``angle`` (deg). For
        ``lines`` the values of the axis the lines do not repeat along are
        NaN.

    Raises
    ------
    ValueError
        ``"no grating found: ..."`` when the spectrum shows no grating near
        the expected period (see the module documentation); also for too few
        periods or pixels per period, NaN or infinite values, or a grid
        given as ``lines`` (or lines as ``dots``).

    Notes
    -----
    The image ``I`` (``H`` rows, ``W`` columns) less its window-weighted
    mean is multiplied by the separable periodic Hann window
    ``w(y) w(x)``, ``w(k) = 0.5 - 0.5 cos(2 pi k / n)``, and transformed
    (``numpy.fft.fft2``); ``P = |F|^2``. A family of lines with normal
    ``(f_x, f_y)`` cycles per pixel is a plane wave, separable, so its
    windowed peak is ``W(f_x W - k_x) W(f_y H - k_y)`` and the offset from
    the peak bin along each axis follows from the peak and its neighbours
    (:func:`hann_offset`). The window keeps the leakage of the other
    harmonics and of the image's frame small (its side lobes fall as the
    third power of the distance).

    A family is searched among the frequencies of period within a factor
    :data:`SEARCH_FACTOR` of the expected one and direction within
    :data:`SEARCH_ANGLE` degrees of its axis; its peak must be a local
    maximum of ``P``, at least :data:`PEAK_TO_BACKGROUND` times the
    median of ``P`` over the searched frequencies and at least
    :data:`MIN_PEAK_SHARE` of the sum of ``P`` over all frequencies.

    The pixel sizes ``(d_x, d_y)`` make both families' physical period the
    certified pitch ``p``: ``f_x^2 / d_x^2 + f_y^2 / d_y^2 = 1 / p^2``. For
    dots the two families give two such equations, solved exactly for
    ``1 / d_x^2`` and ``1 / d_y^2`` (any rotation, non-square pixels too).
    Lines give one equation, which cannot tell a scale along x from one along
    y: it is solved with the recipe's aspect ratio ``a = d_y / d_x`` (exact
    for square pixels whatever the scale, since a wrong magnification scales
    both axes alike), ``d_x = p sqrt(f_x^2 + f_y^2 / a^2)`` for lines along
    x and ``d_y = p sqrt(f_y^2 + a^2 f_x^2)`` along y. ``pitch_px = p / d``.
    The angle is that of the family's physical normal
    ``(f_x / d_x, f_y / d_y)`` against its axis, counter-clockwise as the
    image is shown (rows point down); for dots the mean of both families.

    References
    ----------
    .. [1] T. Grandke, Interpolation algorithms for discrete Fourier
       transforms of weighted signals, IEEE Trans. Instrum. Meas. 32(2)
       (1983) 350-355, doi:10.1109/TIM.1983.4315077.
    .. [2] F. J. Harris, On the use of windows for harmonic analysis with
       the discrete Fourier transform, Proc. IEEE 66(1) (1978) 51-83,
       doi:10.1109/PROC.1978.10837.
    """
    if image.dtype.kind not in "uif":
        raise ValueError(f"scale-check needs a numeric gray image, got dtype {image.dtype}")
    if image.dtype.kind == "f" and not np.isfinite(image).all():
        raise ValueError("image has NaN or infinite values; scale-check needs finite values")
    dy_recipe, dx_recipe = float(spacing[0]), float(spacing[1])
    expected_y, expected_x = params.pitch.px_axes(2)
    pitch_um = expected_x * dx_recipe
    h, w = image.shape
    axes = {"x": (expected_x, w), "y": (expected_y, h)}
    for axis, (expected, _) in axes.items():
        if expected < MIN_PITCH_PX:
            raise ValueError(
                f"the pitch {params.pitch} spans {expected:.3g} px along {axis} at the recipe's "
                f"pixel size; scale-check needs at least {MIN_PITCH_PX:g} px per period"
            )
    wanted: tuple[str, ...] = ("x", "y")
    if params.target == "lines":
        wanted = tuple(a for a, (e, side) in axes.items() if side / e >= MIN_PERIODS)
    short = [a for a in ("x", "y") if axes[a][1] / axes[a][0] < MIN_PERIODS]
    if (params.target == "dots" and short) or not wanted:
        axis = short[0]
        expected, side = axes[axis]
        raise ValueError(
            f"the image spans {side / expected:.3g} periods of the target along {axis}; "
            f"scale-check needs at least {MIN_PERIODS}"
        )

    data = image.astype(np.float64)
    window = np.outer(_hann(h), _hann(w))
    mean = float(np.sum(data * window) / np.sum(window))
    centred = (data - mean) * window
    if not np.any(centred):
        raise ValueError("no grating found: the image is constant")
    magnitude = np.abs(np.fft.fft2(centred))
    power = np.square(magnitude)

    found: dict[str, _Peak] = {}
    why: dict[str, str] = {}
    for axis in wanted:
        peak, reason = _find(power, magnitude, axis, axes[axis][0])
        if peak is None:
            why[axis] = reason
        else:
            found[axis] = peak
    if params.target == "dots":
        for axis in ("x", "y"):
            if axis not in found:
                hint = "; for parallel lines write target: lines" if found else ""
                raise ValueError(why[axis] + hint)
        weak, strong = sorted(found, key=lambda a: found[a].power)
        share = found[weak].power / found[strong].power
        if share < FAMILY_BALANCE:
            raise ValueError(
                f"no grating found along {weak}: its strongest peak has {share:.2g} of the "
                f"power of the one along {strong} (at least {FAMILY_BALANCE:g} for a grid of "
                "dots); for parallel lines write target: lines"
            )
    else:
        if not found:
            raise ValueError(" and ".join(why[a] for a in wanted))
        ranked = sorted(found, key=lambda a: -found[a].power)
        if len(ranked) == 2 and found[ranked[1]].power >= FAMILY_BALANCE * found[ranked[0]].power:
            share = found[ranked[1]].power / found[ranked[0]].power
            raise ValueError(
                "target is lines, but the image repeats along both x and y (the peak along "
                f"{ranked[1]} has {share:.3g} of the power of the one along {ranked[0]}): it is "
                "a grid; write target: dots"
            )
        found = {ranked[0]: found[ranked[0]]}

    aspect = dy_recipe / dx_recipe
    size_x = size_y = math.nan
    if "x" in found and "y" in found:
        # two families, two equations f_x^2 u + f_y^2 v = 1 / p^2 in u = 1/d_x^2, v = 1/d_y^2
        x, y = found["x"], found["y"]
        det = x.fx**2 * y.fy**2 - x.fy**2 * y.fx**2
        u = (y.fy**2 - x.fy**2) / det / pitch_um**2
        v = (x.fx**2 - y.fx**2) / det / pitch_um**2
        if not (u > 0.0 and v > 0.0):
            raise ValueError(
                "no grating found: the peaks along x and y do not fit a square grid of one "
                "pitch (a different target?)"
            )
        size_x, size_y = 1.0 / math.sqrt(u), 1.0 / math.sqrt(v)
        scale_x, scale_y = size_x, size_y
    elif "x" in found:
        # one family: the recipe's aspect ratio d_y / d_x holds (exact for square pixels)
        x = found["x"]
        size_x = pitch_um * math.hypot(x.fx, x.fy / aspect)
        scale_x, scale_y = size_x, size_x * aspect
    else:
        y = found["y"]
        size_y = pitch_um * math.hypot(y.fy, y.fx * aspect)
        scale_x, scale_y = size_y / aspect, size_y
    angles = []
    if "x" in found:
        peak = found["x"]
        angles.append(math.degrees(math.atan2(-peak.fy / scale_y, peak.fx / scale_x)))
    if "y" in found:
        peak = found["y"]
        angles.append(math.degrees(math.atan2(-peak.fy / scale_y, peak.fx / scale_x)) - 90.0)
    error_x = size_x / dx_recipe - 1.0
    error_y = size_y / dy_recipe - 1.0
    values = {
        "pitch_px_x": pitch_um / size_x,
        "pitch_px_y": pitch_um / size_y,
        "pixel_size_x": size_x,
        "pixel_size_y": size_y,
        "scale_error_x": error_x,
        "scale_error_y": error_y,
        "scale_error": max(abs(e) for e in (error_x, error_y) if not math.isnan(e)),
        "angle": math.fsum(angles) / len(angles),
    }
    return Output(data=Table(columns={}, units={}), values=values, units=dict(SCALE_VALUES))
