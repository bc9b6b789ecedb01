"""``lotproof compare``: measurement deltas and verdict changes between two run folders.

Reads ``images.csv`` and ``verdicts.json`` of each run (the runs may come from the
same recipe or not). Values are compared exactly as written (the shortest text
that reads back to the same float), so "equal" means bit-for-bit equal.

* per image, for every value column both runs have (same name and unit): the two
  values, ``b - a`` and ``(b - a) / |a|`` (None when ``a`` is 0 or undefined);
* per image: status, verdict and per-limit verdict changes;
* per limit: the lot-level value (``lot-mean`` / ``lot-max`` / ``lot-min``), its
  delta, and the verdict of each run; the lot verdicts;
* images, value columns and limits that only one run has.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from lotproof.runner.errors import InputError
from lotproof.runner.record.layout import IMAGES_FILE, VERDICTS_FILE
from lotproof.runner.record.reading import RunFolder

__all__ = ["LimitComparison", "RunComparison", "ValueDelta", "VerdictChange", "compare_runs"]

_COLUMN = re.compile(r"^(?P<name>.+) \[(?P<unit>[^\]]*)\]$")
_LIMIT = "limit "


@dataclass(frozen=True)
class ValueDelta:
    """One value of one image in both runs; ``a``/``b`` None when the image gave none."""

    image: str
    column: str
    unit: str
    a: float | None
    b: float | None

    @property
    def equal(self) -> bool:
        if self.a is None or self.b is None:
            return self.a is self.b
        if math.isnan(self.a) and math.isnan(self.b):
            return True
        return self.a == self.b

    @property
    def absolute(self) -> float | None:
        if (
            self.a is None
            or self.b is None
            or not (math.isfinite(self.a) and math.isfinite(self.b))
        ):
            return None
        return self.b - self.a

    @property
    def relative(self) -> float | None:
        delta = self.absolute
        if delta is None or self.a == 0:
            return None
        return delta / abs(self.a)  # type: ignore[arg-type]

    def as_dict(self) -> dict[str, Any]:
        return {
            "image": self.image,
            "column": self.column,
            "unit": self.unit,
            "a": _finite(self.a),
            "b": _finite(self.b),
            "equal": self.equal,
            "absolute": self.absolute,
            "relative": self.relative,
        }


@dataclass(frozen=True)
class VerdictChange:
    """A status or verdict of one image (``what``: status, verdict, limit NAME) that changed."""

    image: str
    what: str
    a: str
    b: str

    def as_dict(self) -> dict[str, Any]:
        return {"image": self.image, "what": self.what, "a": self.a, "b": self.b}


@dataclass(frozen=True)
class LimitComparison:
    """A limit of both runs: the lot-level values (None for ``over: each``) and verdicts."""

    name: str
    value_of_a: str
    value_of_b: str
    over_a: str
    over_b: str
    unit: str
    value_a: float | None
    value_b: float | None
    bound_a: str
    bound_b: str
    verdict_a: str
    verdict_b: str

    @property
    def delta(self) -> float | None:
        if self.value_a is None or self.value_b is None:
            return None
        return self.value_b - self.value_a

    @property
    def changed(self) -> bool:
        return (
            self.value_a != self.value_b
            or self.verdict_a != self.verdict_b
            or self.bound_a != self.bound_b
            or self.value_of_a != self.value_of_b
            or self.over_a != self.over_b
        )

    def as_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "value_of": [self.value_of_a, self.value_of_b],
            "over": [self.over_a, self.over_b],
            "unit": self.unit,
            "a": self.value_a,
            "b": self.value_b,
            "delta": self.delta,
            "bound": [self.bound_a, self.bound_b],
            "verdict": [self.verdict_a, self.verdict_b],
            "changed": self.changed,
        }


@dataclass
class RunComparison:
    """Everything :func:`compare_runs` found; ``identical`` when nothing differs."""

    run_a: Path
    run_b: Path
    method_a: dict[str, Any]
    method_b: dict[str, Any]
    lot_verdict_a: str
    lot_verdict_b: str
    images_only_a: list[str] = field(default_factory=list)
    images_only_b: list[str] = field(default_factory=list)
    columns_only_a: list[str] = field(default_factory=list)
    columns_only_b: list[str] = field(default_factory=list)
    values: list[ValueDelta] = field(default_factory=list)
    verdict_changes: list[VerdictChange] = field(default_factory=list)
    limits: list[LimitComparison] = field(default_factory=list)
    limits_only_a: list[str] = field(default_factory=list)
    limits_only_b: list[str] = field(default_factory=list)

    @property
    def same_recipe(self) -> bool:
        return self.method_a.get("recipe_sha256") == self.method_b.get("recipe_sha256")

    @property
    def changed_values(self) -> list[ValueDelta]:
        return [v for v in self.values if not v.equal]

    @property
    def identical(self) -> bool:
        return not (
            self.images_only_a
            or self.images_only_b
            or self.columns_only_a
            or self.columns_only_b
            or self.changed_values
            or self.verdict_changes
            or self.limits_only_a
            or self.limits_only_b
            or any(lim.changed for lim in self.limits)
            or self.lot_verdict_a != self.lot_verdict_b
        )

    def as_dict(self) -> dict[str, Any]:
        return {
            "run_a": str(self.run_a),
            "run_b": str(self.run_b),
            "method": [self.method_a, self.method_b],
            "same_recipe": self.same_recipe,
            "identical": self.identical,
            "lot_verdict": [self.lot_verdict_a, self.lot_verdict_b],
            "images_only_in_a": self.images_only_a,
            "images_only_in_b": self.images_only_b,
            "columns_only_in_a": self.columns_only_a,
            "columns_only_in_b": self.columns_only_b,
            "limits_only_in_a": self.limits_only_a,
            "limits_only_in_b": self.limits_only_b,
            "verdict_changes": [c.as_dict() for c in self.verdict_changes],
            "limits": [lim.as_dict() for lim in self.limits],
            "values": [v.as_dict() for v in self.values],
        }


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def _number(text: str, where: str) -> float | None:
    if text == "":
        return None
    try:
        return float(text)  # reads NaN, Infinity, -Infinity as written by the run
    except ValueError:
        raise InputError(f"{where}: {text!r} is not a number") from None


@dataclass
class _Run:
    path: Path
    images: dict[str, dict[str, str]]
    columns: dict[str, str]  # header -> unit, value columns only
    limit_columns: list[str]
    verdicts: dict[str, Any]


def _read_run(run: Path) -> _Run:
    folder = RunFolder(run, error=InputError)
    images_csv, verdicts_json = folder.path / IMAGES_FILE, folder.path / VERDICTS_FILE
    verdicts = folder.json(VERDICTS_FILE)
    header, body = folder.csv(IMAGES_FILE, required=True)
    rows = [header, *body] if header else []
    if not rows or rows[0][:1] != ["image"]:
        raise InputError(f"{images_csv}: no header starting with 'image'")
    header = rows[0]
    columns = {}
    limit_columns = []
    for name in header:
        match = _COLUMN.match(name)
        if match:
            columns[name] = match.group("unit")
        elif name.startswith(_LIMIT):
            limit_columns.append(name)
    images: dict[str, dict[str, str]] = {}
    for number, row in enumerate(rows[1:], 2):
        if len(row) != len(header):
            raise InputError(
                f"{images_csv} line {number}: {len(row)} cells, the header has {len(header)}"
            )
        images[row[0]] = dict(zip(header, row, strict=True))
    if not isinstance(verdicts, dict) or not isinstance(verdicts.get("limits", {}), dict):
        raise InputError(f"{verdicts_json}: not a verdicts document")
    return _Run(folder.path, images, columns, limit_columns, verdicts)


def _limit_value(doc: dict[str, Any]) -> float | None:
    value = doc.get("value")
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None


def compare_runs(a: Path, b: Path) -> RunComparison:
    """Compare run folder ``a`` with run folder ``b`` (``b - a`` for every delta).

    Raises
    ------
    InputError
        When a folder lacks a readable ``images.csv`` or ``verdicts.json``.
    """
    ra, rb = _read_run(a), _read_run(b)
    out = RunComparison(
        run_a=ra.path,
        run_b=rb.path,
        method_a=dict(ra.verdicts.get("method") or {}),
        method_b=dict(rb.verdicts.get("method") or {}),
        lot_verdict_a=str(ra.verdicts.get("lot_verdict", "")),
        lot_verdict_b=str(rb.verdicts.get("lot_verdict", "")),
    )
    out.images_only_a = [i for i in ra.images if i not in rb.images]
    out.images_only_b = [i for i in rb.images if i not in ra.images]
    shared_columns = [c for c in ra.columns if c in rb.columns]
    out.columns_only_a = [c for c in ra.columns if c not in rb.columns]
    out.columns_only_b = [c for c in rb.columns if c not in ra.columns]
    shared_limit_columns = [c for c in ra.limit_columns if c in rb.limit_columns]
    for image in ra.images:
        if image not in rb.images:
            continue
        row_a, row_b = ra.images[image], rb.images[image]
        for what in ("status", "verdict", *shared_limit_columns):
            va, vb = row_a.get(what, ""), row_b.get(what, "")
            if va != vb:
                out.verdict_changes.append(VerdictChange(image, what, va, vb))
        for column in shared_columns:
            name = _COLUMN.match(column).group("name")  # type: ignore[union-attr]
            out.values.append(
                ValueDelta(
                    image,
                    name,
                    ra.columns[column],
                    _number(row_a[column], f"{ra.path / 'images.csv'}: {image}, {column}"),
                    _number(row_b[column], f"{rb.path / 'images.csv'}: {image}, {column}"),
                )
            )
    limits_a, limits_b = ra.verdicts.get("limits", {}), rb.verdicts.get("limits", {})
    out.limits_only_a = [n for n in limits_a if n not in limits_b]
    out.limits_only_b = [n for n in limits_b if n not in limits_a]
    for name, la in limits_a.items():
        if name not in limits_b:
            continue
        lb = limits_b[name]
        out.limits.append(
            LimitComparison(
                name=name,
                value_of_a=str(la.get("value_of", "")),
                value_of_b=str(lb.get("value_of", "")),
                over_a=str(la.get("over", "")),
                over_b=str(lb.get("over", "")),
                unit=str(lb.get("unit", "")),
                value_a=_limit_value(la),
                value_b=_limit_value(lb),
                bound_a=str(la.get("bound", "")),
                bound_b=str(lb.get("bound", "")),
                verdict_a=str(la.get("verdict", "")),
                verdict_b=str(lb.get("verdict", "")),
            )
        )
    return out
