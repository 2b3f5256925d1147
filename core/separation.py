"""Mean separation: which entries differ, by the method the breeder chose.

Every method works from the trial's own least-squares means, their covariance and the residual
degrees of freedom, so blocks, missing plots and unequal replication are all accounted for (a
one-way pooled variance that ignored the blocks would be wrong for an RCBD).

Methods and their sources
-------------------------
lsd         Fisher's least significant difference, protected by the entry F-test (Fisher 1935, The
            Design of Experiments; Steel, Torrie & Dickey 1997, sec. 8.5): pairs are declared
            different only when the F-test is significant.
bonferroni  Unadjusted t-tests with p multiplied by m (Dunn 1961, JASA 56:52-64).
sidak       p adjusted to 1 - (1 - p)^m (Sidak 1967, JASA 62:626-633).
holm        Sequentially rejective Bonferroni (Holm 1979, Scand. J. Stat. 6:65-70).
bh          Benjamini & Hochberg (1995, JRSS-B 57:289-300): controls the false discovery rate, not
            the family-wise error rate; for screening many entries.
tukey       Tukey's HSD (Tukey 1953), Tukey-Kramer for unequal replication (Kramer 1956,
            Biometrics 12:307-310).
scheffe     Scheffe (1953, Biometrika 40:87-104): protects every contrast, so the widest intervals.
snk         Student-Newman-Keuls (Newman 1939, Biometrika 31:20-30; Keuls 1952, Euphytica
            1:112-122).
duncan      Duncan's multiple range test (Duncan 1955, Biometrics 11:1-42).
dunnett     Each test entry against each check (Dunnett 1955, JASA 50:1096-1121; Dunnett 1964,
            Biometrics 20:482-491), two-sided or one-sided.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from trialdesk.core.dunnett import dunnett_quantile, dunnett_sf
from trialdesk.core.padjust import adjust_pvalues, familywise_error, per_comparison_level
from trialdesk.core.range_tests import step_down_range, tukey_kramer
from trialdesk.core.results import Comparison, FamilyError
from trialdesk.core.studentized_range import range_quantile

METHODS = ("lsd", "bonferroni", "sidak", "holm", "bh", "tukey", "scheffe", "snk", "duncan",
           "dunnett")

METHOD_NAMES = {
    "lsd": "Fisher's LSD (protected by the F-test)",
    "bonferroni": "Bonferroni",
    "sidak": "Sidak",
    "holm": "Holm (sequential Bonferroni)",
    "bh": "Benjamini-Hochberg (false discovery rate)",
    "tukey": "Tukey's HSD (Tukey-Kramer)",
    "scheffe": "Scheffe",
    "snk": "Student-Newman-Keuls",
    "duncan": "Duncan's multiple range test",
    "dunnett": "Dunnett (entries against checks)",
}

CHECK_DIRECTIONS = ("both", "above", "below")


@dataclass(frozen=True, slots=True, kw_only=True)
class Separation:
    """What a method declared: the comparisons, the t x t ``different`` matrix over the entries in
    the order given (None for Dunnett, which does not compare every pair), and the error rates."""

    comparisons: tuple[Comparison, ...]
    different: np.ndarray | None
    family: FamilyError


def _pair_se(cov: np.ndarray) -> np.ndarray:
    var = np.diag(cov)
    return np.sqrt(np.maximum(var[:, None] + var[None, :] - 2.0 * cov, 0.0))


def _t_level(crit: float, df: float, two_sided: bool = True) -> float:
    """Per-comparison level implied by a critical t value."""
    return float((2.0 if two_sided else 1.0) * stats.t.sf(crit, df))


def _comparisons(entries, ia, ib, diff, se, p, lower, upper, significant) -> tuple[Comparison, ...]:
    return tuple(
        Comparison(
            entry_a=entries[a],
            entry_b=entries[b],
            difference=float(diff[k]),
            se=float(se[k]),
            p_adjusted=float(p[k]),
            lower=None if lower is None else float(lower[k]),
            upper=None if upper is None else float(upper[k]),
            significant=bool(significant[k]),
        )
        for k, (a, b) in enumerate(zip(ia, ib, strict=True))
    )


def separate(
    entries: tuple[str, ...],
    means: np.ndarray,
    cov: np.ndarray,
    df: int,
    *,
    method: str,
    alpha: float,
    entry_p: float,
    checks: tuple[str, ...] = (),
    check_direction: str = "both",
) -> Separation:
    """Compare entry means by ``method``.

    Parameters
    ----------
    entries, means, cov : entry codes, their least-squares means and the covariance of the means.
        Pairs are formed in this order (entry_a before entry_b), so pass them ranked.
    df : residual degrees of freedom.
    entry_p : p-value of the entry F-test (protects the LSD).
    checks, check_direction : used by Dunnett.
    """
    if method == "dunnett":
        return _dunnett(entries, means, cov, df, alpha, checks, check_direction)
    t = len(entries)
    ia, ib = np.triu_indices(t, k=1)
    se_matrix = _pair_se(cov)
    diff = means[ia] - means[ib]
    se = se_matrix[ia, ib]
    m = len(diff)
    tstat = diff / se
    p_raw = 2.0 * stats.t.sf(np.abs(tstat), df)
    lower = upper = None
    level = (alpha, alpha)

    if method == "lsd":
        p = p_raw
        significant = (p <= alpha) & (entry_p <= alpha)
        half = stats.t.ppf(1 - alpha / 2, df) * se
    elif method in ("bonferroni", "sidak", "holm", "bh"):
        p = adjust_pvalues(p_raw, method)
        significant = p <= alpha
        level = per_comparison_level(alpha, m, method)
        half = None
        if method in ("bonferroni", "sidak"):
            half = stats.t.ppf(1 - level[0] / 2, df) * se
    elif method == "tukey":
        p, half = tukey_kramer(diff, se, t, df, alpha)
        significant = p <= alpha
        level = (_t_level(range_quantile(alpha, t, df) / np.sqrt(2), df),) * 2
    elif method == "scheffe":
        # Scheffe 1953: a pair differs when t^2 / (t - 1) exceeds F(alpha; t - 1, df).
        p = stats.f.sf(tstat**2 / (t - 1), t - 1, df)
        significant = p <= alpha
        crit = np.sqrt((t - 1) * stats.f.isf(alpha, t - 1, df))
        half = crit * se
        level = (_t_level(crit, df),) * 2
    elif method in ("snk", "duncan"):
        p_matrix, different = step_down_range(means, se_matrix, df, alpha, method)
        p = p_matrix[ia, ib]
        significant = different[ia, ib]
        half = None
        # The widest range is tested at the level of Tukey (SNK) or at 1 - (1 - alpha)^(t - 1)
        # (Duncan 1955); adjacent means at alpha itself.
        widest = alpha if method == "snk" else 1 - (1 - alpha) ** (t - 1)
        level = (_t_level(range_quantile(widest, t, df) / np.sqrt(2), df), alpha)
    else:
        raise ValueError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}")

    if half is not None:
        lower, upper = diff - half, diff + half
    comparisons = _comparisons(entries, ia, ib, diff, se, p, lower, upper, significant)
    different = np.zeros((t, t), dtype=bool)
    different[ia, ib] = significant
    different |= different.T
    family = FamilyError(
        m=m,
        familywise_unadjusted=familywise_error(alpha, m),
        per_comparison_min=float(min(level)),
        per_comparison_max=float(max(level)),
    )
    return Separation(comparisons=comparisons, different=different, family=family)


def _dunnett(entries, means, cov, df, alpha, checks, check_direction) -> Separation:
    if not checks:
        raise ValueError("Dunnett's method compares entries with checks: name at least one check")
    index = {e: i for i, e in enumerate(entries)}
    check_idx = [index[c] for c in checks]
    tests = [i for i in range(len(entries)) if i not in set(check_idx)]
    pairs = [(i, c) for i in tests for c in check_idx]
    ia = np.array([a for a, _ in pairs])
    ic = np.array([c for _, c in pairs])
    diff = means[ia] - means[ic]
    # Covariance of d_k = m_i - m_c and d_l = m_j - m_c' from the covariance of the means.
    cov_d = cov[np.ix_(ia, ia)] - cov[np.ix_(ia, ic)] - cov[np.ix_(ic, ia)] + cov[np.ix_(ic, ic)]
    se = np.sqrt(np.diag(cov_d))
    corr = cov_d / np.outer(se, se)
    tstat = diff / se
    alternative = {"both": "two-sided", "above": "greater", "below": "less"}[check_direction]
    p = dunnett_sf(tstat, corr, df, alternative)
    # The "less" critical value is returned negative (P(min T <= c) = alpha); intervals and the
    # per-comparison level use its size.
    crit = abs(dunnett_quantile(alpha, corr, df, alternative))
    lower = diff - crit * se if alternative != "less" else None
    upper = diff + crit * se if alternative != "greater" else None
    significant = p <= alpha
    comparisons = _comparisons(entries, ia, ic, diff, se, p, lower, upper, significant)
    m = len(pairs)
    level = _t_level(crit, df, two_sided=alternative == "two-sided")
    family = FamilyError(
        m=m,
        familywise_unadjusted=familywise_error(alpha, m),
        per_comparison_min=level,
        per_comparison_max=level,
    )
    return Separation(comparisons=comparisons, different=None, family=family)
