"""Commands on methods: ``check``, ``steps``, ``schema``.

Each is a thin shell over :mod:`lotproof.runner.recipe` and the step registry.
"""

from __future__ import annotations

import difflib
from pathlib import Path

import click
from rich.table import Table as RichTable
from rich.text import Text

from lotproof.runner.cli.console import emit_json, fail_recipe, stderr, stdout
from lotproof.runner.errors import EXIT_INVALID, RecipeError
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.recipe.schema import param_rows, schema_text, takes_text
from lotproof.runner.record.limits import bound_text
from lotproof.steps import REGISTRY

__all__ = ["check", "schema", "steps_command"]


# ---------------------------------------------------------------- check


@click.command()
@click.argument("recipe", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def check(recipe: Path, as_json: bool) -> None:
    """Check RECIPE completely and show its step graph; exit 2 on any problem."""
    try:
        checked = load_recipe(recipe)
    except RecipeError as err:
        fail_recipe(err, as_json)
        return
    if as_json:
        emit_json(
            {
                "ok": True,
                "method": checked.name,
                "revision": checked.revision,
                "recipe_sha256": checked.sha256,
                "run_order": list(checked.order),
                "not_run": list(checked.unused),
                "steps": {
                    n: {"apply": s.kind, "to": list(s.to), "gives": checked.kinds.get(n)}
                    for n, s in checked.steps.items()
                },
                "limits": {
                    n: {
                        "value": f"{lim.step}.{lim.value}",
                        "unit": lim.unit,
                        "over": lim.over,
                        "min": lim.low,
                        "max": lim.high,
                    }
                    for n, lim in checked.limits.items()
                },
            }
        )
        return
    console = stdout()
    console.print(Text(f"{checked.path}: {checked.label} — {checked.summary}", style="bold"))
    pixel = "from each image's calibration" if checked.size_from_image else checked.size_text
    what = "voxel size (x, y, z)" if getattr(checked, "voxel_size", None) else "pixel size"
    console.print(f"{what}: {pixel}")
    graph = RichTable(title="step graph, in run order", title_justify="left")
    for column in ("#", "step", "apply", "to", "gives", "parameters"):
        graph.add_column(column)
    for name, pattern in checked.inputs.items():
        graph.add_row("in", name, "input", Text(pattern), "image", "")
    for i, name in enumerate(checked.order, 1):
        step = checked.steps[name]
        params = ", ".join(
            f"{k}={v}" for k, v in step.params.model_dump(mode="json", exclude_unset=True).items()
        )
        gives = checked.kinds.get(name, "?") + (" (kept)" if step.keep else "")
        graph.add_row(str(i), name, step.kind, ", ".join(step.to), gives, Text(params))
    console.print(graph)
    if checked.unused:
        console.print(
            Text(
                "not run (no limit, measurement or keep needs them): " + ", ".join(checked.unused),
                style="yellow",
            )
        )
    if checked.limits:
        limits = RichTable(title="limits", title_justify="left")
        for column in ("limit", "value", "unit", "over", "bound (inclusive)"):
            limits.add_column(column)
        for name, lim in checked.limits.items():
            bound = bound_text(lim.low, lim.high, lim.unit)
            limits.add_row(name, f"{lim.step}.{lim.value}", lim.unit, lim.over, bound)
        console.print(limits)
    n_kinds = len({s.kind for s in checked.steps.values()})
    console.print(f"ok: {len(checked.steps)} steps of {n_kinds} kinds ({len(REGISTRY)} known)")


# ---------------------------------------------------------------- steps


@click.command("steps")
@click.argument("kind", required=False)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def steps_command(kind: str | None, as_json: bool) -> None:
    """List the step kinds, or show one KIND's parameters, data and values."""
    if kind is not None and kind not in REGISTRY:
        close = difflib.get_close_matches(kind, list(REGISTRY), n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        stderr().print(Text(f"unknown step kind {kind!r}{hint}"))
        raise SystemExit(EXIT_INVALID)
    kinds = [REGISTRY[kind]] if kind else [REGISTRY[k] for k in sorted(REGISTRY)]

    if as_json:
        emit_json(
            {
                k.name: {
                    "summary": k.summary,
                    "version": k.version,
                    "takes": [sorted(t) for t in k.takes],
                    "variadic": k.variadic,
                    "gives": k.gives,
                    "dimensions": sorted(k.ndims),
                    "values": {
                        name: {"unit": unit, "definition": k.definitions.get(name, "")}
                        for name, unit in k.values.items()
                    },
                    "columns": {
                        name: {"unit": u, "definition": d} for name, (u, d) in k.columns.items()
                    },
                    "parameters": [
                        {"name": n, "type": t, "default": d, "description": desc}
                        for n, t, d, desc in param_rows(k)
                    ],
                }
                for k in kinds
            }
        )
        return
    console = stdout()
    if kind is None:
        table = RichTable(title="step kinds", title_justify="left")
        for column in ("kind", "takes", "gives", "does"):
            table.add_column(column)
        for k in kinds:
            table.add_row(k.name, takes_text(k), k.gives, k.summary)
        console.print(table)
        console.print("`lotproof steps KIND` shows a kind's parameters.")
        return
    k = kinds[0]
    console.print(Text(f"{k.name} (version {k.version}): {k.summary}", style="bold"))
    gives = "same kind as its input" if k.gives == "same" else k.gives
    dims = ", ".join(f"{d}-D" for d in sorted(k.ndims))
    console.print(f"takes: {takes_text(k)}   gives: {gives}   works on: {dims}")
    params = RichTable(title="parameters", title_justify="left")
    for column in ("parameter", "type", "default", "description"):
        params.add_column(column)
    for row in param_rows(k):
        params.add_row(*(Text(c) for c in row))
    params.add_row("keep", "true/false", "false", "save this step's result in the run folder")
    console.print(params)
    if k.values:
        values = RichTable(title="values (for limits: STEP.NAME)", title_justify="left")
        values.add_column("value")
        values.add_column("unit")
        values.add_column("definition")
        for name, unit in k.values.items():
            values.add_row(name, unit, Text(k.definitions.get(name, "")))
        console.print(values)
    if k.columns:
        columns = RichTable(title="table columns (objects.csv)", title_justify="left")
        columns.add_column("column")
        columns.add_column("unit")
        columns.add_column("definition")
        for name, (unit, text) in k.columns.items():
            columns.add_row(name, unit, Text(text))
        console.print(columns)


# ---------------------------------------------------------------- schema


@click.command()
def schema() -> None:
    """Print the recipe's JSON Schema (draft-07) for editors."""
    click.echo(schema_text(), nl=False)
