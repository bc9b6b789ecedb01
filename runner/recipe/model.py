"""The recipe's models: the ``format: lotproof/1`` schema and the checked :class:`Recipe`.

The pydantic models (:class:`RecipeModel`, :class:`LimitModel`) validate the
top level; each step is checked by its own kind's parameter model. Loading and
checking a file is :mod:`lotproof.runner.recipe.load`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, model_validator

from lotproof.steps import Length, StepParams

__all__ = [
    "CALIBRATION_RULES",
    "DISPLAY_CHOICES",
    "FORMAT",
    "MAX_REVISION",
    "MAX_STEPS",
    "NAME_PATTERN",
    "OVER_CHOICES",
    "STEP_KEYS",
    "LimitDef",
    "LimitModel",
    "Recipe",
    "RecipeModel",
    "StepDef",
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
#: the largest revision: canonical JSON (RFC 8785) holds integers exactly up to 2**53 - 1
MAX_REVISION = 2**53 - 1
#: the most steps a recipe may have (a method has tens; the bound keeps every check and
#: evaluation within fixed depth)
MAX_STEPS = 400
#: how a limit's value and bounds are shown to people (the files keep the value as measured):
#: number as it is, percent a dimensionless fraction times 100 with a % sign (0.18 -> 18 %)
DISPLAY_CHOICES = ("number", "percent")
#: keys of a step that are not parameters of its kind
STEP_KEYS = ("apply", "to", "keep")

Name = Annotated[str, StringConstraints(pattern=NAME_PATTERN)]


class _Strict(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class LimitModel(_Strict):
    """An acceptance limit on one value that a step reports."""

    value: Annotated[str, StringConstraints(pattern=r"^[A-Za-z][A-Za-z0-9_-]*\.[A-Za-z0-9_]+$")] = (
        Field(description="the bounded value, as STEP.NAME (e.g. pore-stats.area_fraction)")
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
    display: Literal[DISPLAY_CHOICES] = Field(  # type: ignore[valid-type]
        "number",
        description="how the report shows the value and its bounds: number as measured, or "
        "percent for a dimensionless fraction (0.18 shown as 18 %); the files keep the value "
        "as measured",
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

    format: Literal["lotproof/1"] = Field(
        description="recipe format and version; must be lotproof/1"
    )
    name: Annotated[str, StringConstraints(pattern=SLUG_PATTERN)] = Field(
        description="the method's name (lower-case letters, digits, '-'); with revision it names "
        "the method on certificates"
    )
    revision: int = Field(
        ge=1, le=MAX_REVISION, description="the method's revision, bumped on every change"
    )
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
    steps: dict[Name, dict[str, Any]] = Field(
        description=f"the named steps (at most {MAX_STEPS})", min_length=1, max_length=MAX_STEPS
    )
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
    #: one of DISPLAY_CHOICES
    display: str = "number"


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
