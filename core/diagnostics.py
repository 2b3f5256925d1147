"""Residual checks of a trial fit, read out in plain words.

- Plots with an externally studentized residual beyond 3 in absolute value are flagged to be checked
  against the field book (common practice; a typing error is the usual cause).
- Normality of residuals: Shapiro & Wilk (1965, Biometrika 52:591-611), via scipy.
- Equal variances across entries: Brown & Forsythe (1974, JASA 69:364-367), Levene's test on
  absolute deviations from the median, applied to the residuals so block effects do not count.
- Non-additivity (RCBD): Tukey's one-degree-of-freedom test (Tukey 1949, Biometrics 5:232-242),
  computed as the F-test of the squared fitted values added to the additive model, which equals
  Tukey's formula for complete blocks and stays valid with missing plots.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from trialdesk.core.least_squares import TrialFit
from trialdesk.core.results import AssumptionTest, Diagnostics, FlaggedPlot

FLAG_LIMIT = 3.0


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def _reading(p: float | None, good: str, bad: str, alpha: float = 0.05) -> str:
    if p is None or not np.isfinite(p):
        return "not enough data for this test"
    return bad if p < alpha else good


def shapiro_wilk(residuals: np.ndarray) -> AssumptionTest:
    """Shapiro-Wilk test of the residuals."""
    if len(residuals) < 3 or np.ptp(residuals) == 0:
        return AssumptionTest(name="Normality of residuals (Shapiro-Wilk)", statistic=None,
                              df=None, p=None, reading="not enough data for this test")
    with np.errstate(all="ignore"):
        w, p = stats.shapiro(residuals)
    return AssumptionTest(
        name="Normality of residuals (Shapiro-Wilk)",
        statistic=_finite(w),
        df=None,
        p=_finite(p),
        reading=_reading(
            p,
            "residuals look normal",
            "residuals depart from normal: look at the flagged plots and the quantile plot; a "
            "transformation may suit this trait",
        ),
    )


def brown_forsythe(residuals: np.ndarray, entry: np.ndarray) -> AssumptionTest:
    """Brown-Forsythe test of equal residual variance across entries (entries with 3+ plots).

    With two plots, both lie equally far from their median, so an entry's spread about the
    median is always the same for both and the test is degenerate: such entries are left out.
    """
    groups = [residuals[entry == e] for e in pd.unique(entry)]
    groups = [g for g in groups if len(g) >= 3]
    name = "Equal variances across entries (Brown-Forsythe)"
    if len(groups) < 2:
        return AssumptionTest(name=name, statistic=None, df=None, p=None,
                              reading="not enough data for this test: it needs entries with "
                                      "three or more plots")
    n = sum(len(g) for g in groups)
    w, p = stats.levene(*groups, center="median")
    return AssumptionTest(
        name=name,
        statistic=_finite(w),
        df=f"{len(groups) - 1}, {n - len(groups)}",
        p=_finite(p),
        reading=_reading(
            p,
            "entries vary about equally",
            "some entries vary much more than others: the pooled error may not fit them all",
        ),
    )


def tukey_nonadditivity(fit: TrialFit, y: np.ndarray) -> AssumptionTest:
    """Tukey's one-degree-of-freedom test: add the squared fitted values as a covariate."""
    name = "Block x entry non-additivity (Tukey 1 df)"
    df_resid = fit.residual_df - 1
    if df_resid < 1:
        return AssumptionTest(name=name, statistic=None, df=None, p=None,
                              reading="not enough data for this test")
    z = (fit.fitted - fit.fitted.mean()) ** 2
    x = np.column_stack([fit.design, z])
    coef, *_ = np.linalg.lstsq(x, y, rcond=None)
    rss = float(((y - x @ coef) ** 2).sum())
    ss_nonadd = fit.ss["residual"] - rss
    if rss <= 0:
        return AssumptionTest(name=name, statistic=None, df=None, p=None,
                              reading="not enough data for this test")
    f = ss_nonadd / (rss / df_resid)
    p = float(stats.f.sf(f, 1, df_resid))
    return AssumptionTest(
        name=name,
        statistic=float(f),
        df=f"1, {df_resid}",
        p=p,
        reading=_reading(
            p,
            "block effects look additive",
            "entries respond differently to blocks (non-additive): consider a transformation",
        ),
    )


def flagged_plots(
    fit: TrialFit, y: np.ndarray, plots: pd.DataFrame, limit: float = FLAG_LIMIT
) -> tuple[FlaggedPlot, ...]:
    """Plots whose studentized residual exceeds ``limit``; ``plots`` holds the observed plots."""
    student = fit.studentized_residuals()
    out = []
    for k in np.nonzero(np.abs(np.nan_to_num(student)) > limit)[0]:
        row = plots.iloc[k]
        out.append(
            FlaggedPlot(
                plot=str(row["plot"]),
                source_row=None if pd.isna(row.get("source_row")) else int(row["source_row"]),
                entry=str(row["entry"]),
                block=None if row.get("block") is None or pd.isna(row.get("block"))
                else str(row["block"]),
                value=float(y[k]),
                fitted=float(fit.fitted[k]),
                residual=float(fit.residuals[k]),
                studentized_residual=float(student[k]),
            )
        )
    return tuple(out)


def diagnose(fit: TrialFit, y: np.ndarray, plots: pd.DataFrame) -> Diagnostics:
    """All residual checks of one trait; ``y`` and ``plots`` cover the plots with a value."""
    tests = [shapiro_wilk(fit.residuals),
             brown_forsythe(fit.residuals, plots["entry"].to_numpy())]
    if fit.blocks:
        tests.append(tukey_nonadditivity(fit, y))
    return Diagnostics(flag_limit=FLAG_LIMIT, flagged=flagged_plots(fit, y, plots),
                       tests=tuple(tests))
