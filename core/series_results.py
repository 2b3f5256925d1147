"""Result objects of a trial-series analysis: frozen dataclasses with ``to_frame()`` views.

A series is the same entries grown in several environments (a location in a season). The entry
rows and the pairs reuse :class:`~trialdesk.core.results.EntryMean` and
:class:`~trialdesk.core.results.Comparison`, so views and reports of single trials read them the
same way. Numbers are kept at full precision; they are rounded only where they are shown.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields
from typing import TYPE_CHECKING

import pandas as pd

from trialdesk.core.results import (
    AnalysisSettings,
    AnovaRow,
    AssumptionTest,
    Comparison,
    EntryMean,
    FamilyError,
)

if TYPE_CHECKING:
    from trialdesk.core.stability import Stability
    from trialdesk.core.variance_components import VarianceComponents


def _frame(rows, cls) -> pd.DataFrame:
    columns = [f.name for f in fields(cls)]
    return pd.DataFrame([asdict(r) for r in rows], columns=columns)


@dataclass(frozen=True, slots=True, kw_only=True)
class Environment:
    """One environment of a series: a location in a season.

    ``environment`` is its name in every table ("Tallow Creek 2026"); ``season`` is None when the
    series does not record seasons; ``source`` the file its data came from.
    """

    environment: str
    location: str
    season: str | None
    source: str


@dataclass(frozen=True, slots=True, kw_only=True)
class EnvironmentResult:
    """One environment's own analysis of a trait.

    ``n_entries`` entries have values there; ``mean`` is the mean of its plots (of its entry means
    when only means are at hand); ``cv_percent``, ``error_ms``, ``error_df`` and ``lsd`` (the
    unadjusted LSD at the series' alpha) come from the environment's own RCBD or CRD analysis and
    are None when only means are at hand.
    """

    environment: str
    location: str
    season: str | None
    n_entries: int
    mean: float
    cv_percent: float | None
    error_ms: float | None
    error_df: int | None
    lsd: float | None


@dataclass(frozen=True, slots=True, kw_only=True)
class EntryTest:
    """An F-test of the entries: ``label`` says under which view of the environments it is made
    ("environments random", "environments fixed", "weighted"), ``against`` names the mean square
    in the denominator."""

    label: str
    against: str
    f: float | None
    df1: int
    df2: int
    p: float | None


@dataclass(frozen=True, slots=True, kw_only=True)
class CellMean:
    """An entry's mean in one environment (its least-squares mean there) and the values behind
    it (plots with a value; 1 when only means are at hand)."""

    entry: str
    environment: str
    mean: float
    n: int


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesTraitResult:
    """The series analysis of one trait.

    Attributes
    ----------
    environment_table : each environment's own analysis, in series order.
    ranks : per entry (in ``entries`` order), its rank in each environment of
        ``environment_table`` (1 = best there), None where the entry was not grown.
    bartlett : Bartlett's test of equal error variances across environments (None with means
        only). ``weighted`` is True when the error variances differ markedly and the entry means
        come from the weighted analysis.
    anova : the combined analysis of variance (sources "environment", "block within
        environment", "entry", "entry x environment", "pooled error", "total"; with means only
        "environment", "entry", "entry x environment" (the residual) and "total"). The entry row's
        F-test is against entry x environment (environments random).
    entry_test_random, entry_test_fixed : the entry F-test against entry x environment, and
        against the pooled error (None with means only); ``entry_test_weighted`` the entry test of
        the weighted analysis (None when not weighted).
    grand_mean, cv_percent : mean of the plots (of the cell means with means only), and 100
        sqrt(pooled error MS) / grand mean (of the entry x environment MS with means only).
    error_ms, error_df : the variance of a single entry x environment cell mean that the entry
        means' covariance is scaled by, and its degrees of freedom (those of entry x environment):
        MS_GE / r for plot data, MS_GE with means only, the weighted MS_GE when weighted.
    sed, lsd : the average standard error of a difference between entry means, and
        t(1 - alpha/2, error_df) x sed, the unadjusted least significant difference.
    replicates : harmonic mean of the plots per entry and environment (None with means only).
    entries : least-squares entry means over the environments, best first; ``n`` is the values
        behind a mean (plots, or environments with means only).
    comparisons, family : the mean separation, as for a single trial.
    stability : one row per entry grown in every environment (empty when the series is too small).
    components : variance components and heritability on an entry-mean basis (None when they
        could not be estimated; the warnings say why).
    cell_means : every entry x environment mean.
    """

    trait: str
    higher_is_better: bool
    decimals: int
    method: str
    alpha: float
    means_only: bool
    environment_table: tuple[EnvironmentResult, ...]
    ranks: tuple[tuple[str, tuple[int | None, ...]], ...]
    bartlett: AssumptionTest | None
    weighted: bool
    anova: tuple[AnovaRow, ...]
    entry_test_random: EntryTest
    entry_test_fixed: EntryTest | None
    entry_test_weighted: EntryTest | None
    grand_mean: float
    cv_percent: float
    error_ms: float
    error_df: int
    replicates: float | None
    sed: float
    lsd: float
    entries: tuple[EntryMean, ...]
    comparisons: tuple[Comparison, ...]
    family: FamilyError
    stability: tuple[Stability, ...]
    components: VarianceComponents | None
    cell_means: tuple[CellMean, ...]
    warnings: tuple[str, ...]
    notes: tuple[str, ...]

    @property
    def entry_p(self) -> float | None:
        """p-value of the entry test the mean separation is protected by."""
        test = self.entry_test_weighted if self.weighted else self.entry_test_random
        return test.p

    def to_frame(self) -> pd.DataFrame:
        """The ranked entry table, best entry first."""
        return _frame(self.entries, EntryMean)

    def environment_frame(self) -> pd.DataFrame:
        """The environment table, one row per environment."""
        return _frame(self.environment_table, EnvironmentResult)

    def anova_frame(self) -> pd.DataFrame:
        """The combined analysis of variance."""
        return _frame(self.anova, AnovaRow)

    def comparisons_frame(self) -> pd.DataFrame:
        """All comparisons of the method, one row per pair."""
        return _frame(self.comparisons, Comparison)

    def stability_frame(self) -> pd.DataFrame:
        """The stability table, one row per entry."""
        return pd.DataFrame([s.to_dict() for s in self.stability])

    def cell_means_frame(self) -> pd.DataFrame:
        """Entry x environment means: entries as rows (in ``entries`` order), environments as
        columns (in series order), NaN where an entry was not grown."""
        long = _frame(self.cell_means, CellMean)
        table = long.pivot(index="entry", columns="environment", values="mean")
        return table.reindex(index=[e.entry for e in self.entries],
                             columns=[e.environment for e in self.environment_table])

    def ranks_frame(self) -> pd.DataFrame:
        """Each entry's rank per environment (nullable integers, <NA> where not grown)."""
        names = [e.environment for e in self.environment_table]
        frame = pd.DataFrame([list(r) for _, r in self.ranks], columns=names,
                             index=pd.Index([e for e, _ in self.ranks], name="entry"))
        return frame.astype("Int64")


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesAnalysis:
    """The analysis of a trial series: settings, the files read, the environments and one result
    per trait. ``sha256`` holds one checksum per file of ``sources``."""

    settings: AnalysisSettings
    sources: tuple[str, ...]
    sha256: tuple[str, ...]
    software_version: str
    environments: tuple[Environment, ...]
    traits: tuple[SeriesTraitResult, ...]
    warnings: tuple[str, ...]
    notes: tuple[str, ...]

    def trait(self, name: str) -> SeriesTraitResult:
        """The result of the trait called ``name``."""
        for result in self.traits:
            if result.trait == name:
                return result
        raise KeyError(name)

    def environments_frame(self) -> pd.DataFrame:
        """The environments, one row each."""
        return _frame(self.environments, Environment)

    def to_frame(self) -> pd.DataFrame:
        """All-traits summary: entries as rows (in the first trait's rank order), and per trait its
        mean and letters columns ("<trait>" and "<trait> letters"); NaN where an entry has no
        value of a trait."""
        if not self.traits:
            return pd.DataFrame()
        order = [e.entry for e in self.traits[0].entries]
        frame = pd.DataFrame(index=pd.Index(order, name="entry"))
        frame["check"] = [e.is_check for e in self.traits[0].entries]
        for result in self.traits:
            by_entry = {e.entry: e for e in result.entries}
            frame[result.trait] = [by_entry[e].mean if e in by_entry else float("nan")
                                   for e in order]
            frame[f"{result.trait} letters"] = [by_entry[e].letters if e in by_entry else None
                                                for e in order]
        return frame
