"""Commands for people to look at: ``report`` and ``preview``.

Thin shells over :mod:`lotproof.runner.show.report`, :mod:`lotproof.runner.show.pdf`
and :mod:`lotproof.runner.show.preview`.

``lotproof report RUN`` rebuilds a finished run's report with its seal, beside the
run folder (``RUN-report.html``) or at ``--out``; never inside the run folder.
``--pdf`` prints it to PDF with headless Chromium. Exit codes: 0 written; 2 not a
run folder, or ``--out`` inside it; 3 the PDF could not be made (Chromium is not
installed, or it failed); 4 the report was written but the record did not verify
(it is altered or unfinished, and the report says so beside the seal).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import click
from rich.text import Text

from lotproof.runner.cli.console import fail_recipe, open_store, stderr, stdout
from lotproof.runner.errors import EXIT_INTEGRITY, EXIT_INVALID, EXIT_NO_PDF, RecipeError
from lotproof.runner.show.pdf import find_chromium, html_to_pdf

__all__ = ["preview", "report"]

# ---------------------------------------------------------------- report


@click.command()
@click.argument("run", type=click.Path(file_okay=False, path_type=Path))
@click.option("--pdf", is_flag=True, help="print the report to PDF with headless Chromium")
@click.option(
    "--out",
    "out",
    type=click.Path(dir_okay=False, path_type=Path),
    default=None,
    help="file to write [default: RUN-report.html, or RUN-report.pdf with --pdf, beside RUN]",
)
@click.option(
    "--trust",
    type=click.Path(file_okay=False, path_type=Path),
    envvar="LOTPROOF_TRUST",
    default=None,
    help="folder of trusted public keys: check every review and release signature "
    "[default: $LOTPROOF_TRUST]",
)
def report(run: Path, pdf: bool, out: Path | None, trust: Path | None) -> None:
    """Rebuild RUN's certificate from its finished record, with the seal and every review
    and release, beside the run folder.

    The run's own report.html (sealed with the run) says where its seal and its
    signatures are; this one shows them and whether the record verifies (with
    --trust, whether each signature is by a trusted key). Nothing in RUN is
    rewritten. Exit 0 written; 2 not a run folder; 3 no PDF could be made; 4 the
    record did not verify.
    """
    from lotproof.runner.show.report import (
        ReportError,
        check_outside,
        default_report_path,
        rebuild_report,
    )

    if not run.is_dir():
        stderr().print(Text(f"{run}: no such run folder"))
        raise SystemExit(EXIT_INVALID)
    target = out if out is not None else default_report_path(run, pdf=pdf)
    try:
        check_outside(run, target)
    except ReportError as err:
        stderr().print(Text(f"error: {err}"))
        raise SystemExit(EXIT_INVALID) from None
    browser = find_chromium() if pdf else None
    if pdf and browser is None:
        stderr().print(
            Text(
                "error: --pdf needs headless Chromium, which is not installed (on Debian: "
                "apt-get install chromium); the HTML report needs nothing: run without --pdf "
                "and print it from any browser"
            )
        )
        raise SystemExit(EXIT_NO_PDF)
    if pdf:
        with tempfile.TemporaryDirectory(prefix="lotproof-report-") as tmp:
            html_file, status = rebuild_report(run, Path(tmp) / "report.html", trust=trust)
            try:
                html_to_pdf(html_file, target, browser)
            except (RuntimeError, OSError) as err:
                stderr().print(Text(f"error: no PDF was made: {err}"))
                raise SystemExit(EXIT_NO_PDF) from None
    else:
        _, status = rebuild_report(run, target, trust=trust)
    console = stdout()
    console.print(Text(f"report: {target}"))
    if status != "intact":
        stderr().print(
            Text(f"the record is {status}: see `lotproof verify {run}`", style="bold red")
        )
        raise SystemExit(EXIT_INTEGRITY)


# ---------------------------------------------------------------- preview


@click.command()
@click.argument("recipe", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("image", type=click.Path(dir_okay=False, path_type=Path))
@click.option(
    "--steps", "steps", default=None, help="comma-separated steps to draw [default: every step run]"
)
@click.option(
    "--out",
    "out",
    type=click.Path(dir_okay=False, path_type=Path),
    required=True,
    help="the contact sheet to write (*.png); its tile list goes beside it as *.json",
)
@click.option(
    "--cache",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]",
)
@click.option("--no-cache", is_flag=True, help="compute everything, store nothing")
def preview(
    recipe: Path, image: Path, steps: str | None, out: Path, cache: Path | None, no_cache: bool
) -> None:
    """Run RECIPE on one IMAGE and draw every step's result on a contact sheet.

    For tuning a recipe by eye: each tile shows a step's output (gray, mask, labels,
    or the outlines of what was measured) with its name, kind and parameters, and its
    values beside it. Uses the cache like `lotproof run`.
    """
    from lotproof.runner.recipe.load import load_recipe
    from lotproof.runner.show.preview import write_preview

    try:
        checked = load_recipe(recipe)
    except RecipeError as err:
        fail_recipe(err, False)
    names = [s.strip() for s in steps.split(",") if s.strip()] if steps else None
    sheet = write_preview(checked, image, out, steps=names, store=open_store(cache, no_cache))
    counts = sheet.sidecar["steps"]
    stdout().print(
        Text(
            f"{out}: {len(sheet.tiles)} tiles ({out.with_suffix('.json').name} lists them); "
            f"{counts['computed']} steps computed, {counts['reused']} reused from the cache"
        )
    )
