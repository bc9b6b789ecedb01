"""The lot's details for its certificate: a YAML lot sheet and the run's options.

A certificate names what was tested for whom: the customer, the order (purchase
order) number, the specification the lot is tested against (document and
revision), the sample, the operator and a free-text note. ``lotproof run`` takes
them as options (``--customer``, ``--order``, ``--spec``, ``--sample``,
``--operator``, ``--note``) and/or from a lot sheet, a small YAML file that is
either ``lot.yaml`` inside the lot folder or ``LOT.lot.yaml`` beside it (for the
lot folder ``FD-2611``: ``FD-2611.lot.yaml`` in the same folder)::

    customer: Example Filters Ltd
    order: "PO-2026-0412"
    specification: EF-SPEC-114 rev C
    sample: 8 discs cut from the middle of the batch
    note: discs 03 and 06 polished twice

The sheet is read like a recipe (:mod:`lotproof.runner.recipe.yamlpos`): strict
YAML 1.2, duplicate keys and aliases refused, every problem reported with its
line and column, unknown keys refused with a "did you mean". Every field is
text: a bare number (``order: 0412``) is refused, because YAML would read it as
412 and a purchase order number would lose its leading zero; quote it.

An option replaces the sheet's value of the same field. The operator defaults
to the login name. The station (``--station`` or ``LOTPROOF_STATION``) names
where the run was made, for "who ran it where"; it is a name the lab gives its
workstation, not the host name. Nothing of this enters a cache key: the details
describe the lot, not how it is measured.
"""

from __future__ import annotations

import getpass
import hashlib
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, ValidationError

from lotproof.runner.errors import EXIT_INVALID, LotproofError, Problem, RecipeError
from lotproof.runner.files import read_file
from lotproof.runner.recipe.problems import ProblemCollector
from lotproof.runner.recipe.yamlpos import load_yaml

__all__ = [
    "LOT_FIELDS",
    "LOT_SHEET",
    "LOT_SHEET_FORMAT",
    "MAX_SHEET_BYTES",
    "SHEET_SUFFIX",
    "LotDetails",
    "LotDetailsError",
    "LotSheetError",
    "LotSheetModel",
    "find_lot_sheet",
    "lot_details",
    "read_lot_sheet",
    "shown_path",
]

#: the lot sheet's name inside the lot folder
LOT_SHEET = "lot.yaml"
#: the suffix of a lot sheet beside the lot folder: ``FD-2611.lot.yaml`` for ``FD-2611/``
SHEET_SUFFIX = ".lot.yaml"
#: the optional ``format`` of a lot sheet
LOT_SHEET_FORMAT: Literal["lotproof-lot/1"] = "lotproof-lot/1"
#: a lot sheet larger than this is refused before it is parsed
MAX_SHEET_BYTES = 64 * 1024
#: the details a lot sheet and the options give, in the order a certificate shows them
LOT_FIELDS = ("customer", "order", "specification", "sample", "operator", "note")
#: the longest text of each field, in characters
_MAX_CHARS = {
    "customer": 200,
    "order": 100,
    "specification": 200,
    "sample": 500,
    "operator": 100,
    "note": 2000,
    "station": 100,
}
#: control characters: never in a detail (a note may hold line breaks)
_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f]")


class LotSheetError(RecipeError):
    """A lot sheet is invalid; ``problems`` lists every problem, positioned (exit 2)."""


class LotDetailsError(LotproofError, ValueError):
    """A lot detail given as an option is invalid (exit 2: nothing ran)."""

    exit_code = EXIT_INVALID


def _check_text(field: str, value: Any) -> str:
    """A detail's text, stripped; ``ValueError`` says why it is refused."""
    if isinstance(value, bool) or value is None:
        raise ValueError(f"text belongs here (got {value!r})")
    if isinstance(value, (int, float)):
        raise ValueError(
            f"text belongs here; a bare number is read as {value!r} and loses any leading "
            f'zero or formatting: write it in quotes, {field}: "..."'
        )
    if not isinstance(value, str):
        raise ValueError("text belongs here")
    text = value.strip()
    if not text:
        raise ValueError("empty; leave the key out instead")
    if "\n" in text and field != "note":
        raise ValueError("one line of text belongs here (only a note may have several)")
    if _CONTROL.search(text) or ("\t" in text and field != "note"):
        raise ValueError("control characters are not allowed")
    if len(text) > _MAX_CHARS[field]:
        raise ValueError(f"at most {_MAX_CHARS[field]} characters (got {len(text)})")
    return text


def _text(field: str) -> Any:
    return BeforeValidator(lambda value: _check_text(field, value))


class LotSheetModel(BaseModel):
    """A lot sheet (``lot.yaml``): the lot's details for its certificate; every key optional."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    format: Literal["lotproof-lot/1"] = Field(
        LOT_SHEET_FORMAT, description="the lot sheet's format; lotproof-lot/1 when given"
    )
    customer: Annotated[str, _text("customer")] | None = Field(
        None, description="who the lot is tested for (the customer's name)"
    )
    order: Annotated[str, _text("order")] | None = Field(
        None, description="the order or purchase order number, as text (quote it)"
    )
    specification: Annotated[str, _text("specification")] | None = Field(
        None, description="the specification tested against: document and revision"
    )
    sample: Annotated[str, _text("sample")] | None = Field(
        None, description="what the sample is (how many parts, where they were cut)"
    )
    operator: Annotated[str, _text("operator")] | None = Field(
        None, description="who made the run [default: the login name]"
    )
    note: Annotated[str, _text("note")] | None = Field(
        None, description="free text for the certificate (several lines allowed)"
    )


@dataclass(frozen=True)
class LotDetails:
    """What a run records about its lot (the ledger's ``lot`` event, ``verdicts.json``).

    ``lot_id`` is the lot folder's name; ``path`` the lot folder relative to where
    lotproof ran; ``sheet`` the lot sheet read (relative the same way) and
    ``sheet_sha256`` its checksum, or None when there was none.
    """

    lot_id: str
    path: str
    customer: str | None = None
    order: str | None = None
    specification: str | None = None
    sample: str | None = None
    operator: str | None = None
    note: str | None = None
    station: str | None = None
    sheet: str | None = None
    sheet_sha256: str | None = None

    def event(self) -> dict[str, Any]:
        """The fields of the ledger's ``lot`` event."""
        return {
            "lot_id": self.lot_id,
            "path": self.path,
            **{name: getattr(self, name) for name in LOT_FIELDS},
            "station": self.station,
            "sheet": None
            if self.sheet is None
            else {"path": self.sheet, "sha256": self.sheet_sha256},
        }

    def document(self) -> dict[str, Any]:
        """The ``lot`` entry of ``verdicts.json``: the lot and its details."""
        return {
            "lot_id": self.lot_id,
            **{name: getattr(self, name) for name in LOT_FIELDS},
            "station": self.station,
        }

    @classmethod
    def from_event(cls, event: Mapping[str, Any]) -> LotDetails:
        """The details a ``lot`` event records (for a rerun, which certifies the same lot)."""
        sheet = event.get("sheet") if isinstance(event.get("sheet"), dict) else None
        texts = {
            name: event.get(name) if isinstance(event.get(name), str) else None
            for name in (*LOT_FIELDS, "station")
        }
        return cls(
            lot_id=str(event.get("lot_id", "")),
            path=str(event.get("path", "")),
            sheet=None if sheet is None else str(sheet.get("path")),
            sheet_sha256=None if sheet is None else str(sheet.get("sha256")),
            **texts,
        )


def shown_path(path: Path, start: Path | None = None) -> str:
    """``path`` relative to ``start`` (default: the working folder), POSIX, never absolute."""
    base = Path(os.path.abspath(start or Path.cwd()))
    try:
        return Path(os.path.relpath(os.path.abspath(path), base)).as_posix()
    except ValueError:  # another drive (Windows): the name alone
        return Path(path).name


def find_lot_sheet(lot: Path) -> Path | None:
    """The lot sheet of ``lot``: ``LOT/lot.yaml`` or ``LOT.lot.yaml`` beside it, or None.

    Raises
    ------
    LotSheetError
        When both exist: which one holds the details would be a guess.
    """
    lot = Path(lot)
    inside = lot / LOT_SHEET
    beside = lot.parent / f"{Path(os.path.abspath(lot)).name}{SHEET_SUFFIX}"
    found = [p for p in (inside, beside) if p.is_file()]
    if len(found) == 2:
        raise LotSheetError(
            [
                Problem(
                    str(beside),
                    1,
                    1,
                    "",
                    f"a second lot sheet; {inside} is one too. Keep one of them",
                )
            ]
        )
    return found[0] if found else None


def read_lot_sheet(path: Path) -> tuple[LotSheetModel, bytes]:
    """Read and check the lot sheet at ``path``: its model and its exact bytes.

    Raises
    ------
    LotSheetError
        With every problem found, each positioned in the file.
    """
    shown = str(path)
    try:
        raw = read_file(Path(path), max_bytes=MAX_SHEET_BYTES)
    except OSError as err:
        what = err.strerror or str(err)
        if err.errno == 27:
            what = f"larger than {MAX_SHEET_BYTES} bytes; a lot sheet is a few lines"
        raise LotSheetError(
            [Problem(shown, 1, 1, "", f"cannot read the lot sheet: {what}")]
        ) from None
    try:
        text = raw.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as err:
        before = raw[: err.start]
        line = before.count(b"\n") + 1
        column = err.start - (before.rfind(b"\n") + 1) + 1
        raise LotSheetError(
            [Problem(shown, line, column, "", "not UTF-8 text; save the lot sheet as UTF-8")]
        ) from None
    loaded = load_yaml(text, document="lot sheet")
    collector = ProblemCollector(shown, loaded)
    for p in loaded.problems:
        collector.problems.append(Problem(shown, p.position.line, p.position.column, "", p.what))
    if loaded.problems:
        raise LotSheetError(collector.problems)
    data = loaded.data
    if not isinstance(data, dict):
        collector.add((), "a lot sheet is a mapping of keys (customer, order, specification, ...)")
        raise LotSheetError(collector.problems)
    try:
        model = LotSheetModel.model_validate(data)
    except ValidationError as err:
        collector.add_validation(err, (), list(LotSheetModel.model_fields), data)
        raise LotSheetError(collector.problems) from None
    return model, raw


def _login_name() -> str | None:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no name for this uid
        return None


def lot_details(
    lot: Path,
    *,
    options: Mapping[str, str | None] | None = None,
    station: str | None = None,
    sheet: bool = True,
) -> LotDetails:
    """The details of ``lot``: its lot sheet (when ``sheet`` and there is one), then ``options``.

    ``options`` maps a field of :data:`LOT_FIELDS` to its value (None: not given);
    a given value replaces the sheet's. The operator defaults to the login name.

    Raises
    ------
    LotSheetError
        When the lot sheet is invalid (every problem, positioned).
    LotDetailsError
        When an option's value is invalid, or names no field.
    """
    lot = Path(lot)
    values: dict[str, str | None] = dict.fromkeys(LOT_FIELDS)
    sheet_path = find_lot_sheet(lot) if sheet else None
    sheet_sha256 = None
    if sheet_path is not None:
        model, raw = read_lot_sheet(sheet_path)
        values.update({name: getattr(model, name) for name in LOT_FIELDS})
        sheet_sha256 = hashlib.sha256(raw).hexdigest()
    for name, value in (options or {}).items():
        if name not in LOT_FIELDS:
            raise LotDetailsError(f"{name!r} is not a lot detail; one of {', '.join(LOT_FIELDS)}")
        if value is not None:
            values[name] = _checked_option(name, value)
    if values["operator"] is None:
        values["operator"] = _login_name()
    checked_station = None if station in (None, "") else _checked_option("station", station)
    return LotDetails(
        lot_id=Path(os.path.abspath(lot)).name,
        path=shown_path(lot),
        station=checked_station,
        sheet=None if sheet_path is None else shown_path(sheet_path),
        sheet_sha256=sheet_sha256,
        **values,
    )


def _checked_option(name: str, value: str) -> str:
    option = {"specification": "spec"}.get(name, name)
    try:
        return _check_text(name, value)
    except ValueError as err:
        raise LotDetailsError(f"--{option}: {err}") from None
