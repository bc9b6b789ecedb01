"""Generate the images of the demo validation study: a sprayed ceramic coating, synthetic.

The coating is invented. Each image imitates a polished cross-section of a
thermally sprayed ceramic coating in reflected light: a bright, faintly textured
coating with dark pores of two families (fine round pores and coarser, slightly
elongated ones), a gentle illumination gradient, the microscope's blur and sensor
noise. Because this script draws the pores, each image's true pore fraction is
known exactly.

Usage::

    python demo_run/validation/generate.py [OUT_DIR]

writes into ``OUT_DIR`` (default: ``demo_run/validation/images`` beside this file,
which git ignores; ``lotproof demo validation`` makes it):

``precision/op-A/part-01-r1.tif`` ...
    the gauge study: 10 parts x 3 operators x 2 replicates. A part is one polished
    specimen with its own porosity (0.026 to 0.108); every image of it shows the
    same field of view. An "operator" is a different microscope setting: focus
    (blur sigma), exposure (gain) and a fresh stage position draw (the field found
    again within a few pixels) for every image; a replicate repeats the draw.
``reference/P03-1.tif`` ...
    the trueness study: 4 generated reference specimens of known porosity (about
    0.03, 0.06, 0.09, 0.12), 5 fields each, imaged at the nominal setting.
``reference.csv``
    image, reference, and the known value of ``pore-stats.area_fraction`` (the true
    pore fraction of that image's field), for the plan's trueness table.
``truth.json``
    every image's seed, setting, stage offset and true pore fraction, and every
    generator setting (``PARAMETERS``).

A pixel is pore when its centre lies inside a drawn pore: the true pore mask. The
gray picture uses each pixel's covered fraction (4 x 4 samples per pixel), then
the operator's gain, blur and noise; rounding is half to even into uint16.

The method is deliberately sensitive to one parameter: a fifth of the pore area
or more is in fine pores 1.6 to 2.2 px in radius, so an opening of radius 2.5 px
(the recipe's 1.5 px plus 1 px) removes them, and the porosity of a part near the
recipe's lower limit falls below it.

Every image has its own fixed seed (PCG64 seeded with ``[2701, image number]``),
and the blur is ``demo_run/_common.py``'s (scalar ``math.exp`` kernels, a spelled-out
boundary mode), so running the script twice gives byte-identical files. Nothing
here uses lotproof.
"""

from __future__ import annotations

import csv
import importlib.util
import io
import json
import math
import sys
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np

__all__ = [
    "OPERATORS",
    "PARAMETERS",
    "PART_TARGETS",
    "PIXEL_SIZE_UM",
    "REFERENCE_TARGETS",
    "SHAPE",
    "VALUE",
    "generate",
    "main",
    "render_precision",
    "render_reference",
]


def _load_common() -> ModuleType:
    """``demo_run/_common.py``, loaded by its path: the generators are scripts, not a package."""
    path = Path(__file__).resolve().parents[1] / "_common.py"
    spec = importlib.util.spec_from_file_location("lotproof_demo_common", path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {path}")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


_common = _load_common()

#: Image shape (rows, columns) in pixels.
SHAPE = (256, 256)
#: Pixel size in micrometres; TIFF resolution 20000 px/cm.
PIXEL_SIZE_UM = 0.5
RESOLUTION_PX_PER_CM = (20000, 1)
#: The studied value the known values belong to (the plan's and the recipe's name).
VALUE = "pore-stats.area_fraction"
#: True pore fraction each part's specimen is drawn to, parts 01 to 10.
PART_TARGETS = (0.026, 0.034, 0.043, 0.052, 0.061, 0.070, 0.079, 0.088, 0.097, 0.108)
#: Reference specimens: name -> porosity they are drawn to.
REFERENCE_TARGETS = {"P03": 0.03, "P06": 0.06, "P09": 0.09, "P12": 0.12}
#: Fields imaged per reference specimen.
REFERENCE_FIELDS = 5
#: Operators: name -> (blur sigma in px, exposure gain). Each is a microscope setting.
OPERATORS = {"A": (0.75, 1.000), "B": (0.85, 0.992), "C": (0.95, 1.008)}
#: Replicates per part and operator.
REPLICATES = 2

_SEED = 2701

#: Everything else that shapes the images (lengths in px, levels in counts).
PARAMETERS: dict[str, Any] = {
    "seed": "numpy.random.PCG64([2701, image number]); specimens [2701, 10000 + part], "
    "[2701, 20000 + 10 * reference + field]",
    "value_range": "12-bit (0..4095) stored as uint16",
    "margin_px": 24,
    "coating_level": 2600.0,
    "coating_texture_sigma": 14.0,
    "coating_texture_correlation_px": 3.0,
    "pore_level_range": [560.0, 760.0],
    "fine_pore_radius_px": [1.9, 2.5],
    "fine_pore_area_share": 0.3,
    "coarse_pore_radius_median_px": 4.2,
    "coarse_pore_radius_log_sigma": 0.35,
    "coarse_pore_radius_range_px": [2.8, 9.0],
    "coarse_pore_aspect_range": [1.0, 1.4],
    "illumination_gradient": 0.03,
    "stage_offset_px": 3,
    "blur_jitter_px": 0.04,
    "gain_jitter": 0.004,
    "noise_sigma": 18.0,
    "coverage_samples": 4,
    "operators": {k: {"blur_sigma_px": v[0], "gain": v[1]} for k, v in OPERATORS.items()},
    "reference_setting": {"blur_sigma_px": 0.85, "gain": 1.0},
    "gaussian_truncate_sigmas": 4.0,
    "boundary_mode": "reflect",
    "rounding": "half to even, then clip to 0..65535",
    "tiff": "uint16, one page, deflate level 6, horizontal predictor, resolution in px/cm",
}


def _radius(rng: np.random.Generator, fine: bool) -> tuple[float, float, float]:
    """(semi-axis a, semi-axis b, angle) of one pore, in px and radians."""
    p = PARAMETERS
    if fine:
        r = float(rng.uniform(*p["fine_pore_radius_px"]))
        return r, r, 0.0
    low, high = p["coarse_pore_radius_range_px"]
    while True:
        r = p["coarse_pore_radius_median_px"] * math.exp(
            p["coarse_pore_radius_log_sigma"] * float(rng.standard_normal())
        )
        if low <= r <= high:
            break
    aspect = float(rng.uniform(*p["coarse_pore_aspect_range"]))
    angle = float(rng.uniform(0.0, math.pi))
    return r * math.sqrt(aspect), r / math.sqrt(aspect), angle


def _specimen(seed_index: int, target: float) -> tuple[np.ndarray, np.ndarray]:
    """(covered fraction, true pore mask) of one specimen's field: the image plus a margin."""
    p = PARAMETERS
    rng = _common.stream(_SEED, seed_index)
    margin = p["margin_px"]
    rows, cols = SHAPE[0] + 2 * margin, SHAPE[1] + 2 * margin
    cover = np.zeros((rows, cols), dtype=np.float64)
    mask = np.zeros((rows, cols), dtype=bool)
    n = p["coverage_samples"]
    offsets = (np.arange(n, dtype=np.float64) + 0.5) / n - 0.5
    fine_area = coarse_area = 0.0
    share = p["fine_pore_area_share"]
    inner = mask[margin:-margin, margin:-margin]
    while inner.mean() < target:
        fine = fine_area <= share * (fine_area + coarse_area)
        a, b, angle = _radius(rng, fine)
        cy, cx = float(rng.uniform(0, rows)), float(rng.uniform(0, cols))
        c, s = math.cos(angle), math.sin(angle)
        reach = math.ceil(a) + 1
        y0, y1 = max(0, int(cy) - reach), min(rows, int(cy) + reach + 1)
        x0, x1 = max(0, int(cx) - reach), min(cols, int(cx) + reach + 1)
        if y0 >= y1 or x0 >= x1:
            continue
        yy = np.arange(y0, y1, dtype=np.float64)[:, None, None, None] + offsets[None, None, :, None]
        xx = np.arange(x0, x1, dtype=np.float64)[None, :, None, None] + offsets[None, None, None, :]
        dy, dx = yy - cy, xx - cx
        inside = ((dy * c + dx * s) / a) ** 2 + ((dx * c - dy * s) / b) ** 2 <= 1.0
        covered = inside.mean(axis=(2, 3))
        dyc = np.arange(y0, y1, dtype=np.float64)[:, None] - cy
        dxc = np.arange(x0, x1, dtype=np.float64)[None, :] - cx
        centre = ((dyc * c + dxc * s) / a) ** 2 + ((dxc * c - dyc * s) / b) ** 2 <= 1.0
        np.maximum(cover[y0:y1, x0:x1], covered, out=cover[y0:y1, x0:x1])
        mask[y0:y1, x0:x1] |= centre
        area = math.pi * a * b
        if fine:
            fine_area += area
        else:
            coarse_area += area
    return cover, mask


def _picture(
    cover: np.ndarray, mask: np.ndarray, image_index: int, blur: float, gain: float, shift: bool
) -> tuple[np.ndarray, dict[str, Any]]:
    """One image of a specimen: stage offset, gray levels, gain, blur, noise; and its truth."""
    p = PARAMETERS
    rng = _common.stream(_SEED, image_index)
    margin, reach = p["margin_px"], p["stage_offset_px"]
    dy = int(rng.integers(-reach, reach + 1)) if shift else 0
    dx = int(rng.integers(-reach, reach + 1)) if shift else 0
    blur = blur + (float(rng.uniform(-1, 1)) * p["blur_jitter_px"] if shift else 0.0)
    gain = gain * (1.0 + (float(rng.uniform(-1, 1)) * p["gain_jitter"] if shift else 0.0))
    rows, cols = SHAPE
    pad = 12  # blurred with a margin, then cut: no frame effect of the blur
    y0, x0 = margin + dy - pad, margin + dx - pad
    window = (slice(y0, y0 + rows + 2 * pad), slice(x0, x0 + cols + 2 * pad))
    c = cover[window]
    low, high = p["pore_level_range"]
    # each pore's floor varies smoothly over the range (a stand-in for its depth)
    pore_level = (low + high) / 2 + (high - low) * _common.smooth_noise(
        rng, c.shape, 6.0, 0.25, p["gaussian_truncate_sigmas"], p["boundary_mode"]
    ).clip(-0.5, 0.5)
    texture = _common.smooth_noise(
        rng,
        c.shape,
        p["coating_texture_correlation_px"],
        p["coating_texture_sigma"],
        p["gaussian_truncate_sigmas"],
        p["boundary_mode"],
    )
    scene = (p["coating_level"] + texture) * (1.0 - c) + pore_level * c
    ramp = 1.0 + p["illumination_gradient"] * (np.arange(c.shape[1]) / c.shape[1] - 0.5)
    scene = scene * ramp[None, :] * gain
    scene = _common.gaussian(scene, blur, p["gaussian_truncate_sigmas"], p["boundary_mode"])
    scene = scene[pad:-pad, pad:-pad] + p["noise_sigma"] * rng.standard_normal(SHAPE)
    truth_mask = mask[margin + dy : margin + dy + rows, margin + dx : margin + dx + cols]
    truth = {
        "seed": [_SEED, image_index],
        "stage_offset_px": [dy, dx],
        "blur_sigma_px": round(blur, 6),
        "gain": round(gain, 6),
        "pore_fraction": float(truth_mask.mean()),
        "pore_pixels": int(truth_mask.sum()),
    }
    return _common.quantize(scene, np.uint16), truth


def render_precision(part: int, operator: str, replicate: int) -> tuple[np.ndarray, dict[str, Any]]:
    """Image and truth of replicate ``replicate`` (1, 2) of ``part`` (1..10) by ``operator``."""
    cover, mask = _specimen(10000 + part, PART_TARGETS[part - 1])
    blur, gain = OPERATORS[operator]
    index = 100 * part + 10 * (list(OPERATORS).index(operator) + 1) + replicate
    image, truth = _picture(cover, mask, index, blur, gain, shift=True)
    return image, {
        "part": f"{part:02d}",
        "operator": operator,
        "replicate": str(replicate),
        **truth,
    }


def render_reference(reference: str, field: int) -> tuple[np.ndarray, dict[str, Any]]:
    """Image and truth of field ``field`` (1..5) of the reference specimen ``reference``."""
    number = list(REFERENCE_TARGETS).index(reference) + 1
    seed_index = 20000 + 10 * number + field
    cover, mask = _specimen(seed_index, REFERENCE_TARGETS[reference])
    setting = PARAMETERS["reference_setting"]
    image, truth = _picture(
        cover, mask, seed_index, setting["blur_sigma_px"], setting["gain"], shift=False
    )
    return image, {"reference": reference, "target": REFERENCE_TARGETS[reference], **truth}


def _write_tiff(path: Path, image: np.ndarray, what: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    _common.write_plane(
        path,
        image,
        level=6,
        resolution_px_per_cm=RESOLUTION_PX_PER_CM,
        description=(
            f"lotproof demo validation study, {what}: synthetic coating cross-section made by "
            "demo_run/validation/generate.py, not a micrograph"
        ),
        software="lotproof demo_run/validation/generate.py",
    )


def generate(out_dir: str | Path) -> dict[str, Any]:
    """Write every image, ``reference.csv`` and ``truth.json`` into ``out_dir``; return the truth."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    precision = []
    for part in range(1, len(PART_TARGETS) + 1):
        for operator in OPERATORS:
            for replicate in range(1, REPLICATES + 1):
                image, truth = render_precision(part, operator, replicate)
                name = f"precision/op-{operator}/part-{part:02d}-r{replicate}.tif"
                _write_tiff(out / name, image, f"part {part:02d}, operator {operator}")
                precision.append({"file": name, **truth})
    references = []
    buffer = io.StringIO()
    table = csv.writer(buffer, lineterminator="\n")
    table.writerow(["image", "reference", f"{VALUE} [-]"])
    for reference in REFERENCE_TARGETS:
        for field in range(1, REFERENCE_FIELDS + 1):
            image, truth = render_reference(reference, field)
            name = f"{reference}-{field}.tif"
            _write_tiff(out / "reference" / name, image, f"reference {reference}, field {field}")
            references.append({"file": f"reference/{name}", **truth})
            table.writerow([name, reference, repr(truth["pore_fraction"])])
    (out / "reference.csv").write_text(buffer.getvalue(), encoding="utf-8")
    truth_doc = {
        "pixel_size_um": PIXEL_SIZE_UM,
        "shape": list(SHAPE),
        "part_targets": list(PART_TARGETS),
        "reference_targets": dict(REFERENCE_TARGETS),
        "parameters": json.loads(json.dumps(PARAMETERS)),
        "precision": precision,
        "reference": references,
    }
    (out / "truth.json").write_text(_common.truth_json(truth_doc), encoding="utf-8")
    return truth_doc


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python demo_run/validation/generate.py [OUT_DIR]``; returns the exit code."""
    args = sys.argv[1:] if argv is None else argv
    if len(args) > 1 or (args and args[0].startswith("-")):
        print("usage: python demo_run/validation/generate.py [OUT_DIR]", file=sys.stderr)
        return 2
    generate(Path(args[0]) if args else Path(__file__).resolve().parent / "images")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
