"""Dask executor benchmark (issue: scale out on dask.distributed). Run by hand:

    python bench/bench_dask.py              # 16 images of 2048x2048 uint16, about 1 minute
    python bench/bench_dask.py --quick      # 4 images of 1024x1024, for a smoke test

It builds the runner benchmark's synthetic lot at run time (nothing is committed;
bench_runner.py's recipe and images), then prints every figure with its target:

1. ``--executor dask-local --workers 2`` against ``--jobs 2``, end to end as the
   command runs them (start-up of the cluster or of the process pool included),
   no cache, best of ``--repeat`` runs each;                            target <= 1.25x
2. the same without the cluster's start-up (a cluster kept open), and the
   start-up itself;                                                     reported
3. the per-task overhead: the time ``--tiny`` more 16x16 images add to the
   executor's map on the open cluster, minus what they add in this process
   split over the workers, per image and worker, in ms;                 reported
4. the two executors' run files are identical (ledger and report aside).
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from bench_runner import RECIPE, make_lot  # noqa: E402

from lotproof import load_recipe, run_lot  # noqa: E402
from lotproof.runner.evaluate.cache import NullStore  # noqa: E402
from lotproof.runner.evaluate.inputs import find_samples  # noqa: E402
from lotproof.runner.lot.choose import open_executor  # noqa: E402
from lotproof.runner.lot.local import LocalExecutor  # noqa: E402

WORKERS = 2


def _same_files(a: Path, b: Path) -> bool:
    def files(run: Path) -> dict[str, bytes]:
        return {
            p.relative_to(run).as_posix(): p.read_bytes()
            for p in sorted(run.rglob("*"))
            # the ledger and the report say which executor ran and when; SHA256SUMS covers them
            if p.is_file() and p.name not in ("ledger.jsonl", "report.html", "SHA256SUMS")
        }

    return files(a) == files(b)


def _timed_map(executor, recipe, lot: Path) -> float:  # type: ignore[no-untyped-def]
    """The executor alone: no run folder, no ledger, no figures (they cost the same anywhere)."""
    samples = find_samples(lot, recipe.inputs)
    started = time.perf_counter()
    results = executor.map(recipe, samples, lot, NullStore(), None)
    seconds = time.perf_counter() - started
    assert all(r.status == "ok" for r in results), [r.reason for r in results if r.status != "ok"]
    return seconds


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--quick", action="store_true", help="4 images of 1024x1024")
    parser.add_argument(
        "--repeat", type=int, default=2, help="runs of each executor (best is kept)"
    )
    parser.add_argument("--tiny", type=int, default=200, help="images of the per-task overhead lot")
    args = parser.parse_args()
    n, side = (4, 1024) if args.quick else (16, 2048)
    work = Path(tempfile.mkdtemp(prefix="lotproof-bench-dask-"))
    figures: list[tuple[str, str, str, bool | None]] = []
    try:
        (work / "recipe.yaml").write_text(RECIPE)
        recipe = load_recipe(work / "recipe.yaml")
        lot = make_lot(work / "lot", n, side)
        tiny = [
            make_lot(work / "tiny-1", args.tiny, 16),
            make_lot(work / "tiny-2", 2 * args.tiny, 16),
        ]
        # warm the imports and any compiled kernels (and their on-disk cache) outside the timings
        run_lot(recipe, make_lot(work / "warm", 1, 256), work / "runs", jobs=1)

        pool_s, dask_s = [], []
        pool_run = dask_run = None
        for _ in range(args.repeat):
            started = time.perf_counter()
            pool_run = run_lot(recipe, lot, work / "runs", store=NullStore(), jobs=WORKERS).run_dir
            pool_s.append(time.perf_counter() - started)
            started = time.perf_counter()
            with open_executor(
                "dask-local", jobs=WORKERS, scheduler=None, workers=WORKERS
            ) as executor:
                dask_run = run_lot(
                    recipe, lot, work / "runs", store=NullStore(), executor=executor
                ).run_dir
            dask_s.append(time.perf_counter() - started)
        ratio = min(dask_s) / min(pool_s)
        figures.append(
            (
                f"1 dask-local --workers {WORKERS} / --jobs {WORKERS}, end to end",
                f"{ratio:.3f}x ({min(dask_s):.2f} s vs {min(pool_s):.2f} s)",
                "<= 1.25x",
                ratio <= 1.25,
            )
        )

        started = time.perf_counter()
        with open_executor("dask-local", jobs=WORKERS, scheduler=None, workers=WORKERS) as executor:
            startup = time.perf_counter() - started
            # a first lot on the new workers imports the steps and loads compiled kernels there
            run_lot(
                recipe, make_lot(work / "warm-dask", WORKERS, 256), work / "runs", executor=executor
            )
            started = time.perf_counter()
            run_lot(recipe, lot, work / "runs", store=NullStore(), executor=executor)
            open_s = time.perf_counter() - started
            figures.append(
                (
                    "2 the same on an open cluster / --jobs 2",
                    f"{open_s / min(pool_s):.3f}x ({open_s:.2f} s; cluster start-up "
                    f"{startup:.2f} s)",
                    "reported",
                    None,
                )
            )

            tiny_dask = [_timed_map(executor, recipe, lot_) for lot_ in tiny]
        tiny_here = [_timed_map(LocalExecutor(1), recipe, lot_) for lot_ in tiny]
        # the slope between a lot of N and one of 2N images leaves out what a run costs once
        extra_s = (tiny_dask[1] - tiny_dask[0]) - (tiny_here[1] - tiny_here[0]) / WORKERS
        overhead_ms = extra_s * WORKERS / args.tiny * 1000
        figures.append(
            (
                f"3 per-task overhead ({args.tiny} more images of 16x16)",
                f"{overhead_ms:.2f} ms per image and worker (cluster {tiny_dask[0]:.2f} s / "
                f"{tiny_dask[1]:.2f} s, this process {tiny_here[0]:.2f} s / {tiny_here[1]:.2f} s)",
                "reported",
                None,
            )
        )

        same = pool_run is not None and dask_run is not None and _same_files(pool_run, dask_run)
        figures.append(
            ("4 run files of --jobs 2 and dask-local identical", str(same), "True", same)
        )
    finally:
        shutil.rmtree(work, ignore_errors=True)

    width = max(len(name) for name, *_ in figures)
    print(f"lot: {n} images of {side}x{side} uint16, {WORKERS} workers, best of {args.repeat}")
    for name, value, target, met in figures:
        mark = "" if met is None else ("  met" if met else "  NOT MET")
        print(f"{name:<{width}}  {value}  (target {target}){mark}")


if __name__ == "__main__":
    main()
