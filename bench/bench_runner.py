"""Runner benchmark (issue: content-hash cache and parallel executor). Run by hand:

    python bench/bench_runner.py            # 16 images of 2048x2048 uint16, about 3 minutes
    python bench/bench_runner.py --quick    # 4 images of 1024x1024, for a smoke test

It builds a synthetic lot at run time (nothing is committed), then measures, in one run,
side by side, and prints every figure with its target and whether it is met:

1. runner overhead: a cold run (empty cache, --jobs 1) against the same step functions
   called in a plain Python loop writing the same CSVs;                target <= 1.10x
2. against plain scikit-image defaults (white_tophat/black_tophat with disk(25),
   threshold_otsu, binary_opening, label, regionprops_table), per image (on a crop
   unless --full-skimage: the default disk morphology is very slow);   reported
3. warm rerun (everything reused) vs cold;                             target <= 0.05x
4. rerun after changing only the last step's parameter: computes exactly that step;
   time <= that step's share of the cold run + 0.05x cold
5. --jobs 2 vs --jobs 1 throughput;                                    target >= 1.7x
6. peak RSS with 64 images vs 8 images (separate processes);           target <= 1.2x
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from lotproof import load_recipe, run_lot  # noqa: E402
from lotproof.runner.evaluate.cache import DiskStore  # noqa: E402
from lotproof.runner.evaluate.image import resolve_params  # noqa: E402
from lotproof.steps import REGISTRY, Output  # noqa: E402

RECIPE = """\
format: lotproof/1
name: bench-pipeline
revision: 1
pixel_size: 1 um
inputs:
  section: "*.tif"
steps:
  level:
    apply: subtract-background
    to: section
    features: dark
    radius: 25 px
  pores:
    apply: threshold
    to: level
    method: otsu
  clean:
    apply: open
    to: pores
    radius: 2 px
  stats:
    apply: measure
    to: clean
    connectivity: 8
limits:
  porosity:
    value: stats.area_fraction
    max: 0.3
"""


def make_image(seed: int, side: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:side, :side].astype(np.float32)
    image = 30000 + 4000 * (xx / side) + rng.normal(0, 300, (side, side)).astype(np.float32)
    n = int(side * side / 2000)
    cy = rng.integers(0, side, n)
    cx = rng.integers(0, side, n)
    r = rng.integers(2, 12, n)
    for y, x, rad in zip(cy, cx, r, strict=True):
        y0, y1, x0, x1 = (
            max(0, y - rad),
            min(side, y + rad + 1),
            max(0, x - rad),
            min(side, x + rad + 1),
        )
        sub = (yy[y0:y1, x0:x1] - y) ** 2 + (xx[y0:y1, x0:x1] - x) ** 2 <= rad * rad
        image[y0:y1, x0:x1][sub] = 8000
    return image.clip(0, 65535).astype(np.uint16)


def make_lot(folder: Path, n: int, side: int) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    base = [make_image(i, side) for i in range(min(n, 8))]
    for i in range(n):
        tifffile.imwrite(folder / f"img-{i:03d}.tif", base[i % len(base)])
    return folder


def plain_loop(recipe_path: Path, lot: Path, out: Path) -> None:
    """The same step functions in a plain loop, writing images.csv and objects.csv."""
    recipe = load_recipe(recipe_path)
    spacing = (1.0, 1.0)
    image_rows = []
    object_rows = []
    for path in sorted(lot.glob("*.tif")):
        data = {"section": tifffile.imread(path)}
        values = {}
        for name in recipe.order:
            step = recipe.steps[name]
            kind = REGISTRY[step.kind]
            out_ = kind.func(
                resolve_params(step.params, spacing), *[data[s] for s in step.to], spacing=spacing
            )
            if isinstance(out_, Output):
                values.update({f"{name}.{k}": v for k, v in out_.values.items()})
                out_ = out_.data
            data[name] = out_
        image_rows.append([path.name] + [repr(v) for v in values.values()])
        table = data["stats"]
        for i in range(table.n_rows):
            object_rows.append([path.name] + [repr(c[i].item()) for c in table.columns.values()])
    out.mkdir(parents=True, exist_ok=True)
    for name, rows in (("images.csv", image_rows), ("objects.csv", object_rows)):
        buffer = io.StringIO()
        csv.writer(buffer).writerows(rows)
        (out / name).write_text(buffer.getvalue())


def skimage_script(image: np.ndarray) -> None:
    from skimage import filters, measure, morphology

    level = morphology.black_tophat(image, morphology.disk(25))
    pores = level > filters.threshold_otsu(level)
    clean = morphology.opening(pores, morphology.disk(2))
    labels = measure.label(clean)
    measure.regionprops_table(
        labels,
        properties=(
            "area",
            "equivalent_diameter_area",
            "centroid",
            "perimeter_crofton",
            "euler_number",
        ),
    )


def timed(fn, *args, **kwargs) -> float:  # type: ignore[no-untyped-def]
    started = time.perf_counter()
    fn(*args, **kwargs)
    return time.perf_counter() - started


def peak_rss_child(recipe: Path, lot: Path, out: Path, jobs: int) -> int:
    code = (
        "import resource, sys; sys.path.insert(0, %r)\n"
        "from runner import run_lot\n"
        "from lotproof.runner.evaluate.cache import NullStore\n"
        "run_lot(%r, %r, %r, store=NullStore(), jobs=%d)\n"
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)\n"
    ) % (str(ROOT), str(recipe), str(lot), str(out), jobs)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return int(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--quick", action="store_true", help="4 images of 1024x1024")
    parser.add_argument(
        "--full-skimage", action="store_true", help="time scikit-image on 2 whole images"
    )
    args = parser.parse_args()
    n, side = (4, 1024) if args.quick else (16, 2048)
    work = Path(tempfile.mkdtemp(prefix="lotproof-bench-"))
    figures: list[tuple[str, str, str, bool | None]] = []
    try:
        recipe = work / "recipe.yaml"
        recipe.write_text(RECIPE)
        lot = make_lot(work / "lot", n, side)
        # warm the imports and any compiled kernels outside the timings
        run_lot(recipe, make_lot(work / "warm", 1, 256), work / "runs", jobs=1)

        plain = timed(plain_loop, recipe, lot, work / "plain")
        store = DiskStore(work / "cache")
        started = time.perf_counter()
        cold_summary = run_lot(recipe, lot, work / "runs", store=store, jobs=1)
        cold = time.perf_counter() - started
        ratio = cold / plain
        figures.append(
            (
                "1 runner overhead: cold run / plain loop",
                f"{ratio:.3f}x ({cold:.2f} s vs {plain:.2f} s)",
                "<= 1.10x",
                ratio <= 1.10,
            )
        )

        image = tifffile.imread(sorted(lot.glob("*.tif"))[0])
        crop = image if args.full_skimage else image[:512, :512]
        ours_crop = timed(plain_loop_one, recipe, crop)
        sk = timed(skimage_script, crop)
        what = "whole image" if args.full_skimage else "512x512 crop"
        figures.append(
            (
                f"2 plain scikit-image / ours, per image ({what})",
                f"{sk / ours_crop:.1f}x ({sk:.2f} s vs {ours_crop:.3f} s)",
                "reported",
                None,
            )
        )

        warm = timed(run_lot, recipe, lot, work / "runs", store=store, jobs=1)
        figures.append(
            (
                "3 warm rerun / cold",
                f"{warm / cold:.3f}x ({warm:.2f} s)",
                "<= 0.05x",
                warm / cold <= 0.05,
            )
        )

        edited = work / "edited.yaml"
        edited.write_text(RECIPE.replace("connectivity: 8", "connectivity: 4"))
        started = time.perf_counter()
        partial = run_lot(edited, lot, work / "runs", store=store, jobs=1)
        partial_s = time.perf_counter() - started
        computed = {s.step for r in partial.results for s in r.steps if s.cache == "computed"}
        share = sum(s.seconds for r in cold_summary.results for s in r.steps if s.step == "stats")
        bound = share + 0.05 * cold
        figures.append(
            (
                "4 last-step edit: steps computed",
                ", ".join(sorted(computed)),
                "stats only",
                computed == {"stats"},
            )
        )
        figures.append(
            (
                "4 last-step edit: time",
                f"{partial_s:.2f} s",
                f"<= {bound:.2f} s",
                partial_s <= bound,
            )
        )

        one = timed(run_lot, recipe, lot, work / "runs", jobs=1)
        two_first = timed(run_lot, recipe, lot, work / "runs", jobs=2)
        two = timed(run_lot, recipe, lot, work / "runs", jobs=2)
        figures.append(
            (
                "5 --jobs 2 throughput / --jobs 1",
                f"{one / two:.2f}x ({two:.2f} s vs {one:.2f} s)",
                ">= 1.7x",
                one / two >= 1.7,
            )
        )
        figures.append(
            (
                "5 the same, first pool of the process",
                f"{one / two_first:.2f}x ({two_first:.2f} s)",
                "reported",
                None,
            )
        )

        small = make_lot(work / "lot8", 8, side)
        big = make_lot(work / "lot64", 64, side)
        rss8 = peak_rss_child(recipe, small, work / "rss", 1)
        rss64 = peak_rss_child(recipe, big, work / "rss", 1)
        figures.append(
            (
                "6 peak RSS 64 images / 8 images",
                f"{rss64 / rss8:.3f}x ({rss64 // 1024} MiB vs {rss8 // 1024} MiB)",
                "<= 1.2x",
                rss64 / rss8 <= 1.2,
            )
        )
    finally:
        shutil.rmtree(work, ignore_errors=True)

    print(f"lot: {n} images of {side}x{side} uint16; {os.cpu_count()} cores")
    width = max(len(f[0]) for f in figures)
    for name, value, target, met in figures:
        flag = "-" if met is None else ("met" if met else "NOT MET")
        print(f"{name:<{width}}  {value:<40} target {target:<12} {flag}")
    print(json.dumps({f[0]: f[1] for f in figures}))


def plain_loop_one(recipe_path: Path, image: np.ndarray) -> None:
    recipe = load_recipe(recipe_path)
    data = {"section": image}
    for name in recipe.order:
        step = recipe.steps[name]
        kind = REGISTRY[step.kind]
        out = kind.func(
            resolve_params(step.params, (1.0, 1.0)), *[data[s] for s in step.to], spacing=(1.0, 1.0)
        )
        data[name] = out.data if isinstance(out, Output) else out


if __name__ == "__main__":
    main()
