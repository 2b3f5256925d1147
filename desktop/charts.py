"""The charts of one trait's results: ranked means, residuals, a normal plot and the field map.

Each chart is a :class:`ChartPanel`: a pyqtgraph plot with a one-line caption and a button that
saves it as a PNG or SVG picture. A click on a plot's point emits ``plot_clicked(plot)`` so the
main window can open that plot in the field book. The numbers come from trialdesk.core (the
results, :func:`trialdesk.core.planning.residual_table` and
:func:`trialdesk.core.planning.mean_limits`); the charts only draw them.
"""

from __future__ import annotations

import os

os.environ.setdefault("PYQTGRAPH_QT_LIB", "PySide6")

import PySide6  # noqa: F401, I001  (PySide6 before pyqtgraph, so pyqtgraph binds to it)
from PySide6.QtCore import QPointF, QRect, QRectF, QSize, Qt, Signal
from PySide6.QtGui import QColor, QFont, QFontMetrics, QPainter
from PySide6.QtSvg import QSvgGenerator
from PySide6.QtWidgets import (
    QComboBox,
    QFileDialog,
    QGraphicsRectItem,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QStackedWidget,
    QVBoxLayout,
    QWidget,
)

import numpy as np
import pandas as pd
import pyqtgraph as pg
import pyqtgraph.exporters
from scipy import stats

from trialdesk.core.results import TraitResult
from trialdesk.desktop.palette import ABOVE, ACCENT, BELOW, CHECK_PEN, ENTRY_PEN, ERROR_FG

TEXT = QColor("black")
PAPER = QColor("white")
TICK_FONT = QFont()
TICK_FONT.setPointSize(10)
SMALL_FONT = QFont()
SMALL_FONT.setPointSize(8)
LABELLED_PLOTS = 600  # above this many plots the field map shows colours only, no numbers
MAX_NAMED = 25  # entries named on the means chart however small it is drawn


def _fixed(value: float, decimals: int) -> str:
    return "" if value is None or not np.isfinite(value) else f"{value:.{decimals}f}"


def _mixed(color: QColor, share: float) -> QColor:
    """``color`` mixed into white: ``share`` 0 is white, 1 the colour itself."""
    return QColor.fromRgbF(*(1 - share + share * c for c in color.getRgbF()[:3]))


def _faded(color: QColor, alpha: int) -> QColor:
    faded = QColor(color)
    faded.setAlpha(alpha)
    return faded


class ChartPanel(QWidget):
    """A chart with its caption and a "Save picture..." button.

    Signals
    -------
    plot_clicked(str) : the plot (its plot number) whose point was clicked.
    """

    plot_clicked = Signal(str)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.caption = QLabel()
        self.caption.setWordWrap(True)
        # Room for two lines: a wrapped label beside buttons is otherwise given one.
        self.caption.setMinimumHeight(2 * self.caption.fontMetrics().lineSpacing() + 4)
        self.save_button = QPushButton("Save picture…")
        self.save_button.setToolTip("Save this chart as a PNG or SVG picture")
        self.save_button.clicked.connect(self._ask_and_save)
        self.bar = QHBoxLayout()
        self.bar.addWidget(self.caption, 1)
        self.bar.addWidget(self.save_button)
        self.plot_widget = pg.PlotWidget(background=PAPER)
        self.plot_widget.setMenuEnabled(False)
        self.plot = self.plot_widget.getPlotItem()
        self.plot.hideButtons()
        for side in ("left", "bottom"):
            axis = self.plot.getAxis(side)
            axis.setTextPen(TEXT)
            axis.setPen(TEXT)
            axis.setTickFont(TICK_FONT)
        self.message = QLabel()
        self.message.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.message.setWordWrap(True)
        self.stack = QStackedWidget()
        self.stack.addWidget(self.plot_widget)
        self.stack.addWidget(self.message)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addLayout(self.bar)
        layout.addWidget(self.stack, 1)

    # --- common parts -----------------------------------------------------------------------

    def clear(self, message: str = "") -> None:
        """Remove everything drawn; show ``message`` in place of the chart when given."""
        self.plot.clear()
        legend = self.plot.legend
        if legend is not None:
            legend.clear()
        self.stack.setCurrentWidget(self.message if message else self.plot_widget)
        self.message.setText(message)
        self.save_button.setEnabled(not message)

    def _labels(self, bottom: str, left: str) -> None:
        style = {"color": TEXT.name(), "font-size": "11pt"}
        self.plot.setLabel("bottom", bottom, **style)
        self.plot.setLabel("left", left, **style)

    def _legend(self, offset: tuple[int, int] = (-10, 10)) -> pg.LegendItem:
        if self.plot.legend is None:
            self.plot.addLegend(offset=offset, labelTextColor=TEXT, labelTextSize="10pt",
                                brush=_faded(PAPER, 220), pen=_faded(TEXT, 60))
        corner = (0 if offset[0] > 0 else 1, 0 if offset[1] > 0 else 1)  # negative: right/bottom
        self.plot.legend.anchor(itemPos=corner, parentPos=corner, offset=offset)
        return self.plot.legend

    def _points(self, x, y, plots, *, size: float, brush: QColor, pen: QColor | None = None,
                symbol: str = "o", tip=None, name: str | None = None) -> pg.ScatterPlotItem:
        """Clickable points, each carrying its plot number as data."""
        item = pg.ScatterPlotItem(
            x=np.asarray(x, dtype=float), y=np.asarray(y, dtype=float),
            data=list(plots), size=size, symbol=symbol, brush=pg.mkBrush(brush),
            pen=pg.mkPen(pen) if pen is not None else pg.mkPen(None),
            hoverable=True, hoverSize=size + 4, tip=tip, name=name)
        item.sigClicked.connect(self._on_points_clicked)
        self.plot.addItem(item)
        return item

    def _on_points_clicked(self, item, points, event=None) -> None:
        """A click on points: emit the plot of the first one that belongs to a plot."""
        for point in points:
            plot = point.data()
            if plot is not None and plot == plot:  # NaN marks a point that is not a plot
                self.plot_clicked.emit(str(plot))
                return

    # --- saving -----------------------------------------------------------------------------

    def save_chart(self, path: str | os.PathLike[str]) -> None:
        """Save the chart as a picture: SVG when ``path`` ends in .svg, otherwise PNG."""
        path = os.fspath(path)
        if path.lower().endswith(".svg"):
            self._save_svg(path)
        else:
            exporter = pyqtgraph.exporters.ImageExporter(self.plot)
            exporter.parameters()["width"] = max(2 * self.plot_widget.width(), 1200)
            exporter.parameters()["background"] = PAPER
            exporter.export(path)

    def _save_svg(self, path: str) -> None:
        # pyqtgraph 0.14's SVGExporter cannot parse the path data Qt 6 writes, so the SVG comes
        # from Qt's own generator, at the widget's resolution so text and items keep their places.
        widget = self.plot_widget
        generator = QSvgGenerator()
        generator.setFileName(path)
        generator.setSize(QSize(widget.width(), widget.height()))
        generator.setViewBox(QRect(0, 0, widget.width(), widget.height()))
        generator.setResolution(widget.logicalDpiX())
        generator.setTitle(self.caption.text())
        painter = QPainter(generator)
        try:
            widget.render(painter)
        finally:
            painter.end()

    def _ask_and_save(self) -> None:
        path, _ = QFileDialog.getSaveFileName(self, "Save picture", "",
                                              "PNG picture (*.png);;SVG picture (*.svg)")
        if path:
            if not path.lower().endswith((".png", ".svg")):
                path += ".png"
            self.save_chart(path)


class RankedMeansChart(ChartPanel):
    """Entry means, best first, with their confidence limits and every plot's value beside them.

    Entries run down the left side (best at the top), so their codes read across; checks are
    drawn in the check colour. Each small point is one plot's value and can be clicked.
    """

    def show_trait(self, result: TraitResult, limits: pd.DataFrame, plots: pd.DataFrame,
                   unit: str, decimals: int) -> None:
        """Draw ``result``'s means with ``limits`` (planning.mean_limits) and the plot values in
        ``plots`` (planning.residual_table)."""
        self.clear()
        d = decimals + 1
        level = 100 * (1 - result.alpha)
        self.caption.setText(
            f"Entry means of {result.trait} with {level:g}% confidence limits (mean ± t × SE); "
            "small points are the plots (click one to find it in the field book).")
        order = list(limits["entry"])
        where = {e: i for i, e in enumerate(order)}
        # The best entries sit at the top: at the right for higher-is-better traits, at the
        # left otherwise, so the legend goes in the corner the points leave empty.
        legend = self._legend((-10, -10) if result.higher_is_better else (-10, 10))
        observed = plots.dropna(subset=["value"])
        y_plots = observed["entry"].map(where).to_numpy(dtype=float) + 0.28
        self.plot_points = self._points(
            observed["value"], y_plots, observed["plot"], size=6, brush=_faded(ENTRY_PEN, 110),
            tip=lambda x, y, data: f"plot {data}: {x:.{decimals}f}", name="plot value")
        for is_check, color, symbol, name in ((False, ENTRY_PEN, "o", "entry mean"),
                                              (True, CHECK_PEN, "d", "check mean")):
            part = limits[limits["is_check"] == is_check]
            if part.empty:
                continue
            y = part["entry"].map(where).to_numpy(dtype=float)
            mean = part["mean"].to_numpy(dtype=float)
            bars = pg.ErrorBarItem(x=mean, y=y, left=mean - part["lower"].to_numpy(),
                                   right=part["upper"].to_numpy() - mean, height=0.35,
                                   pen=pg.mkPen(color, width=2))
            self.plot.addItem(bars)
            item = self._points(mean, y, [float("nan")] * len(part), size=11, brush=color,
                                pen=PAPER, symbol=symbol, name=name,
                                tip=lambda x, y, data: f"{order[round(y)]}: mean {x:.{d}f}")
            if is_check:
                self.check_points = item
            else:
                self.entry_points = item
        mean_line = pg.InfiniteLine(pos=result.grand_mean, angle=90,
                                    pen=pg.mkPen(ACCENT, width=1, style=Qt.PenStyle.DashLine))
        self.plot.addItem(mean_line)
        legend.addItem(pg.PlotDataItem(pen=pg.mkPen(ACCENT, style=Qt.PenStyle.DashLine)),
                       f"grand mean {result.grand_mean:.{d}f}")
        left = self.plot.getAxis("left")
        # At most about MAX_NAMED entries are always named (every step-th, the best first); the
        # others are named when the chart is tall enough to hold them all.
        step = max(1, -(-len(order) // MAX_NAMED))
        left.setTicks([[(i, e) for i, e in enumerate(order) if i % step == 0],
                       [(i, e) for i, e in enumerate(order) if i % step]])
        left.setStyle(textFillLimits=[(0, 0.75)])  # pyqtgraph counts 0.8 of each text's height
        # The axis does not widen itself for text ticks: make room for the longest code.
        left.setWidth(max(QFontMetrics(TICK_FONT).horizontalAdvance(e) for e in order) + 16)
        self.plot.getViewBox().invertY(True)
        self.plot.setYRange(-0.7, len(order) - 0.3, padding=0)
        self._labels(f"{result.trait} ({unit})" if unit else result.trait, "")
        self.plot.showGrid(x=True, y=False, alpha=0.25)


class ResidualChart(ChartPanel):
    """Studentized residuals against fitted values, with the flag limits drawn."""

    def show_trait(self, result: TraitResult, plots: pd.DataFrame, unit: str) -> None:
        """Draw the residuals of ``plots`` (planning.residual_table) for ``result``."""
        self.clear()
        limit = result.diagnostics.flag_limit
        self.caption.setText(
            f"Studentized residuals of {result.trait} against fitted values. Points beyond "
            f"±{limit:g} are flagged: check those plots in the field book. A funnel shape means "
            "the spread grows with the mean.")
        observed = plots.dropna(subset=["studentized"])
        flagged = observed["studentized"].abs() > limit
        tip = "plot {data}\nfitted {x:.3g}\nstudentized residual {y:.2f}".format
        self._points(observed.loc[~flagged, "fitted"], observed.loc[~flagged, "studentized"],
                     observed.loc[~flagged, "plot"], size=8, brush=_faded(ENTRY_PEN, 190),
                     tip=lambda x, y, data: tip(x=x, y=y, data=data))
        self._points(observed.loc[flagged, "fitted"], observed.loc[flagged, "studentized"],
                     observed.loc[flagged, "plot"], size=11, brush=ERROR_FG,
                     tip=lambda x, y, data: tip(x=x, y=y, data=data))
        for row in observed[flagged].itertuples():
            label = pg.TextItem(f"plot {row.plot}", color=ERROR_FG, anchor=(-0.1, 0.5))
            label.setPos(row.fitted, row.studentized)
            self.plot.addItem(label)
        self.plot.addItem(pg.InfiniteLine(pos=0, angle=0, pen=pg.mkPen(TEXT, width=1)))
        for y in (-limit, limit):
            self.plot.addItem(pg.InfiniteLine(
                pos=y, angle=0, pen=pg.mkPen(ERROR_FG, width=1, style=Qt.PenStyle.DashLine)))
        top = max(limit + 0.5, float(observed["studentized"].abs().max()) + 0.5)
        self.plot.setYRange(-top, top)
        name = f"fitted {result.trait}" + (f" ({unit})" if unit else "")
        self._labels(name, "studentized residual")
        self.plot.showGrid(x=True, y=True, alpha=0.2)


class NormalQuantileChart(ChartPanel):
    """Normal quantile plot of the studentized residuals: points near the line look normal."""

    def show_trait(self, result: TraitResult, plots: pd.DataFrame) -> None:
        """Draw the normal quantile plot of the residuals in ``plots``."""
        self.clear()
        self.caption.setText(
            f"Normal quantile plot of the studentized residuals of {result.trait}: points close "
            "to the line look normal; a bend at the ends means long tails or skew.")
        observed = plots.dropna(subset=["studentized"])
        order = np.argsort(observed["studentized"].to_numpy(), kind="stable")
        (quantiles, ordered), (slope, intercept, _) = stats.probplot(
            observed["studentized"].to_numpy())
        ranked = observed.iloc[order]
        self._points(quantiles, ordered, ranked["plot"], size=8, brush=_faded(ENTRY_PEN, 190),
                     tip=lambda x, y, data: f"plot {data}\nstudentized residual {y:.2f}")
        ends = np.array([quantiles[0], quantiles[-1]])
        self.plot.plot(ends, intercept + slope * ends, pen=pg.mkPen(ACCENT, width=2))
        self._labels("normal quantile", "studentized residual")
        self.plot.showGrid(x=True, y=True, alpha=0.2)


class FieldMapChart(ChartPanel):
    """The trial as laid out in the field, each plot coloured by its value or its residual."""

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.what = QComboBox()
        self.what.addItem("Plot values", "value")
        self.what.addItem("Residuals", "residual")
        self.what.addItem("Fitted field trend", "trend")
        self.what.currentIndexChanged.connect(self._redraw)
        self.bar.insertWidget(1, self.what)
        self.colour_bar: pg.ColorBarItem | None = None
        self._shown: tuple | None = None
        self._cells: dict[tuple[int, int], str] = {}
        self.plot_widget.scene().sigMouseClicked.connect(self._on_scene_clicked)

    def show_trait(self, result: TraitResult, plots: pd.DataFrame, checks: tuple[str, ...],
                   unit: str, decimals: int) -> None:
        """Draw ``plots`` (planning.residual_table) by field row and column."""
        self._shown = (result, plots, checks, unit, decimals)
        self._redraw()

    def _redraw(self) -> None:
        if self._shown is None:
            return
        result, plots, checks, unit, decimals = self._shown
        known = plots.dropna(subset=["row", "column"])
        self.what.setEnabled(not known.empty)
        has_trend = "trend" in known and bool(np.isfinite(known["trend"].to_numpy(float)).any())
        self.what.model().item(self.what.findData("trend")).setEnabled(has_trend)
        if self.what.currentData() == "trend" and not has_trend:
            self.what.setCurrentIndex(self.what.findData("value"))  # redraws
        if known.empty:
            self._cells = {}
            self.clear("The field layout is not known: the plots have no row and column. "
                       "Enter them with the plots to see the trial as it lies in the field.")
            self.caption.setText("Field map")
            return
        self.clear()
        what = self.what.currentData()
        rows = known["row"].astype(int).to_numpy()
        cols = known["column"].astype(int).to_numpy()
        r0, c0 = rows.min(), cols.min()
        grid = np.full((rows.max() - r0 + 1, cols.max() - c0 + 1), np.nan)
        numbers = known[what].to_numpy(dtype=float)
        grid[rows - r0, cols - c0] = numbers
        self._cells = {(int(r), int(c)): str(p)
                       for r, c, p in zip(rows, cols, known["plot"], strict=True)}
        image = pg.ImageItem(grid, axisOrder="row-major",
                             rect=QRectF(c0 - 0.5, r0 - 0.5, grid.shape[1], grid.shape[0]))
        finite = numbers[np.isfinite(numbers)]
        if what in ("residual", "trend"):
            top = float(np.abs(finite).max()) if finite.size else 1.0
            levels = (-top, top)
            colours = pg.ColorMap([0.0, 0.5, 1.0], [BELOW, PAPER, ABOVE])
            words = (f"Residuals of {result.trait} by field position: green plots came out "
                     "above what their entry and block predict, red ones below; patches of one "
                     "colour point to field trends the blocks missed." if what == "residual"
                     else f"The field trend fitted for {result.trait}: green parts of the field "
                     "grew more than the average plot, red ones less; the entry means are "
                     "adjusted for it.")
        else:
            levels = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
            # From a light tint of the accent (not white, which marks a missing plot).
            colours = pg.ColorMap([0.0, 1.0], [_mixed(ACCENT, 0.12), ACCENT])
            words = (f"{result.trait} by field position (row down, column across); check plots "
                     "are outlined.")
        if levels[0] == levels[1]:
            levels = (levels[0] - 1.0, levels[1] + 1.0)
        image.setColorMap(colours)
        image.setLevels(levels)
        self.plot.addItem(image)
        self.image = image
        self.caption.setText(words + " Click a plot to find it in the field book.")
        shown = decimals if what == "value" else decimals + 1
        if len(known) <= LABELLED_PLOTS:
            for r, c, value in zip(rows, cols, numbers, strict=True):
                self._cell_label(r, c, value, levels, what == "value", shown)
        for r, c, entry in zip(rows, cols, known["entry"], strict=True):
            if entry in checks:
                frame = QGraphicsRectItem(c - 0.46, r - 0.46, 0.92, 0.92)
                frame.setPen(pg.mkPen(CHECK_PEN, width=2))
                self.plot.addItem(frame)
        label = {"value": unit, "residual": "residual", "trend": "field trend"}[what]
        self._colour_bar(image, colours, levels, label)
        bottom, left = self.plot.getAxis("bottom"), self.plot.getAxis("left")
        bottom.setTicks([[(c, str(c)) for c in range(c0, cols.max() + 1)], []])
        left.setTicks([[(r, str(r)) for r in range(r0, rows.max() + 1)], []])
        self.plot.getViewBox().invertY(True)
        self.plot.setXRange(c0 - 0.5, cols.max() + 0.5, padding=0.01)
        self.plot.setYRange(r0 - 0.5, rows.max() + 0.5, padding=0.02)
        self._labels("column", "row")

    def _cell_label(self, row: int, column: int, value: float, levels: tuple, sequential: bool,
                    decimals: int) -> None:
        """The number in a cell, white on the dark end(s) of the colour scale."""
        dark = False
        if np.isfinite(value):
            share = (value - levels[0]) / (levels[1] - levels[0])
            dark = share > 0.55 if sequential else abs(share - 0.5) > 0.3
        text = _fixed(value, decimals) if np.isfinite(value) else "missing"
        label = pg.TextItem(text, color=PAPER if dark else TEXT, anchor=(0.5, 0.5))
        if not np.isfinite(value):
            label.setFont(SMALL_FONT)
        label.setPos(column, row)
        self.plot.addItem(label)

    def _colour_bar(self, image: pg.ImageItem, colours: pg.ColorMap, levels: tuple, label: str):
        """The colour bar beside the map: made once, then given each new image."""
        if self.colour_bar is None:
            self.colour_bar = pg.ColorBarItem(values=levels, colorMap=colours, interactive=False)
            self.colour_bar.setImageItem(image, insert_in=self.plot)
            self.colour_bar.axis.setTextPen(TEXT)
            self.colour_bar.axis.setTickFont(TICK_FONT)
        else:
            self.colour_bar.setImageItem(image)
            self.colour_bar.setColorMap(colours)
            self.colour_bar.setLevels(levels)
        self.colour_bar.axis.setLabel(label, color=TEXT.name())

    def _on_scene_clicked(self, event) -> None:
        if self.stack.currentWidget() is not self.plot_widget or not self._cells:
            return
        point = self.plot.getViewBox().mapSceneToView(event.scenePos())
        self._on_cell_clicked(point)

    def _on_cell_clicked(self, point: QPointF) -> None:
        """A click at field coordinates ``point`` (column across, row down)."""
        plot = self._cells.get((round(point.y()), round(point.x())))
        if plot is not None:
            self.plot_clicked.emit(plot)
