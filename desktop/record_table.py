"""A table model over a list of records from the session (the entries, the traits).

:class:`RecordTableModel` holds what the entries and traits tables share: one row per record,
fixed columns with headers and tooltips, a rebuild when the session opens a trial, and an
in-place refresh (which keeps the user's place) when the same records are still listed.
Subclasses say how records are read (:meth:`load_rows`) and shown (``data``, ``flags``,
``setData``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from PySide6.QtCore import (
    QAbstractTableModel,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    Qt,
    Signal,
)

from trialdesk.desktop.session import TrialSession

__all__ = ["RecordTableModel"]

_Role = Qt.ItemDataRole
_Index = QModelIndex | QPersistentModelIndex


class RecordTableModel(QAbstractTableModel):
    """Rows of records (dicts) under fixed columns.

    Parameters
    ----------
    session : TrialSession
    columns : sequence of str
        The record field shown in each column.
    headers, tips : mapping
        Column field -> header text, and -> header tooltip (optional per column).
    key : str
        The record field that names a record (its code or name).

    Signals
    -------
    edit_refused(str) : an edit was not written, and why.
    """

    edit_refused = Signal(str)

    def __init__(self, session: TrialSession, columns: Sequence[str],
                 headers: Mapping[str, str], tips: Mapping[str, str], key: str,
                 parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self.columns = tuple(columns)
        self._headers, self._tips, self._key = headers, tips, key
        self._rows: list[dict] = self.load_rows()
        session.opened.connect(self._reset)
        session.structure_changed.connect(self._refresh)

    def load_rows(self) -> list[dict]:
        """The records of the session's trial, in order (empty when no trial is open)."""
        raise NotImplementedError

    def rowCount(self, parent: _Index = QModelIndex()) -> int:  # noqa: B008 (Qt's signature)
        return 0 if parent.isValid() else len(self._rows)

    def columnCount(self, parent: _Index = QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(self.columns)

    def headerData(self, section: int, orientation: Qt.Orientation,
                   role: int = _Role.DisplayRole) -> object:
        if orientation != Qt.Orientation.Horizontal or not 0 <= section < len(self.columns):
            return None
        if role == _Role.DisplayRole:
            return self._headers[self.columns[section]]
        if role == _Role.ToolTipRole:
            return self._tips.get(self.columns[section])
        return None

    def keys(self) -> list[str]:
        """The record names (codes) in row order."""
        return [row[self._key] for row in self._rows]

    def row_of(self, key: str) -> int | None:
        """The row of a record, or None."""
        keys = self.keys()
        return keys.index(key) if key in keys else None

    def _reset(self) -> None:
        self.beginResetModel()
        self._rows = self.load_rows()
        self.endResetModel()

    def _refresh(self) -> None:
        """In place when the same records are listed (keeps the place), otherwise rebuilt."""
        before = self.keys()
        rows = self.load_rows()
        if [row[self._key] for row in rows] != before:
            self.beginResetModel()
            self._rows = rows
            self.endResetModel()
        else:
            self._rows = rows
            if rows:
                self.dataChanged.emit(self.index(0, 0),
                                      self.index(len(rows) - 1, len(self.columns) - 1))
