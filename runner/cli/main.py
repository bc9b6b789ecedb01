"""The ``lotproof`` command line: a thin shell over the runner's functions.

Results go to stdout (tables, or one JSON document with ``--json``); messages and
progress go to stderr. Exit codes are those of :mod:`lotproof.runner.errors`.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Any

import click
from rich.console import Console
from rich.table import Table as RichTable
from rich.text import Text

from lotproof.runner import __version__
from lotproof.runner.errors import (
    EXIT_BAD_INPUT,
    EXIT_INTERRUPTED,
    EXIT_INVALID,
    EXIT_LIMIT_FAILED,
    EXIT_OK,
    LotproofError,
    RecipeError,
)
from lotproof.runner.record.limits import FAIL, INCOMPLETE, PASS, bound_text
from lotproof.runner.record.folder import CAUTION

__all__ = ["main", "cli"]

#: exit code for a bug in lotproof itself (never for bad data)
EXIT_INTERNAL = 70

_MARKS = {PASS: "PASS ✓", FAIL: "FAIL ✗", INCOMPLETE: "INCOMPLETE ?", "-": "-"}
_STYLES = {PASS: "green", FAIL: "bold red", INCOMPLETE: "yellow"}


def _out() -> Console:
    return Console(highlight=False, soft_wrap=True)


def _err() -> Console:
    return Console(stderr=True, highlight=False, soft_wrap=True)


def _mark(verdict: str) -> Text:
    return Text(_MARKS.get(verdict, verdict), style=_STYLES.get(verdict, ""))


def _emit_json(document: Any) -> None:
    click.echo(json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False))


def _fail_recipe(err: RecipeError, as_json: bool) -> None:
    if as_json:
        _emit_json({"ok": False, "problems": [p.as_dict() for p in err.problems]})
    # One problem per line, never wrapped: editors and scripts read FILE:LINE:COL.
    for problem in err.problems:
        click.echo(str(problem), err=True)
    n = len(err.problems)
    click.echo(f"{n} problem{'s' if n != 1 else ''} found; nothing was run.", err=True)
    raise SystemExit(EXIT_INVALID)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="lotproof")
def cli() -> None:
    """Run validated image-analysis recipes on production lots, with limits and records."""


# ---------------------------------------------------------------- check


@cli.command()
@click.argument("recipe", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def check(recipe: Path, as_json: bool) -> None:
    """Check RECIPE completely and show its step graph; exit 2 on any problem."""
    from lotproof.runner.recipe.model import load_recipe
    from lotproof.steps import REGISTRY

    try:
        checked = load_recipe(recipe)
    except RecipeError as err:
        _fail_recipe(err, as_json)
        return
    if as_json:
        _emit_json(
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
                    n: {"value": f"{lim.step}.{lim.value}", "unit": lim.unit, "over": lim.over,
                        "min": lim.low, "max": lim.high}
                    for n, lim in checked.limits.items()
                },
            }
        )
        return
    console = _out()
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


# ---------------------------------------------------------------- run


def _print_summary(summary: Any) -> None:
    console = _out()
    verdicts = summary.verdicts
    console.print(
        Text(
            f"{summary.recipe.label} on {summary.lot} — {len(summary.results)} images",
            style="bold",
        )
    )
    if verdicts.limits:
        table = RichTable(title="limits", title_justify="left")
        for column in ("limit", "value", "over", "bound", "verdict"):
            table.add_column(column)
        for name, lv in verdicts.limits.items():
            if lv.over == "each":
                failing = [i for i, (_, v) in lv.per_image.items() if v == FAIL]
                value = f"{len(failing)} of {len(lv.per_image)} images fail" if failing else "every image"
            else:
                value = f"{lv.value:.6g}" if lv.value is not None else "-"
                value += "" if lv.unit == "-" else f" {lv.unit}"
            table.add_row(name, value, lv.over, lv.bound_text(), _mark(lv.verdict))
        console.print(table)
    images = RichTable(title="images", title_justify="left")
    images.add_column("image")
    images.add_column("verdict")
    shown = [(lim.step, lim.value, lim.unit) for lim in summary.recipe.limits.values()]
    shown = list(dict.fromkeys(shown))[:4]
    for step_name, value_name, unit in shown:
        images.add_column(f"{step_name}.{value_name}" + ("" if unit == "-" else f" [{unit}]"))
    images.add_column("note")
    for r in summary.results:
        cells = [f"{r.values[(s, v)]:.6g}" if (s, v) in r.values else "-" for s, v, _ in shown]
        images.add_row(r.id, _mark(verdicts.image_verdict(r.id)), *cells, Text(r.reason))
    console.print(images)
    console.print(Text("lot verdict: ", style="bold") + _mark(verdicts.lot))
    console.print(f"run folder: {summary.run_dir}")
    console.print(f"seal: {summary.seal}" + (" (signed)" if summary.signed else ""))
    console.print(Text(CAUTION, style="dim"))


def _store(cache: Path | None, no_cache: bool) -> Any:
    from lotproof.runner.evaluate.cache import DiskStore, NullStore, default_cache_dir

    if no_cache:
        return NullStore()
    return DiskStore(cache or default_cache_dir())


def _run(
    recipe: Path,
    lots: tuple[Path, ...],
    out: Path,
    as_json: bool,
    quiet: bool,
    *,
    jobs: int | None = None,
    cache: Path | None = None,
    no_cache: bool = False,
    sign: Path | None = None,
    executor_kind: str = "local",
    scheduler: str | None = None,
    workers: int | None = None,
) -> int:
    from lotproof.runner.recipe.model import load_recipe
    from lotproof.runner.jobs.run import usable_cores

    try:
        checked = load_recipe(recipe)
    except RecipeError as err:
        _fail_recipe(err, as_json)
    from lotproof.runner.lot.choose import ExecutorError, open_executor

    store = _store(cache, no_cache)
    jobs = jobs or usable_cores()
    err_console = _err()
    documents = []
    codes: list[int] = []
    try:
        with open_executor(executor_kind, jobs=jobs, scheduler=scheduler, workers=workers) as executor:
            for lot in lots:
                _run_one(checked, lot, out, as_json, quiet, store, executor, sign, err_console,
                         documents, codes)
    except ExecutorError as err:
        raise click.UsageError(str(err)) from None
    if as_json:
        _emit_json(documents[0] if len(documents) == 1 else documents)
    # the same precedence as one lot's exit code: bad data, then a failed limit
    for code in (EXIT_BAD_INPUT, EXIT_LIMIT_FAILED):
        if code in codes:
            return code
    return EXIT_OK


def _run_one(checked: Any, lot: Path, out: Path, as_json: bool, quiet: bool, store: Any,
             executor: Any, sign: Path | None, err_console: Console,
             documents: list[Any], codes: list[int]) -> None:
    from lotproof.runner.jobs.run import run_lot

    progress = None
    task = None
    counts = {"done": 0, "reused": 0, "steps": 0, "incomplete": 0}
    if not quiet and err_console.is_terminal:
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

        progress = Progress(
            TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
            TextColumn("{task.fields[status]}"), TimeElapsedColumn(),
            console=err_console, transient=True,
        )
        progress.start()

    def started(n: int, lot: Path = lot) -> None:
        nonlocal task
        if progress is not None:
            task = progress.add_task(f"{lot.name}", total=n, status="")
        elif not quiet:
            err_console.print(f"{lot}: {n} images, {executor.description}, cache: {store.location}")

    def done(result: Any) -> None:
        counts["done"] += 1
        counts["steps"] += len(result.steps)
        counts["reused"] += sum(1 for s in result.steps if s.cache != "computed")
        counts["incomplete"] += result.status != "ok"
        if progress is not None and task is not None:
            status = f"{counts['reused']}/{counts['steps']} steps reused"
            if counts["incomplete"]:
                status += f", {counts['incomplete']} incomplete"
            progress.update(task, advance=1, status=status)
        if not quiet:
            for note in result.notes:
                err_console.print(Text(f"note: {note}", style="yellow"))
            if result.status != "ok":
                reason = result.reason
                if not reason.startswith(result.id):
                    reason = f"{result.id}: {reason}"
                err_console.print(Text(f"incomplete: {reason}", style="yellow"))

    try:
        summary = run_lot(checked, lot, out, store=store, executor=executor, sign=sign,
                          on_start=started, on_image=done)
    finally:
        if progress is not None:
            progress.stop()
    if as_json:
        documents.append(summary.as_json())
    else:
        _print_summary(summary)
    codes.append(summary.exit_code)


@cli.command()
@click.argument("recipe", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("lots", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--out", type=click.Path(file_okay=False, path_type=Path), default=Path("runs"),
              show_default=True, help="folder that receives the new run folder")
@click.option("--jobs", "-j", type=click.IntRange(min=1), default=None,
              help="images analysed at once, each in its own process [default: usable cores]")
@click.option("--cache", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]")
@click.option("--no-cache", is_flag=True, help="compute everything, store nothing")
@click.option("--sign", type=click.Path(dir_okay=False, exists=True, path_type=Path), default=None,
              help="Ed25519 private key (from `lotproof keygen`) to sign the run's seal with")
@click.option("--executor", "executor_kind", type=click.Choice(["local", "dask", "dask-local"]),
              default="local", show_default=True,
              help="where images are analysed: this machine, an existing dask scheduler, or a dask "
              "cluster started for the run")
@click.option("--scheduler", default=None, metavar="tcp://HOST:PORT",
              help="the dask scheduler for --executor dask [default: $DASK_SCHEDULER_ADDRESS]")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="worker processes for --executor dask-local [default: usable cores]")
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
@click.option("--quiet", "-q", is_flag=True, help="no progress or messages on stderr")
def run(recipe: Path, lots: tuple[Path, ...], out: Path, jobs: int | None, cache: Path | None,
        no_cache: bool, sign: Path | None, executor_kind: str, scheduler: str | None,
        workers: int | None, as_json: bool, quiet: bool) -> None:
    """Run RECIPE on each LOT folder; write a new run folder per lot under --out.

    Exit 0 when every limit passed, 1 when a limit failed, 3 when an image could not
    be analysed (the lot is incomplete), 2 when the recipe is invalid.
    """
    raise SystemExit(
        _run(recipe, lots, out, as_json, quiet, jobs=jobs, cache=cache, no_cache=no_cache, sign=sign,
             executor_kind=executor_kind, scheduler=scheduler, workers=workers)
    )


# ---------------------------------------------------------------- rerun


@cli.command()
@click.argument("run_dir", metavar="RUN", type=click.Path(file_okay=False, exists=True, path_type=Path))
@click.option("--lot", type=click.Path(file_okay=False, exists=True, path_type=Path), default=None,
              help="find the recorded inputs here, by checksum, if they moved")
@click.option("--out", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="folder for the rerun's own run folder [default: beside RUN]")
@click.option("--strict", is_flag=True, help="refuse to start (exit 4) when library versions differ")
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def rerun(run_dir: Path, lot: Path | None, out: Path | None, strict: bool, as_json: bool) -> None:
    """Repeat the run recorded in RUN, without the cache, and prove it gives the same.

    Exit 0 identical, 4 different (or the record is altered), 3 an input is missing or changed.
    """
    from lotproof.runner.jobs.rerun import rerun as do_rerun

    report = do_rerun(run_dir, lot=lot, out=out, strict=strict)
    if as_json:
        _emit_json(report.as_dict())
        raise SystemExit(report.exit_code)
    console = _out()
    console.print(f"rerun of {run_dir}")
    console.print(f"new run folder: {report.rerun.run_dir}")
    if report.identical:
        console.print(Text(f"identical ✓ ({report.compared} checksums, values and verdicts compared)",
                           style="green"))
    else:
        table = RichTable(title="first difference per image", title_justify="left")
        for column in ("image", "what", "recorded", "now"):
            table.add_column(column)
        for d in report.first_per_image():
            table.add_row(d.image, d.what, d.recorded, d.now)
        console.print(table)
        console.print(Text(f"DIFFERENT ✗ ({len(report.differences)} differences in "
                           f"{report.compared} comparisons)", style="bold red"))
    if report.environment:
        console.print("environment differences that may explain a difference:")
        for line in report.environment:
            console.print(f"  - {line}")
    raise SystemExit(report.exit_code)


# ---------------------------------------------------------------- cache


def _size_text(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if n < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n} B"


def _parse_age(text: str) -> float:
    import re

    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*(s|m|h|d|w)\s*", text)
    if not match:
        raise click.BadParameter(f"{text!r}: write an age such as 12h, 30d or 2w")
    factor = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 7 * 86400}[match.group(2)]
    return float(match.group(1)) * factor


def _parse_size(text: str) -> int:
    import re

    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*", text)
    if not match:
        raise click.BadParameter(f"{text!r}: write a size such as 500MB or 20GiB")
    factor = {"B": 1, "KB": 1e3, "MB": 1e6, "GB": 1e9, "TB": 1e12,
              "KiB": 1024, "MiB": 1024**2, "GiB": 1024**3, "TiB": 1024**4}[match.group(2)]
    return int(float(match.group(1)) * factor)


@cli.group(invoke_without_command=True)
@click.option("--cache", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]")
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
@click.pass_context
def cache(ctx: click.Context, cache: Path | None, as_json: bool) -> None:
    """Show the cache: location, entries, size (`cache prune` removes entries)."""
    from lotproof.runner.evaluate.cache import DiskStore, default_cache_dir

    store = DiskStore(cache or default_cache_dir())
    ctx.obj = store
    if ctx.invoked_subcommand is not None:
        return
    stats = store.stats()
    if as_json:
        _emit_json({"location": stats.location, "entries": stats.entries, "bytes": stats.bytes})
        return
    console = _out()
    console.print(f"cache: {stats.location}")
    console.print(f"entries: {stats.entries}")
    console.print(f"size: {_size_text(stats.bytes)}")


@cache.command()
@click.option("--older-than", "older_than", default=None, help="remove entries unused for this long (e.g. 30d)")
@click.option("--max-size", "max_size", default=None, help="then remove the least recently used down to this size (e.g. 20GB)")
@click.pass_obj
def prune(store: Any, older_than: str | None, max_size: str | None) -> None:
    """Remove cache entries by age and/or to a size bound."""
    if older_than is None and max_size is None:
        raise click.UsageError("give --older-than and/or --max-size")
    age = _parse_age(older_than) if older_than else None
    size = _parse_size(max_size) if max_size else None
    removed, freed = store.prune(older_than_s=age, max_bytes=size)
    _out().print(f"removed {removed} entries, {_size_text(freed)} freed; {store.stats().entries} left")


# ---------------------------------------------------------------- steps


@cli.command("steps")
@click.argument("kind", required=False)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def steps_command(kind: str | None, as_json: bool) -> None:
    """List the step kinds, or show one KIND's parameters, data and values."""
    import difflib

    from lotproof.runner.recipe.schema import param_rows
    from lotproof.steps import REGISTRY

    if kind is not None and kind not in REGISTRY:
        close = difflib.get_close_matches(kind, list(REGISTRY), n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        _err().print(Text(f"unknown step kind {kind!r}{hint}"))
        raise SystemExit(EXIT_INVALID)
    kinds = [REGISTRY[kind]] if kind else [REGISTRY[k] for k in sorted(REGISTRY)]

    def takes(k: Any) -> str:
        text = ", ".join(" or ".join(sorted(t)) for t in k.takes)
        return text + (", ..." if k.variadic else "")

    if as_json:
        _emit_json(
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
                    "columns": {name: {"unit": u, "definition": d} for name, (u, d) in k.columns.items()},
                    "parameters": [
                        {"name": n, "type": t, "default": d, "description": desc}
                        for n, t, d, desc in param_rows(k)
                    ],
                }
                for k in kinds
            }
        )
        return
    console = _out()
    if kind is None:
        table = RichTable(title="step kinds", title_justify="left")
        for column in ("kind", "takes", "gives", "does"):
            table.add_column(column)
        for k in kinds:
            table.add_row(k.name, takes(k), k.gives, k.summary)
        console.print(table)
        console.print("`lotproof steps KIND` shows a kind's parameters.")
        return
    k = kinds[0]
    console.print(Text(f"{k.name} (version {k.version}): {k.summary}", style="bold"))
    gives = "same kind as its input" if k.gives == "same" else k.gives
    dims = ", ".join(f"{d}-D" for d in sorted(k.ndims))
    console.print(f"takes: {takes(k)}   gives: {gives}   works on: {dims}")
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


@cli.command()
def schema() -> None:
    """Print the recipe's JSON Schema (draft-07) for editors."""
    from lotproof.runner.recipe.schema import schema_text

    click.echo(schema_text(), nl=False)


# ---------------------------------------------------------------- demo


def _scenario_names() -> list[str]:
    from lotproof.runner.jobs.demo import SCENARIOS

    return list(SCENARIOS)


@cli.command()
@click.argument("name", required=False, type=click.Choice(_scenario_names()))
@click.option("--out", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="folder that receives the run folders (default: demo_run/runs)")
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def demo(name: str | None, out: Path | None, as_json: bool) -> None:
    """Run the bundled demo lots through their recipes: every scenario, or NAME.

    filter-disc: sintered bronze filter discs (porosity); powder: metal powder (size
    distribution, touching particles); lattice: CT volumes of lattice coupons (gas voids).
    Exits 0 when the demos ran, whatever their verdicts.
    """
    from lotproof.runner.jobs.demo import SCENARIOS, demo_paths

    names = [name] if name else list(SCENARIOS)
    for scenario in names:
        recipe, lot, default_out = demo_paths(scenario)
        if not as_json:
            _err().print(Text(f"demo {scenario}: {SCENARIOS[scenario].summary}", style="bold"))
        code = _run(recipe, (lot,), out or default_out, as_json, quiet=False, no_cache=True)
        if code not in (EXIT_OK, EXIT_LIMIT_FAILED, EXIT_BAD_INPUT):
            raise SystemExit(code)
    if not as_json:
        _err().print("demo finished; the verdicts above are the demo lots' own.")


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``lotproof`` console script."""
    if os.environ.get("NO_COLOR"):
        os.environ.setdefault("TERM", "dumb")
    try:
        cli.main(args=argv, prog_name="lotproof", standalone_mode=False)
    except click.exceptions.Abort:
        _err().print("interrupted")
        sys.exit(EXIT_INTERRUPTED)
    except click.ClickException as err:
        err.show()
        sys.exit(EXIT_INVALID)
    except KeyboardInterrupt:
        _err().print("interrupted")
        sys.exit(EXIT_INTERRUPTED)
    except LotproofError as err:
        _err().print(Text(f"error: {err}"))
        sys.exit(err.exit_code)
    except SystemExit:
        raise
    except Exception as err:  # a bug in lotproof: say so plainly, no traceback dump
        _err().print(
            Text(f"internal error in lotproof {__version__}: {type(err).__name__}: {err}")
        )
        if os.environ.get("LOTPROOF_DEBUG"):
            raise
        sys.exit(EXIT_INTERNAL)
    sys.exit(EXIT_OK)


# Commands of the run record (verify, keygen, export, diff, compare) register on `cli`.
import lotproof.runner.cli.record  # noqa: E402,F401  isort: skip
import lotproof.runner.cli.show  # noqa: E402,F401  isort: skip
