"""The trial's entries: code, name, whether each is a check variety, origin or pedigree.

Every edit goes straight to the trial file through the session.
"""

from __future__ import annotations

import pandas as pd
from PySide6.QtCore import (
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    QSortFilterProxyModel,
    Qt,
    Signal,
)
from PySide6.QtWidgets import (
    QAbstractItemView,
    QCheckBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QPushButton,
    QTableView,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core.errors import TrialInputError
from trialdesk.desktop.palette import CHECK_BG
from trialdesk.desktop.record_table import RecordTableModel
from trialdesk.desktop.session import TrialSession

__all__ = ["EntriesPanel", "EntryTableModel"]

COLUMNS = ("code", "name", "check", "origin")
_HEADERS = {"code": "Code", "name": "Name", "check": "Check", "origin": "Origin / pedigree"}
_TIPS = {"code": "The entry code used in the field book (cannot be changed here)",
         "check": "Ticked for a check variety, the standard the test entries are compared with",
         "origin": "Where the entry came from, or its pedigree"}
_Role = Qt.ItemDataRole
_Index = QModelIndex | QPersistentModelIndex


def _text(cell: object) -> str:
    return "" if cell is None or (not isinstance(cell, str) and pd.isna(cell)) else str(cell)


class EntryTableModel(RecordTableModel):
    """The session's entries; name and origin are edited as text, the role by a check box.

    Signals
    -------
    edit_refused(str) : an edit was not written, and why.
    """

    def __init__(self, session: TrialSession, parent: QObject | None = None) -> None:
        super().__init__(session, COLUMNS, _HEADERS, _TIPS, "code", parent)

    def flags(self, index: _Index) -> Qt.ItemFlag:
        if not index.isValid():
            return Qt.ItemFlag.NoItemFlags
        flags = Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
        column = COLUMNS[index.column()]
        if column == "check":
            flags |= Qt.ItemFlag.ItemIsUserCheckable
        elif column != "code":
            flags |= Qt.ItemFlag.ItemIsEditable
        return flags

    def data(self, index: _Index, role: int = _Role.DisplayRole) -> object:
        if not index.isValid():
            return None
        row = self._rows[index.row()]
        column = COLUMNS[index.column()]
        is_check = row["role"] == "check"
        if column == "check":
            if role == _Role.CheckStateRole:
                return Qt.CheckState.Checked if is_check else Qt.CheckState.Unchecked
            if role in (_Role.DisplayRole, _Role.UserRole):
                return "check" if is_check else "test entry"
        elif role in (_Role.DisplayRole, _Role.EditRole, _Role.UserRole):
            return row[column]
        if role == _Role.BackgroundRole and is_check:
            return CHECK_BG
        return None

    def setData(self, index: _Index, value: object, role: int = _Role.EditRole) -> bool:
        if not index.isValid():
            return False
        code = self._rows[index.row()]["code"]
        column = COLUMNS[index.column()]
        if column == "check" and role == _Role.CheckStateRole:
            checked = value if isinstance(value, bool) else (
                Qt.CheckState(value) == Qt.CheckState.Checked)
            return self._write(code, role="check" if checked else "test")
        if column in ("name", "origin") and role == _Role.EditRole:
            text = "" if value is None else str(value).strip()
            if text == self._rows[index.row()][column]:
                return True
            return self._write(code, **{column: text})
        return False

    def counts(self) -> tuple[int, int]:
        """(entries, checks)."""
        return len(self._rows), sum(row["role"] == "check" for row in self._rows)

    def code_of_row(self, row: int) -> str:
        """The entry code in a row."""
        return self._rows[row]["code"]

    def add(self, code: str, name: str = "", role: str = "test") -> bool:
        """Add a new entry at the end of the list; False (with the reason told) if refused."""
        code = code.strip()
        try:
            self._session.add_entry(code, name=name.strip(), role=role)
        except TrialInputError as exc:
            self.edit_refused.emit(f"entry not added: {exc.message}")
            return False
        return True

    def _write(self, code: str, **fields: str) -> bool:
        try:
            self._session.update_entry(code, **fields)
        except TrialInputError as exc:
            self.edit_refused.emit(f"entry {code}: {exc.message}")
            return False
        return True

    def load_rows(self) -> list[dict]:
        entries = self._session.entries
        if self._session.trial is None or "code" not in entries.columns:
            return []
        return [{"code": _text(e.code), "name": _text(e.name), "role": _text(e.role),
                 "origin": _text(e.origin)} for e in entries.itertuples(index=False)]


class EntriesPanel(QWidget):
    """The entries table and a count line ("25 entries, 2 checks").

    Signals
    -------
    status_message(str) : something to tell the user (an edit that was refused).
    """

    status_message = Signal(str)

    def __init__(self, session: TrialSession, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self.model = EntryTableModel(session, self)
        self.proxy = QSortFilterProxyModel(self)
        self.proxy.setSourceModel(self.model)
        self.proxy.setSortRole(_Role.UserRole)
        self.proxy.setSortCaseSensitivity(Qt.CaseSensitivity.CaseInsensitive)
        self.proxy.setDynamicSortFilter(False)
        self.view = QTableView(self)
        self.view.setModel(self.proxy)
        self.view.verticalHeader().hide()
        self.view.setEditTriggers(QAbstractItemView.EditTrigger.AnyKeyPressed
                                  | QAbstractItemView.EditTrigger.DoubleClicked
                                  | QAbstractItemView.EditTrigger.EditKeyPressed)
        self.view.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectItems)
        self.view.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        header = self.view.horizontalHeader()
        header.setSortIndicatorClearable(True)
        header.setSortIndicator(-1, Qt.SortOrder.AscendingOrder)
        header.setStretchLastSection(True)
        header.setSectionResizeMode(QHeaderView.ResizeMode.Interactive)
        self.view.setSortingEnabled(True)
        self.count = QLabel(self)
        self.message = QLabel(self)
        self.message.setWordWrap(True)

        self.new_code = QLineEdit(self)
        self.new_code.setPlaceholderText("New entry code")
        self.new_code.setAccessibleName("New entry code")
        self.new_name = QLineEdit(self)
        self.new_name.setPlaceholderText("Name (optional)")
        self.new_name.setAccessibleName("New entry name")
        self.new_is_check = QCheckBox("Check", self)
        self.add_button = QPushButton("Add entry", self)
        self.add_button.setToolTip("Add the entry to the list; give it plots in the plot data "
                                   "or in the field book")
        adding = QHBoxLayout()
        adding.addWidget(self.new_code)
        adding.addWidget(self.new_name, 1)
        adding.addWidget(self.new_is_check)
        adding.addWidget(self.add_button)

        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.count)
        layout.addWidget(self.view, 1)
        layout.addLayout(adding)
        layout.addWidget(self.message)
        self.add_button.clicked.connect(self._add)
        self.new_code.returnPressed.connect(self._add)
        self.new_name.returnPressed.connect(self._add)
        self.model.edit_refused.connect(self._tell)
        self.model.modelReset.connect(self._rebuilt)
        self.model.dataChanged.connect(self._counted)
        self._rebuilt()

    def _rebuilt(self) -> None:
        self._counted()
        self.view.resizeColumnsToContents()
        least = self.fontMetrics().horizontalAdvance("M" * 10)
        for column in range(len(COLUMNS) - 1):
            self.view.setColumnWidth(column, max(self.view.columnWidth(column), least))

    def _add(self) -> None:
        code = self.new_code.text()
        role = "check" if self.new_is_check.isChecked() else "test"
        if self.model.add(code, self.new_name.text(), role):
            self.new_code.clear()
            self.new_name.clear()
            self.new_is_check.setChecked(False)
            self._tell(f"Entry {code.strip()} added.")
            row = self.model.row_of(code.strip())
            if row is not None:
                self.view.scrollTo(self.proxy.mapFromSource(self.model.index(row, 0)))
        self.new_code.setFocus()

    def _counted(self) -> None:
        entries, checks = self.model.counts()
        self.count.setText(f"{entries} entr{'y' if entries == 1 else 'ies'}, "
                           f"{checks} check{'' if checks == 1 else 's'}")

    def _tell(self, message: str) -> None:
        self.message.setText(message)
        self.status_message.emit(message)
