"""What every command shares: the two consoles, verdict marks, JSON output, recipe errors.

Results go to stdout (tables, or one JSON document with ``--json``); messages and
progress go to stderr. ``NO_COLOR`` is honoured by rich.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, NoReturn

import click
from rich.console import Console
from rich.text import Text

from lotproof.runner.errors import EXIT_INVALID, RecipeError
from lotproof.runner.evaluate.cache import DiskStore, NullStore, Store, default_cache_dir
from lotproof.runner.record.limits import FAIL, INCOMPLETE, PASS

__all__ = ["MARKS", "emit_json", "fail_recipe", "mark", "open_store", "stderr", "stdout"]

#: verdict -> the word and symbol shown for it (never colour alone)
MARKS = {PASS: "PASS ✓", FAIL: "FAIL ✗", INCOMPLETE: "INCOMPLETE ?", "-": "-"}
_STYLES = {PASS: "green", FAIL: "bold red", INCOMPLETE: "yellow"}


def stdout() -> Console:
    """The console for results (stdout)."""
    return Console(highlight=False, soft_wrap=True)


def stderr() -> Console:
    """The console for messages and progress (stderr)."""
    return Console(stderr=True, highlight=False, soft_wrap=True)


def mark(verdict: str) -> Text:
    """A verdict as its word and symbol, styled: ``PASS ✓``, ``FAIL ✗``, ``INCOMPLETE ?``."""
    return Text(MARKS.get(verdict, verdict), style=_STYLES.get(verdict, ""))


def emit_json(document: Any) -> None:
    """Print ``document`` as the one JSON document on stdout (no NaN: it is not JSON)."""
    click.echo(json.dumps(document, indent=2, ensure_ascii=False, allow_nan=False))


def fail_recipe(error: RecipeError, as_json: bool) -> NoReturn:
    """Report every problem of a recipe, one ``FILE:LINE:COL: where: what`` a line; exit 2."""
    if as_json:
        emit_json({"ok": False, "problems": [p.as_dict() for p in error.problems]})
    # One problem per line, never wrapped: editors and scripts read FILE:LINE:COL.
    for problem in error.problems:
        click.echo(str(problem), err=True)
    n = len(error.problems)
    click.echo(f"{n} problem{'s' if n != 1 else ''} found; nothing was run.", err=True)
    raise SystemExit(EXIT_INVALID)


def open_store(cache: Path | None, no_cache: bool) -> Store:
    """The cache the options name: ``--no-cache``, ``--cache DIR``, or the default folder."""
    if no_cache:
        return NullStore()
    return DiskStore(cache or default_cache_dir())
