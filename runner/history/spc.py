"""Statistics of a sequence of lots: control-chart constants, limits, zone rules, capability.

Pure functions of numbers: nothing here knows of runs, catalogues or files. Every
formula is written out in its docstring with the published source it follows.

Constants are computed from their closed forms, not copied from a table, so that
they hold for every subgroup size; the tables print them rounded to three or four
digits (d2 = 1.128, D4 = 3.267 for moving ranges of two; tests/reference checks
them against the published tables).

References
----------
.. [NIST] NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2,
   "What are Variables Control Charts?" (x-bar and s charts, individuals charts),
   https://www.itl.nist.gov/div898/handbook/pmc/section3/pmc32.htm
.. [ASTM] ASTM E2587, Standard Practice for Use of Control Charts in Statistical
   Process Control.
.. [MONT] D. C. Montgomery, Introduction to Statistical Quality Control, Wiley:
   chapter 6 (x-bar and s charts, also with variable sample size; individuals and
   moving-range charts), chapter 8 (process capability ratios), Appendix VI
   (factors for constructing variables control charts).
.. [WE] Western Electric Company, Statistical Quality Control Handbook (1956):
   the zone tests for unnatural patterns.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = [
    "D2_MOVING_RANGE",
    "D3_MOVING_RANGE",
    "D4_MOVING_RANGE",
    "ZONE_RULES",
    "Capability",
    "IndividualsLimits",
    "SubgroupLimits",
    "a3",
    "b3",
    "b4",
    "c4",
    "capability",
    "individuals_limits",
    "mean",
    "moving_ranges",
    "sample_sd",
    "subgroup_limits",
    "zone_rules",
]

#: d2 for moving ranges of two: the mean range of two independent normal values is
#: 2 sigma / sqrt(pi) (1.128 in the tables)
D2_MOVING_RANGE = 2.0 / math.sqrt(math.pi)
#: d3 for ranges of two: the standard deviation of that range, sqrt(2 - 4/pi) sigma (0.853)
D3_MOVING_RANGE = math.sqrt(2.0 - 4.0 / math.pi)
#: D4 = 1 + 3 d3 / d2 for ranges of two (3.267 in the tables); D3 = 0, since 1 - 3 d3/d2 < 0
D4_MOVING_RANGE = 1.0 + 3.0 * D3_MOVING_RANGE / D2_MOVING_RANGE

#: the four Western Electric zone rules, by the code each flagged point carries
ZONE_RULES = {
    "WE1": "one point beyond 3 sigma",
    "WE2": "2 of 3 successive points beyond 2 sigma, on one side",
    "WE3": "4 of 5 successive points beyond 1 sigma, on one side",
    "WE4": "8 successive points on one side of the centre line",
}


def mean(values: Sequence[float]) -> float:
    """The arithmetic mean, summed exactly (``math.fsum``) so that the order does not matter."""
    if not values:
        raise ValueError("the mean of no values is undefined")
    return math.fsum(values) / len(values)


def sample_sd(values: Sequence[float]) -> float:
    """The sample standard deviation, with n - 1 in the denominator.

    Notes
    -----
    s = sqrt( sum (x_i - x_bar)^2 / (n - 1) ), the estimator of [NIST]_ section
    1.3.5.6 and of the ``s`` charts in [MONT]_ chapter 6; two passes, exact sums.
    """
    if len(values) < 2:
        raise ValueError("a sample standard deviation needs at least 2 values")
    centre = mean(values)
    return math.sqrt(math.fsum((v - centre) ** 2 for v in values) / (len(values) - 1))


# ---------------------------------------------------------------- constants


def c4(n: int) -> float:
    """The bias factor of the sample standard deviation for subgroups of ``n`` values.

    Notes
    -----
    c4(n) = sqrt(2 / (n - 1)) Gamma(n / 2) / Gamma((n - 1) / 2), so that
    E[s] = c4 sigma for normal data ([NIST]_ 6.3.2; tabulated in [MONT]_ Appendix VI
    and [ASTM]_). Computed with log-gamma, which keeps large ``n`` finite.
    """
    if n < 2:
        raise ValueError(f"c4 needs a subgroup of at least 2 values (got {n})")
    return math.sqrt(2.0 / (n - 1)) * math.exp(math.lgamma(n / 2.0) - math.lgamma((n - 1) / 2.0))


def a3(n: int) -> float:
    """A3(n) = 3 / (c4(n) sqrt(n)): x-bar chart limits are x_double_bar +- A3 s_bar ([NIST]_ 6.3.2)."""
    return 3.0 / (c4(n) * math.sqrt(n))


def b3(n: int) -> float:
    """B3(n) = max(0, 1 - 3 sqrt(1 - c4^2) / c4): the s chart's lower limit is B3 s_bar ([MONT]_)."""
    c = c4(n)
    return max(0.0, 1.0 - 3.0 * math.sqrt(1.0 - c * c) / c)


def b4(n: int) -> float:
    """B4(n) = 1 + 3 sqrt(1 - c4^2) / c4: the s chart's upper limit is B4 s_bar ([MONT]_)."""
    c = c4(n)
    return 1.0 + 3.0 * math.sqrt(1.0 - c * c) / c


# ---------------------------------------------------------------- individuals and moving ranges


def moving_ranges(values: Sequence[float]) -> list[float]:
    """|x_i - x_(i-1)| for i = 2..n: the moving ranges of two successive values (n - 1 of them)."""
    return [abs(b - a) for a, b in itertools.pairwise(values)]


@dataclass(frozen=True)
class IndividualsLimits:
    """The centre and limits of an individuals (I) chart and its moving-range (MR) chart.

    ``center`` is the mean of the baseline values, ``mr_bar`` the mean of their
    moving ranges, ``sigma_within = mr_bar / d2``, ``ucl``/``lcl`` =
    ``center +- 3 sigma_within``, ``mr_ucl = D4 mr_bar`` (the MR chart's lower limit
    is 0), ``n`` the number of baseline values.
    """

    center: float
    mr_bar: float
    sigma_within: float
    ucl: float
    lcl: float
    mr_ucl: float
    n: int


def individuals_limits(baseline: Sequence[float]) -> IndividualsLimits:
    """Limits of the individuals and moving-range charts from baseline values.

    Parameters
    ----------
    baseline
        The values that set the limits, in time order (at least 2).

    Returns
    -------
    IndividualsLimits

    Notes
    -----
    centre = x_bar (mean of the baseline), MR_i = |x_i - x_(i-1)|,
    MR_bar = sum MR_i / (n - 1), sigma_within = MR_bar / d2 with d2 = 2 / sqrt(pi)
    = 1.128 (moving ranges of two); UCL, LCL = x_bar +- 3 MR_bar / d2 (= x_bar +-
    2.66 MR_bar); MR chart: UCL = D4 MR_bar with D4 = 3.267, LCL = D3 MR_bar = 0.
    [NIST]_ 6.3.2.2 (individuals control charts), [MONT]_ section 6.4, [ASTM]_.
    """
    if len(baseline) < 2:
        raise ValueError(
            f"an individuals chart needs at least 2 baseline values (got {len(baseline)})"
        )
    center = mean(baseline)
    mr_bar = mean(moving_ranges(baseline))
    sigma = mr_bar / D2_MOVING_RANGE
    return IndividualsLimits(
        center=center,
        mr_bar=mr_bar,
        sigma_within=sigma,
        ucl=center + 3.0 * sigma,
        lcl=center - 3.0 * sigma,
        mr_ucl=D4_MOVING_RANGE * mr_bar,
        n=len(baseline),
    )


# ---------------------------------------------------------------- x-bar and s


@dataclass(frozen=True)
class SubgroupLimits:
    """Centre lines of an x-bar and s chart; the limits depend on each subgroup's size.

    ``center`` is the grand mean, ``s_bar`` the centre line of the s chart,
    ``equal_sizes`` whether every baseline subgroup had the same size (which
    formula gave them), ``n`` the number of baseline subgroups.
    """

    center: float
    s_bar: float
    equal_sizes: bool
    n: int

    def xbar_limits(self, size: int) -> tuple[float, float]:
        """(LCL, UCL) of the x-bar chart for a subgroup of ``size`` values: centre -+ A3 s_bar."""
        half = a3(size) * self.s_bar
        return self.center - half, self.center + half

    def s_limits(self, size: int) -> tuple[float, float]:
        """(LCL, UCL) of the s chart for a subgroup of ``size`` values: B3 s_bar, B4 s_bar."""
        return b3(size) * self.s_bar, b4(size) * self.s_bar


def subgroup_limits(groups: Sequence[Sequence[float]]) -> SubgroupLimits:
    """Centre lines of the x-bar and s charts from baseline subgroups (each of at least 2 values).

    Notes
    -----
    Equal sizes n ([NIST]_ 6.3.2.1, [MONT]_ section 6.3.1): x_double_bar = mean of
    the subgroup means, s_bar = mean of the subgroup standard deviations; x-bar
    chart limits x_double_bar +- A3 s_bar, s chart limits B3 s_bar and B4 s_bar.

    Unequal sizes n_i ([MONT]_ section 6.3.2, "variable sample size"): the grand
    mean is weighted by size, x_double_bar = sum n_i x_bar_i / sum n_i, and s_bar is
    pooled, s_bar = sqrt( sum (n_i - 1) s_i^2 / (sum n_i - m) ) over the m
    subgroups; each subgroup's limits use A3, B3 and B4 of its own n_i, so they
    step with the size. The centre line of the s chart is s_bar in both cases.
    """
    if not groups:
        raise ValueError("x-bar and s limits need at least one subgroup")
    sizes = [len(g) for g in groups]
    if min(sizes) < 2:
        raise ValueError("every subgroup needs at least 2 values for an s chart")
    means = [mean(g) for g in groups]
    sds = [sample_sd(g) for g in groups]
    if len(set(sizes)) == 1:
        return SubgroupLimits(mean(means), mean(sds), True, len(groups))
    total = sum(sizes)
    center = math.fsum(n * m for n, m in zip(sizes, means)) / total
    pooled = math.fsum((n - 1) * s * s for n, s in zip(sizes, sds)) / (total - len(groups))
    return SubgroupLimits(center, math.sqrt(pooled), False, len(groups))


# ---------------------------------------------------------------- zone rules


def zone_rules(values: Sequence[float], center: float, sigma: float) -> list[list[str]]:
    """The Western Electric zone rules flagged at each point, as codes of :data:`ZONE_RULES`.

    Parameters
    ----------
    values
        The points, in time order (one run of points under the same centre and sigma).
    center, sigma
        The centre line and the standard deviation that defines the zones.

    Returns
    -------
    list of list of str
        For each point, the rules it completes (empty when none).

    Notes
    -----
    With z_i = (x_i - centre) / sigma, a point is flagged by ([WE]_; the same four
    tests are listed in [NIST]_ 6.3.2 and [MONT]_ section 5.3.6):

    - WE1: |z_i| > 3;
    - WE2: z_i > 2 and at least 2 of z_(i-2), z_(i-1), z_i are > 2 (or the same
      below -2);
    - WE3: z_i > 1 and at least 4 of z_(i-4) .. z_i are > 1 (or below -1);
    - WE4: z_(i-7) .. z_i are all > 0 (or all < 0).

    "Beyond" is strict: a point on a zone boundary is not beyond it. A point is
    flagged only when it is itself part of the pattern, so a pattern is flagged
    first at the point that completes it. At the start of a sequence a window holds
    the points there are (two points beyond 2 sigma in a row complete WE2). With
    ``sigma`` not positive no zone can be drawn and no point is flagged.
    """
    if not (sigma > 0) or not math.isfinite(sigma):
        return [[] for _ in values]
    z = [(v - center) / sigma for v in values]
    flags: list[list[str]] = []
    for i, zi in enumerate(z):
        found = []
        if abs(zi) > 3.0:
            found.append("WE1")
        for side in (1.0, -1.0):
            s = [side * v for v in z[max(0, i - 7) : i + 1]]
            here = s[-1]
            if here > 2.0 and sum(v > 2.0 for v in s[-3:]) >= 2 and "WE2" not in found:
                found.append("WE2")
            if here > 1.0 and sum(v > 1.0 for v in s[-5:]) >= 4 and "WE3" not in found:
                found.append("WE3")
            if len(s) == 8 and all(v > 0.0 for v in s) and "WE4" not in found:
                found.append("WE4")
        flags.append(sorted(found))
    return flags


# ---------------------------------------------------------------- capability


@dataclass(frozen=True)
class Capability:
    """Process capability and performance indices; None where a limit or sigma is missing.

    ``cp``/``pp`` need both limits; ``cpk``/``ppk`` are the smaller one-sided index
    (the only one with a one-sided limit).
    """

    cp: float | None
    cpk: float | None
    pp: float | None
    ppk: float | None


def _indices(
    centre: float, sigma: float | None, low: float | None, high: float | None
) -> tuple[float | None, float | None]:
    if sigma is None or not (sigma > 0) or not math.isfinite(sigma):
        return None, None
    one_sided = []
    if high is not None:
        one_sided.append((high - centre) / (3.0 * sigma))
    if low is not None:
        one_sided.append((centre - low) / (3.0 * sigma))
    spread = (high - low) / (6.0 * sigma) if high is not None and low is not None else None
    return spread, (min(one_sided) if one_sided else None)


def capability(
    centre: float,
    sigma_within: float | None,
    sigma_overall: float | None,
    low: float | None,
    high: float | None,
) -> Capability:
    """Cp, Cpk (with sigma_within) and Pp, Ppk (with sigma_overall) against specification limits.

    Parameters
    ----------
    centre
        The process mean.
    sigma_within
        The short-term (within) standard deviation, e.g. MR_bar / d2.
    sigma_overall
        The overall sample standard deviation (n - 1).
    low, high
        The lower and upper specification limits; either may be None (one-sided).

    Notes
    -----
    Cp = (USL - LSL) / (6 sigma_within), Cpk = min(CPU, CPL) with
    CPU = (USL - mu) / (3 sigma_within) and CPL = (mu - LSL) / (3 sigma_within);
    Pp and Ppk are the same with sigma_overall ([MONT]_ chapter 8; [NIST]_ 6.1.6).
    With one limit only the one-sided index is defined: Cp and Pp are None and Cpk
    (Ppk) is CPU or CPL.
    """
    cp, cpk = _indices(centre, sigma_within, low, high)
    pp, ppk = _indices(centre, sigma_overall, low, high)
    return Capability(cp=cp, cpk=cpk, pp=pp, ppk=ppk)
