"""Evaluating a recipe's graph on each image of a lot.

The executor treats data as opaque: it reads inputs with :mod:`lotproof.runner.evaluate.inputs`,
hands arrays to step functions in the recipe's run order, and collects what they
give. It knows nothing of what the steps compute. One image that cannot be read or
analysed is marked incomplete with its reason; the other images still run.
"""

from __future__ import annotations

import math
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from lotproof.runner.errors import InputError
from lotproof.runner.evaluate.cache import NullStore, Store
from lotproof.runner.evaluate.hashing import (
    content_checksum,
    input_key,
    library_versions,
    step_key,
)
from lotproof.runner.evaluate.inputs import LoadedImage, Sample, read_image
from lotproof.runner.recipe.model import Recipe
from lotproof.steps import (
    REGISTRY,
    Output,
    StepParams,
    Table,
    resolve_to_px,
)
from lotproof.steps.units import resolve_params

__all__ = [
    "ENTRY_BYTES_MIN",
    "ENTRY_BYTES_PER_VALUE",
    "ImageResult",
    "StepRecord",
    "analyse_sample",
    "entry_bound",
    "resolve_params",
]

#: relative tolerance within which an image's own calibration agrees with the recipe's
CALIBRATION_TOLERANCE = 0.01


@dataclass
class StepRecord:
    """One (image, step): its cache key, the checksum of its result, and how it was had."""

    step: str
    kind: str
    version: str
    key: str
    checksum: str | None
    #: computed | reused (loaded from the cache) | skipped (cached, and nothing needed it loaded)
    cache: str
    seconds: float


@dataclass
class ImageResult:
    """What one image of the lot gave."""

    id: str
    status: str = "ok"  # ok | incomplete
    reason: str = ""
    inputs: list[dict[str, Any]] = field(default_factory=list)
    spacing: tuple[float, ...] | None = None
    #: (step, value name) -> value
    values: dict[tuple[str, str], float] = field(default_factory=dict)
    #: (step, value name) -> unit
    units: dict[tuple[str, str], str] = field(default_factory=dict)
    tables: dict[str, Table] = field(default_factory=dict)
    kept: dict[str, Any] = field(default_factory=dict)
    steps: list[StepRecord] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    #: host:pid of the process that analysed the image
    worker: str = ""
    #: small display arrays for the report (see lotproof.runner.evaluate.pictures.preview_arrays)
    preview: dict[str, Any] = field(default_factory=dict)

    def fail(self, reason: str) -> ImageResult:
        self.status = "incomplete"
        self.reason = reason
        self.values.clear()
        self.tables.clear()
        self.kept.clear()
        return self


def _recipe_spacing(recipe: Recipe, spatial: int, shown: str) -> tuple[float, ...]:
    """The recipe's pixel size per array axis for data with ``spatial`` axes."""
    if recipe.voxel_size is not None:
        sizes = [resolve_to_px(v, 1.0).value for v in recipe.voxel_size]  # um, x first
        if len(sizes) == 3 and spatial == 2:
            raise InputError(
                f"{shown}: the recipe gives a voxel size for volumes (x, y, z), but this is a "
                "2-D image"
            )
        if len(sizes) == 2 and spatial == 3:
            raise InputError(
                f"{shown}: the recipe gives a pixel size for 2-D images (x, y), but this is a "
                "3-D volume; write voxel_size: [x, y, z]"
            )
        return tuple(reversed(sizes))
    assert recipe.pixel_size is not None
    size_um = resolve_to_px(recipe.pixel_size, 1.0).value  # um per pixel
    return (size_um,) * spatial


def _axes_text(sizes: tuple[float, ...]) -> str:
    names = ("z", "y", "x")[-len(sizes) :]
    return ", ".join(f"{n} {s:.6g}" for n, s in zip(names, sizes, strict=True)) + " um"


def _spacing(recipe: Recipe, images: list[LoadedImage], result: ImageResult) -> tuple[float, ...]:
    """The pixel size per array axis of one sample, by the recipe's calibration rule.

    ``pixel_size: from-image`` takes the image's calibration (none is an error).
    Otherwise the recipe's size is used; when the image carries a calibration
    that differs from it by more than :data:`CALIBRATION_TOLERANCE` (relative)
    on some axis, the sample is incomplete under ``calibration:
    image-must-agree`` and noted under ``calibration: recipe-wins``. An image
    calibrated in x and y only (a volume without z spacing) is compared on
    those axes.
    """
    first = images[0]
    spatial = first.data.ndim - (1 if first.is_color else 0)
    calibration = first.calibration
    if recipe.size_from_image:
        if calibration.pixel_size_um is None:
            raise InputError(
                f"{first.path}: the recipe says pixel_size: from-image, but this image carries "
                f"no calibration ({calibration.source})"
            )
        return tuple(calibration.pixel_size_um)
    spacing = _recipe_spacing(recipe, spatial, first.path)
    for image in images:
        own = image.calibration.pixel_size_um
        if own is None:
            continue
        own = tuple(own)
        theirs = spacing[-len(own) :]
        if len(own) > len(spacing) or all(
            abs(a - b) <= CALIBRATION_TOLERANCE * b for a, b in zip(own, theirs, strict=True)
        ):
            continue
        said = (
            f"{image.path}: the image says {_axes_text(own)} per pixel "
            f"({image.calibration.source}), the recipe {recipe.size_text}"
        )
        if recipe.calibration == "recipe-wins":
            result.notes.append(f"{said}; the recipe's size was used (calibration: recipe-wins)")
        else:
            raise InputError(
                f"{said}: they differ by more than {CALIBRATION_TOLERANCE:.0%}; fix the recipe "
                "or the image, or write calibration: recipe-wins (or pixel_size: from-image)"
            )
    return spacing


def _targets(recipe: Recipe) -> list[str]:
    """Steps whose results the run reports: measurements, kept steps, limited or valued steps."""
    limited = {limit.step for limit in recipe.limits.values()}
    out = []
    for name in recipe.order:
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        if step.keep or name in limited or kind.values or kind.gives in ("table", "values"):
            out.append(name)
    return out


class _StepFailed(Exception):
    pass


#: bytes per input value a step result can take at most: a few arrays of the image's
#: size in 8-byte values, or a table of a few dozen 8-byte columns of at most one row
#: per value (every object has at least one pixel)
ENTRY_BYTES_PER_VALUE = 256
#: what any step result may take whatever the image (a small table of values)
ENTRY_BYTES_MIN = 1 << 20


def entry_bound(values: int) -> int:
    """The most bytes a cache entry of a step result on images of ``values`` values can hold.

    A cache entry larger than this is damaged and is never read into memory.
    """
    return ENTRY_BYTES_MIN + ENTRY_BYTES_PER_VALUE * int(values)


def analyse_sample(
    recipe: Recipe,
    sample: Sample,
    lot: Path,
    *,
    store: Store | None = None,
    preview: bool = False,
    capture: tuple[str, ...] = (),
) -> ImageResult:
    """Run ``recipe`` on one image of the lot; never raises for bad data.

    Every step's result is looked up in ``store`` by its key first; only what is
    missing is computed, and only what a reported result needs is loaded.
    ``preview`` adds small display arrays (the image and the measured objects) for
    the report; ``capture`` names steps whose data are returned in ``kept`` as if
    they were marked ``keep: true`` (the contact sheet of ``lotproof preview``).
    """
    store = store if store is not None else NullStore()
    result = ImageResult(id=sample.id)
    if sample.problem:
        return result.fail(sample.problem)
    loaded: dict[str, LoadedImage] = {}
    try:
        for name in recipe.inputs:
            image = read_image(sample.files[name], lot, lossy=recipe.lossy_input)
            loaded[name] = image
            result.inputs.append({"input": name, **image.describe()})
        spacing = _spacing(recipe, list(loaded.values()), result)
    except InputError as err:
        return result.fail(str(err))
    result.spacing = spacing

    keys: dict[str, str] = {
        name: input_key(image.sha256, image.calibration.as_dict()) for name, image in loaded.items()
    }
    resolved: dict[str, StepParams] = {}
    for name in recipe.order:
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        try:
            resolved[name] = resolve_params(step.params, spacing)
        except ValueError as err:
            return result.fail(f"step {name!r} ({step.kind}): {err}")
        idle = kind.degenerate_reason(resolved[name], len(spacing))
        if idle is not None:  # a step that does nothing is how a failing lot passes
            return result.fail(f"step {name!r} ({step.kind}) at this pixel size: {idle}")
        keys[name] = step_key(
            kind.name,
            kind.version,
            resolved[name],
            spacing,
            [keys[source] for source in step.to],
            library_versions(kind.libraries),
        )

    data: dict[str, Any] = {name: image.data for name, image in loaded.items()}
    color: set[str] = {name for name, image in loaded.items() if image.is_color}
    bound = entry_bound(sum(image.data.size for image in loaded.values()))
    del loaded
    records: dict[str, StepRecord] = {}

    def get(name: str) -> Any:
        if name in data:
            return data[name]
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        key = keys[name]
        started = time.perf_counter()
        hit = store.get(key, bound)
        if hit is not None:
            out, checksum = hit
            records[name] = StepRecord(
                name,
                step.kind,
                kind.version,
                key,
                checksum,
                "reused",
                time.perf_counter() - started,
            )
        else:
            args = [_payload(get(source)) for source in step.to]
            _check_arguments(recipe, name, sample.id, args, color)
            started = time.perf_counter()
            try:
                out = kind.func(resolved[name], *args, spacing=spacing)
            except (ValueError, TypeError, ArithmeticError, MemoryError) as err:
                raise _StepFailed(f"step {name!r} ({step.kind}): {err}") from None
            except Exception as err:  # a step bug must not end the lot
                where = traceback.extract_tb(err.__traceback__)[-1]
                raise _StepFailed(
                    f"step {name!r} ({step.kind}) failed unexpectedly: {type(err).__name__}: "
                    f"{err} (at {Path(where.filename).name}:{where.lineno})"
                ) from None
            seconds = time.perf_counter() - started
            if isinstance(out, Output):
                undeclared = set(out.values) - set(kind.values)
                if undeclared:
                    raise _StepFailed(
                        f"step {name!r} ({step.kind}) reported undeclared values {sorted(undeclared)}"
                    )
            try:
                checksum = store.put(key, out)
            except OSError as err:  # the cache is a help, not evidence: go on without it
                checksum = content_checksum(out)
                note = f"step {name!r}: result not cached ({err.strerror or err})"
                if note not in result.notes:
                    result.notes.append(note)
            records[name] = StepRecord(
                name, step.kind, kind.version, key, checksum, "computed", seconds
            )
        data[name] = out
        return out

    targets = _targets(recipe)
    wanted = targets + [n for n in capture if n in recipe.order and n not in targets]
    try:
        for name in wanted:
            out = get(name)
            step = recipe.steps[name]
            kind = REGISTRY[step.kind]
            if isinstance(out, Output):
                for value_name, value in out.values.items():
                    result.values[(name, value_name)] = float(value)
                    result.units[(name, value_name)] = kind.values[value_name]
                out = out.data
            if isinstance(out, Table):
                result.tables[name] = out
            if step.keep or name in capture:
                result.kept[name] = out
        if preview:
            result.preview = _preview(recipe, get)
    except _StepFailed as err:
        result.steps = [records[n] for n in recipe.order if n in records]
        return result.fail(str(err))
    finally:
        # `get` refers to itself through its closure: a reference cycle that would keep
        # every intermediate of this image alive until the cyclic collector runs. Drop
        # the data now, so memory holds one image's intermediates at a time.
        data.clear()
    for name in recipe.order:
        if name not in records:
            step = recipe.steps[name]
            records[name] = StepRecord(
                name,
                step.kind,
                REGISTRY[step.kind].version,
                keys[name],
                store.checksum(keys[name], bound),
                "skipped",
                0.0,
            )
    result.steps = [records[n] for n in recipe.order]
    for (step_name, value_name), value in result.values.items():
        if not math.isfinite(value) and value_name in _limited(recipe, step_name):
            result.notes.append(f"{step_name}.{value_name} is undefined for {sample.id}")
    return result


def _preview(recipe: Recipe, get: Callable[[str], Any]) -> dict[str, Any]:
    """Display arrays: the first input, outlined with what the first measuring step measured."""
    from lotproof.runner.evaluate.pictures import preview_arrays

    first_input = next(iter(recipe.inputs))
    measured = next(
        (n for n in recipe.order if REGISTRY[recipe.steps[n].kind].gives in ("table", "values")),
        None,
    )
    objects = None
    if measured is not None:
        source = recipe.steps[measured].to[0]
        candidate = _payload(get(source))
        if isinstance(candidate, np.ndarray):
            objects = candidate
    image = get(first_input)
    if not isinstance(image, np.ndarray):
        return {}
    return preview_arrays(image, objects)


def _payload(result: Any) -> Any:
    """What a step hands to the next: its data, without the values it reported."""
    return result.data if isinstance(result, Output) else result


def _check_arguments(
    recipe: Recipe, name: str, image_id: str, args: list[Any], color: set[str]
) -> None:
    step = recipe.steps[name]
    kind = REGISTRY[step.kind]
    for source, arg in zip(step.to, args, strict=True):
        if source in color and not kind.accepts_color:
            grays = [n for n, s in recipe.steps.items() if s.kind == "gray"]
            hint = (
                f"step {grays[0]!r} (gray) makes a gray image; apply {name!r} to it"
                if grays
                else "add a step with apply: gray before it"
            )
            raise _StepFailed(
                f"step {name!r} ({step.kind}) needs a gray image, but {source!r} of "
                f"{image_id} is a colour image; {hint}"
            )
        if isinstance(arg, np.ndarray):
            ndim = arg.ndim - (1 if source in color else 0)
            if ndim not in kind.ndims:
                dims = " or ".join(f"{d}-D" for d in sorted(kind.ndims))
                raise _StepFailed(
                    f"step {name!r} ({step.kind}) works on {dims} data; {source!r} of "
                    f"{image_id} is {ndim}-D (shape {arg.shape})"
                )


def _limited(recipe: Recipe, step_name: str) -> set[str]:
    return {limit.value for limit in recipe.limits.values() if limit.step == step_name}
