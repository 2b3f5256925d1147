"""The readable summary ``trialdesk analyze`` prints: plain text, one block per trait."""

from __future__ import annotations

import textwrap

import numpy as np

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.results import TraitResult, TrialAnalysis
from trialdesk.core.separation import METHOD_NAMES

DESIGN_NAMES = {"rcbd": "randomized complete blocks", "crd": "completely randomized",
                "alpha": "incomplete blocks within replicates (alpha design)"}
SPATIAL_NAMES = {"none": "none", "rowcol": "field rows and columns as random effects",
                 "papadakis": "neighbour covariate along the field row (Papadakis 1937)"}
WIDTH = 96


def _wrap(text: str, indent: str = "  ") -> list[str]:
    return textwrap.wrap(text, WIDTH, initial_indent=indent, subsequent_indent=indent + "  ",
                         break_on_hyphens=False)


def _num(value: float | None, decimals: int) -> str:
    return "" if value is None else f"{value:.{decimals}f}"


def _p(value: float | None) -> str:
    if value is None:
        return ""
    return "<0.0001" if value < 0.0001 else f"{value:.4f}"


def _anova_lines(result: TraitResult) -> list[str]:
    width = max(10, *(len(row.source) + 1 for row in result.anova))
    lines = [f"  {'Source':<{width}}{'df':>5}{'SS':>14}{'MS':>14}{'F':>9}{'p':>10}"]
    for row in result.anova:
        lines.append(
            f"  {row.source:<{width}}{row.df:>5}{row.ss:>14.4f}{_num(row.ms, 4):>14}"
            f"{_num(row.f, 2):>9}{_p(row.p):>10}"
        )
    return lines


def _random_entries(result: TraitResult) -> bool:
    """Whether the entries were random; a series' result (sharing these helpers) never has them."""
    return getattr(result, "entries_random", False)


def _entry_lines(result: TraitResult, has_checks: bool) -> list[str]:
    d = result.decimals + 1
    letters = result.method != "dunnett" and not _random_entries(result)
    header = f"  {'Rank':>4}  {'Entry':<14}{'Mean':>10}{'SE':>8}{'n':>3}"
    header += "  Letters " if letters else ""
    header += f"  {'% check':>7}  vs checks" if has_checks else ""
    lines = [header]
    for e in result.entries:
        line = (f"  {e.rank:>4}  {(e.entry + (' *' if e.is_check else '')):<14}"
                f"{e.mean:>10.{d}f}{e.se:>8.{d}f}{e.n:>3}")
        if letters:
            line += f"  {e.letters or '':<8}"
        if has_checks:
            marks = []
            if e.above_checks:
                marks.append("above " + ", ".join(e.above_checks))
            if e.below_checks:
                marks.append("below " + ", ".join(e.below_checks))
            line += f"  {_num(e.percent_of_check, 1):>7}  {'; '.join(marks)}"
        lines.append(line.rstrip())
    return lines


def _level(value: float) -> str:
    """A small probability in plain decimals, two significant digits: 0.0000081, not 8.1e-06.

    >>> _level(8.1e-06), _level(0.05), _level(0.000312)
    ('0.0000081', '0.05', '0.00031')
    """
    return np.format_float_positional(value, precision=2, unique=True, fractional=False,
                                      trim="-")


def family_sentence(result: TraitResult) -> str:
    """The multiple-comparison arithmetic in one plain sentence."""
    if _random_entries(result):
        return ("Entries were taken as random: the means are BLUPs, for ranking; no pair of "
                "entries was tested.")
    f = result.family
    what = "comparisons with the checks" if result.method == "dunnett" else "pairs"
    level = (_level(f.per_comparison_min) if f.per_comparison_min == f.per_comparison_max
             else f"{_level(f.per_comparison_min)} to {_level(f.per_comparison_max)}")
    chance = ("more than 0.999" if f.familywise_unadjusted > 0.999
              else f"{f.familywise_unadjusted:.3f}")
    return (f"{f.m} {what}: {f.m} unadjusted tests at {result.alpha:g} would show at least one "
            f"false difference with probability {chance}; "
            f"{METHOD_NAMES[result.method]} tests each at a level of {level}.")


def _mixed_model_lines(result: TraitResult) -> list[str]:
    """Variance components, efficiency, heritability and the field-trend comparison."""
    lines: list[str] = []
    if result.variance_components:
        parts = ", ".join(f"{v.component} {v.variance:.4g}" for v in result.variance_components)
        lines += _wrap(f"Variance components (REML): {parts}.")
    if result.efficiency_vs_rcbd is not None:
        lines += _wrap(f"Efficiency relative to the complete-block analysis: "
                       f"{result.efficiency_vs_rcbd:.1f}% (ratio of the average squared SEDs, "
                       f"common practice).")
    if result.heritability is not None:
        lines += _wrap(f"Heritability of the BLUPs: {result.heritability:.3f} (Cullis, Smith & "
                       f"Coombes 2006).")
    if result.spatial_options:
        plain, *adjusted = result.spatial_options
        parts = [f"{SPATIAL_NAMES[o.method]} {o.residual_variance:.4g} ({o.percent_of_plain:.1f}% "
                 f"of it{', used for the means' if o.chosen else ''})" for o in adjusted]
        lines += _wrap(f"Field trend: residual variance {plain.residual_variance:.4g} without "
                       f"adjustment; " + "; ".join(parts) + ".")
    return lines


def trait_text(result: TraitResult, has_checks: bool) -> str:
    """The block of one trait."""
    d = result.decimals + 1
    direction = "higher is better" if result.higher_is_better else "lower is better"
    lsd = "" if result.entries_random else f", LSD({result.alpha:g}) {result.lsd:.{d}f}"
    lines = [
        f"== {result.trait} ({direction}) ==",
        f"  Plots {result.n_plots}, missing {result.n_missing}.  Grand mean "
        f"{result.grand_mean:.{d}f}, CV {result.cv_percent:.1f}%, SEm {result.sem:.{d}f}, "
        f"SED {result.sed:.{d}f}{lsd}",
        *_mixed_model_lines(result),
        "",
        *_anova_lines(result),
        "",
        *_entry_lines(result, has_checks),
        "",
        *_wrap(family_sentence(result)),
    ]
    if result.method != "dunnett" and not result.entries_random:
        lines.append("  Entries sharing a letter were not declared different by the method.")
    for test in result.diagnostics.tests:
        stat = "" if test.p is None else f" (p = {_p(test.p)})"
        lines += _wrap(f"{test.name}: {test.reading}{stat}")
    for warning in result.warnings:
        lines += _wrap(f"Note: {warning}")
    return "\n".join(lines)


def analysis_text(analysis: TrialAnalysis) -> str:
    """The whole summary."""
    s = analysis.settings
    first = analysis.traits[0] if analysis.traits else None
    n_entries = len(first.entries) if first else 0
    head = [
        f"Trialdesk {analysis.software_version} trial summary",
        f"Source: {analysis.source} (sha256 {analysis.sha256[:12]})",
        f"Design: {DESIGN_NAMES[s.design]}, {n_entries} entries"
        + (f"; checks: {', '.join(s.checks)} (* in the tables)" if s.checks else ""),
        f"Method: {METHOD_NAMES[s.method]}, alpha {s.alpha:g}"
        + (f", check comparisons {s.check_direction}" if s.method == "dunnett" else ""),
    ]
    if s.spatial != "none":
        head.append(f"Field trend: {SPATIAL_NAMES[s.spatial]}")
    if s.entries_random:
        head.append("Entries: random (means are BLUPs, for ranking)")
    for note in analysis.notes:
        head += _wrap(f"Note: {note}", indent="")
    for warning in analysis.warnings:
        head += _wrap(f"Warning: {warning}", indent="")
    blocks = [trait_text(t, bool(s.checks)) for t in analysis.traits]
    cautions = "\n".join(_wrap(CAUTIONS, indent=""))
    return "\n".join(head) + "\n\n" + "\n\n".join(blocks) + "\n\n" + cautions + "\n"
