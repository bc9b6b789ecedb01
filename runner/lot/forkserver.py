"""What the local pool's fork server loads first: quiet ends for workers whose run has gone.

The local executor's workers are forked by a server process (``forkserver``) that
imports this module and the step library once. A worker forked in the moment its
run is interrupted finds the run's pipes and semaphores gone while it reads its
start-up state, and Python would print that as a traceback on the terminal of a
run that ended cleanly. Those failures, and only those, end the worker without a
word: its run has already said "interrupted", and the worker never started work.
Any other uncaught error is printed as usual.
"""

from __future__ import annotations

import sys
from types import TracebackType

__all__ = ["ORPHANED", "quiet_when_orphaned"]

#: errors of a worker whose run went away while it was starting
ORPHANED: tuple[type[BaseException], ...] = (
    FileNotFoundError,
    EOFError,
    BrokenPipeError,
    ConnectionResetError,
)

_default = sys.excepthook


def quiet_when_orphaned(
    kind: type[BaseException], error: BaseException, trace: TracebackType | None
) -> None:
    """``sys.excepthook`` of the fork server and its workers."""
    if issubclass(kind, ORPHANED):
        return
    _default(kind, error, trace)


sys.excepthook = quiet_when_orphaned
