"""Acceptance limits: per image and over the lot, with the lot's verdict.

Rules, in the order they apply:

* Bounds are inclusive: a value equal to ``max`` passes.
* An image that could not be analysed is never counted as passing: a limit with
  ``over: each`` is ``incomplete`` when any image is incomplete and none failed;
  a lot-wide limit (``lot-mean``, ``lot-max``, ``lot-min``) is ``incomplete``
  whenever an image is incomplete, since its value would be computed without it.
* A value that is undefined for an image (NaN, e.g. the median size of no objects)
  makes that image's verdict on the limit ``incomplete``.
* The lot verdict is ``fail`` if any limit failed, else ``incomplete`` if any image
  or limit is incomplete (or the lot has no images), else ``pass``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from lotproof.runner.evaluate.image import ImageResult
from lotproof.runner.recipe.model import LimitDef, Recipe

__all__ = [
    "FAIL",
    "INCOMPLETE",
    "PASS",
    "LimitVerdict",
    "Verdicts",
    "bound_text",
    "evaluate_limits",
]

PASS = "pass"
FAIL = "fail"
INCOMPLETE = "incomplete"


@dataclass
class LimitVerdict:
    name: str
    value_name: str
    unit: str
    over: str
    low: float | None
    high: float | None
    written: dict[str, Any]
    verdict: str
    #: the lot-wide value (lot-mean/max/min) or None for ``each``
    value: float | None = None
    #: image id -> (value or None, verdict)
    per_image: dict[str, tuple[float | None, str]] = field(default_factory=dict)
    reason: str = ""

    def bound_text(self) -> str:
        return bound_text(self.low, self.high, self.unit)

    def as_dict(self) -> dict[str, Any]:
        return {
            "value_of": self.value_name,
            "unit": self.unit,
            "over": self.over,
            "min": self.low,
            "max": self.high,
            "as_written": self.written,
            "bound": self.bound_text(),
            "value": _json_number(self.value),
            "verdict": self.verdict,
            "reason": self.reason,
            "images": {
                image: {"value": _json_number(v), "verdict": verdict}
                for image, (v, verdict) in self.per_image.items()
            },
        }


def bound_text(low: float | None, high: float | None, unit: str) -> str:
    """A limit's bounds as people read them: ``0.1 to 0.16``, ``>= 12 um``, ``<= 60 um``."""
    unit = "" if unit == "-" else f" {unit}"
    if low is not None and high is not None:
        return f"{low:g} to {high:g}{unit}"
    if low is not None:
        return f">= {low:g}{unit}"
    return f"<= {high:g}{unit}"


def _json_number(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return value


@dataclass
class Verdicts:
    lot: str
    limits: dict[str, LimitVerdict]
    incomplete_images: list[str]
    images: int

    def image_verdict(self, image_id: str) -> str:
        """The image's own verdict over every ``each`` limit."""
        verdicts = [
            lv.per_image[image_id][1]
            for lv in self.limits.values()
            if lv.over == "each" and image_id in lv.per_image
        ]
        if image_id in self.incomplete_images:
            return INCOMPLETE
        if FAIL in verdicts:
            return FAIL
        if INCOMPLETE in verdicts:
            return INCOMPLETE
        return PASS


def _check(value: float, limit: LimitDef) -> str:
    if not math.isfinite(value):
        return INCOMPLETE
    if limit.low is not None and value < limit.low:
        return FAIL
    if limit.high is not None and value > limit.high:
        return FAIL
    return PASS


def evaluate_limits(recipe: Recipe, results: list[ImageResult]) -> Verdicts:
    """Apply every limit of ``recipe`` to the lot's results."""
    incomplete = [r.id for r in results if r.status != "ok"]
    out: dict[str, LimitVerdict] = {}
    for name, limit in recipe.limits.items():
        lv = LimitVerdict(
            name=name,
            value_name=f"{limit.step}.{limit.value}",
            unit=limit.unit,
            over=limit.over,
            low=limit.low,
            high=limit.high,
            written=limit.written,
            verdict=PASS,
        )
        values = []
        for r in results:
            if r.status != "ok":
                lv.per_image[r.id] = (None, INCOMPLETE)
                continue
            v = r.values.get((limit.step, limit.value), math.nan)
            values.append(v)
            lv.per_image[r.id] = (v, _check(v, limit) if limit.over == "each" else "-")
        if limit.over == "each":
            verdicts = [verdict for _, verdict in lv.per_image.values()]
            if FAIL in verdicts:
                lv.verdict = FAIL
            elif INCOMPLETE in verdicts or not results:
                lv.verdict = INCOMPLETE
                lv.reason = "not every image gave a value"
        else:
            finite = [v for v in values if math.isfinite(v)]
            if finite:
                if limit.over == "lot-mean":
                    lv.value = math.fsum(finite) / len(finite)
                elif limit.over == "lot-max":
                    lv.value = max(finite)
                else:
                    lv.value = min(finite)
            if incomplete or len(finite) != len(values) or not finite:
                # the checked value would leave images out; never pass on that
                lv.verdict = INCOMPLETE
                lv.reason = "the lot value leaves out images that gave no value"
                # More images can only raise a maximum or lower a minimum.
                monotone = (
                    limit.over == "lot-max"
                    and limit.high is not None
                    and lv.value is not None
                    and lv.value > limit.high
                ) or (
                    limit.over == "lot-min"
                    and limit.low is not None
                    and lv.value is not None
                    and lv.value < limit.low
                )
                if monotone:
                    lv.verdict = FAIL
                    lv.reason = "fails even on the images that gave a value"
            else:
                assert lv.value is not None
                lv.verdict = _check(lv.value, limit)
        out[name] = lv
    limit_verdicts = [lv.verdict for lv in out.values()]
    if FAIL in limit_verdicts:
        lot = FAIL
    elif INCOMPLETE in limit_verdicts or incomplete or not results:
        lot = INCOMPLETE
    else:
        lot = PASS
    return Verdicts(lot=lot, limits=out, incomplete_images=incomplete, images=len(results))
