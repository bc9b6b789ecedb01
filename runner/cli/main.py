"""The ``lotproof`` command line: the command group and its entry point.

The commands live in :mod:`~lotproof.runner.cli.method` (check, steps, schema),
:mod:`~lotproof.runner.cli.runs` (run, rerun, demo, cache),
:mod:`~lotproof.runner.cli.record` (verify, approve, keygen, export, diff, compare),
:mod:`~lotproof.runner.cli.show` (report, preview) and :mod:`~lotproof.runner.cli.study`
(validate); each is a thin shell over a
function of the stages below. Exit codes are those of :mod:`lotproof.runner.errors`,
the same for every command.
"""

from __future__ import annotations

import os
import signal
import sys

import click
from rich.text import Text

from lotproof.runner import __version__
from lotproof.runner.cli import history, method, record, runs, show, study
from lotproof.runner.cli.console import stderr
from lotproof.runner.errors import (
    EXIT_INTERNAL,
    EXIT_INTERRUPTED,
    EXIT_INVALID,
    EXIT_OK,
    LotproofError,
)

__all__ = ["cli", "main"]


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="lotproof")
def cli() -> None:
    """Run validated image-analysis recipes on production lots, with limits and records."""


for _command in (
    method.check,
    method.steps_command,
    method.schema,
    runs.run,
    runs.rerun,
    runs.cache,
    runs.demo,
    record.verify,
    record.approve,
    record.keygen_command,
    record.export,
    record.diff,
    record.compare,
    show.report,
    show.preview,
    history.history,
    history.trend,
    study.validate,
):
    cli.add_command(_command)


def main(argv: list[str] | None = None) -> None:
    """Run one ``lotproof`` command with ``argv`` (default: the process's arguments) and exit."""
    signal.signal(signal.SIGINT, signal.default_int_handler)  # interrupts unwind from here on
    if os.environ.get("NO_COLOR"):
        os.environ.setdefault("TERM", "dumb")
    try:
        cli.main(args=argv, prog_name="lotproof", standalone_mode=False)
    except click.exceptions.Abort:
        stderr().print("interrupted")
        sys.exit(EXIT_INTERRUPTED)
    except click.ClickException as err:
        err.show()
        sys.exit(EXIT_INVALID)
    except KeyboardInterrupt:
        stderr().print("interrupted")
        sys.exit(EXIT_INTERRUPTED)
    except LotproofError as err:
        stderr().print(Text(f"error: {err}"))
        sys.exit(err.exit_code)
    except SystemExit:
        raise
    except Exception as err:  # a bug in lotproof: say so plainly, no traceback dump
        stderr().print(
            Text(f"internal error in lotproof {__version__}: {type(err).__name__}: {err}")
        )
        if os.environ.get("LOTPROOF_DEBUG"):
            raise
        sys.exit(EXIT_INTERNAL)
    sys.exit(EXIT_OK)
