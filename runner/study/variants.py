"""Robustness variants: the recipe with one numeric parameter moved by a stated step.

A move is written ``±3 %`` (relative), ``±1 px`` or ``±0.2 um`` (absolute, with a
unit) or ``±5`` (absolute, only for a parameter that is a plain number, such as a
threshold's gray ``level``); ``+-`` and ``+/-`` spell ``±`` too. Each move gives two
variants, ``minus`` and ``plus``.

A variant is the recipe's exact bytes with the one value's text replaced (its
span from :mod:`lotproof.runner.recipe.yamlpos`), checked again by
:func:`~lotproof.runner.recipe.load.parse_recipe`. Every other byte, comment and
parameter stays as written, so the variant's steps before the moved one keep
their cache keys (only the steps from the moved one on are computed again), and
the variant is a recipe anyone can run or diff on its own. Executors send a
recipe to their workers as its bytes, so a variant made in memory any other way
would not reach them.
"""

from __future__ import annotations

import math
import re
import typing
from dataclasses import dataclass
from typing import Any

from lotproof.runner.errors import RecipeError
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.model import Recipe
from lotproof.runner.recipe.yamlpos import load_yaml
from lotproof.runner.record.layout import variant_path
from lotproof.steps import Area, Length
from lotproof.steps.units import (
    AREA_UNITS,
    LENGTH_UNITS,
    VOLUME_UNITS,
    Volume,
    resolve_to_px,
    unit_factor,
)

__all__ = ["DIRECTIONS", "Move", "MoveError", "Variant", "build_move", "parse_move"]

#: the two variants of every move, in this order
DIRECTIONS = ("minus", "plus")

_MOVE = re.compile(r"^\s*(?:±|\+-|\+/-)\s*((?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(\S.*?)?\s*$")
_BOM = "\ufeff"


class MoveError(ValueError):
    """A robustness move that cannot be made; the message says why (no position)."""


@dataclass(frozen=True)
class Variant:
    """One moved recipe: its direction, the moved value as written, its checked recipe."""

    direction: str
    value_text: str
    recipe: Recipe


@dataclass(frozen=True)
class Move:
    """``STEP.PARAM: ±STEP`` of a plan, and the recipe's two variants."""

    parameter: str
    step: str
    param: str
    written: str
    #: the value in the recipe, as the parameter model reads it (``30 um``, ``128``)
    baseline_text: str
    variants: tuple[Variant, Variant]

    def variant(self, direction: str) -> Variant:
        return self.variants[DIRECTIONS.index(direction)]


def parse_move(text: object) -> tuple[float, str | None]:
    """``(amount, unit)`` of a move: ``±3 %`` gives (3.0, '%'), ``±5`` gives (5.0, None)."""
    if not isinstance(text, str):
        raise MoveError(
            f"a move is written as text such as '±3 %' or '±1 px' (got {text!r}); quote it"
        )
    match = _MOVE.match(text)
    if not match:
        raise MoveError(
            f"cannot read {text!r} as a move; write ±3 % (relative), ±1 px or ±0.2 um "
            "(absolute, with a unit), or ±5 for a plain number"
        )
    amount = float(match.group(1))
    if not math.isfinite(amount) or amount <= 0:
        raise MoveError(f"a move is larger than 0 (got {text!r})")
    return amount, match.group(2)


def _table(quantity: Length | Area | Volume) -> tuple[dict[str, tuple[str, float | None]], int]:
    """The unit table of a quantity and the power of the pixel size it scales with."""
    if isinstance(quantity, Volume):
        return VOLUME_UNITS, 3
    if isinstance(quantity, Area):
        return AREA_UNITS, 2
    return LENGTH_UNITS, 1


def _pixel_um(recipe: Recipe) -> float | None:
    """The recipe's one pixel size in um, or None (from-image, or a size per axis)."""
    if recipe.pixel_size is not None:
        return resolve_to_px(recipe.pixel_size, 1.0).value
    if recipe.voxel_size is not None:
        sizes = {resolve_to_px(v, 1.0).value for v in recipe.voxel_size}
        return sizes.pop() if len(sizes) == 1 else None
    return None


def _moved_quantity(
    quantity: Length | Area | Volume, amount: float, unit: str | None, sign: int, recipe: Recipe
) -> float:
    table, power = _table(quantity)
    kind = type(quantity).__name__.lower()
    if unit is None:
        example = {1: "±1 px or ±0.5 um", 2: "±4 px2 or ±2 um2", 3: "±8 px3 or ±5 um3"}[power]
        raise MoveError(
            f"a bare number moves a {kind} by an unknown unit; write {example} (or ±3 %)"
        )
    if unit == "%":
        return quantity.value * (1 + sign * amount / 100.0)
    if unit not in table:
        raise MoveError(
            f"{unit!r} is not a {kind} unit; use one of {', '.join(table)} (or %), as the "
            f"parameter is a {kind}"
        )
    factor = unit_factor(unit, quantity.unit)
    if factor is None:
        # one side in pixels, the other physical: through the recipe's pixel size
        pixel = _pixel_um(recipe)
        if pixel is None:
            raise MoveError(
                f"moving a {kind} written in {quantity.unit} by {unit} needs one pixel size, "
                f"and the recipe gives {recipe.size_text}; move it in {quantity.unit} or by %"
            )
        um_unit = {1: "um", 2: "um2", 3: "um3"}[power]
        if table[unit][1] is None:  # the move is in pixels, the value physical
            factor = pixel**power * (unit_factor(um_unit, quantity.unit) or 1.0)
        else:  # the move is physical, the value in pixels
            factor = (unit_factor(unit, um_unit) or 1.0) / pixel**power
    return quantity.value + sign * amount * factor


def _format(value: float) -> str:
    text = f"{value:.12g}"
    return "0" if text == "-0" else text


def _baseline(recipe: Recipe, step: str, param: str) -> Any:
    if step not in recipe.steps:
        raise MoveError(f"the recipe has no step {step!r}; its steps are {', '.join(recipe.steps)}")
    if step not in recipe.order:
        raise MoveError(f"step {step!r} is not run by the recipe (no limit or measure needs it)")
    definition = recipe.steps[step]
    fields = type(definition.params).model_fields
    if param not in fields:
        raise MoveError(
            f"step {step!r} ({definition.kind}) has no parameter {param!r}; it has "
            f"{', '.join(fields)}"
        )
    value = getattr(definition.params, param)
    # the field's type decides, not the value: a connectivity of 8 is one of a set, no number
    allowed = {Length, Area, Volume, float, int, type(None)}
    annotation = fields[param].annotation
    members = set(typing.get_args(annotation)) or {annotation}
    numeric = members <= allowed and members != {type(None)}
    if (
        not numeric
        or isinstance(value, bool)
        or not isinstance(value, (Length, Area, Volume, int, float))
    ):
        shown = str(value) if isinstance(value, (Length, Area, Volume)) else repr(value)
        raise MoveError(
            f"steps.{step}.{param} is {shown}, not a number; only numeric parameters "
            "(lengths, areas, volumes, numbers) can be moved"
        )
    return value


def build_move(recipe: Recipe, parameter: str, written: object) -> Move:
    """The two variants of ``recipe`` with ``parameter`` (``STEP.PARAM``) moved by ``written``.

    Raises
    ------
    MoveError
        For a parameter that is not a written, numeric parameter of a step the recipe
        runs; a move that cannot be read or has the wrong unit; or a variant that is
        not a valid recipe (a radius moved to 0).
    """
    step, dot, param = parameter.partition(".")
    if not dot or not step or not param:
        raise MoveError(f"{parameter!r} must name a step's parameter as STEP.PARAM")
    value = _baseline(recipe, step, param)
    amount, unit = parse_move(written)
    text = recipe.raw.decode("utf-8")
    bom = text.startswith(_BOM)
    text = text.removeprefix(_BOM)
    span = load_yaml(text).spans.get(("steps", step, param))
    if span is None:
        raise MoveError(
            f"steps.{step}.{param} is not written in the recipe (its default is used); write "
            "it there to move it"
        )
    variants = []
    for direction, sign in zip(DIRECTIONS, (-1, 1), strict=True):
        if isinstance(value, (Length, Area, Volume)):
            moved = _moved_quantity(value, amount, unit, sign, recipe)
            value_text = f"{_format(moved)} {value.unit}"
        else:
            if unit not in (None, "%"):
                raise MoveError(
                    f"steps.{step}.{param} is a plain number; move it by a plain number "
                    f"(±5) or by a percentage (±3 %), not in {unit!r}"
                )
            moved = value * (1 + sign * amount / 100.0) if unit == "%" else value + sign * amount
            if unit == "%" and value == 0:
                raise MoveError(f"steps.{step}.{param} is 0: a relative move leaves it at 0")
            value_text = _format(moved)
        start, end = span
        changed = text[:start] + value_text + text[end:]
        raw = ((_BOM if bom else "") + changed).encode("utf-8")
        try:
            moved_recipe = parse_recipe(raw, variant_path(parameter, direction))
        except RecipeError as err:
            first = err.problems[0]
            raise MoveError(
                f"{direction} ({param}: {value_text}) is not a valid recipe: "
                f"{first.where + ': ' if first.where else ''}{first.what}"
            ) from None
        variants.append(Variant(direction, value_text, moved_recipe))
    baseline_text = str(value) if isinstance(value, (Length, Area, Volume)) else _format(value)
    return Move(parameter, step, param, str(written), baseline_text, (variants[0], variants[1]))
