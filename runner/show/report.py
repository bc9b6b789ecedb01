"""The run's report: one self-contained HTML file built from a run folder's files.

``report.html`` is written into every run folder by :func:`write_report` while the
run is being recorded, so it is one of the files the ledger seals. It is built
only from what the run folder holds (``verdicts.json``, ``images.csv``,
``objects.csv``, ``resolved.json``, ``inputs.json``, ``ledger.jsonl`` and the PNG
previews in ``figures/``) plus, optionally, the ledger events written so far.

A sealed file cannot contain its own seal, so the run's own report says where the
seal is found (``lotproof verify RUN``). :func:`rebuild_report` makes the same
report again from a finished record, with the seal and the verification status,
and writes it *beside* the run folder (``RUN-report.html``) or where asked; never
into the run folder, whose files are never rewritten.

The markup is in template files kept with this module (``templates/``:
``report.html.j2``, its macros and ``report.css``), rendered by jinja2 with
autoescaping on and undefined names an error. This module only prepares plain
data for them: text, numbers already formatted for people, and every picture as
a ``data:`` URI (PNG previews, SVG plots). Nothing is marked safe, so a lot
folder, an image file name or a recipe summary holding markup is printed as text.

The HTML is byte-identical for identical run files: no clock is read, plots are
SVG with fixed metadata and a fixed hash salt, drawn with matplotlib's default
style (not the user's ``matplotlibrc``), and every image is embedded as a
``data:`` URI. Nothing refers to the network or to another file. The style sheet
prints the report on A4.
"""

from __future__ import annotations

import base64
import functools
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from lotproof.runner import __version__
from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.files import write_file
from lotproof.runner.record.folder import CAUTION, write_bytes
from lotproof.runner.record.layout import (
    IMAGES_FILE,
    INPUTS_FILE,
    OBJECTS_FILE,
    REPORT_FILE,
    RESOLVED_FILE,
    VERDICTS_FILE,
    is_within,
)
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.record.verify import verify_run
from lotproof.runner.show.figures import SVG_METADATA, default_style

if TYPE_CHECKING:
    import jinja2
    from matplotlib.typing import RcKeyType

__all__ = [
    "TEMPLATE_FOLDER",
    "VERDICT_MARKS",
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
    #: image id -> {"thumbnail": png bytes, "overlay": png bytes}
    figures: dict[str, dict[str, bytes]] = field(default_factory=dict)

    def first_event(self, kind: str) -> dict[str, Any]:
        return next((e for e in self.events if e.get("type") == kind), {})


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
    for image_id in files.verdicts.get("image_verdicts", {}):
        found: dict[str, bytes] = {}
        for name in ("thumbnail", "overlay"):
            data = folder.figure(image_id, name)
            if data is not None:
                found[name] = data
        files.figures[image_id] = found
    return files


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
    return "" if unit in ("-", "") else unit


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

    unit = column[column.index("[") + 1 : -1]
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


def _header(files: RunFiles) -> dict[str, Any]:
    verdicts, resolved = files.verdicts, files.resolved
    method = verdicts.get("method", {})
    start = files.first_event("run-start")
    recipe_event = files.first_event("recipe")
    lot = resolved.get("lot") or start.get("lot") or ""
    return {
        "name": method.get("name") or resolved.get("name") or "?",
        "revision": method.get("revision", resolved.get("revision", "?")),
        "summary": resolved.get("summary") or "",
        "recipe_sha256": method.get("recipe_sha256") or recipe_event.get("sha256", _NOT_RECORDED),
        "lot_name": Path(lot).name if lot else _NOT_RECORDED,
        "lot_path": lot,
        "date": start.get("time_utc") or _date_from_folder(files.run_dir.name) or _NOT_RECORDED,
        "ended": files.first_event("run-end").get("time_utc") or "",
        "tool": start.get("tool", {}).get("version") or _NOT_RECORDED,
        "run_folder": files.run_dir.name,
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


def _limits(files: RunFiles) -> dict[str, Any]:
    rows = []
    for name, lv in files.verdicts.get("limits", {}).items():
        over = lv.get("over", "each")
        if over == "each":
            judged = [
                v
                for v in lv.get("images", {}).values()
                if v.get("verdict") in ("pass", "fail", "incomplete")
            ]
            numbers = [v["value"] for v in judged if v.get("value") is not None]
            failed = sum(1 for v in judged if v.get("verdict") == "fail")
            value = f"{_num(min(numbers))} to {_num(max(numbers))}" if numbers else _NONE
            value_note = f"range over {len(judged)} images; {failed} failed"
            digits = ""
        else:
            value, value_note, digits = _num(lv.get("value")), "", _json_text(lv.get("value"))
        rows.append(
            {
                "name": name,
                "verdict": lv.get("verdict", ""),
                "value_of": lv.get("value_of", ""),
                "over": over,
                "value": value,
                "value_note": value_note,
                "value_digits": digits,
                "bound": lv.get("bound", ""),
                "unit": _unit(lv.get("unit", "-")),
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


def _images(files: RunFiles) -> list[dict[str, Any]]:
    verdicts = files.verdicts
    incomplete = verdicts.get("incomplete_images", {})
    rows_by_id = {row.get("image"): row for row in files.image_rows}
    columns = _key_columns(files)
    each = [lv for lv in verdicts.get("limits", {}).values() if lv.get("over", "each") == "each"]
    rows = []
    for image_id, verdict in verdicts.get("image_verdicts", {}).items():
        figs = files.figures.get(image_id, {})
        pictures = [
            {"uri": _data_uri("image/png", figs[name]), "caption": caption}
            for name, caption in (("thumbnail", "image"), ("overlay", "detected objects outlined"))
            if name in figs
        ]
        row = rows_by_id.get(image_id, {})
        numbers = [
            {
                "value_of": value_of,
                "name": value_of.split(".", 1)[1],
                "number": _num(row.get(header, "")),
                "unit": _unit(unit),
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
                "image": image_id,
                "verdict": verdict,
                "pictures": pictures,
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
        "pixel_size": files.resolved.get("pixel_size", ""),
        "rounding": files.resolved.get("rounding_rule", ""),
    }


def _param_text(value: Any) -> str:
    if isinstance(value, dict) and "value" in value and "unit" in value:
        return f"{_num(value['value'])} {value['unit']}"
    if isinstance(value, float):
        return _num(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_param_text(v) for v in value) + "]"
    return str(value)


def _provenance(files: RunFiles) -> dict[str, Any]:
    start = files.first_event("run-start")
    recipe = files.first_event("recipe")
    git = recipe.get("git")
    python = start.get("python", {})
    platform = start.get("platform", {})
    facts = [
        ("lotproof", start.get("tool", {}).get("version", _NOT_RECORDED)),
        ("Python", _joined([python.get(k) for k in ("implementation", "version")])),
        ("Platform", _joined([platform.get(k) for k in ("system", "release", "machine")])),
        ("CPU", start.get("cpu", {}).get("model")),
        ("Run by", _joined([start.get("user"), start.get("host")], " on ")),
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
                    "calibration": (_TIMES.join(_num(s) for s in size) + " um") if size else "none",
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
        "libraries": sorted(start.get("libraries", {}).items(), key=lambda kv: kv[0].lower()),
        "inputs": inputs,
    }


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

    Returns
    -------
    bytes
        The HTML document; identical run files give identical bytes.
    """
    files = read_run_files(Path(run_dir), ledger_events)
    method = files.verdicts.get("method", {})
    page = _environment().get_template("report.html.j2")
    text = page.render(
        title=f"{method.get('name', 'run')} r{method.get('revision', '?')} report",
        digits=DISPLAY_DIGITS,
        header=_header(files),
        seal=_seal(seal, record_status, problems),
        lot=_lot_verdict(files),
        limits=_limits(files),
        images=_images(files),
        sizes=_sizes(files),
        method=_method(files),
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


def rebuild_report(run_dir: Path, out: Path | None = None) -> tuple[Path, str]:
    """Rebuild the report of a finished run, with its seal, outside the run folder.

    The record is checked first (:func:`lotproof.runner.record.ledger.verify_run`) and what it found
    is printed beside the seal. ``out`` defaults to ``RUN-report.html`` beside the
    run folder; an existing file there is replaced (atomically).

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
    check = verify_run(run_dir)
    data = build_report(
        run_dir,
        None,
        seal=check.seal or "none (no ledger)",
        record_status=check.status,
        problems=check.problems,
    )
    _replace(out, data)
    return out, check.status


def _replace(path: Path, data: bytes) -> None:
    try:
        write_file(path, data, replace=True)
    except OSError as err:
        raise ReportError(f"{path}: cannot write ({err.strerror})") from None
