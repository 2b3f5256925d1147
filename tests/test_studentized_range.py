"""The studentized range distribution against scipy, printed tables and exact special cases."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from trialdesk.core.errors import TrialInputError
from trialdesk.core.studentized_range import range_quantile, range_sf

Q_GRID = np.array([0.5, 2.0, 3.5, 5.0, 7.0, 10.0, 15.0])


@pytest.mark.parametrize("k", [2, 3, 10, 50, 600])
@pytest.mark.parametrize("df", [1, 5, 20, 120, 10_000])
def test_sf_matches_scipy(k, df):
    # Reference: scipy.stats.studentized_range.sf, a double integral per value by
    # scipy.integrate with epsabs=1e-11. atol=1e-9 leaves room for that error and is 1000 times
    # stricter than the 1e-6 the analysis needs.
    expected = stats.studentized_range.sf(Q_GRID, k, df)
    assert_allclose(range_sf(Q_GRID, k, df), expected, rtol=0, atol=1e-9)


@pytest.mark.parametrize("k", [2, 10, 600])
def test_sf_infinite_df_matches_scipy(k):
    # Reference: scipy.stats.studentized_range.sf with df above 1e5 switches to the
    # infinite-df single integral (Lund & Lund 1983, AS 190; scipy documentation), so df=1e6
    # there is the known-variance case. atol as in test_sf_matches_scipy.
    expected = stats.studentized_range.sf(Q_GRID, k, 1e6)
    assert_allclose(range_sf(Q_GRID, k, np.inf), expected, rtol=0, atol=1e-9)


@pytest.mark.parametrize(
    ("alpha", "k", "df"), [(0.05, 3, 10), (0.01, 20, 5), (0.05, 150, 450), (0.001, 2, 1)]
)
def test_quantile_matches_scipy(alpha, k, df):
    # Reference: scipy.stats.studentized_range.ppf (root finding on its cdf). rtol=1e-8 is the
    # precision of scipy's root finder on top of its 1e-11 integral.
    expected = stats.studentized_range.ppf(1 - alpha, k, df)
    assert_allclose(range_quantile(alpha, k, df), expected, rtol=1e-8)


@pytest.mark.parametrize(
    ("alpha", "k", "df", "printed"),
    [
        # Upper points of the studentized range as printed in standard tables (Harter 1960,
        # Ann. Math. Stat. 31:1122-1147), quoted from memory to 3 decimals; scipy's ppf gives
        # 3.8768, 5.0079, 4.7992, 5.0476, 2.7718, 3.8577, 3.9583.
        (0.05, 3, 10, 3.877),
        (0.05, 10, 20, 5.008),
        (0.01, 4, 30, 4.799),
        (0.01, 5, 30, 5.048),
        (0.05, 2, np.inf, 2.772),
        (0.05, 5, np.inf, 3.858),
        (0.05, 4, 20, 3.958),
    ],
)
def test_quantile_matches_printed_table(alpha, k, df, printed):
    # atol=5e-4: the table is rounded to 3 decimals.
    assert_allclose(range_quantile(alpha, k, df), printed, rtol=0, atol=5e-4)


@pytest.mark.parametrize("df", [1, 2.5, 10, 100, 10_000, np.inf])
def test_two_means_is_twice_the_t_tail_far_into_the_tail(df):
    # Exact identity: the range of two means over its standard error is |T| * sqrt(2), so
    # P(Q >= q) = 2 P(T >= q / sqrt 2) (normal for infinite df), computed by scipy's stdtr.
    q = np.concatenate([np.linspace(0.01, 20.0, 60), np.geomspace(20.0, 1e8, 40)])
    dist = stats.norm if np.isinf(df) else stats.t(df)
    expected = 2 * dist.sf(q / np.sqrt(2))
    keep = expected > 1e-300  # below that the value underflows
    # rtol=1e-9: relative accuracy is kept in the tail (p = 1e-300 is not rounded to 0).
    assert_allclose(range_sf(q[keep], 2, df), expected[keep], rtol=1e-9, atol=0)


@pytest.mark.parametrize("k", [5, 50])
@pytest.mark.parametrize("df", [3, 30, 300])
def test_far_tail_lies_between_the_pair_and_bonferroni_bounds(k, df):
    # P(|T| >= q/sqrt2) <= P(Q >= q) <= k(k-1)/2 P(|T| >= q/sqrt2): one pair is part of the range
    # event, and the event is the union of the k(k-1)/2 pair events (Bonferroni). Tail values of
    # 1e-10 and far below must come out in this band, not 0 and not large.
    q = np.array([12.0, 20.0, 40.0, 80.0])
    pair = 2 * stats.t.sf(q / np.sqrt(2), df)
    p = range_sf(q, k, df)
    assert np.all(p >= pair * (1 - 1e-9))
    assert np.all(p <= pair * k * (k - 1) / 2 * (1 + 1e-9))


@pytest.mark.parametrize("k", [5, 50])
def test_far_tail_known_variance_equals_bonferroni(k):
    # For known variance the pair events overlap only with probability of order
    # exp(-2q^2/3) against exp(-q^2/4) for one pair, so at q = 30 the union equals the sum of the
    # k(k-1)/2 pair probabilities 2 Phi(-q/sqrt2) to far below rtol=1e-9 (a bound by hand).
    expected = k * (k - 1) * stats.norm.sf(30.0 / np.sqrt(2))
    assert_allclose(range_sf(30.0, k, np.inf), expected, rtol=1e-9)


def test_many_values_agree_with_few_values():
    # More than 100 distinct values are evaluated from a fit in log q; fewer are computed one by
    # one. Both routes must agree (rtol=1e-9 relative, atol=1e-12 where p is small).
    q = np.geomspace(1e-3, 300.0, 2000)
    many = range_sf(q, 12, 18)
    few = np.concatenate([range_sf(chunk, 12, 18) for chunk in np.array_split(q, 40)])
    assert_allclose(many, few, rtol=1e-9, atol=1e-12)


def test_quantile_inverts_sf():
    # Identity: range_sf(range_quantile(alpha)) == alpha; rtol=1e-10 is the root finder's
    # tolerance.
    for alpha in (0.5, 0.05, 1e-4):
        assert_allclose(range_sf(range_quantile(alpha, 7, 24), 7, 24), alpha, rtol=1e-10)


def test_special_values_and_shape():
    p = range_sf(np.array([[0.0, -1.0], [np.inf, np.nan]]), 4, 10)
    assert p.shape == (2, 2)
    assert p[0, 0] == 1.0 and p[0, 1] == 1.0 and p[1, 0] == 0.0 and np.isnan(p[1, 1])
    assert np.ndim(range_sf(3.0, 4, 10)) == 0


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: range_sf(3.0, 1, 10), "at least 2"),
        (lambda: range_sf(3.0, 2.5, 10), "whole number"),
        (lambda: range_sf(3.0, 4, 0), "degrees of freedom"),
        (lambda: range_quantile(0.0, 4, 10), "significance level"),
        (lambda: range_quantile(1.0, 4, 10), "significance level"),
    ],
)
def test_bad_input_is_reported(call, message):
    with pytest.raises(TrialInputError, match=message):
        call()
