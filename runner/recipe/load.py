"""Loading a recipe: bytes -> checked :class:`~lotproof.runner.recipe.model.Recipe`.

:func:`load_recipe` reads a recipe file, checks it completely (YAML, schema, step
parameters, references, cycles, data kinds along every edge, limits) and either
returns a :class:`Recipe` or raises :class:`~lotproof.runner.errors.RecipeError` listing
every problem at once, each with its file, line and column.
"""

from __future__ import annotations

import dataclasses
import hashlib
import stat
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from lotproof.runner.errors import Problem, RecipeError
from lotproof.runner.recipe.graph import resolve_graph
from lotproof.runner.recipe.model import (
    FORMAT,
    STEP_KEYS,
    LimitDef,
    LimitModel,
    Recipe,
    RecipeModel,
    StepDef,
)
from lotproof.runner.recipe.problems import ProblemCollector, describe, suggest
from lotproof.runner.recipe.quantities import DIMENSIONLESS, BoundError, parse_bound
from lotproof.runner.recipe.yamlpos import MAX_RECIPE_BYTES, load_yaml
from lotproof.steps import REGISTRY
from lotproof.steps.units import resolve_params, resolve_to_px

__all__ = ["load_recipe", "parse_recipe"]


def load_recipe(path: str | Path) -> Recipe:
    """Read and fully check the recipe at ``path``.

    Raises
    ------
    RecipeError
        With every problem found, each positioned in the file.
    """
    path = Path(path)
    shown = str(path)
    try:
        info = path.stat()
        if path.is_dir():
            raise IsADirectoryError
        if not stat.S_ISREG(info.st_mode):
            raise RecipeError(
                [
                    Problem(
                        shown,
                        1,
                        1,
                        "",
                        "not a regular file (a pipe or a device?); a recipe is a file",
                    )
                ]
            )
        size = info.st_size
        if size > MAX_RECIPE_BYTES:
            raise RecipeError(
                [
                    Problem(
                        shown,
                        1,
                        1,
                        "",
                        f"the file is {size} bytes; a recipe is at most {MAX_RECIPE_BYTES} bytes",
                    )
                ]
            )
        with open(path, "rb") as handle:
            raw = handle.read(MAX_RECIPE_BYTES + 1)  # bounded even if the file grows meanwhile
        if len(raw) > MAX_RECIPE_BYTES:
            raise RecipeError(
                [
                    Problem(
                        shown,
                        1,
                        1,
                        "",
                        f"the file is over {MAX_RECIPE_BYTES} bytes; a recipe is "
                        f"at most {MAX_RECIPE_BYTES} bytes",
                    )
                ]
            )
    except FileNotFoundError:
        raise RecipeError([Problem(shown, 1, 1, "", "no such file")]) from None
    except IsADirectoryError:
        raise RecipeError([Problem(shown, 1, 1, "", "is a folder, not a recipe file")]) from None
    except OSError as err:
        raise RecipeError([Problem(shown, 1, 1, "", f"cannot read: {err.strerror}")]) from None
    return parse_recipe(raw, shown)


def _decode(raw: bytes, file: str) -> str:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        before = raw[: err.start]
        line = before.count(b"\n") + 1
        column = err.start - (before.rfind(b"\n") + 1) + 1
        raise RecipeError(
            [
                Problem(
                    file,
                    line,
                    column,
                    "",
                    f"not UTF-8 text (byte 0x{raw[err.start]:02x}); save the recipe as UTF-8",
                )
            ]
        ) from None
    return text.removeprefix("\ufeff")


def parse_recipe(raw: bytes, file: str = "<recipe>") -> Recipe:
    """Check the recipe given as bytes; ``file`` names it in messages."""
    text = _decode(raw, file)
    loaded = load_yaml(text)
    collector = ProblemCollector(file, loaded)
    for p in loaded.problems:
        collector.problems.append(Problem(file, p.position.line, p.position.column, "", p.what))
    if loaded.data is None:
        raise RecipeError(collector.problems)
    data = loaded.data
    if not isinstance(data, dict):
        collector.add(
            (), f"a recipe is a mapping of keys (format, name, steps, ...), got {describe(data)}"
        )
        raise RecipeError(collector.problems)
    if "format" in data and data["format"] != FORMAT:
        collector.add(
            ("format",),
            f"{data['format']!r} is not a format this version reads; write format: {FORMAT}",
        )
        data = {k: v for k, v in data.items() if k != "format"} | {"format": FORMAT}

    top_fields = list(RecipeModel.model_fields)
    try:
        model = RecipeModel.model_validate(data)
    except ValidationError as err:
        collector.add_validation(err, (), top_fields, data)
        model = None

    steps: dict[str, StepDef] = {}
    raw_steps = data.get("steps")
    if isinstance(raw_steps, dict):
        for name, spec in raw_steps.items():
            checked = _check_step(name, spec, collector)
            if checked is not None:
                steps[name] = checked

    if model is None or collector.problems:
        # Graph problems are still worth reporting when steps parsed.
        if steps and isinstance(data.get("inputs"), dict):
            declared = frozenset(k for k in raw_steps if isinstance(k, str))  # type: ignore[union-attr]
            resolve_graph(
                _partial_recipe(file, raw, data, steps), collector, strict=False, declared=declared
            )
        raise RecipeError(collector.problems)

    recipe = Recipe(
        path=file,
        raw=raw,
        sha256=hashlib.sha256(raw).hexdigest(),
        name=model.name,
        revision=model.revision,
        summary=model.summary,
        pixel_size=None if model.pixel_size == "from-image" else model.pixel_size,
        lossy_input=model.lossy_input,
        inputs=dict(model.inputs),
        steps=steps,
        limits={},
        voxel_size=None if model.voxel_size is None else tuple(model.voxel_size),
        calibration=model.calibration,
    )
    if recipe.pixel_size is not None and recipe.pixel_size.unit == "px":
        collector.add(
            ("pixel_size",),
            "the pixel size must be a physical length (e.g. 0.65 um), or from-image",
        )
    for axis, size in enumerate(recipe.voxel_size or ()):
        if size.unit == "px":
            collector.add(
                ("voxel_size", axis), "a voxel size must be a physical length (e.g. 0.8 um)"
            )
    limits: dict[str, LimitDef] = {}
    for name, limit in model.limits.items():
        checked_limit = _check_limit(name, limit, recipe, collector)
        if checked_limit is not None:
            limits[name] = checked_limit
    recipe = resolve_graph(dataclasses.replace(recipe, limits=limits), collector, strict=True)
    if not collector.problems:
        _check_idle_steps(recipe, collector)
    if collector.problems:
        raise RecipeError(collector.problems)
    return recipe


def _recipe_spacings(recipe: Recipe) -> list[tuple[float, ...]]:
    """The pixel size per array axis the recipe states, for each dimension it may meet."""
    if recipe.voxel_size is not None:
        sizes = [resolve_to_px(v, 1.0).value for v in recipe.voxel_size]  # um, x first
        return [tuple(reversed(sizes))]
    if recipe.pixel_size is None:
        return []  # from-image: known per image, checked when the image is analysed
    size = resolve_to_px(recipe.pixel_size, 1.0).value
    return [(size, size), (size, size, size)]


def _check_idle_steps(recipe: Recipe, collector: ProblemCollector) -> None:
    """A step whose sizes make it change nothing (or give a constant) at the recipe's pixel
    size is an error: the lot would be measured as if the step were not there."""
    for spacing in _recipe_spacings(recipe):
        for name in recipe.order:
            step = recipe.steps[name]
            kind = REGISTRY[step.kind]
            if len(spacing) not in kind.ndims:
                continue
            try:
                resolved = resolve_params(step.params, spacing)
            except ValueError:
                continue  # reported when an image is analysed, with the image's own sizes
            idle = kind.degenerate_reason(resolved, len(spacing))
            if idle is not None:
                where = f"{len(spacing)}-D data at {recipe.size_text}"
                collector.add(("steps", name), f"on {where}: {idle}")


def _partial_recipe(
    file: str, raw: bytes, data: dict[str, Any], steps: dict[str, StepDef]
) -> Recipe:
    inputs = {k: v for k, v in data["inputs"].items() if isinstance(k, str)}
    return Recipe(
        path=file,
        raw=raw,
        sha256="",
        name="",
        revision=0,
        summary="",
        pixel_size=None,
        lossy_input="refuse",
        inputs=inputs,
        steps=steps,
        limits={},
    )


def _check_step(name: str, spec: Any, collector: ProblemCollector) -> StepDef | None:
    path = ("steps", name)
    if not isinstance(spec, dict):
        collector.add(
            path, f"a step is a mapping with apply, to and its parameters, got {describe(spec)}"
        )
        return None
    kind_name = spec.get("apply")
    if kind_name is None:
        collector.add(path, "missing required key 'apply' (the step kind)")
        return None
    if not isinstance(kind_name, str):
        collector.add(
            path + ("apply",),
            f"the step kind is a name such as threshold, got {describe(kind_name)}; "
            "`lotproof steps` lists them",
        )
        return None
    if kind_name not in REGISTRY:
        kinds = sorted(REGISTRY)
        collector.add(
            path + ("apply",),
            f"unknown step kind {kind_name!r}{suggest(kind_name, kinds)}; "
            "`lotproof steps` lists them",
        )
        return None
    kind = REGISTRY[kind_name]
    ok = True
    to = spec.get("to")
    if to is None:
        collector.add(path, "missing required key 'to' (an input or an earlier step)")
        ok = False
        targets: tuple[str, ...] = ()
    elif isinstance(to, str):
        targets = (to,)
    elif isinstance(to, list) and to and all(isinstance(t, str) for t in to):
        targets = tuple(to)
    else:
        collector.add(path + ("to",), "'to' names an input or step, or is a list of names")
        ok = False
        targets = ()
    keep = spec.get("keep", False)
    if not isinstance(keep, bool):
        collector.add(path + ("keep",), f"true or false belongs here (got {keep!r})")
        ok = False
    params_raw = {k: v for k, v in spec.items() if k not in STEP_KEYS}
    fields = list(kind.params.model_fields) + list(STEP_KEYS)
    try:
        params = kind.params.model_validate(params_raw)
    except ValidationError as err:
        collector.add_validation(err, path, fields, params_raw)
        return None
    if not ok:
        return None
    return StepDef(name=name, kind=kind_name, to=targets, keep=keep, params=params)


def _check_limit(
    name: str, limit: LimitModel, recipe: Recipe, collector: ProblemCollector
) -> LimitDef | None:
    path = ("limits", name)
    step_name, _, value_name = limit.value.partition(".")
    if step_name not in recipe.steps:
        candidates = list(recipe.steps)
        collector.add(
            path + ("value",), f"no step named {step_name!r}{suggest(step_name, candidates)}"
        )
        return None
    kind = REGISTRY[recipe.steps[step_name].kind]
    if value_name not in kind.values:
        names = list(kind.values)
        offered = ", ".join(names) if names else "none"
        collector.add(
            path + ("value",),
            f"step {step_name!r} ({kind.name}) gives no value {value_name!r}"
            f"{suggest(value_name, names)}; it gives: {offered}",
        )
        return None
    unit = kind.values[value_name]
    bounds: dict[str, float | None] = {"low": None, "high": None}
    written: dict[str, Any] = {}
    ok = True
    pairs: list[tuple[str, tuple[Any, ...], Any]] = []
    if limit.range is not None:
        written["range"] = list(limit.range)
        pairs = [("low", ("range", 0), limit.range[0]), ("high", ("range", 1), limit.range[1])]
    else:
        if limit.min is not None:
            written["min"] = limit.min
            pairs.append(("low", ("min",), limit.min))
        if limit.max is not None:
            written["max"] = limit.max
            pairs.append(("high", ("max",), limit.max))
    for slot, where, raw_bound in pairs:
        try:
            bounds[slot] = parse_bound(raw_bound, unit)
        except BoundError as err:
            collector.add(path + where, str(err))
            ok = False
    if (
        ok
        and bounds["low"] is not None
        and bounds["high"] is not None
        and bounds["low"] > bounds["high"]
    ):
        collector.add(
            path, f"the lower bound {bounds['low']:g} is above the upper bound {bounds['high']:g}"
        )
        ok = False
    if limit.display == "percent" and unit != DIMENSIONLESS:
        collector.add(
            path + ("display",),
            f"percent shows a dimensionless fraction; {limit.value} is in {unit}",
        )
        ok = False
    if not ok:
        return None
    return LimitDef(
        name=name,
        step=step_name,
        value=value_name,
        unit=unit,
        over=limit.over,
        low=bounds["low"],
        high=bounds["high"],
        written=written,
        display=limit.display,
    )
