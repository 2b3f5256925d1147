"""The trial's facts (name, station, season, plot size, ...) and its traits (unit, range, ...).

Each field is written to the trial file as soon as its editing finishes, so nothing is ever
unsaved. A text that cannot be used is kept in its field, marked, with the reason beside it.
"""

from __future__ import annotations

import math

import pandas as pd
from PySide6.QtCore import (
    QAbstractTableModel,
    QDate,
    QEvent,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    Qt,
    Signal,
)
from PySide6.QtGui import QPalette
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QDateEdit,
    QFormLayout,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QPlainTextEdit,
    QPushButton,
    QStyledItemDelegate,
    QStyleOptionViewItem,
    QTableView,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core.errors import TrialInputError
from trialdesk.core.yield_conversion import CROP_DEFAULTS
from trialdesk.desktop.palette import ERROR_BG
from trialdesk.desktop.record_table import RecordTableModel
from trialdesk.desktop.session import TrialSession

__all__ = ["DIRECTIONS", "FactsPanel", "TraitTableModel", "read_number"]

#: The two directions of a trait, as the traits table words them.
DIRECTIONS = ("higher is better", "lower is better")

_TEXTS = (("name", "Trial name"), ("station", "Station"), ("season", "Season"))
_DESIGNS = {"rcbd": "Randomized complete blocks (RCBD)", "crd": "Completely randomized (CRD)",
            "alpha": "Alpha lattice (incomplete blocks)"}
_DATES = (("sowing_date", "Sowing date"), ("harvest_date", "Harvest date"))
# (fact, label, unit, "positive" or "percent", tooltip)
_NUMBERS = (
    ("plot_length_m", "Plot length", "m", "positive", None),
    ("plot_width_m", "Plot width", "m", "positive", None),
    ("harvested_area_m2", "Harvested area", "m\u00b2", "positive",
     "The area harvested from each plot, used to compute yield from plot weight"),
    ("standard_moisture_pct", "Standard moisture", "%", "percent",
     "The grain moisture yields are adjusted to"),
    ("test_weight", "Test weight", "lb/bu", "positive",
     "The bushel weight, used to express yield in bu/ac"),
)
_NOT_SET = QDate(1900, 1, 1)  # the date edits' lowest date stands for "not set"
_COLUMNS = ("name", "unit", "decimals", "low", "high", "direction")
_HEADERS = {"name": "Trait", "unit": "Unit", "decimals": "Decimals", "low": "Low",
            "high": "High", "direction": "Direction"}
_TIPS = {"decimals": "Decimals shown in the plot data and the results",
         "low": "Values below this are marked as warnings in the plot data",
         "high": "Values above this are marked as warnings in the plot data",
         "direction": "Whether a higher value is better (yield) or a lower one (days to heading)"}
_RIGHT = Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter
_Role = Qt.ItemDataRole
_Index = QModelIndex | QPersistentModelIndex


def _absent(cell: object) -> bool:
    return cell is None or (not isinstance(cell, str) and pd.isna(cell))


def _text(cell: object) -> str:
    return "" if _absent(cell) else str(cell)


def _number_text(value: object) -> str:
    return "" if _absent(value) else f"{float(value):g}"


def read_number(text: str, what: str) -> float | None:
    """A number typed in a field (None when empty); the message names the field when it is not.

    Raises
    ------
    TrialInputError
        When the text is not a number.
    """
    stripped = text.strip()
    if not stripped:
        return None
    try:
        value = float(stripped)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise TrialInputError(f"{what}: '{stripped}' is not a number (write it like 6.25, or "
                              "leave the field empty)")
    return value


class TraitTableModel(RecordTableModel):
    """The traits: name (fixed), unit, decimals, low, high and direction (edited).

    Signals
    -------
    edit_refused(str) : an edit was not written, and why.
    """

    def __init__(self, session: TrialSession, parent: QObject | None = None) -> None:
        super().__init__(session, _COLUMNS, _HEADERS, _TIPS, "name", parent)

    def flags(self, index: _Index) -> Qt.ItemFlag:
        if not index.isValid():
            return Qt.ItemFlag.NoItemFlags
        flags = Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
        return flags if _COLUMNS[index.column()] == "name" else flags | Qt.ItemFlag.ItemIsEditable

    def data(self, index: _Index, role: int = _Role.DisplayRole) -> object:
        if not index.isValid():
            return None
        row = self._rows[index.row()]
        column = _COLUMNS[index.column()]
        if role in (_Role.DisplayRole, _Role.EditRole):
            if column == "direction":
                return DIRECTIONS[0] if row["higher_is_better"] else DIRECTIONS[1]
            if column in ("low", "high"):
                return _number_text(row[column])
            return "" if row[column] is None else str(row[column])
        if role == _Role.TextAlignmentRole and column in ("decimals", "low", "high"):
            return _RIGHT
        if role == _Role.ToolTipRole and column == "name" and row["derived"]:
            return f"{row['name']} is computed from other traits"
        return None

    def setData(self, index: _Index, value: object, role: int = _Role.EditRole) -> bool:
        if role != _Role.EditRole or not index.isValid():
            return False
        row = self._rows[index.row()]
        column = _COLUMNS[index.column()]
        name = row["name"]
        text = "" if value is None else str(value).strip()
        try:
            if column == "unit":
                field, new = "unit", text or None
            elif column == "decimals":
                field, new = "decimals", _decimals(text)
            elif column in ("low", "high"):
                field, new = column, read_number(text, column)
            elif column == "direction":
                if text not in DIRECTIONS:
                    raise TrialInputError(f"the direction is '{DIRECTIONS[0]}' or "
                                          f"'{DIRECTIONS[1]}', not '{text}'")
                field, new = "higher_is_better", text == DIRECTIONS[0]
            else:
                return False
            if new == row[field] or (new is None and _absent(row[field])):
                return True
            self._session.update_trait(name, **{field: new})
        except TrialInputError as exc:
            self.edit_refused.emit(f"trait {name}: {exc.message}")
            return False
        return True

    def name_of_row(self, row: int) -> str:
        """The trait in a row."""
        return self._rows[row]["name"]

    def add(self, name: str, unit: str = "", direction: str = DIRECTIONS[0]) -> bool:
        """Add a new trait (every plot missing); False (with the reason told) if refused."""
        try:
            self._session.add_trait(name, unit=unit.strip() or None,
                                    higher_is_better=direction == DIRECTIONS[0])
        except TrialInputError as exc:
            self.edit_refused.emit(f"trait not added: {exc.message}")
            return False
        return True

    def load_rows(self) -> list[dict]:
        traits = self._session.traits
        if self._session.trial is None or "name" not in traits.columns:
            return []
        return [{
            "name": str(t.name), "unit": None if _absent(t.unit) else str(t.unit),
            "decimals": None if _absent(t.decimals) else int(t.decimals),
            "low": None if _absent(t.low) else float(t.low),
            "high": None if _absent(t.high) else float(t.high),
            "higher_is_better": bool(t.higher_is_better),
            "derived": isinstance(t.derivation, dict),
        } for t in traits.itertuples(index=False)]


def _decimals(text: str) -> int | None:
    if not text:
        return None
    if not text.isdigit():
        raise TrialInputError(f"decimals are a whole number from 0 up, not '{text}'")
    return int(text)


class _ChoiceDelegate(QStyledItemDelegate):
    """A drop-down of fixed choices; choosing one writes it at once."""

    def __init__(self, choices: tuple[str, ...], parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._choices = choices

    def createEditor(self, parent: QWidget, option: QStyleOptionViewItem,
                     index: QModelIndex) -> QWidget:
        combo = QComboBox(parent)
        combo.addItems(list(self._choices))
        combo.activated.connect(lambda _: self._chosen(combo))
        return combo

    def setEditorData(self, editor: QWidget, index: QModelIndex) -> None:
        editor.setCurrentIndex(max(editor.findText(str(index.data(_Role.EditRole))), 0))

    def setModelData(self, editor: QWidget, model: QAbstractTableModel,
                     index: QModelIndex) -> None:
        model.setData(index, editor.currentText(), _Role.EditRole)

    def _chosen(self, combo: QComboBox) -> None:
        self.commitData.emit(combo)
        self.closeEditor.emit(combo, QStyledItemDelegate.EndEditHint.NoHint)


class FactsPanel(QWidget):
    """The trial facts form and, below it, the traits table.

    Attributes
    ----------
    fields : dict
        Fact name -> the widget editing it (QLineEdit, QComboBox, QDateEdit or QPlainTextEdit).
    traits_model : TraitTableModel
    traits_view : QTableView

    Signals
    -------
    status_message(str) : something to tell the user (an entry that was refused).
    """

    status_message = Signal(str)

    def __init__(self, session: TrialSession, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self._refused: set[str] = set()
        self.fields: dict[str, QWidget] = {}
        self._labels: dict[str, str] = {}
        self._kinds: dict[str, str] = {}

        left, right = QFormLayout(), QFormLayout()
        for form in (left, right):
            form.setFieldGrowthPolicy(QFormLayout.FieldGrowthPolicy.AllNonFixedFieldsGrow)
        for key, label in _TEXTS:
            edit = QLineEdit(self)
            edit.editingFinished.connect(self._text_finished)
            self._add(left, key, label, edit)
        crop = QComboBox(self)
        crop.setEditable(True)
        crop.addItems(sorted(CROP_DEFAULTS))
        crop.lineEdit().editingFinished.connect(self._crop_finished)
        crop.activated.connect(self._crop_finished)
        crop.setToolTip("The crop; its usual standard moisture and bushel weight are used where "
                        "the facts leave them out")
        self._add(left, "crop", "Crop", crop)
        design = QComboBox(self)
        for code, words in _DESIGNS.items():
            design.addItem(words, code)
        design.activated.connect(self._design_chosen)
        self._add(left, "design", "Design", design)
        for key, label in _DATES:
            self._add(left, key, label, self._date_edit(key))
        for key, label, unit, kind, tip in _NUMBERS:
            edit = QLineEdit(self)
            edit.setAlignment(_RIGHT)
            edit.setPlaceholderText("not set")
            if tip:
                edit.setToolTip(tip)
            edit.editingFinished.connect(self._number_finished)
            self._kinds[key] = kind
            self._add(right, key, f"{label} ({unit})", edit)
        notes = QPlainTextEdit(self)
        notes.setTabChangesFocus(True)
        notes.setFixedHeight(notes.fontMetrics().lineSpacing() * 4
                             + 2 * notes.frameWidth() + 8)
        notes.installEventFilter(self)
        self._add(right, "notes", "Notes", notes)

        self.message = QLabel(self)
        self.message.setWordWrap(True)
        facts_box = QGroupBox("Trial facts", self)
        columns = QHBoxLayout(facts_box)
        columns.addLayout(left, 1)
        columns.addSpacing(self.fontMetrics().horizontalAdvance("MMM"))
        columns.addLayout(right, 1)

        self.traits_model = TraitTableModel(session, self)
        self.traits_view = QTableView(self)
        self.traits_view.setModel(self.traits_model)
        self.traits_view.verticalHeader().hide()
        self.traits_view.setItemDelegateForColumn(_COLUMNS.index("direction"),
                                                  _ChoiceDelegate(DIRECTIONS, self.traits_view))
        self.traits_view.setEditTriggers(QAbstractItemView.EditTrigger.AnyKeyPressed
                                         | QAbstractItemView.EditTrigger.DoubleClicked
                                         | QAbstractItemView.EditTrigger.EditKeyPressed
                                         | QAbstractItemView.EditTrigger.SelectedClicked)
        self.traits_view.horizontalHeader().setStretchLastSection(True)
        self.traits_view.horizontalHeader().setSectionResizeMode(
            QHeaderView.ResizeMode.Interactive)
        traits_box = QGroupBox("Traits", self)
        traits_layout = QVBoxLayout(traits_box)
        traits_layout.addWidget(self.traits_view)
        self.new_trait = QLineEdit(self)
        self.new_trait.setPlaceholderText("New trait name")
        self.new_trait.setAccessibleName("New trait name")
        self.new_unit = QLineEdit(self)
        self.new_unit.setPlaceholderText("Unit")
        self.new_unit.setAccessibleName("New trait unit")
        self.new_direction = QComboBox(self)
        self.new_direction.addItems(list(DIRECTIONS))
        self.add_trait_button = QPushButton("Add trait", self)
        self.add_trait_button.setToolTip("Add a trait to score; it appears as a new column of "
                                         "the plot data, every plot missing until typed in")
        adding = QHBoxLayout()
        adding.addWidget(self.new_trait, 1)
        adding.addWidget(self.new_unit)
        adding.addWidget(self.new_direction)
        adding.addWidget(self.add_trait_button)
        traits_layout.addLayout(adding)
        self.add_trait_button.clicked.connect(self._add_trait)
        self.new_trait.returnPressed.connect(self._add_trait)
        self.new_unit.returnPressed.connect(self._add_trait)

        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(facts_box)
        layout.addWidget(self.message)
        layout.addWidget(traits_box, 1)

        self.traits_model.edit_refused.connect(self._tell)
        self.traits_model.modelReset.connect(self._size_traits)
        session.opened.connect(self._opened)
        session.structure_changed.connect(self._load)
        self._opened()

    # --- building ------------------------------------------------------------------------------

    def _add(self, form: QFormLayout, key: str, label: str, widget: QWidget) -> None:
        widget.setObjectName(key)
        widget.setAccessibleName(label)
        self.fields[key] = widget
        self._labels[key] = label
        if isinstance(widget, QDateEdit):
            row = QHBoxLayout()
            row.addWidget(widget, 1)
            clear = QToolButton(self)
            clear.setText("Clear")
            clear.setToolTip(f"Mark the {label.lower()} as not set")
            clear.clicked.connect(lambda _=False, k=key: self._clear_date(k))
            row.addWidget(clear)
            form.addRow(f"{label}:", row)
        else:
            form.addRow(f"{label}:", widget)

    def _date_edit(self, key: str) -> QDateEdit:
        edit = QDateEdit(self)
        edit.setCalendarPopup(True)
        edit.setDisplayFormat("yyyy-MM-dd")
        edit.setMinimumDate(_NOT_SET)
        edit.setSpecialValueText("not set")
        edit.editingFinished.connect(self._date_finished)
        calendar = edit.calendarWidget()
        calendar.clicked.connect(lambda _date, k=key: self._write_date(k))
        calendar.installEventFilter(self)
        return edit

    # --- reading the facts ---------------------------------------------------------------------

    def _opened(self) -> None:
        self._refused.clear()
        self._tell("")
        self._load()
        self._size_traits()

    def _load(self) -> None:
        """Show the stored facts, except in fields holding a refused text or one being typed."""
        facts = self._session.facts if self._session.trial is not None else {}
        self.setEnabled(self._session.trial is not None)
        for key, widget in self.fields.items():
            if key in self._refused or (isinstance(widget, QLineEdit) and widget.hasFocus()
                                        and widget.isModified()):
                continue
            value = facts.get(key)
            widget.blockSignals(True)
            if isinstance(widget, QLineEdit):
                widget.setText(_number_text(value) if key in self._kinds else _text(value))
            elif isinstance(widget, QPlainTextEdit):
                if widget.toPlainText() != _text(value):
                    widget.setPlainText(_text(value))
            elif isinstance(widget, QDateEdit):
                widget.setDate(_NOT_SET if _absent(value) else
                               QDate.fromString(str(value), Qt.DateFormat.ISODate))
            elif key == "design":
                self._show_design(widget, _text(value) or "rcbd")
            else:
                widget.setEditText(_text(value))
            widget.blockSignals(False)

    def _show_design(self, combo: QComboBox, design: str) -> None:
        position = combo.findData(design)
        if position < 0:
            combo.addItem(design, design)
            position = combo.count() - 1
        combo.setCurrentIndex(position)

    def _size_traits(self) -> None:
        self.traits_view.resizeColumnsToContents()
        least = self.fontMetrics().horizontalAdvance("M" * 6)
        for column in range(len(_COLUMNS)):
            self.traits_view.setColumnWidth(column, max(self.traits_view.columnWidth(column),
                                                        least))

    def _add_trait(self) -> None:
        name = self.new_trait.text().strip()
        if self.traits_model.add(name, self.new_unit.text(), self.new_direction.currentText()):
            self.new_trait.clear()
            self.new_unit.clear()
            self._tell(f"Trait {name} added: type its values in the plot data.")
        self.new_trait.setFocus()

    # --- writing the facts ---------------------------------------------------------------------

    def _text_finished(self) -> None:
        edit = self.sender()
        self._write(edit.objectName(), edit.text().strip() or None)

    def _crop_finished(self) -> None:
        combo = self.fields["crop"]
        self._write("crop", combo.currentText().strip() or None)

    def _design_chosen(self) -> None:
        self._write("design", self.fields["design"].currentData())

    def _number_finished(self) -> None:
        edit = self.sender()
        key = edit.objectName()
        label = self._labels[key].split(" (")[0]
        try:
            value = read_number(edit.text(), label)
            if value is not None and self._kinds[key] == "percent" and not 0 <= value < 100:
                raise TrialInputError(f"{label} is a percentage from 0 up to 100, not {value:g}")
            if value is not None and self._kinds[key] == "positive" and value <= 0:
                raise TrialInputError(f"{label} must be above 0, not {value:g}")
        except TrialInputError as exc:
            self._refuse(key, exc.message)
            return
        self._write(key, value)

    def _date_finished(self) -> None:
        self._write_date(self.sender().objectName())

    def _write_date(self, key: str) -> None:
        date = self.fields[key].date()
        self._write(key, None if date == _NOT_SET else date.toString(Qt.DateFormat.ISODate))

    def _clear_date(self, key: str) -> None:
        edit = self.fields[key]
        edit.blockSignals(True)
        edit.setDate(_NOT_SET)
        edit.blockSignals(False)
        self._write(key, None)

    def _write(self, key: str, value: object) -> None:
        """Write one fact unless it is unchanged; a refused value stays in its field, marked."""
        widget = self.fields[key]
        if isinstance(widget, QLineEdit):
            widget.setModified(False)  # typed and finished: the field shows the file again
        if value != self._session.facts.get(key):
            try:
                self._session.set_facts(**{key: value})
            except TrialInputError as exc:
                self._refuse(key, f"{self._labels[key]}: {exc.message}")
                return
        self._accept(key)

    def _refuse(self, key: str, message: str) -> None:
        widget = self.fields[key]
        self._refused.add(key)
        palette = widget.palette()
        palette.setColor(QPalette.ColorRole.Base, ERROR_BG)
        widget.setPalette(palette)
        self._tell(f"Not saved: {message}")

    def _accept(self, key: str) -> None:
        if key in self._refused:
            self._refused.discard(key)
            widget = self.fields[key]
            widget.setPalette(QPalette())
            self._tell("")
            self._load()

    def _tell(self, message: str) -> None:
        self.message.setText(message)
        self.message.setVisible(bool(message))
        if message:
            self.status_message.emit(message)

    def eventFilter(self, watched: QObject, event: QEvent) -> bool:
        notes = self.fields.get("notes")
        if watched is notes and event.type() == QEvent.Type.FocusOut:
            self._write("notes", notes.toPlainText().strip() or None)
        elif event.type() == QEvent.Type.Show:
            for key, _ in _DATES:
                edit = self.fields.get(key)
                if edit is not None and watched is edit.calendarWidget() and (
                        edit.date() == _NOT_SET):
                    today = QDate.currentDate()
                    watched.setCurrentPage(today.year(), today.month())
        return super().eventFilter(watched, event)
