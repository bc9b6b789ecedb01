"""Where a lot's images are analysed: the executor seam.

An executor maps the per-image task over the samples of a lot and returns the
results in the samples' order, whatever order they finished in. The local
executor runs them in this process (``jobs=1``) or in a pool of spawned
processes; the dask executor (:mod:`lotproof.runner.lot.cluster`) runs the very same task
on a cluster. Nothing here imports dask.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol

from lotproof.runner.evaluate.cache import DiskStore, NullStore, Store
from lotproof.runner.evaluate.image import ImageResult, analyse_sample
from lotproof.runner.evaluate.inputs import Sample
from lotproof.runner.recipe.model import Recipe, parse_recipe

__all__ = [
    "LotExecutor",
    "LocalExecutor",
    "analyse_task",
    "usable_cores",
    "single_thread_environment",
    "worker_name",
]

OnImage = Callable[[ImageResult], None]


class LotExecutor(Protocol):
    """What ``run_lot`` needs from an executor."""

    #: recorded in the ledger's run-start event
    description: str

    def map(
        self, recipe: Recipe, samples: list[Sample], lot: Path, store: Store, on_image: OnImage | None
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


def analyse_task(recipe: Recipe, sample: Sample, lot: Path, store: Store) -> ImageResult:
    """The per-image task every executor runs."""
    from lotproof.runner.evaluate.pictures import png_bytes

    result = analyse_sample(recipe, sample, lot, store=store, preview=True)
    # encode the display images here, in the worker, so the parent only writes bytes
    result.preview = {name: png_bytes(array) for name, array in result.preview.items()}
    result.worker = worker_name()
    drain = getattr(store, "drain_messages", None)
    if drain is not None:
        result.notes.extend(drain())
    return result


#: environment that keeps BLAS/OpenMP/numba to one thread per worker process
SINGLE_THREAD_ENV = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS")


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


# Per worker process: the recipe parsed once, the store opened once.
_WORKER: dict[str, Any] = {}


def _worker_init(recipe_raw: bytes, recipe_path: str, cache_root: str | None) -> None:
    # Compiled kernels load from numba's on-disk cache on first use, per dtype;
    # warming every dtype ahead would cost far more than a run uses.
    _WORKER["recipe"] = parse_recipe(recipe_raw, recipe_path)
    _WORKER["store"] = DiskStore(Path(cache_root)) if cache_root else NullStore()


def _worker_task(sample: Sample, lot: str) -> ImageResult:
    return analyse_task(_WORKER["recipe"], sample, Path(lot), _WORKER["store"])


def _context() -> Any:
    """Workers are forked from a server process that has imported the step library once.

    ``forkserver`` starts each worker in milliseconds with numpy, scipy and the compiled
    kernels already loaded (a ``spawn`` start costs seconds per worker), without forking
    this process and its threads. Where it is not offered, ``spawn``.
    """
    import multiprocessing

    try:
        context = multiprocessing.get_context("forkserver")
    except ValueError:
        return multiprocessing.get_context("spawn")
    context.set_forkserver_preload(["lotproof.runner.lot.local", "lotproof.steps"])
    return context


class LocalExecutor:
    """This machine: in-process for ``jobs=1``, else a pool of ``jobs`` spawned processes.

    Each image is read when its task starts and at most ``2 * jobs`` tasks are in
    flight, so memory does not grow with the size of the lot.
    """

    def __init__(self, jobs: int = 1):
        self.jobs = max(1, int(jobs))
        self.description = f"local, {self.jobs} process{'es' if self.jobs != 1 else ''}"

    def map(
        self, recipe: Recipe, samples: list[Sample], lot: Path, store: Store, on_image: OnImage | None
    ) -> list[ImageResult]:
        if self.jobs <= 1 or len(samples) <= 1:
            results = []
            for sample in samples:
                result = analyse_task(recipe, sample, lot, store)
                results.append(result)
                if on_image is not None:
                    on_image(result)
            return results
        return self._pool_map(recipe, samples, lot, store, on_image)

    def _pool_map(
        self, recipe: Recipe, samples: list[Sample], lot: Path, store: Store, on_image: OnImage | None
    ) -> list[ImageResult]:
        import concurrent.futures as cf
        import concurrent.futures.process  # noqa: F401  (BrokenProcessPool)

        cache_root = store.location if isinstance(store, DiskStore) else None
        with single_thread_environment():
            pool = cf.ProcessPoolExecutor(
                max_workers=min(self.jobs, len(samples)),
                mp_context=_context(),
                initializer=_worker_init,
                initargs=(recipe.raw, recipe.path, cache_root),
            )
        results: list[ImageResult | None] = [None] * len(samples)
        pending: dict[cf.Future[ImageResult], int] = {}
        queue = list(enumerate(samples))
        queue.reverse()
        try:
            while queue or pending:
                while queue and len(pending) < 2 * self.jobs:
                    index, sample = queue.pop()
                    try:
                        pending[pool.submit(_worker_task, sample, str(lot))] = index
                    except cf.process.BrokenProcessPool as err:
                        # a worker died and took the pool with it: what is left is incomplete
                        result = ImageResult(id=sample.id).fail(f"not analysed: the worker pool stopped ({err})")
                        results[index] = result
                        if on_image is not None:
                            on_image(result)
                done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
                for future in done:
                    index = pending.pop(future)
                    try:
                        result = future.result()
                    except Exception as err:  # a worker died: that image is incomplete, not lost
                        result = ImageResult(id=samples[index].id).fail(
                            f"the worker analysing it stopped ({type(err).__name__}: {err})"
                        )
                    results[index] = result
                    if on_image is not None:
                        on_image(result)
        except BaseException:
            pool.shutdown(wait=False, cancel_futures=True)
            raise
        pool.shutdown(wait=True)
        return [r for r in results if r is not None]
