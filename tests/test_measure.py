"""Unit tests of the ``label`` and ``measure`` step kinds: degenerate inputs, units,
order, dtypes, errors and invariants."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError

from lotproof.steps import Output, Table, get_kind
from lotproof.steps.connectivity import (
    CONNECTIVITIES,
    CONNECTIVITY_2D,
    CONNECTIVITY_3D,
    resolve_connectivity,
)
from lotproof.steps.measure import (
    IMAGE_VALUES,
    OBJECT_COLUMNS,
    LabelParams,
    MeasureParams,
    label,
    measure,
)

INT_COLUMNS = ("label", "euler_number", "touches_border")
ECD_VALUES = ("ecd_mean", "ecd_d10", "ecd_d50", "ecd_d90", "ecd_max")


def _run(data: np.ndarray, connectivity: int | None = None, spacing=(1.0, 1.0)) -> Output:
    return measure(MeasureParams(connectivity=connectivity), data, spacing=spacing)


def _check_table_types(table: Table) -> None:
    assert list(table.columns) == list(OBJECT_COLUMNS)
    for name, column in table.columns.items():
        assert column.ndim == 1
        expected = np.int32 if name in INT_COLUMNS else np.float64
        assert column.dtype == expected, name


# --- the step kinds as registered ------------------------------------------------


def test_registration() -> None:
    kind = get_kind("measure")
    assert kind.takes == (frozenset({"mask", "labels"}),)
    assert kind.gives == "table"
    assert kind.ndims == frozenset({2, 3})
    # every 2-D value is declared, with its unit (the 3-D ones: tests/test_volumes.py)
    assert {name: kind.values[name] for name in IMAGE_VALUES} == dict(IMAGE_VALUES)
    assert kind.summary.startswith("Measure every object")
    kind = get_kind("label")
    assert kind.takes == (frozenset({"mask"}),) and kind.gives == "labels"
    assert kind.ndims == frozenset({2, 3})


def test_connectivity_constants_and_params() -> None:
    assert CONNECTIVITY_2D == (4, 8) and CONNECTIVITY_3D == (6, 18, 26)
    assert CONNECTIVITIES == (4, 8, 6, 18, 26)
    for model in (LabelParams, MeasureParams):
        assert model().connectivity is None
        assert model.model_fields["connectivity"].description
        with pytest.raises(ValidationError):
            model(connectivity=5)
        with pytest.raises(ValidationError):
            model.model_validate({"keep": True})
        with pytest.raises(ValidationError):
            model().connectivity = 4  # frozen


def test_resolve_connectivity() -> None:
    assert resolve_connectivity(None, 2) == 8
    assert resolve_connectivity(None, 3) == 26
    assert resolve_connectivity(4, 2) == 4
    with pytest.raises(ValueError, match="does not apply to 3D"):
        resolve_connectivity(8, 3)
    with pytest.raises(ValueError, match="does not apply to 2D"):
        resolve_connectivity(6, 2)
    with pytest.raises(ValueError, match="2D or 3D"):
        resolve_connectivity(None, 1)


# --- degenerate inputs -------------------------------------------------------------


def test_empty_mask() -> None:
    out = _run(np.zeros((6, 7), dtype=bool), spacing=(0.5, 0.5))
    assert isinstance(out.data, Table)
    assert out.data.n_rows == 0
    _check_table_types(out.data)
    v = out.values
    assert v["count"] == 0.0
    assert v["area_fraction"] == 0.0
    assert v["number_density"] == 0.0
    assert v["contour_length"] == 0.0
    assert v["euler_number"] == 0.0
    assert v["n_l_x"] == 0.0 and v["n_l_y"] == 0.0
    for name in ECD_VALUES + ("mean_intercept", "mean_free_path"):
        assert math.isnan(v[name]), name


def test_single_pixel() -> None:
    mask = np.zeros((5, 5), dtype=bool)
    mask[2, 3] = True
    out = _run(mask, spacing=(0.5, 0.5))
    t = {name: column.tolist() for name, column in out.data.columns.items()}
    assert t["label"] == [1]
    assert t["area"] == [0.25]
    assert t["ecd"] == pytest.approx([math.sqrt(1 / math.pi)], rel=1e-15)
    # source: skimage.measure.perimeter_crofton of one pixel, pi/2 + pi/(2 sqrt 2) px
    one_pixel = math.pi / 2 + math.pi / (2 * math.sqrt(2))
    assert t["perimeter"] == pytest.approx([0.5 * one_pixel], rel=1e-15)
    # source: closed form, two opposite edge midpoints of the pixel are 1 px apart
    assert t["feret_max"] == [0.5]
    assert t["major_axis"] == [0.0] and t["minor_axis"] == [0.0]
    assert t["circularity"][0] > 1.0  # documented: tiny objects exceed 1
    assert t["euler_number"] == [1]
    assert t["centroid_x"] == [1.5] and t["centroid_y"] == [1.0]
    assert t["touches_border"] == [0]
    v = out.values
    assert v["count"] == 1.0
    assert v["area_fraction"] == pytest.approx(1 / 25, rel=1e-15)
    # source: closed form: 1 / (0.25 um2 * 25) = 0.16 per um2 = 160000 per mm2
    assert v["number_density"] == pytest.approx(160_000.0, rel=1e-12)
    # source: closed form: one feature crossed on 5 lines of 2.5 um -> 0.08 / um
    assert v["n_l_x"] == pytest.approx(80.0, rel=1e-12)
    assert v["n_l_y"] == pytest.approx(80.0, rel=1e-12)
    assert v["mean_intercept"] == pytest.approx(0.5, rel=1e-12)  # one pixel
    assert v["mean_free_path"] == pytest.approx(12.0, rel=1e-12)
    for name in ECD_VALUES:
        assert v[name] == pytest.approx(math.sqrt(1 / math.pi), rel=1e-15)


@pytest.mark.parametrize("where", [(0, 2), (4, 2), (2, 0), (2, 4)])
def test_touches_border_on_each_side(where: tuple[int, int]) -> None:
    mask = np.zeros((5, 5), dtype=bool)
    mask[where] = True
    mask[2, 2] = True
    mask[min(where[0], 2) : max(where[0], 2) + 1, min(where[1], 2) : max(where[1], 2) + 1] = True
    assert _run(mask).data.columns["touches_border"].tolist() == [1]


def test_full_mask() -> None:
    out = _run(np.ones((4, 6), dtype=bool), spacing=(2.0, 2.0))
    t = out.data.columns
    assert t["label"].tolist() == [1]
    assert t["area"].tolist() == [96.0]
    assert t["touches_border"].tolist() == [1]
    assert t["euler_number"].tolist() == [1]
    # source: closed form, midpoints (0, -0.5) and (3, 5.5): sqrt(3^2 + 6^2) px
    assert t["feret_max"][0] == pytest.approx(2.0 * math.sqrt(45.0), rel=1e-15)
    # source: closed form, variance of 0..n-1 is (n^2 - 1) / 12; axis = 4 sqrt(var)
    assert t["major_axis"][0] == pytest.approx(2.0 * 4 * math.sqrt(35 / 12), rel=1e-12)
    assert t["minor_axis"][0] == pytest.approx(2.0 * 4 * math.sqrt(15 / 12), rel=1e-12)
    assert t["centroid_x"][0] == pytest.approx(5.0) and t["centroid_y"][0] == pytest.approx(3.0)
    v = out.values
    assert v["count"] == 1.0 and v["area_fraction"] == 1.0 and v["euler_number"] == 1.0
    # No boundary on any test line: no feature crossed, no intercept length.
    assert v["n_l_x"] == 0.0 and v["n_l_y"] == 0.0
    assert math.isnan(v["mean_intercept"]) and math.isnan(v["mean_free_path"])


def test_square_literals() -> None:
    mask = np.zeros((14, 14), dtype=bool)
    mask[2:12, 2:12] = True
    t = _run(mask).data.columns
    # source: skimage regionprops perimeter_crofton of a 10 x 10 square, 36.81 (FIELD-NOTES)
    assert t["perimeter"][0] == pytest.approx(36.811657224201205, rel=1e-12)
    # source: closed form, edge midpoints (-0.5, 0) and (9.5, 9): sqrt(181)
    assert t["feret_max"][0] == pytest.approx(math.sqrt(181.0), rel=1e-15)
    bar = np.zeros((3, 12), dtype=bool)
    bar[1, 1:11] = True
    # source: closed form, end midpoints (0, -0.5) and (0, 9.5) of a 1 x 10 bar
    assert _run(bar).data.columns["feret_max"].tolist() == [10.0]


# --- units, order, dtypes ---------------------------------------------------------


def test_units_declared_for_every_column_and_value() -> None:
    rng = np.random.default_rng(3)
    out = _run(rng.random((20, 20)) < 0.4, spacing=(0.65, 0.65))
    assert dict(out.units) == IMAGE_VALUES
    assert set(out.values) == set(IMAGE_VALUES)
    assert all(type(value) is float for value in out.values.values())
    assert dict(out.data.units) == OBJECT_COLUMNS
    assert set(out.data.columns) == set(OBJECT_COLUMNS)
    _check_table_types(out.data)
    assert OBJECT_COLUMNS["area"] == "um2" and IMAGE_VALUES["number_density"] == "1/mm2"
    assert IMAGE_VALUES["n_l_x"] == "1/mm" and IMAGE_VALUES["mean_free_path"] == "um"


def test_table_sorted_by_label_and_labels_kept() -> None:
    labels = np.zeros((6, 9), dtype=np.int32)
    labels[0, 0:2] = 12  # first in raster order
    labels[2, 3] = 7
    labels[4:6, 6:9] = 3
    out = _run(labels)
    t = out.data.columns
    assert t["label"].tolist() == [3, 7, 12]
    assert t["label"].dtype == np.int32
    assert t["area"].tolist() == [6.0, 1.0, 2.0]
    assert out.values["count"] == 3.0


def test_mask_rows_are_labels_in_raster_order() -> None:
    mask = np.zeros((5, 5), dtype=bool)
    mask[0, 4] = mask[3, 0] = mask[3, 3] = True
    t = _run(mask).data.columns
    assert t["label"].tolist() == [1, 2, 3]
    assert t["centroid_y"].tolist() == [0.0, 3.0, 3.0]
    assert t["centroid_x"].tolist() == [4.0, 0.0, 3.0]


def test_label_output() -> None:
    mask = np.array([[1, 0, 0, 1], [0, 1, 0, 1], [0, 0, 0, 0], [1, 1, 0, 1]], dtype=bool)
    eight = label(LabelParams(), mask, spacing=(1.0, 1.0))
    four = label(LabelParams(connectivity=4), mask, spacing=(1.0, 1.0))
    assert eight.dtype == np.int32 and four.dtype == np.int32
    np.testing.assert_array_equal(eight, [[1, 0, 0, 2], [0, 1, 0, 2], [0, 0, 0, 0], [3, 3, 0, 4]])
    np.testing.assert_array_equal(four, [[1, 0, 0, 2], [0, 3, 0, 2], [0, 0, 0, 0], [4, 4, 0, 5]])
    volume = np.zeros((2, 2, 2), dtype=bool)
    volume[0, 0, 0] = volume[1, 1, 1] = True
    assert label(LabelParams(), volume, spacing=(1.0,) * 3).max() == 1  # 26 by default
    assert label(LabelParams(connectivity=18), volume, spacing=(1.0,) * 3).max() == 2
    empty = label(LabelParams(), np.zeros((3, 3), dtype=bool), spacing=(1.0, 1.0))
    assert empty.dtype == np.int32 and not empty.any()


# --- errors ---------------------------------------------------------------------------


def test_errors() -> None:
    mask = np.ones((3, 3), dtype=bool)
    with pytest.raises(ValueError, match="square pixels"):
        _run(mask, spacing=(0.5, 0.6))
    with pytest.raises(ValueError, match=r"\(dy, dx\)"):
        _run(mask, spacing=(0.5,))
    with pytest.raises(ValueError, match="> 0"):
        _run(mask, spacing=(0.0, 0.0))
    with pytest.raises(ValueError, match="2D images and 3D volumes"):
        _run(np.ones((2, 2, 3, 3), dtype=bool), spacing=(1.0,) * 4)
    with pytest.raises(ValueError, match=r"bool.*integer"):
        _run(np.ones((3, 3), dtype=np.float32))
    with pytest.raises(ValueError, match=">= 0"):
        _run(np.array([[0, -1]], dtype=np.int32))
    with pytest.raises(ValueError, match="at least one pixel"):
        _run(np.ones((0, 3), dtype=bool))
    with pytest.raises(ValueError, match="does not apply to 2D"):
        _run(mask, connectivity=26)
    with pytest.raises(ValueError, match="does not apply to 3D"):
        label(LabelParams(connectivity=4), np.ones((2, 2, 2), dtype=bool), spacing=(1.0,) * 3)
    with pytest.raises(ValueError, match="mask of bool"):
        label(LabelParams(), np.ones((2, 2), dtype=np.uint8), spacing=(1.0, 1.0))


# --- invariants -------------------------------------------------------------------------

masks = hnp.arrays(np.bool_, hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=12))


@settings(max_examples=60, deadline=None, database=None)
@given(mask=masks, connectivity=st.sampled_from([4, 8]))
def test_transpose_swaps_axes_and_keeps_the_rest(mask: np.ndarray, connectivity: int) -> None:
    # source: common practice, no source: measurements of the same set turned
    # over the diagonal; x and y quantities swap, all others stay
    a = _run(mask, connectivity, spacing=(0.5, 0.5))
    b = _run(np.ascontiguousarray(mask.T), connectivity, spacing=(0.5, 0.5))
    ta, tb = a.data.columns, b.data.columns
    # Match objects through their pixels: object k of `a` is, turned over, the
    # object of `b` under the transposed position of any of its pixels.
    params = LabelParams(connectivity=connectivity)
    labels_a = label(params, mask, spacing=(0.5, 0.5))
    labels_b = label(params, np.ascontiguousarray(mask.T), spacing=(0.5, 0.5))
    flat = labels_a.ravel()
    _, first = np.unique(flat, return_index=True)
    first = first[flat[first] > 0]
    rows, cols = np.unravel_index(first, mask.shape)
    order_a = flat[first] - 1
    order = labels_b[cols, rows] - 1
    kept = ("area", "perimeter", "feret_max", "major_axis", "minor_axis", "euler_number")
    for name in kept + ("touches_border",):
        np.testing.assert_allclose(
            ta[name][order_a], tb[name][order], rtol=1e-9, atol=1e-7, err_msg=name
        )
    np.testing.assert_allclose(ta["centroid_x"][order_a], tb["centroid_y"][order], rtol=1e-12)
    va, vb = a.values, b.values
    assert va["n_l_x"] == pytest.approx(vb["n_l_y"], rel=1e-12)
    assert va["n_l_y"] == pytest.approx(vb["n_l_x"], rel=1e-12)
    for name in ("count", "area_fraction", "euler_number", "contour_length", "ecd_d50"):
        assert va[name] == pytest.approx(vb[name], rel=1e-12, nan_ok=True), name


@settings(max_examples=60, deadline=None, database=None)
@given(mask=masks)
def test_labels_input_agrees_with_mask_input(mask: np.ndarray) -> None:
    from_mask = _run(mask, 8, spacing=(0.65, 0.65))
    labels = label(LabelParams(connectivity=8), mask, spacing=(0.65, 0.65))
    # Sparse, shuffled label numbers: the same objects, numbered differently.
    renumber = np.concatenate(([0], 1000 + 7 * np.arange(1, labels.max() + 1)))
    from_labels = _run(renumber[labels].astype(np.int32), 8, spacing=(0.65, 0.65))
    for name, column in from_mask.data.columns.items():
        if name != "label":
            np.testing.assert_array_equal(column, from_labels.data.columns[name], err_msg=name)
    np.testing.assert_array_equal(from_labels.data.columns["label"], renumber[1:])
    assert from_mask.values == pytest.approx(from_labels.values, nan_ok=True)
    # source: closed form: the objects' areas add up to the foreground area
    field = mask.size * 0.65 * 0.65
    total = from_mask.data.columns["area"].sum()
    assert total == pytest.approx(from_mask.values["area_fraction"] * field)
