"""The study's report: one self-contained HTML file built from a study folder's files.

``report.html`` is written into every study folder by :func:`write_study_report`
while the study is recorded, so the ledger seals it with the other files. It is
built only from what the folder holds: ``validation.json`` (every statistic, the
criteria, the verdict), ``measurements.csv`` (the values per image) and the ledger
as far as it goes (the study's start time).

The markup is ``templates/study.html.j2`` (with the run report's style sheet and
macros), rendered by jinja2 with autoescaping on and undefined names an error;
nothing is marked safe. The plots are SVG drawn by matplotlib with its own
defaults and fixed metadata (:mod:`lotproof.runner.show.figures`): a bar chart of
the variance components, the operator x part interaction plot, and bias against
reference with the fitted line and its confidence band. Identical study files give
an identical report, but for the start time, which the ``<time>`` element holds.
"""

from __future__ import annotations

import base64
import functools
import io
import math
from pathlib import Path
from typing import TYPE_CHECKING, Any

from lotproof.runner import __version__
from lotproof.runner.record.folder import CAUTION, write_bytes
from lotproof.runner.record.layout import MEASUREMENTS_FILE, REPORT_FILE, VALIDATION_FILE
from lotproof.runner.record.reading import RunFolder
from lotproof.runner.show.figures import SVG_METADATA, default_style
from lotproof.runner.show.report import TEMPLATE_FOLDER, VERDICT_MARKS, ReportError

if TYPE_CHECKING:
    import jinja2
    from matplotlib.typing import RcKeyType

__all__ = ["build_study_report", "write_study_report"]

#: significant digits of numbers shown to people (validation.json keeps every digit)
DIGITS = 4

_NONE = "\u2013"

_PLOT_STYLE: dict[RcKeyType, Any] = {
    "svg.hashsalt": "lotproof-study-report",  # element ids are fixed, not random
    "svg.fonttype": "path",  # text as outlines: no font is needed to view the plot
    "font.size": 8.5,
    "axes.linewidth": 0.8,
}

#: the rows of the variance table: (label, key of the sd in validation.json)
_COMPONENTS = (
    ("Repeatability (EV)", "repeatability_sd"),
    ("Reproducibility (AV)", "reproducibility_sd"),
    ("\u2003operator", "operator_sd"),
    ("\u2003part \u00d7 operator", "interaction_sd"),
    ("Gauge R&R (GRR)", "grr_sd"),
    ("Part variation (PV)", "part_sd"),
    ("Total variation (TV)", "total_sd"),
)


def _num(value: Any, digits: int = DIGITS) -> str:
    """A number for people: ``digits`` significant digits; '–' for none."""
    if value is None or value == "":
        return _NONE
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    number = float(value)
    if not math.isfinite(number):
        return _NONE
    return f"{number:.{digits}g}"


def _pct(value: Any) -> str:
    return _NONE if value is None else f"{float(value):.3g} %"


def _unit(unit: str) -> str:
    return "" if unit in ("-", "") else f" {unit}"


def _uri(svg: bytes) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(svg).decode("ascii")


# ---------------------------------------------------------------- plots


def _figure(draw: Any, size: tuple[float, float]) -> bytes:
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure

    with default_style(_PLOT_STYLE):
        fig = Figure(figsize=size)
        FigureCanvasSVG(fig)
        axes = fig.subplots()
        draw(axes)
        axes.spines["top"].set_visible(False)
        axes.spines["right"].set_visible(False)
        fig.tight_layout()
        buffer = io.BytesIO()
        fig.savefig(buffer, format="svg", metadata=SVG_METADATA)
    return buffer.getvalue()


def _components_plot(doc: dict[str, Any], unit: str) -> bytes:
    """Bars: each component's share of the total variation and of the tolerance."""
    names = ["EV", "AV", "GRR", "PV"]
    keys = ["repeatability_sd", "reproducibility_sd", "grr_sd", "part_sd"]
    total, tolerance = doc.get("total_sd") or 0.0, doc.get("tolerance")
    of_total = [100.0 * (doc.get(k) or 0.0) / total if total else 0.0 for k in keys]
    of_tol = [600.0 * (doc.get(k) or 0.0) / tolerance if tolerance else 0.0 for k in keys]

    def draw(axes: Any) -> None:
        at = list(range(len(names)))
        width = 0.38
        axes.bar(
            [x - width / 2 for x in at],
            of_total,
            width,
            color="#808080",
            edgecolor="#202020",
            linewidth=0.6,
            label="% of total variation (sd / TV)",
        )
        if tolerance:
            axes.bar(
                [x + width / 2 for x in at],
                of_tol,
                width,
                color="#ffffff",
                edgecolor="#202020",
                linewidth=0.8,
                hatch="///",
                label="% of tolerance (6 sd / (USL - LSL))",
            )
        axes.set_xticks(at, names)
        axes.set_ylabel("percent")
        axes.set_title(
            f"variance components{_unit(unit) and f' ({unit.strip()})'}", fontsize=8.5, loc="left"
        )
        axes.legend(frameon=False, fontsize=7.5)

    return _figure(draw, (3.6, 2.6))


def _interaction_plot(doc: dict[str, Any], unit: str) -> bytes:
    """One line per operator through the operator's mean of every part."""
    cells = doc.get("cell_means") or {}
    parts = doc.get("parts_order") or (list(next(iter(cells.values()))) if cells else [])
    markers = ["o", "s", "^", "D", "v", "P", "X", "*"]
    styles = ["-", "--", ":", "-."]

    def draw(axes: Any) -> None:
        for n, (operator, means) in enumerate(cells.items()):
            ys = [means.get(p) for p in parts]
            axes.plot(
                range(len(parts)),
                [math.nan if y is None else y for y in ys],
                marker=markers[n % len(markers)],
                linestyle=styles[n % len(styles)],
                color="#000000",
                linewidth=0.9,
                markersize=3.5,
                fillstyle="none",
                label=f"operator {operator}",
            )
        axes.set_xticks(range(len(parts)), parts, rotation=0 if len(parts) <= 12 else 90)
        axes.set_xlabel("part")
        axes.set_ylabel(f"mean of replicates{_unit(unit)}")
        axes.set_title("operator \u00d7 part", fontsize=8.5, loc="left")
        axes.legend(frameon=False, fontsize=7.5)

    return _figure(draw, (3.6, 2.6))


def _bias_plot(doc: dict[str, Any], points: list[tuple[float, float]], unit: str) -> bytes:
    """Each image's bias against its known value, the references' means with their intervals,
    the fitted line and its confidence band."""
    line = doc.get("linearity") or {}
    band = line.get("band") or []

    def draw(axes: Any) -> None:
        axes.axhline(0.0, color="#808080", linewidth=0.6)
        if points:
            axes.plot(
                [x for x, _ in points],
                [y for _, y in points],
                linestyle="none",
                marker="o",
                markersize=2.5,
                color="#606060",
                label="images",
            )
        for ref in doc.get("bias") or []:
            x, y = ref.get("reference"), ref.get("bias")
            low, high = ref.get("ci_low"), ref.get("ci_high")
            if None in (x, y, low, high):
                continue
            axes.errorbar(
                [x],
                [y],
                yerr=[[y - low], [high - y]],
                fmt="s",
                color="#000000",
                markersize=4,
                capsize=3,
                linewidth=0.9,
            )
        if band:
            xs = [b["reference"] for b in band]
            axes.fill_between(
                xs,
                [b["low"] for b in band],
                [b["high"] for b in band],
                color="#d0d0d0",
                linewidth=0,
                label="confidence band",
            )
            axes.plot(
                xs, [b["bias"] for b in band], color="#000000", linewidth=1.0, label="fitted line"
            )
        axes.set_xlabel(f"reference value{_unit(unit)}")
        axes.set_ylabel(f"bias{_unit(unit)}")
        axes.set_title("bias and linearity", fontsize=8.5, loc="left")
        axes.legend(frameon=False, fontsize=7.5)

    return _figure(draw, (5.2, 2.8))


# ---------------------------------------------------------------- the document


#: how a criterion's measured number reads, by its kind
_MEASURED = {
    "grr_percent_tolerance": "{} % of tolerance",
    "grr_percent_total": "{} % of total variation",
    "ndc": "ndc {}",
    "bias_relative": "largest |bias| {} % of reference",
    "bias_absolute": "largest |bias| {}",
    "slope": "|slope| {}",
    "change_percent_tolerance": "largest |change per step| {} % of tolerance",
}


def _criteria(doc: dict[str, Any]) -> list[dict[str, Any]]:
    rows = []
    for name, entry in doc.get("criteria", {}).items():
        if "results" in entry:
            found = []
            shape = _MEASURED.get(entry.get("kind", ""), "{}")
            for value, result in entry["results"].items():
                measured = result.get("measured")
                if entry.get("kind") == "no_significant_bias":
                    significant = [
                        r for r, v in result.get("references", {}).items() if v != "pass"
                    ]
                    text = f"{value}: " + (
                        "significant on " + ", ".join(significant)
                        if significant
                        else "none significant"
                    )
                else:
                    unit = _unit(doc["values"].get(value, {}).get("unit", "-"))
                    number = _num(measured) + (unit if entry.get("kind") == "bias_absolute" else "")
                    text = f"{value}: {shape.format(number)}"
                    failing = [
                        k
                        for k, v in {
                            **result.get("references", {}),
                            **result.get("parameters", {}),
                        }.items()
                        if v == "fail"
                    ]
                    if failing:
                        text += " (fails: " + ", ".join(failing) + ")"
                if result.get("reason"):
                    text += f" ({result['reason']})"
                found.append(text)
            detail = "; ".join(found)
        else:
            images = entry.get("images", [])
            detail = f"{len(images)} image(s) flip" + (": " + ", ".join(images) if images else "")
            if entry.get("reason"):
                detail += f" ({entry['reason']})"
        rows.append(
            {"name": name, "rule": entry["rule"], "detail": detail, "verdict": entry["verdict"]}
        )
    return rows


def _anova(rows: list[dict[str, Any]] | None) -> list[dict[str, str]]:
    return [
        {
            "source": r["source"],
            "df": str(r["df"]),
            "ss": _num(r["ss"]),
            "ms": _num(r["ms"]),
            "f": _num(r["f"]),
            "p": _num(r["p"]),
            "against": r.get("tested_against") or "",
        }
        for r in rows or []
    ]


def _value_section(name: str, doc: dict[str, Any], rows: list[dict[str, str]]) -> dict[str, Any]:
    unit = doc.get("unit", "-")
    header = f"{name} [{unit}]"
    section: dict[str, Any] = {
        "name": name,
        "unit": unit,
        "unit_text": _unit(unit).strip(),
        "tolerance": _num(doc.get("tolerance")),
        "tolerance_source": doc.get("tolerance_source") or "",
        # every key the template reads, also when the plan has no such section
        "precision": None,
        "precision_problem": "",
        "trueness": None,
        "trueness_problem": "",
    }
    if doc.get("anova") is not None:
        total, tolerance = doc.get("total_sd"), doc.get("tolerance")
        section["precision"] = {
            "components": [
                {
                    "label": label,
                    "sd": _num(doc.get(key)),
                    "of_total": _pct(None if not total else 100.0 * (doc.get(key) or 0.0) / total),
                    "of_tolerance": _pct(
                        None if not tolerance else 600.0 * (doc.get(key) or 0.0) / tolerance
                    ),
                }
                for label, key in _COMPONENTS
            ],
            "grr_percent_tolerance": _pct(doc.get("grr_percent_tolerance")),
            "grr_percent_total": _pct(doc.get("grr_percent_total")),
            "ndc": _num(doc.get("ndc")),
            "rule": (doc.get("interaction") or {}).get("rule", ""),
            "set_to_zero": ", ".join(doc.get("set_to_zero") or []),
            "anova": _anova(doc.get("anova")),
            "anova_pooled": _anova(doc.get("anova_pooled")),
            "design": f"{doc.get('parts')} parts \u00d7 {doc.get('operators')} operators "
            f"\u00d7 {doc.get('replicates')} replicates",
            "components_plot": _uri(_components_plot(doc, unit)),
            "interaction_plot": _uri(_interaction_plot(doc, unit)),
        }
    elif doc.get("precision_problem"):
        section["precision_problem"] = doc["precision_problem"]
    if doc.get("bias") is not None:
        points = []
        for row in rows:
            if row.get("set") != "trueness":
                continue
            try:
                known, measured = float(row[f"known {header}"]), float(row[header])
            except (KeyError, ValueError):
                continue
            if math.isfinite(known) and math.isfinite(measured):
                points.append((known, measured - known))
        line = doc.get("linearity") or {}
        section["trueness"] = {
            "references": [
                {
                    "name": b["name"],
                    "n": str(b["n"]),
                    "reference": _num(b["reference"]),
                    "mean": _num(b["mean"]),
                    "bias": _num(b["bias"]),
                    "percent": _pct(b.get("bias_percent_of_reference")),
                    "ci": f"[{_num(b['ci_low'])}, {_num(b['ci_high'])}]",
                    "p": _num(b["p"]),
                    "significant": "yes" if b["significant"] else "no",
                }
                for b in doc["bias"]
            ],
            "confidence": _num(100.0 * (line.get("confidence") or doc["bias"][0]["confidence"]), 3),
            "linearity": None
            if not line
            else {
                "slope": _num(line["slope"]),
                "slope_ci": "[" + ", ".join(_num(v) for v in line["slope_ci"]) + "]",
                "intercept": _num(line["intercept"]),
                "intercept_ci": "[" + ", ".join(_num(v) for v in line["intercept_ci"]) + "]",
                "r_squared": _num(line["r_squared"]),
                "n": str(line["n"]),
            },
            "linearity_problem": doc.get("linearity_problem", ""),
            "plot": _uri(_bias_plot(doc, points, unit)),
        }
    elif doc.get("trueness_problem"):
        section["trueness_problem"] = doc["trueness_problem"]
    return section


def _robustness(doc: dict[str, Any] | None) -> dict[str, Any] | None:
    if doc is None:
        return None
    rows = []
    for parameter, move in doc["parameters"].items():
        changes = []
        for value, change in move["changes"].items():
            pct = change.get("percent_of_tolerance")
            changes.append(
                {
                    "value": value,
                    "change": _num(change.get("change_per_step")) + _unit(change.get("unit", "-")),
                    "percent": _pct(None if pct is None else abs(pct)),
                }
            )
        rows.append(
            {
                "parameter": parameter,
                "move": move["move"],
                "range": [move["minus"]["value"], move["baseline"], move["plus"]["value"]],
                "changes": changes,
                "flips": [f["image"] for f in move["flips"]],
                "incomplete": move["incomplete_images"],
            }
        )
    return {"images": doc["images"], "rows": rows}


@functools.cache
def _environment() -> jinja2.Environment:
    """The templates' environment: every value escaped, an unknown name an error."""
    import jinja2  # only when a report is made

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


def build_study_report(study_dir: Path) -> bytes:
    """The report of the study folder ``study_dir`` as UTF-8 HTML bytes.

    Raises
    ------
    ReportError
        When the folder has no ``validation.json`` or a file cannot be read.
    """
    folder = RunFolder(Path(study_dir), error=ReportError)
    if not folder.exists(VALIDATION_FILE):
        raise ReportError(f"{study_dir}: not a study folder (no {VALIDATION_FILE})")
    doc = folder.json(VALIDATION_FILE)
    header, body = folder.csv(MEASUREMENTS_FILE)
    rows = [dict(zip(header, row, strict=False)) for row in body]
    started = next(
        (e.get("time_utc", "") for e in folder.ledger_events() if e.get("type") == "run-start"), ""
    )
    study, method = doc["study"], doc["method"]
    verdict = doc["verdict"]
    page = _environment().get_template("study.html.j2")
    text = page.render(
        title=f"{study['name']} r{study['revision']} validation study",
        study=study,
        method=method,
        started=started,
        verdict=verdict,
        verdict_word=VERDICT_MARKS.get(verdict, verdict),
        images=doc["images"],
        incomplete=sorted(doc["images"]["incomplete"].items()),
        design=doc.get("design", {}),
        criteria=_criteria(doc),
        values=[_value_section(n, v, rows) for n, v in doc["values"].items()],
        robustness=_robustness(doc.get("robustness")),
        rules=doc.get("rules", ""),
        caution=doc.get("caution") or CAUTION,
        version=__version__,
    )
    return text.encode("utf-8")


def write_study_report(study_dir: Path) -> str:
    """Write ``report.html`` into the study folder (a new file, atomically); return its name."""
    study_dir = Path(study_dir)
    write_bytes(study_dir / REPORT_FILE, build_study_report(study_dir))
    return REPORT_FILE
