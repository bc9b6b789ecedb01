"""Choosing where a lot runs: an executor by name, for the command line.

``local`` is :class:`lotproof.runner.lot.local.LocalExecutor`; ``dask`` and ``dask-local`` are
:class:`lotproof.runner.lot.cluster.DaskExecutor`, imported only when one of them is
chosen, so a local run never imports dask::

    with open_executor("dask-local", jobs=2, scheduler=None, workers=2) as executor:
        run_lot(recipe, lot, out, store=store, executor=executor)
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from lotproof.runner.lot.base import ExecutorError, LotExecutor
from lotproof.runner.lot.local import LocalExecutor

__all__ = ["EXECUTOR_KINDS", "ExecutorError", "close_executor", "make_executor", "open_executor"]

#: the executors ``--executor`` chooses from
EXECUTOR_KINDS: tuple[str, ...] = ("local", "dask", "dask-local")


def make_executor(
    kind: str, *, jobs: int, scheduler: str | None, workers: int | None
) -> LotExecutor:
    """The executor ``kind`` (one of :data:`EXECUTOR_KINDS`), ready to run lots.

    Parameters
    ----------
    kind
        ``local``: ``jobs`` processes on this machine. ``dask``: the existing
        dask scheduler at ``scheduler`` (or ``$DASK_SCHEDULER_ADDRESS``).
        ``dask-local``: a dask cluster of ``workers`` processes (default ``jobs``)
        started on this machine for the run.
    jobs
        Processes of the local executor; the default number of ``dask-local`` workers.
    scheduler
        ``tcp://HOST:PORT`` of a running scheduler; only with ``dask``.
    workers
        Worker processes of ``dask-local``; only with ``dask-local``.

    Returns
    -------
    LotExecutor
        Close a dask executor when done with it (:func:`close_executor`, or use
        :func:`open_executor`): a ``dask-local`` cluster lives until then.

    Raises
    ------
    ExecutorError
        For an unknown kind, an option the kind does not take, no scheduler
        address for ``dask``, a scheduler that cannot be reached, or dask not
        installed.
    """
    if kind not in EXECUTOR_KINDS:
        raise ExecutorError(
            f"unknown executor {kind!r} (choose one of {', '.join(EXECUTOR_KINDS)})"
        )
    if scheduler is not None and kind != "dask":
        raise ExecutorError(f"--scheduler goes with --executor dask, not {kind}")
    if workers is not None and kind != "dask-local":
        hint = " (the scheduler's workers are its own)" if kind == "dask" else " (use --jobs)"
        raise ExecutorError(f"--workers goes with --executor dask-local, not {kind}{hint}")
    if kind == "local":
        return LocalExecutor(jobs)
    from lotproof.runner.lot.cluster import DaskExecutor

    if kind == "dask":
        return DaskExecutor(scheduler=scheduler or _configured_scheduler())
    return DaskExecutor(workers=workers if workers is not None else max(1, int(jobs)))


def _configured_scheduler() -> str:
    try:
        import dask
    except ImportError:
        return ""  # DaskExecutor says how to install it
    address = dask.config.get("scheduler-address", default=None)  # $DASK_SCHEDULER_ADDRESS
    if not address:
        raise ExecutorError(
            "--executor dask needs the scheduler's address: --scheduler tcp://HOST:PORT "
            "(or set DASK_SCHEDULER_ADDRESS)"
        )
    return str(address)


def close_executor(executor: LotExecutor) -> None:
    """Release what an executor holds (a dask client, a local cluster); local: nothing."""
    close = getattr(executor, "close", None)
    if close is not None:
        close()


@contextmanager
def open_executor(
    kind: str, *, jobs: int, scheduler: str | None, workers: int | None
) -> Iterator[LotExecutor]:
    """:func:`make_executor` as a context manager that closes the executor on leaving."""
    executor = make_executor(kind, jobs=jobs, scheduler=scheduler, workers=workers)
    try:
        yield executor
    finally:
        close_executor(executor)
