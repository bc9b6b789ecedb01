"""Footprints: the digital shapes that erosion, dilation and their relatives slide over an image.

Every footprint is a boolean array with an odd size along each axis, centred on
its middle element, and symmetric about that centre (``B == B[::-1, ::-1]``), so
erosion and dilation need no convention about reflecting it. Sizes arrive in
pixels as real numbers (the runner has already resolved ``1.5 um`` to pixels);
each shape states below how a real number becomes a digital shape:

* ``disk`` of radius r: exactly the lattice points {(y, x) : x² + y² <= r²};
  ``diamond``: {|x| + |y| <= r}; ``ball`` (3D): {x² + y² + z² <= r²}.
* ``square`` of side s, ``rectangle`` of width w (along x) and height h (along
  y), ``cube`` of side s: a side of v pixels becomes ``2 * floor(v / 2) + 1``
  pixels, the nearest odd integer with ties going up (*the rounding rule*:
  3 px -> 3, 3.9 px -> 3, 4 px -> 5, 0.5 px -> 1).
* ``line`` of length L at ``angle`` degrees (counter-clockwise from the +x axis,
  with image rows, y, pointing down): n = the rounding rule applied to L points
  at unit steps i = -(n-1)/2 .. (n-1)/2 along the direction, each put on the
  pixel ``(round(-i sin a), round(i cos a))`` with rounding half to even, which
  keeps the line symmetric.

Non-square pixels and anisotropic voxels: a length given in physical units
spans a different number of pixels along each axis (the runner resolves it to
a per-axis size, ``Length.axes``, see ``steps/_units.py``), and the footprint
is the physical shape sampled on the pixel grid:

* ``ball`` of radius R (um) on voxels (dz, dy, dx): the ellipsoid
  {(z/rz)² + (y/ry)² + (x/rx)² <= 1} with r per axis = R / spacing per axis;
  ``disk`` likewise the ellipse {(y/ry)² + (x/rx)² <= 1}; ``diamond``
  {|y|/ry + |x|/rx <= 1}. The comparison is exact (rational arithmetic on the
  float radii wherever floating point could err).
* ``cube`` and ``square``: each side by the rounding rule per axis (a box);
  ``rectangle``: width with the x size, height with the y size.
* ``line``: the segment of physical length L at physical angle a becomes, in
  pixel units, the segment of length sqrt((L cos a / dx)² + (L sin a / dy)²)
  at angle atan2(L sin a / dy, L cos a / dx), drawn as above.

With square pixels these are exactly the shapes above, bit for bit.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from fractions import Fraction
from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from lotproof.steps._registry import StepParams
from lotproof.steps.units import Length

__all__ = [
    "FOOTPRINTS",
    "FOOTPRINTS_2D",
    "FOOTPRINTS_3D",
    "FOOTPRINT_NEEDS",
    "MorphologyParams",
    "ball",
    "build_footprint",
    "cube",
    "diamond",
    "disk",
    "ellipsoid",
    "line",
    "nearest_odd",
    "rectangle",
    "square",
]

#: Footprints for 2-D images.
FOOTPRINTS_2D: tuple[str, ...] = ("disk", "square", "rectangle", "diamond", "line")
#: Footprints for 3-D volumes.
FOOTPRINTS_3D: tuple[str, ...] = ("ball", "cube")
#: Every footprint a recipe may name.
FOOTPRINTS: tuple[str, ...] = FOOTPRINTS_2D + FOOTPRINTS_3D

#: The size parameters each footprint needs; every other size parameter must be absent.
FOOTPRINT_NEEDS: dict[str, tuple[str, ...]] = {
    "disk": ("radius",),
    "square": ("size",),
    "rectangle": ("width", "height"),
    "diamond": ("radius",),
    "line": ("length",),
    "ball": ("radius",),
    "cube": ("size",),
}

_SIZE_FIELDS: tuple[str, ...] = ("radius", "size", "width", "height", "length")
_EXAMPLES: dict[str, str] = {
    "radius": "radius: 3 px",
    "size": "size: 5 px",
    "width": "width: 7 px",
    "height": "height: 3 px",
    "length": "length: 9 px",
}


class MorphologyParams(StepParams):
    """A footprint and its size, shared by ``erode``, ``widen``, ``open``, ``close`` and others."""

    footprint: Literal[FOOTPRINTS] = Field(  # type: ignore[valid-type]
        "disk",
        description=(
            "shape slid over the image: disk, square, rectangle, diamond, line (2-D); "
            "ball, cube (3-D)"
        ),
    )
    radius: Length | None = Field(
        None,
        description="radius of a disk, diamond or ball, a length (e.g. 3 px or 1.5 um); "
        "the disk is every pixel centre within the radius, no rounding",
    )
    size: Length | None = Field(
        None,
        description="side of a square or cube, a length; becomes the nearest odd number "
        "of pixels, ties upward (4 px -> 5 px)",
    )
    width: Length | None = Field(
        None,
        description="width (along x) of a rectangle, a length; nearest odd number of "
        "pixels, ties upward",
    )
    height: Length | None = Field(
        None,
        description="height (along y) of a rectangle, a length; nearest odd number of "
        "pixels, ties upward",
    )
    length: Length | None = Field(
        None,
        description="length of a line, a length; the line has that many pixel steps, "
        "rounded to the nearest odd number, ties upward",
    )
    angle: float = Field(
        0.0,
        allow_inf_nan=False,
        description="direction of a line in degrees, counter-clockwise from the +x axis "
        "(image rows pointing down); only for footprint: line",
    )

    @model_validator(mode="after")
    def _sizes_fit_footprint(self) -> MorphologyParams:
        needs = FOOTPRINT_NEEDS[self.footprint]
        problems = []
        missing = [name for name in needs if getattr(self, name) is None]
        if missing:
            problems.append(
                f"footprint {self.footprint!r} needs {' and '.join(missing)} "
                f"(e.g. {', '.join(_EXAMPLES[name] for name in missing)})"
            )
        unused = [
            name for name in _SIZE_FIELDS if name not in needs and getattr(self, name) is not None
        ]
        # angle has a default, so only a non-zero angle can be told apart from "not given"
        if self.footprint != "line" and self.angle != 0.0:
            unused.append("angle")
        if unused:
            problems.append(f"footprint {self.footprint!r} does not use {', '.join(unused)}")
        if problems:
            raise ValueError("; ".join(problems))
        return self


def nearest_odd(value: float) -> int:
    """The rounding rule for sides and lengths: ``2 * floor(value / 2) + 1``.

    Parameters
    ----------
    value : float
        A side or length in pixels, > 0.

    Returns
    -------
    int
        The nearest odd integer, ties going up: 3 -> 3, 3.9 -> 3, 4 -> 5, 0.5 -> 1.
    """
    _check_positive(value, "a side or length")
    # value / 2 is exact in binary floating point, so floor sees the true value
    return 2 * math.floor(value / 2) + 1


def _check_positive(value: float, what: str) -> None:
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{what} must be a finite number of pixels > 0 (got {value!r})")


def _floor_square(radius: float) -> int:
    """floor(radius²) computed exactly from the float radius."""
    _check_positive(radius, "a radius")
    exact = Fraction(radius)
    return math.floor(exact * exact)


def _clip(halves: Sequence[int], limit: Sequence[int] | None) -> list[int]:
    if limit is None:
        return list(halves)
    if len(limit) != len(halves):
        raise ValueError(f"limit has {len(limit)} axes, the footprint {len(halves)}")
    return [min(h, int(lim)) for h, lim in zip(halves, limit, strict=False)]


def _grid(halves: Sequence[int]) -> tuple[np.ndarray, ...]:
    return np.ogrid[tuple(slice(-h, h + 1) for h in halves)]


def disk(radius: float, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """The digital disk {(y, x) integer : x² + y² <= r²}.

    Parameters
    ----------
    radius : float
        Radius r in pixels, > 0; any real number, not rounded.
    limit : sequence of 2 int, optional
        Largest offset to keep per axis (y, x). Offsets at least as large as the
        image can never reach a pixel inside it, so a step passes
        ``image.shape - 1`` to keep a huge radius from allocating a huge array.

    Returns
    -------
    ndarray of bool, shape (2h + 1, 2h + 1)
        h = floor(r), or less when clipped by ``limit``.

    Notes
    -----
    The comparison is exact: r² is formed in rational arithmetic from the float
    r, and since x² + y² is an integer the disk depends only on m = floor(r²).
    So r = 2.3 px (r² = 5.29) gives the same 21-pixel disk as r = sqrt(5) px,
    r = 1 px is the 3x3 cross and r = sqrt(2) px the full 3x3 square. A radius
    that should be an integer but arrives a hair below it (2.9999999999999996)
    gives the disk of m = 8, not 9.
    """
    m = _floor_square(radius)
    h = math.isqrt(m)
    y, x = _grid(_clip((h, h), limit))
    return (y.astype(np.int64) ** 2 + x.astype(np.int64) ** 2) <= m


def ball(radius: float, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """The digital ball {(z, y, x) integer : x² + y² + z² <= r²}.

    Parameters
    ----------
    radius : float
        Radius r in pixels, > 0, not rounded.
    limit : sequence of 3 int, optional
        Largest offset to keep per axis (z, y, x); see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (2h + 1, 2h + 1, 2h + 1)
        h = floor(r), or less when clipped.

    Notes
    -----
    Exact in the same way as :func:`disk`: only m = floor(r²) matters.
    """
    m = _floor_square(radius)
    h = math.isqrt(m)
    z, y, x = _grid(_clip((h, h, h), limit))
    z, y, x = (a.astype(np.int64) for a in (z, y, x))
    return (z**2 + y**2 + x**2) <= m


def ellipsoid(radii: Sequence[float], *, limit: Sequence[int] | None = None) -> np.ndarray:
    """The digital ellipse or ellipsoid {p integer : sum_k (p_k / r_k)² <= 1}.

    Parameters
    ----------
    radii : sequence of float
        Semi-axis r_k in pixels along each array axis ((y, x) or (z, y, x)),
        each > 0, not rounded.
    limit : sequence of int, optional
        Largest offset to keep per axis; see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (2 h_k + 1, ...)
        h_k = floor(r_k), or less when clipped.

    Notes
    -----
    With all radii equal to r this is exactly :func:`disk` / :func:`ball` of r.
    The sum is formed in float64; offsets whose sum lies within 1e-9 of 1 are
    decided again in exact rational arithmetic from the float radii, so the
    result does not depend on rounding.
    """
    for r in radii:
        _check_positive(r, "a radius")
    halves = [math.floor(r) for r in radii]
    grids = _grid(_clip(halves, limit))
    total = np.zeros(np.broadcast_shapes(*(g.shape for g in grids)), dtype=np.float64)
    for g, r in zip(grids, radii, strict=False):
        total = total + (g.astype(np.float64) / r) ** 2
    inside = total <= 1.0
    close = np.abs(total - 1.0) <= 1e-9
    if close.any():
        exact_radii = [Fraction(r) for r in radii]
        offsets = np.argwhere(close)
        for index in offsets:
            point = [int(i) - int(g.size // 2) for i, g in zip(index, grids, strict=False)]
            value = sum(Fraction(p * p) / (r * r) for p, r in zip(point, exact_radii, strict=False))
            inside[tuple(index)] = value <= 1
    return inside


def _diamond_axes(radii: Sequence[float], limit: Sequence[int] | None) -> np.ndarray:
    """{(y, x) integer : |y| / ry + |x| / rx <= 1}, exact in rational arithmetic."""
    for r in radii:
        _check_positive(r, "a radius")
    ry, rx = (Fraction(r) for r in radii)
    hy, hx = _clip([math.floor(r) for r in radii], limit)
    out = np.zeros((2 * hy + 1, 2 * hx + 1), dtype=bool)
    for y in range(-hy, hy + 1):
        # |x| <= rx (1 - |y| / ry): the widest x of this row, exactly
        reach = rx * (1 - Fraction(abs(y)) / ry)
        if reach < 0:
            continue
        w = min(math.floor(reach), hx)
        out[y + hy, hx - w : hx + w + 1] = True
    return out


def diamond(radius: float, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """The digital diamond {(y, x) integer : |x| + |y| <= r}.

    Parameters
    ----------
    radius : float
        Radius r in pixels, > 0, not rounded (only floor(r) matters).
    limit : sequence of 2 int, optional
        Largest offset to keep per axis; see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (2h + 1, 2h + 1), h = floor(r)
        It holds 2h² + 2h + 1 pixels when not clipped.
    """
    _check_positive(radius, "a radius")
    h = math.floor(radius)
    y, x = _grid(_clip((h, h), limit))
    inside: np.ndarray = (np.abs(y) + np.abs(x)) <= h
    return inside


def _box(sides: Sequence[float], limit: Sequence[int] | None) -> np.ndarray:
    halves = [(nearest_odd(s) - 1) // 2 for s in sides]
    halves = _clip(halves, limit)
    return np.ones([2 * h + 1 for h in halves], dtype=bool)


def square(size: float, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """A square of side ``size`` pixels, made odd by the rounding rule.

    Parameters
    ----------
    size : float
        Side in pixels, > 0; becomes ``nearest_odd(size)`` pixels.
    limit : sequence of 2 int, optional
        Largest offset to keep per axis; see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (n, n), all True
    """
    return _box((size, size), limit)


def rectangle(width: float, height: float, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """A rectangle ``width`` pixels wide (x) and ``height`` pixels high (y).

    Parameters
    ----------
    width, height : float
        Sides in pixels, > 0; each becomes ``nearest_odd`` of itself.
    limit : sequence of 2 int, optional
        Largest offset to keep per axis (y, x); see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (nearest_odd(height), nearest_odd(width)), all True
    """
    return _box((height, width), limit)


def cube(size: float, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """A cube of side ``size`` pixels, made odd by the rounding rule.

    Parameters
    ----------
    size : float
        Side in pixels, > 0.
    limit : sequence of 3 int, optional
        Largest offset to keep per axis; see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (n, n, n), all True
    """
    return _box((size, size, size), limit)


def _direction(angle: float) -> tuple[float, float]:
    """(sin a, cos a) of an angle in degrees, exact on the axes."""
    if not math.isfinite(angle):
        raise ValueError(f"an angle must be a finite number of degrees (got {angle!r})")
    turned = angle % 360.0
    # sin(pi) is 1.2e-16, not 0; exact values on the axes keep an axis-aligned
    # line from depending on how the maths library rounds
    exact = {0.0: (0.0, 1.0), 90.0: (1.0, 0.0), 180.0: (0.0, -1.0), 270.0: (-1.0, 0.0)}
    if turned in exact:
        return exact[turned]
    rad = math.radians(turned)
    return math.sin(rad), math.cos(rad)


def line(length: float, angle: float = 0.0, *, limit: Sequence[int] | None = None) -> np.ndarray:
    """A digital line segment of ``length`` pixels through the centre at ``angle`` degrees.

    Parameters
    ----------
    length : float
        Length L in pixels, > 0; the line has n = ``nearest_odd(L)`` points.
    angle : float
        Direction a in degrees, counter-clockwise from the +x axis; image rows
        (y) point down, so 90 degrees points up the image.
    limit : sequence of 2 int, optional
        Largest offset to keep per axis (y, x); see :func:`disk`.

    Returns
    -------
    ndarray of bool, shape (2 hy + 1, 2 hx + 1)
        The smallest centred odd box holding the points.

    Notes
    -----
    Point i, for i = -(n-1)/2 .. (n-1)/2, sits on the pixel
    (y, x) = (round(-i sin a), round(i cos a)), rounding half to even, so the
    point -i lands on the mirror image of the point i. Points can share a
    pixel: at 45 degrees the points i = -2 and i = -1 of a line of length 5
    both round to (1, -1), so that line covers the 3 pixels (1, -1), (0, 0),
    (-1, 1). sin and cos come from Python's ``math`` module, exact on the axes.
    """
    n = nearest_odd(length)
    s, c = _direction(angle)
    half = (n - 1) // 2
    if limit is not None:
        # |round(i c)| and |round(i s)| grow with |i|, and max(|s|, |c|) >= 1/sqrt(2),
        # so points beyond this i lie outside the clip box in some axis
        reach = max(int(v) for v in limit)
        half = min(half, math.ceil((reach + 1) * math.sqrt(2)) + 1)
    i = np.arange(-half, half + 1, dtype=np.float64)
    ys = np.round(-i * s).astype(np.int64)
    xs = np.round(i * c).astype(np.int64)
    if limit is not None:
        inside = (np.abs(ys) <= int(limit[0])) & (np.abs(xs) <= int(limit[1]))
        ys, xs = ys[inside], xs[inside]
    hy, hx = int(np.abs(ys).max()), int(np.abs(xs).max())
    out = np.zeros((2 * hy + 1, 2 * hx + 1), dtype=bool)
    out[ys + hy, xs + hx] = True
    return out


def build_footprint(
    params: MorphologyParams, ndim: int, shape: Sequence[int] | None = None
) -> np.ndarray:
    """The footprint that ``params`` describes, for data with ``ndim`` axes.

    Parameters
    ----------
    params : MorphologyParams
        Footprint name and sizes, already resolved to pixels.
    ndim : int
        2 for an image, 3 for a volume.
    shape : sequence of int, optional
        Shape of the data. When given, offsets that cannot reach a pixel of the
        data (at least as large as the data along an axis) are left out; the
        result of erosion or dilation is the same, and a radius far larger than
        the image does not allocate a huge array.

    Returns
    -------
    ndarray of bool, ``ndim`` axes, odd sizes, symmetric about its centre

    Raises
    ------
    ValueError
        A 2-D footprint for 3-D data or the other way round.
    """
    name = params.footprint
    if ndim == 2 and name not in FOOTPRINTS_2D:
        raise ValueError(
            f"footprint {name!r} is 3-D but the data is 2-D; use one of {', '.join(FOOTPRINTS_2D)}"
        )
    if ndim == 3 and name not in FOOTPRINTS_3D:
        raise ValueError(
            f"footprint {name!r} is 2-D but the data is a 3-D volume; "
            f"use one of {', '.join(FOOTPRINTS_3D)}"
        )
    if ndim not in (2, 3):
        raise ValueError(f"footprints are for 2-D or 3-D data (got {ndim} axes)")
    limit = None if shape is None else [max(int(n) - 1, 0) for n in shape]
    if shape is not None and len(shape) != ndim:
        raise ValueError(f"shape {tuple(shape)} does not have {ndim} axes")

    def sizes(field: str) -> tuple[float, ...]:
        value = getattr(params, field)
        if value is None:  # the model validator makes this unreachable
            raise ValueError(f"footprint {name!r} needs {field}")
        return tuple(value.px_axes(ndim))

    def isotropic(field: str) -> float | None:
        per_axis = sizes(field)
        return per_axis[0] if len(set(per_axis)) == 1 else None

    if name in ("disk", "ball", "diamond"):
        r = isotropic("radius")
        if r is None:
            if name == "diamond":
                return _diamond_axes(sizes("radius"), limit)
            return ellipsoid(sizes("radius"), limit=limit)
        return {"disk": disk, "ball": ball, "diamond": diamond}[name](r, limit=limit)
    if name in ("square", "cube"):
        s = isotropic("size")
        if s is None:
            return _box(sizes("size"), limit)
        return square(s, limit=limit) if name == "square" else cube(s, limit=limit)
    if name == "rectangle":
        width, height = sizes("width")[-1], sizes("height")[-2]
        return rectangle(width, height, limit=limit)
    length = sizes("length")
    if len(set(length)) == 1:
        return line(length[0], params.angle, limit=limit)
    # the physical segment, expressed in pixel units along y and x
    s_, c_ = _direction(params.angle)
    along_y, along_x = length[0] * s_, length[1] * c_
    angle_px = math.degrees(math.atan2(along_y, along_x))
    return line(math.hypot(along_y, along_x), angle_px, limit=limit)
