"""The results of the last analysis: one trait at a time, plus the all-traits sheet.

Every table is a :class:`FrameModel` over a result's ``to_frame()`` view: the raw number under
``Qt.UserRole`` (used for sorting), the number rounded to the trait's decimals (one more for
means) under ``DisplayRole``. When the data change after the analysis, a banner says the results
are out of date and the tables turn grey until the analysis is run again.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
import pandas as pd
from PySide6.QtCore import (
    QAbstractTableModel,
    QModelIndex,
    QPersistentModelIndex,
    QSortFilterProxyModel,
    Qt,
    QTimer,
    Signal,
)
from PySide6.QtGui import QColor, QFont, QFontMetrics
from PySide6.QtWidgets import (
    QAbstractItemView,
    QCheckBox,
    QComboBox,
    QHBoxLayout,
    QLabel,
    QStackedWidget,
    QTableView,
    QTabWidget,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core.errors import TrialInputError
from trialdesk.core.planning import mean_limits, residual_table
from trialdesk.core.results import Comparison, TraitResult, TrialAnalysis
from trialdesk.core.separation import METHOD_NAMES
from trialdesk.core.summary_text import family_sentence
from trialdesk.desktop.analysis_runner import QUICK_PLOTS, Background
from trialdesk.desktop.charts import (
    ChartPanel,
    FieldMapChart,
    NormalQuantileChart,
    RankedMeansChart,
    ResidualChart,
)
from trialdesk.desktop.palette import (
    ABOVE,
    ABOVE_MARK,
    ACCENT,
    BELOW,
    BELOW_MARK,
    CHECK_BG,
    STALE_FG,
    WARNING_BG,
)
from trialdesk.desktop.session import TrialSession

RIGHT = Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter
LEFT = Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter
CENTRE = Qt.AlignmentFlag.AlignCenter
AnyIndex = QModelIndex | QPersistentModelIndex


def _missing(value: Any) -> bool:
    return value is None or (isinstance(value, float) and np.isnan(value))


def fixed(decimals: int) -> Callable[[Any], str]:
    """Formatter of numbers with ``decimals`` places ("" for a missing number)."""
    return lambda v: "" if _missing(v) else f"{v:.{decimals}f}"


def p_value(value: Any) -> str:
    """A p-value as read in trial reports: four places, "<0.0001" below that."""
    if _missing(value):
        return ""
    return "<0.0001" if value < 0.0001 else f"{value:.4f}"


def plain(value: Any) -> str:
    return "" if _missing(value) else str(value)


def marks(sign: str) -> Callable[[Any], str]:
    """Formatter of a tuple of check names after ABOVE_MARK or BELOW_MARK."""
    return lambda checks: f"{sign} {', '.join(checks)}" if checks else ""


@dataclass(frozen=True, slots=True)
class Column:
    """One column of a :class:`FrameModel`: the frame field it shows, its header and formats."""

    key: str
    title: str
    show: Callable[[Any], str] = plain
    align: Qt.AlignmentFlag = RIGHT
    tip: str = ""
    colour: QColor | None = None  # text colour of non-empty cells
    text_key: str | None = None  # a frame field holding the prepared text, instead of ``show``


class FrameModel(QAbstractTableModel):
    """A read-only table over a DataFrame: one row per frame row, columns as specified.

    ``UserRole`` gives the raw value of the frame (tuples joined into text so they sort),
    ``DisplayRole`` the formatted text, ``BackgroundRole`` the tint of check rows (rows whose
    ``tint`` entry is true), ``ForegroundRole`` grey when the results are out of date.
    """

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.frame = pd.DataFrame()
        self.columns: list[Column] = []
        self._cells: dict[str, list] = {}
        self.tint: list[bool] = []
        self.bold: list[bool] = []
        self.stale = False

    def set_frame(self, frame: pd.DataFrame, columns: Sequence[Column],
                  tint: Sequence[bool] | None = None, bold: Sequence[bool] | None = None) -> None:
        """Show ``frame`` through ``columns``; ``tint`` marks check rows, ``bold`` footer rows."""
        self.beginResetModel()
        self.frame = frame.reset_index(drop=True)
        self.columns = list(columns)
        # Plain lists for the views' many look-ups (a DataFrame cell look-up is slow).
        keys = {c.key for c in self.columns} | {c.text_key for c in self.columns if c.text_key}
        self._cells = {key: self.frame[key].tolist() for key in keys}
        self.tint = list(tint) if tint is not None else [False] * len(frame)
        self.bold = list(bold) if bold is not None else [False] * len(frame)
        self.endResetModel()

    def set_stale(self, stale: bool) -> None:
        """Grey the text when the results no longer match the data."""
        if stale != self.stale:
            self.stale = stale
            if self.rowCount() and self.columnCount():
                self.dataChanged.emit(self.index(0, 0),
                                      self.index(self.rowCount() - 1, self.columnCount() - 1),
                                      [Qt.ItemDataRole.ForegroundRole])

    def rowCount(self, parent: AnyIndex = QModelIndex()) -> int:  # noqa: B008, N802
        return 0 if parent.isValid() else len(self.frame)

    def columnCount(self, parent: AnyIndex = QModelIndex()) -> int:  # noqa: B008, N802
        return 0 if parent.isValid() else len(self.columns)

    def raw(self, row: int, column: int) -> Any:
        """The value of the frame behind a cell."""
        return self._cells[self.columns[column].key][row]

    def data(self, index: AnyIndex, role: int = Qt.ItemDataRole.DisplayRole) -> Any:
        if not index.isValid():
            return None
        column = self.columns[index.column()]
        value = self.raw(index.row(), index.column())
        if role == Qt.ItemDataRole.DisplayRole:
            if column.text_key is not None:
                return self._cells[column.text_key][index.row()]
            return column.show(value)
        if role == Qt.ItemDataRole.UserRole:
            if isinstance(value, tuple):
                return ", ".join(value)
            return None if _missing(value) else value
        if role == Qt.ItemDataRole.TextAlignmentRole:
            return column.align
        if role == Qt.ItemDataRole.ToolTipRole:
            return column.tip or None
        if role == Qt.ItemDataRole.BackgroundRole:
            return CHECK_BG if self.tint[index.row()] else None
        if role == Qt.ItemDataRole.ForegroundRole:
            if self.stale:
                return STALE_FG
            return column.colour if column.colour is not None and value else None
        if role == Qt.ItemDataRole.FontRole and self.bold[index.row()]:
            font = QFont()
            font.setBold(True)
            return font
        return None

    def headerData(self, section: int, orientation: Qt.Orientation,  # noqa: N802
                   role: int = Qt.ItemDataRole.DisplayRole) -> Any:
        if orientation != Qt.Orientation.Horizontal or section >= len(self.columns):
            return None
        if role == Qt.ItemDataRole.DisplayRole:
            return self.columns[section].title
        if role == Qt.ItemDataRole.ToolTipRole:
            return self.columns[section].tip or None
        return None


class SignificantFilter(QSortFilterProxyModel):
    """Sorts by raw value; with ``significant_only`` keeps the pairs declared different."""

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.significant_only = False
        self.setSortRole(Qt.ItemDataRole.UserRole)

    @property
    def significant_column(self) -> int:
        return [c.key for c in self.sourceModel().columns].index("significant")

    def set_significant_only(self, on: bool) -> None:
        self.beginFilterChange()
        self.significant_only = on
        self.endFilterChange(QSortFilterProxyModel.Direction.Rows)

    def filterAcceptsRow(self, row: int, parent: AnyIndex) -> bool:  # noqa: N802
        if not self.significant_only:
            return True
        return bool(self.sourceModel().raw(row, self.significant_column))


def _table(model, sortable: bool = True) -> QTableView:
    view = QTableView()
    if sortable:
        proxy = model if isinstance(model, QSortFilterProxyModel) else _sorter(model)
        view.setModel(proxy)
        view.setSortingEnabled(True)
        view.sortByColumn(-1, Qt.SortOrder.AscendingOrder)  # keep the ranked order at first
    else:
        view.setModel(model)
    view.verticalHeader().hide()
    view.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
    view.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
    view.setWordWrap(False)
    view.horizontalHeader().setDefaultAlignment(CENTRE)
    view.verticalHeader().setDefaultSectionSize(view.fontMetrics().height() + 8)
    return view


def _sorter(model: FrameModel) -> QSortFilterProxyModel:
    proxy = QSortFilterProxyModel(model)
    proxy.setSourceModel(model)
    proxy.setSortRole(Qt.ItemDataRole.UserRole)
    return proxy


def _fit_columns(view: QTableView, rows_shown: bool = False) -> None:
    """Columns as wide as their text; with ``rows_shown``, the table as tall as its rows.

    The widths are measured here from the model's own text (the first 60 rows, in the bold font
    where a row is bold), not by ``resizeColumnsToContents``: that asks every cell for every role
    and paused the window for a tenth of a second on a pairs table.
    """
    header = view.horizontalHeader()
    model = view.model()
    source = model.sourceModel() if isinstance(model, QSortFilterProxyModel) else model
    plain_metrics = view.fontMetrics()
    bold_font = QFont(view.font())
    bold_font.setBold(True)
    bold_metrics = QFontMetrics(bold_font)
    header_metrics = header.fontMetrics()
    rows = range(min(source.rowCount(), 60))
    for section in range(source.columnCount()):
        title = str(source.headerData(section, Qt.Orientation.Horizontal) or "")
        width = max((header_metrics.horizontalAdvance(line) for line in title.split("\n")),
                    default=0) + 12  # room for the sort arrow
        for row in rows:
            text = source.data(source.index(row, section)) or ""
            metrics = bold_metrics if source.bold[row] else plain_metrics
            width = max(width, metrics.horizontalAdvance(str(text)))
        header.resizeSection(section, width + 16)
    if rows_shown:
        rows = view.model().rowCount()
        height = (header.height() if header.height() > 0 else header.sizeHint().height())
        height += rows * view.verticalHeader().defaultSectionSize() + 2 * view.frameWidth()
        view.setFixedHeight(height + 2)


def with_trend(plots: pd.DataFrame, result: TraitResult) -> pd.DataFrame:
    """The residual table with the fitted field trend of a field-trend adjustment (``trend``,
    NaN where the analysis fitted none) for the field map."""
    trend = {t.plot: t.trend for t in result.field_trend}
    return plots.assign(trend=[trend.get(str(p), np.nan) for p in plots["plot"]])


class ResultsView(QWidget):
    """The results of the session's last analysis.

    Signals
    -------
    plot_clicked(str plot, str trait) : a plot's point was clicked in a chart.
    """

    plot_clicked = Signal(str, str)

    def __init__(self, session: TrialSession, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.laid_out = True  # every table shows the current results (see _show_trait)
        self.session = session
        self._book = None  # the field book as analysed (taken when results arrive)
        self._residuals: dict[str, pd.DataFrame] = {}
        self._charts_for: str | None = None  # the trait whose charts are drawn
        self.background = Background(self)
        self._build()
        self.tabs.currentChanged.connect(lambda _: self._draw_charts())
        session.results_changed.connect(self._results_changed)
        session.opened.connect(self._results_changed)
        session.structure_changed.connect(self._show_trait)
        self._results_changed()

    # --- building -----------------------------------------------------------------------------

    def _build(self) -> None:
        self.banner = QLabel("The results are out of date: the data changed after this "
                             "analysis. Run the analysis again.")
        self.banner.setStyleSheet(f"background: {WARNING_BG.name()}; padding: 6px;"
                                  "font-weight: bold;")
        self.banner.setWordWrap(True)
        self.empty = QLabel("No results yet. Choose the traits and the method in the set-up, "
                            "then run the analysis.")
        self.empty.setAlignment(Qt.AlignmentFlag.AlignCenter)

        self.trait_box = QComboBox()
        self.trait_box.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToContents)
        self.trait_box.currentIndexChanged.connect(self._show_trait)
        self.headline = QLabel()
        self.headline.setTextFormat(Qt.TextFormat.RichText)
        self.headline.setWordWrap(True)
        self.headline.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.family = QLabel()
        self.family.setWordWrap(True)
        chooser = QHBoxLayout()
        chooser.addWidget(QLabel("Trait:"))
        chooser.addWidget(self.trait_box)
        chooser.addStretch(1)

        self.entry_model = FrameModel(self)
        self.entry_proxy = _sorter(self.entry_model)
        self.entry_table = _table(self.entry_proxy)
        self.letters_note = QLabel()
        self.letters_note.setWordWrap(True)
        self.anova_model = FrameModel(self)
        self.anova_table = _table(self.anova_model, sortable=False)
        self.pair_model = FrameModel(self)
        self.pair_proxy = SignificantFilter(self)
        self.pair_proxy.setSourceModel(self.pair_model)
        self.pair_table = _table(self.pair_proxy)
        self.significant_only = QCheckBox("Significant pairs only")
        self.significant_only.toggled.connect(self._filter_pairs)
        self.pair_count = QLabel()
        self.fit_words = QLabel()
        self.fit_words.setWordWrap(True)
        self.flagged_model = FrameModel(self)
        self.flagged_table = _table(self.flagged_model, sortable=False)
        self.tests_model = FrameModel(self)
        self.tests_table = _table(self.tests_model, sortable=False)
        self.trait_notes = QLabel()
        self.trait_notes.setWordWrap(True)
        self.summary_model = FrameModel(self)
        self.summary_table = _table(self.summary_model, sortable=False)
        self.summary_notes = QLabel()
        self.summary_notes.setWordWrap(True)

        self.means_chart = RankedMeansChart()
        self.residual_chart = ResidualChart()
        self.quantile_chart = NormalQuantileChart()
        self.field_chart = FieldMapChart()
        self.charts = QTabWidget()
        for chart, title in ((self.means_chart, "Means"), (self.residual_chart, "Residuals"),
                             (self.quantile_chart, "Normal plot"),
                             (self.field_chart, "Field map")):
            self.charts.addTab(chart, title)
            chart.plot_clicked.connect(self._chart_clicked)

        self.tabs = QTabWidget()
        self.tabs.addTab(_page(self.entry_table, self.letters_note), "Entries")
        self.tabs.addTab(_page(self.anova_table, fill=False), "Analysis of variance")
        pair_bar = QHBoxLayout()
        pair_bar.addWidget(self.significant_only)
        pair_bar.addWidget(self.pair_count, 1)
        self.tabs.addTab(_page(pair_bar, self.pair_table), "Pairs")
        self.tabs.addTab(_page(self.fit_words, self.flagged_table,
                               _heading("What the checks of the model say"), self.tests_table,
                               self.trait_notes, fill=False), "Checks of the fit")
        self.tabs.addTab(self.charts, "Charts")
        self.tabs.addTab(_page(self.summary_table, self.summary_notes), "All traits")

        shown = QWidget()
        layout = QVBoxLayout(shown)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addLayout(chooser)
        layout.addWidget(self.headline)
        layout.addWidget(self.family)
        layout.addWidget(self.tabs, 1)
        self.pages = QStackedWidget()
        self.pages.addWidget(self.empty)
        self.pages.addWidget(shown)
        outer = QVBoxLayout(self)
        outer.addWidget(self.banner)
        outer.addWidget(self.pages, 1)

    # --- state --------------------------------------------------------------------------------

    @property
    def results(self) -> TrialAnalysis | None:
        return self.session.results

    def is_stale(self) -> bool:
        """Whether the results shown no longer match the trial's data."""
        results = self.results
        if results is None:
            return False
        return self.session.results_stale or (self._book is not None
                                              and self._book.sha256 != results.sha256)

    def current_trait(self) -> str | None:
        """The trait shown."""
        return self.trait_box.currentData()

    def set_trait(self, trait: str) -> None:
        """Show ``trait``."""
        self.trait_box.setCurrentIndex(self.trait_box.findData(trait))

    def save_chart(self, path) -> None:
        """Save the chart chosen in the Charts tab (PNG, or SVG for a .svg path)."""
        self._draw_charts(now=True)
        chart = self.charts.currentWidget()
        assert isinstance(chart, ChartPanel)
        chart.save_chart(path)

    def _results_changed(self) -> None:
        results = self.results
        if results is None:
            self.banner.hide()
            self.pages.setCurrentWidget(self.empty)
            self._book, self._residuals = None, {}
            return
        if not self.session.results_stale or self._book is None:
            # Fresh results: keep the data they came from, for the residuals and charts.
            self._book, self._residuals = self.session.fieldbook(), {}
            self.background.forget("residuals")
        self.pages.setCurrentWidget(self.pages.widget(1))
        wanted = self.current_trait()
        names = [t.trait for t in results.traits]
        self.trait_box.blockSignals(True)
        self.trait_box.clear()
        for name in names:
            self.trait_box.addItem(name, name)
        self.trait_box.setCurrentIndex(names.index(wanted) if wanted in names else 0)
        self.trait_box.blockSignals(False)
        # As wide as the longest name: the style's own size hint cuts names short offscreen.
        widest = max((self.trait_box.fontMetrics().horizontalAdvance(n) for n in names), default=0)
        self.trait_box.setMinimumWidth(widest + 3 * self.trait_box.fontMetrics().height())
        self._show_trait()

    def _trait_info(self, result: TraitResult) -> tuple[str, int]:
        """Unit and decimals of a trait, from the trial's traits table where it has them."""
        traits = self.session.traits
        unit, decimals = "", result.decimals
        if not traits.empty and result.trait in set(traits["name"]):
            row = traits.set_index("name").loc[result.trait]
            unit = "" if pd.isna(row["unit"]) else str(row["unit"])
            decimals = result.decimals if pd.isna(row["decimals"]) else int(row["decimals"])
        return unit, decimals

    def _residual_table(self, result: TraitResult) -> pd.DataFrame:
        if result.trait not in self._residuals:
            self._residuals[result.trait] = with_trend(
                residual_table(self._book, result.trait, result.design), result)
        return self._residuals[result.trait]

    # --- showing ------------------------------------------------------------------------------

    def _show_trait(self) -> None:
        results, trait = self.results, self.current_trait()
        if results is None or trait is None:
            return
        stale = self.is_stale()
        self.banner.setVisible(stale)
        result = results.trait(trait)
        unit, decimals = self._trait_info(result)
        self._show_headline(result, unit, decimals)
        self._show_entries(result, decimals)
        self.entry_model.set_stale(stale)
        # The other tables follow one per turn of the event loop, so the window keeps answering
        # while a large result is laid out; ``laid_out`` is True once all are in place. The
        # timers are bound to this view, so none fires after it is gone.
        self.laid_out = False
        self._generation = getattr(self, "_generation", 0) + 1
        generation = self._generation
        steps = [lambda: self._show_anova(result, decimals),
                 lambda: self._show_pairs(result, decimals),
                 lambda: self._show_fit(result, decimals),
                 lambda: self._show_summary(results),
                 lambda: self._finish_trait(stale)]

        def next_step() -> None:
            if generation != self._generation:
                return
            steps.pop(0)()
            if steps:
                QTimer.singleShot(0, self, next_step)

        QTimer.singleShot(0, self, next_step)

    def _finish_trait(self, stale: bool) -> None:
        for model in (self.anova_model, self.pair_model, self.flagged_model, self.tests_model,
                      self.summary_model):
            model.set_stale(stale)
        self._charts_for = None
        self._draw_charts()
        self.laid_out = True

    def _show_headline(self, result: TraitResult, unit: str, decimals: int) -> None:
        d = decimals + 1
        direction = "higher is better" if result.higher_is_better else "lower is better"
        missing = f", {result.n_missing} missing" if result.n_missing else ""
        unit_text = f" {unit}" if unit else ""
        lsd = (f"LSD({result.alpha:g}) {result.lsd:.{d}f}" if math.isfinite(result.lsd)
               else "entries ranked as random (BLUPs), no LSD")
        extra = ""
        if result.efficiency_vs_rcbd is not None:
            extra += (f" &nbsp;·&nbsp; efficiency vs complete blocks "
                      f"{result.efficiency_vs_rcbd:.0f}%")
        if result.heritability is not None:
            extra += f" &nbsp;·&nbsp; heritability {result.heritability:.2f}"
        chosen = [o for o in result.spatial_options if o.chosen and o.method != "none"]
        if chosen:
            extra += (f" &nbsp;·&nbsp; field trend ({chosen[0].method}): error "
                      f"{chosen[0].percent_of_plain:.0f}% of the plain analysis")
        self.headline.setText(
            f"<b>{result.trait}</b>{f' ({unit})' if unit else ''}, {direction}: "
            f"{result.n_plots} plots{missing}.&nbsp;&nbsp; Grand mean "
            f"<b>{result.grand_mean:.{d}f}</b>{unit_text} &nbsp;·&nbsp; CV "
            f"<b>{result.cv_percent:.1f}%</b> &nbsp;·&nbsp; SEm {result.sem:.{d}f} &nbsp;·&nbsp; "
            f"SED {result.sed:.{d}f} &nbsp;·&nbsp; {lsd} "
            f"&nbsp;·&nbsp; residual df {result.residual_df} &nbsp;·&nbsp; "
            f"{METHOD_NAMES[result.method]}, alpha {result.alpha:g}{extra}")
        self.family.setText(family_sentence(result))

    def _show_entries(self, result: TraitResult, decimals: int) -> None:
        frame = result.to_frame()
        d = decimals + 1
        has_checks = bool(frame["is_check"].any())
        columns = [Column("rank", "Rank"), Column("entry", "Entry", align=LEFT),
                   Column("mean", "Mean", fixed(d)), Column("se", "SE", fixed(d)),
                   Column("n", "Plots", tip="plots with a value")]
        if result.method != "dunnett":
            columns.append(Column("letters", "Letters", align=LEFT,
                                  tip="entries sharing a letter were not declared different"))
        if has_checks:
            # Green for better than the check, red for worse: for a lower-is-better trait
            # (days to heading) being above the check is the worse side.
            up, down = (ABOVE, BELOW) if result.higher_is_better else (BELOW, ABOVE)
            columns += [
                Column("percent_of_check", "% of checks", fixed(1),
                       tip="the mean as a percentage of the mean of the checks"),
                Column("above_checks", "Above", marks(ABOVE_MARK), LEFT,
                       "checks this entry is significantly above", up),
                Column("below_checks", "Below", marks(BELOW_MARK), LEFT,
                       "checks this entry is significantly below", down),
            ]
        self.entry_model.set_frame(frame, columns, tint=frame["is_check"].tolist())
        self.entry_proxy.sort(-1)
        _fit_columns(self.entry_table)
        notes = []
        if result.method != "dunnett":
            notes.append("Entries sharing a letter were not declared different by the method.")
        if has_checks:
            notes.append(f"Check rows are shaded. {ABOVE_MARK} / {BELOW_MARK}: significantly "
                         "above / below the named checks, in green where that is better and "
                         "red where it is worse.")
        self.letters_note.setText(" ".join(notes))

    def _show_anova(self, result: TraitResult, decimals: int) -> None:
        squares = min(2 * decimals + 2, 4)
        columns = [Column("source", "Source", align=LEFT), Column("df", "df"),
                   Column("ss", "Sum of squares", fixed(squares)),
                   Column("ms", "Mean square", fixed(squares)), Column("f", "F", fixed(2)),
                   Column("p", "p", p_value)]
        self.anova_model.set_frame(result.anova_frame(), columns)
        _fit_columns(self.anova_table, rows_shown=True)

    def _show_pairs(self, result: TraitResult, decimals: int) -> None:
        d = decimals + 1
        frame = _fields_frame(result.comparisons, Comparison)
        dunnett = result.method == "dunnett"
        columns = [Column("entry_a", "Entry", align=LEFT),
                   Column("entry_b", "Check" if dunnett else "Against", align=LEFT),
                   Column("difference", "Difference", fixed(d), tip="first minus second"),
                   Column("se", "SE", fixed(d)),
                   Column("p_adjusted", "p (adjusted)", p_value,
                          tip="p-value adjusted by the method for the number of comparisons"),
                   Column("lower", "Lower limit", fixed(d)),
                   Column("upper", "Upper limit", fixed(d)),
                   Column("significant", "Different", lambda v: "yes" if v else "", CENTRE,
                          colour=ACCENT)]
        self.pair_model.set_frame(frame, columns)
        self.pair_proxy.sort(-1)
        _fit_columns(self.pair_table)
        self._filter_pairs()

    def _filter_pairs(self) -> None:
        self.pair_proxy.set_significant_only(self.significant_only.isChecked())
        frame = self.pair_model.frame
        total = len(frame)
        different = int(frame["significant"].sum()) if total else 0
        what = "comparisons with the checks" if self.results and self.current_trait() and \
            self.results.trait(self.current_trait()).method == "dunnett" else "pairs"
        self.pair_count.setText(f"{different} of {total} {what} declared different.")

    def _show_fit(self, result: TraitResult, decimals: int) -> None:
        diagnostics = result.diagnostics
        flagged = diagnostics.to_frame()
        limit = diagnostics.flag_limit
        if flagged.empty:
            words = (f"No plot stands out: every studentized residual lies within ±{limit:g}.")
        else:
            one = len(flagged) == 1
            words = (f"{len(flagged)} {'plot stands' if one else 'plots stand'} out from the "
                     f"rest (studentized residual beyond ±{limit:g}). Check "
                     f"{'it' if one else 'them'} in the field book (a keying slip, a damaged "
                     "plot) before trusting the means.")
        self.fit_words.setText(words)
        d = decimals + 1
        self.flagged_model.set_frame(flagged, [
            Column("plot", "Plot", align=LEFT), Column("entry", "Entry", align=LEFT),
            Column("block", "Block", align=LEFT), Column("value", "Value", fixed(decimals)),
            Column("fitted", "Fitted", fixed(d)), Column("residual", "Residual", fixed(d)),
            Column("studentized_residual", "Studentized residual", fixed(2))])
        self.flagged_table.setVisible(not flagged.empty)
        _fit_columns(self.flagged_table, rows_shown=True)
        self.tests_model.set_frame(diagnostics.tests_frame(), [
            Column("name", "Check", align=LEFT), Column("reading", "Reading", align=LEFT),
            Column("statistic", "Statistic", fixed(3)), Column("df", "df", align=CENTRE),
            Column("p", "p", p_value)])
        _fit_columns(self.tests_table, rows_shown=True)
        self.trait_notes.setText("\n".join(f"Note: {w}" for w in result.warnings))

    def _show_summary(self, results: TrialAnalysis) -> None:
        frame = results.to_frame()
        entries = list(frame.index)
        table = pd.DataFrame({"entry": entries + ["Grand mean", "CV%",
                                               f"LSD ({results.settings.alpha:g})"]})
        columns = [Column("entry", "Entry", align=LEFT)]
        for result in results.traits:
            unit, decimals = self._trait_info(result)
            d = decimals + 1
            by_entry = {e.entry: e for e in result.entries}
            cells = []
            for code in entries:
                e = by_entry[code]
                tag = e.letters or (ABOVE_MARK if e.above_checks else "") + (
                    BELOW_MARK if e.below_checks else "")
                cells.append((e.mean, f"{e.mean:.{d}f} {tag}".rstrip()))
            cells += [(result.grand_mean, f"{result.grand_mean:.{d}f}"),
                      (result.cv_percent, f"{result.cv_percent:.1f}"),
                      (result.lsd, f"{result.lsd:.{d}f}" if math.isfinite(result.lsd) else "")]
            key = f"trait:{result.trait}"
            table[key] = [value for value, _ in cells]
            table[f"{key}:text"] = [text for _, text in cells]
            direction = "" if result.higher_is_better else ", lower is better"
            title = f"{result.trait}\n({unit}{direction})" if unit else result.trait
            columns.append(Column(key, title, align=LEFT, text_key=f"{key}:text"))
        n = len(entries)
        self.summary_model.set_frame(table, columns, tint=frame["check"].tolist() + [False] * 3,
                                     bold=[False] * n + [True] * 3)
        _fit_columns(self.summary_table)
        alpha = results.settings.alpha
        method = METHOD_NAMES[results.settings.method]
        lines = [f"Each cell: entry mean and its grouping letters ({method}, alpha {alpha:g}); "
                 f"entries in the rank order of {results.traits[0].trait}. "
                 f"LSD is the unadjusted least significant difference at {alpha:g}."]
        lines += [f"Note: {n}" for n in results.notes]
        lines += [f"Warning: {w}" for w in results.warnings]
        self.summary_notes.setText("\n".join(lines))

    def _draw_charts(self, now: bool = False) -> None:
        """Draw the charts of the trait shown, once, when the Charts tab is on show (or ``now``).

        The residuals come from a least-squares fit: on this thread for a small trial, in the
        background for a large one.
        """
        trait = self.current_trait()
        if trait is None or self._charts_for == trait or self.results is None:
            return
        if not now and self.tabs.currentWidget() is not self.charts:
            return
        result = self.results.trait(trait)
        if trait in self._residuals or now or len(self._book.plots) <= QUICK_PLOTS:
            try:
                plots = self._residual_table(result)
            except TrialInputError as error:
                plots = error
            self._show_charts(result, plots)
            return
        for chart in self._chart_list():
            chart.clear("Drawing the charts…")
        book = self._book

        def arrived(plots) -> None:
            if not isinstance(plots, TrialInputError):
                self._residuals[trait] = plots
            if self.current_trait() == trait:
                self._show_charts(result, plots)

        self.background.submit(
            "residuals",
            lambda: with_trend(residual_table(book, trait, result.design), result), arrived)

    def _chart_list(self) -> list[ChartPanel]:
        return [self.means_chart, self.residual_chart, self.quantile_chart, self.field_chart]

    def _show_charts(self, result: TraitResult, plots: pd.DataFrame | TrialInputError) -> None:
        self._charts_for = result.trait
        if isinstance(plots, TrialInputError):  # the data as analysed cannot be fitted again
            for chart in self._chart_list():
                chart.clear(f"The charts cannot be drawn: {plots}")
            return
        unit, decimals = self._trait_info(result)
        self.means_chart.show_trait(result, mean_limits(result), plots, unit, decimals)
        self.residual_chart.show_trait(result, plots, unit)
        self.quantile_chart.show_trait(result, plots)
        checks = tuple(e.entry for e in result.entries if e.is_check)
        self.field_chart.show_trait(result, plots, checks, unit, decimals)

    def _chart_clicked(self, plot: str) -> None:
        trait = self.current_trait()
        if trait is not None:
            self.plot_clicked.emit(plot, trait)


def _fields_frame(rows: Sequence, cls: type) -> pd.DataFrame:
    """The frame ``to_frame()`` would give, built column by column: the same columns and values
    without a deep copy of every row (a trial of 150 entries has 11,175 pairs)."""
    names = [f.name for f in fields(cls)]
    return pd.DataFrame({name: [getattr(r, name) for r in rows] for name in names},
                        columns=names)


def _heading(text: str) -> QLabel:
    label = QLabel(text)
    font = label.font()
    font.setBold(True)
    label.setFont(font)
    return label


def _page(*parts, fill: bool = True) -> QWidget:
    """A tab page of labels, bars and tables, top to bottom; with ``fill`` the tables share
    the height, otherwise they keep their own and the space is left below."""
    page = QWidget()
    layout = QVBoxLayout(page)
    for part in parts:
        if isinstance(part, QHBoxLayout):
            layout.addLayout(part)
        else:
            layout.addWidget(part, 1 if fill and isinstance(part, QTableView) else 0)
    if not fill:
        layout.addStretch(1)
    return page

