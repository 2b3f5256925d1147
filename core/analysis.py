"""Analysis of a single-site trial: fit, mean separation, letters, checks and diagnostics."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from scipy import stats

from trialdesk.core.decimals import recorded_decimals
from trialdesk.core.diagnostics import diagnose
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import (
    FieldBook,
    check_alpha_design,
    check_design,
    check_field_positions,
)
from trialdesk.core.least_squares import TrialFit, fit_trial
from trialdesk.core.letters import grouping_letters
from trialdesk.core.results import (
    DESIGNS,
    SPATIAL_METHODS,
    AnalysisSettings,
    AnovaRow,
    EntryMean,
    FamilyError,
    PlotTrend,
    SpatialOption,
    TraitResult,
    TrialAnalysis,
    VarianceEstimate,
)
from trialdesk.core.separation import CHECK_DIRECTIONS, METHODS, Separation, separate
from trialdesk.core.version import VERSION

# A CV above this is worth a remark on the report (common practice for yield trials; it varies
# by trait and crop).
HIGH_CV_PERCENT = 20.0


def _anova_rows(fit: TrialFit, has_blocks: bool) -> tuple[AnovaRow, ...]:
    rows = []
    for source in (("block", "entry") if has_blocks else ("entry",)):
        f, p = fit.f_test(source)
        df = fit.df[source]
        rows.append(AnovaRow(source=source, df=df, ss=fit.ss[source],
                             ms=fit.ss[source] / df if df else None,
                             f=None if np.isnan(f) else f, p=None if np.isnan(p) else p))
    rows.append(AnovaRow(source="residual", df=fit.residual_df, ss=fit.ss["residual"],
                         ms=fit.residual_ms, f=None, p=None))
    rows.append(AnovaRow(source="total", df=fit.df["total"], ss=fit.ss["total"], ms=None,
                         f=None, p=None))
    return tuple(rows)


def _ranks(means: np.ndarray, higher_is_better: bool) -> np.ndarray:
    score = -means if higher_is_better else means
    return stats.rankdata(score, method="min").astype(int)


def _vs_checks(sep: Separation, checks: Sequence[str]) -> dict[str, tuple[list, list]]:
    """Per entry: the checks it is significantly above, and below."""
    out: dict[str, tuple[list, list]] = {}
    check_set = set(checks)
    for c in sep.comparisons:
        if not c.significant:
            continue
        for entry, check, sign in ((c.entry_a, c.entry_b, 1), (c.entry_b, c.entry_a, -1)):
            if check in check_set and entry not in check_set:
                above, below = out.setdefault(entry, ([], []))
                (above if sign * c.difference > 0 else below).append(check)
    return out


@dataclass(frozen=True, slots=True, kw_only=True)
class _Model:
    """What the reporting needs of a fitted model: entry means, their covariance, the error."""

    entries: tuple[str, ...]
    means: np.ndarray
    cov: np.ndarray
    replication: np.ndarray
    residual_ms: float
    residual_df: int
    anova: tuple[AnovaRow, ...]
    components: tuple[VarianceEstimate, ...] = ()
    efficiency_vs_rcbd: float | None = None
    heritability: float | None = None
    spatial_options: tuple[SpatialOption, ...] = ()
    field_trend: tuple[PlotTrend, ...] = ()
    warnings: tuple[str, ...] = ()


def _least_squares_model(fit: TrialFit, has_blocks: bool) -> _Model:
    return _Model(entries=fit.entries, means=fit.means, cov=fit.means_cov,
                  replication=fit.replication, residual_ms=fit.residual_ms,
                  residual_df=fit.residual_df, anova=_anova_rows(fit, has_blocks))


def _mixed_model(book: FieldBook, trait: str, settings: AnalysisSettings, y: np.ndarray,
                 fit: TrialFit) -> _Model:
    """The REML-based analysis: incomplete blocks, a field-trend adjustment, or random entries.

    ``fit`` is the least-squares fit with fixed blocks: the complete-block fit of an RCBD, the
    intra-block fit of an alpha design.
    """
    from trialdesk.core.alpha_lattice import (
        efficiency_percent,
        fit_mixed,
        generalized_heritability,
        nested_labels,
    )
    from trialdesk.core.spatial import field_trend, fit_spatial, spatial_options

    plots = book.plots
    entry = plots["entry"].to_numpy()
    reps = None if settings.design == "crd" else plots["block"].to_numpy()
    fixed = [] if reps is None else [("block" if settings.design == "rcbd" else "replicate",
                                      reps)]
    random = ([("incomplete block", nested_labels(reps, plots["incomplete_block"].to_numpy()))]
              if settings.design == "alpha" else [])
    plain = fit_mixed(y, entry, fixed=fixed, random=random,
                      entries_random=settings.entries_random, trait=trait)
    chosen, options, trend, notes = plain, (), (), list(plain.warnings)
    if settings.spatial != "none":
        check_field_positions(book)
        row = plots["row"].to_numpy(dtype=np.int64)
        column = plots["column"].to_numpy(dtype=np.int64)
        fits = fit_spatial(y, entry, row, column, fixed=fixed, random=random,
                           entries_random=settings.entries_random, trait=trait)
        chosen = fits.rowcol if settings.spatial == "rowcol" else fits.papadakis
        options = spatial_options(plain, fits, settings.spatial)
        trend = field_trend(chosen, settings.spatial, y, plots["plot"].to_numpy(), row, column)
        notes = list(chosen.warnings)
        if settings.spatial == "papadakis" and fits.without_neighbours:
            notes.append(f"{fits.without_neighbours} plot(s) have no neighbour with a value in "
                         "their field row; their neighbour covariate is 0")
    efficiency = None
    if reps is not None and not settings.entries_random:
        complete = fit if settings.design == "rcbd" else fit_trial(y, entry, reps, trait=trait)
        efficiency = efficiency_percent(complete.means_cov, chosen.means_cov)
    heritability = None
    if settings.entries_random:
        heritability = generalized_heritability(chosen.means_cov, chosen.components["entry"])
        notes.append("entries were taken as random: the means are BLUPs, shrunk towards the "
                     "trial mean, for ranking; no mean separation is made")
    return _Model(
        entries=chosen.entries,
        means=chosen.means,
        cov=chosen.means_cov,
        replication=chosen.replication,
        residual_ms=chosen.residual_ms,
        residual_df=chosen.residual_df,
        anova=chosen.anova,
        components=tuple(VarianceEstimate(component=name, variance=v)
                         for name, v in chosen.components.items()),
        efficiency_vs_rcbd=efficiency,
        heritability=heritability,
        spatial_options=options,
        field_trend=trend,
        warnings=tuple(notes),
    )


def _no_separation() -> Separation:
    """Random entries: BLUPs rank the entries; no pair is tested."""
    return Separation(comparisons=(), different=None,
                      family=FamilyError(m=0, familywise_unadjusted=0.0,
                                         per_comparison_min=float("nan"),
                                         per_comparison_max=float("nan")))

def ranked_entries(entries: tuple[str, ...], means: np.ndarray, cov: np.ndarray,
                   replication: np.ndarray, sep, checks: tuple[str, ...] | list[str],
                   higher_is_better: bool) -> tuple[tuple[EntryMean, ...], float]:
    """The entry rows of a result and the average SED, from means already in rank order.

    ``sep`` is the outcome of :func:`trialdesk.core.separation.separate` on these means;
    ``checks`` the trial's checks (those not among ``entries`` are ignored). Shared by the
    single-trial and the series analysis, so both word their tables the same way.
    """
    letters = (grouping_letters(means, sep.different, higher_is_better=higher_is_better)
               if sep.different is not None else [None] * len(entries))
    checks = [c for c in checks if c in entries]
    check_mean = float(np.mean([means[entries.index(c)] for c in checks])) if checks else None
    vs = _vs_checks(sep, checks)
    ranks = _ranks(means, higher_is_better)
    se = np.sqrt(np.diag(cov))
    rows = tuple(
        EntryMean(
            entry=e,
            is_check=e in checks,
            mean=float(means[i]),
            se=float(se[i]),
            n=int(replication[i]),
            rank=int(ranks[i]),
            letters=letters[i],
            percent_of_check=None if not check_mean else float(100.0 * means[i] / check_mean),
            above_checks=tuple(vs.get(e, ([], []))[0]),
            below_checks=tuple(vs.get(e, ([], []))[1]),
        )
        for i, e in enumerate(entries)
    )
    var = np.diag(cov)
    iu = np.triu_indices(len(entries), k=1)
    sed = float(np.mean(np.sqrt(var[iu[0]] + var[iu[1]] - 2 * cov[iu])))
    return rows, sed



def analyze_trait(book: FieldBook, trait: str, settings: AnalysisSettings) -> TraitResult:
    """Analyse one trait of a field book."""
    higher_is_better = trait not in settings.lower_is_better
    values = book.values[trait]
    observed = values.notna().to_numpy()
    y = values.to_numpy(dtype=float)
    entry = book.plots["entry"].to_numpy()
    blocks = book.plots["block"].to_numpy() if settings.design in ("rcbd", "alpha") else None
    if settings.design == "alpha":
        from trialdesk.core.alpha_lattice import nested_labels

        if "incomplete_block" not in book.plots:  # analyze() checked; a direct call is told too
            check_alpha_design(book, traits=(trait,))
        blocks = nested_labels(blocks, book.plots["incomplete_block"].to_numpy())
    fit = fit_trial(y, entry, blocks, trait=trait)
    if fit.residual_df < 1:
        raise TrialInputError("no residual degrees of freedom: the trial has no replication left "
                              "to estimate error", file=book.source, column=trait)
    # Relative to the total, a residual SS at rounding level means every plot fits exactly:
    # nothing is left to test against (values copied, or entry means instead of plot values).
    if fit.ss["residual"] <= 1e-20 * fit.ss["total"] or fit.ss["total"] == 0:
        raise TrialInputError("the values leave no error variation (every plot fits the model "
                              "exactly), so entries cannot be tested; check that the column holds "
                              "plot values, not copied values or entry means",
                              file=book.source, column=trait)
    if settings.design == "alpha" or settings.spatial != "none" or settings.entries_random:
        model = _mixed_model(book, trait, settings, y, fit)
        if model.residual_df < 1:
            raise TrialInputError("no residual degrees of freedom are left once the field rows "
                                  "and columns (or the neighbour covariate) are fitted",
                                  file=book.source, column=trait)
    else:
        model = _least_squares_model(fit, settings.design == "rcbd")
    anova = model.anova
    entry_p = next(r.p for r in anova if r.source == "entry")
    entry_p = 1.0 if entry_p is None else entry_p

    order = np.lexsort((np.arange(len(model.means)),
                        -model.means if higher_is_better else model.means))
    entries = tuple(model.entries[i] for i in order)
    means = model.means[order]
    cov = model.cov[np.ix_(order, order)]
    se = np.sqrt(np.diag(cov))
    replication = model.replication[order]
    if settings.entries_random:
        sep = _no_separation()
    else:
        sep = separate(entries, means, cov, model.residual_df, method=settings.method,
                       alpha=settings.alpha, entry_p=entry_p, checks=settings.checks,
                       check_direction=settings.check_direction)
    entry_rows, sed = ranked_entries(entries, means, cov, replication, sep, settings.checks,
                                     higher_is_better)
    grand_mean = float(np.nanmean(y))
    cv = (float(100.0 * np.sqrt(model.residual_ms) / grand_mean) if grand_mean
          else float("nan"))
    warnings = list(model.warnings)
    if settings.method == "lsd" and entry_p > settings.alpha and not settings.entries_random:
        warnings.append(f"the entry F-test is not significant (p = {entry_p:.3g}), so the "
                        "protected LSD declares no pair different")
    if cv > HIGH_CV_PERCENT:
        warnings.append(f"CV is {cv:.1f}%: the trial is imprecise for this trait; check the data "
                        "and the flagged plots (common practice: above about 20% is high)")
    plots_observed = book.plots.loc[observed].reset_index(drop=True)
    diagnostics = diagnose(fit, y[observed], plots_observed)
    for flag in diagnostics.flagged:
        where = f"row {flag.source_row}, " if flag.source_row is not None else ""
        warnings.append(f"plot {flag.plot} ({where}entry {flag.entry}) has a studentized "
                        f"residual of {flag.studentized_residual:.2f}: check it in the field book")
    lsd = (float("nan") if settings.entries_random
           else float(stats.t.ppf(1 - settings.alpha / 2, model.residual_df) * sed))
    return TraitResult(
        trait=trait,
        higher_is_better=higher_is_better,
        decimals=recorded_decimals(values),
        design=settings.design,
        method=settings.method,
        alpha=settings.alpha,
        n_plots=int(len(y)),
        n_missing=int((~observed).sum()),
        grand_mean=grand_mean,
        cv_percent=cv,
        residual_ms=model.residual_ms,
        residual_df=model.residual_df,
        sem=float(np.mean(se)),
        sed=sed,
        lsd=lsd,
        anova=anova,
        entries=entry_rows,
        comparisons=sep.comparisons,
        family=sep.family,
        diagnostics=diagnostics,
        warnings=tuple(warnings),
        spatial=settings.spatial,
        entries_random=settings.entries_random,
        variance_components=model.components,
        efficiency_vs_rcbd=model.efficiency_vs_rcbd,
        heritability=model.heritability,
        spatial_options=model.spatial_options,
        field_trend=model.field_trend,
    )


def _validate_settings(book: FieldBook, settings: AnalysisSettings) -> tuple[str, ...]:
    if settings.design not in DESIGNS:
        raise TrialInputError(f"unknown design '{settings.design}': choose rcbd, crd or alpha")
    if settings.spatial not in SPATIAL_METHODS:
        raise TrialInputError(f"unknown field-trend adjustment '{settings.spatial}': choose one "
                              f"of {', '.join(SPATIAL_METHODS)}")
    if not isinstance(settings.entries_random, bool):
        raise TrialInputError(f"entries_random must be true or false, not "
                              f"{settings.entries_random!r}")
    if settings.method not in METHODS:
        raise TrialInputError(f"unknown method '{settings.method}': choose one of "
                              f"{', '.join(METHODS)}")
    if not 0 < settings.alpha < 1:
        raise TrialInputError(f"alpha must lie between 0 and 1, not {settings.alpha}")
    if settings.check_direction not in CHECK_DIRECTIONS:
        raise TrialInputError(f"unknown check direction '{settings.check_direction}': choose "
                              f"one of {', '.join(CHECK_DIRECTIONS)}")
    if settings.method == "dunnett" and not settings.checks:
        raise TrialInputError("Dunnett's method compares entries with checks: name the checks")
    traits = settings.traits or book.traits
    if not traits:
        raise TrialInputError("the field book has no numeric trait columns", file=book.source)
    for name in (*traits, *settings.lower_is_better):
        if name not in book.traits:
            raise TrialInputError(f"there is no trait column '{name}'; the traits are: "
                                  f"{', '.join(book.traits)}", file=book.source)
    if settings.design == "alpha":
        check_alpha_design(book, traits=traits, checks=settings.checks,
                           field_positions=settings.spatial != "none")
    else:
        check_design(book, design=settings.design, traits=traits, checks=settings.checks,
                     field_positions=settings.spatial != "none")
    return tuple(traits)


class AnalysisCancelled(Exception):
    """Raised by :func:`analyze` when its ``should_stop`` callback asks it to stop."""


def analyze(book: FieldBook, settings: AnalysisSettings | None = None, *,
            notes: Sequence[str] = (),
            progress: Callable[[int, int, str], object] | None = None,
            should_stop: Callable[[], bool] | None = None) -> TrialAnalysis:
    """Analyse every requested trait of a field book.

    ``notes`` are carried into the result for reports (e.g. how a derived yield was computed).
    ``progress(done, total, trait)`` is called before each trait and once at the end (with
    ``done == total``); ``should_stop()`` is asked between traits, and when it answers True the
    run stops with :class:`AnalysisCancelled` (the desktop program's cancel button).

    Examples
    --------
    >>> from trialdesk.core import AnalysisSettings, analyze, demo_fieldbook_path, read_fieldbook
    >>> book = read_fieldbook(demo_fieldbook_path())
    >>> result = analyze(book, AnalysisSettings(method="tukey", checks=("CHK-1", "CHK-2"),
    ...                                         traits=("grain_yield",)))
    >>> result.trait("grain_yield").residual_df
    70
    """
    settings = settings or AnalysisSettings()
    traits = _validate_settings(book, settings)
    results, skipped = [], []
    for done, trait in enumerate(traits):
        if should_stop is not None and should_stop():
            raise AnalysisCancelled
        if progress is not None:
            progress(done, len(traits), trait)
        try:
            results.append(analyze_trait(book, trait, settings))
        except TrialInputError as error:
            # One unusable trait (say, a lodging score of 1 on every plot) must not stop the
            # others; it is reported instead. Alone, it is an error.
            if len(traits) == 1:
                raise
            skipped.append(f"trait '{trait}' was not analysed: {error.message}")
    if should_stop is not None and should_stop():
        raise AnalysisCancelled
    if progress is not None:
        progress(len(traits), len(traits), "")
    if not results:
        raise TrialInputError("no trait could be analysed: " + "; ".join(skipped),
                              file=book.source)
    return TrialAnalysis(
        settings=replace(settings, traits=tuple(r.trait for r in results)),
        source=Path(book.source).name,
        sha256=book.sha256,
        software_version=VERSION,
        traits=tuple(results),
        warnings=(*(str(w) for w in book.warnings), *skipped),
        notes=tuple(notes),
    )

