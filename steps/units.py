"""Lengths, areas and volumes with units, as step parameters.

A recipe writes every length with its unit (``3 px``, ``1.5 um``, ``200 nm``,
``0.1 mm``), every area likewise (``20 um2``, ``4 px2``) and every volume
(``500 um3``, ``27 px3``). A bare number where a length belongs is refused: a
silent pixel/micrometre mix-up is the classic wrong certificate.

Step functions never see physical units. Before a step runs, the runner turns
every :class:`Length`, :class:`Area` and :class:`Volume` of its parameters into
pixels with :func:`resolve_for_spacing`, using the pixel size per axis of the
image being analysed. The pixel value is kept as a real number (no rounding
here beyond 12 significant digits); each footprint states how it turns a real
number of pixels into a digital shape (see ``steps/footprints.py``).

Non-square pixels and anisotropic voxels
----------------------------------------
A physical length spans a different number of pixels along each axis when the
pixel size differs per axis. Such a length resolves to a :class:`Length` in
``px`` that also carries its size along every axis (:attr:`Length.axes`, in
array order ``(z, y, x)`` or ``(y, x)``); its ``value`` is the size along the
last axis (x). Steps that honour anisotropy (footprints) read
:meth:`Length.px_axes`; reading :attr:`Length.px` of such a length raises
``ValueError``, so a step that applies one size along every axis can never use
it silently. A length written in ``px`` means that many pixels (voxels) along
every axis, whatever their physical size. On square pixels (cubic voxels)
nothing of this shows: the result is the same plain ``Length(value, "px")`` as
with :func:`resolve_to_px`.

An area resolves with the pixel area ``dy * dx`` and a volume with the voxel
volume ``dz * dy * dx``, exact for any pixel shape. An area in physical units
has no meaning for a 3-D volume, nor a volume for a 2-D image: both are
refused (``px2`` / ``px3`` pass unchanged).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any, ClassVar, TypeVar

from pydantic import BaseModel, GetCoreSchemaHandler, GetJsonSchemaHandler
from pydantic.json_schema import JsonSchemaValue
from pydantic_core import PydanticCustomError, core_schema

_Model = TypeVar("_Model", bound=BaseModel)

__all__ = [
    "AREA_UNITS",
    "FILE_LENGTH_UNITS",
    "LENGTH_UNITS",
    "VOLUME_UNITS",
    "Area",
    "Length",
    "Volume",
    "parse_area",
    "parse_length",
    "parse_volume",
    "resolve_for_spacing",
    "resolve_params",
    "resolve_to_px",
    "typeset_unit",
    "unit_factor",
    "unit_spellings",
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
    "cm": ("cm", 1e4),
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
    "cm2": ("cm2", 1e8),
    "cm²": ("cm2", 1e8),
    "px2": ("px2", None),
    "px²": ("px2", None),
}

#: Volume unit spellings -> (canonical name, cubic micrometres per unit).
VOLUME_UNITS: dict[str, tuple[str, float | None]] = {
    "nm3": ("nm3", 1e-9),
    "nm³": ("nm3", 1e-9),
    "um3": ("um3", 1.0),
    "µm3": ("um3", 1.0),
    "µm³": ("um3", 1.0),
    "μm3": ("um3", 1.0),
    "μm³": ("um3", 1.0),
    "um³": ("um3", 1.0),
    "mm3": ("mm3", 1e9),
    "mm³": ("mm3", 1e9),
    "cm3": ("cm3", 1e12),
    "cm³": ("cm3", 1e12),
    "px3": ("px3", None),
    "px³": ("px3", None),
}

#: Length units that image files' own metadata uses beyond the recipe's (TIFF
#: resolution units, OME-XML ``PhysicalSizeXUnit``): name -> micrometres per unit.
FILE_LENGTH_UNITS: dict[str, float] = {
    **{name: um for name, (_, um) in LENGTH_UNITS.items() if um is not None},
    "m": 1e6,
    "inch": 25400.0,
}

_FAMILIES = (LENGTH_UNITS, AREA_UNITS, VOLUME_UNITS)


def _family(unit: str) -> tuple[dict[str, tuple[str, float | None]], bool, str] | None:
    """The table ``unit`` belongs to, whether it is a reciprocal (``1/mm``), and its spelling."""
    reciprocal = unit.startswith(("1/", "/"))
    base = unit.split("/", 1)[1] if reciprocal else unit
    for table in _FAMILIES:
        if base in table:
            return table, reciprocal, base
    return None


def unit_spellings(unit: str) -> list[str]:
    """Every spelling a number in ``unit`` may be written in (``um``: nm, um, µm, ..., mm).

    ``unit`` is a length, area or volume unit or its reciprocal (``1/mm2``); pixel
    units take only their own spellings (a pixel has no physical size). Any other
    unit (``-``, ``1/s``) is only its own spelling.
    """
    found = _family(unit)
    if found is None:
        return [unit]
    table, reciprocal, base = found
    physical = table[base][1] is not None
    names = [
        n
        for n, (canon, um) in table.items()
        if (um is not None) == physical and (physical or canon == table[base][0])
    ]
    return [f"1/{n}" for n in names] + [f"/{n}" for n in names] if reciprocal else names


def unit_factor(given: str, unit: str) -> float | None:
    """What a number written in ``given`` is multiplied by to be in ``unit``; None if they do not fit.

    ``unit_factor("mm", "um") == 1000``, ``unit_factor("1/cm2", "1/mm2") == 0.01``.
    """
    if given not in unit_spellings(unit):
        return None
    found_given, found_unit = _family(given), _family(unit)
    if found_given is None or found_unit is None:
        return 1.0  # the unit's own, non-physical spelling
    table, reciprocal, base = found_unit
    um_given, um_unit = table[found_given[2]][1], table[base][1]
    if um_given is None or um_unit is None:
        return 1.0  # px, px2, px3 in their own spellings
    return um_unit / um_given if reciprocal else um_given / um_unit


_SUPERSCRIPTS = str.maketrans(
    "0123456789-", "\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079\u207b"
)


def typeset_unit(unit: str) -> str:
    """A unit as printed for people: ``um`` -> ``µm``, ``um2`` -> ``µm²``, ``1/mm2`` -> ``mm⁻²``.

    Files (CSV headers, JSON) keep the ASCII spelling; this is for reports. A
    dimensionless ``-`` prints as nothing; a unit this table does not know is
    printed as it is.
    """
    if unit in ("-", ""):
        return ""
    found = _family(unit)
    if found is None:
        return unit
    table, reciprocal, base = found
    canonical = table[base][0]
    stem = canonical.rstrip("23")
    power = int(canonical[len(stem) :] or 1)
    stem = "\u00b5m" if stem == "um" else stem
    if reciprocal:
        power = -power
    if power == 1:
        return stem
    return stem + str(power).translate(_SUPERSCRIPTS)


_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\s\d].*?)\s*$")


def _format_number(value: float) -> str:
    return f"{value:.12g}"


@dataclass(frozen=True, slots=True)
class _Quantity:
    value: float
    unit: str

    #: an example for the JSON schema's description; each kind of quantity sets its own
    _example: ClassVar[str]

    def __str__(self) -> str:
        return f"{_format_number(self.value)} {self.unit}"

    @classmethod
    def _table(cls) -> dict[str, tuple[str, float | None]]:
        """The unit spellings of this kind of quantity (each kind defines it)."""
        raise NotImplementedError

    @classmethod
    def _parse(cls, raw: Any) -> _Quantity:
        """Read ``raw`` as this kind of quantity (each kind defines it)."""
        raise NotImplementedError

    @property
    def px(self) -> float:
        """The value in pixels (px, px2 or px3); only after :func:`resolve_to_px`."""
        if self.unit not in ("px", "px2", "px3"):
            raise ValueError(f"{self} has not been resolved to pixels")
        return self.value

    @classmethod
    def __get_pydantic_core_schema__(
        cls, source: Any, handler: GetCoreSchemaHandler
    ) -> core_schema.CoreSchema:
        parse = cls._parse

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
        table = cls._table()
        units = "|".join(re.escape(u) for u in sorted(table, key=len, reverse=True))
        example = cls._example
        return {
            "type": "string",
            "pattern": rf"^\s*[+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*({units})\s*$",
            "description": f"a positive {cls.__name__.lower()} with its unit, e.g. '{example}'",
        }


@dataclass(frozen=True, slots=True)
class Length(_Quantity):
    """A positive length with a unit: ``nm``, ``um`` (``µm``, ``micron``), ``mm`` or ``px``.

    ``axes`` is set only on a length resolved for non-square pixels or
    anisotropic voxels: its size in pixels along every array axis, ``(z, y, x)``
    or ``(y, x)``; ``value`` is then the size along the last axis (x).
    """

    axes: tuple[float, ...] | None = None

    _example = "1.5 um"

    def __str__(self) -> str:
        if self.axes is None:
            return f"{_format_number(self.value)} {self.unit}"
        names = ("z", "y", "x")[-len(self.axes) :]
        sizes = ", ".join(_format_number(a) for a in self.axes)
        return f"[{sizes}] {self.unit} ({', '.join(names)})"

    @property
    def px(self) -> float:
        """The length in pixels, the same along every axis; only after resolution.

        Raises ``ValueError`` when the length spans a different number of pixels
        along different axes (non-square pixels): read :meth:`px_axes` instead.
        """
        if self.axes is not None:
            raise ValueError(
                f"{self} differs per axis (the pixels are not square or the voxels not "
                "cubic), and this parameter is applied with one size along every axis; "
                "give it in px, or use square pixels"
            )
        return _Quantity.px.fget(self)  # type: ignore[attr-defined,no-any-return]

    def px_axes(self, ndim: int) -> tuple[float, ...]:
        """The length in pixels along each of ``ndim`` axes (array order); only after resolution."""
        if self.unit != "px":
            raise ValueError(f"{self} has not been resolved to pixels")
        if self.axes is None:
            return (self.value,) * ndim
        if len(self.axes) != ndim:
            raise ValueError(f"{self} was resolved for {len(self.axes)}-D data, not {ndim}-D")
        return self.axes

    @classmethod
    def _table(cls) -> dict[str, tuple[str, float | None]]:
        return LENGTH_UNITS

    @classmethod
    def _parse(cls, raw: Any) -> Length:
        return parse_length(raw)


class Area(_Quantity):
    """A positive area with a unit: ``nm2``, ``um2`` (``µm²``), ``mm2`` or ``px2``."""

    __slots__ = ()

    _example = "20 um2"

    @classmethod
    def _table(cls) -> dict[str, tuple[str, float | None]]:
        return AREA_UNITS

    @classmethod
    def _parse(cls, raw: Any) -> Area:
        return parse_area(raw)


class Volume(_Quantity):
    """A positive volume with a unit: ``nm3``, ``um3`` (``µm³``), ``mm3`` or ``px3`` (voxels)."""

    __slots__ = ()

    _example = "500 um3"

    @classmethod
    def _table(cls) -> dict[str, tuple[str, float | None]]:
        return VOLUME_UNITS

    @classmethod
    def _parse(cls, raw: Any) -> Volume:
        return parse_volume(raw)


_Q = TypeVar("_Q", bound=_Quantity)


def _parse(raw: Any, table: dict[str, tuple[str, float | None]], cls: type[_Q], hint: str) -> _Q:
    kind = cls.__name__.lower()
    if isinstance(raw, bool) or raw is None:
        raise PydanticCustomError(
            "quantity_type",
            "a {kind} with its unit is needed (got {got}); write {hint}",
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
            "quantity_type",
            "a {kind} with its unit is needed (got {got}); write {hint}",
            {"kind": kind, "got": type(raw).__name__, "hint": hint},
        )
    match = _QUANTITY.match(raw)
    if not match:
        raise PydanticCustomError(
            "quantity_syntax",
            "cannot read {got} as a {kind}; write {hint}",
            {"kind": kind, "got": repr(raw), "hint": hint},
        )
    number, unit = match.groups()
    if unit not in table:
        others = [
            (other, name)
            for other, name in (
                (LENGTH_UNITS, "a length"),
                (AREA_UNITS, "an area"),
                (VOLUME_UNITS, "a volume"),
            )
            if other is not table
        ]
        for other, other_kind in others:
            if unit in other:
                raise PydanticCustomError(
                    "quantity_wrong_dimension",
                    "{got} is {other_kind}, but a {kind} belongs here; write {hint}",
                    {"got": repr(raw), "kind": kind, "other_kind": other_kind, "hint": hint},
                )
        raise PydanticCustomError(
            "quantity_unit",
            "unknown {kind} unit {unit} in {got}; use one of {units}",
            {"kind": kind, "unit": repr(unit), "got": repr(raw), "units": ", ".join(table)},
        )
    value = float(number)
    if not math.isfinite(value):
        raise PydanticCustomError(
            "quantity_finite", "must be finite (got {got})", {"got": repr(raw)}
        )
    if value <= 0:
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


def parse_volume(raw: Any) -> Volume:
    """Read a volume such as ``'500 um3'`` or ``'27 px3'``; raise a pydantic error otherwise."""
    return _parse(raw, VOLUME_UNITS, Volume, "27 px3 or 500 um3")


def resolve_to_px(quantity: Length | Area | Volume, pixel_size_um: float) -> Length | Area | Volume:
    """Convert a length, area or volume to pixels for square pixels of ``pixel_size_um``.

    A length in ``um`` becomes ``value / pixel_size_um`` pixels, an area in ``um2``
    becomes ``value / pixel_size_um**2`` square pixels, a volume in ``um3``
    ``value / pixel_size_um**3`` voxels; values already in pixels are
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
    if isinstance(quantity, Volume):
        if quantity.unit == "px3":
            return quantity
        per_volume = VOLUME_UNITS[quantity.unit][1]
        assert per_volume is not None
        return Volume(_significant(quantity.value * per_volume / pixel_size_um**3), "px3")
    if quantity.unit == "px2":
        return quantity
    per_unit = AREA_UNITS[quantity.unit][1]
    assert per_unit is not None
    return Area(_significant(quantity.value * per_unit / pixel_size_um**2), "px2")


def _significant(value: float) -> float:
    return float(f"{value:.12g}")


def resolve_for_spacing(
    quantity: Length | Area | Volume, spacing: tuple[float, ...]
) -> Length | Area | Volume:
    """Convert a length, area or volume to pixels for data with ``spacing`` um per pixel per axis.

    Parameters
    ----------
    quantity : Length, Area or Volume
        As written in the recipe.
    spacing : tuple of float
        Pixel size per array axis in um: ``(dy, dx)`` or ``(dz, dy, dx)``.

    Returns
    -------
    Length, Area or Volume in px, px2 or px3
        With square pixels (all sizes equal) exactly what :func:`resolve_to_px`
        gives with that size. Otherwise a length gets :attr:`Length.axes`, the
        value along each axis ``value / spacing[axis]`` (each rounded to 12
        significant digits), with ``value`` the one along x; an area is divided
        by ``dy * dx``, a volume by ``dz * dy * dx``.

    Raises
    ------
    ValueError
        An area in physical units for 3-D data, a volume in physical units for
        2-D data, or a spacing that is not 2 or 3 positive numbers.
    """
    if len(spacing) not in (2, 3) or not all(math.isfinite(s) and s > 0 for s in spacing):
        raise ValueError(f"a pixel size per axis needs 2 or 3 sizes > 0 um (got {spacing!r})")
    ndim = len(spacing)
    square = len(set(spacing)) == 1
    if isinstance(quantity, Volume):
        if quantity.unit == "px3":
            return quantity
        if ndim != 3:
            raise ValueError(f"{quantity} is a volume, but the data is a 2-D image")
        per_unit = VOLUME_UNITS[quantity.unit][1]
        assert per_unit is not None
        voxel = spacing[0] ** 3 if square else spacing[0] * spacing[1] * spacing[2]
        return Volume(_significant(quantity.value * per_unit / voxel), "px3")
    if isinstance(quantity, Area):
        if quantity.unit == "px2":
            return quantity
        if ndim != 2:
            raise ValueError(
                f"{quantity} is an area, but the data is a 3-D volume; give a volume "
                "(e.g. 500 um3) or square pixels (px2)"
            )
        if square:
            return resolve_to_px(quantity, spacing[-1])
        per_unit = AREA_UNITS[quantity.unit][1]
        assert per_unit is not None
        return Area(_significant(quantity.value * per_unit / (spacing[0] * spacing[1])), "px2")
    if quantity.unit == "px" or square:
        return resolve_to_px(quantity, spacing[-1])
    axes = tuple(resolve_to_px(quantity, s).value for s in spacing)
    if len(set(axes)) == 1:
        return Length(axes[-1], "px")
    return Length(axes[-1], "px", axes)


def resolve_params(params: _Model, spacing: tuple[float, ...]) -> _Model:
    """``params`` with every length, area and volume converted to pixels.

    ``spacing`` is the pixel size per array axis in um, ``(dy, dx)`` or
    ``(dz, dy, dx)``. With square pixels (cubic voxels) a length becomes plain
    pixels. Otherwise a physical length becomes a length in px that carries
    its size along every axis (``Length.axes``, see above):
    footprints turn it into an ellipse or ellipsoid, and a step that applies
    one size along every axis refuses it. Areas use ``dy * dx``, volumes
    ``dz * dy * dx``. The cache key holds both the resolved parameters (whose
    text shows the per-axis sizes) and the spacing.
    """
    update: dict[str, Any] = {}
    for name in type(params).model_fields:
        value = getattr(params, name)
        if isinstance(value, (Length, Area, Volume)):
            update[name] = resolve_for_spacing(value, tuple(spacing))
    return params.model_copy(update=update) if update else params
