"""The trend page: one self-contained HTML file of a value across lots (``trend --html``).

Built from a :class:`~lotproof.runner.history.trend.Trend`: the individuals and
moving-range charts (and the x-bar and s charts when every lot has at least two
images), drawn with matplotlib as SVG and embedded as ``data:`` URIs; the flagged
points named with their rules; the capability table; the lots, each linked to its
run's report when that file can be reached from where the page is written; what
was left out and why; and the caution that the page supports, and does not
replace, the laboratory's validated procedures.

The markup comes from the jinja2 template ``templates/trend.html.j2`` with
autoescaping on. Nothing refers to the network; the page prints to A4. For the same
trend and the same place it is byte-identical: no clock is read, and the plots use
matplotlib's default style with fixed SVG metadata and hash salt.
"""

from __future__ import annotations

import base64
import io
import math
import os
from pathlib import Path
from typing import Any
from urllib.parse import quote

import jinja2

from lotproof.runner import __version__
from lotproof.runner.errors import EXIT_BAD_INPUT, LotproofError
from lotproof.runner.files import write_file
from lotproof.runner.history.spc import ZONE_RULES
from lotproof.runner.history.trend import FLAG_CODES, Segment, Trend
from lotproof.runner.record.folder import CAUTION
from lotproof.runner.record.layout import REPORT_FILE

__all__ = ["TEMPLATE", "TrendPageError", "build_trend_page", "write_trend_page"]

#: the template file, beside this module
TEMPLATE = "trend.html.j2"

_TEMPLATES = Path(__file__).resolve().parent / "templates"

#: colours of the charts: ink, limits, flagged points, baseline shading
_INK, _LIMIT, _FLAG, _SHADE, _SPEC = "#1b1b1b", "#505050", "#b00020", "#ececea", "#2f5d8a"


class TrendPageError(LotproofError, OSError):
    """The page cannot be written (exit 3)."""

    exit_code = EXIT_BAD_INPUT


def _num(value: Any, digits: int = 5) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, int):
        return str(value)
    return f"{value:.{digits}g}"


def _index(value: Any) -> str:
    return "–" if value is None else f"{value:.2f}"


def _time(moment: Any) -> str:
    return moment.strftime("%Y-%m-%d %H:%M UTC") if moment is not None else "–"


def _unit(unit: str) -> str:
    return "" if unit in ("", "-") else f" {unit}"


def _svg_uri(data: bytes) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(data).decode("ascii")


# ---------------------------------------------------------------- charts


def _figure(height: float, rows: int) -> Any:
    import matplotlib
    from matplotlib.backends.backend_svg import FigureCanvasSVG
    from matplotlib.figure import Figure

    matplotlib.rcParams.update(matplotlib.rcParamsDefault)
    matplotlib.rcParams.update(
        {
            "svg.hashsalt": "lotproof-trend",
            "svg.fonttype": "path",
            "font.size": 8.0,
            "axes.linewidth": 0.8,
        }
    )
    fig = Figure(figsize=(7.2, height))
    FigureCanvasSVG(fig)
    axes = fig.subplots(rows, 1, sharex=True)
    return fig, axes


def _svg(fig: Any) -> bytes:
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    return buffer.getvalue()


def _segment_lines(axes: Any, segment: Segment, lines: list[tuple[float | None, str, str]]) -> None:
    """Horizontal lines over a segment's points: (level, style, label)."""
    left, right = segment.points[0].index - 0.5, segment.points[-1].index + 0.5
    for level, style, label in lines:
        if level is None or not math.isfinite(level):
            continue
        axes.hlines(level, left, right, colors=_LIMIT, linestyles=style, linewidth=0.9)
        axes.text(right, level, f" {label}", va="center", ha="left", fontsize=6.5, color=_LIMIT)


def _decorate(axes: Any, trend: Trend) -> None:
    for segment in trend.segments:
        if segment.baseline_points:
            axes.axvspan(
                segment.baseline_points[0].index - 0.5,
                segment.baseline_points[-1].index + 0.5,
                color=_SHADE,
                zorder=0,
                linewidth=0,
            )
    for segment in trend.segments[1:]:
        first = segment.points[0]
        axes.axvline(first.index - 0.5, color=_INK, linestyle=(0, (2, 2)), linewidth=0.9)
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)


def _revision_labels(axes: Any, trend: Trend) -> None:
    for segment in trend.segments:
        label = "/".join(f"r{r}" for r in segment.revisions if r is not None)
        axes.text(
            segment.points[0].index - 0.4,
            1.0,
            label,
            transform=axes.get_xaxis_transform(),
            va="bottom",
            ha="left",
            fontsize=7,
            color=_INK,
        )


def _individuals_chart(trend: Trend) -> bytes:
    """The individuals chart over the moving-range chart, with limits per segment."""
    fig, (top, bottom) = _figure(4.8, 2)
    x = [p.index for p in trend.points]
    for segment in trend.segments:
        xs = [p.index for p in segment.points]
        top.plot(
            xs,
            [p.value for p in segment.points],
            color=_INK,
            linewidth=0.9,
            marker="o",
            markersize=3,
        )
        mr = [(p.index, p.mr) for p in segment.points if p.mr is not None]
        if mr:
            bottom.plot(*zip(*mr), color=_INK, linewidth=0.9, marker="o", markersize=3)
        lim = segment.limits
        if lim is not None:
            _segment_lines(
                top,
                segment,
                [(lim.ucl, "--", "UCL"), (lim.center, "-", "CL"), (lim.lcl, "--", "LCL")],
            )
            _segment_lines(
                bottom, segment, [(lim.mr_ucl, "--", "UCL"), (lim.mr_bar, "-", "MR-bar")]
            )
    # the y range is the data's and the control limits'; a specification limit far
    # outside it would flatten the chart, so it is named at the edge instead
    levels = [p.value for p in trend.points] + [
        level
        for s in trend.segments
        if s.limits is not None
        for level in (s.limits.ucl, s.limits.lcl)
    ]
    low, high = min(levels), max(levels)
    pad = (high - low) * 0.08 or abs(high) * 0.05 or 1.0
    low, high = low - pad, high + pad
    for segment in trend.segments:
        spec = segment.spec
        if spec is None:
            continue
        left, right = segment.points[0].index - 0.5, segment.points[-1].index + 0.5
        for level, label in ((spec.low, "LSL"), (spec.high, "USL")):
            if level is None:
                continue
            if low <= level <= high:
                top.hlines(level, left, right, colors=_SPEC, linestyles=":", linewidth=1.1)
                top.text(
                    left + 0.1,
                    level,
                    f"{label} ",
                    va="bottom",
                    ha="left",
                    fontsize=6.5,
                    color=_SPEC,
                )
            else:
                where = high if level > high else low
                top.text(
                    left + 0.1,
                    where,
                    f"{label} {_num(level, 4)} {'above' if level > high else 'below'}",
                    va="top" if level > high else "bottom",
                    ha="left",
                    fontsize=6.5,
                    color=_SPEC,
                )
    top.set_ylim(low, high)
    flagged = [p for p in trend.points if p.flags]
    if flagged:
        top.plot(
            [p.index for p in flagged],
            [p.value for p in flagged],
            linestyle="none",
            marker="o",
            markersize=6,
            markerfacecolor="none",
            markeredgecolor=_FLAG,
            markeredgewidth=1.4,
        )
        for p in flagged:
            top.annotate(
                str(p.index),
                (p.index, p.value),
                textcoords="offset points",
                xytext=(0, 6),
                ha="center",
                fontsize=6.5,
                color=_FLAG,
            )
    for axes in (top, bottom):
        _decorate(axes, trend)
    _revision_labels(top, trend)
    unit = _unit(trend.unit)
    top.set_ylabel(f"lot mean{unit}")
    top.set_title(f"individuals: {trend.value}", fontsize=8.5, loc="left", pad=12)
    bottom.set_ylabel(f"moving range{unit}")
    bottom.set_xlabel("lot, in the order first run (shaded: baseline)")
    bottom.set_xlim(min(x) - 0.7, max(x) + 1.8)
    bottom.set_xticks(x if len(x) <= 40 else x[:: max(1, len(x) // 20)])
    bottom.tick_params(axis="x", labelsize=6.5)
    bottom.set_ylim(bottom=0)
    return _svg(fig)


def _subgroup_chart(trend: Trend) -> bytes:
    """The x-bar chart over the s chart; limits step with each lot's number of images."""
    fig, (top, bottom) = _figure(4.4, 2)
    for segment in trend.segments:
        pts = [p for p in segment.points if p.xbar_limits is not None and p.s_limits is not None]
        if not pts:
            continue
        xs = [p.index for p in pts]
        top.plot(xs, [p.value for p in pts], color=_INK, linewidth=0.9, marker="o", markersize=3)
        bottom.plot(xs, [p.sd for p in pts], color=_INK, linewidth=0.9, marker="o", markersize=3)
        edges = [x - 0.5 for x in xs] + [xs[-1] + 0.5]
        xbar = [p.xbar_limits for p in pts if p.xbar_limits is not None]
        s_bounds = [p.s_limits for p in pts if p.s_limits is not None]
        for axes, bounds in ((top, xbar), (bottom, s_bounds)):
            for k in (0, 1):
                levels = [b[k] for b in bounds]
                axes.stairs(
                    levels, edges, baseline=None, color=_LIMIT, linestyle="--", linewidth=0.9
                )
        sub = segment.subgroups
        if sub is not None:
            _segment_lines(top, segment, [(sub.center, "-", "CL")])
            _segment_lines(bottom, segment, [(sub.s_bar, "-", "s-bar")])
        out = [p for p in pts if p.subgroup_flags]
        if out:
            top.plot(
                [p.index for p in out],
                [p.value for p in out],
                linestyle="none",
                marker="s",
                markersize=5,
                markerfacecolor="none",
                markeredgecolor=_FLAG,
            )
    for axes in (top, bottom):
        _decorate(axes, trend)
    _revision_labels(top, trend)
    unit = _unit(trend.unit)
    top.set_ylabel(f"x-bar{unit}")
    top.set_title(
        "x-bar and s: the images of each lot as one subgroup", fontsize=8.5, loc="left", pad=12
    )
    bottom.set_ylabel(f"s{unit}")
    bottom.set_xlabel("lot, in the order first run (shaded: baseline)")
    x = [p.index for p in trend.points]
    bottom.set_xlim(min(x) - 0.7, max(x) + 1.8)
    bottom.set_xticks(x if len(x) <= 40 else x[:: max(1, len(x) // 20)])
    bottom.tick_params(axis="x", labelsize=6.5)
    bottom.set_ylim(bottom=0)
    return _svg(fig)


# ---------------------------------------------------------------- the page


def _report_link(run_dir: str, page: Path) -> str | None:
    """A relative link from the page's folder to the run's report, when the report is there."""
    report = Path(run_dir) / REPORT_FILE
    if not report.is_file():
        return None
    try:
        relative = os.path.relpath(report, page.parent.resolve())
    except ValueError:  # another drive: an absolute file URI
        return report.resolve().as_uri()
    return quote(Path(relative).as_posix())


def _environment() -> jinja2.Environment:
    environment = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(_TEMPLATES)),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    environment.filters["num"] = _num
    environment.filters["index"] = _index
    environment.filters["time"] = _time
    return environment


def build_trend_page(trend: Trend, page: Path, *, catalogue: str) -> bytes:
    """The HTML of the trend page that will be written at ``page`` (links are relative to it).

    Parameters
    ----------
    trend
        The trend to show.
    page
        Where the page will be written: links to the lots' reports start there.
    catalogue
        The catalogue the trend was read from, as shown to people (no password).
    """
    import matplotlib

    with matplotlib.rc_context():
        charts = [
            (
                "individuals and moving range",
                _svg_uri(_individuals_chart(trend)),
                "one point per lot; circled points are flagged by the zone rules or the "
                "moving-range chart.",
            )
        ]
        if trend.has_subgroups:
            charts.append(
                (
                    "x-bar and s",
                    _svg_uri(_subgroup_chart(trend)),
                    "the images of each lot as one subgroup; the limits step with each lot's "
                    "number of images, and squares mark a lot beyond them. These limits come "
                    "from the variation between images within a lot: when lots differ from "
                    "each other more than that, lot means fall outside them while the process "
                    "is stable, and the individuals chart is the one to judge lots by.",
                )
            )
    segments = []
    for segment in trend.segments:
        lim, ind = segment.limits, segment.indices
        segments.append(
            {
                "index": segment.index,
                "revisions": ", ".join(f"r{r}" for r in segment.revisions if r is not None) or "–",
                "points": f"{segment.points[0].index}–{segment.points[-1].index}",
                "baseline": len(segment.baseline_points),
                "center": lim.center if lim else None,
                "ucl": lim.ucl if lim else None,
                "lcl": lim.lcl if lim else None,
                "mr_bar": lim.mr_bar if lim else None,
                "mr_ucl": lim.mr_ucl if lim else None,
                "sigma_within": lim.sigma_within if lim else None,
                "sigma_overall": segment.sigma_overall,
                "limit": segment.spec,
                "cp": ind.cp if ind else None,
                "cpk": ind.cpk if ind else None,
                "pp": ind.pp if ind else None,
                "ppk": ind.ppk if ind else None,
                "indicative": segment.indicative,
            }
        )
    lots: list[dict[str, Any]] = [
        {
            "point": p,
            "link": _report_link(p.run_dir, page),
            "rules": "; ".join(f"{code}: {FLAG_CODES[code]}" for code in p.flags),
        }
        for p in trend.points
    ]
    template = _environment().get_template(TEMPLATE)
    text = template.render(
        trend=trend,
        unit=_unit(trend.unit),
        charts=charts,
        segments=segments,
        lots=lots,
        flagged=[row for row in lots if row["point"].flags],
        rules=ZONE_RULES,
        flag_codes=FLAG_CODES,
        catalogue=catalogue,
        caution=CAUTION,
        version=__version__,
    )
    return text.encode("utf-8")


def write_trend_page(trend: Trend, page: Path, *, catalogue: str) -> Path:
    """Write the trend page to ``page`` (replacing a file there, atomically); return the path."""
    page = Path(page)
    data = build_trend_page(trend, page, catalogue=catalogue)
    try:
        write_file(page, data, replace=True)
    except OSError as err:
        raise TrendPageError(f"{page}: cannot write the trend page ({err.strerror})") from None
    return page
