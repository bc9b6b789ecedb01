"""Control-chart constants, limits, zone rules and capability against published tables and examples.

Each check names its source beside it. Where the source is a book whose printed
numbers were reached through a reproduction on the web, the reproduction's address
is given; numbers recalled rather than read are marked ``from memory``.
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
import scipy.special
import scipy.stats

from lotproof.runner.history.spc import (
    D2_MOVING_RANGE,
    D3_MOVING_RANGE,
    D4_MOVING_RANGE,
    a3,
    b3,
    b4,
    c4,
    capability,
    individuals_limits,
    mean,
    moving_ranges,
    sample_sd,
    subgroup_limits,
    zone_rules,
)

# source: D. C. Montgomery, Introduction to Statistical Quality Control, Appendix VI,
# "Factors for Constructing Variables Control Charts", as reproduced at
# https://www.scribd.com/document/375595366/Table-Control-Chart (the same values stand in
# the NIST/SEMATECH e-Handbook, section 6.3.2, and in ASTM E2587's table of factors)
#: n: (A3, c4, B3, B4)
FACTORS = {
    2: (2.659, 0.7979, 0.0, 3.267),
    3: (1.954, 0.8862, 0.0, 2.568),
    4: (1.628, 0.9213, 0.0, 2.266),
    5: (1.427, 0.9400, 0.0, 2.089),
    6: (1.287, 0.9515, 0.030, 1.970),
    7: (1.182, 0.9594, 0.118, 1.882),
    8: (1.099, 0.9650, 0.185, 1.815),
    9: (1.032, 0.9693, 0.239, 1.761),
    10: (0.975, 0.9727, 0.284, 1.716),
}


@pytest.mark.parametrize("n", sorted(FACTORS))
def test_subgroup_factors_match_the_published_table(n: int) -> None:
    table_a3, table_c4, table_b3, table_b4 = FACTORS[n]
    # the table prints c4 to 4 decimals and the others to 3: agree to its last digit
    assert abs(c4(n) - table_c4) <= 0.00005
    assert abs(a3(n) - table_a3) <= 0.0005
    assert abs(b3(n) - table_b3) <= 0.0005
    assert abs(b4(n) - table_b4) <= 0.0005


def test_moving_range_factors_match_the_published_table() -> None:
    # source: Montgomery, Appendix VI (scribd reproduction above): d2 = 1.128, d3 = 0.853,
    # D3 = 0, D4 = 3.267 for n = 2; NIST/SEMATECH e-Handbook 6.3.2 uses the same d2 and D4
    assert round(D2_MOVING_RANGE, 3) == 1.128
    assert round(D3_MOVING_RANGE, 3) == 0.853
    assert round(D4_MOVING_RANGE, 3) == 3.267
    assert 1 - 3 * D3_MOVING_RANGE / D2_MOVING_RANGE < 0  # so D3 = 0
    # independent check, scipy: |X1 - X2| of two standard normal values is half-normal
    # with scale sqrt(2); its mean is d2 and its standard deviation d3
    spread = scipy.stats.halfnorm(scale=math.sqrt(2))
    assert pytest.approx(spread.mean(), rel=1e-12) == D2_MOVING_RANGE
    assert pytest.approx(spread.std(), rel=1e-12) == D3_MOVING_RANGE


@pytest.mark.parametrize("n", [2, 3, 5, 10, 25, 50, 120])
def test_c4_against_scipy_gamma(n: int) -> None:
    # independent check: c4(n) = sqrt(2/(n-1)) Gamma(n/2) / Gamma((n-1)/2), with scipy's gamma
    expected = (
        math.sqrt(2 / (n - 1)) * scipy.special.gamma(n / 2) / scipy.special.gamma((n - 1) / 2)
    )
    assert c4(n) == pytest.approx(expected, rel=1e-12)


def test_c4_is_the_bias_of_the_sample_sd() -> None:
    # independent check: E[s] = c4 sigma for normal samples; the chi distribution with n - 1
    # degrees of freedom (scipy) gives E[s] / sigma = E[chi] / sqrt(n - 1)
    for n in (2, 4, 9):
        assert c4(n) == pytest.approx(scipy.stats.chi(n - 1).mean() / math.sqrt(n - 1), rel=1e-12)


def test_sample_sd_against_numpy_and_statistics() -> None:
    values = [0.2031, 0.1987, 0.2102, 0.1899, 0.2055, 0.1961, 0.2014]
    # independent checks: numpy (ddof=1) and Python's statistics module (n - 1)
    assert sample_sd(values) == pytest.approx(float(np.std(values, ddof=1)), rel=1e-14)
    assert sample_sd(values) == pytest.approx(statistics.stdev(values), rel=1e-14)
    assert mean(values) == pytest.approx(statistics.fmean(values), rel=1e-15)


# ---------------------------------------------------------------- individuals and moving range

# source: D. C. Montgomery and G. C. Runger, Applied Statistics and Probability for
# Engineers, section 16-6 "Control charts for individual measurements", Table 16-3
# (chemical process concentration), as reproduced at
# https://issuhub.com/view/index?id=5218&pageIndex=733 ; printed: x-bar = 99.1,
# mr-bar = 2.59, UCL = 105.99, LCL = 92.21 (computed from the rounded 99.1 and 2.59)
CONCENTRATION = [
    102.0, 94.8, 98.3, 98.4, 102.0, 98.5, 99.0, 97.7, 100.0, 98.1,
    101.3, 98.7, 101.1, 98.4, 97.0, 96.7, 100.3, 101.4, 97.2, 101.0,
]  # fmt: skip
#: the moving ranges printed beside the data in the same table
CONCENTRATION_MR = [
    7.2, 3.5, 0.1, 3.6, 3.5, 0.5, 1.3, 2.3, 1.9, 3.2,
    2.6, 2.4, 2.7, 1.4, 0.3, 3.6, 1.1, 4.2, 3.8,
]  # fmt: skip


def test_individuals_chart_worked_example() -> None:
    limits = individuals_limits(CONCENTRATION)
    assert moving_ranges(CONCENTRATION) == pytest.approx(CONCENTRATION_MR, abs=1e-9)
    assert round(limits.center, 1) == 99.1
    assert round(limits.mr_bar, 2) == 2.59
    # the book's limits come from the rounded centre and MR-bar: so do these
    assert round(99.1 + 3 * 2.59 / D2_MOVING_RANGE, 2) == 105.99
    assert round(99.1 - 3 * 2.59 / D2_MOVING_RANGE, 2) == 92.21
    # and from the unrounded ones they agree to the book's rounding of its inputs
    assert limits.ucl == pytest.approx(105.99, abs=0.02)
    assert limits.lcl == pytest.approx(92.21, abs=0.02)
    assert limits.sigma_within == pytest.approx(limits.mr_bar / 1.128, rel=1e-3)
    # D4 = 3.2665 unrounded; the table's 3.267 differs in the fourth digit
    assert limits.mr_ucl == pytest.approx(3.267 * limits.mr_bar, rel=2e-4)


def test_individuals_limits_from_a_second_worked_example() -> None:
    # source: worked solution to Montgomery & Runger, Applied Statistics and Probability
    # for Engineers, Exercise 15-17 (20 observations), as printed at
    # https://questionai.com/amp/textbooksolution-120656/4550-book-Applied-Statistics-and-Probability-for-Engineers-book-Control-Charts-for-Individual-Measurements
    # : x-bar = 53.05, MR-bar = 56/19 = 2.947, UCL = 60.888, LCL = 45.212, MR UCL = 9.628
    # (the raw data are not printed there, so the limits are checked from x-bar and MR-bar)
    mr_bar = 56 / 19
    assert round(mr_bar, 3) == 2.947
    assert 53.05 + 3 * mr_bar / D2_MOVING_RANGE == pytest.approx(60.888, abs=0.005)
    assert 53.05 - 3 * mr_bar / D2_MOVING_RANGE == pytest.approx(45.212, abs=0.005)
    assert D4_MOVING_RANGE * mr_bar == pytest.approx(9.628, abs=0.005)


# ---------------------------------------------------------------- x-bar and s


def test_xbar_s_chart_equal_sizes_worked_example() -> None:
    # source: S. Simon, "XBAR-S control chart answers", http://new.pmean.com/xbarscontrolchartanswers/
    # : 7 subgroups of 2; printed means and standard deviations (3 decimals), mean of means
    # 1.09, mean of SDs 0.15, x-bar limits 1.09 +- 2.659 * 0.15 = 1.49 and 0.69, s chart
    # UCL 3.267 * 0.15 = 0.49 (from the rounded 1.09 and 0.15, as printed)
    groups = [
        [1.097, 1.204],
        [1.030, 1.362],
        [0.682, 0.978],
        [0.820, 1.080],
        [1.042, 0.858],
        [1.398, 1.146],
        [1.301, 1.204],
    ]
    printed_means = [1.151, 1.196, 0.830, 0.950, 0.950, 1.272, 1.252]
    printed_sds = [0.076, 0.235, 0.209, 0.184, 0.130, 0.178, 0.069]
    assert [mean(g) for g in groups] == pytest.approx(printed_means, abs=0.0006)
    assert [sample_sd(g) for g in groups] == pytest.approx(printed_sds, abs=0.0006)
    limits = subgroup_limits(groups)
    assert limits.equal_sizes
    assert round(limits.center, 2) == 1.09 and round(limits.s_bar, 2) == 0.15
    rounded = type(limits)(1.09, 0.15, True, 7)
    assert [round(x, 2) for x in rounded.xbar_limits(2)] == [0.69, 1.49]
    assert round(rounded.s_limits(2)[1], 2) == 0.49 and rounded.s_limits(2)[0] == 0


# source: Montgomery, Introduction to Statistical Quality Control, Table 6.4 "Inside diameter
# measurements (mm) on automobile engine piston rings" (variable sample size), samples 1-22
# with their printed means and standard deviations as reproduced at
# https://www.transtutors.com/questions/consider-the-data-in-table-6-4-which-is-a-modification-of-the-piston-ring-data-used--686291.htm
PISTON_RINGS = [
    ([74.030, 74.002, 74.019, 73.992, 74.008], 74.010, 0.0148),
    ([73.995, 73.992, 74.001], 73.996, 0.0046),
    ([73.988, 74.024, 74.021, 74.005, 74.002], 74.008, 0.0147),
    ([74.002, 73.996, 73.993, 74.015, 74.009], 74.003, 0.0091),
    ([73.992, 74.007, 74.015, 73.989, 74.014], 74.003, 0.0122),
    ([74.009, 73.994, 73.997, 73.985], 73.996, 0.0099),
    ([73.995, 74.006, 73.994, 74.000], 73.999, 0.0055),
    ([73.985, 74.003, 73.993, 74.015, 73.988], 73.997, 0.0123),
    ([74.008, 73.995, 74.009, 74.005], 74.004, 0.0064),
    ([73.998, 74.000, 73.990, 74.007, 73.995], 73.998, 0.0063),
    ([73.994, 73.998, 73.994, 73.995, 73.990], 73.994, 0.0029),
    ([74.004, 74.000, 74.007, 74.000, 73.996], 74.001, 0.0042),
    ([73.983, 74.002, 73.998], 73.994, 0.0100),
    ([74.006, 73.967, 73.994, 74.000, 73.984], 73.990, 0.0153),
    ([74.012, 74.014, 73.998], 74.008, 0.0087),
    ([74.000, 73.984, 74.005, 73.998, 73.996], 73.997, 0.0078),
    ([73.994, 74.012, 73.986, 74.005], 73.999, 0.0115),
    ([74.006, 74.010, 74.018, 74.003, 74.000], 74.007, 0.0070),
    ([73.984, 74.002, 74.003, 74.005, 73.997], 73.998, 0.0085),
    ([74.000, 74.010, 74.013], 74.008, 0.0068),
    ([73.982, 74.001, 74.015, 74.005, 73.996], 74.000, 0.0122),
    ([74.004, 73.999, 73.990, 74.006, 74.009], 74.002, 0.0074),
]
# from memory: samples 23-25 of the same table (five rings each, as in Table 6.3)
PISTON_RINGS_23_25 = [
    [74.010, 73.989, 73.990, 74.009, 74.014],
    [74.015, 74.008, 73.993, 74.000, 74.010],
    [73.982, 73.984, 73.995, 74.017, 74.013],
]


def test_subgroup_means_and_sds_match_the_printed_table() -> None:
    for values, printed_mean, printed_sd in PISTON_RINGS:
        assert mean(values) == pytest.approx(printed_mean, abs=0.0006)
        assert sample_sd(values) == pytest.approx(printed_sd, abs=0.00006)


def test_xbar_s_chart_with_variable_sample_size() -> None:
    # Montgomery, section 6.3.2 ("the x-bar and s control charts with variable sample
    # size"): grand mean weighted by n_i, s-bar pooled over sum(n_i) - m; from memory, its
    # Example 6.4 gives x-double-bar = 74.001 and s-bar = 0.0103 for Table 6.4
    groups = [values for values, _, _ in PISTON_RINGS] + PISTON_RINGS_23_25
    limits = subgroup_limits(groups)
    assert not limits.equal_sizes
    assert round(limits.center, 3) == 74.001
    assert round(limits.s_bar, 4) == 0.0103
    # the formulas themselves, recomputed with numpy
    sizes = np.array([len(g) for g in groups])
    sds = np.array([np.std(g, ddof=1) for g in groups])
    means = np.array([np.mean(g) for g in groups])
    assert limits.center == pytest.approx(float((sizes * means).sum() / sizes.sum()), rel=1e-14)
    pooled = math.sqrt(float(((sizes - 1) * sds**2).sum() / (sizes.sum() - len(groups))))
    assert limits.s_bar == pytest.approx(pooled, rel=1e-12)
    # from memory (Example 6.4): limits for a sample of 5, 74.001 -+ 1.427 (0.0103), s UCL
    # 2.089 (0.0103); for a sample of 3, 74.001 + 1.954 (0.0103) = 74.021
    # (the book computes them from the rounded centre and s-bar: so do these)
    rounded = type(limits)(74.001, 0.0103, False, len(groups))
    low5, high5 = rounded.xbar_limits(5)
    assert (round(low5, 3), round(high5, 3)) == (73.986, 74.016)
    assert round(rounded.s_limits(5)[1], 4) == round(2.089 * 0.0103, 4)
    assert round(rounded.xbar_limits(3)[1], 3) == 74.021
    assert rounded.s_limits(3) == pytest.approx((0.0, 2.568 * 0.0103), rel=1e-3)
    # unrounded, each limit steps with its own sample size and agrees to the rounding
    assert limits.xbar_limits(5) == pytest.approx((73.986, 74.016), abs=0.001)
    assert limits.xbar_limits(3)[1] - limits.xbar_limits(5)[1] == pytest.approx(
        (1.954 - 1.427) * limits.s_bar, rel=1e-3
    )


# ---------------------------------------------------------------- capability

# source: Montgomery, Introduction to Statistical Quality Control, Table 6.1 "Flow width
# measurements (microns) for the hard-bake process", 25 samples of 5, as printed at
# https://quesba.com/questions/1-a-hard-bake-process-is-used-in-conjunction-with-photolithography-in-semic-162792
# (samples 1-17 also with their printed means and ranges at
# https://www.transtutors.com/questions/a-hard-bake-process-see-section-5-3-1-is-used-in-conjunction-with-photolithography-i-686288.htm)
HARD_BAKE = [
    [1.3235, 1.4128, 1.6744, 1.4573, 1.6914],
    [1.4314, 1.3592, 1.6075, 1.4666, 1.6109],
    [1.4284, 1.4871, 1.4932, 1.4324, 1.5674],
    [1.5028, 1.6352, 1.3841, 1.2831, 1.5507],
    [1.5604, 1.2735, 1.5265, 1.4363, 1.6441],
    [1.5955, 1.5451, 1.3574, 1.3281, 1.4198],
    [1.6274, 1.5064, 1.8366, 1.4177, 1.5144],
    [1.4190, 1.4303, 1.6637, 1.6067, 1.5519],
    [1.3884, 1.7277, 1.5355, 1.5176, 1.3688],
    [1.4039, 1.6697, 1.5089, 1.4627, 1.5220],
    [1.4158, 1.7667, 1.4278, 1.5928, 1.4181],
    [1.5821, 1.3355, 1.5777, 1.3908, 1.7559],
    [1.2856, 1.4106, 1.4447, 1.6398, 1.1928],
    [1.4951, 1.4036, 1.5893, 1.6458, 1.4969],
    [1.3589, 1.2863, 1.5996, 1.2497, 1.5471],
    [1.5747, 1.5301, 1.5171, 1.1839, 1.8662],
    [1.3680, 1.7269, 1.3957, 1.5014, 1.4449],
    [1.4163, 1.3864, 1.3057, 1.6210, 1.5573],
    [1.5796, 1.4185, 1.6541, 1.5116, 1.7247],
    [1.7106, 1.4412, 1.2361, 1.3820, 1.7601],
    [1.4371, 1.5051, 1.3485, 1.5670, 1.4880],
    [1.4738, 1.5936, 1.6583, 1.4973, 1.4720],
    [1.5917, 1.4333, 1.5551, 1.5295, 1.6866],
    [1.6399, 1.5243, 1.5705, 1.5563, 1.5530],
    [1.5797, 1.3663, 1.6240, 1.3732, 1.6887],
]


def test_process_capability_ratio_worked_example() -> None:
    # from memory: Montgomery's hard-bake example, x-double-bar = 1.5056, R-bar = 0.32521,
    # sigma-hat = R-bar / d2 = 0.32521 / 2.326 = 0.1398, specification 1.50 +- 0.50 (printed
    # in the exercise above), Cp = (2.00 - 1.00) / (6 * 0.1398) = 1.192
    ranges = [max(g) - min(g) for g in HARD_BAKE]
    assert round(mean([mean(g) for g in HARD_BAKE]), 4) == 1.5056
    assert round(mean(ranges), 5) == 0.32521
    sigma = mean(ranges) / 2.326  # d2 for n = 5 (Montgomery, Appendix VI)
    result = capability(1.5056, sigma, None, 1.00, 2.00)
    assert round(result.cp, 3) == 1.192
    # with the process off centre, Cpk is the nearer side's one-sided index
    assert result.cpk == pytest.approx(min(2.00 - 1.5056, 1.5056 - 1.00) / (3 * sigma))
    assert result.pp is None and result.ppk is None  # no overall sigma given


def test_capability_indices_of_an_off_centre_process() -> None:
    # from memory: NIST/SEMATECH e-Handbook section 6.1.6 ("What is process capability?"),
    # USL = 20, LSL = 8, mean 16, sigma 2: Cp = 12 / 12 = 1.0, Cpk = min(4, 8) / 6 = 0.667
    result = capability(16.0, 2.0, 2.0, 8.0, 20.0)
    assert result.cp == pytest.approx(1.0) and round(result.cpk, 3) == 0.667
    assert result.pp == pytest.approx(1.0) and round(result.ppk, 3) == 0.667


def test_one_sided_limits_give_the_one_sided_index_only() -> None:
    # Montgomery, chapter 8 (process capability ratios for one-sided specifications):
    # Cpu = (USL - mu) / 3 sigma, Cpl = (mu - LSL) / 3 sigma; common practice, no Cp
    upper = capability(10.0, 1.0, 2.0, None, 16.0)
    assert upper.cp is None and upper.pp is None
    assert upper.cpk == pytest.approx(2.0) and upper.ppk == pytest.approx(1.0)
    lower = capability(10.0, 1.0, 2.0, 7.0, None)
    assert lower.cpk == pytest.approx(1.0) and lower.ppk == pytest.approx(0.5)
    assert capability(10.0, 0.0, None, 7.0, 13.0).cp is None  # no spread: no index


# ---------------------------------------------------------------- zone rules


def test_zone_rules_each_alone() -> None:
    # source: the four zone tests of the Western Electric Statistical Quality Control
    # Handbook (1956), as the NIST/SEMATECH e-Handbook section 6.3.2 lists them (from
    # memory): one point beyond 3 sigma; 2 of 3 beyond 2 sigma on one side; 4 of 5 beyond
    # 1 sigma on one side; 8 in a row on one side of the centre line
    def flagged(z: list[float]) -> dict[int, list[str]]:
        return {i + 1: f for i, f in enumerate(zone_rules(z, 0.0, 1.0)) if f}

    assert flagged([0.5, -0.5, 3.2, 0.2]) == {3: ["WE1"]}
    assert flagged([0.5, -0.5, -3.0, 0.2]) == {}  # on the line is not beyond it
    assert flagged([0.1, 2.5, 0.3, 2.2, 0.0]) == {4: ["WE2"]}
    assert flagged([0.1, 2.5, -2.2, 0.3, 0.0]) == {}  # not on one side
    assert flagged([0.1, -2.5, -0.3, -2.2, 0.2]) == {4: ["WE2"]}
    assert flagged([0.2, 1.5, 1.2, -0.4, 1.1, 1.3, -0.1]) == {6: ["WE3"]}
    assert flagged([0.2, 1.5, 1.2, -0.4, 1.1, -1.3, -0.1]) == {}
    assert flagged([-0.5, 0.2, 0.4, 0.1, 0.9, 0.3, 0.6, 0.2, 0.5, -0.2]) == {9: ["WE4"]}
    assert flagged([0.3, 0.2, 0.4, 0.1, 0.0, 0.3, 0.6, 0.2, 0.5]) == {}  # a point on the centre


def test_zone_rules_together_and_a_sigma_of_zero() -> None:
    z = [0.5, 0.4, 0.6, 1.2, 1.5, 2.4, 1.1, 3.5]
    flags = zone_rules(z, 0.0, 1.0)
    # point 7 completes 4 of 5 beyond 1 sigma (1.2, 1.5, 2.4, 1.1); point 8 (3.5) is beyond
    # 3 sigma, the second of 3 beyond 2 sigma, the fifth of 5 beyond 1, the eighth above 0
    assert flags == [[], [], [], [], [], [], ["WE3"], ["WE1", "WE2", "WE3", "WE4"]]
    # the centre and sigma scale the zones
    assert zone_rules([10.0 + 2 * v for v in z], 10.0, 2.0) == flags
    assert zone_rules([1.0, 5.0], 1.0, 0.0) == [[], []]
