"""The executor seam: what every executor of a lot does and shares.

An executor maps the per-image task (:func:`analyse_task`) over the samples of a
lot and returns the results in the samples' order, whatever order they finished
in; one image's failure never stops the rest. :mod:`lotproof.runner.lot.local`
runs it on this machine, :mod:`lotproof.runner.lot.cluster` on a dask cluster.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Callable
from pathlib import Path
from typing import Protocol

from lotproof.runner.errors import EXIT_INVALID, LotproofError
from lotproof.runner.evaluate.cache import Store
from lotproof.runner.evaluate.image import ImageResult, analyse_sample
from lotproof.runner.evaluate.inputs import Sample
from lotproof.runner.evaluate.pictures import png_bytes
from lotproof.runner.recipe.model import Recipe

__all__ = [
    "SINGLE_THREAD_ENV",
    "ExecutorError",
    "LotExecutor",
    "OnImage",
    "analyse_task",
    "single_thread_environment",
    "usable_cores",
    "worker_name",
]


class ExecutorError(LotproofError, ValueError):
    """An executor cannot be made: contradictory options, no scheduler, dask not installed."""

    exit_code = EXIT_INVALID


OnImage = Callable[[ImageResult], None]


class LotExecutor(Protocol):
    """What ``run_lot`` needs from an executor."""

    #: recorded in the ledger's run-start event
    description: str

    def map(
        self,
        recipe: Recipe,
        samples: list[Sample],
        lot: Path,
        store: Store,
        on_image: OnImage | None,
    ) -> list[ImageResult]:
        """Analyse every sample; results in the samples' order; one failure never stops the rest."""


def usable_cores() -> int:
    """The number of cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def worker_name() -> str:
    """host:pid of the process analysing an image (recorded per image in the ledger)."""
    return f"{socket.gethostname()}:{os.getpid()}"


def analyse_task(
    recipe: Recipe, sample: Sample, lot: Path, store: Store, *, preview: bool = True
) -> ImageResult:
    """The per-image task every executor runs; ``preview=False`` leaves out the display
    images (a study, which draws none of them)."""
    result = analyse_sample(recipe, sample, lot, store=store, preview=preview)
    # encode the display images here, in the worker, so the parent only writes bytes
    result.preview = {name: png_bytes(array) for name, array in result.preview.items()}
    result.worker = worker_name()
    drain = getattr(store, "drain_messages", None)
    if drain is not None:
        result.notes.extend(drain())
    return result


#: environment that keeps BLAS/OpenMP/numba to one thread per worker process
SINGLE_THREAD_ENV = (
    "OMP_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "MKL_NUM_THREADS",
    "NUMBA_NUM_THREADS",
)


class single_thread_environment:
    """Context manager: set the one-thread variables so that spawned workers inherit them."""

    def __enter__(self) -> None:
        self._saved = {name: os.environ.get(name) for name in SINGLE_THREAD_ENV}
        for name in SINGLE_THREAD_ENV:
            os.environ[name] = "1"

    def __exit__(self, *exc: object) -> None:
        for name, value in self._saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value
