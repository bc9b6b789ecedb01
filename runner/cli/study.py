"""``lotproof validate PLAN``: a validation study, a thin shell over
:func:`lotproof.runner.study.run.run_study`.

Results on stdout (the criteria, the key numbers of every studied value, the
robustness table, the verdict, the study folder and its seal), progress on stderr.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click
from rich.table import Table as RichTable
from rich.text import Text

from lotproof.runner.cli.console import emit_json, fail_recipe, mark, open_store, stderr, stdout
from lotproof.runner.evaluate.cache import Store
from lotproof.runner.evaluate.image import ImageResult
from lotproof.runner.record.folder import CAUTION
from lotproof.runner.study.plan import PlanError, load_plan
from lotproof.runner.study.run import StudySummary, run_study

__all__ = ["validate", "validate_plan"]


def _number(value: Any, digits: int = 4) -> str:
    if value is None:
        return "-"
    if isinstance(value, int) and not isinstance(value, bool):
        return str(value)
    return f"{float(value):.{digits}g}"


def _print_summary(summary: StudySummary) -> None:
    console = stdout()
    doc = summary.validation
    plan = summary.plan
    console.print(
        Text(f"study {plan.label} of {plan.recipe.label}", style="bold")
        + Text(
            f" — {doc['images']['precision']} precision, {doc['images']['trueness']} "
            "trueness images"
        )
    )
    for name, value in doc["values"].items():
        unit = "" if value["unit"] == "-" else f" {value['unit']}"
        table = RichTable(
            title=f"{name}{f' [{unit.strip()}]' if unit else ''}", title_justify="left"
        )
        table.add_column("")
        table.add_column("value", justify="right")
        if value.get("grr_sd") is not None:
            table.add_row("repeatability sd (EV)", _number(value["repeatability_sd"]) + unit)
            table.add_row("reproducibility sd (AV)", _number(value["reproducibility_sd"]) + unit)
            table.add_row("GRR sd", _number(value["grr_sd"]) + unit)
            table.add_row("part sd (PV)", _number(value["part_sd"]) + unit)
            table.add_row("%GRR of tolerance", _number(value["grr_percent_tolerance"], 3) + " %")
            table.add_row("%GRR of total variation", _number(value["grr_percent_total"], 3) + " %")
            table.add_row("ndc", _number(value["ndc"]))
            table.add_row("interaction", value["interaction"]["rule"])
        for bias in value.get("bias") or []:
            table.add_row(
                f"bias at {bias['name']} ({_number(bias['reference'])})",
                f"{_number(bias['bias'])}{unit} [{_number(bias['ci_low'])}, "
                f"{_number(bias['ci_high'])}]" + (" significant" if bias["significant"] else ""),
            )
        if value.get("linearity"):
            line = value["linearity"]
            table.add_row(
                "linearity slope",
                f"{_number(line['slope'])} [{_number(line['slope_ci'][0])}, "
                f"{_number(line['slope_ci'][1])}], R² {_number(line['r_squared'], 3)}",
            )
        console.print(table)
    robustness = doc.get("robustness")
    if robustness:
        table = RichTable(title="robustness", title_justify="left")
        for column in ("parameter", "step", "change per step", "flips"):
            table.add_column(column, overflow="fold")
        for parameter, move in robustness["parameters"].items():
            changes = "; ".join(
                f"{value}: {_number(c['change_per_step'])}"
                + (
                    ""
                    if c.get("percent_of_tolerance") is None
                    else f" ({_number(abs(c['percent_of_tolerance']), 3)} % of tolerance)"
                )
                for value, c in move["changes"].items()
            )
            flips = [f["image"] for f in move["flips"]]
            table.add_row(
                parameter,
                move["move"],
                changes,
                f"{len(flips)}" + (f": {', '.join(flips)}" if flips else ""),
            )
        console.print(table)
    if doc["criteria"]:
        table = RichTable(title="criteria", title_justify="left")
        for column in ("criterion", "rule", "verdict"):
            table.add_column(column)
        for name, entry in doc["criteria"].items():
            table.add_row(name, entry["rule"], mark(entry["verdict"]))
        console.print(table)
    for image, reason in doc["images"]["incomplete"].items():
        console.print(Text(f"incomplete: {image}: {reason}", style="yellow"))
    computed = sum(c["computed"] for c in summary.steps.values())
    reused = sum(c["reused"] for c in summary.steps.values())
    console.print(
        f"(image, step) results: {computed} computed, {reused} reused "
        f"(cache: {summary.cache_location})"
    )
    console.print(Text("study verdict: ", style="bold") + mark(summary.verdict))
    console.print(f"study folder: {summary.study_dir}")
    console.print(f"seal: {summary.seal}")
    console.print(Text(CAUTION, style="dim"))


def validate_plan(
    plan: Path,
    out: Path,
    as_json: bool,
    quiet: bool,
    *,
    jobs: int = 1,
    cache: Path | None = None,
    no_cache: bool = False,
    store: Store | None = None,
) -> int:
    """Check and run ``plan``, print what it found; return the exit code."""
    try:
        checked = load_plan(plan)
    except PlanError as err:
        fail_recipe(err, as_json)
    store = store if store is not None else open_store(cache, no_cache)
    err_console = stderr()
    seen: dict[str, int] = {}

    def on_image(set_name: str, variant: str, result: ImageResult) -> None:
        if quiet:
            return
        if variant not in seen:
            err_console.print(f"measuring with {variant} recipe …")
        seen[variant] = seen.get(variant, 0) + 1
        if result.status != "ok":
            err_console.print(
                Text(
                    f"incomplete: {set_name}/{result.id} ({variant}): {result.reason}",
                    style="yellow",
                )
            )

    if not quiet:
        err_console.print(f"{checked.label}: cache {store.location}")
    summary = run_study(checked, out, store=store, jobs=jobs, on_image=on_image)
    if as_json:
        emit_json(summary.as_json())
    else:
        _print_summary(summary)
    return summary.exit_code


@click.command("validate")
@click.argument("plan", type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "--out",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("studies"),
    show_default=True,
    help="folder that receives the new study folder",
)
@click.option(
    "--jobs",
    "-j",
    type=click.IntRange(min=1),
    default=1,
    show_default=True,
    help="images analysed at once, each in its own process",
)
@click.option(
    "--cache",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]",
)
@click.option(
    "--no-cache",
    is_flag=True,
    help="compute everything, store nothing (a robustness sweep then recomputes every step)",
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
@click.option("--quiet", "-q", is_flag=True, help="no progress or messages on stderr")
def validate(
    plan: Path,
    out: Path,
    jobs: int,
    cache: Path | None,
    no_cache: bool,
    as_json: bool,
    quiet: bool,
) -> None:
    """Run the validation PLAN: precision, trueness and robustness of its recipe.

    Writes a new, sealed study folder under --out (`lotproof verify` checks it).
    Exit 0 when every criterion passed, 1 when one failed, 2 when the plan is
    invalid (nothing ran), 3 when an image is missing or could not be analysed.
    """
    raise SystemExit(
        validate_plan(plan, out, as_json, quiet, jobs=jobs, cache=cache, no_cache=no_cache)
    )
