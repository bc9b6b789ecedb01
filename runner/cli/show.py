"""Commands for people to look at: ``report`` and ``preview``.

Registered on the ``lotproof`` group of :mod:`lotproof.runner.cli.main` when this module is
imported. Thin shells over :mod:`lotproof.runner.show.report` and :mod:`lotproof.runner.show.preview`.

``lotproof report RUN`` rebuilds a finished run's report with its seal, beside the
run folder (``RUN-report.html``) or at ``--out``; never inside the run folder.
``--pdf`` prints it to PDF with headless Chromium. Exit codes: 0 written; 2 not a
run folder, or ``--out`` inside it; 3 the PDF could not be made (Chromium is not
installed, or it failed); 4 the report was written but the record did not verify
(it is altered or unfinished, and the report says so beside the seal).
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path

import click
from rich.text import Text

from lotproof.runner.cli.main import _err, _fail_recipe, _out, _store, cli
from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INTEGRITY, EXIT_INVALID, RecipeError

__all__ = ["CHROMIUM_NAMES", "EXIT_NO_PDF", "find_chromium", "html_to_pdf", "report", "preview"]

#: executables tried, in order, for headless printing
CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
#: exit code when the PDF cannot be made (the HTML is the reproducible artefact either way)
EXIT_NO_PDF = EXIT_BAD_INPUT
#: seconds Chromium may take to print one report
PDF_TIMEOUT_S = 120


def find_chromium() -> str | None:
    """Path of a Chromium-family browser on ``PATH``, or None."""
    for name in CHROMIUM_NAMES:
        found = shutil.which(name)
        if found:
            return found
    return None


def chromium_command(browser: str, profile: Path, *extra: str) -> list[str]:
    """The headless Chromium command line: no sandbox, no GPU, nothing reached on the network."""
    return [
        browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-pdf-header-footer",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        "--no-first-run", "--disable-extensions", f"--user-data-dir={profile}", *extra,
    ]


def html_to_pdf(html_file: Path, pdf: Path, browser: str | None = None) -> None:
    """Print ``html_file`` to ``pdf`` with headless Chromium.

    Raises
    ------
    FileNotFoundError
        When no Chromium is installed.
    RuntimeError
        When Chromium ran but made no PDF.
    """
    browser = browser or find_chromium()
    if browser is None:
        raise FileNotFoundError("chromium")
    pdf = pdf.resolve()
    with tempfile.TemporaryDirectory(prefix="lotproof-chromium-") as profile:
        command = chromium_command(browser, Path(profile), f"--print-to-pdf={pdf}",
                                   html_file.resolve().as_uri())
        try:
            done = subprocess.run(command, capture_output=True, timeout=PDF_TIMEOUT_S, check=False,
                                  stdin=subprocess.DEVNULL)
        except subprocess.TimeoutExpired:
            raise RuntimeError(f"chromium did not finish within {PDF_TIMEOUT_S} s") from None
    if done.returncode != 0 or not pdf.is_file() or pdf.stat().st_size == 0:
        tail = done.stderr.decode("utf-8", "replace").strip().splitlines()[-1:] or ["no message"]
        raise RuntimeError(f"chromium exited with {done.returncode}: {tail[0]}")


# ---------------------------------------------------------------- report


@cli.command()
@click.argument("run", type=click.Path(file_okay=False, path_type=Path))
@click.option("--pdf", is_flag=True, help="print the report to PDF with headless Chromium")
@click.option("--out", "out", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="file to write [default: RUN-report.html, or RUN-report.pdf with --pdf, beside RUN]")
def report(run: Path, pdf: bool, out: Path | None) -> None:
    """Rebuild RUN's report from its finished record, with the seal, beside the run folder.

    The run's own report.html (sealed with the run) says where its seal is; this one
    shows the seal and whether the record verifies. Nothing in RUN is rewritten.
    Exit 0 written; 2 not a run folder; 3 no PDF could be made; 4 the record did not verify.
    """
    from lotproof.runner.show.report import ReportError, _check_outside, default_report_path, rebuild_report

    if not run.is_dir():
        _err().print(Text(f"{run}: no such run folder"))
        raise SystemExit(EXIT_INVALID)
    target = out if out is not None else default_report_path(run, pdf=pdf)
    try:
        _check_outside(run, target)
    except ReportError as err:
        _err().print(Text(f"error: {err}"))
        raise SystemExit(EXIT_INVALID) from None
    browser = find_chromium() if pdf else None
    if pdf and browser is None:
        _err().print(Text(
            "error: --pdf needs headless Chromium, which is not installed (on Debian: "
            "apt-get install chromium); the HTML report needs nothing: run without --pdf "
            "and print it from any browser"
        ))
        raise SystemExit(EXIT_NO_PDF)
    if pdf:
        with tempfile.TemporaryDirectory(prefix="lotproof-report-") as tmp:
            html_file, status = rebuild_report(run, Path(tmp) / "report.html")
            try:
                html_to_pdf(html_file, target, browser)
            except (RuntimeError, OSError) as err:
                _err().print(Text(f"error: no PDF was made: {err}"))
                raise SystemExit(EXIT_NO_PDF) from None
    else:
        _, status = rebuild_report(run, target)
    console = _out()
    console.print(Text(f"report: {target}"))
    if status != "intact":
        _err().print(Text(f"the record is {status}: see `lotproof verify {run}`", style="bold red"))
        raise SystemExit(EXIT_INTEGRITY)


# ---------------------------------------------------------------- preview


@cli.command()
@click.argument("recipe", type=click.Path(dir_okay=False, path_type=Path))
@click.argument("image", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--steps", "steps", default=None, help="comma-separated steps to draw [default: every step run]")
@click.option("--out", "out", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="the contact sheet to write (*.png); its tile list goes beside it as *.json")
@click.option("--cache", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="cache folder [default: $LOTPROOF_CACHE or the user cache folder]")
@click.option("--no-cache", is_flag=True, help="compute everything, store nothing")
def preview(recipe: Path, image: Path, steps: str | None, out: Path, cache: Path | None,
            no_cache: bool) -> None:
    """Run RECIPE on one IMAGE and draw every step's result on a contact sheet.

    For tuning a recipe by eye: each tile shows a step's output (gray, mask, labels,
    or the outlines of what was measured) with its name, kind and parameters, and its
    values beside it. Uses the cache like `lotproof run`.
    """
    from lotproof.runner.show.preview import write_preview
    from lotproof.runner.recipe.model import load_recipe

    try:
        checked = load_recipe(recipe)
    except RecipeError as err:
        _fail_recipe(err, False)
    names = [s.strip() for s in steps.split(",") if s.strip()] if steps else None
    sheet = write_preview(checked, image, out, steps=names, store=_store(cache, no_cache))
    counts = sheet.sidecar["steps"]
    _out().print(Text(
        f"{out}: {len(sheet.tiles)} tiles ({out.with_suffix('.json').name} lists them); "
        f"{counts['computed']} steps computed, {counts['reused']} reused from the cache"
    ))
