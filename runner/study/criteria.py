"""A study's acceptance criteria: reading them from a plan and judging them on its results.

A criterion is one line of text, judged on every studied value (or on the one its
``value:`` names). The rules, with their meaning:

==========================================  ==============================================
``%GRR of tolerance <= 10``                 100 · 6 GRR / (USL - LSL) at most 10
``%GRR of total variation <= 30``           100 · GRR / TV at most 30 (``of total`` too)
``ndc >= 5``                                number of distinct categories at least 5
``|bias| <= 2 % of reference``              on every reference, |bias| <= 0.02 · |reference|
``|bias| <= 0.5 um``                        on every reference, |bias| at most 0.5 um (in the
                                            value's unit; a bare number for a value without)
``no significant bias``                     on every reference the bias's confidence
                                            interval holds 0
``|slope| <= 0.05``                         the linearity slope (bias per unit of
                                            reference) at most 0.05 in size
``no verdict flips``                        no image's verdict changes within any moved
                                            parameter's range
``|change per step| <= 10 % of tolerance``  every moved parameter changes the value by at
                                            most 10 % of its tolerance per step
==========================================  ==============================================

``≤`` and ``≥`` may be written for ``<=`` and ``>=``. A criterion is ``pass``,
``fail`` or ``incomplete`` (a number it needs could not be computed, e.g. an image
could not be analysed); ``incomplete`` never counts as passing.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

from lotproof.runner.recipe.quantities import BoundError, parse_bound

__all__ = [
    "FAIL",
    "INCOMPLETE",
    "NEEDS",
    "PASS",
    "Criterion",
    "RuleError",
    "judge",
    "parse_rule",
    "study_verdict",
]

PASS, FAIL, INCOMPLETE = "pass", "fail", "incomplete"

_NUMBER = r"([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)"
_LE = r"(?:<=|≤)"
_GE = r"(?:>=|≥)"

#: rule kind -> (pattern, the part of the study it needs)
_RULES: dict[str, tuple[re.Pattern[str], str]] = {
    "grr_percent_tolerance": (
        re.compile(rf"^%\s*GRR\s+of\s+tolerance\s*{_LE}\s*{_NUMBER}\s*%?$", re.I),
        "precision",
    ),
    "grr_percent_total": (
        re.compile(rf"^%\s*GRR\s+of\s+total(?:\s+variation)?\s*{_LE}\s*{_NUMBER}\s*%?$", re.I),
        "precision",
    ),
    "ndc": (re.compile(rf"^ndc\s*{_GE}\s*{_NUMBER}$", re.I), "precision"),
    "bias_relative": (
        re.compile(rf"^\|\s*bias\s*\|\s*{_LE}\s*{_NUMBER}\s*%\s*of\s+(?:the\s+)?reference$", re.I),
        "trueness",
    ),
    "bias_absolute": (re.compile(rf"^\|\s*bias\s*\|\s*{_LE}\s*(.+?)$", re.I), "trueness"),
    "no_significant_bias": (re.compile(r"^no\s+significant\s+bias$", re.I), "trueness"),
    "slope": (
        re.compile(rf"^\|\s*(?:linearity\s+)?slope\s*\|\s*{_LE}\s*{_NUMBER}$", re.I),
        "linearity",
    ),
    "no_flips": (re.compile(r"^no\s+verdict\s+flips?$", re.I), "robustness"),
    "change_percent_tolerance": (
        re.compile(
            rf"^\|\s*change\s+per\s+step\s*\|\s*{_LE}\s*{_NUMBER}\s*%\s*of\s+tolerance$", re.I
        ),
        "robustness",
    ),
}

#: rule kind -> the part of the study the criterion needs
NEEDS = {kind: needs for kind, (_, needs) in _RULES.items()}

#: rules that need the value's tolerance
_NEEDS_TOLERANCE = ("grr_percent_tolerance", "change_percent_tolerance")


class RuleError(ValueError):
    """A criterion that cannot be read; the message says what is accepted."""


@dataclass(frozen=True)
class Criterion:
    """One acceptance criterion of a plan, read for the values it judges."""

    name: str
    rule: str
    kind: str
    #: the bound, per judged value, in the value's unit (or a percentage / count)
    limits: dict[str, float | None]
    #: the studied values judged (none for a rule on the whole study: verdict flips)
    values: tuple[str, ...]

    @property
    def needs(self) -> str:
        return NEEDS[self.kind]

    @property
    def needs_tolerance(self) -> bool:
        return self.kind in _NEEDS_TOLERANCE


def parse_rule(text: object, units: dict[str, str]) -> tuple[str, dict[str, float | None]]:
    """``(kind, bound per value)`` of one criterion's text, for values with ``units``.

    Raises
    ------
    RuleError
        When the text is none of the rules, or a bound has the wrong unit.
    """
    if not isinstance(text, str) or not text.strip():
        raise RuleError(f"a criterion is one line of text such as 'ndc >= 5' (got {text!r})")
    written = " ".join(text.split())
    for kind, (pattern, _) in _RULES.items():
        match = pattern.match(written)
        if match is None:
            continue
        if kind in ("no_significant_bias", "no_flips"):
            return kind, dict.fromkeys(units)
        if kind == "bias_absolute":
            bounds: dict[str, float | None] = {}
            for name, unit in units.items():
                try:
                    bounds[name] = parse_bound(match.group(1), unit)
                except BoundError as err:
                    raise RuleError(f"{name}: {err}") from None
                if bounds[name] is not None and bounds[name] < 0:  # type: ignore[operator]
                    raise RuleError(f"a bound on |bias| is not negative (got {match.group(1)!r})")
            return kind, bounds
        bound = float(match.group(1))
        if not math.isfinite(bound) or bound < 0:
            raise RuleError(f"the bound of {written!r} must be a number >= 0")
        return kind, dict.fromkeys(units, bound)
    raise RuleError(
        f"cannot read {written!r} as a criterion; write one of: '%GRR of tolerance <= 10', "
        "'%GRR of total variation <= 30', 'ndc >= 5', '|bias| <= 2 % of reference', "
        "'|bias| <= 0.5 um', 'no significant bias', '|slope| <= 0.05', 'no verdict flips', "
        "'|change per step| <= 10 % of tolerance'"
    )


def _verdict(verdicts: list[str]) -> str:
    if FAIL in verdicts:
        return FAIL
    if INCOMPLETE in verdicts or not verdicts:
        return INCOMPLETE
    return PASS


def _within(measured: float | None, bound: float, at_most: bool = True) -> str:
    if measured is None or not math.isfinite(measured):
        return INCOMPLETE
    return PASS if (measured <= bound if at_most else measured >= bound) else FAIL


def _judge_value(criterion: Criterion, name: str, doc: dict[str, Any]) -> dict[str, Any]:
    """The criterion on one value's part of ``validation.json``."""
    kind, bound = criterion.kind, criterion.limits.get(name)
    assert bound is not None or kind == "no_significant_bias"
    out: dict[str, Any] = {"bound": bound}
    if kind in ("grr_percent_tolerance", "grr_percent_total"):
        measured = doc.get(kind)
        out.update(measured=measured, verdict=_within(measured, bound or 0.0))
        if doc.get("precision_problem"):
            out["reason"] = doc["precision_problem"]
    elif kind == "ndc":
        ndc = doc.get("ndc")
        if ndc is None and doc.get("grr_sd") == 0:
            out.update(measured=None, verdict=PASS, reason="GRR is 0: every part is told apart")
        else:
            out.update(measured=ndc, verdict=_within(ndc, bound or 0.0, at_most=False))
            if doc.get("precision_problem"):
                out["reason"] = doc["precision_problem"]
    elif kind in ("bias_relative", "bias_absolute", "no_significant_bias"):
        references = doc.get("bias") or []
        per: dict[str, str] = {}
        worst: float | None = None
        for ref in references:
            bias = ref.get("bias")
            if kind == "no_significant_bias":
                significant = ref.get("significant")
                per[ref["name"]] = (
                    INCOMPLETE if significant is None else (FAIL if significant else PASS)
                )
                continue
            if bias is None:
                per[ref["name"]] = INCOMPLETE
                continue
            if kind == "bias_relative":
                reference = ref.get("reference") or 0.0
                size = math.inf if reference == 0 else 100.0 * abs(bias) / abs(reference)
            else:
                size = abs(bias)
            worst = size if worst is None else max(worst, size)
            per[ref["name"]] = _within(size, bound or 0.0)
        if doc.get("trueness_problem"):
            per["-"] = INCOMPLETE
            out["reason"] = doc["trueness_problem"]
        out.update(measured=worst, references=per, verdict=_verdict(list(per.values())))
    elif kind == "slope":
        slope = (doc.get("linearity") or {}).get("slope")
        out.update(
            measured=None if slope is None else abs(slope),
            verdict=_within(None if slope is None else abs(slope), bound or 0.0),
        )
        if doc.get("linearity_problem"):
            out["reason"] = doc["linearity_problem"]
    elif kind == "change_percent_tolerance":
        per = {}
        worst = None
        for parameter, change in (doc.get("robustness") or {}).items():
            size = change.get("percent_of_tolerance")
            per[parameter] = _within(None if size is None else abs(size), bound or 0.0)
            if size is not None:
                worst = abs(size) if worst is None else max(worst, abs(size))
        out.update(measured=worst, parameters=per, verdict=_verdict(list(per.values())))
    return out


def judge(criterion: Criterion, validation: dict[str, Any]) -> dict[str, Any]:
    """The criterion judged on a ``validation.json`` document (its ``values`` and
    ``robustness``); returns the criterion's entry of that document's ``criteria``."""
    entry: dict[str, Any] = {
        "rule": criterion.rule,
        "kind": criterion.kind,
        "values": list(criterion.values),
    }
    if criterion.kind == "no_flips":
        parameters = (validation.get("robustness") or {}).get("parameters", {})
        flips = {
            name: [f["image"] for f in move.get("flips", [])] for name, move in parameters.items()
        }
        incomplete = [name for name, move in parameters.items() if move.get("incomplete_images")]
        flipped = sorted({image for images in flips.values() for image in images})
        if flipped:
            verdict = FAIL
        elif incomplete or not parameters:
            verdict = INCOMPLETE
        else:
            verdict = PASS
        entry.update(measured=len(flipped), images=flipped, flips=flips, verdict=verdict)
        if incomplete:
            entry["reason"] = "images could not be analysed with " + ", ".join(incomplete)
        return entry
    results = {
        name: _judge_value(criterion, name, validation["values"][name]) for name in criterion.values
    }
    entry["results"] = results
    entry["verdict"] = _verdict([r["verdict"] for r in results.values()])
    return entry


def study_verdict(criteria: dict[str, dict[str, Any]], incomplete_images: int) -> str:
    """``fail`` when a criterion failed; else ``incomplete`` when one is or an image could not
    be analysed; else ``pass`` (also when the plan has no criteria: nothing failed)."""
    verdicts = [entry["verdict"] for entry in criteria.values()]
    if FAIL in verdicts:
        return FAIL
    if INCOMPLETE in verdicts or incomplete_images:
        return INCOMPLETE
    return PASS
