"""The run folder's files: created new, written atomically, never overwritten.

Which files there are and how they are named is :mod:`lotproof.runner.record.layout`;
this module writes them: the CSV and JSON layouts of the tables, the resolved
parameters, the verdicts document, kept results and the figures.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from lotproof.runner.errors import RunFolderError
from lotproof.runner.evaluate.image import ImageResult, resolve_params
from lotproof.runner.files import write_file
from lotproof.runner.recipe.lotsheet import LotDetails
from lotproof.runner.recipe.model import Recipe
from lotproof.runner.record.layout import (
    IMAGES_FILE,
    INPUTS_FILE,
    OBJECTS_FILE,
    RECIPE_FILE,
    RESOLVED_FILE,
    STEPS_FILE,
    TABLES_FILE,
    VERDICTS_FILE,
    figure_path,
    image_folders,
    kept_path,
    run_folder_name,
)
from lotproof.runner.record.limits import Verdicts
from lotproof.steps import REGISTRY, Table

__all__ = [
    "CAUTION",
    "ROUNDING_RULE",
    "create_folder",
    "create_run_folder",
    "format_number",
    "value_columns",
    "verdicts_document",
    "write_bytes",
    "write_run_files",
]

CAUTION = (
    "These results support, and do not replace, the laboratory's own validated procedures. "
    "Acceptance decisions rest with the laboratory's quality system, and a method must be "
    "validated on the laboratory's own reference samples before it is used for release."
)

ROUNDING_RULE = (
    "Lengths and areas are converted to pixels with the image's pixel size, rounded to 12 "
    "significant digits (so 0.6 um at 0.2 um per pixel is exactly 3 px) and kept as real "
    "numbers. A disk, diamond or ball of radius r px is every pixel offset with x^2 + y^2 <= r^2 "
    "(|x| + |y| <= r for a diamond): no rounding. Sides of squares, rectangles and cubes and the "
    "length of a line become 2*floor(v/2) + 1 pixels (the nearest odd number, ties upward)."
)


def create_run_folder(out: Path, recipe: Recipe, now: datetime | None = None) -> Path:
    """Make a new, empty run folder under ``out``; never reuse an existing one."""
    return create_folder(out, recipe.name, recipe.revision, now)


def create_folder(out: Path, name: str, revision: int, now: datetime | None = None) -> Path:
    """Make a new, empty folder ``<UTC time>-<name>-r<revision>`` under ``out`` (a run or a
    study folder); never reuse an existing one: a second in the same second gets ``-2``."""
    now = now or datetime.now(UTC)
    base = run_folder_name(name, revision, now)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise RunFolderError(f"{out}: cannot create the output folder ({err.strerror})") from None
    for n in range(1, 1000):
        candidate = out / (base if n == 1 else f"{base}-{n}")
        try:
            candidate.mkdir()
        except FileExistsError:
            continue
        except OSError as err:
            raise RunFolderError(
                f"{candidate}: cannot create the run folder ({err.strerror})"
            ) from None
        return candidate
    raise RunFolderError(f"{out}: too many run folders named {base}-*")


def write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to a new run file at ``path``, whole and durable; never overwrite one."""
    try:
        write_file(path, data, replace=False)
    except FileExistsError:
        raise RunFolderError(f"{path}: exists already; run files are never overwritten") from None
    except OSError as err:
        raise RunFolderError(f"{path}: cannot write ({err.strerror})") from None


def format_number(value: float | int | None) -> str:
    """Shortest text that reads back to the same float; NaN as 'NaN'."""
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return str(int(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    value = float(value)
    if value != value:
        return "NaN"
    if math.isinf(value):
        return "Infinity" if value > 0 else "-Infinity"
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(value)


def _column_text(column: np.ndarray) -> list[str]:
    """``format_number`` of every cell of a column, in one pass over Python scalars."""
    values = np.asarray(column)
    if values.dtype.kind in "iub":
        return [str(v) for v in values.astype(np.int64).tolist()]
    if values.dtype.kind == "f" and bool(np.isfinite(values).all()):
        # the common case, inlined: whole numbers without ".0", others by repr (shortest exact)
        return [
            str(int(v)) if v.is_integer() and -1e15 < v < 1e15 else repr(v)
            for v in values.astype(np.float64).tolist()
        ]
    return [format_number(v) for v in values.tolist()]


def _json(data: Any) -> bytes:
    return (json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode()


def _csv(rows: list[list[str]]) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerows(rows)
    return buffer.getvalue().encode()


def _header(name: str, unit: str) -> str:
    return f"{name} [{unit}]"


def value_columns(recipe: Recipe) -> list[tuple[str, str, str]]:
    """(step, value, unit) of every value the recipe's run steps report, in run order."""
    columns = []
    for step_name in recipe.order:
        kind = REGISTRY[recipe.steps[step_name].kind]
        for value_name, unit in kind.values.items():
            columns.append((step_name, value_name, unit))
    return columns


def _images_csv(recipe: Recipe, results: list[ImageResult], verdicts: Verdicts) -> bytes:
    columns = value_columns(recipe)
    present = {key for r in results for key in r.values}
    columns = [c for c in columns if (c[0], c[1]) in present] or [
        c for c in columns if REGISTRY[recipe.steps[c[0]].kind].values
    ]
    each = [name for name, lv in verdicts.limits.items() if lv.over == "each"]
    header = ["image", "status", "verdict", "reason", _header("pixel_size", "um")]
    header += [_header(f"{s}.{v}", u) for s, v, u in columns]
    header += [f"limit {name}" for name in each]
    rows = [header]
    for r in results:
        pixel = format_number(r.spacing[-1]) if r.spacing else ""
        row = [r.id, r.status, verdicts.image_verdict(r.id), r.reason, pixel]
        row += [format_number(r.values.get((s, v))) for s, v, _ in columns]
        row += [verdicts.limits[name].per_image.get(r.id, (None, ""))[1] for name in each]
        rows.append(row)
    return _csv(rows)


def _table_columns(results: list[ImageResult], per_object: bool) -> list[tuple[str, str]]:
    columns: list[tuple[str, str]] = []
    for r in results:
        for table in r.tables.values():
            if table.per_object != per_object:
                continue
            for name in table.columns:
                entry = (name, table.units[name])
                if entry not in columns:
                    columns.append(entry)
    return columns


def _write_tables_csv(
    path: Path, recipe: Recipe, results: list[ImageResult], *, per_object: bool
) -> None:
    """Rows of every table-giving step: ``objects.csv`` (per-object tables) or ``tables.csv``.

    Written image by image to a temporary file, then renamed: memory stays at one
    image's rows however many objects the lot has.
    """
    columns = _table_columns(results, per_object)

    def rows(raw: BinaryIO) -> None:
        handle = io.TextIOWrapper(raw, encoding="utf-8", newline="")
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(["image", "step"] + [_header(n, u) for n, u in columns])
        for r in results:
            for step_name in recipe.order:
                table = r.tables.get(step_name)
                if table is None or table.per_object != per_object:
                    continue
                cells = [
                    _column_text(table.columns[n]) if n in table.columns else [""] * table.n_rows
                    for n, _ in columns
                ]
                prefix = [r.id, step_name]
                writer.writerows(prefix + list(row) for row in zip(*cells, strict=True))
        handle.flush()
        handle.detach()  # the raw file stays open: it is write_file's to close

    try:
        write_file(path, rows, replace=False)
    except FileExistsError:
        raise RunFolderError(f"{path}: exists already; run files are never overwritten") from None
    except OSError as err:
        raise RunFolderError(f"{path}: cannot write ({err.strerror})") from None


def _steps_csv(results: list[ImageResult]) -> bytes:
    rows = [["image", "step", "kind", "version", "key", "checksum", "cache"]]
    for r in results:
        for record in r.steps:
            rows.append(
                [
                    r.id,
                    record.step,
                    record.kind,
                    record.version,
                    record.key,
                    record.checksum or "",
                    record.cache,
                ]
            )
    return _csv(rows)


def _resolved(recipe: Recipe, results: list[ImageResult]) -> dict[str, Any]:
    spacings = sorted({r.spacing for r in results if r.spacing is not None})
    steps = {}
    for name in list(recipe.order) + list(recipe.unused):
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        entry: dict[str, Any] = {
            "apply": step.kind,
            "version": kind.version,
            "to": list(step.to),
            "keep": step.keep,
            "runs": name in recipe.order,
            "params": step.params.model_dump(mode="json"),
        }
        if name in recipe.order:
            in_px = []
            for spacing in spacings:
                try:
                    resolved = resolve_params(step.params, spacing).model_dump(mode="json")
                except ValueError as err:
                    resolved = {"error": str(err)}
                in_px.append({"pixel_size_um": list(spacing), "params": resolved})
            entry["params_in_pixels"] = in_px
        steps[name] = entry
    return {
        "format": "lotproof/1",
        "name": recipe.name,
        "revision": recipe.revision,
        "summary": recipe.summary,
        "recipe_sha256": recipe.sha256,
        "pixel_size": recipe.size_text,
        "calibration": recipe.calibration,
        "lossy_input": recipe.lossy_input,
        "inputs": recipe.inputs,
        "run_order": list(recipe.order),
        "not_run": list(recipe.unused),
        "steps": steps,
        "limits": {
            name: {
                "value": f"{limit.step}.{limit.value}",
                "unit": limit.unit,
                "over": limit.over,
                "min": limit.low,
                "max": limit.high,
                "as_written": limit.written,
                "inclusive": True,
                "display": limit.display,
            }
            for name, limit in recipe.limits.items()
        },
        "rounding_rule": ROUNDING_RULE,
    }


def _write_kept(run: Path, results: list[ImageResult], folders: Mapping[str, str]) -> list[str]:
    import tifffile

    written = []
    for r in results:
        for step_name, data in r.kept.items():
            if isinstance(data, np.ndarray):
                buffer = io.BytesIO()
                tifffile.imwrite(buffer, data, metadata=None, software=False, datetime=False)
                name = kept_path(r.id, step_name, "tif", folders)
                write_bytes(run / name, buffer.getvalue())
            elif isinstance(data, Table):
                header = [_header(n, data.units[n]) for n in data.columns]
                texts = [_column_text(c) for c in data.columns.values()]
                rows = [header] + [list(row) for row in zip(*texts, strict=True)]
                name = kept_path(r.id, step_name, "csv", folders)
                write_bytes(run / name, _csv(rows))
            else:
                continue
            written.append(name)
    return written


def write_previews(run: Path, result: ImageResult, folders: Mapping[str, str]) -> list[str]:
    """``figures/IMAGE.thumbnail.png`` and ``figures/IMAGE.overlay.png`` of one image.

    ``result.preview`` holds PNG bytes (encoded by the worker) or display arrays;
    ``folders`` is the lot's :func:`~lotproof.runner.record.layout.image_folders`.
    """
    from lotproof.runner.evaluate.pictures import png_bytes

    written = []
    for name, item in sorted(result.preview.items()):
        data = item if isinstance(item, bytes) else png_bytes(item)
        path = figure_path(result.id, name, folders)
        write_bytes(run / path, data)
        written.append(path)
    return written


def verdicts_document(
    recipe: Recipe,
    results: list[ImageResult],
    verdicts: Verdicts,
    details: LotDetails | None = None,
) -> dict[str, Any]:
    """``verdicts.json``: the lot verdict, the method, the lot's details, every limit."""
    lot: dict[str, Any] = {} if details is None else {"lot": details.document()}
    return {
        "lot_verdict": verdicts.lot,
        "method": {
            "name": recipe.name,
            "revision": recipe.revision,
            "recipe_sha256": recipe.sha256,
        },
        **lot,
        "images": verdicts.images,
        "incomplete_images": {r.id: r.reason for r in results if r.status != "ok"},
        "image_verdicts": {r.id: verdicts.image_verdict(r.id) for r in results},
        "limits": {name: lv.as_dict() for name, lv in verdicts.limits.items()},
        "rules": "bounds are inclusive; an image that could not be analysed never counts as passing",
        "caution": CAUTION,
    }


def write_run_files(
    run: Path,
    recipe: Recipe,
    results: list[ImageResult],
    verdicts: Verdicts,
    lot: Path,
    folders: Mapping[str, str] | None = None,
    details: LotDetails | None = None,
) -> list[str]:
    """Write every file of the run folder; returns their paths relative to ``run``.

    ``folders`` names each image inside the run folder (default: the lot's
    :func:`~lotproof.runner.record.layout.image_folders` of ``results``);
    ``details`` (customer, order, ...) go into ``verdicts.json`` beside the verdicts.
    """
    if folders is None:
        folders = image_folders(r.id for r in results)
    write_bytes(run / RECIPE_FILE, recipe.raw)
    resolved = _resolved(recipe, results)
    resolved["lot"] = str(lot)
    write_bytes(run / RESOLVED_FILE, _json(resolved))
    write_bytes(run / IMAGES_FILE, _images_csv(recipe, results, verdicts))
    _write_tables_csv(run / OBJECTS_FILE, recipe, results, per_object=True)
    extra = [r for r in results for t in r.tables.values() if not t.per_object]
    if extra:
        _write_tables_csv(run / TABLES_FILE, recipe, results, per_object=False)
    write_bytes(run / STEPS_FILE, _steps_csv(results))
    inputs = {r.id: r.inputs for r in results}
    write_bytes(run / INPUTS_FILE, _json(inputs))
    kept = _write_kept(run, results, folders)
    write_bytes(run / VERDICTS_FILE, _json(verdicts_document(recipe, results, verdicts, details)))
    tables = [TABLES_FILE] if extra else []
    return [
        RECIPE_FILE,
        RESOLVED_FILE,
        IMAGES_FILE,
        OBJECTS_FILE,
        *tables,
        STEPS_FILE,
        INPUTS_FILE,
        *kept,
        VERDICTS_FILE,
    ]
