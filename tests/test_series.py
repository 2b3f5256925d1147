"""The analysis of a trial series (the same entries over several environments) against outside
references.

References used here
--------------------
- statsmodels OLS ``anova_lm`` (typ=1, and the sequence of nested models for unbalanced data) on
  ``y ~ C(env) + C(env):C(block) + C(entry) + C(entry):C(env)``: the combined analysis of variance.
- statsmodels OLS and WLS on the entry x environment means with ``C(entry) + C(env)``: entry
  least-squares means (predictions averaged over environments), their covariance
  (``cov_params``), differences and standard errors (``t_test``), the weighted entry test
  (``compare_f_test``); per environment, OLS ``y ~ C(block) + C(entry)`` for the error mean square
  and the environment's least-squares means.
- statsmodels OLS of each entry's means on the environment index: stability slopes, their
  standard errors and the deviation mean squares.
- scipy ``bartlett`` on samples built to have given variances and degrees of freedom, and scipy
  ``studentized_range`` for Tukey's p-values.
- Open data: MASS ``immer`` and lattice ``barley`` (Immer, Hayes & Powers 1934, J. Am. Soc.
  Agron. 26:403-419; extracts in tests/data, source in tests/data/README.md), both means only.
- The invented plot-level series below (fixed random seed): 8 entries, 4 environments (two
  locations in two seasons), 3 blocks.

Tolerances: results computed by other linear-algebra routes agree to rounding, so rtol=1e-10
(about a thousand times the double-precision error accumulated over a few hundred plots) unless
said otherwise beside the check.
"""

from __future__ import annotations

import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from patsy import build_design_matrices
from scipy import stats
from statsmodels.stats.anova import anova_lm

from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.importer import import_fieldbook
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.separation import METHODS, separate
from trialdesk.core.series import (
    analyze_series,
    bartlett_test,
    read_series,
    series_from_trials,
)
from trialdesk.core.series_results import Environment
from trialdesk.core.variance_components import components_from_anova

DATA = Path(__file__).parent / "data"
RTOL = 1e-10
ENVIRONMENTS = (("North", "2025"), ("South", "2025"), ("North", "2026"), ("South", "2026"))


# --- data -------------------------------------------------------------------------------------


def immer_csv(folder: Path) -> Path:
    """MASS immer in long form: one row per variety, location and year (means only)."""
    wide = pd.read_csv(DATA / "immer.csv")
    long = wide.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="year",
                     value_name="yield")
    long["year"] = long["year"].map({"Y1": "1931", "Y2": "1932"})
    path = folder / "immer_long.csv"
    long.to_csv(path, index=False)
    return path


def read_immer(folder: Path):
    return read_series(immer_csv(folder), entry="Var", location="Loc", season="year")


def read_barley(folder: Path):
    return read_series(DATA / "barley.csv", entry="variety", location="site", season="year")


def invented_plots(*, error_sd=(0.5, 0.6, 0.55, 0.5), seed=20250601) -> pd.DataFrame:
    """An invented series: 8 entries x 4 environments x 3 blocks, plot numbers repeating in each
    environment; the error SD of each environment is ``error_sd``."""
    rng = np.random.default_rng(seed)
    genotype = rng.normal(0.0, 1.0, 8)
    rows = []
    for (location, season), sd in zip(ENVIRONMENTS, error_sd, strict=True):
        env_effect = rng.normal(0.0, 2.0)
        interaction = rng.normal(0.0, 0.4, 8)
        for block in (1, 2, 3):
            block_effect = rng.normal(0.0, 0.3)
            for i in rng.permutation(8):
                rows.append({"location": location, "season": season, "block": block,
                             "entry": f"E{i + 1}", "plot": f"{block}{i + 1:02d}",
                             "yield": 6.0 + env_effect + block_effect + genotype[i]
                             + interaction[i] + rng.normal(0.0, sd)})
    return pd.DataFrame(rows)


def unbalanced(frame: pd.DataFrame) -> pd.DataFrame:
    """Three missing plots, and entry E5 not grown in North 2026."""
    frame = frame.copy()
    frame.loc[[3, 40, 77], "yield"] = np.nan
    grown = ~((frame["location"] == "North") & (frame["season"] == "2026")
              & (frame["entry"] == "E5"))
    return frame[grown].reset_index(drop=True)


def write(frame: pd.DataFrame, folder: Path, name: str = "series.csv") -> Path:
    path = folder / name
    frame.to_csv(path, index=False)
    return path


def read_plots(frame: pd.DataFrame, folder: Path):
    return read_series(write(frame, folder), location="location", season="season")


def reference_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """The plots with a value, for statsmodels: y, env, block, entry, eb (block within env)."""
    ref = frame.dropna(subset=["yield"]).rename(columns={"yield": "y"}).copy()
    ref["env"] = ref["location"] + " " + ref["season"]
    ref["block"] = ref["block"].astype(str)
    ref["eb"] = ref["env"] + ":" + ref["block"]
    return ref


def means_frame(data, trait: str) -> pd.DataFrame:
    """A means-only series as y, env, entry."""
    return pd.DataFrame({"y": data.values[trait].to_numpy(), "env": data.plots["environment"],
                         "entry": data.plots["entry"]}).dropna()


def cells_frame(result) -> pd.DataFrame:
    return pd.DataFrame([{"entry": c.entry, "env": c.environment, "mean": c.mean, "n": c.n}
                         for c in result.cell_means])


def lsmean_matrix(fit, cells: pd.DataFrame, entries, over: str = "env") -> np.ndarray:
    """Rows L_i: the model's design row averaged over every level of ``over`` (environments,
    or blocks), for entry i."""
    grid = pd.DataFrame([(e, level) for e in entries for level in cells[over].unique()],
                        columns=["entry", over])
    x = np.asarray(build_design_matrices([fit.model.data.model_spec], grid)[0])  # patsy
    return x.reshape(len(entries), -1, x.shape[1]).mean(axis=1)


def lsmean_cov(fit, lmat: np.ndarray, scale: float | None = None) -> np.ndarray:
    """L (X'X)^-1 L' times ``scale`` (the fit's own residual MS by default), from statsmodels'
    ``normalized_cov_params``."""
    unscaled = np.asarray(fit.normalized_cov_params)
    return lmat @ unscaled @ lmat.T * (fit.scale if scale is None else scale)


# --- reading ----------------------------------------------------------------------------------


def test_immer_reads_as_entry_means(tmp_path):
    data = read_immer(tmp_path)
    assert data.means_only
    assert len(data.environments) == 12 and data.environments[0] == Environment(
        environment="UF 1931", location="UF", season="1931", source=data.sources[0])
    assert list(data.plots.columns) == ["environment", "location", "season", "entry", "block",
                                        "plot", "source_row", "source"]
    assert data.plots["source_row"].tolist() == list(range(2, 62))  # spreadsheet rows


def test_plot_data_with_repeated_plot_numbers(tmp_path):
    data = read_plots(invented_plots(), tmp_path)
    assert not data.means_only
    assert [e.environment for e in data.environments] == [f"{a} {b}" for a, b in ENVIRONMENTS]
    assert len(data.plots) == 96 and data.traits == ("yield",)


def test_repeated_plot_within_an_environment_is_refused(tmp_path):
    frame = invented_plots()
    frame.loc[1, "plot"] = frame.loc[0, "plot"]
    with pytest.raises(TrialInputError) as error:
        read_plots(frame, tmp_path)
    assert error.value.row == 3 and "location 'North', season '2025'" in error.value.message


def test_one_environment_is_not_a_series(tmp_path):
    frame = invented_plots()
    path = write(frame[(frame["location"] == "North") & (frame["season"] == "2025")], tmp_path)
    with pytest.raises(TrialInputError) as error:
        read_series(path, location="location", season="season")
    assert "a series needs at least two environments" in str(error.value)
    assert error.value.column == "location" and error.value.file == str(path)


def test_unknown_location_column(tmp_path):
    with pytest.raises(TrialInputError) as error:
        read_series(write(invented_plots(), tmp_path), location="site")
    assert error.value.column == "site"


def test_replicated_plots_without_blocks_are_plot_data(tmp_path):
    frame = invented_plots().drop(columns=["block"])
    data = read_series(write(frame, tmp_path), location="location", season="season")
    assert not data.means_only


# --- means only: MASS immer and lattice barley ------------------------------------------------


@pytest.mark.parametrize("reader", [read_immer, read_barley], ids=["immer", "barley"])
def test_means_anova_and_lsmeans(tmp_path, reader):
    data = reader(tmp_path)
    trait = data.traits[0]
    result = analyze_series(data, AnalysisSettings(method="tukey")).traits[0]
    ref = means_frame(data, trait)
    fit = smf.ols("y ~ C(env) + C(entry)", data=ref).fit()
    table = anova_lm(fit, typ=1)  # statsmodels, sequential sums of squares
    rows = {r.source: r for r in result.anova}
    for ours, theirs in (("environment", "C(env)"), ("entry", "C(entry)"),
                         ("entry x environment", "Residual")):
        assert rows[ours].df == table.loc[theirs, "df"]
        assert_allclose(rows[ours].ss, table.loc[theirs, "sum_sq"], rtol=RTOL)
    for ours, theirs in (("environment", "C(env)"), ("entry", "C(entry)")):
        assert_allclose(rows[ours].f, table.loc[theirs, "F"], rtol=RTOL)
        assert_allclose(rows[ours].p, table.loc[theirs, "PR(>F)"], rtol=1e-8)  # p in the tail
    assert result.entry_test_fixed is None and result.means_only
    # Balanced: the least-squares means are the plain means over environments (pandas), and
    # their SE is sqrt(MS_residual / e).
    plain = ref.groupby("entry")["y"].mean()
    for e in result.entries:
        assert_allclose(e.mean, plain[e.entry], rtol=RTOL)
        assert_allclose(e.se, np.sqrt(fit.mse_resid / len(data.environments)), rtol=RTOL)
        assert e.n == len(data.environments)
    assert result.error_df == fit.df_resid


def test_tukey_on_series_means_against_statsmodels_and_range(tmp_path):
    data = read_immer(tmp_path)
    result = analyze_series(data, AnalysisSettings(method="tukey")).traits[0]
    cells = cells_frame(result)
    fit = smf.ols("mean ~ C(entry) + C(env)", data=cells).fit()
    entries = [e.entry for e in result.entries]
    lmat = lsmean_matrix(fit, cells, entries)
    index = {e: k for k, e in enumerate(entries)}
    t = len(entries)
    for c in result.comparisons:
        # statsmodels t_test of L_a - L_b: the difference and its standard error
        test = fit.t_test(lmat[index[c.entry_a]] - lmat[index[c.entry_b]])
        assert_allclose(c.difference, float(np.squeeze(test.effect)), rtol=RTOL)
        assert_allclose(c.se, float(np.squeeze(test.sd)), rtol=RTOL)
        # Tukey's p from scipy's studentized range, q = |d| / se * sqrt(2); the same tolerance as
        # the single-trial Tukey checks (scipy integrates numerically)
        q = abs(c.difference) / c.se * np.sqrt(2)
        assert_allclose(c.p_adjusted, stats.studentized_range.sf(q, t, fit.df_resid),
                        rtol=1e-5, atol=1e-7)
    # The single-trial machinery on the same means and covariance gives the same comparisons.
    means = np.array([e.mean for e in result.entries])
    cov = lsmean_cov(fit, lmat)
    again = separate(tuple(entries), means, cov, int(fit.df_resid), method="tukey", alpha=0.05,
                     entry_p=result.entry_p)
    assert [(c.entry_a, c.entry_b, c.significant) for c in again.comparisons] == [
        (c.entry_a, c.entry_b, c.significant) for c in result.comparisons]
    assert_allclose([c.p_adjusted for c in again.comparisons],
                    [c.p_adjusted for c in result.comparisons], rtol=RTOL)


def test_stability_against_regressions_per_entry(tmp_path):
    data = read_immer(tmp_path)
    result = analyze_series(data, AnalysisSettings()).traits[0]
    table = result.cell_means_frame()
    index = table.mean(axis=0) - table.to_numpy().mean()  # environment index (Eberhart-Russell)
    additive = smf.ols("mean ~ C(entry) + C(env)", data=cells_frame(result)).fit()
    resid = cells_frame(result).assign(r=additive.resid).groupby("entry")["r"]
    assert [s.entry for s in result.stability] == [e.entry for e in result.entries]
    for s in result.stability:
        # statsmodels OLS of the entry's means on the environment index
        fit = sm.OLS(table.loc[s.entry].to_numpy(), sm.add_constant(index.to_numpy())).fit()
        assert_allclose(s.regression_slope, fit.params[1], rtol=RTOL)
        assert_allclose(s.slope_se, fit.bse[1], rtol=RTOL)
        assert_allclose(s.deviation_ms, fit.mse_resid, rtol=RTOL)  # means only: no error taken
        # Wricke's ecovalence: the entry's squared residuals of the additive model (statsmodels)
        assert_allclose(s.ecovalence, (resid.get_group(s.entry) ** 2).sum(), rtol=1e-9)


def test_means_only_components_from_anova(tmp_path):
    data = read_immer(tmp_path)
    result = analyze_series(data, AnalysisSettings()).traits[0]
    rows = {r.source: r for r in result.anova}
    expected = components_from_anova(rows["entry"].ms, None, rows["entry x environment"].ms,
                                     replicates=1, environments=12)
    assert result.components == expected and result.components.method == "ANOVA"


# --- plot data --------------------------------------------------------------------------------


def test_combined_anova_balanced_against_statsmodels(tmp_path):
    frame = invented_plots()
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    ref = reference_frame(frame)
    fit = smf.ols("y ~ C(env) + C(env):C(block) + C(entry) + C(entry):C(env)", data=ref).fit()
    table = anova_lm(fit, typ=1)  # statsmodels, sequential SS (balanced: order does not matter)
    names = {"environment": "C(env)", "block within environment": "C(env):C(block)",
             "entry": "C(entry)", "entry x environment": "C(entry):C(env)",
             "pooled error": "Residual"}
    rows = {r.source: r for r in result.anova}
    assert [r.source for r in result.anova] == [*names, "total"]
    for ours, theirs in names.items():
        assert rows[ours].df == table.loc[theirs, "df"]
        assert_allclose(rows[ours].ss, table.loc[theirs, "sum_sq"], rtol=RTOL)
    for ours in ("block within environment", "entry x environment"):  # against pooled error
        assert_allclose(rows[ours].f, table.loc[names[ours], "F"], rtol=RTOL)
        assert_allclose(rows[ours].p, table.loc[names[ours], "PR(>F)"], rtol=1e-8)
    # environments fixed: entries against the pooled error, as statsmodels tests them
    fixed = result.entry_test_fixed
    assert fixed.label == "environments fixed" and fixed.against == "pooled error"
    assert_allclose(fixed.f, table.loc["C(entry)", "F"], rtol=RTOL)
    assert_allclose(fixed.p, table.loc["C(entry)", "PR(>F)"], rtol=1e-8)
    # environments random: entries against entry x environment (scipy's F distribution)
    ms = table["mean_sq"]
    f = ms["C(entry)"] / ms["C(entry):C(env)"]
    random = result.entry_test_random
    assert random.label == "environments random" and (random.df1, random.df2) == (7, 21)
    assert_allclose(random.f, f, rtol=RTOL)
    assert_allclose(random.p, stats.f.sf(f, 7, 21), rtol=RTOL)
    assert rows["entry"].f == random.f  # the table's entry row is the random test


def test_combined_anova_unbalanced_against_nested_models(tmp_path):
    frame = unbalanced(invented_plots())
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    ref = reference_frame(frame)
    formulas = ["y ~ 1", "y ~ C(env)", "y ~ C(env) + C(eb)", "y ~ C(env) + C(eb) + C(entry)",
                "y ~ C(env) + C(eb) + C(entry) + C(entry):C(env)"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the over-parametrized codings are rank deficient
        fits = [smf.ols(f, data=ref).fit() for f in formulas]
        table = anova_lm(*fits)  # statsmodels: SS and df between successive nested models
    ours = [r for r in result.anova if r.source not in ("pooled error", "total")]
    assert [r.source for r in ours] == ["environment", "block within environment", "entry",
                                        "entry x environment"]
    assert [r.df for r in ours] == table["df_diff"].iloc[1:].astype(int).tolist()
    assert_allclose([r.ss for r in ours], table["ss_diff"].iloc[1:], rtol=RTOL)
    pooled = next(r for r in result.anova if r.source == "pooled error")
    assert pooled.df == fits[-1].df_resid
    assert_allclose(pooled.ss, fits[-1].ssr, rtol=RTOL)
    assert result.entry_test_random.df2 == 20  # 31 cells - 4 - 8 + 1


def test_environment_table_against_single_environment_fits(tmp_path):
    frame = unbalanced(invented_plots())
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    ref = reference_frame(frame)
    cells = cells_frame(result)
    for row in result.environment_table:
        part = ref[ref["env"] == row.environment]
        fit = smf.ols("y ~ C(block) + C(entry)", data=part).fit()  # statsmodels, one environment
        assert row.error_df == fit.df_resid
        assert_allclose(row.error_ms, fit.mse_resid, rtol=RTOL)
        assert_allclose(row.mean, part["y"].mean(), rtol=RTOL)
        assert_allclose(row.cv_percent, 100 * np.sqrt(fit.mse_resid) / part["y"].mean(),
                        rtol=RTOL)
        # The environment's least-squares means (the design averaged over its blocks), and the
        # LSD from the average standard error of a difference between them
        entries = sorted(part["entry"].unique())
        lmat = lsmean_matrix(fit, part, entries, over="block")
        mine = cells[cells["env"] == row.environment].set_index("entry")["mean"]
        assert_allclose(mine[entries].to_numpy(), lmat @ fit.params.to_numpy(), rtol=RTOL)
        cov = lsmean_cov(fit, lmat)
        a, b = np.triu_indices(len(entries), k=1)
        sed = np.sqrt(cov[a, a] + cov[b, b] - 2 * cov[a, b]).mean()
        assert_allclose(row.lsd, stats.t.ppf(0.975, fit.df_resid) * sed, rtol=RTOL)
        assert row.n_entries == len(entries)


def test_unbalanced_lsmeans_against_statsmodels_on_cell_means(tmp_path):
    frame = unbalanced(invented_plots())
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    assert not result.weighted
    cells = cells_frame(result)
    fit = smf.ols("mean ~ C(entry) + C(env)", data=cells).fit()
    entries = [e.entry for e in result.entries]
    lmat = lsmean_matrix(fit, cells, entries)
    # The covariance is (X'X)^-1 times the entry x environment MS on a cell-mean basis,
    # MS_GE / r_h, with MS_GE from the nested statsmodels fits and r_h the harmonic mean of the
    # plots per cell (scipy).
    ref = reference_frame(frame)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        additive = smf.ols("y ~ C(env) + C(eb) + C(entry)", data=ref).fit()
        full = smf.ols("y ~ C(env) + C(eb) + C(entry) + C(entry):C(env)", data=ref).fit()
    ms_ge = (additive.ssr - full.ssr) / (additive.df_resid - full.df_resid)
    r_h = stats.hmean(ref.groupby(["env", "entry"]).size().to_numpy())
    cov = lsmean_cov(fit, lmat, scale=ms_ge / r_h)
    assert_allclose([e.mean for e in result.entries], lmat @ fit.params.to_numpy(), rtol=RTOL)
    assert_allclose([e.se for e in result.entries], np.sqrt(np.diag(cov)), rtol=RTOL)
    assert_allclose(result.error_ms, ms_ge / r_h, rtol=RTOL)
    assert_allclose(result.replicates, r_h, rtol=RTOL)
    e5 = next(e for e in result.entries if e.entry == "E5")
    assert e5.n == 9 - sum(frame.loc[frame["entry"] == "E5", "yield"].isna())
    # E5 was not grown in North 2026: no rank there, and no row in the stability table
    ranks = dict(result.ranks)
    assert ranks["E5"][2] is None and all(r is not None for r in ranks["E1"])
    assert "E5" not in [s.entry for s in result.stability]
    assert any("'E5' not grown in every environment" in n for n in result.notes)
    assert result.components.method == "REML"


def test_bartlett_against_scipy():
    rng = np.random.default_rng(5)
    ms, df = [0.21, 0.48, 1.3, 0.33], [14, 13, 12, 20]
    samples = []
    for variance, nu in zip(ms, df, strict=True):
        z = rng.normal(size=nu + 1)
        samples.append((z - z.mean()) / z.std(ddof=1) * np.sqrt(variance))  # exact variance
    ours = bartlett_test(ms, df)
    theirs = stats.bartlett(*samples)  # scipy, Bartlett 1937
    assert_allclose(ours.statistic, theirs.statistic, rtol=RTOL)
    assert_allclose(ours.p, theirs.pvalue, rtol=RTOL)
    assert ours.df == "3"


def test_series_bartlett_uses_the_environment_errors(tmp_path):
    frame = invented_plots()
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    ref = reference_frame(frame)
    samples = []
    for env in result.environment_table:
        resid = smf.ols("y ~ C(block) + C(entry)", data=ref[ref["env"] == env.environment]).fit()
        z = np.random.default_rng(1).normal(size=int(resid.df_resid) + 1)
        samples.append((z - z.mean()) / z.std(ddof=1) * np.sqrt(resid.mse_resid))
    assert_allclose(result.bartlett.statistic, stats.bartlett(*samples).statistic, rtol=RTOL)
    assert not result.weighted and result.entry_test_weighted is None


def test_weighted_analysis_when_error_variances_differ(tmp_path):
    frame = invented_plots(error_sd=(0.2, 0.25, 1.6, 0.3))
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    assert result.weighted and result.bartlett.p < 0.01
    assert any("weighted analysis" in n for n in result.notes)
    ref = reference_frame(frame)
    mse = {env: smf.ols("y ~ C(block) + C(entry)", data=part).fit().mse_resid
           for env, part in ref.groupby("env")}
    cells = cells_frame(result)
    cells["w"] = cells["n"] / cells["env"].map(mse)  # weights r / MSE_j
    # statsmodels WLS on the cell means; its covariance uses the weighted residual MS as scale
    fit = smf.wls("mean ~ C(entry) + C(env)", data=cells, weights=cells["w"]).fit()
    entries = [e.entry for e in result.entries]
    lmat = lsmean_matrix(fit, cells, entries)
    assert_allclose([e.mean for e in result.entries], lmat @ fit.params.to_numpy(), rtol=RTOL)
    assert_allclose([e.se for e in result.entries], np.sqrt(np.diag(lsmean_cov(fit, lmat))),
                    rtol=RTOL)
    restricted = smf.wls("mean ~ C(env)", data=cells, weights=cells["w"]).fit()
    f, p, _ = fit.compare_f_test(restricted)  # statsmodels F-test between the weighted models
    assert_allclose(result.entry_test_weighted.f, f, rtol=RTOL)
    assert_allclose(result.entry_test_weighted.p, p, rtol=RTOL)
    assert result.entry_p == result.entry_test_weighted.p


def test_components_balanced_anova_and_reml(tmp_path):
    frame = invented_plots()
    data = read_plots(frame, tmp_path)
    result = analyze_series(data, AnalysisSettings()).traits[0]
    ref = reference_frame(frame)
    fit = smf.ols("y ~ C(env) + C(env):C(block) + C(entry) + C(entry):C(env)", data=ref).fit()
    ms = anova_lm(fit, typ=1)["mean_sq"]  # statsmodels mean squares
    expected = components_from_anova(ms["C(entry)"], ms["C(entry):C(env)"], ms["Residual"],
                                     replicates=3, environments=4)
    comps = result.components
    assert comps.method == "ANOVA"
    assert_allclose([comps.entry, comps.entry_by_environment, comps.error, comps.heritability],
                    [expected.entry, expected.entry_by_environment, expected.error,
                     expected.heritability], rtol=RTOL)
    assert comps.entry > 0 and comps.entry_by_environment > 0
    # Balanced data with no negative estimate: REML equals the ANOVA estimates (Searle, Casella
    # & McCulloch 1992, Variance Components, ch. 6; from memory). rtol=1e-5: the optimizer's
    # precision.
    reml = analyze_series(data, AnalysisSettings(), components="reml").traits[0].components
    assert reml.method == "REML"
    assert_allclose([reml.entry, reml.entry_by_environment, reml.error],
                    [comps.entry, comps.entry_by_environment, comps.error], rtol=1e-5)


def test_stability_uses_the_error_of_a_mean(tmp_path):
    frame = invented_plots()
    result = analyze_series(read_plots(frame, tmp_path), AnalysisSettings()).traits[0]
    pooled = next(r.ms for r in result.anova if r.source == "pooled error")
    table = result.cell_means_frame()
    index = (table.mean(axis=0) - table.to_numpy().mean()).to_numpy()
    for s in result.stability:
        fit = sm.OLS(table.loc[s.entry].to_numpy(), sm.add_constant(index)).fit()  # statsmodels
        # Eberhart & Russell 1966: the deviation MS less the error variance of a mean, MSe / r
        assert_allclose(s.deviation_ms, fit.mse_resid - pooled / 3, rtol=1e-9)


@pytest.mark.parametrize("method", METHODS)
def test_every_method_runs(tmp_path, method):
    frame = unbalanced(invented_plots())
    checks = ("E3", "E8")
    result = analyze_series(read_plots(frame, tmp_path),
                            AnalysisSettings(method=method, checks=checks)).traits[0]
    assert result.method == method and len(result.entries) == 8
    assert [e.rank for e in result.entries] == list(range(1, 9))
    assert {e.entry for e in result.entries if e.is_check} == set(checks)
    check_mean = np.mean([e.mean for e in result.entries if e.is_check])
    for e in result.entries:
        assert_allclose(e.percent_of_check, 100 * e.mean / check_mean, rtol=RTOL)
    if method == "dunnett":
        assert {c.entry_b for c in result.comparisons} == set(checks)
        assert all(e.letters is None for e in result.entries)
    else:
        assert len(result.comparisons) == 28 and all(e.letters for e in result.entries)


def test_lower_is_better_ranks_low_first(tmp_path):
    frame = invented_plots()
    result = analyze_series(read_plots(frame, tmp_path),
                            AnalysisSettings(lower_is_better=("yield",))).traits[0]
    means = [e.mean for e in result.entries]
    assert means == sorted(means) and not result.higher_is_better
    cell = result.cell_means_frame()
    for entry, ranks in result.ranks:
        for env, rank in zip(cell.columns, ranks, strict=True):
            assert rank == int((cell[env] < cell.loc[entry, env]).sum()) + 1


def test_series_of_trial_files_equals_one_field_book(tmp_path):
    frame = invented_plots()
    paths = []
    for (location, season), part in frame.groupby(["location", "season"], sort=False):
        csv = write(part[["block", "entry", "plot", "yield"]], tmp_path, f"{location}{season}.csv")
        path = tmp_path / f"{location}{season}.trial"
        import_fieldbook(read_fieldbook(csv), path, facts={"station": location, "season": season})
        paths.append(path)
    trials = series_from_trials(paths)
    assert [e.environment for e in trials.environments] == [f"{a} {b}" for a, b in ENVIRONMENTS]
    assert len(trials.sha256) == 4 and not trials.means_only
    book = read_plots(frame, tmp_path)
    one, other = (analyze_series(d, AnalysisSettings()).traits[0] for d in (trials, book))
    assert [e.entry for e in one.entries] == [e.entry for e in other.entries]
    assert_allclose([e.mean for e in one.entries], [e.mean for e in other.entries], rtol=RTOL)
    assert_allclose([r.ss for r in one.anova], [r.ss for r in other.anova], rtol=RTOL)


def test_trait_with_one_environment_is_refused(tmp_path):
    frame = invented_plots()
    frame["height"] = np.where(frame["location"] == "North",
                               np.where(frame["season"] == "2025", 80.0 + frame.index % 7, np.nan),
                               np.nan)
    data = read_plots(frame, tmp_path)
    with pytest.raises(TrialInputError, match="at least two environments"):
        analyze_series(data, AnalysisSettings(traits=("height",)))
    both = analyze_series(data, AnalysisSettings())
    assert [t.trait for t in both.traits] == ["yield"]
    assert any("'height' was not analysed" in w for w in both.warnings)


def test_unknown_check_is_refused(tmp_path):
    with pytest.raises(TrialInputError, match="check 'X9' is not an entry"):
        analyze_series(read_plots(invented_plots(), tmp_path), AnalysisSettings(checks=("X9",)))


def test_frames(tmp_path):
    result = analyze_series(read_plots(unbalanced(invented_plots()), tmp_path),
                            AnalysisSettings())
    trait = result.traits[0]
    assert list(trait.environment_frame()["environment"]) == [e.environment
                                                             for e in result.environments]
    assert trait.cell_means_frame().shape == (8, 4)
    assert trait.cell_means_frame().isna().sum().sum() == 1
    assert trait.ranks_frame().loc["E5"].isna().sum() == 1
    assert len(trait.stability_frame()) == 7 and len(trait.anova_frame()) == 6
    assert list(result.to_frame().columns) == ["check", "yield", "yield letters"]


# --- relabelling environments changes nothing -------------------------------------------------


@pytest.fixture(scope="module")
def plot_series(tmp_path_factory):
    data = read_plots(unbalanced(invented_plots()), tmp_path_factory.mktemp("series"))
    return data, analyze_series(data, AnalysisSettings(method="tukey")).traits[0]


def relabelled(data, names: list[str], order: list[int], row_seed: int):
    """The same series with environments renamed (old -> names[k]), listed in ``order`` and its
    rows shuffled."""
    old = [e.environment for e in data.environments]
    new = dict(zip(old, names, strict=True))
    rows = np.random.default_rng(row_seed).permutation(len(data.plots))
    plots = data.plots.iloc[rows].reset_index(drop=True)
    plots["environment"] = plots["environment"].map(new)
    environments = tuple(replace(data.environments[k], environment=new[old[k]]) for k in order)
    return replace(data, plots=plots, values=data.values.iloc[rows].reset_index(drop=True),
                   environments=environments)


@settings(max_examples=15, deadline=None)
@given(names=st.lists(st.text(alphabet="abcdefXYZ 0123456789-", min_size=1, max_size=8),
                      min_size=4, max_size=4, unique=True).filter(
                          lambda n: all(x.strip() == x and x for x in n)),
       order=st.permutations(range(4)), row_seed=st.integers(0, 2**32 - 1))
def test_relabelling_environments_changes_nothing(plot_series, names, order, row_seed):
    data, before = plot_series
    after = analyze_series(relabelled(data, names, order, row_seed),
                           AnalysisSettings(method="tukey")).traits[0]
    assert [(e.entry, e.letters, e.rank) for e in after.entries] == [
        (e.entry, e.letters, e.rank) for e in before.entries]
    assert_allclose([e.mean for e in after.entries], [e.mean for e in before.entries], rtol=RTOL)
    assert_allclose([e.se for e in after.entries], [e.se for e in before.entries], rtol=RTOL)
    assert [(r.source, r.df) for r in after.anova] == [(r.source, r.df) for r in before.anova]
    assert_allclose([r.ss for r in after.anova], [r.ss for r in before.anova], rtol=RTOL)
    for s_after, s_before in zip(after.stability, before.stability, strict=True):
        assert s_after.entry == s_before.entry
        assert_allclose([s_after.regression_slope, s_after.deviation_ms, s_after.ecovalence,
                         s_after.shukla_variance],
                        [s_before.regression_slope, s_before.deviation_ms, s_before.ecovalence,
                         s_before.shukla_variance], rtol=1e-9, atol=1e-12)


# --- further input cases ------------------------------------------------------------------------


def test_empty_location_cell_names_row_and_column(tmp_path):
    frame = invented_plots()
    frame.loc[4, "location"] = ""
    with pytest.raises(TrialInputError) as error:
        read_plots(frame, tmp_path)
    assert (error.value.row, error.value.column) == (6, "location")  # header is row 1
    assert "no location" in error.value.message


def test_unbalanced_means_only_against_statsmodels(tmp_path):
    data = read_immer(tmp_path)
    gone = (data.plots["environment"] == "W 1932") & (data.plots["entry"] == "T")
    data = replace(data, plots=data.plots[~gone].reset_index(drop=True),
                   values=data.values[~gone.to_numpy()].reset_index(drop=True))
    result = analyze_series(data, AnalysisSettings()).traits[0]
    cells = cells_frame(result)
    fit = smf.ols("mean ~ C(entry) + C(env)", data=cells).fit()  # statsmodels on the 59 means
    entries = [e.entry for e in result.entries]
    lmat = lsmean_matrix(fit, cells, entries)
    assert_allclose([e.mean for e in result.entries], lmat @ fit.params.to_numpy(), rtol=RTOL)
    assert_allclose([e.se for e in result.entries], np.sqrt(np.diag(lsmean_cov(fit, lmat))),
                    rtol=RTOL)
    assert result.error_df == fit.df_resid == 43
    assert result.components.method == "REML"
    assert result.components.entry_by_environment is None  # means only: not separable
    assert [s.entry for s in result.stability] == [e for e in entries if e != "T"]


def test_trials_without_station_and_season_are_named_by_trial(tmp_path):
    frame = invented_plots()
    paths = []
    for k, (_, part) in enumerate(frame.groupby(["location", "season"], sort=False)):
        csv = write(part[["block", "entry", "plot", "yield"]], tmp_path, f"site{k}.csv")
        import_fieldbook(read_fieldbook(csv), tmp_path / f"site{k}.trial")
        paths.append(tmp_path / f"site{k}.trial")
    data = series_from_trials(paths)
    assert [e.environment for e in data.environments] == ["site0", "site1", "site2", "site3"]
    assert all(e.season is None for e in data.environments)
    with pytest.raises(TrialInputError, match="are both environment 'site0'"):
        series_from_trials([paths[0], paths[0]])
    with pytest.raises(TrialInputError, match="at least two environments"):
        series_from_trials(paths[:1])


def test_progress_and_cancel(tmp_path):
    from trialdesk.core.analysis import AnalysisCancelled

    frame = invented_plots()
    frame["height"] = frame["yield"] * 10 + np.arange(len(frame)) % 5
    data = read_plots(frame, tmp_path)
    calls = []
    analyze_series(data, AnalysisSettings(), progress=lambda *a: calls.append(a))
    assert calls == [(0, 2, "yield"), (1, 2, "height"), (2, 2, "")]
    with pytest.raises(AnalysisCancelled):
        analyze_series(data, AnalysisSettings(), should_stop=lambda: True)
