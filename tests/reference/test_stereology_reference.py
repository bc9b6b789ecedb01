"""Stereology of `measure` against the classical relations, on sections of known solids."""

from __future__ import annotations

import math

import numpy as np
import pytest

from lotproof.steps import REGISTRY

MEASURE = REGISTRY["measure"]


def _values(mask: np.ndarray, dx: float = 1.0) -> dict[str, float]:
    params = MEASURE.params.model_validate({"connectivity": 8})
    return dict(MEASURE.func(params, mask, spacing=(dx, dx)).values)


def _spheres(seed: int, side: int, n: int, radii: tuple[float, float]) -> tuple[np.ndarray, float]:
    """Non-overlapping spheres inside a cube; returns the voxel volume and the closed-form V_V."""
    rng = np.random.default_rng(seed)
    centres: list[tuple[np.ndarray, float]] = []
    while len(centres) < n:
        r = rng.uniform(*radii)
        c = rng.uniform(r + 1, side - r - 1, 3)
        if all(np.linalg.norm(c - c2) > r + r2 + 1 for c2, r2 in centres):
            centres.append((c, r))
    z, y, x = np.mgrid[:side, :side, :side]
    volume = np.zeros((side, side, side), bool)
    for c, r in centres:
        volume |= (z - c[0]) ** 2 + (y - c[1]) ** 2 + (x - c[2]) ** 2 <= r * r
    exact = sum(4 / 3 * math.pi * r**3 for _, r in centres) / side**3
    return volume, exact


def test_delesse_area_fraction_of_sections_estimates_volume_fraction() -> None:
    # source: Delesse (1847), A_A = V_V: the mean area fraction of plane sections of a solid
    # equals its volume fraction; here against the closed-form volume of the spheres, 4/3 pi r^3.
    volume, exact = _spheres(seed=7, side=96, n=40, radii=(5.0, 11.0))
    sections = [_values(volume[z])["area_fraction"] for z in range(volume.shape[0])]
    mean_area_fraction = float(np.mean(sections))
    assert exact == pytest.approx(0.12, abs=0.06)
    # digitisation moves each sphere's boundary by a fraction of a voxel: a few percent of V_V
    assert mean_area_fraction == pytest.approx(exact, rel=0.04)


def test_lineal_fraction_equals_area_fraction_on_a_disk_field() -> None:
    # source: Rosiwal (1898) / Underwood, Quantitative Stereology (1970): L_L = A_A; with test lines
    # through every pixel row, the lineal fraction is exactly the area fraction.
    rng = np.random.default_rng(3)
    mask = np.zeros((200, 200), bool)
    yy, xx = np.mgrid[:200, :200]
    for _ in range(25):
        cy, cx, r = rng.uniform(10, 190), rng.uniform(10, 190), rng.uniform(3, 9)
        mask |= (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r
    values = _values(mask, dx=0.5)
    lineal_fraction = mask.sum(axis=1).sum() / mask.size
    assert values["area_fraction"] == lineal_fraction
    # source: Underwood (1970): mean intercept L_3 = L_L / N_L, mean free path = (1 - V_V) / N_L
    n_l = 0.5 * (values["n_l_x"] + values["n_l_y"]) / 1000.0  # 1/mm -> 1/um
    assert values["mean_intercept"] == pytest.approx(values["area_fraction"] / n_l, rel=1e-12)
    assert values["mean_free_path"] == pytest.approx((1 - values["area_fraction"]) / n_l, rel=1e-12)


def test_mean_intercept_of_isolated_disks_is_pi_r_over_two() -> None:
    # source: closed form: the mean chord of a disk of radius r cut by parallel lines is
    # area / width = pi r^2 / (2 r) = pi r / 2 (Cauchy / Crofton); isolated equal disks give it.
    r = 20.0
    mask = np.zeros((400, 400), bool)
    yy, xx = np.mgrid[:400, :400]
    for cy in (60, 200, 340):
        for cx in (60, 200, 340):
            mask |= (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r
    values = _values(mask)
    # the digital disk is crossed by 2r + 1 rows and as many columns: its mean chord is exactly
    # its pixel area over 2r + 1 (source: closed form of the same Cauchy relation, digital case)
    area_px = int(mask.sum()) // 9
    assert values["mean_intercept"] == pytest.approx(area_px / (2 * r + 1), rel=1e-12)
    # and within 3 % of the continuous disk's pi r / 2 at r = 20 px (the extra row is 1/41)
    assert values["mean_intercept"] == pytest.approx(math.pi * r / 2, rel=0.03)
