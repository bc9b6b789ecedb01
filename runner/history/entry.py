"""One run folder read into one catalogue entry: what the catalogue records of a run.

:func:`read_run` checks the folder with
:func:`~lotproof.runner.record.verify.verify_run` first and reads it through
:class:`~lotproof.runner.record.reading.RunFolder`. Only an *intact* run gives
values: its verdict, every limit's value and verdict, every image's status and
every per-image value with its unit, all from the sealed files (``verdicts.json``,
``images.csv``) and the ledger's events (``run-start``, ``recipe``, ``lot`` and
``run-end``). An *altered* or *unfinished* run gives only what names it (folder,
recipe, lot, times, as far as its ledger can be read) and the first problem
``verify`` found, so it is listed as such and never enters a statistic.

The same function serves the record made at the end of a run and ``lotproof
history --rebuild``, which is why the two give the same catalogue.

Lot details (customer, order, specification, operator) are taken from a ``lot``
event when the ledger has one, else from fields of that name in ``run-start``;
runs without them leave them empty.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from lotproof.runner.errors import LotproofError
from lotproof.runner.record.layout import IMAGES_FILE
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run

__all__ = [
    "LOT_DETAILS",
    "ImageRecord",
    "LimitRecord",
    "RunEntry",
    "RunRecord",
    "ValueRecord",
    "parse_time",
    "read_run",
    "run_key",
]

#: lot details read from a ``lot`` event (or ``run-start``), by their field names there
LOT_DETAILS = ("customer", "order", "specification", "operator")

#: ``STEP.NAME [UNIT]``: a value column of images.csv
_VALUE_COLUMN = re.compile(
    r"^(?P<step>[A-Za-z][A-Za-z0-9_-]*)\.(?P<name>[A-Za-z0-9_]+) \[(?P<unit>[^\]]*)\]$"
)
_PIXEL_COLUMN = "pixel_size [um]"
#: the longest problem text kept per run (the folder itself has the rest: `lotproof verify`)
_PROBLEM_CHARS = 500


@dataclass
class RunRecord:
    """The catalogue's row of one run (table ``runs``); None where the run does not say."""

    run_dir: str
    run_name: str
    status: str
    problem: str | None = None
    seal: str | None = None
    recipe_name: str | None = None
    recipe_revision: int | None = None
    recipe_sha256: str | None = None
    git_commit: str | None = None
    git_modified: bool | None = None
    lot: str | None = None
    lot_path: str | None = None
    customer: str | None = None
    order_ref: str | None = None
    specification: str | None = None
    operator: str | None = None
    started_utc: datetime | None = None
    ended_utc: datetime | None = None
    lotproof_version: str | None = None
    executor: str | None = None
    lot_verdict: str | None = None
    images: int | None = None
    incomplete_images: int | None = None
    exit_code: int | None = None


@dataclass
class LimitRecord:
    """One limit of a run: what it checks, its bounds (in ``unit``), its value and verdict."""

    run_dir: str
    name: str
    value_of: str
    unit: str
    over: str
    low: float | None
    high: float | None
    bound: str
    value: float | None
    verdict: str


@dataclass
class ImageRecord:
    """One image of a run: status (``ok`` or why not), verdict and pixel size."""

    run_dir: str
    image: str
    status: str
    verdict: str
    reason: str
    pixel_size_um: float | None


@dataclass
class ValueRecord:
    """One per-image value: ``step``.``name`` of ``image`` in ``unit`` (None: undefined)."""

    run_dir: str
    image: str
    step: str
    name: str
    unit: str
    value: float | None


@dataclass
class RunEntry:
    """Everything the catalogue records of one run folder."""

    run: RunRecord
    limits: list[LimitRecord] = field(default_factory=list)
    images: list[ImageRecord] = field(default_factory=list)
    values: list[ValueRecord] = field(default_factory=list)


def run_key(run_dir: Path) -> str:
    """The catalogue's key of a run folder: its absolute path, links resolved."""
    return str(Path(os.path.abspath(run_dir)).resolve())


def parse_time(text: Any) -> datetime | None:
    """A ledger's ``time_utc`` (``2026-12-01T21:45:00Z``) as an aware UTC datetime, or None."""
    if not isinstance(text, str):
        return None
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.astimezone(UTC)


def _number(text: str) -> float | None:
    """A CSV cell as a finite float; None for an empty, undefined (NaN) or infinite value."""
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _finite(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


def _text(value: Any) -> str | None:
    if value is None:
        return None
    return value if isinstance(value, str) else str(value)


def _describe(record: RunRecord, events: list[dict[str, Any]]) -> None:
    """Fill ``record`` from the ledger's events (as far as they go)."""
    first: dict[Any, dict[str, Any]] = {}
    for event in events:
        first.setdefault(event.get("type"), event)
    start = first.get("run-start", {})
    recipe = first.get("recipe", {})
    end = first.get("run-end", {})
    record.recipe_name = _text(recipe.get("name"))
    revision = recipe.get("revision")
    record.recipe_revision = (
        revision if isinstance(revision, int) and not isinstance(revision, bool) else None
    )
    record.recipe_sha256 = _text(recipe.get("sha256"))
    git = recipe.get("git")
    if isinstance(git, dict):
        record.git_commit = _text(git.get("commit"))
        modified = git.get("modified")
        record.git_modified = modified if isinstance(modified, bool) else None
    lot = start.get("lot")
    if isinstance(lot, str) and lot:
        record.lot_path = lot
        record.lot = Path(lot).name or lot
    details = {key: start.get(key) for key in LOT_DETAILS}
    lot_event = first.get("lot")
    if isinstance(lot_event, dict):
        details.update({key: lot_event[key] for key in LOT_DETAILS if key in lot_event})
        name = lot_event.get("lot") or lot_event.get("name")
        if isinstance(name, str) and name:
            record.lot = name
    record.customer = _text(details["customer"])
    record.order_ref = _text(details["order"])
    record.specification = _text(details["specification"])
    record.operator = _text(details["operator"])
    record.started_utc = parse_time(start.get("time_utc"))
    record.ended_utc = parse_time(end.get("time_utc"))
    tool = start.get("tool")
    if isinstance(tool, dict):
        record.lotproof_version = _text(tool.get("version"))
    record.executor = _text(start.get("executor"))
    code = end.get("exit_code")
    record.exit_code = code if isinstance(code, int) and not isinstance(code, bool) else None


class _Unreadable(LotproofError):
    """A file of a run folder that verify found intact still cannot be read as expected."""


def read_run(run_dir: Path, *, expected_seal: str | None = None) -> RunEntry:
    """Read one run folder into a catalogue entry (the folder is only read, never changed).

    Parameters
    ----------
    run_dir
        The run folder.
    expected_seal
        The seal printed at the end of the run, when known: checked by ``verify``.

    Returns
    -------
    RunEntry
        With limits, images and values only when the run is intact.
    """
    run_dir = Path(run_dir)
    report = verify_run(run_dir, expected_seal=expected_seal)
    record = RunRecord(
        run_dir=run_key(run_dir), run_name=run_dir.name, status=report.status, seal=report.seal
    )
    folder = RunFolder(run_dir, error=_Unreadable)
    if report.status != "intact":
        record.problem = _problem(report.problems)
        try:
            _describe(record, folder.ledger_events())
        except LotproofError:
            pass  # nothing readable to name it by: the folder and the problem say enough
        return RunEntry(record)
    try:
        return _read_intact(folder, record)
    except (LotproofError, ValueError, KeyError, TypeError) as err:
        # sealed files that do not read as lotproof wrote them: never used for statistics
        record.status = "altered"
        record.problem = _problem([f"cannot be read as a run folder: {err}"])
        return RunEntry(record)


def _problem(problems: list[str]) -> str | None:
    if not problems:
        return None
    text = problems[0]
    if len(problems) > 1:
        text += f" (and {len(problems) - 1} more; see `lotproof verify`)"
    return text[:_PROBLEM_CHARS]


def _read_intact(folder: RunFolder, record: RunRecord) -> RunEntry:
    _describe(record, folder.events())
    verdicts = folder.verdicts()
    record.lot_verdict = _text(verdicts.get("lot_verdict"))
    images = verdicts.get("images")
    record.images = images if isinstance(images, int) and not isinstance(images, bool) else None
    record.incomplete_images = len(verdicts.get("incomplete_images") or {})
    entry = RunEntry(record)
    key = record.run_dir
    for name, limit in (verdicts.get("limits") or {}).items():
        entry.limits.append(
            LimitRecord(
                run_dir=key,
                name=str(name),
                value_of=str(limit["value_of"]),
                unit=str(limit["unit"]),
                over=str(limit["over"]),
                low=_finite(limit.get("min")),
                high=_finite(limit.get("max")),
                bound=str(limit.get("bound", "")),
                value=_finite(limit.get("value")),
                verdict=str(limit["verdict"]),
            )
        )
    header, rows = folder.csv(IMAGES_FILE, required=True)
    position = {name: i for i, name in enumerate(header)}
    for required in ("image", "status", "verdict", "reason"):
        if required not in position:
            raise ValueError(f"{IMAGES_FILE} has no {required!r} column")
    columns = [(i, m) for i, name in enumerate(header) if (m := _VALUE_COLUMN.match(name))]
    seen: set[str] = set()
    for row in rows:
        if len(row) != len(header):
            raise ValueError(
                f"{IMAGES_FILE}: a row of {len(row)} cells under {len(header)} columns"
            )
        image = row[position["image"]]
        if image in seen:
            raise ValueError(f"{IMAGES_FILE}: image {image!r} twice")
        seen.add(image)
        pixel = row[position[_PIXEL_COLUMN]] if _PIXEL_COLUMN in position else ""
        entry.images.append(
            ImageRecord(
                run_dir=key,
                image=image,
                status=row[position["status"]],
                verdict=row[position["verdict"]],
                reason=row[position["reason"]],
                pixel_size_um=_number(pixel) if pixel else None,
            )
        )
        for i, match in columns:
            if row[i] == "":
                continue  # no value: the image was not analysed, or the step gave none
            entry.values.append(
                ValueRecord(
                    run_dir=key,
                    image=image,
                    step=match["step"],
                    name=match["name"],
                    unit=match["unit"],
                    value=_number(row[i]),
                )
            )
    return entry
