"""Commands over the catalogue of runs: ``history`` (list, filter, rebuild) and ``trend``.

Thin shells over :func:`lotproof.runner.history.listing.list_runs`,
:func:`lotproof.runner.history.catalogue.rebuild`,
:func:`lotproof.runner.history.trend.lot_trend` and
:func:`lotproof.runner.show.trend.write_trend_page`. ``RUNS`` is a folder of run
folders (``--out`` of ``lotproof run``; default ``runs``): its ``history.sqlite`` is
the catalogue unless ``--db URL`` or ``LOTPROOF_DB`` names another, and
``--rebuild`` reads its run folders.
"""

from __future__ import annotations

import csv
import io
import re
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

import click
from rich import box
from rich.table import Table as RichTable
from rich.text import Text

from lotproof.runner.cli.console import emit_json, mark, stderr, stdout
from lotproof.runner.history.catalogue import (
    Catalogue,
    NoCatalogueError,
    catalogue_url,
    rebuild,
)
from lotproof.runner.history.listing import Listed, csv_rows, list_runs
from lotproof.runner.history.trend import FLAG_CODES, Trend, lot_trend
from lotproof.runner.record.folder import CAUTION
from lotproof.runner.show.trend import write_trend_page

__all__ = ["history", "history_demo", "print_history", "print_trend", "trend"]

_DEFAULT_RUNS = Path("runs")
_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def _moment(text: str | None, *, end_of_day: bool, option: str) -> datetime | None:
    """A date (``2026-12-01``: the whole day) or an ISO time; without a zone, UTC."""
    if text is None:
        return None
    text = text.strip()
    try:
        if _DATE.match(text):
            day = date.fromisoformat(text)
            moment = datetime(day.year, day.month, day.day, tzinfo=UTC)
            return moment + timedelta(days=1, microseconds=-1) if end_of_day else moment
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise click.BadParameter(
            f"{text!r}: write a date (2026-12-01) or a time (2026-12-01T14:30Z)",
            param_hint=option,
        ) from None
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def _url(runs: tuple[Path, ...], db: str | None) -> str:
    return catalogue_url(runs[0] if runs else _DEFAULT_RUNS, db)


def _when(moment: datetime | None) -> str:
    return moment.strftime("%Y-%m-%d %H:%M") if moment is not None else "-"


def _number(value: float | None, unit: str = "-", digits: int = 5) -> str:
    if value is None:
        return "-"
    return f"{value:.{digits}g}" + ("" if unit in ("", "-") else f" {unit}")


# ---------------------------------------------------------------- history


def print_history(listed: list[Listed], catalogue: str) -> None:
    """The lot history as a table on stdout, newest first."""
    console = stdout()
    table = RichTable(
        title=f"runs in {catalogue}", title_justify="left", box=box.SIMPLE_HEAD, show_edge=False
    )
    # the record column only when some run is not intact (altered or unfinished)
    records = any(item.run.status != "intact" for item in listed)
    columns = ["started (UTC)", "lot", "recipe", "verdict"] + (["record"] if records else [])
    for column in [*columns, "key values"]:
        table.add_column(column, no_wrap=column != "key values")
    for item in listed:
        r = item.run
        recipe = r.recipe_name or "?"
        if r.recipe_revision is not None:
            recipe += f" r{r.recipe_revision}"
        values = ", ".join(
            f"{name.partition('.')[2]} {_number(value, unit)}"
            for name, (value, unit, _) in item.key_values.items()
        )
        verdict = mark(r.lot_verdict) if r.lot_verdict else Text("-")
        cells: list[str | Text] = [_when(r.started_utc), r.lot or "-", recipe, verdict]
        if records:
            cells.append(Text(r.status, style="" if r.status == "intact" else "bold red"))
        table.add_row(*cells, values)
    console.print(table)
    n = len(listed)
    console.print(f"{n} run{'s' if n != 1 else ''}, newest first")
    for item in listed:
        if item.run.status != "intact":
            console.print(
                Text(
                    f"{item.run.status}: {item.run.run_dir}: {item.run.problem or ''}",
                    style="yellow",
                )
            )
    console.print(Text(CAUTION, style="dim"))


@click.command("history")
@click.argument("runs", nargs=-1, type=click.Path(file_okay=False, path_type=Path))
@click.option(
    "--db",
    default=None,
    metavar="URL",
    help="the catalogue [default: $LOTPROOF_DB, or history.sqlite in the first RUNS folder]",
)
@click.option(
    "--rebuild",
    "rebuild_runs",
    is_flag=True,
    help="record every run folder in RUNS again (verified), and forget runs gone from there",
)
@click.option("--recipe", default=None, metavar="NAME", help="only runs of this recipe")
@click.option(
    "--revision", type=click.IntRange(min=1), default=None, help="only this recipe revision"
)
@click.option("--lot", default=None, metavar="GLOB", help="only lots whose name matches")
@click.option("--since", default=None, metavar="DATE", help="only runs started on or after")
@click.option("--until", default=None, metavar="DATE", help="only runs started on or before")
@click.option(
    "--verdict",
    type=click.Choice(["pass", "fail", "incomplete"]),
    default=None,
    help="only runs with this lot verdict",
)
@click.option("--json", "as_json", is_flag=True, help="a JSON list of runs on stdout")
@click.option("--csv", "as_csv", is_flag=True, help="CSV on stdout, one row per run")
def history(
    runs: tuple[Path, ...],
    db: str | None,
    rebuild_runs: bool,
    recipe: str | None,
    revision: int | None,
    lot: str | None,
    since: str | None,
    until: str | None,
    verdict: str | None,
    as_json: bool,
    as_csv: bool,
) -> None:
    """List the runs in the catalogue of RUNS, newest first (or rebuild it with --rebuild).

    RUNS is a folder of run folders (default: runs). Dates are UTC; a date alone
    means the whole day. Exit 0; 2 for bad options or a missing catalogue; 3 when the
    catalogue cannot be read.
    """
    if as_json and as_csv:
        raise click.UsageError("give --json or --csv, not both")
    url = _url(runs, db)
    if rebuild_runs:
        folders = runs or (_DEFAULT_RUNS,)
        for folder in folders:  # before the catalogue (which may live there) is made
            if not folder.is_dir():
                raise NoCatalogueError(f"{folder}: not a folder of run folders")
        with Catalogue(url) as catalogue:
            report = rebuild(catalogue, folders)
        if as_json:
            emit_json(
                {
                    "catalogue": catalogue.shown,
                    "recorded": [
                        {
                            "run": r.run_name,
                            "run_dir": r.run_dir,
                            "status": r.status,
                            "problem": r.problem,
                        }
                        for r in report.recorded
                    ],
                    "removed": report.removed,
                    "counts": report.counts(),
                }
            )
            return
        console = stdout()
        counts = ", ".join(f"{n} {status}" for status, n in sorted(report.counts().items()))
        console.print(
            f"rebuilt {catalogue.shown} from {', '.join(str(f) for f in folders)}: "
            f"{len(report.recorded)} runs ({counts or 'none'})"
            + (f", {len(report.removed)} gone from there and forgotten" if report.removed else "")
        )
        for record in report.recorded:
            if record.status != "intact":
                console.print(
                    Text(
                        f"{record.status}: {record.run_dir}: {record.problem or ''}", style="yellow"
                    )
                )
        return
    start = _moment(since, end_of_day=False, option="--since")
    end = _moment(until, end_of_day=True, option="--until")
    with Catalogue(url, must_exist=True) as catalogue:
        listed = list_runs(
            catalogue,
            recipe=recipe,
            revision=revision,
            lot=lot,
            since=start,
            until=end,
            verdict=verdict,
        )
    if as_json:
        emit_json([item.as_dict() for item in listed])
    elif as_csv:
        buffer = io.StringIO()
        csv.writer(buffer, lineterminator="\n").writerows(csv_rows(listed))
        click.echo(buffer.getvalue(), nl=False)
    else:
        print_history(listed, catalogue.shown)


# ---------------------------------------------------------------- trend


def print_trend(result: Trend) -> None:
    """The trend as text on stdout: points, limits, capability, flags, what was left out."""
    console = stdout()
    unit = "" if result.unit in ("", "-") else f" [{result.unit}]"
    console.print(
        Text(
            f"{result.recipe}: {result.value}{unit} across {len(result.points)} lots "
            f"(each point: the lot's mean over its analysed images; baseline: {result.baseline_rule})",
            style="bold",
        )
    )
    table = RichTable(title="points", title_justify="left", box=box.SIMPLE_HEAD, show_edge=False)
    for column in ("#", "lot", "started (UTC)", "rev.", "value", "n", "MR", "flags"):
        table.add_column(
            column,
            justify="right" if column in ("#", "value", "n", "MR") else "left",
            no_wrap=column != "flags",
        )
    for p in result.points:
        table.add_row(
            str(p.index),
            p.lot,
            _when(p.time),
            f"r{p.revision}" if p.revision is not None else "-",
            _number(p.value),
            str(p.n_images),
            _number(p.mr, digits=4),
            Text(" ".join(p.flags), style="bold red")
            if p.flags
            else Text("baseline" if p.baseline else "", style="dim"),
        )
    console.print(table)
    for s in result.segments:
        lim, ind, spec = s.limits, s.indices, s.spec
        revisions = ", ".join(f"r{r}" for r in s.revisions if r is not None)
        console.print(
            Text(
                f"segment {s.index} ({revisions}, points {s.points[0].index}-{s.points[-1].index}, "
                f"baseline {len(s.baseline_points)} lots):",
                style="bold",
            )
        )
        if lim is None:
            console.print("  no control limits (fewer than 2 baseline lots)")
        else:
            console.print(
                f"  I chart: centre {_number(lim.center)}, LCL {_number(lim.lcl)}, "
                f"UCL {_number(lim.ucl)}; MR chart: MR-bar {_number(lim.mr_bar)}, "
                f"UCL {_number(lim.mr_ucl)}"
            )
            console.print(
                f"  sigma_within {_number(lim.sigma_within)} (MR-bar / 1.128), "
                f"sigma_overall {_number(s.sigma_overall)} (n - 1)"
            )
        if spec is None:
            console.print("  capability: the recipe has no limit on this value")
        elif ind is not None:

            def idx(value: float | None) -> str:
                return "-" if value is None else f"{value:.2f}"

            console.print(
                f"  capability against {spec.name} ({spec.over}, {spec.bound}): "
                f"Cp {idx(ind.cp)}, Cpk {idx(ind.cpk)}, Pp {idx(ind.pp)}, Ppk {idx(ind.ppk)}"
                + (" (indicative: fewer than 20 baseline lots)" if s.indicative else "")
            )
    flagged = result.flagged()
    if flagged:
        console.print(Text("flagged points:", style="bold"))
        for p in flagged:
            rules = "; ".join(f"{code} {FLAG_CODES[code]}" for code in p.flags)
            console.print(Text(f"  {p.index} lot {p.lot} ({p.run_name}): {rules}", style="red"))
    else:
        console.print("no point is flagged")
    for e in result.excluded:
        console.print(Text(f"left out: {e.run_name} (lot {e.lot or '-'}): {e.why}", style="yellow"))
    for note in result.notes:
        console.print(f"note: {note}")
    console.print(Text(CAUTION, style="dim"))


@click.command("trend")
@click.argument("runs", nargs=-1, type=click.Path(file_okay=False, path_type=Path))
@click.option("--recipe", required=True, metavar="NAME", help="the recipe whose runs are charted")
@click.option("--value", required=True, metavar="STEP.NAME", help="the per-image value to chart")
@click.option(
    "--db",
    default=None,
    metavar="URL",
    help="the catalogue [default: $LOTPROOF_DB, or history.sqlite in the first RUNS folder]",
)
@click.option(
    "--baseline",
    type=click.IntRange(min=2),
    default=None,
    help="baseline: the first N lots of each revision [default: 20, or all if fewer]",
)
@click.option(
    "--baseline-until", default=None, metavar="DATE", help="baseline: the lots run up to DATE"
)
@click.option("--across-revisions", is_flag=True, help="one baseline across recipe revisions")
@click.option(
    "--limit",
    "limit_name",
    default=None,
    metavar="NAME",
    help="the recipe limit capability is judged against [default: a lot-mean limit, then each]",
)
@click.option("--lot", default=None, metavar="GLOB", help="only lots whose name matches")
@click.option(
    "--html",
    "html_file",
    type=click.Path(dir_okay=False, path_type=Path),
    default=None,
    help="also write a self-contained page with the charts here",
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def trend(
    runs: tuple[Path, ...],
    recipe: str,
    value: str,
    db: str | None,
    baseline: int | None,
    baseline_until: str | None,
    across_revisions: bool,
    limit_name: str | None,
    lot: str | None,
    html_file: Path | None,
    as_json: bool,
) -> None:
    """Chart a value across the lots of a recipe: I-MR (and x-bar/s) charts, zone rules, capability.

    One point per lot (the mean over its analysed images; the latest intact run of
    a lot counts). Exit 0 whatever the rules flag; 2 for bad options (an unknown
    recipe or value); 3 when no intact run gives the value.
    """
    if baseline is not None and baseline_until is not None:
        raise click.UsageError("give --baseline or --baseline-until, not both")
    until = _moment(baseline_until, end_of_day=True, option="--baseline-until")
    with Catalogue(_url(runs, db), must_exist=True) as catalogue:
        result = lot_trend(
            catalogue,
            recipe,
            value,
            baseline=baseline,
            baseline_until=until,
            across_revisions=across_revisions,
            limit=limit_name,
            lot=lot,
        )
        shown = catalogue.shown
    if html_file is not None:
        write_trend_page(result, html_file, catalogue=shown)
    if as_json:
        document = result.as_json()
        if html_file is not None:
            document["html"] = str(html_file)
        emit_json(document)
        return
    print_trend(result)
    if html_file is not None:
        stderr().print(f"trend page: {html_file}")


# ---------------------------------------------------------------- the history demo


def history_demo(out: Path, as_json: bool) -> None:
    """``lotproof demo history``: make and run the lots, then show ``history`` and ``trend``."""
    from lotproof.runner.jobs.history_demo import TREND_VALUE, run_history_demo

    err = stderr()

    def done(summary: Any) -> None:
        if not as_json:
            err.print(
                Text(f"{summary.lot.name} r{summary.recipe.revision}: ")
                + mark(summary.verdicts.lot)
                + Text(f"  {summary.run_dir.name}")
            )
            for note in summary.notes:
                err.print(Text(f"note: {note}", style="yellow"))

    demo = run_history_demo(out, on_run=done)
    assert demo.trend is not None
    if as_json:
        emit_json(
            {
                "runs": [summary.as_json() for summary in demo.runs],
                "catalogue": demo.catalogue,
                "trend": demo.trend.as_json(),
                "html": str(demo.page),
            }
        )
        return
    recipe = demo.trend.recipe
    with Catalogue(catalogue_url(out), must_exist=True) as catalogue:
        listed = list_runs(catalogue, recipe=recipe)
    console = stdout()
    console.print(Text(f"$ lotproof history {out} --recipe {recipe}", style="bold"))
    print_history(listed, demo.catalogue)
    console.print(
        Text(f"$ lotproof trend {out} --recipe {recipe} --value {TREND_VALUE}", style="bold")
    )
    print_trend(demo.trend)
    err.print(f"trend page: {demo.page}")
