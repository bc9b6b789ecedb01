"""Mask clean-up: fill-holes, remove-small, clear-border, invert, combine."""

from __future__ import annotations

import numpy as np

from steps._registry import StepParams, step

__all__ = ["InvertParams", "invert"]


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
