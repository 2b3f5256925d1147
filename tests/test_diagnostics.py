"""The residual checks: Shapiro-Wilk, Brown-Forsythe and the flagged plots.

Outside references: scipy.stats.shapiro, scipy.stats.levene (median centring, which is the
Brown-Forsythe test) and scipy.stats.f_oneway, applied to the residuals of statsmodels OLS fits of
MASS oats (Yates 1935; tests/data/oats.csv) as 12 entries in 6 complete blocks.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats

from tests.open_data import oats_fieldbook
from trialdesk.core.analysis import analyze
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.results import AnalysisSettings


def _test(result, word):
    return next(t for t in result.diagnostics.tests if word in t.name)


def _residuals(frame: pd.DataFrame):
    kept = frame.dropna(subset=["yield"])
    model = smf.ols("Q('yield') ~ C(block) + C(entry)", data=kept).fit()
    return kept, model.resid.to_numpy()


def test_normality_equals_scipy_shapiro_on_the_ols_residuals(tmp_path):
    book, frame = oats_fieldbook(tmp_path)
    result = analyze(book, AnalysisSettings()).trait("yield")
    _, resid = _residuals(frame)
    w, p = stats.shapiro(resid)  # scipy.stats.shapiro (Shapiro & Wilk 1965)
    test = _test(result, "Shapiro")
    assert_allclose([test.statistic, test.p], [w, p], rtol=1e-6)  # rtol: residuals to ~1e-12


def test_equal_variances_is_brown_forsythe_on_the_residuals(tmp_path):
    book, frame = oats_fieldbook(tmp_path, missing=())
    result = analyze(book, AnalysisSettings()).trait("yield")
    kept, resid = _residuals(frame)
    groups = [resid[(kept["entry"] == e).to_numpy()] for e in pd.unique(kept["entry"])]
    w, p = stats.levene(*groups, center="median")  # scipy: Brown & Forsythe 1974
    # The same by its definition: a one-way ANOVA of |residual - entry median| (Brown & Forsythe
    # 1974, JASA 69:364-367).
    spread = [np.abs(g - np.median(g)) for g in groups]
    f, p_f = stats.f_oneway(*spread)
    test = _test(result, "Brown-Forsythe")
    assert_allclose([test.statistic, test.p], [w, p], rtol=1e-8)
    assert_allclose([w, p], [f, p_f], rtol=1e-10)
    assert test.df == "11, 60"


def test_two_plots_per_entry_give_no_equal_variance_test_and_no_warning(tmp_path):
    # With two plots both lie equally far from their median, so the test is degenerate.
    _, frame = oats_fieldbook(tmp_path, missing=())
    two = frame[frame["block"].isin(["I", "II"])]
    path = tmp_path / "two.csv"
    two.to_csv(path, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = analyze(read_fieldbook(path), AnalysisSettings()).trait("yield")
    test = _test(result, "Brown-Forsythe")
    assert test.statistic is None and test.p is None
    assert "three or more plots" in test.reading
