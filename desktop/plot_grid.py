"""The plot-data grid: where values are typed, pasted, found and filtered.

:class:`PlotGrid` shows a :class:`~trialdesk.desktop.plot_model.PlotTableModel` through a sorting
and filtering proxy. It behaves like a field sheet on a screen: typing on a cell replaces its value,
Enter writes it and goes down, Tab goes right and Shift+Tab left; a block copied from a spreadsheet
is pasted from the current cell as one edit (one undo), or not at all when any cell is refused.
"""

from __future__ import annotations

from PySide6.QtCore import (
    QEvent,
    QItemSelection,
    QItemSelectionModel,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    QSortFilterProxyModel,
    Qt,
    Signal,
)
from PySide6.QtGui import QKeyEvent, QKeySequence
from PySide6.QtWidgets import (
    QAbstractItemDelegate,
    QAbstractItemView,
    QApplication,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QPushButton,
    QStyledItemDelegate,
    QStyleOptionViewItem,
    QTableView,
    QToolTip,
    QVBoxLayout,
    QWidget,
)

from trialdesk.desktop.plot_model import LABELS, PlotTableModel
from trialdesk.desktop.session import TrialSession

__all__ = ["PlotFilter", "PlotGrid"]

_PLOT, _BLOCK, _ENTRY = (LABELS.index(name) for name in ("plot", "block", "entry"))
_SIZE_ROWS = 200  # rows read to size the columns to their contents (common practice for speed)
_STEPS = {Qt.Key.Key_Return: (1, 0), Qt.Key.Key_Enter: (1, 0), Qt.Key.Key_Tab: (0, 1),
          Qt.Key.Key_Backtab: (0, -1)}
_Select = QItemSelectionModel.SelectionFlag


class PlotFilter(QSortFilterProxyModel):
    """Shows only the plots of one block and/or one entry (None: all).

    Sorting is handed to the :class:`PlotTableModel` underneath, which orders many thousand plots
    at once with numpy; comparing them two by two here would call Python for every comparison.
    """

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._block: str | None = None
        self._entry: str | None = None

    def sort(self, column: int, order: Qt.SortOrder = Qt.SortOrder.AscendingOrder) -> None:
        self.sourceModel().sort(column, order)

    @property
    def block(self) -> str | None:
        """The block shown, None for all."""
        return self._block

    @property
    def entry(self) -> str | None:
        """The entry shown, None for all."""
        return self._entry

    def set_filters(self, block: str | None, entry: str | None) -> None:
        """Show only the plots of ``block`` and of ``entry`` (None: no filter on it)."""
        if (block, entry) == (self._block, self._entry):
            return
        self.beginFilterChange()
        self._block, self._entry = block, entry
        self.endFilterChange(QSortFilterProxyModel.Direction.Rows)

    def filterAcceptsRow(self, source_row: int, source_parent: QModelIndex) -> bool:
        model = self.sourceModel()
        if self._block is not None and model.block_of_row(source_row) != self._block:
            return False
        return self._entry is None or model.entry_of_row(source_row) == self._entry


class _CellDelegate(QStyledItemDelegate):
    """The cell editor: Enter, Tab and Shift+Tab write and move, unless the text is refused."""

    moved = Signal(int, int)

    def __init__(self, grid: PlotGrid) -> None:
        super().__init__(grid)
        self._grid = grid
        self._index = QPersistentModelIndex()

    def createEditor(self, parent: QWidget, option: QStyleOptionViewItem,
                     index: QModelIndex) -> QWidget:
        editor = super().createEditor(parent, option, index)
        if isinstance(editor, QLineEdit):
            editor.setAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        self._index = QPersistentModelIndex(index)
        return editor

    def eventFilter(self, editor: QObject, event: QEvent) -> bool:
        if event.type() == QEvent.Type.KeyPress and isinstance(editor, QLineEdit):
            step = _STEPS.get(event.key())
            if step is not None:
                message = self._grid._refusal(self._index, editor.text())
                if message is not None:
                    self._grid._show_message(message, self._index)
                    return True  # the editor stays open with the text as typed
                self.commitData.emit(editor)
                self.closeEditor.emit(editor, QAbstractItemDelegate.EndEditHint.NoHint)
                self.moved.emit(*step)
                return True
        return super().eventFilter(editor, event)


class _GridView(QTableView):
    """The table: copy, paste, find, Enter to go down and Esc to drop a refused text.

    The keys are read here, not as shortcuts, so that a window's own Copy, Paste and Find
    actions (which call the grid) never clash with them.
    """

    def __init__(self, grid: PlotGrid) -> None:
        super().__init__(grid)
        self._grid = grid

    def keyPressEvent(self, event: QKeyEvent) -> None:
        if event.matches(QKeySequence.StandardKey.Copy):
            self._grid.copy_selection()
            return
        if event.matches(QKeySequence.StandardKey.Paste):
            self._grid.paste()
            return
        if event.matches(QKeySequence.StandardKey.Find):
            self._grid.focus_find()
            return
        if self.state() != QAbstractItemView.State.EditingState:
            plain = event.modifiers() in (Qt.KeyboardModifier.NoModifier,
                                          Qt.KeyboardModifier.KeypadModifier)
            if event.key() in (Qt.Key.Key_Return, Qt.Key.Key_Enter) and plain:
                self._grid._move(1, 0)
                return
            if event.key() == Qt.Key.Key_Escape and self._grid._discard_draft():
                return
            if event.key() in (Qt.Key.Key_Delete, Qt.Key.Key_Backspace) and plain:
                self._grid.clear_selection()
                return
        super().keyPressEvent(event)


class PlotGrid(QWidget):
    """The plot data of the open trial, for typing, pasting, finding and filtering.

    Attributes
    ----------
    model : PlotTableModel
        The plots and values.
    proxy : PlotFilter
        Sorting and the block and entry filters, between the model and the view.
    view : QTableView
        The table itself.

    Signals
    -------
    status_message(str) : something to tell the user (a refused text, a paste, a find).
    """

    status_message = Signal(str)

    def __init__(self, session: TrialSession, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self._last_find = ""
        self.model = PlotTableModel(session, self)
        self.proxy = PlotFilter(self)
        self.proxy.setSourceModel(self.model)
        self.proxy.setDynamicSortFilter(False)  # rows stay where they are while values are typed

        self.view = _GridView(self)
        self.view.setModel(self.proxy)
        self._delegate = _CellDelegate(self)
        self._delegate.moved.connect(self._move)
        self.view.setItemDelegate(self._delegate)
        self.view.setEditTriggers(QAbstractItemView.EditTrigger.AnyKeyPressed
                                  | QAbstractItemView.EditTrigger.DoubleClicked
                                  | QAbstractItemView.EditTrigger.EditKeyPressed)
        self.view.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.view.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectItems)
        self.view.verticalHeader().hide()
        rows = self.view.verticalHeader()
        rows.setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        rows.setDefaultSectionSize(self.fontMetrics().height() * 3 // 2 + 2)
        header = self.view.horizontalHeader()
        header.setResizeContentsPrecision(_SIZE_ROWS)
        header.setSortIndicatorClearable(True)  # a third click goes back to field order
        header.setSortIndicator(-1, Qt.SortOrder.AscendingOrder)
        header.setHighlightSections(True)
        self.view.setSortingEnabled(True)
        self.view.setWordWrap(False)

        self.block_filter = QComboBox(self)
        self.block_filter.setAccessibleName("Show block")
        self.entry_filter = QComboBox(self)
        self.entry_filter.setAccessibleName("Show entry")
        self.entry_filter.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToContents)
        self.find_field = QLineEdit(self)
        self.find_field.setPlaceholderText("Find plot or entry")
        self.find_field.setClearButtonEnabled(True)
        self.find_field.setAccessibleName("Find plot or entry")
        self.resort_button = QPushButton("Sort again", self)
        self.resort_button.setToolTip("Rows stay where they are while values are typed; this "
                                      "puts them back in the order of the sorted column")
        self.resort_button.setShortcut(QKeySequence(QKeySequence.StandardKey.Refresh))
        self.resort_button.hide()
        self.status = QLabel(self)
        self.status.setWordWrap(True)
        self.status.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)

        bar = QHBoxLayout()
        bar.addWidget(QLabel("Block:", self))
        bar.addWidget(self.block_filter)
        bar.addSpacing(self.fontMetrics().horizontalAdvance("MM"))
        bar.addWidget(QLabel("Entry:", self))
        bar.addWidget(self.entry_filter)
        bar.addStretch(1)
        bar.addWidget(self.resort_button)
        bar.addWidget(self.find_field)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addLayout(bar)
        layout.addWidget(self.view, 1)
        layout.addWidget(self.status)

        self.find_field.returnPressed.connect(self._find_typed)
        self.block_filter.activated.connect(self._filters_chosen)
        self.entry_filter.activated.connect(self._filters_chosen)
        self.model.edit_refused.connect(self._show_message)
        self.model.order_stale_changed.connect(self.resort_button.setVisible)
        self.resort_button.clicked.connect(self.model.resort)
        self.model.modelReset.connect(self._rebuilt)
        session.structure_changed.connect(self._fill_filters)
        self._rebuilt()

    # --- public --------------------------------------------------------------------------------

    def select_plot(self, plot: str, trait: str | None = None) -> bool:
        """Scroll to a plot's row and select it (its trait's cell, when given); False if unknown.

        Filters that hide the plot are cleared.
        """
        row = self.model.row_of_plot(plot)
        if row is None:
            self._tell(f"There is no plot {plot} in this trial.")
            return False
        column = self.model.trait_column(trait) if trait is not None else None
        source = self.model.index(row, _PLOT if column is None else column)
        index = self.proxy.mapFromSource(source)
        if not index.isValid():
            self.set_filters(None, None)
            index = self.proxy.mapFromSource(source)
        self._go_to(index)
        return True

    def find(self, text: str) -> bool:
        """Select the first plot or entry matching ``text`` among the plots shown.

        A plot number or entry code matching in full comes before one that only contains the
        text; asked again for the same text, the next match is found. False when none matches.
        """
        needle = text.strip().casefold()
        if not needle:
            return False
        again = needle == self._last_find
        self._last_find = needle
        count = self.proxy.rowCount()
        start = self.view.currentIndex().row() + 1 if again and count else 0
        order = [(start + k) % count for k in range(count)] if count else []
        sources = [self.proxy.mapToSource(self.proxy.index(r, 0)).row() for r in order]
        for whole in (True, False):
            for r, source in zip(order, sources, strict=True):
                for column, label in ((_PLOT, self.model.plot_of_row(source)),
                                      (_ENTRY, self.model.entry_of_row(source))):
                    label = label.casefold()
                    if label == needle if whole else needle in label:
                        self._go_to(self.proxy.index(r, column))
                        self._tell(f"Plot {self.model.plot_of_row(source)}, entry "
                                   f"{self.model.entry_of_row(source)}")
                        return True
        hidden = " (some plots are hidden by the block or entry filter)" if (
            count < self.model.rowCount()) else ""
        self._tell(f"No plot or entry matches '{text.strip()}'{hidden}.")
        return False

    def focus_find(self) -> None:
        """Put the cursor in the find field."""
        self.find_field.setFocus(Qt.FocusReason.ShortcutFocusReason)
        self.find_field.selectAll()

    def set_filters(self, block: str | None, entry: str | None) -> None:
        """Show only the plots of a block and/or an entry (None: all)."""
        self._filter(block, entry)
        shown, total = self.proxy.rowCount(), self.model.rowCount()
        self._tell("" if shown == total else f"Showing {shown} of {total} plots.")

    def current_cell(self) -> tuple[str, str | None] | None:
        """(plot, trait) of the current cell (trait None in a label column), or None."""
        index = self.view.currentIndex()
        if not index.isValid():
            return None
        source = self.proxy.mapToSource(index)
        return (self.model.plot_of_row(source.row()),
                self.model.trait_of_column(source.column()))

    def selected_plots(self) -> list[str]:
        """The plots with a selected cell, in the order shown."""
        rows = sorted({index.row() for index in self.view.selectionModel().selectedIndexes()})
        return [self.model.plot_of_row(self.proxy.mapToSource(self.proxy.index(r, 0)).row())
                for r in rows]

    def copy_selection(self) -> str:
        """Copy the selected cells (their bounding rectangle) as tab-separated text.

        Values are copied at full precision, so they paste back as the same numbers. Returns the
        text put on the clipboard.
        """
        ranges = list(self.view.selectionModel().selection())
        current = self.view.currentIndex()
        if not ranges and not current.isValid():
            return ""
        if ranges:
            top, bottom = min(r.top() for r in ranges), max(r.bottom() for r in ranges)
            left, right = min(r.left() for r in ranges), max(r.right() for r in ranges)
        else:
            top = bottom = current.row()
            left = right = current.column()

        def cell(row: int, column: int) -> str:
            if ranges and not any(r.top() <= row <= r.bottom() and r.left() <= column <= r.right()
                                  for r in ranges):
                return ""
            value = self.proxy.index(row, column).data(Qt.ItemDataRole.EditRole)
            return "" if value is None else str(value)

        text = "\n".join("\t".join(cell(row, column) for column in range(left, right + 1))
                         for row in range(top, bottom + 1))
        QApplication.clipboard().setText(text)
        cells = (bottom - top + 1) * (right - left + 1)
        self._tell(f"Copied {cells} cell{'s' if cells != 1 else ''}.")
        return text

    def clear_selection(self) -> bool:
        """Mark the selected trait cells missing, as one undoable edit (Delete or Backspace)."""
        cells = []
        for index in self.view.selectionModel().selectedIndexes():
            source = self.proxy.mapToSource(index)
            if self.model.is_editable_column(source.column()):
                cells.append((source.row(), source.column(), ""))
        if not cells:
            return False
        return self.model.write_texts(cells) is None

    def paste(self) -> bool:
        """Paste a block of cells from the clipboard, from the current cell, as one edit.

        Every text is read first; if any is refused, nothing is written and the message names
        the cell. A single copied value fills every selected cell. True when written.
        """
        block = _cells(QApplication.clipboard().text())
        current = self.view.currentIndex()
        if not block:
            self._tell("There is nothing to paste: copy cells first.")
            return False
        if not current.isValid():
            self._tell("Choose the cell to paste into first.")
            return False
        if len({len(row) for row in block}) != 1:
            self._tell("Nothing was pasted: the copied rows do not all have the same number of "
                       "cells.")
            return False
        targets = self._paste_targets(block, current)
        if targets is None:
            return False
        cells = []
        for row, column, text in targets:
            source = self.proxy.mapToSource(self.proxy.index(row, column))
            cells.append((source.row(), source.column(), text))
        refused = self.model.write_texts(cells, announce=False)
        if refused is not None:
            self._tell(f"Nothing was pasted: {refused}")
            return False
        rows = {row for row, _, _ in targets}
        columns = {column for _, column, _ in targets}
        self.view.selectionModel().select(
            QItemSelection(self.proxy.index(min(rows), min(columns)),
                           self.proxy.index(max(rows), max(columns))),
            _Select.ClearAndSelect)
        count = len(cells)
        self._tell(f"Pasted {count} value{'s' if count != 1 else ''} as one edit.")
        return True

    # --- inside --------------------------------------------------------------------------------

    def _paste_targets(self, block: list[list[str]], current: QModelIndex
                       ) -> list[tuple[int, int, str]] | None:
        """(proxy row, proxy column, text) for each pasted cell, None when it does not fit."""
        if len(block) == 1 and len(block[0]) == 1:
            ranges = list(self.view.selectionModel().selection())
            cells = [(row, column) for r in ranges for row in range(r.top(), r.bottom() + 1)
                     for column in range(r.left(), r.right() + 1)]
            if len(cells) > 1:
                return [(row, column, block[0][0]) for row, column in cells]
        top, left = current.row(), current.column()
        height, width = len(block), len(block[0])
        room_rows = self.proxy.rowCount() - top
        room_columns = self.proxy.columnCount() - left
        if height > room_rows or width > room_columns:
            self._tell(f"Nothing was pasted: the copied block is {height} rows by {width} "
                       f"columns, and from the current cell there is room for {room_rows} rows "
                       f"by {room_columns} columns.")
            return None
        return [(top + i, left + k, text) for i, row in enumerate(block)
                for k, text in enumerate(row)]

    def _refusal(self, index: QPersistentModelIndex, text: str) -> str | None:
        if not index.isValid():
            return None
        source = self.proxy.mapToSource(QModelIndex(index))
        return self.model.refusal(source.row(), source.column(), text)

    def _show_message(self, message: str, index: QModelIndex | QPersistentModelIndex | None = None
                      ) -> None:
        """Tell why a text was refused, in the status line and beside the cell."""
        self._tell(message)
        where = QModelIndex(index) if index is not None else self.view.currentIndex()
        if where.isValid() and self.isVisible():
            rect = self.view.visualRect(where)
            QToolTip.showText(self.view.viewport().mapToGlobal(rect.bottomLeft()), message,
                              self.view)

    def _tell(self, message: str) -> None:
        self.status.setText(message)
        self.status_message.emit(message)

    def _move(self, rows: int, columns: int) -> None:
        current = self.view.currentIndex()
        if not current.isValid():
            return
        row = min(max(current.row() + rows, 0), self.proxy.rowCount() - 1)
        column = min(max(current.column() + columns, 0), self.proxy.columnCount() - 1)
        self.view.setCurrentIndex(self.proxy.index(row, column))

    def _go_to(self, index: QModelIndex) -> None:
        self.view.selectionModel().setCurrentIndex(index, _Select.ClearAndSelect)
        self.view.scrollTo(index, QAbstractItemView.ScrollHint.PositionAtCenter)

    def _discard_draft(self) -> bool:
        current = self.view.currentIndex()
        if not current.isValid():
            return False
        source = self.proxy.mapToSource(current)
        if self.model.discard_draft(source.row(), source.column()):
            self._tell("The refused text was dropped; the cell shows its saved value.")
            return True
        return False

    def _find_typed(self) -> None:
        if self.find(self.find_field.text()):
            self.view.setFocus(Qt.FocusReason.OtherFocusReason)

    def _filter(self, block: str | None, entry: str | None) -> None:
        self.proxy.set_filters(block, entry)
        for combo, value in ((self.block_filter, block), (self.entry_filter, entry)):
            combo.setCurrentIndex(max(combo.findData(value), 0))

    def _filters_chosen(self) -> None:
        self.set_filters(self.block_filter.currentData(), self.entry_filter.currentData())

    def _fill_filters(self) -> None:
        block, entry = self.proxy.block, self.proxy.entry
        blocks, entries = self.model.blocks(), self.model.entries()
        block = block if block in blocks else None
        entry = entry if entry in entries else None
        checks = {self.model.entry_of_row(r) for r in range(self.model.rowCount())
                  if self.model.is_check_row(r)}
        for combo, everything, items in (
                (self.block_filter, "All blocks", [(f"Block {b}", b) for b in blocks]),
                (self.entry_filter, "All entries",
                 [(f"{e} (check)" if e in checks else e, e) for e in entries])):
            combo.blockSignals(True)
            combo.clear()
            combo.addItem(everything, None)
            for text, value in items:
                combo.addItem(text, value)
            combo.blockSignals(False)
        self.block_filter.setEnabled(bool(blocks))
        self._filter(block, entry)

    def _rebuilt(self) -> None:
        self._fill_filters()
        self.view.resizeColumnsToContents()
        least = self.fontMetrics().horizontalAdvance("0000.00") + self.fontMetrics().height()
        for column in range(self.proxy.columnCount()):
            if self.view.columnWidth(column) < least:
                self.view.setColumnWidth(column, least)


def _cells(text: str) -> list[list[str]]:
    """Rows of tab-separated cells from copied text (a last line break is not an empty row)."""
    lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    return [line.split("\t") for line in lines]
