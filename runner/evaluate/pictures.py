"""Display arrays for the report: thumbnails and outline overlays (8-bit, small).

These are for people to look at, never for measurement: gray values are
stretched between the 0.5th and 99.5th percentiles, and images are shrunk by
block averaging to at most ``max_side`` pixels.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    "PREVIEW_SIDE",
    "label_colours",
    "labels_display",
    "mask_display",
    "outline_overlay",
    "preview_arrays",
    "shown_slice",
    "to_display",
]

#: longest side of a preview, in pixels
PREVIEW_SIDE = 384


def _shrink_factor(shape: tuple[int, ...], max_side: int) -> int:
    return max(1, int(np.ceil(max(shape[:2]) / max_side)))


def _block_mean(image: np.ndarray, f: int) -> np.ndarray:
    """Mean over f x f blocks (the ragged edge dropped), summed along rows first for speed."""
    h, w = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    if f == 1:
        return image[:h, :w].astype(np.float64)
    # f strided slices added whole: far faster than a reduction over a short last axis
    cut = image[:h, :w]
    cols = np.zeros((h, w // f), np.float64)
    for k in range(f):
        cols += cut[:, k::f]
    out = np.zeros((h // f, w // f), np.float64)
    for k in range(f):
        out += cols[k::f]
    return out / (f * f)


def shown_slice(shape: tuple[int, ...] | list[int]) -> int | None:
    """The slice (index from 0 along the first axis) a volume's previews show: the middle one.

    None for a 2-D image, gray or colour (a last axis of 3 or 4 is colour, not depth).
    """
    if len(shape) == 3 and shape[-1] not in (3, 4):
        return int(shape[0]) // 2
    return None


def to_display(image: np.ndarray, max_side: int = PREVIEW_SIDE) -> np.ndarray:
    """A gray or colour image as uint8, shrunk by an integer factor, contrast stretched.

    A volume shows its middle slice (:func:`shown_slice`).
    """
    middle = shown_slice(image.shape)
    if middle is not None:
        image = image[middle]
    if image.ndim == 3:
        image = image[..., :3].astype(np.float64) @ np.array([0.299, 0.587, 0.114])
    f = _shrink_factor(image.shape, max_side)
    small = _block_mean(image, f)
    low, high = np.percentile(small, [0.5, 99.5])
    if high <= low:
        return np.zeros(small.shape, np.uint8)
    stretched: np.ndarray = np.clip((small - low) / (high - low), 0, 1)
    return (stretched * 255).round().astype(np.uint8)


def preview_arrays(
    image: np.ndarray, objects: np.ndarray | None, max_side: int = PREVIEW_SIDE
) -> dict[str, Any]:
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
    # any edge pixel in a block marks the block
    cols = np.zeros((h, w // f), bool)
    for k in range(f):
        cols |= edge[:, k::f]
    small_edge = np.zeros((h // f, w // f), bool)
    for k in range(f):
        small_edge |= cols[k::f]
    rgb = np.repeat(gray[..., None], 3, axis=-1)
    rgb[small_edge] = (255, 200, 0)
    out["overlay"] = rgb
    return out


def _middle_slice(array: np.ndarray) -> np.ndarray:
    return array[array.shape[0] // 2] if array.ndim == 3 else array


def mask_display(mask: np.ndarray, max_side: int = PREVIEW_SIDE) -> np.ndarray:
    """A mask as uint8: the fraction of foreground in each shrunk block, 0 (none) to 255 (all)."""
    mask = _middle_slice(np.asarray(mask, bool))
    f = _shrink_factor(mask.shape, max_side)
    h, w = (mask.shape[0] // f) * f, (mask.shape[1] // f) * f
    fraction: np.ndarray = mask[:h, :w].reshape(h // f, f, w // f, f).mean(axis=(1, 3))
    return (fraction * 255).round().astype(np.uint8)


def label_colours(n: int) -> np.ndarray:
    """``n + 1`` RGB colours: black for label 0, then bright hues spread by the golden angle.

    Neighbouring labels get far-apart hues; the same label always gets the same colour.
    """
    hues = (np.arange(n + 1, dtype=np.float64) * 0.6180339887498949) % 1.0
    value = np.where(np.arange(n + 1) % 2 == 0, 0.95, 0.75)
    saturation = 0.85
    h6 = hues * 6
    sector = np.floor(h6).astype(int) % 6
    frac = h6 - np.floor(h6)
    p = value * (1 - saturation)
    q = value * (1 - saturation * frac)
    t = value * (1 - saturation * (1 - frac))
    # HSV to RGB, sector by sector
    table = np.stack(
        [
            np.choose(sector, [value, q, p, p, t, value]),
            np.choose(sector, [t, value, value, q, p, p]),
            np.choose(sector, [p, p, t, value, value, q]),
        ],
        axis=-1,
    )
    out = (table * 255).round().astype(np.uint8)
    out[0] = 0
    return out


def labels_display(labels: np.ndarray, max_side: int = PREVIEW_SIDE) -> np.ndarray:
    """Labels as RGB uint8, each object its own colour (shrunk by taking every f-th pixel)."""
    labels = _middle_slice(np.asarray(labels))
    f = _shrink_factor(labels.shape, max_side)
    small = labels[::f, ::f][: labels.shape[0] // f or 1, : labels.shape[1] // f or 1]
    small = np.clip(small, 0, None).astype(np.int64)
    coloured: np.ndarray = label_colours(int(small.max(initial=0)))[small]
    return coloured


def outline_overlay(
    image: np.ndarray, objects: np.ndarray, max_side: int = PREVIEW_SIDE
) -> np.ndarray:
    """RGB uint8: ``objects`` (a mask or labels) outlined over ``image`` (see :func:`preview_arrays`)."""
    objects = np.asarray(objects)
    if objects.dtype == bool:
        objects = objects.astype(np.int32)
    overlay: np.ndarray = preview_arrays(image, objects, max_side)["overlay"]
    return overlay


def png_bytes(array: np.ndarray) -> bytes:
    """A display array as PNG bytes (deterministic: no time or software chunks)."""
    import io

    from PIL import Image

    buffer = io.BytesIO()
    Image.fromarray(array).save(buffer, format="PNG", optimize=False, compress_level=1)
    return buffer.getvalue()
