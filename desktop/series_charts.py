"""The charts of a trial series: each entry's response to the environments, and its rank in each.

Both are :class:`~trialdesk.desktop.charts.ChartPanel` charts, with a caption and a button that
saves them as a PNG or SVG picture. The checks are drawn in the check colour and the entries
chosen in the entries table in the entry colour, each named at the end of its line; every other
entry is drawn faintly, all of them as one item, so that a series of hundreds of entries redraws
at once when the choice changes. A click on a point emits ``entry_clicked(entry)``. The numbers
come from the series results (:class:`~trialdesk.core.series_results.SeriesTraitResult`); the
charts only draw them.
"""

from __future__ import annotations

import os

os.environ.setdefault("PYQTGRAPH_QT_LIB", "PySide6")

import PySide6  # noqa: F401, I001  (PySide6 before pyqtgraph, so pyqtgraph binds to it)
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor, QFont, QFontMetrics
from PySide6.QtWidgets import QApplication, QWidget

from collections.abc import Sequence

import numpy as np
import pandas as pd
import pyqtgraph as pg

from trialdesk.core.series_results import SeriesTraitResult
from trialdesk.desktop.charts import TEXT, TICK_FONT, ChartPanel, _faded
from trialdesk.desktop.palette import ACCENT, CHECK_PEN, ENTRY_PEN

FAINT_LINE = _faded(ENTRY_PEN, 55)
FAINT_POINT = _faded(ENTRY_PEN, 80)
NAMED_AT_MOST = 40  # above this many entries the rank axis names every n-th rank only
NAME_GAP = 10  # pixels between two environment names on one row of the response chart
MARGIN = 0.04  # of the data's range, left free below and above it


def environment_index(result: SeriesTraitResult) -> pd.Series:
    """The environment index the stability table was computed on, one value per environment.

    ``I_j = ybar_.j - ybar_..`` over the entries grown in every environment (those of the
    stability table), in the order of the environment table (Eberhart & Russell 1966, Crop Sci.
    6:36-40). Empty when the series has no stability table.
    """
    stable = [s.entry for s in result.stability]
    if not stable:
        return pd.Series(dtype=float)
    table = result.cell_means_frame().loc[stable]
    return table.mean(axis=0) - table.to_numpy().mean()


def _strong(result: SeriesTraitResult, chosen: Sequence[str]) -> list[tuple[str, QColor]]:
    """The entries drawn strongly, checks first, each with its colour."""
    checks = [e.entry for e in result.entries if e.is_check]
    known = {e.entry for e in result.entries}
    return ([(c, CHECK_PEN) for c in checks]
            + [(e, ENTRY_PEN) for e in chosen if e in known and e not in checks])


def _joined(lines: Sequence[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Several lines as one pair of arrays, broken by NaN (drawn with ``connect="finite"``)."""
    if not lines:
        return np.array([]), np.array([])
    gap = np.array([np.nan])
    xs = np.concatenate([part for x, _ in lines for part in (x, gap)])
    ys = np.concatenate([part for _, y in lines for part in (y, gap)])
    return xs, ys


class _SeriesChart(ChartPanel):
    """A series chart: ``entry_clicked(entry)`` when a point is clicked.

    After a drawing, ``lines`` and ``points`` hold the items of the entries drawn strongly (by
    entry code) and ``faint_lines``/``faint_points`` the items of all the others.
    """

    entry_clicked = Signal(str)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.plot_clicked.connect(self.entry_clicked)
        self.lines: dict[str, pg.PlotDataItem] = {}
        self.points: dict[str, pg.ScatterPlotItem] = {}
        self.faint_lines: pg.PlotDataItem | None = None
        self.faint_points: pg.ScatterPlotItem | None = None
        # The key sits in a row of its own below the chart, where it never hides a line.
        self.key = pg.LegendItem(colCount=4, labelTextColor=TEXT, labelTextSize="10pt")
        self.plot.layout.addItem(self.key, 4, 1)
        self.name_font = QFont(QApplication.font())
        self.name_font.setPointSize(TICK_FONT.pointSize())

    def clear(self, message: str = "") -> None:
        super().clear(message)
        self.key.clear()
        self.lines, self.points = {}, {}
        self.faint_lines = self.faint_points = None

    def _faint(self, lines: Sequence[tuple[np.ndarray, np.ndarray]], x: np.ndarray,
               y: np.ndarray, entries: Sequence[str], tip) -> None:
        """The entries not chosen: one item of lines, one of points."""
        xs, ys = _joined(lines)
        self.faint_lines = self.plot.plot(xs, ys, pen=pg.mkPen(FAINT_LINE, width=1),
                                          connect="finite")
        self.faint_points = self._points(x, y, entries, size=6, brush=FAINT_POINT, tip=tip)

    def _name_at(self, x: float, y: float, entry: str, color: QColor) -> None:
        label = pg.TextItem(entry, color=color, anchor=(-0.15, 0.5))
        label.setFont(self.name_font)
        label.setPos(x, y)
        self.plot.addItem(label)

    def _fill_key(self, entries: list[tuple[str, QColor]], faint: bool) -> None:
        if any(color == CHECK_PEN for _, color in entries):
            self.key.addItem(pg.PlotDataItem(pen=pg.mkPen(CHECK_PEN, width=2.5)), "check")
        if any(color == ENTRY_PEN for _, color in entries):
            self.key.addItem(pg.PlotDataItem(pen=pg.mkPen(ENTRY_PEN, width=2.5)),
                             "entry chosen in the table")
        if faint:
            self.key.addItem(pg.PlotDataItem(pen=pg.mkPen(FAINT_LINE, width=1)),
                             "other entries")


class ResponseChart(_SeriesChart):
    """Each entry's mean in each environment against the environment index, with its
    Finlay-Wilkinson line ``y = mean_i + b_i I``; the dashed line of slope 1 is the average
    response. The environments are named above the data, each over a dotted line at its index,
    in as many rows as their names need so that none hides another."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._environments: list[tuple[float, str]] = []
        self._data_range = (0.0, 1.0)
        self._name_items: list[pg.TextItem] = []
        self.plot.getViewBox().sigResized.connect(self._place_names)

    def clear(self, message: str = "") -> None:
        super().clear(message)
        self._environments, self._name_items = [], []

    def show_trait(self, result: SeriesTraitResult, chosen: Sequence[str]) -> None:
        """Draw ``result``, the checks and the ``chosen`` entries strongly."""
        index = environment_index(result)
        if index.empty:
            self.clear("The response to the environments needs the stability table: at least 3 "
                       "environments and 3 entries grown in all of them. " + " ".join(
                           n for n in result.notes if "stability" in n))
            return
        self.clear()
        d = result.decimals + 1
        x = index.to_numpy(dtype=float)
        names = list(index.index)
        where = dict(zip(x.tolist(), names, strict=True))
        table = result.cell_means_frame()
        stable = {s.entry: s for s in result.stability}
        ends = np.array([x.min(), x.max()])
        self.caption.setText(
            f"{result.trait}: each entry's mean in each environment against the environment "
            "index (the environment's mean less the mean of all). An entry's line is its "
            "regression on the index (the slope of the table); steeper than the dashed line "
            "(slope 1) means it gains more than the average entry in good environments. Select "
            "entries in the table, or click a point, to draw them strongly.")

        def tip(px: float, py: float, data: str) -> str:
            return f"{data} in {where.get(px, '')}: {py:.{d}f}"

        for position in x:
            self.plot.addItem(pg.InfiniteLine(
                pos=float(position), angle=90,
                pen=pg.mkPen(_faded(TEXT, 60), width=1, style=Qt.PenStyle.DotLine)))
        strong = _strong(result, chosen)
        named = {e for e, _ in strong}
        faint = [e for e in table.index if e not in named]
        lines = [(ends, stable[e].mean + stable[e].regression_slope * ends)
                 for e in faint if e in stable]
        cells = table.loc[faint, names].to_numpy(dtype=float)
        grown = np.isfinite(cells)
        self._faint(lines, np.broadcast_to(x, cells.shape)[grown], cells[grown],
                    np.repeat(np.array(faint, dtype=object), grown.sum(axis=1)), tip)
        average = float(np.mean([s.mean for s in result.stability]))
        self.plot.plot(ends, average + ends,
                       pen=pg.mkPen(ACCENT, width=1.5, style=Qt.PenStyle.DashLine))
        for entry, color in strong:
            y = table.loc[entry, names].to_numpy(dtype=float)
            known = np.isfinite(y)
            self.points[entry] = self._points(x[known], y[known], [entry] * int(known.sum()),
                                              size=9, brush=color, pen=QColor("white"), tip=tip)
            if entry in stable:
                s = stable[entry]
                line = s.mean + s.regression_slope * ends
                self.lines[entry] = self.plot.plot(ends, line, pen=pg.mkPen(color, width=2.5))
                self._name_at(ends[1], line[1], entry, color)
        self._fill_key(strong, bool(faint))
        self.key.addItem(
            pg.PlotDataItem(pen=pg.mkPen(ACCENT, width=1.5, style=Qt.PenStyle.DashLine)),
            "slope 1 (the average entry)")
        self._labels("environment index", result.trait)
        self.plot.showGrid(x=False, y=True, alpha=0.15)
        span = float(np.ptp(x)) or 1.0
        self.plot.setXRange(x.min() - 0.08 * span, x.max() + 0.12 * span, padding=0)
        drawn = np.concatenate([table.to_numpy(dtype=float).ravel(), average + ends,
                                *(line for _, line in lines),
                                *(item.getData()[1] for item in self.lines.values())])
        low, high = float(np.nanmin(drawn)), float(np.nanmax(drawn))
        spare = MARGIN * ((high - low) or 1.0)
        self._data_range = (low - spare, high + spare)
        self._environments = sorted(zip(x.tolist(), names, strict=True))
        self._place_names()

    def _place_names(self) -> None:
        """Name the environments in rows above the data, and set the y range to make room."""
        box = self.plot.getViewBox()
        width, height = box.width(), box.height()
        if not self._environments or width <= 0 or height <= 0:
            return
        for item in self._name_items:
            self.plot.removeItem(item)
        (x0, x1), _ = box.viewRange()
        metrics = QFontMetrics(self.name_font)
        edges: list[float] = []  # the right end (pixels) of the last name on each row
        rows = []
        for position, name in self._environments:
            centre = (position - x0) / (x1 - x0) * width
            half = metrics.horizontalAdvance(name) / 2
            row = next((k for k, edge in enumerate(edges) if edge + NAME_GAP <= centre - half),
                       len(edges))
            if row == len(edges):
                edges.append(0.0)
            edges[row] = centre + half
            rows.append(row)
        line = metrics.height() + 2
        room = min(len(edges) * line + 4, height / 2)
        low, high = self._data_range
        # The top of the range leaves ``room`` pixels above the data: (top - high) / (top - low)
        # of the height.
        top = (high * height - room * low) / (height - room)
        box.setYRange(low, top, padding=0)
        per_pixel = (top - low) / height
        self._name_items = []
        for (position, name), row in zip(self._environments, rows, strict=True):
            label = pg.TextItem(name, color=TEXT, anchor=(0.5, 0))
            label.setFont(self.name_font)
            label.setPos(position, top - (2 + row * line) * per_pixel)
            self.plot.addItem(label)
            self._name_items.append(label)


class RankChangeChart(_SeriesChart):
    """Each entry's rank in each environment (1 = best there, at the top), the environments from
    the lowest mean on the left to the highest on the right: crossing lines are entries changing
    places."""

    def show_trait(self, result: SeriesTraitResult, chosen: Sequence[str]) -> None:
        """Draw ``result``, the checks and the ``chosen`` entries strongly."""
        self.clear()
        order = sorted(result.environment_table, key=lambda e: e.mean)
        names = [e.environment for e in order]
        ranks = result.ranks_frame()[names]
        values = ranks.astype("Float64").to_numpy(dtype=float, na_value=np.nan)
        codes = list(ranks.index)
        x = np.arange(len(names), dtype=float)
        self.caption.setText(
            f"{result.trait}: the rank of each entry in each environment (1 = best there), the "
            "environments from the lowest mean (left) to the highest (right). Lines that cross "
            "are entries changing places from one environment to another. Select entries in the "
            "table, or click a point, to draw them strongly.")

        def tip(px: float, py: float, data: str) -> str:
            return f"{data}: rank {py:.0f} in {names[round(px)]}"

        strong = _strong(result, chosen)
        named = {e for e, _ in strong}
        faint = [i for i, e in enumerate(codes) if e not in named]
        part = values[faint]
        grown = np.isfinite(part)
        self._faint([(x, row) for row in part], np.broadcast_to(x, part.shape)[grown],
                    part[grown], np.repeat(np.array(codes, dtype=object)[faint],
                                           grown.sum(axis=1)), tip)
        for entry, color in strong:
            y = values[codes.index(entry)]
            known = np.isfinite(y)
            self.lines[entry] = self.plot.plot(x, y, pen=pg.mkPen(color, width=2.5),
                                               connect="finite")
            self.points[entry] = self._points(x[known], y[known], [entry] * int(known.sum()),
                                              size=9, brush=color, pen=QColor("white"), tip=tip)
            last = np.flatnonzero(known)[-1]
            self._name_at(x[last], y[last], entry, color)
        self._fill_key(strong, bool(faint))
        bottom, left = self.plot.getAxis("bottom"), self.plot.getAxis("left")
        bottom.setTicks([[(float(i), n) for i, n in enumerate(names)], []])
        n = len(codes)
        step = max(1, -(-n // NAMED_AT_MOST))
        left.setTicks([[(float(r), str(r)) for r in range(1, n + 1) if (r - 1) % step == 0], []])
        left.setWidth(QFontMetrics(TICK_FONT).horizontalAdvance(str(n)) + 40)  # and "rank"
        self.plot.getViewBox().invertY(True)
        self.plot.setYRange(0.5, n + 0.5, padding=0.02)
        self.plot.setXRange(-0.3, len(names) - 0.4, padding=0)
        self._labels("environment, by its mean", "rank")
        self.plot.showGrid(x=True, y=False, alpha=0.15)
