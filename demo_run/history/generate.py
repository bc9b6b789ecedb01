"""Generate the lots of the history demo: ten weeks of sintered bronze bearings.

The product, the lots and the lab are invented. Each lot is a batch of
self-lubricating sintered bronze bearings; from each lot the lab polishes four
cross-sections and images them at 1 um per pixel. The oil-holding porosity (the
pore area fraction) is the value the lab watches. Over ten weeks, 32 lots:

- lots 1-6 are analysed with revision 1 of the method (threshold, then measure);
  from lot 7 on with revision 2, which adds an opening that removes single-pixel
  polishing debris the first revision counted as pores, so revision 2 reads a
  little lower: the revision change starts a new baseline;
- from lot 27 on, the porosity drifts upward by ``drift_per_lot`` of the
  lot-to-lot standard deviation per lot (a compaction press losing pressure):
  the control chart's zone rules catch it while every lot still passes its limits.

The images are small (160 x 160 px, 8-bit PNG, about 20 KB each) and are made at
demo time into the demo's output folder; nothing of them is kept in the source
tree. Run as a script, ``python demo_run/history/generate.py OUT_DIR`` writes the
lots into ``OUT_DIR`` and ``lot-truth.json`` beside them.

How an image is made (levels are counts of the 8-bit image):

1. the lot's porosity is ``porosity`` + a lot effect (normal, sd ``lot_sd``) + the
   drift; each image's target is that + an image effect (normal, sd ``image_sd``);
2. bronze at ``metal_level``; pores are dark disks (radius lognormal, median
   ``pore_radius_median_px``, log-sigma ``pore_radius_log_sigma``, cut to
   ``pore_radius_range_px``) at ``pore_level``, placed at random (they may
   overlap) until the union of their pixels reaches the image's target;
3. optics: a gaussian blur of ``blur_sigma_px`` (``scipy.ndimage``, mode
   ``nearest``);
4. debris: ``debris_per_image`` single pixels set to ``debris_level``;
5. sensor: white gaussian noise of ``noise_sigma``; rounded half to even, clipped
   to 0..255, uint8.

Every lot has its own seed (PCG64 seeded with ``[SEED, lot number]``), so the
lots are the same on every run and every machine with the same numpy; the PNG
bytes come from Pillow's zlib at a fixed compression level.
"""

from __future__ import annotations

import json
import math
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["LOTS", "PARAMETERS", "SEED", "Lot", "plan", "write_lots"]

SEED = 2701

PARAMETERS = {
    "lots": 32,
    "images_per_lot": 4,
    "shape_px": [160, 160],
    "pixel_size_um": 1.0,
    "first_day": "2027-01-04",
    "lots_per_week": [3, 3, 4, 3, 3, 3, 4, 3, 3, 3],
    "revision_2_from_lot": 7,
    "porosity": 0.20,
    "lot_sd": 0.005,
    "image_sd": 0.007,
    "drift_from_lot": 27,
    "drift_per_lot": 0.6,
    "metal_level": 190,
    "pore_level": 55,
    "pore_radius_median_px": 3.0,
    "pore_radius_log_sigma": 0.35,
    "pore_radius_range_px": [1.6, 7.0],
    "blur_sigma_px": 0.6,
    "debris_per_image": 70,
    "debris_level": 70,
    "noise_sigma": 5.0,
}

#: lot names in production order
LOTS = tuple(f"SB-{2700 + n}" for n in range(1, PARAMETERS["lots"] + 1))


@dataclass(frozen=True)
class Lot:
    """One lot of the plan: name, production day, the method revision the lab used, targets."""

    number: int
    name: str
    day: str
    revision: int
    porosity: float
    drift_sd: float


def plan() -> list[Lot]:
    """The 32 lots: production days over ten weeks, revisions, and the drawn porosity of each."""
    from datetime import date, timedelta

    p = PARAMETERS
    first = date.fromisoformat(p["first_day"])
    days = []
    for week, count in enumerate(p["lots_per_week"]):
        for k in range(count):
            days.append(first + timedelta(days=7 * week + (k * 5) // max(count - 1, 1)))
    lots = []
    sd = math.sqrt(p["lot_sd"] ** 2 + p["image_sd"] ** 2 / p["images_per_lot"])
    for number, name in enumerate(LOTS, 1):
        rng = np.random.Generator(np.random.PCG64([SEED, number, 0]))
        drift = max(0, number - p["drift_from_lot"] + 1) * p["drift_per_lot"]
        lots.append(
            Lot(
                number=number,
                name=name,
                day=days[number - 1].isoformat(),
                revision=1 if number < p["revision_2_from_lot"] else 2,
                porosity=float(p["porosity"] + rng.normal(0.0, p["lot_sd"]) + drift * sd),
                drift_sd=float(drift),
            )
        )
    return lots


def _image(lot: Lot, index: int) -> tuple[np.ndarray, float]:
    """One cross-section of ``lot``: the uint8 image and its true pore fraction."""
    from scipy import ndimage

    p = PARAMETERS
    rng = np.random.Generator(np.random.PCG64([SEED, lot.number, index]))
    height, width = p["shape_px"]
    target = float(np.clip(lot.porosity + rng.normal(0.0, p["image_sd"]), 0.02, 0.6))
    pores = np.zeros((height, width), bool)
    low, high = p["pore_radius_range_px"]
    yy, xx = np.mgrid[0:height, 0:width]
    need = round(target * height * width)
    while int(pores.sum()) < need:
        radius = float(
            np.clip(
                p["pore_radius_median_px"] * math.exp(rng.normal(0.0, p["pore_radius_log_sigma"])),
                low,
                high,
            )
        )
        cy, cx = rng.uniform(0, height), rng.uniform(0, width)
        pores |= (yy + 0.5 - cy) ** 2 + (xx + 0.5 - cx) ** 2 <= radius * radius
    truth = float(pores.mean())
    picture = np.where(pores, float(p["pore_level"]), float(p["metal_level"]))
    picture = ndimage.gaussian_filter(picture, p["blur_sigma_px"], mode="nearest", truncate=4.0)
    ys = rng.integers(0, height, p["debris_per_image"])
    xs = rng.integers(0, width, p["debris_per_image"])
    picture[ys, xs] = p["debris_level"]
    picture = picture + rng.normal(0.0, p["noise_sigma"], picture.shape)
    return np.clip(np.round(picture), 0, 255).astype(np.uint8), truth


def _png(image: np.ndarray) -> bytes:
    import io

    from PIL import Image

    buffer = io.BytesIO()
    Image.fromarray(image, mode="L").save(buffer, format="PNG", compress_level=6)
    return buffer.getvalue()


def write_lots(out: Path) -> list[tuple[Lot, Path]]:
    """Write every lot into ``out/NAME/`` (files already there with the same bytes are kept)
    and ``out/lot-truth.json``; return the lots with their folders, in production order."""
    out = Path(out)
    written = []
    truth: dict[str, object] = {"seed": SEED, "parameters": PARAMETERS, "lots": {}}
    for lot in plan():
        folder = out / lot.name
        folder.mkdir(parents=True, exist_ok=True)
        fractions = []
        for index in range(1, PARAMETERS["images_per_lot"] + 1):
            image, fraction = _image(lot, index)
            data = _png(image)
            path = folder / f"{lot.name}-{index}.png"
            if not path.is_file() or path.read_bytes() != data:
                path.write_bytes(data)
            fractions.append(fraction)
        truth["lots"][lot.name] = {  # type: ignore[index]
            "day": lot.day,
            "revision": lot.revision,
            "drawn_porosity": lot.porosity,
            "drift_sd": lot.drift_sd,
            "true_pore_fraction": fractions,
        }
        written.append((lot, folder))
    text = json.dumps(truth, indent=2) + "\n"
    record = out / "lot-truth.json"
    if not record.is_file() or record.read_text() != text:
        record.write_text(text)
    return written


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit("usage: python demo_run/history/generate.py OUT_DIR")
    for lot, folder in write_lots(Path(sys.argv[1])):
        print(f"{lot.name}  {lot.day}  r{lot.revision}  {folder}")
