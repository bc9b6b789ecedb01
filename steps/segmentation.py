"""Separating touching objects: the ``split-touching`` step kind.

A mask of particles that touch in pairs or clusters is one connected region per
cluster. ``split-touching`` cuts each cluster into its particles along the necks
between them: the distance of every foreground pixel to the background is
highest at particle centres and dips at a neck, so flooding the inverted
distance from one marker per particle (a marker-controlled watershed) meets at
the necks.
"""

from __future__ import annotations

import math
from typing import Annotated, Literal

import numpy as np
from pydantic import Field
from scipy import ndimage as ndi
from scipy.spatial import cKDTree
from skimage.morphology import local_maxima, reconstruction
from skimage.segmentation import watershed

from lotproof.steps._registry import StepParams, step
from lotproof.steps.connectivity import CONNECTIVITIES, resolve_connectivity, structure
from lotproof.steps.units import Length

__all__ = [
    "SplitParams",
    "distance_markers",
    "raster_relabel",
    "split_touching",
]


class SplitParams(StepParams):
    """Parameters of ``split-touching``."""

    min_separation: Length = Field(
        description="markers (distance maxima) closer than this, a length (e.g. 6 um or "
        "8 px), merge into one object; about the radius of the smallest particle to be kept "
        "apart. No default: it depends on the particles",
    )
    min_depth: Length = Field(
        "1 px",
        validate_default=True,
        description="a maximum of the distance must rise at least this much, a length, above "
        "the lowest pass joining it to a higher one (h-maxima); shallower ones are ripples "
        "of the digital distance or bumps of the outline, not particles. Default 1 px",
    )
    connectivity: Annotated[
        Literal[CONNECTIVITIES] | None,  # type: ignore[valid-type]
        Field(
            description=(
                "neighbours that join pixels into one object, for the clusters and the "
                "flooding (maxima are always found over all 8 / 26 neighbours): 4 or 8 in "
                "2D, 6, 18 or 26 in 3D; empty (null) means 8 in 2D, 26 in 3D"
            )
        ),
    ] = None


def _check_spacing(spacing: tuple[float, ...], ndim: int) -> tuple[float, ...]:
    if len(spacing) != ndim:
        raise ValueError(f"need a pixel size per axis ({ndim}) (got {spacing!r})")
    sizes = tuple(float(s) for s in spacing)
    if not all(math.isfinite(s) and s > 0 for s in sizes):
        raise ValueError(f"pixel size must be finite and > 0 um (got {spacing!r})")
    return sizes


def raster_relabel(labels: np.ndarray) -> np.ndarray:
    """Renumber labels ``1..N`` in the C (raster) order of each label's first pixel.

    Parameters
    ----------
    labels : ndarray of int
        Any non-negative labels; 0 is background.

    Returns
    -------
    ndarray of int32
        Same shape; the label whose first pixel comes first in C order is 1,
        the next 2, and so on; background stays 0.
    """
    flat = labels.ravel()
    where = np.flatnonzero(flat)
    out = np.zeros(labels.shape, dtype=np.int32)
    if where.size == 0:
        return out
    values, first = np.unique(flat[where], return_index=True)
    order = np.argsort(first, kind="stable")
    lookup = np.zeros(int(values.max()) + 1, dtype=np.int32)
    lookup[values[order]] = np.arange(1, values.size + 1, dtype=np.int32)
    out.ravel()[where] = lookup[flat[where]]
    return out


def distance_markers(
    distance: np.ndarray,
    relief: np.ndarray,
    regions: np.ndarray,
    min_separation_um: float,
    spacing: tuple[float, ...],
) -> np.ndarray:
    """One marker per object: tops of the maxima of ``relief``, thinned by a minimum separation.

    Parameters
    ----------
    distance : ndarray of float64
        Distance of each pixel to the background, in um.
    relief : ndarray of float64
        The distance with its shallow maxima flattened (the h-maxima
        reconstruction), or ``distance`` itself; same shape.
    regions : ndarray of int
        Connected regions of the foreground ``1..R`` (0 is background), same
        shape.
    min_separation_um : float
        Markers closer than this (um) merge; > 0.
    spacing : tuple of float
        Pixel size per axis in um.

    Returns
    -------
    ndarray of int32
        Markers ``1..M`` (in the order they were accepted), 0 elsewhere.

    Notes
    -----
    A candidate is a regional maximum of ``relief``: a plateau of equal value,
    connected through all ``3**ndim - 1`` neighbours, with no higher neighbour
    among them (``skimage.morphology.local_maxima``, frame pixels allowed), cut
    by the regions where it spans two of them. A region that has no candidate
    (its top is next to a higher pixel of another region across a corner, or
    it is shallower than the flattening) gets one made of its whole self.
    Each candidate is then narrowed to its top: its pixels of the largest
    ``distance``. Within each region, candidates are taken highest first, ties
    by the C order of their first top pixel; a candidate is dropped when one
    of its top pixels lies closer than ``min_separation_um`` (Euclidean, in
    um) to a top pixel of a candidate already taken. The highest candidate of
    a region is always taken, so every region gets a marker.
    """
    markers = np.zeros(regions.shape, dtype=np.int32)
    n_regions = int(regions.max()) if regions.size else 0
    if n_regions == 0:
        return markers
    full = ndi.generate_binary_structure(regions.ndim, regions.ndim)
    peaks = local_maxima(relief, footprint=full, allow_borders=True) & (regions > 0)
    plateaus, count = ndi.label(peaks, structure=full)
    flat_regions = regions.ravel()
    where = np.flatnonzero(plateaus.ravel())  # ascending: C order
    # one candidate per (plateau, region) pair
    stride = np.int64(n_regions + 1)
    keys = plateaus.ravel()[where].astype(np.int64) * stride + flat_regions[where]
    has = np.zeros(n_regions + 1, dtype=bool)
    has[flat_regions[where]] = True
    missing = np.flatnonzero(~has[1:]) + 1
    if missing.size:
        extra = np.flatnonzero(np.isin(flat_regions, missing))
        where = np.r_[where, extra]
        keys = np.r_[keys, (count + 1) * stride + flat_regions[extra]]
    # group the pixels of each candidate, C order inside each group
    by_key = np.lexsort((where, keys))
    where, keys = where[by_key], keys[by_key]
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    values = distance.ravel()[where]
    top = np.maximum.reduceat(values, starts)
    group = np.cumsum(np.r_[True, keys[1:] != keys[:-1]]) - 1
    # narrow each candidate to its top pixels
    keep = values == top[group]
    where, group = where[keep], group[keep]
    starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
    ends = np.r_[starts[1:], group.size]
    first = where[starts]
    region = flat_regions[first]
    # region, then highest first, then C order of the first top pixel
    order = np.lexsort((first, -top, region))
    scale = np.asarray(spacing, dtype=np.float64)

    accepted = 0
    current_region = -1
    trees: list[cKDTree] = []
    for k in order:
        if region[k] != current_region:
            current_region, trees = int(region[k]), []
        pixels = where[starts[k] : ends[k]]
        points = np.column_stack(np.unravel_index(pixels, regions.shape)) * scale
        if any(_within(tree, points, min_separation_um) for tree in trees):
            continue
        trees.append(cKDTree(points))
        accepted += 1
        markers.ravel()[pixels] = accepted
    return markers


def _within(tree: cKDTree, points: np.ndarray, limit: float) -> bool:
    """Whether a point lies closer than ``limit`` to a point of ``tree``."""
    found, _ = tree.query(points, k=1, distance_upper_bound=limit)
    # query gives inf beyond the bound and may return a point exactly at it
    return bool((found < limit).any())


@step(
    "split-touching",
    params=SplitParams,
    takes=["mask"],
    gives="labels",
    version="1",
    ndims=(2, 3),
    libraries=("numpy", "scipy", "scikit-image"),
)
def split_touching(
    params: SplitParams, mask: np.ndarray, *, spacing: tuple[float, ...]
) -> np.ndarray:
    """Split touching particles: distance transform and marker-controlled watershed.

    Every foreground pixel gets its Euclidean distance to the nearest
    background pixel, in um (so non-square pixels and anisotropic voxels are
    honoured). Each particle's centre is a maximum of that distance, and the
    neck between two touching particles is a pass. Markers are chosen in two
    tests: a maximum that rises less than ``min_depth`` above the pass to a
    higher one is a ripple of the digital distance or a bump of the outline
    and is flattened away (h-maxima); of the maxima left, one closer than
    ``min_separation`` to a higher one is dropped. From the markers the
    inverted distance is flooded inside the mask; floods from different
    markers meet along the necks, which become the cuts. Objects that do not
    touch are never changed: each connected region of the mask keeps at least
    its highest marker.

    Parameters
    ----------
    params : SplitParams
        ``min_separation`` and ``min_depth`` in pixels (along x), and
        ``connectivity`` (4 or 8 in 2D, 6, 18 or 26 in 3D; ``None`` means 8 in
        2D, 26 in 3D).
    mask : ndarray of bool, 2D or 3D
        Foreground: the particles, touching or not.
    spacing : tuple of float
        Pixel size per axis in um.

    Returns
    -------
    ndarray of int32
        Labels ``1..N``, numbered in the C (raster) order of each object's
        first pixel; 0 is background. Every foreground pixel is labelled (no
        watershed lines). An empty mask gives all zeros; a mask without
        background gives one label.

    Raises
    ------
    ValueError
        If the mask is not bool, not 2D or 3D, or the connectivity belongs to
        the other dimension.

    Notes
    -----
    Lengths in pixels become um with the pixel size along x. With ``h`` =
    ``min_depth`` and ``s`` = ``min_separation``:

    * Distance: ``d(x) = min { |x - y| : mask(y) is False }`` with ``|.|`` in
      um (``scipy.ndimage.distance_transform_edt`` with ``sampling=spacing``,
      exact Euclidean [3]_). Pixels outside the image are not background: a
      particle cut by the frame keeps its maximum at the frame.
    * Depth: ``R = reconstruction by dilation of d - h under d`` over all 8
      neighbours (26 in 3D) [5]_; the regional maxima of ``R`` (plateaus with
      no higher neighbour among all 8 / 26 neighbours, whatever the
      ``connectivity``) are the h-maxima of ``d``: the maxima whose dynamic
      (height above the lowest pass to a higher maximum) is at least ``h``.
      Each is narrowed to its top, the pixels of largest ``d`` in it. A region
      without one gets its own top.
    * Separation: within each connected region, tops are taken highest first
      (ties: C order of the first pixel); a top is dropped when one of its
      pixels lies closer than ``s`` (Euclidean, um) to a pixel of a top
      already taken. This is non-maximum suppression by distance: the heights
      only give the order.
    * Flooding: ``skimage.segmentation.watershed(-d, markers, mask=mask,
      connectivity=B)`` with ``B`` the neighbourhood of ``connectivity`` and
      no compactness [1]_ [2]_ [4]_, then renumbered in raster order.

    Two touching disks of radius ``r`` whose neck is ``2 w`` wide have a pass
    of height ``w``: they are split when ``r - w >= h`` and their centres are
    at least ``s`` apart.

    References
    ----------
    .. [1] S. Beucher and C. Lantuéjoul, "Use of watersheds in contour
       detection", International Workshop on Image Processing: Real-time Edge
       and Motion Detection/Estimation, Rennes, 1979.
    .. [2] S. Beucher and F. Meyer, "The morphological approach to
       segmentation: the watershed transformation", in E. R. Dougherty (ed.),
       *Mathematical Morphology in Image Processing*, Marcel Dekker, 1993,
       pp. 433-481.
    .. [3] C. R. Maurer, R. Qi and V. Raghavan, "A linear time algorithm for
       computing exact Euclidean distance transforms of binary images in
       arbitrary dimensions", IEEE Transactions on Pattern Analysis and
       Machine Intelligence 25(2), 265-270, 2003.
       https://doi.org/10.1109/TPAMI.2003.1177156
    .. [4] L. Vincent and P. Soille, "Watersheds in digital spaces: an
       efficient algorithm based on immersion simulations", IEEE Transactions
       on Pattern Analysis and Machine Intelligence 13(6), 583-598, 1991.
       https://doi.org/10.1109/34.87344
    .. [5] L. Vincent, "Morphological grayscale reconstruction in image
       analysis: applications and efficient algorithms", IEEE Transactions on
       Image Processing 2(2), 176-201, 1993. https://doi.org/10.1109/83.217222
    """
    if not isinstance(mask, np.ndarray) or mask.dtype != np.bool_:
        got = mask.dtype if isinstance(mask, np.ndarray) else type(mask).__name__
        raise ValueError(f"split-touching needs a bool mask (got {got})")
    if mask.ndim not in (2, 3):
        raise ValueError(f"split-touching needs 2D or 3D data (got {mask.ndim}D)")
    if mask.size == 0:
        raise ValueError(f"split-touching needs at least one pixel (got shape {mask.shape})")
    sizes = _check_spacing(spacing, mask.ndim)
    connectivity = resolve_connectivity(params.connectivity, mask.ndim)
    separation = params.min_separation
    depth = params.min_depth
    for name, value in (("min_separation", separation), ("min_depth", depth)):
        if value.unit != "px":
            raise ValueError(f"{name} {value} has not been resolved to pixels")
    # value is the length in pixels along x, whatever the other axes
    separation_um = separation.value * sizes[-1]
    depth_um = depth.value * sizes[-1]
    if not mask.any():
        return np.zeros(mask.shape, dtype=np.int32)

    neighbours = structure(connectivity, mask.ndim)
    regions: np.ndarray
    regions, _ = ndi.label(mask, structure=neighbours)
    if mask.all():
        # no background: the distance is unbounded, and the one region is one object
        return regions.astype(np.int32)
    distance = ndi.distance_transform_edt(mask, sampling=sizes)
    full = ndi.generate_binary_structure(mask.ndim, mask.ndim)
    # h-maxima: the maxima of the reconstruction of d - h under d are the maxima
    # of d that rise at least h above every pass to a higher one
    relief = reconstruction(distance - depth_um, distance, method="dilation", footprint=full)
    markers = distance_markers(distance, relief, regions, separation_um, sizes)
    flooded = watershed(
        -distance,
        markers,
        connectivity=neighbours,
        mask=mask,
        compactness=0.0,
        watershed_line=False,
    )
    return raster_relabel(flooded)
