"""p-value adjustment and family-wise error levels, checked against statsmodels and arithmetic."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from statsmodels.stats.multitest import multipletests

from trialdesk.core.errors import TrialInputError
from trialdesk.core.padjust import adjust_pvalues, familywise_error, per_comparison_level

# Our method names and the names statsmodels.stats.multitest.multipletests gives the same methods.
STATSMODELS_NAME = {"bonferroni": "bonferroni", "sidak": "sidak", "holm": "holm", "bh": "fdr_bh"}
METHODS = list(STATSMODELS_NAME)

# Same formulas as statsmodels, evaluated in a different order (m p / i against p / (i / m)):
# results agree to a few units in the last place, so rtol=1e-12 is ample and still catches any
# wrong factor or wrong step direction.
RTOL_SAME_FORMULA = 1e-12


def statsmodels_adjusted(p: np.ndarray, method: str) -> np.ndarray:
    """Reference: statsmodels.stats.multitest.multipletests, the corrected p-values."""
    with np.errstate(divide="ignore"):  # its Sidak form takes log(0) for p = 1, correctly
        return multipletests(p, alpha=0.05, method=STATSMODELS_NAME[method])[1]


RANDOM = np.random.default_rng(20240611)
EDGE_CASES = {
    "one comparison": np.array([0.03]),
    "two comparisons": np.array([0.04, 0.01]),
    "ties": np.array([0.01, 0.01, 0.02, 0.02, 0.02, 0.5]),
    "all tied": np.full(5, 0.02),
    "zeros and ones": np.array([0.0, 1.0, 0.0, 0.3, 1.0]),
    "all ones": np.ones(4),
    "all zeros": np.zeros(3),
    "tiny p-values": np.array([1e-300, 1e-17, 1e-12, 0.2]),
    "uniform, 10": RANDOM.uniform(size=10),
    "uniform, 200": RANDOM.uniform(size=200),
    "log-uniform, 45": 10.0 ** -RANDOM.uniform(0, 12, size=45),
    "rounded to 2 places, 30": np.round(RANDOM.uniform(size=30), 2),
}


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("p", list(EDGE_CASES.values()), ids=list(EDGE_CASES))
def test_matches_statsmodels(p: np.ndarray, method: str) -> None:
    # Reference: statsmodels multipletests on the same p-values.
    assert_allclose(
        adjust_pvalues(p, method), statsmodels_adjusted(p, method), rtol=RTOL_SAME_FORMULA
    )


@settings(max_examples=100, deadline=None)
@given(
    p=st.lists(
        st.one_of(
            st.floats(0.0, 1.0),
            st.sampled_from([0.0, 0.01, 0.05, 1.0]),  # repeated values make ties likely
        ),
        min_size=1,
        max_size=40,
    ),
    method=st.sampled_from(METHODS),
)
def test_matches_statsmodels_on_random_inputs(p: list[float], method: str) -> None:
    # Reference: statsmodels multipletests. atol=1e-300 lets a subnormal input (hypothesis draws
    # them) whose adjusted value underflows differently in the two formulas still compare equal.
    ours = adjust_pvalues(p, method)
    assert_allclose(
        ours, statsmodels_adjusted(np.array(p), method), rtol=RTOL_SAME_FORMULA, atol=1e-300
    )


@pytest.mark.parametrize("method", METHODS)
def test_nan_is_passed_through_and_not_counted(method: str) -> None:
    p = np.array([0.01, np.nan, 0.04, 0.03, np.nan])
    ours = adjust_pvalues(p, method)
    assert_array_equal(np.isnan(ours), np.isnan(p))
    # Reference: statsmodels multipletests on the three real p-values alone (m = 3).
    assert_allclose(
        ours[~np.isnan(p)], statsmodels_adjusted(p[~np.isnan(p)], method), rtol=RTOL_SAME_FORMULA
    )


@pytest.mark.parametrize("method", METHODS)
def test_only_nan(method: str) -> None:
    assert_array_equal(np.isnan(adjust_pvalues([np.nan, np.nan], method)), [True, True])


@pytest.mark.parametrize("method", METHODS)
def test_one_comparison_equals_raw_p(method: str) -> None:
    # Identity: with m = 1 every method leaves the p-value alone (Bonferroni 1 x p, Sidak
    # 1 - (1 - p)**1, Holm and Benjamini-Hochberg with a single step). rtol=1e-15: Sidak's
    # expm1/log1p form may differ from p by an ulp.
    p = np.array([0.0, 0.0123, 0.5, 1.0])
    for value in p:
        assert_allclose(adjust_pvalues([value], method), [value], rtol=1e-15)


def test_bonferroni_by_hand() -> None:
    # Arithmetic: 4 comparisons, 0.01 x 4 = 0.04, 0.3 x 4 = 1.2 clipped to 1.
    assert_allclose(
        adjust_pvalues([0.01, 0.3, 0.2, 0.001], "bonferroni"), [0.04, 1.0, 0.8, 0.004], rtol=1e-15
    )


def test_keeps_shape_and_order() -> None:
    p = np.array([[0.04, 0.01], [0.03, 0.02]])
    ours = adjust_pvalues(p, "holm")
    assert ours.shape == (2, 2)
    # Reference: statsmodels multipletests on the flattened values, reshaped back.
    assert_allclose(
        ours, statsmodels_adjusted(p.ravel(), "holm").reshape(2, 2), rtol=RTOL_SAME_FORMULA
    )


def test_empty() -> None:
    assert adjust_pvalues([], "bh").shape == (0,)


def test_rejects_unknown_method() -> None:
    with pytest.raises(TrialInputError, match="holm"):
        adjust_pvalues([0.1], "hochberg")


@pytest.mark.parametrize("bad", [-0.01, 1.5])
def test_rejects_p_outside_unit_interval(bad: float) -> None:
    with pytest.raises(TrialInputError, match="between 0 and 1"):
        adjust_pvalues([0.1, bad], "bonferroni")


# Family-wise error and per-comparison levels. The check figures below are common practice; they
# are arithmetic (1 - (1 - a)**m and a / m) printed to three significant figures, so each tolerance
# is half a unit in the last printed digit.


def test_familywise_error_three_pairs() -> None:
    # Common practice (arithmetic): 1 - 0.95**3 = 0.142625, printed as 0.143.
    assert_allclose(familywise_error(0.05, 3), 0.143, atol=5e-4)


def test_familywise_error_six_entries() -> None:
    # Common practice (arithmetic): 6 entries give 6 x 5 / 2 = 15 pairs; 1 - 0.95**15 = 0.5367.
    pairs = 6 * 5 // 2
    assert pairs == 15
    assert_allclose(familywise_error(0.05, pairs), 0.537, atol=5e-4)


def test_bonferroni_level_keeps_familywise_error_below_alpha() -> None:
    # Common practice (arithmetic): 0.05 / 15 = 0.00333 per pair; 1 - (1 - 0.00333...)**15 = 0.0489.
    smallest, largest = per_comparison_level(0.05, 15, "bonferroni")
    assert smallest == largest
    assert_allclose(smallest, 0.00333, atol=5e-6)
    assert_allclose(familywise_error(smallest, 15), 0.0489, atol=5e-5)


def test_sidak_level_gives_exactly_alpha() -> None:
    # Identity, Sidak (1967) JASA 62:626-633: the level 1 - (1 - a)**(1/m) makes the family-wise
    # error of m independent tests exactly a. rtol=1e-12 allows rounding in expm1/log1p.
    level, same = per_comparison_level(0.05, 15, "sidak")
    assert level == same
    assert_allclose(level, 1 - 0.95 ** (1 / 15), rtol=1e-12)
    assert_allclose(familywise_error(level, 15), 0.05, rtol=1e-12)


@pytest.mark.parametrize(
    ("method", "expected"),
    [
        ("bonferroni", (0.005, 0.005)),
        ("holm", (0.005, 0.05)),  # Holm (1979): alpha/m for the smallest p, alpha for the largest
        ("bh", (0.005, 0.05)),  # Benjamini & Hochberg (1995): i alpha / m for i = 1 .. m
        ("none", (0.05, 0.05)),
    ],
)
def test_per_comparison_level(method: str, expected: tuple[float, float]) -> None:
    # Arithmetic for m = 10 at alpha = 0.05; rtol=1e-15 allows only rounding in alpha / m.
    assert_allclose(per_comparison_level(0.05, 10, method), expected, rtol=1e-15)


@pytest.mark.parametrize("method", ["bonferroni", "sidak"])
def test_single_step_level_matches_adjusted_p(method: str) -> None:
    # Consistency: a raw p-value equal to the method's per-comparison level adjusts to alpha.
    level, _ = per_comparison_level(0.05, 12, method)
    adjusted = adjust_pvalues(np.r_[level, np.full(11, 0.9)], method)[0]
    assert_allclose(adjusted, 0.05, rtol=1e-12)


def test_familywise_error_against_direct_power() -> None:
    # Arithmetic: the direct form 1 - (1 - a)**m; rtol=1e-12 allows rounding in either form.
    for alpha in (0.001, 0.01, 0.05, 0.1):
        for m in (0, 1, 2, 45, 4950):
            assert_allclose(
                familywise_error(alpha, m), 1 - (1 - alpha) ** m, rtol=1e-12, atol=1e-300
            )
    assert familywise_error(0.05, 0) == 0.0
    assert math.isclose(familywise_error(0.05, 1), 0.05, rel_tol=1e-15)


@pytest.mark.parametrize("alpha", [0.0, 1.0, -0.1, 2.0])
def test_rejects_bad_alpha(alpha: float) -> None:
    with pytest.raises(TrialInputError, match="significance level"):
        familywise_error(alpha, 3)
    with pytest.raises(TrialInputError, match="significance level"):
        per_comparison_level(alpha, 3, "holm")


def test_rejects_bad_number_of_comparisons() -> None:
    with pytest.raises(TrialInputError, match="at least 1"):
        per_comparison_level(0.05, 0, "bonferroni")
    with pytest.raises(TrialInputError, match="whole number"):
        familywise_error(0.05, 2.5)
    with pytest.raises(TrialInputError, match="at least 0"):
        familywise_error(0.05, -1)


def test_level_rejects_unknown_method() -> None:
    with pytest.raises(TrialInputError, match="none"):
        per_comparison_level(0.05, 3, "scheffe")
