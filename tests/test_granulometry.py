"""Unit tests of the ``size-spectrum`` step kind."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pydantic import ValidationError

from lotproof.runner.evaluate.image import resolve_params
from lotproof.steps import REGISTRY, Output, Table
from lotproof.steps.granulometry import (
    MAX_RADII,
    SPECTRUM_COLUMNS,
    SPECTRUM_FOOTPRINTS,
    SPECTRUM_VALUES,
    SizeSpectrumParams,
    size_spectrum,
    spectrum_radii,
)
from lotproof.steps.units import Length


def spectrum(mask, max_radius, step=1.0, footprint="disk", spacing=(1.0, 1.0)) -> Output:
    params = SizeSpectrumParams(
        footprint=footprint, max_radius=Length(max_radius, "px"), step=Length(step, "px")
    )
    return size_spectrum(params, mask, spacing=spacing)


def column(out: Output, name: str) -> list[float]:
    assert isinstance(out.data, Table)
    return out.data.columns[name].tolist()


# --------------------------------------------------------------------------- registration


def test_registered_as_mask_to_table_with_values() -> None:
    kind = REGISTRY["size-spectrum"]
    assert kind.takes == (frozenset({"mask"}),)
    assert kind.gives == "table"
    assert dict(kind.values) == SPECTRUM_VALUES == {"mean_size": "um", "residual_fraction": "-"}
    assert kind.ndims == frozenset({2})
    assert kind.summary.startswith("Size spectrum by openings")


def test_parameters() -> None:
    params = SizeSpectrumParams(max_radius="20 um")
    assert params.footprint == "disk" and params.step == Length(1.0, "px")
    assert SPECTRUM_FOOTPRINTS == ("disk", "diamond", "square")
    with pytest.raises(ValidationError, match="max_radius"):
        SizeSpectrumParams()
    with pytest.raises(ValidationError, match="bare number"):
        SizeSpectrumParams(max_radius=20)
    with pytest.raises(ValidationError):
        SizeSpectrumParams(max_radius="20 um", footprint="line")
    resolved = resolve_params(SizeSpectrumParams(max_radius="20 um", step="0.8 um"), (0.8, 0.8))
    assert resolved.max_radius == Length(25.0, "px") and resolved.step == Length(1.0, "px")
    # the default step stays one pixel whatever the pixel size
    assert resolve_params(params, (0.8, 0.8)).step == Length(1.0, "px")


def test_spectrum_radii() -> None:
    assert spectrum_radii(5.0, 1.0) == [1.0, 2.0, 3.0, 4.0, 5.0]
    assert spectrum_radii(5.5, 2.0) == [2.0, 4.0]
    # 12 significant digits: 3 * 0.1 is 0.3, and 0.3 <= 0.3 is kept
    assert spectrum_radii(0.3, 0.1) == [0.1, 0.2, 0.3]
    with pytest.raises(ValueError, match="larger than max_radius"):
        spectrum_radii(1.0, 2.0)
    with pytest.raises(ValueError, match=f"more than {MAX_RADII}"):
        spectrum_radii(2000.0, 1.0)
    assert len(spectrum_radii(float(MAX_RADII), 1.0)) == MAX_RADII


# --------------------------------------------------------------------------- literal cases


def test_squares_vanish_at_the_first_radius_they_cannot_hold() -> None:
    # a 3x3 square (radius 1) and a 5x5 square (radius 2), far apart
    mask = np.zeros((12, 16), dtype=bool)
    mask[2:5, 2:5] = True
    mask[5:10, 8:13] = True
    out = spectrum(mask, 4.0, footprint="square", spacing=(0.5, 0.5))
    assert column(out, "radius_low") == [0.0, 0.5, 1.0, 1.5]
    assert column(out, "radius_high") == [0.5, 1.0, 1.5, 2.0]
    # 9 px removed by the opening of radius 2 px, 25 px by radius 3 px; 0.25 um2 per px
    assert column(out, "area_removed") == [0.0, 2.25, 6.25, 0.0]
    assert column(out, "fraction") == [0.0, 9 / 34, 25 / 34, 0.0]
    assert out.values["residual_fraction"] == 0.0
    # class midpoints 0.75 um and 1.25 um, weighted by 9 and 25 pixels
    assert out.values["mean_size"] == pytest.approx((9 * 0.75 + 25 * 1.25) / 34, rel=1e-15)
    assert dict(out.units) == SPECTRUM_VALUES
    assert dict(out.data.units) == SPECTRUM_COLUMNS
    for name in SPECTRUM_COLUMNS:
        assert out.data.columns[name].dtype == np.float64


def test_a_diamond_sieve() -> None:
    # the diamond of radius 2 (13 px) survives radius 2 and vanishes at radius 3
    mask = np.zeros((9, 9), dtype=bool)
    yy, xx = np.indices(mask.shape)
    mask[np.abs(yy - 4) + np.abs(xx - 4) <= 2] = True
    out = spectrum(mask, 3.0, footprint="diamond")
    assert column(out, "area_removed") == [0.0, 0.0, 13.0]
    assert out.values["mean_size"] == 2.5


def test_what_survives_every_opening_is_the_residual() -> None:
    mask = np.zeros((20, 20), dtype=bool)
    mask[1:3, 1:3] = True  # 2x2 px: holds no 3x3 square, removed at radius 1
    mask[5:16, 5:16] = True  # 121 px, survives radius 3
    out = spectrum(mask, 3.0, footprint="square")
    assert column(out, "area_removed") == [4.0, 0.0, 0.0]
    assert out.values["residual_fraction"] == 121 / 125
    assert sum(column(out, "fraction")) + out.values["residual_fraction"] == pytest.approx(1.0)
    assert out.values["mean_size"] == 0.5


def test_degenerate_masks() -> None:
    empty = spectrum(np.zeros((6, 6), bool), 2.0)
    assert column(empty, "area_removed") == [0.0, 0.0]
    assert all(math.isnan(f) for f in column(empty, "fraction"))
    assert math.isnan(empty.values["mean_size"])
    assert math.isnan(empty.values["residual_fraction"])
    # pixels outside the image are ignored, so a full mask survives every opening
    full = spectrum(np.ones((6, 6), bool), 2.0)
    assert column(full, "fraction") == [0.0, 0.0]
    assert math.isnan(full.values["mean_size"])
    assert full.values["residual_fraction"] == 1.0


def test_a_radius_larger_than_the_image() -> None:
    mask = np.zeros((5, 5), dtype=bool)
    mask[1:4, 1:4] = True
    out = spectrum(mask, 400.0, step=100.0)
    assert column(out, "area_removed") == [9.0, 0.0, 0.0, 0.0]


def test_bad_data_is_refused() -> None:
    with pytest.raises(ValueError, match="bool mask"):
        spectrum(np.zeros((4, 4), np.uint8), 2.0)
    with pytest.raises(ValueError, match="2D"):
        spectrum(np.zeros((3, 4, 4), bool), 2.0, spacing=(1.0, 1.0, 1.0))
    with pytest.raises(ValueError, match="square pixels"):
        spectrum(np.zeros((4, 4), bool), 2.0, spacing=(1.0, 2.0))
    with pytest.raises(ValueError, match="larger than max_radius"):
        spectrum(np.zeros((4, 4), bool), 2.0, step=3.0)


# --------------------------------------------------------------------------- properties

masks = hnp.arrays(
    dtype=np.bool_, shape=hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=24)
)


@settings(max_examples=100, deadline=None)
@given(
    mask=masks,
    footprint=st.sampled_from(SPECTRUM_FOOTPRINTS),
    step=st.sampled_from([0.5, 1.0, 1.5]),
)
def test_fractions_are_non_negative_and_sum_to_one_with_the_residual(mask, footprint, step) -> None:
    out = spectrum(mask, 6.0, step=step, footprint=footprint)
    removed = np.array(column(out, "area_removed"))
    assert np.all(removed >= 0)
    assert removed.sum() <= mask.sum()
    low, high = column(out, "radius_low"), column(out, "radius_high")
    assert low[0] == 0.0 and low[1:] == high[:-1] and high == sorted(high)
    if mask.any():
        total = sum(column(out, "fraction")) + out.values["residual_fraction"]
        assert total == pytest.approx(1.0, abs=1e-12)
        if removed.sum():
            assert low[0] <= out.values["mean_size"] <= high[-1]


@settings(max_examples=60, deadline=None)
@given(mask=masks, footprint=st.sampled_from(["diamond", "square"]))
def test_nested_sieves_equal_plain_openings(mask, footprint) -> None:
    # diamonds and squares of integer radii are openings of each other, so the
    # remaining area after radius r is the area of the opening by radius r alone
    from lotproof.steps import _morph
    from lotproof.steps.granulometry import _footprint

    out = spectrum(mask, 4.0, footprint=footprint)
    removed = np.cumsum(column(out, "area_removed"))
    for r, gone in zip([1.0, 2.0, 3.0, 4.0], removed, strict=False):
        fp = _footprint(footprint, r, [n - 1 for n in mask.shape])
        opened = _morph.dilate(_morph.erode(mask, fp), fp)
        assert int(mask.sum()) - int(opened.sum()) == gone
