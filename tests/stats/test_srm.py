"""Sample-ratio check against scipy's goodness-of-fit test."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from apportion.errors import InvalidInput
from apportion.stats.srm import DEFAULT_THRESHOLD, sample_ratio_check


@pytest.mark.parametrize(
    "counts, shares",
    [
        ([5030, 4970], [0.5, 0.5]),
        ([10240, 5200, 4900], [0.5, 0.25, 0.25]),
        ([812, 1650, 1702, 1600], [0.125, 0.2916, 0.2917, 0.2917]),
        ([1000, 1100], [0.5, 0.5]),
    ],
    ids=["two-arms-balanced", "three-arms", "four-arms-uneven", "two-arms-off"],
)
def test_statistic_and_p_value_equal_scipy_chisquare(counts, shares):
    # reference: scipy.stats.chisquare (Pearson goodness of fit), f_exp = N * shares
    shares = np.asarray(shares) / np.sum(shares)
    ref = stats.chisquare(counts, f_exp=np.sum(counts) * shares)
    got = sample_ratio_check(counts, shares)
    assert got.df == len(counts) - 1
    assert got.statistic == pytest.approx(float(ref.statistic), rel=1e-12)
    assert got.p_value == pytest.approx(float(ref.pvalue), rel=1e-9, abs=1e-300)
    assert got.expected == pytest.approx(list(np.sum(counts) * shares), rel=1e-12)
    assert got.observed == list(counts)


def test_two_arms_equals_z_test_of_a_proportion():
    # With two arms the chi-square test is the two-sided z-test of one proportion (
    # a standard identity: chi2(1) = z^2), checked with scipy.stats.binomtest's normal analogue.
    n1, n = 5150, 10000
    z = (n1 - 0.5 * n) / np.sqrt(n * 0.25)
    got = sample_ratio_check([n1, n - n1], [0.5, 0.5])
    assert got.statistic == pytest.approx(z**2, rel=1e-12)
    assert got.p_value == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-9)


def test_default_threshold_is_one_in_a_thousand():
    # p < 0.001 is common practice for sample-ratio mismatch (Kohavi, Tang and Xu, Trustworthy
    # Online Controlled Experiments, 2020, ch. 21; the value is from memory).
    assert DEFAULT_THRESHOLD == 0.001
    assert sample_ratio_check([5000, 5000], [0.5, 0.5]).threshold == 0.001


@pytest.mark.parametrize(
    "counts, shares, flagged",
    [
        ([5000, 5000], [0.5, 0.5], False),
        # 50.8 % vs 49.2 % of 20 000: z = 2.26, p = 0.024 -> suspicious but not below 0.001
        ([10160, 9840], [0.5, 0.5], False),
        # 51 % vs 49 % of 100 000: z = 12.6, p ~ 1e-36
        ([51000, 49000], [0.5, 0.5], True),
        # control under-counted in a 50/25/25 design
        ([9500, 5300, 5200], [0.5, 0.25, 0.25], True),
    ],
    ids=["exact", "mild", "gross", "three-arm-short-control"],
)
def test_flagged_cases(counts, shares, flagged):
    got = sample_ratio_check(counts, shares)
    # flagged exactly when scipy's p-value is below the threshold
    ref_p = stats.chisquare(counts, f_exp=np.sum(counts) * np.asarray(shares)).pvalue
    assert got.flagged is flagged
    assert bool(ref_p < 0.001) is flagged


def test_threshold_decides_the_flag():
    counts, shares = [10160, 9840], [0.5, 0.5]  # p = 0.0237 (scipy.stats.chisquare)
    assert sample_ratio_check(counts, shares, threshold=0.05).flagged is True
    assert sample_ratio_check(counts, shares, threshold=0.01).flagged is False


def test_units_in_a_zero_share_arm_are_an_immediate_flag():
    # any count in an arm with designed share 0 is a failure; df counts positive arms
    got = sample_ratio_check([5000, 5000, 1], [0.5, 0.5, 0.0])
    assert got.flagged is True
    assert got.p_value == 0.0
    assert got.df == 1
    # Pearson's sum over the positive-share arms, expected counts from all 10 001 units
    # (scipy.stats.chisquare refuses observed and expected totals that differ, so by hand)
    assert got.statistic == pytest.approx(2 * 0.5**2 / 5000.5, rel=1e-12)
    assert got.expected == [5000.5, 5000.5, 0.0]


def test_zero_share_arm_without_units_is_ignored():
    got = sample_ratio_check([5030, 4970, 0], [0.5, 0.5, 0.0])
    ref = stats.chisquare([5030, 4970], f_exp=[5000, 5000])
    assert got.df == 1
    assert got.flagged is False
    assert got.p_value == pytest.approx(float(ref.pvalue), rel=1e-9)


def test_single_positive_arm_has_nothing_to_test():
    got = sample_ratio_check([700, 0], [1.0, 0.0])
    assert (got.df, got.p_value, got.flagged) == (0, 1.0, False)


def test_to_dict_is_json_serializable():
    d = sample_ratio_check([10240, 5200, 4900], [0.5, 0.25, 0.25]).to_dict()
    back = json.loads(json.dumps(d, allow_nan=False))
    assert back["observed"] == [10240, 5200, 4900]
    assert back["df"] == 2
    assert set(back) == {
        "statistic",
        "df",
        "p_value",
        "flagged",
        "threshold",
        "observed",
        "expected",
    }


@pytest.mark.parametrize(
    "counts, shares, threshold, fragment",
    [
        ([10, 10], [0.5, 0.3, 0.2], 0.001, "one count per arm"),
        ([10, -1], [0.5, 0.5], 0.001, ">= 0"),
        ([10, 2.5], [0.5, 0.5], 0.001, "whole numbers"),
        ([0, 0], [0.5, 0.5], 0.001, "at least one unit"),
        ([10, 10], [0.6, 0.6], 0.001, "sum to 1"),
        ([10, 10], [0.5, 0.5], 1.5, "threshold"),
    ],
    ids=["length", "negative", "fractional", "empty", "shares-sum", "threshold"],
)
def test_invalid_input_names_the_problem(counts, shares, threshold, fragment):
    with pytest.raises(InvalidInput, match=fragment):
        sample_ratio_check(counts, shares, threshold)
