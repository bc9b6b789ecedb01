"""Granulometry: the ``size-spectrum`` step kind.

Sieving an image: openings by ever larger disks remove ever larger particles,
and the area each opening removes is the amount of foreground of that size.
Touching particles need not be separated first: an opening removes a neck long
before it removes the particles on either side of it, so the spectrum of a mask
of clustered particles still shows the size of the particles, not of the
clusters.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from pydantic import Field

from lotproof.steps import _morph
from lotproof.steps._data import Output, Table
from lotproof.steps._registry import StepParams, step
from lotproof.steps.footprints import diamond, disk, square
from lotproof.steps.units import Length

__all__ = [
    "MAX_RADII",
    "SPECTRUM_COLUMNS",
    "SPECTRUM_FOOTPRINTS",
    "SPECTRUM_VALUES",
    "SizeSpectrumParams",
    "size_spectrum",
    "spectrum_radii",
]

#: Footprints ``size-spectrum`` opens with; each is a ball of radius r in its own
#: distance: disk {x² + y² <= r²}, diamond {|x| + |y| <= r}, square
#: {max(|x|, |y|) <= r}.
SPECTRUM_FOOTPRINTS: tuple[str, ...] = ("disk", "diamond", "square")

#: Columns of the spectrum table, in order: name -> unit.
SPECTRUM_COLUMNS: dict[str, str] = {
    "radius_low": "um",
    "radius_high": "um",
    "area_removed": "um2",
    "fraction": "-",
}

#: Values ``size-spectrum`` reports: name -> unit.
SPECTRUM_VALUES: dict[str, str] = {
    "mean_size": "um",
    "residual_fraction": "-",
}

#: Most openings one spectrum may ask for (``max_radius / step``).
MAX_RADII = 1000


class SizeSpectrumParams(StepParams):
    """Parameters of ``size-spectrum``."""

    footprint: Literal[SPECTRUM_FOOTPRINTS] = Field(  # type: ignore[valid-type]
        "disk",
        description="shape of the sieve: disk (x² + y² <= r²), diamond (|x| + |y| <= r) or "
        "square (max(|x|, |y|) <= r, side 2 floor(r) + 1 px)",
    )
    max_radius: Length = Field(
        description="largest opening radius, a length (e.g. 20 um); foreground that survives "
        "it is the residual. No default: it depends on the particles",
    )
    step: Length = Field(
        "1 px",
        validate_default=True,
        description="radius step, a length: the openings use radii step, 2 step, 3 step, ... "
        "up to max_radius; default 1 px",
    )


def spectrum_radii(max_radius_px: float, step_px: float) -> list[float]:
    """The opening radii in pixels: ``step, 2 step, ...`` up to ``max_radius``.

    Parameters
    ----------
    max_radius_px, step_px : float
        Largest radius and step in pixels, both > 0, ``step <= max_radius``.

    Returns
    -------
    list of float
        ``k * step`` for ``k = 1 .. K``, each rounded to 12 significant digits
        (so ``3 * 0.1`` is ``0.3``), with ``K`` the largest ``k`` whose rounded
        radius is ``<= max_radius``.

    Raises
    ------
    ValueError
        For a step larger than ``max_radius`` or more than :data:`MAX_RADII`
        radii.
    """
    for name, value in (("max_radius", max_radius_px), ("step", step_px)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"{name} must be a finite number of pixels > 0 (got {value!r})")
    if step_px > max_radius_px:
        raise ValueError(
            f"step ({step_px:g} px) is larger than max_radius ({max_radius_px:g} px): "
            "no opening to make"
        )
    count = math.floor(max_radius_px / step_px) + 1
    if count > MAX_RADII + 1:
        raise ValueError(
            f"max_radius / step asks for {count - 1} openings, more than {MAX_RADII}; "
            "take a larger step"
        )
    radii = [float(f"{k * step_px:.12g}") for k in range(1, count + 1)]
    return [r for r in radii if r <= max_radius_px]


def _footprint(name: str, radius: float, limit: list[int]) -> np.ndarray:
    if name == "disk":
        return disk(radius, limit=limit)
    if name == "diamond":
        return diamond(radius, limit=limit)
    h = math.floor(radius)
    return square(2 * h + 1, limit=limit)


@step(
    "size-spectrum",
    params=SizeSpectrumParams,
    takes=["mask"],
    gives="table",
    version="2",
    values=SPECTRUM_VALUES,
    ndims=(2,),
    libraries=("numpy", "scipy", "numba"),
)
def size_spectrum(
    params: SizeSpectrumParams, mask: np.ndarray, *, spacing: tuple[float, ...]
) -> Output:
    """Size spectrum by openings of growing radius (granulometry): area removed per radius step.

    The mask is opened by footprints of radius ``step``, ``2 step``, ... up
    to ``max_radius``. A pixel's size is the radius at which it is first
    removed: the foreground removed between two consecutive radii is the
    foreground "between those sizes", and the table gives it as an area and
    as a fraction of the initial foreground. For round particles of radius
    a, all of their area is removed in the row whose radius range holds a.
    What no opening removes is the residual.

    Parameters
    ----------
    params : SizeSpectrumParams
        ``footprint`` (disk, diamond, square), ``max_radius`` and ``step`` in
        pixels.
    mask : ndarray of bool, 2D
        Foreground; touching particles need not be separated.
    spacing : tuple of float
        Pixel size ``(dy, dx)`` in um; square pixels only.

    Returns
    -------
    Output
        ``data``: a :class:`~lotproof.steps._data.Table` with one row per radius
        ``r_k`` (k = 1..K) and the float64 columns of
        :data:`SPECTRUM_COLUMNS`: ``radius_low`` = ``r_{k-1}`` (``r_0 = 0``),
        ``radius_high`` = ``r_k`` (um), ``area_removed`` (um2) and
        ``fraction`` of the initial foreground area (-). ``values``:
        ``mean_size`` (um) and ``residual_fraction`` (-), see Notes.

    Raises
    ------
    ValueError
        For data that is not a 2D bool mask, non-square pixels, a step larger
        than ``max_radius`` or more than :data:`MAX_RADII` openings.

    Notes
    -----
    With ``X`` the mask, ``γ_r`` the opening by the footprint of radius r
    (``lotproof.steps._morph`` kernels, exact digital shapes, pixels outside the image
    ignored), ``X_0 = X`` and ``X_k = X_{k-1} ∩ γ_{r_k}(X)``:

    * ``area_removed_k = (|X_{k-1}| - |X_k|) d²`` and
      ``fraction_k = (|X_{k-1}| - |X_k|) / |X|``, with ``d`` the pixel size;
    * ``residual_fraction = |X_K| / |X|``, so the fractions and the residual
      sum to 1;
    * ``mean_size = sum_k fraction_k (r_{k-1} + r_k) / 2 / sum_k fraction_k``:
      the area-weighted mean **radius** of the removed foreground, each row
      taken at the middle of its radius range (the class-midpoint rule of
      ISO 9276-2 for a histogram); the residual does not enter. For a mask
      of digital disks of integer radius a px and a 1 px step it is
      a + 0.5 px.

    The intersection with ``X_{k-1}`` is there because digital disks are
    not nested openings of each other (a disk of radius 5 px is not a union
    of disks of radius 4 px), so ``|γ_r(X)|`` alone can grow a little with
    r; with it every pixel is removed once, at the first radius whose
    opening does not hold it, and every fraction is >= 0. Diamonds and
    squares of integer radii are nested, and for them ``X_k = γ_{r_k}(X)``.

    A square of radius r is the square of side ``2 floor(r) + 1`` px. Radii
    whose digital footprint equals the previous one give rows of zero. An
    empty mask gives zero areas and NaN fractions, ``mean_size`` and
    ``residual_fraction``; a mask nothing is removed from gives
    ``mean_size`` NaN and ``residual_fraction`` 1.

    References
    ----------
    .. [1] G. Matheron, *Random Sets and Integral Geometry*, Wiley, New York,
       1975 (granulometries).
    .. [2] J. Serra, *Image Analysis and Mathematical Morphology*, Academic
       Press, London, 1982, chapter X (size distributions by openings).
    .. [3] P. Maragos, "Pattern spectrum and multiscale shape
       representation", IEEE Transactions on Pattern Analysis and Machine
       Intelligence 11(7), 701-716, 1989. https://doi.org/10.1109/34.192465
    .. [4] ISO 9276-2:2014, Representation of results of particle size
       analysis -- Part 2: Calculation of average particle sizes/diameters
       and moments from particle size distributions.
    """
    if not isinstance(mask, np.ndarray) or mask.dtype != np.bool_:
        got = mask.dtype if isinstance(mask, np.ndarray) else type(mask).__name__
        raise ValueError(f"size-spectrum needs a bool mask (got {got})")
    if mask.ndim != 2:
        raise ValueError(f"size-spectrum supports 2D masks only (got {mask.ndim}D)")
    if mask.size == 0:
        raise ValueError(f"size-spectrum needs at least one pixel (got shape {mask.shape})")
    if len(spacing) != 2:
        raise ValueError(f"size-spectrum needs a pixel size per axis (dy, dx) (got {spacing!r})")
    dy, dx = (float(s) for s in spacing)
    if not all(math.isfinite(s) and s > 0 for s in (dy, dx)):
        raise ValueError(f"pixel size must be finite and > 0 um (got {spacing!r})")
    if not math.isclose(dy, dx, rel_tol=1e-9, abs_tol=0.0):
        raise ValueError(
            f"size-spectrum supports square pixels only (got dy = {dy} um, dx = {dx} um)"
        )

    radii = spectrum_radii(params.max_radius.px, params.step.px)
    limit = [n - 1 for n in mask.shape]
    initial = int(np.count_nonzero(mask))
    remaining = [initial]
    kept = mask
    previous: np.ndarray | None = None
    for radius in radii:
        if remaining[-1] == 0:
            remaining.append(0)  # nothing left to remove
            continue
        footprint = _footprint(params.footprint, radius, limit)
        if previous is None or not np.array_equal(footprint, previous):
            opened = _morph.dilate(_morph.erode(mask, footprint), footprint)
            kept = kept & opened
            previous = footprint
        remaining.append(int(np.count_nonzero(kept)))

    counts = np.asarray(remaining, dtype=np.int64)
    removed = counts[:-1] - counts[1:]
    high = np.asarray(radii, dtype=np.float64) * dx
    low = np.r_[0.0, high[:-1]]
    if initial:
        fraction = removed / float(initial)
        residual = float(counts[-1]) / float(initial)
    else:
        fraction = np.full(len(radii), math.nan)
        residual = math.nan
    total = int(removed.sum())
    if total:
        # weights removed / total: the fraction of the removed foreground in each row
        mean_size = float(np.sum(removed * (0.5 * (low + high))) / total)
    else:
        mean_size = math.nan
    table = Table(
        columns={
            "radius_low": low,
            "radius_high": high,
            "area_removed": removed.astype(np.float64) * (dx * dx),
            "fraction": np.asarray(fraction, dtype=np.float64),
        },
        units=dict(SPECTRUM_COLUMNS),
        per_object=False,  # rows are size classes, not objects: written to tables.csv
    )
    return Output(
        data=table,
        values={"mean_size": mean_size, "residual_fraction": residual},
        units=dict(SPECTRUM_VALUES),
    )
