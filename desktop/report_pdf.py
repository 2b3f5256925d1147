"""The printed trial report: one drawing routine for paper and PDF.

:func:`render_report` lays a :class:`~trialdesk.core.report.TrialReport` out on the pages of any
paged device (a QPdfWriter, or the QPrinter of the print dialog) with QPainter, so that print and
PDF are one and the same; :func:`write_pdf` makes a PDF file of it, with or without a display.

Top to bottom: the trial's name and its facts in three or four columns; the all-traits table
(entries in rank order of the main trait; per trait the mean, grouping letters and marks against
the checks; percent of the checks), with the grand mean, CV%, critical difference and entry F-test
under it; a ranked-means chart of the main trait; the footnotes; the cautions in a box. The chart
runs the width of the page above the notes, or, where that would not leave the report on one
page, takes the left of the page with the notes and the cautions beside it. A footer on every page
names the trial, the page, the analysis date and the Trialdesk version.

The page turns landscape when the table is too wide for a portrait page, and the text size (8.5
down to 7 pt for the table, its rows closer at 7.5 and 7 pt) is the largest that keeps the report
on one page; a trial too long for one page is set in 8 pt and flows on to further pages, each
with the trial's name, its facts and the table's heading repeated. A table too wide for a
landscape page even in 7 pt is printed in sections of its traits, each as wide as the page
allows: the first section for every entry, page after page, then the next, each with the ranks
and the entries (the percent of the checks in the main trait's section), its own statistics
under it, and "Traits 1–4 of 8" in the head of its pages. Grouping letters too long for a page
even in a section of their own run on to further lines within their row. Nothing is cut at the
margin, and no text is smaller than 6.5 pt. What does not fit beside or below the table moves
to the last page. The text is real text, so it can be searched and copied from the PDF.
"""

from __future__ import annotations

import math
import os
import re
import sys
import tempfile
from bisect import bisect_right
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from itertools import accumulate
from pathlib import Path

from PySide6.QtCore import QMarginsF, QPointF, QRectF, Qt
from PySide6.QtGui import (
    QColor,
    QFont,
    QFontMetricsF,
    QGuiApplication,
    QPagedPaintDevice,
    QPageLayout,
    QPageSize,
    QPainter,
    QPdfWriter,
    QPen,
    QPolygonF,
    QTextLayout,
    QTextOption,
)

from trialdesk.core.errors import TrialInputError
from trialdesk.core.report import ReportColumn, TrialReport
from trialdesk.core.version import VERSION
from trialdesk.desktop.palette import (
    ABOVE,
    ABOVE_MARK,
    ACCENT,
    BELOW,
    BELOW_MARK,
    CHECK_BG,
    CHECK_PEN,
    ENTRY_PEN,
)

__all__ = ["PAPERS", "render_report", "write_pdf"]

PAPERS = {"A4": QPageSize.PageSizeId.A4, "Letter": QPageSize.PageSizeId.Letter}

MARGIN_MM = 12.0
# The table's type, most open first: its text in points and the room between its rows in mm.
TABLE_TYPES = ((8.5, 0.6), (8.0, 0.6), (7.5, 0.6), (7.5, 0.3), (7.0, 0.6), (7.0, 0.3))
PORTRAIT_SIZE = 7.5  # a table that does not fit a portrait page at this size turns the page
FLOW_SIZE = 8.0  # table text of a report that needs more than one page anyway
GAP_MM = 4.0  # between the blocks of a page
SIDE_MM = 70.0  # the narrowest room beside the table that takes the chart and the notes
WIDE_CHART_MM = 120.0  # from this width the chart runs the entries across, else down
CHART_MM = 45.0  # the least height of a chart that runs the entries across
CHART_SHARE = 0.6  # of the page's width, the chart's when the notes stand beside it
NAME_MM = 45.0  # the widest an entry's name is printed (longer names are cut short with "…")
LABEL_MM = 22.0  # the longest entry code printed on the chart
FOOTER_MM = 7.0

BLACK = QColor("black")
PAPER = QColor("white")
TEXT_FLAGS = Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter
RIGHT_FLAGS = Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter
CENTRE_FLAGS = Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignVCenter
BOTTOM_LABELS = ("Grand mean", "CV %", "Critical difference", "Entry F-test p")
CHECK_KEY = "Shaded rows are the checks."

_HEX_RUN = re.compile(r"\b([0-9a-fA-F]{12})[0-9a-fA-F]{20,}\b")
# One grouping letter: a Latin letter and its cycle number, if any (trialdesk.core.letters).
_LETTER = re.compile(r"[A-Za-z]\d*|.")

Draw = Callable[[QPainter], None]

_app: QGuiApplication | None = None  # the application write_pdf made, kept alive


# --- small helpers ------------------------------------------------------------------------------


def _finite(value: float | None) -> bool:
    return value is not None and math.isfinite(value)


def _fixed(value: float | None, decimals: int) -> str:
    """``value`` with ``decimals`` places, or an en dash when there is none."""
    return f"{value:.{decimals}f}" if _finite(value) else "\u2013"


def _p_text(p: float | None) -> str:
    """A p-value with four places, "<0.0001" below that."""
    if not _finite(p):
        return "\u2013"
    return "<0.0001" if p < 0.0001 else f"{p:.4f}"


def _short(value: str) -> str:
    """A long hexadecimal checksum cut to its first 12 digits (enough to tell files apart)."""
    return _HEX_RUN.sub(lambda match: f"{match.group(1)}\u2026", value)


def _faded(color: QColor, alpha: int) -> QColor:
    faded = QColor(color)
    faded.setAlpha(alpha)
    return faded


class _Style:
    """Fonts, their measures and lengths on one device, for one type of the table."""

    def __init__(self, device: QPagedPaintDevice, size: float, lead: float) -> None:
        self.device = device
        self.dpi = device.logicalDpiY()
        self.size = size
        self.lead = lead  # mm between the table's rows
        self.text = self.font(size)
        self.bold = self.font(size, bold=True)
        self.small = self.font(max(6.5, size - 1.0))
        self.note = self.font(max(6.5, size - 1.0))
        self.note_bold = self.font(max(6.5, size - 1.0), bold=True)
        self.title = self.font(14.0, bold=True)
        self.running = self.font(10.0, bold=True)
        self.footer = self.font(6.5)

    def font(self, points: float, *, bold: bool = False) -> QFont:
        """The application's sans-serif face at ``points``."""
        font = QFont(QGuiApplication.font())
        font.setStyleHint(QFont.StyleHint.SansSerif)
        font.setPointSizeF(points)
        font.setBold(bold)
        # No ligatures: "ff" and "fi" set as one glyph would not be found by a search of the PDF.
        for tag in ("liga", "clig"):
            font.setFeature(QFont.Tag.fromString(tag), 0)
        return font

    def mm(self, length: float) -> float:
        """``length`` millimetres in device pixels."""
        return length * self.dpi / 25.4

    def pt(self, length: float) -> float:
        """``length`` points in device pixels."""
        return length * self.dpi / 72.0

    def metrics(self, font: QFont) -> QFontMetricsF:
        return QFontMetricsF(font, self.device)

    def width(self, font: QFont, text: str) -> float:
        return self.metrics(font).horizontalAdvance(text)

    def widest(self, font: QFont, texts: Sequence[str]) -> float:
        """The widest of ``texts``, measured among the 16 longest distinct ones: a column of a
        300-entry trial holds hundreds of numbers, and each layout tried would measure them all
        (16 by length is ample, since the characters of a column differ little in width)."""
        metrics = self.metrics(font)
        longest = sorted(set(texts), key=len, reverse=True)[:16]
        return max((metrics.horizontalAdvance(t) for t in longest), default=0.0)

    def line(self, font: QFont) -> float:
        return self.metrics(font).lineSpacing()

    def elide(self, font: QFont, text: str, width: float) -> str:
        return self.metrics(font).elidedText(text, Qt.TextElideMode.ElideRight, width)

    def wrap(self, font: QFont, text: str, width: float, *, anywhere: bool = True) -> list[str]:
        """``text`` broken into lines no wider than ``width`` (at spaces; inside a word only when
        ``anywhere`` and the word is longer than a line)."""
        layout = QTextLayout(text, font, self.device)
        option = QTextOption()
        option.setWrapMode(QTextOption.WrapMode.WrapAtWordBoundaryOrAnywhere if anywhere
                           else QTextOption.WrapMode.WordWrap)
        layout.setTextOption(option)
        lines = []
        layout.beginLayout()
        while (line := layout.createLine()).isValid():
            line.setLineWidth(width)
            start = line.textStart()
            lines.append(text[start:start + line.textLength()].strip())
        layout.endLayout()
        return lines or [""]

    def wrap_letters(self, font: QFont, text: str, width: float) -> list[str]:
        """Grouping letters broken into lines no wider than ``width``, between letters (never
        between a letter and its cycle number: "a1" stays whole)."""
        metrics = self.metrics(font)
        if metrics.horizontalAdvance(text) <= width:
            return [text]
        letters = _LETTER.findall(text)
        advance = {letter: metrics.horizontalAdvance(letter) for letter in set(letters)}
        lines: list[list[str]] = [[]]
        used = 0.0
        for letter in letters:  # by the letters' own advances first ...
            if lines[-1] and used + advance[letter] > width:
                lines.append([])
                used = 0.0
            lines[-1].append(letter)
            used += advance[letter]
        k = 0
        while k < len(lines):  # ... then each line measured whole (kerning), the excess carried
            while len(lines[k]) > 1 and metrics.horizontalAdvance("".join(lines[k])) > width:
                if k + 1 == len(lines):
                    lines.append([])
                lines[k + 1].insert(0, lines[k].pop())
            k += 1
        return ["".join(line) for line in lines]

    def pen(self, color: QColor, points: float,
            style: Qt.PenStyle = Qt.PenStyle.SolidLine) -> QPen:
        pen = QPen(color)
        pen.setWidthF(self.pt(points))
        pen.setStyle(style)
        pen.setCapStyle(Qt.PenCapStyle.FlatCap)
        return pen

    def draw_text(self, painter: QPainter, font: QFont, rect: QRectF, text: str,
                  flags: Qt.AlignmentFlag = TEXT_FLAGS, color: QColor = BLACK) -> None:
        painter.setFont(font)
        painter.setPen(color)
        painter.drawText(rect, flags, text)

    def draw_lines(self, painter: QPainter, font: QFont, x: float, y: float, width: float,
                   lines: Sequence[str], color: QColor = BLACK) -> float:
        """Draw ``lines`` one under another from ``y``; return the y below the last."""
        step = self.line(font)
        for text in lines:
            self.draw_text(painter, font, QRectF(x, y, width, step), text, color=color)
            y += step
        return y

    def rule(self, painter: QPainter, x0: float, x1: float, y: float, color: QColor = ACCENT,
             points: float = 0.5) -> None:
        painter.setPen(self.pen(color, points))
        painter.drawLine(QPointF(x0, y), QPointF(x1, y))


# --- the blocks of a page ------------------------------------------------------------------------


class _Header:
    """The trial's name and its facts (label and value pairs, column by column)."""

    def __init__(self, report: TrialReport, style: _Style, width: float) -> None:
        s = self.style = style
        self.report = report
        self.width = width
        self.gap = s.mm(5)
        pairs = [(label, _short(value)) for label, value in report.header
                 if value != report.title]  # the name is the title already
        # As many columns as give the fewest lines (long values wrap within their column).
        grids = [self._grid(pairs, n) for n in (3, 4, 2) if n <= max(len(pairs), 1)]
        self.columns, self.row_heights = min(grids, key=lambda grid: sum(grid[1]))
        self.title_h = s.line(s.title)
        self.height = (self.title_h + s.mm(1.5) + sum(self.row_heights) + s.mm(2.0)
                       + s.mm(GAP_MM))

    def _grid(self, pairs: list[tuple[str, str]], n_columns: int) -> tuple[list, list[float]]:
        """The pairs set down ``n_columns`` columns: each column's (x, label width, value width,
        cells of (label, value lines)), and the height of each row."""
        s = self.style
        n_rows = max(1, math.ceil(len(pairs) / n_columns))
        columns = [pairs[k:k + n_rows] for k in range(0, len(pairs), n_rows)] or [[]]
        label_w = [s.widest(s.note_bold, [p[0] for p in c]) + s.mm(1.5) for c in columns]
        value_w = _share([s.widest(s.note, [p[1] for p in c]) for c in columns],
                         self.width - self.gap * (len(columns) - 1) - sum(label_w))
        grid = []
        x = 0.0
        for column, lw, vw in zip(columns, label_w, value_w, strict=True):
            grid.append((x, lw, vw, [(label, s.wrap(s.note, value, vw))
                                     for label, value in column]))
            x += lw + vw + self.gap
        step = s.line(s.note)
        heights = [max((len(c[3][r][1]) for c in grid if r < len(c[3])), default=0) * step
                   for r in range(n_rows)]
        return grid, heights

    def draw(self, painter: QPainter, label: str = "") -> None:
        """Draw the head, ``label`` (which traits of the table the page holds) right of the
        name."""
        s = self.style
        box = QRectF(0, 0, self.width, self.title_h)
        room = self.width - (s.width(s.running, label) + s.mm(6.0) if label else 0.0)
        s.draw_text(painter, s.title, box, s.elide(s.title, self.report.title, room))
        s.draw_text(painter, s.running, box, label, RIGHT_FLAGS, ACCENT)
        top = self.title_h + s.mm(1.5)
        for x, label_w, value_w, cells in self.columns:
            y = top
            for (label, lines), height in zip(cells, self.row_heights, strict=False):
                s.draw_text(painter, s.note_bold, QRectF(x, y, label_w, s.line(s.note)), label,
                            color=ACCENT)
                s.draw_lines(painter, s.note, x + label_w, y, value_w, lines)
                y += height
        s.rule(painter, 0, self.width, top + sum(self.row_heights) + s.mm(1.0), points=0.8)


class _RunningHead:
    """The head of every page after the first: the trial's name and its facts on one line."""

    def __init__(self, report: TrialReport, style: _Style, width: float) -> None:
        s = self.style = style
        self.width = width
        self.report = report
        facts = "  \u00b7  ".join(f"{label} {_short(value)}" for label, value in report.header
                                  if value != report.title)
        self.facts = s.elide(s.note, facts, width)
        self.height = s.line(s.running) + s.line(s.note) + s.mm(1.0) + s.mm(GAP_MM)

    def draw(self, painter: QPainter, label: str = "") -> None:
        """Draw the head, ``label`` (which traits of the table the page holds) right of the
        name."""
        s = self.style
        box = QRectF(0, 0, self.width, s.line(s.running))
        room = self.width - (s.width(s.running, label) + s.mm(6.0) if label else 0.0)
        s.draw_text(painter, s.running, box, s.elide(s.running, self.report.title, room))
        s.draw_text(painter, s.running, box, label, RIGHT_FLAGS, ACCENT)
        y = s.line(s.running)
        s.draw_text(painter, s.note, QRectF(0, y, self.width, s.line(s.note)), self.facts)
        s.rule(painter, 0, self.width, y + s.line(s.note) + s.mm(0.8), points=0.8)


class _Footer:
    """The line at the foot of every page: trial, page n of N, analysis date, software."""

    def __init__(self, report: TrialReport, style: _Style, width: float, height: float) -> None:
        self.style = style
        self.width = width
        self.top = height - style.mm(FOOTER_MM)
        self.title = style.elide(style.footer, report.title, width * 0.4)
        analysed = dict(report.header).get("Analysed on", "")
        self.right = "  \u00b7  ".join(
            ([f"Analysed on {analysed}"] if analysed else []) + [f"Trialdesk {VERSION}"])

    def draw(self, painter: QPainter, number: int, count: int) -> None:
        s = self.style
        y = self.top + s.mm(2.5)
        s.rule(painter, 0, self.width, y, points=0.4)
        box = QRectF(0, y + s.mm(0.8), self.width, s.line(s.footer))
        s.draw_text(painter, s.footer, box, self.title)
        s.draw_text(painter, s.footer, box, f"Page {number} of {count}", CENTRE_FLAGS)
        s.draw_text(painter, s.footer, box, self.right, RIGHT_FLAGS)


class _Texts:
    """The table's texts, the same in every type and on every page: made once for a report."""

    def __init__(self, report: TrialReport) -> None:
        rows, columns = report.rows, report.columns
        self.ranks = [str(r.rank) for r in rows]
        self.entries = [r.entry for r in rows]
        self.names = [r.name for r in rows]
        self.percents = [_fixed(r.percent_of_check, 1) for r in rows]
        self.means = [[_fixed(r.means[j], c.decimals) for r in rows]
                      for j, c in enumerate(columns)]
        self.letters = [[r.letters[j] for r in rows] for j in range(len(columns))]
        self.marks = [[r.marks[j] for r in rows] for j in range(len(columns))]
        self.bottom = [dict(zip(BOTTOM_LABELS, (
            _fixed(c.grand_mean, c.decimals), _fixed(c.cv_percent, 1),
            _fixed(c.critical_difference, c.decimals), _p_text(c.entry_p)), strict=True))
            for c in columns]
        self.main = next((j for j, c in enumerate(columns) if c.trait == report.main_trait), 0)


@dataclass
class _Group:
    """One trait's columns in the table: mean, grouping letters, marks against the checks."""

    column: ReportColumn
    index: int
    left: float
    mean_w: float
    letters_w: float
    mark_w: float
    width: float
    title: list[str]
    name_inline: bool  # the critical difference's name fits beside its number
    lines: list[list[str]] | None = None  # each row's letters line by line, where they wrap


class _Table:
    """The all-traits table, or one section of its traits: its heading, the entry rows and the
    statistics under them.

    ``traits`` are the indices of the report's columns printed (all of them when None), the
    percent of the checks after them when the main trait is among them. A trait too wide for
    ``room`` beside the ranks and the entries has its letters wrapped to fit, its rows growing.
    ``measures`` are every trait's widths (:meth:`_measure`) when another table in the same
    style has them already.
    """

    def __init__(self, report: TrialReport, style: _Style, texts: _Texts,
                 traits: Sequence[int] | None = None, *, room: float = math.inf,
                 measures: list[tuple[float, float, float, float]] | None = None) -> None:
        s = self.style = style
        self.report = report
        self.texts = texts
        pad = self.pad = s.mm(0.8)
        rows = report.rows
        self.row_h = s.line(s.text) + s.mm(s.lead)
        self.rank_w = max(s.width(s.bold, "Rank"), s.widest(s.text, texts.ranks)) + 2 * pad
        entry_w = max(s.width(s.bold, "Entry"), s.widest(s.text, texts.entries))
        self.entry_w = entry_w + 2 * pad
        self.has_names = any(texts.names)
        self.name_w = 0.0
        if self.has_names:
            names = max(s.width(s.bold, "Name"), s.widest(s.text, texts.names))
            self.name_w = min(names, s.mm(NAME_MM)) + 2 * pad
        # Every trait is measured, so that the sections of the traits decide alike where the
        # critical difference is named.
        self.measures = measures or [self._measure(index) for index in range(len(report.columns))]
        # One critical difference for every trait whose name is wider than a trait's numbers
        # (Dunnett's) is named once, under the row's label, rather than widen every trait.
        names = {column.critical_name for column in report.columns}
        self.shared_name = ""
        if len(report.columns) > 1 and len(names) == 1:
            name = names.pop()
            if any(s.width(s.small, name) + 2 * pad > measure[-1] for measure in self.measures):
                self.shared_name = name
        labels = max(s.widest(s.text, BOTTOM_LABELS), s.width(s.small, self.shared_name)) + 2 * pad
        self.entry_w += max(0.0, labels - (self.rank_w + self.entry_w + self.name_w))
        fixed = self.rank_w + self.entry_w + self.name_w
        self.traits = list(range(len(report.columns)) if traits is None else traits)
        self.has_percent = (texts.main in self.traits
                            and any(r.percent_of_check is not None for r in rows))
        self.percent_w = 0.0
        self.percent_title = ["% of checks"]
        if self.has_percent:
            numbers = s.widest(s.text, texts.percents)
            if s.width(s.bold, self.percent_title[0]) > numbers:
                self.percent_title = ["% of", "checks"]  # on two lines, as narrow as the numbers
            self.percent_w = max(numbers, s.widest(s.bold, self.percent_title)) + 2 * pad
        x = fixed
        self.groups = []
        for index in self.traits:
            limit = room - fixed - (self.percent_w if index == texts.main else 0.0)
            group = self._group(index, x, self.measures[index], limit)
            self.groups.append(group)
            x += group.width
        self.percent_left = x
        self.width = x + self.percent_w
        self.title_lines = max([len(g.title) for g in self.groups]
                               + [len(self.percent_title) - 1 if self.has_percent else 1, 1])
        self.head_h = (pad + self.title_lines * s.line(s.bold) + s.mm(0.7) + s.line(s.small)
                       + pad)
        self.has_checks = any(r.is_check for r in rows)
        # The critical differences' names beside the numbers when every one fits, else on a
        # line under them (or the one name under the row's label).
        self.name_below = bool(self.shared_name) or not all(g.name_inline for g in self.groups)
        self.bottom_h = (len(BOTTOM_LABELS) * self.row_h + s.mm(0.6)
                         + (s.line(s.small) if self.name_below else 0.0)
                         + (s.line(s.small) + s.mm(0.6) if self.has_checks else 0.0))
        self.heights = [self.row_h] * len(rows)  # each row's, taller where letters wrap
        for group in self.groups:
            for k, lines in enumerate(group.lines or ()):
                self.heights[k] = max(self.heights[k],
                                      self.row_h + (len(lines) - 1) * s.line(s.text))
        self.tops = list(accumulate(self.heights, initial=0.0))  # row k from tops[k]

    def _content(self, mean_w: float, letters_w: float, mark_w: float) -> float:
        """The width of a trait's numbers, letters and marks with the padding."""
        pad = self.pad
        return (2 * pad + mean_w + (0.8 * pad + letters_w if letters_w else 0.0)
                + (0.8 * pad + mark_w if mark_w else 0.0))

    def _measure(self, index: int) -> tuple[float, float, float, float]:
        """The widths a trait's numbers, letters and marks need, and their total with the
        padding: (mean, letters, marks, content)."""
        s, texts = self.style, self.texts
        numbers = [*texts.means[index], *texts.bottom[index].values()]
        mean_w = max(s.widest(s.text, numbers), s.width(s.small, "mean"))
        letters_w = 0.0
        if self.report.columns[index].has_letters:
            letters_w = max(s.widest(s.text, texts.letters[index]), s.width(s.small, "letters"))
        mark_w = s.widest(s.text, texts.marks[index])
        return mean_w, letters_w, mark_w, self._content(mean_w, letters_w, mark_w)

    def _group(self, index: int, left: float, measure: tuple[float, float, float, float],
               limit: float) -> _Group:
        """The trait's columns from ``left``, as wide as ``measure`` (:meth:`_measure`), its
        title and the name of its critical difference need; its letters wrapped where they
        would make it wider than ``limit``."""
        s, pad = self.style, self.pad
        column = self.report.columns[index]
        mean_w, letters_w, mark_w, content = measure
        lines = None
        if content > limit and letters_w:
            letters_w = max(letters_w - (content - limit), s.width(s.small, "letters"))
            content = self._content(mean_w, letters_w, mark_w)
            lines = [s.wrap_letters(s.text, text, letters_w) for text in self.texts.letters[index]]
        name_w = 0.0 if self.shared_name else s.width(s.small, column.critical_name)
        # The trait on the first line, its unit and direction under it when they do not fit.
        rest = column.title[len(column.trait):].strip()
        words = max(s.widest(s.bold, column.title.split()), s.widest(s.bold, [column.trait]))
        width = max(content, name_w + 2 * pad, words + 2 * pad)
        if s.width(s.bold, column.title) + 2 * pad <= width:
            title = [column.title]
        else:
            width = max(width, min(s.width(s.bold, rest), 1.5 * content) + 2 * pad)
            title = [column.trait, *s.wrap(s.bold, rest, width - 2 * pad, anywhere=False)]
        mean_w += width - content
        beside = width - 2.8 * pad - mean_w  # the room right of the numbers
        return _Group(column=column, index=index, left=left, mean_w=mean_w,
                      letters_w=letters_w, mark_w=mark_w, width=width, title=title,
                      name_inline=name_w <= beside, lines=lines)

    def label(self, *, continued: bool) -> str:
        """Which traits the table holds, "Traits 1–4 of 8" (", continued" on its later pages)."""
        first, last = self.traits[0] + 1, self.traits[-1] + 1
        which = f"Trait {first}" if first == last else f"Traits {first}\u2013{last}"
        return f"{which} of {len(self.report.columns)}" + (", continued" if continued else "")

    def rows_fitting(self, start: int, room: float) -> int:
        """How many rows from row ``start`` (from 0) fit in ``room``."""
        return bisect_right(self.tops, self.tops[start] + room) - 1 - start

    # Each part of the table is drawn with its top at ``y`` and its left edge at 0.

    def _separators(self, painter: QPainter, top: float, bottom: float) -> None:
        painter.setPen(self.style.pen(_faded(ACCENT, 70), 0.3))
        for x in [g.left for g in self.groups] + ([self.percent_left] if self.has_percent else []):
            painter.drawLine(QPointF(x, top), QPointF(x, bottom))

    def draw_head(self, painter: QPainter, y: float) -> None:
        s, pad = self.style, self.pad
        bold_h = s.line(s.bold)
        s.rule(painter, 0, self.width, y, points=0.8)
        below_titles = y + pad + self.title_lines * bold_h
        for group in self.groups:
            line_y = below_titles - len(group.title) * bold_h
            for text in group.title:
                s.draw_text(painter, s.bold, QRectF(group.left, line_y, group.width, bold_h),
                            text, CENTRE_FLAGS)
                line_y += bold_h
            s.rule(painter, group.left + pad, group.left + group.width - pad,
                   below_titles + s.mm(0.3), points=0.35)
            sub = QRectF(group.left + pad, below_titles + s.mm(0.7), group.mean_w,
                         s.line(s.small))
            s.draw_text(painter, s.small, sub, "mean", RIGHT_FLAGS)
            if group.letters_w:
                sub.moveLeft(group.left + pad + group.mean_w + 0.8 * pad)
                sub.setWidth(group.letters_w)
                s.draw_text(painter, s.small, sub, "letters")
        base = QRectF(0, y + self.head_h - pad - bold_h, 0, bold_h)
        plain = [(0.0, self.rank_w, "Rank", RIGHT_FLAGS),
                 (self.rank_w, self.entry_w, "Entry", TEXT_FLAGS)]
        if self.has_names:
            plain.append((self.rank_w + self.entry_w, self.name_w, "Name", TEXT_FLAGS))
        for left, width, text, flags in plain:
            s.draw_text(painter, s.bold, base.adjusted(left + pad, 0, left + width - pad, 0),
                        text, flags)
        if self.has_percent:  # its last line level with the other headings
            box = base.adjusted(self.percent_left + pad, 0, self.percent_left + self.percent_w
                                - pad, 0)
            box.translate(0, -(len(self.percent_title) - 1) * bold_h)
            for text in self.percent_title:
                s.draw_text(painter, s.bold, box, text, RIGHT_FLAGS)
                box.translate(0, bold_h)
        self._separators(painter, y + pad, y + self.head_h)
        s.rule(painter, 0, self.width, y + self.head_h, points=0.5)

    def draw_rows(self, painter: QPainter, y: float, first: int, stop: int) -> None:
        """Draw rows ``first`` to ``stop`` (from 0, ``stop`` not included)."""
        s, pad, h, texts = self.style, self.pad, self.row_h, self.texts
        top = y
        for k in range(first, stop):
            height = self.heights[k]
            if self.report.rows[k].is_check:
                painter.fillRect(QRectF(0, y, self.width, height), CHECK_BG)
            cell = QRectF(pad, y, self.rank_w - 2 * pad, h)
            s.draw_text(painter, s.text, cell, texts.ranks[k], RIGHT_FLAGS)
            cell = QRectF(self.rank_w + pad, y, self.entry_w - 2 * pad, h)
            s.draw_text(painter, s.text, cell, texts.entries[k])
            if self.has_names:
                cell = QRectF(self.rank_w + self.entry_w + pad, y, self.name_w - 2 * pad, h)
                s.draw_text(painter, s.text, cell, s.elide(s.text, texts.names[k], cell.width()))
            for group in self.groups:
                self._draw_trait(painter, group, k, y)
            if self.has_percent:
                cell = QRectF(self.percent_left + pad, y, self.percent_w - 2 * pad, h)
                s.draw_text(painter, s.text, cell, texts.percents[k], RIGHT_FLAGS)
            y += height
            if (k + 1) % 5 == 0 and k + 1 < stop:
                s.rule(painter, 0, self.width, y, _faded(ACCENT, 90), points=0.3)
        self._separators(painter, top, y)

    def _draw_trait(self, painter: QPainter, group: _Group, k: int, y: float) -> None:
        """Draw the trait's cells of row ``k``, the letters line under line where they wrap."""
        s, pad, h, texts = self.style, self.pad, self.row_h, self.texts
        j = group.index
        x = group.left + pad
        s.draw_text(painter, s.text, QRectF(x, y, group.mean_w, h), texts.means[j][k],
                    RIGHT_FLAGS)
        x += group.mean_w + 0.8 * pad
        if group.letters_w:
            lines = group.lines[k] if group.lines else [texts.letters[j][k]]
            for n, text in enumerate(lines):
                s.draw_text(painter, s.text,
                            QRectF(x, y + n * s.line(s.text), group.letters_w, h), text)
            x += group.letters_w + 0.8 * pad
        for mark in texts.marks[j][k]:
            color = ABOVE if mark == ABOVE_MARK else BELOW if mark == BELOW_MARK else BLACK
            s.draw_text(painter, s.text, QRectF(x, y, group.mark_w, h), mark, color=color)
            x += s.width(s.text, mark)

    def draw_bottom(self, painter: QPainter, y: float) -> None:
        s, pad, h = self.style, self.pad, self.row_h
        label_w = self.rank_w + self.entry_w + self.name_w - 2 * pad
        s.rule(painter, 0, self.width, y, points=0.5)
        top = y
        small_h = s.line(s.small)
        for label in BOTTOM_LABELS:
            s.draw_text(painter, s.text, QRectF(pad, y, label_w, h), label)
            for group in self.groups:
                column = group.column
                s.draw_text(painter, s.text, QRectF(group.left + pad, y, group.mean_w, h),
                            self.texts.bottom[group.index][label], RIGHT_FLAGS)
                if label == "Critical difference" and not self.name_below:
                    x = group.left + 1.8 * pad + group.mean_w
                    s.draw_text(painter, s.small, QRectF(x, y, group.left + group.width - x, h),
                                column.critical_name)
                elif label == "Critical difference" and not self.shared_name:
                    s.draw_text(painter, s.small, QRectF(group.left, y + h - s.mm(0.4),
                                                         group.width, small_h),
                                column.critical_name, CENTRE_FLAGS)
            if label == "Critical difference" and self.shared_name:
                s.draw_text(painter, s.small, QRectF(pad, y + h - s.mm(0.4), label_w, small_h),
                            self.shared_name)
            y += h + (small_h if label == "Critical difference" and self.name_below else 0.0)
        self._separators(painter, top, y)
        s.rule(painter, 0, self.width, y, points=0.8)
        if self.has_checks:
            key = QRectF(0, y + s.mm(0.6), self.width, small_h)
            painter.fillRect(QRectF(pad, key.top() + small_h * 0.2, small_h * 1.2, small_h * 0.6),
                             CHECK_BG)
            s.draw_text(painter, s.small, key.adjusted(pad + small_h * 1.6, 0, 0, 0), CHECK_KEY)


def _sections(table: _Table, room: float) -> list[_Table]:
    """The traits of ``table`` (all of them) in sections no wider than ``room``, in their
    order: as few sections as may be, and among those the split whose widest section is the
    narrowest, so that they come out about as wide. A trait too wide for a section of its own
    has its letters wrapped (:class:`_Table`)."""
    fixed = table.rank_w + table.entry_w + table.name_w
    main = table.texts.main
    widths = [min(g.width + (table.percent_w if g.index == main else 0.0), room - fixed)
              for g in table.groups]

    def split(limit: float) -> list[list[int]]:
        """The traits, section after section, each filled up to ``limit``."""
        sections: list[list[int]] = [[]]
        used = 0.0
        for index, width in enumerate(widths):
            if sections[-1] and used + width > limit:
                sections.append([])
                used = 0.0
            sections[-1].append(index)
            used += width
        return sections

    fewest = len(split(room - fixed))
    # The widest section of the best split is as wide as some run of traits side by side.
    runs = sorted({sum(widths[i:j]) for i in range(len(widths))
                   for j in range(i + 1, len(widths) + 1)})
    limit = next(run for run in runs if len(split(run)) == fewest)
    return [_Table(table.report, table.style, table.texts, traits, room=room,
                   measures=table.measures) for traits in split(limit)]


class _Chart:
    """The ranked-means chart of the main trait: one point per entry, best first, with a bar of
    half the critical difference either side and the grand mean across."""

    def __init__(self, report: TrialReport, style: _Style) -> None:
        s = self.style = style
        index = next((j for j, c in enumerate(report.columns) if c.trait == report.main_trait), 0)
        column = self.column = report.columns[index]
        d = column.decimals
        self.points = [(r.entry, r.is_check, r.means[index]) for r in report.rows
                       if _finite(r.means[index])]
        cd = column.critical_difference
        self.half = cd / 2 if _finite(cd) and cd > 0 else 0.0
        self.title = f"Ranked means of {column.title}"
        self.legend = [("dot", ENTRY_PEN, "entry")]
        if any(p[1] for p in self.points):
            self.legend.append(("diamond", CHECK_PEN, "check"))
        self.legend.append(("dash", ACCENT, f"grand mean {_fixed(column.grand_mean, d)}"))
        self.caption = "Entries in rank order, best first."
        if self.half:
            self.legend.append(("bar", ENTRY_PEN, f"mean \u00b1 half the {column.critical_name}"))
            # Dunnett's difference holds for comparisons with a check only.
            pair = ("an entry's bar does not overlap a check's, the two"
                    if report.analysis.settings.method == "dunnett"
                    else "two bars do not overlap, the means")
            self.caption += (f" Where {pair} differ by more than the {column.critical_name} "
                             f"({_fixed(cd, d)}).")
        values = [m + sign * self.half for _, _, m in self.points for sign in (-1, 1)]
        values += [column.grand_mean] if _finite(column.grand_mean) else []
        self.ticks, self.tick_decimals = _ticks(min(values, default=0.0),
                                                max(values, default=0.0))
        self.tick_texts = [f"{t:.{self.tick_decimals}f}" for t in self.ticks]
        self.label_w = min(s.widest(s.small, [p[0] for p in self.points]), s.mm(LABEL_MM))

    def _legend_lines(self, width: float) -> list[list[tuple[float, tuple]]]:
        """The legend's items flowed into lines: (x, item) pairs."""
        lines: list[list[tuple[float, tuple]]] = [[]]
        x = 0.0
        for item in self.legend:
            w = self._item_w(item)
            if lines[-1] and x + w > width:
                lines.append([])
                x = 0.0
            lines[-1].append((x, item))
            x += w + self.style.mm(4.0)
        return lines

    def _item_w(self, item: tuple) -> float:
        return self.style.mm(5.0) + self.style.width(self.style.small, item[2])

    def _head(self, width: float) -> tuple[list[str], list[list[tuple[float, tuple]]],
                                           list[str], bool]:
        """The title's lines, the legend's lines, the caption's lines, and whether the legend
        shares the title's line."""
        s = self.style
        title = s.wrap(s.note_bold, self.title, width)
        caption = s.wrap(s.small, self.caption, width)
        shift = s.width(s.note_bold, title[0]) + s.mm(6.0)
        legend = self._legend_lines(float("inf"))
        x, item = legend[0][-1]
        if len(title) == 1 and shift + x + self._item_w(item) <= width:
            return title, [[(x + shift, item) for x, item in legend[0]]], caption, True
        return title, self._legend_lines(width), caption, False

    def _head_h(self, width: float) -> float:
        s = self.style
        title, legend, caption, inline = self._head(width)
        lines = len(caption) + (0 if inline else len(legend))
        return len(title) * s.line(s.note_bold) + lines * s.line(s.small) + s.mm(1.5)

    def heights(self, width: float, *, across: bool, tall: bool = False
                ) -> tuple[float, float]:
        """The least and the preferred height of the chart drawn ``width`` wide, the entries
        ``across`` or down (``tall`` where there is room for it: on a page after the table's,
        or beside the notes)."""
        s = self.style
        head = self._head_h(width)
        small = s.line(s.small)
        if across:
            axis = small / 2 + self.label_w + s.mm(1.5)
            return (max(head + axis + s.mm(24), s.mm(CHART_MM)),
                    head + axis + s.mm(90 if tall else 42))
        axis = small + s.mm(1.5)
        n = max(len(self.points), 4)  # at least: every entry named
        return head + axis + n * small * 1.05, head + axis + n * small * 1.4

    def draw(self, painter: QPainter, rect: QRectF, *, across: bool) -> None:
        """Draw the chart in ``rect``, the entries ``across`` (labels turned up) or down."""
        s = self.style
        width = rect.width()
        title, legend, caption, inline = self._head(width)
        y = s.draw_lines(painter, s.note_bold, rect.left(), rect.top(), width, title)
        if inline:  # on the title's baseline
            y = rect.top() + s.metrics(s.note_bold).ascent() - s.metrics(s.small).ascent()
        for line in legend:
            for x, item in line:
                self._legend_item(painter, rect.left() + x, y, item)
            y += s.line(s.small)
        if inline:
            y = rect.top() + len(title) * s.line(s.note_bold)
        y = s.draw_lines(painter, s.small, rect.left(), y, width, caption) + s.mm(1.5)
        small = s.line(s.small)
        tick_w = s.widest(s.small, self.tick_texts)
        if across:
            plot = QRectF(rect.left() + tick_w + s.mm(1.5), y + small / 2,
                          width - tick_w - s.mm(2.5), 0)
            plot.setBottom(rect.bottom() - self.label_w - s.mm(1.5))
        else:
            left = rect.left() + self.label_w + s.mm(1.5)
            plot = QRectF(left, y, rect.right() - tick_w / 2 - left, 0)
            plot.setBottom(rect.bottom() - small - s.mm(1.0))
        self._plot(painter, plot, across)

    def _legend_item(self, painter: QPainter, x: float, y: float, item: tuple) -> None:
        s = self.style
        kind, color, text = item
        h = s.line(s.small)
        middle = QPointF(x + s.mm(2.0), y + h / 2)
        if kind == "dash":
            painter.setPen(s.pen(color, 0.8, Qt.PenStyle.DashLine))
            painter.drawLine(QPointF(x, middle.y()), QPointF(x + s.mm(4.0), middle.y()))
        elif kind == "bar":
            self._bar(painter, QPointF(x + s.mm(0.5), middle.y()),
                      QPointF(x + s.mm(3.5), middle.y()), s.mm(0.7), color)
            self._marker(painter, middle, "dot", color, s.mm(0.7))
        else:
            self._marker(painter, middle, kind, color, s.mm(0.9))
        s.draw_text(painter, s.small, QRectF(x + s.mm(5.0), y, s.width(s.small, text) + 1, h),
                    text)

    def _marker(self, painter: QPainter, centre: QPointF, kind: str, color: QColor,
                radius: float) -> None:
        painter.setPen(self.style.pen(PAPER, 0.3))
        painter.setBrush(color)
        if kind == "diamond":
            r = radius * 1.3
            painter.drawPolygon(QPolygonF([centre + QPointF(0, -r), centre + QPointF(r, 0),
                                           centre + QPointF(0, r), centre + QPointF(-r, 0)]))
        else:
            painter.drawEllipse(centre, radius, radius)
        painter.setBrush(Qt.BrushStyle.NoBrush)

    def _bar(self, painter: QPainter, start: QPointF, end: QPointF, cap: float,
             color: QColor) -> None:
        """A line from ``start`` to ``end`` with a cross-stroke ``cap`` long either side at each
        end."""
        painter.setPen(self.style.pen(color, 0.6))
        painter.drawLine(start, end)
        across = QPointF(0, cap) if start.y() == end.y() else QPointF(cap, 0)
        for point in (start, end):
            painter.drawLine(point - across, point + across)

    def _named(self, every: int, close: int) -> set[int]:
        """The entries named on the axis (by place, from 0): each check that is ``close``
        places or more from the check named before it, then every ``every``-th entry from the
        best where that leaves ``every`` places to the names either side."""
        named: list[int] = []
        for k in (k for k, point in enumerate(self.points) if point[1]):
            if not named or k - named[-1] >= close:
                named.append(k)
        for k in range(0, len(self.points), every):
            if all(abs(k - j) >= every for j in named):
                named.append(k)
        return set(named)

    def _plot(self, painter: QPainter, plot: QRectF, across: bool) -> None:
        """The points in ``plot``: entries along x when ``across``, else down y (best on top)."""
        s = self.style
        low, high = self.ticks[0], self.ticks[-1]
        extent = plot.width() if across else plot.height()
        step = extent / max(len(self.points), 1)
        start = plot.left() if across else plot.top()
        end = start + extent

        def at(place: float, value: float) -> QPointF:
            share = (value - low) / (high - low)
            if across:
                return QPointF(place, plot.bottom() - share * plot.height())
            return QPointF(plot.left() + share * plot.width(), place)

        small = s.line(s.small)
        for tick, text in zip(self.ticks, self.tick_texts, strict=True):
            painter.setPen(s.pen(_faded(ACCENT, 60), 0.3))
            painter.drawLine(at(start, tick), at(end, tick))
            point = at(start, tick)
            if across:
                box = QRectF(plot.left() - s.mm(21.5), point.y() - small / 2, s.mm(20), small)
                s.draw_text(painter, s.small, box, text, RIGHT_FLAGS)
            else:
                box = QRectF(point.x() - s.mm(10), plot.bottom() + s.mm(0.8), s.mm(20), small)
                s.draw_text(painter, s.small, box, text, CENTRE_FLAGS)
        painter.setPen(s.pen(BLACK, 0.5))
        painter.drawLine(plot.bottomLeft(), plot.topLeft())
        painter.drawLine(plot.bottomLeft(), plot.bottomRight())
        if _finite(self.column.grand_mean):
            painter.setPen(s.pen(ACCENT, 0.8, Qt.PenStyle.DashLine))
            painter.drawLine(at(start, self.column.grand_mean), at(end, self.column.grand_mean))
        radius = min(s.mm(0.9), step * 0.38)
        cap = min(s.mm(0.8), step * 0.3)
        # Names a line apart, but the checks' as close as their letters allow (0.8 of a line,
        # the height of the letters without the space between lines).
        named = self._named(max(1, math.ceil(small * 1.05 / step)),
                            max(1, math.ceil(small * 0.8 / step)))
        for k, (entry, is_check, mean) in enumerate(self.points):
            place = start + (k + 0.5) * step
            color = CHECK_PEN if is_check else ENTRY_PEN
            if self.half:
                self._bar(painter, at(place, mean - self.half), at(place, mean + self.half), cap,
                          color)
            self._marker(painter, at(place, mean), "diamond" if is_check else "dot", color,
                         radius)
            if k not in named:
                continue
            text = s.elide(s.small, entry, self.label_w)
            label_color = CHECK_PEN if is_check else BLACK
            if across:
                painter.save()
                painter.translate(place, plot.bottom() + s.mm(1.0))
                painter.rotate(-90)
                s.draw_text(painter, s.small, QRectF(-self.label_w, -small / 2, self.label_w,
                                                     small), text, RIGHT_FLAGS, label_color)
                painter.restore()
            else:
                box = QRectF(plot.left() - s.mm(1.5) - self.label_w, place - small / 2,
                             self.label_w, small)
                s.draw_text(painter, s.small, box, text, RIGHT_FLAGS, label_color)


def _share(widths: list[float], room: float) -> list[float]:
    """Widths that add up to ``room``: the spare room shared out evenly, or, when there is too
    little, the widest cut to one common width and the others left whole."""
    total = sum(widths)
    if total <= room or not widths:
        return [w + (room - total) / len(widths) for w in widths]
    left, cap = room, room / len(widths)
    for k, width in enumerate(sorted(widths)):
        cap = left / (len(widths) - k)
        if width > cap:
            break
        left -= width
    return [min(width, cap) for width in widths]


def _ticks(low: float, high: float, count: int = 5) -> tuple[list[float], int]:
    """About ``count`` round steps (1, 2 or 5 times a power of ten) spanning ``low`` to ``high``,
    and the decimals they need (common practice for chart axes)."""
    if not high > low:
        low, high = low - 1.0, high + 1.0
    raw = (high - low) / count
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw * (1 - 1e-9))
    first = math.floor(low / step + 1e-9) * step
    last = math.ceil(high / step - 1e-9) * step
    ticks = [first + k * step for k in range(round((last - first) / step) + 1)]
    return ticks, max(0, -math.floor(math.log10(step) + 1e-9))


def _footnotes(report: TrialReport) -> tuple[str, ...]:
    """The report's footnotes as printed: the critical differences said once ("HSD 0.05 for
    every trait") where every trait has the same one."""
    columns = report.columns
    names = {column.critical_name for column in columns}
    if len(columns) < 2 or len(names) > 1:
        return report.footnotes
    # The sentence as trialdesk.core.report words it; in any other wording it stays as it is.
    each = "; ".join(f"{column.critical_name} for {column.trait}" for column in columns)
    start = f"Critical differences: {each}"
    return tuple(note.replace(start, f"Critical differences: {names.pop()} for every trait", 1)
                 if note.startswith(start) else note for note in report.footnotes)


class _Notes:
    """The footnotes (one paragraph each, "Notes" over the first) and the cautions box."""

    def __init__(self, report: TrialReport, style: _Style) -> None:
        self.style = style
        self.footnotes = _footnotes(report)
        self.cautions = report.cautions
        self.pad = style.mm(2.0)
        self._heights: dict[tuple[int, float], float] = {}  # each layout tried asks again

    def paragraph_height(self, index: int, width: float) -> float:
        if (index, width) not in self._heights:
            s = self.style
            lines = s.wrap(s.note, self.footnotes[index], width)
            self._heights[index, width] = (len(lines) * s.line(s.note)
                                           + (s.line(s.note_bold) if index == 0 else 0.0))
        return self._heights[index, width]

    def draw_paragraph(self, painter: QPainter, index: int, rect: QRectF) -> None:
        s = self.style
        y = rect.top()
        if index == 0:
            y = s.draw_lines(painter, s.note_bold, rect.left(), y, rect.width(), ["Notes"])
        s.draw_lines(painter, s.note, rect.left(), y, rect.width(),
                     s.wrap(s.note, self.footnotes[index], rect.width()))

    def cautions_height(self, width: float) -> float:
        return cautions_height(self.style, self.cautions, self.pad, width)

    def draw_cautions(self, painter: QPainter, rect: QRectF) -> None:
        draw_cautions(painter, self.style, self.cautions, self.pad, rect)


def cautions_height(s: _Style, text: str, pad: float, width: float) -> float:
    """Height of the cautions box at ``width``: every printed report carries it."""
    lines = s.wrap(s.note, text, width - 2 * pad)
    return 2 * pad + s.line(s.note_bold) + len(lines) * s.line(s.note)


def draw_cautions(painter: QPainter, s: _Style, text: str, pad: float, rect: QRectF) -> None:
    """The cautions in a ruled box filling ``rect``."""
    painter.setPen(s.pen(ACCENT, 0.7))
    painter.setBrush(Qt.BrushStyle.NoBrush)
    painter.drawRect(rect)
    inner = rect.width() - 2 * pad
    y = s.draw_lines(painter, s.note_bold, rect.left() + pad, rect.top() + pad, inner,
                     ["Cautions"])
    s.draw_lines(painter, s.note, rect.left() + pad, y, inner, s.wrap(s.note, text, inner))


# --- laying the pages out ------------------------------------------------------------------------


@dataclass
class _Area:
    """Free room on a page for what follows the table, filled from the top."""

    page: int
    rect: QRectF
    cursor: float
    whole_page: bool = False
    after: _Area | None = None  # the room beside the table on the same page, used first


@dataclass
class _Item:
    """A block that follows the table: its height at a width, and how it is drawn."""

    height: Callable[[_Area], float]
    draw: Callable[[QPainter, QRectF], None]
    space: float


class _Parts:
    """The blocks of the report measured for one text size and page width."""

    def __init__(self, report: TrialReport, style: _Style, tables: list[_Table], width: float,
                 height: float) -> None:
        self.report = report
        self.style = style
        self.width = width
        self.height = height
        self.tables = tables  # the whole table, or its sections of traits one after another
        self.header = _Header(report, style, width)
        self.running = _RunningHead(report, style, width)
        self.chart = _Chart(report, style)
        self.notes = _Notes(report, style)


@dataclass
class _Plan:
    """One way of laying the report out: what each page draws."""

    layout: QPageLayout
    parts: _Parts
    chart_first: bool  # the chart before the notes (else after the cautions)
    chart_share: float  # 0 for the chart's least height, 1 for its preferred one
    side: bool = False  # the chart at the left under the table, the notes and cautions beside it
    pages: list[list[Draw]] = field(default_factory=list)
    table_pages: int = 0
    chart_page: int = 0
    notes_pages: set[int] = field(default_factory=set)  # pages of the notes and the cautions

    @property
    def size(self) -> float:
        return self.parts.style.size

    @property
    def lead(self) -> float:
        return self.parts.style.lead

    @property
    def chart_moved(self) -> bool:
        """Whether the chart was put first but still went past the table's last page."""
        return self.chart_first and self.chart_page > self.table_pages


def _lay_out(plan: _Plan) -> _Plan:
    """Fill ``plan.pages``: the table page by page (a table in sections section after section,
    each from a new page), then the chart, notes and cautions."""
    parts = plan.parts
    s, width, report = parts.style, parts.width, parts.report
    chart, notes = parts.chart, parts.notes
    pages = plan.pages
    bottom = parts.height - s.mm(FOOTER_MM)
    gap = s.mm(GAP_MM)

    def new_page(label: str = "") -> float:
        head = parts.running if pages else parts.header
        pages.append([lambda p, head=head: head.draw(p, label)])
        return head.height

    areas: list[_Area] = []
    sections = len(parts.tables) > 1  # each section of the traits from a page of its own
    n_rows = len(report.rows)
    for table in parts.tables:
        side = width - table.width - gap
        start = 0
        while True:
            y = new_page(table.label(continued=start > 0) if sections else "")
            page = len(pages) - 1
            room = bottom - y - table.head_h
            left = n_rows - start
            last = table.tops[-1] - table.tops[start] + table.bottom_h <= room
            take = left if last else min(table.rows_fitting(start, room), left - 1)
            if take <= 0:  # not even one row and the statistics fit a page: print them anyway
                take, last = left, True
            stop = start + take
            pages[page].append(lambda p, y=y, table=table: table.draw_head(p, y))
            pages[page].append(lambda p, y=y + table.head_h, table=table, first=start,
                               stop=stop: table.draw_rows(p, y, first, stop))
            end = y + table.head_h + table.tops[stop] - table.tops[start]
            start = stop
            beside = None
            # Beside the table (or its last section: the others would part the sections).
            if side >= s.mm(SIDE_MM) and not plan.side and table is parts.tables[-1]:
                beside = _Area(page, QRectF(table.width + gap, y, side, bottom - y), y)
                areas.append(beside)
            if last:
                pages[page].append(lambda p, y=end, table=table: table.draw_bottom(p, y))
                end += table.bottom_h + gap
                break
    plan.table_pages = len(pages)
    areas.append(_Area(len(pages) - 1, QRectF(0, end, width, bottom - end), end, after=beside))

    def across(width: float) -> bool:
        return width >= s.mm(WIDE_CHART_MM)

    def chart_height(area: _Area) -> float:
        low, high = chart.heights(area.rect.width(), across=across(area.rect.width()),
                                  tall=area.whole_page)
        wanted = low + plan.chart_share * (high - low)
        if area.whole_page:
            return min(wanted, area.rect.bottom() - area.cursor)
        return wanted

    paragraphs = [
        _Item(lambda a, i=i: notes.paragraph_height(i, a.rect.width()),
              lambda p, r, i=i: notes.draw_paragraph(p, i, r), s.mm(0.7))
        for i in range(len(notes.footnotes))]
    cautions = _Item(lambda a: notes.cautions_height(a.rect.width()), notes.draw_cautions, gap)
    picture = _Item(chart_height, lambda p, r: chart.draw(p, r, across=across(r.width())), gap)
    if plan.side:
        areas.append(_side_by_side(plan, areas.pop(), [*paragraphs, cautions], new_page))
        items = [*paragraphs, cautions]
    else:
        items = ([picture, *paragraphs, cautions] if plan.chart_first
                 else [*paragraphs, cautions, picture])
    current = 0
    for item in items:
        while True:
            if current == len(areas):
                y = new_page()
                areas.append(_Area(len(pages) - 1, QRectF(0, y, width, bottom - y), y,
                                   whole_page=True))
            area = areas[current]
            if area.after is not None and area.after.cursor > area.after.rect.top():
                area.cursor = max(area.cursor, area.after.cursor)
            need = item.height(area)
            empty = area.whole_page and area.cursor == area.rect.top()
            if area.cursor + need <= area.rect.bottom() or empty:
                box = QRectF(area.rect.left(), area.cursor, area.rect.width(), need)
                pages[area.page].append(lambda p, box=box, item=item: item.draw(p, box))
                area.cursor += need + item.space
                if item is picture:
                    plan.chart_page = area.page + 1
                else:
                    plan.notes_pages.add(area.page + 1)
                break
            current += 1
    return plan


def _side_by_side(plan: _Plan, below: _Area, notes: Sequence[_Item],
                  new_page: Callable[[], float]) -> _Area:
    """Draw the chart at the left of ``below`` (the room under the table), or at the top of a
    new page when even its least height does not fit there, as tall as ``notes`` beside it are
    (within its least and wanted heights); return the room right of it, where the notes go."""
    parts = plan.parts
    s, chart, width = parts.style, parts.chart, parts.width
    chart_w = width * CHART_SHARE
    low, high = chart.heights(chart_w, across=True, tall=True)
    if below.cursor + low > below.rect.bottom():
        y = new_page()
        below = _Area(len(plan.pages) - 1, QRectF(0, y, width, below.rect.bottom() - y), y,
                      whole_page=True)
    left = chart_w + s.mm(GAP_MM)
    column = _Area(below.page, QRectF(left, below.cursor, width - left,
                                      below.rect.bottom() - below.cursor), below.cursor,
                   whole_page=below.whole_page)
    filled = sum(item.height(column) + item.space for item in notes) - notes[-1].space
    height = min(max(filled, low), low + plan.chart_share * (high - low),
                 below.rect.bottom() - below.cursor)
    box = QRectF(0, below.cursor, chart_w, height)
    plan.pages[below.page].append(lambda p: chart.draw(p, box, across=True))
    plan.chart_page = below.page + 1
    return column


def _layouts(device: QPagedPaintDevice) -> list[QPageLayout]:
    """The device's paper, portrait and landscape, with the report's margins."""
    base = device.pageLayout()
    margins = QMarginsF(MARGIN_MM, MARGIN_MM, MARGIN_MM, MARGIN_MM)
    return [QPageLayout(base.pageSize(), orientation, margins, QPageLayout.Unit.Millimeter)
            for orientation in (QPageLayout.Orientation.Portrait,
                                QPageLayout.Orientation.Landscape)]


def _best_plan(report: TrialReport, device: QPagedPaintDevice,
               layouts: Sequence[QPageLayout]) -> _Plan:
    """The layout that prints the report on the fewest pages in the largest type.

    A report that fits one page gets the largest table text that does it, its rows as open as
    may be (portrait unless the table is too wide for it). A longer one keeps its table on as
    few pages as the types and orientations allow, then is set as near ``FLOW_SIZE`` as that
    permits, with the notes and the cautions together on as few pages as may be. With each, the
    chart comes straight after the table when it fits there (else after the cautions), as tall
    as the page allows; where only that keeps the report on one page, or on fewer pages, it
    stands at the left under the table with the notes and the cautions beside it. A table too
    wide for the widest page in every type is set in sections of its traits (:func:`_sections`),
    in each type, and the same rules choose among those.
    """
    dpi = device.logicalDpiY()
    texts = _Texts(report)
    fitting: list[tuple[QPageLayout, _Parts]] = []  # where the table fits across the page
    widest: list[_Table] = []  # the table in each type, on the widest page
    for layout in layouts:
        rect = layout.paintRectPixels(dpi)
        for size, lead in TABLE_TYPES:
            table = _Table(report, _Style(device, size, lead), texts)
            if table.width <= rect.width():
                fitting.append((layout, _Parts(report, table.style, [table], rect.width(),
                                               rect.height())))
            if layout is layouts[-1]:
                widest.append(table)
    if not fitting:  # too wide in any type: its traits in sections across the widest page
        rect = layouts[-1].paintRectPixels(dpi)
        fitting = [(layouts[-1], _Parts(report, table.style, _sections(table, rect.width()),
                                        rect.width(), rect.height())) for table in widest]
    upright = [parts.style.size for layout, parts in fitting
               if layout.orientation() == QPageLayout.Orientation.Portrait]
    portrait = bool(upright) and (max(upright) >= PORTRAIT_SIZE or len(upright) == len(fitting))
    plans = [_lay_out(_Plan(layout=layout, parts=parts, chart_first=chart_first,
                            chart_share=share, side=side))
             for layout, parts in fitting
             for chart_first, share, side in [
                 *((first, share, False) for first in (True, False)
                   for share in (1.0, 0.75, 0.5, 0.25, 0.0)),
                 (True, 1.0, True)]]

    def turned(plan: _Plan) -> bool:
        return (plan.layout.orientation() == QPageLayout.Orientation.Portrait) != portrait

    one_page = [plan for plan in plans if len(plan.pages) == 1]
    if one_page:
        return min(one_page, key=lambda p: (turned(p), -p.size, -p.lead, p.side,
                                            not p.chart_first, -p.chart_share))
    return min(plans, key=lambda p: (p.table_pages, turned(p), abs(p.size - FLOW_SIZE),
                                     -p.lead, len(p.pages), len(p.notes_pages), p.chart_moved,
                                     p.side, not p.chart_first, -p.chart_share))


# --- the public routines -------------------------------------------------------------------------


def render_report(report: TrialReport, device: QPagedPaintDevice) -> int:
    """Paint ``report`` onto the pages of ``device``.

    The one drawing routine of the report, for the PDF file and the printer alike. It chooses
    the page's orientation (landscape when the table is too wide for portrait) and sets 12 mm
    margins on the device; the paper size is the device's own. A Qt GUI application must exist.

    Parameters
    ----------
    report : TrialReport
        The report to print (:func:`trialdesk.core.report.build_report`).
    device : QPagedPaintDevice
        A QPdfWriter, or a QPrinter set up by the print dialog; nothing may be painting on it.

    Returns
    -------
    int
        The number of pages printed.

    Raises
    ------
    TrialInputError
        When the device cannot be painted on (for instance a file that cannot be opened).
    """
    plan = _best_plan(report, device, _layouts(device))
    if not device.setPageLayout(plan.layout):
        # A printer that refuses the margins: keep its own, turn the page, lay out again.
        device.setPageOrientation(plan.layout.orientation())
        plan = _best_plan(report, device, [device.pageLayout()])
    parts = plan.parts
    footer = _Footer(report, parts.style, parts.width, parts.height)
    painter = QPainter()
    if not painter.begin(device):
        raise TrialInputError("the report could not be printed: the printer or file did not "
                              "open for drawing")
    try:
        painter.setRenderHint(QPainter.RenderHint.Antialiasing)
        painter.setRenderHint(QPainter.RenderHint.TextAntialiasing)
        for number, page in enumerate(plan.pages, start=1):
            if number > 1:
                device.newPage()
            for draw in page:
                draw(painter)
            footer.draw(painter, number, len(plan.pages))
    finally:
        painter.end()
    return len(plan.pages)


def _application() -> None:
    """Make sure a Qt GUI application exists; without a display, an offscreen one."""
    global _app
    if QGuiApplication.instance() is not None:
        return
    no_display = not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
    # Windows and macOS always have their own window system; elsewhere no display means none.
    if (not os.environ.get("QT_QPA_PLATFORM") and no_display
            and sys.platform not in ("win32", "darwin")):
        os.environ["QT_QPA_PLATFORM"] = "offscreen"
    _app = QGuiApplication([sys.argv[0] if sys.argv and sys.argv[0] else "trialdesk"])


def write_pdf(report: TrialReport, path: str | os.PathLike[str], *, paper: str = "A4") -> Path:
    """Write ``report`` to a PDF file at ``path``.

    The file is written beside the target under a temporary name and moved into place when
    complete, so a crash never leaves half a PDF, nor spoils a good file already there. Works
    with no display (an offscreen Qt application is made when there is none).

    Parameters
    ----------
    report : TrialReport
        The report to print (:func:`trialdesk.core.report.build_report`).
    path : str or path-like
        The PDF file to write; an existing file is replaced.
    paper : {"A4", "Letter"}
        The paper size.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    TrialInputError
        For an unknown paper size, or a path that cannot be written (no such folder, no
        permission, a folder of that name, a full disk); the message names the file.
    """
    return write_pages(path, paper=paper, title=report.title,
                       draw=lambda writer: render_report(report, writer))


def write_pages(path: str | os.PathLike[str], *, paper: str, title: str,
                draw: Callable[[QPdfWriter], object], what: str = "report") -> Path:
    """Draw pages into a PDF file at ``path``, atomically: the one way Trialdesk writes a PDF.

    ``draw(writer)`` paints on a QPdfWriter of the ``paper`` size ("A4" or "Letter") whose file
    is a temporary one beside ``path``; it is moved into place only when complete, so a crash
    never leaves half a PDF nor spoils a good file already there. ``what`` names the document
    in messages ("report", "field book"). Works with no display.

    Raises
    ------
    TrialInputError
        For an unknown paper size, or a path that cannot be written; the message names the file.
    """
    target = Path(path)
    if paper not in PAPERS:
        raise TrialInputError(f"the paper size must be {' or '.join(PAPERS)}, not '{paper}'",
                              file=str(target))
    if target.is_dir():
        raise TrialInputError("this is a folder: give the name of the PDF file to write",
                              file=str(target))
    _application()
    try:
        handle, temp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part",
                                        dir=target.parent)
    except OSError as error:
        raise TrialInputError(f"the {what} cannot be written here ({error.strerror or error})",
                              file=str(target)) from None
    os.close(handle)
    try:
        writer = QPdfWriter(temp)
        try:
            writer.setPageSize(QPageSize(PAPERS[paper]))
            writer.setTitle(title)
            writer.setCreator(f"Trialdesk {VERSION}")
            draw(writer)
        except TrialInputError as error:
            raise TrialInputError(error.message, file=str(target)) from None
        finally:
            del writer  # closes the file, also when drawing failed
        with open(temp, "rb") as done:
            os.fsync(done.fileno())
        os.replace(temp, target)
    except OSError as error:
        raise TrialInputError(f"the {what} could not be written ({error.strerror or error})",
                              file=str(target)) from None
    finally:
        Path(temp).unlink(missing_ok=True)
    return target
