"""The printed field book of a trial layout: one drawing routine for paper and PDF.

:func:`render_layout` lays a :class:`~trialdesk.core.layouts.Layout` out on the pages of any paged
device (a QPdfWriter, or the QPrinter of the print dialog) with QPainter; :func:`write_layout_pdf`
makes a PDF file of it, with or without a display.

Top to bottom: the trial's name and facts, the design, replicates, block size, field, the seed
("Same seed, same layout") and, for an alpha design, the efficiency factor beside its upper
bound; then the field map, a grid of the field's rows and columns with each plot's number and
entry code, the replicates outlined with thick lines and the incomplete blocks with thin ones,
the checks shaded, and an arrow beside each row showing which way its plot numbers run; then
the plot list (plot, replicate, block, row, column, entry) with empty ruled columns for the
traits to record and for notes, flowing over as many pages as it needs with its heading
repeated. A footer on every page names the trial and gives the page as "Page n of N".

The map is set in the largest type (10 down to 6.5 pt) that puts it on one page under the
header, on a portrait page unless a landscape one gives it a larger type where the portrait type
would be under 8 pt. A field too large for one page even in 6.5 pt is printed in as few parts of
its rows and columns as may be, page after page, each part labelled with the rows and columns it
holds. The plot list follows on portrait pages (a printer keeps the map's orientation). A layout
without field positions has no map, and says so. The text is real text, so it can be searched
and copied from the PDF.

The fonts, measures, page head and footer are those of the trial report
(:mod:`trialdesk.desktop.report_pdf`).
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import (
    QPagedPaintDevice,
    QPageLayout,
    QPainter,
    QPdfWriter,
    QPolygonF,
)

from trialdesk.core.errors import TrialInputError
from trialdesk.core.layouts import Layout, LayoutPlot
from trialdesk.desktop.palette import ACCENT, CHECK_BG
from trialdesk.desktop.report_pdf import (
    BLACK,
    CENTRE_FLAGS,
    FOOTER_MM,
    RIGHT_FLAGS,
    TEXT_FLAGS,
    _faded,
    _Footer,
    _Header,
    _layouts,
    _RunningHead,
    _Style,
    write_pages,
)

__all__ = ["render_layout", "write_layout_pdf"]

PAGE_SIZE = 9.0  # the type of the header and the plot list, in points
MAP_SIZES = (10.0, 9.5, 9.0, 8.5, 8.0, 7.5, 7.0, 6.5)  # the map's type, largest first
READABLE_SIZE = 8.0  # a map set at least this large stays on a portrait page
CELL_PAD_MM = 1.2  # room around the text of a map cell
CELL_WIDEST_MM = 28.0  # the widest and tallest a map cell is drawn
CELL_TALLEST_MM = 18.0
ENTRY_MM = 24.0  # the longest entry code printed whole in a map cell
ARROW_MM = 5.0  # the length of a row's arrow
BLOCK_LABEL_PT = 6.5  # the type of an incomplete block's name in the map
LIST_ROW_MM = 7.0  # a row of the plot list: room to write a value by hand (common practice)
LIST_ENTRY_MM = 45.0  # the longest entry code printed whole in the plot list
TRAIT_MM = 16.0  # the narrowest ruled column of a trait
TRAIT_WIDEST_MM = 30.0
NOTES_MM = 30.0  # the narrowest notes column

DESIGN_WORDS = {"rcbd": "Randomized complete blocks", "crd": "Completely randomized",
                "alpha": "Alpha design (resolvable incomplete blocks)"}
FACT_LABELS = (("station", "Station"), ("season", "Season"), ("crop", "Crop"),
               ("sowing_date", "Sowing date"), ("harvest_date", "Harvest date"))
NO_POSITIONS = ("Field positions not given, so there is no field map: the plots are listed in "
                "the order of their numbers.")
SEED_SENTENCE = "Same seed, same layout (with the same entries and settings)."

# Line weights of the map, in points: the replicates, the incomplete blocks, the cells.
REP_PT, BLOCK_PT, CELL_PT = 2.2, 1.1, 0.3

Draw = Callable[[QPainter], None]


@dataclass(frozen=True, slots=True)
class _Heading:
    """What the page heads and the footer print: the title and the (label, value) pairs."""

    title: str
    header: tuple[tuple[str, str], ...]


def _text(value: object) -> str:
    return "" if value is None else str(value).strip()


def _plot_ranges(plots: Sequence[LayoutPlot]) -> str:
    """The plot numbers of each replicate as ranges: "101–125, 201–225"."""
    groups: dict[int | None, list[int]] = {}
    for plot in plots:
        groups.setdefault(plot.rep, []).append(int(plot.plot))
    return ", ".join(f"{min(numbers)}\u2013{max(numbers)}" for numbers in groups.values())


def _heading(layout: Layout, facts: Mapping[str, object]) -> _Heading:
    """The trial's facts and the layout's settings, as the first page's header prints them."""
    pairs = [(label, _text(facts.get(key))) for key, label in FACT_LABELS
             if _text(facts.get(key))]
    length, width = facts.get("plot_length_m"), facts.get("plot_width_m")
    if length and width:
        pairs.append(("Plot size", f"{float(length):g} m x {float(width):g} m"))
    n_checks = len(layout.checks)
    checks = (f"{n_checks} check{'s' if n_checks != 1 else ''}: {', '.join(layout.checks)}"
              if n_checks else "no checks")
    pairs += [("Design", DESIGN_WORDS.get(layout.design, layout.design)),
              ("Entries", f"{len(layout.entries)} ({checks})")]
    if layout.design == "crd":
        pairs.append(("Plots per entry", str(layout.reps)))
    else:
        pairs.append(("Replicates", str(layout.reps)))
    if layout.block_size is not None:
        pairs.append(("Incomplete blocks", f"{layout.block_size} plots each, "
                                           f"{len(layout.entries) // layout.block_size} in "
                                           "each replicate"))
    pairs.append(("Plots", f"{len(layout.plots)}, numbered {_plot_ranges(layout.plots)}"))
    if layout.rows is not None:
        order = ("serpentine (every other row runs back)" if layout.serpentine
                 else "each row left to right")
        pairs.append(("Field", f"{layout.rows} rows x {layout.columns} columns, filled "
                               f"replicate by replicate along the rows, {order}"))
    else:
        pairs.append(("Field", "positions not given"))
    if layout.efficiency is not None:
        factor, bound = layout.efficiency.factor, layout.efficiency.upper_bound
        pairs.append(("Efficiency factor", f"{factor:.4f}; the upper bound for this size is "
                                           f"{bound:.4f} ({100 * factor / bound:.1f}% of it)"))
    pairs.append(("Seed", f"{layout.seed}. {SEED_SENTENCE}"))
    title = _text(facts.get("name")) or "Trial layout"
    return _Heading(title=title, header=tuple(pairs))


def _running_heading(layout: Layout, facts: Mapping[str, object]) -> _Heading:
    """What the head of every page after the first repeats: station, season, design, seed."""
    pairs = [(label, _text(facts.get(key))) for key, label in FACT_LABELS[:2]
             if _text(facts.get(key))]
    design = DESIGN_WORDS.get(layout.design, layout.design).split(" (")[0]
    pairs += [("Design", design), ("Seed", str(layout.seed))]
    return _Heading(title=_heading(layout, facts).title, header=tuple(pairs))


# --- the field map -------------------------------------------------------------------------------


class _Field:
    """The plots by field position, and which way the plot numbers run along each row."""

    def __init__(self, layout: Layout) -> None:
        self.rows, self.columns = layout.rows or 0, layout.columns or 0
        self.cells: dict[tuple[int, int], LayoutPlot] = {
            (p.row, p.column): p for p in layout.plots if p.row is not None}
        along: dict[int, list[int]] = {}
        for plot in layout.plots:  # in field order
            if plot.row is not None:
                along.setdefault(plot.row, []).append(plot.column)
        self.direction: dict[int, int] = {}  # +1 left to right, -1 right to left
        for row, columns in along.items():
            steps = {(b > a) - (b < a) for a, b in zip(columns, columns[1:], strict=False)}
            if len(steps) == 1 and 0 not in steps:
                self.direction[row] = steps.pop()
        self.blocks = layout.design == "alpha"

    def rep(self, row: int, column: int) -> tuple[bool, int | None]:
        """Whether the place holds a plot, and its replicate."""
        plot = self.cells.get((row, column))
        return (False, None) if plot is None else (True, plot.rep)

    def block(self, row: int, column: int) -> tuple[int | None, int | None] | None:
        plot = self.cells.get((row, column))
        return None if plot is None else (plot.rep, plot.incomplete_block)

    def block_starts(self, row: int, column: int) -> bool:
        """Whether a piece of an incomplete block starts here: the plot left of it and the one
        above it are in other blocks (a block running on to the next row starts a new piece)."""
        here = self.block(row, column)
        return here != self.block(row, column - 1) and here != self.block(row - 1, column)


class _MapType:
    """The measures of the field map in one type, on one device."""

    def __init__(self, device: QPagedPaintDevice, size: float, field: _Field,
                 page: _Style) -> None:
        s = self.style = _Style(device, size, 0.0)
        self.plot_font = s.font(size, bold=True)
        self.entry_font = s.font(size)
        self.label_font = page.note
        self.title_font = page.bold
        pad = s.mm(CELL_PAD_MM)
        plots = [p.plot for p in field.cells.values()]
        entries = [p.entry for p in field.cells.values()]
        widest = max(s.widest(self.plot_font, plots),
                     min(s.widest(self.plot_font, entries), s.mm(ENTRY_MM)))
        self.cell_w = widest + 2 * pad
        # An alpha design's cells keep a line for the block's name ("B3") over the plot number.
        self.block_font = page.font(BLOCK_LABEL_PT)
        self.block_h = page.line(self.block_font) if field.blocks else 0.0
        self.cell_h = (self.block_h + s.line(self.plot_font) + s.line(self.entry_font)
                       + 2 * pad)
        self.number_w = page.width(self.label_font, str(max(field.rows, 1))) + s.mm(1.5)
        self.gutter = self.number_w + s.mm(ARROW_MM) + s.mm(2.5)
        self.numbers_h = page.line(self.label_font) + s.mm(0.8)
        self.title_h = page.line(self.title_font) + s.mm(1.0)


class _MapPart:
    """One part of the field map (rows ``rows``, columns ``columns``) as drawn on a page."""

    def __init__(self, field: _Field, kind: _MapType, rows: range, columns: range,
                 width: float, height: float, title: str) -> None:
        self.field, self.kind, self.rows, self.columns = field, kind, rows, columns
        s = kind.style
        self.cell_w = min((width - kind.gutter) / len(columns), s.mm(CELL_WIDEST_MM))
        self.cell_h = min((height - kind.title_h - kind.numbers_h) / len(rows),
                          s.mm(CELL_TALLEST_MM))
        self.title = title
        self.width = width
        self.height = kind.title_h + kind.numbers_h + self.cell_h * len(rows)

    def _x(self, column: int) -> float:
        return self.kind.gutter + (column - self.columns.start) * self.cell_w

    def _y(self, row: int) -> float:
        return self.kind.title_h + self.kind.numbers_h + (row - self.rows.start) * self.cell_h

    def draw(self, painter: QPainter, top: float) -> None:
        kind, field = self.kind, self.field
        s = kind.style
        painter.save()
        painter.translate(0, top)
        s.draw_text(painter, kind.title_font, QRectF(0, 0, self.width, kind.title_h),
                    self.title, TEXT_FLAGS, ACCENT)
        for column in self.columns:
            box = QRectF(self._x(column), kind.title_h, self.cell_w, kind.numbers_h)
            s.draw_text(painter, kind.label_font, box, str(column), CENTRE_FLAGS, ACCENT)
        pad = s.mm(CELL_PAD_MM)
        plot_h, entry_h = s.line(kind.plot_font), s.line(kind.entry_font)
        for row in self.rows:
            y = self._y(row)
            box = QRectF(0, y, kind.number_w, self.cell_h)
            s.draw_text(painter, kind.label_font, box, str(row), RIGHT_FLAGS, ACCENT)
            if row in field.direction:
                self._arrow(painter, y + self.cell_h / 2, field.direction[row])
            for column in self.columns:
                plot = field.cells.get((row, column))
                if plot is None:
                    continue
                cell = QRectF(self._x(column), y, self.cell_w, self.cell_h)
                if plot.is_check:
                    painter.fillRect(cell, CHECK_BG)
                inner = self.cell_w - 2 * pad
                label_top = y + (self.cell_h - kind.block_h - plot_h - entry_h) / 2
                text_top = label_top + kind.block_h
                if field.blocks and field.block_starts(row, column):
                    s.draw_text(painter, kind.block_font, QRectF(
                        cell.left() + pad / 2, label_top, inner, kind.block_h),
                        f"B{plot.incomplete_block}", TEXT_FLAGS, ACCENT)
                s.draw_text(painter, kind.plot_font, QRectF(cell.left() + pad, text_top, inner,
                                                            plot_h), plot.plot, CENTRE_FLAGS)
                font = kind.plot_font if plot.is_check else kind.entry_font
                s.draw_text(painter, font, QRectF(cell.left() + pad, text_top + plot_h, inner,
                                                  entry_h),
                            s.elide(font, plot.entry, inner), CENTRE_FLAGS)
        self._lines(painter)
        painter.restore()

    def _arrow(self, painter: QPainter, y: float, direction: int) -> None:
        """An arrow in the gutter beside a row, pointing the way its plot numbers run."""
        s = self.kind.style
        left = self.kind.number_w + s.mm(1.0)
        right = left + s.mm(ARROW_MM)
        tail, tip = (left, right) if direction > 0 else (right, left)
        _draw_arrow(painter, s, tail, tip, y)

    def _lines(self, painter: QPainter) -> None:
        """The cells' edges: hairlines, thin where incomplete blocks meet, thick round each
        replicate (a part's cut edges drawn as the plots beyond them require)."""
        field, s = self.field, self.kind.style
        edges: dict[float, list[tuple[QPointF, QPointF]]] = {REP_PT: [], BLOCK_PT: [],
                                                             CELL_PT: []}

        def weight(a: tuple[int, int], b: tuple[int, int]) -> float | None:
            inside = [1 <= r <= field.rows and 1 <= c <= field.columns for r, c in (a, b)]
            (held_a, rep_a), (held_b, rep_b) = field.rep(*a), field.rep(*b)
            if held_a != held_b or (held_a and rep_a != rep_b):
                return REP_PT
            if held_a and field.blocks and field.block(*a) != field.block(*b):
                return BLOCK_PT
            return CELL_PT if any(inside) else None

        for row in self.rows:
            y0, y1 = self._y(row), self._y(row) + self.cell_h
            for column in range(self.columns.start, self.columns.stop + 1):
                found = weight((row, column - 1), (row, column))
                if found is not None:
                    x = self._x(column)
                    edges[found].append((QPointF(x, y0), QPointF(x, y1)))
        for column in self.columns:
            x0, x1 = self._x(column), self._x(column) + self.cell_w
            for row in range(self.rows.start, self.rows.stop + 1):
                found = weight((row - 1, column), (row, column))
                if found is not None:
                    y = self._y(row)
                    edges[found].append((QPointF(x0, y), QPointF(x1, y)))
        for points, color in ((CELL_PT, _faded(BLACK, 90)), (BLOCK_PT, BLACK), (REP_PT, BLACK)):
            pen = s.pen(color, points)
            if points == REP_PT:
                pen.setCapStyle(Qt.PenCapStyle.SquareCap)  # corners of the outline meet
            painter.setPen(pen)
            for start, end in edges[points]:
                painter.drawLine(start, end)


class _Legend:
    """What the map's lines, shading and arrows mean, under each part of the map: the keys set
    along lines as wide as the page, then a sentence on how to read the map."""

    def __init__(self, layout: Layout, style: _Style, width: float) -> None:
        s = self.style = style
        self.width = width
        firsts: dict[int, str] = {}
        for plot in layout.plots:
            if plot.rep is not None:
                firsts.setdefault(plot.rep, plot.plot)
        items: list[tuple[str, str]] = []
        if firsts:
            starts = [f"{rep} at {plot}" for rep, plot in firsts.items()]
            starts[0] = starts[0].replace(" at ", " starts at plot ")
            more = ", ..." if len(starts) > 2 else ""
            items.append(("rep", f"Replicate ({', '.join(starts[:2])}{more})"))
        if layout.design == "alpha":
            items.append(("block", "Incomplete block (B3: block 3 of its replicate, named in "
                                   "each of its pieces)"))
        if layout.checks:
            items.append(("check", "Check"))
        items.append(("arrow", "The way the plot numbers run along the row"))
        self.key_w = s.mm(7.0)
        self.step = s.line(s.note)
        self.places: list[tuple[float, int, str, str]] = []  # x, line, kind, text
        x, line = 0.0, 0
        for kind, text in items:
            room = self.key_w + s.mm(1.5) + s.width(s.note, text)
            if x > 0 and x + room > width:
                x, line = 0.0, line + 1
            self.places.append((x, line, kind, text))
            x += room + s.mm(6.0)
        self.sentence = ("Row 1 is at the top, column 1 at the left. Each cell gives the plot "
                         "number over the entry code.")
        self.lines = line + 2
        self.height = self.step * self.lines + s.mm(2.5)

    def draw(self, painter: QPainter, top: float) -> None:
        s = self.style
        top += s.mm(1.5)
        for x, line, kind, text in self.places:
            y = top + line * self.step
            mid = y + self.step / 2
            key = QRectF(x, y + self.step * 0.1, self.key_w, self.step * 0.8)
            if kind == "check":
                painter.fillRect(key, CHECK_BG)
                painter.setPen(s.pen(_faded(BLACK, 110), CELL_PT))
                painter.drawRect(key)
            elif kind == "arrow":
                _draw_arrow(painter, s, key.left(), key.right(), mid)
            else:
                painter.setPen(s.pen(BLACK, REP_PT if kind == "rep" else BLOCK_PT))
                painter.drawLine(QPointF(key.left(), mid), QPointF(key.right(), mid))
            left = x + self.key_w + s.mm(1.5)
            s.draw_text(painter, s.note, QRectF(left, y, self.width - left, self.step), text)
        s.draw_text(painter, s.note, QRectF(0, top + (self.lines - 1) * self.step, self.width,
                                            self.step), self.sentence)


def _draw_arrow(painter: QPainter, style: _Style, tail: float, tip: float, y: float) -> None:
    """An arrow along ``y`` from ``tail`` to ``tip`` (either way)."""
    s = style
    head = s.mm(1.4) * (1 if tip > tail else -1)
    painter.setPen(s.pen(ACCENT, 0.9))
    painter.drawLine(QPointF(tail, y), QPointF(tip - head, y))
    painter.setPen(Qt.PenStyle.NoPen)
    painter.setBrush(ACCENT)
    painter.drawPolygon(QPolygonF([QPointF(tip, y), QPointF(tip - head, y - s.mm(1.0)),
                                   QPointF(tip - head, y + s.mm(1.0))]))
    painter.setBrush(Qt.BrushStyle.NoBrush)


def _map_parts(field: _Field, kind: _MapType, width: float, height: float
               ) -> list[tuple[range, range]]:
    """The field cut into the fewest parts (rows by columns, as even as may be) whose cells fit
    ``width`` x ``height`` in ``kind``'s type; empty when a single cell does not fit."""
    across = math.floor((width - kind.gutter) / kind.cell_w)
    down = math.floor((height - kind.title_h - kind.numbers_h) / kind.cell_h)
    if across < 1 or down < 1:
        return []
    n_across = math.ceil(field.columns / across)
    n_down = math.ceil(field.rows / down)
    per_column = math.ceil(field.columns / n_across)
    per_row = math.ceil(field.rows / n_down)
    return [(range(r, min(r + per_row, field.rows + 1)),
             range(c, min(c + per_column, field.columns + 1)))
            for r in range(1, field.rows + 1, per_row)
            for c in range(1, field.columns + 1, per_column)]


# --- the plot list -------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Column:
    title: str
    width: float
    flags: Qt.AlignmentFlag
    value: Callable[[LayoutPlot], str] | None  # None: a ruled column left empty


class _PlotList:
    """The plots in field order, with empty ruled columns for the traits and for notes."""

    def __init__(self, layout: Layout, traits: Sequence[str], style: _Style,
                 width: float) -> None:
        s = self.style = style
        self.plots = layout.plots
        self.width = width
        pad = s.mm(2.0)
        fixed: list[tuple[str, Callable[[LayoutPlot], str]]] = [("Plot", lambda p: p.plot)]
        if any(p.rep is not None for p in layout.plots):
            fixed.append(("Rep", lambda p: str(p.rep)))
        if any(p.incomplete_block is not None for p in layout.plots):
            fixed.append(("Block", lambda p: str(p.incomplete_block)))
        if layout.rows is not None:
            fixed += [("Row", lambda p: str(p.row)), ("Column", lambda p: str(p.column))]
        columns = [
            _Column(title, max(s.width(s.bold, title),
                               s.widest(s.bold, [value(p) for p in layout.plots])) + pad,
                    TEXT_FLAGS if title == "Plot" else CENTRE_FLAGS, value)
            for title, value in fixed]
        entry_w = min(max(s.width(s.bold, "Entry"),
                          s.widest(s.bold, [p.entry for p in layout.plots])), s.mm(LIST_ENTRY_MM))
        columns.append(_Column("Entry", entry_w + 2 * pad, TEXT_FLAGS, lambda p: p.entry))
        room = width - sum(c.width for c in columns) - s.mm(NOTES_MM)
        self.left_out: list[str] = []
        for trait in traits:
            trait_w = min(max(s.mm(TRAIT_MM), s.width(s.bold, trait) + pad),
                          s.mm(TRAIT_WIDEST_MM))
            if trait_w <= room and not self.left_out:
                columns.append(_Column(trait, trait_w, CENTRE_FLAGS, None))
                room -= trait_w
            else:
                self.left_out.append(trait)
        used = sum(c.width for c in columns)
        columns.append(_Column("Notes", width - used, TEXT_FLAGS, None))
        self.columns = columns
        self.pad = s.mm(1.0)
        self.head_h = s.line(s.bold) + s.mm(2.0)
        self.row_h = s.mm(LIST_ROW_MM)

    def intro(self, no_map: bool) -> list[str]:
        """The lines printed above the list on its first page."""
        lines = [NO_POSITIONS] if no_map else []
        lines.append(f"Plot list: {len(self.plots)} plots in field order.")
        if self.left_out:
            lines.append("No room across the page for these traits: "
                         f"{', '.join(self.left_out)}.")
        return lines

    def draw_head(self, painter: QPainter, y: float) -> None:
        s = self.style
        x = 0.0
        for column in self.columns:
            box = QRectF(x + self.pad, y, column.width - 2 * self.pad, self.head_h)
            flags = column.flags if column.value is not None else CENTRE_FLAGS
            text = s.elide(s.bold, column.title, box.width())
            s.draw_text(painter, s.bold, box, text, flags, ACCENT)
            x += column.width
        s.rule(painter, 0, self.width, y + self.head_h, points=0.8)

    def draw_rows(self, painter: QPainter, y: float, first: int, stop: int) -> None:
        s = self.style
        top = y
        for index in range(first, stop):
            plot = self.plots[index]
            if plot.is_check:
                painter.fillRect(QRectF(0, y, self.width, self.row_h), CHECK_BG)
            x = 0.0
            for column in self.columns:
                if column.value is not None:
                    font = s.bold if column.title in ("Plot", "Entry") else s.text
                    box = QRectF(x + self.pad, y, column.width - 2 * self.pad, self.row_h)
                    s.draw_text(painter, font, box, s.elide(font, column.value(plot),
                                                            box.width()), column.flags)
                x += column.width
            y += self.row_h
            following = self.plots[index + 1] if index + 1 < len(self.plots) else None
            points, color = 0.4, _faded(BLACK, 140)
            if following is not None and index + 1 < stop:  # a new replicate or block next
                if following.rep != plot.rep:
                    points, color = 1.4, BLACK
                elif following.incomplete_block != plot.incomplete_block:
                    points, color = 0.8, BLACK
            s.rule(painter, 0, self.width, y, color, points)
        painter.setPen(s.pen(_faded(BLACK, 140), 0.4))
        x = 0.0
        for column, following in zip(self.columns, self.columns[1:], strict=False):
            x += column.width
            if following.value is None:  # the ruled columns are boxes to write in
                painter.drawLine(QPointF(x, top), QPointF(x, y))

    def rows_fitting(self, room: float) -> int:
        return max(0, math.floor((room - self.head_h) / self.row_h))


# --- laying out the pages ------------------------------------------------------------------------


@dataclass(slots=True)
class _Page:
    """One page: its paper and orientation, its size in device pixels, what is drawn on it."""

    layout: QPageLayout
    width: float
    height: float
    draws: list[Draw]


def _map_choice(heading: _Heading, legend: Callable[[float], _Legend], field: _Field,
                device: QPagedPaintDevice, layouts: Sequence[QPageLayout]
                ) -> tuple[QPageLayout, _MapType, list[tuple[range, range]]]:
    """The page and type of the map: the fewest parts, then (as the module says) the larger
    type below ``READABLE_SIZE``, portrait, the larger type."""
    page = _Style(device, PAGE_SIZE, 0.6)
    choices = []
    for page_layout in layouts:
        rect = page_layout.paintRectPixels(device.logicalDpiY())
        room = _map_room(page, _Header(heading, page, rect.width()).height,
                         legend(rect.width()), rect.height())
        portrait = page_layout.orientation() == QPageLayout.Orientation.Portrait
        for size in MAP_SIZES:
            kind = _MapType(device, size, field, page)
            parts = _map_parts(field, kind, rect.width(), room)
            if parts:
                choices.append(((len(parts), -min(size, READABLE_SIZE), not portrait, -size),
                                page_layout, kind, parts))
    if not choices:
        raise TrialInputError("the field map cannot be printed: a single plot's number and "
                              "entry code do not fit the page")
    _, page_layout, kind, parts = min(choices, key=lambda choice: choice[0])
    return page_layout, kind, parts


def _map_room(page: _Style, header_h: float, legend: _Legend, height: float) -> float:
    """The height left for the map under the first page's header, above its legend."""
    return height - page.mm(FOOTER_MM) - header_h - legend.height - page.mm(1.0)


def _plan(layout: Layout, facts: Mapping[str, object], traits: Sequence[str],
          device: QPagedPaintDevice, layouts: Sequence[QPageLayout]) -> list[_Page]:
    """The pages: the map's (in its own orientation), then the plot list's (portrait on a PDF,
    which can turn its pages; a printer keeps the map's orientation throughout)."""
    dpi = device.logicalDpiY()
    s = _Style(device, PAGE_SIZE, 0.6)
    heading, running = _heading(layout, facts), _running_heading(layout, facts)
    pages: list[_Page] = []

    def new_page(page_layout: QPageLayout, label: str) -> float:
        rect = page_layout.paintRectPixels(dpi)
        head = (_RunningHead(running, s, rect.width()) if pages
                else _Header(heading, s, rect.width()))
        pages.append(_Page(page_layout, rect.width(), rect.height(),
                           [lambda p, head=head: head.draw(p, label)]))
        return head.height

    list_layout = layouts[0]
    if layout.rows is not None:
        field = _Field(layout)
        page_layout, kind, parts = _map_choice(
            heading, lambda width: _Legend(layout, s, width), field, device, layouts)
        if not isinstance(device, QPdfWriter):
            list_layout = page_layout
        rect = page_layout.paintRectPixels(dpi)
        legend = _Legend(layout, s, rect.width())
        room = _map_room(s, _Header(heading, s, rect.width()).height, legend, rect.height())
        for number, (rows, columns) in enumerate(parts, start=1):
            top = new_page(page_layout, "Field book" if number == 1 else "Field map")
            title = f"Field map: {field.rows} rows x {field.columns} columns"
            if len(parts) > 1:
                title += (f", part {number} of {len(parts)}: rows {rows.start}\u2013"
                          f"{rows.stop - 1}, columns {columns.start}\u2013{columns.stop - 1}")
            part = _MapPart(field, kind, rows, columns, rect.width(), room, title)
            below = top + part.height + s.mm(1.0)
            pages[-1].draws += [lambda p, part=part, top=top: part.draw(p, top),
                                lambda p, below=below: legend.draw(p, below)]
    rect = list_layout.paintRectPixels(dpi)
    table = _PlotList(layout, traits, s, rect.width())
    bottom = rect.height() - s.mm(FOOTER_MM)
    start = 0
    while start < len(layout.plots):
        y = new_page(list_layout, "Plot list" if pages else "Field book")
        if start == 0:
            lines = table.intro(layout.rows is None)
            pages[-1].draws.append(lambda p, y=y, lines=lines: s.draw_lines(
                p, s.note, 0, y, rect.width(), lines))
            y += s.line(s.note) * len(lines) + s.mm(1.5)
        stop = min(start + max(1, table.rows_fitting(bottom - y)), len(layout.plots))
        pages[-1].draws += [lambda p, y=y: table.draw_head(p, y),
                            lambda p, y=y + table.head_h, first=start, stop=stop:
                            table.draw_rows(p, y, first, stop)]
        start = stop
    return pages


# --- the public routines -------------------------------------------------------------------------


def render_layout(layout: Layout, device: QPagedPaintDevice, *,
                  facts: Mapping[str, object] | None = None, traits: Sequence[str] = ()) -> int:
    """Paint the field book of ``layout`` onto the pages of ``device``.

    The one drawing routine of the field book, for the PDF file and the printer alike. It
    chooses the page's orientation and sets 12 mm margins on the device; the paper size is the
    device's own. A Qt GUI application must exist.

    Parameters
    ----------
    layout : Layout
        The layout to print (:func:`trialdesk.core.layouts.make_layout`).
    device : QPagedPaintDevice
        A QPdfWriter, or a QPrinter set up by the print dialog; nothing may be painting on it.
    facts : mapping, optional
        Trial facts for the header (``name``, ``station``, ``season``, ``crop``, dates, plot
        size), as a trial file keeps them.
    traits : sequence of str
        The traits to record: each gets an empty ruled column in the plot list.

    Returns
    -------
    int
        The number of pages printed.

    Raises
    ------
    TrialInputError
        When the device cannot be painted on (for instance a file that cannot be opened).
    """
    facts = dict(facts or {})
    pages = _plan(layout, facts, traits, device, _layouts(device))
    if not device.setPageLayout(pages[0].layout):
        # A printer that refuses the margins: keep its own, turn the page, lay out again.
        device.setPageOrientation(pages[0].layout.orientation())
        pages = _plan(layout, facts, traits, device, [device.pageLayout()])
    heading = _heading(layout, facts)
    style = _Style(device, PAGE_SIZE, 0.6)
    painter = QPainter()
    if not painter.begin(device):
        raise TrialInputError("the field book could not be printed: the printer or file did "
                              "not open for drawing")
    try:
        painter.setRenderHint(QPainter.RenderHint.Antialiasing)
        painter.setRenderHint(QPainter.RenderHint.TextAntialiasing)
        for number, page in enumerate(pages, start=1):
            if number > 1:
                if page.layout.orientation() != pages[number - 2].layout.orientation():
                    device.setPageLayout(page.layout)  # takes effect from the new page
                device.newPage()
            for draw in page.draws:
                draw(painter)
            _Footer(heading, style, page.width, page.height).draw(painter, number, len(pages))
    finally:
        painter.end()
    return len(pages)


def write_layout_pdf(layout: Layout, path: str | os.PathLike[str], *, paper: str = "A4",
                     facts: Mapping[str, object] | None = None,
                     traits: Sequence[str] = ()) -> Path:
    """Write the field book of ``layout`` to a PDF file at ``path``.

    The file is written beside the target under a temporary name and moved into place when
    complete, so a crash never leaves half a PDF, nor spoils a good file already there. Works
    with no display (an offscreen Qt application is made when there is none).

    Parameters
    ----------
    layout : Layout
        The layout to print (:func:`trialdesk.core.layouts.make_layout`).
    path : str or path-like
        The PDF file to write; an existing file is replaced.
    paper : {"A4", "Letter"}
        The paper size.
    facts : mapping, optional
        Trial facts for the header (see :func:`render_layout`).
    traits : sequence of str
        The traits to record, each an empty ruled column of the plot list.

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
    return write_pages(path, paper=paper,
                       title=f"{_heading(layout, dict(facts or {})).title}: field book",
                       draw=lambda writer: render_layout(layout, writer, facts=facts,
                                                         traits=traits),
                       what="field book")

