"""Display arrays for the report: thumbnails and outline overlays (8-bit, small).

These are for people to look at, never for measurement: gray values are
stretched between the 0.5th and 99.5th percentiles, and images are shrunk by
block averaging to at most ``max_side`` pixels.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["PREVIEW_SIDE", "preview_arrays", "to_display"]

#: longest side of a preview, in pixels
PREVIEW_SIDE = 384


def _shrink_factor(shape: tuple[int, ...], max_side: int) -> int:
    return max(1, int(np.ceil(max(shape[:2]) / max_side)))


def to_display(image: np.ndarray, max_side: int = PREVIEW_SIDE) -> np.ndarray:
    """A gray or colour image as uint8, shrunk by an integer factor, contrast stretched."""
    if image.ndim == 3 and image.shape[-1] not in (3, 4):
        image = image[image.shape[0] // 2]  # a volume: its middle slice
    if image.ndim == 3:
        image = image[..., :3].astype(np.float64) @ np.array([0.299, 0.587, 0.114])
    f = _shrink_factor(image.shape, max_side)
    h, w = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    small = image[:h, :w].astype(np.float64).reshape(h // f, f, w // f, f).mean(axis=(1, 3))
    low, high = np.percentile(small, [0.5, 99.5])
    if high <= low:
        return np.zeros(small.shape, np.uint8)
    return (np.clip((small - low) / (high - low), 0, 1) * 255).round().astype(np.uint8)


def preview_arrays(image: np.ndarray, objects: np.ndarray | None, max_side: int = PREVIEW_SIDE) -> dict[str, Any]:
    """``thumbnail`` (gray uint8) and ``overlay`` (RGB uint8: object outlines over the image)."""
    gray = to_display(image, max_side)
    out: dict[str, Any] = {"thumbnail": gray}
    if objects is None:
        return out
    if objects.ndim == 3:
        objects = objects[objects.shape[0] // 2]
    f = _shrink_factor(objects.shape, max_side)
    h, w = gray.shape[0] * f, gray.shape[1] * f
    labels = objects[:h, :w]
    # outline = pixels whose 4-neighbourhood holds another label (the inner morphological gradient)
    edge = np.zeros(labels.shape, bool)
    edge[:-1] |= labels[:-1] != labels[1:]
    edge[1:] |= labels[1:] != labels[:-1]
    edge[:, :-1] |= labels[:, :-1] != labels[:, 1:]
    edge[:, 1:] |= labels[:, 1:] != labels[:, :-1]
    edge &= labels != 0
    small_edge = edge.reshape(h // f, f, w // f, f).any(axis=(1, 3))
    rgb = np.repeat(gray[..., None], 3, axis=-1)
    rgb[small_edge] = (255, 200, 0)
    out["overlay"] = rgb
    return out
