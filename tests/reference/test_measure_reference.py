"""Reference checks of ``label`` and ``measure`` against sources outside lotproof.

Sources: closed-form geometry and stereology, Gray's bit-quad Euler numbers,
scipy.ndimage.label, and scikit-image 0.26's regionprops / perimeter_crofton /
euler_number, which define the same per-object quantities.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage import measure as skm

from lotproof.steps.measure import LabelParams, MeasureParams, label, measure

SQUARE_UM = (0.5, 0.5)


def _disk(radius: int, margin: int = 5) -> np.ndarray:
    size = 2 * radius + 1 + 2 * margin
    yy, xx = np.mgrid[:size, :size] - (radius + margin)
    return xx * xx + yy * yy <= radius * radius


def _run(data: np.ndarray, connectivity: int | None = None, spacing=(1.0, 1.0)):
    return measure(MeasureParams(connectivity=connectivity), data, spacing=spacing)


# --- digital disks ---------------------------------------------------------------


@pytest.mark.parametrize("radius", [10, 20, 40])
def test_disk_area_and_perimeter(radius: int) -> None:
    out = _run(_disk(radius))
    table = out.data.columns
    assert out.values["count"] == 1.0
    # source: closed form, lattice points counted one by one (Gauss circle
    # problem; N(10) = 317 is OEIS A000328, from memory)
    span = range(-radius, radius + 1)
    lattice = sum(1 for y in span for x in span if x * x + y * y <= radius * radius)
    assert table["area"][0] == lattice
    if radius == 10:
        assert lattice == 317
    # source: closed form, area of a disk pi r^2. Tolerance 1 %: the lattice
    # count differs from pi r^2 by far less than the ring of boundary pixels
    # (0.9 % at r = 10, 0.03 % at r = 20 and 40).
    assert table["area"][0] == pytest.approx(math.pi * radius**2, rel=0.01)
    # source: closed form, circumference 2 pi r. Tolerance 3 px absolute (4.8 %
    # at r = 10, 1.2 % at r = 40): four-direction Crofton has no bias on a
    # circle (its widths are equal in all four directions), so what remains is
    # the digitisation of the boundary, a few pixels whatever the radius
    # (observed 2.4, 2.1, 1.4 px).
    assert abs(table["perimeter"][0] - 2 * math.pi * radius) <= 3.0
    # source: closed form, an ellipse of equal axes: 4 sqrt(variance) = 2 r for
    # a uniform disk (variance r^2 / 4); digitisation error well below 1 %.
    assert table["major_axis"][0] == pytest.approx(2 * radius, rel=0.01)
    assert table["minor_axis"][0] == pytest.approx(2 * radius, rel=0.01)
    # source: closed form: (0, -r - 0.5) and (0, r + 0.5) are contour points,
    # and no contour point lies farther than r + 1 from the centre (hull pixel
    # centres within r + 0.5, midpoints half a pixel beyond): 2r + 1 <= F <= 2r + 2
    assert 2 * radius + 1 <= table["feret_max"][0] <= 2 * radius + 2


def _round_disk(radius: float) -> np.ndarray:
    """The digital disk {x^2 + y^2 <= r^2} for any real radius, with a margin of 5 px."""
    half = math.floor(radius) + 5
    yy, xx = np.mgrid[-half : half + 1, -half : half + 1]
    return xx * xx + yy * yy <= radius * radius


@pytest.mark.parametrize("radius", [2.5, 5, 10, 10.5, 17.5, 20, 40, 80])
def test_circularity_of_digital_disks_is_4_pi_a_over_the_crofton_perimeter_squared(
    radius: float,
) -> None:
    mask = _round_disk(radius)
    circularity = _run(mask).data.columns["circularity"][0]
    # source: closed form 4 pi A / P^2, with A the lattice points of the disk counted
    # row by row (Gauss circle problem: 2 floor(sqrt(r^2 - y^2)) + 1 per row y) and P
    # scikit-image 0.26's perimeter_crofton(directions=4), an independent implementation
    rows = range(-math.floor(radius), math.floor(radius) + 1)
    # (for r^2 - y^2 = k + 1/4, floor(sqrt(k + 1/4)) = isqrt(k): no square lies in between)
    lattice = sum(2 * math.isqrt(int(radius * radius - y * y)) + 1 for y in rows)
    assert mask.sum() == lattice
    perimeter = skm.perimeter_crofton(mask, directions=4)
    assert circularity == pytest.approx(4 * math.pi * lattice / perimeter**2, rel=1e-12)
    # source: closed form, a true disk gives 4 pi (pi r^2) / (2 pi r)^2 = 1; the digital
    # one differs by the digitisation of its edge, a few per cent at these radii
    assert abs(circularity - 1) < (0.12 if radius < 10 else 0.07 if radius < 40 else 0.012)


def test_circularity_is_not_bounded_by_one_as_its_definition_says() -> None:
    from lotproof.steps.measure import COLUMN_DEFINITIONS

    def circularity(radius: float) -> float:
        return float(_run(_round_disk(radius)).data.columns["circularity"][0])

    # source: the value computed above; the definition states these ranges, and that the
    # estimator exceeds 1 (4 pi A / P^2 of a true disk is exactly 1)
    assert "not bounded by 1" in COLUMN_DEFINITIONS["circularity"]
    assert "Crofton" in COLUMN_DEFINITIONS["circularity"]
    assert circularity(10.5) > 1.02
    middle = [circularity(r) for r in np.arange(10, 40.01, 0.5)]
    assert min(middle) >= 0.93 and max(middle) <= 1.04
    large = [circularity(r) for r in np.arange(40, 100.01, 2.5)]
    assert min(large) >= 0.98 and max(large) <= 1.01


# --- Euler numbers -----------------------------------------------------------------


def _ring(outer: int, inner: int) -> np.ndarray:
    disk = _disk(outer)
    yy, xx = np.mgrid[: disk.shape[0], : disk.shape[1]] - (outer + 5)
    return disk & (xx * xx + yy * yy > inner * inner)


@pytest.mark.parametrize("connectivity", [4, 8])
def test_euler_numbers_of_simple_shapes(connectivity: int) -> None:
    # source: closed form, Euler number = objects - holes: disk 1, ring 0, two disks 2
    assert _run(_disk(6), connectivity).values["euler_number"] == 1.0
    ring = _run(_ring(9, 4), connectivity)
    assert ring.values["euler_number"] == 0.0
    assert ring.data.columns["euler_number"].tolist() == [0]
    two = np.zeros((20, 40), dtype=bool)
    two[2:17, 2:17] = _disk(7, margin=0)
    two[2:17, 22:37] = _disk(7, margin=0)
    both = _run(two, connectivity)
    assert both.values["euler_number"] == 2.0
    assert both.data.columns["euler_number"].tolist() == [1, 1]


def test_euler_number_of_a_diagonal_pair() -> None:
    pair = np.array([[1, 0], [0, 1]], dtype=bool)
    # source: closed form, Gray 1971: diagonal neighbours are two objects under
    # 4-connectivity and one under 8-connectivity
    four = _run(pair, 4)
    eight = _run(pair, 8)
    assert (four.values["count"], four.values["euler_number"]) == (2.0, 2.0)
    assert (eight.values["count"], eight.values["euler_number"]) == (1.0, 1.0)
    # source: skimage.measure.euler_number with connectivity 1 / 2
    assert skm.euler_number(pair, connectivity=1) == 2
    assert skm.euler_number(pair, connectivity=2) == 1


def test_euler_number_of_a_diamond_outline() -> None:
    yy, xx = np.mgrid[:9, :9] - 4
    diamond = np.abs(xx) + np.abs(yy) == 3  # 12 pixels touching only at corners
    # source: closed form: under 8-connectivity one loop round one hole (E = 0);
    # under 4-connectivity 12 single pixels and no hole (E = 12)
    assert _run(diamond, 8).values["euler_number"] == 0.0
    assert _run(diamond, 4).values["euler_number"] == 12.0
    assert _run(diamond, 4).values["count"] == 12.0


# --- per object: regionprops -----------------------------------------------------


def _random_masks():
    rng = np.random.default_rng(20261201)
    for _ in range(12):
        shape = (int(rng.integers(8, 48)), int(rng.integers(8, 48)))
        noise = ndi.gaussian_filter(rng.random(shape), float(rng.uniform(0.0, 2.0)))
        yield noise > np.quantile(noise, float(rng.uniform(0.3, 0.8)))


def _close(ours: np.ndarray, theirs: np.ndarray, atol: float = 0.0) -> None:
    np.testing.assert_allclose(ours, theirs, rtol=1e-9, atol=atol)


def _compare_with_regionprops(out, label_image: np.ndarray, connectivity: int) -> None:
    table = out.data.columns
    props = skm.regionprops(label_image, spacing=SQUARE_UM)
    assert table["label"].tolist() == [p.label for p in props]
    # source: skimage.measure.regionprops (area, equivalent_diameter_area,
    # perimeter_crofton, feret_diameter_max, axis_*_length, centroid)
    _close(table["area"], [p.area for p in props])
    _close(table["ecd"], [p.equivalent_diameter_area for p in props])
    _close(table["perimeter"], [p.perimeter_crofton for p in props])
    _close(table["feret_max"], [p.feret_diameter_max for p in props])
    _close(table["major_axis"], [p.axis_major_length for p in props])
    # A zero minor axis (pixels on one line) is the square root of a rounding
    # residue in both codes: compare it on the scale of the major axis.
    major = np.array([p.axis_major_length for p in props])
    minor = np.array([p.axis_minor_length for p in props])
    assert np.all(np.abs(table["minor_axis"] - minor) <= 1e-9 * minor + 1e-7 * major)
    _close(table["centroid_y"], [p.centroid[0] for p in props])
    _close(table["centroid_x"], [p.centroid[1] for p in props])
    # source: skimage.measure.euler_number of the object's own image
    sk_conn = 1 if connectivity == 4 else 2
    assert table["euler_number"].tolist() == [
        skm.euler_number(p.image, connectivity=sk_conn) for p in props
    ]


@pytest.mark.parametrize("connectivity", [4, 8])
def test_objects_match_regionprops_on_random_masks(connectivity: int) -> None:
    for mask in _random_masks():
        out = _run(mask, connectivity, spacing=SQUARE_UM)
        # source: skimage.measure.label with the matching connectivity
        reference = skm.label(mask, connectivity=1 if connectivity == 4 else 2)
        _compare_with_regionprops(out, reference, connectivity)


def test_objects_match_regionprops_on_touching_labels() -> None:
    rng = np.random.default_rng(7)
    for _ in range(6):
        labels = rng.integers(0, 6, size=(30, 34)).astype(np.int32)
        labels[labels == 3] = 0  # a label number that never occurs
        out = _run(labels, 8, spacing=SQUARE_UM)
        _compare_with_regionprops(out, labels, 8)


def _shapes() -> dict[str, np.ndarray]:
    from skimage import draw

    shapes = {}
    image = np.zeros((120, 200), dtype=np.int32)
    rr, cc = draw.disk((60, 130), 50)
    image[rr, cc] = 1
    image[60, 3:90] = 1  # a long spike: the hull chain loses its points one by one
    shapes["lollipop"] = image
    image = np.zeros((90, 90), dtype=np.int32)
    rr, cc = draw.ellipse(45, 45, 40, 9, rotation=0.6)
    image[rr, cc] = 2
    rr, cc = draw.line(2, 3, 85, 70)
    image[rr, cc] = 5
    shapes["ellipse and line"] = image
    rng = np.random.default_rng(11)
    # Labels scattered with gaps: rows and columns without pixels inside a box.
    scattered = (rng.random((60, 70)) < 0.03) * rng.integers(1, 9, (60, 70))
    shapes["scattered labels"] = scattered.astype(np.int32)
    return shapes


@pytest.mark.parametrize("name", ["lollipop", "ellipse and line", "scattered labels"])
def test_feret_and_axes_match_regionprops_on_hard_shapes(name: str) -> None:
    labels = _shapes()[name]
    out = _run(labels, 8, spacing=SQUARE_UM)
    _compare_with_regionprops(out, labels, 8)


def test_image_values_match_whole_mask_references() -> None:
    for mask in _random_masks():
        for connectivity in (4, 8):
            values = _run(mask, connectivity, spacing=SQUARE_UM).values
            sk_conn = 1 if connectivity == 4 else 2
            # source: skimage.measure.euler_number of the whole mask
            assert values["euler_number"] == skm.euler_number(mask, connectivity=sk_conn)
        # source: skimage.measure.perimeter_crofton(directions=4) of the whole mask:
        # 8-connected objects never share a 2x2 window, so the sum of their
        # perimeters is the perimeter of the mask.
        values = _run(mask, 8, spacing=SQUARE_UM).values
        expected = skm.perimeter_crofton(mask, directions=4) * SQUARE_UM[0]
        assert values["contour_length"] == pytest.approx(expected, rel=1e-9)


# --- label -----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ndim", "connectivity", "rank"),
    [(2, 4, 1), (2, 8, 2), (2, None, 2), (3, 6, 1), (3, 18, 2), (3, 26, 3), (3, None, 3)],
)
def test_label_matches_scipy(ndim: int, connectivity: int | None, rank: int) -> None:
    rng = np.random.default_rng(ndim * 100 + (connectivity or 0))
    shape = (30, 31) if ndim == 2 else (9, 10, 11)
    mask = rng.random(shape) < 0.45
    ours = label(LabelParams(connectivity=connectivity), mask, spacing=(1.0,) * ndim)
    # source: scipy.ndimage.label with the explicit structure of that connectivity
    theirs, count = ndi.label(mask, structure=ndi.generate_binary_structure(ndim, rank))
    assert ours.dtype == np.int32
    np.testing.assert_array_equal(ours, theirs)
    # source: common practice, no source: objects numbered by first pixel in C order
    flat = ours.ravel()
    first_seen = flat[np.sort(np.unique(flat, return_index=True)[1])]
    assert first_seen[first_seen > 0].tolist() == list(range(1, count + 1))


# --- stereology ------------------------------------------------------------------


@pytest.mark.parametrize(("period", "width", "repeats", "dx"), [(5, 2, 6, 1.0), (8, 3, 4, 0.65)])
def test_stripes_give_closed_form_stereology(
    period: int, width: int, repeats: int, dx: float
) -> None:
    # Vertical stripes, columns 1..width of every period: none touches the frame.
    height = 7
    cols = np.arange(period * repeats)
    phase = cols % period
    stripes = np.broadcast_to((phase >= 1) & (phase <= width), (height, cols.size))
    values = _run(np.ascontiguousarray(stripes), spacing=(dx, dx)).values
    # source: closed form (Underwood 1970): along x every stripe is crossed once,
    # N_L,x = 1 / (period dx); along y no boundary is crossed; A_A = width / period
    area_fraction = width / period
    n_l_x = 1.0 / (period * dx)  # 1/um
    n_l = (n_l_x + 0.0) / 2
    assert values["area_fraction"] == pytest.approx(area_fraction, rel=1e-12)
    assert values["n_l_x"] == pytest.approx(n_l_x * 1e3, rel=1e-12)
    assert values["n_l_y"] == 0.0
    # source: closed form, L_3 = A_A / N_L and lambda = (1 - A_A) / N_L (Underwood 1970)
    assert values["mean_intercept"] == pytest.approx(area_fraction / n_l, rel=1e-12)
    assert values["mean_intercept"] == pytest.approx(2 * width * dx, rel=1e-12)
    assert values["mean_free_path"] == pytest.approx(2 * (period - width) * dx, rel=1e-12)
    # Turned by 90 degrees the two directions swap.
    turned = _run(np.ascontiguousarray(stripes.T), spacing=(dx, dx)).values
    assert turned["n_l_y"] == pytest.approx(n_l_x * 1e3, rel=1e-12)
    assert turned["n_l_x"] == 0.0


def test_squares_grid_stereology_and_density() -> None:
    # A grid of 3 x 3 px squares at a 6 px period, not touching the frame.
    period, side, repeats, dx = 6, 3, 5, 0.5
    index = np.arange(period * repeats)
    on = (index % period >= 1) & (index % period <= side)
    grid = on[:, None] & on[None, :]
    values = _run(grid, spacing=(dx, dx)).values
    # source: closed form: lines through a row of squares cross `repeats`
    # squares, the other rows none; side/period of the rows pass through squares
    n_l = (side / period) * repeats / (period * repeats * dx)  # 1/um, both directions
    area_fraction = (side / period) ** 2
    assert values["n_l_x"] == pytest.approx(n_l * 1e3, rel=1e-12)
    assert values["n_l_y"] == pytest.approx(n_l * 1e3, rel=1e-12)
    # source: closed form, L_3 = A_A / N_L = side dx for squares crossed parallel to a side
    assert values["mean_intercept"] == pytest.approx(side * dx, rel=1e-12)
    assert values["mean_intercept"] == pytest.approx(area_fraction / n_l, rel=1e-12)
    assert values["mean_free_path"] == pytest.approx((1 - area_fraction) / n_l, rel=1e-12)
    # source: closed form, number density = objects / field area (um2 -> mm2)
    field_mm2 = (period * repeats * dx) ** 2 * 1e-6
    assert values["count"] == repeats**2
    assert values["number_density"] == pytest.approx(repeats**2 / field_mm2, rel=1e-12)


def test_run_touching_the_frame_counts_half() -> None:
    mask = np.zeros((4, 10), dtype=bool)
    mask[:, :3] = True  # touches the left end of every row
    values = _run(mask).values
    # source: common practice (lineal intercept counting, e.g. ASTM E112): a
    # segment cut by the end of the test line counts one half
    assert values["n_l_x"] == pytest.approx(0.5 / 10 * 1e3, rel=1e-12)
    assert values["n_l_y"] == 0.0


# --- size statistics --------------------------------------------------------------


def _type7(sorted_values: np.ndarray, p: float) -> float:
    # source: Hyndman & Fan 1996, definition 7: h = (n - 1) p, linear between
    # the order statistics x_(floor h) and x_(floor h + 1) (0-based)
    h = (len(sorted_values) - 1) * p
    lo = math.floor(h)
    hi = min(lo + 1, len(sorted_values) - 1)
    return float(sorted_values[lo] + (h - lo) * (sorted_values[hi] - sorted_values[lo]))


def test_ecd_statistics_closed_form_and_numpy() -> None:
    sides = [1, 2, 2, 3, 5, 4, 7]
    mask = np.zeros((10, 60), dtype=bool)
    x = 1
    for side in sides:
        mask[1 : 1 + side, x : x + side] = True
        x += side + 1
    dx = 0.65
    values = _run(mask, spacing=(dx, dx)).values
    # source: closed form, ecd = sqrt(4 A / pi) of squares of side s pixels
    ecd = np.sort(np.sqrt(4 * (np.array(sides, dtype=float) * dx) ** 2 / np.pi))
    for name, p in (("ecd_d10", 0.1), ("ecd_d50", 0.5), ("ecd_d90", 0.9)):
        assert values[name] == pytest.approx(_type7(ecd, p), rel=1e-12)
        # source: numpy.percentile, method="linear" (type 7)
        expected = np.percentile(ecd, 100 * p, method="linear")
        assert values[name] == pytest.approx(expected, rel=1e-12)
    assert values["ecd_mean"] == pytest.approx(float(np.mean(ecd)), rel=1e-12)
    assert values["ecd_max"] == pytest.approx(7 * dx * math.sqrt(4 / math.pi), rel=1e-12)
