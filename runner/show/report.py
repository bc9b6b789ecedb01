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

The HTML is byte-identical for identical run files: no clock is read, plots are
SVG with fixed metadata and a fixed hash salt, drawn with matplotlib's default
style (not the user's ``matplotlibrc``), and every image is embedded as a
``data:`` URI. Nothing refers to the network or to another file.
"""

from __future__ import annotations

import base64
import html
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

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

__all__ = [
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

#: the size columns of objects.csv drawn as a distribution, first found first
_SIZE_COLUMNS = ("ecd [um]", "esd [um]")

_TIMES = " \u00d7 "

#: per-image values shown beside the limits' own values, when the run has them
_KEY_VALUES = ("count", "area_fraction", "volume_fraction", "ecd_d50", "esd_d50")


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
    header = next(rows, [])
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
        found = {}
        for name in ("thumbnail", "overlay"):
            data = folder.figure(image_id, name)
            if data is not None:
                found[name] = data
        files.figures[image_id] = found
    return files


# ---------------------------------------------------------------- small pieces of HTML


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _num(value: Any) -> str:
    """A number as people read it: ``DISPLAY_DIGITS`` significant digits; '–' for none."""
    if value is None or value == "":
        return "\u2013"
    if isinstance(value, str):
        parsed = _to_float(value)
        if parsed is None:
            return value
        value = parsed
    if isinstance(value, bool):
        return str(int(value))
    if isinstance(value, int):
        return str(value)
    if not math.isfinite(value):
        return "undefined"
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return format(value, f".{DISPLAY_DIGITS}g")


def _unit(unit: str) -> str:
    return "" if unit in ("-", "") else unit


def _mark(verdict: str) -> str:
    word = VERDICT_MARKS.get(verdict, verdict or "\u2013")
    return f'<span class="mark mark-{_e(verdict or "none")}" data-verdict="{_e(verdict)}">{_e(word)}</span>'


def _data_uri(mime: str, data: bytes) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def _dl(rows: list[tuple[str, str]]) -> str:
    """A definition list; values are HTML already."""
    body = "".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in rows)
    return f"<dl>{body}</dl>"


def _code(text: Any) -> str:
    return f"<code>{_e(text)}</code>"


# ---------------------------------------------------------------- plots


def _size_figure(step: str, values: list[float], column: str) -> bytes:
    """Histogram and cumulative (number-weighted) curve of one step's object sizes, as SVG."""
    import matplotlib
    import numpy as np
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure

    unit = column[column.index("[") + 1 : -1]
    name = column.split(" [")[0].upper()
    data = np.sort(np.asarray(values, dtype=np.float64))
    edges = _bin_edges(float(data[0]), float(data[-1]))
    counts, _ = np.histogram(data, bins=edges)
    # matplotlib's own defaults, whatever the user's matplotlibrc says; the salt makes ids fixed
    with matplotlib.rc_context():
        matplotlib.rcParams.update(matplotlib.rcParamsDefault)
        matplotlib.rcParams.update(
            {
                "svg.hashsalt": "lotproof-report",
                "svg.fonttype": "path",
                "font.size": 8.5,
                "axes.linewidth": 0.8,
            }
        )
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
        right.set_xlim(edges[0], edges[-1])
        right.set_yticks([0, 0.1, 0.25, 0.5, 0.75, 0.9, 1.0])
        right.set_xlabel(f"{name} [{unit}]")
        right.set_ylabel("fraction of objects \u2264 size")
        right.set_title("cumulative, by number", fontsize=8.5, loc="left")
        for axes in (left, right):
            axes.spines["top"].set_visible(False)
            axes.spines["right"].set_visible(False)
        fig.tight_layout()
        buffer = io.BytesIO()
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    return buffer.getvalue()


def _bin_edges(low: float, high: float) -> Any:
    """Bins from 0 with a 1-2-5 width giving about 25 bins up to the largest size."""
    import numpy as np

    span = max(high, 1e-12)
    raw = span / 25
    power = 10 ** math.floor(math.log10(raw))
    width = next(step * power for step in (1, 2, 5, 10) if step * power >= raw)
    n = max(1, math.ceil(span / width + 1e-9))
    if n * width <= high:
        n += 1
    return np.arange(n + 1, dtype=np.float64) * width


# ---------------------------------------------------------------- sections


_STYLE = """
:root { --ink: #1b1b1b; --muted: #5a5a5a; --rule: #b9b9b9; --paper: #ffffff; --tint: #f3f3f1;
  --pass: #1f5130; --fail: #8a1c1c; --incomplete: #6b4a00; }
* { box-sizing: border-box; }
html { background: #e9e9e6; }
body { margin: 0 auto; max-width: 210mm; padding: 14mm 14mm 18mm; background: var(--paper);
  color: var(--ink); font: 10pt/1.45 "DejaVu Sans", "Liberation Sans", Arial, sans-serif; }
h1 { font-size: 17pt; margin: 0 0 2mm; font-weight: 600; }
h2 { font-size: 12pt; margin: 8mm 0 2mm; padding-bottom: 1mm; border-bottom: 1px solid var(--ink);
  font-weight: 600; }
h3 { font-size: 10pt; margin: 4mm 0 1mm; }
p { margin: 1mm 0 2mm; }
.summary { color: var(--muted); margin-bottom: 4mm; }
dl { display: grid; grid-template-columns: max-content 1fr; gap: 0.6mm 5mm; margin: 0; }
dt { color: var(--muted); }
dd { margin: 0; overflow-wrap: anywhere; }
code { font: 8.5pt "DejaVu Sans Mono", "Liberation Mono", monospace; overflow-wrap: anywhere; }
table { border-collapse: collapse; width: 100%; margin: 1mm 0 3mm; }
th, td { text-align: left; vertical-align: top; padding: 1.2mm 2mm; border-bottom: 1px solid var(--rule); }
th { font-weight: 600; border-bottom: 1.5px solid var(--ink); }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
tr.row-fail td { background: var(--tint); }
.verdict { display: flex; align-items: center; gap: 6mm; margin: 5mm 0 3mm; padding: 4mm 6mm;
  border: 2.5px solid var(--ink); }
.verdict-fail { border: 6px double var(--ink); }
.verdict-incomplete { border: 3px dashed var(--ink); }
.verdict .big { font-size: 24pt; font-weight: 700; letter-spacing: 0.04em; white-space: nowrap; }
.verdict-pass .big { color: var(--pass); }
.verdict-fail .big { color: var(--fail); }
.verdict-incomplete .big { color: var(--incomplete); }
.verdict .what { color: var(--ink); }
.mark { font-weight: 600; white-space: nowrap; }
.mark-pass { color: var(--pass); }
.mark-fail { color: var(--fail); text-decoration: underline; text-decoration-thickness: 1.5px; }
.mark-incomplete { color: var(--incomplete); font-style: italic; }
.mark--, .mark-none { color: var(--muted); font-weight: 400; }
.pics { display: flex; gap: 2mm; }
.pics figure { margin: 0; }
.pics img { display: block; width: 34mm; height: auto; border: 1px solid var(--rule);
  image-rendering: auto; }
.pics figcaption { font-size: 7.5pt; color: var(--muted); }
.values { margin: 0; padding: 0; list-style: none; font-size: 9pt; }
.values li { white-space: nowrap; }
.plot img { width: 100%; height: auto; display: block; }
.note { color: var(--muted); font-size: 8.5pt; }
.libraries { columns: 3; margin: 0; padding: 0; list-style: none; }
.libraries .lib { color: var(--muted); }
td.bound, td.limit { white-space: nowrap; }
.caution { border-left: 3px solid var(--ink); padding: 2mm 4mm; background: var(--tint); }
.seal-altered { font-weight: 700; }
footer { margin-top: 8mm; padding-top: 2mm; border-top: 1px solid var(--rule); color: var(--muted);
  font-size: 8pt; }
@page { size: A4; margin: 12mm 12mm 14mm; }
@media print {
  html { background: none; }
  body { max-width: none; padding: 0; font-size: 9pt; }
  h2, h3 { break-after: avoid; }
  tr, .verdict, figure, .plot { break-inside: avoid; }
  thead { display: table-header-group; }
  .pics img { width: 30mm; }
}
"""


def _header(files: RunFiles, seal_html: str) -> str:
    verdicts, resolved = files.verdicts, files.resolved
    method = verdicts.get("method", {})
    start = files.first_event("run-start")
    recipe_event = files.first_event("recipe")
    name = method.get("name") or resolved.get("name") or "?"
    revision = method.get("revision", resolved.get("revision", "?"))
    lot = resolved.get("lot") or start.get("lot") or ""
    lot_name = Path(lot).name if lot else "not recorded"
    date = start.get("time_utc") or _date_from_folder(files.run_dir.name) or "not recorded"
    end = files.first_event("run-end").get("time_utc")
    tool = start.get("tool", {}).get("version") or "not recorded"
    rows = [
        ("Method", f"{_e(name)}, revision {_e(revision)}"),
        (
            "Recipe sha256",
            _code(method.get("recipe_sha256") or recipe_event.get("sha256", "not recorded")),
        ),
        ("Lot", f"{_e(lot_name)}" + (f' <span class="note">({_e(lot)})</span>' if lot else "")),
        ("Date (UTC)", _e(date) + (f' <span class="note">(ended {_e(end)})</span>' if end else "")),
        ("lotproof", _e(tool)),
        ("Run folder", _code(files.run_dir.name)),
        ("Seal", seal_html),
    ]
    summary = resolved.get("summary") or ""
    return (
        f"<header><h1>Lot {_e(lot_name)} \u00b7 {_e(name)} r{_e(revision)}</h1>"
        + (f'<p class="summary">{_e(summary)}</p>' if summary else "")
        + _dl(rows)
        + "</header>"
    )


def _date_from_folder(name: str) -> str:
    m = re.match(r"^(\d{4})(\d{2})(\d{2})T(\d{2})(\d{2})(\d{2})Z", name)
    return f"{m[1]}-{m[2]}-{m[3]}T{m[4]}:{m[5]}:{m[6]}Z" if m else ""


def _lot_verdict(files: RunFiles) -> str:
    verdicts = files.verdicts
    lot = verdicts.get("lot_verdict", "incomplete")
    limits = verdicts.get("limits", {})
    failed = [n for n, lv in limits.items() if lv.get("verdict") == "fail"]
    incomplete = verdicts.get("incomplete_images", {})
    n_images = verdicts.get("images", len(verdicts.get("image_verdicts", {})))
    parts = [
        f"{n_images} image{'s' if n_images != 1 else ''}, {len(limits)} limit{'s' if len(limits) != 1 else ''}"
    ]
    if failed:
        parts.append(f"failed: {', '.join(failed)}")
    if incomplete:
        parts.append(
            f"{len(incomplete)} image{'s' if len(incomplete) != 1 else ''} could not be analysed"
        )
    word = VERDICT_MARKS.get(lot, lot)
    return (
        f'<section class="verdict verdict-{_e(lot)}" id="lot-verdict" data-verdict="{_e(lot)}">'
        f'<div class="big">{_e(word)}</div>'
        f'<div class="what"><strong>Lot verdict</strong><br>{_e("; ".join(parts))}</div></section>'
    )


def _limits_table(files: RunFiles) -> str:
    limits = files.verdicts.get("limits", {})
    if not limits:
        return "<h2>Limits</h2><p>The recipe sets no limits.</p>"
    rows = []
    for name, lv in limits.items():
        over = lv.get("over", "each")
        images = lv.get("images", {})
        if over == "each":
            judged = [
                v for v in images.values() if v.get("verdict") in ("pass", "fail", "incomplete")
            ]
            numbers = [v["value"] for v in judged if v.get("value") is not None]
            failed = sum(1 for v in judged if v.get("verdict") == "fail")
            value = f"{_num(min(numbers))} to {_num(max(numbers))}" if numbers else "\u2013"
            value_note = (
                f'<br><span class="note">range over {len(judged)} images; {failed} failed</span>'
            )
            value_cell = f'<td class="num" data-value="">{value}{value_note}</td>'
        else:
            value_cell = f'<td class="num" data-value="{_e(_json_text(lv.get("value")))}">{_num(lv.get("value"))}</td>'
        reason = lv.get("reason") or ""
        cls = ' class="row-fail"' if lv.get("verdict") == "fail" else ""
        rows.append(
            f'<tr{cls} data-limit="{_e(name)}" data-verdict="{_e(lv.get("verdict", ""))}">'
            f'<td class="limit">{_e(name)}</td><td>{_code(lv.get("value_of", ""))}</td>'
            f"<td>{_e(over)}</td>"
            f"{value_cell}"
            f'<td class="bound">{_e(lv.get("bound", ""))}</td>'
            f'<td class="unit">{_e(_unit(lv.get("unit", "-")))}</td>'
            f"<td>{_mark(lv.get('verdict', ''))}"
            + (f'<br><span class="note">{_e(reason)}</span>' if reason else "")
            + "</td></tr>"
        )
    return (
        "<h2>Limits</h2>"
        '<table id="limits"><thead><tr><th>limit</th><th>value of</th><th>over</th>'
        '<th class="num">value</th><th>bound</th><th>unit</th><th>verdict</th></tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table>"
        f'<p class="note">{_e(files.verdicts.get("rules", ""))}. Values are shown to '
        f"{DISPLAY_DIGITS} significant digits; images.csv and verdicts.json hold every digit.</p>"
    )


def _json_text(value: Any) -> str:
    return "" if value is None else repr(float(value))


def _key_columns(files: RunFiles) -> list[tuple[str, str, str]]:
    """(images.csv header, value name, unit) of the values shown per image."""
    parsed = []
    for header in files.image_header:
        m = re.match(r"^(.+)\.([^.\[]+) \[(.*)\]$", header)
        if m:
            parsed.append((header, f"{m[1]}.{m[2]}", m[3]))
    limited = [lv.get("value_of") for lv in files.verdicts.get("limits", {}).values()]
    chosen = []
    for value_of in limited:
        for entry in parsed:
            if entry[1] == value_of and entry not in chosen:
                chosen.append(entry)
    for short in _KEY_VALUES:
        for entry in parsed:
            if entry[1].rsplit(".", 1)[1] == short and entry not in chosen:
                chosen.append(entry)
    return chosen[:8]


def _images_table(files: RunFiles) -> str:
    verdicts = files.verdicts
    image_verdicts = verdicts.get("image_verdicts", {})
    incomplete = verdicts.get("incomplete_images", {})
    rows_by_id = {row.get("image"): row for row in files.image_rows}
    columns = _key_columns(files)
    limits = verdicts.get("limits", {})
    each = {n: lv for n, lv in limits.items() if lv.get("over", "each") == "each"}
    rows = []
    for image_id, verdict in image_verdicts.items():
        figs = files.figures.get(image_id, {})
        pics = []
        for name, alt in (("thumbnail", "image"), ("overlay", "detected objects outlined")):
            if name in figs:
                pics.append(
                    f'<figure><img src="{_data_uri("image/png", figs[name])}" alt="{_e(image_id)}: {alt}">'
                    f"<figcaption>{_e(alt)}</figcaption></figure>"
                )
        pics_html = (
            f'<div class="pics">{"".join(pics)}</div>'
            if pics
            else '<span class="note">no preview</span>'
        )
        row = rows_by_id.get(image_id, {})
        items = []
        for header, value_of, unit in columns:
            marks = [
                f" {_mark(lv['images'][image_id]['verdict'])}"
                for n, lv in each.items()
                if lv.get("value_of") == value_of and image_id in lv.get("images", {})
            ]
            items.append(
                f'<li data-value-of="{_e(value_of)}">{_e(value_of.split(".", 1)[1])} = '
                f"{_e(_num(row.get(header, '')))} {_e(_unit(unit))}{''.join(marks)}</li>"
            )
        if image_id in incomplete:
            items.append(f'<li class="note">could not be analysed: {_e(incomplete[image_id])}</li>')
        cls = ' class="row-fail"' if verdict == "fail" else ""
        rows.append(
            f'<tr{cls} data-image="{_e(image_id)}" data-verdict="{_e(verdict)}">'
            f"<td><strong>{_e(image_id)}</strong></td><td>{pics_html}</td>"
            f'<td><ul class="values">{"".join(items)}</ul></td><td>{_mark(verdict)}</td></tr>'
        )
    body = "".join(rows) or '<tr><td colspan="4">The lot has no images.</td></tr>'
    return (
        "<h2>Images</h2>"
        '<table id="images"><thead><tr><th>image</th><th>preview</th><th>key values</th>'
        f"<th>verdict</th></tr></thead><tbody>{body}</tbody></table>"
        '<p class="note">Previews are shrunk and contrast-stretched for viewing only; outlines are '
        "the inner morphological gradient of the measured objects. The marks beside a value are its "
        "verdicts on the limits applied to each image.</p>"
    )


def _sizes_section(files: RunFiles) -> str:
    if not files.sizes:
        return ""
    parts = ["<h2>Size distribution</h2>"]
    for step, values in files.sizes.items():
        svg = _size_figure(step, values, files.size_column)
        parts.append(
            f'<figure class="plot" data-step="{_e(step)}"><img src="{_data_uri("image/svg+xml", svg)}" '
            f'alt="{_e(step)}: histogram and cumulative curve of {_e(files.size_column)}"></figure>'
        )
    parts.append(
        f'<p class="note">Every object of the lot, from objects.csv column {_code(files.size_column)}. '
        "Dashed lines mark 10 %, 50 % and 90 % of the objects by number.</p>"
    )
    return "".join(parts)


def _method_section(files: RunFiles) -> str:
    steps = files.resolved.get("steps", {})
    if not steps:
        return ""
    rows = []
    for name, step in steps.items():
        params = step.get("params", {})
        text = (
            ", ".join(f"{k}: {_param_text(v)}" for k, v in params.items() if v is not None)
            or "\u2013"
        )
        runs = "yes" if step.get("runs", True) else "no (not needed)"
        rows.append(
            f"<tr><td>{_e(name)}</td><td>{_e(step.get('apply', ''))} v{_e(step.get('version', ''))}</td>"
            f"<td>{_e(', '.join(step.get('to', [])))}</td><td>{_e(text)}</td><td>{_e(runs)}</td></tr>"
        )
    pixel = files.resolved.get("pixel_size", "")
    rounding = files.resolved.get("rounding_rule", "")
    return (
        "<h2>Method</h2>"
        f"<p>Pixel size: {_e(pixel)}. Parameters as written in the recipe, defaults filled in; "
        "resolved.json holds them in pixels.</p>"
        '<table id="steps"><thead><tr><th>step</th><th>kind</th><th>applied to</th><th>parameters</th>'
        f"<th>run</th></tr></thead><tbody>{''.join(rows)}</tbody></table>"
        + (f'<p class="note">{_e(rounding)}</p>' if rounding else "")
    )


def _param_text(value: Any) -> str:
    if isinstance(value, dict) and "value" in value and "unit" in value:
        return f"{_num(value['value'])} {value['unit']}"
    if isinstance(value, float):
        return _num(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_param_text(v) for v in value) + "]"
    return str(value)


def _provenance(files: RunFiles) -> str:
    start = files.first_event("run-start")
    recipe = files.first_event("recipe")
    parts = ["<h2>Provenance</h2>"]
    git = recipe.get("git")
    if git:
        state = (
            "modified since that commit (not as committed)"
            if git.get("modified")
            else "as committed (clean)"
        )
        git_html = f"commit {_code(git.get('commit', '?'))} at {_code(git.get('path_in_repo', '?'))}; {_e(state)}"
    elif recipe:
        git_html = "not in a git work tree"
    else:
        git_html = "not recorded"
    python = start.get("python", {})
    platform = start.get("platform", {})
    rows = [
        ("Recipe", (_code(recipe["path"]) if recipe.get("path") else "not recorded")),
        ("Recipe in git", git_html),
        ("lotproof", _e(start.get("tool", {}).get("version", "not recorded"))),
        (
            "Python",
            _e(
                " ".join(str(python.get(k, "")) for k in ("implementation", "version")).strip()
                or "not recorded"
            ),
        ),
        (
            "Platform",
            _e(
                " ".join(str(platform.get(k, "")) for k in ("system", "release", "machine")).strip()
                or "not recorded"
            ),
        ),
        ("CPU", _e(start.get("cpu", {}).get("model") or "not recorded")),
        (
            "Run by",
            _e(
                " on ".join(str(x) for x in (start.get("user"), start.get("host")) if x)
                or "not recorded"
            ),
        ),
        ("Executor", _e(start.get("executor") or "not recorded")),
    ]
    parts.append(_dl(rows))
    libraries = start.get("libraries", {})
    if libraries:
        cells = "".join(
            f'<li><span class="lib">{_e(k)}</span> {_e(v)}</li>'
            for k, v in sorted(libraries.items(), key=lambda kv: kv[0].lower())
        )
        parts.append(f'<h3>Library versions</h3><ul class="libraries" id="libraries">{cells}</ul>')
    rows_html = []
    for image_id, entries in files.inputs.items():
        for item in entries if isinstance(entries, list) else []:
            calibration = item.get("calibration", {})
            size = calibration.get("pixel_size_um")
            size_text = (_TIMES.join(_num(s) for s in size) + " um") if size else "none"
            rows_html.append(
                f"<tr><td>{_e(item.get('path', image_id))}</td><td>{_e(item.get('input', ''))}</td>"
                f'<td class="num">{_e(item.get("size", ""))}</td>'
                f"<td>{_e(_TIMES.join(str(s) for s in item.get('shape', [])))} {_e(item.get('dtype', ''))}</td>"
                f"<td>{_e(size_text)}</td><td>{_code(item.get('sha256', ''))}</td></tr>"
            )
    if rows_html:
        parts.append(
            '<h3>Input files</h3><table id="inputs"><thead><tr><th>file</th><th>input</th>'
            '<th class="num">bytes</th><th>shape, type</th><th>calibration</th><th>sha256</th></tr></thead>'
            f"<tbody>{''.join(rows_html)}</tbody></table>"
        )
    return "".join(parts)


def _cautions(files: RunFiles) -> str:
    caution = files.verdicts.get("caution") or CAUTION
    return f'<h2>Cautions</h2><p class="caution" id="caution">{_e(caution)}</p>'


# ---------------------------------------------------------------- the document


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
    if seal is None:
        seal_html = (
            "not in this file: the report is itself one of the files the seal covers; "
            f"see {_code('lotproof verify RUN')}"
        )
    else:
        status = record_status or "intact"
        seal_html = f'{_code(seal)} <span class="seal-{_e(status)}">(record {_e(status)}'
        if problems:
            seal_html += f"; first problem: {_e(problems[0])}"
        seal_html += ")</span>"
    method = files.verdicts.get("method", {})
    title = f"{method.get('name', 'run')} r{method.get('revision', '?')} report"
    body = "".join(
        [
            _header(files, seal_html),
            _lot_verdict(files),
            _limits_table(files),
            _images_table(files),
            _sizes_section(files),
            _method_section(files),
            _provenance(files),
            _cautions(files),
            f"<footer>Report made by lotproof {_e(__version__)} from the files of run "
            f"{_e(files.run_dir.name)}"
            + (" (rebuilt from the finished record)" if seal is not None else "")
            + ".</footer>",
        ]
    )
    document = (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head>\n"
        f"<body>\n{body}\n</body></html>\n"
    )
    return document.encode("utf-8")


def write_report(run_dir: Path, ledger_events: list[dict[str, Any]] | None = None) -> str:
    """Write ``report.html`` into the run folder (a new file, atomically); return its name.

    Called by ``run_lot`` after the run's other files and before ``SHA256SUMS``, so
    the report is sealed with them. ``ledger_events`` are the events written so far
    (``None``: read ``ledger.jsonl`` as it stands).
    """
    run_dir = Path(run_dir)
    write_bytes(run_dir / REPORT_FILE, build_report(run_dir, ledger_events))
    return REPORT_FILE


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
