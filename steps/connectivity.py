"""Connectivity: which neighbours join pixels (voxels) into one object, for every step.

One definition for ``label``, ``measure``, ``split-touching``, ``fill-holes``,
``remove-small`` and ``clear-border``: the accepted values, the default, the
background connectivity that goes with each, the parameter type a step model
uses, and the structuring element handed to ``scipy.ndimage``. A library's own
default is never relied on (``scipy.ndimage.label`` defaults to 4-connectivity,
``skimage.measure.label`` to 8).

Notes
-----
In 2-D, 4-connectivity joins pixels that share an edge (squared distance 1) and
8-connectivity also those that share a corner (up to 2). In 3-D, 6 joins voxels
sharing a face (1), 18 also an edge (up to 2), 26 also a corner (up to 3): the
rank of ``scipy.ndimage.generate_binary_structure`` is that squared distance.
Objects and background use complementary connectivities (8 with 4, 26 with 6,
18 with 6) so that neither crosses the other at a corner (Rosenfeld, "Digital
topology", Amer. Math. Monthly 86 (1979) 621-630, doi:10.2307/2321290).
"""

from __future__ import annotations

from typing import Annotated, Literal

import numpy as np
from pydantic import Field
from scipy import ndimage

__all__ = [
    "BACKGROUND_CONNECTIVITY",
    "CONNECTIVITIES",
    "CONNECTIVITY_2D",
    "CONNECTIVITY_3D",
    "DEFAULT_CONNECTIVITY",
    "Connectivity",
    "resolve_connectivity",
    "structure",
]

#: Pixel connectivities of 2-D data: edges (4), edges and corners (8).
CONNECTIVITY_2D: tuple[int, ...] = (4, 8)
#: Voxel connectivities of 3-D data: faces (6), faces and edges (18), all neighbours (26).
CONNECTIVITY_3D: tuple[int, ...] = (6, 18, 26)
#: Every accepted value of a ``connectivity`` parameter.
CONNECTIVITIES: tuple[int, ...] = CONNECTIVITY_2D + CONNECTIVITY_3D
#: Connectivity used when a step leaves it out: the full neighbourhood.
DEFAULT_CONNECTIVITY: dict[int, int] = {2: 8, 3: 26}
#: The background connectivity that goes with an object connectivity.
BACKGROUND_CONNECTIVITY: dict[int, int] = {4: 8, 8: 4, 6: 26, 18: 6, 26: 6}

_ALLOWED: dict[int, tuple[int, ...]] = {2: CONNECTIVITY_2D, 3: CONNECTIVITY_3D}
#: ``generate_binary_structure`` rank: the largest squared distance of a neighbour
_RANK: dict[int, int] = {4: 1, 8: 2, 6: 1, 18: 2, 26: 3}

#: The ``connectivity`` parameter of a step model; ``None`` (left out) means the default.
Connectivity = Annotated[
    Literal[CONNECTIVITIES] | None,  # type: ignore[valid-type]
    Field(
        description=(
            "which neighbours join pixels into one object: 4 or 8 in 2D, 6, 18 or 26 in 3D; "
            "empty (null) means full connectivity: 8 in 2D, 26 in 3D"
        )
    ),
]


def resolve_connectivity(connectivity: int | None, ndim: int) -> int:
    """The connectivity to use on ``ndim``-dimensional data (``None``: 8 in 2D, 26 in 3D).

    Raises
    ------
    ValueError
        For a connectivity of the other dimension (4 on a volume, 26 on an image),
        or data that is neither 2-D nor 3-D.
    """
    allowed = _ALLOWED.get(ndim)
    if allowed is None:
        raise ValueError(f"connected components need 2D or 3D data (got {ndim}D)")
    if connectivity is None:
        return DEFAULT_CONNECTIVITY[ndim]
    if connectivity not in allowed:
        raise ValueError(
            f"connectivity {connectivity} does not apply to {ndim}D data; "
            f"use one of {', '.join(map(str, allowed))}"
        )
    return connectivity


def structure(connectivity: int | None, ndim: int) -> np.ndarray:
    """The ``scipy.ndimage`` structuring element (bool, 3 x 3 [x 3]) of a connectivity.

    ``connectivity`` is checked (and ``None`` resolved) by :func:`resolve_connectivity`.
    """
    resolved = resolve_connectivity(connectivity, ndim)
    element: np.ndarray = ndimage.generate_binary_structure(ndim, _RANK[resolved])
    return element
