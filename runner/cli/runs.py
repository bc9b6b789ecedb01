"""Commands that run lots: ``run``, ``rerun``, ``demo``, and ``cache`` for the store they share.

Each is a thin shell over :func:`lotproof.runner.jobs.run.run_lot`,
:func:`lotproof.runner.jobs.rerun.rerun` and the cache; what is printed here is
only the presentation of their results.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import click
from rich.console import Console
from rich.table import Table as RichTable
from rich.text import Text

from lotproof.runner.cli.console import emit_json, fail_recipe, mark, open_store, stderr, stdout
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_LIMIT_FAILED, EXIT_OK, RecipeError
from lotproof.runner.evaluate.cache import DiskStore, default_cache_dir
from lotproof.runner.jobs.demo import SCENARIOS, demo_paths, prepare_study
from lotproof.runner.jobs.rerun import rerun as do_rerun
from lotproof.runner.jobs.run import run_lot
from lotproof.runner.lot.base import ExecutorError
from lotproof.runner.lot.choose import EXECUTOR_KINDS, open_executor
from lotproof.runner.recipe.load import load_recipe
from lotproof.runner.recipe.lotsheet import lot_details
from lotproof.runner.record.folder import CAUTION
from lotproof.runner.record.limits import FAIL

__all__ = ["cache", "demo", "rerun", "run", "run_recipe"]


# ---------------------------------------------------------------- run


def _print_summary(summary: Any) -> None:
    console = stdout()
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
                value = (
                    f"{len(failing)} of {len(lv.per_image)} images fail"
                    if failing
                    else "every image"
                )
            else:
                value = f"{lv.value:.6g}" if lv.value is not None else "-"
                value += "" if lv.unit == "-" else f" {lv.unit}"
            table.add_row(name, value, lv.over, lv.bound_text(), mark(lv.verdict))
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
        images.add_row(r.id, mark(verdicts.image_verdict(r.id)), *cells, Text(r.reason))
    console.print(images)
    console.print(Text("lot verdict: ", style="bold") + mark(verdicts.lot))
    approval = summary.recipe_approval
    if approval is not None:
        console.print(
            Text(
                f"recipe approved by {approval.approver} at {approval.time_utc} "
                f"(key {approval.key})"
            )
        )
    elif summary.approval_note:
        console.print(Text(f"recipe not approved: {summary.approval_note}", style="yellow"))
    console.print(f"run folder: {summary.run_dir}")
    console.print(f"seal: {summary.seal}" + (" (signed)" if summary.signed else ""))
    console.print(Text(CAUTION, style="dim"))


def run_recipe(
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
    db: str | None = None,
    details: dict[str, str | None] | None = None,
    station: str | None = None,
    trust: Path | None = None,
    require_approved: bool = False,
) -> int:
    from lotproof.runner.jobs.run import usable_cores

    try:
        checked = load_recipe(recipe)
        # every lot's sheet is checked before the first lot runs
        lot_sheets = {lot: lot_details(lot, options=details, station=station) for lot in lots}
    except RecipeError as err:
        fail_recipe(err, as_json)

    store = open_store(cache, no_cache)
    jobs = jobs or usable_cores()
    err_console = stderr()
    documents: list[Any] = []
    codes: list[int] = []
    try:
        with open_executor(
            executor_kind, jobs=jobs, scheduler=scheduler, workers=workers
        ) as executor:
            for lot in lots:
                _run_one(
                    checked,
                    lot,
                    out,
                    as_json,
                    quiet,
                    store,
                    executor,
                    sign,
                    err_console,
                    documents,
                    codes,
                    options={
                        "details": lot_sheets[lot],
                        "trust": trust,
                        "require_approved": require_approved,
                        "db": db,
                    },
                )
    except ExecutorError as err:
        raise click.UsageError(str(err)) from None
    if as_json:
        emit_json(documents[0] if len(documents) == 1 else documents)
    # the same precedence as one lot's exit code: bad data, then a failed limit
    for code in (EXIT_BAD_INPUT, EXIT_LIMIT_FAILED):
        if code in codes:
            return code
    return EXIT_OK


def _run_one(
    checked: Any,
    lot: Path,
    out: Path,
    as_json: bool,
    quiet: bool,
    store: Any,
    executor: Any,
    sign: Path | None,
    err_console: Console,
    documents: list[Any],
    codes: list[int],
    options: dict[str, Any] | None = None,
) -> None:

    progress = None
    task = None
    counts = {"done": 0, "reused": 0, "steps": 0, "incomplete": 0}
    if not quiet and err_console.is_terminal:
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
        )

        progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("{task.fields[status]}"),
            TimeElapsedColumn(),
            console=err_console,
            transient=True,
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
        summary = run_lot(
            checked,
            lot,
            out,
            store=store,
            executor=executor,
            sign=sign,
            on_start=started,
            on_image=done,
            **(options or {}),  # the lot's details, the recipe's approval, the catalogue
        )
    finally:
        if progress is not None:
            progress.stop()
    if not quiet:
        for note in summary.notes:
            err_console.print(Text(f"note: {note}", style="yellow"))
    if as_json:
        documents.append(summary.as_json())
    else:
        _print_summary(summary)
    codes.append(summary.exit_code)


@click.command()
@click.argument("recipe", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("lots", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option(
    "--out",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("runs"),
    show_default=True,
    help="folder that receives the new run folder",
)
@click.option(
    "--jobs",
    "-j",
    type=click.IntRange(min=1),
    default=None,
    help="images analysed at once, each in its own process [default: usable cores]",
)
@click.option(
    "--cache",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]",
)
@click.option("--no-cache", is_flag=True, help="compute everything, store nothing")
@click.option(
    "--sign",
    type=click.Path(dir_okay=False, exists=True, path_type=Path),
    default=None,
    help="Ed25519 private key (from `lotproof keygen`) to sign the run's seal with",
)
@click.option(
    "--executor",
    "executor_kind",
    type=click.Choice(list(EXECUTOR_KINDS)),
    default="local",
    show_default=True,
    help="where images are analysed: this machine, an existing dask scheduler, or a dask "
    "cluster started for the run",
)
@click.option(
    "--scheduler",
    default=None,
    metavar="tcp://HOST:PORT",
    help="the dask scheduler for --executor dask [default: $DASK_SCHEDULER_ADDRESS]",
)
@click.option(
    "--workers",
    type=click.IntRange(min=1),
    default=None,
    help="worker processes for --executor dask-local [default: usable cores]",
)
@click.option("--customer", default=None, help="the customer the lot is tested for")
@click.option("--order", default=None, help="the order or purchase order number")
@click.option(
    "--spec", "specification", default=None, help="the specification: document and revision"
)
@click.option("--sample", default=None, help="what the sample is")
@click.option("--operator", default=None, help="who runs it [default: the login name]")
@click.option("--note", default=None, help="a free-text note for the certificate")
@click.option(
    "--station",
    envvar="LOTPROOF_STATION",
    default=None,
    help="the lab's name for this workstation [default: $LOTPROOF_STATION]",
)
@click.option(
    "--trust",
    type=click.Path(file_okay=False, path_type=Path),
    envvar="LOTPROOF_TRUST",
    default=None,
    help="folder of trusted public keys: record the recipe's approval [default: $LOTPROOF_TRUST]",
)
@click.option(
    "--require-approved",
    is_flag=True,
    help="refuse (exit 2, nothing run) a recipe without a valid approval by a trusted key",
)
@click.option(
    "--db",
    default=None,
    metavar="URL",
    help="the catalogue that records the run [default: $LOTPROOF_DB or OUT/history.sqlite]",
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
@click.option("--quiet", "-q", is_flag=True, help="no progress or messages on stderr")
def run(
    recipe: Path,
    lots: tuple[Path, ...],
    out: Path,
    jobs: int | None,
    cache: Path | None,
    no_cache: bool,
    sign: Path | None,
    executor_kind: str,
    scheduler: str | None,
    workers: int | None,
    customer: str | None,
    order: str | None,
    specification: str | None,
    sample: str | None,
    operator: str | None,
    note: str | None,
    station: str | None,
    trust: Path | None,
    require_approved: bool,
    db: str | None,
    as_json: bool,
    quiet: bool,
) -> None:
    """Run RECIPE on each LOT folder; write a new run folder per lot under --out.

    Each finished run is recorded in the catalogue of runs (`lotproof history`).

    The lot's details for its certificate come from the options and/or its lot
    sheet (LOT/lot.yaml, or LOT.lot.yaml beside it); an option replaces the
    sheet's value. Exit 0 when every limit passed, 1 when a limit failed, 3 when
    an image could not be analysed (the lot is incomplete), 2 when the recipe, a
    lot sheet or an option is invalid, or the recipe is not approved as required.
    """
    raise SystemExit(
        run_recipe(
            recipe,
            lots,
            out,
            as_json,
            quiet,
            jobs=jobs,
            cache=cache,
            no_cache=no_cache,
            sign=sign,
            executor_kind=executor_kind,
            scheduler=scheduler,
            workers=workers,
            db=db,
            details={
                "customer": customer,
                "order": order,
                "specification": specification,
                "sample": sample,
                "operator": operator,
                "note": note,
            },
            station=station,
            trust=trust,
            require_approved=require_approved,
        )
    )


# ---------------------------------------------------------------- rerun


@click.command()
@click.argument(
    "run_dir", metavar="RUN", type=click.Path(file_okay=False, exists=True, path_type=Path)
)
@click.option(
    "--lot",
    type=click.Path(file_okay=False, exists=True, path_type=Path),
    default=None,
    help="find the recorded inputs here, by checksum, if they moved",
)
@click.option(
    "--out",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="folder for the rerun's own run folder [default: beside RUN]",
)
@click.option(
    "--strict", is_flag=True, help="refuse to start (exit 4) when library versions differ"
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def rerun(run_dir: Path, lot: Path | None, out: Path | None, strict: bool, as_json: bool) -> None:
    """Repeat the run recorded in RUN, without the cache, and prove it gives the same.

    Exit 0 identical, 4 different (or the record is altered), 3 an input is missing or changed.
    """

    report = do_rerun(run_dir, lot=lot, out=out, strict=strict)
    if as_json:
        emit_json(report.as_dict())
        raise SystemExit(report.exit_code)
    console = stdout()
    console.print(f"rerun of {run_dir}")
    console.print(f"new run folder: {report.rerun.run_dir}")
    if report.identical:
        console.print(
            Text(
                f"identical ✓ ({report.compared} checksums, values and verdicts compared)",
                style="green",
            )
        )
    else:
        table = RichTable(title="first difference per image", title_justify="left")
        for column in ("image", "what", "recorded", "now"):
            table.add_column(column)
        for d in report.first_per_image():
            table.add_row(d.image, d.what, d.recorded, d.now)
        console.print(table)
        console.print(
            Text(
                f"DIFFERENT ✗ ({len(report.differences)} differences in "
                f"{report.compared} comparisons)",
                style="bold red",
            )
        )
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
    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*(s|m|h|d|w)\s*", text)
    if not match:
        raise click.BadParameter(f"{text!r}: write an age such as 12h, 30d or 2w")
    factor = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 7 * 86400}[match.group(2)]
    return float(match.group(1)) * factor


def _parse_size(text: str) -> int:
    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*", text)
    if not match:
        raise click.BadParameter(f"{text!r}: write a size such as 500MB or 20GiB")
    factor = {
        "B": 1,
        "KB": 1e3,
        "MB": 1e6,
        "GB": 1e9,
        "TB": 1e12,
        "KiB": 1024,
        "MiB": 1024**2,
        "GiB": 1024**3,
        "TiB": 1024**4,
    }[match.group(2)]
    return int(float(match.group(1)) * factor)


@click.group(invoke_without_command=True)
@click.option(
    "--cache",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]",
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
@click.pass_context
def cache(ctx: click.Context, cache: Path | None, as_json: bool) -> None:
    """Show the cache: location, entries, size (`cache prune` removes entries)."""

    store = DiskStore(cache or default_cache_dir())
    ctx.obj = store
    if ctx.invoked_subcommand is not None:
        return
    stats = store.stats()
    if as_json:
        emit_json({"location": stats.location, "entries": stats.entries, "bytes": stats.bytes})
        return
    console = stdout()
    console.print(f"cache: {stats.location}")
    console.print(f"entries: {stats.entries}")
    console.print(f"size: {_size_text(stats.bytes)}")


@cache.command()
@click.option(
    "--older-than",
    "older_than",
    default=None,
    help="remove entries unused for this long (e.g. 30d)",
)
@click.option(
    "--max-size",
    "max_size",
    default=None,
    help="then remove the least recently used down to this size (e.g. 20GB)",
)
@click.pass_obj
def prune(store: Any, older_than: str | None, max_size: str | None) -> None:
    """Remove cache entries by age and/or to a size bound."""
    if older_than is None and max_size is None:
        raise click.UsageError("give --older-than and/or --max-size")
    age = _parse_age(older_than) if older_than else None
    size = _parse_size(max_size) if max_size else None
    removed, freed = store.prune(older_than_s=age, max_bytes=size)
    stdout().print(
        f"removed {removed} entries, {_size_text(freed)} freed; {store.stats().entries} left"
    )


# ---------------------------------------------------------------- demo


@click.command()
@click.argument("name", required=False, type=click.Choice(list(SCENARIOS)))
@click.option(
    "--out",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="folder that receives the run folders (default: demo_run/runs)",
)
@click.option("--json", "as_json", is_flag=True, help="print one JSON document on stdout")
def demo(name: str | None, out: Path | None, as_json: bool) -> None:
    """Run the bundled demo lots through their recipes: every scenario, or NAME.

    filter-disc: sintered bronze filter discs (porosity); powder: metal powder (size
    distribution, touching particles); lattice: CT volumes of lattice coupons (gas voids);
    history: 32 generated lots into one catalogue, with `history` and `trend`;
    validation: a validation study of a coating porosity method (`lotproof validate`).
    Exits 0 when the demos ran, whatever their verdicts.
    """

    names = [name] if name else list(SCENARIOS)
    for scenario in names:
        recipe, lot, default_out = demo_paths(scenario)
        if SCENARIOS[scenario].kind == "history":
            from lotproof.runner.cli.history import history_demo

            history_demo(out / scenario if out else default_out, as_json)
            continue
        if not as_json:
            stderr().print(Text(f"demo {scenario}: {SCENARIOS[scenario].summary}", style="bold"))
        if SCENARIOS[scenario].is_study:
            code = _demo_study(scenario, out or default_out, as_json)
        else:
            code = run_recipe(
                recipe, (lot,), out or default_out, as_json, quiet=False, no_cache=True
            )
        if code not in (EXIT_OK, EXIT_LIMIT_FAILED, EXIT_BAD_INPUT):
            raise SystemExit(code)
    if not as_json:
        stderr().print("demo finished; the verdicts above are the demo lots' own.")


def _demo_study(name: str, out: Path, as_json: bool) -> int:
    """A study scenario: its images made, its plan run with a cache of its own (a temporary
    folder, so that the sweep shows the steps it reuses)."""
    import tempfile

    from lotproof.runner.cli.study import validate_plan

    plan = prepare_study(name)
    with tempfile.TemporaryDirectory(prefix="lotproof-demo-cache-") as folder:
        return validate_plan(plan, out, as_json, quiet=False, store=DiskStore(Path(folder)))
