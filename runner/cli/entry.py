"""The ``lotproof`` console script: Ctrl-C is quiet from the very first instant.

Importing the command line loads numpy, scipy and the compiled kernels, which
takes a moment; a Ctrl-C in that moment would end Python with a traceback. This
module imports nothing heavy: it makes SIGINT end the process quietly (exit 130,
nothing has been written yet), imports the command line, and hands over to
:func:`lotproof.runner.cli.main.main`, which restores Python's own handling so that
an interrupt during a run unwinds through the run's cleanup. Once it has, the
process ends at once with exit 130, without waiting on the worker pool's threads.
"""

from __future__ import annotations

import os
import signal
import sys
from types import FrameType

from lotproof.runner.errors import EXIT_INTERRUPTED

__all__ = ["main"]


def _quiet_interrupt(signum: int, frame: FrameType | None) -> None:
    sys.stderr.write("interrupted\n")
    sys.stderr.flush()
    os._exit(EXIT_INTERRUPTED)  # nothing is open or written yet: end now, no traceback


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``lotproof`` console script and of ``python -m lotproof``."""
    signal.signal(signal.SIGINT, _quiet_interrupt)
    from lotproof.runner.cli.main import main as run_command

    try:
        run_command(argv)
    except SystemExit as ended:
        if ended.code != EXIT_INTERRUPTED:
            raise
        # Interrupted: the run has unwound (its ledger closed, its workers ended). Python's
        # own exit would now join the worker pool's threads, and a worker killed while it
        # wrote a result leaves one of them waiting forever on half a message. End now.
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(EXIT_INTERRUPTED)
