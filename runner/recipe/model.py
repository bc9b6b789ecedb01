"""Recipes: reading, validating and resolving ``format: lotproof/1`` files.

:func:`load_recipe` reads a recipe file, checks it completely (YAML, schema, step
parameters, references, cycles, data kinds along every edge, limits) and either
returns a :class:`Recipe` or raises :class:`~lotproof.runner.errors.RecipeError` listing
every problem at once, each with its file, line and column.
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, ValidationError, model_validator

from lotproof.runner.errors import Problem, RecipeError
from lotproof.runner.recipe.graph import resolve_graph
from lotproof.runner.recipe.quantities import BoundError, parse_bound
from lotproof.runner.recipe.yamlpos import MAX_RECIPE_BYTES, LoadedYaml, load_yaml
from lotproof.steps import REGISTRY, Length, StepParams

__all__ = [
    "FORMAT",
    "OVER_CHOICES",
    "CALIBRATION_RULES",
    "NAME_PATTERN",
    "RecipeModel",
    "LimitModel",
    "StepDef",
    "LimitDef",
    "Recipe",
    "load_recipe",
    "parse_recipe",
    "STEP_KEYS",
]

FORMAT = "lotproof/1"
#: how a limit aggregates over the lot
OVER_CHOICES = ("each", "lot-mean", "lot-max", "lot-min")
#: names of inputs, steps and limits: no dots (limits write STEP.VALUE)
NAME_PATTERN = r"^[A-Za-z][A-Za-z0-9_-]{0,63}$"
SLUG_PATTERN = r"^[a-z0-9][a-z0-9-]{0,63}$"
#: what happens when an image's own calibration and the recipe's pixel/voxel size disagree
#: (by more than 1 % relative on some axis): image-must-agree makes that image incomplete,
#: recipe-wins uses the recipe's size and notes the disagreement
CALIBRATION_RULES = ("image-must-agree", "recipe-wins")
#: keys of a step that are not parameters of its kind
STEP_KEYS = ("apply", "to", "keep")

Name = Annotated[str, StringConstraints(pattern=NAME_PATTERN)]


class _Strict(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class LimitModel(_Strict):
    """An acceptance limit on one value that a step reports."""

    value: Annotated[str, StringConstraints(pattern=r"^[A-Za-z][A-Za-z0-9_-]*\.[A-Za-z0-9_]+$")] = Field(
        description="the bounded value, as STEP.NAME (e.g. pore-stats.area_fraction)"
    )
    over: Literal[OVER_CHOICES] = Field(  # type: ignore[valid-type]
        "each",
        description="each: every image must pass; lot-mean / lot-max / lot-min: the lot's "
        "mean / maximum / minimum of the value must pass",
    )
    min: int | float | str | None = Field(None, description="lower bound, inclusive, with unit")
    max: int | float | str | None = Field(None, description="upper bound, inclusive, with unit")
    range: list[int | float | str] | None = Field(
        None, min_length=2, max_length=2, description="[lower, upper], inclusive, with units"
    )

    @model_validator(mode="after")
    def _one_kind_of_bound(self) -> LimitModel:
        if self.range is not None and (self.min is not None or self.max is not None):
            raise ValueError("give either range or min/max, not both")
        if self.range is None and self.min is None and self.max is None:
            raise ValueError("a limit needs min, max or range")
        return self


class RecipeModel(_Strict):
    """The top level of a recipe (steps are checked by their own kind's model)."""

    format: Literal["lotproof/1"] = Field(description="recipe format and version; must be lotproof/1")
    name: Annotated[str, StringConstraints(pattern=SLUG_PATTERN)] = Field(
        description="the method's name (lower-case letters, digits, '-'); with revision it names "
        "the method on certificates"
    )
    revision: int = Field(ge=1, description="the method's revision, bumped on every change")
    summary: str = Field("", description="one line on what the method measures")
    pixel_size: Length | Literal["from-image"] | None = Field(
        None,
        description="physical size of one pixel, the same along every axis (e.g. 0.65 um), or "
        "from-image to read it from each image's calibration (an image without one is then an "
        "error). Give this or voxel_size",
    )
    voxel_size: list[Length] | None = Field(
        None,
        min_length=2,
        max_length=3,
        description="physical size of one pixel per axis, written in the order x, y (2-D "
        "images) or x, y, z (3-D volumes), e.g. [0.8 um, 0.8 um, 1.2 um]; give this or "
        "pixel_size",
    )
    calibration: Literal[CALIBRATION_RULES] = Field(  # type: ignore[valid-type]
        "image-must-agree",
        description="when an image carries its own pixel size and it differs from the recipe's "
        "by more than 1 % on some axis: image-must-agree makes that image incomplete, "
        "recipe-wins uses the recipe's size (and records the difference)",
    )
    lossy_input: Literal["refuse", "allow"] = Field(
        "refuse", description="JPEG is lossy and refused for measurement unless this is allow"
    )
    inputs: dict[Name, Annotated[str, StringConstraints(min_length=1)]] = Field(
        description="named inputs: a glob inside the lot folder, e.g. '*.tif'", min_length=1
    )
    steps: dict[Name, dict[str, Any]] = Field(description="the named steps", min_length=1)
    limits: dict[Name, LimitModel] = Field(default_factory=dict, description="acceptance limits")

    @model_validator(mode="after")
    def _one_size(self) -> RecipeModel:
        if self.pixel_size is None and self.voxel_size is None:
            raise ValueError(
                "missing required key 'pixel_size' (e.g. pixel_size: 0.65 um, or from-image; "
                "or voxel_size: [x, y, z] per axis)"
            )
        if self.pixel_size is not None and self.voxel_size is not None:
            raise ValueError("give either pixel_size or voxel_size, not both")
        return self


@dataclass(frozen=True)
class StepDef:
    name: str
    kind: str
    to: tuple[str, ...]
    keep: bool
    params: StepParams


@dataclass(frozen=True)
class LimitDef:
    name: str
    step: str
    value: str
    unit: str
    over: str
    low: float | None
    high: float | None
    #: the bounds as written
    written: dict[str, Any]


@dataclass(frozen=True)
class Recipe:
    """A validated recipe, with its graph resolved (see :mod:`lotproof.runner.recipe.graph`)."""

    path: str
    raw: bytes
    sha256: str
    name: str
    revision: int
    summary: str
    pixel_size: Length | None  # None: from-image, or voxel_size is given
    lossy_input: str
    inputs: dict[str, str]
    steps: dict[str, StepDef]
    limits: dict[str, LimitDef]
    #: pixel size per axis as written, x first: (x, y) or (x, y, z); None: see pixel_size
    voxel_size: tuple[Length, ...] | None = None
    #: one of CALIBRATION_RULES
    calibration: str = "image-must-agree"
    #: steps in run order (topological generations, names as tie-break), pruned
    order: tuple[str, ...] = ()
    #: steps defined but not needed by any limit, measure or keep
    unused: tuple[str, ...] = ()
    #: data kind of every input and step
    kinds: dict[str, str] = field(default_factory=dict)

    @property
    def size_from_image(self) -> bool:
        """The pixel size is read from each image (``pixel_size: from-image``)."""
        return self.pixel_size is None and self.voxel_size is None

    @property
    def size_text(self) -> str:
        """The pixel or voxel size as the recipe gives it: ``0.65 um``, ``[0.8 um, 0.8 um, 1.2 um]``
        (x, y, z order) or ``from-image``."""
        if self.voxel_size is not None:
            return "[" + ", ".join(str(v) for v in self.voxel_size) + "]"
        return "from-image" if self.pixel_size is None else str(self.pixel_size)

    @property
    def label(self) -> str:
        """The method's identity as printed on certificates: ``name r<revision>``."""
        return f"{self.name} r{self.revision}"


# ---------------------------------------------------------------- error text


def _quoted(options: str) -> list[str]:
    return re.findall(r"'([^']*)'", options)


def _suggest(word: object, options: list[str]) -> str:
    if not isinstance(word, str) or not options:
        return ""
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _where(path: tuple[Any, ...]) -> str:
    return ".".join(str(p) for p in path)


class _Collector:
    """Turns pydantic errors into positioned :class:`Problem` objects."""

    def __init__(self, file: str, loaded: LoadedYaml):
        self.file = file
        self.loaded = loaded
        self.problems: list[Problem] = []

    def add(self, path: tuple[Any, ...], what: str, *, key: bool = False) -> None:
        pos = self.loaded.position(path, key=key)
        self.problems.append(Problem(self.file, pos.line, pos.column, _where(path), what))

    def add_validation(
        self, err: ValidationError, prefix: tuple[Any, ...], fields: list[str], data: Any
    ) -> None:
        seen: set[tuple[Any, ...]] = set()
        for e in err.errors(include_url=False):
            # Unions put the member's tag into loc (``function-plain[...]``, ``literal[...]``);
            # positions and messages are about the field, so drop the tag and keep the
            # first member's complaint only.
            loc = tuple(p for p in e["loc"] if not (isinstance(p, str) and "[" in p))
            if loc in seen and len(loc) != len(e["loc"]):
                continue
            seen.add(loc)
            path = prefix + loc
            kind = e["type"]
            got = e.get("input")
            if kind == "extra_forbidden":
                key = loc[-1] if loc else "?"
                self.add(path, f"unknown key {key!r}{_suggest(key, fields)}", key=True)
            elif kind == "missing":
                self.add(path[:-1], f"missing required key {loc[-1]!r}")
            elif kind == "literal_error":
                options = _quoted(str(e.get("ctx", {}).get("expected", "")))
                listed = ", ".join(repr(o) for o in options)
                self.add(path, f"{got!r} is not one of {listed}{_suggest(got, options)}")
            elif kind == "string_pattern_mismatch" and loc and loc[-1] == "value":
                self.add(path, f"{got!r} must name a step's value as STEP.NAME")
            elif kind == "string_pattern_mismatch" and path == ("name",):
                self.add(path, f"{got!r} must be a slug: lower-case letters, digits and '-'")
            elif kind == "string_pattern_mismatch":
                self.add(
                    path,
                    f"{got!r} is not a valid name (letters, digits, '-' and '_', starting "
                    "with a letter; no dots)",
                )
            elif kind in ("dict_type", "model_type", "model_attributes_type"):
                self.add(path, f"a mapping (key: value lines) belongs here, got {_describe(got)}")
            elif kind == "list_type":
                self.add(path, f"a list belongs here, got {_describe(got)}")
            elif kind == "value_error":
                msg = str(e["msg"]).removeprefix("Value error, ")
                self.add(path, msg)
            elif kind.startswith("quantity_"):
                self.add(path, str(e["msg"]))
            elif kind in ("greater_than_equal", "greater_than", "less_than_equal", "less_than"):
                sign = {"greater_than_equal": ">=", "greater_than": ">",
                        "less_than_equal": "<=", "less_than": "<"}[kind]
                bound = next(iter(e.get("ctx", {}).values()), "?")
                self.add(path, f"must be {sign} {bound} (got {got!r})")
            elif kind in ("too_short", "too_long") and isinstance(got, (list, dict)):
                self.add(path, str(e["msg"]))
            elif kind in ("int_parsing", "int_type", "int_from_float"):
                self.add(path, f"a whole number belongs here (got {got!r})")
            elif kind in ("float_parsing", "float_type"):
                self.add(path, f"a number belongs here (got {got!r})")
            elif kind in ("bool_parsing", "bool_type"):
                self.add(path, f"true or false belongs here (got {got!r})")
            elif kind in ("string_type",):
                self.add(path, f"text belongs here (got {_describe(got)})")
            else:
                self.add(path, f"{e['msg']} (got {got!r})")


def _describe(value: Any) -> str:
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    if value is None:
        return "nothing"
    return repr(value)


# ---------------------------------------------------------------- loading


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
            raise RecipeError([Problem(shown, 1, 1, "", "not a regular file (a pipe or a device?); "
                                       "a recipe is a file")])
        size = info.st_size
        if size > MAX_RECIPE_BYTES:
            raise RecipeError(
                [Problem(shown, 1, 1, "", f"the file is {size} bytes; a recipe is at most "
                         f"{MAX_RECIPE_BYTES} bytes")]
            )
        with open(path, "rb") as handle:
            raw = handle.read(MAX_RECIPE_BYTES + 1)  # bounded even if the file grows meanwhile
        if len(raw) > MAX_RECIPE_BYTES:
            raise RecipeError(
                [Problem(shown, 1, 1, "", f"the file is over {MAX_RECIPE_BYTES} bytes; a recipe is "
                         f"at most {MAX_RECIPE_BYTES} bytes")]
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
            [Problem(file, line, column, "", f"not UTF-8 text (byte 0x{raw[err.start]:02x}); "
                     "save the recipe as UTF-8")]
        ) from None
    return text.removeprefix("\ufeff")


def parse_recipe(raw: bytes, file: str = "<recipe>") -> Recipe:
    """Check the recipe given as bytes; ``file`` names it in messages."""
    text = _decode(raw, file)
    loaded = load_yaml(text)
    collector = _Collector(file, loaded)
    for p in loaded.problems:
        collector.problems.append(Problem(file, p.position.line, p.position.column, "", p.what))
    if loaded.data is None:
        raise RecipeError(collector.problems)
    data = loaded.data
    if not isinstance(data, dict):
        collector.add((), f"a recipe is a mapping of keys (format, name, steps, ...), got {_describe(data)}")
        raise RecipeError(collector.problems)
    if "format" in data and data["format"] != FORMAT:
        collector.add(("format",), f"{data['format']!r} is not a format this version reads; "
                      f"write format: {FORMAT}")
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
        collector.add(("pixel_size",), "the pixel size must be a physical length (e.g. 0.65 um), "
                      "or from-image")
    for axis, size in enumerate(recipe.voxel_size or ()):
        if size.unit == "px":
            collector.add(("voxel_size", axis), "a voxel size must be a physical length "
                          "(e.g. 0.8 um)")
    limits: dict[str, LimitDef] = {}
    for name, limit in model.limits.items():
        checked_limit = _check_limit(name, limit, recipe, collector)
        if checked_limit is not None:
            limits[name] = checked_limit
    recipe = resolve_graph(dataclasses.replace(recipe, limits=limits), collector, strict=True)
    if collector.problems:
        raise RecipeError(collector.problems)
    return recipe


def _partial_recipe(file: str, raw: bytes, data: dict[str, Any], steps: dict[str, StepDef]) -> Recipe:
    inputs = {k: v for k, v in data["inputs"].items() if isinstance(k, str)}
    return Recipe(
        path=file, raw=raw, sha256="", name="", revision=0, summary="", pixel_size=None,
        lossy_input="refuse", inputs=inputs, steps=steps, limits={},
    )


def _check_step(name: str, spec: Any, collector: _Collector) -> StepDef | None:
    path = ("steps", name)
    if not isinstance(spec, dict):
        collector.add(path, f"a step is a mapping with apply, to and its parameters, got {_describe(spec)}")
        return None
    kind_name = spec.get("apply")
    if kind_name is None:
        collector.add(path, "missing required key 'apply' (the step kind)")
        return None
    if not isinstance(kind_name, str):
        collector.add(
            path + ("apply",),
            f"the step kind is a name such as threshold, got {_describe(kind_name)}; "
            "`lotproof steps` lists them",
        )
        return None
    if kind_name not in REGISTRY:
        kinds = sorted(REGISTRY)
        collector.add(
            path + ("apply",),
            f"unknown step kind {kind_name!r}{_suggest(kind_name, kinds)}; "
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


def _check_limit(name: str, limit: LimitModel, recipe: Recipe, collector: _Collector) -> LimitDef | None:
    path = ("limits", name)
    step_name, _, value_name = limit.value.partition(".")
    if step_name not in recipe.steps:
        candidates = list(recipe.steps)
        collector.add(path + ("value",), f"no step named {step_name!r}{_suggest(step_name, candidates)}")
        return None
    kind = REGISTRY[recipe.steps[step_name].kind]
    if value_name not in kind.values:
        names = list(kind.values)
        offered = ", ".join(names) if names else "none"
        collector.add(
            path + ("value",),
            f"step {step_name!r} ({kind.name}) gives no value {value_name!r}"
            f"{_suggest(value_name, names)}; it gives: {offered}",
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
    if ok and bounds["low"] is not None and bounds["high"] is not None and bounds["low"] > bounds["high"]:
        collector.add(path, f"the lower bound {bounds['low']:g} is above the upper bound {bounds['high']:g}")
        ok = False
    if not ok:
        return None
    return LimitDef(
        name=name, step=step_name, value=value_name, unit=unit, over=limit.over,
        low=bounds["low"], high=bounds["high"], written=written,
    )
