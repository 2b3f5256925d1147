"""Analysis of a trial series: the same entries grown in several environments.

An environment is a location in a season. A series comes from one field book with a location
(and perhaps a season) column, or from several trial files, one environment each. It holds plot
values with blocks (replicates) in each environment, or only the entry means per environment.

Per trait the analysis is:

1. each environment on its own, as a single trial (RCBD or CRD, missing plots by least squares):
   its mean, CV%, error mean square and LSD, and the entry means that become the entry x
   environment cell means;
2. Bartlett's test of equal error variances across environments;
3. the combined analysis of variance: environment, blocks within environment, entry, entry x
   environment and pooled error, sequential sums of squares (with means only: environment, entry,
   and entry x environment as the residual);
4. entry means across environments: least-squares means of the additive model on the cell means,
   y_ij = mu + E_j + G_i + e_ij, which copes with entries missing from some environments; their
   covariance is (X'X)^-1 times the entry x environment mean square of a cell mean, so the mean
   separation treats environments as random. When the error variances differ markedly the cell
   means are weighted by replicates over error mean square instead;
5. the mean separation of a single trial on those means (every method, Dunnett against checks);
6. stability of each entry grown in every environment (:mod:`trialdesk.core.stability`);
7. variance components and heritability on an entry-mean basis
   (:mod:`trialdesk.core.variance_components`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import sparse, stats
from scipy.sparse.csgraph import connected_components

from trialdesk.core.analysis import (
    HIGH_CV_PERCENT,
    AnalysisCancelled,
    _ranks,
    analyze_trait,
    ranked_entries,
)
from trialdesk.core.decimals import recorded_decimals
from trialdesk.core.errors import InputWarning, TrialInputError
from trialdesk.core.fieldbook import FieldBook, check_design, read_fieldbook
from trialdesk.core.results import AnalysisSettings, AnovaRow, AssumptionTest
from trialdesk.core.separation import CHECK_DIRECTIONS, METHODS, separate
from trialdesk.core.series_results import (
    CellMean,
    EntryTest,
    Environment,
    EnvironmentResult,
    SeriesAnalysis,
    SeriesTraitResult,
)
from trialdesk.core.stability import stability
from trialdesk.core.value_checks import similar_entry_codes
from trialdesk.core.variance_components import components_from_anova, components_reml
from trialdesk.core.version import VERSION

__all__ = ["COMPONENT_METHODS", "SeriesData", "analyze_series", "read_series",
           "series_from_trials"]

#: How variance components are estimated: "auto" (from the ANOVA mean squares when the series is
#: balanced, by REML otherwise) or "reml" (always by REML).
COMPONENT_METHODS = ("auto", "reml")

# Error variances are taken to differ markedly, and the weighted analysis is given, when
# Bartlett's test has p below this or the largest error MS exceeds the smallest this many times
# (common practice).
HETEROGENEITY_P = 0.01
HETEROGENEITY_RATIO = 3.0

# Stability needs this many environments and entries (regression on the environment mean).
STABILITY_MIN = 3

_LIST_AT_MOST = 10


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesData:
    """A series as read: plot labels, values, and where they came from.

    Attributes
    ----------
    plots : pandas.DataFrame
        One row per plot (or per entry and environment when only means are at hand), columns
        ``environment`` (its name), ``location``, ``season`` (None when not
        recorded), ``entry``, ``block`` (None without blocks), ``plot``, ``source_row`` (the
        spreadsheet row; <NA> for a trial file) and ``source`` (the file).
    values : pandas.DataFrame
        Same index as ``plots``; one float column per trait, NaN where missing.
    traits : tuple of str
        Trait names in order.
    means_only : bool
        True when the data are entry means per environment: no block column and at most one
        value per entry and environment.
    environments : tuple of Environment
        In order of first appearance.
    sources, sha256 : tuple of str
        The files read, and one checksum per file (of its bytes for a field book, of the plot data
        as analysed for a trial file).
    roles : dict
        ``"entry"``, ``"block"``, ``"location"``, ``"season"`` -> the column names they were read
        from (None when there is none), for messages.
    saved_settings : dict
        Analysis settings saved in the trial files (their checks, trait directions, design...),
        to be merged with the options given; empty for a field book.
    notes : tuple of str
        How derived traits were computed, per trial file.
    warnings : tuple of InputWarning
        Suspicious input that does not stop the analysis.
    """

    plots: pd.DataFrame
    values: pd.DataFrame
    traits: tuple[str, ...]
    means_only: bool
    environments: tuple[Environment, ...]
    sources: tuple[str, ...]
    sha256: tuple[str, ...]
    roles: dict[str, str | None]
    saved_settings: dict
    notes: tuple[str, ...]
    warnings: tuple[InputWarning, ...]


# --- reading ------------------------------------------------------------------------------------


def read_series(
    path: str | Path,
    *,
    entry: str | None = None,
    location: str,
    season: str | None = None,
    block: str | None = None,
    plot: str | None = None,
    traits: Sequence[str] | None = None,
    sheet: str | None = None,
    decimal_comma: bool = False,
) -> SeriesData:
    """Read a series from one field book whose rows carry their location (and season).

    Parameters
    ----------
    path : str or path-like
        CSV or XLSX field book, read by :func:`~trialdesk.core.fieldbook.read_fieldbook`.
    entry, block, plot : str, optional
        Columns of the entry code, block (replicate) and plot number; found by their usual names
        when not given. Plot numbers need only be unique within an environment.
    location : str
        Column naming the location of each row.
    season : str, optional
        Column naming the season (year) of each row. An environment is a location in a season,
        named "<location> <season>"; without a season column, each location is one environment.
    traits, sheet, decimal_comma
        As for :func:`~trialdesk.core.fieldbook.read_fieldbook`.

    Returns
    -------
    SeriesData
        ``means_only`` is True when there is no block column and no entry has more than one row
        in an environment.

    Raises
    ------
    TrialInputError
        For anything :func:`read_fieldbook` refuses, an unknown location or season column, two
        location and season pairs that give one environment name, or fewer than two
        environments.
    """
    labels = {"location": location} if season is None else {"location": location,
                                                              "season": season}
    book = read_fieldbook(path, sheet=sheet, entry=entry, block=block, plot=plot, traits=traits,
                          decimal_comma=decimal_comma, labels=labels)
    plots = book.plots
    seasons = plots["season"] if season is not None else None
    names = plots["location"] if seasons is None else plots["location"] + " " + seasons
    pairs = pd.DataFrame({"name": names, "location": plots["location"],
                          "season": seasons}).drop_duplicates()
    clash = pairs[pairs["name"].duplicated(keep=False)]
    if len(clash):
        shown = " and ".join(f"location '{r.location}' in season '{r.season}'"
                             for r in clash.itertuples())
        raise TrialInputError(f"{shown} would both be environment '{clash['name'].iloc[0]}'; "
                              "rename one of the locations", file=book.source,
                              column=book.roles["location"])
    frame = pd.DataFrame({
        "environment": names.to_numpy(dtype=object),
        "location": plots["location"].to_numpy(dtype=object),
        "season": None if seasons is None else seasons.to_numpy(dtype=object),
        "entry": plots["entry"].to_numpy(dtype=object),
        "block": plots["block"].to_numpy(dtype=object),
        "plot": plots["plot"].to_numpy(dtype=object),
        "source_row": pd.array(plots["source_row"], dtype="Int64"),
        "source": book.source,
    })
    environments = tuple(
        Environment(environment=r.name, location=r.location,
                    season=None if seasons is None else r.season, source=book.source)
        for r in pairs.itertuples()
    )
    if len(environments) < 2:
        which = ("the location column gives" if season is None else
                 f"the location and season columns ('{book.roles['season']}') give")
        raise TrialInputError(f"a series needs at least two environments, and {which} one "
                              f"('{environments[0].environment}')", file=book.source,
                              column=book.roles["location"])
    return SeriesData(
        plots=frame,
        values=book.values,
        traits=book.traits,
        means_only=_means_only(frame, has_blocks=book.roles["block"] is not None),
        environments=environments,
        sources=(book.source,),
        sha256=(book.sha256,),
        roles={"entry": book.roles["entry"], "block": book.roles["block"],
               "location": book.roles["location"], "season": book.roles.get("season")},
        saved_settings={},
        notes=(),
        warnings=book.warnings,
    )


def _means_only(plots: pd.DataFrame, *, has_blocks: bool) -> bool:
    return not has_blocks and int(plots.groupby(["environment", "entry"]).size().max()) <= 1


def series_from_trials(paths: Sequence[str | Path]) -> SeriesData:
    """Combine trial files, one environment each, into a series.

    An environment is named by the trial's station and season ("Tallow Creek 2026"); when either
    is not set, by the trial's name. Its location is the station (or that name). Entries are
    matched by their codes. The trials' saved settings are merged into ``saved_settings``: checks
    and lower-is-better traits of any trial, and each other setting where every trial that saved
    it agrees.

    Raises
    ------
    TrialInputError
        For a file that is not a readable trial file, fewer than two files, or two trials that
        would be the same environment.
    """
    from trialdesk.core.trial_fieldbook import (
        derivation_notes,
        fieldbook_from_trial,
        trial_settings,
    )
    from trialdesk.core.trialfile import TrialFile

    if len(paths) < 2:
        raise TrialInputError("a series needs at least two environments: give two or more trial "
                              "files", file=str(paths[0]) if paths else None)
    frames, values, environments, shas, saved, notes = [], [], [], [], [], []
    seen: dict[str, str] = {}
    for path in paths:
        with TrialFile.open(path, read_only=True) as trial:
            facts = trial.facts()
            book = fieldbook_from_trial(trial)
            saved.append(trial_settings(trial))
            trial_notes = derivation_notes(trial)
        station, season = facts.get("station"), facts.get("season")
        name = (f"{station} {season}" if station and season
                else str(facts.get("name") or Path(path).stem))
        if name in seen:
            raise TrialInputError(f"this trial and {seen[name]} are both environment '{name}' "
                                  "(station and season, or name); set each trial's station and "
                                  "season", file=str(path))
        seen[name] = str(path)
        environments.append(Environment(environment=name, location=str(station or name),
                                        season=None if season is None else str(season),
                                        source=str(path)))
        notes += [f"{name}: {note}" for note in trial_notes]
        frames.append(pd.DataFrame({
            "environment": name,
            "location": str(station or name),
            "season": None if season is None else str(season),
            "entry": book.plots["entry"].to_numpy(dtype=object),
            "block": book.plots["block"].to_numpy(dtype=object),
            "plot": book.plots["plot"].to_numpy(dtype=object),
            "source_row": pd.array([pd.NA] * len(book.plots), dtype="Int64"),
            "source": str(path),
        }))
        values.append(book.values)
        shas.append(book.sha256)
    plots = pd.concat(frames, ignore_index=True)
    traits = tuple(dict.fromkeys(t for v in values for t in v.columns))
    table = pd.concat(values, ignore_index=True).reindex(columns=list(traits)).astype(float)
    has_blocks = bool(plots["block"].notna().any())
    found = [InputWarning(message=f"across the trials, {s.message}")
             for s in similar_entry_codes(plots["entry"].to_numpy(dtype=object))]
    return SeriesData(
        plots=plots,
        values=table,
        traits=traits,
        means_only=_means_only(plots, has_blocks=has_blocks),
        environments=tuple(environments),
        sources=tuple(str(p) for p in paths),
        sha256=tuple(shas),
        roles={"entry": "entry", "block": "block" if has_blocks else None, "location": None,
               "season": None},
        saved_settings=_merged_settings(saved),
        notes=tuple(notes),
        warnings=tuple(found),
    )


def _merged_settings(saved: list[dict]) -> dict:
    """Checks and lower-is-better traits of any trial; other settings where the trials agree."""
    merged: dict = {}
    for key in dict.fromkeys(k for s in saved for k in s):
        given = [s[key] for s in saved if key in s]
        if key in ("checks", "lower_is_better"):
            merged[key] = list(dict.fromkeys(v for g in given for v in g))
        elif all(g == given[0] for g in given):
            merged[key] = given[0]
    return merged


# --- the analysis -------------------------------------------------------------------------------


def analyze_series(
    data: SeriesData,
    settings: AnalysisSettings | None = None,
    *,
    components: str = "auto",
    progress: Callable[[int, int, str], object] | None = None,
    should_stop: Callable[[], bool] | None = None,
) -> SeriesAnalysis:
    """Analyse every requested trait of a series.

    Parameters
    ----------
    data : SeriesData
        From :func:`read_series` or :func:`series_from_trials`.
    settings : AnalysisSettings, optional
        Design within each environment, mean-separation method and alpha, checks, traits and
        their directions, as for a single trial.
    components : {"auto", "reml"}
        How the variance components are estimated (see :data:`COMPONENT_METHODS`).
    progress, should_stop
        As for :func:`~trialdesk.core.analysis.analyze`: ``progress(done, total, trait)`` before
        each trait and at the end; ``should_stop()`` between traits, raising
        :class:`~trialdesk.core.analysis.AnalysisCancelled` when it answers True.

    Returns
    -------
    SeriesAnalysis

    Raises
    ------
    TrialInputError
        For settings that do not fit the data, or a trait that cannot be analysed when it is the
        only one (with several, such a trait is left out with a warning).
    """
    settings = settings or AnalysisSettings()
    traits = _validated(data, settings, components)
    results, skipped = [], []
    for done, trait in enumerate(traits):
        if should_stop is not None and should_stop():
            raise AnalysisCancelled
        if progress is not None:
            progress(done, len(traits), trait)
        try:
            results.append(_analyze_trait(data, trait, settings, components))
        except TrialInputError as error:
            if len(traits) == 1:
                raise
            skipped.append(f"trait '{trait}' was not analysed: {error}")
    if should_stop is not None and should_stop():
        raise AnalysisCancelled
    if progress is not None:
        progress(len(traits), len(traits), "")
    if not results:
        raise TrialInputError("no trait could be analysed: " + "; ".join(skipped))
    return SeriesAnalysis(
        settings=replace(settings, traits=tuple(r.trait for r in results)),
        sources=tuple(Path(s).name for s in data.sources),
        sha256=data.sha256,
        software_version=VERSION,
        environments=data.environments,
        traits=tuple(results),
        warnings=(*(str(w) for w in data.warnings), *skipped),
        notes=data.notes,
    )


def _validated(data: SeriesData, settings: AnalysisSettings, components: str) -> tuple[str, ...]:
    source = data.sources[0] if len(data.sources) == 1 else None
    if settings.design not in ("rcbd", "crd"):
        raise TrialInputError(f"unknown design '{settings.design}': choose rcbd or crd")
    if settings.method not in METHODS:
        raise TrialInputError(f"unknown method '{settings.method}': choose one of "
                              f"{', '.join(METHODS)}")
    if not 0 < settings.alpha < 1:
        raise TrialInputError(f"alpha must lie between 0 and 1, not {settings.alpha}")
    if settings.check_direction not in CHECK_DIRECTIONS:
        raise TrialInputError(f"unknown check direction '{settings.check_direction}': choose "
                              f"one of {', '.join(CHECK_DIRECTIONS)}")
    if components not in COMPONENT_METHODS:
        raise TrialInputError(f"unknown way to estimate variance components '{components}': "
                              f"choose one of {', '.join(COMPONENT_METHODS)}")
    if settings.method == "dunnett" and not settings.checks:
        raise TrialInputError("Dunnett's method compares entries with checks: name the checks")
    traits = settings.traits or data.traits
    if not traits:
        raise TrialInputError("the series has no numeric trait columns", file=source)
    for name in (*traits, *settings.lower_is_better):
        if name not in data.traits:
            raise TrialInputError(f"there is no trait '{name}'; the traits are: "
                                  f"{', '.join(data.traits)}", file=source)
    entries = list(dict.fromkeys(data.plots["entry"]))
    for check in settings.checks:
        if check not in entries:
            shown = ", ".join(entries[:_LIST_AT_MOST]) + (" ..." if len(entries) > _LIST_AT_MOST
                                                          else "")
            raise TrialInputError(f"check '{check}' is not an entry of the series; the entries "
                                  f"are: {shown}", file=source, column=data.roles["entry"])
    return tuple(dict.fromkeys(traits))


@dataclass(frozen=True, slots=True, kw_only=True)
class _Cells:
    """The entry x environment cell means of one trait, as arrays over the cells."""

    entries: tuple[str, ...]  # in order of first appearance
    environments: tuple[Environment, ...]  # those with values, in series order
    entry_code: np.ndarray
    env_code: np.ndarray
    mean: np.ndarray
    n: np.ndarray  # values behind each cell mean

    def table(self) -> pd.DataFrame:
        """Entries x environments, NaN where an entry was not grown."""
        table = np.full((len(self.entries), len(self.environments)), np.nan)
        table[self.entry_code, self.env_code] = self.mean
        return pd.DataFrame(table, index=pd.Index(self.entries, name="entry"),
                            columns=[e.environment for e in self.environments])


def _analyze_trait(data: SeriesData, trait: str, settings: AnalysisSettings,
                   components: str) -> SeriesTraitResult:
    higher_is_better = trait not in settings.lower_is_better
    frame, warnings = _trait_frame(data, trait)
    environments = tuple(e for e in data.environments
                         if e.environment in set(frame["environment"]))
    if len(environments) < 2:
        raise TrialInputError(f"a series needs at least two environments, and trait '{trait}' "
                              f"has values in {len(environments)}", column=trait)
    if frame["entry"].nunique() < 2:
        raise TrialInputError(f"trait '{trait}' has values for one entry; comparing entries "
                              "needs at least two", column=trait)
    notes: list[str] = []
    if data.means_only:
        env_rows, cells = _means_environments(frame, environments, trait)
        env_fits: list[_EnvironmentFit] = []
        anova, random_test, fixed_test = _means_anova(cells)
    else:
        env_fits = [_environment_fit(data, frame, env, trait, settings) for env in environments]
        env_rows = [f.row for f in env_fits]
        cells = _plot_cells(frame, environments, env_fits)
        warnings += [w for f in env_fits for w in f.warnings]
        anova, random_test, fixed_test = _plot_anova(frame, trait, env_fits, settings.design)
    rows = {r.source: r for r in anova}
    ge = rows["entry x environment"]
    if ge.df < 1 or not ge.ms:
        raise TrialInputError(f"trait '{trait}' leaves no entry x environment variation to test "
                              "the entries against (too few entries in common between the "
                              "environments)", column=trait)
    pooled_ms = rows["pooled error"].ms if "pooled error" in rows else None
    replicates = None if data.means_only else float(stats.hmean(cells.n))
    bartlett = None if data.means_only else bartlett_test(
        [f.row.error_ms for f in env_fits], [f.row.error_df for f in env_fits])
    weighted = bartlett is not None and _heterogeneous(bartlett, env_fits)
    if weighted:
        fit, scale, weighted_test = _weighted_fit(cells, env_fits)
        notes.append(
            "the error variances differ markedly between environments "
            f"({_heterogeneity_text(bartlett, env_fits)}), so the entry means and their "
            "comparisons come from the weighted analysis of the entry x environment means "
            "(weights: replicates / error mean square of the environment)")
    else:
        fit, weighted_test = _additive_fit(cells, np.ones(len(cells.mean))), None
        # The entry x environment MS on a cell-mean basis: MS_GE / r for plot data.
        scale = ge.ms if replicates is None else ge.ms / replicates
    entry_p = (weighted_test or random_test).p
    entries, comparisons, family, sed = _separation(
        cells, fit, scale, ge.df, settings, higher_is_better, entry_p,
        n_values=np.bincount(cells.entry_code, weights=cells.n, minlength=len(cells.entries)),
        warnings=warnings, trait=trait)
    table = cells.table().reindex([e.entry for e in entries])
    stable = _stability(table, None if pooled_ms is None else pooled_ms / replicates, notes)
    comps = _components(data, frame, cells, anova, components, trait, settings.design, warnings)
    grand_mean = float(frame[trait].mean()) if not data.means_only else float(cells.mean.mean())
    basis_ms = ge.ms if pooled_ms is None else pooled_ms
    if settings.method == "lsd" and (entry_p is None or entry_p > settings.alpha):
        warnings.append("the entry F-test is not significant, so the protected LSD declares no "
                        "pair different")
    return SeriesTraitResult(
        trait=trait,
        higher_is_better=higher_is_better,
        decimals=recorded_decimals(frame[trait]),
        method=settings.method,
        alpha=settings.alpha,
        means_only=data.means_only,
        environment_table=tuple(env_rows),
        ranks=_environment_ranks(table, higher_is_better),
        bartlett=bartlett,
        weighted=weighted,
        anova=anova,
        entry_test_random=random_test,
        entry_test_fixed=fixed_test,
        entry_test_weighted=weighted_test,
        grand_mean=grand_mean,
        cv_percent=float(100.0 * np.sqrt(basis_ms) / grand_mean) if grand_mean else float("nan"),
        error_ms=float(scale),
        error_df=int(ge.df),
        replicates=replicates,
        sed=sed,
        lsd=float(stats.t.ppf(1 - settings.alpha / 2, ge.df) * sed),
        entries=entries,
        comparisons=comparisons,
        family=family,
        stability=stable,
        components=comps,
        cell_means=tuple(
            CellMean(entry=cells.entries[i], environment=cells.environments[j].environment,
                     mean=float(m), n=int(n))
            for i, j, m, n in zip(cells.entry_code, cells.env_code, cells.mean, cells.n,
                                  strict=True)),
        warnings=tuple(warnings),
        notes=tuple(notes),
    )


def _trait_frame(data: SeriesData, trait: str) -> tuple[pd.DataFrame, list[str]]:
    """The plots of the entry x environment cells that have a value of ``trait`` (missing plots of
    those cells kept), and warnings for environments and entries left out."""
    frame = data.plots.copy()
    frame[trait] = data.values[trait].to_numpy(dtype=float)
    has_value = frame[trait].notna().groupby([frame["environment"], frame["entry"]],
                                             sort=False).transform("any")
    warnings = []
    present = frame[trait].notna()
    by_env = present.groupby(frame["environment"], sort=False).any()
    empty = [e.environment for e in data.environments if not by_env[e.environment]]
    if empty:
        warnings.append(f"no values of trait '{trait}' in {_names('environment', empty)}; left "
                        "out of this trait's analysis")
    by_entry = present.groupby(frame["entry"], sort=False).any()
    unused = list(by_entry.index[~by_entry.to_numpy()])
    if unused:
        warnings.append(f"no values of trait '{trait}' for {_names('entry', unused)}; left out "
                        "of this trait's analysis")
    return frame[has_value.to_numpy()].reset_index(drop=True), warnings


def _names(what: str, names: Sequence[str]) -> str:
    shown = ", ".join(f"'{n}'" for n in names[:_LIST_AT_MOST])
    more = f" and {len(names) - _LIST_AT_MOST} more" if len(names) > _LIST_AT_MOST else ""
    return f"{what}{'s' if len(names) > 1 else ''} {shown}{more}"


@dataclass(frozen=True, slots=True, kw_only=True)
class _EnvironmentFit:
    """One environment's own analysis of a trait."""

    row: EnvironmentResult
    means: dict[str, tuple[float, int]]  # entry -> (least-squares mean, plots with a value)
    ss_residual: float
    warnings: tuple[str, ...]


def _environment_fit(data: SeriesData, frame: pd.DataFrame, env: Environment, trait: str,
                     settings: AnalysisSettings) -> _EnvironmentFit:
    """The environment analysed as a single trial (the single-trial analysis itself)."""
    plots = frame[frame["environment"] == env.environment].reset_index(drop=True)
    book = FieldBook(
        plots=pd.DataFrame({
            "entry": plots["entry"].astype(str),
            "block": plots["block"],
            "plot": plots["plot"].astype(str),
            "row": pd.array([pd.NA] * len(plots), dtype="Int64"),
            "column": pd.array([pd.NA] * len(plots), dtype="Int64"),
            "source_row": plots["source_row"],
        }),
        values=plots[[trait]],
        traits=(trait,),
        roles={"entry": data.roles["entry"], "block": data.roles["block"], "plot": None,
               "row": None, "column": None},
        source=env.source,
        sha256="",
        sheet=None,
        warnings=(),
    )
    one = replace(settings, method="lsd", checks=(), check_direction="both", traits=(trait,))
    try:
        check_design(book, design=settings.design, traits=(trait,))
        result = analyze_trait(book, trait, one)
    except TrialInputError as error:
        raise TrialInputError(f"environment '{env.environment}': {error.message}",
                              file=error.file or env.source, row=error.row, plot=error.plot,
                              column=error.column) from None
    warnings = []
    if result.cv_percent > HIGH_CV_PERCENT:
        warnings.append(f"environment '{env.environment}': CV is {result.cv_percent:.1f}% "
                        "(common practice: above about 20% is high); check its data")
    for flag in result.diagnostics.flagged:
        where = f"row {flag.source_row}, " if flag.source_row is not None else ""
        warnings.append(f"environment '{env.environment}': plot {flag.plot} ({where}entry "
                        f"{flag.entry}) has a studentized residual of "
                        f"{flag.studentized_residual:.2f}: check it in the field book")
    return _EnvironmentFit(
        row=EnvironmentResult(
            environment=env.environment, location=env.location, season=env.season,
            n_entries=len(result.entries), mean=result.grand_mean, cv_percent=result.cv_percent,
            error_ms=result.residual_ms, error_df=result.residual_df, lsd=result.lsd),
        means={e.entry: (e.mean, e.n) for e in result.entries},
        ss_residual=next(r.ss for r in result.anova if r.source == "residual"),
        warnings=tuple(warnings),
    )


def _codes(labels: Sequence[str], order: Sequence[str]) -> np.ndarray:
    return pd.Index(list(order)).get_indexer(list(labels))


def _plot_cells(frame: pd.DataFrame, environments: tuple[Environment, ...],
                fits: list[_EnvironmentFit]) -> _Cells:
    entries = tuple(dict.fromkeys(frame["entry"]))
    rows = [(entry, j, mean, n) for j, fit in enumerate(fits)
            for entry, (mean, n) in fit.means.items()]
    return _Cells(entries=entries, environments=environments,
                  entry_code=_codes([r[0] for r in rows], entries),
                  env_code=np.array([r[1] for r in rows], dtype=int),
                  mean=np.array([r[2] for r in rows], dtype=float),
                  n=np.array([r[3] for r in rows], dtype=int))


def _means_environments(frame: pd.DataFrame, environments: tuple[Environment, ...], trait: str
                        ) -> tuple[list[EnvironmentResult], _Cells]:
    observed = frame[frame[trait].notna()]
    entries = tuple(dict.fromkeys(observed["entry"]))
    names = [e.environment for e in environments]
    cells = _Cells(entries=entries, environments=environments,
                   entry_code=_codes(observed["entry"], entries),
                   env_code=_codes(observed["environment"], names),
                   mean=observed[trait].to_numpy(dtype=float),
                   n=np.ones(len(observed), dtype=int))
    rows = [
        EnvironmentResult(environment=env.environment, location=env.location, season=env.season,
                          n_entries=int((cells.env_code == j).sum()),
                          mean=float(cells.mean[cells.env_code == j].mean()), cv_percent=None,
                          error_ms=None, error_df=None, lsd=None)
        for j, env in enumerate(environments)
    ]
    return rows, cells


# --- error variances ----------------------------------------------------------------------------


def bartlett_test(ms: Sequence[float], df: Sequence[int]) -> AssumptionTest:
    """Bartlett's test that k error variances are equal, from their mean squares and df.

    With nu_j the degrees of freedom, s_j^2 the mean squares, N = sum nu_j and s_p^2 = sum nu_j
    s_j^2 / N: chi^2 = (N ln s_p^2 - sum nu_j ln s_j^2) / C on k - 1 df, with C = 1 + (sum 1/nu_j
    - 1/N) / (3 (k - 1)) (Bartlett 1937, Proc. R. Soc. A 160:268-282; the form of Snedecor &
    Cochran, Statistical Methods, quoted from memory). Equals ``scipy.stats.bartlett`` on samples
    with those variances and nu_j + 1 values each.

    Examples
    --------
    >>> round(bartlett_test([2.0, 2.0, 2.0], [10, 12, 8]).statistic, 12)
    0.0
    """
    s2 = np.asarray(ms, dtype=float)
    nu = np.asarray(df, dtype=float)
    k, total = len(s2), nu.sum()
    pooled = (nu * s2).sum() / total
    # M and its correction C (Bartlett 1937, Proc. R. Soc. A 160:268-282; Snedecor & Cochran,
    # Statistical Methods, from memory)
    m = total * np.log(pooled) - (nu * np.log(s2)).sum()
    c = 1.0 + ((1.0 / nu).sum() - 1.0 / total) / (3.0 * (k - 1))
    chi2 = float(m / c)
    p = float(stats.chi2.sf(chi2, k - 1))
    ratio = float(s2.max() / s2.min())
    reading = (f"the error variances differ between environments (largest / smallest error MS "
               f"= {ratio:.2f})" if p < HETEROGENEITY_P else
               f"no clear sign that the error variances differ (largest / smallest error MS = "
               f"{ratio:.2f})")
    return AssumptionTest(name="Bartlett's test of equal error variances across environments",
                          statistic=chi2, df=str(k - 1), p=p, reading=reading)


def _heterogeneous(bartlett: AssumptionTest, fits: list[_EnvironmentFit]) -> bool:
    ms = [f.row.error_ms for f in fits]
    return bartlett.p < HETEROGENEITY_P or max(ms) / min(ms) > HETEROGENEITY_RATIO


def _heterogeneity_text(bartlett: AssumptionTest, fits: list[_EnvironmentFit]) -> str:
    ms = [f.row.error_ms for f in fits]
    return (f"Bartlett's p = {bartlett.p:.3g}; largest / smallest error MS = "
            f"{max(ms) / min(ms):.2f}, above {HETEROGENEITY_RATIO:g} is marked by common practice")


# --- the combined analysis of variance ----------------------------------------------------------


def _rss(x: np.ndarray, y: np.ndarray) -> tuple[float, int]:
    coef, _, rank, _ = np.linalg.lstsq(x, y, rcond=None)
    resid = y - x @ coef
    return float(resid @ resid), int(rank)


def _dummies(codes: np.ndarray, k: int) -> np.ndarray:
    x = np.zeros((len(codes), k))
    x[np.arange(len(codes)), codes] = 1.0
    return x


def _row(source: str, df: int, ss: float, against: tuple[float, int] | None) -> AnovaRow:
    ms = ss / df if df else None
    f = p = None
    if against is not None and ms is not None and against[0] and against[1] > 0:
        f = ms / against[0]
        p = float(stats.f.sf(f, df, against[1]))
    return AnovaRow(source=source, df=df, ss=ss, ms=ms, f=f, p=p)


def _test(label: str, against: str, row: AnovaRow, denominator: AnovaRow) -> EntryTest:
    f = p = None
    if row.ms is not None and denominator.ms:
        f = row.ms / denominator.ms
        p = float(stats.f.sf(f, row.df, denominator.df))
    return EntryTest(label=label, against=against, f=f, df1=row.df, df2=denominator.df, p=p)


def _plot_anova(frame: pd.DataFrame, trait: str, fits: list[_EnvironmentFit], design: str
                ) -> tuple[tuple[AnovaRow, ...], EntryTest, EntryTest]:
    """Sequential SS of y ~ environment + block(environment) + entry + entry x environment.

    The full model fits every environment on its own, so its residual is the pooled error of the
    environments' own analyses; the entry SS is adjusted for environments and blocks.
    """
    observed = frame[frame[trait].notna()]
    y = observed[trait].to_numpy(dtype=float)
    env = pd.factorize(observed["environment"])[0]
    n, e = len(y), env.max() + 1
    total = float(((y - y.mean()) ** 2).sum())
    env_means = np.bincount(env, weights=y) / np.bincount(env)
    ss_env = float((np.bincount(env) * (env_means - y.mean()) ** 2).sum())
    if design == "rcbd":
        groups = pd.factorize(pd.MultiIndex.from_arrays(
            [observed["environment"], observed["block"].astype(str)]))[0]
    else:
        groups = env
    n_groups = groups.max() + 1
    group_means = np.bincount(groups, weights=y) / np.bincount(groups)
    rss_groups = float(((y - group_means[groups]) ** 2).sum())
    entry = pd.factorize(observed["entry"])[0]
    rss_additive, rank_additive = _rss(
        np.hstack([_dummies(groups, n_groups), _dummies(entry, entry.max() + 1)]), y)
    rss_full = float(sum(f.ss_residual for f in fits))
    df_full = sum(f.row.error_df for f in fits)
    df_entry = rank_additive - n_groups
    df_ge = (n - rank_additive) - df_full
    error = (rss_full / df_full, df_full)
    ge_ss = rss_additive - rss_full
    ge = _row("entry x environment", df_ge, ge_ss, error)
    rows = []
    if design == "rcbd":
        blocks = _row("block within environment", int(n_groups - e),
                      total - ss_env - rss_groups, error)
        # Environments against blocks within environments (Gomez & Gomez 1984, Statistical
        # Procedures for Agricultural Research, 2nd ed., ch. 8; from memory).
        rows += [_row("environment", int(e - 1), ss_env, (blocks.ms, blocks.df)), blocks]
    else:
        rows.append(_row("environment", int(e - 1), ss_env, error))
    entry_row = _row("entry", int(df_entry), rss_groups - rss_additive,
                     (ge.ms, ge.df) if ge.ms else None)
    pooled = AnovaRow(source="pooled error", df=int(df_full), ss=rss_full, ms=error[0], f=None,
                      p=None)
    rows += [entry_row, ge, pooled,
             AnovaRow(source="total", df=n - 1, ss=total, ms=None, f=None, p=None)]
    random_test = _test("environments random", "entry x environment", entry_row, ge)
    fixed_test = _test("environments fixed", "pooled error", entry_row, pooled)
    return tuple(rows), random_test, fixed_test


def _means_anova(cells: _Cells) -> tuple[tuple[AnovaRow, ...], EntryTest, None]:
    """Sequential SS of y ~ environment + entry on the cell means; the residual is the entry x
    environment interaction (with the plot error confounded in it)."""
    y = cells.mean
    n, e, t = len(y), len(cells.environments), len(cells.entries)
    total = float(((y - y.mean()) ** 2).sum())
    env_means = np.bincount(cells.env_code, weights=y) / np.bincount(cells.env_code)
    rss_env = float(((y - env_means[cells.env_code]) ** 2).sum())
    rss_additive, rank = _rss(np.hstack([_dummies(cells.env_code, e),
                                         _dummies(cells.entry_code, t)]), y)
    residual = AnovaRow(source="entry x environment", df=n - rank, ss=rss_additive,
                        ms=rss_additive / (n - rank) if n > rank else None, f=None, p=None)
    against = (residual.ms, residual.df) if residual.ms else None
    entry_row = _row("entry", rank - e, rss_env - rss_additive, against)
    rows = (_row("environment", e - 1, total - rss_env, against), entry_row, residual,
            AnovaRow(source="total", df=n - 1, ss=total, ms=None, f=None, p=None))
    return rows, _test("environments random", "entry x environment", entry_row, residual), None


# --- entry means across environments ------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class _AdditiveFit:
    """Least-squares means of y_ij = mu + E_j + G_i + e_ij fitted to the cell means."""

    means: np.ndarray  # over cells.entries
    cov_unscaled: np.ndarray  # L (X'WX)^-1 L'
    rss: float  # weighted residual SS
    rss_environments: float  # weighted residual SS of the model with environments only
    df: int


def _additive_fit(cells: _Cells, weights: np.ndarray) -> _AdditiveFit:
    t, e = len(cells.entries), len(cells.environments)
    _check_connected(cells)
    n = len(cells.mean)
    x = np.zeros((n, e + t - 1))
    x[:, 0] = 1.0
    rows = np.flatnonzero(cells.env_code > 0)
    x[rows, cells.env_code[rows]] = 1.0
    rows = np.flatnonzero(cells.entry_code > 0)
    x[rows, e - 1 + cells.entry_code[rows]] = 1.0
    root = np.sqrt(weights)
    xw, yw = x * root[:, None], cells.mean * root
    q, r = np.linalg.qr(xw)
    coef = np.linalg.solve(r, q.T @ yw)
    resid = yw - xw @ coef
    # Least-squares means average the environment effects with equal weight (Searle, Speed &
    # Milliken 1980, Am. Stat. 34:216-221): L_i = [1, 1/e, ..., 1/e, u_i].
    lmat = np.zeros((t, x.shape[1]))
    lmat[:, 0] = 1.0
    lmat[:, 1:e] = 1.0 / e
    lmat[np.arange(1, t), e - 1 + np.arange(1, t)] = 1.0
    lw = lmat @ np.linalg.solve(r, np.eye(r.shape[0]))
    rss_env, _ = _rss(xw[:, :e], yw)
    return _AdditiveFit(means=lmat @ coef, cov_unscaled=lw @ lw.T, rss=float(resid @ resid),
                        rss_environments=rss_env, df=n - x.shape[1])


def _weighted_fit(cells: _Cells, fits: list[_EnvironmentFit]
                  ) -> tuple[_AdditiveFit, float, EntryTest]:
    """The additive fit with weights w_ij = r_ij / MSE_j, the variance of unit weight that scales
    its covariance, and its entry test."""
    error_ms = np.array([f.row.error_ms for f in fits])
    fit = _additive_fit(cells, cells.n / error_ms[cells.env_code])  # w_ij = r_ij / MSE_j
    # Cochran & Cox 1957, Experimental Designs, 2nd ed., ch. 14 (from memory): with weights
    # r_ij / MSE_j the weighted entry x environment mean square is the variance of unit weight;
    # it scales the covariance of the weighted means and is the denominator of the entry test.
    scale = fit.rss / fit.df
    df1 = len(cells.entries) - 1
    f = ((fit.rss_environments - fit.rss) / df1) / scale
    test = EntryTest(label="weighted", against="weighted entry x environment", f=float(f),
                     df1=df1, df2=fit.df, p=float(stats.f.sf(f, df1, fit.df)))
    return fit, scale, test


def _check_connected(cells: _Cells) -> None:
    """Entry differences are estimable only when entries and environments are connected."""
    t, e = len(cells.entries), len(cells.environments)
    graph = sparse.coo_matrix((np.ones(len(cells.mean)), (cells.entry_code, t + cells.env_code)),
                              shape=(t + e, t + e))
    count, labels = connected_components(graph, directed=False)
    if count > 1:
        groups = [", ".join(cells.entries[i] for i in range(t) if labels[i] == g)
                  for g in dict.fromkeys(labels[:t])]
        raise TrialInputError("the entries fall into groups grown in different environments, so "
                              "differences between the groups are not estimable: "
                              + "; ".join(groups))


def _separation(cells: _Cells, fit: _AdditiveFit, scale: float, df: int,
                settings: AnalysisSettings, higher_is_better: bool, entry_p: float | None, *,
                n_values: np.ndarray, warnings: list[str], trait: str):
    """Ranked entry rows, the method's comparisons, its family error and the average SED."""
    order = np.lexsort((np.arange(len(fit.means)),
                        -fit.means if higher_is_better else fit.means))
    entries = tuple(cells.entries[i] for i in order)
    means = fit.means[order]
    cov = fit.cov_unscaled[np.ix_(order, order)] * scale
    checks = tuple(c for c in settings.checks if c in entries)
    if len(checks) < len(settings.checks):
        missing = [c for c in settings.checks if c not in entries]
        warnings.append(f"no values of trait '{trait}' for {_names('check', missing)}")
    if settings.method == "dunnett" and not checks:
        raise TrialInputError(f"Dunnett's method compares entries with checks, and no check has "
                              f"values of trait '{trait}'", column=trait)
    sep = separate(entries, means, cov, df, method=settings.method, alpha=settings.alpha,
                   entry_p=1.0 if entry_p is None else entry_p, checks=checks,
                   check_direction=settings.check_direction)
    rows, sed = ranked_entries(entries, means, cov, n_values[order], sep, checks,
                               higher_is_better)
    return rows, sep.comparisons, sep.family, sed


def _environment_ranks(table: pd.DataFrame, higher_is_better: bool
                       ) -> tuple[tuple[str, tuple[int | None, ...]], ...]:
    """Each entry's rank within each environment (1 = best there), None where not grown."""
    ranks = np.full(table.shape, -1, dtype=int)
    values = table.to_numpy()
    for j in range(values.shape[1]):
        grown = ~np.isnan(values[:, j])
        ranks[grown, j] = _ranks(values[grown, j], higher_is_better)
    return tuple((entry, tuple(None if r < 0 else int(r) for r in row))
                 for entry, row in zip(table.index, ranks, strict=True))


# --- stability and variance components ----------------------------------------------------------


def _stability(table: pd.DataFrame, error_ms_of_mean: float | None, notes: list[str]) -> tuple:
    complete = table.dropna()
    left_out = [e for e in table.index if e not in complete.index]
    if left_out:
        notes.append(f"{_names('entry', left_out)} not grown in every environment: left out of "
                     "the stability table")
    if len(complete) < STABILITY_MIN or complete.shape[1] < STABILITY_MIN:
        notes.append(f"stability needs at least {STABILITY_MIN} environments and "
                     f"{STABILITY_MIN} entries grown in all of them; this series has "
                     f"{complete.shape[1]} environments and {len(complete)} such entries")
        return ()
    return stability(complete, error_ms_of_mean=error_ms_of_mean)


def _components(data: SeriesData, frame: pd.DataFrame, cells: _Cells, anova: tuple[AnovaRow, ...],
                method: str, trait: str, design: str, warnings: list[str]):
    """Variance components: from the ANOVA mean squares when the series is balanced (every entry
    in every environment, the same replicates everywhere), by REML otherwise or when asked."""
    ms = {r.source: r.ms for r in anova}
    e = len(cells.environments)
    balanced = len(cells.mean) == len(cells.entries) * e and len(set(cells.n.tolist())) == 1
    try:
        if method == "auto" and balanced and data.means_only:
            return components_from_anova(ms["entry"], None, ms["entry x environment"],
                                         replicates=1, environments=e)
        if method == "auto" and balanced:
            return components_from_anova(ms["entry"], ms["entry x environment"],
                                         ms["pooled error"], replicates=int(cells.n[0]),
                                         environments=e)
        if data.means_only:
            reml = pd.DataFrame({"y": cells.mean,
                                 "entry": [cells.entries[i] for i in cells.entry_code],
                                 "environment": [cells.environments[j].environment
                                                 for j in cells.env_code]})
            return components_reml(reml, block=None)
        observed = frame[frame[trait].notna()]
        reml = pd.DataFrame({"y": observed[trait].to_numpy(dtype=float),
                             "entry": observed["entry"].to_numpy(dtype=object),
                             "environment": observed["environment"].to_numpy(dtype=object)})
        has_blocks = design == "rcbd"
        if has_blocks:  # block labels repeat across environments: make them unique
            reml["block"] = (observed["environment"] + "\x1f"
                             + observed["block"].astype(str)).to_numpy(dtype=object)
        return components_reml(reml, block="block" if has_blocks else None)
    except TrialInputError as error:
        warnings.append(f"variance components could not be estimated: {error.message}")
        return None

