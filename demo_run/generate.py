"""Generate the demo lot FD-2611: synthetic cross-sections of sintered bronze filter discs.

The lot is invented. Each image imitates a polished cross-section seen at 200x in
reflected light: bright metal with a faint polishing relief, dark pores, a few thin
polishing scratches, uneven illumination, a slight optical blur and sensor noise.
Because this script draws the pores, the true pore mask of every image is known
exactly, and ``lot-truth.json`` records what it contains.

Usage::

    python demo_run/generate.py [OUT_DIR]

writes ``FD-2611-01.tif`` ... ``FD-2611-08.tif`` into ``OUT_DIR`` (default:
``demo_run/FD-2611`` beside this file) and the ground truth ``lot-truth.json`` into
the parent folder of ``OUT_DIR``, so that the lot folder holds images only.

How an image is made, in order (all levels are counts of the stored image):

1. metal at ``metal_level`` plus a smooth relief (white noise filtered by a
   gaussian of ``metal_texture_correlation_px``, scaled to ``metal_texture_sigma``);
2. pores: ellipses whose equivalent circle diameter (ECD) is lognormal
   (median ``pore_ecd_median_um``, log-sigma ``pore_ecd_log_sigma``, truncated to
   ``pore_ecd_range_um``), aspect ratio uniform in ``pore_aspect_ratio_range``,
   each at its own level in ``pore_level_range``; placed largest first at random,
   each kept at least ``pore_gap_um`` from the circle around every other, until
   their drawn area reaches the image's target fraction. A pixel is pore when its
   centre lies inside an ellipse: that is the true pore mask;
3. scratches: straight segments ``scratch_width_px_range`` wide, drawn with their
   pixel coverage, darkening towards ``scratch_level_range``; they share a
   polishing direction within ``scratch_angle_spread_deg`` and do not cross;
4. illumination: the picture is multiplied by a quadratic fall-off around an
   off-centre optical axis, the farthest corner at ``1 - vignetting_depth``;
5. optics: a separable gaussian blur of ``blur_sigma_px``;
6. sensor: white gaussian noise of ``noise_sigma``, rounding half to even,
   clipping to 0..65535, uint16.

The values stay in the 12-bit range (a 12-bit camera stored as 16-bit): at full
16-bit depth the noise alone would make the lot several times larger.

Every image has its own fixed seed (PCG64 seeded with ``[2611, image index]``),
and every library default that could change the result (boundary mode, kernel,
rounding, TIFF tags, compression level) is spelled out, so running the script
twice gives byte-identical files. The gaussian kernels are built with scalar
``math.exp``; the pixel arithmetic is additions, products and square roots. The
deflate stream comes from the zlib library Python links against: another zlib
build may compress the same pixels to other bytes. What the three demo
generators share (streams, gaussians, rounding, TIFF writing, truth file,
command line) is in ``demo_run/_common.py``.
"""

from __future__ import annotations

import importlib.util
import json
import math
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np

__all__ = [
    "HIGH_POROSITY_IMAGE",
    "LOT",
    "N_IMAGES",
    "PARAMETERS",
    "PIXEL_SIZE_UM",
    "RESOLUTION_PX_PER_CM",
    "SHAPE",
    "TRUTH_FILE",
    "generate",
    "image_name",
    "main",
    "render",
    "truth_json",
]


def _load_common() -> ModuleType:
    """``demo_run/_common.py``, loaded by its path: the generators are scripts, not a package."""
    path = Path(__file__).resolve().parent / "_common.py"
    spec = importlib.util.spec_from_file_location("lotproof_demo_common", path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {path}")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


_common = _load_common()

#: Lot identifier; images are named ``FD-2611-01.tif`` ... ``FD-2611-08.tif``.
LOT = "FD-2611"
#: Number of images (one per disc) in the lot.
N_IMAGES = 8
#: Image shape (rows, columns) in pixels.
SHAPE = (1024, 1024)
#: Pixel size in micrometres, the same along both axes.
PIXEL_SIZE_UM = 0.65
#: TIFF XResolution/YResolution as an exact rational in pixels per centimetre:
#: 1e4 / 0.65 = 200000 / 13.
RESOLUTION_PX_PER_CM = (200000, 13)
#: The one disc whose porosity is drawn above the 0.18 acceptance limit.
HIGH_POROSITY_IMAGE = 6
#: Name of the ground-truth file, written beside the lot folder.
TRUTH_FILE = _common.TRUTH_FILE

_SEED_BASE = 2611

#: Everything that shapes the images. Lengths are in micrometres when the name
#: ends in ``_um`` and in pixels when it ends in ``_px``; levels and sigmas of
#: gray values are counts of the stored image.
PARAMETERS: dict[str, Any] = {
    "seed": "numpy.random.PCG64([2611, image index])",
    "value_range": "12-bit (0..4095) stored as uint16",
    "metal_level": 1875.0,
    "metal_texture_sigma": 10.0,
    "metal_texture_correlation_px": 8.0,
    "pore_level_range": [375.0, 560.0],
    "pore_ecd_median_um": 12.0,
    "pore_ecd_log_sigma": 0.45,
    "pore_ecd_range_um": [4.0, 40.0],
    "pore_aspect_ratio_range": [1.0, 1.5],
    "pore_gap_um": 2.0,
    "pore_fraction_target_range": [0.11, 0.15],
    "pore_fraction_target_high": 0.21,
    "high_porosity_image": HIGH_POROSITY_IMAGE,
    "scratch_count_range": [2, 4],
    "scratch_width_px_range": [1.2, 2.0],
    "scratch_length_px_range": [500.0, 1400.0],
    "scratch_angle_spread_deg": 25.0,
    "scratch_level_range": [60.0, 190.0],
    "scratch_min_distance_px": 8.0,
    "vignetting_depth": 0.6,
    "vignetting_centre_offset_px": 120.0,
    "blur_sigma_px": 0.8,
    "noise_sigma": 0.4,
    "gaussian_truncate_sigmas": 4.0,
    "boundary_mode": "reflect",
    "rounding": "half to even, then clip to 0..65535",
    "tiff": "uint16, one page, deflate level 6, horizontal predictor, resolution in px/cm",
}


def image_name(index: int) -> str:
    """File name of image ``index`` (1-based): ``FD-2611-01.tif``."""
    return _common.image_name(LOT, index)


def _gaussian(image: np.ndarray, sigma_px: float) -> np.ndarray:
    p = PARAMETERS
    return _common.gaussian(image, sigma_px, p["gaussian_truncate_sigmas"], p["boundary_mode"])


def _relief(rng: np.random.Generator) -> np.ndarray:
    """Smooth metal relief of standard deviation ``metal_texture_sigma``."""
    p = PARAMETERS
    return _common.smooth_noise(
        rng,
        SHAPE,
        p["metal_texture_correlation_px"],
        p["metal_texture_sigma"],
        p["gaussian_truncate_sigmas"],
        p["boundary_mode"],
    )


def _draw_ecds_px(rng: np.random.Generator, target_area_px: float) -> list[float]:
    """Pore ECDs in pixels, lognormal truncated by rejection, until the target area is drawn."""
    lo, hi = PARAMETERS["pore_ecd_range_um"]
    mu = math.log(PARAMETERS["pore_ecd_median_um"])
    sigma = PARAMETERS["pore_ecd_log_sigma"]
    ecds: list[float] = []
    area = 0.0
    while area < target_area_px:
        d_um = float(rng.lognormal(mu, sigma))
        if not lo <= d_um <= hi:
            continue
        d_px = d_um / PIXEL_SIZE_UM
        ecds.append(d_px)
        area += math.pi / 4.0 * d_px * d_px
    return ecds


def _place_pores(rng: np.random.Generator, ecds_px: list[float]) -> list[dict[str, float]]:
    """Random sequential placement, largest first, of ellipses kept apart.

    Each ellipse is guarded by its circumscribed circle plus ``pore_gap_um``, so
    no two pores touch and the number of pores equals the number of connected
    regions of the true mask.
    """
    rows, cols = SHAPE
    ar_lo, ar_hi = PARAMETERS["pore_aspect_ratio_range"]
    gap = PARAMETERS["pore_gap_um"] / PIXEL_SIZE_UM
    lvl_lo, lvl_hi = PARAMETERS["pore_level_range"]
    cx = np.empty(len(ecds_px))
    cy = np.empty(len(ecds_px))
    guard = np.empty(len(ecds_px))
    pores: list[dict[str, float]] = []
    for n, d in enumerate(sorted(ecds_px, reverse=True)):
        aspect = float(rng.uniform(ar_lo, ar_hi))
        a = 0.5 * d * math.sqrt(aspect)
        b = 0.5 * d / math.sqrt(aspect)
        angle = float(rng.uniform(0.0, math.pi))
        level = float(rng.uniform(lvl_lo, lvl_hi))
        for _ in range(5000):
            x = float(rng.uniform(0.0, cols))
            y = float(rng.uniform(0.0, rows))
            dist2 = (cx[:n] - x) ** 2 + (cy[:n] - y) ** 2
            if np.all(dist2 > (guard[:n] + a + gap) ** 2):
                break
        else:
            raise RuntimeError(f"no room left for a pore of ECD {d:.1f} px")
        cx[n], cy[n], guard[n] = x, y, a
        pores.append({"x": x, "y": y, "a": a, "b": b, "angle": angle, "level": level})
    return pores


def _ellipse_pixels(pore: dict[str, float]) -> tuple[np.ndarray, np.ndarray]:
    """Row and column indices (inside the image) of the pixel centres inside the ellipse."""
    rows, cols = SHAPE
    a, b = pore["a"], pore["b"]
    r0 = max(0, math.floor(pore["y"] - a))
    r1 = min(rows, math.ceil(pore["y"] + a) + 1)
    c0 = max(0, math.floor(pore["x"] - a))
    c1 = min(cols, math.ceil(pore["x"] + a) + 1)
    if r0 >= r1 or c0 >= c1:
        return np.empty(0, np.intp), np.empty(0, np.intp)
    yy, xx = np.mgrid[r0:r1, c0:c1]
    dx = xx - pore["x"]
    dy = yy - pore["y"]
    cos_t, sin_t = math.cos(pore["angle"]), math.sin(pore["angle"])
    u = (dx * cos_t + dy * sin_t) / a
    v = (-dx * sin_t + dy * cos_t) / b
    inside = u * u + v * v <= 1.0
    return yy[inside], xx[inside]


_Segment = tuple[float, float, float, float]


def _segment(s: dict[str, float]) -> _Segment:
    hx = 0.5 * s["length"] * math.cos(s["angle"])
    hy = 0.5 * s["length"] * math.sin(s["angle"])
    return s["x"] - hx, s["y"] - hy, s["x"] + hx, s["y"] + hy


def _point_segment_distance(px: float, py: float, seg: _Segment) -> float:
    x0, y0, x1, y1 = seg
    dx, dy = x1 - x0, y1 - y0
    t = ((px - x0) * dx + (py - y0) * dy) / (dx * dx + dy * dy)
    t = min(1.0, max(0.0, t))
    return math.hypot(px - (x0 + t * dx), py - (y0 + t * dy))


def _segments_distance(p: _Segment, q: _Segment) -> float:
    """Shortest distance between two segments; 0 when they cross."""

    def side(ax: float, ay: float, bx: float, by: float, cx: float, cy: float) -> float:
        return (bx - ax) * (cy - ay) - (by - ay) * (cx - ax)

    d1 = side(*q[:2], *q[2:], *p[:2])
    d2 = side(*q[:2], *q[2:], *p[2:])
    d3 = side(*p[:2], *p[2:], *q[:2])
    d4 = side(*p[:2], *p[2:], *q[2:])
    if d1 * d2 < 0.0 and d3 * d4 < 0.0:
        return 0.0
    return min(
        _point_segment_distance(p[0], p[1], q),
        _point_segment_distance(p[2], p[3], q),
        _point_segment_distance(q[0], q[1], p),
        _point_segment_distance(q[2], q[3], p),
    )


def _draw_scratches(rng: np.random.Generator) -> list[dict[str, float]]:
    """Straight scratches around one polishing direction, none crossing or touching another.

    Two scratches crossing at a shallow angle leave a blot wider than either, which
    an opening keeps; the demo keeps scratches apart so that the opening removes
    every one of them.
    """
    p = PARAMETERS
    rows, cols = SHAPE
    count = int(rng.integers(p["scratch_count_range"][0], p["scratch_count_range"][1] + 1))
    direction = float(rng.uniform(0.0, math.pi))
    spread = math.radians(p["scratch_angle_spread_deg"])
    scratches: list[dict[str, float]] = []
    while len(scratches) < count:
        s = {
            "x": float(rng.uniform(0.0, cols)),
            "y": float(rng.uniform(0.0, rows)),
            "angle": direction + float(rng.uniform(-spread, spread)),
            "length": float(rng.uniform(*p["scratch_length_px_range"])),
            "width": float(rng.uniform(*p["scratch_width_px_range"])),
            "level": float(rng.uniform(*p["scratch_level_range"])),
        }
        seg = _segment(s)
        if all(
            _segments_distance(seg, _segment(t)) >= p["scratch_min_distance_px"] for t in scratches
        ):
            scratches.append(s)
    return scratches


def _scratch_coverage(s: dict[str, float]) -> np.ndarray:
    """Fraction of each pixel covered by a scratch: a box-filtered segment of its width."""
    rows, cols = SHAPE
    yy, xx = np.mgrid[0:rows, 0:cols].astype(np.float64)
    ux, uy = math.cos(s["angle"]), math.sin(s["angle"])
    px = xx - s["x"]
    py = yy - s["y"]
    along = px * ux + py * uy
    across = np.abs(py * ux - px * uy)
    beyond = np.maximum(np.abs(along) - 0.5 * s["length"], 0.0)
    dist = np.sqrt(across * across + beyond * beyond)
    return np.clip(0.5 * s["width"] + 0.5 - dist, 0.0, 1.0)


def _illumination(rng: np.random.Generator) -> tuple[np.ndarray, float, float]:
    """Quadratic fall-off around an off-centre axis; the farthest corner at 1 - depth."""
    rows, cols = SHAPE
    offset = PARAMETERS["vignetting_centre_offset_px"]
    ax = 0.5 * (cols - 1) + float(rng.uniform(-1.0, 1.0)) * offset
    ay = 0.5 * (rows - 1) + float(rng.uniform(-1.0, 1.0)) * offset
    far2 = max((x - ax) ** 2 + (y - ay) ** 2 for x in (0.0, cols - 1.0) for y in (0.0, rows - 1.0))
    yy, xx = np.mgrid[0:rows, 0:cols].astype(np.float64)
    field = 1.0 - PARAMETERS["vignetting_depth"] * ((xx - ax) ** 2 + (yy - ay) ** 2) / far2
    return field, ax, ay


def _render(index: int) -> tuple[np.ndarray, dict[str, Any], np.ndarray, np.ndarray]:
    """Image, truth, true pore mask and scratch coverage of image ``index``."""
    if not 1 <= index <= N_IMAGES:
        raise ValueError(f"image index must be 1..{N_IMAGES} (got {index})")
    p = PARAMETERS
    rows, cols = SHAPE
    # One stream per image, drawn in a fixed order: targets, pores, relief,
    # scratches, illumination, noise.
    rng = _common.stream(_SEED_BASE, index)

    if index == HIGH_POROSITY_IMAGE:
        target = float(p["pore_fraction_target_high"])
    else:
        target = float(rng.uniform(*p["pore_fraction_target_range"]))
    pores = _place_pores(rng, _draw_ecds_px(rng, target * rows * cols))

    scene = p["metal_level"] + _relief(rng)
    mask = np.zeros(SHAPE, dtype=bool)
    ecd_px_area: list[float] = []
    ecd_drawn: list[float] = []
    touches: list[bool] = []
    px_area_um2 = PIXEL_SIZE_UM * PIXEL_SIZE_UM
    for pore in pores:
        r, c = _ellipse_pixels(pore)
        if r.size == 0:
            continue  # drawn just outside the frame: not part of this image
        scene[r, c] = pore["level"]
        mask[r, c] = True
        ecd_px_area.append(round(math.sqrt(4.0 * r.size * px_area_um2 / math.pi), 4))
        ecd_drawn.append(round(2.0 * math.sqrt(pore["a"] * pore["b"]) * PIXEL_SIZE_UM, 4))
        touches.append(
            bool(r.min() == 0 or c.min() == 0 or r.max() == rows - 1 or c.max() == cols - 1)
        )

    scratches = _draw_scratches(rng)
    cover_all = np.zeros(SHAPE)
    for s in scratches:
        cover = _scratch_coverage(s)
        # A scratch darkens metal and pore alike, never brightens.
        scene = np.minimum(scene, scene - cover * (scene - s["level"]))
        cover_all = np.maximum(cover_all, cover)

    field, ax, ay = _illumination(rng)
    signal = _gaussian(scene * field, p["blur_sigma_px"])
    signal += p["noise_sigma"] * rng.standard_normal(SHAPE)
    image = _common.quantize(signal, np.uint16)

    truth = {
        "file": image_name(index),
        "seed": [_SEED_BASE, index],
        "pore_area_fraction_target": round(target, 6),
        "pore_area_fraction": int(np.count_nonzero(mask)) / mask.size,
        "pore_pixels": int(np.count_nonzero(mask)),
        "pore_count": len(ecd_px_area),
        "pore_count_touching_border": sum(touches),
        "pore_ecd_um": ecd_px_area,
        "pore_ecd_drawn_um": ecd_drawn,
        "pore_touches_border": touches,
        "scratches": [{k: round(v, 4) for k, v in s.items()} for s in scratches],
        "scratch_pixels": int(np.count_nonzero(cover_all >= 0.5)),
        "illumination_axis_px": [round(ax, 3), round(ay, 3)],
    }
    return image, truth, mask, cover_all


def render(index: int) -> tuple[np.ndarray, dict[str, Any]]:
    """Draw image ``index`` of the lot.

    Parameters
    ----------
    index : int
        Image number, 1 to :data:`N_IMAGES`.

    Returns
    -------
    image : ndarray of uint16, shape :data:`SHAPE`
        The image as stored in the TIFF file (values in the 12-bit range).
    truth : dict
        The image's entry of ``lot-truth.json``.
    """
    image, truth, _, _ = _render(index)
    return image, truth


def _write_tiff(path: Path, image: np.ndarray, index: int) -> None:
    _common.write_plane(
        path,
        image,
        level=6,
        resolution_px_per_cm=RESOLUTION_PX_PER_CM,
        description=(
            f"lotproof demo lot {LOT}, disc {index:02d}: "
            "synthetic cross-section made by demo_run/generate.py, not a micrograph"
        ),
        software="lotproof demo_run/generate.py",
    )


def generate(out_dir: str | Path) -> dict[str, Any]:
    """Write the lot's TIFF images into ``out_dir`` and return the ground truth.

    Parameters
    ----------
    out_dir : str or Path
        Folder for ``FD-2611-01.tif`` ... ``FD-2611-08.tif``; created when
        missing. Files of the same names are overwritten.

    Returns
    -------
    dict
        The ground truth (JSON types only), as :func:`main` writes it to
        ``lot-truth.json``: the lot, pixel size, shape, :data:`PARAMETERS` and
        one entry per image (see ``demo_run/README.md``).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    images = []
    for index in range(1, N_IMAGES + 1):
        image, truth = render(index)
        _write_tiff(out / image_name(index), image, index)
        images.append(truth)
    return {
        "lot": LOT,
        "pixel_size_um": PIXEL_SIZE_UM,
        "shape": list(SHAPE),
        "parameters": json.loads(json.dumps(PARAMETERS)),
        "images": images,
    }


def truth_json(truth: dict[str, Any]) -> str:
    """The text of ``lot-truth.json``: sorted keys, ASCII, one trailing newline."""
    return _common.truth_json(truth)


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python demo_run/generate.py [OUT_DIR]``; returns the exit code."""
    return _common.run_cli(
        argv,
        script="demo_run/generate.py",
        default_out=Path(__file__).resolve().parent / LOT,
        generate=generate,
    )


if __name__ == "__main__":
    raise SystemExit(main())
