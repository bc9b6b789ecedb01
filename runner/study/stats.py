"""The statistics of a validation study, as pure functions of numbers.

* :func:`gauge_rr`: precision by the ANOVA method: a two-way crossed analysis of
  variance of parts x operators with replicates, its variance components, %GRR and
  the number of distinct categories;
* :func:`bias_test`: trueness on one reference: bias with its t confidence interval;
* :func:`linearity`: bias against reference value, a least-squares line with
  confidence intervals and R².

Nothing here reads files or knows about images; the F and t distributions come
from :mod:`scipy.stats`. Every result is a frozen dataclass with ``as_dict()``
giving plain JSON-ready numbers (``None`` where a number is undefined).

References
----------
.. [1] D. C. Montgomery, *Design and Analysis of Experiments*, 8th ed., Wiley, 2013,
   section 13.2 (two-factor factorial with random factors; Example 13.2 is a
   measurement-systems capability study).
.. [2] Automotive Industry Action Group, *Measurement Systems Analysis*, 4th ed.,
   2010, chapter III (ANOVA method, %GRR, number of distinct categories, bias and
   linearity studies).
.. [3] R. K. Burdick, C. M. Borror and D. C. Montgomery, *Design and Analysis of
   Gauge R&R Studies*, ASA-SIAM, 2005, chapter 3 (pooling a non-significant
   interaction).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = [
    "NDC_FACTOR",
    "POOL_ABOVE",
    "STUDY_VARIATION",
    "AnovaRow",
    "BiasResult",
    "GaugeResult",
    "LinearityResult",
    "bias_test",
    "gauge_rr",
    "linearity",
]

#: the interaction is pooled into repeatability when its p-value is above this (common practice)
POOL_ABOVE = 0.25
#: standard deviations in a study variation: %GRR of tolerance = 100 * 6 GRR / (USL - LSL)
STUDY_VARIATION = 6.0
#: ndc = floor(NDC_FACTOR * PV / GRR); 1.41 is the published rounding of sqrt(2)
NDC_FACTOR = 1.41

#: names of the ANOVA rows, in table order
PART, OPERATOR, INTERACTION, REPEATABILITY, TOTAL = (
    "part",
    "operator",
    "part x operator",
    "repeatability",
    "total",
)


def _number(value: float | None) -> float | None:
    """A JSON-ready float: None for None, NaN or an infinity."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


@dataclass(frozen=True)
class AnovaRow:
    """One row of an analysis of variance table; ``ms``, ``f``, ``p`` are None where undefined."""

    source: str
    df: int
    ss: float
    ms: float | None = None
    f: float | None = None
    p: float | None = None
    #: the mean square the F ratio divides by (the source's name), or None
    tested_against: str | None = None

    def as_dict(self) -> dict[str, Any]:
        return {
            "source": self.source,
            "df": self.df,
            "ss": _number(self.ss),
            "ms": _number(self.ms),
            "f": _number(self.f),
            "p": _number(self.p),
            "tested_against": self.tested_against,
        }


@dataclass(frozen=True)
class GaugeResult:
    """What :func:`gauge_rr` found; standard deviations are in the unit of the measurements."""

    parts: int
    operators: int
    replicates: int
    #: the model with interaction, F tests of the random-effects model
    anova: tuple[AnovaRow, ...]
    #: the model without interaction (repeatability pooled with it), when it was pooled
    anova_pooled: tuple[AnovaRow, ...] | None
    interaction_p: float | None
    pool_above: float
    pooled: bool
    #: variance components after negatives were set to 0: repeatability, operator,
    #: interaction, part
    variances: dict[str, float]
    #: the same before that (what the expected mean squares give)
    estimates: dict[str, float]
    #: the estimates of the model with interaction, whether or not it was pooled
    estimates_with_interaction: dict[str, float]
    #: components whose estimate was negative and is reported as 0
    set_to_zero: tuple[str, ...]
    repeatability_sd: float
    operator_sd: float
    interaction_sd: float
    reproducibility_sd: float
    grr_sd: float
    part_sd: float
    total_sd: float
    tolerance: float | None
    grr_percent_tolerance: float | None
    grr_percent_total: float | None
    ndc: int | None

    @property
    def interaction_rule(self) -> str:
        """What was done with the interaction, in words."""
        if self.interaction_p is None:
            return "interaction not tested (no variation within cells); not pooled"
        if self.pooled:
            return (
                f"interaction p = {self.interaction_p:.4g} > {self.pool_above:g}: pooled into "
                "repeatability (model without interaction)"
            )
        return (
            f"interaction p = {self.interaction_p:.4g} <= {self.pool_above:g}: kept "
            "(model with interaction; its variance is part of reproducibility)"
        )

    def as_dict(self) -> dict[str, Any]:
        return {
            "parts": self.parts,
            "operators": self.operators,
            "replicates": self.replicates,
            "repeatability_sd": _number(self.repeatability_sd),
            "reproducibility_sd": _number(self.reproducibility_sd),
            "operator_sd": _number(self.operator_sd),
            "interaction_sd": _number(self.interaction_sd),
            "grr_sd": _number(self.grr_sd),
            "part_sd": _number(self.part_sd),
            "total_sd": _number(self.total_sd),
            "tolerance": _number(self.tolerance),
            "grr_percent_tolerance": _number(self.grr_percent_tolerance),
            "grr_percent_total": _number(self.grr_percent_total),
            "ndc": self.ndc,
            "interaction": {
                "p": _number(self.interaction_p),
                "pool_above": self.pool_above,
                "pooled": self.pooled,
                "rule": self.interaction_rule,
            },
            "variance_components": {k: _number(v) for k, v in self.variances.items()},
            "variance_estimates": {k: _number(v) for k, v in self.estimates.items()},
            "variance_estimates_with_interaction": {
                k: _number(v) for k, v in self.estimates_with_interaction.items()
            },
            "set_to_zero": list(self.set_to_zero),
            "anova": [row.as_dict() for row in self.anova],
            "anova_pooled": (
                None if self.anova_pooled is None else [row.as_dict() for row in self.anova_pooled]
            ),
            "study_variation": STUDY_VARIATION,
            "ndc_factor": NDC_FACTOR,
        }


def _f_test(ms: float, denominator: float, df: int, df_denominator: int) -> tuple[float, float]:
    """F ratio and its upper-tail p-value; a zero denominator gives inf (p 0) or NaN (p NaN)."""
    from scipy import stats

    if denominator > 0:
        f = ms / denominator
        return f, float(stats.f.sf(f, df, df_denominator))
    if ms > 0:
        return math.inf, 0.0
    return math.nan, math.nan


def gauge_rr(
    values: npt.ArrayLike,
    *,
    tolerance: float | None = None,
    pool_above: float = POOL_ABOVE,
) -> GaugeResult:
    """Gauge repeatability and reproducibility by the two-way ANOVA method.

    Parameters
    ----------
    values : array_like, shape (p, o, r)
        ``values[i, j, k]`` is replicate ``k`` of operator ``j`` on part ``i``: a
        balanced, crossed design with p >= 2 parts, o >= 2 operators and r >= 2
        replicates, every value finite.
    tolerance : float, optional
        USL - LSL, in the unit of the values (> 0); without it %GRR of tolerance is None.
    pool_above : float
        The interaction is pooled into repeatability when its p-value is above this
        (0.25 by common practice).

    Returns
    -------
    GaugeResult

    Notes
    -----
    With grand mean ȳ, part means ȳᵢ.., operator means ȳ.ⱼ. and cell means ȳᵢⱼ.::

        SS_P  = o r Σᵢ (ȳᵢ.. - ȳ)²                    df p - 1
        SS_O  = p r Σⱼ (ȳ.ⱼ. - ȳ)²                    df o - 1
        SS_PO = r Σᵢⱼ (ȳᵢⱼ. - ȳᵢ.. - ȳ.ⱼ. + ȳ)²       df (p - 1)(o - 1)
        SS_E  = Σᵢⱼₖ (yᵢⱼₖ - ȳᵢⱼ.)²                   df p o (r - 1)

    and MS = SS / df. In the random-effects model the expected mean squares are
    E(MS_E) = σ², E(MS_PO) = σ² + r σ²_PO, E(MS_O) = σ² + r σ²_PO + p r σ²_O and
    E(MS_P) = σ² + r σ²_PO + o r σ²_P, so the parts and operators are tested against
    MS_PO and the interaction against MS_E ([1]_, section 13.2), and::

        σ²_E = MS_E,   σ²_PO = (MS_PO - MS_E) / r,
        σ²_O = (MS_O - MS_PO) / (p r),   σ²_P = (MS_P - MS_PO) / (o r).

    When the interaction's p-value is above ``pool_above`` it is pooled: SS_E and
    SS_PO (and their df) are added into one repeatability term MS_E', parts and
    operators are tested against it, σ²_PO = 0, σ²_E = MS_E',
    σ²_O = (MS_O - MS_E') / (p r) and σ²_P = (MS_P - MS_E') / (o r) ([3]_). A
    negative estimate is set to 0 and named in ``set_to_zero``; the estimates of the
    model with interaction are kept either way (``estimates_with_interaction``).

    Then (AIAG [2]_): EV = σ_E (repeatability), AV = sqrt(σ²_O + σ²_PO)
    (reproducibility, the interaction included when it is kept),
    GRR = sqrt(EV² + AV²), PV = σ_P, TV = sqrt(GRR² + PV²),
    %GRR of tolerance = 100 · 6 GRR / (USL - LSL), %GRR of total variation =
    100 · GRR / TV and ndc = floor(1.41 PV / GRR) (None when GRR = 0).

    Raises
    ------
    ValueError
        For another shape, fewer than 2 levels of a factor, a value that is not
        finite, or a tolerance that is not > 0.
    """
    data = np.asarray(values, dtype=np.float64)
    if data.ndim != 3:
        raise ValueError(
            f"values must have the shape (parts, operators, replicates), got {data.shape}"
        )
    p, o, r = data.shape
    if p < 2 or o < 2 or r < 2:
        raise ValueError(
            f"a gauge study needs at least 2 parts, 2 operators and 2 replicates; got {p}, {o}, {r}"
        )
    if not bool(np.isfinite(data).all()):
        raise ValueError("every value of a gauge study must be finite")
    if tolerance is not None and not (math.isfinite(tolerance) and tolerance > 0):
        raise ValueError(f"the tolerance must be > 0, got {tolerance!r}")

    grand = float(data.mean())
    part_means = data.mean(axis=(1, 2))
    operator_means = data.mean(axis=(0, 2))
    cell_means = data.mean(axis=2)
    ss_p = o * r * float(np.sum((part_means - grand) ** 2))
    ss_o = p * r * float(np.sum((operator_means - grand) ** 2))
    interaction = cell_means - part_means[:, None] - operator_means[None, :] + grand
    ss_po = r * float(np.sum(interaction**2))
    ss_e = float(np.sum((data - cell_means[:, :, None]) ** 2))
    ss_t = float(np.sum((data - grand) ** 2))
    df_p, df_o, df_po, df_e = p - 1, o - 1, (p - 1) * (o - 1), p * o * (r - 1)
    ms_p, ms_o, ms_po, ms_e = ss_p / df_p, ss_o / df_o, ss_po / df_po, ss_e / df_e

    f_p, p_p = _f_test(ms_p, ms_po, df_p, df_po)
    f_o, p_o = _f_test(ms_o, ms_po, df_o, df_po)
    f_po, p_po = _f_test(ms_po, ms_e, df_po, df_e)
    anova = (
        AnovaRow(PART, df_p, ss_p, ms_p, f_p, p_p, INTERACTION),
        AnovaRow(OPERATOR, df_o, ss_o, ms_o, f_o, p_o, INTERACTION),
        AnovaRow(INTERACTION, df_po, ss_po, ms_po, f_po, p_po, REPEATABILITY),
        AnovaRow(REPEATABILITY, df_e, ss_e, ms_e),
        AnovaRow(TOTAL, p * o * r - 1, ss_t),
    )
    interaction_p = None if math.isnan(p_po) else p_po
    pooled = interaction_p is not None and interaction_p > pool_above

    with_interaction = {
        REPEATABILITY: ms_e,
        OPERATOR: (ms_o - ms_po) / (p * r),
        INTERACTION: (ms_po - ms_e) / r,
        PART: (ms_p - ms_po) / (o * r),
    }
    anova_pooled: tuple[AnovaRow, ...] | None = None
    if pooled:
        df_pooled = df_po + df_e
        ms_pooled = (ss_po + ss_e) / df_pooled
        f_p2, p_p2 = _f_test(ms_p, ms_pooled, df_p, df_pooled)
        f_o2, p_o2 = _f_test(ms_o, ms_pooled, df_o, df_pooled)
        anova_pooled = (
            AnovaRow(PART, df_p, ss_p, ms_p, f_p2, p_p2, REPEATABILITY),
            AnovaRow(OPERATOR, df_o, ss_o, ms_o, f_o2, p_o2, REPEATABILITY),
            AnovaRow(REPEATABILITY, df_pooled, ss_po + ss_e, ms_pooled),
            AnovaRow(TOTAL, p * o * r - 1, ss_t),
        )
        estimates = {
            REPEATABILITY: ms_pooled,
            OPERATOR: (ms_o - ms_pooled) / (p * r),
            INTERACTION: 0.0,
            PART: (ms_p - ms_pooled) / (o * r),
        }
    else:
        estimates = dict(with_interaction)
    set_to_zero = tuple(name for name, v in estimates.items() if v < 0)
    variances = {name: max(v, 0.0) for name, v in estimates.items()}

    ev2 = variances[REPEATABILITY]
    av2 = variances[OPERATOR] + variances[INTERACTION]
    grr2 = ev2 + av2
    pv2 = variances[PART]
    tv2 = grr2 + pv2
    grr, pv, tv = math.sqrt(grr2), math.sqrt(pv2), math.sqrt(tv2)
    return GaugeResult(
        parts=p,
        operators=o,
        replicates=r,
        anova=anova,
        anova_pooled=anova_pooled,
        interaction_p=interaction_p,
        pool_above=pool_above,
        pooled=pooled,
        variances=variances,
        estimates=estimates,
        estimates_with_interaction=with_interaction,
        set_to_zero=set_to_zero,
        repeatability_sd=math.sqrt(ev2),
        operator_sd=math.sqrt(variances[OPERATOR]),
        interaction_sd=math.sqrt(variances[INTERACTION]),
        reproducibility_sd=math.sqrt(av2),
        grr_sd=grr,
        part_sd=pv,
        total_sd=tv,
        tolerance=tolerance,
        grr_percent_tolerance=(
            None if tolerance is None else 100.0 * STUDY_VARIATION * grr / tolerance
        ),
        grr_percent_total=None if tv == 0 else 100.0 * grr / tv,
        ndc=None if grr == 0 else math.floor(NDC_FACTOR * pv / grr),
    )


# ---------------------------------------------------------------- trueness


@dataclass(frozen=True)
class BiasResult:
    """What :func:`bias_test` found for one reference."""

    n: int
    reference: float
    mean: float
    bias: float
    sd: float
    t: float | None
    p: float | None
    confidence: float
    ci_low: float
    ci_high: float

    @property
    def significant(self) -> bool:
        """The confidence interval of the bias leaves out 0."""
        return self.ci_low > 0 or self.ci_high < 0

    def as_dict(self) -> dict[str, Any]:
        return {
            "n": self.n,
            "reference": _number(self.reference),
            "mean": _number(self.mean),
            "bias": _number(self.bias),
            "bias_percent_of_reference": (
                None if self.reference == 0 else _number(100.0 * self.bias / self.reference)
            ),
            "sd": _number(self.sd),
            "t": _number(self.t),
            "p": _number(self.p),
            "confidence": self.confidence,
            "ci_low": _number(self.ci_low),
            "ci_high": _number(self.ci_high),
            "significant": self.significant,
        }


def _t_quantile(confidence: float, df: int) -> float:
    from scipy import stats

    return float(stats.t.ppf(0.5 + confidence / 2.0, df))


def _check_confidence(confidence: float) -> None:
    if not (0.0 < confidence < 1.0):
        raise ValueError(f"a confidence level lies between 0 and 1, got {confidence!r}")


def bias_test(
    measured: Sequence[float] | npt.ArrayLike,
    known: Sequence[float] | npt.ArrayLike,
    *,
    confidence: float = 0.95,
) -> BiasResult:
    """Bias of repeated measurements of one reference, with its t confidence interval.

    Parameters
    ----------
    measured, known : array_like
        The measured values and the known (reference) value of each measurement, of
        one length n >= 2; ``known`` may be the same value n times or each image's own
        (a generated reference knows its truth per image).
    confidence : float
        Two-sided confidence level of the interval (0.95).

    Returns
    -------
    BiasResult

    Notes
    -----
    With differences dᵢ = measuredᵢ - knownᵢ, mean d̄ and standard deviation s
    (n - 1 in the denominator): bias = d̄, t = d̄ / (s / sqrt(n)) on n - 1 degrees of
    freedom, p = 2 P(T > |t|) and the interval d̄ ± t₍₁₋α/₂, n-1₎ s / sqrt(n), the
    one-sample t test of the differences against 0 (AIAG [2]_, bias study). The
    bias is significant when the interval leaves out 0 (p < 1 - confidence). When
    every difference is the same, s = 0: the interval is the bias itself, t is
    infinite (or None when the bias is 0 too).

    Raises
    ------
    ValueError
        For fewer than 2 measurements, lengths that differ or a value that is not finite.
    """
    from scipy import stats

    _check_confidence(confidence)
    y = np.asarray(measured, dtype=np.float64).ravel()
    x = np.asarray(known, dtype=np.float64).ravel()
    if y.shape != x.shape:
        raise ValueError(f"{y.size} measured values for {x.size} known values")
    n = int(y.size)
    if n < 2:
        raise ValueError(f"a bias test needs at least 2 measurements of a reference, got {n}")
    if not (bool(np.isfinite(y).all()) and bool(np.isfinite(x).all())):
        raise ValueError("every measured and known value must be finite")
    d = y - x
    bias = float(d.mean())
    sd = float(d.std(ddof=1))
    se = sd / math.sqrt(n)
    half = _t_quantile(confidence, n - 1) * se
    if se > 0:
        t: float | None = bias / se
        p: float | None = float(2.0 * stats.t.sf(abs(bias / se), n - 1))
    elif bias != 0:
        t, p = math.copysign(math.inf, bias), 0.0
    else:
        t, p = None, None
    return BiasResult(
        n=n,
        reference=float(x.mean()),
        mean=float(y.mean()),
        bias=bias,
        sd=sd,
        t=t,
        p=p,
        confidence=confidence,
        ci_low=bias - half,
        ci_high=bias + half,
    )


@dataclass(frozen=True)
class LinearityResult:
    """What :func:`linearity` found: bias = intercept + slope * reference."""

    n: int
    slope: float
    intercept: float
    slope_se: float
    intercept_se: float
    slope_ci: tuple[float, float]
    intercept_ci: tuple[float, float]
    slope_p: float | None
    intercept_p: float | None
    r_squared: float | None
    residual_sd: float
    confidence: float
    #: (reference, fitted bias, lower, upper) of the confidence band of the line
    band: tuple[tuple[float, float, float, float], ...] = field(default=())

    def as_dict(self) -> dict[str, Any]:
        return {
            "n": self.n,
            "slope": _number(self.slope),
            "intercept": _number(self.intercept),
            "slope_se": _number(self.slope_se),
            "intercept_se": _number(self.intercept_se),
            "slope_ci": [_number(v) for v in self.slope_ci],
            "intercept_ci": [_number(v) for v in self.intercept_ci],
            "slope_p": _number(self.slope_p),
            "intercept_p": _number(self.intercept_p),
            "r_squared": _number(self.r_squared),
            "residual_sd": _number(self.residual_sd),
            "confidence": self.confidence,
            "band": [
                {
                    "reference": _number(x),
                    "bias": _number(fit),
                    "low": _number(low),
                    "high": _number(high),
                }
                for x, fit, low, high in self.band
            ],
        }


def linearity(
    reference: Sequence[float] | npt.ArrayLike,
    bias: Sequence[float] | npt.ArrayLike,
    *,
    confidence: float = 0.95,
    band_points: int = 21,
) -> LinearityResult:
    """Linearity of a method: the least-squares line of bias against reference value.

    Parameters
    ----------
    reference : array_like
        The known value of each measurement (n >= 3, at least two different values).
    bias : array_like
        Each measurement's bias (measured - known), in the same order.
    confidence : float
        Two-sided confidence level of the intervals and the band (0.95).
    band_points : int
        Points of the confidence band, evenly spaced over the reference values.

    Returns
    -------
    LinearityResult

    Notes
    -----
    With x̄, ȳ the means, Sxx = Σ(x - x̄)², Sxy = Σ(x - x̄)(y - ȳ): slope b = Sxy / Sxx,
    intercept a = ȳ - b x̄, residual standard deviation s = sqrt(Σ(y - a - b x)² / (n - 2)),
    se(b) = s / sqrt(Sxx), se(a) = s sqrt(1/n + x̄² / Sxx); each interval is the
    estimate ± t₍₁₋α/₂, n-2₎ se, each p-value tests the coefficient against 0, and
    R² = 1 - Σ(y - a - b x)² / Σ(y - ȳ)² (None when every bias is the same). The
    band of the mean line at x is a + b x ± t s sqrt(1/n + (x - x̄)² / Sxx)
    (AIAG [2]_, linearity study; any regression text).

    Raises
    ------
    ValueError
        For fewer than 3 points, lengths that differ, a value that is not finite, or
        a single reference value (no line through one abscissa).
    """
    from scipy import stats

    _check_confidence(confidence)
    x = np.asarray(reference, dtype=np.float64).ravel()
    y = np.asarray(bias, dtype=np.float64).ravel()
    if x.shape != y.shape:
        raise ValueError(f"{x.size} reference values for {y.size} biases")
    n = int(x.size)
    if n < 3:
        raise ValueError(f"a linearity line needs at least 3 measurements, got {n}")
    if not (bool(np.isfinite(x).all()) and bool(np.isfinite(y).all())):
        raise ValueError("every reference value and bias must be finite")
    x_mean, y_mean = float(x.mean()), float(y.mean())
    sxx = float(np.sum((x - x_mean) ** 2))
    if sxx == 0:
        raise ValueError("a linearity line needs at least two different reference values")
    sxy = float(np.sum((x - x_mean) * (y - y_mean)))
    slope = sxy / sxx
    intercept = y_mean - slope * x_mean
    residuals = y - (intercept + slope * x)
    sse = float(np.sum(residuals**2))
    sst = float(np.sum((y - y_mean) ** 2))
    s = math.sqrt(sse / (n - 2))
    slope_se = s / math.sqrt(sxx)
    intercept_se = s * math.sqrt(1.0 / n + x_mean**2 / sxx)
    q = _t_quantile(confidence, n - 2)

    def p_value(estimate: float, se: float) -> float | None:
        if se > 0:
            return float(2.0 * stats.t.sf(abs(estimate / se), n - 2))
        return 0.0 if estimate != 0 else None

    grid = np.linspace(float(x.min()), float(x.max()), max(2, int(band_points)))
    band = tuple(
        (
            float(g),
            float(intercept + slope * g),
            float(intercept + slope * g - q * s * math.sqrt(1.0 / n + (g - x_mean) ** 2 / sxx)),
            float(intercept + slope * g + q * s * math.sqrt(1.0 / n + (g - x_mean) ** 2 / sxx)),
        )
        for g in grid
    )
    return LinearityResult(
        n=n,
        slope=slope,
        intercept=intercept,
        slope_se=slope_se,
        intercept_se=intercept_se,
        slope_ci=(slope - q * slope_se, slope + q * slope_se),
        intercept_ci=(intercept - q * intercept_se, intercept + q * intercept_se),
        slope_p=p_value(slope, slope_se),
        intercept_p=p_value(intercept, intercept_se),
        r_squared=None if sst == 0 else 1.0 - sse / sst,
        residual_sd=s,
        confidence=confidence,
        band=band,
    )
