"""size-spectrum against closed-form granulometry and independent opening implementations."""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest
from scipy import ndimage

from lotproof.steps.footprints import disk
from lotproof.steps.granulometry import SizeSpectrumParams, size_spectrum
from lotproof.steps.units import Length


def spectrum(mask, max_radius, step=1.0, footprint="disk"):
    params = SizeSpectrumParams(
        footprint=footprint, max_radius=Length(max_radius, "px"), step=Length(step, "px")
    )
    return size_spectrum(params, mask, spacing=(1.0, 1.0))


def _place(shape, radii, rng, gap=3.0, offsets=False):
    """Centres and radii of disks placed at random, none within ``gap`` of another."""
    placed: list[tuple[float, float, float]] = []
    for r in radii:
        for _ in range(10_000):
            cy, cx = (float(rng.integers(int(r) + 2, n - int(r) - 2)) for n in shape)
            if offsets:
                cy, cx = cy + float(rng.uniform(-0.5, 0.5)), cx + float(rng.uniform(-0.5, 0.5))
            if all(math.hypot(cy - y, cx - x) > r + s + gap for y, x, s in placed):
                break
        else:
            raise RuntimeError("no room")
        placed.append((cy, cx, r))
    return placed


def _draw(shape, circles) -> np.ndarray:
    """Union of the disks {(y - cy)^2 + (x - cx)^2 <= r^2}."""
    yy, xx = np.indices(shape)
    mask = np.zeros(shape, dtype=bool)
    for cy, cx, r in circles:
        mask |= (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r
    return mask


@pytest.mark.parametrize("small, large", [(3, 9), (5, 12), (4, 15)])
def test_two_populations_of_disks_peak_at_their_radii(small: int, large: int) -> None:
    rng = np.random.default_rng(small * 100 + large)
    circles = _place((240, 240), [float(large)] * 6 + [float(small)] * 12, rng)
    mask = _draw((240, 240), circles)
    n_small = int(np.count_nonzero(_draw((240, 240), circles[6:])))
    out = spectrum(mask, large + 3.0)
    high = list(out.data.columns["radius_high"])
    removed = out.data.columns["area_removed"]
    # source: closed form (Matheron 1975; Serra 1982): the opening by a disk of radius
    # r keeps every disk of radius a >= r and removes every disk of radius a < r. On the
    # pixel grid the digital disk of radius a + 1 has more pixels than the one of radius
    # a, so no translate of it fits: every small disk is gone at r = small + 1 and every
    # large disk at r = large + 1; nothing is left after that.
    gone_by = np.cumsum(removed)
    assert gone_by[high.index(small + 1.0)] >= n_small
    assert gone_by[high.index(large + 1.0)] == np.count_nonzero(mask)
    assert out.values["residual_fraction"] == 0.0
    # the spectrum peaks in the row (a, a + 1] of each population; the digital disks lose a
    # few pixels of their outline earlier (a digital disk is not a union of smaller ones)
    two_largest = sorted(np.argsort(removed)[-2:].tolist())
    assert [high[i] for i in two_largest] == [small + 1.0, large + 1.0]
    assert removed[two_largest].sum() >= 0.85 * np.count_nonzero(mask)


def test_disks_with_sub_pixel_centres_and_real_radii() -> None:
    # source: closed form as above; with centres and radii off the grid the digital disk
    # of radius a is not the one of radius a about a pixel, and it is removed by an
    # opening of radius within about a pixel of a: here floor(a) .. ceil(a) (+ 1 for b)
    rng = np.random.default_rng(7)
    a, b = 4.4, 10.7
    mask = _draw((260, 260), _place((260, 260), [b] * 8 + [a] * 15, rng, offsets=True))
    out = spectrum(mask, 14.0)
    removed = out.data.columns["area_removed"]
    high = list(out.data.columns["radius_high"])
    total = removed.sum()
    near_a = sum(removed[high.index(r)] for r in (4.0, 5.0))
    near_b = sum(removed[high.index(r)] for r in (10.0, 11.0, 12.0))
    small_area = 15 * math.pi * a * a  # closed form: area of a disk pi r^2
    assert near_a == pytest.approx(small_area, rel=0.12)
    assert (near_a + near_b) / total > 0.9
    # mean_size is the area-weighted mean of the class midpoints (ISO 9276-2 midpoint rule):
    # between the two radii, nearer the large disks, which hold most of the area
    large_area = 8 * math.pi * b * b
    expected = (small_area * a + large_area * b) / (small_area + large_area)
    assert out.values["mean_size"] == pytest.approx(expected, abs=1.0)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_spectrum_equals_scipy_openings_away_from_the_frame(seed: int) -> None:
    # source: scipy.ndimage.binary_opening with the same digital disk as structure; the
    # blobs stay 12 px from the frame (more than the largest radius), so scipy's border
    # value does not matter. The running intersection X_k = X_{k-1} & opening_k is the
    # step's documented definition, rebuilt here from scipy's openings.
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.standard_normal((96, 96)), 3.0, mode="constant")
    mask = np.zeros((120, 120), dtype=bool)
    mask[12:108, 12:108] = field > 0.05
    out = spectrum(mask, 10.0)
    kept = mask.copy()
    areas = [int(mask.sum())]
    for r in range(1, 11):
        kept &= ndimage.binary_opening(mask, structure=disk(float(r)))
        areas.append(int(kept.sum()))
    expected = -np.diff(areas).astype(np.float64)
    np.testing.assert_array_equal(out.data.columns["area_removed"], expected)


@pytest.mark.parametrize("seed", [3, 4])
def test_spectrum_equals_opencv_openings_at_the_frame(seed: int) -> None:
    # source: OpenCV cv2.morphologyEx(MORPH_OPEN) with the same digital disk as kernel; its
    # default border (BORDER_CONSTANT with morphologyDefaultBorderValue) ignores pixels
    # outside the image, lotproof's border rule, so blobs may touch the frame
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.standard_normal((100, 130)), 3.0, mode="wrap")
    mask = field > 0.0
    out = spectrum(mask, 8.0, step=2.0)
    src = mask.astype(np.uint8)
    kept = mask.copy()
    areas = [int(mask.sum())]
    for r in (2.0, 4.0, 6.0, 8.0):
        kernel = disk(r).astype(np.uint8)
        kept &= cv2.morphologyEx(src, cv2.MORPH_OPEN, kernel).astype(bool)
        areas.append(int(kept.sum()))
    np.testing.assert_array_equal(out.data.columns["area_removed"], -np.diff(areas))


def test_squares_of_a_known_size_distribution() -> None:
    # source: closed form; squares are nested openings of each other, so a square of side
    # 2h + 1 is removed whole by the square sieve of radius h + 1 and by none smaller
    mask = np.zeros((100, 100), dtype=bool)
    sides = {1: 4, 2: 3, 4: 2}  # half-width h: how many squares of side 2h + 1
    x = 2
    for h, n in sides.items():
        for _ in range(n):
            mask[5 : 6 + 2 * h, x : x + 2 * h + 1] = True
            x += 2 * h + 4
    out = spectrum(mask, 5.0, footprint="square")
    expected = [0.0] * 5
    for h, n in sides.items():
        expected[h] = float(n * (2 * h + 1) ** 2)
    assert out.data.columns["area_removed"].tolist() == expected
