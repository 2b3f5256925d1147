"""The printed report of a trial series: one drawing routine for paper and PDF.

:func:`render_series_report` lays a :class:`~trialdesk.core.series_report.SeriesReport` out on
the pages of any paged device (a QPdfWriter, or the QPrinter of the print dialog) with QPainter;
:func:`write_series_pdf` makes a PDF file of it, with or without a display.

Top to bottom: the series' name and its facts in columns (as the trial report prints them); per
trait the series summary table (entries in rank order of the mean over environments; the mean in
each environment, then over environments the mean with its grouping letters and marks against
the checks, percent of the checks, the slope on the environment index, the ecovalence and its
share), with each environment's mean, CV% and LSD under it beside the grand mean, CV%, LSD, the
method's critical difference and the entry test's p; for the main trait a chart of each entry's
response to the environment index (its regression line; the checks in the check colour, the
other entries light, the checks and the best entries by mean named at the right) beside the
combined analysis of variance with both entry tests, Bartlett's test, the variance components
and the heritability line; for each further trait its analysis of variance and heritability; the
footnotes; the cautions in a box. A footer on every page names the series, the page, the
analysis date and the Trialdesk version.

The page turns landscape when the table is too wide for a portrait page, and the text size (8.5
down to 7 pt for the table) is the largest that keeps the report on one page. A longer report
flows on to further pages, the series' name and facts and the table's heading repeated. A table
too wide for a landscape page even in 7 pt is printed in sections of its environments, the
columns over environments in the last. Nothing is cut at the margin, and no text is smaller than
6.5 pt. The text is real text, so it can be searched and copied from the PDF.

The fonts, measures, page head and footer are those of the trial report
(:mod:`trialdesk.desktop.report_pdf`).
"""

from __future__ import annotations

import itertools
import math
import os
from bisect import bisect_right
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import accumulate
from pathlib import Path

from PySide6.QtCore import QMarginsF, QPointF, QRectF, Qt
from PySide6.QtGui import QPagedPaintDevice, QPageLayout, QPainter

from trialdesk.core.errors import TrialInputError
from trialdesk.core.series_report import (
    SLOPE_DECIMALS,
    SeriesReport,
    SeriesTraitReport,
    build_series_report,
    entry_test_text,
)
from trialdesk.core.series_results import EntryTest, SeriesAnalysis
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
from trialdesk.desktop.report_pdf import (
    BLACK,
    CENTRE_FLAGS,
    CHECK_KEY,
    FOOTER_MM,
    GAP_MM,
    MARGIN_MM,
    RIGHT_FLAGS,
    _faded,
    _fixed,
    _Footer,
    _Header,
    _p_text,
    _RunningHead,
    _Style,
    _ticks,
    cautions_height,
    draw_cautions,
    write_pages,
)

__all__ = ["render_series_report", "write_series_pdf"]

# The table's type, most open first: its text in points and the room between its rows in mm.
TABLE_TYPES = ((8.5, 0.6), (8.0, 0.6), (7.5, 0.6), (7.5, 0.3), (7.0, 0.6), (7.0, 0.3))
PORTRAIT_SIZE = 7.5  # a table that does not fit a portrait page at this size turns the page
HEADING_LINES = 3  # an environment's name is set on at most this many lines over its column
PANEL_MM = 95.0  # the least width of the analysis of variance beside the chart
CHART_MM = 100.0  # the least width of the chart beside the analysis of variance
SIDE_SHARE = 0.52  # of the page's width, the notes' beside the chart
SIDE_MM = 85.0  # the least width of the notes beside the chart
CHART_LOW_MM = 45.0  # the chart's least and preferred heights, its heading included
CHART_HIGH_MM = 88.0
CHART_ASPECT = 0.3  # the chart is at least this many times as tall as it is wide
CHART_TALLEST = 1.2  # and, beside the notes, at most this many times
NOTE_COLUMNS_MM = 200.0  # from this width of the page the notes are set in two columns
LABEL_MM = 22.0  # the longest entry code named on the chart
ORPHAN_ROWS = 3  # a table starts on a new page rather than with fewer rows than this
TEXT_MM = 170.0  # lines of text beside no chart wrap at this width, for reading

Draw = Callable[[QPainter], None]


def _p_is(p: float | None) -> str:
    """The p-value as "p = 0.0123", or "p < 0.0001" when it is that small."""
    shown = _p_text(p)
    return f"p < {shown[1:]}" if shown.startswith("<") else f"p = {shown}"


def _test_text(test: EntryTest) -> str:
    f = "" if test.f is None else f"F = {test.f:.2f} on {test.df1} and {test.df2} df, "
    return f"{entry_test_text(test)}: {f}{_p_is(test.p)}."


# --- the series summary table --------------------------------------------------------------------


@dataclass
class _Column:
    """One column of the table: its heading lines, a text per entry and per bottom row."""

    title: list[str]
    texts: list[str]
    bottom: list[str]
    right: bool = True
    group: str = ""  # "env" (a mean in one environment) or "over" (over environments)
    marks: list[str] | None = None  # marks against the checks, after the letters
    left: float = 0.0
    width: float = 0.0


class _Table:
    """A trait's series summary table, or one section of its environments: heading, entry rows
    and the rows of statistics under them.

    ``envs`` are the indices of the environments printed; ``over`` adds the columns over
    environments. ``label`` names the section in its heading ("environments 1-8 of 24").
    """

    def __init__(self, part: SeriesTraitReport, style: _Style, envs: Sequence[int], *,
                 over: bool, label: str = "") -> None:
        s = self.style = style
        self.part = part
        self.envs = list(envs)
        self.over = over
        self.label = label
        pad = self.pad = s.mm(0.8)
        d = part.decimals
        rows = part.rows
        alpha = f"{part.result.alpha:g}"
        n = len(part.environments)
        labels = ["Environment mean", "CV %", f"LSD {alpha}"]
        env_bottom = [[_fixed(m, d) for m in part.environment_means],
                      [_fixed(c, 1) for c in part.environment_cv],
                      [_fixed(v, d) for v in part.environment_lsd]]
        over_bottom = [_fixed(part.grand_mean, d), _fixed(part.cv_percent, 1),
                       _fixed(part.lsd, d)]
        if over and part.critical_name != f"LSD {alpha} (unadjusted)":
            labels.append(part.critical_name)
            env_bottom.append([""] * n)
            over_bottom.append(_fixed(part.critical_difference, d))
        if over:
            labels.append("Entry F-test p")
            env_bottom.append([""] * n)
            over_bottom.append(_p_text(part.entry_test.p))
        self.labels = labels
        blank = [""] * len(labels)
        self.columns = [_Column(["Rank"], [str(r.rank) for r in rows], blank),
                        _Column(["Entry"], [r.entry for r in rows], blank, right=False)]
        for j in self.envs:
            self.columns.append(_Column(
                self._wrapped(part.environments[j], [_fixed(r.cells[j], d) for r in rows]),
                [_fixed(r.cells[j], d) for r in rows], [b[j] for b in env_bottom], group="env"))
        if over:
            none = [""] * len(labels)
            self.columns += [
                _Column(["Mean"], [_fixed(r.mean, d) for r in rows], over_bottom, group="over"),
                _Column(["Letters"] if part.has_letters else ["vs", "checks"],
                        [r.letters for r in rows], none, right=False, group="over",
                        marks=[r.marks for r in rows])]
            if any(r.percent_of_check is not None for r in rows):
                self.columns.append(_Column(["% of", "checks"],
                                            [_fixed(r.percent_of_check, 1) for r in rows], none,
                                            group="over"))
            if part.has_stability:
                self.columns += [
                    _Column(["Slope"], [_fixed(r.slope, SLOPE_DECIMALS) for r in rows], none,
                            group="over"),
                    _Column(["Ecovalence"], [_fixed(r.ecovalence, d + 1) for r in rows], none,
                            group="over"),
                    _Column(["Share", "%"], [_fixed(None if r.ecovalence_share is None
                                                    else 100 * r.ecovalence_share, 1)
                                             for r in rows], none, group="over")]
        for column in self.columns:
            texts = column.texts
            if column.marks is not None:
                texts = [f"{t}{m}" for t, m in zip(texts, column.marks, strict=True)]
            column.width = max(s.widest(s.text, [*texts, *column.bottom]),
                               s.widest(s.bold, column.title)) + 2 * pad
        # The labels of the bottom rows stand under the ranks and the entries.
        rank, entry = self.columns[0], self.columns[1]
        entry.width += max(0.0, s.widest(s.text, labels) + 2 * pad - rank.width - entry.width)
        x = 0.0
        for column in self.columns:
            column.left = x
            x += column.width
        self.width = x
        self.row_h = s.line(s.text) + s.mm(s.lead)
        self.title_lines = max(len(c.title) for c in self.columns)
        # The trait's name over the ranks and the entries, level with the group headings, or
        # on a line of its own above the table when it is too long for them.
        self.caption = part.title + (f": {label}" if label else "")
        caption_w = max(s.width(s.note_bold, f"{self.caption}, continued"),
                        s.width(s.note_bold, self.caption))
        self.caption_inline = caption_w + 2 * pad <= self.columns[0].width + self.columns[1].width
        self.caption_h = 0.0 if self.caption_inline else s.line(s.note_bold) + s.mm(1.0)
        self.head_h = (self.caption_h + pad + s.line(s.small) + s.mm(0.7)
                       + self.title_lines * s.line(s.bold) + pad)
        self.has_checks = any(r.is_check for r in rows)
        self.bottom_h = (len(labels) * self.row_h + s.mm(0.6)
                         + (s.line(s.small) + s.mm(0.6) if self.has_checks else 0.0))
        self.tops = list(accumulate([self.row_h] * len(rows), initial=0.0))

    def _wrapped(self, name: str, numbers: list[str]) -> list[str]:
        """An environment's name on as few lines (at most ``HEADING_LINES``) as keep its column
        about as narrow as its numbers."""
        s = self.style
        width = max(s.widest(s.text, numbers), s.widest(s.bold, name.split()))
        lines = s.wrap(s.bold, name, width, anywhere=False)
        while len(lines) > HEADING_LINES:
            width *= 1.15
            lines = s.wrap(s.bold, name, width, anywhere=False)
        return lines

    def rows_fitting(self, start: int, room: float) -> int:
        """How many rows from row ``start`` (from 0) fit in ``room``."""
        return bisect_right(self.tops, self.tops[start] + room) - 1 - start

    def _span(self, group: str) -> tuple[float, float] | None:
        inside = [c for c in self.columns if c.group == group]
        if not inside:
            return None
        return inside[0].left, inside[-1].left + inside[-1].width

    def _separators(self, painter: QPainter, top: float, bottom: float) -> None:
        painter.setPen(self.style.pen(_faded(ACCENT, 70), 0.3))
        for group in ("env", "over"):
            span = self._span(group)
            if span is not None:
                painter.drawLine(QPointF(span[0], top), QPointF(span[0], bottom))

    def draw_head(self, painter: QPainter, y: float, *, continued: bool) -> None:
        s, pad = self.style, self.pad
        caption = self.caption + (", continued" if continued else "")
        small_h, bold_h = s.line(s.small), s.line(s.bold)
        if self.caption_inline:
            box = QRectF(pad, y + pad, self.width, small_h)
        else:
            box = QRectF(0, y, self.width, s.line(s.note_bold))
        s.draw_text(painter, s.note_bold, box, caption, color=ACCENT)
        y += self.caption_h
        s.rule(painter, 0, self.width, y, points=0.8)
        group_y = y + pad
        for group, text in (("env", "Mean in each environment"), ("over", "Over environments")):
            span = self._span(group)
            if span is None:
                continue
            box = QRectF(span[0], group_y, span[1] - span[0], small_h)
            s.draw_text(painter, s.small, box, s.elide(s.small, text, box.width()), CENTRE_FLAGS)
            s.rule(painter, span[0] + pad, span[1] - pad, group_y + small_h + s.mm(0.3),
                   points=0.35)
        below = group_y + small_h + s.mm(0.7) + self.title_lines * bold_h
        for column in self.columns:
            line_y = below - len(column.title) * bold_h
            for text in column.title:
                box = QRectF(column.left + pad, line_y, column.width - 2 * pad, bold_h)
                s.draw_text(painter, s.bold, box, text,
                            RIGHT_FLAGS if column.right else Qt.AlignmentFlag.AlignLeft
                            | Qt.AlignmentFlag.AlignVCenter)
                line_y += bold_h
        end = y + self.head_h - self.caption_h
        self._separators(painter, group_y, end)
        s.rule(painter, 0, self.width, end, points=0.5)

    def draw_rows(self, painter: QPainter, y: float, first: int, stop: int) -> None:
        """Draw rows ``first`` to ``stop`` (from 0, ``stop`` not included)."""
        s, pad, h = self.style, self.pad, self.row_h
        top = y
        for k in range(first, stop):
            if self.part.rows[k].is_check:
                painter.fillRect(QRectF(0, y, self.width, h), CHECK_BG)
            for column in self.columns:
                box = QRectF(column.left + pad, y, column.width - 2 * pad, h)
                text = column.texts[k]
                if column.right:
                    s.draw_text(painter, s.text, box, text, RIGHT_FLAGS)
                    continue
                s.draw_text(painter, s.text, box, text)
                x = box.left() + s.width(s.text, text)
                for mark in column.marks[k] if column.marks is not None else "":
                    color = ABOVE if mark == ABOVE_MARK else BELOW if mark == BELOW_MARK else BLACK
                    s.draw_text(painter, s.text, QRectF(x, y, box.right() - x, h), mark,
                                color=color)
                    x += s.width(s.text, mark)
            y += h
            if (k + 1) % 5 == 0 and k + 1 < stop:
                s.rule(painter, 0, self.width, y, _faded(ACCENT, 90), points=0.3)
        self._separators(painter, top, y)

    def draw_bottom(self, painter: QPainter, y: float) -> None:
        s, pad, h = self.style, self.pad, self.row_h
        s.rule(painter, 0, self.width, y, points=0.5)
        top = y
        label_w = self.columns[0].width + self.columns[1].width - 2 * pad
        for k, label in enumerate(self.labels):
            s.draw_text(painter, s.text, QRectF(pad, y, label_w, h), label)
            for column in self.columns[2:]:
                box = QRectF(column.left + pad, y, column.width - 2 * pad, h)
                s.draw_text(painter, s.text, box, column.bottom[k], RIGHT_FLAGS)
            y += h
        self._separators(painter, top, y)
        s.rule(painter, 0, self.width, y, points=0.8)
        if self.has_checks:
            small_h = s.line(s.small)
            key = QRectF(0, y + s.mm(0.6), self.width, small_h)
            painter.fillRect(QRectF(pad, key.top() + small_h * 0.2, small_h * 1.2, small_h * 0.6),
                             CHECK_BG)
            s.draw_text(painter, s.small, key.adjusted(pad + small_h * 1.6, 0, 0, 0), CHECK_KEY)


def _tables(part: SeriesTraitReport, style: _Style, room: float) -> list[_Table]:
    """The table of ``part``, whole when it fits ``room``, else in sections of its environments
    (as few as may be, filled in order), the columns over environments with the last section
    or, where they do not fit beside any environment, on their own."""
    n = len(part.environments)
    whole = _Table(part, style, range(n), over=True)
    if whole.width <= room:
        return [whole]
    fixed = whole.columns[0].width + whole.columns[1].width
    widths = [c.width for c in whole.columns if c.group == "env"]
    over = sum(c.width for c in whole.columns if c.group == "over")
    sections: list[list[int]] = [[]]
    used = fixed
    for j, width in enumerate(widths):
        if sections[-1] and used + width > room:
            sections.append([])
            used = fixed
        sections[-1].append(j)
        used += width
    if used + over > room:
        sections.append([])
    count = len(sections)

    def label(envs: list[int]) -> str:
        if not envs:
            return f"over environments (part {count} of {count})"
        which = (f"environment {envs[0] + 1}" if len(envs) == 1
                 else f"environments {envs[0] + 1}\u2013{envs[-1] + 1}")
        return f"{which} of {n}"

    return [_Table(part, style, envs, over=k == count - 1, label=label(envs))
            for k, envs in enumerate(sections)]


# --- the chart of responses ----------------------------------------------------------------------


class _Chart:
    """Each entry's regression line on the environment index, over the index's range: the
    checks in the check colour, the other entries light, the average response (slope 1)
    dashed; the checks and the best entries named at the lines' right ends."""

    def __init__(self, part: SeriesTraitReport, style: _Style) -> None:
        s = self.style = style
        self.part = part
        self.index = part.index
        self.low, self.high = min(part.index), max(part.index)
        ends = [line.mean + line.slope * x for line in part.lines for x in (self.low, self.high)]
        ends += [part.index_mean + x for x in (self.low, self.high)]
        self.ticks, self.tick_decimals = _ticks(min(ends), max(ends))
        self.tick_texts = [f"{t:.{self.tick_decimals}f}" for t in self.ticks]
        x_ticks, x_decimals = _ticks(self.low, self.high)
        span = self.high - self.low
        self.x_ticks = [(t, f"{t:+.{x_decimals}f}" if t else "0") for t in x_ticks
                        if self.low - 1e-9 * span <= t <= self.high + 1e-9 * span]
        named = [line.entry for line in part.lines if line.labelled]
        self.label_w = min(s.widest(s.small, named), s.mm(LABEL_MM)) if named else 0.0
        self.title = f"Response to the environment: {part.title}"
        names = part.environments
        order = sorted(range(len(names)), key=lambda j: part.index[j])
        self.caption = (
            "Each line: an entry's regression on the environment index, the environment's mean "
            f"less the grand mean ({_fixed(part.index_mean, part.decimals)}) of the entries grown "
            f"everywhere; marks on the axis: the environments, from {names[order[0]]} (poorest) "
            f"to {names[order[-1]]} (best). Named: the checks and the best entries by mean.")
        self.legend = [("solid", ENTRY_PEN, 0.5, "entry")]
        if any(line.is_check for line in part.lines):
            self.legend.insert(0, ("solid", CHECK_PEN, 1.2, "check"))
        self.legend.append(("dash", ACCENT, 0.8, "average response (slope 1)"))

    def _item_w(self, item: tuple) -> float:
        return self.style.mm(6) + self.style.width(self.style.small, item[3])

    def _legend(self, width: float) -> list[list[tuple[float, tuple]]]:
        """The legend's items flowed into lines ``width`` wide: (x, item) pairs."""
        lines: list[list[tuple[float, tuple]]] = [[]]
        x = 0.0
        for item in self.legend:
            if lines[-1] and x + self._item_w(item) > width:
                lines.append([])
                x = 0.0
            lines[-1].append((x, item))
            x += self._item_w(item) + self.style.mm(4)
        return lines

    def _head(self, width: float) -> tuple[list[str], list[list[tuple[float, tuple]]], list[str],
                                           float]:
        """The title's lines, the legend's lines, the caption's lines, and where the legend
        starts on the title's line (0 when it has lines of its own under the title)."""
        s = self.style
        title = s.wrap(s.note_bold, self.title, width)
        caption = s.wrap(s.small, self.caption, width)
        shift = s.width(s.note_bold, title[0]) + s.mm(6)
        one = self._legend(math.inf)
        x, item = one[0][-1]
        if len(title) == 1 and shift + x + self._item_w(item) <= width:
            return title, one, caption, shift
        return title, self._legend(width), caption, 0.0

    def heights(self, width: float) -> tuple[float, float]:
        """The least and the preferred height of the chart drawn ``width`` wide."""
        s = self.style
        title, legend, caption, shift = self._head(width)
        head = (len(title) * s.line(s.note_bold)
                + (len(caption) + (0 if shift else len(legend))) * s.line(s.small) + s.mm(1.5))
        low = max(s.mm(CHART_LOW_MM), head + s.mm(30), CHART_ASPECT * width)
        return low, max(s.mm(CHART_HIGH_MM), head + s.mm(50), low)

    def draw(self, painter: QPainter, rect: QRectF) -> None:
        s = self.style
        width = rect.width()
        title, legend, caption, shift = self._head(width)
        y = s.draw_lines(painter, s.note_bold, rect.left(), rect.top(), width, title)
        small = s.line(s.small)
        if shift:  # on the title's line, its text on the title's baseline
            line_y = rect.top() + s.metrics(s.note_bold).ascent() - s.metrics(s.small).ascent()
        else:
            line_y = y
            y += len(legend) * small
        for line in legend:
            for x, (kind, color, points, text) in line:
                x += rect.left() + shift
                painter.setPen(s.pen(color, points, Qt.PenStyle.DashLine if kind == "dash"
                                     else Qt.PenStyle.SolidLine))
                middle = line_y + small / 2
                painter.drawLine(QPointF(x, middle), QPointF(x + s.mm(5), middle))
                s.draw_text(painter, s.small, QRectF(x + s.mm(6), line_y,
                                                     s.width(s.small, text) + 1, small), text)
            line_y += small
        y = s.draw_lines(painter, s.small, rect.left(), y, width, caption) + s.mm(1.5)
        tick_w = s.widest(s.small, self.tick_texts)
        plot = QRectF(rect.left() + tick_w + s.mm(1.5), y + small / 2, 0, 0)
        plot.setRight(rect.right() - self.label_w - s.mm(2.0))
        plot.setBottom(rect.bottom() - 2 * small - s.mm(1.5))
        self._plot(painter, plot)

    def _plot(self, painter: QPainter, plot: QRectF) -> None:
        s, part = self.style, self.part
        small = s.line(s.small)
        t0, t1 = self.ticks[0], self.ticks[-1]

        def at(index: float, value: float) -> QPointF:
            share = (index - self.low) / (self.high - self.low)
            return QPointF(plot.left() + share * plot.width(),
                           plot.bottom() - (value - t0) / (t1 - t0) * plot.height())

        for tick, text in zip(self.ticks, self.tick_texts, strict=True):
            y = at(self.low, tick).y()
            painter.setPen(s.pen(_faded(ACCENT, 60), 0.3))
            painter.drawLine(QPointF(plot.left(), y), QPointF(plot.right(), y))
            box = QRectF(plot.left() - s.mm(21.5), y - small / 2, s.mm(20), small)
            s.draw_text(painter, s.small, box, text, RIGHT_FLAGS)
        for tick, text in self.x_ticks:
            x = at(tick, t0).x()
            painter.setPen(s.pen(BLACK, 0.5))
            painter.drawLine(QPointF(x, plot.bottom()), QPointF(x, plot.bottom() + s.mm(0.8)))
            box = QRectF(x - s.mm(10), plot.bottom() + s.mm(0.8), s.mm(20), small)
            s.draw_text(painter, s.small, box, text, CENTRE_FLAGS)
        box = QRectF(plot.left(), plot.bottom() + s.mm(0.8) + small, plot.width(), small)
        axis = "Environment index: the environment's mean less the grand mean"
        if s.width(s.small, axis) > plot.width():
            axis = "Environment index"
        s.draw_text(painter, s.small, box, s.elide(s.small, axis, plot.width()), CENTRE_FLAGS)
        painter.setPen(s.pen(ACCENT, 0.8))
        for index in self.index:  # the environments, marked on the axis
            x = at(index, t0).x()
            painter.drawLine(QPointF(x, plot.bottom()), QPointF(x, plot.bottom() - s.mm(1.5)))
        painter.setPen(s.pen(BLACK, 0.5))
        painter.drawLine(plot.bottomLeft(), plot.topLeft())
        painter.drawLine(plot.bottomLeft(), plot.bottomRight())
        painter.setPen(s.pen(ACCENT, 0.8, Qt.PenStyle.DashLine))
        painter.drawLine(at(self.low, part.index_mean + self.low),
                         at(self.high, part.index_mean + self.high))
        lines = sorted(part.lines, key=lambda line: (line.is_check, line.labelled))
        for line in lines:  # the light ones first, the named and the checks over them
            color = CHECK_PEN if line.is_check else (
                ENTRY_PEN if line.labelled else _faded(ENTRY_PEN, 90))
            points = 1.2 if line.is_check else 0.8 if line.labelled else 0.5
            painter.setPen(s.pen(color, points))
            painter.drawLine(at(self.low, line.mean + line.slope * self.low),
                             at(self.high, line.mean + line.slope * self.high))
        self._labels(painter, plot, at)

    def _labels(self, painter: QPainter, plot: QRectF,
                at: Callable[[float, float], QPointF]) -> None:
        """The named entries at the right ends of their lines, moved apart where they would
        overlap, within the plot's height."""
        s = self.style
        small = s.line(s.small)
        named = sorted(((at(self.high, line.mean + line.slope * self.high).y(), line)
                        for line in self.part.lines if line.labelled), key=lambda item: item[0])
        if not named:
            return
        gap = small * 0.95
        tops = [y - small / 2 for y, _ in named]
        for k in range(1, len(tops)):  # downwards, each at least a line below the one above
            tops[k] = max(tops[k], tops[k - 1] + gap)
        overflow = tops[-1] + small - (plot.bottom() + small / 2)
        if overflow > 0:
            tops[-1] -= overflow
            for k in range(len(tops) - 2, -1, -1):  # and back up from the bottom
                tops[k] = min(tops[k], tops[k + 1] - gap)
        for top, (_, line) in zip(tops, named, strict=True):
            color = CHECK_PEN if line.is_check else ENTRY_PEN
            box = QRectF(plot.right() + s.mm(1.0), top, self.label_w + s.mm(1.0), small)
            s.draw_text(painter, s.small, box, s.elide(s.small, line.entry, self.label_w),
                        color=color)


# --- the analysis of variance and the notes ------------------------------------------------------


class _Panel:
    """The combined analysis of variance of a trait, its entry tests, Bartlett's test, the
    variance components and the heritability line, ``width`` wide."""

    def __init__(self, part: SeriesTraitReport, style: _Style, width: float,
                 *, titled: bool) -> None:
        s = self.style = style
        self.pad = pad = s.mm(0.8)
        d = part.decimals + 1  # sums of squares and mean squares (as for a single trial)
        self.title = ("Combined analysis of variance" + (f": {part.title}" if titled else ""))
        self.headers = ("Source", "df", "SS", "MS", "F", "p")
        self.rows = [(a.source, str(a.df), _fixed(a.ss, d), _fixed(a.ms, d), _fixed(a.f, 2),
                      _p_text(a.p)) for a in part.anova]
        self.widths = [max(s.width(s.bold, head), s.widest(s.text, [r[k] for r in self.rows]))
                       + 2 * pad for k, head in enumerate(self.headers)]
        self.row_h = s.line(s.text) + s.mm(0.5)
        self.width = width
        texts = [_test_text(t) for t in part.entry_tests]
        b = part.bartlett
        if b is not None:
            texts.append(f"{b.name}: chi-square {b.statistic:.3f} on {b.df} df, {_p_is(b.p)}; "
                         f"{b.reading}.")
        if part.weighted:
            texts.append("The error variances differ markedly: the means over environments and "
                         "their comparisons come from the weighted analysis.")
        c = part.components
        if c is not None:
            parts = [f"entries {c.entry:.4g}"]
            if c.entry_by_environment is not None:
                parts += [f"entry x environment {c.entry_by_environment:.4g}",
                          f"error {c.error:.4g}"]
            else:
                parts.append(f"residual {c.error:.4g}")
            texts.append(f"Variance components ({c.method}): {', '.join(parts)}.")
        wrap = min(width, s.mm(TEXT_MM))
        self.lines = [(s.note, line) for text in texts for line in s.wrap(s.note, text, wrap)]
        # The value in bold ("Heritability of entry means: 0.871"), how it was had after it.
        value, _, how = part.heritability.partition(" (")
        self.lines += [(s.note_bold, line) for line in s.wrap(s.note_bold, value, wrap)]
        if how:
            self.lines += [(s.note, line) for line in s.wrap(s.note, f"({how}", wrap)]
        self.height = (s.line(s.note_bold) + s.mm(0.8) + (len(self.rows) + 1) * self.row_h
                       + s.mm(1.5) + sum(s.line(font) for font, _ in self.lines))

    def draw(self, painter: QPainter, rect: QRectF) -> None:
        s, pad, h = self.style, self.pad, self.row_h
        y = s.draw_lines(painter, s.note_bold, rect.left(), rect.top(), rect.width(),
                         s.wrap(s.note_bold, self.title, rect.width())[:1], color=ACCENT)
        y += s.mm(0.8)
        table_w = sum(self.widths)
        s.rule(painter, rect.left(), rect.left() + table_w, y, points=0.6)
        for k, row in enumerate([self.headers, *self.rows]):
            x = rect.left()
            font = s.bold if k == 0 else s.text
            for j, (text, width) in enumerate(zip(row, self.widths, strict=True)):
                box = QRectF(x + pad, y, width - 2 * pad, h)
                s.draw_text(painter, font, box, text, RIGHT_FLAGS if j else
                            Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter)
                x += width
            y += h
            if k == 0:
                s.rule(painter, rect.left(), rect.left() + table_w, y, points=0.4)
        s.rule(painter, rect.left(), rect.left() + table_w, y, points=0.6)
        y += s.mm(1.5)
        for font, text in self.lines:
            y = s.draw_lines(painter, font, rect.left(), y, rect.width(), [text])


class _Notes:
    """The footnotes (one paragraph each, "Notes" over the first) and the cautions box."""

    def __init__(self, report: SeriesReport, style: _Style) -> None:
        self.style = style
        self.footnotes = report.footnotes
        self.cautions = report.cautions
        self.pad = style.mm(2.0)

    def paragraph_height(self, index: int, width: float) -> float:
        s = self.style
        lines = s.wrap(s.note, self.footnotes[index], width)
        return len(lines) * s.line(s.note) + (s.line(s.note_bold) if index == 0 else 0.0)

    def draw_paragraph(self, painter: QPainter, index: int, rect: QRectF) -> None:
        s = self.style
        y = rect.top()
        if index == 0:
            y = s.draw_lines(painter, s.note_bold, rect.left(), y, rect.width(), ["Notes"])
        s.draw_lines(painter, s.note, rect.left(), y, rect.width(),
                     s.wrap(s.note, self.footnotes[index], rect.width()))

    def in_columns(self, width: float, limit: float) -> _Block | None:
        """The footnotes in two columns ``width`` wide in all, the first filled to about half
        of their height; None when they would be taller than ``limit`` even so (they then flow
        paragraph by paragraph) or ``width`` is too narrow for two columns."""
        s = self.style
        gap = s.mm(GAP_MM)
        if width < s.mm(NOTE_COLUMNS_MM):
            return None
        column_w = (width - gap) / 2
        space = s.mm(0.7)
        heights = [self.paragraph_height(i, column_w) + space for i in range(len(self.footnotes))]
        tops = list(accumulate(heights, initial=0.0))
        split = min(range(len(heights) + 1),
                    key=lambda k: max(tops[k], tops[-1] - tops[k]))
        height = max(tops[split], tops[-1] - tops[split]) - space
        if height > limit:
            return None

        def draw(painter: QPainter, rect: QRectF) -> None:
            for i in range(len(self.footnotes)):
                x = rect.left() + (0.0 if i < split else column_w + gap)
                y = rect.top() + tops[i] - (0.0 if i < split else tops[split])
                self.draw_paragraph(painter, i, QRectF(x, y, column_w, heights[i] - space))

        return _Block(height, draw, gap)

    def cautions_height(self, width: float) -> float:
        return cautions_height(self.style, self.cautions, self.pad, width)

    def draw_cautions(self, painter: QPainter, rect: QRectF) -> None:
        draw_cautions(painter, self.style, self.cautions, self.pad, rect)


# --- laying the pages out ------------------------------------------------------------------------


@dataclass
class _Block:
    """A block that is never split: its height at the page's width, and how it is drawn."""

    height: float
    draw: Callable[[QPainter, QRectF], None]
    space: float


class _Parts:
    """The blocks of the report measured for one type and page, in the order they print; the
    chart's height is free between its least and preferred ones (``chart_range``).

    With ``side`` (a report of one trait, on a page wide enough) the chart takes the left of the
    page under the table, and the analysis of variance, the notes and the cautions stand beside
    it; otherwise the analysis of variance stands beside the chart where the page is wide
    enough (else above it), and the notes and the cautions run the page's width after it.
    """

    def __init__(self, report: SeriesReport, style: _Style, width: float, height: float, *,
                 side: bool = False) -> None:
        s = self.style = style
        self.width = width
        self.height = height
        self.header = _Header(report, style, width)
        self.running = _RunningHead(report, style, width)
        self.footer = _Footer(report, style, width, height)
        gap = s.mm(GAP_MM)
        self.chart: _Chart | None = None
        self.chart_w = width
        self.chart_range = (0.0, 0.0)
        self.beside: list[_Block] = []  # right of the chart, one under another
        self.beside_w = 0.0
        self.sections = 0
        self.items: list[_Table | _Block | str] = []  # "chart" where the chart goes
        notes = _Notes(report, style)
        titled = len(report.traits) > 1
        self.side = False
        for k, part in enumerate(report.traits):
            tables = _tables(part, style, width)
            self.sections += len(tables)
            self.items += tables
            if k == 0 and part.has_stability:
                self.chart = _Chart(part, style)
                panel_w = max(s.mm(PANEL_MM), sum(_Panel(part, style, width,
                                                         titled=titled).widths))
                self.side = side and not titled and width * SIDE_SHARE - gap >= s.mm(SIDE_MM)
                if self.side:
                    self.beside_w = max(panel_w, width * SIDE_SHARE)
                elif width - panel_w - gap >= s.mm(CHART_MM):
                    self.beside_w = panel_w
                if self.beside_w:
                    self.chart_w = width - self.beside_w - gap
                    panel = _Panel(part, style, self.beside_w, titled=titled)
                    self.beside.append(_Block(panel.height, panel.draw, gap))
                    self.items.append("chart")
                    continue
                panel = _Panel(part, style, width, titled=titled)
                self.items += [_Block(panel.height, panel.draw, gap), "chart"]
                continue
            panel = _Panel(part, style, width, titled=titled)
            self.items.append(_Block(panel.height, panel.draw, gap))
        at = self.beside_w if self.side else width
        columns = None if self.side else notes.in_columns(width, (height - s.mm(FOOTER_MM)) / 2)
        after = [columns] if columns else [
            _Block(notes.paragraph_height(i, at), lambda p, r, i=i: notes.draw_paragraph(p, i, r),
                   s.mm(0.7)) for i in range(len(notes.footnotes))]
        after[-1].space = gap
        after.append(_Block(notes.cautions_height(at), notes.draw_cautions, 0.0))
        if self.side:
            self.beside += after
        else:
            self.items += after
        if self.chart is not None:
            low, high = self.chart.heights(self.chart_w)
            # Beside the notes, the chart grows to their height, up to a little taller than wide.
            grown = min(self.beside_height(), CHART_TALLEST * self.chart_w)
            self.chart_range = (max(low, grown), max(high, grown))

    def beside_height(self) -> float:
        """The height of what stands beside the chart, one block under another."""
        if not self.beside:
            return 0.0
        return sum(b.height + b.space for b in self.beside) - self.beside[-1].space

    def _chart_block(self, height: float) -> _Block:
        """The chart ``height`` tall, and what stands beside it."""
        chart, gap = self.chart, self.style.mm(GAP_MM)
        if not self.beside:
            return _Block(height, chart.draw, gap)
        column = self.beside_height()

        def draw(painter: QPainter, rect: QRectF) -> None:
            chart.draw(painter, QRectF(rect.left(), rect.top(), self.chart_w, height))
            y = rect.top()
            for block in self.beside:
                block.draw(painter, QRectF(rect.left() + self.chart_w + gap, y, self.beside_w,
                                           block.height))
                y += block.height + block.space

        return _Block(max(height, column), draw, gap)

    def pages(self) -> list[list[Draw]]:
        """What each page draws: on one page where that may be, the chart as tall as the room
        left allows (up to its preferred height); otherwise flowing on, the chart at its
        preferred height."""
        low, high = self.chart_range
        pages, end = self._paginate(low)
        if len(pages) == 1 and self.chart is not None:
            bottom = self.height - self.style.mm(FOOTER_MM)
            pages, _ = self._paginate(min(high, low + bottom - end))
        elif self.chart is not None:
            pages, _ = self._paginate(high)
        return pages

    def _paginate(self, chart_h: float) -> tuple[list[list[Draw]], float]:
        """The pages with the chart ``chart_h`` tall, and the height used on the last one."""
        s, width = self.style, self.width
        bottom = self.height - s.mm(FOOTER_MM)
        gap = s.mm(GAP_MM)
        pages: list[list[Draw]] = []

        def new_page() -> float:
            head = self.running if pages else self.header
            pages.append([head.draw])
            return head.height

        y = top = new_page()
        for item in self.items:
            if isinstance(item, _Table):
                start, n = 0, len(item.part.rows)
                while True:
                    room = bottom - y - item.head_h
                    last = item.tops[n] - item.tops[start] + item.bottom_h <= room
                    take = n - start if last else min(item.rows_fitting(start, room),
                                                      n - start - 1)
                    # A new page rather than a few rows at the foot of this one.
                    if take < min(ORPHAN_ROWS, n - start) and not last and y > top:
                        y = top = new_page()
                        continue
                    if take <= 0:  # not even one row fits a page: print them all anyway
                        take, last = n - start, True
                    stop = start + take
                    pages[-1].append(lambda p, y=y, t=item, c=start > 0: t.draw_head(p, y,
                                                                                     continued=c))
                    y += item.head_h
                    pages[-1].append(lambda p, y=y, t=item, a=start, b=stop: t.draw_rows(p, y,
                                                                                         a, b))
                    y += item.tops[stop] - item.tops[start]
                    start = stop
                    if last:
                        pages[-1].append(lambda p, y=y, t=item: t.draw_bottom(p, y))
                        y += item.bottom_h + gap
                        break
                    y = top = new_page()
                continue
            block = self._chart_block(chart_h) if item == "chart" else item
            if y + block.height > bottom and y > top:
                y = top = new_page()
            box = QRectF(0, y, width, block.height)
            pages[-1].append(lambda p, box=box, b=block: b.draw(p, box))
            y += block.height + block.space
        return pages, y


def _layouts(device: QPagedPaintDevice) -> list[QPageLayout]:
    """The device's paper, portrait and landscape, with the report's margins."""
    base = device.pageLayout()
    margins = QMarginsF(MARGIN_MM, MARGIN_MM, MARGIN_MM, MARGIN_MM)
    return [QPageLayout(base.pageSize(), orientation, margins, QPageLayout.Unit.Millimeter)
            for orientation in (QPageLayout.Orientation.Portrait,
                                QPageLayout.Orientation.Landscape)]


def _best(report: SeriesReport, device: QPagedPaintDevice, layouts: Sequence[QPageLayout]
          ) -> tuple[QPageLayout, _Parts, list[list[Draw]]]:
    """The layout with the fewest sections of the tables, then the fewest pages, portrait
    where its type is at least ``PORTRAIT_SIZE``, in the largest type and the most open rows,
    the notes under the chart rather than beside it."""
    dpi = device.logicalDpiY()
    plans = []
    for layout in layouts:
        rect = layout.paintRectPixels(dpi)
        portrait = layout.orientation() == QPageLayout.Orientation.Portrait
        for (size, lead), side in itertools.product(TABLE_TYPES, (False, True)):
            parts = _Parts(report, _Style(device, size, lead), rect.width(), rect.height(),
                           side=side)
            if side and (not parts.side or parts.beside_height() > rect.height()
                         - parts.style.mm(FOOTER_MM) - parts.running.height):
                continue  # the same as without, or notes too long to stand beside the chart
            pages = parts.pages()
            key = (parts.sections, len(pages), not (portrait and size >= PORTRAIT_SIZE), -size,
                   -lead, side)
            plans.append((key, layout, parts, pages))
    _, layout, parts, pages = min(plans, key=lambda plan: plan[0])
    return layout, parts, pages


# --- the public routines -------------------------------------------------------------------------


def render_series_report(report: SeriesReport, device: QPagedPaintDevice) -> int:
    """Paint ``report`` onto the pages of ``device``.

    The one drawing routine of the series report, for the PDF file and the printer alike. It
    chooses the page's orientation and sets 12 mm margins on the device; the paper size is the
    device's own. A Qt GUI application must exist.

    Parameters
    ----------
    report : SeriesReport
        The report to print (:func:`trialdesk.core.series_report.build_series_report`).
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
    layout, parts, pages = _best(report, device, _layouts(device))
    if not device.setPageLayout(layout):
        # A printer that refuses the margins: keep its own, turn the page, lay out again.
        device.setPageOrientation(layout.orientation())
        layout, parts, pages = _best(report, device, [device.pageLayout()])
    painter = QPainter()
    if not painter.begin(device):
        raise TrialInputError("the report could not be printed: the printer or file did not "
                              "open for drawing")
    try:
        painter.setRenderHint(QPainter.RenderHint.Antialiasing)
        painter.setRenderHint(QPainter.RenderHint.TextAntialiasing)
        for number, page in enumerate(pages, start=1):
            if number > 1:
                device.newPage()
            for draw in page:
                draw(painter)
            parts.footer.draw(painter, number, len(pages))
    finally:
        painter.end()
    return len(pages)


def write_series_pdf(report_or_analysis: SeriesReport | SeriesAnalysis,
                     path: str | os.PathLike[str], *, paper: str = "A4") -> Path:
    """Write the report of a series to a PDF file at ``path``.

    The file is written beside the target under a temporary name and moved into place when
    complete, so a crash never leaves half a PDF, nor spoils a good file already there. Works
    with no display (an offscreen Qt application is made when there is none).

    Parameters
    ----------
    report_or_analysis : SeriesReport or SeriesAnalysis
        The report (:func:`trialdesk.core.series_report.build_series_report`), or the analysis,
        whose report is made with today's date.
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
    report = (report_or_analysis if isinstance(report_or_analysis, SeriesReport)
              else build_series_report(report_or_analysis))
    return write_pages(path, paper=paper, title=report.title,
                       draw=lambda writer: render_series_report(report, writer))
