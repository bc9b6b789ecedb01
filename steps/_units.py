"""Lengths and areas with units, as step parameters.

A recipe writes every length with its unit (``3 px``, ``1.5 um``, ``200 nm``,
``0.1 mm``) and every area likewise (``20 um2``, ``4 px2``). A bare number where a
length belongs is refused: a silent pixel/micrometre mix-up is the classic wrong
certificate.

Step functions never see physical units. Before a step runs, the runner turns
every :class:`Length` and :class:`Area` of its parameters into pixels with
:func:`resolve_to_px`, using the pixel size of the image being analysed. The
pixel value is kept as a real number (no rounding here); each footprint states
how it turns a real number of pixels into a digital shape (see
``steps/footprints.py``).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

from pydantic import GetCoreSchemaHandler, GetJsonSchemaHandler
from pydantic.json_schema import JsonSchemaValue
from pydantic_core import PydanticCustomError, core_schema

__all__ = [
    "LENGTH_UNITS",
    "AREA_UNITS",
    "Length",
    "Area",
    "parse_length",
    "parse_area",
    "resolve_to_px",
]

#: Length unit spellings -> (canonical name, micrometres per unit); ``px`` has no
#: physical size of its own.
LENGTH_UNITS: dict[str, tuple[str, float | None]] = {
    "nm": ("nm", 1e-3),
    "um": ("um", 1.0),
    "µm": ("um", 1.0),  # micro sign U+00B5
    "μm": ("um", 1.0),  # greek small letter mu U+03BC
    "micron": ("um", 1.0),
    "microns": ("um", 1.0),
    "mm": ("mm", 1e3),
    "px": ("px", None),
}

#: Area unit spellings -> (canonical name, square micrometres per unit).
AREA_UNITS: dict[str, tuple[str, float | None]] = {
    "nm2": ("nm2", 1e-6),
    "nm²": ("nm2", 1e-6),
    "um2": ("um2", 1.0),
    "µm2": ("um2", 1.0),
    "µm²": ("um2", 1.0),
    "μm2": ("um2", 1.0),
    "μm²": ("um2", 1.0),
    "um²": ("um2", 1.0),
    "mm2": ("mm2", 1e6),
    "mm²": ("mm2", 1e6),
    "px2": ("px2", None),
    "px²": ("px2", None),
}

_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\s\d].*?)\s*$")


def _format_number(value: float) -> str:
    return f"{value:.12g}"


@dataclass(frozen=True, slots=True)
class _Quantity:
    value: float
    unit: str

    def __str__(self) -> str:
        return f"{_format_number(self.value)} {self.unit}"

    @property
    def px(self) -> float:
        """The value in pixels (or square pixels); only after :func:`resolve_to_px`."""
        if self.unit not in ("px", "px2"):
            raise ValueError(f"{self} has not been resolved to pixels")
        return self.value

    @classmethod
    def __get_pydantic_core_schema__(
        cls, source: Any, handler: GetCoreSchemaHandler
    ) -> core_schema.CoreSchema:
        parse = parse_length if cls is Length else parse_area

        def validate(raw: Any) -> Any:
            if isinstance(raw, cls):
                return raw
            return parse(raw)

        return core_schema.no_info_plain_validator_function(
            validate, serialization=core_schema.plain_serializer_function_ser_schema(str)
        )

    @classmethod
    def __get_pydantic_json_schema__(
        cls, schema: core_schema.CoreSchema, handler: GetJsonSchemaHandler
    ) -> JsonSchemaValue:
        table = LENGTH_UNITS if cls is Length else AREA_UNITS
        units = "|".join(re.escape(u) for u in sorted(table, key=len, reverse=True))
        example = "1.5 um" if cls is Length else "20 um2"
        return {
            "type": "string",
            "pattern": rf"^\s*[+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*({units})\s*$",
            "description": f"a positive {cls.__name__.lower()} with its unit, e.g. '{example}'",
        }


class Length(_Quantity):
    """A positive length with a unit: ``nm``, ``um`` (``µm``, ``micron``), ``mm`` or ``px``."""

    __slots__ = ()


class Area(_Quantity):
    """A positive area with a unit: ``nm2``, ``um2`` (``µm²``), ``mm2`` or ``px2``."""

    __slots__ = ()


def _parse(raw: Any, table: dict[str, tuple[str, float | None]], cls: type, hint: str) -> Any:
    kind = cls.__name__.lower()
    if isinstance(raw, bool) or raw is None:
        raise PydanticCustomError(
            "quantity_type", "a {kind} with its unit is needed (got {got}); write {hint}",
            {"kind": kind, "got": repr(raw), "hint": hint},
        )
    if isinstance(raw, (int, float)):
        raise PydanticCustomError(
            "quantity_bare_number",
            "a bare number where a {kind} belongs (got {got}); write {hint}",
            {"kind": kind, "got": repr(raw), "hint": hint},
        )
    if not isinstance(raw, str):
        raise PydanticCustomError(
            "quantity_type", "a {kind} with its unit is needed (got {got}); write {hint}",
            {"kind": kind, "got": type(raw).__name__, "hint": hint},
        )
    match = _QUANTITY.match(raw)
    if not match:
        raise PydanticCustomError(
            "quantity_syntax", "cannot read {got} as a {kind}; write {hint}",
            {"kind": kind, "got": repr(raw), "hint": hint},
        )
    number, unit = match.groups()
    if unit not in table:
        other = AREA_UNITS if table is LENGTH_UNITS else LENGTH_UNITS
        if unit in other:
            raise PydanticCustomError(
                "quantity_wrong_dimension",
                "{got} is {other_kind}, but a {kind} belongs here; write {hint}",
                {
                    "got": repr(raw),
                    "kind": kind,
                    "other_kind": "an area" if other is AREA_UNITS else "a length",
                    "hint": hint,
                },
            )
        raise PydanticCustomError(
            "quantity_unit",
            "unknown {kind} unit {unit} in {got}; use one of {units}",
            {"kind": kind, "unit": repr(unit), "got": repr(raw), "units": ", ".join(table)},
        )
    value = float(number)
    if not math.isfinite(value) or value <= 0:
        raise PydanticCustomError(
            "quantity_positive", "must be > 0 {unit} (got {got})", {"unit": unit, "got": raw}
        )
    return cls(value, table[unit][0])


def parse_length(raw: Any) -> Length:
    """Read a length such as ``'1.5 um'`` or ``'3 px'``; raise a pydantic error otherwise."""
    return _parse(raw, LENGTH_UNITS, Length, "3 px or 1.5 um")


def parse_area(raw: Any) -> Area:
    """Read an area such as ``'20 um2'`` or ``'9 px2'``; raise a pydantic error otherwise."""
    return _parse(raw, AREA_UNITS, Area, "9 px2 or 20 um2")


def resolve_to_px(quantity: Length | Area, pixel_size_um: float) -> Length | Area:
    """Convert a length or area to pixels for an image with square pixels of ``pixel_size_um``.

    A length in ``um`` becomes ``value / pixel_size_um`` pixels, an area in ``um2``
    becomes ``value / pixel_size_um**2`` square pixels; values already in pixels are
    returned unchanged. The result is rounded to 12 significant digits, so that
    decimal inputs such as ``0.6 um`` at ``0.2 um`` per pixel give exactly 3 px
    rather than 2.9999999999999996 px (which would change a digital disk); no other
    rounding is applied.
    """
    if isinstance(quantity, Length):
        if quantity.unit == "px":
            return quantity
        per_unit = LENGTH_UNITS[quantity.unit][1]
        assert per_unit is not None
        return Length(_significant(quantity.value * per_unit / pixel_size_um), "px")
    if quantity.unit == "px2":
        return quantity
    per_unit = AREA_UNITS[quantity.unit][1]
    assert per_unit is not None
    return Area(_significant(quantity.value * per_unit / pixel_size_um**2), "px2")


def _significant(value: float) -> float:
    return float(f"{value:.12g}")
