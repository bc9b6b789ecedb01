"""Bounds of acceptance limits, read in the unit of the value they bound.

A limit's bound is written with its unit (``max: 60 um``, ``min: 0.05 mm``,
``max: 150 1/mm2``) unless the value is dimensionless (``max: 0.18``). The bound
is converted to the value's own unit, so ``max: 0.06 mm`` on a value in ``um``
becomes 60. A bare number on a value that has a unit is refused, for the same
reason a bare number is refused where a length belongs. A bound takes the same
unit spellings as a step parameter (:mod:`lotproof.steps.units`), and their
reciprocals for densities (``1/mm2``, ``/um``).

A bound on a dimensionless value (a fraction) may be written in percent:
``max: 18 %`` is divided by 100 and reads as ``max: 0.18``. ``%`` is the one
sign a dimensionless bound takes; any other unit on it is refused.
"""

from __future__ import annotations

import math
import re

from lotproof.steps.units import unit_factor, unit_spellings

__all__ = ["DIMENSIONLESS", "PERCENT", "BoundError", "parse_bound"]

DIMENSIONLESS = "-"
#: the sign of a dimensionless bound written in hundredths (``18 %`` is 0.18)
PERCENT = "%"

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
        elif unit == DIMENSIONLESS and given == PERCENT:
            value /= 100.0
        elif unit == DIMENSIONLESS:
            raise BoundError(
                f"the value is dimensionless; write the bound without a unit (got {raw!r}), "
                "or in percent (18 %)"
            )
        else:
            factor = unit_factor(given, unit)
            if factor is None:
                raise BoundError(
                    f"unit {given!r} does not fit a value in {unit}; "
                    f"use one of {', '.join(unit_spellings(unit))}"
                )
            value *= factor
    else:
        raise BoundError(f"a number is needed (got {type(raw).__name__})")
    if not math.isfinite(value):
        raise BoundError(f"a bound must be finite (got {raw!r})")
    return value
