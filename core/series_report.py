"""What the report of a trial series says, ready for the workbook and the printed summary.

:func:`build_series_report` gathers, from one
:class:`~trialdesk.core.series_results.SeriesAnalysis`, the header block (series, environments
with their locations and seasons, entries, data and design, checks, method and alpha, analysis
date, software, each source and its checksum), and per trait:

* the series summary table: entries as rows (rank order of the mean over environments); the mean
  in each environment, the mean over environments with its grouping letters and marks against the
  checks, percent of the checks, the regression slope on the environment index, the ecovalence
  and its share, and the rank;
* the bottom rows: each environment's mean, CV% and LSD beside the grand mean, CV%, LSD, the
  method's critical difference and the entry test's p over environments;
* the combined analysis of variance with each entry test named by its view of the environments,
  Bartlett's test, the variance components and the heritability of entry means with its formula
  and source;
* each entry's response to the environment index (its regression line), for the chart.

Then the footnotes and the cautions. The writers only format and place these; they compute
nothing.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.errors import TrialInputError
from trialdesk.core.planning import critical_values
from trialdesk.core.report import _CRITICAL_NAMES, ABOVE_MARK, BELOW_MARK, DESIGN_WORDS
from trialdesk.core.results import AnovaRow, AssumptionTest
from trialdesk.core.separation import METHOD_NAMES
from trialdesk.core.series_results import EntryTest, SeriesAnalysis, SeriesTraitResult
from trialdesk.core.variance_components import VarianceComponents

__all__ = ["LABELLED_LINES", "ResponseLine", "SeriesReport", "SeriesRow", "SeriesTraitReport",
           "build_series_report", "entry_test_text", "heritability_text"]

#: The most entries named on the chart of responses: the checks, then the best by mean.
LABELLED_LINES = 10

#: Decimals of regression slopes (common practice: two).
SLOPE_DECIMALS = 2


@dataclass(frozen=True, slots=True)
class SeriesRow:
    """One entry of a trait's series summary table.

    ``cells`` are its means in the environments of the table (in the order of
    :attr:`SeriesTraitReport.environments`), None where it was not grown; ``mean`` is its
    least-squares mean over environments. ``slope``, ``ecovalence`` and ``ecovalence_share`` are
    None for an entry not grown in every environment (or when the series is too small for
    stability).
    """

    entry: str
    is_check: bool
    rank: int
    cells: tuple[float | None, ...]
    mean: float
    letters: str  # "" where there are none (Dunnett)
    marks: str  # ABOVE_MARK / BELOW_MARK against the checks, or ""
    percent_of_check: float | None
    slope: float | None
    ecovalence: float | None
    ecovalence_share: float | None


@dataclass(frozen=True, slots=True)
class ResponseLine:
    """An entry's regression on the environment index: fitted value = ``mean`` + ``slope`` x
    index. ``labelled`` entries are named on the chart."""

    entry: str
    is_check: bool
    mean: float
    slope: float
    labelled: bool


@dataclass(frozen=True, slots=True)
class SeriesTraitReport:
    """Everything the report prints of one trait."""

    trait: str
    unit: str
    decimals: int  # for means and differences (one more than the plot data)
    higher_is_better: bool
    environments: tuple[str, ...]
    rows: tuple[SeriesRow, ...]
    environment_means: tuple[float, ...]
    environment_cv: tuple[float | None, ...]
    environment_lsd: tuple[float | None, ...]
    grand_mean: float
    cv_percent: float
    lsd: float  # unadjusted, of the means over environments
    critical_name: str  # "HSD 0.05", "LSD 0.05 (unadjusted)", ...
    critical_difference: float
    entry_test: EntryTest  # the test the mean separation is protected by
    entry_tests: tuple[EntryTest, ...]  # every entry test made
    has_letters: bool
    anova: tuple[AnovaRow, ...]
    bartlett: AssumptionTest | None
    weighted: bool
    components: VarianceComponents | None
    heritability: str  # the sentence, with the formula and the numbers of e and r
    index: tuple[float, ...]  # the environment index of each environment (empty: no stability)
    index_mean: float  # the mean of the entries of the stability table (the index's origin)
    lines: tuple[ResponseLine, ...]
    result: SeriesTraitResult

    @property
    def title(self) -> str:
        """The trait, its unit, and "lower is better" where it is."""
        parts = [self.unit] if self.unit else []
        if not self.higher_is_better:
            parts.append("lower is better")
        return f"{self.trait} ({', '.join(parts)})" if parts else self.trait

    @property
    def has_stability(self) -> bool:
        """Whether the series was large enough for the stability statistics."""
        return bool(self.lines)

    def to_frame(self) -> pd.DataFrame:
        """The series summary table: one row per entry (rank order), a column per environment,
        then the mean over environments, letters, marks, percent of check, slope, ecovalence,
        its share and the rank."""
        data: dict[str, list] = {"entry": [r.entry for r in self.rows],
                                 "check": [r.is_check for r in self.rows]}
        for j, name in enumerate(self.environments):
            data[name] = [r.cells[j] for r in self.rows]
        for key in ("mean", "letters", "marks", "percent_of_check", "slope", "ecovalence",
                    "ecovalence_share", "rank"):
            data[key] = [getattr(r, key) for r in self.rows]
        return pd.DataFrame(data)

    def bottom_frame(self) -> pd.DataFrame:
        """The rows under the table: per environment its mean, CV% and LSD, and the same over
        environments (the row "over environments")."""
        return pd.DataFrame({
            "environment": [*self.environments, "over environments"],
            "mean": [*self.environment_means, self.grand_mean],
            "cv_percent": [*self.environment_cv, self.cv_percent],
            "lsd": [*self.environment_lsd, self.lsd],
        })


@dataclass(frozen=True, slots=True)
class SeriesReport:
    """Everything a report of a series analysis prints, in the order it prints it."""

    title: str
    header: tuple[tuple[str, str], ...]
    main_trait: str
    traits: tuple[SeriesTraitReport, ...]
    footnotes: tuple[str, ...]
    cautions: str
    analysis: SeriesAnalysis

    @property
    def analysed_on(self) -> str:
        """The analysis date as printed (ISO)."""
        return dict(self.header)["Analysed on"]

    def trait(self, name: str) -> SeriesTraitReport:
        """The part of the report on the trait called ``name``."""
        for part in self.traits:
            if part.trait == name:
                return part
        raise KeyError(name)


def entry_test_text(test: EntryTest) -> str:
    """An entry test in words: "Entry test, environments random (against entry x environment)"."""
    return f"Entry test, {test.label} (against {test.against})"


def heritability_text(components: VarianceComponents | None) -> str:
    """The heritability line: its value, how the components were estimated, e and r, the
    formula."""
    if components is None:
        return "Heritability of entry means: not estimated (see the warnings)."
    c = components
    value = "undefined" if math.isnan(c.heritability) else f"{c.heritability:.3f}"
    sizes = f"e = {c.n_environments:.4g}" + ("" if c.entry_by_environment is None
                                             else f", r = {c.replicates:.4g}")
    return (f"Heritability of entry means: {value} ({c.method} estimates of the variance "
            f"components; {sizes}), {c.heritability_formula}.")


def _critical(result: SeriesTraitResult, n_checks: int, direction: str) -> tuple[str, float]:
    """The method's critical difference over environments: its per-pair critical value on the
    entry x environment degrees of freedom times the average SED (as for a single trial)."""
    alpha = f"{result.alpha:g}"
    name = _CRITICAL_NAMES.get(result.method)
    if name is None or len(result.entries) < 2 or (result.method == "dunnett" and not n_checks):
        return f"LSD {alpha} (unadjusted)", result.lsd
    strict, _ = critical_values(result.method, result.alpha, len(result.entries),
                                result.error_df, n_checks=n_checks, check_direction=direction)
    return f"{name} {alpha}", float(strict * result.sed)


def _response(result: SeriesTraitResult) -> tuple[tuple[float, ...], float, tuple[ResponseLine,
                                                                                   ...]]:
    """The environment index of each environment, its origin, and each stability entry's line.

    The index is that of the stability table: I_j = mean of the entries in environment j minus
    their grand mean, over the entries grown everywhere (Eberhart & Russell 1966, Crop Sci.
    6:36-40).
    """
    if not result.stability:
        return (), math.nan, ()
    entries = {s.entry for s in result.stability}
    names = [e.environment for e in result.environment_table]
    cells = pd.DataFrame([(c.entry, c.environment, c.mean) for c in result.cell_means
                          if c.entry in entries], columns=["entry", "environment", "mean"])
    environment_means = cells.groupby("environment")["mean"].mean().reindex(names)
    grand = float(environment_means.mean())
    index = tuple(float(m - grand) for m in environment_means)
    checks = [e.entry for e in result.entries if e.is_check and e.entry in entries]
    best = [e.entry for e in result.entries if not e.is_check and e.entry in entries]
    named = set((checks + best)[:LABELLED_LINES])
    by_entry = {s.entry: s for s in result.stability}
    lines = tuple(ResponseLine(entry=e.entry, is_check=e.is_check, mean=by_entry[e.entry].mean,
                               slope=by_entry[e.entry].regression_slope,
                               labelled=e.entry in named)
                  for e in result.entries if e.entry in by_entry)
    return index, grand, lines


def _trait_report(result: SeriesTraitResult, unit: str, n_checks: int, direction: str
                  ) -> SeriesTraitReport:
    environments = tuple(e.environment for e in result.environment_table)
    cells = {(c.entry, c.environment): c.mean for c in result.cell_means}
    stability = {s.entry: s for s in result.stability}
    rows = []
    for e in result.entries:
        s = stability.get(e.entry)
        rows.append(SeriesRow(
            entry=e.entry, is_check=e.is_check, rank=e.rank,
            cells=tuple(cells.get((e.entry, name)) for name in environments), mean=e.mean,
            letters=e.letters or "",
            marks=(ABOVE_MARK if e.above_checks else "") + (BELOW_MARK if e.below_checks else ""),
            percent_of_check=e.percent_of_check,
            slope=None if s is None else s.regression_slope,
            ecovalence=None if s is None else s.ecovalence,
            ecovalence_share=None if s is None else s.ecovalence_share))
    critical_name, critical = _critical(result, n_checks, direction)
    tests = tuple(t for t in (result.entry_test_random, result.entry_test_fixed,
                              result.entry_test_weighted) if t is not None)
    index, origin, lines = _response(result)
    table = result.environment_table
    return SeriesTraitReport(
        trait=result.trait, unit=unit,
        decimals=result.decimals + 1,  # one more than the plot data (common practice)
        higher_is_better=result.higher_is_better, environments=environments, rows=tuple(rows),
        environment_means=tuple(r.mean for r in table),
        environment_cv=tuple(r.cv_percent for r in table),
        environment_lsd=tuple(r.lsd for r in table),
        grand_mean=result.grand_mean, cv_percent=result.cv_percent, lsd=result.lsd,
        critical_name=critical_name, critical_difference=critical,
        entry_test=result.entry_test_weighted if result.weighted else result.entry_test_random,
        entry_tests=tests, has_letters=any(e.letters for e in result.entries),
        anova=result.anova, bartlett=result.bartlett, weighted=result.weighted,
        components=result.components, heritability=heritability_text(result.components),
        index=index, index_mean=origin, lines=lines, result=result)


def _title(analysis: SeriesAnalysis) -> str:
    if len(analysis.sources) == 1:
        return Path(analysis.sources[0]).stem
    return f"Series of {len(analysis.sources)} trials"


def build_series_report(analysis: SeriesAnalysis, *, title: str | None = None,
                        units: Mapping[str, str] | None = None,
                        analysed_on: dt.date | None = None) -> SeriesReport:
    """The report of a series analysis.

    Parameters
    ----------
    analysis : SeriesAnalysis
        From :func:`trialdesk.core.series.analyze_series`.
    title : str, optional
        The series' name (default: the field book's name, or "Series of 4 trials").
    units : mapping, optional
        Trait name -> unit, printed beside the trait (from the trial files, which record them).
    analysed_on : date, optional
        The analysis date printed (default: today).

    Raises
    ------
    TrialInputError
        When the analysis holds no trait.
    """
    if not analysis.traits:
        raise TrialInputError("the series analysis holds no trait to report",
                              file=", ".join(analysis.sources) or None)
    units = dict(units or {})
    settings = analysis.settings
    main = analysis.traits[0]
    n_checks = sum(e.is_check for e in main.entries)
    traits = tuple(_trait_report(r, units.get(r.trait, ""), n_checks, settings.check_direction)
                   for r in analysis.traits)
    name = title or _title(analysis)
    return SeriesReport(
        title=name, header=_header(analysis, name, analysed_on or dt.date.today()),
        main_trait=main.trait, traits=traits, footnotes=_footnotes(analysis, traits),
        cautions=CAUTIONS, analysis=analysis)


def _listed(values: list[str]) -> str:
    return f"{len(values)}: {', '.join(values)}"


def _counted(values: list[str], what: str) -> str:
    return f"{len(values)} {what}{'' if len(values) == 1 else 's'}"


def _header(analysis: SeriesAnalysis, title: str, analysed_on: dt.date
            ) -> tuple[tuple[str, str], ...]:
    from trialdesk.core.version import VERSION

    settings = analysis.settings
    main = analysis.traits[0]
    environments = analysis.environments
    locations = list(dict.fromkeys(e.location for e in environments))
    seasons = list(dict.fromkeys(e.season for e in environments if e.season is not None))
    if main.means_only:
        data = "Entry means, one per entry and environment"
    else:
        replicates = f"{main.replicates:.3g}" if main.replicates is not None else "not given"
        data = (f"{DESIGN_WORDS.get(settings.design, settings.design)} in each environment, "
                f"{replicates} plots per entry and environment (harmonic mean)")
    direction = {"both": "two-sided", "above": "one-sided, above the checks",
                 "below": "one-sided, below the checks"}[settings.check_direction]
    checks = ", ".join(settings.checks) or "none"
    components = sorted({t.components.method for t in analysis.traits
                         if t.components is not None})
    header = [
        ("Series", title),
        ("Environments", _listed([e.environment for e in environments])),
        ("Locations and seasons", f"{_counted(locations, 'location')} ({', '.join(locations)})"
         + (f" in {_counted(seasons, 'season')} ({', '.join(seasons)})" if seasons
            else "; seasons not recorded")),
        ("Entries", str(len(main.entries))),
        ("Checks", checks if not settings.checks else f"{checks} ({direction})"),
        ("Data", data),
        ("Method", f"{METHOD_NAMES[settings.method]}, alpha {settings.alpha:g}; environments "
                   "random"),
        ("Variance components", " and ".join(components) or "not estimated"),
        ("Analysed on", analysed_on.isoformat()),
        ("Software", f"Trialdesk {VERSION}"),
    ]
    several = len(analysis.sources) > 1
    for k, (source, sha) in enumerate(zip(analysis.sources, analysis.sha256, strict=True),
                                      start=1):
        header.append((f"Source {k}" if several else "Source",
                       f"{Path(source).name}, SHA-256 {sha}"))
    return tuple(header)


def _footnotes(analysis: SeriesAnalysis, traits: tuple[SeriesTraitReport, ...]
               ) -> tuple[str, ...]:
    settings = analysis.settings
    method = METHOD_NAMES[settings.method]
    main = analysis.traits[0]
    notes = [
        "Means over environments are least-squares means of entry + environment fitted to the "
        "entry x environment means; environments are taken as random, so the mean separation "
        "and the entry test use the entry x environment mean square.",
    ]
    if settings.method == "dunnett":
        notes.append(f"Entries are compared with the checks by {method} at alpha "
                     f"{settings.alpha:g}; there are no grouping letters.")
    else:
        notes.append(f"Means over environments sharing a letter do not differ at alpha "
                     f"{settings.alpha:g} by {method}; letters run from the best mean.")
    if any(r.marks for t in traits for r in t.rows):
        notes.append(f"{ABOVE_MARK} significantly above, {BELOW_MARK} significantly below the "
                     "checks by the same method.")
    if settings.checks:
        notes.append("Percent of check is the entry's mean over environments as a percentage of "
                     "the checks' mean.")
    if any(t.has_stability for t in traits):
        notes.append(
            "Slope: the regression of the entry's means on the environment index, the "
            "environment's mean less the grand mean (Finlay & Wilkinson 1963, Aust. J. Agric. "
            "Res. 14:742-754; Eberhart & Russell 1966, Crop Sci. 6:36-40); 1 is the average "
            "response. Ecovalence: the entry's part of the entry x environment sum of squares, "
            "and its share of it (Wricke 1962, Z. Pflanzenzuechtg. 47:92-96). Both over the "
            "entries grown in every environment.")
    names = {t.critical_name for t in traits}
    named = (f"{names.pop()} for every trait" if len(traits) > 1 and len(names) == 1
             else "; ".join(f"{t.critical_name} for {t.trait}" for t in traits))
    notes.append(f"Critical differences over environments: {named}, from the average standard "
                 "error of a difference" + ("" if main.means_only else
                                            "; LSD per environment: unadjusted, from that "
                                            "environment's own analysis") + ".")
    for source in dict.fromkeys(t.components.source for t in traits if t.components):
        notes.append(f"Variance components and heritability: {source}.")
    notes += [f"Note: {n}" for n in analysis.notes]
    notes += [f"Warning: {w}" for w in analysis.warnings]
    for t in traits:
        notes += [f"Note ({t.trait}): {n}" for n in t.result.notes]
        notes += [f"Warning ({t.trait}): {w}" for w in t.result.warnings]
        if t.components is not None:
            notes += [f"Variance components ({t.trait}): {w}" for w in t.components.warnings]
    return tuple(notes)
