"""The local executor: a lot's images analysed in this process or a pool of processes.

``jobs=1`` runs the per-image task here; more jobs run it in worker processes
forked from a server that has imported the step library once. Nothing here
imports dask.
"""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from lotproof.runner.evaluate.cache import DiskStore, NullStore, Store
from lotproof.runner.evaluate.image import ImageResult
from lotproof.runner.evaluate.inputs import Sample
from lotproof.runner.lot.base import OnImage, analyse_task, single_thread_environment
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.model import Recipe

__all__ = ["LocalExecutor"]

# Per worker process: the recipe parsed once, the store opened once.
_WORKER: dict[str, Any] = {}


def _worker_init(recipe_raw: bytes, recipe_path: str, cache_root: str | None) -> None:
    # Compiled kernels load from numba's on-disk cache on first use, per dtype;
    # warming every dtype ahead would cost far more than a run uses.
    _WORKER["recipe"] = parse_recipe(recipe_raw, recipe_path)
    _WORKER["store"] = DiskStore(Path(cache_root)) if cache_root else NullStore()


def _worker_task(sample: Sample, lot: str, preview: bool = True) -> ImageResult:
    return analyse_task(_WORKER["recipe"], sample, Path(lot), _WORKER["store"], preview=preview)


#: seconds a worker is given to end on SIGTERM before it is killed
STOP_GRACE_S = 2.0


@contextmanager
def _sigint_blocked() -> Iterator[None]:
    """Hold Ctrl-C back for the duration; it is raised, once, when the block ends.

    Two things are held back: the signal itself (blocked, so that processes started
    meanwhile inherit it blocked), and a Ctrl-C that had already arrived but was not
    yet raised (Python raises it at the next bytecode, which could fall between a
    worker's start and the pool's note of it, leaving a worker no one ends).
    """
    if not hasattr(signal, "pthread_sigmask") or threading.current_thread() is not (
        threading.main_thread()
    ):
        yield
        return
    held: list[int] = []
    handler = signal.signal(signal.SIGINT, lambda signum, frame: held.append(signum))
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)  # a pending Ctrl-C runs the hold
        signal.signal(signal.SIGINT, handler)
    if held:
        raise KeyboardInterrupt


def _stop(pool: Any) -> None:
    """End a pool now (an interrupt or an error): its workers terminated, then killed.

    A worker may be deep in compiled code or a futex wait and never return to the
    pool; waiting for it would keep lotproof from ending. Nothing a worker does can
    spoil the record: cache entries appear whole or not at all. (The worker list is
    the executor's ``_processes``: concurrent.futures offers no public one.)
    """
    workers = list((getattr(pool, "_processes", None) or {}).values())
    for worker in workers:
        if worker.is_alive():
            worker.terminate()
    pool.shutdown(wait=False, cancel_futures=True)
    deadline = time.monotonic() + STOP_GRACE_S
    for worker in workers:
        worker.join(max(0.0, deadline - time.monotonic()))
        if worker.is_alive():
            worker.kill()
            worker.join(1.0)


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
    context.set_forkserver_preload(
        ["lotproof.runner.lot.forkserver", "lotproof.runner.lot.local", "lotproof.steps"]
    )
    return context


class LocalExecutor:
    """This machine: in-process for ``jobs=1``, else a pool of ``jobs`` spawned processes.

    Each image is read when its task starts and at most ``2 * jobs`` tasks are in
    flight, so memory does not grow with the size of the lot.
    """

    def __init__(self, jobs: int = 1, *, preview: bool = True):
        self.jobs = max(1, int(jobs))
        #: whether each image's display pictures are made (a run's report shows them)
        self.preview = preview
        self.description = f"local, {self.jobs} process{'es' if self.jobs != 1 else ''}"

    def map(
        self,
        recipe: Recipe,
        samples: list[Sample],
        lot: Path,
        store: Store,
        on_image: OnImage | None,
    ) -> list[ImageResult]:
        if self.jobs <= 1 or len(samples) <= 1:
            results = []
            for sample in samples:
                result = analyse_task(recipe, sample, lot, store, preview=self.preview)
                results.append(result)
                if on_image is not None:
                    on_image(result)
            return results
        return self._pool_map(recipe, samples, lot, store, on_image)

    def _pool_map(
        self,
        recipe: Recipe,
        samples: list[Sample],
        lot: Path,
        store: Store,
        on_image: OnImage | None,
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
                        # workers (and the fork server) start on a submit; they inherit a
                        # blocked SIGINT, so Ctrl-C reaches this process alone, which ends them
                        with _sigint_blocked():
                            future = pool.submit(_worker_task, sample, str(lot), self.preview)
                        pending[future] = index
                    except cf.process.BrokenProcessPool as err:
                        # a worker died and took the pool with it: what is left is incomplete
                        result = ImageResult(id=sample.id).fail(
                            f"not analysed: the worker pool stopped ({err})"
                        )
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
            pool.shutdown(wait=True)
        except BaseException:  # an interrupt while waiting, even for the last worker to end
            _stop(pool)
            raise
        return [r for r in results if r is not None]
