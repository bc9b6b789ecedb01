"""Deterministic generator of the lattice demo lot LC-2612: synthetic CT volumes of lattice coupons.

Each volume is a small X-ray CT reconstruction of an additively made lattice
coupon: struts of a cubic lattice (cylinders along x, y and z through the
lattice lines) with gas voids (ellipsoids) inside the struts. The script draws
the material and the voids in physical coordinates, samples them on the voxel
grid, blurs and adds noise, and writes multi-page uint8 TIFFs (one page per z
slice) whose voxel size is OME-XML ``PhysicalSizeX``, ``PhysicalSizeY`` and
``PhysicalSizeZ`` in µm, with x and y repeated in the plain resolution tags.
The ground truth (void volume fraction of the material, the voids' equivalent
sphere diameters) is computed from the drawn masks, before blur and noise,
and written to ``lot-truth.json``.

Usage::

    python demo_run/lattice/generate.py [OUT_DIR]

writes ``LC-2612-01.tif`` ... ``LC-2612-05.tif`` into ``OUT_DIR`` (default:
``demo_run/lattice/LC-2612`` beside this file) and the ground truth
``lot-truth.json`` into the parent folder of ``OUT_DIR``, so that the lot folder
holds images only. The output is byte-identical on every run: one PCG64 stream
per coupon, a blur kernel built with scalar ``math.exp``, rounding half to
even, no dates and a UUID derived from the file name in the OME-XML (see
``demo_run/_common.py``, which the three demo generators share).

Nothing here uses lotproof's steps: the truth is independent of the method.
"""

from __future__ import annotations

import hashlib
import importlib.util
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np

__all__ = [
    "COUPONS",
    "LOT",
    "N_IMAGES",
    "RESOLUTION_PX_PER_CM",
    "SHAPE",
    "TRUTH_FILE",
    "VOXEL_UM",
    "generate",
    "image_name",
    "main",
    "make_coupon",
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

SHAPE = (96, 96, 96)  # z, y, x voxels
VOXEL_UM = (3.0, 2.5, 2.5)  # dz, dy, dx
#: TIFF XResolution/YResolution in pixels per centimetre: 1e4 / 2.5.
RESOLUTION_PX_PER_CM = (4000, 1)
CELL_UM = 80.0  # lattice period
STRUT_RADIUS_UM = 15.0
AIR, METAL = 40.0, 190.0
BLUR_SIGMA_VOXELS = 0.6
#: the blur kernel reaches ceil(3.0 * 0.6) = 2 voxels either side
BLUR_TRUNCATE_SIGMAS = 3.0
BLUR_BOUNDARY_MODE = "nearest"
NOISE = 2.0
SEED = 2612
#: Name of the ground-truth file, written beside the lot folder.
TRUTH_FILE = _common.TRUTH_FILE

#: the lot number, also the name of the lot folder
LOT = "LC-2612"
#: per coupon: number of voids and their radius range (um); coupon 04 has more, larger voids
COUPONS = {
    "LC-2612-01": (14, (5.0, 8.0)),
    "LC-2612-02": (10, (5.0, 8.5)),
    "LC-2612-03": (16, (5.0, 8.0)),
    "LC-2612-04": (30, (6.0, 13.0)),
    "LC-2612-05": (12, (5.0, 7.5)),
}
#: Number of volumes (one per coupon) in the lot.
N_IMAGES = len(COUPONS)


def image_name(index: int) -> str:
    """File name of volume ``index`` (1-based): ``LC-2612-01.tif``."""
    return _common.image_name(LOT, index)


def _axes_um() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    z = np.arange(SHAPE[0]) * VOXEL_UM[0]
    y = np.arange(SHAPE[1]) * VOXEL_UM[1]
    x = np.arange(SHAPE[2]) * VOXEL_UM[2]
    return z[:, None, None], y[None, :, None], x[None, None, :]


def _lines(extent: float) -> np.ndarray:
    """Lattice line positions along one axis (um), every CELL_UM, starting half a cell in."""
    return np.arange(CELL_UM / 2, extent, CELL_UM)


def _struts() -> np.ndarray:
    z, y, x = _axes_um()
    extent = [n * d for n, d in zip(SHAPE, VOXEL_UM, strict=False)]
    lz, ly, lx = (_lines(e) for e in extent)
    r2 = STRUT_RADIUS_UM**2
    solid = np.zeros(SHAPE, dtype=bool)
    # distance to the nearest lattice line, per pair of axes
    dz = np.min(np.abs(z - lz.reshape(-1, 1, 1, 1)), axis=0)
    dy = np.min(np.abs(y - ly.reshape(-1, 1, 1, 1)), axis=0)
    dx = np.min(np.abs(x - lx.reshape(-1, 1, 1, 1)), axis=0)
    solid |= (dy**2 + dz**2) <= r2  # struts along x
    solid |= (dx**2 + dz**2) <= r2  # struts along y
    solid |= (dx**2 + dy**2) <= r2  # struts along z
    return solid


def _voids(rng: np.random.Generator, count: int, radii: tuple[float, float]) -> list[dict]:
    """Ellipsoidal voids, each wholly inside one strut and apart from the others."""
    extent = [n * d for n, d in zip(SHAPE, VOXEL_UM, strict=False)]
    # only struts wholly inside the volume carry voids: a void in a strut cut by
    # the frame would be open to the outside
    lines = [
        np.array([p for p in _lines(e) if STRUT_RADIUS_UM + 6 < p < e - STRUT_RADIUS_UM - 6])
        for e in extent
    ]
    voids: list[dict] = []
    margin = 2 * max(VOXEL_UM)
    while len(voids) < count:
        axis = int(rng.integers(3))  # strut direction (0 z, 1 y, 2 x)
        centre = [0.0, 0.0, 0.0]
        a = float(rng.uniform(*radii))
        semi = [a * float(rng.uniform(0.8, 1.0)) for _ in range(3)]
        semi[axis] = a * float(rng.uniform(1.0, 1.3))  # gas voids stretch along the strut
        room = STRUT_RADIUS_UM - max(s for i, s in enumerate(semi) if i != axis) - 5.0
        if room < 0:
            continue
        for i in range(3):
            if i == axis:
                centre[i] = float(rng.uniform(semi[i] + margin, extent[i] - semi[i] - margin))
            else:
                centre[i] = float(rng.choice(lines[i])) + float(rng.uniform(-room, room)) / 2
        # keep apart from other voids and from nodes (where struts cross)
        if any(
            np.linalg.norm(np.subtract(centre, v["centre_um"])) < a + max(v["semi_axes_um"]) + 6
            for v in voids
        ):
            continue
        along = centre[axis]
        if np.min(np.abs(along - _lines(extent[axis]))) < STRUT_RADIUS_UM + semi[axis] + 2:
            continue
        voids.append({"centre_um": centre, "semi_axes_um": semi})
    return voids


def _draw_voids(voids: list[dict]) -> tuple[np.ndarray, list[int]]:
    z, y, x = _axes_um()
    mask = np.zeros(SHAPE, dtype=bool)
    sizes = []
    for v in voids:
        (cz, cy, cx), (az, ay, ax) = v["centre_um"], v["semi_axes_um"]
        one = ((z - cz) / az) ** 2 + ((y - cy) / ay) ** 2 + ((x - cx) / ax) ** 2 <= 1.0
        sizes.append(int(np.count_nonzero(one)))
        mask |= one
    return mask, sizes


def make_coupon(name: str, index: int) -> tuple[np.ndarray, dict]:
    """The volume (uint8, z y x) and its ground truth."""
    count, radii = COUPONS[name]
    rng = _common.stream(SEED, index)
    solid = _struts()
    voids = _voids(rng, count, radii)
    void_mask, void_voxels = _draw_voids(voids)
    assert not (void_mask & ~solid).any(), "a void leaves its strut"
    material = solid & ~void_mask
    field = np.where(material, METAL, AIR)
    field = _common.gaussian(field, BLUR_SIGMA_VOXELS, BLUR_TRUNCATE_SIGMAS, BLUR_BOUNDARY_MODE)
    field = field + NOISE * rng.standard_normal(SHAPE)
    volume = _common.quantize(field, np.uint8)
    voxel = float(np.prod(VOXEL_UM))
    esd_drawn = [2.0 * float(np.prod(v["semi_axes_um"])) ** (1 / 3) for v in voids]
    esd_voxels = [float(np.cbrt(6.0 * n * voxel / np.pi)) for n in void_voxels]
    truth = {
        "file": f"{name}.tif",
        "void_count": len(voids),
        "void_voxels": int(np.count_nonzero(void_mask)),
        "solid_voxels": int(np.count_nonzero(solid)),
        "void_fraction_of_material": float(np.count_nonzero(void_mask) / np.count_nonzero(solid)),
        "void_volume_fraction_of_field": float(np.count_nonzero(void_mask) / void_mask.size),
        "void_esd_um_drawn": esd_drawn,
        "void_esd_um_voxels": esd_voxels,
        "largest_void_esd_um": max(esd_voxels),
        "voids": voids,
    }
    return volume, truth


def generate(out_dir: str | Path) -> dict[str, Any]:
    """Write the lot's volumes into ``out_dir`` and return the ground truth.

    Parameters
    ----------
    out_dir : str or Path
        Folder for ``LC-2612-01.tif`` ... ``LC-2612-05.tif``; created when
        missing. Files of the same names are overwritten.

    Returns
    -------
    dict
        The ground truth (JSON types only), as :func:`main` writes it to
        ``lot-truth.json``: the lot, voxel size, shape, the drawing settings and
        one entry per volume, with the sha256 of the file written.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    images = []
    for index, name in enumerate(COUPONS, start=1):
        volume, truth = make_coupon(name, index)
        path = out / image_name(index)
        _common.write_volume(
            path,
            volume,
            voxel_um_zyx=VOXEL_UM,
            resolution_px_per_cm=RESOLUTION_PX_PER_CM,
            level=6,
            description=(
                f"lotproof demo lot {LOT}, coupon {index:02d}: synthetic CT volume made by "
                "demo_run/lattice/generate.py, not a scan"
            ),
            software="lotproof demo_run/lattice/generate.py",
        )
        truth["sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
        images.append(truth)
    return {
        "lot": LOT,
        "synthetic": True,
        "shape_zyx": list(SHAPE),
        "voxel_size_um_zyx": list(VOXEL_UM),
        "cell_um": CELL_UM,
        "strut_radius_um": STRUT_RADIUS_UM,
        "gray_air_metal": [AIR, METAL],
        "blur_sigma_voxels": BLUR_SIGMA_VOXELS,
        "blur_truncate_sigmas": BLUR_TRUNCATE_SIGMAS,
        "blur_boundary_mode": BLUR_BOUNDARY_MODE,
        "noise_sigma": NOISE,
        "seed": SEED,
        "tiff": (
            "uint8, one page per z slice, deflate level 6, horizontal predictor, "
            "voxel size as OME-XML PhysicalSizeX/Y/Z in um, x and y also in px/cm"
        ),
        "images": images,
    }


def truth_json(truth: dict[str, Any]) -> str:
    """The text of ``lot-truth.json``: sorted keys, ASCII, one trailing newline."""
    return _common.truth_json(truth)


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python demo_run/lattice/generate.py [OUT_DIR]``; returns the exit code."""
    return _common.run_cli(
        argv,
        script="demo_run/lattice/generate.py",
        default_out=Path(__file__).resolve().parent / LOT,
        generate=generate,
    )


if __name__ == "__main__":
    raise SystemExit(main())
