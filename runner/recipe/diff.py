"""``lotproof diff``: what changed in a method between two recipes, by meaning.

Both recipes are read and fully checked (:func:`lotproof.runner.recipe.model.parse_recipe`), then
compared as parsed models: formatting, comments, quoting and key order never show.
Parameters are compared with their defaults filled in; lengths and areas by their
physical size (``1500 nm`` is ``1.5 um``) or their pixels, and shown with the pixels
they resolve to where the recipe fixes the pixel size. Limit bounds are compared in
the unit of the value they bound (``max: 0.06 mm`` is ``max: 60 um``).

A recipe is a file path, or ``PATH@REV`` for the file as it was in git revision
``REV`` (read with ``git show REV:PATH``, the path taken from the root of the
repository that holds the file's folder).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from lotproof.runner.errors import Problem, RecipeError
from lotproof.runner.recipe.git import GitError, git_show
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.model import Recipe, StepDef
from lotproof.steps import Area, Length, resolve_to_px
from lotproof.steps.units import AREA_UNITS, LENGTH_UNITS

__all__ = ["Change", "RecipeDiff", "diff_recipes", "read_recipe_source"]


@dataclass(frozen=True)
class Change:
    """One semantic change: ``where`` (e.g. ``steps.clean.radius``), before and after.

    ``a`` / ``b`` are the values as the recipe means them (text for lengths, with
    their pixels in parentheses when the pixel size is fixed); None when absent.
    """

    where: str
    a: Any
    b: Any
    note: str = ""

    def as_dict(self) -> dict[str, Any]:
        return {"where": self.where, "a": self.a, "b": self.b, "note": self.note}


@dataclass
class RecipeDiff:
    """The semantic difference between recipe ``a`` and recipe ``b``."""

    a: str
    b: str
    a_label: str
    b_label: str
    #: the exact bytes differ (a change of comments or layout only shows here)
    bytes_differ: bool
    top: list[Change] = field(default_factory=list)
    steps_added: list[str] = field(default_factory=list)
    steps_removed: list[str] = field(default_factory=list)
    steps_changed: list[Change] = field(default_factory=list)
    limits_added: list[str] = field(default_factory=list)
    limits_removed: list[str] = field(default_factory=list)
    limits_changed: list[Change] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    @property
    def identical(self) -> bool:
        """No semantic change (the bytes may still differ in comments or layout)."""
        return not (
            self.top
            or self.steps_added
            or self.steps_removed
            or self.steps_changed
            or self.limits_added
            or self.limits_removed
            or self.limits_changed
        )

    def as_dict(self) -> dict[str, Any]:
        return {
            "a": self.a,
            "b": self.b,
            "a_method": self.a_label,
            "b_method": self.b_label,
            "identical": self.identical,
            "bytes_differ": self.bytes_differ,
            "top": [c.as_dict() for c in self.top],
            "steps": {
                "added": self.steps_added,
                "removed": self.steps_removed,
                "changed": [c.as_dict() for c in self.steps_changed],
            },
            "limits": {
                "added": self.limits_added,
                "removed": self.limits_removed,
                "changed": [c.as_dict() for c in self.limits_changed],
            },
            "warnings": self.warnings,
        }


# ---------------------------------------------------------------- reading


def _problem(shown: str, what: str) -> RecipeError:
    return RecipeError([Problem(shown, 1, 1, "", what)])


def read_recipe_source(source: str) -> tuple[bytes, str]:
    """The bytes of a recipe given as ``PATH`` or ``PATH@REV``, and the name to show.

    An existing file whose name holds ``@`` is read as a file; otherwise the text
    after the last ``@`` is the git revision.
    """
    if os.path.isfile(source) or "@" not in source:
        try:
            return Path(source).read_bytes(), source
        except FileNotFoundError:
            raise _problem(source, "no such file") from None
        except IsADirectoryError:
            raise _problem(source, "is a folder, not a recipe file") from None
        except OSError as err:
            raise _problem(source, f"cannot read: {err.strerror}") from None
    path, _, rev = source.rpartition("@")
    if not path or not rev:
        raise _problem(source, "write PATH@REV, e.g. recipes/a.yaml@HEAD~1")
    try:
        return git_show(path, rev), source
    except GitError as err:
        raise _problem(source, str(err)) from None


# ---------------------------------------------------------------- comparing


def _micrometres(q: Length | Area) -> float | None:
    table = LENGTH_UNITS if isinstance(q, Length) else AREA_UNITS
    per_unit = table[q.unit][1]
    if per_unit is None:
        return None
    return float(f"{q.value * per_unit:.12g}")


def _pixel_size(recipe: Recipe) -> float | None:
    if recipe.pixel_size is None:
        return None
    return resolve_to_px(recipe.pixel_size, 1.0).value


def _normal(value: Any) -> Any:
    """A comparable form of one parameter value."""
    if isinstance(value, (Length, Area)):
        um = _micrometres(value)
        kind = "length" if isinstance(value, Length) else "area"
        return (kind, "px", value.value) if um is None else (kind, "um", um)
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


def _shown(value: Any, pixel: float | None) -> Any:
    if isinstance(value, (Length, Area)):
        text = str(value)
        if pixel is not None and value.unit not in ("px", "px2"):
            text += f" ({resolve_to_px(value, pixel)})"
        return text
    if isinstance(value, tuple):
        return list(value)
    return value


def _step_fields(step: StepDef) -> dict[str, Any]:
    fields: dict[str, Any] = {"apply": step.kind, "to": list(step.to), "keep": step.keep}
    for name in type(step.params).model_fields:
        fields[name] = getattr(step.params, name)
    return fields


def _compare_steps(a: Recipe, b: Recipe, diff: RecipeDiff) -> None:
    pa, pb = _pixel_size(a), _pixel_size(b)
    diff.steps_removed = [n for n in a.steps if n not in b.steps]
    diff.steps_added = [n for n in b.steps if n not in a.steps]
    for name in a.steps:
        if name not in b.steps:
            continue
        fa, fb = _step_fields(a.steps[name]), _step_fields(b.steps[name])
        if fa["apply"] != fb["apply"]:
            diff.steps_changed.append(
                Change(
                    f"steps.{name}.apply",
                    fa["apply"],
                    fb["apply"],
                    "another step kind; its parameters are not compared",
                )
            )
            continue
        for key in fa:
            va, vb = fa[key], fb[key]
            if _normal(va) == _normal(vb):
                if (
                    isinstance(va, (Length, Area))
                    and pa != pb
                    and pa is not None
                    and pb is not None
                    and va.unit not in ("px", "px2")
                ):
                    diff.steps_changed.append(
                        Change(
                            f"steps.{name}.{key}",
                            _shown(va, pa),
                            _shown(vb, pb),
                            "same size, other pixels: the pixel size changed",
                        )
                    )
                continue
            note = ""
            if (
                isinstance(va, (Length, Area))
                and isinstance(vb, (Length, Area))
                and pa is not None
                and pb is not None
                and resolve_to_px(va, pa).value == resolve_to_px(vb, pb).value
            ):
                note = "written in other units, the same in pixels at these pixel sizes"
            diff.steps_changed.append(
                Change(f"steps.{name}.{key}", _shown(va, pa), _shown(vb, pb), note)
            )


def _compare_limits(a: Recipe, b: Recipe, diff: RecipeDiff) -> None:
    diff.limits_removed = [n for n in a.limits if n not in b.limits]
    diff.limits_added = [n for n in b.limits if n not in a.limits]
    for name in a.limits:
        if name not in b.limits:
            continue
        la, lb = a.limits[name], b.limits[name]
        pairs = [
            ("value", f"{la.step}.{la.value}", f"{lb.step}.{lb.value}"),
            ("over", la.over, lb.over),
            ("min", la.low, lb.low),
            ("max", la.high, lb.high),
        ]
        for key, va, vb in pairs:
            if va == vb:
                continue
            unit = lb.unit if key in ("min", "max") and lb.unit != "-" else ""
            diff.limits_changed.append(
                Change(
                    f"limits.{name}.{key}",
                    f"{va:g} {unit}".strip() if isinstance(va, float) else va,
                    f"{vb:g} {unit}".strip() if isinstance(vb, float) else vb,
                )
            )


def _compare_top(a: Recipe, b: Recipe, diff: RecipeDiff) -> None:
    def pixel(r: Recipe) -> str:
        return "from-image" if r.pixel_size is None else f"{_pixel_size(r):.12g} um"

    for key, va, vb in (
        ("name", a.name, b.name),
        ("revision", a.revision, b.revision),
        ("summary", a.summary, b.summary),
        ("pixel_size", pixel(a), pixel(b)),
        ("lossy_input", a.lossy_input, b.lossy_input),
    ):
        if va != vb:
            diff.top.append(Change(key, va, vb))
    for name in sorted(set(a.inputs) | set(b.inputs)):
        input_a, input_b = a.inputs.get(name), b.inputs.get(name)
        if input_a != input_b:
            diff.top.append(Change(f"inputs.{name}", input_a, input_b))


def diff_recipes(a: str, b: str) -> RecipeDiff:
    """Compare recipe ``a`` with recipe ``b`` (paths, or ``PATH@REV``) by meaning.

    Raises
    ------
    RecipeError
        When either recipe cannot be read or is invalid (every problem of it).
    """
    raw_a, shown_a = read_recipe_source(a)
    raw_b, shown_b = read_recipe_source(b)
    ra, rb = parse_recipe(raw_a, shown_a), parse_recipe(raw_b, shown_b)
    diff = RecipeDiff(
        a=shown_a, b=shown_b, a_label=ra.label, b_label=rb.label, bytes_differ=raw_a != raw_b
    )
    _compare_top(ra, rb, diff)
    _compare_steps(ra, rb, diff)
    _compare_limits(ra, rb, diff)
    meaning_changed = bool(
        [c for c in diff.top if c.where != "revision"]
        or diff.steps_added
        or diff.steps_removed
        or diff.steps_changed
        or diff.limits_added
        or diff.limits_removed
        or diff.limits_changed
    )
    if meaning_changed and ra.name == rb.name and ra.revision == rb.revision:
        diff.warnings.append(
            f"the method changed but its revision did not (both {ra.label}); bump revision "
            "so certificates name each version apart"
        )
    if ra.name == rb.name and rb.revision < ra.revision:
        diff.warnings.append(f"the revision goes down ({ra.revision} to {rb.revision})")
    return diff
