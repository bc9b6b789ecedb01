"""Bounds of acceptance limits, read in the unit of the value they bound.

A limit's bound is written with its unit (``max: 60 um``, ``min: 0.05 mm``,
``max: 150 1/mm2``) unless the value is dimensionless (``max: 0.18``). The bound
is converted to the value's own unit, so ``max: 0.06 mm`` on a value in ``um``
becomes 60. A bare number on a value that has a unit is refused, for the same
reason a bare number is refused where a length belongs.
"""

from __future__ import annotations

import math
import re

__all__ = ["DIMENSIONLESS", "UNIT_FAMILIES", "BoundError", "parse_bound"]

DIMENSIONLESS = "-"

#: unit families: canonical unit -> {spelling: factor to the canonical unit}
UNIT_FAMILIES: dict[str, dict[str, float]] = {
    "um": {"nm": 1e-3, "um": 1.0, "µm": 1.0, "μm": 1.0, "micron": 1.0, "mm": 1e3},
    "um2": {"nm2": 1e-6, "um2": 1.0, "µm2": 1.0, "µm²": 1.0, "um²": 1.0, "mm2": 1e6, "mm²": 1e6},
    "um3": {"um3": 1.0, "µm3": 1.0, "µm³": 1.0, "mm3": 1e9, "mm³": 1e9},
    "1/mm": {"1/mm": 1.0, "/mm": 1.0, "1/um": 1e3, "/um": 1e3},
    "1/um": {"1/um": 1.0, "/um": 1.0, "1/mm": 1e-3, "/mm": 1e-3},
    "1/mm2": {"1/mm2": 1.0, "/mm2": 1.0, "1/um2": 1e6, "/um2": 1e6, "1/cm2": 1e-2, "/cm2": 1e-2},
    "1/mm3": {"1/mm3": 1.0, "/mm3": 1.0, "1/um3": 1e9, "/um3": 1e9, "1/cm3": 1e-3, "/cm3": 1e-3},
    "px": {"px": 1.0},
    "px2": {"px2": 1.0},
}

_BOUND = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(\S.*?)?\s*$")


class BoundError(ValueError):
    """A bound that cannot be read in the unit of its value."""


def parse_bound(raw: object, unit: str) -> float:
    """Read a limit bound and return it in ``unit``, the unit of the bounded value."""
    if isinstance(raw, bool) or raw is None:
        raise BoundError(f"a number is needed (got {raw!r})")
    if isinstance(raw, (int, float)):
        if unit != DIMENSIONLESS:
            raise BoundError(
                f"a bare number where a value in {unit} is bounded (got {raw:g}); "
                f"write {raw:g} {unit}"
            )
        value = float(raw)
    elif isinstance(raw, str):
        match = _BOUND.match(raw)
        if not match:
            raise BoundError(f"cannot read {raw!r} as a number with a unit")
        number, given = match.groups()
        value = float(number)
        if given is None:
            if unit != DIMENSIONLESS:
                raise BoundError(
                    f"a bare number where a value in {unit} is bounded (got {raw!r}); "
                    f"write {number} {unit}"
                )
        elif unit == DIMENSIONLESS:
            raise BoundError(f"the value is dimensionless; write the bound without a unit (got {raw!r})")
        else:
            family = UNIT_FAMILIES.get(unit, {unit: 1.0})
            if given not in family:
                raise BoundError(
                    f"unit {given!r} does not fit a value in {unit}; "
                    f"use one of {', '.join(family)}"
                )
            value *= family[given]
    else:
        raise BoundError(f"a number is needed (got {type(raw).__name__})")
    if not math.isfinite(value):
        raise BoundError(f"a bound must be finite (got {raw!r})")
    return value
