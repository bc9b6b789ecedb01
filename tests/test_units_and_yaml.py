"""Lengths and areas with units, and the strict YAML reader."""

from __future__ import annotations

import math

import pytest
from pydantic import BaseModel, ValidationError

from lotproof.runner.recipe.quantities import BoundError, parse_bound
from lotproof.runner.recipe.yamlpos import Position, load_yaml
from lotproof.steps import Area, Length, resolve_to_px


class _Model(BaseModel):
    radius: Length
    min_area: Area | None = None


@pytest.mark.parametrize(
    ("text", "value", "unit"),
    [
        ("3 px", 3.0, "px"),
        ("1.5 um", 1.5, "um"),
        ("1.5µm", 1.5, "um"),
        ("2 micron", 2.0, "um"),
        ("200 nm", 200.0, "nm"),
        ("0.1 mm", 0.1, "mm"),
        ("1e1 um", 10.0, "um"),
        ("1.5 μm", 1.5, "um"),
    ],
)
def test_length_spellings(text: str, value: float, unit: str) -> None:
    length = _Model(radius=text).radius
    assert (length.value, length.unit) == (value, unit)


@pytest.mark.parametrize(
    ("raw", "message"),
    [
        (3, "a bare number where a length belongs (got 3); write 3 px or 1.5 um"),
        ("3", "cannot read '3' as a length"),
        ("-3 um", "must be > 0 um (got -3 um)"),
        ("0 px", "must be > 0 px"),
        ("3 um2", "'3 um2' is an area, but a length belongs here"),
        ("3 inch", "unknown length unit 'inch'"),
        (True, "a length with its unit is needed"),
    ],
)
def test_length_errors(raw: object, message: str) -> None:
    with pytest.raises(ValidationError) as err:
        _Model(radius=raw)
    assert message in str(err.value)


def test_area_parse_and_resolution() -> None:
    model = _Model(radius="1 um", min_area="20 µm²")
    assert (model.min_area.value, model.min_area.unit) == (20.0, "um2")
    # 20 um2 at 0.5 um per pixel = 20 / 0.25 px2 (closed form)
    assert resolve_to_px(model.min_area, 0.5).px == 80.0
    with pytest.raises(ValidationError, match="is a length, but a area belongs"):
        _Model(radius="1 um", min_area="20 um")


def test_resolution_to_pixels() -> None:
    assert resolve_to_px(Length(1.5, "um"), 0.5).px == 3.0
    assert resolve_to_px(Length(200, "nm"), 0.1).px == 2.0
    assert resolve_to_px(Length(0.1, "mm"), 0.65).px == pytest.approx(153.846153846)
    assert resolve_to_px(Length(3, "px"), 0.65).px == 3.0
    # decimal noise must not shrink a disk: 0.6 / 0.2 is 2.9999999999999996 in binary
    assert 0.6 / 0.2 != 3.0
    assert resolve_to_px(Length(0.6, "um"), 0.2).px == 3.0
    with pytest.raises(ValueError, match="has not been resolved"):
        _ = Length(1, "um").px


def test_lengths_serialise_as_written() -> None:
    assert _Model(radius="1.5 um").model_dump(mode="json")["radius"] == "1.5 um"


@pytest.mark.parametrize(
    ("raw", "unit", "expected"),
    [
        (0.18, "-", 0.18),
        ("60 um", "um", 60.0),
        ("0.06 mm", "um", 60.0),
        ("150 1/mm2", "1/mm2", 150.0),
        ("1.5e-4 1/um2", "1/mm2", 150.0),
        (1, "-", 1.0),
    ],
)
def test_bounds_in_the_value_unit(raw: object, unit: str, expected: float) -> None:
    assert parse_bound(raw, unit) == pytest.approx(expected)


@pytest.mark.parametrize(
    ("raw", "unit", "message"),
    [
        (60, "um", "write 60 um"),
        ("60", "um", "write 60 um"),
        ("60 um2", "um", "does not fit"),
        ("0.1 um", "-", "dimensionless"),
        (True, "-", "a number is needed"),
    ],
)
def test_bound_errors(raw: object, unit: str, message: str) -> None:
    with pytest.raises(BoundError, match=message):
        parse_bound(raw, unit)


def test_yaml_12_scalars() -> None:
    # source: YAML 1.2 core schema (yaml.org/spec/1.2.2, 10.3) vs the YAML 1.1 traps in FIELD-NOTES
    data = load_yaml(
        "a: no\nb: off\nc: 010\nd: 12:30\ne: 1e3\nf: 2024-01-02\ng: ~\nh: true\ni: 0x1F\nj: .inf\nk: yes\n"
    ).data
    assert data == {
        "a": "no",
        "b": "off",
        "c": 10,
        "d": "12:30",
        "e": 1000.0,
        "f": "2024-01-02",
        "g": None,
        "h": True,
        "i": 31,
        "j": math.inf,
        "k": "yes",
    }


def test_yaml_positions_are_one_based() -> None:
    loaded = load_yaml("steps:\n  clean:\n    radius: 3 px\n")
    assert loaded.position(("steps", "clean", "radius")) == Position(3, 13)
    assert loaded.position(("steps", "clean", "radius"), key=True) == Position(3, 5)
    assert loaded.position(("steps", "clean", "missing")) == Position(2, 3)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("a: 1\na: 2\n", "duplicate key 'a'"),
        ("a: &x 1\nb: *x\n", "anchors"),
        ("a: *x\n", "aliases"),
        ("a: !!python/object:os.system x\n", "explicit tag"),
        ("[" * 200, "nesting deeper"),
        ("", "empty"),
        ("1: a\n", "a key must be text"),
    ],
)
def test_yaml_refusals(text: str, message: str) -> None:
    loaded = load_yaml(text)
    assert any(message in p.what for p in loaded.problems), loaded.problems


def test_billion_laughs_is_refused_without_expansion() -> None:
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
    lines += [f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 10) + "]" for i in range(1, 9)]
    loaded = load_yaml("\n".join(lines))
    assert loaded.data is None
    assert "anchors" in loaded.problems[0].what
