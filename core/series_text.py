"""The readable summary of a trial series that ``trialdesk analyze`` prints: one block per trait.

Each block holds the environment table, Bartlett's test of the error variances, the combined
analysis of variance with both entry tests, the entry means over environments with letters and
percent of check, the stability table, and the variance components with the heritability and its
formula; the cautions close the summary.
"""

from __future__ import annotations

import math
from pathlib import Path

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.separation import METHOD_NAMES
from trialdesk.core.series_results import EntryTest, SeriesAnalysis, SeriesTraitResult
from trialdesk.core.summary_text import DESIGN_NAMES, _entry_lines, _num, _p, _wrap, family_sentence


def _p_is(value: float | None) -> str:
    """The p-value as "p = 0.0123", or "p < 0.0001" when it is that small."""
    shown = _p(value)
    return f"p < {shown[1:]}" if shown.startswith("<") else f"p = {shown}"


def _environment_lines(result: SeriesTraitResult) -> list[str]:
    d = result.decimals + 1
    width = max(13, *(len(r.environment) + 2 for r in result.environment_table))
    if result.means_only:
        lines = [f"  {'Environment':<{width}}{'Entries':>8}{'Mean':>10}"]
        lines += [f"  {r.environment:<{width}}{r.n_entries:>8}{r.mean:>10.{d}f}"
                  for r in result.environment_table]
        return lines
    lines = [f"  {'Environment':<{width}}{'Entries':>8}{'Mean':>10}{'CV%':>7}{'Error MS':>12}"
             f"{'df':>5}{f'LSD({result.alpha:g})':>11}"]
    for r in result.environment_table:
        lines.append(f"  {r.environment:<{width}}{r.n_entries:>8}{r.mean:>10.{d}f}"
                     f"{_num(r.cv_percent, 1):>7}{_num(r.error_ms, 4):>12}{r.error_df:>5}"
                     f"{_num(r.lsd, d):>11}")
    return lines


def _anova_lines(result: SeriesTraitResult) -> list[str]:
    lines = [f"  {'Source':<26}{'df':>5}{'SS':>14}{'MS':>14}{'F':>9}{'p':>10}"]
    for row in result.anova:
        lines.append(f"  {row.source:<26}{row.df:>5}{row.ss:>14.4f}{_num(row.ms, 4):>14}"
                     f"{_num(row.f, 2):>9}{_p(row.p):>10}".rstrip())
    return lines


def _test_line(test: EntryTest) -> str:
    f = "" if test.f is None else f"F = {test.f:.2f} on {test.df1} and {test.df2} df, "
    return f"Entry test, {test.label} (against {test.against}): {f}{_p_is(test.p)}"


def _stability_lines(result: SeriesTraitResult) -> list[str]:
    d = result.decimals + 1
    lines = [f"  {'Entry':<14}{'Mean':>10}{'Slope':>8}{'SE':>7}{'Dev. MS':>11}"
             f"{'Ecovalence':>12}{'Share%':>8}{'Shukla':>11}"]
    for s in result.stability:
        lines.append(f"  {s.entry:<14}{s.mean:>10.{d}f}{s.regression_slope:>8.3f}"
                     f"{s.slope_se:>7.3f}{s.deviation_ms:>11.4f}{s.ecovalence:>12.4f}"
                     f"{100 * s.ecovalence_share:>8.1f}{s.shukla_variance:>11.4f}")
    return lines


def _components_lines(result: SeriesTraitResult) -> list[str]:
    c = result.components
    if c is None:
        return []
    parts = [f"entries {c.entry:.4g}"]
    if c.entry_by_environment is not None:
        parts.append(f"entry x environment {c.entry_by_environment:.4g}")
    parts.append(f"{'error' if c.entry_by_environment is not None else 'residual'} {c.error:.4g}")
    lines = _wrap(f"Variance components ({c.method}): {', '.join(parts)}.")
    sizes = f"e = {c.n_environments:.4g}" + ("" if c.entry_by_environment is None
                                             else f", r = {c.replicates:.4g}")
    h2 = "undefined" if math.isnan(c.heritability) else f"{c.heritability:.3f}"
    lines += _wrap(f"Heritability of entry means: {h2}, "
                   f"{c.heritability_formula} ({sizes}).")
    lines += _wrap(f"Source: {c.source}.")
    for warning in c.warnings:
        lines += _wrap(f"Note: {warning}")
    return lines


def series_trait_text(result: SeriesTraitResult, has_checks: bool) -> str:
    """The block of one trait."""
    d = result.decimals + 1
    direction = "higher is better" if result.higher_is_better else "lower is better"
    basis = "entry x environment" if result.means_only else "pooled error"
    lines = [
        f"== {result.trait} ({direction}) ==",
        f"  {len(result.environment_table)} environments"
        + (", entry means only" if result.means_only else
           f", {result.replicates:.3g} plots per entry and environment (harmonic mean)"),
        "",
        *_environment_lines(result),
    ]
    if result.bartlett is not None:
        b = result.bartlett
        lines += [""] + _wrap(f"{b.name}: chi-square {b.statistic:.3f} on {b.df} df, "
                              f"{_p_is(b.p)}; {b.reading}.")
    lines += ["", "  Combined analysis of variance", *_anova_lines(result), ""]
    tests = [result.entry_test_random, result.entry_test_fixed, result.entry_test_weighted]
    for test in (t for t in tests if t is not None):
        lines += _wrap(_test_line(test))
    lines += _wrap(
        f"Grand mean {result.grand_mean:.{d}f}, CV {result.cv_percent:.1f}% (of the {basis} "
        f"MS), SED {result.sed:.{d}f}, LSD({result.alpha:g}) {result.lsd:.{d}f} on "
        f"{result.error_df} df.")
    lines += ["", "  Entry means over environments (least-squares"
              + (", weighted)" if result.weighted else ")"),
              *_entry_lines(result, has_checks), "", *_wrap(family_sentence(result))]
    if result.method != "dunnett":
        lines.append("  Entries sharing a letter were not declared different by the method.")
    if result.stability:
        lines += ["", "  Stability over environments", *_stability_lines(result)]
    components = _components_lines(result)
    if components:
        lines += ["", *components]
    for note in result.notes:
        lines += _wrap(f"Note: {note}")
    for warning in result.warnings:
        lines += _wrap(f"Warning: {warning}")
    return "\n".join(lines)


def series_text(analysis: SeriesAnalysis) -> str:
    """The whole series summary."""
    s = analysis.settings
    first = analysis.traits[0] if analysis.traits else None
    n_entries = len(first.entries) if first else 0
    means_only = first is not None and first.means_only
    names = ", ".join(e.environment for e in analysis.environments)
    head = [f"Trialdesk {analysis.software_version} series summary"]
    for source, sha in zip(analysis.sources, analysis.sha256, strict=True):
        head.append(f"Source: {Path(source).name} (sha256 {sha[:12]})")
    head += _wrap(f"Environments ({len(analysis.environments)}): {names}", indent="")
    head.append(("Entry means per environment" if means_only else
                 f"Design within environments: {DESIGN_NAMES[s.design]}")
                + f", {n_entries} entries"
                + (f"; checks: {', '.join(s.checks)} (* in the tables)" if s.checks else ""))
    head.append(f"Method: {METHOD_NAMES[s.method]}, alpha {s.alpha:g}"
                + (f", check comparisons {s.check_direction}" if s.method == "dunnett" else "")
                + "; environments random")
    for note in analysis.notes:
        head += _wrap(f"Note: {note}", indent="")
    for warning in analysis.warnings:
        head += _wrap(f"Warning: {warning}", indent="")
    blocks = [series_trait_text(t, bool(s.checks)) for t in analysis.traits]
    cautions = "\n".join(_wrap(CAUTIONS, indent=""))
    return "\n".join(head) + "\n\n" + "\n\n".join(blocks) + "\n\n" + cautions + "\n"
