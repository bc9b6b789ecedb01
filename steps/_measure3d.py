"""The 3-D half of the ``measure`` step kind: objects in a volume, in physical units.

``lotproof.steps.measure.measure`` dispatches a 3-D mask or label volume here. Voxel
``(k, i, j)`` (slice, row, column) has its centre at ``(k dz, i dy, j dx)`` um;
the voxel size may differ per axis (anisotropic voxels) and every quantity
below honours it.

Per object: ``volume`` (voxel count times ``dz dy dx``), ``esd`` (equivalent
sphere diameter), ``surface_area`` (marching cubes), ``sphericity``, the 3-D
Euler characteristic, centroid, bounding box and frame contact. Per volume:
counts, volume fraction, number per mm3, specific surface S_V and the
statistics of the equivalent sphere diameters.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from types import MappingProxyType

import numpy as np
from scipy import ndimage as ndi
from skimage.measure import marching_cubes, mesh_surface_area

from lotproof.steps._data import Table

__all__ = [
    "EULER_CONNECTIVITIES_3D",
    "MARCHING_CUBES_LEVEL",
    "OBJECT_COLUMNS_3D",
    "VOLUME_VALUES",
    "euler_characteristic",
    "euler_weights_3d",
    "object_table_3d",
    "volume_values",
    "window_codes_3d",
]

#: Per-volume values of ``measure`` (3D): name -> unit.
VOLUME_VALUES: Mapping[str, str] = MappingProxyType(
    {
        "count": "-",
        "size_count": "-",
        "volume_fraction": "-",
        "number_density_3d": "1/mm3",
        "surface_density": "1/um",
        "euler_number": "-",
        "esd_mean": "um",
        "esd_volume_mean": "um",
        "esd_d10": "um",
        "esd_d50": "um",
        "esd_d90": "um",
        "esd_max": "um",
    }
)

#: Per-object columns of ``measure`` (3D), in table order: name -> unit.
OBJECT_COLUMNS_3D: Mapping[str, str] = MappingProxyType(
    {
        "label": "-",
        "volume": "um3",
        "esd": "um",
        "surface_area": "um2",
        "sphericity": "-",
        "euler_number": "-",
        "centroid_x": "um",
        "centroid_y": "um",
        "centroid_z": "um",
        "bbox_min_x": "um",
        "bbox_max_x": "um",
        "bbox_min_y": "um",
        "bbox_max_y": "um",
        "bbox_min_z": "um",
        "bbox_max_z": "um",
        "touches_border": "-",
    }
)

#: The iso-level of the surface on the 0/1 indicator of an object.
MARCHING_CUBES_LEVEL = 0.5

#: Connectivities for which the 3-D Euler characteristic is computed locally here.
EULER_CONNECTIVITIES_3D: tuple[int, ...] = (6, 26)


def _window_cells() -> tuple[list[list[int]], list[list[int]], list[int]]:
    """The voxels (bits 0..7 of a 2x2x2 window) around each cell at the window's centre vertex.

    Bit ``4 z + 2 y + x`` is the voxel at offset (z, y, x) in {0, 1}^3. An edge
    leaving the centre vertex along axis a towards side s is surrounded by the
    4 voxels with coordinate a == s; a face through the vertex normal to axis
    a, in quadrant (s, t) of the other two axes, lies between the 2 voxels
    with those two coordinates. Returns (6 edges, 12 faces, 8 voxels).
    """
    voxels = [(z, y, x) for z in (0, 1) for y in (0, 1) for x in (0, 1)]
    bit = {v: 4 * v[0] + 2 * v[1] + v[2] for v in voxels}
    edges = []
    # an edge from the centre vertex along axis a, to side s: the 4 voxels with coordinate a == s
    for axis in range(3):
        for side in (0, 1):
            edges.append([bit[v] for v in voxels if v[axis] == side])
    faces = []
    # a face through the vertex normal to axis a, in the quadrant (s, t) of the other two axes:
    # the 2 voxels that differ only in coordinate a
    for axis in range(3):
        others = [b for b in range(3) if b != axis]
        for s in (0, 1):
            for t in (0, 1):
                faces.append([bit[v] for v in voxels if v[others[0]] == s and v[others[1]] == t])
    return edges, faces, list(range(8))


def euler_weights_3d(connectivity: int) -> np.ndarray:
    """8 x the Euler characteristic contribution of each 2x2x2 configuration (int64, 256).

    The characteristic V - E + F - C of a cubical complex is split over the
    lattice vertices: each window (the 8 voxels around one vertex) takes its
    vertex whole, 1/2 of each of its 6 edges, 1/4 of each of its 12 faces and
    1/8 of each of its 8 voxels. For 26-connected objects the complex is the
    union of the closed voxel cubes (a cell is present if any voxel around it
    is foreground); for 6-connected objects it is the dual complex (voxels as
    vertices, face neighbours as edges, ...), whose characteristic is minus
    that of the cells with every surrounding voxel foreground.
    """
    if connectivity not in EULER_CONNECTIVITIES_3D:
        raise ValueError(
            f"the 3-D Euler characteristic is computed for connectivity 6 or 26 "
            f"(got {connectivity}); label with 18 and measure with 6 or 26"
        )
    edges, faces, cubes = _window_cells()
    weights = np.zeros(256, dtype=np.int64)
    for code in range(256):
        on = [(code >> b) & 1 for b in range(8)]
        test = any if connectivity == 26 else all
        vertex = int(test(on))
        e = sum(int(test(on[b] for b in cell)) for cell in edges)
        f = sum(int(test(on[b] for b in cell)) for cell in faces)
        c = sum(on[b] for b in cubes)
        value = 8 * vertex - 4 * e + 2 * f - c
        weights[code] = value if connectivity == 26 else -value
    weights.flags.writeable = False
    return weights


_WEIGHTS = {c: euler_weights_3d(c) for c in EULER_CONNECTIVITIES_3D}


def _corners(padded: np.ndarray) -> list[np.ndarray]:
    """The 8 corner views of all 2x2x2 windows of ``padded``, in bit order 4z + 2y + x."""
    out = []
    for z in (0, 1):
        for y in (0, 1):
            for x in (0, 1):
                out.append(
                    padded[
                        z : padded.shape[0] - 1 + z,
                        y : padded.shape[1] - 1 + y,
                        x : padded.shape[2] - 1 + x,
                    ]
                )
    return out


def window_codes_3d(mask: np.ndarray) -> np.ndarray:
    """Histogram (256) of the 2x2x2 configuration codes of ``mask`` padded with background."""
    padded = np.pad(mask.astype(np.uint8), 1, mode="constant", constant_values=0)
    code = np.zeros(tuple(n - 1 for n in padded.shape), dtype=np.int64)
    for b, corner in enumerate(_corners(padded)):
        code |= corner.astype(np.int64) << b
    return np.bincount(code.ravel(), minlength=256)


def euler_characteristic(mask: np.ndarray, connectivity: int) -> int:
    """The Euler characteristic (objects - tunnels + cavities) of a 3-D mask, frame as background."""
    total = int(window_codes_3d(mask) @ _WEIGHTS[connectivity])
    return total // 8


def _euler_by_object(ids: np.ndarray, count: int, connectivity: int) -> np.ndarray:
    """Euler characteristic of each object alone (ids 1..count), vectorised over windows."""
    padded = np.pad(ids, 1, mode="constant", constant_values=0)
    corners = [c.ravel() for c in _corners(padded)]
    any_fg = np.zeros(corners[0].shape, dtype=bool)
    for c in corners:
        any_fg |= c != 0
    where = np.flatnonzero(any_fg)
    corners = [c[where] for c in corners]
    weights = _WEIGHTS[connectivity]
    total = np.zeros(count + 1, dtype=np.int64)
    for k, own in enumerate(corners):
        # count each label of a window once: at its first corner in bit order
        first = own != 0
        for j in range(k):
            first &= corners[j] != own
        if not first.any():
            continue
        label_here = own[first]
        code = np.zeros(label_here.shape, dtype=np.int64)
        for b, other in enumerate(corners):
            code |= (other[first] == label_here).astype(np.int64) << b
        total += np.bincount(label_here, weights=weights[code], minlength=count + 1).astype(
            np.int64
        )
    return total[1:] // 8


def _surface(indicator: np.ndarray, spacing: tuple[float, float, float]) -> float:
    """Area (um2) of the level-0.5 marching-cubes surface of a 0/1 volume; 0 if it has none."""
    volume = indicator.astype(np.float32)
    if not (volume.min() < MARCHING_CUBES_LEVEL < volume.max()):
        return 0.0
    verts, faces, _, _ = marching_cubes(
        volume,
        level=MARCHING_CUBES_LEVEL,
        spacing=spacing,
        gradient_direction="descent",
        step_size=1,
        allow_degenerate=False,
        method="lewiner",
    )
    return float(mesh_surface_area(verts, faces))


def object_table_3d(
    ids: np.ndarray,
    present: np.ndarray,
    count: int,
    connectivity: int,
    spacing: tuple[float, float, float],
) -> Table:
    """The per-object table (see :func:`lotproof.steps.measure.measure`, 3-D)."""
    dz, dy, dx = spacing
    voxel = dz * dy * dx
    n = np.bincount(ids.ravel(), minlength=count + 1)[1:].astype(np.float64)
    zz, yy, xx = np.nonzero(ids)
    owner = ids[zz, yy, xx]
    safe = np.where(n > 0, n, 1.0)
    centroid = [
        np.bincount(owner, weights=axis.astype(np.float64), minlength=count + 1)[1:] / safe
        for axis in (zz, yy, xx)
    ]
    slices = ndi.find_objects(ids, max_label=count)
    bounds = np.zeros((count, 3, 2), dtype=np.int64)
    surface = np.zeros(count, dtype=np.float64)
    for index, where in enumerate(slices):
        if where is None:
            continue
        for axis, s in enumerate(where):
            bounds[index, axis] = (s.start, s.stop - 1)
        # one voxel of background around the crop closes every surface, also of
        # objects cut by the frame (their cut face counts as surface)
        crop = np.pad(ids[where] == index + 1, 1, mode="constant", constant_values=False)
        surface[index] = _surface(crop, spacing)
    shape = ids.shape
    touches = np.zeros(count, dtype=bool)
    for axis in range(3):
        touches |= (bounds[:, axis, 0] == 0) | (bounds[:, axis, 1] == shape[axis] - 1)
    volume = n * voxel
    esd = np.cbrt(6.0 * volume / np.pi)
    with np.errstate(divide="ignore", invalid="ignore"):
        sphericity = np.where(
            surface > 0, np.pi ** (1.0 / 3.0) * (6.0 * volume) ** (2.0 / 3.0) / surface, np.nan
        )
    columns: dict[str, np.ndarray] = {
        "label": present.astype(np.int32),
        "volume": volume,
        "esd": esd,
        "surface_area": surface,
        "sphericity": sphericity,
        "euler_number": _euler_by_object(ids, count, connectivity).astype(np.int32),
        "centroid_x": centroid[2] * dx,
        "centroid_y": centroid[1] * dy,
        "centroid_z": centroid[0] * dz,
        "bbox_min_x": (bounds[:, 2, 0] - 0.5) * dx,
        "bbox_max_x": (bounds[:, 2, 1] + 0.5) * dx,
        "bbox_min_y": (bounds[:, 1, 0] - 0.5) * dy,
        "bbox_max_y": (bounds[:, 1, 1] + 0.5) * dy,
        "bbox_min_z": (bounds[:, 0, 0] - 0.5) * dz,
        "bbox_max_z": (bounds[:, 0, 1] + 0.5) * dz,
        "touches_border": touches.astype(np.int32),
    }
    return Table(columns=columns, units=dict(OBJECT_COLUMNS_3D))


def _size_statistics(esd: np.ndarray, volume: np.ndarray, prefix: str) -> dict[str, float]:
    names = ("mean", "volume_mean", "d10", "d50", "d90", "max")
    if esd.size == 0:
        return {f"{prefix}_{name}": math.nan for name in names}
    d10, d50, d90 = np.percentile(esd, [10.0, 50.0, 90.0], method="linear")
    return {
        f"{prefix}_mean": float(np.mean(esd)),
        f"{prefix}_volume_mean": float(np.sum(volume * esd) / np.sum(volume)),
        f"{prefix}_d10": float(d10),
        f"{prefix}_d50": float(d50),
        f"{prefix}_d90": float(d90),
        f"{prefix}_max": float(np.max(esd)),
    }


def volume_values(
    foreground: np.ndarray,
    table: Table,
    count: int,
    connectivity: int,
    spacing: tuple[float, float, float],
    border: str,
) -> dict[str, float]:
    """The per-volume values (see :func:`lotproof.steps.measure.measure`, 3-D)."""
    dz, dy, dx = spacing
    field_um3 = foreground.size * dz * dy * dx
    volume_fraction = float(np.count_nonzero(foreground)) / foreground.size
    # the interface inside the field: no padding, so the frame adds no surface
    surface = _surface(foreground, spacing) if foreground.size else 0.0
    esd = np.asarray(table.columns["esd"], dtype=np.float64)
    volume = np.asarray(table.columns["volume"], dtype=np.float64)
    if border == "exclude":
        inside = np.asarray(table.columns["touches_border"]) == 0
        esd, volume = esd[inside], volume[inside]
    values = {
        "count": float(count),
        "size_count": float(esd.size),
        "volume_fraction": volume_fraction,
        "number_density_3d": count / (field_um3 * 1e-9),
        "surface_density": surface / field_um3,
        "euler_number": float(euler_characteristic(foreground, connectivity)),
        **_size_statistics(esd, volume, "esd"),
    }
    return {name: float(values[name]) for name in VOLUME_VALUES}
