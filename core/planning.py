"""Numbers for choosing an analysis, and for reading results, that the result objects lack.

The set-up view shows, while the breeder chooses a method and a level, how many comparisons that
makes, what each comparison is then tested at and the smallest difference the trial can declare.
The result views need the residual of every plot and the confidence limits of the entry means.
Everything here is pure computation on numbers and field books; nothing is rounded.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pandas as pd
from scipy import stats

from trialdesk.core.dunnett import dunnett_quantile
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import FieldBook
from trialdesk.core.least_squares import TrialFit, fit_trial
from trialdesk.core.padjust import per_comparison_level
from trialdesk.core.results import TraitResult
from trialdesk.core.separation import CHECK_DIRECTIONS, METHODS
from trialdesk.core.studentized_range import range_quantile

STEP_METHODS = ("holm", "bh", "snk", "duncan")  # the per-pair critical value varies by step

_SENTENCES = {
    "lsd": "Tests each pair at alpha once the F-test for entries is significant; it guards no "
           "family of comparisons, so keep it for a few comparisons planned before the trial.",
    "bonferroni": "Holds the chance of any false difference among all comparisons at alpha by "
                  "testing each at alpha divided by their number; safe, but it loses power "
                  "quickly as entries are added.",
    "sidak": "Holds the chance of any false difference among all comparisons at alpha, with a "
             "level per comparison a little less strict than Bonferroni's.",
    "holm": "Holds the chance of any false difference at alpha, stepping from the strictest "
            "level towards alpha, so it declares at least as many differences as Bonferroni.",
    "bh": "Holds the expected share of false differences among those declared (the false "
          "discovery rate) at alpha, not the chance of any; for screening many entries.",
    "tukey": "Holds the chance of any false difference among all pairs at alpha; the usual "
             "choice for comparing every entry with every other.",
    "scheffe": "Holds the chance of any false difference at alpha for every contrast, not only "
               "pairs; the widest margins, for comparisons chosen after seeing the data.",
    "snk": "Tests ranges of ranked means step by step, each at alpha; it declares more than "
           "Tukey, but the chance of some false difference among all pairs can exceed alpha.",
    "duncan": "Step-by-step range tests whose levels loosen for wider ranges; it declares almost "
              "as much as unadjusted tests and guards the family weakly.",
    "dunnett": "Compares each test entry with the checks only, holding the chance of any false "
               "difference among those comparisons at alpha; for asking which entries beat "
               "the checks.",
}


def _check_method(method: str) -> None:
    if method not in METHODS:
        raise TrialInputError(f"unknown method '{method}': choose one of {', '.join(METHODS)}")


def method_sentence(method: str) -> str:
    """What a mean-separation method controls and when it is used, in one plain sentence."""
    _check_method(method)
    return _SENTENCES[method]


def comparisons(n_entries: int, method: str, n_checks: int = 0) -> int:
    """How many comparisons a method makes among ``n_entries`` entries.

    All pairs, t(t - 1)/2, for every method but Dunnett's, which compares each of the t - c test
    entries with each of the c checks: (t - c) c.

    >>> comparisons(25, "tukey")
    300
    >>> comparisons(25, "dunnett", 2)
    46
    """
    _check_method(method)
    if method == "dunnett":
        return max(n_entries - n_checks, 0) * n_checks
    return n_entries * (n_entries - 1) // 2


def _balanced_dunnett_corr(n_entries: int, n_checks: int) -> np.ndarray:
    """Correlation of the t statistics of every test entry against every check in a balanced
    trial: comparisons sharing the entry or the check correlate 1/2, others not at all (Dunnett
    1955, JASA 50:1096-1121, sec. 2, with equal replication); one check gives all 1/2."""
    tests = np.repeat(np.arange(n_entries - n_checks), n_checks)
    checks = np.tile(np.arange(n_checks), n_entries - n_checks)
    same_test = tests[:, None] == tests[None, :]
    same_check = checks[:, None] == checks[None, :]
    return (same_test.astype(float) + same_check) / 2.0


def _check_inputs(n_entries: int, df: float, alpha: float, method: str, n_checks: int,
                  check_direction: str) -> None:
    _check_method(method)
    if not 0 < alpha < 1:
        raise TrialInputError(f"alpha must lie between 0 and 1, not {alpha}")
    if n_entries < 2:
        raise TrialInputError("comparing entries needs at least two entries")
    if not df > 0:
        raise TrialInputError("there are no residual degrees of freedom to estimate error from")
    if check_direction not in CHECK_DIRECTIONS:
        raise TrialInputError(f"unknown check direction '{check_direction}': choose one of "
                              f"{', '.join(CHECK_DIRECTIONS)}")
    if method == "dunnett" and not 0 < n_checks < n_entries:
        raise TrialInputError("Dunnett's method compares entries with checks: choose at least "
                              "one check and leave at least one test entry")


@lru_cache(maxsize=512)  # a pure function of numbers; the set-up read-out asks again and again
def critical_values(method: str, alpha: float, n_entries: int, df: float, *, n_checks: int = 0,
                    check_direction: str = "both") -> tuple[float, float]:
    """The per-pair critical value a method compares |difference| / SED with, in a balanced trial.

    Returns
    -------
    tuple of float
        ``(strictest, loosest)``: equal for single-step methods; for Holm and Benjamini-Hochberg
        the first and last step of the p-value sequence, for Student-Newman-Keuls and Duncan the
        widest range (all entries) and two adjacent means.
    """
    _check_inputs(n_entries, df, alpha, method, n_checks, check_direction)
    t, m = n_entries, comparisons(n_entries, method, n_checks)

    def t_two_sided(level: float) -> float:
        return float(stats.t.isf(level / 2.0, df))

    if method == "lsd":
        crit = t_two_sided(alpha)  # Fisher 1935; Steel, Torrie & Dickey 1997, eq. 8.1
        return crit, crit
    if method in ("bonferroni", "sidak", "holm", "bh"):
        low, high = per_comparison_level(alpha, m, method)
        return t_two_sided(low), t_two_sided(high)
    if method == "tukey":
        # Tukey's HSD: q(alpha; t, df) / sqrt 2 in units of the SED (Tukey 1953; Kramer 1956)
        crit = range_quantile(alpha, t, df) / np.sqrt(2.0)
        return float(crit), float(crit)
    if method == "scheffe":
        # Scheffe 1953, Biometrika 40:87-104: sqrt((t - 1) F(alpha; t - 1, df))
        crit = float(np.sqrt((t - 1) * stats.f.isf(alpha, t - 1, df)))
        return crit, crit
    if method in ("snk", "duncan"):
        # The widest range (t means) at alpha (Newman 1939; Keuls 1952) or at Duncan's (1955,
        # Biometrics 11:1-42) protection level 1 - (1 - alpha)^(t - 1); adjacent means at alpha.
        widest = alpha if method == "snk" else 1.0 - (1.0 - alpha) ** (t - 1)
        return (float(range_quantile(widest, t, df) / np.sqrt(2.0)),
                float(range_quantile(alpha, 2, df) / np.sqrt(2.0)))
    alternative = {"both": "two-sided", "above": "greater", "below": "less"}[check_direction]
    crit = abs(dunnett_quantile(alpha, _balanced_dunnett_corr(t, n_checks), df, alternative))
    return crit, crit


def per_comparison_levels(method: str, alpha: float, n_entries: int, df: float, *,
                          n_checks: int = 0, check_direction: str = "both") -> tuple[float, float]:
    """The per-comparison significance level a method implies, ``(smallest, largest)``.

    The level of a critical value c is P(|T| >= c) for Student's t on ``df`` (P(T >= c) for a
    one-sided Dunnett), as the analysis reports it in its family-wise sentence.
    """
    _check_inputs(n_entries, df, alpha, method, n_checks, check_direction)
    if method in ("bonferroni", "sidak", "holm", "bh"):
        return per_comparison_level(alpha, comparisons(n_entries, method), method)
    strict, loose = critical_values(method, alpha, n_entries, df, n_checks=n_checks,
                                    check_direction=check_direction)
    sides = 1.0 if method == "dunnett" and check_direction != "both" else 2.0
    return float(sides * stats.t.sf(strict, df)), float(sides * stats.t.sf(loose, df))


def detectable_difference_percent(
    cv_percent: float, replicates: float, df: float, *, method: str, alpha: float,
    n_entries: int, n_checks: int = 0, check_direction: str = "both",
) -> float | tuple[float, float]:
    """The smallest difference between two entry means the trial can declare, in % of the mean.

    critical value x sqrt(2 / r) x CV, the least significant difference of the method for a
    balanced trial in percent of the grand mean (Steel, Torrie & Dickey 1997, sec. 8.5: LSD =
    t sqrt(2 s^2 / r), divided by the mean).

    Parameters
    ----------
    cv_percent : coefficient of variation of the trait, %.
    replicates : plots per entry (blocks in an RCBD).
    df : residual degrees of freedom.
    method, alpha, n_entries, n_checks, check_direction : as in the analysis settings.

    Returns
    -------
    float or tuple of float
        One number for the single-step methods (lsd, bonferroni, sidak, tukey, scheffe, dunnett);
        for the step-wise ones (holm, bh, snk, duncan) the pair ``(strictest, loosest)``: the
        difference needed at the first step (the largest) and at the last (the smallest).
    """
    if not replicates > 0:
        raise TrialInputError("the number of replicates must be positive")
    strict, loose = critical_values(method, alpha, n_entries, df, n_checks=n_checks,
                                    check_direction=check_direction)
    scale = np.sqrt(2.0 / replicates) * cv_percent
    if method in STEP_METHODS:
        return float(strict * scale), float(loose * scale)
    return float(strict * scale)


@dataclass(frozen=True, slots=True, kw_only=True)
class Precision:
    """How precisely a trial measured a trait: CV%, residual df, grand mean and replicates."""

    cv_percent: float
    residual_df: int
    grand_mean: float
    replicates: float


def _fit(book: FieldBook, trait: str, design: str) -> tuple[TrialFit, np.ndarray]:
    """The complete-block (or completely randomized) fit of one trait.

    An alpha design's replicates are complete blocks, so it is fitted as an RCBD here: the
    read-out's precision is then the one the incomplete blocks can only improve on.
    """
    if trait not in book.traits:
        raise TrialInputError(f"there is no trait '{trait}'", file=book.source, column=trait)
    if design not in ("rcbd", "crd", "alpha"):
        raise TrialInputError(f"unknown design '{design}': choose rcbd, crd or alpha")
    design = "rcbd" if design == "alpha" else design
    y = book.values[trait].to_numpy(dtype=float)
    if not np.isfinite(y).any():
        raise TrialInputError(f"{trait} has no values yet", file=book.source, column=trait)
    blocks = book.plots["block"].to_numpy() if design == "rcbd" else None
    if blocks is not None and pd.isna(pd.Series(blocks)).any():
        raise TrialInputError("an RCBD needs a block for every plot", file=book.source)
    return fit_trial(y, book.plots["entry"].to_numpy(), blocks, trait=trait), y


def trait_precision(book: FieldBook, trait: str, design: str) -> Precision:
    """CV% and residual df of one trait from a least-squares fit, as the analysis computes them.

    ``replicates`` is the number of blocks for an RCBD, the plots per entry for a CRD (plots in
    the layout, so missing values do not lower it).
    """
    fit, y = _fit(book, trait, design)
    mean = float(np.nanmean(y))
    cv = float(100.0 * np.sqrt(fit.residual_ms) / mean) if mean else float("nan")
    plots = book.plots
    if design in ("rcbd", "alpha"):
        replicates = float(plots["block"].nunique())
    else:
        replicates = len(plots) / plots["entry"].nunique()
    return Precision(cv_percent=cv, residual_df=int(fit.residual_df), grand_mean=mean,
                     replicates=replicates)


def residual_table(book: FieldBook, trait: str, design: str) -> pd.DataFrame:
    """Every plot's value, fitted value and residual for one trait.

    Columns ``plot``, ``entry``, ``block``, ``row``, ``column`` (as in the field book),
    ``value``, ``fitted``, ``residual`` and ``studentized`` (externally studentized residual;
    Cook & Weisberg 1982, eq. 2.2.9). Plots with no value keep their row, with NaN in the last
    four columns. Rows follow the field book.
    """
    fit, y = _fit(book, trait, design)
    observed = ~np.isnan(y)
    table = book.plots[["plot", "entry", "block", "row", "column"]].copy()
    table["value"] = y
    for name, numbers in (("fitted", fit.fitted), ("residual", fit.residuals),
                          ("studentized", fit.studentized_residuals())):
        column = np.full(len(y), np.nan)
        column[observed] = numbers
        table[name] = column
    return table.reset_index(drop=True)


def mean_limits(result: TraitResult) -> pd.DataFrame:
    """Confidence limits of each entry mean, mean +- t(1 - alpha/2, df) x SE, in ranked order.

    Columns ``entry``, ``is_check``, ``mean``, ``se``, ``lower``, ``upper``; the level is the
    result's alpha, per entry (not adjusted for the number of entries).
    """
    frame = result.to_frame()[["entry", "is_check", "mean", "se"]].copy()
    half = stats.t.isf(result.alpha / 2.0, result.residual_df) * frame["se"]
    frame["lower"] = frame["mean"] - half
    frame["upper"] = frame["mean"] + half
    return frame
