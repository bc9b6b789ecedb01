"""Mask clean-up: fill-holes, remove-small, clear-border, invert, combine.

Connectivity (``connectivity``) says which neighbours join pixels into one
object: 4 (edges) or 8 (edges and corners) in 2D; 6 (faces), 18 (faces and
edges) or 26 (faces, edges and corners) in 3D. Left out, it is 8 in 2D and
26 in 3D. A connectivity of the other dimension (6 for a 2D mask) is an error.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, model_validator
from scipy import ndimage

from lotproof.steps._registry import StepParams, step
from lotproof.steps.connectivity import (
    BACKGROUND_CONNECTIVITY,
    CONNECTIVITIES,
    DEFAULT_CONNECTIVITY,
    Connectivity,
    resolve_connectivity,
    structure,
)
from lotproof.steps.units import Area, Volume

__all__ = [
    "COMBINE_METHODS",
    "ClearBorderParams",
    "CombineParams",
    "FillHolesParams",
    "InvertParams",
    "RemoveSmallParams",
    "clear_border",
    "combine",
    "fill_holes",
    "invert",
    "remove_small",
]

#: Ways ``combine`` joins masks.
COMBINE_METHODS: tuple[str, ...] = ("and", "or", "xor", "minus")


def _check_mask(mask: np.ndarray, what: str) -> None:
    if mask.dtype != np.bool_:
        raise ValueError(f"{what} needs a bool mask, got dtype {mask.dtype}")


def _label(mask: np.ndarray, connectivity: int | None) -> tuple[np.ndarray, int]:
    labels, count = ndimage.label(mask, structure=structure(connectivity, mask.ndim))
    return labels, int(count)


def _frame_labels(labels: np.ndarray, count: int) -> np.ndarray:
    """Table ``label -> touches the frame`` (index 0, the background, is False)."""
    touches = np.zeros(count + 1, dtype=bool)
    for axis in range(labels.ndim):
        for end in (0, -1):
            touches[np.take(labels, end, axis=axis)] = True
    touches[0] = False
    return touches


# --------------------------------------------------------------------------- invert


class InvertParams(StepParams):
    """``invert`` has no parameters."""


@step("invert", params=InvertParams, takes=["mask"], gives="mask", version="1", ndims=(2, 3))
def invert(params: InvertParams, mask: np.ndarray, *, spacing: tuple[float, ...]) -> np.ndarray:
    """Swap foreground and background of a mask.

    Parameters
    ----------
    params : InvertParams
        No parameters.
    mask : ndarray of bool
        The mask to invert.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray of bool
        ``~mask``.
    """
    return ~mask


# --------------------------------------------------------------------------- fill-holes


class FillHolesParams(StepParams):
    """Parameters of ``fill-holes``."""

    connectivity: Literal[CONNECTIVITIES] | None = Field(  # type: ignore[valid-type]
        None,
        description=(
            "connectivity of the objects: 4 or 8 in 2D, 6, 18 or 26 in 3D; default 8 in 2D, "
            "26 in 3D. The background is traced with the matching one (8 -> 4, 4 -> 8, "
            "26 -> 6, 18 -> 6, 6 -> 26)"
        ),
    )


@step(
    "fill-holes",
    params=FillHolesParams,
    takes=["mask"],
    gives="mask",
    version="1",
    ndims=(2, 3),
    libraries=("numpy", "scipy"),
)
def fill_holes(
    params: FillHolesParams, mask: np.ndarray, *, spacing: tuple[float, ...]
) -> np.ndarray:
    """Fill the holes of a mask: background regions that do not reach the image frame.

    The background is split into connected regions; every region with no
    pixel on the frame of the image (first or last row or column, and first
    or last slice in 3D) is a hole and becomes foreground. The background is
    traced with the connectivity that matches the objects'
    (:data:`BACKGROUND_CONNECTIVITY`): with the default 8-connected objects
    in 2D, background pixels that touch only at a corner are separate, so a
    ring closed by a diagonal step encloses a hole.

    Parameters
    ----------
    params : FillHolesParams
        ``connectivity`` of the objects (default 8 in 2D, 26 in 3D).
    mask : ndarray of bool, 2D or 3D
        The mask.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray of bool
        The mask with its holes filled. An empty mask stays empty (its
        background reaches the frame); a full mask stays full.

    Notes
    -----
    Equivalent to ``scipy.ndimage.binary_fill_holes(mask, structure=B)`` with
    ``B`` the background connectivity: the background reachable from the
    frame is kept, the rest filled (morphological reconstruction of the
    complement from its frame pixels).

    References
    ----------
    P. Soille, Morphological Image Analysis: Principles and Applications,
    2nd ed., Springer (2003), doi:10.1007/978-3-662-05088-0 (hole filling by
    reconstruction).
    """
    _check_mask(mask, "fill-holes")
    objects = params.connectivity
    resolve_connectivity(objects, mask.ndim)  # a wrong connectivity for the dimension is an error
    if objects is None:
        objects = DEFAULT_CONNECTIVITY[mask.ndim]
    background, count = _label(~mask, BACKGROUND_CONNECTIVITY[objects])
    reaches_frame = _frame_labels(background, count)
    filled: np.ndarray = mask | ((background > 0) & ~reaches_frame[background])
    return filled


# --------------------------------------------------------------------------- remove-small


class RemoveSmallParams(StepParams):
    """Parameters of ``remove-small``: a minimum area (2-D) or volume (3-D)."""

    min_area: Area | None = Field(
        None,
        description=(
            "2-D: objects with an area strictly smaller than this are removed; an object of "
            "exactly this area stays (e.g. '20 um2' or '9 px2'). On a volume only px2 is "
            "accepted, counting voxels; prefer min_volume there"
        ),
    )
    min_volume: Volume | None = Field(
        None,
        description=(
            "3-D: objects with a volume strictly smaller than this are removed; an object of "
            "exactly this volume stays (e.g. '500 um3' or '27 px3'). Give min_area or "
            "min_volume"
        ),
    )
    connectivity: Connectivity = None

    @model_validator(mode="after")
    def _one_minimum(self) -> RemoveSmallParams:
        if self.min_area is None and self.min_volume is None:
            raise ValueError(
                "remove-small needs min_area (2-D, e.g. min_area: 20 um2) or min_volume "
                "(3-D, e.g. min_volume: 500 um3)"
            )
        if self.min_area is not None and self.min_volume is not None:
            raise ValueError("give either min_area or min_volume, not both")
        return self


@step(
    "remove-small",
    params=RemoveSmallParams,
    takes=["mask"],
    gives="mask",
    version="1",
    ndims=(2, 3),
    libraries=("numpy", "scipy"),
)
def remove_small(
    params: RemoveSmallParams, mask: np.ndarray, *, spacing: tuple[float, ...]
) -> np.ndarray:
    """Remove objects smaller than a minimum area (2-D) or volume (3-D).

    Objects are the connected regions of the mask under ``connectivity``. An
    object of ``n`` pixels (voxels) is removed when ``n < minimum`` (in square
    pixels or voxels, not rounded) and kept otherwise, so an object of exactly
    the minimum stays.

    Parameters
    ----------
    params : RemoveSmallParams
        ``min_area`` (square pixels after resolution, with the pixel area
        ``dy * dx``) for a 2-D mask, or ``min_volume`` (voxels after
        resolution, with the voxel volume ``dz * dy * dx``) for a 3-D mask;
        ``connectivity`` (default 8 in 2D, 26 in 3D). On a 3-D mask a
        ``min_area`` in px2 counts voxels (kept for recipes written before
        ``min_volume``); the runner refuses a physical area for a volume.
    mask : ndarray of bool, 2D or 3D
        The mask.
    spacing : tuple of float
        Pixel size per axis in um (unused: the minimum arrives in pixels).

    Returns
    -------
    ndarray of bool
        The mask without its small objects.

    Raises
    ------
    ValueError
        ``min_volume`` for a 2-D mask.

    Notes
    -----
    Object sizes are pixel counts, ``np.bincount`` of the labels of
    ``scipy.ndimage.label``: an area (volume) opening of the mask (Vincent 1992).

    References
    ----------
    L. Vincent, Morphological area openings and closings for grey-scale
    images, in: Shape in Picture, NATO ASI Series F 126, Springer (1994)
    197-208.
    """
    _check_mask(mask, "remove-small")
    if params.min_volume is not None:
        if mask.ndim != 3:
            raise ValueError(
                f"min_volume is for 3-D masks; this mask is {mask.ndim}-D: use min_area"
            )
        minimum = params.min_volume.px
    else:
        assert params.min_area is not None
        minimum = params.min_area.px
    labels, _ = _label(mask, params.connectivity)
    sizes = np.bincount(labels.reshape(-1))
    stays = sizes >= minimum
    stays[0] = False
    kept: np.ndarray = stays[labels]
    return kept


# --------------------------------------------------------------------------- clear-border


class ClearBorderParams(StepParams):
    """Parameters of ``clear-border``."""

    connectivity: Connectivity = None


@step(
    "clear-border",
    params=ClearBorderParams,
    takes=["mask"],
    gives="mask",
    version="1",
    ndims=(2, 3),
    libraries=("numpy", "scipy"),
)
def clear_border(
    params: ClearBorderParams, mask: np.ndarray, *, spacing: tuple[float, ...]
) -> np.ndarray:
    """Remove the objects that touch the image frame.

    An object (a connected region under ``connectivity``) with at least one
    pixel in the first or last row or column (and, in 3D, the first or last
    slice) is cut by the field of view: its size and shape are unknown, so it
    is removed whole. The other objects are kept unchanged.

    Parameters
    ----------
    params : ClearBorderParams
        ``connectivity`` (default 8 in 2D, 26 in 3D).
    mask : ndarray of bool, 2D or 3D
        The mask.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray of bool
        The mask without the objects that touch the frame.
    """
    _check_mask(mask, "clear-border")
    labels, count = _label(mask, params.connectivity)
    cleared: np.ndarray = mask & ~_frame_labels(labels, count)[labels]
    return cleared


# --------------------------------------------------------------------------- combine


class CombineParams(StepParams):
    """Parameters of ``combine``."""

    method: Literal[COMBINE_METHODS] = Field(  # type: ignore[valid-type]
        description=(
            "and: in every mask; or: in any mask; xor: in an odd number of the masks "
            "(two masks: in exactly one); minus: in the first mask and in none of the others"
        ),
    )


@step(
    "combine",
    params=CombineParams,
    takes=["mask", "mask"],
    gives="mask",
    version="1",
    variadic=True,
    ndims=(2, 3),
)
def combine(params: CombineParams, *masks: np.ndarray, spacing: tuple[float, ...]) -> np.ndarray:
    """Combine two or more masks pixel by pixel (and, or, xor, minus).

    Parameters
    ----------
    params : CombineParams
        ``method``: ``"and"``, ``"or"``, ``"xor"`` or ``"minus"``.
    *masks : ndarray of bool
        Two or more masks of the same shape, in the order of the recipe's
        ``to:``.
    spacing : tuple of float
        Pixel size per axis in um (unused).

    Returns
    -------
    ndarray of bool
        ``and``: ``m1 & m2 & ...``; ``or``: ``m1 | m2 | ...``; ``xor``:
        ``m1 ^ m2 ^ ...`` (true where an odd number of masks are true);
        ``minus``: ``m1 & ~(m2 | m3 | ...)``.
    """
    if len(masks) < 2:
        raise ValueError(f"combine needs two or more masks, got {len(masks)}")
    for position, mask in enumerate(masks, start=1):
        _check_mask(mask, f"combine (mask {position})")
    shapes = [m.shape for m in masks]
    if len(set(shapes)) > 1:
        listed = ", ".join(f"mask {i}: {s}" for i, s in enumerate(shapes, start=1))
        raise ValueError(f"combine needs masks of one shape, got {listed}")
    first, rest = masks[0], masks[1:]
    combined: np.ndarray
    if params.method == "and":
        combined = np.logical_and.reduce(masks)
    elif params.method == "or":
        combined = np.logical_or.reduce(masks)
    elif params.method == "xor":
        combined = np.logical_xor.reduce(masks)
    else:
        combined = first & ~np.logical_or.reduce(rest)
    return combined
