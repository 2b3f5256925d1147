"""Field-trend adjustment: the neighbour covariate and the row-column model, against references.

References used here
--------------------
- The Papadakis covariate (Papadakis 1937, from memory) computed by hand on a 3 x 4 field (the
  sums are written out in the comments), and by a plain loop over the plots in the larger tests.
- statsmodels ``ols`` with the same covariate, ``y ~ C(block) + C(entry) + covariate``: residual
  mean square and degrees of freedom, slope, residuals and the entry means at the mean covariate.
- statsmodels ``MixedLM`` fitted directly with the formula API, field rows and columns (and
  incomplete blocks) as variance components: variances, fixed effects, their covariance and the
  predicted row and column effects.

All data are invented, drawn with a fixed seed.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose

from trialdesk.core.alpha_lattice import fit_mixed
from trialdesk.core.analysis import analyze
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.json_output import analysis_to_json
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.spatial import entry_mean_residuals, neighbour_covariate
from trialdesk.core.summary_text import analysis_text

# With field rows and columns (and blocks) as components the REML surface is flat near its top:
# statsmodels' own searches (BFGS, L-BFGS, simplex, Powell) spread over about 2.5e-4 of the
# components on these data. Agreement to rtol=5e-4 says the same optimum was found; the means and
# their standard errors move far less.
REML_RTOL = 5e-4
MEANS_RTOL = 1e-6  # means depend on the variances only through their ratios, and weakly
MISSING = (7, 33, 60)

# --- the covariate by hand --------------------------------------------------------------------

# A 3 x 4 field, each field row one block with the four entries A-D:
#   row 1:  A 10   B 12   C 11   D 9
#   row 2:  B 13   D 10   A 12   C 12
#   row 3:  C 10   A 9    D 8    B 11
# Entry means: A (10 + 12 + 9)/3 = 31/3, B (12 + 13 + 11)/3 = 12, C (11 + 12 + 10)/3 = 11,
# D (9 + 10 + 8)/3 = 9. Residuals y - entry mean:
#   row 1:  -1/3   0     0     0
#   row 2:   1     1     5/3   1
#   row 3:  -1    -4/3  -1    -1
SMALL = pd.DataFrame({
    "row": [1] * 4 + [2] * 4 + [3] * 4,
    "column": [1, 2, 3, 4] * 3,
    "entry": list("ABCD") + list("BDAC") + list("CADB"),
    "y": [10.0, 12, 11, 9, 13, 10, 12, 12, 10, 9, 8, 11],
})


def test_entry_mean_residuals_by_hand():
    expected = [-1 / 3, 0, 0, 0, 1, 1, 5 / 3, 1, -1, -4 / 3, -1, -1]
    # rtol 1e-12: a few additions and one division in double precision.
    assert_allclose(entry_mean_residuals(SMALL["y"].to_numpy(), SMALL["entry"].to_numpy()),
                    expected, rtol=1e-12, atol=1e-12)


def test_neighbour_covariate_by_hand():
    residuals = entry_mean_residuals(SMALL["y"].to_numpy(), SMALL["entry"].to_numpy())
    covariate, used = neighbour_covariate(residuals, SMALL["row"].to_numpy(),
                                          SMALL["column"].to_numpy())
    # Mean of the left and right neighbours in the same row; an edge plot has one:
    #   row 1:  0 (right 0)   (-1/3 + 0)/2 = -1/6   (0 + 0)/2 = 0        0 (left 0)
    #   row 2:  1 (right 1)   (1 + 5/3)/2 = 4/3     (1 + 1)/2 = 1        5/3 (left 5/3)
    #   row 3:  -4/3          (-1 - 1)/2 = -1       (-4/3 - 1)/2 = -7/6  -1 (left -1)
    expected = [0, -1 / 6, 0, 0, 1, 4 / 3, 1, 5 / 3, -4 / 3, -1, -7 / 6, -1]
    assert_allclose(covariate, expected, rtol=1e-12, atol=1e-12)
    assert used.tolist() == [1, 2, 2, 1] * 3


def test_neighbour_covariate_skips_missing_neighbours():
    residuals = entry_mean_residuals(SMALL["y"].to_numpy(), SMALL["entry"].to_numpy())
    residuals[6] = np.nan  # row 2, column 3 has no value
    covariate, used = neighbour_covariate(residuals, SMALL["row"].to_numpy(),
                                          SMALL["column"].to_numpy())
    # Row 2: column 2 keeps only its left neighbour (1); column 4 has no neighbour left with a
    # value, so its covariate is 0; the missing plot's own covariate is (1 + 1)/2 = 1.
    assert_allclose(covariate[4:8], [1.0, 1.0, 1.0, 0.0], rtol=1e-12, atol=1e-12)
    assert used[4:8].tolist() == [1, 1, 2, 0]
    # Plots in other rows are no one's neighbours across rows; columns need not start at 1.
    shifted, _ = neighbour_covariate(residuals, SMALL["row"].to_numpy() + 10,
                                     SMALL["column"].to_numpy() + 100)
    assert_allclose(shifted, covariate, rtol=0, atol=0)


# --- an invented field ------------------------------------------------------------------------


def invented_field(row_sd: float = 0.8, seed: int = 21, missing: tuple[int, ...] = ()
                   ) -> pd.DataFrame:
    """20 entries in 4 complete blocks on a field of 8 rows x 10 columns (block b in rows 2b + 1
    and 2b + 2, entries at random within the block). Yield = 6 + entry (sd 0.5) + block (sd
    0.3) + field row effect (sd ``row_sd``) + 0.05 per column + plot error (sd 0.3)."""
    rng = np.random.default_rng(seed)
    rows = []
    for b in range(4):
        for k, e in enumerate(rng.permutation(20)):
            rows.append({"block": f"B{b + 1}", "entry": f"G{e + 1:02d}", "row": 2 * b + 1 + k // 10,
                         "column": k % 10 + 1, "plot": f"{b + 1}{k + 1:02d}"})
    frame = pd.DataFrame(rows)
    entry = rng.normal(0, 0.5, 20)
    block = rng.normal(0, 0.3, 4)
    row_effect = rng.normal(0, row_sd, 8)
    frame["y"] = (6.0 + entry[frame["entry"].str[1:].astype(int) - 1]
                  + block[frame["block"].str[1:].astype(int) - 1]
                  + row_effect[frame["row"] - 1] + 0.05 * frame["column"]
                  + rng.normal(0, 0.3, len(frame)))
    frame.loc[list(missing), "y"] = np.nan
    return frame


def book_of(frame: pd.DataFrame, tmp_path, columns=("plot", "block", "row", "column", "entry")):
    path = tmp_path / "field.csv"
    frame.rename(columns={"y": "yield"})[[*columns, "yield"]].to_csv(path, index=False)
    return read_fieldbook(path)


def covariate_by_loop(frame: pd.DataFrame) -> np.ndarray:
    """The Papadakis covariate with a plain loop: y minus its entry's mean, averaged over the
    plots with a value at column - 1 and column + 1 of the same row (0 without any)."""
    means = frame.groupby("entry")["y"].mean()
    residual = {(r.row, r.column): r.y - means[r.entry] for r in frame.itertuples()
                if not np.isnan(r.y)}
    out = []
    for r in frame.itertuples():
        near = [residual[(r.row, c)] for c in (r.column - 1, r.column + 1)
                if (r.row, c) in residual]
        out.append(float(np.mean(near)) if near else 0.0)
    return np.array(out)


def ls_means(fit, entries, covariate_mean: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares means (blocks averaged, at the mean covariate) and their covariance, from a
    statsmodels fit's parameters."""
    params = fit.fe_params if hasattr(fit, "fe_params") else fit.params
    names = list(params.index)
    blocks = [n for n in names if n.startswith("C(block)")]
    weights = np.zeros((len(entries), len(names)))
    weights[:, 0] = 1.0
    for name in blocks:
        weights[:, names.index(name)] = 1.0 / (len(blocks) + 1)
    if "covariate" in names:
        weights[:, names.index("covariate")] = covariate_mean
    for i, e in enumerate(entries):
        if f"C(entry)[T.{e}]" in names:
            weights[i, names.index(f"C(entry)[T.{e}]")] = 1.0
    if hasattr(fit, "fe_params"):
        hessian, _ = fit.model.hessian(fit.params_object)
        cov = np.linalg.inv(-hessian[:len(names), :len(names)])  # (X' V^-1 X)^-1
    else:
        cov = fit.cov_params().to_numpy()
    return weights @ params.to_numpy(), weights @ cov @ weights.T


def mixedlm(frame: pd.DataFrame, vc: dict[str, str]):
    data = frame.dropna(subset=["y"]).assign(one=1)
    model = smf.mixedlm("y ~ C(block) + C(entry)", data, groups="one", re_formula="0",
                        vc_formula=vc)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # boundary and convergence notes of statsmodels
        # From statsmodels' default start one search alone can stall on a flat ridge of the
        # likelihood (several components, one of them near zero): the reference is the
        # converged search with the highest REML log-likelihood.
        fits = [model.fit(reml=True, method=["bfgs"], gtol=1e-8),
                model.fit(reml=True, method=["lbfgs"]),
                model.fit(reml=True, method=["nm"], maxiter=5000)]
    return max((f for f in fits if f.converged), key=lambda f: f.llf)


@pytest.mark.parametrize("missing", [(), MISSING], ids=["complete", "three missing plots"])
def test_papadakis_ancova_matches_statsmodels_ols(tmp_path, missing):
    frame = invented_field(missing=missing)
    analysis = analyze(book_of(frame, tmp_path),
                       AnalysisSettings(design="rcbd", spatial="papadakis", method="lsd"))
    result = analysis.trait("yield")
    frame["covariate"] = covariate_by_loop(frame)
    data = frame.dropna(subset=["y"])
    reference = smf.ols("y ~ C(block) + C(entry) + covariate", data).fit()
    # rtol 1e-9: the same least-squares fit computed two ways in double precision.
    assert result.residual_df == reference.df_resid
    assert_allclose(result.residual_ms, reference.scale, rtol=1e-9)
    components = {v.component: v.variance for v in result.variance_components}
    assert_allclose(components["residual"], reference.scale, rtol=1e-9)
    entries = [e.entry for e in result.entries]
    means, cov = ls_means(reference, entries, data["covariate"].mean())
    assert_allclose([e.mean for e in result.entries], means, rtol=1e-9)
    assert_allclose([e.se for e in result.entries], np.sqrt(np.diag(cov)), rtol=1e-9)
    rows = {r.source: r for r in result.anova}
    assert_allclose(rows["covariate"].p, reference.pvalues["covariate"], rtol=1e-7)

    trend = result.field_trend_frame()
    assert trend["plot"].tolist() == data["plot"].tolist()
    slope = reference.params["covariate"]
    assert_allclose(trend["trend"], slope * (data["covariate"] - data["covariate"].mean()),
                    rtol=1e-9, atol=1e-12)
    assert_allclose(trend["residual"], reference.resid, rtol=1e-8, atol=1e-12)
    assert trend[["row", "column"]].to_numpy().tolist() == data[["row", "column"]].to_numpy(
        ).tolist()


def test_residual_variance_falls_with_a_strong_row_trend(tmp_path):
    settings = AnalysisSettings(design="rcbd", spatial="papadakis")
    book = book_of(invented_field(row_sd=0.8), tmp_path)
    result = analyze(book, settings).trait("yield")
    options = {o.method: o for o in result.spatial_options}
    plain = analyze(book, AnalysisSettings(design="rcbd")).trait("yield")
    assert_allclose(options["none"].residual_variance, plain.residual_ms, rtol=1e-9)
    assert options["none"].percent_of_plain == 100.0
    assert options["papadakis"].chosen and not options["rowcol"].chosen
    # Field rows differing by sd 0.8 inside blocks of two rows swell the plain error (plot error
    # alone: 0.3^2 = 0.09); both adjustments take much of it out, far more than on the same
    # field without row effects, where there is little to take.
    (tmp_path / "flat").mkdir()
    flat = analyze(book_of(invented_field(row_sd=0.0), tmp_path / "flat"), settings).trait("yield")
    flat_options = {o.method: o for o in flat.spatial_options}
    for method in ("papadakis", "rowcol"):
        assert options[method].percent_of_plain < 75.0
        assert options[method].percent_of_plain < flat_options[method].percent_of_plain - 20.0
    assert result.efficiency_vs_rcbd > 150.0
    text = analysis_text(analyze(book, settings))
    assert "Field trend: residual variance" in text and "used for the means" in text


@pytest.mark.parametrize("missing", [(), MISSING], ids=["complete", "three missing plots"])
def test_row_column_model_matches_mixedlm(tmp_path, missing):
    frame = invented_field(missing=missing)
    analysis = analyze(book_of(frame, tmp_path), AnalysisSettings(design="rcbd", spatial="rowcol"))
    result = analysis.trait("yield")
    reference = mixedlm(frame, {"row": "0 + C(row)", "column": "0 + C(column)"})
    variance = dict(zip(reference.model.exog_vc.names, reference.vcomp, strict=True))
    components = {v.component: v.variance for v in result.variance_components}
    assert_allclose(components["field row"], variance["row"], rtol=REML_RTOL)
    assert_allclose(components["field column"], variance["column"], rtol=REML_RTOL)
    assert_allclose(components["residual"], reference.scale, rtol=REML_RTOL)
    entries = [e.entry for e in result.entries]
    means, cov = ls_means(reference, entries)
    assert_allclose([e.mean for e in result.entries], means, rtol=MEANS_RTOL)
    # Standard errors go with the square root of the plot variance, found to about 1e-4.
    assert_allclose([e.se for e in result.entries], np.sqrt(np.diag(cov)), rtol=1e-4)

    # The trend of a plot: its row's and its column's predicted effects.
    effects = reference.random_effects[1]
    data = frame.dropna(subset=["y"])
    expected = [effects[f"row[C(row)[{r}]]"] + effects[f"column[C(column)[{c}]]"]
                for r, c in zip(data["row"], data["column"], strict=True)]
    trend = result.field_trend_frame()
    # atol 1e-5: predicted effects of size 0.1-1 move with the variances by about REML_RTOL.
    assert_allclose(trend["trend"], expected, rtol=0, atol=1e-5)
    assert_allclose(trend["value"] - trend["trend"] - trend["residual"],
                    reference.fittedvalues - np.asarray(expected), rtol=0, atol=1e-5)
    document = json.loads(analysis_to_json(analysis))
    assert len(document["traits"][0]["field_trend"]) == len(data)
    assert document["spatial"] == "rowcol"


def test_row_column_model_on_an_alpha_design_matches_mixedlm(tmp_path):
    """Incomplete blocks, rows and columns random together: 24 entries, 3 replicates, blocks of
    4; each replicate two field rows of 12 plots, three blocks side by side in each."""
    rng = np.random.default_rng(8)
    array = rng.permutation(24).reshape(6, 4)
    rows = []
    for r in range(3):
        for j in range(6):
            for p, e in enumerate(rng.permutation([array[(j + r * c) % 6, c] for c in range(4)])):
                rows.append({"block": f"R{r + 1}", "iblock": str(j + 1), "entry": f"E{e + 1:02d}",
                             "row": 2 * r + 1 + j // 3, "column": 4 * (j % 3) + p + 1,
                             "plot": f"{r + 1}{4 * j + p + 1:02d}"})
    frame = pd.DataFrame(rows)
    frame["rep_block"] = frame["block"] + "/" + frame["iblock"]
    effect = {b: v for b, v in zip(frame["rep_block"].unique(), rng.normal(0, 0.6, 18),
                                   strict=True)}
    frame["y"] = (6 + rng.normal(0, 0.5, 24)[frame["entry"].str[1:].astype(int) - 1]
                  + frame["rep_block"].map(effect) + 0.04 * frame["column"]
                  + rng.normal(0, 0.5, 6)[frame["row"] - 1] + rng.normal(0, 0.3, len(frame)))
    book = book_of(frame, tmp_path, columns=("plot", "block", "iblock", "row", "column",
                                             "entry"))
    result = analyze(book, AnalysisSettings(design="alpha", spatial="rowcol")).trait("yield")
    reference = mixedlm(frame, {"block": "0 + C(rep_block)", "row": "0 + C(row)",
                                "column": "0 + C(column)"})
    variance = dict(zip(reference.model.exog_vc.names, reference.vcomp, strict=True))
    components = {v.component: v.variance for v in result.variance_components}
    for ours, theirs in (("incomplete block", "block"), ("field row", "row"),
                         ("field column", "column")):
        # atol: a component near zero is compared on the scale of the plot variance.
        assert_allclose(components[ours], variance[theirs], rtol=REML_RTOL, atol=1e-6)
    assert_allclose(components["residual"], reference.scale, rtol=REML_RTOL)
    means, _ = ls_means(reference, [e.entry for e in result.entries])
    assert_allclose([e.mean for e in result.entries], means, rtol=MEANS_RTOL)


def test_a_term_the_same_as_another_is_left_out(tmp_path):
    """Field rows that are exactly the blocks cannot be told apart from them."""
    frame = invented_field()
    frame["row"] = frame["block"].str[1:].astype(int)
    frame["column"] = frame.groupby("block").cumcount() + 1
    result = analyze(book_of(frame, tmp_path),
                     AnalysisSettings(design="rcbd", spatial="rowcol")).trait("yield")
    assert any("field row term is left out" in w for w in result.warnings)
    assert "field row" not in {v.component for v in result.variance_components}


# --- bad input --------------------------------------------------------------------------------


def test_a_field_trend_needs_row_and_column_columns(tmp_path):
    book = book_of(invented_field(), tmp_path, columns=("plot", "block", "column", "entry"))
    with pytest.raises(TrialInputError) as info:
        analyze(book, AnalysisSettings(spatial="papadakis"))
    assert "no row column was found" in str(info.value) and "'row'" in str(info.value)
    assert "field.csv" in str(info.value)


def test_a_field_trend_needs_every_position(tmp_path):
    frame = invented_field()
    frame["row"] = frame["row"].astype("Int64")
    frame.loc[12, "row"] = pd.NA
    with pytest.raises(TrialInputError) as info:
        analyze(book_of(frame, tmp_path), AnalysisSettings(spatial="rowcol"))
    error = info.value
    assert error.plot == frame.loc[12, "plot"] and error.column == "row" and error.row == 14
    assert "no field row" in error.message


def test_two_plots_in_one_position_are_refused(tmp_path):
    frame = invented_field()
    frame.loc[5, ["row", "column"]] = frame.loc[4, ["row", "column"]].to_numpy()
    with pytest.raises(TrialInputError) as info:
        analyze(book_of(frame, tmp_path), AnalysisSettings(spatial="papadakis"))
    assert info.value.plot == frame.loc[5, "plot"]
    assert f"as plot {frame.loc[4, 'plot']}" in info.value.message


def test_a_constant_covariate_is_refused():
    frame = invented_field()
    with pytest.raises(TrialInputError, match="covariate is constant"):
        fit_mixed(frame["y"].to_numpy(), frame["entry"].to_numpy(),
                  fixed=[("block", frame["block"].to_numpy())], covariate=np.ones(len(frame)),
                  trait="yield")


def test_unknown_field_trend_adjustment_is_refused(tmp_path):
    with pytest.raises(TrialInputError, match="choose one of none, rowcol, papadakis"):
        analyze(book_of(invented_field(), tmp_path), AnalysisSettings(spatial="smooth"))
