"""3-D measure, labels and anisotropic footprints against closed forms and independent libraries."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage
from skimage.measure import euler_number as skimage_euler_number

from lotproof.steps import _measure3d as m3
from lotproof.steps.footprints import MorphologyParams, build_footprint
from lotproof.steps.measure import LabelParams, MeasureParams, label, measure
from lotproof.steps.units import Length, resolve_for_spacing


def _ball(
    radius_um: float, spacing: tuple[float, float, float], hollow_um: float = 0.0
) -> np.ndarray:
    """A ball of ``radius_um`` sampled on voxels of ``spacing``, centred on a voxel centre."""
    halves = [math.ceil(radius_um / s) + 3 for s in spacing]
    z, y, x = np.ogrid[tuple(slice(-h, h + 1) for h in halves)]
    d2 = (z * spacing[0]) ** 2 + (y * spacing[1]) ** 2 + (x * spacing[2]) ** 2
    out = d2 <= radius_um**2
    if hollow_um:
        out &= d2 > hollow_um**2
    return out


# (radius um, spacing) -> tolerances. Volume: the digital ball holds the voxel
# centres inside the sphere, within 2.5 % of 4/3 pi r^3 from 5 voxels of radius up.
# Surface: marching cubes on a 0/1 indicator is faceted and overestimates a smooth
# surface; measured 6 to 9 % for these radii on cubic voxels and up to 11 % on the
# anisotropic ones, so the check is 0 to 12 % above 4 pi r^2.
CASES = [
    (5.0, (1.0, 1.0, 1.0)),
    (8.0, (1.0, 1.0, 1.0)),
    (12.0, (1.0, 1.0, 1.0)),
    (20.0, (1.0, 1.0, 1.0)),
    (12.0, (2.0, 1.0, 1.0)),  # anisotropic voxels: z twice as long
    (15.0, (1.5, 1.0, 0.75)),  # every axis different
]


@pytest.mark.parametrize(("radius", "spacing"), CASES)
def test_sphere_volume_and_surface(radius: float, spacing: tuple[float, float, float]) -> None:
    out = measure(MeasureParams(), _ball(radius, spacing), spacing=spacing)
    table = out.data.columns
    assert out.values["count"] == 1
    # source: closed form, volume of a sphere 4/3 pi r^3 (tolerance stated above)
    assert table["volume"][0] == pytest.approx(4 / 3 * math.pi * radius**3, rel=0.025)
    # source: closed form, ESD of a sphere is 2 r
    assert table["esd"][0] == pytest.approx(2 * radius, rel=0.01)
    # source: closed form, surface of a sphere 4 pi r^2 (marching cubes bias stated above)
    ratio = table["surface_area"][0] / (4 * math.pi * radius**2)
    assert 1.0 < ratio < 1.12
    # source: closed form, the centroid of a ball is its centre
    centre = [(n - 1) / 2 * s for n, s in zip(_ball(radius, spacing).shape, spacing, strict=False)]
    assert table["centroid_z"][0] == pytest.approx(centre[0])
    assert table["centroid_x"][0] == pytest.approx(centre[2])


def _torus(major: float, minor: float) -> np.ndarray:
    n = int(2 * (major + minor)) + 6
    z, y, x = np.ogrid[:n, :n, :n]
    c = (n - 1) / 2
    return (np.sqrt((x - c) ** 2 + (y - c) ** 2) - major) ** 2 + (z - c) ** 2 <= minor**2


@pytest.mark.parametrize("connectivity", [6, 26])
def test_euler_characteristic_of_ball_hollow_ball_and_torus(connectivity: int) -> None:
    spacing = (1.0, 1.0, 1.0)
    shapes = {
        "ball": (_ball(6.0, spacing), 1),  # source: closed form, chi(ball) = 1
        "hollow ball": (_ball(8.0, spacing, hollow_um=4.0), 2),  # source: chi(sphere shell) = 2
        "torus": (_torus(10.0, 4.0), 0),  # source: closed form, chi(solid torus) = 0
    }
    for name, (shape, expected) in shapes.items():
        params = MeasureParams(connectivity=connectivity)
        out = measure(params, shape, spacing=spacing)
        assert out.data.columns["euler_number"][0] == expected, name
        assert out.values["euler_number"] == expected, name


@pytest.mark.parametrize(("connectivity", "skimage_connectivity"), [(6, 1), (26, 3)])
def test_euler_characteristic_matches_scikit_image(
    connectivity: int, skimage_connectivity: int
) -> None:
    rng = np.random.default_rng(7)
    for density in (0.1, 0.3, 0.5, 0.7):
        mask = rng.random((9, 10, 11)) < density
        # source: skimage.measure.euler_number (its own 3-D look-up tables)
        expected = skimage_euler_number(mask, connectivity=skimage_connectivity)
        assert m3.euler_characteristic(mask, connectivity) == expected


def test_per_object_euler_matches_each_object_alone() -> None:
    rng = np.random.default_rng(11)
    mask = ndimage.binary_opening(rng.random((16, 18, 20)) < 0.55)
    out = measure(MeasureParams(connectivity=26), mask, spacing=(1.0, 1.0, 1.0))
    labels, count = ndimage.label(mask, structure=np.ones((3, 3, 3)))
    for k in range(1, count + 1):
        # source: skimage.measure.euler_number of the object alone
        expected = skimage_euler_number(labels == k, connectivity=3)
        assert out.data.columns["euler_number"][k - 1] == expected


@pytest.mark.parametrize(("connectivity", "rank"), [(6, 1), (18, 2), (26, 3)])
def test_label_3d_matches_scipy(connectivity: int, rank: int) -> None:
    rng = np.random.default_rng(connectivity)
    mask = rng.random((12, 13, 14)) < 0.3
    # source: scipy.ndimage.label with generate_binary_structure(3, rank)
    expected, _ = ndimage.label(mask, structure=ndimage.generate_binary_structure(3, rank))
    got = label(LabelParams(connectivity=connectivity), mask, spacing=(1.0, 1.0, 1.0))
    np.testing.assert_array_equal(got, expected)


def test_esd_percentiles_match_numpy() -> None:
    rng = np.random.default_rng(3)
    mask = rng.random((20, 20, 20)) < 0.12
    out = measure(MeasureParams(connectivity=6), mask, spacing=(2.0, 1.0, 1.0))
    esd = out.data.columns["esd"]
    # source: numpy.percentile, method="linear" (Hyndman-Fan type 7)
    d10, d50, d90 = np.percentile(esd, [10, 50, 90], method="linear")
    assert (out.values["esd_d10"], out.values["esd_d50"], out.values["esd_d90"]) == (d10, d50, d90)
    # source: ISO 9276-2 moment means, x_1,0 = M_1,0 and x_1,3 = M_4,0 / M_3,0
    assert out.values["esd_mean"] == pytest.approx(np.mean(esd))
    assert out.values["esd_volume_mean"] == pytest.approx(np.sum(esd**4) / np.sum(esd**3))


@pytest.mark.parametrize(
    ("radius_um", "spacing"),
    [(5.0, (2.5, 1.0, 1.0)), (3.3, (1.1, 0.7, 0.9)), (4.0, (1.0, 0.5)), (2.0, (0.3, 0.7))],
)
def test_anisotropic_ball_and_disk_are_the_closed_form_ellipsoid(radius_um, spacing) -> None:
    footprint = "ball" if len(spacing) == 3 else "disk"
    params = MorphologyParams(footprint=footprint, radius=Length(radius_um, "um"))
    resolved = params.model_copy(update={"radius": resolve_for_spacing(params.radius, spacing)})
    got = build_footprint(resolved, len(spacing))
    halves = [(n - 1) // 2 for n in got.shape]
    grid = np.ogrid[tuple(slice(-h - 2, h + 3) for h in halves)]
    # source: closed form, {sum_k (p_k s_k / R)^2 <= 1}: every voxel centre within R um
    inside = sum((g * s) ** 2 for g, s in zip(grid, spacing, strict=False)) <= radius_um**2 * (
        1 + 1e-12
    )
    expected = inside[tuple(slice(2, -2) for _ in spacing)]
    np.testing.assert_array_equal(got, expected)
    # nothing of the closed-form shape lies outside the footprint's box
    assert inside.sum() == expected.sum()
