"""Running a lot on a dask.distributed cluster, with the same results as on this machine.

One dask task per image runs :func:`lotproof.runner.lot.base.analyse_task`, the very task the
local executor runs. A task carries the recipe's exact bytes and path, the lot
folder and the cache folder as absolute paths; each worker process parses the
recipe once and opens the cache folder once (as :mod:`lotproof.runner.lot.local` does per pool
process). The lot and cache folders must therefore be visible at the same paths on
every worker (a shared file system); the cache's atomic, verified writes make two
workers computing the same key safe.

A worker that dies while analysing an image (killed, out of memory, a crash in
compiled code) is the scheduler's business: it gives the task to another worker.
A cluster started here allows that once (``allowed_failures=1``); an existing
scheduler follows its own ``distributed.scheduler.allowed-failures``. When that
is used up, the image is marked incomplete with the reason; results already in
the cache stay there. A task that raises (it should not: bad data gives an
incomplete result, not an exception) is tried once more (``retries=1``).

Before analysing, a worker compares its software and the SIMD features numpy uses
with those of the process that started the run; a worker that differs analyses
nothing and its images are marked incomplete saying what differs, because its
numbers could differ from this machine's in the last bits.

This is the only module that imports dask, and it is imported only when a dask
executor is chosen (:func:`lotproof.runner.lot.choose.make_executor`).
"""

from __future__ import annotations

import dataclasses
import platform
import uuid
from pathlib import Path
from typing import Any

from lotproof.runner.evaluate.cache import DiskStore, NullStore, Store
from lotproof.runner.evaluate.image import ImageResult
from lotproof.runner.evaluate.inputs import Sample
from lotproof.runner.lot.base import (
    SINGLE_THREAD_ENV,
    ExecutorError,
    OnImage,
    analyse_task,
    single_thread_environment,
    worker_name,
)
from lotproof.runner.recipe.load import parse_recipe
from lotproof.runner.recipe.model import Recipe

__all__ = ["ALLOWED_FAILURES", "DaskExecutor", "software_fingerprint"]

#: times a task may lose its worker and be given to another (a cluster started here)
ALLOWED_FAILURES = 1

_INSTALL_HINT = "the dask executor needs dask.distributed: pip install 'lotproof[dask]'"


def software_fingerprint() -> dict[str, Any]:
    """What must be the same on every worker for results to be bit-identical."""
    from lotproof.runner import __version__
    from lotproof.runner.evaluate.environment import LIBRARIES, cpu_info
    from lotproof.runner.evaluate.hashing import library_versions

    return {
        "lotproof": __version__,
        "python": platform.python_version(),
        "machine": platform.machine(),
        "libraries": library_versions(LIBRARIES),
        "numpy_simd": cpu_info()["numpy_simd"],
    }


def _differences(mine: dict[str, Any], theirs: dict[str, Any]) -> list[str]:
    out = []
    for name in ("lotproof", "python", "machine"):
        if mine.get(name) != theirs.get(name):
            out.append(f"{name} {mine.get(name)} (run: {theirs.get(name)})")
    libs, run_libs = mine.get("libraries", {}), theirs.get("libraries", {})
    for name in sorted(set(libs) | set(run_libs)):
        if libs.get(name) != run_libs.get(name):
            out.append(f"{name} {libs.get(name, 'missing')} (run: {run_libs.get(name, 'missing')})")
    if mine.get("numpy_simd") != theirs.get("numpy_simd"):
        gained = sorted(set(mine.get("numpy_simd", [])) - set(theirs.get("numpy_simd", [])))
        lost = sorted(set(theirs.get("numpy_simd", [])) - set(mine.get("numpy_simd", [])))
        out.append(f"SIMD features (extra {gained or 'none'}, missing {lost or 'none'})")
    return out


# ------------------------------------------------------------------ in the worker

# Per worker process: parsed recipes and opened stores, by what the task sent. A
# worker serves one run after another, so a few are kept, the oldest dropped.
_WORKER: dict[str, Any] = {"recipes": {}, "stores": {}, "fingerprint": None}
_KEEP_RECIPES = 4


def _worker_recipe(raw: bytes, path: str) -> Recipe:
    recipes: dict[tuple[bytes, str], Recipe] = _WORKER["recipes"]
    recipe = recipes.get((raw, path))
    if recipe is None:
        recipe = parse_recipe(raw, path)
        while len(recipes) >= _KEEP_RECIPES:
            recipes.pop(next(iter(recipes)))
        recipes[(raw, path)] = recipe
    return recipe


def _worker_store(cache_root: str | None) -> Store:
    if cache_root is None:
        return NullStore()
    stores: dict[str, Store] = _WORKER["stores"]
    if cache_root not in stores:
        stores[cache_root] = DiskStore(Path(cache_root))
    return stores[cache_root]


def _analyse_on_worker(
    sample: Sample,
    *,
    recipe_raw: bytes,
    recipe_path: str,
    lot: str,
    cache_root: str | None,
    fingerprint: dict[str, Any],
) -> ImageResult:
    """The dask task: one image, with the recipe parsed and the cache opened once per worker."""
    if _WORKER["fingerprint"] is None:
        _WORKER["fingerprint"] = software_fingerprint()
    differs = _differences(_WORKER["fingerprint"], fingerprint)
    if differs:
        result = ImageResult(id=sample.id).fail(
            f"worker {worker_name()} differs from the machine that started the run: "
            + "; ".join(differs)
        )
        result.worker = worker_name()
        return result
    return analyse_task(
        _worker_recipe(recipe_raw, recipe_path), sample, Path(lot), _worker_store(cache_root)
    )


# ------------------------------------------------------------------ in the client


def _absolute(sample: Sample, lot: Path, lot_abs: Path) -> Sample:
    """``sample`` with its files under ``lot_abs``: a worker's working folder is not ours."""
    files = {
        name: lot_abs / path.relative_to(lot) if path.is_relative_to(lot) else path.absolute()
        for name, path in sample.files.items()
    }
    return dataclasses.replace(sample, files=files)


class DaskExecutor:
    """A dask.distributed cluster: an existing scheduler, or a cluster of local processes.

    Parameters
    ----------
    scheduler
        Address of a running scheduler (``tcp://HOST:8786``).
    workers
        Start a cluster on this machine with this many worker processes (one
        thread each, BLAS/OpenMP/numba pinned to one thread, loopback only, no
        dashboard) for as long as the executor is open.
    client
        An open ``distributed.Client`` to use (a notebook's); it is not closed.

    Exactly one of them is given. Use the executor as a context manager, or call
    :meth:`close`, to stop a cluster it started.

    Raises
    ------
    lotproof.runner.lot.base.ExecutorError
        When dask.distributed is not installed, or the scheduler cannot be reached.
    """

    def __init__(
        self,
        scheduler: str | None = None,
        *,
        workers: int | None = None,
        client: Any = None,
        connect_timeout: float = 10.0,
    ):

        if sum(x is not None for x in (scheduler, workers, client)) != 1:
            raise ExecutorError("give one of: a scheduler address, a number of workers, a client")
        try:
            import distributed
        except ImportError:
            raise ExecutorError(_INSTALL_HINT) from None
        self._cluster: Any = None
        self._owns_client = client is None
        if client is not None:
            self.client = client
            where = f"dask, client of {client.scheduler.address}"
        elif scheduler is not None:
            try:
                self.client = distributed.Client(scheduler, timeout=connect_timeout)
            except (OSError, TimeoutError) as err:
                raise ExecutorError(
                    f"cannot reach the dask scheduler at {scheduler}: {err}"
                ) from None
            where = f"dask, scheduler {self.client.scheduler.address}"
        else:
            n = max(1, int(workers))  # type: ignore[arg-type]
            self._cluster = _local_cluster(distributed, n)
            self.client = distributed.Client(self._cluster)
            where = f"dask-local, {n} worker process{'es' if n != 1 else ''}"
        if self._cluster is None:
            n_workers = len(self.client.scheduler_info(n_workers=-1).get("workers", {}))
            where += f", {n_workers} worker{'s' if n_workers != 1 else ''} at start"
        self._fingerprint = software_fingerprint()
        #: recorded in the ledger's run-start event
        self.description = f"{where} (distributed {distributed.__version__})"

    # a context manager, so that a cluster started here always stops
    def __enter__(self) -> DaskExecutor:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the client (if opened here) and stop the cluster (if started here)."""
        if self._owns_client:
            self.client.close()
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def map(
        self,
        recipe: Recipe,
        samples: list[Sample],
        lot: Path,
        store: Store,
        on_image: OnImage | None,
    ) -> list[ImageResult]:
        """One task per image; results in the samples' order, ``on_image`` as they finish."""
        from distributed import as_completed

        if not samples:
            return []
        lot = Path(lot)
        lot_abs = lot.absolute()
        cache_root = str(Path(store.location).absolute()) if isinstance(store, DiskStore) else None
        # explicit keys, unique to this call: two runs of the same lot are two computations
        token = uuid.uuid4().hex
        keys = [f"lotproof-image-{token}-{index}" for index in range(len(samples))]
        index_of = {key: index for index, key in enumerate(keys)}
        futures = self.client.map(
            _analyse_on_worker,
            [_absolute(sample, lot, lot_abs) for sample in samples],
            key=keys,
            pure=False,
            retries=1,
            recipe_raw=recipe.raw,
            recipe_path=recipe.path,
            lot=str(lot_abs),
            cache_root=cache_root,
            fingerprint=self._fingerprint,
        )
        results: list[ImageResult | None] = [None] * len(samples)
        pending = set(keys)
        try:
            completed = as_completed(futures, with_results=True, raise_errors=False)
            for batch in completed.batches():
                retried = self._retried([future.key for future, _ in batch])
                for future, outcome in batch:
                    index = index_of[future.key]
                    result = _outcome(samples[index], future, outcome, retried.get(future.key, 0))
                    future.release()  # the worker may drop its copy now
                    pending.discard(future.key)
                    results[index] = result
                    if on_image is not None:
                        on_image(result)
        except BaseException:
            self.client.cancel([f for f in futures if f.key in pending])
            raise
        return [r for r in results if r is not None]

    def _retried(self, keys: list[str]) -> dict[str, int]:
        """How many workers died while running each of ``keys`` (0s left out)."""

        # defined here so that it travels by value: the scheduler need not have lotproof
        def count(dask_scheduler: Any, keys: list[str]) -> dict[str, int]:
            out = {}
            for key in keys:
                task = dask_scheduler.tasks.get(key)
                if task is not None and task.suspicious:
                    out[key] = int(task.suspicious)
            return out

        try:
            counts: dict[str, int] = self.client.run_on_scheduler(count, keys=keys)
            return counts
        except Exception:  # a scheduler that refuses to run code: no note, the same results
            return {}


def _outcome(sample: Sample, future: Any, outcome: Any, retried: int) -> ImageResult:
    from distributed import KilledWorker

    if future.status == "finished" and isinstance(outcome, ImageResult):
        if retried:
            outcome.notes.append(
                f"{sample.id}: the worker analysing it stopped; analysed again on "
                f"{outcome.worker or 'another worker'}"
                + (f" ({retried} workers stopped)" if retried > 1 else "")
            )
        return outcome
    if isinstance(outcome, tuple) and len(outcome) == 3:  # (type, exception, traceback)
        err = outcome[1]
    else:
        err = outcome
    failed = ImageResult(id=sample.id)
    if isinstance(err, KilledWorker):
        failed.fail(
            f"every worker that analysed it stopped before finishing ({err.allowed_failures + 1} "
            f"tries, the last on {err.last_worker.address}); not tried again"
        )
        failed.worker = str(err.last_worker.address)
    elif isinstance(err, BaseException):  # includes a task cancelled on the cluster
        failed.fail(f"the cluster could not analyse it ({type(err).__name__}: {err})")
    else:
        failed.fail(f"the cluster gave no result for it (task {future.status})")
    return failed


def _local_cluster(distributed: Any, n_workers: int) -> Any:
    import dask

    pinned = dict.fromkeys(SINGLE_THREAD_ENV, "1")
    # one task per worker at a time: a worker that dies then takes only the image it
    # was analysing with it, never a queued one
    with (
        single_thread_environment(),
        dask.config.set({"distributed.scheduler.worker-saturation": 1.0}),
    ):
        return distributed.LocalCluster(
            n_workers=n_workers,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address=None,
            # the scheduler always serves HTTP (health, metrics; no dashboard here): on a free
            # loopback port, not dask's usual 8787, which another cluster may hold
            scheduler_kwargs={
                "allowed_failures": ALLOWED_FAILURES,
                "dashboard_address": "127.0.0.1:0",
            },
            env=pinned,  # also for workers the nanny restarts later
        )
