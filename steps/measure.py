"""Connected components and measurement: the ``label`` and ``measure`` step kinds.

``label`` numbers the connected components of a mask. ``measure`` gives a
per-object table (area, equivalent circle diameter, Crofton perimeter, maximum
Feret diameter, axis lengths, circularity, Euler number, centroid, border
contact) and per-image values (count, area fraction, number density, contour
length, Euler number, ECD statistics, lineal stereology), all in physical units
from the pixel size. On a 3-D volume it gives the analogues (volume,
equivalent sphere diameter, marching-cubes surface, 3-D Euler characteristic;
volume fraction, number per mm3, S_V), computed in ``steps/_measure3d.py``.

Every value and column has a unit (:data:`MEASURE_VALUES`,
:data:`OBJECT_COLUMNS`, :data:`OBJECT_COLUMNS_3D`) and a one-line definition
(:data:`VALUE_DEFINITIONS`, :data:`COLUMN_DEFINITIONS`,
:data:`COLUMN_DEFINITIONS_3D`).

Every per-object quantity that scikit-image's ``regionprops`` also defines is
computed to the same definition (tests compare them), but vectorised over all
objects at once.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from types import MappingProxyType
from typing import Literal

import numpy as np
from pydantic import Field

from lotproof.steps import _measure3d as _m3
from lotproof.steps import _measure_kernels as _k
from lotproof.steps._data import Output, Table
from lotproof.steps._measure3d import OBJECT_COLUMNS_3D, VOLUME_VALUES
from lotproof.steps._registry import StepParams, step
from lotproof.steps.connectivity import Connectivity, resolve_connectivity

__all__ = [
    "BORDER_RULES",
    "COLUMN_DEFINITIONS",
    "COLUMN_DEFINITIONS_3D",
    "IMAGE_VALUES",
    "MEASURE_VALUES",
    "OBJECT_COLUMNS",
    "OBJECT_COLUMNS_3D",
    "PHASE_FRACTION_VALUES",
    "VALUE_DEFINITIONS",
    "VOLUME_VALUES",
    "LabelParams",
    "MeasureParams",
    "PhaseFractionParams",
    "label",
    "measure",
    "phase_fraction",
]

#: How ``measure`` treats objects cut by the image frame in its size statistics:
#: include every object, or exclude those touching the frame.
BORDER_RULES: tuple[str, ...] = ("include", "exclude")

#: Per-image values of ``measure`` (2D): name -> unit.
IMAGE_VALUES: Mapping[str, str] = MappingProxyType(
    {
        "count": "-",
        "size_count": "-",
        "area_fraction": "-",
        "number_density": "1/mm2",
        "contour_length": "um",
        "euler_number": "-",
        "ecd_mean": "um",
        "ecd_area_mean": "um",
        "ecd_d10": "um",
        "ecd_d50": "um",
        "ecd_d90": "um",
        "ecd_max": "um",
        "n_l_x": "1/mm",
        "n_l_y": "1/mm",
        "mean_intercept": "um",
        "mean_free_path": "um",
    }
)

#: Per-object columns of ``measure`` (2D), in table order: name -> unit.
OBJECT_COLUMNS: Mapping[str, str] = MappingProxyType(
    {
        "label": "-",
        "area": "um2",
        "ecd": "um",
        "perimeter": "um",
        "feret_max": "um",
        "major_axis": "um",
        "minor_axis": "um",
        "circularity": "-",
        "euler_number": "-",
        "centroid_x": "um",
        "centroid_y": "um",
        "touches_border": "-",
    }
)

#: Every value ``measure`` may report (2D and 3D): name -> unit; limits are checked
#: against these names. A name shared by 2D and 3D has the same unit in both.
MEASURE_VALUES: Mapping[str, str] = MappingProxyType({**IMAGE_VALUES, **VOLUME_VALUES})

_BORDER_NOTE = "objects counted as the border rule says (measure's border parameter)"

#: One-line definition of every per-image (2D) and per-volume (3D) value.
VALUE_DEFINITIONS: Mapping[str, str] = MappingProxyType(
    {
        "count": "number of objects N, every object including those cut by the frame",
        "size_count": "number of objects in the size statistics (ecd_* / esd_*): N with "
        "border: include, the objects not touching the frame with border: exclude",
        "area_fraction": "A_A, foreground pixels / all pixels; estimates the volume fraction "
        "V_V (Delesse); every foreground pixel counts, whatever the border rule",
        "number_density": "N_A, objects per mm2 of field, N / (H W dy dx)",
        "contour_length": "sum of the objects' Crofton perimeters (4 directions)",
        "euler_number": "objects minus holes (2D) or objects - tunnels + cavities (3D) of the "
        "whole foreground, with the step's connectivity",
        "ecd_mean": "number-weighted arithmetic mean ECD, ISO 9276-2 x_bar_1,0 = M_1,0 = "
        "sum(ecd) / n; " + _BORDER_NOTE,
        "ecd_area_mean": "area-weighted arithmetic mean ECD, ISO 9276-2 x_bar_1,2 = M_1,2 = "
        "M_3,0 / M_2,0 = sum(A ecd) / sum(A) (D[3,2]); " + _BORDER_NOTE,
        "ecd_d10": "10th number-weighted percentile of ECD, linear interpolation between "
        "order statistics (Hyndman-Fan type 7); " + _BORDER_NOTE,
        "ecd_d50": "median ECD (number-weighted, type 7); " + _BORDER_NOTE,
        "ecd_d90": "90th number-weighted percentile of ECD (type 7); " + _BORDER_NOTE,
        "ecd_max": "largest ECD; " + _BORDER_NOTE,
        "n_l_x": "N_L along x: features crossed per mm of horizontal test line (every row)",
        "n_l_y": "N_L along y: features crossed per mm of vertical test line (every column)",
        "mean_intercept": "mean intercept length L_3 = A_A / N_L, N_L = (n_l_x + n_l_y) / 2",
        "mean_free_path": "mean free path lambda = (1 - A_A) / N_L (Underwood)",
        "volume_fraction": "V_V, foreground voxels / all voxels",
        "number_density_3d": "N_V, objects per mm3 of field, N / (Z Y X dz dy dx)",
        "surface_density": "S_V, area of the level-0.5 marching-cubes surface of the whole "
        "foreground inside the field (the frame adds none) per um3 of field",
        "esd_mean": "number-weighted arithmetic mean ESD, ISO 9276-2 x_bar_1,0 = sum(esd) / n; "
        + _BORDER_NOTE,
        "esd_volume_mean": "volume-weighted arithmetic mean ESD, ISO 9276-2 x_bar_1,3 = M_1,3 = "
        "M_4,0 / M_3,0 = sum(V esd) / sum(V) (D[4,3]); " + _BORDER_NOTE,
        "esd_d10": "10th number-weighted percentile of ESD (type 7); " + _BORDER_NOTE,
        "esd_d50": "median ESD (number-weighted, type 7); " + _BORDER_NOTE,
        "esd_d90": "90th number-weighted percentile of ESD (type 7); " + _BORDER_NOTE,
        "esd_max": "largest ESD; " + _BORDER_NOTE,
    }
)

#: One-line definition of every per-object column (2D).
COLUMN_DEFINITIONS: Mapping[str, str] = MappingProxyType(
    {
        "label": "the object's label",
        "area": "A = pixel count x dy dx",
        "ecd": "equivalent circle diameter sqrt(4 A / pi)",
        "perimeter": "Crofton perimeter, 4 directions (about 36.8 px for a 10 x 10 px square)",
        "feret_max": "largest caliper diameter of the convex hull of the pixel edge midpoints",
        "major_axis": "4 sqrt(larger eigenvalue of the pixel-centre covariance)",
        "minor_axis": "4 sqrt(smaller eigenvalue of the pixel-centre covariance)",
        "circularity": "4 pi A / P^2 with P the Crofton perimeter (4 directions); not bounded by "
        "1: digital disks of radius 10 to 40 px give 0.93 to 1.04, of 40 to 100 px 0.98 to 1.01",
        "euler_number": "objects minus holes of the object alone, with the connectivity",
        "centroid_x": "mean x of the pixel centres (first pixel centre at 0)",
        "centroid_y": "mean y of the pixel centres (first pixel centre at 0)",
        "touches_border": "1 if a pixel of the object lies on the image frame, else 0",
    }
)

#: One-line definition of every per-object column (3D).
COLUMN_DEFINITIONS_3D: Mapping[str, str] = MappingProxyType(
    {
        "label": "the object's label",
        "volume": "V = voxel count x dz dy dx",
        "esd": "equivalent sphere diameter (6 V / pi)^(1/3)",
        "surface_area": "area of the level-0.5 marching-cubes surface of the object alone, "
        "padded by one voxel of background (a cut face at the frame counts)",
        "sphericity": "pi^(1/3) (6 V)^(2/3) / surface_area (Wadell; 1 for a sphere)",
        "euler_number": "objects - tunnels + cavities of the object alone (1 ball, 0 torus, "
        "2 hollow ball), with the connectivity",
        "centroid_x": "mean x of the voxel centres (first voxel centre at 0)",
        "centroid_y": "mean y of the voxel centres",
        "centroid_z": "mean z of the voxel centres",
        "bbox_min_x": "lower x edge of the bounding box (first voxel spans -dx/2 .. dx/2)",
        "bbox_max_x": "upper x edge of the bounding box",
        "bbox_min_y": "lower y edge of the bounding box",
        "bbox_max_y": "upper y edge of the bounding box",
        "bbox_min_z": "lower z edge of the bounding box",
        "bbox_max_z": "upper z edge of the bounding box",
        "touches_border": "1 if a voxel of the object lies on the volume's frame, else 0",
    }
)


class LabelParams(StepParams):
    """Parameters of ``label``."""

    connectivity: Connectivity = None


class MeasureParams(StepParams):
    """Parameters of ``measure``."""

    connectivity: Connectivity = None
    border: Literal[BORDER_RULES] = Field(  # type: ignore[valid-type]
        "include",
        description="objects touching the image frame in the size statistics (ecd_*, esd_*): "
        "include counts them, exclude leaves them out (they stay in the table, in count, "
        "in the area / volume fraction and in stereology; size_count says how many were "
        "sized). Default include",
    )


@step(
    "label",
    params=LabelParams,
    takes=["mask"],
    gives="labels",
    version="1",
    ndims=(2, 3),
    libraries=("numpy", "scipy"),
)
def label(params: LabelParams, mask: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Number the connected objects of a mask 1, 2, 3, ... in raster order.

    Two foreground pixels belong to the same object when a path of foreground
    pixels joins them, each step going to a neighbour of the chosen
    connectivity. Objects are numbered in the order of their first pixel in
    C (row-major) order; background is 0.

    Parameters
    ----------
    params : LabelParams
        ``connectivity``: 4 or 8 (2D), 6, 18 or 26 (3D); ``None`` means 8 in
        2D and 26 in 3D.
    mask : ndarray of bool, 2D or 3D
        Foreground to label.
    spacing : tuple of float
        Pixel size per axis in um (unused: connectivity is topological).

    Returns
    -------
    ndarray of int32
        Labels ``1..N``, ``0`` for background, same shape as ``mask``.

    Raises
    ------
    ValueError
        If the mask is not bool or the connectivity belongs to the other
        dimension.

    Notes
    -----
    Computed by ``scipy.ndimage.label`` with an explicit structuring element:
    the 3^d neighbours within squared distance 1 (4 / 6), 2 (8 / 18) or
    d (8 in 2D, 26 in 3D) of the centre.

    References
    ----------
    .. [1] Rosenfeld, A., Pfaltz, J. L. (1966). Sequential operations in digital
       picture processing. Journal of the ACM, 13(4), 471-494.
       :doi:`10.1145/321356.321357`
    """
    if mask.dtype != np.bool_:
        raise ValueError(f"label needs a mask of bool (got {mask.dtype})")
    connectivity = resolve_connectivity(params.connectivity, mask.ndim)
    labels, _ = _k.label_mask(mask, connectivity)
    return labels


def _check_spacing_2d(spacing: tuple[float, ...]) -> float:
    if len(spacing) != 2:
        raise ValueError(f"measure needs a pixel size per axis (dy, dx) (got {spacing!r})")
    dy, dx = (float(s) for s in spacing)
    if not all(math.isfinite(s) and s > 0 for s in (dy, dx)):
        raise ValueError(f"pixel size must be finite and > 0 um (got {spacing!r})")
    if not math.isclose(dy, dx, rel_tol=1e-9, abs_tol=0.0):
        raise ValueError(f"measure supports square pixels only (got dy = {dy} um, dx = {dx} um)")
    return dx


def _object_ids(data: np.ndarray, connectivity: int) -> tuple[np.ndarray, np.ndarray]:
    """Compact ids 1..N and the original label of each, from a mask or a label image."""
    if data.dtype == np.bool_:
        labels, count = _k.label_mask(data, connectivity)
        return labels.astype(np.int64), np.arange(1, count + 1, dtype=np.int64)
    if not np.issubdtype(data.dtype, np.integer):
        raise ValueError(f"measure needs a mask (bool) or labels (integer) (got {data.dtype})")
    if data.size and int(data.min()) < 0:
        raise ValueError(f"labels must be >= 0 (got {int(data.min())})")
    if data.size and int(data.max()) > np.iinfo(np.int32).max:
        raise ValueError(f"labels must fit in int32 (got {int(data.max())})")
    return _k.compact_labels(data.astype(np.int64, copy=False))


@step(
    "measure",
    params=MeasureParams,
    takes=[("mask", "labels")],
    gives="table",
    version="2",
    values=MEASURE_VALUES,
    ndims=(2, 3),
    libraries=("numpy", "scipy", "skimage", "numba"),
    definitions=VALUE_DEFINITIONS,
    columns={
        **{name: (unit, COLUMN_DEFINITIONS[name]) for name, unit in OBJECT_COLUMNS.items()},
        **{
            f"{name} (3-D)": (unit, COLUMN_DEFINITIONS_3D[name])
            for name, unit in OBJECT_COLUMNS_3D.items()
            if COLUMN_DEFINITIONS_3D[name] != COLUMN_DEFINITIONS.get(name)
        },
    },
)
def measure(params: MeasureParams, data: np.ndarray, *, spacing: tuple[float, ...]) -> Output:
    """Measure every object (table) and the whole image or volume (values), in physical units.

    A mask is first labelled with ``connectivity`` (as ``label`` does); a label
    image is measured as given, one row per label present. Rows are sorted by
    label. The same ``connectivity`` sets the Euler numbers. A 3-D volume gives
    the 3-D table and values (see *Notes, 3D*).

    Border rule (``border``): with ``include`` (the default) every object
    enters the size statistics; with ``exclude`` the objects with a pixel on
    the frame (``touches_border``) are left out of ``ecd_*`` / ``esd_*``,
    because their true size is unknown. They stay in the table, in ``count``
    and ``number_density``, and in every field value (area or volume
    fraction, contour length, Euler number, stereology), which measure the
    field, not the objects. ``size_count`` reports how many objects were sized.

    Parameters
    ----------
    params : MeasureParams
        ``connectivity``: 4 or 8 in 2D (``None``: 8), 6, 18 or 26 in 3D
        (``None``: 26; the 3-D Euler characteristic needs 6 or 26);
        ``border``: ``include`` or ``exclude``.
    data : ndarray of bool (mask) or of int (labels), 2D or 3D
        Objects to measure; in a label image 0 is background.
    spacing : tuple of float
        Pixel size ``(dy, dx)`` in um, square pixels only in 2D (``dy`` and
        ``dx`` must agree to 1e-9 relative; ``dx`` is used for both); voxel
        size ``(dz, dy, dx)`` in 3D, any positive sizes.

    Returns
    -------
    Output
        ``data`` is a :class:`~lotproof.steps._data.Table` with the columns of
        :data:`OBJECT_COLUMNS` (2D) or :data:`OBJECT_COLUMNS_3D` (3D):
        ``label``, ``euler_number`` and ``touches_border`` (0/1) as int32,
        all others float64. ``values`` holds :data:`IMAGE_VALUES` (2D) or
        :data:`VOLUME_VALUES` (3D) as floats, ``units`` their units.

    Raises
    ------
    ValueError
        For data that is not 2D or 3D, not bool or integer, negative labels,
        non-square pixels in 2D, or connectivity 18 in 3D.

    Notes
    -----
    Pixel ``(i, j)`` (row, column) has its centre at ``(i dy, j dx)``: the
    first pixel's centre is the origin, as in ``regionprops``. Sums are
    accumulated in float64. With ``n`` the pixel count of an object and ``d``
    the pixel size:

    * ``area`` ``A = n d^2``; ``ecd = sqrt(4 A / pi)``.
    * ``perimeter``: Crofton estimator in four directions (0, 45, 90, 135
      degrees) from 2x2 pixel configurations of the object alone, padded with
      background [1]_; the table and result are those of scikit-image's
      ``perimeter_crofton(..., directions=4)`` (times ``d``). A 10 x 10 px
      square gives 36.81 px; a single pixel 2.68 px.
    * ``circularity = 4 pi A / P^2`` with ``P`` the Crofton perimeter: 1 for
      a true disk, but not bounded by 1 on pixels. The Crofton estimate of a
      digital disk's perimeter is sometimes shorter than ``2 pi r`` while ``A``
      is close to ``pi r^2``: digital disks of radius 10 to 40 px give 0.93 to
      1.04 (1.03 at 10.5 px), of 40 to 100 px 0.98 to 1.01, and objects of a few
      pixels up to 1.08 (``tests/reference/test_measure_reference.py``).
    * ``feret_max``: the largest distance between two contour points (level
      0.5) of the object's convex hull image, i.e. the pixels whose centres lie
      in the convex hull of the edge midpoints of the object's pixels -- the
      definition of ``regionprops``' ``feret_diameter_max``. A single pixel
      gives 1 px, a 1 x 10 px bar 10 px, a 10 x 10 px square sqrt(181) =
      13.45 px (edge midpoints, not the 14.14 px between outer corners).
    * ``major_axis``, ``minor_axis`` ``= 4 sqrt(lambda)`` with ``lambda`` the
      eigenvalues of the covariance matrix of the pixel centres
      (second central moments / n) [4]_, as ``regionprops``'
      ``axis_major_length`` / ``axis_minor_length``.
    * ``euler_number``: objects minus holes of the object alone, from bit
      quads [2]_: ``E = (n(Q1) - n(Q3) + 2 n(QD)) / 4`` for 4-connectivity,
      ``(n(Q1) - n(Q3) - 2 n(QD)) / 4`` for 8-connectivity.
    * ``touches_border``: 1 if a pixel of the object lies in the first or
      last row or column.

    Per image, with ``N`` objects, ``A_A`` the foreground fraction of the
    field and ``F = H W dy dx`` the field area:

    * ``count = N``; ``number_density = N / F`` in 1/mm2 (every object counts,
      also those cut by the frame); ``contour_length`` = sum of the objects'
      perimeters (a boundary shared by two touching labels counts twice);
      ``euler_number`` of the whole foreground with ``connectivity``.
    * Size statistics over the ``size_count`` objects the border rule keeps,
      in the moment notation of ISO 9276-2 [4]_ (``M_k,r`` the k-th moment of
      the size distribution of quantity type r: 0 number, 2 area, 3 volume;
      ``x_bar_k,r`` the mean size): ``ecd_mean`` is the number-weighted
      arithmetic mean ``x_bar_1,0 = M_1,0 = sum(x_i) / n``; ``ecd_area_mean``
      the area-weighted arithmetic mean ``x_bar_1,2 = M_1,2 = M_3,0 / M_2,0
      = sum(A_i x_i) / sum(A_i)`` (the Sauter diameter D[3,2]): a section's
      area is its quantity of type 2, and weighting by area is what a sieve
      or a laser diffraction analyser does not do but an area fraction does.
      ``ecd_d10/d50/d90`` are number-weighted percentiles of the object ECDs by
      linear interpolation between order statistics, Hyndman & Fan type 7
      [5]_ (numpy's ``method="linear"``: with the ECDs sorted,
      ``x_(1 + (n - 1) p)`` interpolated linearly), ``ecd_max`` the largest.
      All ``ecd_*`` are NaN when no object is sized.
    * Lineal analysis [3]_ on test lines through every pixel row (x) and
      column (y): ``P`` = number of foreground/background boundary crossings
      between neighbouring pixels of the line (the frame is no boundary), and
      ``n_l = P / (2 L)`` with ``L`` the total line length. Each run of
      foreground pixels inside the field thus counts as one feature crossed,
      a run that touches one end of its line as one half, a run spanning the
      whole line as zero (the half count for segments at the line ends of
      common lineal intercept practice, e.g. ASTM E112).
      ``N_L = (n_l_x + n_l_y) / 2``; ``mean_intercept L_3 = A_A / N_L`` and
      ``mean_free_path lambda = (1 - A_A) / N_L``, both NaN when ``N_L = 0``.
      Stereology uses the foreground as one phase: touching labels are not
      separated.

    3D, with ``N`` objects, voxel size ``(dz, dy, dx)`` and field volume
    ``F = Z Y X dz dy dx``:

    * ``volume V = n dz dy dx``; ``esd = (6 V / pi)^(1/3)``.
    * ``surface_area``: skimage's ``marching_cubes`` (Lewiner, level 0.5 on
      the object's 0/1 indicator, ``spacing=(dz, dy, dx)``, step 1) on the
      object's bounding box padded with one voxel of background, and
      ``mesh_surface_area`` [6]_. The surface of a 0/1 indicator is
      faceted and overestimates a smooth one: for balls of radius 5 to 20
      voxels by 6 to 9 % on cubic voxels, up to 11 % on anisotropic ones
      (tests/reference/test_measure3d_reference.py). An object cut by the
      frame is closed by the padding, so its cut face counts.
    * ``sphericity = pi^(1/3) (6 V)^(2/3) / S`` (Wadell).
    * ``euler_number``: objects - tunnels + cavities of the object alone,
      from 2x2x2 voxel configurations (each lattice vertex takes its share
      of the cells of a cubical complex: closed voxels for 26, the dual
      complex for 6); a ball gives 1, a hollow ball 2, a torus 0 [7]_.
    * ``centroid_x/y/z``: mean voxel centre; ``bbox_min/max_x/y/z``: the
      outer edges of the bounding box (``max - min`` is the extent);
      ``touches_border``: a voxel on the first or last slice, row or column.
    * Per volume: ``count = N``; ``volume_fraction V_V``;
      ``number_density_3d = N / F`` in 1/mm3; ``surface_density S_V`` = area
      of the marching-cubes surface of the whole foreground without padding
      (only interfaces inside the field) / ``F``, in 1/um, 0 for an empty or
      full field; ``euler_number`` of the whole foreground; ``esd_mean``
      ``x_bar_1,0``, ``esd_volume_mean`` ``x_bar_1,3 = M_4,0 / M_3,0 =
      sum(V_i x_i) / sum(V_i)`` (D[4,3]), ``esd_d10/d50/d90`` (type 7),
      ``esd_max``, with the border rule.

    References
    ----------
    .. [1] Lehmann, G., Legland, D. (2012). Efficient N-Dimensional surface
       estimation using Crofton formula and run-length encoding. The Insight
       Journal.
    .. [2] Gray, S. B. (1971). Local properties of binary images in two
       dimensions. IEEE Transactions on Computers, C-20(5), 551-561.
       :doi:`10.1109/T-C.1971.223289`
    .. [3] Underwood, E. E. (1970). Quantitative Stereology. Addison-Wesley,
       Reading, MA.
    .. [4] ISO 9276-2:2014. Representation of results of particle size
       analysis -- Part 2: Calculation of average particle sizes/diameters and
       moments from particle size distributions.
    .. [5] Hyndman, R. J., Fan, Y. (1996). Sample quantiles in statistical
       packages. The American Statistician, 50(4), 361-365.
       :doi:`10.1080/00031305.1996.10473566`
    .. [6] Lewiner, T., Lopes, H., Vieira, A. W., Tavares, G. (2003). Efficient
       implementation of marching cubes' cases with topological guarantees.
       Journal of Graphics Tools, 8(2), 1-15.
       :doi:`10.1080/10867651.2003.10487582`
    .. [7] Toriwaki, J., Yonekura, T. (2002). Euler number and connectivity
       indexes of a three dimensional digital picture. Forma, 17, 183-209.
    """
    if data.ndim not in (2, 3):
        raise ValueError(f"measure supports 2D images and 3D volumes (got {data.ndim}D)")
    if data.size == 0:
        raise ValueError(f"measure needs at least one pixel (got shape {data.shape})")
    if data.ndim == 3:
        return _measure_volume(params, data, spacing)
    d = _check_spacing_2d(spacing)
    connectivity = resolve_connectivity(params.connectivity, 2)
    ids, present = _object_ids(data, connectivity)
    count = int(present.size)
    foreground = ids != 0

    table = _object_table(ids, present, count, connectivity, d)
    values = _image_values(foreground, table, count, connectivity, d, params.border)
    return Output(data=table, values=values, units=dict(IMAGE_VALUES))


def _measure_volume(params: MeasureParams, data: np.ndarray, spacing: tuple[float, ...]) -> Output:
    if len(spacing) != 3:
        raise ValueError(f"measure needs a voxel size per axis (dz, dy, dx) (got {spacing!r})")
    sizes = tuple(float(s) for s in spacing)
    if not all(math.isfinite(s) and s > 0 for s in sizes):
        raise ValueError(f"voxel size must be finite and > 0 um (got {spacing!r})")
    connectivity = resolve_connectivity(params.connectivity, 3)
    if connectivity not in _m3.EULER_CONNECTIVITIES_3D:
        raise ValueError(
            f"measure computes the 3-D Euler characteristic for connectivity 6 or 26 (got "
            f"{connectivity}); label the mask with connectivity 18 and measure the labels with "
            "6 or 26"
        )
    ids, present = _object_ids(data, connectivity)
    count = int(present.size)
    spacing3 = (sizes[0], sizes[1], sizes[2])
    table = _m3.object_table_3d(ids, present, count, connectivity, spacing3)
    values = _m3.volume_values(ids != 0, table, count, connectivity, spacing3, params.border)
    return Output(data=table, values=values, units=dict(VOLUME_VALUES))


def _object_table(
    ids: np.ndarray, present: np.ndarray, count: int, connectivity: int, d: float
) -> Table:
    height, width = ids.shape
    moments = _k.pixel_moments_2d(ids, count)
    quads = _k.window_histogram_by_label_2d(ids, count)[1:]
    euler_weights = _k.EULER4_WEIGHTS_2D if connectivity == 4 else _k.EULER8_WEIGHTS_2D
    euler4 = quads @ euler_weights  # int64, exactly 4 x Euler number

    n = moments["n"]
    area = n * (d * d)
    perimeter = (quads @ _k.CROFTON_WEIGHTS_2D) * d
    safe_n = np.where(n > 0, n, 1.0)
    a = moments["mu_rr"] / safe_n
    c = moments["mu_cc"] / safe_n
    b = moments["mu_rc"] / safe_n
    half_sum = (a + c) / 2
    radius = np.hypot((a - c) / 2, b)
    lam1 = half_sum + radius
    lam2 = np.clip(half_sum - radius, 0.0, None)  # rounding can make it slightly negative
    boxes = _k.bounding_boxes(ids, count)
    touches = (
        (boxes[:, 0] == 0) | (boxes[:, 1] == 0) | (boxes[:, 2] == height) | (boxes[:, 3] == width)
    )
    columns = {
        "label": present.astype(np.int32),
        "area": area,
        "ecd": np.sqrt(4.0 * area / np.pi),
        "perimeter": perimeter,
        "feret_max": _k.feret_max_2d(ids, boxes) * d,
        "major_axis": 4.0 * np.sqrt(lam1) * d,
        "minor_axis": 4.0 * np.sqrt(lam2) * d,
        "circularity": 4.0 * np.pi * area / (perimeter * perimeter),
        "euler_number": (euler4 // 4).astype(np.int32),
        "centroid_x": moments["col"] * d,
        "centroid_y": moments["row"] * d,
        "touches_border": touches.astype(np.int32),
    }
    return Table(columns=columns, units=dict(OBJECT_COLUMNS))


def _image_values(
    foreground: np.ndarray, table: Table, count: int, connectivity: int, d: float, border: str
) -> dict[str, float]:
    height, width = foreground.shape
    field_um2 = height * width * d * d
    area_fraction = float(np.count_nonzero(foreground)) / foreground.size
    euler_weights = _k.EULER4_WEIGHTS_2D if connectivity == 4 else _k.EULER8_WEIGHTS_2D
    euler4 = int(_k.window_histogram_2d(foreground) @ euler_weights)

    ecd = np.asarray(table.columns["ecd"], dtype=np.float64)
    area = np.asarray(table.columns["area"], dtype=np.float64)
    if border == "exclude":
        inside = np.asarray(table.columns["touches_border"]) == 0
        ecd, area = ecd[inside], area[inside]
    if ecd.size:
        d10, d50, d90 = np.percentile(ecd, [10.0, 50.0, 90.0], method="linear")
        ecd_stats = {
            "ecd_mean": float(np.mean(ecd)),
            "ecd_area_mean": float(np.sum(area * ecd) / np.sum(area)),
            "ecd_d10": float(d10),
            "ecd_d50": float(d50),
            "ecd_d90": float(d90),
            "ecd_max": float(np.max(ecd)),
        }
    else:
        names = ("ecd_mean", "ecd_area_mean", "ecd_d10", "ecd_d50", "ecd_d90", "ecd_max")
        ecd_stats = dict.fromkeys(names, math.nan)

    crossings_x, crossings_y = _k.boundary_crossings_2d(foreground)
    # Features crossed per um of test line: half the boundary crossings.
    n_l_x = crossings_x / 2.0 / (height * width * d)
    n_l_y = crossings_y / 2.0 / (width * height * d)
    n_l = (n_l_x + n_l_y) / 2.0
    if n_l > 0:
        mean_intercept = area_fraction / n_l
        mean_free_path = (1.0 - area_fraction) / n_l
    else:
        mean_intercept = mean_free_path = math.nan

    values = {
        "count": float(count),
        "size_count": float(ecd.size),
        "area_fraction": area_fraction,
        "number_density": count / (field_um2 * 1e-6),
        "contour_length": float(np.sum(table.columns["perimeter"])),
        "euler_number": float(euler4 // 4),
        **ecd_stats,
        "n_l_x": n_l_x * 1e3,
        "n_l_y": n_l_y * 1e3,
        "mean_intercept": mean_intercept,
        "mean_free_path": mean_free_path,
    }
    return {name: float(values[name]) for name in IMAGE_VALUES}


#: Values of ``phase-fraction``: name -> unit.
PHASE_FRACTION_VALUES: Mapping[str, str] = MappingProxyType(
    {
        "fraction": "-",
        "reference_fraction": "-",
    }
)


class PhaseFractionParams(StepParams):
    """``phase-fraction`` has no parameters."""


@step(
    "phase-fraction",
    params=PhaseFractionParams,
    takes=["mask", "mask"],
    gives="values",
    version="1",
    values=PHASE_FRACTION_VALUES,
    ndims=(2, 3),
)
def phase_fraction(
    params: PhaseFractionParams,
    phase: np.ndarray,
    reference: np.ndarray,
    *,
    spacing: tuple[float, ...],
) -> Output:
    """Fraction of a reference region that a phase occupies (e.g. voids in the solid).

    Point counting over every pixel (voxel) of the field: the fraction of the
    reference pixels that are also phase pixels. For gas voids in a part,
    ``phase`` is the void mask and ``reference`` the part with its voids
    filled, so ``fraction`` is the void content of the material, not of the
    field (which ``measure``'s ``volume_fraction`` gives).

    Parameters
    ----------
    params : PhaseFractionParams
        No parameters.
    phase : ndarray of bool, 2D or 3D
        The phase (e.g. voids).
    reference : ndarray of bool, same shape
        The region the fraction refers to (e.g. material and voids).
    spacing : tuple of float
        Pixel size per axis in um (unused: pixels of one field have one size).

    Returns
    -------
    Output
        ``data`` an empty :class:`~lotproof.steps._data.Table`; ``values``:
        ``fraction`` = |phase and reference| / |reference| (NaN for an empty
        reference) and ``reference_fraction`` = |reference| / |field|, both
        dimensionless.

    Notes
    -----
    With point counting on the full grid, P_P = P_phase / P_reference
    estimates the volume fraction of the phase in the reference region
    (Delesse's principle, V_V = A_A = L_L = P_P).

    References
    ----------
    .. [1] Underwood, E. E. (1970). Quantitative Stereology. Addison-Wesley,
       Reading, MA.
    """
    for what, mask in (("phase", phase), ("reference", reference)):
        if mask.dtype != np.bool_:
            raise ValueError(f"phase-fraction needs bool masks; the {what} is {mask.dtype}")
    if phase.shape != reference.shape:
        raise ValueError(
            f"phase-fraction needs masks of one shape (phase {phase.shape}, reference "
            f"{reference.shape})"
        )
    if reference.size == 0:
        raise ValueError("phase-fraction needs at least one pixel")
    inside = int(np.count_nonzero(reference))
    both = int(np.count_nonzero(phase & reference))
    values = {
        "fraction": both / inside if inside else math.nan,
        "reference_fraction": inside / reference.size,
    }
    return Output(
        data=Table(columns={}, units={}), values=values, units=dict(PHASE_FRACTION_VALUES)
    )
