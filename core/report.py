"""What a trial report says, ready for the workbook and the printed summary to lay out.

:func:`build_report` gathers, from one analysis, the header block (trial, station, season, crop,
design, replicates, plot size, analysis date, method, software, source and checksum), the
all-traits table (entries as rows; per trait the mean, grouping letters and marks against the
checks; percent of check and rank on the main trait), the bottom rows (grand mean, CV%, the
method's critical difference, the entry F-test's p), the footnotes and the cautions. The
writers only format and place these; they compute nothing.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import FieldBook
from trialdesk.core.planning import critical_values
from trialdesk.core.results import TraitResult, TrialAnalysis
from trialdesk.core.separation import METHOD_NAMES

__all__ = ["ABOVE_MARK", "BELOW_MARK", "ReportColumn", "ReportRow", "TrialReport",
           "build_report", "mean_decimals", "trial_context"]

ABOVE_MARK = "\u25b2"  # significantly above the checks (up-pointing triangle)
BELOW_MARK = "\u25bc"  # significantly below the checks

DESIGN_WORDS = {"rcbd": "Randomized complete blocks", "crd": "Completely randomized"}

# The critical difference a method's single-step test amounts to in a balanced trial, and its
# name. Step-down and step-up methods (Holm, Benjamini-Hochberg, Student-Newman-Keuls, Duncan)
# have no one difference: the report gives the unadjusted LSD for them, named as such.
_CRITICAL_NAMES = {"lsd": "LSD", "tukey": "HSD", "bonferroni": "Bonferroni LSD",
                   "sidak": "Sidak LSD", "scheffe": "Scheffe difference",
                   "dunnett": "Dunnett difference"}


def mean_decimals(result: TraitResult, decimals: int | None = None) -> int:
    """Decimals for means, SEs and differences: one more than the plot data (common practice)."""
    return (result.decimals if decimals is None else decimals) + 1


@dataclass(frozen=True, slots=True)
class ReportColumn:
    """One trait of the all-traits table and its bottom rows."""

    trait: str
    unit: str
    decimals: int  # for means and differences (one more than the plot data)
    higher_is_better: bool
    grand_mean: float
    cv_percent: float
    critical_name: str  # "HSD", "LSD", "LSD (unadjusted)", ...
    critical_difference: float
    entry_p: float | None
    has_letters: bool

    @property
    def title(self) -> str:
        """The column heading: the trait, its unit, and "lower is better" where it is."""
        parts = [self.unit] if self.unit else []
        if not self.higher_is_better:
            parts.append("lower is better")
        return f"{self.trait} ({', '.join(parts)})" if parts else self.trait


@dataclass(frozen=True, slots=True)
class ReportRow:
    """One entry of the all-traits table (values in the order of the report's columns)."""

    entry: str
    name: str
    is_check: bool
    rank: int  # on the main trait
    percent_of_check: float | None  # on the main trait
    means: tuple[float | None, ...]  # None where the entry was not in a trait's analysis
    letters: tuple[str, ...]  # grouping letters ("" where there are none)
    marks: tuple[str, ...]  # ABOVE_MARK / BELOW_MARK against the checks, or ""


@dataclass(frozen=True, slots=True)
class TrialReport:
    """Everything a report of one analysis prints, in the order it prints it."""

    title: str
    header: tuple[tuple[str, str], ...]
    main_trait: str
    columns: tuple[ReportColumn, ...]
    rows: tuple[ReportRow, ...]
    footnotes: tuple[str, ...]
    cautions: str
    analysis: TrialAnalysis

    def to_frame(self) -> pd.DataFrame:
        """The all-traits table: one row per entry (main-trait rank order), per trait its mean,
        letters and mark, then percent of check and rank on the main trait."""
        data: dict[str, list] = {"entry": [r.entry for r in self.rows],
                                 "name": [r.name for r in self.rows],
                                 "check": [r.is_check for r in self.rows]}
        for j, column in enumerate(self.columns):
            data[column.trait] = [r.means[j] for r in self.rows]
            data[f"{column.trait} letters"] = [r.letters[j] for r in self.rows]
            data[f"{column.trait} vs checks"] = [r.marks[j] for r in self.rows]
        data["percent of check"] = [r.percent_of_check for r in self.rows]
        data["rank"] = [r.rank for r in self.rows]
        return pd.DataFrame(data)

    def bottom_frame(self) -> pd.DataFrame:
        """The rows under the table: grand mean, CV%, critical difference and entry p."""
        return pd.DataFrame({
            "trait": [c.trait for c in self.columns],
            "grand_mean": [c.grand_mean for c in self.columns],
            "cv_percent": [c.cv_percent for c in self.columns],
            "critical_name": [c.critical_name for c in self.columns],
            "critical_difference": [c.critical_difference for c in self.columns],
            "entry_p": [c.entry_p for c in self.columns],
        })


def _critical(result: TraitResult, n_checks: int, direction: str) -> tuple[str, float]:
    """The method's critical difference: its per-pair critical value times the average SED."""
    alpha = f"{result.alpha:g}"
    name = _CRITICAL_NAMES.get(result.method)
    n_entries = len(result.entries)
    if name is None or n_entries < 2 or (result.method == "dunnett" and not n_checks):
        return f"LSD {alpha} (unadjusted)", result.lsd
    strict, _ = critical_values(result.method, result.alpha, n_entries, result.residual_df,
                                n_checks=n_checks, check_direction=direction)
    return f"{name} {alpha}", float(strict * result.sed)


def trial_context(path: str | Path) -> dict:
    """Facts, trait units and decimals, and entry names of a ``.trial`` file (empty for a field
    book, which carries none of these)."""
    if not str(path).lower().endswith(".trial"):
        return {}
    from trialdesk.core.trialfile import TrialFile

    with TrialFile.open(path, read_only=True) as trial:
        return {"facts": trial.facts(), "traits": trial.traits(), "entries": trial.entries()}


def _text(value: object) -> str:
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return ""
    return str(value)


def _number(value: object) -> float | None:
    if value is None or isinstance(value, str) or pd.isna(value):
        return None
    return float(value)


def build_report(analysis: TrialAnalysis, book: FieldBook | None = None, *,
                 facts: Mapping | None = None, traits: pd.DataFrame | None = None,
                 entries: pd.DataFrame | None = None,
                 analysed_on: dt.date | None = None) -> TrialReport:
    """The report of ``analysis``.

    Parameters
    ----------
    analysis : TrialAnalysis
    book : FieldBook, optional
        The data analysed, for the number of replicates and plots.
    facts : mapping, optional
        Trial facts (name, station, season, crop, design, plot_length_m, plot_width_m,
        harvested_area_m2, ...); what is missing is printed as "not given".
    traits, entries : DataFrame, optional
        The trial's traits table (unit, decimals) and entries table (names).
    analysed_on : date, optional
        The analysis date printed (default: today).

    Raises
    ------
    TrialInputError
        When the analysis holds no trait.
    """
    if not analysis.traits:
        raise TrialInputError("the analysis holds no trait to report", file=analysis.source)
    facts = dict(facts or {})
    settings = analysis.settings
    units: dict[str, str] = {}
    decimals: dict[str, int] = {}
    if traits is not None and not traits.empty:
        for row in traits.itertuples(index=False):
            units[str(row.name)] = _text(row.unit)
            if _number(row.decimals) is not None:
                decimals[str(row.name)] = int(row.decimals)
    names: dict[str, str] = {}
    if entries is not None and not entries.empty:
        names = {str(r.code): _text(r.name) for r in entries.itertuples(index=False)}

    main = analysis.traits[0]
    n_checks = sum(e.is_check for e in main.entries)
    columns = []
    for result in analysis.traits:
        critical_name, critical = _critical(result, n_checks, settings.check_direction)
        columns.append(ReportColumn(
            trait=result.trait, unit=units.get(result.trait, ""),
            decimals=mean_decimals(result, decimals.get(result.trait)),
            higher_is_better=result.higher_is_better, grand_mean=result.grand_mean,
            cv_percent=result.cv_percent, critical_name=critical_name,
            critical_difference=critical, entry_p=result.entry_p,
            has_letters=any(e.letters for e in result.entries)))

    by_trait = [{e.entry: e for e in result.entries} for result in analysis.traits]
    rows = []
    for first in main.entries:
        found = [table.get(first.entry) for table in by_trait]
        rows.append(ReportRow(
            entry=first.entry, name=names.get(first.entry, ""), is_check=first.is_check,
            rank=first.rank, percent_of_check=first.percent_of_check,
            means=tuple(None if e is None else e.mean for e in found),
            letters=tuple("" if e is None or not e.letters else e.letters for e in found),
            marks=tuple("" if e is None else (ABOVE_MARK if e.above_checks else "")
                        + (BELOW_MARK if e.below_checks else "") for e in found)))

    return TrialReport(
        title=_text(facts.get("name")) or Path(analysis.source).stem,
        header=_header(analysis, book, facts, analysed_on or dt.date.today()),
        main_trait=main.trait, columns=tuple(columns), rows=tuple(rows),
        footnotes=_footnotes(analysis, columns), cautions=CAUTIONS, analysis=analysis)


def _header(analysis: TrialAnalysis, book: FieldBook | None, facts: dict,
            analysed_on: dt.date) -> tuple[tuple[str, str], ...]:
    settings = analysis.settings
    missing = "not given"
    design = DESIGN_WORDS.get(settings.design, settings.design)
    replicates = missing
    plots = missing
    if book is not None:
        plots = str(len(book.plots))
        if settings.design == "rcbd" and "block" in book.plots:
            replicates = str(book.plots["block"].nunique())
        else:
            counts = book.plots["entry"].value_counts()
            low, high = int(counts.min()), int(counts.max())
            replicates = str(low) if low == high else f"{low} to {high}"
    length, width = _number(facts.get("plot_length_m")), _number(facts.get("plot_width_m"))
    area = _number(facts.get("harvested_area_m2"))
    size = missing
    if length and width:
        size = f"{length:g} m x {width:g} m ({length * width:g} m\u00b2)"
    if area:
        size = (f"{size}; harvested {area:g} m\u00b2" if size != missing
                else f"harvested {area:g} m\u00b2")
    checks = ", ".join(settings.checks) or "none"
    direction = {"both": "two-sided", "above": "one-sided, above the checks",
                 "below": "one-sided, below the checks"}[settings.check_direction]
    from trialdesk.core.version import VERSION

    return (
        ("Trial", _text(facts.get("name")) or Path(analysis.source).stem),
        ("Station", _text(facts.get("station")) or missing),
        ("Season", _text(facts.get("season")) or missing),
        ("Crop", _text(facts.get("crop")) or missing),
        ("Design", design),
        ("Replicates", replicates),
        ("Plots", plots),
        ("Plot size", size),
        ("Checks", checks if not settings.checks else f"{checks} ({direction})"),
        ("Method", f"{METHOD_NAMES[settings.method]}, alpha {settings.alpha:g}"),
        ("Analysed on", analysed_on.isoformat()),
        ("Software", f"Trialdesk {VERSION}"),
        ("Source", Path(analysis.source).name),
        ("Data checksum", f"SHA-256 {analysis.sha256}"),
    )


def _footnotes(analysis: TrialAnalysis, columns: list[ReportColumn]) -> tuple[str, ...]:
    settings = analysis.settings
    method = METHOD_NAMES[settings.method]
    main = analysis.traits[0]
    notes = []
    if settings.method == "dunnett":
        notes.append(f"Entries are compared with the checks by {method} at alpha "
                     f"{settings.alpha:g}; there are no grouping letters.")
    else:
        notes.append(f"Means sharing a letter do not differ at alpha {settings.alpha:g} by "
                     f"{method}; letters run from the best mean.")
    if any(e.above_checks or e.below_checks for r in analysis.traits for e in r.entries):
        notes.append(f"{ABOVE_MARK} significantly above, {BELOW_MARK} significantly below the "
                     "checks by the same method.")
    notes.append(f"Entries are listed in the rank order of {main.trait}; percent of check is "
                 f"the entry's {main.trait} mean as a percentage of the checks' mean.")
    unbalanced = [r.trait for r in analysis.traits if r.n_missing]
    named = "; ".join(f"{c.critical_name} for {c.trait}" for c in columns)
    notes.append(f"Critical differences: {named}, from the average standard error of a "
                 "difference" + (f" (unequal replication in {', '.join(unbalanced)}: the tests "
                                 "themselves use each pair's own standard error)"
                                 if unbalanced else "") + ".")
    notes += [f"Note: {n}" for n in analysis.notes]
    notes += [f"Warning: {w}" for w in analysis.warnings]
    for result in analysis.traits:
        notes += [f"Warning ({result.trait}): {w}" for w in result.warnings]
    return tuple(notes)

