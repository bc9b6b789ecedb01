"""The run's report: one self-contained HTML file built from a run folder's files.

``report.html`` is written into every run folder by :func:`write_report` while the
run is being recorded, so it is one of the files the ledger seals. It is built
only from what the run folder holds (``verdicts.json``, ``images.csv``,
``objects.csv``, ``resolved.json``, ``inputs.json``, ``ledger.jsonl`` and the PNG
previews in ``figures/``) plus, optionally, the ledger events written so far.

A sealed file cannot contain its own seal, nor the review and release signed
after it, so the run's own report says where they are found (``lotproof verify
RUN``). :func:`rebuild_report` makes the same report again from a finished
record, with the seal, the verification status and the signature block of every
review and release (``approvals.jsonl``): the certificate. It is written *beside*
the run folder (``RUN-report.html``) or where asked; never into the run folder,
whose files are never rewritten.

Pictures stay small enough for lots of hundreds of images: every image gets a
compact thumbnail (JPEG, at most :data:`THUMBNAIL_SIDE` pixels) that opens its
full-size outline overlay, embedded in the file (CSS ``:target``, no script).
Full-size overlays are embedded while the pictures stay within
:data:`PICTURE_BUDGET` -- failing and incomplete images first -- and the others
are referenced by their name in ``figures/`` and their sha256.

The markup is in template files kept with this module (``templates/``:
``report.html.j2``, its macros and ``report.css``), rendered by jinja2 with
autoescaping on and undefined names an error. This module only prepares plain
data for them: text, numbers already formatted for people, and every picture as
a ``data:`` URI (PNG previews, SVG plots). Nothing is marked safe, so a lot
folder, an image file name or a recipe summary holding markup is printed as text.

The HTML is byte-identical for identical run files: no clock is read, plots are
SVG with fixed metadata and a fixed hash salt, drawn with matplotlib's default
style (not the user's ``matplotlibrc``), and every picture it shows is embedded
as a ``data:`` URI. Nothing refers to the network; only full-size overlays left
out of a big lot's report refer to their files in the run folder. The style
sheet prints the report on A4, with the lot, the run and "page X of Y" on every
page (CSS page-margin boxes, which Chromium prints).
"""

from __future__ import annotations

import base64
import functools
import hashlib
import io
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from lotproof.runner import __version__
from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.evaluate.hashing import NOT_INSTALLED
from lotproof.runner.evaluate.pictures import shown_slice
from lotproof.runner.files import write_file
from lotproof.runner.recipe.lotsheet import LOT_FIELDS
from lotproof.runner.record.approvals import Approval
from lotproof.runner.record.folder import CAUTION, write_bytes
from lotproof.runner.record.layout import (
    APPROVALS_FILE,
    IMAGES_FILE,
    INPUTS_FILE,
    OBJECTS_FILE,
    REPORT_FILE,
    RESOLVED_FILE,
    VERDICTS_FILE,
    figure_path,
    is_within,
)
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run
from lotproof.runner.show.figures import SVG_METADATA, default_style
from lotproof.steps import REGISTRY
from lotproof.steps.units import typeset_unit

if TYPE_CHECKING:
    import jinja2
    from matplotlib.typing import RcKeyType

__all__ = [
    "PICTURE_BUDGET",
    "TEMPLATE_FOLDER",
    "THUMBNAIL_SIDE",
    "VERDICT_MARKS",
    "Picture",
    "ReportError",
    "RunFiles",
    "build_report",
    "check_outside",
    "default_report_path",
    "read_run_files",
    "rebuild_report",
    "write_report",
]

#: verdict -> the word and symbol printed for it (never colour alone)
VERDICT_MARKS = {
    "pass": "PASS \u2713",
    "fail": "FAIL \u2717",
    "incomplete": "INCOMPLETE ?",
    "-": "not judged per image",
}

#: significant digits of numbers shown to people (the files keep every digit)
DISPLAY_DIGITS = 6

#: the report's templates and style sheet, installed with the package
TEMPLATE_FOLDER = Path(__file__).resolve().with_name("templates")

#: longest side, in pixels, of the compact thumbnail embedded for every image
THUMBNAIL_SIDE = 160
#: JPEG quality of the compact thumbnails (4:4:4, so the outlines keep their colour)
THUMBNAIL_QUALITY = 80
#: bytes of base64 the report spends on pictures: the compact thumbnails of every image
#: first, then full-size overlays of failing images, of incomplete ones, then of the others,
#: each while it fits; the overlays left out are referenced in figures/ by name and sha256
PICTURE_BUDGET = 7 * 1024 * 1024

#: the ledger's words for a role, as a certificate prints them
ROLE_WORDS = {"reviewed": "Reviewed", "released": "Released"}
#: a lot detail's label on the certificate
_DETAIL_LABELS = {
    "customer": "Customer",
    "order": "Order",
    "specification": "Specification",
    "sample": "Sample",
    "operator": "Operator",
    "note": "Note",
}

#: the size columns of objects.csv drawn as a distribution, first found first
_SIZE_COLUMNS = ("ecd [um]", "esd [um]")

_TIMES = " \u00d7 "
_NONE = "\u2013"
_NOT_RECORDED = "not recorded"

#: per-image values shown beside the limits' own values, when the run has them
_KEY_VALUES = ("count", "area_fraction", "volume_fraction", "ecd_d50", "esd_d50")

#: matplotlib settings of the size plots, over matplotlib's own defaults
_PLOT_STYLE: dict[RcKeyType, Any] = {
    "svg.hashsalt": "lotproof-report",  # element ids are fixed, not random
    "svg.fonttype": "path",  # text as outlines: no font is needed to view the plot
    "font.size": 8.5,
    "axes.linewidth": 0.8,
}


class ReportError(LotproofError, ValueError):
    """A folder cannot be reported on (not a run folder, or an unreadable file); exit 2."""

    exit_code = EXIT_INVALID


# ---------------------------------------------------------------- reading the run folder


@dataclass
class RunFiles:
    """What a report is made of, read from one run folder."""

    run_dir: Path
    verdicts: dict[str, Any]
    resolved: dict[str, Any] = field(default_factory=dict)
    inputs: dict[str, Any] = field(default_factory=dict)
    #: images.csv header and rows (each a dict by header)
    image_header: list[str] = field(default_factory=list)
    image_rows: list[dict[str, str]] = field(default_factory=list)
    #: step name -> ECD (or ESD) values of its objects, in file order
    sizes: dict[str, list[float]] = field(default_factory=dict)
    size_column: str = ""
    events: list[dict[str, Any]] = field(default_factory=list)
    #: image id -> its picture (the outline overlay, or the thumbnail when there is none)
    figures: dict[str, Picture] = field(default_factory=dict)
    #: objects.csv's header
    object_header: list[str] = field(default_factory=list)

    def first_event(self, kind: str) -> dict[str, Any]:
        return next((e for e in self.events if e.get("type") == kind), {})


@dataclass
class Picture:
    """One image's picture: the figure file it comes from and what the report embeds of it."""

    #: ``figures/IMAGE.overlay.png`` (or ``.thumbnail.png``), relative to the run folder
    name: str
    #: ``overlay`` or ``thumbnail``
    kind: str
    sha256: str
    size: int
    width: int
    height: int
    #: the compact JPEG thumbnail, embedded for every image
    compact: bytes
    #: the full-size PNG, when it is embedded (see :data:`PICTURE_BUDGET`)
    full: bytes | None = None


def _to_float(text: str) -> float | None:
    if text == "":
        return None
    try:
        return float(text)
    except ValueError:
        return None


def _read_sizes(folder: RunFolder, files: RunFiles) -> None:
    """The size column of objects.csv, read row by row (a lot can have millions of objects)."""
    rows = folder.csv_rows(OBJECTS_FILE)
    header: list[str] = next(rows, [])
    files.object_header = header
    column = next((c for c in _SIZE_COLUMNS if c in header), "")
    if not column or "step" not in header:
        return
    at, step_at = header.index(column), header.index("step")
    for row in rows:
        value = _to_float(row[at]) if at < len(row) else None
        if value is not None and math.isfinite(value):
            files.sizes.setdefault(row[step_at], []).append(value)
    files.size_column = column


def read_run_files(run_dir: Path, ledger_events: list[dict[str, Any]] | None = None) -> RunFiles:
    """Read what the report shows from ``run_dir``; ``ledger_events`` replaces the ledger file.

    Raises
    ------
    ReportError
        When ``run_dir`` has no ``verdicts.json`` or a file cannot be read.
    """
    folder = RunFolder(run_dir, error=ReportError)
    files = RunFiles(folder.path, folder.verdicts())
    files.resolved = folder.json(RESOLVED_FILE, required=False)
    files.inputs = folder.json(INPUTS_FILE, required=False)
    header, rows = folder.csv(IMAGES_FILE)
    files.image_header = header
    files.image_rows = [dict(zip(header, row, strict=False)) for row in rows]
    _read_sizes(folder, files)
    files.events = list(ledger_events) if ledger_events is not None else folder.ledger_events()
    _read_pictures(folder, files)
    return files


def _compact(png: bytes) -> tuple[bytes, int, int]:
    """A compact JPEG of a PNG figure (at most THUMBNAIL_SIDE pixels), and the PNG's size."""
    from PIL import Image

    with Image.open(io.BytesIO(png)) as image:
        width, height = image.size
        rgb = image.convert("RGB")
    scale = min(1.0, THUMBNAIL_SIDE / max(width, height, 1))
    size = (max(1, round(width * scale)), max(1, round(height * scale)))
    small = rgb.resize(size, Image.Resampling.LANCZOS) if scale < 1 else rgb
    buffer = io.BytesIO()
    small.save(buffer, format="JPEG", quality=THUMBNAIL_QUALITY, subsampling=0, optimize=True)
    return buffer.getvalue(), width, height


def _b64_size(n: int) -> int:
    return 4 * ((n + 2) // 3)


def _read_pictures(folder: RunFolder, files: RunFiles) -> None:
    """Every image's picture: compact thumbnails for all, full size while the budget lasts.

    Read twice, so that a lot's worth of full-size PNGs is never held at once: first
    each figure's checksum and compact thumbnail, then the full figures chosen.
    """
    image_verdicts: dict[str, str] = files.verdicts.get("image_verdicts", {})
    names = folder.image_folders()
    for image_id in image_verdicts:
        for kind in ("overlay", "thumbnail"):
            data = folder.figure(image_id, kind)
            if data is None:
                continue
            try:
                compact, width, height = _compact(data)
            except (OSError, ValueError) as err:
                raise ReportError(
                    f"{folder.path / figure_path(image_id, kind, names)}: not a PNG picture ({err})"
                ) from None
            files.figures[image_id] = Picture(
                figure_path(image_id, kind, names),
                kind,
                hashlib.sha256(data).hexdigest(),
                len(data),
                width,
                height,
                compact,
            )
            break
    left = PICTURE_BUDGET - sum(_b64_size(len(p.compact)) for p in files.figures.values())
    rank = {"fail": 0, "incomplete": 1}
    order = sorted(files.figures, key=lambda i: rank.get(image_verdicts.get(i, ""), 2))
    for image_id in order:
        picture = files.figures[image_id]
        if _b64_size(picture.size) > left:
            continue
        data = folder.bytes(picture.name)
        if data is None or hashlib.sha256(data).hexdigest() != picture.sha256:
            raise ReportError(f"{folder.path / picture.name}: changed while the report was made")
        picture.full = data
        left -= _b64_size(picture.size)


# ---------------------------------------------------------------- text for people


def _num(value: Any) -> str:
    """A number as people read it: ``DISPLAY_DIGITS`` significant digits; '–' for none."""
    if value is None or value == "":
        return _NONE
    if isinstance(value, str):
        parsed = _to_float(value)
        if parsed is None:
            return value
        value = parsed
    if isinstance(value, bool):
        return str(int(value))
    if isinstance(value, int):
        return str(value)
    number = float(value)
    if not math.isfinite(number):
        return "undefined"
    if number.is_integer() and abs(number) < 1e15:
        return str(int(number))
    return format(number, f".{DISPLAY_DIGITS}g")


def _unit(unit: str) -> str:
    """A unit as the report prints it: ``µm``, ``µm²``, ``mm⁻²``; nothing for ``-``."""
    return typeset_unit(unit)


def _percent(value: Any) -> str:
    """A fraction shown as a percentage (0.18 -> '18'), to DISPLAY_DIGITS digits."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return _num(float(value) * 100.0)
    return _num(value)


def _bound(low: Any, high: Any, unit: str) -> str:
    """A limit's bounds as the report prints them: ``≤ 60 µm``, ``10 to 16 %``."""
    shown = f" {unit}" if unit else ""
    if low is not None and high is not None:
        return f"{low} to {high}{shown}"
    if low is not None:
        return f"\u2265 {low}{shown}"
    return f"\u2264 {high}{shown}"


def _css_text(text: str) -> str:
    """``text`` for a CSS string: every character but ASCII letters, digits, space, ``-_.``
    escaped.

    Markup-safe as it is (nothing the HTML escaping would change is left), so a lot
    name holding quotes, ``</style>`` or backslashes prints as written; a run
    folder's name (``A-Z a-z 0-9 . _ -``) stays as it is.
    """
    # an escape ends at the space after it, which CSS takes as part of the escape
    return "".join(
        ch if ch.isascii() and (ch.isalnum() or ch in " -_.") else f"\\{ord(ch):x} " for ch in text
    )


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def _data_uri(mime: str, data: bytes) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def _json_text(value: Any) -> str:
    """Every digit of a number, as JSON has it (for a ``data-value`` attribute)."""
    return "" if value is None else repr(float(value))


def _joined(parts: list[Any], sep: str = " ") -> str:
    return sep.join(str(p) for p in parts if p not in (None, "")).strip()


# ---------------------------------------------------------------- plots


def _size_figure(step: str, values: list[float], column: str) -> bytes:
    """Histogram and cumulative (number-weighted) curve of one step's object sizes, as SVG."""
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure

    written = column[column.index("[") + 1 : -1]
    unit = _unit(written) or written
    name = column.split(" [")[0].upper()
    data = np.sort(np.asarray(values, dtype=np.float64))
    edges = _bin_edges(float(data[0]), float(data[-1]))
    counts, _ = np.histogram(data, bins=edges)
    with default_style(_PLOT_STYLE):
        fig = Figure(figsize=(7.2, 2.6))
        FigureCanvasSVG(fig)
        left, right = fig.subplots(1, 2)
        left.bar(
            edges[:-1],
            counts,
            width=np.diff(edges),
            align="edge",
            color="#c8c8c8",
            edgecolor="#202020",
            linewidth=0.6,
        )
        left.set_xlabel(f"{name} [{unit}]")
        left.set_ylabel("objects per bin")
        left.set_title(
            f"{step}: {len(data)} objects, bin width {_num(edges[1] - edges[0])} {unit}",
            fontsize=8.5,
            loc="left",
        )
        fraction = np.arange(1, len(data) + 1) / len(data)
        right.step(data, fraction, where="post", color="#000000", linewidth=1.2)
        for level in (0.1, 0.5, 0.9):
            right.axhline(level, color="#808080", linewidth=0.6, linestyle=(0, (4, 3)))
        right.set_ylim(0, 1.02)
        right.set_xlim(float(edges[0]), float(edges[-1]))
        right.set_yticks([0, 0.1, 0.25, 0.5, 0.75, 0.9, 1.0])
        right.set_xlabel(f"{name} [{unit}]")
        right.set_ylabel("fraction of objects \u2264 size")
        right.set_title("cumulative, by number", fontsize=8.5, loc="left")
        for axes in (left, right):
            axes.spines["top"].set_visible(False)
            axes.spines["right"].set_visible(False)
        fig.tight_layout()
        buffer = io.BytesIO()
        fig.savefig(buffer, format="svg", metadata=SVG_METADATA)
    return buffer.getvalue()


def _bin_edges(low: float, high: float) -> npt.NDArray[np.float64]:
    """Bins from 0 with a 1-2-5 width giving about 25 bins up to the largest size."""
    span = max(high, 1e-12)
    raw = span / 25
    power = 10 ** math.floor(math.log10(raw))
    width = next(step * power for step in (1, 2, 5, 10) if step * power >= raw)
    n = max(1, math.ceil(span / width + 1e-9))
    if n * width <= high:
        n += 1
    edges: npt.NDArray[np.float64] = np.arange(n + 1, dtype=np.float64) * width
    return edges


# ---------------------------------------------------------------- what each section shows


def _seal(
    seal: str | None, record_status: str | None, problems: list[str] | None
) -> dict[str, Any]:
    """The seal and the record's status; ``value`` None: the run's own report, without them."""
    return {
        "value": seal,
        "status": record_status or "intact",
        "problem": problems[0] if seal is not None and problems else "",
    }


def _lot_event(files: RunFiles) -> dict[str, Any]:
    """The ``lot`` event, or what ``verdicts.json`` holds of it (a record without the event)."""
    event = files.first_event("lot")
    if event:
        return event
    document = files.verdicts.get("lot")
    return document if isinstance(document, dict) else {}


def _header(files: RunFiles) -> dict[str, Any]:
    verdicts, resolved = files.verdicts, files.resolved
    method = verdicts.get("method", {})
    start = files.first_event("run-start")
    recipe_event = files.first_event("recipe")
    lot_event = _lot_event(files)
    # the lot folder as given, relative to where lotproof ran; an older record has only the
    # path it was run with, which may be absolute: then its name alone
    recorded = resolved.get("lot") or start.get("lot") or ""
    lot_path = lot_event.get("path") or ""
    lot_name = lot_event.get("lot_id") or (Path(recorded).name if recorded else "")
    if not lot_path and recorded and not Path(recorded).is_absolute():
        lot_path = recorded
    return {
        "name": method.get("name") or resolved.get("name") or "?",
        "revision": method.get("revision", resolved.get("revision", "?")),
        "summary": resolved.get("summary") or "",
        "recipe_sha256": method.get("recipe_sha256") or recipe_event.get("sha256", _NOT_RECORDED),
        "lot_name": lot_name or _NOT_RECORDED,
        "lot_path": lot_path if lot_path != lot_name else "",
        "date": start.get("time_utc") or _date_from_folder(files.run_dir.name) or _NOT_RECORDED,
        "ended": files.first_event("run-end").get("time_utc") or "",
        "tool": start.get("tool", {}).get("version") or _NOT_RECORDED,
        "run_folder": files.run_dir.name,
    }


def _lot_details(files: RunFiles) -> dict[str, Any]:
    """The lot's details for the certificate, each with its label; '' for one not given."""
    event = _lot_event(files)
    rows = [
        {"field": name, "label": _DETAIL_LABELS[name], "text": event.get(name) or ""}
        for name in LOT_FIELDS
    ]
    sheet = event.get("sheet") if isinstance(event.get("sheet"), dict) else None
    return {
        "recorded": bool(event),
        "rows": rows,
        "sheet": None
        if sheet is None
        else {"path": sheet.get("path", ""), "sha256": sheet.get("sha256", "")},
    }


def _recipe_approval(files: RunFiles) -> dict[str, Any] | None:
    """The recipe's approval the run recorded (found with a trust folder), or None."""
    event = files.first_event("recipe-approval")
    if not event:
        return None
    return {
        "approver": event.get("approver", ""),
        "time": event.get("time_utc", ""),
        "key": event.get("key", ""),
        "file": event.get("file", ""),
        "comment": event.get("comment", ""),
    }


_SIGNATURE_WORDS = {
    "valid": "signature verified",
    "invalid": "SIGNATURE INVALID",
    "unknown key": "signed by a key not in the trust folder",
    "not checked": "signature not checked (no trusted key given)",
}


def _signatures(approvals: list[Approval] | None) -> dict[str, Any]:
    """The signature block: every review and release; ``rebuilt`` False in the run's own report."""
    if approvals is None:
        return {"rebuilt": False, "rows": [], "last": "", "released": False}
    rows = [
        {
            "role": a.role,
            "meaning": ROLE_WORDS.get(a.role, a.role),
            "name": a.name,
            "time": a.time_utc,
            "key": a.key,
            "check": a.check,
            "check_text": _SIGNATURE_WORDS.get(a.check, a.check)
            + (f" ({Path(a.key_file).name})" if a.check == "valid" and a.key_file else ""),
            "comment": a.comment,
        }
        for a in approvals
    ]
    return {
        "rebuilt": True,
        "rows": rows,
        "last": approvals[-1].hash if approvals else "",
        "released": any(a.role == "released" for a in approvals),
        "file": APPROVALS_FILE,
    }


def _date_from_folder(name: str) -> str:
    m = re.match(r"^(\d{4})(\d{2})(\d{2})T(\d{2})(\d{2})(\d{2})Z", name)
    return f"{m[1]}-{m[2]}-{m[3]}T{m[4]}:{m[5]}:{m[6]}Z" if m else ""


def _lot_verdict(files: RunFiles) -> dict[str, Any]:
    verdicts = files.verdicts
    lot = verdicts.get("lot_verdict", "incomplete")
    limits = verdicts.get("limits", {})
    failed = [n for n, lv in limits.items() if lv.get("verdict") == "fail"]
    incomplete = verdicts.get("incomplete_images", {})
    n_images = verdicts.get("images", len(verdicts.get("image_verdicts", {})))
    parts = [f"{_plural(n_images, 'image')}, {_plural(len(limits), 'limit')}"]
    if failed:
        parts.append(f"failed: {', '.join(failed)}")
    if incomplete:
        parts.append(f"{_plural(len(incomplete), 'image')} could not be analysed")
    return {"verdict": lot, "word": VERDICT_MARKS.get(lot, lot), "what": "; ".join(parts)}


def _percent_values(files: RunFiles) -> set[str]:
    """The values (``STEP.NAME``) a limit asks to show in percent (``display: percent``)."""
    return {
        limit.get("value", "")
        for limit in files.resolved.get("limits", {}).values()
        if isinstance(limit, dict) and limit.get("display") == "percent"
    }


def _limits(files: RunFiles) -> dict[str, Any]:
    rows = []
    written = files.resolved.get("limits", {})
    for name, lv in files.verdicts.get("limits", {}).items():
        over = lv.get("over", "each")
        percent = written.get(name, {}).get("display") == "percent"
        shown = _percent if percent else _num
        if over == "each":
            judged = [
                v
                for v in lv.get("images", {}).values()
                if v.get("verdict") in ("pass", "fail", "incomplete")
            ]
            numbers = [v["value"] for v in judged if v.get("value") is not None]
            failed = sum(1 for v in judged if v.get("verdict") == "fail")
            value = f"{shown(min(numbers))} to {shown(max(numbers))}" if numbers else _NONE
            value_note = f"range over {len(judged)} images; {failed} failed"
            digits = ""
        else:
            value, value_note, digits = shown(lv.get("value")), "", _json_text(lv.get("value"))
        unit = "%" if percent else _unit(lv.get("unit", "-"))
        low, high = lv.get("min"), lv.get("max")
        rows.append(
            {
                "name": name,
                "verdict": lv.get("verdict", ""),
                "value_of": lv.get("value_of", ""),
                "over": over,
                "value": value,
                "value_note": value_note,
                "value_digits": digits,
                "bound": _bound(
                    None if low is None else shown(low), None if high is None else shown(high), unit
                )
                if low is not None or high is not None
                else lv.get("bound", ""),
                "unit": unit,
                "reason": lv.get("reason") or "",
            }
        )
    return {"rows": rows, "rules": files.verdicts.get("rules", "")}


def _key_columns(files: RunFiles) -> list[tuple[str, str, str]]:
    """(images.csv header, value name, unit) of the values shown per image."""
    parsed = []
    for header in files.image_header:
        m = re.match(r"^(.+)\.([^.\[]+) \[(.*)\]$", header)
        if m:
            parsed.append((header, f"{m[1]}.{m[2]}", m[3]))
    limited = [lv.get("value_of") for lv in files.verdicts.get("limits", {}).values()]
    chosen: list[tuple[str, str, str]] = []
    for value_of in limited:
        for entry in parsed:
            if entry[1] == value_of and entry not in chosen:
                chosen.append(entry)
    for short in _KEY_VALUES:
        for entry in parsed:
            if entry[1].rsplit(".", 1)[1] == short and entry not in chosen:
                chosen.append(entry)
    return chosen[:8]


def _slice_text(files: RunFiles, image_id: str) -> str:
    """Which slice of a volume its pictures show (the middle one); '' for a 2-D image."""
    entries = files.inputs.get(image_id)
    if not isinstance(entries, list) or not entries or not isinstance(entries[0], dict):
        return ""
    shape = entries[0].get("shape")
    if not isinstance(shape, list) or not all(isinstance(n, int) for n in shape):
        return ""
    middle = shown_slice(shape)
    if middle is None:
        return ""
    return f"slice {middle + 1} of {shape[0]} (the middle one; z index {middle} from 0)"


def _picture(
    picture: Picture | None, number: int, image_id: str, figure_base: str
) -> dict[str, Any] | None:
    if picture is None:
        return None
    caption = (
        "detected objects outlined"
        if picture.kind == "overlay"
        else "image (nothing measured to outline)"
    )
    return {
        "compact": _data_uri("image/jpeg", picture.compact),
        "caption": caption,
        "full": None if picture.full is None else _data_uri("image/png", picture.full),
        "zoom": f"zoom-{number}" if picture.full is not None else "",
        "href": figure_base + picture.name,
        "name": picture.name,
        "sha256": picture.sha256,
        "pixels": f"{picture.width}{_TIMES}{picture.height}",
    }


def _shown(text: str, percent: bool) -> str:
    """A number of images.csv as people read it, in percent when its limit says so."""
    number = _to_float(text)
    return _percent(number) if percent and number is not None else _num(text)


def _images(files: RunFiles, figure_base: str = "") -> list[dict[str, Any]]:
    verdicts = files.verdicts
    incomplete = verdicts.get("incomplete_images", {})
    rows_by_id = {row.get("image"): row for row in files.image_rows}
    columns = _key_columns(files)
    percent = _percent_values(files)
    each = [lv for lv in verdicts.get("limits", {}).values() if lv.get("over", "each") == "each"]
    rows = []
    for number, (image_id, verdict) in enumerate(verdicts.get("image_verdicts", {}).items(), 1):
        row = rows_by_id.get(image_id, {})
        numbers = [
            {
                "value_of": value_of,
                "name": value_of.split(".", 1)[1],
                "number": _shown(row.get(header, ""), value_of in percent),
                "unit": "%" if value_of in percent else _unit(unit),
                # this image's verdict on every limit applied to each image on this value
                "verdicts": [
                    lv["images"][image_id]["verdict"]
                    for lv in each
                    if lv.get("value_of") == value_of and image_id in lv.get("images", {})
                ],
            }
            for header, value_of, unit in columns
        ]
        rows.append(
            {
                "number": number,
                "image": image_id,
                "verdict": verdict,
                "picture": _picture(files.figures.get(image_id), number, image_id, figure_base),
                "slice": _slice_text(files, image_id),
                "numbers": numbers,
                "reason": incomplete.get(image_id, ""),
            }
        )
    return rows


def _sizes(files: RunFiles) -> dict[str, Any]:
    plots = [
        {
            "step": step,
            "uri": _data_uri("image/svg+xml", _size_figure(step, values, files.size_column)),
        }
        for step, values in files.sizes.items()
    ]
    return {"plots": plots, "column": files.size_column}


def _method(files: RunFiles) -> dict[str, Any]:
    steps = [
        {
            "name": name,
            "kind": step.get("apply", ""),
            "version": step.get("version", ""),
            "to": ", ".join(step.get("to", [])),
            "parameters": ", ".join(
                f"{k}: {_param_text(v)}" for k, v in step.get("params", {}).items() if v is not None
            )
            or _NONE,
            "runs": "yes" if step.get("runs", True) else "no (not needed)",
        }
        for name, step in files.resolved.get("steps", {}).items()
    ]
    return {
        "steps": steps,
        "pixel_size": _size_text(files.resolved.get("pixel_size", "")),
        "rounding": files.resolved.get("rounding_rule", ""),
    }


def _size_text(text: str) -> str:
    """A recorded size such as ``0.65 um`` or ``[0.8 um, 0.8 um, 1.2 um]`` with typeset units."""
    return re.sub(r"(?<=\d )([A-Za-z/\d]+)", lambda m: _unit(m[1]) or m[1], str(text))


def _param_text(value: Any) -> str:
    if isinstance(value, dict) and "value" in value and "unit" in value:
        return f"{_num(value['value'])} {_unit(value['unit']) or value['unit']}"
    if isinstance(value, float):
        return _num(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_param_text(v) for v in value) + "]"
    return str(value)


def _definitions(files: RunFiles) -> list[dict[str, str]]:
    """What each value and object column shown or written means, from its step kind."""
    steps = files.resolved.get("steps", {})
    rows: list[dict[str, str]] = []
    seen: set[str] = set()
    for _, value_of, unit in _key_columns(files):
        step, name = value_of.split(".", 1)
        kind = REGISTRY.get(steps.get(step, {}).get("apply", ""))
        definition = kind.definitions.get(name, "") if kind is not None else ""
        if definition and value_of not in seen:
            seen.add(value_of)
            rows.append({"name": value_of, "unit": _unit(unit), "definition": definition})
    objects = set(files.object_header)
    for step in steps.values():
        kind = REGISTRY.get(step.get("apply", ""))
        if kind is None or not step.get("runs", True):
            continue
        for column, (unit, definition) in kind.columns.items():
            if f"{column} [{unit}]" in objects and column not in seen:
                seen.add(column)
                rows.append(
                    {
                        "name": f"{column} (objects.csv)",
                        "unit": _unit(unit),
                        "definition": definition,
                    }
                )
    return rows


def _provenance(files: RunFiles) -> dict[str, Any]:
    start = files.first_event("run-start")
    recipe = files.first_event("recipe")
    lot = _lot_event(files)
    git = recipe.get("git")
    python = start.get("python", {})
    platform = start.get("platform", {})
    host = start.get("host")
    station = lot.get("station") or (f"not configured (host {host})" if host else "not configured")
    facts = [
        ("lotproof", start.get("tool", {}).get("version", _NOT_RECORDED)),
        ("Python", _joined([python.get(k) for k in ("implementation", "version")])),
        ("Platform", _joined([platform.get(k) for k in ("system", "release", "machine")])),
        ("CPU", start.get("cpu", {}).get("model")),
        ("Operator", lot.get("operator") or start.get("user")),
        ("Station", station if lot else None),
        ("Executor", start.get("executor")),
    ]
    inputs = []
    for image_id, entries in files.inputs.items():
        for item in entries if isinstance(entries, list) else []:
            size = item.get("calibration", {}).get("pixel_size_um")
            inputs.append(
                {
                    "file": item.get("path", image_id),
                    "input": item.get("input", ""),
                    "size": item.get("size", ""),
                    "shape": f"{_TIMES.join(str(s) for s in item.get('shape', []))} {item.get('dtype', '')}",
                    "calibration": (_TIMES.join(_num(s) for s in size) + " \u00b5m")
                    if size
                    else "none",
                    "sha256": item.get("sha256", ""),
                }
            )
    return {
        "recipe_path": recipe.get("path") or "",
        "git": {
            "commit": git.get("commit", "?"),
            "path": git.get("path_in_repo", "?"),
            "state": "modified since that commit (not as committed)"
            if git.get("modified")
            else "as committed (clean)",
        }
        if git
        else None,
        "git_text": "not in a git work tree" if recipe else _NOT_RECORDED,
        "facts": [(term, text or _NOT_RECORDED) for term, text in facts],
        # a library that is not installed is absent from the run, not a version of it
        "libraries": sorted(
            ((n, v) for n, v in start.get("libraries", {}).items() if v != NOT_INSTALLED),
            key=lambda kv: kv[0].lower(),
        ),
        "inputs": inputs,
    }


def _page(header: dict[str, Any]) -> str:
    """What every printed page says at its foot beside its number: the lot and the run.

    Escaped for a CSS string (the template puts it in ``@page``'s margin box).
    """
    return _css_text(f"Lot {header['lot_name']} \u00b7 run {header['run_folder']}")


# ---------------------------------------------------------------- the document


@functools.cache
def _environment() -> jinja2.Environment:
    """The templates' environment: every value escaped, an unknown name an error."""
    import jinja2  # only when a report is made: the command line starts without it

    environment = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATE_FOLDER, encoding="utf-8"),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
        trim_blocks=True,
        lstrip_blocks=True,
        auto_reload=False,
    )
    environment.globals["verdict_marks"] = VERDICT_MARKS
    return environment


def build_report(
    run_dir: Path,
    ledger_events: list[dict[str, Any]] | None = None,
    *,
    seal: str | None = None,
    record_status: str | None = None,
    problems: list[str] | None = None,
    approvals: list[Approval] | None = None,
    figure_base: str = "",
) -> bytes:
    """The report of ``run_dir`` as UTF-8 HTML bytes.

    Parameters
    ----------
    run_dir
        A run folder (it needs ``verdicts.json``; every other file is optional).
    ledger_events
        The ledger's events; ``None`` reads ``ledger.jsonl`` as far as it goes.
    seal, record_status, problems
        The seal and what ``verify`` found (``intact``, ``altered``, ``unfinished``),
        for a report rebuilt from a finished record. Without them the report says
        where the seal is found instead (the run's own, sealed report).
    approvals
        The review and release records ``verify`` checked, for the signature
        block of a rebuilt report; ``None`` in the run's own report (it says
        where they are found).
    figure_base
        The run folder as seen from where the report is written (``""`` inside
        it; ``RUN/`` beside it): the prefix of links to full-size figures that are
        not embedded.

    Returns
    -------
    bytes
        The HTML document; identical run files give identical bytes.
    """
    files = read_run_files(Path(run_dir), ledger_events)
    method = files.verdicts.get("method", {})
    page = _environment().get_template("report.html.j2")
    header = _header(files)
    text = page.render(
        title=f"{method.get('name', 'run')} r{method.get('revision', '?')} report",
        digits=DISPLAY_DIGITS,
        header=header,
        page_foot=_page(header),
        seal=_seal(seal, record_status, problems),
        details=_lot_details(files),
        recipe_approval=_recipe_approval(files),
        signatures=_signatures(approvals),
        lot=_lot_verdict(files),
        limits=_limits(files),
        images=_images(files, figure_base),
        sizes=_sizes(files),
        method=_method(files),
        definitions=_definitions(files),
        provenance=_provenance(files),
        caution=files.verdicts.get("caution") or CAUTION,
        footer={
            "version": __version__,
            "run_folder": files.run_dir.name,
            "rebuilt": seal is not None,
        },
    )
    return text.encode("utf-8")


def write_report(run_dir: Path, ledger_events: list[dict[str, Any]] | None = None) -> str:
    """Write ``report.html`` into the run folder (a new file, atomically); return its name.

    Called by ``run_lot`` after the run's other files and before ``SHA256SUMS``, so
    the report is sealed with them. ``ledger_events`` are the events written so far
    (``None``: read ``ledger.jsonl`` as it stands).
    """
    run_dir = Path(run_dir)
    path = run_dir.joinpath(REPORT_FILE)
    write_bytes(path, build_report(run_dir, ledger_events))
    return path.name


def default_report_path(run_dir: Path, pdf: bool = False) -> Path:
    """``RUN-report.html`` (or ``.pdf``) beside the run folder."""
    run_dir = Path(run_dir).resolve()
    return run_dir.parent / f"{run_dir.name}-report.{'pdf' if pdf else 'html'}"


def check_outside(run_dir: Path, out: Path) -> None:
    """Refuse (:class:`ReportError`) a rebuilt report's path inside the run folder."""
    if is_within(run_dir, out):
        raise ReportError(
            f"{out}: inside the run folder {run_dir}; nothing in a run folder is ever rewritten "
            "(write the rebuilt report beside it)"
        )


def rebuild_report(
    run_dir: Path, out: Path | None = None, *, trust: Path | None = None
) -> tuple[Path, str]:
    """Rebuild the report of a finished run, with its seal and signatures, outside the run folder.

    The record is checked first (:func:`lotproof.runner.record.verify.verify_run`,
    with the ``trust`` folder of public keys when given, which checks each
    approval's signature) and what it found is printed beside the seal; the
    signature block shows every review and release. ``out`` defaults to
    ``RUN-report.html`` beside the run folder; an existing file there is replaced
    (atomically).

    Returns
    -------
    (Path, str)
        Where the report was written, and the record's status.
    """
    run_dir = Path(run_dir)
    if not (run_dir / VERDICTS_FILE).is_file():
        raise ReportError(f"{run_dir}: not a run folder (no verdicts.json)")
    out = Path(out) if out is not None else default_report_path(run_dir)
    check_outside(run_dir, out)
    check = verify_run(run_dir, trust=trust)
    base = os.path.relpath(os.path.abspath(run_dir), os.path.abspath(out.parent))
    data = build_report(
        run_dir,
        None,
        seal=check.seal or "none (no ledger)",
        record_status=check.status,
        problems=check.problems,
        approvals=check.approvals,
        figure_base=Path(base).as_posix() + "/",
    )
    _replace(out, data)
    return out, check.status


def _replace(path: Path, data: bytes) -> None:
    try:
        write_file(path, data, replace=True)
    except OSError as err:
        raise ReportError(f"{path}: cannot write ({err.strerror})") from None
