"""``image-quality`` and ``scale-check`` checked against closed forms and independent libraries.

Every phantom is generated here from its own geometry (seeded noise where
there is noise), so the expected value of each check is known without the
code under test: exactly k saturated pixels, white noise of known standard
deviation, a shading of known shape, gratings and dot grids of known pitch,
phase and rotation. Where a general-purpose library computes the same thing
(scipy.ndimage for the noise kernel and the Laplacian, numpy.percentile for
order statistics, scikit-image for block means, numpy.fft for the spectral
peak), it is used as a second, independent computation.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import skimage.data
import skimage.measure
from scipy import ndimage

from lotproof.runner.evaluate.image import resolve_params
from lotproof.steps.calibration import ScaleCheckParams, hann_offset, scale_check
from lotproof.steps.quality import (
    ImageQualityParams,
    block_edges,
    image_quality,
    immerkaer_sigma,
    order_statistics,
)

IMMERKAER = np.array([[1, -2, 1], [-2, 4, -2], [1, -2, 1]], dtype=np.float64)


def quality(image: np.ndarray, **params: object) -> dict[str, float]:
    spacing = (1.0,) * image.ndim
    return dict(image_quality(ImageQualityParams(**params), image, spacing=spacing).values)


# =========================================================================== clipping and range


@pytest.mark.parametrize(("k", "m"), [(0, 0), (1, 0), (0, 1), (17, 5), (250, 999)])
def test_exactly_k_saturated_and_m_clipped_pixels(k: int, m: int) -> None:
    # source: closed form (k / n and m / n of an image built with k pixels at 255, m at 0)
    rng = np.random.default_rng(1000 + k + m)
    image = rng.integers(1, 255, size=(97, 131)).astype(np.uint8)  # 1..254: none at the ends
    flat = image.reshape(-1)
    chosen = rng.permutation(flat.size)[: k + m]
    flat[chosen[:k]] = 255
    flat[chosen[k:]] = 0
    values = quality(image)
    assert values["saturated_fraction"] == k / flat.size
    assert values["dark_clipped_fraction"] == m / flat.size


def test_exactly_k_saturated_pixels_of_a_12_bit_camera_in_a_16_bit_file() -> None:
    # source: closed form; a 12-bit camera's top is 2**12 - 1 = 4095
    rng = np.random.default_rng(12)
    image = rng.integers(1, 4095, size=(64, 80, 3)).astype(np.uint16)
    image[0, 0, :] = 4095
    image[5, 7, 1] = 4095
    image[9, 9, 2] = 0
    values = quality(image, bit_depth=12)
    assert values["saturated_fraction"] == 4 / image.size
    assert values["dark_clipped_fraction"] == 1 / image.size


@pytest.mark.parametrize("n", [7, 999, 1001, 4321, 123457])
def test_order_statistics_equal_numpy_inverted_cdf(n: int) -> None:
    # source: numpy.percentile(method="inverted_cdf"), Hyndman & Fan (1996) definition 1
    rng = np.random.default_rng(n)
    values = rng.normal(size=n)
    for numerator in (1, 999):
        expected = np.percentile(values, 100 * numerator / 1000, method="inverted_cdf")
        assert order_statistics(values, [(numerator, 1000)])[0] == float(expected)


def test_order_statistic_where_n_p_is_a_whole_number() -> None:
    # source: closed form: n = 1000, p = 0.999, n p = 999 exactly, so definition 1 gives the
    # 999th smallest value. numpy 2.4's percentile(values, 99.9, method="inverted_cdf")
    # computes it in floats (99.9 / 100 * 1000 = 999.0000000000001) and takes the largest value, the
    # 1000th; the integer rule here does not drift with such rounding.
    rng = np.random.default_rng(1000)
    values = rng.normal(size=1000)
    ordered = np.sort(values)
    assert order_statistics(values, [(999, 1000)])[0] == ordered[998]
    assert order_statistics(values, [(1, 1000)])[0] == ordered[0]


def test_used_range_of_a_ramp_of_distinct_values() -> None:
    # source: closed form: values 0 .. n-1 in any order; the order statistic k is k - 1,
    # with k = ceil(n / 1000) and ceil(999 n / 1000); n = 200 * 250 = 50000 gives 50 and 49950
    rng = np.random.default_rng(4)
    image = rng.permutation(50_000).reshape(200, 250).astype(np.uint16)
    assert quality(image)["used_range"] == (49_949 - 49) / 65_535


# =========================================================================== noise


def _immerkaer_standard_error(interior: int) -> float:
    """Relative standard error of Immerkær's estimate on white Gaussian noise.

    With ``Z = N * e`` (variance 36 sigma^2), neighbouring ``Z`` are correlated
    with ``rho(s) = (N * N)(s) / 36``; for a standard bivariate normal,
    ``Cov(|X|, |Y|) = (2 / pi) (rho asin(rho) + sqrt(1 - rho^2) - 1)``. The
    variance of the mean of ``|Z|`` over ``M`` interior pixels is the sum of
    these covariances over the 5 x 5 shifts, times 36 / M.
    """
    # source: closed form (E|XY| of a bivariate normal, a classical result, from memory)
    autocorrelation = ndimage.correlate(np.pad(IMMERKAER, 2), IMMERKAER, mode="constant")
    rho = autocorrelation / 36.0
    covariance = (2 / math.pi) * (rho * np.arcsin(rho) + np.sqrt(1 - rho**2) - 1)
    variance_of_mean = 36.0 * covariance.sum() / interior
    return math.sqrt(variance_of_mean) / (6.0 * math.sqrt(2 / math.pi))


@pytest.mark.parametrize("sigma", [0.5, 2.0, 10.0, 40.0])
@pytest.mark.parametrize("field", ["constant", "ramp"])
def test_immerkaer_estimate_of_white_noise_on_a_smooth_field(sigma: float, field: str) -> None:
    # source: Immerkær (1996), doi:10.1006/cviu.1996.0060: the estimate is unbiased for
    # Gaussian white noise where N * I = 0 (N annihilates constants and linear ramps); the
    # tolerance is 5 standard errors of the estimator (closed form above): 0.7 % here
    h, w = 1024, 1024
    rng = np.random.default_rng(int(sigma * 100) + (field == "ramp"))
    y, x = np.mgrid[0:h, 0:w].astype(np.float64)
    base = np.full((h, w), 30_000.0) if field == "constant" else 5_000.0 + 20.0 * x + 15.0 * y
    image = base + rng.normal(0.0, sigma, (h, w))
    tolerance = 5 * _immerkaer_standard_error((h - 2) * (w - 2))
    assert tolerance < 0.008
    estimate = quality(image, bit_depth=16)["noise_sigma"]
    assert estimate == pytest.approx(sigma, rel=tolerance)


def test_immerkaer_is_blind_to_linear_ramps() -> None:
    # source: closed form: N = d2/dx2 d2/dy2 of [1, -2, 1] is zero on a + b x + c y, so the
    # estimate on ramp + noise equals the one on the noise alone
    rng = np.random.default_rng(99)
    noise = rng.normal(0.0, 3.0, (300, 400))
    y, x = np.mgrid[0:300, 0:400].astype(np.float64)
    ramp = 100.0 + 7.0 * x - 4.0 * y
    assert immerkaer_sigma(ramp + noise) == pytest.approx(immerkaer_sigma(noise), rel=1e-9)
    assert immerkaer_sigma(ramp) == 0.0


def test_immerkaer_sum_equals_scipy_convolve() -> None:
    # source: scipy.ndimage.convolve with Immerkær's kernel, interior pixels only
    image = skimage.data.camera().astype(np.float64)
    h, w = image.shape
    response = ndimage.convolve(image, IMMERKAER, mode="constant")[1:-1, 1:-1]
    expected = math.sqrt(math.pi / 2) / (6 * (w - 2) * (h - 2)) * np.abs(response).sum()
    assert immerkaer_sigma(image) == pytest.approx(expected, rel=1e-12)
    assert quality(skimage.data.camera())["noise_sigma"] == pytest.approx(expected, rel=1e-12)


# =========================================================================== sharpness


def test_sharpness_equals_scipy_laplace_variance_ratio() -> None:
    # source: scipy.ndimage.laplace (the [1, -2, 1] second differences summed over both axes),
    # interior pixels only; numpy.var for both variances (ddof = 0)
    image = skimage.data.coins()
    laplacian = ndimage.laplace(image.astype(np.float64))[1:-1, 1:-1]
    expected = np.var(laplacian) / np.var(image.astype(np.float64))
    assert quality(image)["sharpness"] == pytest.approx(expected, rel=1e-10)


def test_sharpness_of_white_noise_is_twenty() -> None:
    # source: closed form: the 4-neighbour Laplacian of i.i.d. noise has variance
    # (16 + 4 * 1) sigma^2 = 20 sigma^2; tolerance 1 % (the sample variances of 10^6
    # values have relative standard errors near 0.2 %)
    rng = np.random.default_rng(20)
    image = rng.normal(0.5, 0.05, (1000, 1000))
    assert quality(image)["sharpness"] == pytest.approx(20.0, rel=0.01)


@pytest.mark.parametrize("name", ["camera", "coins", "text", "brick"])
def test_sharpness_falls_with_every_step_of_blur(name: str) -> None:
    # source: Pertuz et al. (2013), doi:10.1016/j.patcog.2012.11.011: a focus measure
    # decreases monotonically with defocus; a gaussian blur of growing sigma
    # (scipy.ndimage.gaussian_filter) stands in for defocus. An invariant, not a number.
    image = getattr(skimage.data, name)().astype(np.float64) / 255.0
    measures = [quality(image)["sharpness"]]
    for sigma in (0.5, 1.0, 1.5, 2.0, 3.0, 4.0):
        blurred = ndimage.gaussian_filter(image, sigma, mode="reflect", truncate=4.0)
        measures.append(quality(np.clip(blurred, 0.0, 1.0))["sharpness"])
    assert all(a > b for a, b in itertools.pairwise(measures)), measures


def test_sharpness_falls_with_blur_of_a_bar_pattern() -> None:
    # source: closed form (the same invariant on a synthetic pattern of bars and noise)
    rng = np.random.default_rng(8)
    x = np.arange(256)
    bars = np.where((x // 6) % 2 == 0, 0.8, 0.2)[None, :] * np.ones((256, 1))
    image = bars + rng.normal(0.0, 0.01, bars.shape)
    measures = [
        quality(np.clip(ndimage.gaussian_filter(image, s, mode="reflect"), 0, 1))["sharpness"]
        for s in (0.3, 0.6, 1.0, 1.5, 2.5)
    ]
    assert all(a > b for a, b in itertools.pairwise(measures)), measures


# =========================================================================== illumination


def test_illumination_ratio_of_a_linear_ramp() -> None:
    # source: closed form: I(x) = 0.5 + 0.5 x / (W - 1); the block of columns [a, b) has mean
    # 0.5 + 0.5 (a + b - 1) / 2 / (W - 1). W = 512, 8 blocks of 64: the first block's mean is
    # 0.5 + 0.25 * 63 / 511, the last's 0.5 + 0.25 * 959 / 511
    w = 512
    ramp = np.broadcast_to(0.5 + 0.5 * np.arange(w) / (w - 1), (384, w)).copy()
    expected = (0.5 + 0.25 * 63 / 511) / (0.5 + 0.25 * 959 / 511)
    ratio = quality(ramp)["illumination_ratio"]
    assert ratio == pytest.approx(expected, rel=1e-12)
    assert 0.5 < ratio < 0.55  # the low-pass can only raise the true 0.5 (min / max)
    # smaller blocks smooth less: the ratio comes closer to the ramp's own 0.5
    assert 0.5 < quality(ramp, blocks=64)["illumination_ratio"] < ratio
    # one block per column: the ratio is the columns' own min / max
    narrow = ramp[:, :64]
    assert quality(narrow, blocks=64)["illumination_ratio"] == pytest.approx(
        (0.5 + 0.5 * 0 / 511) / (0.5 + 0.5 * 63 / 511), rel=1e-12
    )


def test_illumination_ratio_equals_scikit_image_block_reduce() -> None:
    # source: skimage.measure.block_reduce(..., func=np.mean) on a shape that the grid divides
    rng = np.random.default_rng(31)
    y, x = np.mgrid[0:240, 0:320].astype(np.float64)
    vignette = 1.0 - 0.4 * ((x - 160) ** 2 + (y - 120) ** 2) / (160**2 + 120**2)
    image = np.clip(vignette * 0.8 + rng.normal(0, 0.02, vignette.shape), 0, 1)
    means = skimage.measure.block_reduce(image, (30, 40), func=np.mean)
    assert means.shape == (8, 8)
    assert quality(image)["illumination_ratio"] == pytest.approx(
        means.min() / means.max(), rel=1e-12
    )
    # and the near-equal split of a shape the grid does not divide
    assert block_edges(250, 8) == [0, 31, 62, 93, 125, 156, 187, 218, 250]


# =========================================================================== scale-check phantoms

SUPERSAMPLE = 4


def _subpixels(h: int, w: int) -> list[tuple[np.ndarray, np.ndarray]]:
    y, x = np.mgrid[0:h, 0:w].astype(np.float64)
    offsets = (np.arange(SUPERSAMPLE) + 0.5) / SUPERSAMPLE - 0.5
    return [(y + oy, x + ox) for oy in offsets for ox in offsets]


def bars(h, w, pitch_px, angle, phase, along="x") -> np.ndarray:
    """Bright bars of half the period, area-sampled: a square wave across its lines.

    The normal of the lines is at ``angle`` degrees counter-clockwise as shown
    (rows down) from +x (``along="x"``) or from up (``along="y"``).
    """
    t = math.radians(angle)
    nx, ny = (math.cos(t), -math.sin(t)) if along == "x" else (-math.sin(t), -math.cos(t))
    cover = np.zeros((h, w))
    for y, x in _subpixels(h, w):
        cover += np.mod((x * nx + y * ny) / pitch_px + phase, 1.0) < 0.5
    return cover / SUPERSAMPLE**2


def dots(h, w, pitch_um, size_um, angle, phase, radius=0.25) -> np.ndarray:
    """Round dots of ``radius`` pitches on a square grid, rotated by ``angle`` (ccw as shown).

    Drawn in physical coordinates, pixel ``(row, col)`` at ``(col dx, row dy)``,
    so that non-square pixels ``size_um = (dy, dx)`` are rendered as they are.
    """
    dy, dx = size_um
    t = math.radians(angle)
    cover = np.zeros((h, w))
    for y, x in _subpixels(h, w):
        px, py = x * dx, y * dy
        u = (px * math.cos(t) - py * math.sin(t)) / pitch_um + phase[0]
        v = (px * math.sin(t) + py * math.cos(t)) / pitch_um + phase[1]
        cover += (u - np.round(u)) ** 2 + (v - np.round(v)) ** 2 < radius**2
    return cover / SUPERSAMPLE**2


def camera(pattern: np.ndarray, seed: int) -> np.ndarray:
    """The pattern as a 12-bit camera would give it: 600..3400 gray levels, noise, uint16."""
    rng = np.random.default_rng(seed)
    gray = 600.0 + 2800.0 * pattern + rng.normal(0.0, 40.0, pattern.shape)
    return np.clip(np.round(gray), 0, 4095).astype(np.uint16)


def measure_scale(image, pitch_um, target, spacing):
    params = resolve_params(ScaleCheckParams(pitch=f"{pitch_um!r} um", target=target), spacing)
    return dict(scale_check(params, image, spacing=spacing).values)


PITCHES = (7.3, 12.85)  # px
ANGLES = (-2.0, -0.7, 0.0, 1.1, 2.0)  # degrees
PHASES = (0.0, 0.25, 0.61)  # of a period
PITCH_TOLERANCE = 1e-3  # relative: 0.1 % of the pitch
ANGLE_TOLERANCE = 0.05  # degrees


@pytest.mark.parametrize("pitch", PITCHES)
@pytest.mark.parametrize("angle", ANGLES)
@pytest.mark.parametrize("along", ["x", "y"])
def test_pitch_and_angle_of_line_gratings(pitch: float, angle: float, along: str) -> None:
    # source: closed form (the phantom's own pitch and rotation); tolerances 0.1 % and 0.05
    # degrees, the sub-pixel precision a scale check needs (common practice, no source)
    for i, phase in enumerate(PHASES):
        image = camera(bars(256, 272, pitch, angle, phase, along), seed=i)
        values = measure_scale(image, pitch * 0.5, "lines", (0.5, 0.5))
        measured = values[f"pitch_px_{along}"]
        assert measured == pytest.approx(pitch, rel=PITCH_TOLERANCE), phase
        assert values["angle"] == pytest.approx(angle, abs=ANGLE_TOLERANCE), phase
        other = "y" if along == "x" else "x"
        assert math.isnan(values[f"pitch_px_{other}"])


@pytest.mark.parametrize("pitch", PITCHES)
@pytest.mark.parametrize("angle", ANGLES)
def test_pitch_and_angle_of_dot_grids(pitch: float, angle: float) -> None:
    # source: closed form (the phantom's own pitch and rotation)
    for i, phase in enumerate(PHASES):
        image = camera(dots(256, 272, pitch, (1.0, 1.0), angle, (phase, 0.37 - phase)), seed=i)
        values = measure_scale(image, pitch, "dots", (1.0, 1.0))
        assert values["pitch_px_x"] == pytest.approx(pitch, rel=PITCH_TOLERANCE), phase
        assert values["pitch_px_y"] == pytest.approx(pitch, rel=PITCH_TOLERANCE), phase
        assert values["angle"] == pytest.approx(angle, abs=ANGLE_TOLERANCE), phase


def test_small_dots_far_apart() -> None:
    # source: closed form; dots of radius 0.1 pitch spread the grid's power over many
    # harmonics, the fundamental still stands out
    image = camera(dots(300, 300, 14.2, (1.0, 1.0), 0.8, (0.1, 0.3), radius=0.1), seed=5)
    values = measure_scale(image, 14.2, "dots", (1.0, 1.0))
    assert values["pitch_px_x"] == pytest.approx(14.2, rel=PITCH_TOLERANCE)
    assert values["pitch_px_y"] == pytest.approx(14.2, rel=PITCH_TOLERANCE)
    assert values["angle"] == pytest.approx(0.8, abs=ANGLE_TOLERANCE)


def test_scale_error_of_a_wrong_magnification() -> None:
    # source: closed form: the true pixel is 0.5 um, the recipe says 0.5 / 1.013 um, so the
    # measured pixel is 1.3 % larger than the recipe's: scale_error = 0.013 on both axes
    true_size = 0.5
    image = camera(dots(256, 256, 5.0, (true_size, true_size), 1.0, (0.2, 0.4)), seed=9)
    stated = true_size / 1.013
    values = measure_scale(image, 5.0, "dots", (stated, stated))
    assert values["pixel_size_x"] == pytest.approx(true_size, rel=PITCH_TOLERANCE)
    assert values["pixel_size_y"] == pytest.approx(true_size, rel=PITCH_TOLERANCE)
    assert values["scale_error_x"] == pytest.approx(0.013, abs=1.013 * PITCH_TOLERANCE)
    assert values["scale_error_y"] == pytest.approx(0.013, abs=1.013 * PITCH_TOLERANCE)


def test_non_square_pixels_are_measured_per_axis() -> None:
    # source: closed form: a square grid of 6 um drawn with pixels of 0.5 um (x) by 0.55 um
    # (y), rotated 1.5 degrees; the recipe states those sizes
    image = camera(dots(256, 256, 6.0, (0.55, 0.5), 1.5, (0.3, 0.1)), seed=3)
    values = measure_scale(image, 6.0, "dots", (0.55, 0.5))
    assert values["pixel_size_x"] == pytest.approx(0.5, rel=PITCH_TOLERANCE)
    assert values["pixel_size_y"] == pytest.approx(0.55, rel=PITCH_TOLERANCE)
    assert values["angle"] == pytest.approx(1.5, abs=ANGLE_TOLERANCE)
    # a recipe that thinks the pixels are square at 0.5 um sees the y axis 10 % off
    values = measure_scale(image, 6.0, "dots", (0.5, 0.5))
    assert values["scale_error_y"] == pytest.approx(0.1, abs=1.1 * PITCH_TOLERANCE)
    assert abs(values["scale_error_x"]) < PITCH_TOLERANCE


def test_hann_offset_recovers_the_frequency_of_a_sinusoid() -> None:
    # source: numpy.fft of a Hann-windowed complex exponential at a known offset from a bin;
    # the ratio formula is exact for the window's transform (Harris 1978,
    # doi:10.1109/PROC.1978.10837; Grandke 1983, doi:10.1109/TIM.1983.4315077), up to
    # O(1 / n^2): 1e-5 bins for n = 1024
    n = 1024
    k = np.arange(n)
    window = 0.5 - 0.5 * np.cos(2 * np.pi * k / n)
    for offset in (-0.49, -0.3, -0.05, 0.0, 0.12, 0.37, 0.5):
        spectrum = np.abs(np.fft.fft(window * np.exp(2j * np.pi * (100 + offset) * k / n)))
        peak = int(np.argmax(spectrum))
        found = peak - 100 + hann_offset(spectrum[peak - 1], spectrum[peak], spectrum[peak + 1])
        assert found == pytest.approx(offset, abs=1e-5)


def _zero_padded_peak(image: np.ndarray, factor: int) -> tuple[float, float]:
    """(f_x, f_y) in cycles per pixel of the strongest peak with f_x > 0, by a zero-padded FFT.

    An independent estimate: zero padding samples the windowed image's
    spectrum ``factor`` times more finely, and a parabola through the peak
    and its neighbours on that fine grid refines it.
    """
    h, w = image.shape
    hann_y = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(h) / h)
    hann_x = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(w) / w)
    windowed = (image - image.mean()) * np.outer(hann_y, hann_x)
    big = np.abs(np.fft.fft2(windowed, s=(factor * h, factor * w)))
    fy = np.fft.fftfreq(factor * h)
    fx = np.fft.fftfreq(factor * w)
    big[:, fx <= 0.02] = 0.0  # the half plane f_x > 0, away from the mean
    ky, kx = np.unravel_index(int(np.argmax(big)), big.shape)

    def vertex(a: float, b: float, c: float) -> float:
        return 0.5 * (a - c) / (a - 2 * b + c)

    ox = vertex(*big[ky, kx - 1 : kx + 2])
    oy = vertex(big[ky - 1, kx], big[ky, kx], big[(ky + 1) % big.shape[0], kx])
    return fx[kx] + ox / (factor * w), fy[ky] + oy / (factor * h)


@pytest.mark.parametrize(("pitch", "angle"), [(7.3, 1.7), (12.85, -1.2), (9.6, 0.3)])
def test_pitch_agrees_with_a_zero_padded_numpy_fft(pitch: float, angle: float) -> None:
    # source: numpy.fft.fft2 with 8x zero padding and a parabolic vertex (an independent
    # estimate of the same spectral peak); agreement within 0.1 % of the pitch and 0.05 degrees
    image = camera(bars(256, 256, pitch, angle, 0.2), seed=17)
    fx, fy = _zero_padded_peak(image.astype(np.float64), 8)
    values = measure_scale(image, pitch, "lines", (1.0, 1.0))
    assert values["pitch_px_x"] == pytest.approx(1 / math.hypot(fx, fy), rel=PITCH_TOLERANCE)
    assert values["angle"] == pytest.approx(math.degrees(math.atan2(-fy, fx)), abs=ANGLE_TOLERANCE)
