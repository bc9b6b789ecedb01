"""The validation plan (``format: lotproof-study/1``): read, checked, and resolved.

A plan is a YAML file of its own format, read with the recipes' strict loader
(:mod:`lotproof.runner.recipe.yamlpos`) and checked completely before anything
runs; every problem is reported at once as ``FILE:LINE:COL: where: what``, as for a
recipe (:class:`PlanError`, exit 2). Paths in a plan are relative to the plan's
own folder::

    format: lotproof-study/1
    name: coating-porosity-validation      # slug; with revision it names the study
    revision: 1
    summary: Gauge study, trueness and robustness of the coating porosity method
    recipe: ../../recipes/coating-porosity.yaml
    values: [pore-stats.area_fraction]      # studied values, STEP.VALUE of the recipe
    precision:                              # repeat images of parts by operators
      folder: images/precision
      table: images/precision.csv           # image, part, operator, replicate
      # or: files: "{operator}/{part}-{replicate}.tif"
      tolerance: {pore-stats.area_fraction: 0.10}   # else the recipe's limit on the value
      pool_interaction_above: 0.25
    trueness:                               # references with known values
      folder: images/reference
      table: images/reference.csv           # image, reference, one column per value
      # or: files: "{reference}-{replicate}.tif" and references: {P04: 0.04, ...}
      source: generated references, truth from the generator
      confidence: 0.95
    robustness:
      parameters: {pores.level: ±3 %, clean.radius: ±1 px, level.radius: ±10 %}
      images: all                           # all | precision | trueness
    criteria:
      gauge: "%GRR of tolerance <= 10"
      categories: ndc >= 5
      robust: no verdict flips

Numbers that belong to a value with a unit carry it (``tolerance: {pore-stats.ecd_d50:
4 um}``), as in recipes; a plan's moves carry theirs (:mod:`~lotproof.runner.study.variants`).
The criteria are :mod:`~lotproof.runner.study.criteria`'s.
"""

from __future__ import annotations

import csv
import hashlib
import io
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
    model_validator,
)

from lotproof.runner.errors import InputError, Problem, RecipeError
from lotproof.runner.files import NotARegularFile, read_file
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.recipe.model import NAME_PATTERN, SLUG_PATTERN, Recipe
from lotproof.runner.recipe.problems import ProblemCollector, describe, suggest
from lotproof.runner.recipe.quantities import BoundError, parse_bound
from lotproof.runner.recipe.yamlpos import MAX_RECIPE_BYTES, load_yaml
from lotproof.runner.record.layout import safe_relative
from lotproof.runner.study.criteria import Criterion, RuleError, parse_rule
from lotproof.runner.study.stats import POOL_ABOVE
from lotproof.runner.study.variants import Move, MoveError, build_move
from lotproof.steps import REGISTRY

__all__ = [
    "FORMAT",
    "IMAGE_SETS",
    "MAX_TABLE_BYTES",
    "Plan",
    "PlanError",
    "Precision",
    "PrecisionImage",
    "Robustness",
    "StudiedValue",
    "Trueness",
    "TruenessImage",
    "load_plan",
    "parse_plan",
]

FORMAT = "lotproof-study/1"
#: the sets of images a study measures, in this order
IMAGE_SETS = ("precision", "trueness")
#: a design table larger than this is refused before it is read
MAX_TABLE_BYTES = 10_000_000

_VALUE_PATTERN = r"^[A-Za-z][A-Za-z0-9_-]*\.[A-Za-z0-9_]+$"
ValueName = Annotated[str, StringConstraints(pattern=_VALUE_PATTERN)]
Name = Annotated[str, StringConstraints(pattern=NAME_PATTERN)]
_FIELD = re.compile(r"\{([^{}]*)\}")


class PlanError(RecipeError):
    """A validation plan is invalid; ``problems`` lists every problem found (exit 2)."""


class _Strict(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class _Design(_Strict):
    folder: str = Field(min_length=1, description="the folder of the images, relative to the plan")
    table: str | None = Field(None, min_length=1, description="a CSV design table")
    files: str | None = Field(None, min_length=1, description="a file-name template")

    @model_validator(mode="after")
    def _one_source(self) -> _Design:
        if (self.table is None) == (self.files is None):
            raise ValueError("give either table (a CSV file) or files (a name template), not both")
        return self


class PrecisionModel(_Design):
    """Repeat images of parts by operators: the gauge study."""

    tolerance: dict[ValueName, Any] = Field(
        default_factory=dict,
        description="USL - LSL per studied value, or [LSL, USL], with the value's unit; else the "
        "recipe's limit on the value gives it",
    )
    pool_interaction_above: float = Field(
        POOL_ABOVE,
        gt=0,
        le=1,
        description="the part x operator interaction is pooled into repeatability when its "
        "p-value is above this (0.25, common practice)",
    )


class TruenessModel(_Design):
    """Reference images with known values: bias and linearity."""

    references: dict[Name, Any] | None = Field(
        None, description="with files: the known value(s) of each reference"
    )
    source: str = Field("", description="where the known values come from")
    confidence: float = Field(0.95, gt=0, lt=1, description="two-sided confidence level")

    @model_validator(mode="after")
    def _known(self) -> TruenessModel:
        if self.files is not None and self.references is None:
            raise ValueError("files needs references: the known value(s) of each reference")
        if self.table is not None and self.references is not None:
            raise ValueError("the table gives the known values; leave out references")
        return self


class RobustnessModel(_Strict):
    """Recipe parameters moved one at a time."""

    parameters: dict[str, Any] = Field(min_length=1, description="STEP.PARAM: ±step")
    images: Literal["all", "precision", "trueness"] = Field(
        "all", description="which images are measured with every moved recipe"
    )


class PlanModel(_Strict):
    """The top level of a validation plan."""

    format: Literal["lotproof-study/1"] = Field(description="must be lotproof-study/1")
    name: Annotated[str, StringConstraints(pattern=SLUG_PATTERN)] = Field(
        description="the study's name (lower-case letters, digits, '-')"
    )
    revision: int = Field(ge=1, description="the plan's revision, bumped on every change")
    summary: str = Field("", description="one line on what the study shows")
    recipe: str = Field(min_length=1, description="the recipe, relative to the plan")
    values: list[ValueName] = Field(min_length=1, description="studied values, STEP.VALUE")
    # each section is checked by its own model (PrecisionModel, ...), at its own position
    precision: dict[str, Any] | None = Field(None, description="the gauge study")
    trueness: dict[str, Any] | None = Field(None, description="references with known values")
    robustness: dict[str, Any] | None = Field(None, description="recipe parameters moved")
    criteria: dict[Name, Any] = Field(default_factory=dict, description="acceptance criteria")

    @model_validator(mode="after")
    def _something(self) -> PlanModel:
        if self.precision is None and self.trueness is None and self.robustness is None:
            raise ValueError("a plan studies precision, trueness or robustness; give at least one")
        if self.robustness is not None and self.precision is None and self.trueness is None:
            raise ValueError("robustness measures the precision or trueness images; give one")
        return self


# ---------------------------------------------------------------- the checked plan


@dataclass(frozen=True)
class StudiedValue:
    """A value the study judges, with its unit and tolerance (USL - LSL, or None)."""

    name: str
    step: str
    value: str
    unit: str
    tolerance: float | None
    tolerance_source: str


@dataclass(frozen=True)
class PrecisionImage:
    image: str
    part: str
    operator: str
    replicate: str


@dataclass(frozen=True)
class Precision:
    folder: Path
    images: tuple[PrecisionImage, ...]
    parts: tuple[str, ...]
    operators: tuple[str, ...]
    replicates: int
    pool_above: float
    #: the design table's exact bytes, when the plan gives a table
    table: bytes | None = None


@dataclass(frozen=True)
class TruenessImage:
    image: str
    reference: str
    #: studied value -> known value, in the value's unit
    known: dict[str, float]


@dataclass(frozen=True)
class Trueness:
    folder: Path
    images: tuple[TruenessImage, ...]
    references: tuple[str, ...]
    source: str
    confidence: float
    table: bytes | None = None


@dataclass(frozen=True)
class Robustness:
    moves: tuple[Move, ...]
    images: str


@dataclass(frozen=True)
class Plan:
    """A checked validation plan, its recipe loaded and its designs resolved."""

    path: str
    raw: bytes
    sha256: str
    name: str
    revision: int
    summary: str
    recipe: Recipe
    values: tuple[StudiedValue, ...]
    precision: Precision | None
    trueness: Trueness | None
    robustness: Robustness | None
    criteria: tuple[Criterion, ...] = field(default=())

    @property
    def label(self) -> str:
        return f"{self.name} r{self.revision}"

    def value(self, name: str) -> StudiedValue:
        return next(v for v in self.values if v.name == name)


# ---------------------------------------------------------------- reading


def _read_limited(path: Path, shown: str, what: str, limit: int) -> bytes:
    """The bytes of a plan or design table; a :class:`PlanError` naming it otherwise."""
    try:
        info = path.stat()
        if stat.S_ISDIR(info.st_mode):
            raise PlanError([Problem(shown, 1, 1, "", f"is a folder, not a {what}")])
        if info.st_size > limit:
            raise PlanError(
                [
                    Problem(
                        shown,
                        1,
                        1,
                        "",
                        f"the file is {info.st_size} bytes; a {what} is at most {limit}",
                    )
                ]
            )
        return read_file(path, max_bytes=limit)
    except FileNotFoundError:
        raise PlanError([Problem(shown, 1, 1, "", "no such file")]) from None
    except NotARegularFile:
        raise PlanError(
            [
                Problem(
                    shown, 1, 1, "", f"not a regular file (a pipe or a device?); a {what} is a file"
                )
            ]
        ) from None
    except OSError as err:
        raise PlanError([Problem(shown, 1, 1, "", f"cannot read: {err.strerror}")]) from None


def load_plan(path: str | Path) -> Plan:
    """Read and fully check the validation plan at ``path``.

    Raises
    ------
    PlanError
        With every problem found, each positioned in the plan (or in the recipe or
        design table it names). Nothing has run.
    InputError
        When an image folder the plan names does not exist (exit 3).
    """
    path = Path(path)
    return parse_plan(_read_limited(path, str(path), "plan", MAX_RECIPE_BYTES), path)


def _decode(raw: bytes, file: str) -> str:
    try:
        return raw.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as err:
        before = raw[: err.start]
        line = before.count(b"\n") + 1
        column = err.start - (before.rfind(b"\n") + 1) + 1
        raise PlanError(
            [Problem(file, line, column, "", f"not UTF-8 text (byte 0x{raw[err.start]:02x})")]
        ) from None


def parse_plan(raw: bytes, path: str | Path) -> Plan:
    """Check the plan given as bytes; ``path`` names it and locates its relative paths."""
    path = Path(path)
    file = str(path)
    base = path.parent
    loaded = load_yaml(_decode(raw, file))
    collector = ProblemCollector(file, loaded)
    for p in loaded.problems:
        collector.problems.append(Problem(file, p.position.line, p.position.column, "", p.what))
    data = loaded.data
    if data is None:
        raise PlanError(collector.problems)
    if not isinstance(data, dict):
        collector.add(
            (), f"a plan is a mapping of keys (format, name, recipe, ...), got {describe(data)}"
        )
        raise PlanError(collector.problems)
    if "format" in data and data["format"] != FORMAT:
        collector.add(
            ("format",),
            f"{data['format']!r} is not a plan format this version reads; write format: {FORMAT}",
        )
        data = {k: v for k, v in data.items() if k != "format"} | {"format": FORMAT}
    try:
        model = PlanModel.model_validate(data)
    except ValidationError as err:
        collector.add_validation(err, (), list(PlanModel.model_fields), data)
        raise PlanError(collector.problems) from None
    sections = _Sections(
        precision=_section(PrecisionModel, "precision", model.precision, collector),
        trueness=_section(TruenessModel, "trueness", model.trueness, collector),
        robustness=_section(RobustnessModel, "robustness", model.robustness, collector),
    )
    if collector.problems:
        raise PlanError(collector.problems)

    recipe = _recipe(model, base, collector)
    values = _values(model, sections, recipe, collector)
    precision = _precision(sections, base, collector) if sections.precision else None
    trueness = _trueness(sections, base, values, collector) if sections.trueness else None
    robustness = _robustness(sections, recipe, collector) if sections.robustness else None
    criteria = _criteria(model, sections, values, trueness, collector)
    if collector.problems:
        raise PlanError(collector.problems)
    assert recipe is not None
    return Plan(
        path=file,
        raw=raw,
        sha256=hashlib.sha256(raw).hexdigest(),
        name=model.name,
        revision=model.revision,
        summary=model.summary,
        recipe=recipe,
        values=tuple(values.values()),
        precision=precision,
        trueness=trueness,
        robustness=robustness,
        criteria=criteria,
    )


@dataclass(frozen=True)
class _Sections:
    precision: PrecisionModel | None
    trueness: TruenessModel | None
    robustness: RobustnessModel | None


def _section(
    model: type[_Strict], name: str, data: dict[str, Any] | None, collector: ProblemCollector
) -> Any:
    """One section checked by its own model, its problems positioned inside it."""
    if data is None:
        return None
    try:
        return model.model_validate(data)
    except ValidationError as err:
        collector.add_validation(err, (name,), list(model.model_fields), data)
        return None


def _recipe(model: PlanModel, base: Path, collector: ProblemCollector) -> Recipe | None:
    path = base / model.recipe
    try:
        return load_recipe(path)
    except RecipeError as err:
        collector.add(
            ("recipe",),
            f"the recipe {path} is not valid ({len(err.problems)} problem"
            f"{'s' if len(err.problems) != 1 else ''}, listed with it)",
        )
        collector.problems.extend(err.problems)
        return None


def _values(
    model: PlanModel, sections: _Sections, recipe: Recipe | None, collector: ProblemCollector
) -> dict[str, StudiedValue]:
    out: dict[str, StudiedValue] = {}
    if recipe is None:
        return out
    for index, name in enumerate(model.values):
        where = ("values", index)
        step, _, value = name.partition(".")
        if name in out:
            collector.add(where, f"{name} is studied twice")
            continue
        if step not in recipe.steps:
            collector.add(
                where, f"the recipe has no step {step!r}{suggest(step, list(recipe.steps))}"
            )
            continue
        kind = REGISTRY[recipe.steps[step].kind]
        if value not in kind.values:
            offered = ", ".join(kind.values) or "none"
            collector.add(
                where,
                f"step {step!r} ({kind.name}) gives no value {value!r}"
                f"{suggest(value, list(kind.values))}; it gives: {offered}",
            )
            continue
        if step not in recipe.order:
            collector.add(where, f"step {step!r} is not run by the recipe (nothing needs it)")
            continue
        unit = kind.values[value]
        tolerance, source = _tolerance(sections, name, unit, recipe, collector)
        out[name] = StudiedValue(name, step, value, unit, tolerance, source)
    return out


def _tolerance(
    sections: _Sections, name: str, unit: str, recipe: Recipe, collector: ProblemCollector
) -> tuple[float | None, str]:
    given = sections.precision.tolerance if sections.precision is not None else {}
    if name in given:
        where = ("precision", "tolerance", name)
        raw = given[name]
        try:
            if isinstance(raw, list):
                if len(raw) != 2:
                    raise BoundError("a tolerance range is [LSL, USL]")
                low, high = parse_bound(raw[0], unit), parse_bound(raw[1], unit)
                width = high - low
            else:
                width = parse_bound(raw, unit)
        except BoundError as err:
            collector.add(where, str(err))
            return None, ""
        if width <= 0:
            collector.add(where, f"a tolerance is larger than 0 (got {width:g})")
            return None, ""
        return width, "given in the plan"
    limits = [lim for lim in recipe.limits.values() if f"{lim.step}.{lim.value}" == name]
    limits.sort(key=lambda lim: lim.over != "each")
    for lim in limits:
        if lim.low is not None and lim.high is not None:
            return (
                lim.high - lim.low,
                f"the recipe's limit {lim.name!r} ({lim.low:g} to {lim.high:g})",
            )
    return None, ""


# ---------------------------------------------------------------- design tables


def _table(
    path: Path, shown: str, required: tuple[str, ...]
) -> tuple[bytes, list[str], list[tuple[int, list[str]]]]:
    raw = _read_limited(path, shown, "design table", MAX_TABLE_BYTES)
    text = _decode(raw, shown)
    rows = [
        (n, row)
        for n, row in enumerate(csv.reader(io.StringIO(text, newline="")), 1)
        if any(c.strip() for c in row)
    ]
    if not rows:
        raise PlanError(
            [
                Problem(
                    shown,
                    1,
                    1,
                    "",
                    "the table is empty; its first line names the columns " + ", ".join(required),
                )
            ]
        )
    header = [c.strip() for c in rows[0][1]]
    missing = [c for c in required if c not in header]
    if missing:
        raise PlanError(
            [
                Problem(
                    shown,
                    rows[0][0],
                    1,
                    "header",
                    f"no column {', '.join(repr(m) for m in missing)}; the columns are {', '.join(required)} (then any others)",
                )
            ]
        )
    return raw, header, rows[1:]


def _image_name(text: str, shown: str, line: int, problems: list[Problem]) -> str | None:
    name = text.strip()
    if not name:
        problems.append(Problem(shown, line, 1, f"row {line}", "no image"))
        return None
    if safe_relative(name) is None:
        problems.append(
            Problem(
                shown,
                line,
                1,
                f"row {line}",
                f"{name!r} is not a path inside the image folder (relative, '/' between folders, no '..')",
            )
        )
        return None
    return name


def _template(
    template: str, required: tuple[str, ...], optional: tuple[str, ...]
) -> re.Pattern[str]:
    names = _FIELD.findall(template)
    unknown = [n for n in names if n not in required + optional]
    if unknown:
        raise ValueError(
            f"unknown field {{{unknown[0]}}}; the fields are "
            + ", ".join("{" + n + "}" for n in required + optional)
        )
    missing = [n for n in required if n not in names]
    if missing:
        raise ValueError("the template needs " + ", ".join("{" + n + "}" for n in missing))
    if len(set(names)) != len(names):
        raise ValueError("each field appears once in the template")
    if safe_relative(_FIELD.sub("x", template)) is None:
        raise ValueError("the template is a path inside the image folder (relative, no '..')")
    pattern, at = "", 0
    for match in _FIELD.finditer(template):
        pattern += re.escape(template[at : match.start()]) + f"(?P<{match.group(1)}>[^/]+?)"
        at = match.end()
    return re.compile("^" + pattern + re.escape(template[at:]) + "$")


def _folder(base: Path, written: str, section: str) -> Path:
    folder = base / written
    if not folder.is_dir():
        raise InputError(
            f"{folder}: no such image folder (precision/trueness folder of the plan's {section} "
            "section)"
        )
    return folder


def _matching(folder: Path, pattern: re.Pattern[str]) -> list[tuple[str, dict[str, str]]]:
    found = []
    for path in sorted(folder.rglob("*")):
        if not path.is_file():
            continue
        rel = path.relative_to(folder).as_posix()
        match = pattern.match(rel)
        if match:
            found.append((rel, match.groupdict()))
    return found


def _precision(sections: _Sections, base: Path, collector: ProblemCollector) -> Precision | None:
    spec = sections.precision
    assert spec is not None
    folder = _folder(base, spec.folder, "precision")
    rows: list[
        tuple[str, str, str, str, str, int]
    ] = []  # image, part, operator, replicate, file, line
    table: bytes | None = None
    shown = ""
    if spec.table is not None:
        shown = str(base / spec.table)
        try:
            table, header, body = _table(
                base / spec.table, shown, ("image", "part", "operator", "replicate")
            )
        except PlanError as err:
            collector.problems.extend(err.problems)
            return None
        at = {c: header.index(c) for c in ("image", "part", "operator", "replicate")}
        for line, row in body:
            given = {c: (row[i].strip() if i < len(row) else "") for c, i in at.items()}
            image = _image_name(given["image"], shown, line, collector.problems)
            empty = [c for c in ("part", "operator", "replicate") if not given[c]]
            if empty:
                collector.problems.append(
                    Problem(shown, line, 1, f"row {line}", f"no {', '.join(empty)}")
                )
                continue
            if image is not None:
                rows.append(
                    (image, given["part"], given["operator"], given["replicate"], shown, line)
                )
    else:
        assert spec.files is not None
        try:
            pattern = _template(spec.files, ("part", "operator", "replicate"), ())
        except ValueError as err:
            collector.add(("precision", "files"), str(err))
            return None
        for rel, fields in _matching(folder, pattern):
            rows.append((rel, fields["part"], fields["operator"], fields["replicate"], "", 0))
        if not rows:
            collector.add(("precision", "files"), f"no file in {folder} matches {spec.files!r}")
            return None
    images, parts, operators = [], [], []
    seen: dict[str, int] = {}
    cells: dict[tuple[str, str], list[str]] = {}
    for image, part, operator, replicate, file, line in rows:
        if image in seen:
            where = (file, line) if file else (str(base / spec.folder), 1)
            collector.problems.append(
                Problem(
                    where[0],
                    where[1],
                    1,
                    f"row {line}" if file else "",
                    f"image {image} is listed twice (first at row {seen[image]})",
                )
            )
            continue
        seen[image] = line
        if replicate in cells.setdefault((part, operator), []):
            collector.problems.append(
                Problem(
                    file or str(folder),
                    line or 1,
                    1,
                    f"row {line}" if file else "",
                    f"part {part}, operator {operator}, replicate {replicate} is given twice",
                )
            )
            continue
        cells[(part, operator)].append(replicate)
        images.append(PrecisionImage(image, part, operator, replicate))
        if part not in parts:
            parts.append(part)
        if operator not in operators:
            operators.append(operator)
    design_key = ("precision", "table" if spec.table is not None else "files")
    if len(parts) < 2 or len(operators) < 2:
        collector.add(
            design_key,
            f"a gauge study needs at least 2 parts and 2 operators; the design has {len(parts)} part(s) and {len(operators)} operator(s)",
        )
        return None
    counts = {len(cells.get((p, o), [])) for p in parts for o in operators}
    if len(counts) != 1:
        gaps = [
            f"part {p}/operator {o}: {len(cells.get((p, o), []))}"
            for p in parts
            for o in operators
            if len(cells.get((p, o), [])) != max(counts)
        ]
        collector.add(
            design_key,
            "the design is not balanced: every part needs the same number of replicates by every operator; "
            + ", ".join(gaps[:6])
            + (" ..." if len(gaps) > 6 else ""),
        )
        return None
    replicates = counts.pop()
    if replicates < 2:
        collector.add(
            design_key, "a gauge study needs at least 2 replicates of every part by every operator"
        )
        return None
    return Precision(
        folder,
        tuple(images),
        tuple(parts),
        tuple(operators),
        replicates,
        spec.pool_interaction_above,
        table,
    )


def _known_value(text: Any, unit: str, given_unit: str | None) -> float:
    """A known value read in the value's ``unit``; ``given_unit`` is the table column's own
    (``[um]`` in its header; ``[-]`` or none: the cell carries its unit, if any)."""
    if given_unit not in (None, "", "-") and isinstance(text, str):
        return parse_bound(f"{text.strip()} {given_unit}", unit)
    return parse_bound(text.strip() if isinstance(text, str) else text, unit)


def _trueness(
    sections: _Sections, base: Path, values: dict[str, StudiedValue], collector: ProblemCollector
) -> Trueness | None:
    spec = sections.trueness
    assert spec is not None
    folder = _folder(base, spec.folder, "trueness")
    images: list[TruenessImage] = []
    table: bytes | None = None
    seen: set[str] = set()
    if spec.table is not None:
        shown = str(base / spec.table)
        try:
            table, header, body = _table(base / spec.table, shown, ("image", "reference"))
        except PlanError as err:
            collector.problems.extend(err.problems)
            return None
        columns: dict[str, tuple[int, str | None]] = {}
        for i, title in enumerate(header):
            match = re.fullmatch(r"(\S+?)(?:\s*\[([^\]]*)\])?", title)
            if match and match.group(1) in values:
                columns[match.group(1)] = (i, match.group(2))
        if not columns:
            collector.problems.append(
                Problem(
                    shown,
                    1,
                    1,
                    "header",
                    "no column of known values; name one after a studied value: "
                    + ", ".join(values),
                )
            )
            return None
        at_image, at_ref = header.index("image"), header.index("reference")
        for line, row in body:
            image = _image_name(
                row[at_image] if at_image < len(row) else "", shown, line, collector.problems
            )
            reference = row[at_ref].strip() if at_ref < len(row) else ""
            if not reference:
                collector.problems.append(Problem(shown, line, 1, f"row {line}", "no reference"))
                continue
            known: dict[str, float] = {}
            for name, (i, given_unit) in columns.items():
                cell = row[i] if i < len(row) else ""
                try:
                    known[name] = _known_value(cell, values[name].unit, given_unit)
                except BoundError as err:
                    collector.problems.append(
                        Problem(shown, line, i + 1, f"row {line}, {header[i]}", str(err))
                    )
            if image is None or len(known) != len(columns):
                continue
            if image in seen:
                collector.problems.append(
                    Problem(shown, line, 1, f"row {line}", f"image {image} is listed twice")
                )
                continue
            seen.add(image)
            images.append(TruenessImage(image, reference, known))
    else:
        assert spec.files is not None and spec.references is not None
        try:
            pattern = _template(spec.files, ("reference",), ("replicate",))
        except ValueError as err:
            collector.add(("trueness", "files"), str(err))
            return None
        knowns: dict[str, dict[str, float]] = {}
        for reference, written in spec.references.items():
            where = ("trueness", "references", reference)
            if not isinstance(written, dict):
                if len(values) != 1:
                    collector.add(
                        where,
                        "with several studied values, give the known value of each: {VALUE: known, ...}",
                    )
                    continue
                written = {next(iter(values)): written}
            known = {}
            for name, raw in written.items():
                if name not in values:
                    collector.add(
                        where + (name,),
                        f"{name!r} is not a studied value{suggest(name, list(values))}",
                    )
                    continue
                try:
                    known[name] = _known_value(raw, values[name].unit, None)
                except BoundError as err:
                    collector.add(where + (name,), str(err))
            knowns[reference] = known
        for rel, fields in _matching(folder, pattern):
            if fields["reference"] in knowns:
                images.append(TruenessImage(rel, fields["reference"], knowns[fields["reference"]]))
        named = {i.reference for i in images}
        for reference in knowns:
            if reference not in named:
                collector.add(
                    ("trueness", "references", reference),
                    f"no file in {folder} matches {spec.files!r} with reference {reference}",
                )
    references: list[str] = []
    for item in images:
        if item.reference not in references:
            references.append(item.reference)
    design_key = ("trueness", "table" if spec.table is not None else "files")
    few = [r for r in references if sum(1 for i in images if i.reference == r) < 2]
    if few:
        collector.add(
            design_key,
            f"every reference needs at least 2 images for a confidence interval of its bias; {', '.join(few)} has fewer",
        )
    if not images:
        collector.add(design_key, "no reference image")
        return None
    return Trueness(folder, tuple(images), tuple(references), spec.source, spec.confidence, table)


# ---------------------------------------------------------------- robustness and criteria


def _robustness(
    sections: _Sections, recipe: Recipe | None, collector: ProblemCollector
) -> Robustness | None:
    spec = sections.robustness
    assert spec is not None
    if recipe is None:
        return None
    moves = []
    for parameter, written in spec.parameters.items():
        try:
            moves.append(build_move(recipe, parameter, written))
        except MoveError as err:
            collector.add(("robustness", "parameters", parameter), str(err))
    images = spec.images
    if (images == "precision" and sections.precision is None) or (
        images == "trueness" and sections.trueness is None
    ):
        collector.add(("robustness", "images"), f"the plan has no {images} section to measure")
    return Robustness(tuple(moves), images)


def _criteria(
    model: PlanModel,
    sections: _Sections,
    values: dict[str, StudiedValue],
    trueness: Trueness | None,
    collector: ProblemCollector,
) -> tuple[Criterion, ...]:
    out = []
    present = {
        "precision": sections.precision is not None,
        "trueness": sections.trueness is not None,
        "linearity": sections.trueness is not None,
        "robustness": sections.robustness is not None,
    }
    for name, written in model.criteria.items():
        where: tuple[Any, ...] = ("criteria", name)
        rule, judged = written, list(values)
        if isinstance(written, dict):
            unknown = [k for k in written if k not in ("rule", "value")]
            if unknown or "rule" not in written:
                collector.add(
                    where, "a criterion is a line of text, or a mapping of rule and value"
                )
                continue
            rule = written["rule"]
            value = written.get("value")
            if value is not None and value not in values:
                collector.add(
                    where + ("value",),
                    f"{value!r} is not a studied value{suggest(value, list(values))}",
                )
                continue
            judged = [value] if value is not None else judged
            where = where + ("rule",)
        try:
            kind, limits = parse_rule(rule, {v: values[v].unit for v in judged})
        except RuleError as err:
            collector.add(where, str(err))
            continue
        criterion = Criterion(
            name,
            " ".join(str(rule).split()),
            kind,
            limits,
            () if kind == "no_flips" else tuple(judged),
        )
        if not present[criterion.needs]:
            collector.add(
                where,
                f"{criterion.rule!r} needs the plan's {'trueness' if criterion.needs == 'linearity' else criterion.needs} section",
            )
            continue
        if criterion.needs_tolerance:
            lacking = [v for v in criterion.values if values[v].tolerance is None]
            if lacking:
                collector.add(
                    where,
                    f"{criterion.rule!r} needs the tolerance of {', '.join(lacking)}: give precision.tolerance, or a recipe limit with min and max on it",
                )
                continue
        if criterion.needs in ("trueness", "linearity") and trueness is not None:
            known = {n for image in trueness.images for n in image.known}
            lacking = [v for v in criterion.values if v not in known]
            if lacking:
                collector.add(
                    where,
                    f"{criterion.rule!r} needs known values of {', '.join(lacking)} in the trueness section",
                )
                continue
        out.append(criterion)
    return tuple(out)
