"""The lot history: runs of the catalogue that match filters, newest first, with key values.

:func:`list_runs` is ``lotproof history`` as a function. Each run comes with its
limits and its key values: for every value a limit of the run checks
(``STEP.NAME``), the mean over the run's analysed images, the same number a trend
point shows. Runs that are not intact have neither: their values are never used.
"""

from __future__ import annotations

import fnmatch
import math
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from lotproof.runner.history.catalogue import Catalogue
from lotproof.runner.history.entry import RunRecord
from lotproof.runner.history.spc import mean

__all__ = ["CSV_COLUMNS", "Listed", "csv_rows", "iso_time", "list_runs"]

#: (column of ``--csv``, field of :class:`RunRecord`), in order
CSV_COLUMNS = (
    ("started_utc", "started_utc"),
    ("ended_utc", "ended_utc"),
    ("lot", "lot"),
    ("recipe", "recipe_name"),
    ("revision", "recipe_revision"),
    ("verdict", "lot_verdict"),
    ("status", "status"),
    ("images", "images"),
    ("incomplete_images", "incomplete_images"),
    ("customer", "customer"),
    ("order", "order_ref"),
    ("specification", "specification"),
    ("operator", "operator"),
    ("run", "run_name"),
    ("run_dir", "run_dir"),
    ("seal", "seal"),
    ("recipe_sha256", "recipe_sha256"),
    ("git_commit", "git_commit"),
    ("git_modified", "git_modified"),
    ("lotproof_version", "lotproof_version"),
    ("executor", "executor"),
    ("lot_path", "lot_path"),
    ("exit_code", "exit_code"),
    ("problem", "problem"),
)


def iso_time(moment: datetime | None) -> str | None:
    """``2026-12-01T21:45:00Z`` (UTC), or None."""
    return moment.strftime("%Y-%m-%dT%H:%M:%SZ") if moment is not None else None


@dataclass
class Listed:
    """One run of the history: its catalogue row, its limits and its key values."""

    run: RunRecord
    limits: list[dict[str, Any]] = field(default_factory=list)
    #: STEP.NAME -> (mean over analysed images or None, unit, images with a value)
    key_values: dict[str, tuple[float | None, str, int]] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        """The run as ``history --json`` gives it: the catalogue's fields, limits, key values."""
        r = self.run
        return {
            "run": r.run_name,
            "run_dir": r.run_dir,
            "status": r.status,
            "problem": r.problem,
            "seal": r.seal,
            "recipe": r.recipe_name,
            "revision": r.recipe_revision,
            "recipe_sha256": r.recipe_sha256,
            "git_commit": r.git_commit,
            "git_modified": r.git_modified,
            "lot": r.lot,
            "lot_path": r.lot_path,
            "customer": r.customer,
            "order": r.order_ref,
            "specification": r.specification,
            "operator": r.operator,
            "started_utc": iso_time(r.started_utc),
            "ended_utc": iso_time(r.ended_utc),
            "lotproof_version": r.lotproof_version,
            "executor": r.executor,
            "verdict": r.lot_verdict,
            "images": r.images,
            "incomplete_images": r.incomplete_images,
            "exit_code": r.exit_code,
            "limits": [
                {
                    "name": row["name"],
                    "value_of": row["value_of"],
                    "unit": row["unit"],
                    "over": row["over"],
                    "min": row["low"],
                    "max": row["high"],
                    "bound": row["bound"],
                    "value": row["value"],
                    "verdict": row["verdict"],
                }
                for row in self.limits
            ],
            "values": {
                name: {"mean": value, "unit": unit, "n_images": n}
                for name, (value, unit, n) in self.key_values.items()
            },
        }


def list_runs(
    catalogue: Catalogue,
    *,
    recipe: str | None = None,
    revision: int | None = None,
    lot: str | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    verdict: str | None = None,
) -> list[Listed]:
    """Runs matching every filter, newest first; ``lot`` is a glob on the lot's name (case kept)."""
    found = catalogue.runs(
        recipe=recipe, revision=revision, verdict=verdict, since=since, until=until
    )
    if lot is not None:
        found = [r for r in found if r.lot is not None and fnmatch.fnmatchcase(r.lot, lot)]
    listed = [Listed(r) for r in found]
    limits = catalogue.limits(r.run_dir for r in found if r.status == "intact")
    wanted: dict[str, list[str]] = {}
    for item in listed:
        item.limits = limits.get(item.run.run_dir, [])
        for row in item.limits:
            keys = wanted.setdefault(row["value_of"], [])
            if not keys or keys[-1] != item.run.run_dir:
                keys.append(item.run.run_dir)
    by_key = {item.run.run_dir: item for item in listed}
    for value_of, keys in sorted(wanted.items()):
        step, _, name = value_of.partition(".")
        units = {
            row["run_dir"]: row["unit"]
            for k in keys
            for row in limits[k]
            if row["value_of"] == value_of
        }
        rows = catalogue.values(keys, step, name)
        for key in keys:
            good = [
                v
                for _, v, status in rows.get(key, [])
                if status == "ok" and v is not None and math.isfinite(v)
            ]
            by_key[key].key_values[value_of] = (mean(good) if good else None, units[key], len(good))
    return listed


def csv_rows(listed: list[Listed]) -> list[list[str]]:
    """``history --csv``: a header, then one row per run; key values as ``STEP.NAME [UNIT]``."""
    names: dict[str, str] = {}
    for item in listed:
        for value_of, (_, unit, _) in item.key_values.items():
            names.setdefault(value_of, unit)
    header = [column for column, _ in CSV_COLUMNS] + [
        f"{name} [{unit}]" for name, unit in sorted(names.items())
    ]
    rows = [header]
    for item in listed:
        row = []
        for _, attribute in CSV_COLUMNS:
            value = getattr(item.run, attribute)
            if isinstance(value, datetime):
                value = iso_time(value)
            row.append("" if value is None else str(value))
        for name in sorted(names):
            found = item.key_values.get(name)
            row.append("" if found is None or found[0] is None else repr(found[0]))
        rows.append(row)
    return rows
