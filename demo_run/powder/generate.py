"""Generate the demo lot PW-2612: synthetic images of a dispersed gas-atomised metal powder.

The lot is invented. Each image imitates a sample of a gas-atomised metal powder
(the kind sieved to 15-45 um for laser powder-bed fusion) dispersed on a dark
carbon tab and seen under a ring light: bright spheres on a dark background, each
sphere with a bright ring and a dark centre (the ring light's reflection), some
particles touching in pairs or short chains, a few small satellites bonded to
larger particles, and a few free fines. Because this script draws the particles,
the true answer is known, and ``lot-truth.json`` records it.

Usage::

    python demo_run/powder/generate.py [OUT_DIR]

writes ``PW-2612-01.tif`` ... ``PW-2612-06.tif`` into ``OUT_DIR`` (default:
``demo_run/powder/PW-2612`` beside this file) and the ground truth ``lot-truth.json``
into the parent folder of ``OUT_DIR``, so that the lot folder holds images only.

How an image is made, in order (levels are counts of the stored 8-bit image):

1. background at ``background_level`` plus a smooth variation (white noise
   filtered by a gaussian of ``background_correlation_px``, scaled to
   ``background_sigma``);
2. particles (*grains*): diameters lognormal (median ``particle_diameter_median_um``,
   log-sigma ``particle_diameter_log_sigma``, truncated to
   ``particle_diameter_range_um``) until their drawn area reaches
   ``particle_coverage`` of the field; placed largest first, each either free
   (at least ``particle_gap_um`` from every other) or, with probability
   ``touching_probability``, touching one earlier particle (centre distance
   ``touching_overlap_range`` times the sum of the radii, clusters of at most
   ``cluster_max_size``, and kept ``particle_gap_um`` from all others, so no
   cluster encloses background);
3. satellites: with probability ``satellite_probability`` a particle gets one
   small sphere (diameter ``satellite_diameter_range_um``) bonded to its outline,
   its centre ``satellite_offset`` of its radius outside the host's outline;
   satellites belong to their host: they are not particles of their own;
4. fines: free particles of diameter lognormal (median
   ``fines_diameter_median_um``, truncated to ``fines_diameter_range_um``), their
   number ``fines_per_particle`` times the number of grains
   (``fines_per_particle_rich`` in image :data:`FINES_RICH_IMAGE`);
5. each sphere of radius R at (cx, cy) lights the pixels whose centre lies
   inside its circle with ``background + (particle_level - background) * f(u)``,
   u = distance / R, ``f(u) = ring_floor + (1 - ring_floor) * max(0, 1 - ((u -
   ring_position) / ring_width)^2)^2``: a bright ring, a dark centre; where
   spheres overlap the brighter value wins;
6. optics: a separable gaussian blur of ``blur_sigma_px``;
7. sensor: white gaussian noise of ``noise_sigma``, rounding half to even,
   clipping to 0..255, uint8.

A pixel belongs to a particle when its centre lies inside the particle's circle
or the circle of one of its satellites: that is the true particle mask.

Every image has its own fixed seed (PCG64 seeded with ``[2612, image index]``),
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
from scipy import ndimage

__all__ = [
    "FINES_BELOW_UM",
    "FINES_RICH_IMAGE",
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
    path = Path(__file__).resolve().parents[1] / "_common.py"
    spec = importlib.util.spec_from_file_location("lotproof_demo_common", path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {path}")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


_common = _load_common()

#: Lot identifier; images are named ``PW-2612-01.tif`` ... ``PW-2612-06.tif``.
LOT = "PW-2612"
#: Number of images (one per dispersed sample) in the lot.
N_IMAGES = 6
#: Image shape (rows, columns) in pixels.
SHAPE = (768, 768)
#: Pixel size in micrometres, the same along both axes.
PIXEL_SIZE_UM = 0.8
#: TIFF XResolution/YResolution as an exact rational in pixels per centimetre: 1e4 / 0.8.
RESOLUTION_PX_PER_CM = (12500, 1)
#: The one sample drawn with many fines (it fails a fines limit).
FINES_RICH_IMAGE = 4
#: Particles smaller than this (drawn diameter, um) are fines.
FINES_BELOW_UM = 10.0
#: Name of the ground-truth file, written beside the lot folder.
TRUTH_FILE = _common.TRUTH_FILE

_SEED_BASE = 2612

#: Everything that shapes the images. Lengths are in micrometres when the name
#: ends in ``_um`` and in pixels when it ends in ``_px``; levels and sigmas of
#: gray values are counts of the stored image.
PARAMETERS: dict[str, Any] = {
    "seed": "numpy.random.PCG64([2612, image index])",
    "value_range": "8-bit (0..255) stored as uint8",
    "background_level": 22.0,
    "background_sigma": 1.5,
    "background_correlation_px": 24.0,
    "particle_level_range": [196.0, 226.0],
    "particle_diameter_median_um": 31.0,
    "particle_diameter_log_sigma": 0.24,
    "particle_diameter_range_um": [16.0, 60.0],
    "particle_coverage": 0.2,
    "particle_gap_um": 3.0,
    "touching_probability": 0.3,
    "touching_overlap_range": [0.9, 0.98],
    "cluster_max_size": 3,
    "satellite_probability": 0.1,
    "satellite_diameter_range_um": [4.0, 7.0],
    "satellite_offset": 0.45,
    "fines_diameter_median_um": 6.5,
    "fines_diameter_log_sigma": 0.25,
    "fines_diameter_range_um": [4.0, 9.5],
    "fines_per_particle": 0.04,
    "fines_per_particle_rich": 0.35,
    "fines_rich_image": FINES_RICH_IMAGE,
    "ring_floor": 0.25,
    "ring_position": 0.72,
    "ring_width": 0.45,
    "blur_sigma_px": 0.8,
    "noise_sigma": 1.0,
    "gaussian_truncate_sigmas": 4.0,
    "boundary_mode": "reflect",
    "rounding": "half to even, then clip to 0..255",
    "tiff": "uint8, one page, deflate level 9, horizontal predictor, resolution in px/cm",
}


def image_name(index: int) -> str:
    """File name of image ``index`` (1-based): ``PW-2612-01.tif``."""
    return _common.image_name(LOT, index)


def _gaussian(image: np.ndarray, sigma_px: float) -> np.ndarray:
    p = PARAMETERS
    return _common.gaussian(image, sigma_px, p["gaussian_truncate_sigmas"], p["boundary_mode"])


def _background(rng: np.random.Generator) -> np.ndarray:
    """Dark background with a smooth variation of standard deviation ``background_sigma``."""
    p = PARAMETERS
    return p["background_level"] + _common.smooth_noise(
        rng,
        SHAPE,
        p["background_correlation_px"],
        p["background_sigma"],
        p["gaussian_truncate_sigmas"],
        p["boundary_mode"],
    )


def _lognormal(rng: np.random.Generator, median: float, sigma: float, bounds: list[float]) -> float:
    """One draw of a lognormal, truncated to ``bounds`` by rejection."""
    lo, hi = bounds
    while True:
        value = float(rng.lognormal(math.log(median), sigma))
        if lo <= value <= hi:
            return value


def _clear(x: float, y: float, r: float, placed: list[dict[str, Any]], skip: int = -1) -> bool:
    """Whether a circle keeps the particle gap from every placed circle but ``skip``."""
    gap = PARAMETERS["particle_gap_um"] / PIXEL_SIZE_UM
    for n, p in enumerate(placed):
        if n == skip:
            continue
        if math.hypot(x - p["x"], y - p["y"]) <= r + p["r"] + gap:
            return False
    return True


def _free_spot(
    rng: np.random.Generator, r: float, placed: list[dict[str, Any]]
) -> tuple[float, float]:
    rows, cols = SHAPE
    for _ in range(20000):
        x = float(rng.uniform(0.0, cols))
        y = float(rng.uniform(0.0, rows))
        if _clear(x, y, r, placed):
            return x, y
    raise RuntimeError(f"no room left for a particle of radius {r:.1f} px")


def _place_grains(rng: np.random.Generator, index: int) -> list[dict[str, Any]]:
    """Grains (particles and fines) and satellites, as circles in pixel coordinates."""
    p = PARAMETERS
    rows, cols = SHAPE
    target = p["particle_coverage"] * rows * cols
    diameters: list[float] = []
    area = 0.0
    while area < target:
        d = (
            _lognormal(
                rng,
                p["particle_diameter_median_um"],
                p["particle_diameter_log_sigma"],
                p["particle_diameter_range_um"],
            )
            / PIXEL_SIZE_UM
        )
        diameters.append(d)
        area += math.pi / 4.0 * d * d
    diameters.sort(reverse=True)

    circles: list[dict[str, Any]] = []
    cluster_size: list[int] = []  # per circle: size of its cluster (shared list entry index)
    cluster_of: list[int] = []
    for d in diameters:
        r = 0.5 * d
        level = float(rng.uniform(*p["particle_level_range"]))
        spot = None
        if circles and float(rng.uniform()) < p["touching_probability"]:
            for _ in range(60):
                host = int(rng.integers(0, len(circles)))
                if cluster_size[cluster_of[host]] >= p["cluster_max_size"]:
                    continue
                angle = float(rng.uniform(0.0, 2.0 * math.pi))
                dist = (r + circles[host]["r"]) * float(rng.uniform(*p["touching_overlap_range"]))
                x = circles[host]["x"] + dist * math.cos(angle)
                y = circles[host]["y"] + dist * math.sin(angle)
                if _clear(x, y, r, circles, skip=host):
                    spot = (x, y, cluster_of[host])
                    break
        if spot is None:
            x, y = _free_spot(rng, r, circles)
            cluster = len(cluster_size)
            cluster_size.append(1)
        else:
            x, y, cluster = spot
            cluster_size[cluster] += 1
        cluster_of.append(cluster)
        circles.append({"x": x, "y": y, "r": r, "level": level, "kind": "particle", "host": -1})

    # satellites: bonded to a particle, kept clear of every other circle
    for host in range(len(circles)):
        if float(rng.uniform()) >= p["satellite_probability"]:
            continue
        rs = 0.5 * float(rng.uniform(*p["satellite_diameter_range_um"])) / PIXEL_SIZE_UM
        level = float(rng.uniform(*p["particle_level_range"]))
        for _ in range(60):
            angle = float(rng.uniform(0.0, 2.0 * math.pi))
            dist = circles[host]["r"] + p["satellite_offset"] * rs
            x = circles[host]["x"] + dist * math.cos(angle)
            y = circles[host]["y"] + dist * math.sin(angle)
            others = [c for n, c in enumerate(circles) if n != host and c["host"] != host]
            if _clear(x, y, rs, others):
                circles.append(
                    {"x": x, "y": y, "r": rs, "level": level, "kind": "satellite", "host": host}
                )
                break

    n_particles = sum(1 for c in circles if c["kind"] == "particle")
    per = p["fines_per_particle_rich"] if index == FINES_RICH_IMAGE else p["fines_per_particle"]
    for _ in range(round(per * n_particles)):
        d = (
            _lognormal(
                rng,
                p["fines_diameter_median_um"],
                p["fines_diameter_log_sigma"],
                p["fines_diameter_range_um"],
            )
            / PIXEL_SIZE_UM
        )
        level = float(rng.uniform(*p["particle_level_range"]))
        x, y = _free_spot(rng, 0.5 * d, circles)
        circles.append({"x": x, "y": y, "r": 0.5 * d, "level": level, "kind": "fine", "host": -1})
    return circles


def _circle_window(c: dict[str, Any]) -> tuple[slice, slice] | None:
    rows, cols = SHAPE
    r0 = max(0, math.floor(c["y"] - c["r"]))
    r1 = min(rows, math.ceil(c["y"] + c["r"]) + 1)
    c0 = max(0, math.floor(c["x"] - c["r"]))
    c1 = min(cols, math.ceil(c["x"] + c["r"]) + 1)
    if r0 >= r1 or c0 >= c1:
        return None
    return slice(r0, r1), slice(c0, c1)


def _sphere(c: dict[str, Any], window: tuple[slice, slice]) -> tuple[np.ndarray, np.ndarray]:
    """Inside mask and ring profile f(u) of one sphere over ``window``."""
    p = PARAMETERS
    yy, xx = np.mgrid[window]
    dx = xx - c["x"]
    dy = yy - c["y"]
    dist2 = dx * dx + dy * dy
    inside = dist2 <= c["r"] * c["r"]
    u = np.sqrt(dist2) / c["r"]
    t = (u - p["ring_position"]) / p["ring_width"]
    bump = np.maximum(0.0, 1.0 - t * t)
    profile = p["ring_floor"] + (1.0 - p["ring_floor"]) * bump * bump
    return inside, profile


def _percentiles(values: list[float]) -> dict[str, float | None]:
    if not values:
        return {"d10": None, "d50": None, "d90": None}
    arr = np.asarray(values, dtype=np.float64)
    out = np.percentile(arr, [10.0, 50.0, 90.0], method="linear")
    return {
        "d10": round(float(out[0]), 4),
        "d50": round(float(out[1]), 4),
        "d90": round(float(out[2]), 4),
    }


def _render(index: int) -> tuple[np.ndarray, dict[str, Any], np.ndarray]:
    """Image, truth and true particle mask of image ``index``."""
    if not 1 <= index <= N_IMAGES:
        raise ValueError(f"image index must be 1..{N_IMAGES} (got {index})")
    p = PARAMETERS
    rows, cols = SHAPE
    # One stream per image, drawn in a fixed order: particles, satellites, fines,
    # background, noise.
    rng = _common.stream(_SEED_BASE, index)
    circles = _place_grains(rng, index)
    background = _background(rng)

    scene = background.copy()
    mask = np.zeros(SHAPE, dtype=bool)
    own_pixels: list[int] = []
    on_frame: list[bool] = []
    for c in circles:
        window = _circle_window(c)
        if window is None:
            own_pixels.append(0)
            on_frame.append(False)
            continue
        inside, profile = _sphere(c, window)
        lit = background[window] + (c["level"] - background[window]) * profile
        scene[window] = np.where(inside, np.maximum(scene[window], lit), scene[window])
        mask[window] |= inside
        own_pixels.append(int(np.count_nonzero(inside)))
        # the circle reaches beyond the frame, or its pixels touch the outer row or column
        on_frame.append(
            bool(
                c["x"] - c["r"] < 0.0
                or c["y"] - c["r"] < 0.0
                or c["x"] + c["r"] > cols - 1
                or c["y"] + c["r"] > rows - 1
            )
        )

    signal = _gaussian(scene, p["blur_sigma_px"])
    signal += p["noise_sigma"] * rng.standard_normal(SHAPE)
    image = _common.quantize(signal, np.uint8)

    # clusters: the 8-connected regions of the true mask
    clusters, _ = ndimage.label(mask, structure=np.ones((3, 3), dtype=bool))
    frame = np.zeros(int(clusters.max()) + 1, dtype=bool)
    for edge in (clusters[0], clusters[-1], clusters[:, 0], clusters[:, -1]):
        frame[edge] = True
    frame[0] = False

    grains = [n for n, c in enumerate(circles) if c["kind"] != "satellite" and own_pixels[n] > 0]
    cluster_id: dict[int, int] = {}
    for n in grains:
        window = _circle_window(circles[n])
        assert window is not None
        inside, _ = _sphere(circles[n], window)
        ids = np.unique(clusters[window][inside])
        assert ids.size == 1 and ids[0] > 0
        cluster_id[n] = int(ids[0])
    px_area = PIXEL_SIZE_UM * PIXEL_SIZE_UM
    diameter = [round(2.0 * circles[n]["r"] * PIXEL_SIZE_UM, 4) for n in grains]
    ecd = [round(math.sqrt(4.0 * own_pixels[n] * px_area / math.pi), 4) for n in grains]
    cut = [bool(frame[cluster_id[n]]) for n in grains]
    inside_ecd = [e for e, k in zip(ecd, cut, strict=False) if not k]
    inside_diameter = [d for d, k in zip(diameter, cut, strict=False) if not k]
    members: dict[int, int] = {}
    for n in grains:
        members[cluster_id[n]] = members.get(cluster_id[n], 0) + 1
    inside_clusters = [m for cid, m in members.items() if not frame[cid]]
    satellites = [c for c in circles if c["kind"] == "satellite"]
    truth = {
        "file": image_name(index),
        "seed": [_SEED_BASE, index],
        "fines_rich": index == FINES_RICH_IMAGE,
        "particle_pixels": int(np.count_nonzero(mask)),
        "grain_count": len(grains),
        "grain_kind": [circles[n]["kind"] for n in grains],
        "grain_diameter_um": diameter,
        "grain_ecd_um": ecd,
        "grain_cut_by_frame": cut,
        "grain_on_frame": [on_frame[n] for n in grains],
        "grain_cluster": [cluster_id[n] for n in grains],
        "satellite_count": len(satellites),
        "satellite_diameter_um": [round(2.0 * c["r"] * PIXEL_SIZE_UM, 4) for c in satellites],
        "inside_count": len(inside_ecd),
        "inside_cluster_count": len(inside_clusters),
        "inside_touching_count": sum(m for m in inside_clusters if m > 1),
        "inside_fines_count": sum(1 for d in inside_diameter if d < FINES_BELOW_UM),
        "inside_ecd_um": _percentiles(inside_ecd),
        "inside_diameter_um": _percentiles(inside_diameter),
    }
    return image, truth, mask


def render(index: int) -> tuple[np.ndarray, dict[str, Any]]:
    """Draw image ``index`` of the lot.

    Parameters
    ----------
    index : int
        Image number, 1 to :data:`N_IMAGES`.

    Returns
    -------
    image : ndarray of uint8, shape :data:`SHAPE`
        The image as stored in the TIFF file.
    truth : dict
        The image's entry of ``lot-truth.json``.
    """
    image, truth, _ = _render(index)
    return image, truth


def _write_tiff(path: Path, image: np.ndarray, index: int) -> None:
    _common.write_plane(
        path,
        image,
        level=9,
        resolution_px_per_cm=RESOLUTION_PX_PER_CM,
        description=(
            f"lotproof demo lot {LOT}, sample {index:02d}: "
            "synthetic powder image made by demo_run/powder/generate.py, not a micrograph"
        ),
        software="lotproof demo_run/powder/generate.py",
    )


def generate(out_dir: str | Path) -> dict[str, Any]:
    """Write the lot's TIFF images into ``out_dir`` and return the ground truth.

    Parameters
    ----------
    out_dir : str or Path
        Folder for ``PW-2612-01.tif`` ... ``PW-2612-06.tif``; created when
        missing. Files of the same names are overwritten.

    Returns
    -------
    dict
        The ground truth (JSON types only), as :func:`main` writes it to
        ``lot-truth.json``: the lot, pixel size, shape, :data:`PARAMETERS` and
        one entry per image (see ``demo_run/powder/README.md``).
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
        "fines_below_um": FINES_BELOW_UM,
        "parameters": json.loads(json.dumps(PARAMETERS)),
        "images": images,
    }


def truth_json(truth: dict[str, Any]) -> str:
    """The text of ``lot-truth.json``: sorted keys, ASCII, one trailing newline."""
    return _common.truth_json(truth)


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python demo_run/powder/generate.py [OUT_DIR]``; returns the exit code."""
    return _common.run_cli(
        argv,
        script="demo_run/powder/generate.py",
        default_out=Path(__file__).resolve().parent / LOT,
        generate=generate,
    )


if __name__ == "__main__":
    raise SystemExit(main())
