"""What the demo generators share: seeded streams, gaussians, rounding, TIFF files, truth, CLI.

The three generators (``demo_run/generate.py``, ``demo_run/powder/generate.py``,
``demo_run/lattice/generate.py``) run as scripts and are loaded by file path in
the tests, so they are not a package: each loads this file by its path (see
``_load_common`` in each of them) instead of importing it by name.

Everything here is chosen so that a run repeats itself byte for byte:

- one PCG64 stream per image, seeded with ``[lot seed, image index]``;
- gaussian kernels built with scalar ``math.exp`` and summed with ``math.fsum``,
  so no vectorised transcendental function (whose last bits may depend on the
  CPU's SIMD code path) enters the pixels; the filtering is additions and
  products (``scipy.ndimage.correlate1d``) with the boundary mode spelled out;
- rounding half to even, then clipping to the range of the stored type;
- TIFF files with every tag the writer would otherwise choose spelled out, no
  DateTime tag, a fixed deflate level and the horizontal predictor; volumes
  carry their voxel size as OME-XML with a UUID derived from the file name and
  no date;
- the truth as JSON with sorted keys, ASCII only and one trailing newline.

The deflate stream comes from the zlib library Python links against: another
zlib build may compress the same pixels to other bytes.

Nothing here uses lotproof: the truth stays independent of the method it checks.
"""

from __future__ import annotations

import json
import math
import sys
import uuid
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import tifffile
from scipy import ndimage

__all__ = [
    "OME_UNIT",
    "TRUTH_FILE",
    "gaussian",
    "gaussian_weights",
    "image_name",
    "quantize",
    "run_cli",
    "smooth_noise",
    "stream",
    "truth_json",
    "write_plane",
    "write_volume",
]

#: Name of the ground-truth file, written beside the lot folder.
TRUTH_FILE = "lot-truth.json"
#: The length unit of the OME-XML physical sizes the volumes carry.
OME_UNIT = "µm"
#: Namespace of the volumes' OME-XML UUIDs: uuid5 of this and the file name.
_UUID_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, "lotproof demo_run")


def image_name(lot: str, index: int) -> str:
    """File name of image ``index`` (1-based) of ``lot``: ``FD-2611-01.tif``."""
    return f"{lot}-{index:02d}.tif"


def stream(seed: int, index: int) -> np.random.Generator:
    """The random stream of image ``index`` of a lot: PCG64 seeded with ``[seed, index]``."""
    return np.random.Generator(np.random.PCG64([seed, index]))


def gaussian_weights(sigma: float, truncate: float) -> np.ndarray:
    """Normalised 1-D gaussian kernel of ``sigma`` samples, radius ``ceil(truncate * sigma)``.

    Built with scalar ``math.exp`` and ``math.fsum``, so no vectorised
    transcendental function enters the pixels.
    """
    radius = math.ceil(truncate * sigma)
    raw = [math.exp(-0.5 * (k / sigma) ** 2) for k in range(-radius, radius + 1)]
    total = math.fsum(raw)
    return np.array([w / total for w in raw], dtype=np.float64)


def gaussian(image: np.ndarray, sigma: float, truncate: float, mode: str) -> np.ndarray:
    """Separable gaussian blur of ``image`` along every axis in turn (0 first).

    ``mode`` is the boundary mode of ``scipy.ndimage.correlate1d``.
    """
    weights = gaussian_weights(sigma, truncate)
    out = image
    for axis in range(image.ndim):
        out = ndimage.correlate1d(out, weights, axis=axis, mode=mode)
    return out


def smooth_noise(
    rng: np.random.Generator,
    shape: tuple[int, ...],
    correlation: float,
    sigma: float,
    truncate: float,
    mode: str,
) -> np.ndarray:
    """White noise blurred by a gaussian of ``correlation`` samples, standard deviation ``sigma``."""
    weights = gaussian_weights(correlation, truncate)
    # Unit white noise filtered by a separable kernel along n axes has the standard
    # deviation (sum of w^2)^(n/2); dividing by that closed form avoids a
    # data-dependent (summation-order) scale.
    scale = sigma / math.fsum(float(w) * float(w) for w in weights) ** (len(shape) / 2)
    return gaussian(rng.standard_normal(shape), correlation, truncate, mode) * scale


def quantize(signal: np.ndarray, dtype: type[np.unsignedinteger[Any]]) -> np.ndarray:
    """Round half to even, clip to the range of the unsigned integer ``dtype``, convert."""
    top = float(np.iinfo(dtype).max)
    return np.clip(np.rint(signal), 0.0, top).astype(dtype)


def write_plane(
    path: Path,
    image: np.ndarray,
    *,
    level: int,
    resolution_px_per_cm: tuple[int, int],
    description: str,
    software: str,
) -> None:
    """One gray page, deflate at ``level`` with the horizontal predictor, resolution in px/cm.

    No DateTime tag and no metadata of tifffile's own in the ImageDescription:
    the description is ``description`` alone.
    """
    tifffile.imwrite(
        path,
        image,
        photometric="minisblack",
        compression="zlib",
        compressionargs={"level": level},
        predictor=True,
        resolution=(resolution_px_per_cm, resolution_px_per_cm),
        resolutionunit="CENTIMETER",
        description=description,
        software=software,
        datetime=False,
        metadata=None,
    )


def write_volume(
    path: Path,
    volume: np.ndarray,
    *,
    voxel_um_zyx: Sequence[float],
    resolution_px_per_cm: tuple[int, int],
    level: int,
    description: str,
    software: str,
) -> None:
    """A gray volume (z, y, x), one page per slice, its voxel size in OME-XML.

    The OME-XML in the first page's ImageDescription gives ``PhysicalSizeX``,
    ``PhysicalSizeY`` and ``PhysicalSizeZ`` in :data:`OME_UNIT`; the plain TIFF
    resolution tags repeat x and y in pixels per centimetre for readers that do
    not read OME-XML. The OME UUID is derived from the file name (uuid5), the
    Creator is ``software``, and no date is written, so the file repeats itself.
    """
    dz, dy, dx = voxel_um_zyx
    tifffile.imwrite(
        path,
        volume,
        ome=True,
        photometric="minisblack",
        compression="zlib",
        compressionargs={"level": level},
        predictor=True,
        resolution=(resolution_px_per_cm, resolution_px_per_cm),
        resolutionunit="CENTIMETER",
        software=software,
        datetime=False,
        metadata={
            "UUID": f"urn:uuid:{uuid.uuid5(_UUID_NAMESPACE, path.name)}",
            "Creator": software,
            "Name": path.stem,
            "Description": description,
            "axes": "ZYX",
            "PhysicalSizeX": dx,
            "PhysicalSizeXUnit": OME_UNIT,
            "PhysicalSizeY": dy,
            "PhysicalSizeYUnit": OME_UNIT,
            "PhysicalSizeZ": dz,
            "PhysicalSizeZUnit": OME_UNIT,
        },
    )


def truth_json(truth: dict[str, Any]) -> str:
    """The text of ``lot-truth.json``: sorted keys, ASCII, one trailing newline."""
    return json.dumps(truth, indent=1, sort_keys=True, ensure_ascii=True) + "\n"


def run_cli(
    argv: list[str] | None,
    *,
    script: str,
    default_out: Path,
    generate: Callable[[Path], dict[str, Any]],
) -> int:
    """Command line ``python SCRIPT [OUT_DIR]``; returns the exit code.

    ``generate(OUT_DIR)`` writes the lot's images into ``OUT_DIR`` (default
    ``default_out``) and returns the truth, which goes to :data:`TRUTH_FILE` in
    the parent folder of ``OUT_DIR``, so that the lot folder holds images only.
    """
    args = sys.argv[1:] if argv is None else argv
    if len(args) > 1 or (args and args[0].startswith("-")):
        print(f"usage: python {script} [OUT_DIR]", file=sys.stderr)
        return 2
    out = Path(args[0]) if args else default_out
    truth = generate(out)
    (out.resolve().parent / TRUTH_FILE).write_text(truth_json(truth), encoding="utf-8")
    return 0
