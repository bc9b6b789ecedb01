"""Benchmark of lotproof's morphology kernels, threshold, measure and a whole pipeline.

Run by hand, not by pytest::

    . .venv/bin/activate
    python bench/bench_kernels.py            # everything (about 3 minutes)
    python bench/bench_kernels.py --quick    # fewer repeats, no radius / square sweeps

Every case prints: lotproof's time, scikit-image's default call, OpenCV with
the same exact kernel and a constant neutral border (BORDER_CONSTANT with the
dtype's largest value for erosion, smallest for dilation), one memory copy of
the data (``np.copyto``), the ratios, the issue's target and whether it is met.
Times are medians of several repeats, single-threaded (OpenCV is set to one
thread; the machine has 2 cores and the pipeline runs one image per core).
scikit-image's default disk erosions take seconds; they are timed once, on a
crop where said, and scaled by the pixel count (the cost is linear in it).

Before timing, every lotproof result is checked bit for bit against OpenCV
(or against the reference kernel where OpenCV has no equivalent).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
import warnings
from collections.abc import Callable
from pathlib import Path

import cv2
import numpy as np
import skimage
from skimage import filters as skf
from skimage import measure as skm
from skimage import morphology as skmorph

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from lotproof.steps import _morph, _morph_numba  # noqa: E402
from lotproof.steps import footprints as fps  # noqa: E402
from lotproof.steps import measure as meas  # noqa: E402
from lotproof.steps import morphology as morph  # noqa: E402
from lotproof.steps import threshold as thr  # noqa: E402

cv2.setNumThreads(1)
REPEATS = 7
SIDE = 2048
RESULTS: list[tuple[str, str, float, str, bool]] = []


def timed(func: Callable[[], object], repeats: int | None = None) -> float:
    """Median seconds of ``repeats`` calls after one warm-up call."""
    repeats = REPEATS if repeats is None else repeats
    func()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def once(func: Callable[[], object]) -> float:
    t0 = time.perf_counter()
    func()
    return time.perf_counter() - t0


def ms(seconds: float) -> str:
    return f"{seconds * 1e3:9.2f} ms"


def target(name: str, what: str, ratio: float, limit: float, kind: str) -> None:
    """Record ``ratio`` against a target: ``kind`` "<=" (at most) or ">=" (at least)."""
    met = ratio <= limit if kind == "<=" else ratio >= limit
    RESULTS.append((name, what, ratio, f"{kind} {limit:g}x", met))
    print(f"      {what:<34} {ratio:9.3f}x  target {kind} {limit:g}x  {'met' if met else 'MISSED'}")


def copy_time(data: np.ndarray) -> float:
    dst = np.empty_like(data)
    return timed(lambda: np.copyto(dst, data))


def same(a: np.ndarray, b: np.ndarray, what: str) -> None:
    if a.dtype != b.dtype or a.shape != b.shape or a.tobytes() != b.tobytes():
        raise SystemExit(f"NOT bit-identical: {what}")


# --------------------------------------------------------------------------- data


def gray_image(dtype=np.uint8, side: int = SIDE, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    top = np.iinfo(dtype).max
    return rng.integers(0, top, size=(side, side), dtype=dtype, endpoint=True)


def mask_image(side: int = SIDE, seed: int = 2) -> np.ndarray:
    rng = np.random.default_rng(seed)
    # blobs rather than salt: a mask that erosion does not simply wipe out
    small = rng.random((side // 8, side // 8)) < 0.5
    return np.kron(small, np.ones((8, 8), dtype=bool)).astype(bool)


def volume(seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.integers(0, 255, size=(256, 256, 256), dtype=np.uint8, endpoint=True)


def particles(seed: int = 4) -> np.ndarray:
    """A 2048^2 uint16 field of ~2000 bright particles on a slowly varying background."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:SIDE, 0:SIDE].astype(np.float64)
    image = 9000 + 4000 * np.sin(yy / 700.0) * np.cos(xx / 900.0)
    n = 2300
    cy, cx = rng.uniform(0, SIDE, n), rng.uniform(0, SIDE, n)
    radius = rng.uniform(2.5, 9.0, n)
    for y0, x0, r in zip(cy, cx, radius, strict=False):
        lo_y, hi_y = int(max(0, y0 - r - 1)), int(min(SIDE, y0 + r + 2))
        lo_x, hi_x = int(max(0, x0 - r - 1)), int(min(SIDE, x0 + r + 2))
        sub_y, sub_x = yy[lo_y:hi_y, lo_x:hi_x], xx[lo_y:hi_y, lo_x:hi_x]
        inside = (sub_y - y0) ** 2 + (sub_x - x0) ** 2 <= r * r
        image[lo_y:hi_y, lo_x:hi_x][inside] += 20000
    image += rng.normal(0, 600, image.shape)
    return np.clip(image, 0, 65535).astype(np.uint16)


# --------------------------------------------------------------------------- references


def cv_erode(image: np.ndarray, fp: np.ndarray) -> np.ndarray:
    work = image.view(np.uint8) if image.dtype == np.bool_ else image
    high = _morph.neutral(work.dtype, "erode")
    out = cv2.erode(work, fp.astype(np.uint8), borderType=cv2.BORDER_CONSTANT, borderValue=high)
    return out.view(np.bool_) if image.dtype == np.bool_ else out


def cv_dilate(image: np.ndarray, fp: np.ndarray) -> np.ndarray:
    work = image.view(np.uint8) if image.dtype == np.bool_ else image
    low = _morph.neutral(work.dtype, "dilate")
    out = cv2.dilate(work, fp.astype(np.uint8), borderType=cv2.BORDER_CONSTANT, borderValue=low)
    return out.view(np.bool_) if image.dtype == np.bool_ else out


def cv_ball_erode(vol: np.ndarray, radius: float) -> np.ndarray:
    """Erosion by a ball, OpenCV per slab: each plane eroded by each distinct cross-section."""
    ball = fps.ball(radius)
    h = ball.shape[0] // 2
    sections = {abs(dz): ball[h + dz] for dz in range(-h, h + 1)}
    out = np.empty_like(vol)
    eroded = {
        d: np.stack([cv_erode(vol[z], trim(sections[d])) for z in range(vol.shape[0])])
        for d in sections
    }
    for z in range(vol.shape[0]):
        acc = None
        for dz in range(-h, h + 1):
            if 0 <= z + dz < vol.shape[0]:
                part = eroded[abs(dz)][z + dz]
                acc = part.copy() if acc is None else np.minimum(acc, part, out=acc)
        out[z] = acc
    return out


def trim(section: np.ndarray) -> np.ndarray:
    """A ball's cross-section cut to its odd, centred bounding box."""
    cols = np.flatnonzero(section.any(axis=0))
    half = section.shape[1] // 2
    reach = max(half - cols[0], cols[-1] - half)
    return section[half - reach : half + reach + 1, half - reach : half + reach + 1]


# --------------------------------------------------------------------------- cases


def morph_case(
    name: str,
    ours: Callable[[], np.ndarray],
    cv: Callable[[], np.ndarray] | None,
    sk: Callable[[], object] | None,
    data: np.ndarray,
    *,
    sk_scale: float = 1.0,
    sk_note: str = "",
    radius: float | None = None,
    cv_note: str = "",
) -> None:
    """Time one flat morphology case and check its targets."""
    if cv is not None:
        same(ours(), cv(), name)
    t_ours = timed(ours)
    t_copy = copy_time(data)
    t_cv = timed(cv) if cv is not None else float("nan")
    if sk is not None:
        repeats = 3 if sk_scale == 1.0 and radius is not None and radius < 7 else 1
        t_sk = (timed(sk, repeats) if repeats > 1 else once(sk)) * sk_scale
    else:
        t_sk = float("nan")
    print(
        f"  {name:<44} ours {ms(t_ours)} | skimage {ms(t_sk)}{sk_note} | "
        f"OpenCV {ms(t_cv)}{cv_note} | copy {ms(t_copy)}"
    )
    print(
        f"      ours/OpenCV {t_ours / t_cv:7.3f}  skimage/ours {t_sk / t_ours:9.1f}  "
        f"ours/copy {t_ours / t_copy:7.1f}"
    )
    if cv is not None:
        target(name, "ours / OpenCV", t_ours / t_cv, 1.0, "<=")
    if sk is not None and radius is not None and radius >= 7:
        target(name, "scikit-image default / ours", t_sk / t_ours, 100.0, ">=")
    return t_ours, t_copy


def bench_first_call() -> None:
    print("\n== numba: first-call cost (new process) ==")
    code = (
        "import time; t0 = time.perf_counter(); "
        "from steps import _morph_numba as nb; t1 = time.perf_counter(); nb.warm_up(); "
        "t2 = time.perf_counter(); print(f'{t1 - t0:.3f} {t2 - t1:.3f}')"
    )
    env = dict(os.environ)
    warm = subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True, check=True
    ).stdout.split()
    with tempfile.TemporaryDirectory() as cache:
        env["NUMBA_CACHE_DIR"] = cache
        cold = subprocess.run(
            [sys.executable, "-c", code],
            cwd=ROOT,
            env=env,
            capture_output=True,
            text=True,
            check=True,
        ).stdout.split()
    print(f"  import numba + kernels module: {float(warm[0]) * 1e3:.0f} ms")
    print(
        f"  warm_up(), compiled code loaded from the on-disk cache: {float(warm[1]) * 1e3:.0f} ms"
    )
    print(f"  warm_up(), empty cache (compiles 7 dtypes x 4 kernels): {float(cold[1]):.1f} s")


def bench_gray(quick: bool) -> None:
    print("\n== flat morphology, 2048^2 ==")
    img8 = gray_image(np.uint8)
    crop = img8[:512, :512]
    scale = img8.size / crop.size
    for r in (1, 7, 15, 30):
        fp = fps.disk(float(r))
        slow = r >= 7
        sk_fp = skmorph.disk(r)
        sk_data = crop if slow else img8
        morph_case(
            f"gray erosion, disk r={r}, uint8",
            lambda fp=fp: _morph.erode(img8, fp),
            lambda fp=fp: cv_erode(img8, fp),
            lambda sk_fp=sk_fp, d=sk_data: skmorph.erosion(d, sk_fp),
            img8,
            sk_scale=scale if slow else 1.0,
            sk_note=" (512^2 crop x16, once)" if slow else "",
            radius=r,
        )
        if r == 15:
            t_ours = timed(lambda fp=fp: _morph.erode(img8, fp))
            target(
                "gray erosion, disk r=15, uint8",
                "ours / one memory copy",
                t_ours / copy_time(img8),
                15.0,
                "<=",
            )
    fp = fps.square(15.0)
    morph_case(
        "gray erosion, square 15, uint8",
        lambda: _morph.erode(img8, fp),
        lambda: cv_erode(img8, fp),
        lambda: skmorph.erosion(img8, skmorph.footprint_rectangle((15, 15))),
        img8,
    )
    mask = mask_image()
    fp3 = fps.disk(3.0)

    def sk_binary():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # binary_erosion is deprecated in 0.26
            return skmorph.binary_erosion(mask, skmorph.disk(3))

    morph_case(
        "binary erosion, disk r=3, bool",
        lambda: _morph.erode(mask, fp3),
        lambda: cv_erode(mask, fp3),
        sk_binary,
        mask,
        radius=3,
    )
    fp7 = fps.disk(7.0)
    params7 = morph.MorphologyParams(footprint="disk", radius="7 px")
    morph_case(
        "gray dilation, disk r=7, uint8",
        lambda: _morph.dilate(img8, fp7),
        lambda: cv_dilate(img8, fp7),
        lambda: skmorph.dilation(crop, skmorph.disk(7)),
        img8,
        sk_scale=scale,
        sk_note=" (512^2 crop x16, once)",
        radius=7,
    )
    morph_case(
        "opening, disk r=7, uint8 (step 'open')",
        lambda: morph.open_(params7, img8, spacing=(1.0, 1.0)),
        lambda: cv_dilate(cv_erode(img8, fp7), fp7),
        lambda: skmorph.opening(crop, skmorph.disk(7)),
        img8,
        sk_scale=scale,
        sk_note=" (512^2 crop x16, once)",
        radius=7,
        cv_note=" (erode+dilate)",
    )
    params15 = morph.BackgroundParams(footprint="disk", radius="15 px", features="bright")
    fp15 = fps.disk(15.0)
    morph_case(
        "top-hat, disk r=15, uint8 (step 'subtract-background')",
        lambda: morph.subtract_background(params15, img8, spacing=(1.0, 1.0)),
        lambda: img8 - cv_dilate(cv_erode(img8, fp15), fp15),
        lambda: skmorph.white_tophat(crop, skmorph.disk(15)),
        img8,
        sk_scale=scale,
        sk_note=" (512^2 crop x16, once)",
        radius=15,
        cv_note=" (img - open)",
    )
    params3 = morph.OutlineParams(footprint="disk", radius="3 px")
    morph_case(
        "gradient, disk r=3, uint8 (step 'outline')",
        lambda: morph.outline(params3, img8, spacing=(1.0, 1.0)),
        lambda: cv_dilate(img8, fp3) - cv_erode(img8, fp3),
        lambda: skmorph.dilation(img8, skmorph.disk(3)) - skmorph.erosion(img8, skmorph.disk(3)),
        img8,
        radius=3,
        cv_note=" (dilate-erode)",
    )
    img16 = gray_image(np.uint16)
    crop16 = img16[:512, :512]
    for r in (7, 15):
        fp = fps.disk(float(r))
        morph_case(
            f"gray erosion, disk r={r}, uint16",
            lambda fp=fp: _morph.erode(img16, fp),
            lambda fp=fp: cv_erode(img16, fp),
            lambda r=r: skmorph.erosion(crop16, skmorph.disk(r)),
            img16,
            sk_scale=scale,
            sk_note=" (512^2 crop x16, once)",
            radius=r,
        )
    imgf = gray_image(np.uint16).astype(np.float32)
    fp = fps.disk(7.0)
    morph_case(
        "gray erosion, disk r=7, float32",
        lambda: _morph.erode(imgf, fp),
        lambda: cv_erode(imgf, fp),
        None,
        imgf,
    )
    if quick:
        return
    print("\n== disk radii 1-30, gray erosion, 2048^2 uint8 (ours vs OpenCV) ==")
    for r in (1, 2, 3, 4, 5, 7, 10, 12, 15, 20, 25, 30):
        fp = fps.disk(float(r))
        morph_case(
            f"disk r={r}",
            lambda fp=fp: _morph.erode(img8, fp),
            lambda fp=fp: cv_erode(img8, fp),
            None,
            img8,
        )
    print("\n== squares 3-61, gray erosion, 2048^2 uint8 (ours vs OpenCV) ==")
    for side in (3, 5, 9, 15, 21, 31, 45, 61):
        fp = fps.square(float(side))
        morph_case(
            f"square {side}",
            lambda fp=fp: _morph.erode(img8, fp),
            lambda fp=fp: cv_erode(img8, fp),
            None,
            img8,
        )


def bench_3d() -> None:
    print("\n== 3-D erosion, 256^3 uint8 ==")
    vol = volume()
    sub = vol[:128, :128, :128]
    for r in (2, 4):
        ball = fps.ball(float(r))
        morph_case(
            f"3D erosion, ball r={r}",
            lambda ball=ball: _morph.erode(vol, ball),
            lambda r=r: cv_ball_erode(vol, float(r)),
            lambda r=r: skmorph.erosion(sub, skmorph.ball(r)),
            vol,
            sk_scale=vol.size / sub.size,
            sk_note=" (128^3 crop x8, once)",
            radius=r,
            cv_note=" (per slab)",
        )


def bench_threshold_measure() -> tuple[np.ndarray, int]:
    print("\n== threshold and measure (steps owned elsewhere; figures only) ==")
    image = particles()
    params = thr.ThresholdParams(method="otsu")
    t_ours = timed(lambda: thr.threshold(params, image, spacing=(1.0, 1.0)))
    t_sk = timed(lambda: skf.threshold_otsu(image))
    t_copy = copy_time(image)
    print(f"  Otsu on 2048^2 uint16: ours {ms(t_ours)} | skimage {ms(t_sk)} | copy {ms(t_copy)}")
    print(f"      ours/skimage {t_ours / t_sk:.3f}  ours/copy {t_ours / t_copy:.1f}")

    background = morph.subtract_background(
        morph.BackgroundParams(footprint="disk", radius="25 px", features="bright"),
        image,
        spacing=(1.0, 1.0),
    )
    mask = thr.threshold(params, background, spacing=(1.0, 1.0)).data
    labels = meas.label(meas.LabelParams(connectivity=8), mask, spacing=(1.0, 1.0))
    count = int(labels.max())
    mparams = meas.MeasureParams(connectivity=8)
    t_meas = timed(lambda: meas.measure(mparams, labels, spacing=(1.0, 1.0)), 5)
    props = (
        "label",
        "area",
        "equivalent_diameter_area",
        "centroid",
        "perimeter_crofton",
        "feret_diameter_max",
        "axis_major_length",
        "axis_minor_length",
        "euler_number",
    )
    t_rp = timed(lambda: skm.regionprops_table(labels, properties=props), 3)
    t_rp5 = timed(
        lambda: skm.regionprops_table(
            labels,
            properties=(
                "label",
                "area",
                "equivalent_diameter_area",
                "centroid",
                "perimeter_crofton",
            ),
        ),
        3,
    )
    print(
        f"  measure, {count} objects: ours (every column) {ms(t_meas)} | regionprops_table "
        f"(9 props) {ms(t_rp)} | (5 props) {ms(t_rp5)}"
    )
    target(
        f"measure, {count} objects", "ours / regionprops_table (9 props)", t_meas / t_rp, 0.25, "<="
    )
    return image, count


def pipeline_ours(image: np.ndarray):
    spacing = (1.0, 1.0)
    level = morph.subtract_background(
        morph.BackgroundParams(footprint="disk", radius="25 px", features="bright"),
        image,
        spacing=spacing,
    )
    mask = thr.threshold(thr.ThresholdParams(method="otsu"), level, spacing=spacing).data
    clean = morph.open_(
        morph.MorphologyParams(footprint="disk", radius="2 px"), mask, spacing=spacing
    )
    labels = meas.label(meas.LabelParams(connectivity=8), clean, spacing=spacing)
    return meas.measure(meas.MeasureParams(connectivity=8), labels, spacing=spacing)


def pipeline_skimage(image: np.ndarray):
    level = skmorph.white_tophat(image, skmorph.disk(25))
    mask = level > skf.threshold_otsu(level)
    clean = skmorph.opening(mask, skmorph.disk(2))
    labels = skm.label(clean, connectivity=2)
    return skm.regionprops_table(
        labels,
        properties=("label", "area", "equivalent_diameter_area", "centroid", "perimeter_crofton"),
    )


def pipeline_opencv(image: np.ndarray):
    big = fps.disk(25.0).astype(np.uint8)
    small = fps.disk(2.0).astype(np.uint8)
    opened = cv2.dilate(
        cv2.erode(image, big, borderType=cv2.BORDER_CONSTANT, borderValue=65535),
        big,
        borderType=cv2.BORDER_CONSTANT,
        borderValue=0,
    )
    level = image - opened
    mask = (level > skf.threshold_otsu(level)).astype(np.uint8)
    clean = cv2.dilate(
        cv2.erode(mask, small, borderType=cv2.BORDER_CONSTANT, borderValue=1),
        small,
        borderType=cv2.BORDER_CONSTANT,
        borderValue=0,
    )
    n, _labels, stats, centroids = cv2.connectedComponentsWithStats(clean, connectivity=8)
    area = stats[1:, cv2.CC_STAT_AREA].astype(np.float64)
    return n - 1, area, np.sqrt(4 * area / np.pi), centroids[1:]


def bench_pipeline(image: np.ndarray) -> None:
    print("\n== whole pipeline per 2048^2 uint16 image ==")
    print("   top-hat disk 25, Otsu, opening disk 2, label (8), measure")
    t_ours = timed(lambda: pipeline_ours(image), 3)
    t_cv = timed(lambda: pipeline_opencv(image), 3)
    crop = image[:512, :512]
    t_sk = once(lambda: pipeline_skimage(crop)) * (image.size / crop.size)
    print(
        f"  ours (step functions) {ms(t_ours)} | scikit-image script {ms(t_sk)} "
        f"(512^2 crop x16, once) | OpenCV script {ms(t_cv)}"
    )
    target("whole pipeline", "scikit-image script / ours", t_sk / t_ours, 100.0, ">=")
    target("whole pipeline", "ours / OpenCV script", t_ours / t_cv, 0.5, "<=")


def main() -> None:
    global REPEATS
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats, no sweeps")
    parser.add_argument("--only", choices=("first", "gray", "3d", "measure", "pipeline"))
    args = parser.parse_args()
    if args.quick:
        REPEATS = 3
    print(
        f"numpy {np.__version__}, scikit-image {skimage.__version__}, OpenCV {cv2.__version__} "
        f"(1 thread), numba {__import__('numba').__version__}, {os.cpu_count()} cores"
    )
    _morph_numba.warm_up()
    if args.only in (None, "first"):
        bench_first_call()
    if args.only in (None, "gray"):
        bench_gray(args.quick)
    if args.only in (None, "3d"):
        bench_3d()
    if args.only in (None, "measure", "pipeline"):
        image, _ = bench_threshold_measure()
        if args.only != "measure":
            bench_pipeline(image)
    print("\n== targets ==")
    for name, what, ratio, bound, met in RESULTS:
        print(f"  {'met   ' if met else 'MISSED'} {name:<52} {what:<36} {ratio:9.3f}x ({bound})")
    missed = sum(not met for *_, met in RESULTS)
    print(f"  {len(RESULTS) - missed} of {len(RESULTS)} targets met")


if __name__ == "__main__":
    main()
