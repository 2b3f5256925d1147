"""The trial report as an Excel workbook (.xlsx).

:func:`write_workbook` lays a :class:`~trialdesk.core.report.TrialReport` out on these sheets:

* **Summary**: the title, the header block, the all-traits table (per trait a mean and a letters
  column, then percent of check and rank on the main trait), the bottom rows (grand mean, CV%,
  critical difference, entry F-test p), the footnotes and the cautions;
* **one sheet per trait**: analysis of variance, statistics, ranked entries, every comparison;
* **Diagnostics**: flagged plots and assumption tests of each trait;
* **Data**: the plot data as analysed, missing values as empty cells;
* **Settings**: every analysis setting, the source and its checksum, and the command line that
  repeats the run.

Numbers are written at full precision; only the cells' number formats round them. Every text cell
is stored as text, so an entry code such as ``=SUM(A1:A9)`` is never read as a formula. The file
is written atomically (:func:`trialdesk.core.atomic.write_atomic`): a failed write leaves any
workbook already at the path as it was.

openpyxl is imported when a workbook is written, not when this module is, so batch commands that
write no workbook start quickly.
"""

from __future__ import annotations

import io
import math
import numbers
import os
import re
import shlex
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from trialdesk.core.atomic import write_atomic
from trialdesk.core.errors import TrialInputError
from trialdesk.core.report import ABOVE_MARK, BELOW_MARK, ReportColumn, TrialReport
from trialdesk.core.separation import METHOD_NAMES

if TYPE_CHECKING:
    from openpyxl.worksheet.worksheet import Worksheet

    from trialdesk.core.fieldbook import FieldBook
    from trialdesk.core.results import Comparison, EntryMean, TraitResult, TrialAnalysis

__all__ = ["FIXED_SHEETS", "P_FORMAT", "command_line", "sheet_titles", "write_workbook"]

#: The sheets every workbook has, besides one per trait (after Summary).
FIXED_SHEETS = ("Summary", "Diagnostics", "Data", "Settings")

#: Number format of p-values: four decimals, and "<0.0001" below that.
P_FORMAT = '[<0.0001]"<0.0001";0.0000'

# Text a spreadsheet program may take for the start of a formula when a cell is typed or pasted.
_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
# Characters an .xlsx file cannot hold (XML 1.0 forbids them); shown as the replacement character.
_ILLEGAL_CHARACTERS = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")
# Characters Excel refuses in a sheet name; names are at most 31 characters (Excel's limits).
_SHEET_FORBIDDEN = re.compile(r"[\[\]:*?/\\]")
_SHEET_CHARS = 31
_EXCEL_RESERVED = ("History",)  # Excel keeps this sheet name for itself

_MIN_WIDTH = 6
_MAX_WIDTH = 50
_LANDSCAPE_CHARS = 95  # used columns wider than this in all print across the page
_LINE_HEIGHT = 15.0  # points per line of the default 11-point font
_HEADER_TEXT_CHARS = 80  # the trial name in the page header is cut here (Excel: 255 in all)

_COLOURS = {
    "header": "E4E7EB",  # table headings
    "band": "F5F6F7",  # every second row of a long table
    "check": "E8F0E2",  # rows of check entries
    "border": "A6ABB2",
    "better": "2D6A2D",  # significantly better than the checks
    "worse": "8A2B2B",  # significantly worse than the checks
}


@dataclass(frozen=True, slots=True)
class _Num:
    """A number to write, with the decimals its cell shows (None: as stored)."""

    value: float | int | None
    decimals: int | None = None
    p_value: bool = False
    percent: bool = False  # a share, shown as a percentage with ``decimals`` places

    @property
    def shown(self) -> bool:
        return self.value is not None and math.isfinite(self.value)

    @property
    def number_format(self) -> str:
        if self.p_value:
            return P_FORMAT
        if self.decimals is None:
            return "General"
        fixed = "0." + "0" * self.decimals if self.decimals else "0"
        return fixed + "%" if self.percent else fixed

    def width(self) -> int:
        if self.p_value:
            return len("<0.0001")
        if self.decimals is None:
            return len(repr(self.value))
        if self.percent:
            return len(f"{100 * self.value:.{self.decimals}f}%")
        return len(f"{self.value:.{self.decimals}f}")


_Value = str | _Num | None


def _p(value: float | None) -> _Num:
    return _Num(value, p_value=True)


def _small_decimals(level: float) -> int:
    """Decimals that show a small probability to two significant digits (at least four)."""
    return max(4, 1 - math.floor(math.log10(level))) if level > 0 else 4


class _Styles:
    """The workbook's fonts, fills, border and wrapping, by name.

    A cell's style is set once per combination; cells of the same combination get a copy of that
    style (setting a style object on each cell makes openpyxl compare it with every style it holds,
    which is slow for a table of many thousand cells).
    """

    def __init__(self) -> None:
        from openpyxl.styles import Alignment, Border, Font, PatternFill, Side

        def fill(colour: str) -> PatternFill:
            return PatternFill(fill_type="solid", start_color=colour, end_color=colour)

        side = Side(style="thin", color=_COLOURS["border"])
        self.fonts = {"title": Font(bold=True, size=14), "bold": Font(bold=True),
                      "better": Font(bold=True, color=_COLOURS["better"]),
                      "worse": Font(color=_COLOURS["worse"])}
        self.fills = {name: fill(_COLOURS[name]) for name in ("header", "band", "check")}
        self.border = Border(left=side, right=side, top=side, bottom=side)
        self.wrap = Alignment(wrap_text=True, vertical="top")
        self._made: dict[tuple, Any] = {}

    def apply(self, cell: Any, font: str | None, fill: str | None, border: bool, wrap: bool,
              number_format: str) -> None:
        """Give ``cell`` this combination of font, fill, border, wrapping and number format."""
        from copy import copy

        key = (font, fill, border, wrap, number_format)
        made = self._made.get(key)
        if made is not None:
            cell._style = copy(made)
            return
        if font is not None:
            cell.font = self.fonts[font]
        if fill is not None:
            cell.fill = self.fills[fill]
        if border:
            cell.border = self.border
        if wrap:
            cell.alignment = self.wrap
        cell.number_format = number_format
        self._made[key] = copy(cell._style)


def _put_text(cell: Any, text: str) -> None:
    """Store ``text`` in ``cell`` as text: never a formula, an error value or a number.

    openpyxl takes a string starting with "=" for a formula and "#N/A" for an error, so the cell's
    type is set back to text after the value. Text that a spreadsheet program would read as a
    formula when the cell is edited also gets the quote prefix, which keeps it text then.
    """
    text = _ILLEGAL_CHARACTERS.sub("\ufffd", text)
    cell.value = text
    cell.data_type = "s"
    if text.startswith(_FORMULA_STARTS):
        cell.quotePrefix = True


def _put_number(cell: Any, value: float | int) -> None:
    """Store ``value`` in ``cell`` at full precision.

    openpyxl writes a float to 16 significant digits, which does not always give back the same
    number; the shortest text that does (``repr``) is stored instead, as a number cell.
    """
    if isinstance(value, numbers.Integral):
        cell.value = int(value)
    else:
        cell.value = repr(float(value))
        cell.data_type = "n"


@dataclass(frozen=True, slots=True)
class _Page:
    """What the page header and footer of every sheet print."""

    trial: str
    analysed_on: str
    software: str


@dataclass
class _Sheet:
    """A worksheet being filled: every cell is written here, and the column widths measured."""

    ws: Worksheet
    styles: _Styles
    widths: dict[int, int] = field(default_factory=dict)
    wrapped: dict[int, list[tuple[int, int, str]]] = field(default_factory=dict)

    def put(self, row: int, col: int, value: _Value, *, font: str | None = None,
            fill: str | None = None, border: bool = False, wrap: bool = False,
            measure: bool = True) -> None:
        """Write one cell (text always as text, numbers at full precision) and its style."""
        cell = self.ws.cell(row=row, column=col)
        shown = isinstance(value, _Num) and value.shown
        self.styles.apply(cell, font, fill, border, wrap,
                          value.number_format if shown else "General")
        chars = 0
        if isinstance(value, str) and value:
            _put_text(cell, value)
            chars = len(value)
        elif shown:
            _put_number(cell, value.value)
            chars = value.width()
        if measure and chars > self.widths.get(col, 0):
            self.widths[col] = chars

    def note(self, row: int, text: str, first: int, last: int, *, font: str | None = None,
             fill: str | None = None, border: bool = False, measure: bool = False) -> None:
        """Write wrapped text across columns ``first`` to ``last``; the row grows to fit it."""
        self.put(row, first, text, font=font, fill=fill, border=border, wrap=True,
                 measure=measure)
        if last > first:
            for col in range(first + 1, last + 1):
                self.put(row, col, None, fill=fill, border=border)
            self.ws.merge_cells(start_row=row, start_column=first, end_row=row, end_column=last)
        self.wrapped.setdefault(row, []).append((first, last, text))

    def heading(self, row: int, text: str, *, font: str = "bold") -> None:
        """A line above a table (it does not widen its column)."""
        self.put(row, 1, text, font=font, measure=False)

    def table(self, top: int, headers: Sequence[str] | None, rows: Sequence[Sequence[_Value]],
              *, checks: Sequence[bool] = (), banded: bool = False,
              fonts: dict[tuple[int, int], str] | None = None) -> int:
        """Write a bordered table from column A; the row after it is returned.

        Headers are bold and shaded, rows of checks (``checks``) shaded green, and every second
        row lightly shaded when ``banded``; ``fonts`` gives the font of single body cells by
        (row, column) index from 0.
        """
        row = top
        if headers is not None:
            for col, text in enumerate(headers, start=1):
                self.put(row, col, text, font="bold", fill="header", border=True)
            row += 1
        fonts = fonts or {}
        for i, values in enumerate(rows):
            fill = ("check" if i < len(checks) and checks[i]
                    else "band" if banded and i % 2 else None)
            for j, value in enumerate(values):
                self.put(row, j + 1, value, font=fonts.get((i, j)), fill=fill, border=True)
            row += 1
        return row

    def finish(self, page: _Page, *, title_rows: str | None, freeze: str | None,
               filter_ref: str | None = None) -> None:
        """Column widths from the longest text, row heights of wrapped text, and print set-up:
        A4, one page wide, orientation by width, repeated title rows, header and footer."""
        from openpyxl.utils import get_column_letter

        ws = self.ws
        widths = {col: min(_MAX_WIDTH, max(_MIN_WIDTH, self.widths.get(col, 0) + 2))
                  for col in range(1, ws.max_column + 1)}
        for col, width in widths.items():
            ws.column_dimensions[get_column_letter(col)].width = width
        for row, items in self.wrapped.items():
            lines = max(_lines(text, sum(widths[c] for c in range(first, last + 1)))
                        for first, last, text in items)
            if lines > 1:
                ws.row_dimensions[row].height = _LINE_HEIGHT * lines
        if freeze is not None:
            ws.freeze_panes = freeze
        if filter_ref is not None:
            ws.auto_filter.ref = filter_ref
        setup = ws.page_setup
        setup.paperSize = ws.PAPERSIZE_A4
        setup.orientation = ("landscape" if sum(widths.values()) > _LANDSCAPE_CHARS
                             else "portrait")
        setup.fitToWidth = 1
        setup.fitToHeight = 0
        ws.sheet_properties.pageSetUpPr.fitToPage = True
        if title_rows is not None:
            ws.print_title_rows = title_rows
        ws.oddHeader.left.text = _header_text(page.trial[:_HEADER_TEXT_CHARS])
        ws.oddHeader.right.text = _header_text(f"Analysed on {page.analysed_on}")
        ws.oddFooter.left.text = "&A"  # the sheet's name
        ws.oddFooter.center.text = "Page &P of &N"
        ws.oddFooter.right.text = _header_text(page.software)


def _lines(text: str, width: float) -> int:
    """Lines ``text`` wraps to in columns ``width`` characters wide in all (an estimate: a
    column width counts digits, and most letters are narrower)."""
    chars = max(1, int(width) - 1)
    return sum(max(1, math.ceil(len(part) / chars)) for part in text.split("\n"))


def _header_text(text: str) -> str:
    """Text for a page header or footer, where "&" starts a code and "&&" prints "&"."""
    return _ILLEGAL_CHARACTERS.sub("", text).replace("&", "&&")


def sheet_titles(traits: Sequence[str], fixed: Sequence[str] = FIXED_SHEETS) -> list[str]:
    """Excel-safe, unique sheet titles for the trait sheets.

    Excel's rules: at most 31 characters, none of ``[]:*?/\\``, no apostrophe at either end, and
    no two sheets whose names differ only in case. Titles also avoid the workbook's own sheets
    (``fixed``) and the name Excel reserves ("History").

    >>> sheet_titles(["yield [t/ha]", "Data", "yield (t/ha)"])
    ['yield _t_ha_', 'Data (2)', 'yield (t_ha)']
    """
    taken = {name.casefold() for name in (*fixed, *_EXCEL_RESERVED)}
    titles = []
    for trait in traits:
        base = _SHEET_FORBIDDEN.sub("_", _ILLEGAL_CHARACTERS.sub("", trait))
        base = base[:_SHEET_CHARS].strip("'") or "trait"
        title, n = base, 1
        while title.casefold() in taken:
            n += 1
            suffix = f" ({n})"
            title = base[:_SHEET_CHARS - len(suffix)].rstrip("'") + suffix
        taken.add(title.casefold())
        titles.append(title)
    return titles


def command_line(analysis: TrialAnalysis, book: FieldBook | None = None) -> str:
    """The ``trialdesk analyze`` command that repeats ``analysis``, quoted for a POSIX shell.

    With ``book`` the source is its full path, and for a field book the columns it was read from
    (and its worksheet) are named, so the command does not depend on finding them again.

    >>> from trialdesk.core.results import AnalysisSettings, TrialAnalysis
    >>> run = TrialAnalysis(settings=AnalysisSettings(checks=("CHK 1",)), source="t.csv",
    ...                     sha256="", software_version="", traits=(), warnings=())
    >>> command_line(run)
    "trialdesk analyze t.csv --design rcbd --method tukey --alpha 0.05 --check 'CHK 1' \
--check-direction both"
    """
    settings = analysis.settings
    source = analysis.source if book is None else os.path.abspath(book.source)
    args = ["trialdesk", "analyze", source]

    def option(flag: str, value: str) -> None:
        # "--check=-3", so that a value starting with "-" is not taken for an option.
        args.extend([f"{flag}={value}"] if value.startswith("-") else [flag, value])

    if book is not None and not source.lower().endswith(".trial"):
        if book.sheet is not None:
            option("--sheet", book.sheet)
        for role in ("entry", "block", "plot", "row", "column"):
            if book.roles.get(role):
                option(f"--{role}", book.roles[role])
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
    return shlex.join(args)


def _mark_font(higher_is_better: bool, mark: str) -> str | None:
    """The font of a mean: "better" or "worse" when the entry differs from the checks one way
    only, judged by the trait's direction (higher is better unless marked lower is better)."""
    above, below = ABOVE_MARK in mark, BELOW_MARK in mark
    if above == below:
        return None
    return "better" if above == higher_is_better else "worse"


def _critical_label(name: str) -> str:
    """The label of a critical difference: "Critical difference (HSD 0.05)", or the name alone
    when it says "difference" itself ("Dunnett difference 0.05")."""
    return name if "difference" in name else f"Critical difference ({name})"


def _letter(col: int) -> str:
    from openpyxl.utils import get_column_letter

    return get_column_letter(col)


def _summary(sheet: _Sheet, report: TrialReport, page: _Page) -> None:
    names = any(r.name for r in report.rows)
    first = 3 if names else 2  # the first trait's mean column
    last = first + 2 * len(report.columns) + 1  # the rank column
    sheet.heading(1, report.title, font="title")
    row = 3
    for label, value in report.header:
        sheet.put(row, 1, label, font="bold")
        sheet.note(row, value, 2, last)
        row += 1

    top = row + 1  # trait names over their two columns; the main trait over % of check and rank
    for col in range(1, first):
        sheet.put(top, col, None, fill="header", border=True)
    for j, column in enumerate(report.columns):
        sheet.note(top, column.title, first + 2 * j, first + 2 * j + 1, font="bold",
                   fill="header", border=True)
    sheet.note(top, report.main_trait, last - 1, last, font="bold", fill="header", border=True)
    headers = ["Entry", *(["Name"] if names else [])]
    for column in report.columns:
        headers += ["mean", "letters" if column.has_letters else "vs checks"]
    headers += ["% of check", "Rank"]
    body, fonts = [], {}
    for i, r in enumerate(report.rows):
        values: list[_Value] = [r.entry, *([r.name] if names else [])]
        for j, (column, mean, letters, mark) in enumerate(
                zip(report.columns, r.means, r.letters, r.marks, strict=True)):
            values += [_Num(mean, column.decimals), f"{letters} {mark}".strip()]
            if font := _mark_font(column.higher_is_better, mark):
                fonts[i, first - 1 + 2 * j] = font
        values += [_Num(r.percent_of_check, 1), _Num(r.rank, 0)]
        body.append(values)
    head = top + 1
    end = sheet.table(head, headers, body, checks=[r.is_check for r in report.rows],
                      banded=True, fonts=fonts)

    columns = report.columns
    bottom: list[tuple[str, list[_Num | None]]] = [
        ("Grand mean", [_Num(c.grand_mean, c.decimals) for c in columns]),
        ("CV%", [_Num(c.cv_percent, 1) for c in columns]),
        *((_critical_label(name), [_Num(c.critical_difference, c.decimals)
                                   if c.critical_name == name else None for c in columns])
          for name in dict.fromkeys(c.critical_name for c in columns)),
        ("Entry F-test p", [_p(c.entry_p) for c in columns]),
    ]
    for row, (label, cells) in enumerate(bottom, start=end):
        sheet.note(row, label, 1, first - 1, font="bold", border=True)  # wraps, never widens
        for j, cell in enumerate(cells):
            sheet.put(row, first + 2 * j, cell, border=True)
            sheet.put(row, first + 2 * j + 1, None, border=True)
        for col in (last - 1, last):
            sheet.put(row, col, None, border=True)

    row = end + len(bottom) + 1
    for text in report.footnotes:
        sheet.note(row, text, 1, last)
        row += 1
    if fonts:
        sheet.note(row, "Means in bold green are significantly better than the checks, in dark "
                   "red significantly worse (higher is better, except for traits marked lower "
                   "is better). Check entries are shaded.", 1, last)
        row += 1
    sheet.heading(row + 1, "Cautions")
    sheet.note(row + 2, report.cautions, 1, last)
    # The header block above the table is tall: frozen rows would leave little room to scroll,
    # so the entry columns are frozen instead, and the table's headings print on every page.
    sheet.finish(page, title_rows=f"{top}:{head}", freeze=f"{_letter(first)}1",
                 filter_ref=f"A{head}:{_letter(last)}{end - 1}")


def _trait_sheet(sheet: _Sheet, report: TrialReport, result: TraitResult, column: ReportColumn,
                 page: _Page) -> None:
    d = column.decimals
    sheet.heading(1, f"{column.title}: {METHOD_NAMES[result.method]}, alpha {result.alpha:g}",
                  font="title")

    sheet.heading(3, "Analysis of variance")
    anova = [[a.source, _Num(a.df, 0), _Num(a.ss, d + 1), _Num(a.ms, d + 1), _Num(a.f, 2),
              _p(a.p)] for a in result.anova]
    row = sheet.table(4, ["Source", "df", "SS", "MS", "F", "p"], anova) + 1

    family = result.family
    stats: list[tuple[str, _Num]] = [
        ("Grand mean", _Num(result.grand_mean, d)),
        ("CV%", _Num(result.cv_percent, 1)),
        ("Residual mean square", _Num(result.residual_ms, d + 1)),
        ("Residual df", _Num(result.residual_df, 0)),
        ("SE of a mean (SEm)", _Num(result.sem, d)),
        ("SE of a difference (SED)", _Num(result.sed, d)),
        (f"LSD {result.alpha:g} (unadjusted)", _Num(result.lsd, d)),
        (_critical_label(column.critical_name), _Num(column.critical_difference, d)),
        ("Plots", _Num(result.n_plots, 0)),
        ("Missing plots", _Num(result.n_missing, 0)),
        ("Comparisons made", _Num(family.m, 0)),
        ("Chance of a false difference if unadjusted", _Num(family.familywise_unadjusted, 4)),
        ("Per-comparison level, lowest", _Num(family.per_comparison_min,
                                              _small_decimals(family.per_comparison_min))),
        ("Per-comparison level, highest", _Num(family.per_comparison_max,
                                               _small_decimals(family.per_comparison_max))),
    ]
    sheet.heading(row, "Statistics")
    # Labels span three columns, so that they do not widen the columns of the tables below.
    sheet.note(row + 1, "Statistic", 1, 3, font="bold", fill="header", border=True)
    sheet.put(row + 1, 4, "Value", font="bold", fill="header", border=True)
    for i, (label, value) in enumerate(stats, start=row + 2):
        sheet.note(i, label, 1, 3, border=True)
        sheet.put(i, 4, value, border=True)
    row += len(stats) + 3

    names = {r.entry: r.name for r in report.rows}
    row = _entries_table(sheet, row, result.entries, d, column.higher_is_better,
                         names if any(names.values()) else None)
    head, end = _comparisons_table(sheet, row, result.comparisons, d,
                                   dunnett=result.method == "dunnett")
    # Several tables share the sheet, so a frozen table heading would mislabel the others: the
    # title row (the trait) stays in view instead. The filter is on the longest table.
    sheet.finish(page, title_rows="1:1", freeze="A2", filter_ref=f"A{head}:H{max(head, end - 1)}")


def _entries_table(sheet: _Sheet, row: int, entries: Sequence[EntryMean], d: int,
                   higher_is_better: bool, names: dict[str, str] | None = None) -> int:
    """The ranked entries under the heading at ``row`` (means, SEs and differences at ``d``
    decimals; ``names`` adds a column of entry names); the row after the table and a blank one
    is returned."""
    headers = ["Rank", "Entry", *(["Name"] if names else []), "Check", "Mean", "SE", "n",
               "Letters", "% of check", "Above checks", "Below checks"]
    mean_col = headers.index("Mean")
    rows, fonts = [], {}
    for i, e in enumerate(entries):
        rows.append([_Num(e.rank, 0), e.entry, *([names.get(e.entry, "")] if names else []),
                     "yes" if e.is_check else "no", _Num(e.mean, d), _Num(e.se, d),
                     _Num(e.n, 0), e.letters, _Num(e.percent_of_check, 1),
                     ", ".join(e.above_checks), ", ".join(e.below_checks)])
        mark = (ABOVE_MARK if e.above_checks else "") + (BELOW_MARK if e.below_checks else "")
        if font := _mark_font(higher_is_better, mark):
            fonts[i, mean_col] = font
    sheet.heading(row, "Entries, ranked")
    return sheet.table(row + 1, headers, rows, checks=[e.is_check for e in entries],
                       banded=True, fonts=fonts) + 1


def _comparisons_table(sheet: _Sheet, row: int, comparisons: Sequence[Comparison], d: int, *,
                       dunnett: bool) -> tuple[int, int]:
    """Every comparison of the method under the heading at ``row``; the table's heading row and
    the row after the table are returned."""
    sheet.heading(row, "Comparisons with the checks" if dunnett else "All pairwise comparisons")
    pairs = [[c.entry_a, c.entry_b, _Num(c.difference, d), _Num(c.se, d), _p(c.p_adjusted),
              _Num(c.lower, d), _Num(c.upper, d), "yes" if c.significant else "no"]
             for c in comparisons]
    head = row + 1
    end = sheet.table(head, ["Entry a", "Entry b", "Difference (a - b)", "SE", "Adjusted p",
                             "Lower limit", "Upper limit", "Significant"], pairs, banded=True)
    return head, end


def _diagnostics(sheet: _Sheet, report: TrialReport, page: _Page) -> None:
    sheet.heading(1, "Diagnostics: residual checks of each trait", font="title")
    row = 3
    for result, column in zip(report.analysis.traits, report.columns, strict=True):
        diagnostics = result.diagnostics
        sheet.heading(row, column.title, font="title")
        sheet.heading(row + 1, "Plots with a studentized residual beyond "
                      f"\u00b1{diagnostics.flag_limit:g} (re-check them in the field book)")
        row += 2
        if diagnostics.flagged:
            flagged = [[f.plot, _Num(f.source_row, 0), f.entry, f.block,
                        _Num(f.value, result.decimals), _Num(f.fitted, column.decimals),
                        _Num(f.residual, column.decimals), _Num(f.studentized_residual, 2)]
                       for f in diagnostics.flagged]
            row = sheet.table(row, ["Plot", "Field-book row", "Entry", "Block", "Value",
                                    "Fitted", "Residual", "Studentized residual"], flagged)
        else:
            sheet.put(row, 1, "None.", measure=False)
            row += 1
        sheet.heading(row + 1, "Assumption tests")
        tests = [[t.name, _Num(t.statistic, 4), t.df, _p(t.p), t.reading]
                 for t in diagnostics.tests]
        row = sheet.table(row + 2, ["Test", "Statistic", "df", "p", "Reading"], tests) + 2
    sheet.finish(page, title_rows="1:1", freeze="A2")


def _data(sheet: _Sheet, report: TrialReport, book: FieldBook | None, page: _Page) -> None:
    if book is None:
        sheet.put(1, 1, "The plot data were not supplied with this report.", measure=False)
        sheet.finish(page, title_rows=None, freeze=None)
        return
    import pandas as pd

    from trialdesk.core.decimals import recorded_decimals

    plots = book.plots

    def present(role: str) -> bool:
        return book.roles.get(role) is not None and bool(plots[role].notna().any())

    labels = [role for role in ("plot", "block", "entry") if role != "block" or present(role)]
    positions = [role for role in ("row", "column") if present(role)]
    plot_decimals = {c.trait: c.decimals - 1 for c in report.columns}
    decimals = [plot_decimals.get(t, recorded_decimals(book.values[t])) for t in book.traits]
    columns = [*([None if pd.isna(v) else str(v) for v in plots[role]] for role in labels),
               *([None if pd.isna(v) else _Num(int(v), 0) for v in plots[role]]
                 for role in positions),
               *([_Num(None if math.isnan(v) else float(v), d)
                  for v in book.values[t].to_numpy(dtype=float)]
                 for t, d in zip(book.traits, decimals, strict=True))]
    headers = [h.capitalize() for h in (*labels, *positions)] + list(book.traits)
    checks = set(report.analysis.settings.checks)
    end = sheet.table(1, headers, list(zip(*columns, strict=True)),
                      checks=[e in checks for e in plots["entry"]], banded=True)
    sheet.finish(page, title_rows="1:1", freeze=f"{_letter(len(labels) + 1)}2",
                 filter_ref=f"A1:{_letter(len(headers))}{max(1, end - 1)}")


def _settings(sheet: _Sheet, report: TrialReport, book: FieldBook | None, page: _Page) -> None:
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
    line("source file", Path(analysis.source).name)
    line("source path", "not supplied with the report" if book is None
         else os.path.abspath(book.source))
    if book is not None and book.sheet is not None:
        line("worksheet", book.sheet)
    line("source SHA-256", analysis.sha256)
    line("software version", analysis.software_version)
    line("analysed on", page.analysed_on)
    for note in analysis.notes:
        line("note", note)
    for warning in analysis.warnings:
        line("warning", warning)
    line("command line", command_line(analysis, book))
    sheet.finish(page, title_rows="1:1", freeze="A2")


def write_workbook(report: TrialReport, path: str | os.PathLike, *,
                   book: FieldBook | None = None) -> Path:
    """Write ``report`` as an Excel workbook.

    Parameters
    ----------
    report : TrialReport
        The report, from :func:`trialdesk.core.report.build_report`.
    path : str or path-like
        The .xlsx file to write. It is written beside its final place and moved there when
        complete, so a failed write leaves a workbook already there as it was.
    book : FieldBook, optional
        The field book that was analysed, for the Data sheet (plot data as analysed, derived
        traits included) and the source's full path; without it the Data sheet says so.

    Returns
    -------
    pathlib.Path
        The path written.

    Raises
    ------
    TrialInputError
        When the file cannot be written (a missing folder, no permission, a full disk), or when
        ``book`` is not the field book the report was made from (their checksums differ).
    """
    target = Path(path)
    analysis = report.analysis
    if book is not None and book.sha256 != analysis.sha256:
        raise TrialInputError("the field book given is not the one this report was made from "
                              "(their checksums differ)", file=str(book.source))
    from openpyxl import Workbook

    styles = _Styles()
    page = _Page(trial=report.title, analysed_on=dict(report.header).get("Analysed on", ""),
                 software=f"Trialdesk {analysis.software_version}")
    workbook = Workbook()
    summary = workbook.active
    summary.title = FIXED_SHEETS[0]
    _summary(_Sheet(summary, styles), report, page)
    titles = sheet_titles([c.trait for c in report.columns])
    for title, result, column in zip(titles, analysis.traits, report.columns, strict=True):
        _trait_sheet(_Sheet(workbook.create_sheet(title), styles), report, result, column, page)
    _diagnostics(_Sheet(workbook.create_sheet("Diagnostics"), styles), report, page)
    _data(_Sheet(workbook.create_sheet("Data"), styles), report, book, page)
    _settings(_Sheet(workbook.create_sheet("Settings"), styles), report, book, page)

    return _save(workbook, target)


def _save(workbook: Any, target: Path) -> Path:
    """Write ``workbook`` to ``target`` atomically; a failure is a message naming the file."""
    buffer = io.BytesIO()
    workbook.save(buffer)
    try:
        write_atomic(target, buffer.getvalue())
    except OSError as error:
        raise TrialInputError(f"cannot write the workbook: {error.strerror or error}",
                              file=str(target)) from None
    return target
