"""The column-role step of importing a field book: which column holds what, then a trial file."""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QFormLayout,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core.fieldbook import FieldBook, read_fieldbook

NONE = "(none)"
ROLES = (("entry", "Entry"), ("block", "Block (replicate)"), ("plot", "Plot number"),
         ("row", "Field row"), ("column", "Field column"))


class ImportDialog(QDialog):
    """Shows the columns Trialdesk found for each role, lets the user change them and pick the
    traits and checks, and re-reads the field book with those choices (:meth:`fieldbook`)."""

    def __init__(self, path: str | Path, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.path = Path(path)
        self.setWindowTitle(f"Import field book: {self.path.name}")
        self._first = read_fieldbook(self.path)  # finds the roles by their usual names
        columns = self._columns()
        layout = QVBoxLayout(self)
        layout.addWidget(QLabel(
            f"{len(self._first.plots)} plots read. Check which column holds what; the source "
            "file is never changed."))
        form = QFormLayout()
        self.role_boxes: dict[str, QComboBox] = {}
        for role, label in ROLES:
            box = QComboBox()
            box.addItems([NONE, *columns])
            found = self._first.roles.get(role)
            box.setCurrentText(found if found else NONE)
            form.addRow(label, box)
            self.role_boxes[role] = box
        layout.addLayout(form)
        layout.addWidget(QLabel("Traits to import:"))
        self.traits = QListWidget()
        for trait in self._first.traits:
            item = QListWidgetItem(trait)
            item.setCheckState(Qt.CheckState.Checked)
            self.traits.addItem(item)
        layout.addWidget(self.traits)
        layout.addWidget(QLabel("Check varieties (tick the checks):"))
        self.checks = QListWidget()
        for entry in dict.fromkeys(self._first.plots["entry"]):
            item = QListWidgetItem(entry)
            item.setCheckState(Qt.CheckState.Unchecked)
            self.checks.addItem(item)
        layout.addWidget(self.checks)
        if self._first.warnings:
            warn = QLabel("\n".join(str(w) for w in self._first.warnings[:6]))
            warn.setWordWrap(True)
            layout.addWidget(warn)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok
                                   | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        layout.addWidget(buttons)

    def _columns(self) -> list[str]:
        used = [c for c in self._first.roles.values() if c]
        return list(dict.fromkeys([*used, *self._first.traits]))

    def chosen_roles(self) -> dict[str, str | None]:
        """Role -> column as chosen."""
        return {role: (None if box.currentText() == NONE else box.currentText())
                for role, box in self.role_boxes.items()}

    def chosen_traits(self) -> list[str]:
        """Traits ticked for import."""
        return [self.traits.item(i).text() for i in range(self.traits.count())
                if self.traits.item(i).checkState() == Qt.CheckState.Checked]

    def chosen_checks(self) -> list[str]:
        """Entries ticked as checks."""
        return [self.checks.item(i).text() for i in range(self.checks.count())
                if self.checks.item(i).checkState() == Qt.CheckState.Checked]

    def fieldbook(self) -> FieldBook:
        """The field book read again with the chosen roles and traits."""
        roles = self.chosen_roles()
        return read_fieldbook(self.path, entry=roles["entry"], block=roles["block"],
                              plot=roles["plot"], row=roles["row"], column=roles["column"],
                              traits=self.chosen_traits())
