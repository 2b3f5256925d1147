"""Planning numbers, residual tables and mean limits against outside references.

References used here
--------------------
- scipy.stats ``t``, ``f`` and ``studentized_range`` quantiles; ``scipy.stats.dunnett`` in a
  balanced one-way layout (its confidence interval half-width divided by the standard error of a
  difference is Dunnett's critical value).
- statsmodels OLS: residuals, fitted values, externally studentized residuals, residual df and
  MS, and cell-means confidence intervals.
- A hand computation: CV 8 %, 4 replicates, 72 df, LSD at 0.05, with t(0.975, 72) = 1.993 read
  from a printed t table (value from memory, rounded to three decimals).
- Data: MASS ``oats`` (Yates 1935; Venables & Ripley, 4th ed.; tests/data/oats.csv) as 12 entries
  in 6 complete blocks with plots deleted; R ``datasets`` PlantGrowth (Dobson 1983;
  tests/data/fieldbooks/plantgrowth.csv), a completely randomized trial.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.outliers_influence import OLSInfluence

from tests.open_data import oats_fieldbook
from trialdesk.core import planning
from trialdesk.core.analysis import analyze
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.padjust import per_comparison_level
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.separation import METHODS, separate

DATA = Path(__file__).parent / "data"
ALPHA, T, DF, CV, R = 0.05, 25, 72, 8.0, 4
SCALE = np.sqrt(2 / R) * CV


def oats(tmp_path, missing=(3, 17, 40)):
    return oats_fieldbook(tmp_path, missing)


def plantgrowth():
    return read_fieldbook(DATA / "fieldbooks" / "plantgrowth.csv", entry="group")


def dd(method, **kw):
    args = {"method": method, "alpha": ALPHA, "n_entries": T, **kw}
    return planning.detectable_difference_percent(CV, R, DF, **args)


# --- counts and sentences -------------------------------------------------------------------------


def test_comparisons_counts_pairs_or_entries_against_checks():
    assert planning.comparisons(25, "tukey") == 300  # t(t - 1)/2
    assert planning.comparisons(6, "lsd") == 15
    assert planning.comparisons(25, "dunnett", 2) == 46  # (t - c) c
    assert planning.comparisons(25, "dunnett", 1) == 24


@pytest.mark.parametrize("method", METHODS)
def test_every_method_has_a_sentence(method):
    sentence = planning.method_sentence(method)
    assert sentence.endswith(".") and 40 < len(sentence) < 220


def test_sentences_say_what_is_controlled():
    assert "all pairs" in planning.method_sentence("tukey")
    assert "false discovery rate" in planning.method_sentence("bh")
    assert "F-test" in planning.method_sentence("lsd")
    assert "checks" in planning.method_sentence("dunnett")
    with pytest.raises(TrialInputError, match="unknown method"):
        planning.method_sentence("fastest")


# --- detectable differences -----------------------------------------------------------------------


def test_lsd_hand_computation():
    # 1.993 x sqrt(0.5) x 8 = 11.27 (hand computation; atol=0.01 covers t rounded to 3 decimals)
    assert_allclose(dd("lsd"), 11.27, atol=0.01)
    assert_allclose(dd("lsd"), stats.t.ppf(0.975, DF) * SCALE, rtol=1e-12)  # scipy t.ppf


def test_single_step_methods_against_scipy_quantiles():
    m = T * (T - 1) // 2
    # Bonferroni and Sidak: t at the adjusted level (scipy t.ppf); rtol=1e-10 is rounding only.
    assert_allclose(dd("bonferroni"), stats.t.ppf(1 - ALPHA / (2 * m), DF) * SCALE, rtol=1e-10)
    sidak = 1 - (1 - ALPHA) ** (1 / m)
    assert_allclose(dd("sidak"), stats.t.ppf(1 - sidak / 2, DF) * SCALE, rtol=1e-10)
    # Scheffe: sqrt((t - 1) F(alpha; t - 1, df)) (scipy f.ppf).
    scheffe = np.sqrt((T - 1) * stats.f.ppf(1 - ALPHA, T - 1, DF))
    assert_allclose(dd("scheffe"), scheffe * SCALE, rtol=1e-10)
    # Tukey: q(alpha; t, df)/sqrt 2 (scipy studentized_range.ppf, whose own numerical
    # integration is good to about 1e-6 relative: rtol=1e-5).
    q = stats.studentized_range.ppf(1 - ALPHA, T, DF)
    assert_allclose(dd("tukey"), q / np.sqrt(2) * SCALE, rtol=1e-5)


def test_step_methods_give_strictest_and_loosest_step():
    m = T * (T - 1) // 2
    bonferroni = stats.t.ppf(1 - ALPHA / (2 * m), DF) * SCALE  # scipy t.ppf
    lsd = stats.t.ppf(1 - ALPHA / 2, DF) * SCALE
    for method in ("holm", "bh"):
        assert_allclose(dd(method), (bonferroni, lsd), rtol=1e-10)  # rounding only
    # SNK: widest range at q(alpha; t, df), adjacent means at q(alpha; 2, df) = t sqrt 2;
    # Duncan: widest range at level 1 - (1 - alpha)^(t - 1) (Duncan 1955, Biometrics 11:1-42).
    # scipy studentized_range.ppf is good to about 1e-6 relative: rtol=1e-5.
    q_snk = stats.studentized_range.ppf(1 - ALPHA, T, DF) / np.sqrt(2)
    assert_allclose(dd("snk"), (q_snk * SCALE, lsd), rtol=1e-5)
    protection = 1 - (1 - ALPHA) ** (T - 1)
    q_duncan = stats.studentized_range.ppf(1 - protection, T, DF) / np.sqrt(2)
    assert_allclose(dd("duncan"), (q_duncan * SCALE, lsd), rtol=1e-5)


def balanced_one_way(n_tests=4, n=6):
    """A balanced one-way layout; only its shape matters for the critical value."""
    rng = np.random.default_rng(7)
    return [rng.normal(size=n) for _ in range(n_tests)], rng.normal(size=n)


@pytest.mark.parametrize(("direction", "alternative"),
                         [("both", "two-sided"), ("above", "greater"), ("below", "less")])
def test_dunnett_against_scipy_balanced_one_way(direction, alternative):
    samples, control = balanced_one_way()
    ref = stats.dunnett(*samples, control=control, alternative=alternative,
                        rng=np.random.default_rng(11))
    ci = ref.confidence_interval(1 - ALPHA)
    n_tests, n = len(samples), len(control)
    df = (n_tests + 1) * (n - 1)
    pooled = np.sqrt(np.mean([np.var(s, ddof=1) for s in (*samples, control)]))
    sed = pooled * np.sqrt(2 / n)
    bound = ci.high if alternative != "greater" else ci.low
    crit = np.abs(bound - np.array([s.mean() - control.mean() for s in samples])) / sed
    ours = planning.critical_values("dunnett", ALPHA, n_tests + 1, df, n_checks=1,
                                    check_direction=direction)
    # scipy's critical value comes from randomized quasi-Monte Carlo integration of the
    # multivariate t (error about 1e-3 relative): rtol=5e-3.
    assert_allclose(ours[0], crit, rtol=5e-3)
    assert_allclose(planning.detectable_difference_percent(
        CV, n, df, method="dunnett", alpha=ALPHA, n_entries=n_tests + 1, n_checks=1,
        check_direction=direction), crit[0] * np.sqrt(2 / n) * CV, rtol=5e-3)


def test_dunnett_known_table_value():
    # Dunnett (1955) table: 4 entries against one check, 20 df, two-sided 5 %: 2.65 (printed to
    # two decimals; atol=0.005).
    assert_allclose(planning.critical_values("dunnett", 0.05, 5, 20, n_checks=1)[0], 2.65,
                    atol=0.005)


@pytest.mark.parametrize("method", METHODS)
def test_levels_match_what_the_analysis_reports(method):
    """The read-out's per-comparison level is the one the analysis of a balanced trial reports
    (internal consistency with trialdesk.core.separation)."""
    t, r, df = 8, 4, 21
    entries = tuple(f"E{i}" for i in range(t))
    means = np.linspace(5.0, 6.4, t)
    cov = np.eye(t) * 0.3 / r
    checks = ("E3", "E6") if method == "dunnett" else ()
    sep = separate(entries, means, cov, df, method=method, alpha=ALPHA, entry_p=0.001,
                   checks=checks)
    low, high = planning.per_comparison_levels(method, ALPHA, t, df, n_checks=len(checks))
    assert sep.family.m == planning.comparisons(t, method, len(checks))
    # Dunnett with two checks is simulated: the same draws, but the correlation matrix from the
    # trial's covariance differs in the last bits, which turns the eigenvectors of its repeated
    # eigenvalues, so the simulated critical value moves by its standard error (about 1e-3):
    # rtol=5e-3 for it; rtol=1e-9 (rounding) for the others.
    rtol = 5e-3 if method == "dunnett" else 1e-9
    assert_allclose((low, high), (sep.family.per_comparison_min, sep.family.per_comparison_max),
                    rtol=rtol)


def test_levels_of_adjusted_p_methods_are_padjusts():
    m = planning.comparisons(T, "holm")
    for method in ("bonferroni", "sidak", "holm", "bh"):
        assert planning.per_comparison_levels(method, ALPHA, T, DF) == per_comparison_level(
            ALPHA, m, method)


def test_bad_inputs_are_refused():
    with pytest.raises(TrialInputError, match="checks"):
        planning.detectable_difference_percent(8, 4, 72, method="dunnett", alpha=0.05,
                                               n_entries=25)
    with pytest.raises(TrialInputError, match="alpha"):
        planning.critical_values("tukey", 1.5, 25, 72)
    with pytest.raises(TrialInputError, match="degrees of freedom"):
        planning.critical_values("tukey", 0.05, 25, 0)
    with pytest.raises(TrialInputError, match="replicates"):
        planning.detectable_difference_percent(8, 0, 72, method="lsd", alpha=0.05, n_entries=5)


# --- residuals, precision and mean limits ---------------------------------------------------------


def test_residual_table_against_statsmodels_rcbd(tmp_path):
    book, frame = oats(tmp_path)
    table = planning.residual_table(book, "yield", "rcbd")
    assert list(table.columns) == ["plot", "entry", "block", "row", "column", "value", "fitted",
                                   "residual", "studentized"]
    assert len(table) == len(frame) and table["fitted"].isna().sum() == 3
    observed = frame.dropna().rename(columns={"yield": "y"})
    model = smf.ols("y ~ C(block) + C(entry)", data=observed).fit()  # statsmodels OLS
    kept = table.dropna(subset=["value"])
    # Least squares by QR against statsmodels' pinv: rtol=1e-9, atol=1e-8 on values near 100.
    assert_allclose(kept["fitted"], model.fittedvalues, rtol=1e-9)
    assert_allclose(kept["residual"], model.resid, atol=1e-8)
    assert_allclose(kept["studentized"], OLSInfluence(model).resid_studentized_external,
                    atol=1e-8)
    precision = planning.trait_precision(book, "yield", "rcbd")
    assert precision.residual_df == model.df_resid
    assert precision.replicates == 6
    assert_allclose(precision.cv_percent,
                    100 * np.sqrt(model.mse_resid) / observed["y"].mean(), rtol=1e-10)


def test_residual_table_crd_and_mean_limits_against_statsmodels():
    book = plantgrowth()
    frame = pd.read_csv(DATA / "fieldbooks" / "plantgrowth.csv")
    model = smf.ols("weight ~ C(group) - 1", data=frame).fit()  # statsmodels, cell means
    table = planning.residual_table(book, "weight", "crd")
    assert_allclose(table["residual"], model.resid, atol=1e-10)  # rounding only
    result = analyze(book, AnalysisSettings(design="crd", method="tukey", alpha=0.05)).trait(
        "weight")
    limits = planning.mean_limits(result).set_index("entry")
    ci = model.conf_int(alpha=0.05)
    ci.index = [name.split("[")[1].rstrip("]") for name in ci.index]
    # statsmodels conf_int: mean +- t(0.975, 27) SE; rtol=1e-10 is rounding.
    assert_allclose(limits.loc[ci.index, "lower"], ci[0], rtol=1e-10)
    assert_allclose(limits.loc[ci.index, "upper"], ci[1], rtol=1e-10)
    precision = planning.trait_precision(book, "weight", "crd")
    assert precision.residual_df == 27 and precision.replicates == 10


def test_precision_of_a_trait_with_no_values_and_of_an_alpha_trial(tmp_path):
    book, frame = oats_fieldbook(tmp_path, missing=())
    # An alpha trial's replicates are complete blocks: its read-out is the RCBD fit's
    # (statsmodels OLS with blocks and entries as the reference).
    model = smf.ols("Q('yield') ~ C(block) + C(entry)", data=frame).fit()
    alpha = planning.trait_precision(book, "yield", "alpha")
    assert alpha.residual_df == model.df_resid and alpha.replicates == 6
    assert_allclose(alpha.cv_percent, 100 * np.sqrt(model.scale) / frame["yield"].mean(),
                    rtol=1e-10)
    frame["yield"] = np.nan  # a new trial, laid out but not yet harvested
    path = tmp_path / "empty.csv"
    frame.assign(height=1.0).to_csv(path, index=False)
    empty = read_fieldbook(path, traits=["yield", "height"])
    with pytest.raises(TrialInputError, match="yield has no values yet"):
        planning.trait_precision(empty, "yield", "rcbd")
