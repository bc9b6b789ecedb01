"""A value across lots: one point per lot, control charts, zone rules and capability.

:func:`lot_trend` reads the catalogue and applies :mod:`lotproof.runner.history.spc`:

Points
    One point per lot (a lot is known by its name, the lot folder's name): the
    mean of ``STEP.NAME`` over the lot's analysed images (status ``ok`` and a
    defined value). Only intact runs count; altered and unfinished runs are
    listed in ``excluded`` with the reason. When a lot was run more than once the
    latest intact run counts, and the earlier ones are listed as superseded.
    Points are in the order the lots were first run.

Segments
    A change of recipe revision starts a new segment with its own baseline and
    limits (``across_revisions`` keeps one segment). Moving ranges and zone rules
    never reach across a segment's start.

Baseline
    The first ``baseline`` points of a segment (default 20, or all when fewer), or
    the points run up to ``baseline_until``. Its mean is the centre line; its
    moving ranges give MR-bar and sigma_within = MR-bar / d2; its sample standard
    deviation (n - 1) is sigma_overall.

Capability
    Against the recipe's limit on the value in that segment (``lot-mean`` first,
    then ``each``, ``lot-max``, ``lot-min``, or the one named): Cp, Cpk with
    sigma_within and Pp, Ppk with sigma_overall, all about the baseline's centre,
    so that they describe the process as the baseline shows it. With fewer than
    :data:`MIN_CAPABILITY_LOTS` baseline lots the indices are marked indicative.

X-bar and S
    When every lot has at least two analysed images, the images of each lot are a
    rational subgroup: x-bar and s limits from the baseline's subgroups, each
    lot's limits from its own size.

The summary's top-level centre, limits and indices are those of the last segment
(the current revision); ``segments`` holds each.
"""

from __future__ import annotations

import fnmatch
import itertools
import math
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from lotproof.runner.errors import EXIT_BAD_INPUT, EXIT_INVALID, LotproofError
from lotproof.runner.history.catalogue import Catalogue
from lotproof.runner.history.entry import RunRecord
from lotproof.runner.history.spc import (
    ZONE_RULES,
    Capability,
    IndividualsLimits,
    SubgroupLimits,
    capability,
    individuals_limits,
    mean,
    moving_ranges,
    sample_sd,
    subgroup_limits,
    zone_rules,
)
from lotproof.runner.record.folder import CAUTION

__all__ = [
    "DEFAULT_BASELINE",
    "FLAG_CODES",
    "LIMIT_PREFERENCE",
    "MIN_CAPABILITY_LOTS",
    "Excluded",
    "NoTrendData",
    "Segment",
    "SpecLimit",
    "Trend",
    "TrendError",
    "TrendPoint",
    "lot_trend",
]

#: baseline lots per segment when none is asked for
DEFAULT_BASELINE = 20
#: fewer baseline lots than this make the capability indices indicative (common practice)
MIN_CAPABILITY_LOTS = 20
#: which limit a trend's capability is judged against, first found first
LIMIT_PREFERENCE = ("lot-mean", "each", "lot-max", "lot-min")
#: every flag a point can carry, with what it means
FLAG_CODES = {**ZONE_RULES, "MR": "moving range above the MR chart's upper limit (D4 MR-bar)"}

_VALUE = re.compile(r"^(?P<step>[A-Za-z][A-Za-z0-9_-]*)\.(?P<name>[A-Za-z0-9_]+)$")


class TrendError(LotproofError, ValueError):
    """The trend asked for names an unknown recipe, value or limit, or options clash (exit 2)."""

    exit_code = EXIT_INVALID


class NoTrendData(TrendError):
    """No intact run in the catalogue gives the value (exit 3: the data are missing)."""

    exit_code = EXIT_BAD_INPUT


#: the earliest time, for sorting runs without one
_EARLIEST = datetime.min.replace(tzinfo=UTC)


@dataclass
class SpecLimit:
    """The limit capability is judged against: a recipe limit on the charted value."""

    name: str
    over: str
    low: float | None
    high: float | None
    unit: str
    bound: str

    def as_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "over": self.over,
            "min": self.low,
            "max": self.high,
            "unit": self.unit,
            "bound": self.bound,
        }


@dataclass
class TrendPoint:
    """One lot on the chart."""

    index: int
    lot: str
    run_dir: str
    run_name: str
    time: datetime | None
    revision: int | None
    value: float
    #: the analysed images' values the point is the mean of
    image_values: list[float]
    segment: int = 0
    baseline: bool = False
    #: moving range to the point before in its segment (None for a segment's first)
    mr: float | None = None
    flags: list[str] = field(default_factory=list)
    #: x-bar and s chart: the lot's standard deviation and its limits there
    sd: float | None = None
    xbar_limits: tuple[float, float] | None = None
    s_limits: tuple[float, float] | None = None
    subgroup_flags: list[str] = field(default_factory=list)

    @property
    def n_images(self) -> int:
        return len(self.image_values)

    def as_dict(self) -> dict[str, Any]:
        return {
            "index": self.index,
            "lot": self.lot,
            "run": self.run_name,
            "run_dir": self.run_dir,
            "time": _iso(self.time),
            "revision": self.revision,
            "value": self.value,
            "n_images": self.n_images,
            "segment": self.segment,
            "baseline": self.baseline,
            "mr": self.mr,
            "flags": list(self.flags),
        }


@dataclass
class Segment:
    """Points under one baseline: a run of lots of one recipe revision (or all of them)."""

    index: int
    revisions: list[int | None]
    points: list[TrendPoint]
    baseline_points: list[TrendPoint]
    limits: IndividualsLimits | None = None
    sigma_overall: float | None = None
    spec: SpecLimit | None = None
    indices: Capability | None = None
    subgroups: SubgroupLimits | None = None

    @property
    def indicative(self) -> bool:
        return self.indices is not None and len(self.baseline_points) < MIN_CAPABILITY_LOTS

    def as_dict(self) -> dict[str, Any]:
        lim = self.limits
        ind = self.indices
        sub = self.subgroups
        return {
            "index": self.index,
            "revisions": list(self.revisions),
            "first_point": self.points[0].index,
            "last_point": self.points[-1].index,
            "baseline": len(self.baseline_points),
            "center": lim.center if lim else None,
            "ucl": lim.ucl if lim else None,
            "lcl": lim.lcl if lim else None,
            "mr_bar": lim.mr_bar if lim else None,
            "mr_ucl": lim.mr_ucl if lim else None,
            "sigma_within": lim.sigma_within if lim else None,
            "sigma_overall": self.sigma_overall,
            "limit": self.spec.as_dict() if self.spec else None,
            "cp": ind.cp if ind else None,
            "cpk": ind.cpk if ind else None,
            "pp": ind.pp if ind else None,
            "ppk": ind.ppk if ind else None,
            "indicative": self.indicative,
            "xbar_s": (
                {"center": sub.center, "s_bar": sub.s_bar, "equal_sizes": sub.equal_sizes}
                if sub
                else None
            ),
        }


@dataclass
class Excluded:
    """A run that gives no point, and why."""

    run_name: str
    run_dir: str
    lot: str | None
    status: str
    why: str

    def as_dict(self) -> dict[str, Any]:
        return {
            "run": self.run_name,
            "run_dir": self.run_dir,
            "lot": self.lot,
            "status": self.status,
            "why": self.why,
        }


@dataclass
class Trend:
    """A value of one recipe across lots: points, segments, what was left out, and notes."""

    recipe: str
    value: str
    unit: str
    points: list[TrendPoint]
    segments: list[Segment]
    excluded: list[Excluded]
    notes: list[str]
    across_revisions: bool
    baseline_rule: str

    @property
    def current(self) -> Segment:
        """The last segment (the current revision): the summary's centre, limits and indices."""
        return self.segments[-1]

    @property
    def has_subgroups(self) -> bool:
        return any(s.subgroups is not None for s in self.segments)

    def flagged(self) -> list[TrendPoint]:
        """Points with a flag, in chart order."""
        return [p for p in self.points if p.flags]

    def as_json(self) -> dict[str, Any]:
        """The ``trend --json`` document (no NaN: undefined numbers are null)."""
        current = self.current.as_dict()
        document: dict[str, Any] = {
            "recipe": self.recipe,
            "value": self.value,
            "unit": self.unit,
            "points": [p.as_dict() for p in self.points],
            "center": current["center"],
            "ucl": current["ucl"],
            "lcl": current["lcl"],
            "mr_bar": current["mr_bar"],
            "mr_ucl": current["mr_ucl"],
            "sigma_within": current["sigma_within"],
            "sigma_overall": current["sigma_overall"],
            "cp": current["cp"],
            "cpk": current["cpk"],
            "pp": current["pp"],
            "ppk": current["ppk"],
            "indicative": current["indicative"],
            "limit": current["limit"],
            "baseline": current["baseline"],
            "baseline_rule": self.baseline_rule,
            "across_revisions": self.across_revisions,
            "segments": [s.as_dict() for s in self.segments],
            "xbar_s": self._subgroups_json(),
            "excluded": [e.as_dict() for e in self.excluded],
            "flags": dict(FLAG_CODES),
            "notes": list(self.notes),
            "caution": CAUTION,
        }
        cleaned: dict[str, Any] = _no_nan(document)
        return cleaned

    def _subgroups_json(self) -> list[dict[str, Any]] | None:
        if not self.has_subgroups:
            return None
        return [
            {
                "index": p.index,
                "lot": p.lot,
                "n": p.n_images,
                "mean": p.value,
                "sd": p.sd,
                "xbar_lcl": p.xbar_limits[0] if p.xbar_limits else None,
                "xbar_ucl": p.xbar_limits[1] if p.xbar_limits else None,
                "s_lcl": p.s_limits[0] if p.s_limits else None,
                "s_ucl": p.s_limits[1] if p.s_limits else None,
                "beyond": list(p.subgroup_flags),
            }
            for p in self.points
        ]


def _iso(moment: datetime | None) -> str | None:
    return moment.strftime("%Y-%m-%dT%H:%M:%SZ") if moment is not None else None


def _no_nan(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _no_nan(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_no_nan(v) for v in value]
    return value


# ---------------------------------------------------------------- building the trend


def _choose_limit(
    rows: list[dict[str, Any]], value: str, unit: str, name: str | None
) -> SpecLimit | None:
    candidates = [r for r in rows if r["value_of"] == value]
    if name is not None:
        candidates = [r for r in candidates if r["name"] == name]
    else:
        candidates.sort(
            key=lambda r: (
                LIMIT_PREFERENCE.index(r["over"]) if r["over"] in LIMIT_PREFERENCE else 99,
                r["name"],
            )
        )
    for row in candidates:
        if row["unit"] == unit and (row["low"] is not None or row["high"] is not None):
            return SpecLimit(row["name"], row["over"], row["low"], row["high"], unit, row["bound"])
    return None


def lot_trend(
    catalogue: Catalogue,
    recipe: str,
    value: str,
    *,
    baseline: int | None = None,
    baseline_until: datetime | None = None,
    across_revisions: bool = False,
    limit: str | None = None,
    lot: str | None = None,
) -> Trend:
    """One point per lot of ``value`` (``STEP.NAME``) for ``recipe``, with charts and capability.

    Parameters
    ----------
    catalogue
        The open catalogue.
    recipe, value
        The recipe's name and the per-image value to chart.
    baseline, baseline_until
        The first ``baseline`` lots of each segment, or those run up to
        ``baseline_until`` (not both); default :data:`DEFAULT_BASELINE` lots.
    across_revisions
        One segment across recipe revisions instead of one per revision.
    limit
        The recipe limit to judge capability against (default: by
        :data:`LIMIT_PREFERENCE`).
    lot
        Only lots whose name matches this glob.

    Raises
    ------
    TrendError
        Exit 2 for an unknown recipe, value or limit or conflicting options; exit 3
        when no intact run gives the value.
    """
    if baseline is not None and baseline_until is not None:
        raise TrendError("give --baseline or --baseline-until, not both")
    if baseline is not None and baseline < 2:
        raise TrendError(f"--baseline must be at least 2 lots (got {baseline})")
    match = _VALUE.match(value)
    if not match:
        raise TrendError(
            f"--value {value!r}: write the value as STEP.NAME, e.g. pore-stats.area_fraction"
        )
    step, name = match["step"], match["name"]
    runs = catalogue.runs(recipe=recipe)
    if lot is not None:
        runs = [r for r in runs if r.lot is not None and fnmatch.fnmatchcase(r.lot, lot)]
    if not runs:
        known = catalogue.recipes()
        if recipe in known:
            raise TrendError(f"no run of recipe {recipe!r} has a lot matching {lot!r}")
        raise TrendError(
            f"--recipe {recipe!r}: no run of that recipe in the catalogue "
            f"(its recipes: {', '.join(known) or 'none'})"
        )
    runs.reverse()  # oldest first
    excluded: list[Excluded] = []
    notes: list[str] = []
    intact = []
    for run in runs:
        if run.status == "intact":
            intact.append(run)
        else:
            excluded.append(
                Excluded(
                    run.run_name,
                    run.run_dir,
                    run.lot,
                    run.status,
                    f"the run folder is {run.status}: {run.problem or 'see lotproof verify'}",
                )
            )
    keys = [r.run_dir for r in intact]
    names = catalogue.value_names(keys)
    units = sorted({u for s, n, u in names if (s, n) == (step, name)})
    if not units:
        listed = sorted(f"{s}.{n}" for s, n, _ in names)
        raise TrendError(
            f"--value {value!r}: no intact run of {recipe} has that value"
            + (f" (its values: {', '.join(listed)})" if listed else "")
        )
    unit = units[-1]
    if len(units) > 1:
        notes.append(
            f"{value} is recorded in more than one unit ({', '.join(units)}); {unit} is charted"
        )

    by_lot: dict[str, list[RunRecord]] = {}
    for run in intact:
        by_lot.setdefault(run.lot or run.run_name, []).append(run)
    chosen: list[tuple[datetime | None, str, RunRecord]] = []
    for lot_name, lot_runs in by_lot.items():
        latest = lot_runs[-1]
        for earlier in lot_runs[:-1]:
            excluded.append(
                Excluded(
                    earlier.run_name,
                    earlier.run_dir,
                    lot_name,
                    "superseded",
                    f"lot {lot_name} was run again later; the latest intact run "
                    f"({latest.run_name}) counts",
                )
            )
        if len(lot_runs) > 1:
            notes.append(
                f"lot {lot_name} was run {len(lot_runs)} times; the latest intact run "
                f"({latest.run_name}) counts"
            )
        chosen.append((lot_runs[0].started_utc, lot_name, latest))
    chosen.sort(key=lambda c: (c[0] is None, c[0] or _EARLIEST, c[1]))

    values = catalogue.values([c[2].run_dir for c in chosen], step, name)
    points: list[TrendPoint] = []
    for _, lot_name, run in chosen:
        rows = values.get(run.run_dir, [])
        good = [v for _, v, status in rows if status == "ok" and v is not None and math.isfinite(v)]
        if not good:
            excluded.append(
                Excluded(
                    run.run_name,
                    run.run_dir,
                    lot_name,
                    "no value",
                    f"no analysed image gave {value}",
                )
            )
            continue
        points.append(
            TrendPoint(
                index=len(points) + 1,
                lot=lot_name,
                run_dir=run.run_dir,
                run_name=run.run_name,
                time=run.started_utc,
                revision=run.recipe_revision,
                value=mean(good),
                image_values=good,
            )
        )
    if not points:
        raise NoTrendData(f"no intact run of {recipe} gives a value of {value}")

    segments = _segments(points, across_revisions)
    if across_revisions and len({p.revision for p in points}) > 1:
        notes.append(
            "one baseline across recipe revisions "
            + ", ".join(f"r{r}" for r in sorted({p.revision or 0 for p in points}))
            + " (--across-revisions)"
        )
    for before, after in itertools.pairwise(segments):
        if not across_revisions:
            first = after.points[0]
            notes.append(
                f"recipe revision r{before.revisions[-1]} -> r{after.revisions[0]} at point "
                f"{first.index} (lot {first.lot}): a new baseline starts"
            )
    limit_rows = catalogue.limits([p.run_dir for p in points])
    subgroups = all(p.n_images >= 2 for p in points)
    if not subgroups:
        few = next(p for p in points if p.n_images < 2)
        notes.append(
            f"no x-bar and s chart: lot {few.lot} has {few.n_images} analysed image "
            "(a subgroup needs at least 2)"
        )
    for segment in segments:
        _analyse(segment, baseline, baseline_until, subgroups, notes)
        newest = max(segment.points, key=lambda p: (p.time is not None, p.time or _EARLIEST))
        segment.spec = _choose_limit(limit_rows.get(newest.run_dir, []), value, unit, limit)
        if segment.spec is None and limit is not None:
            raise TrendError(
                f"--limit {limit!r}: the recipe (r{newest.revision}) has no limit of that "
                f"name on {value}"
            )
        if segment.limits is not None and segment.spec is not None:
            segment.indices = capability(
                segment.limits.center,
                segment.limits.sigma_within,
                segment.sigma_overall,
                segment.spec.low,
                segment.spec.high,
            )
    current = segments[-1]
    if current.spec is None:
        notes.append(f"the recipe has no limit on {value}: no capability indices")
    elif current.indicative:
        notes.append(
            f"the capability indices rest on {len(current.baseline_points)} baseline lots "
            f"(fewer than {MIN_CAPABILITY_LOTS}): they are indicative only"
        )
    rule = (
        f"lots run up to {_iso(baseline_until)}"
        if baseline_until is not None
        else f"the first {baseline or DEFAULT_BASELINE} lots"
    ) + (" of each recipe revision" if not across_revisions else "")
    return Trend(
        recipe=recipe,
        value=value,
        unit=unit,
        points=points,
        segments=segments,
        excluded=excluded,
        notes=notes,
        across_revisions=across_revisions,
        baseline_rule=rule,
    )


def _segments(points: list[TrendPoint], across: bool) -> list[Segment]:
    segments: list[Segment] = []
    for point in points:
        if segments and (across or segments[-1].points[-1].revision == point.revision):
            segments[-1].points.append(point)
            if point.revision not in segments[-1].revisions:
                segments[-1].revisions.append(point.revision)
        else:
            segments.append(Segment(len(segments) + 1, [point.revision], [point], []))
        point.segment = segments[-1].index
    return segments


def _analyse(
    segment: Segment,
    baseline: int | None,
    until: datetime | None,
    subgroups: bool,
    notes: list[str],
) -> None:
    points = segment.points
    if until is not None:
        segment.baseline_points = [p for p in points if p.time is not None and p.time <= until]
    else:
        segment.baseline_points = points[: baseline or DEFAULT_BASELINE]
    for point in segment.baseline_points:
        point.baseline = True
    for point, mr in zip(points[1:], moving_ranges([p.value for p in points])):
        point.mr = mr
    where = f"points {points[0].index}-{points[-1].index}"
    if len(segment.baseline_points) < 2:
        notes.append(
            f"segment {segment.index} ({where}) has {len(segment.baseline_points)} baseline "
            "lot(s): no control limits (at least 2 are needed)"
        )
        return
    base_values = [p.value for p in segment.baseline_points]
    limits = individuals_limits(base_values)
    segment.limits = limits
    segment.sigma_overall = sample_sd(base_values)
    for point, flags in zip(
        points, zone_rules([p.value for p in points], limits.center, limits.sigma_within)
    ):
        point.flags = list(flags)
        if point.mr is not None and point.mr > limits.mr_ucl:
            point.flags.append("MR")
    if not subgroups:
        return
    segment.subgroups = subgroup_limits([p.image_values for p in segment.baseline_points])
    for point in points:
        point.sd = sample_sd(point.image_values)
        point.xbar_limits = segment.subgroups.xbar_limits(point.n_images)
        point.s_limits = segment.subgroups.s_limits(point.n_images)
        if not point.xbar_limits[0] <= point.value <= point.xbar_limits[1]:
            point.subgroup_flags.append("x-bar beyond its limits")
        if not point.s_limits[0] <= point.sd <= point.s_limits[1]:
            point.subgroup_flags.append("s beyond its limits")
