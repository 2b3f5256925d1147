"""Result objects of a trial analysis: frozen, documented dataclasses with a ``to_frame()`` view.

The command-line summary, the JSON writer and the desktop views all read these objects (or their
frames); nothing reads private state of the analysis. Numbers are kept at full precision here and
rounded only where they are shown.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields

import pandas as pd


def _frame(rows, cls) -> pd.DataFrame:
    columns = [f.name for f in fields(cls)]
    return pd.DataFrame([asdict(r) for r in rows], columns=columns)


#: The designs a single trial can be analysed as (see ``AnalysisSettings.design``).
DESIGNS = ("rcbd", "crd", "alpha")
#: The field-trend adjustments (see ``AnalysisSettings.spatial``).
SPATIAL_METHODS = ("none", "rowcol", "papadakis")


@dataclass(frozen=True, slots=True, kw_only=True)
class AnalysisSettings:
    """Everything that decides how a trial is analysed.

    Attributes
    ----------
    design : "rcbd" (randomized complete blocks), "crd" (completely randomized) or "alpha"
        (incomplete blocks within replicates, as in an alpha lattice: replicates fixed, incomplete
        blocks random).
    method : mean-separation method: "lsd", "bonferroni", "sidak", "holm", "bh", "tukey", "scheffe",
        "snk", "duncan" or "dunnett".
    alpha : significance level of the method (family-wise for the adjusted methods, false discovery
        rate for "bh", per comparison for "lsd", "snk" and "duncan" at each step).
    checks : entry codes of the check varieties.
    check_direction : "both" (two-sided check comparisons), "above" (is the entry higher than the
        check?) or "below" (is it lower?); one-sided only applies to ``dunnett``.
    traits : traits to analyse, in order; empty means all numeric traits.
    lower_is_better : traits for which the lowest mean ranks first and gets the letter "a".
    spatial : field-trend adjustment of the entry means: "none", "rowcol" (field rows and columns
        as random effects) or "papadakis" (the neighbour covariate of Papadakis 1937). Either
        needs the field row and column of every plot; both are then compared with the plain
        analysis.
    entries_random : take the entries as random and rank them by their BLUPs (preliminary trials):
        no mean separation is made, and the heritability of the BLUPs is reported.
    """

    design: str = "rcbd"
    method: str = "tukey"
    alpha: float = 0.05
    checks: tuple[str, ...] = ()
    check_direction: str = "both"
    traits: tuple[str, ...] = ()
    lower_is_better: tuple[str, ...] = ()
    spatial: str = "none"
    entries_random: bool = False

    def to_dict(self) -> dict:
        """Plain data, as saved in a trial file and printed in reports."""
        return {f.name: (list(v) if isinstance(v := getattr(self, f.name), tuple) else v)
                for f in fields(self)}

    @classmethod
    def from_dict(cls, data: dict) -> AnalysisSettings:
        """Settings from :meth:`to_dict` output; unknown keys are ignored (newer files)."""
        known = {f.name: f for f in fields(cls)}
        given = {k: tuple(v) if isinstance(v, list) else v for k, v in data.items() if k in known}
        return cls(**given)


@dataclass(frozen=True, slots=True, kw_only=True)
class AnovaRow:
    """One line of the analysis of variance. ``f`` and ``p`` are None for residual and total."""

    source: str
    df: int
    ss: float
    ms: float | None
    f: float | None
    p: float | None


@dataclass(frozen=True, slots=True, kw_only=True)
class EntryMean:
    """One entry's result for one trait.

    ``mean`` is the least-squares mean (the plain mean when no plot is missing); ``se`` its standard
    error; ``n`` the number of plots with a value; ``rank`` 1 for the best entry (ties share the
    better rank); ``letters`` the grouping letters (None for Dunnett, which does not compare all
    pairs); ``percent_of_check`` the mean as a percentage of the mean of the checks;
    ``above_checks``/``below_checks`` the checks this entry is significantly above or below.
    """

    entry: str
    is_check: bool
    mean: float
    se: float
    n: int
    rank: int
    letters: str | None
    percent_of_check: float | None
    above_checks: tuple[str, ...]
    below_checks: tuple[str, ...]


@dataclass(frozen=True, slots=True, kw_only=True)
class Comparison:
    """One pair: ``difference`` = mean of ``entry_a`` minus mean of ``entry_b`` (for Dunnett,
    ``entry_b`` is the check). ``lower``/``upper`` are the method's interval, None where it has none
    (step-down methods, Holm, Benjamini-Hochberg, or the open side of a one-sided Dunnett)."""

    entry_a: str
    entry_b: str
    difference: float
    se: float
    p_adjusted: float
    lower: float | None
    upper: float | None
    significant: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class FamilyError:
    """How many comparisons were made and what that does to the error rate.

    ``familywise_unadjusted`` = 1 - (1 - alpha)^m, the chance of at least one false difference among
    m independent unadjusted tests (common practice); ``per_comparison_min``/``max`` the range of
    per-comparison levels the chosen method applies (equal for single-step methods).
    """

    m: int
    familywise_unadjusted: float
    per_comparison_min: float
    per_comparison_max: float


@dataclass(frozen=True, slots=True, kw_only=True)
class FlaggedPlot:
    """A plot whose studentized residual is beyond the flag limit: re-check it in the field book."""

    plot: str
    source_row: int | None
    entry: str
    block: str | None
    value: float
    fitted: float
    residual: float
    studentized_residual: float


@dataclass(frozen=True, slots=True, kw_only=True)
class AssumptionTest:
    """One diagnostic test: its statistic, p-value and a plain-words reading."""

    name: str
    statistic: float | None
    df: str | None
    p: float | None
    reading: str


@dataclass(frozen=True, slots=True, kw_only=True)
class Diagnostics:
    """Residual checks of one trait's fit."""

    flag_limit: float
    flagged: tuple[FlaggedPlot, ...]
    tests: tuple[AssumptionTest, ...]

    def to_frame(self) -> pd.DataFrame:
        """Flagged plots, one row each."""
        return _frame(self.flagged, FlaggedPlot)

    def tests_frame(self) -> pd.DataFrame:
        """Assumption tests, one row each."""
        return _frame(self.tests, AssumptionTest)


@dataclass(frozen=True, slots=True, kw_only=True)
class VarianceEstimate:
    """One REML variance component of a trait's model.

    ``component`` is "incomplete block", "field row", "field column", "entry" (entries random) or
    "residual" (the plot error; the residual mean square when the model has no random term).
    """

    component: str
    variance: float


@dataclass(frozen=True, slots=True, kw_only=True)
class SpatialOption:
    """A field-trend adjustment beside the plain analysis of the same design.

    ``method`` is "none" (the plain analysis), "rowcol" or "papadakis"; ``residual_variance`` the
    plot error variance of that model; ``percent_of_plain`` 100 x that variance / the plain
    analysis' one (below 100: the adjustment took field trend out of the error); ``chosen`` whether
    the trait's entry means come from it.
    """

    method: str
    residual_variance: float
    percent_of_plain: float
    chosen: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class PlotTrend:
    """One plot of the field map: its value, the fitted field trend and the residual.

    ``trend`` is the field-trend part of the fitted value (row plus column effects, or the
    neighbour covariate's adjustment), centred on zero; ``residual`` the value minus everything
    fitted (entry, replicate, blocks and trend).
    """

    plot: str
    row: int
    column: int
    value: float
    trend: float
    residual: float


@dataclass(frozen=True, slots=True, kw_only=True)
class TraitResult:
    """The analysis of one trait.

    ``sem`` is the standard error of an entry mean and ``sed`` of a difference between two means,
    both for full replication (sqrt(MSe/r), sqrt(2 MSe/r)) when no plot is missing, otherwise the
    average over entries and pairs; each entry's and pair's own SE is in ``entries`` and
    ``comparisons``. ``lsd`` = t(1 - alpha/2, df) x ``sed``, the unadjusted least significant
    difference.

    For the mixed models (design "alpha", a field-trend adjustment, or random entries) the means
    are REML-based (see :mod:`trialdesk.core.alpha_lattice`); ``residual_ms``, ``residual_df`` and
    ``anova`` are those of the same model with every term fixed (the intra-block analysis), whose
    degrees of freedom the tests use; ``variance_components`` holds the REML variances;
    ``efficiency_vs_rcbd`` is 100 x the average SED^2 of the complete-block analysis of the same
    data over that of this analysis (common practice; None for the plain RCBD and CRD analyses and
    for random entries); ``heritability`` the generalized heritability of the BLUPs (random
    entries only). With a field-trend adjustment, ``spatial_options`` compares it with the plain
    analysis and ``field_trend`` maps each plot. ``diagnostics`` always check the least-squares fit
    with fixed blocks (for an alpha design, the incomplete blocks).
    """

    trait: str
    higher_is_better: bool
    decimals: int
    design: str
    method: str
    alpha: float
    n_plots: int
    n_missing: int
    grand_mean: float
    cv_percent: float
    residual_ms: float
    residual_df: int
    sem: float
    sed: float
    lsd: float
    anova: tuple[AnovaRow, ...]
    entries: tuple[EntryMean, ...]
    comparisons: tuple[Comparison, ...]
    family: FamilyError
    diagnostics: Diagnostics
    warnings: tuple[str, ...]
    spatial: str = "none"
    entries_random: bool = False
    variance_components: tuple[VarianceEstimate, ...] = ()
    efficiency_vs_rcbd: float | None = None
    heritability: float | None = None
    spatial_options: tuple[SpatialOption, ...] = ()
    field_trend: tuple[PlotTrend, ...] = ()

    @property
    def entry_p(self) -> float | None:
        """p-value of the entry F-test."""
        return next(r.p for r in self.anova if r.source == "entry")

    def to_frame(self) -> pd.DataFrame:
        """The ranked entry table, best entry first."""
        return _frame(self.entries, EntryMean)

    def anova_frame(self) -> pd.DataFrame:
        """The analysis of variance table."""
        return _frame(self.anova, AnovaRow)

    def comparisons_frame(self) -> pd.DataFrame:
        """All comparisons of the method, one row per pair."""
        return _frame(self.comparisons, Comparison)

    def field_trend_frame(self) -> pd.DataFrame:
        """The field map: one row per plot with a value (empty without a field-trend adjustment)."""
        return _frame(self.field_trend, PlotTrend)


@dataclass(frozen=True, slots=True, kw_only=True)
class TrialAnalysis:
    """The analysis of a trial: settings, where the data came from, and one result per trait."""

    settings: AnalysisSettings
    source: str
    sha256: str
    software_version: str
    traits: tuple[TraitResult, ...]
    warnings: tuple[str, ...]
    notes: tuple[str, ...] = ()  # how derived traits were computed, and similar facts

    def trait(self, name: str) -> TraitResult:
        """The result of the trait called ``name``."""
        for result in self.traits:
            if result.trait == name:
                return result
        raise KeyError(name)

    def to_frame(self) -> pd.DataFrame:
        """All-traits summary: entries as rows (in the first trait's rank order), and per trait its
        mean and letters columns ("<trait>" and "<trait> letters")."""
        if not self.traits:
            return pd.DataFrame()
        order = [e.entry for e in self.traits[0].entries]
        frame = pd.DataFrame(index=pd.Index(order, name="entry"))
        frame["check"] = [e.is_check for e in self.traits[0].entries]
        for result in self.traits:
            by_entry = {e.entry: e for e in result.entries}
            frame[result.trait] = [by_entry[e].mean for e in order]
            frame[f"{result.trait} letters"] = [by_entry[e].letters for e in order]
        return frame
