"""The report of a trial series as an Excel workbook (.xlsx).

:func:`write_series_workbook` lays a :class:`~trialdesk.core.series_report.SeriesReport` out on
these sheets:

* **Series summary**: the series' name, the header block, and per trait the series summary table
  (entries as rows; the mean in each environment, the mean over environments with its letters,
  percent of check, slope, ecovalence and its share, rank) with the environments' means, CV% and
  LSD under it; then the footnotes and the cautions;
* **Combined ANOVA**: per trait the combined analysis of variance, every entry test with the view
  of the environments it takes, Bartlett's test and whether the analysis was weighted, the
  statistics over environments, the variance components and the heritability with its formula
  and source;
* **Environments**: the environments (location, season, file), and per trait each
  environment's own analysis and every entry's rank in each environment;
* **Stability**: per trait every stability statistic of each entry grown in every environment;
* **one sheet per trait**: the entries ranked over environments and every comparison of the
  method;
* **Settings**: every analysis setting, each source and its checksum, and the command line that
  repeats the run.

The sheets are written with the helpers of :mod:`trialdesk.core.workbook`, so they look, print
and protect text as the single-trial workbook does: numbers at full precision (only the number
formats round them), every text cell stored as text, A4 one page wide, and the file written
atomically.
"""

from __future__ import annotations

import os
import shlex
from pathlib import Path
from typing import TYPE_CHECKING

from trialdesk.core.errors import TrialInputError
from trialdesk.core.separation import METHOD_NAMES
from trialdesk.core.series_report import (
    SLOPE_DECIMALS,
    SeriesReport,
    SeriesTraitReport,
    build_series_report,
    entry_test_text,
)
from trialdesk.core.workbook import (
    _comparisons_table,
    _critical_label,
    _entries_table,
    _letter,
    _mark_font,
    _Num,
    _p,
    _Page,
    _save,
    _Sheet,
    _small_decimals,
    _Styles,
    _Value,
    sheet_titles,
)

if TYPE_CHECKING:
    from trialdesk.core.series import SeriesData
    from trialdesk.core.series_results import SeriesAnalysis

__all__ = ["SERIES_SHEETS", "series_command_line", "write_series_workbook"]

#: The sheets every series workbook has, besides one per trait (before Settings).
SERIES_SHEETS = ("Series summary", "Combined ANOVA", "Environments", "Stability", "Settings")

_SHARE_DECIMALS = 1  # an ecovalence share shows as a percentage with one decimal


def _summary_table(sheet: _Sheet, top: int, part: SeriesTraitReport) -> tuple[int, int, int]:
    """The series summary table of one trait from row ``top`` (its title there, the table's
    two heading rows under it) and its bottom rows; returns its heading row, the row after its
    entries and the row after the bottom rows."""
    d, n_env = part.decimals, len(part.environments)
    mean_col = 2 + n_env
    last = mean_col + 6  # the rank column
    alpha = f"{part.result.alpha:g}"
    sheet.heading(top, part.title, font="title")
    group = top + 1
    sheet.put(group, 1, None, fill="header", border=True)
    sheet.note(group, "Mean in each environment", 2, mean_col - 1, font="bold", fill="header",
               border=True)
    sheet.note(group, "Over environments", mean_col, last, font="bold", fill="header",
               border=True)
    headers = ["Entry", *part.environments, "Mean",
               "Letters" if part.has_letters else "vs checks", "% of check", "Slope",
               "Ecovalence", "Share of ecovalence", "Rank"]
    body, fonts = [], {}
    for i, r in enumerate(part.rows):
        body.append([r.entry, *(_Num(c, d) for c in r.cells), _Num(r.mean, d),
                     f"{r.letters} {r.marks}".strip(), _Num(r.percent_of_check, 1),
                     _Num(r.slope, SLOPE_DECIMALS), _Num(r.ecovalence, d + 1),
                     _Num(r.ecovalence_share, _SHARE_DECIMALS, percent=True), _Num(r.rank, 0)])
        if font := _mark_font(part.higher_is_better, r.marks):
            fonts[i, mean_col - 1] = font
    head = group + 1
    end = sheet.table(head, headers, body, checks=[r.is_check for r in part.rows], banded=True,
                      fonts=fonts)
    bottom: list[tuple[str, list[_Value], _Value]] = [
        ("Environment mean", [_Num(m, d) for m in part.environment_means],
         _Num(part.grand_mean, d)),
        ("CV%", [_Num(c, 1) for c in part.environment_cv], _Num(part.cv_percent, 1)),
        (f"LSD {alpha} (unadjusted)", [_Num(v, d) for v in part.environment_lsd],
         _Num(part.lsd, d)),
    ]
    if part.critical_name != f"LSD {alpha} (unadjusted)":
        bottom.append((_critical_label(part.critical_name), [None] * n_env,
                       _Num(part.critical_difference, d)))
    bottom.append((f"Entry F-test p ({part.entry_test.label})", [None] * n_env,
                   _p(part.entry_test.p)))
    for row, (label, cells, over) in enumerate(bottom, start=end):
        sheet.note(row, label, 1, 1, font="bold", border=True)  # wraps, never widens
        for col, cell in enumerate([*cells, over], start=2):
            sheet.put(row, col, cell, border=True)
        for col in range(mean_col + 1, last + 1):
            sheet.put(row, col, None, border=True)
    return head, end, end + len(bottom)


def _summary(sheet: _Sheet, report: SeriesReport, page: _Page) -> None:
    widest = max(len(t.environments) + 8 for t in report.traits)  # entry ... rank
    sheet.heading(1, report.title, font="title")
    row = 3
    for label, value in report.header:
        sheet.put(row, 1, label, font="bold")
        sheet.note(row, value, 2, widest)
        row += 1
    tables = []
    for part in report.traits:
        tables.append(_summary_table(sheet, row + 1, part))
        row = tables[-1][2]
    head, end, _ = tables[0]
    row += 1
    for text in report.footnotes:
        sheet.note(row, text, 1, widest)
        row += 1
    if any(r.marks for t in report.traits for r in t.rows):
        sheet.note(row, "Means in bold green are significantly better than the checks, in dark "
                   "red significantly worse (higher is better, except for traits marked lower "
                   "is better). Check entries are shaded.", 1, widest)
        row += 1
    sheet.heading(row + 1, "Cautions")
    sheet.note(row + 2, report.cautions, 1, widest)
    last = len(report.traits[0].environments) + 8
    # As on the single-trial summary: the entry column is frozen, and the main trait's table
    # headings print on every page.
    sheet.finish(page, title_rows=f"{head - 1}:{head}", freeze="B1",
                 filter_ref=f"A{head}:{_letter(last)}{end - 1}")


def _rows(sheet: _Sheet, row: int, pairs: list[tuple[str, _Value]]) -> int:
    """A two-column table of labels (spanning three columns, so that they do not widen the
    columns of the tables around) and values; returns the row after it and a blank one."""
    sheet.note(row, "Statistic", 1, 3, font="bold", fill="header", border=True)
    sheet.put(row, 4, "Value", font="bold", fill="header", border=True)
    for i, (label, value) in enumerate(pairs, start=row + 1):
        sheet.note(i, label, 1, 3, border=True)
        if isinstance(value, str):
            sheet.note(i, value, 4, 6, border=True)
        else:
            sheet.put(i, 4, value, border=True)
    return row + len(pairs) + 2


def _anova(sheet: _Sheet, report: SeriesReport, page: _Page) -> None:
    sheet.heading(1, "Combined analysis over environments", font="title")
    row = 3
    for part in report.traits:
        result, d = part.result, part.decimals
        sheet.heading(row, part.title, font="title")
        sheet.heading(row + 1, "Combined analysis of variance")
        anova = [[a.source, _Num(a.df, 0), _Num(a.ss, d + 1), _Num(a.ms, d + 1), _Num(a.f, 2),
                  _p(a.p)] for a in part.anova]
        row = sheet.table(row + 2, ["Source", "df", "SS", "MS", "F", "p"], anova) + 1

        sheet.heading(row, "Entry tests")
        tests = [[entry_test_text(t), t.against, _Num(t.f, 2), _Num(t.df1, 0), _Num(t.df2, 0),
                  _p(t.p)] for t in part.entry_tests]
        row = sheet.table(row + 1, ["Test", "Against", "F", "df (entries)", "df (against)", "p"],
                          tests) + 1

        sheet.heading(row, "Error variances of the environments")
        b = part.bartlett
        if b is None:
            sheet.put(row + 1, 1, "Not tested: the series holds entry means only.",
                      measure=False)
            row += 3
        else:
            row = sheet.table(row + 1, ["Test", "Chi-square", "df", "p", "Reading"],
                              [[b.name, _Num(b.statistic, 4), b.df, _p(b.p), b.reading]]) + 1
        sheet.put(row, 1, "Weighted analysis", font="bold")
        sheet.note(row, "yes: the error variances differ markedly, so the entry means and their "
                   "comparisons come from the analysis of the entry x environment means weighted "
                   "by replicates / error mean square of the environment" if part.weighted
                   else "no", 2, 6)
        row += 2

        family = result.family
        stats: list[tuple[str, _Value]] = [
            ("Grand mean", _Num(part.grand_mean, d)),
            ("CV%", _Num(part.cv_percent, 1)),
            ("Error mean square of an entry x environment mean", _Num(result.error_ms, d + 1)),
            ("Error df (entry x environment)", _Num(result.error_df, 0)),
            ("Plots per entry and environment (harmonic mean)", _Num(result.replicates, 2)),
            ("SE of a difference (SED)", _Num(result.sed, d)),
            (f"LSD {result.alpha:g} (unadjusted)", _Num(result.lsd, d)),
            (_critical_label(part.critical_name), _Num(part.critical_difference, d)),
            ("Comparisons made", _Num(family.m, 0)),
            ("Chance of a false difference if unadjusted", _Num(family.familywise_unadjusted,
                                                                4)),
            ("Per-comparison level, lowest", _Num(family.per_comparison_min,
                                                  _small_decimals(family.per_comparison_min))),
            ("Per-comparison level, highest", _Num(family.per_comparison_max,
                                                   _small_decimals(family.per_comparison_max))),
        ]
        sheet.heading(row, "Statistics over environments")
        row = _rows(sheet, row + 1, stats)

        sheet.heading(row, "Variance components and heritability of entry means")
        c = part.components
        if c is None:
            sheet.put(row + 1, 1, "Not estimated (see the warnings on the Series summary).",
                      measure=False)
            row += 3
        else:
            pairs: list[tuple[str, _Value]] = [("Entries (s2G)", _Num(c.entry, d + 1))]
            if c.entry_by_environment is not None:
                pairs += [("Entry x environment (s2GE)", _Num(c.entry_by_environment, d + 1)),
                          ("Error (s2e)", _Num(c.error, d + 1))]
            else:
                pairs.append(("Residual of the means (s2res)", _Num(c.error, d + 1)))
            pairs += [("Environments (e)", _Num(c.n_environments, 2)),
                      ("Replicates (r)", _Num(c.replicates, 2)),
                      ("Heritability of entry means (H2)", _Num(c.heritability, 3)),
                      ("Formula", c.heritability_formula),
                      ("Estimated by", c.method),
                      ("Converged", "yes" if c.converged else "no"),
                      ("Source", c.source),
                      *(("Warning", w) for w in c.warnings)]
            row = _rows(sheet, row + 1, pairs)
        row += 1
    sheet.finish(page, title_rows="1:1", freeze="A2")


def _environments(sheet: _Sheet, report: SeriesReport, page: _Page) -> None:
    sheet.heading(1, "Environments of the series", font="title")
    listed = [[e.environment, e.location, e.season, Path(e.source).name]
              for e in report.analysis.environments]
    row = sheet.table(3, ["Environment", "Location", "Season", "Source"], listed) + 1
    for part in report.traits:
        result, d = part.result, part.decimals
        sheet.heading(row, part.title, font="title")
        sheet.heading(row + 1, "Each environment's own analysis")
        table = [[r.environment, r.location, r.season, _Num(r.n_entries, 0), _Num(r.mean, d),
                  _Num(r.cv_percent, 1), _Num(r.error_ms, d + 1), _Num(r.error_df, 0),
                  _Num(r.lsd, d)] for r in result.environment_table]
        row = sheet.table(row + 2, ["Environment", "Location", "Season", "Entries", "Mean", "CV%",
                                    "Error MS", "Error df",
                                    f"LSD {result.alpha:g} (unadjusted)"], table) + 1
        sheet.heading(row, "Rank of each entry in each environment (1 = best there)")
        ranks = dict(result.ranks)
        rows = [[r.entry, *(_Num(k, 0) for k in ranks[r.entry]), _Num(r.rank, 0)]
                for r in part.rows]
        row = sheet.table(row + 1, ["Entry", *part.environments, "Over environments"], rows,
                          checks=[r.is_check for r in part.rows], banded=True) + 1
    sheet.finish(page, title_rows="1:1", freeze="A2")


def _stability(sheet: _Sheet, report: SeriesReport, page: _Page) -> None:
    sheet.heading(1, "Stability over environments", font="title")
    row = 3
    for part in report.traits:
        result, d = part.result, part.decimals
        sheet.heading(row, part.title, font="title")
        row += 1
        if not result.stability:
            sheet.put(row, 1, "Not computed: stability needs at least 3 environments and 3 "
                      "entries grown in all of them.", measure=False)
            row += 2
            continue
        checks = {e.entry for e in result.entries if e.is_check}
        table = [[s.entry, "yes" if s.entry in checks else "no", _Num(s.n_environments, 0),
                  _Num(s.mean, d), _Num(s.regression_slope, SLOPE_DECIMALS),
                  _Num(s.slope_se, SLOPE_DECIMALS + 1), _Num(s.deviation_ms, d + 1),
                  _Num(s.ecovalence, d + 1),
                  _Num(s.ecovalence_share, _SHARE_DECIMALS, percent=True),
                  _Num(s.shukla_variance, d + 1)] for s in result.stability]
        row = sheet.table(row, ["Entry", "Check", "Environments", "Mean", "Slope",
                                "SE of slope", "Deviation MS", "Ecovalence",
                                "Share of ecovalence", "Stability variance"], table,
                          checks=[s.entry in checks for s in result.stability], banded=True) + 1
    for text in (
            "Mean: over the environments, of the entry's means there. Slope and its SE: the "
            "regression of the entry's means on the environment index (Finlay & Wilkinson "
            "1963, Aust. J. Agric. Res. 14:742-754; Eberhart & Russell 1966, Crop Sci. "
            "6:36-40).",
            "Deviation MS: the mean square of the deviations from the entry's line, less the "
            "error variance of a mean where the plots give it (Eberhart & Russell 1966); it can "
            "be negative.",
            "Ecovalence: the entry's part of the entry x environment sum of squares of the "
            "means, and its share of the whole (Wricke 1962, Z. Pflanzenzuechtg. 47:92-96).",
            "Stability variance: the entry's own entry x environment variance (Shukla 1972, "
            "Heredity 29:237-245); a negative estimate reads as zero."):
        sheet.note(row, text, 1, 10)
        row += 1
    sheet.finish(page, title_rows="1:1", freeze="A2")


def _trait_sheet(sheet: _Sheet, part: SeriesTraitReport, page: _Page) -> None:
    result = part.result
    sheet.heading(1, f"{part.title}: {METHOD_NAMES[result.method]}, alpha {result.alpha:g}, "
                  "over environments", font="title")
    row = _entries_table(sheet, 3, result.entries, part.decimals, part.higher_is_better)
    head, end = _comparisons_table(sheet, row, result.comparisons, part.decimals,
                                   dunnett=result.method == "dunnett")
    sheet.finish(page, title_rows="1:1", freeze="A2", filter_ref=f"A{head}:H{max(head, end - 1)}")


def series_command_line(analysis: SeriesAnalysis, data: SeriesData | None = None, *,
                        components: str = "auto") -> str:
    """The ``trialdesk analyze`` command that repeats ``analysis``, quoted for a POSIX shell.

    With ``data`` the sources are their full paths, and for a field book the columns it was read
    from are named, so the command does not depend on finding them again; ``components`` is how
    the variance components were asked to be estimated.

    >>> from trialdesk.core.results import AnalysisSettings
    >>> from trialdesk.core.series_results import SeriesAnalysis
    >>> run = SeriesAnalysis(settings=AnalysisSettings(), sources=("a.trial", "b.trial"),
    ...                      sha256=("", ""), software_version="", environments=(), traits=(),
    ...                      warnings=(), notes=())
    >>> series_command_line(run)
    'trialdesk analyze a.trial b.trial --design rcbd --method tukey --alpha 0.05 \
--check-direction both --variance-components auto'
    """
    settings = analysis.settings
    sources = (list(analysis.sources) if data is None
               else [os.path.abspath(s) for s in data.sources])
    args = ["trialdesk", "analyze", *sources]

    def option(flag: str, value: str) -> None:
        # "--check=-3", so that a value starting with "-" is not taken for an option.
        args.extend([f"{flag}={value}"] if value.startswith("-") else [flag, value])

    if data is not None:
        for role in ("entry", "block", "location", "season"):
            if data.roles.get(role):
                option(f"--{role}", data.roles[role])
    option("--design", settings.design)
    option("--method", settings.method)
    option("--alpha", repr(settings.alpha))
    for check in settings.checks:
        option("--check", check)
    option("--check-direction", settings.check_direction)
    for trait in settings.traits:
        option("--trait", trait)
    for trait in settings.lower_is_better:
        option("--lower-is-better", trait)
    option("--variance-components", components)
    return shlex.join(args)


def _settings(sheet: _Sheet, report: SeriesReport, data: SeriesData | None, components: str,
              page: _Page) -> None:
    analysis = report.analysis
    sheet.table(1, ["Setting", "Value"], [])
    row = 2

    def line(key: str, value: _Value | list) -> None:
        nonlocal row
        sheet.put(row, 1, key, font="bold", border=True)
        if isinstance(value, list):
            sheet.put(row, 2, None, border=True)
            for col, item in enumerate(value, start=2):
                sheet.put(row, col, item, border=True)
        elif isinstance(value, str):
            sheet.note(row, value, 2, 2, border=True, measure=True)
        else:
            sheet.put(row, 2, value, border=True)
        row += 1

    for key, value in analysis.settings.to_dict().items():
        line(key, value if isinstance(value, list | str) else _Num(value))
    line("variance components", components)
    for k, (source, sha) in enumerate(zip(analysis.sources, analysis.sha256, strict=True)):
        line("source file", Path(source).name)
        line("source path", "not supplied with the report" if data is None
             else os.path.abspath(data.sources[k]))
        line("source SHA-256", sha)
    if data is not None:
        for role in ("entry", "block", "location", "season"):
            line(f"{role} column", data.roles.get(role) or "none")
    line("software version", analysis.software_version)
    line("analysed on", page.analysed_on)
    for note in analysis.notes:
        line("note", note)
    for warning in analysis.warnings:
        line("warning", warning)
    line("command line", series_command_line(analysis, data, components=components))
    sheet.finish(page, title_rows="1:1", freeze="A2")


def write_series_workbook(analysis: SeriesAnalysis | SeriesReport, path: str | os.PathLike, *,
                          data: SeriesData | None = None, components: str = "auto") -> Path:
    """Write the report of a series analysis as an Excel workbook.

    Parameters
    ----------
    analysis : SeriesAnalysis or SeriesReport
        The analysis (its report is made with today's date), or its report from
        :func:`trialdesk.core.series_report.build_series_report`.
    path : str or path-like
        The .xlsx file to write. It is written beside its final place and moved there when
        complete, so a failed write leaves a workbook already there as it was.
    data : SeriesData, optional
        The series that was analysed, for the sources' full paths and the columns read, on the
        Settings sheet and in its command line.
    components : {"auto", "reml"}
        How the variance components were asked to be estimated, for the command line.

    Returns
    -------
    pathlib.Path
        The path written.

    Raises
    ------
    TrialInputError
        When the file cannot be written (a missing folder, no permission, a full disk), or when
        ``data`` is not the series the analysis was made from (their checksums differ).
    """
    report = analysis if isinstance(analysis, SeriesReport) else build_series_report(analysis)
    run = report.analysis
    target = Path(path)
    if data is not None and tuple(data.sha256) != tuple(run.sha256):
        raise TrialInputError("the series given is not the one this report was made from (their "
                              "checksums differ)", file=", ".join(data.sources))
    from openpyxl import Workbook

    styles = _Styles()
    page = _Page(trial=report.title, analysed_on=report.analysed_on,
                 software=f"Trialdesk {run.software_version}")
    workbook = Workbook()
    summary = workbook.active
    summary.title = SERIES_SHEETS[0]
    _summary(_Sheet(summary, styles), report, page)
    _anova(_Sheet(workbook.create_sheet(SERIES_SHEETS[1]), styles), report, page)
    _environments(_Sheet(workbook.create_sheet(SERIES_SHEETS[2]), styles), report, page)
    _stability(_Sheet(workbook.create_sheet(SERIES_SHEETS[3]), styles), report, page)
    titles = sheet_titles([t.trait for t in report.traits], SERIES_SHEETS)
    for title, part in zip(titles, report.traits, strict=True):
        _trait_sheet(_Sheet(workbook.create_sheet(title), styles), part, page)
    _settings(_Sheet(workbook.create_sheet(SERIES_SHEETS[4]), styles), report, data, components,
              page)
    return _save(workbook, target)
