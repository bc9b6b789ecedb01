"""The validation study's statistics against published results and independent libraries.

* A published worked example: the measurement-systems capability study of Montgomery,
  *Design and Analysis of Experiments* (8th ed., Wiley 2013), Example 13.2: 20 parts, 3
  operators, 2 measurements each (its Table 13.1), with its printed ANOVA (Table 13.2), its
  variance components (one of them negative), and its reduced model without the interaction
  (Table 13.3). The same model is taught in Penn State's STAT 503, lesson 13.2
  (https://online.stat.psu.edu/stat503/lesson/13/13.2). The printed values were not open
  here: the numbers below are as recalled from the book (from memory), and agree with the
  computation to every printed digit.
* An independent library: statsmodels' ``anova_lm`` on ``value ~ C(part) * C(operator)``
  (ordinary least squares), on that data and on the thermal-impedance gauge study of Houf and
  Burman (1988) as printed in the SAS/STAT documentation, PROC VARCOMP, Example "Using the GRR
  Method" (https://support.sas.com/documentation/cdl/en/statug/68162/HTML/default/statug_varcomp_examples02.htm),
  whose interaction is significant (not pooled).
* scipy.stats for the bias interval (``ttest_1samp``) and the linearity line (``linregress``);
  statsmodels' OLS prediction interval of the mean for the linearity band.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats as sps
from statsmodels.stats.anova import anova_lm

from lotproof.runner.study.stats import bias_test, gauge_rr, linearity

# source: Montgomery, Design and Analysis of Experiments, Example 13.2, Table 13.1: parts 1..20
# in order; for each operator its first and second measurement of every part
MONTGOMERY_FIRST = {
    1: [21, 24, 20, 27, 19, 23, 22, 19, 24, 25, 21, 18, 23, 24, 29, 26, 20, 19, 25, 19],
    2: [20, 24, 19, 28, 19, 24, 22, 18, 25, 26, 20, 17, 25, 23, 30, 25, 19, 19, 25, 18],
    3: [19, 23, 20, 27, 18, 23, 22, 19, 24, 24, 21, 18, 25, 24, 31, 25, 20, 21, 25, 19],
}
MONTGOMERY_SECOND = {
    1: [20, 23, 21, 27, 18, 21, 21, 17, 23, 23, 20, 19, 25, 24, 30, 26, 20, 21, 26, 19],
    2: [20, 24, 21, 26, 18, 21, 24, 20, 23, 25, 20, 19, 25, 25, 28, 26, 20, 19, 24, 17],
    3: [21, 24, 22, 28, 21, 22, 20, 18, 24, 25, 20, 19, 25, 25, 30, 27, 20, 23, 25, 17],
}

# source: SAS/STAT PROC VARCOMP, Example "Using the GRR Method" (data of Houf and Burman, 1988):
# part -> operator 1, 2, 3, three measurements each
HOUF = [
    [37, 38, 37, 41, 41, 40, 41, 42, 41],
    [42, 41, 43, 42, 42, 42, 43, 42, 43],
    [30, 31, 31, 31, 31, 31, 29, 30, 28],
    [42, 43, 42, 43, 43, 43, 42, 42, 42],
    [28, 30, 29, 29, 30, 29, 31, 29, 29],
    [42, 42, 43, 45, 45, 45, 44, 46, 45],
    [25, 26, 27, 28, 28, 30, 29, 27, 27],
    [40, 40, 40, 43, 42, 42, 43, 43, 41],
    [25, 25, 25, 27, 29, 28, 26, 26, 26],
    [35, 34, 34, 35, 35, 34, 35, 34, 35],
]


def montgomery() -> np.ndarray:
    """(20 parts, 3 operators, 2 measurements)."""
    first = np.array([MONTGOMERY_FIRST[o] for o in (1, 2, 3)]).T
    second = np.array([MONTGOMERY_SECOND[o] for o in (1, 2, 3)]).T
    return np.stack([first, second], axis=2).astype(float)


def houf() -> np.ndarray:
    """(10 parts, 3 operators, 3 measurements)."""
    return np.array(HOUF, dtype=float).reshape(10, 3, 3)


def test_montgomery_anova_table_as_printed() -> None:
    result = gauge_rr(montgomery())
    rows = {row.source: row for row in result.anova}
    # source: Montgomery, DAE 8th ed., Table 13.2 (printed to two decimals; from memory)
    assert [rows[s].df for s in ("part", "operator", "part x operator", "repeatability")] == [
        19,
        2,
        38,
        60,
    ]
    assert rows["part"].ss == pytest.approx(1185.43, abs=0.005)
    assert rows["operator"].ss == pytest.approx(2.62, abs=0.005)
    assert rows["part x operator"].ss == pytest.approx(27.05, abs=0.005)
    assert rows["repeatability"].ss == pytest.approx(59.50, abs=0.005)
    assert rows["total"].ss == pytest.approx(1274.59, abs=0.005)
    assert rows["part"].ms == pytest.approx(62.39, abs=0.005)
    assert rows["operator"].ms == pytest.approx(1.31, abs=0.005)
    assert rows["part x operator"].ms == pytest.approx(0.71, abs=0.005)
    assert rows["repeatability"].ms == pytest.approx(0.99, abs=0.005)
    # the random-effects F tests: parts and operators against the interaction
    assert rows["part"].f == pytest.approx(87.65, abs=0.005)
    assert rows["operator"].f == pytest.approx(1.84, abs=0.005)
    assert rows["part x operator"].f == pytest.approx(0.72, abs=0.005)
    # (the book's P-value of the interaction, recalled as 0.86: far above 0.25)
    assert rows["part x operator"].p == pytest.approx(0.86, abs=0.005)


def test_montgomery_variance_components_negative_then_pooled() -> None:
    result = gauge_rr(montgomery())
    full = result.estimates_with_interaction
    # source: Montgomery, DAE 8th ed., Example 13.2: the interaction's estimate is negative
    # (from memory, two decimals)
    assert full["part"] == pytest.approx(10.28, abs=0.005)
    assert full["operator"] == pytest.approx(0.015, abs=0.0005)
    assert full["part x operator"] == pytest.approx(-0.14, abs=0.005)
    assert full["repeatability"] == pytest.approx(0.99, abs=0.005)
    # its p-value is far above 0.25: the interaction is pooled (common practice), as the book
    # does with its reduced model (Table 13.3)
    assert result.pooled and result.set_to_zero == ()
    assert result.variances["part"] == pytest.approx(10.25, abs=0.005)
    assert result.variances["operator"] == pytest.approx(0.0106, abs=0.00005)
    assert result.variances["repeatability"] == pytest.approx(0.88, abs=0.005)
    assert result.variances["part x operator"] == 0.0
    pooled = {row.source: row for row in result.anova_pooled or ()}
    assert pooled["repeatability"].df == 98


def test_montgomery_without_pooling_sets_the_negative_component_to_zero() -> None:
    # pool_above=1: the interaction is kept whatever its p-value; its negative estimate
    # (-0.14, above) is reported as 0 and named
    result = gauge_rr(montgomery(), pool_above=1.0)
    assert not result.pooled
    assert result.set_to_zero == ("part x operator",)
    assert result.variances["part x operator"] == 0.0
    assert result.estimates["part x operator"] == pytest.approx(-0.14, abs=0.005)
    assert result.interaction_sd == 0.0


def test_montgomery_grr_percentages_and_ndc_from_the_printed_components() -> None:
    result = gauge_rr(montgomery(), tolerance=55.0)
    # source: closed form on the printed reduced-model components (Table 13.3):
    # GRR = sqrt(0.88 + 0.0106), PV = sqrt(10.25); AIAG: %GRR of tolerance = 100 * 6 GRR / 55,
    # %GRR of total = 100 GRR / sqrt(GRR^2 + PV^2), ndc = floor(1.41 PV / GRR)
    grr = math.sqrt(0.88 + 0.0106)
    pv = math.sqrt(10.25)
    assert result.grr_sd == pytest.approx(grr, abs=0.003)
    assert result.part_sd == pytest.approx(pv, abs=0.003)
    assert result.grr_percent_tolerance == pytest.approx(100 * 6 * grr / 55, abs=0.05)
    assert result.grr_percent_total == pytest.approx(100 * grr / math.hypot(grr, pv), abs=0.05)
    assert result.ndc == math.floor(1.41 * pv / grr) == 4


def _frame(values: np.ndarray) -> pd.DataFrame:
    p, o, r = values.shape
    return pd.DataFrame(
        {
            "part": np.repeat(np.arange(p), o * r),
            "operator": np.tile(np.repeat(np.arange(o), r), p),
            "value": values.reshape(-1),
        }
    )


@pytest.mark.parametrize("data", [montgomery, houf], ids=["montgomery", "houf-burman"])
def test_anova_equals_statsmodels(data: object) -> None:
    values = data()  # type: ignore[operator]
    model = smf.ols("value ~ C(part) * C(operator)", data=_frame(values)).fit()
    # source: statsmodels anova_lm (a balanced design: every type of sums of squares agrees)
    table = anova_lm(model, typ=2)
    theirs = {
        "part": table.loc["C(part)"],
        "operator": table.loc["C(operator)"],
        "part x operator": table.loc["C(part):C(operator)"],
        "repeatability": table.loc["Residual"],
    }
    ours = {row.source: row for row in gauge_rr(values, pool_above=1.0).anova}
    for source, row in theirs.items():
        assert ours[source].df == int(row["df"]), source
        assert ours[source].ss == pytest.approx(row["sum_sq"], rel=1e-9), source
        assert ours[source].ms == pytest.approx(row["sum_sq"] / row["df"], rel=1e-9), source
    # the interaction is tested against the residual in both (the main effects are not:
    # lotproof's random-effects model tests them against the interaction)
    assert ours["part x operator"].f == pytest.approx(theirs["part x operator"]["F"], rel=1e-9)
    assert ours["part x operator"].p == pytest.approx(theirs["part x operator"]["PR(>F)"], rel=1e-6)


def test_houf_burman_interaction_is_kept_and_components_follow_the_mean_squares() -> None:
    result = gauge_rr(houf(), tolerance=58.0 - 18.0)
    rows = {row.source: row for row in result.anova}
    assert not result.pooled and result.interaction_p < 0.25  # type: ignore[operator]
    ms_p, ms_o = rows["part"].ms, rows["operator"].ms
    ms_po, ms_e = rows["part x operator"].ms, rows["repeatability"].ms
    assert None not in (ms_p, ms_o, ms_po, ms_e)
    # source: the expected mean squares of the two-way random model (SAS/STAT PROC VARCOMP,
    # "Gauge Repeatability and Reproducibility Analysis", Table "GRR Analysis of Variance")
    assert result.variances["repeatability"] == pytest.approx(ms_e)  # type: ignore[arg-type]
    assert result.variances["part x operator"] == pytest.approx((ms_po - ms_e) / 3)  # type: ignore[operator]
    assert result.variances["operator"] == pytest.approx((ms_o - ms_po) / 30)  # type: ignore[operator]
    assert result.variances["part"] == pytest.approx((ms_p - ms_po) / 9)  # type: ignore[operator]
    assert result.reproducibility_sd == pytest.approx(
        math.sqrt(result.variances["operator"] + result.variances["part x operator"])
    )
    assert result.grr_percent_tolerance == pytest.approx(100 * 6 * result.grr_sd / 40)


def test_bias_interval_equals_scipy() -> None:
    rng = np.random.default_rng(2701)
    known = np.full(7, 0.06) + rng.normal(0, 0.0005, 7)
    measured = known + 0.0008 + rng.normal(0, 0.0006, 7)
    ours = bias_test(measured, known, confidence=0.95)
    # source: scipy.stats.ttest_1samp of the differences against 0, and its confidence interval
    theirs = sps.ttest_1samp(measured - known, 0.0)
    interval = theirs.confidence_interval(0.95)
    assert ours.t == pytest.approx(float(theirs.statistic), rel=1e-12)
    assert ours.p == pytest.approx(float(theirs.pvalue), rel=1e-9)
    assert ours.ci_low == pytest.approx(float(interval.low), rel=1e-12)
    assert ours.ci_high == pytest.approx(float(interval.high), rel=1e-12)
    assert ours.significant == (float(theirs.pvalue) < 0.05)
    ninety = theirs.confidence_interval(0.90)
    assert bias_test(measured, known, confidence=0.90).ci_low == pytest.approx(float(ninety.low))


def test_linearity_equals_scipy_and_the_band_statsmodels() -> None:
    rng = np.random.default_rng(2702)
    reference = np.repeat([0.03, 0.06, 0.09, 0.12], 5) + rng.normal(0, 0.0003, 20)
    bias = -0.0004 - 0.004 * reference + rng.normal(0, 0.0005, 20)
    ours = linearity(reference, bias, confidence=0.95, band_points=7)
    # source: scipy.stats.linregress (slope, intercept, r, their standard errors)
    theirs = sps.linregress(reference, bias)
    q = sps.t.ppf(0.975, 18)
    assert ours.slope == pytest.approx(theirs.slope, rel=1e-10)
    assert ours.intercept == pytest.approx(theirs.intercept, rel=1e-10)
    assert ours.r_squared == pytest.approx(theirs.rvalue**2, rel=1e-10)
    assert ours.slope_se == pytest.approx(theirs.stderr, rel=1e-10)
    assert ours.intercept_se == pytest.approx(theirs.intercept_stderr, rel=1e-10)
    assert ours.slope_ci[0] == pytest.approx(theirs.slope - q * theirs.stderr, rel=1e-10)
    assert ours.slope_ci[1] == pytest.approx(theirs.slope + q * theirs.stderr, rel=1e-10)
    assert ours.slope_p == pytest.approx(theirs.pvalue, rel=1e-8)
    # source: statsmodels OLS, get_prediction(...).summary_frame: the interval of the mean line
    fit = sm.OLS(bias, sm.add_constant(reference)).fit()
    grid = np.array([b[0] for b in ours.band])
    frame = fit.get_prediction(sm.add_constant(grid)).summary_frame(alpha=0.05)
    for (_, line, low, high), (_, row) in zip(ours.band, frame.iterrows(), strict=True):
        assert line == pytest.approx(row["mean"], rel=1e-9)
        assert low == pytest.approx(row["mean_ci_lower"], rel=1e-9)
        assert high == pytest.approx(row["mean_ci_upper"], rel=1e-9)
