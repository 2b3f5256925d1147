"""Incomplete-block (alpha design) analysis against outside references.

References used here
--------------------
- statsmodels ``MixedLM`` fitted directly with the formula API, ``y ~ C(rep) + C(entry)`` with the
  incomplete blocks as a variance component: variance components (``vcomp``, ``scale``), fixed
  effects (``fe_params``), their covariance (the fixed-effects block of ``MixedLM.hessian``,
  inverted, and ``cov_params()``) and the predicted random effects (``random_effects``).
- The REML log-likelihood written out with dense matrices (Patterson & Thompson 1971, Biometrika
  58:545-554; from memory) and maximized with ``scipy.optimize.minimize_scalar``: a reference for
  the variance components that shares no code with statsmodels.
- statsmodels ``ols`` and ``anova_lm`` (comparison of nested models) for the intra-block analysis
  of variance, its residual degrees of freedom and mean square.
- The prediction-error variance of BLUPs, G - G Z' P Z G with P = V^-1 - V^-1 X (X' V^-1 X)^-1 X'
  V^-1, from dense matrices (Henderson 1975, Biometrics 31:423-447; Searle, Casella & McCulloch
  1992, Variance Components, ch. 7; both from memory), for the heritability of Cullis, Smith &
  Coombes (2006, JABES 11:381-393; from memory).

All data are invented: a resolvable incomplete-block layout is built here (shifted columns of an
array of the entries), with entry, block and plot effects drawn with a fixed seed.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import optimize, stats
from statsmodels.stats.anova import anova_lm

from trialdesk.core.alpha_lattice import (
    efficiency_percent,
    fit_mixed,
    generalized_heritability,
    mean_sed_squared,
    nested_labels,
)
from trialdesk.core.analysis import analyze
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.json_output import analysis_to_json
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.summary_text import analysis_text

ENTRIES, BLOCK_SIZE, REPS = 24, 4, 3
MISSING = (4, 31, 58)  # plots dropped to test missing plots
# Both fits below stop where BFGS's gradient is under 1e-8, about 1e-7 of the optimum in relative
# terms (the REML surface is flat there): agreement to rtol=1e-5 says they found the same point.
REML_RTOL = 1e-5


def resolvable_layout(entries: int = ENTRIES, block_size: int = BLOCK_SIZE, reps: int = REPS,
                      seed: int = 11) -> pd.DataFrame:
    """A resolvable incomplete-block layout: the entries in a random s x k array (s blocks of k
    plots per replicate); block j of replicate r holds a[(j + r c) mod s, c] for c = 0..k-1, and
    the plots of a block are in random order. Field row = replicate, field column = position."""
    rng = np.random.default_rng(seed)
    s = entries // block_size
    array = rng.permutation(entries).reshape(s, block_size)
    rows = []
    for r in range(reps):
        for j in range(s):
            members = rng.permutation([array[(j + r * c) % s, c] for c in range(block_size)])
            rows += [{"rep": f"R{r + 1}", "iblock": f"{j + 1}", "entry": f"E{e + 1:02d}",
                      "plot": f"{r + 1}{j * block_size + p + 1:02d}"}
                     for p, e in enumerate(members)]
    return pd.DataFrame(rows)


def invented_trial(block_sd: float = 1.0, seed: int = 5, missing: tuple[int, ...] = (),
                   **layout) -> pd.DataFrame:
    """Invented yields (t/ha): 6 + entry effect (sd 0.6) + incomplete-block effect (sd
    ``block_sd``) + plot error (sd 0.4), over :func:`resolvable_layout`."""
    frame = resolvable_layout(**layout)
    rng = np.random.default_rng(seed)
    entry_effect = dict(zip(sorted(frame["entry"].unique()),
                            rng.normal(0.0, 0.6, frame["entry"].nunique()), strict=True))
    frame["rep_block"] = frame["rep"] + "/" + frame["iblock"]
    block_effect = dict(zip(frame["rep_block"].unique(),
                            rng.normal(0.0, block_sd, frame["rep_block"].nunique()), strict=True))
    frame["y"] = (6.0 + frame["entry"].map(entry_effect) + frame["rep_block"].map(block_effect)
                  + rng.normal(0.0, 0.4, len(frame)))
    frame.loc[list(missing), "y"] = np.nan
    return frame


def ours(frame: pd.DataFrame, **options):
    return fit_mixed(frame["y"].to_numpy(), frame["entry"].to_numpy(),
                     fixed=[("replicate", frame["rep"].to_numpy())],
                     random=[("incomplete block", nested_labels(frame["rep"].to_numpy(),
                                                                frame["iblock"].to_numpy()))],
                     **options)


def mixedlm(frame: pd.DataFrame, formula: str = "y ~ C(rep) + C(entry)", **model):
    """statsmodels MixedLM fitted directly, one group, incomplete blocks as a variance component
    (or ``model`` as given), with Trialdesk's optimizer settings."""
    data = frame.dropna(subset=["y"]).assign(one=1)
    options = {"groups": "one", "re_formula": "0",
               "vc_formula": {"block": "0 + C(rep_block)"}} | model
    fitted = smf.mixedlm(formula, data, **options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # boundary and convergence notes of statsmodels
        # From statsmodels' default start one search alone can stall on a flat ridge of the
        # likelihood (several components, one of them near zero): the reference is the
        # converged search with the highest REML log-likelihood.
        fits = [fitted.fit(reml=True, method=["bfgs"], gtol=1e-8),
                fitted.fit(reml=True, method=["lbfgs"]),
                fitted.fit(reml=True, method=["nm"], maxiter=5000)]
    return max((f for f in fits if f.converged), key=lambda f: f.llf)


def ls_mean_weights(names: list[str], entries: tuple[str, ...]) -> np.ndarray:
    """Rows turning statsmodels' fixed effects (named ``names``) into least-squares means:
    intercept, the replicate effects averaged, and the entry's own effect (Searle, Speed &
    Milliken 1980, Am. Stat. 34:216-221)."""
    reps = [n for n in names if n.startswith("C(rep)")]
    weights = np.zeros((len(entries), len(names)))
    weights[:, 0] = 1.0
    for name in reps:
        weights[:, names.index(name)] = 1.0 / (len(reps) + 1)
    for i, e in enumerate(entries):
        if f"C(entry)[T.{e}]" in names:
            weights[i, names.index(f"C(entry)[T.{e}]")] = 1.0
    return weights


def fe_covariance(fit) -> np.ndarray:
    """(X' V^-1 X)^-1 at statsmodels' estimates: the inverse of the fixed-effects block of its
    Hessian."""
    hessian, _ = fit.model.hessian(fit.params_object)
    k = fit.model.k_fe
    return np.linalg.inv(-hessian[:k, :k])


def design_matrices(frame: pd.DataFrame):
    data = frame.dropna(subset=["y"])
    y = data["y"].to_numpy()
    x = pd.get_dummies(data[["rep", "entry"]], drop_first=True, dtype=float)
    x = np.column_stack([np.ones(len(y)), x.to_numpy()])
    z = pd.get_dummies(data["rep_block"], dtype=float).to_numpy()
    return y, x, z


def reml_by_hand(frame: pd.DataFrame) -> tuple[float, float]:
    """Block and plot variances maximizing the REML log-likelihood written out directly:
    -1/2 [(n - p) log s2 + log|H| + log|X' H^-1 X|], H = I + g Z Z', s2 = r' H^-1 r / (n - p)
    profiled (Patterson & Thompson 1971, Biometrika 58:545-554; from memory)."""
    y, x, z = design_matrices(frame)
    n, p = x.shape

    def criterion(g: float) -> tuple[float, float]:
        h = np.eye(n) + g * z @ z.T
        h_inv = np.linalg.inv(h)
        xtx = x.T @ h_inv @ x
        beta = np.linalg.solve(xtx, x.T @ h_inv @ y)
        r = y - x @ beta
        s2 = float(r @ h_inv @ r) / (n - p)
        value = (n - p) * np.log(s2) + np.linalg.slogdet(h)[1] + np.linalg.slogdet(xtx)[1]
        return 0.5 * value, s2

    best = optimize.minimize_scalar(lambda g: criterion(g)[0], bounds=(0.0, 50.0),
                                    method="bounded", options={"xatol": 1e-12})
    s2 = criterion(best.x)[1]
    return best.x * s2, s2


def write_fieldbook(frame: pd.DataFrame, path: Path) -> Path:
    frame.rename(columns={"y": "yield"})[["plot", "rep", "iblock", "entry", "yield"]].to_csv(
        path, index=False)
    return path


# --- the REML fit and the adjusted means -----------------------------------------------------


@pytest.mark.parametrize("missing", [(), MISSING], ids=["complete", "three missing plots"])
def test_blues_and_standard_errors_match_mixedlm(missing):
    frame = invented_trial(missing=missing)
    fit = ours(frame)
    reference = mixedlm(frame)
    assert fit.converged and not fit.entries_random and fit.warnings == ()
    assert_allclose(fit.components["incomplete block"], reference.vcomp[0], rtol=REML_RTOL)
    assert_allclose(fit.components["residual"], reference.scale, rtol=REML_RTOL)
    weights = ls_mean_weights(list(reference.fe_params.index), fit.entries)
    # The BLUEs and their GLS covariance move with the variances by about as much as those do.
    assert_allclose(fit.means, weights @ reference.fe_params.to_numpy(), rtol=REML_RTOL)
    assert_allclose(fit.means_cov, weights @ fe_covariance(reference) @ weights.T,
                    rtol=REML_RTOL)
    # statsmodels' cov_params() inverts the whole observed information, whose cross terms
    # between fixed effects and variances are not zero in a finite sample; the usual
    # model-based covariance (X' V^-1 X)^-1 leaves them out. They differ here by under 1%.
    se_statsmodels = np.sqrt(np.diag(
        weights @ reference.cov_params().to_numpy()[:len(weights.T), :len(weights.T)]
        @ weights.T))
    assert_allclose(np.sqrt(np.diag(fit.means_cov)), se_statsmodels, rtol=1e-2)
    assert fit.replication.sum() == ENTRIES * REPS - len(missing)


@pytest.mark.parametrize("missing", [(), MISSING], ids=["complete", "three missing plots"])
def test_variance_components_match_reml_written_out(missing):
    frame = invented_trial(missing=missing)
    fit = ours(frame)
    block, error = reml_by_hand(frame)
    assert_allclose(fit.components["incomplete block"], block, rtol=REML_RTOL)
    assert_allclose(fit.components["residual"], error, rtol=REML_RTOL)


def test_one_group_and_a_group_per_block_agree():
    """The one-group variance-component model Trialdesk fits and the nested random intercept
    (one statsmodels group per incomplete block) are the same model."""
    frame = invented_trial(missing=MISSING)
    one_group = mixedlm(frame)
    per_block = mixedlm(frame, groups="rep_block", re_formula="1", vc_formula=None)
    assert_allclose(one_group.vcomp[0], per_block.cov_re.iloc[0, 0], rtol=REML_RTOL)
    assert_allclose(one_group.scale, per_block.scale, rtol=REML_RTOL)
    assert_allclose(one_group.fe_params, per_block.fe_params, rtol=REML_RTOL)


def test_intra_block_anova_matches_statsmodels_ols():
    frame = invented_trial(missing=MISSING)
    data = frame.dropna(subset=["y"])
    fit = ours(frame)
    rows = {r.source: r for r in fit.anova}
    full = smf.ols("y ~ C(rep_block) + C(entry)", data).fit()
    without_blocks = smf.ols("y ~ C(rep) + C(entry)", data).fit()
    without_entries = smf.ols("y ~ C(rep_block)", data).fit()
    reps_only = smf.ols("y ~ C(rep)", data).fit()
    # rtol 1e-9: the same least-squares sums of squares computed two ways in double precision.
    assert rows["residual"].df == full.df_resid
    assert_allclose(rows["residual"].ms, full.scale, rtol=1e-9)
    assert_allclose(rows["replicate"].ss, reps_only.ess, rtol=1e-9)
    for source, reduced in (("incomplete block", without_blocks), ("entry", without_entries)):
        table = anova_lm(reduced, full)
        assert rows[source].df == table["df_diff"].iloc[1]
        assert_allclose(rows[source].ss, table["ss_diff"].iloc[1], rtol=1e-9)
        assert_allclose(rows[source].f, table["F"].iloc[1], rtol=1e-9)
        assert_allclose(rows[source].p, table["Pr(>F)"].iloc[1], rtol=1e-7)
    assert fit.residual_df == full.df_resid
    # Blocks within replicates: (s - 1) per replicate (Patterson & Williams 1976).
    assert rows["incomplete block"].df == REPS * (ENTRIES // BLOCK_SIZE - 1)


# --- efficiency, heritability ---------------------------------------------------------------


def rcbd_covariance(frame: pd.DataFrame) -> np.ndarray:
    """Covariance of the least-squares means of the complete-block analysis, from statsmodels."""
    data = frame.dropna(subset=["y"])
    fit = smf.ols("y ~ C(rep) + C(entry)", data).fit()
    entries = tuple(pd.unique(data["entry"]))
    weights = ls_mean_weights(list(fit.params.index), entries)
    return weights @ fit.cov_params().to_numpy() @ weights.T


def test_efficiency_above_100_with_strong_blocks_and_near_100_without():
    strong = invented_trial(block_sd=1.0)
    none = invented_trial(block_sd=0.0)
    gain = efficiency_percent(rcbd_covariance(strong), ours(strong).means_cov)
    assert gain > 150.0
    # With no block effects REML finds a small or zero block variance; the efficiency is then
    # close to 100% (a random estimate of a zero variance moves it a few percent either way).
    assert_allclose(efficiency_percent(rcbd_covariance(none), ours(none).means_cov), 100.0,
                    atol=10.0)


def test_blup_ranks_follow_blue_ranks_and_heritability_lies_in_0_1():
    frame = invented_trial(missing=MISSING)
    blue = ours(frame)
    blup = ours(frame, entries_random=True)
    assert blup.entries == blue.entries
    rho = stats.spearmanr(blue.means, blup.means).statistic
    assert rho > 0.95  # shrinkage keeps the order nearly as it is (common practice)
    h2 = generalized_heritability(blup.means_cov, blup.components["entry"])
    assert 0.0 < h2 < 1.0

    reference = mixedlm(frame, formula="y ~ C(rep)",
                        vc_formula={"block": "0 + C(rep_block)", "entry": "0 + C(entry)"})
    variance = dict(zip(reference.model.exog_vc.names, reference.vcomp, strict=True))
    assert_allclose(blup.components["entry"], variance["entry"], rtol=REML_RTOL)
    assert_allclose(blup.components["incomplete block"], variance["block"], rtol=REML_RTOL)
    effects = reference.random_effects[1]
    predicted = np.array([effects[f"entry[C(entry)[{e}]]"] for e in blup.entries])
    # A BLUP minus the mean of the BLUPs does not depend on the fixed part of the mean.
    assert_allclose(blup.means - blup.means.mean(), predicted - predicted.mean(), rtol=1e-4,
                    atol=1e-6)

    # Prediction-error variances from dense matrices at statsmodels' variances (Henderson 1975).
    data = frame.dropna(subset=["y"])
    y = data["y"].to_numpy()
    x = np.column_stack([np.ones(len(y)), pd.get_dummies(data["rep"], drop_first=True,
                                                         dtype=float).to_numpy()])
    zb = pd.get_dummies(data["rep_block"], dtype=float).to_numpy()
    zg = pd.get_dummies(data["entry"], dtype=float)[list(blup.entries)].to_numpy()
    s2g, s2b, s2 = variance["entry"], variance["block"], reference.scale
    v = s2g * zg @ zg.T + s2b * zb @ zb.T + s2 * np.eye(len(y))
    v_inv = np.linalg.inv(v)
    vx = v_inv @ x
    p = v_inv - vx @ np.linalg.solve(x.T @ vx, vx.T)
    pev = s2g * np.eye(len(blup.entries)) - s2g**2 * zg.T @ p @ zg
    # Cullis, Smith & Coombes 2006: H2 = 1 - mean PEV of differences / (2 s2g) (from memory).
    expected = 1.0 - mean_sed_squared(pev) / (2.0 * s2g)
    assert_allclose(h2, expected, rtol=1e-4)  # the variances agree to REML_RTOL, H2 a bit less


# --- analyze() end to end -------------------------------------------------------------------


def test_analyze_alpha_design_from_a_csv_field_book(tmp_path):
    frame = invented_trial(missing=MISSING)
    book = read_fieldbook(write_fieldbook(frame, tmp_path / "alpha.csv"))
    assert book.roles["incomplete_block"] == "iblock"
    assert book.plots["incomplete_block"].tolist() == frame["iblock"].tolist()
    settings = AnalysisSettings(design="alpha", method="tukey", checks=("E01", "E02"))
    analysis = analyze(book, settings)
    result = analysis.trait("yield")
    reference = mixedlm(frame)
    weights = ls_mean_weights(list(reference.fe_params.index), ours(frame).entries)
    by_entry = dict(zip(ours(frame).entries, weights @ reference.fe_params.to_numpy(),
                        strict=True))
    assert result.design == "alpha"
    assert result.n_missing == len(MISSING)
    for row in result.entries:
        assert_allclose(row.mean, by_entry[row.entry], rtol=REML_RTOL)
    assert [row.rank for row in result.entries] == list(range(1, ENTRIES + 1))

    cov = weights @ fe_covariance(reference) @ weights.T
    var = np.diag(cov)
    a, b = np.triu_indices(ENTRIES, k=1)
    sed = np.sqrt(var[a] + var[b] - 2.0 * cov[a, b])
    assert_allclose(result.sed, sed.mean(), rtol=REML_RTOL)
    intra = smf.ols("y ~ C(rep_block) + C(entry)", frame.dropna(subset=["y"])).fit()
    assert result.residual_df == intra.df_resid
    assert_allclose(result.residual_ms, intra.scale, rtol=1e-9)
    # LSD = t(1 - alpha/2, residual df) x average SED (common practice).
    assert_allclose(result.lsd, stats.t.ppf(0.975, intra.df_resid) * sed.mean(), rtol=REML_RTOL)
    assert_allclose(result.efficiency_vs_rcbd,
                    100.0 * mean_sed_squared(rcbd_covariance(frame)) / np.mean(sed**2),
                    rtol=REML_RTOL)
    components = {v.component: v.variance for v in result.variance_components}
    assert_allclose(components["incomplete block"], reference.vcomp[0], rtol=REML_RTOL)
    assert_allclose(components["residual"], reference.scale, rtol=REML_RTOL)
    assert result.heritability is None

    # Each pair's own SE from the covariance, and Tukey-Kramer p-values from scipy's studentized
    # range with q = |difference| / SE x sqrt 2 (Kramer 1956).
    index = {e: i for i, e in enumerate(ours(frame).entries)}
    for pair in result.comparisons[:40]:
        i, j = index[pair.entry_a], index[pair.entry_b]
        se = np.sqrt(cov[i, i] + cov[j, j] - 2.0 * cov[i, j])
        assert_allclose(pair.se, se, rtol=REML_RTOL)
        q = abs(pair.difference) / se * np.sqrt(2.0)
        assert_allclose(pair.p_adjusted, stats.studentized_range.sf(q, ENTRIES, intra.df_resid),
                        rtol=1e-3)  # a change of 1e-5 in the SE moves p by about that much

    document = json.loads(analysis_to_json(analysis))
    trait = document["traits"][0]
    assert document["design"] == "alpha" and document["schema_version"] == 1
    assert trait["efficiency_vs_rcbd"] == result.efficiency_vs_rcbd
    assert {v["component"] for v in trait["variance_components"]} == {"incomplete block",
                                                                      "residual"}
    text = analysis_text(analysis)
    assert "alpha design" in text and "Efficiency relative to the complete-block" in text


def test_letters_agree_with_the_comparisons(tmp_path):
    book = read_fieldbook(write_fieldbook(invented_trial(missing=MISSING), tmp_path / "a.csv"))
    result = analyze(book, AnalysisSettings(design="alpha", method="tukey")).trait("yield")
    letters = {e.entry: set(e.letters) for e in result.entries}
    assert len(result.comparisons) == ENTRIES * (ENTRIES - 1) // 2
    assert any(c.significant for c in result.comparisons)
    for c in result.comparisons:
        # Entries share a letter exactly when the method did not declare them different.
        assert bool(letters[c.entry_a] & letters[c.entry_b]) == (not c.significant)


def test_random_entries_through_analyze(tmp_path):
    book = read_fieldbook(write_fieldbook(invented_trial(), tmp_path / "a.csv"))
    analysis = analyze(book, AnalysisSettings(design="alpha", entries_random=True))
    result = analysis.trait("yield")
    assert result.entries_random and result.comparisons == ()
    assert all(e.letters is None for e in result.entries)
    assert 0.0 < result.heritability < 1.0
    assert result.efficiency_vs_rcbd is None and np.isnan(result.lsd)
    assert "BLUP" in analysis_text(analysis)
    assert json.loads(analysis_to_json(analysis))["traits"][0]["lsd"] is None


def test_settings_keep_the_new_fields():
    settings = AnalysisSettings(design="alpha", spatial="rowcol", entries_random=True)
    assert AnalysisSettings.from_dict(settings.to_dict()) == settings


# --- bad input ------------------------------------------------------------------------------


def test_alpha_design_needs_an_incomplete_block_column(tmp_path):
    frame = invented_trial()
    path = tmp_path / "no_blocks.csv"
    frame.rename(columns={"y": "yield"})[["plot", "rep", "entry", "yield"]].to_csv(path,
                                                                                   index=False)
    with pytest.raises(TrialInputError) as info:
        analyze(read_fieldbook(path), AnalysisSettings(design="alpha"))
    message = str(info.value)
    assert "incomplete-block column" in message and "'iblock'" in message
    assert "no_blocks.csv" in message


def test_alpha_design_needs_replicates(tmp_path):
    frame = invented_trial()
    path = tmp_path / "no_reps.csv"
    frame.rename(columns={"y": "yield"})[["plot", "iblock", "entry", "yield"]].to_csv(
        path, index=False)
    with pytest.raises(TrialInputError, match="an alpha design needs a block"):
        analyze(read_fieldbook(path), AnalysisSettings(design="alpha"))


def test_unknown_design_is_refused(tmp_path):
    book = read_fieldbook(write_fieldbook(invented_trial(), tmp_path / "a.csv"))
    with pytest.raises(TrialInputError, match="choose rcbd, crd or alpha"):
        analyze(book, AnalysisSettings(design="lattice"))


@pytest.mark.parametrize("header", ["Incomplete block", "iblock", "Sub-block", "SUBBLOCK",
                                    "inc. block", "incomplete_block"])
def test_incomplete_block_column_found_by_its_usual_names(tmp_path, header):
    path = tmp_path / "names.csv"
    path.write_text(f"entry,rep,{header},yield\nA,1,1,4\nB,1,2,5\nA,2,1,4.5\nB,2,2,5.5\n",
                    encoding="utf-8")
    book = read_fieldbook(path)
    assert book.roles["incomplete_block"] == header
    assert book.traits == ("yield",)


def test_a_field_book_without_incomplete_blocks_reads_as_before(tmp_path):
    path = tmp_path / "plain.csv"
    path.write_text("entry,rep,yield\nA,1,4\nB,1,5\nA,2,4.5\nB,2,5.5\n", encoding="utf-8")
    book = read_fieldbook(path)
    assert "incomplete_block" not in book.roles and "incomplete_block" not in book.plots
