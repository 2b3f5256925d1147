"""The plot data as a Qt table model: one row per plot in field order, one column per trait.

:class:`PlotTableModel` reads the open trial's plots and values from a
:class:`~trialdesk.desktop.session.TrialSession` and writes every accepted edit back through it (at
once, into the file). What is typed is read by :func:`trialdesk.core.value_checks.parse_cell`; a
text it refuses is never written, but kept in the cell, marked, until it is corrected.

The model keeps its own copy of the values as a numpy array and formats a trait's column only when
a view first asks for it, so a trial of many thousand plots costs per cell no more than a lookup.
It sorts its rows itself (:meth:`PlotTableModel.sort`, with numpy), for the same reason.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

import numpy as np
import pandas as pd
from PySide6.QtCore import (
    QAbstractTableModel,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    Qt,
    Signal,
)

from trialdesk.core.decimals import recorded_decimals
from trialdesk.core.errors import TrialInputError
from trialdesk.core.exporter import format_value
from trialdesk.core.value_checks import Problem, parse_cell
from trialdesk.desktop.palette import CHECK_BG, ERROR_BG, ERROR_FG, OUTLIER_BG, WARNING_BG
from trialdesk.desktop.session import TrialSession

__all__ = ["LABELS", "PlotTableModel", "outlier_cells", "problem_kind", "problem_words"]

#: The label columns, left of the traits.
LABELS = ("plot", "block", "entry")

_RANK = {"outlier": 1, "warning": 2, "error": 3}
_BACKGROUND = {"error": ERROR_BG, "warning": WARNING_BG, "outlier": OUTLIER_BG}
_SAYS = {"error": "Error", "warning": "Warning", "outlier": "Flagged by the last analysis"}
_RIGHT = Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter
_Index = QModelIndex | QPersistentModelIndex
_Role = Qt.ItemDataRole


def outlier_cells(session: TrialSession) -> set[tuple[str, str]]:
    """(plot, trait) of each value the last analysis flagged, while its results are current."""
    if session.results is None or session.results_stale:
        return set()
    return {(flag.plot, result.trait) for result in session.results.traits
            for flag in result.diagnostics.flagged}


def problem_kind(problem: Problem, outliers: set[tuple[str, str]]) -> str:
    """"error", "warning", or "outlier" for a warning raised by the last analysis's residuals."""
    if problem.severity == "error":
        return "error"
    if ((problem.plot, problem.trait) in outliers
            and problem.message.startswith("studentized residual")):
        return "outlier"
    return "warning"


def problem_words(problem: Problem, outliers: set[tuple[str, str]]) -> str:
    """A problem for a tooltip: "Warning: 14.2 is outside the range ..."."""
    return f"{_SAYS[problem_kind(problem, outliers)]}: {problem.message}"


def _text(cell: object) -> str:
    return "" if cell is None or (not isinstance(cell, str) and pd.isna(cell)) else str(cell)


def _sort_keys(labels: Sequence[str]) -> list:
    """Numbers where every label is a number (plots 2 < 10), the labels themselves otherwise."""
    try:
        return [float(label) for label in labels]
    except ValueError:
        return [label.casefold() for label in labels]


class PlotTableModel(QAbstractTableModel):
    """Plots (rows, in field order) by plot, block, entry and traits (columns).

    Roles: ``DisplayRole`` the value with the trait's decimals (empty when missing), ``EditRole``
    the full-precision text, ``UserRole`` the raw number (the sort role), ``ToolTipRole`` the
    cell's problems in words, ``BackgroundRole`` the colour of its worst problem (rows of check
    varieties tinted in the label columns), ``TextAlignmentRole`` right for values.

    Rows are numbered as shown: in field order, or as last sorted by :meth:`sort`. An edit never
    moves a row (the next plot down stays the next plot while values are typed); when an edit
    changes the column the rows are sorted by, :attr:`order_stale` turns True until
    :meth:`resort` or another sort.

    Signals
    -------
    edit_refused(str) : a typed text was not written; the message names the plot and the trait.
    order_stale_changed(bool) : the rows shown no longer follow (or again follow) the sort.
    """

    edit_refused = Signal(str)
    order_stale_changed = Signal(bool)

    def __init__(self, session: TrialSession, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self._order: list[int] | None = None  # row shown -> row in field order (None: same)
        self._place: list[int] | None = None  # row in field order -> row shown
        self._sorted_by: tuple[int, Qt.SortOrder] = (-1, Qt.SortOrder.AscendingOrder)
        self.order_stale = False
        self._load()
        session.opened.connect(self._reset)
        session.structure_changed.connect(self._structure_changed)
        session.values_changed.connect(self._values_changed)
        session.problems_changed.connect(self._problems_changed)

    # --- what the views ask -------------------------------------------------------------------

    def rowCount(self, parent: _Index = QModelIndex()) -> int:  # noqa: B008 (Qt's signature)
        return 0 if parent.isValid() else len(self._plots)

    def columnCount(self, parent: _Index = QModelIndex()) -> int:  # noqa: B008
        return 0 if parent.isValid() else len(LABELS) + len(self._traits)

    def headerData(self, section: int, orientation: Qt.Orientation,
                   role: int = _Role.DisplayRole) -> object:
        if orientation != Qt.Orientation.Horizontal or not 0 <= section < self.columnCount():
            return None
        if section < len(LABELS):
            if role == _Role.DisplayRole:
                return LABELS[section].capitalize()
            return None
        j = section - len(LABELS)
        if role == _Role.DisplayRole:
            unit = self._units[j]
            return f"{self._traits[j]} ({unit})" if unit else self._traits[j]
        if role == _Role.ToolTipRole:
            return self._header_tip(j)
        if role == _Role.TextAlignmentRole:
            return _RIGHT
        return None

    def flags(self, index: _Index) -> Qt.ItemFlag:
        if not index.isValid():
            return Qt.ItemFlag.NoItemFlags
        flags = Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
        if self.is_editable_column(index.column()):
            flags |= Qt.ItemFlag.ItemIsEditable
        return flags

    def data(self, index: _Index, role: int = _Role.DisplayRole) -> object:
        if not index.isValid():
            return None
        r, c = index.row(), index.column()
        if self._order is not None:
            r = self._order[r]  # from here on, the plot's row in field order
        if c < len(LABELS):
            return self._label_data(r, c, role)
        j = c - len(LABELS)
        if self._drafts and (r, j) in self._drafts:
            return self._draft_data(r, j, role)
        if role == _Role.DisplayRole:
            return self._column_text(j)[r]
        if role == _Role.EditRole:
            return format_value(self._values[r, j], self._decimals[j])
        if role == _Role.UserRole:
            value = self._values[r, j]
            return None if math.isnan(value) else float(value)
        if role == _Role.TextAlignmentRole:
            return _RIGHT
        if role == _Role.BackgroundRole:
            kind = self._cell_kind.get((r, j))
            return None if kind is None else _BACKGROUND[kind]
        if role == _Role.ToolTipRole:
            tip = self._cell_tip.get((r, j))
            if self._derived[j]:
                computed = f"Computed from {self._recipe_words(j)}; it cannot be typed."
                return computed if tip is None else f"{tip}\n{computed}"
            return tip
        return None

    def setData(self, index: _Index, value: object, role: int = _Role.EditRole) -> bool:
        if role != _Role.EditRole or not index.isValid():
            return False
        if not self.is_editable_column(index.column()):
            return False
        return self.write_texts([(index.row(), index.column(), str(value))]) is None

    # --- looking things up ------------------------------------------------------------------

    def is_editable_column(self, column: int) -> bool:
        """True for a trait column whose values are typed (not a label, not a computed trait)."""
        j = column - len(LABELS)
        return 0 <= j < len(self._traits) and not self._derived[j]

    def trait_of_column(self, column: int) -> str | None:
        """The trait shown in a column, None for the label columns."""
        j = column - len(LABELS)
        return self._traits[j] if 0 <= j < len(self._traits) else None

    def trait_column(self, trait: str) -> int | None:
        """The column of a trait, None when the trial has no such trait."""
        j = self._column_of.get(trait)
        return None if j is None else j + len(LABELS)

    def plot_of_row(self, row: int) -> str:
        """The plot in a row."""
        return self._plots[self._field(row)]

    def row_of_plot(self, plot: str) -> int | None:
        """The row of a plot, None when the trial has no such plot."""
        field = self._row_of.get(plot)
        return None if field is None else self._shown(field)

    def block_of_row(self, row: int) -> str:
        """The block of the plot in a row ("" when it has none)."""
        return self._blocks[self._field(row)]

    def entry_of_row(self, row: int) -> str:
        """The entry code of the plot in a row."""
        return self._entry_codes[self._field(row)]

    def blocks(self) -> list[str]:
        """The blocks, in the order they first appear in the field."""
        return list(dict.fromkeys(b for b in self._blocks if b))

    def entries(self) -> list[str]:
        """The entry codes, in the order of the trial's entry list."""
        return list(self._entry_order)

    def sort(self, column: int, order: Qt.SortOrder = Qt.SortOrder.AscendingOrder) -> None:
        """Show the rows sorted by a column (-1: field order); missing values always last, ties
        in field order. Selections and other persistent indexes follow their plots."""
        self.layoutAboutToBeChanged.emit()
        persistent = self.persistentIndexList()
        cells = [(self._field(i.row()), i.column()) for i in persistent]
        self._sorted_by = (column, order)
        self._apply_sort()
        self.changePersistentIndexList(
            persistent, [self.index(self._shown(f), c) for f, c in cells])
        self.layoutChanged.emit()
        self._set_order_stale(False)

    def resort(self) -> None:
        """Sort again by the column and order last chosen (after edits left rows in place)."""
        self.sort(*self._sorted_by)

    def _set_order_stale(self, stale: bool) -> None:
        if stale != self.order_stale:
            self.order_stale = stale
            self.order_stale_changed.emit(stale)

    @property
    def sorted_by(self) -> tuple[int, Qt.SortOrder]:
        """(column, order) the rows are sorted by; column -1 for field order."""
        return self._sorted_by

    def is_check_row(self, row: int) -> bool:
        """True when the plot in a row holds a check variety."""
        return self._is_check[self._field(row)]

    def draft(self, row: int, column: int) -> str | None:
        """A text typed in a cell and refused (kept, not written), or None."""
        kept = self._drafts.get((self._field(row), column - len(LABELS)))
        return None if kept is None else kept[0]

    def discard_draft(self, row: int, column: int) -> bool:
        """Forget a refused text: the cell shows its value again. True if there was one."""
        cell = (self._field(row), column - len(LABELS))
        if self._drafts.pop(cell, None) is None:
            return False
        self._changed_cells([cell])
        return True

    # --- writing ----------------------------------------------------------------------------

    def parse_texts(self, cells: Iterable[tuple[int, int, str]]
                    ) -> list[tuple[str, str, float | None]]:
        """Read typed texts for (row, column) cells as (plot, trait, value) changes.

        Raises
        ------
        TrialInputError
            For the first cell that is not a typed trait value, whose text is not a value, or
            whose value the checks call an error (a negative weight); the message names its plot
            and trait.
        """
        changes = []
        for row, column, text in cells:
            plot, trait = self.plot_of_row(row), self.trait_of_column(column)
            if trait is None:
                raise TrialInputError(f"the {LABELS[column]} column is not a trait value; "
                                      "values go in the trait columns", plot=plot)
            if not self.is_editable_column(column):
                raise TrialInputError(f"{trait} is computed from other traits and cannot be "
                                      "typed", plot=plot, column=trait)
            try:
                value = parse_cell(text)
            except TrialInputError as exc:
                raise TrialInputError(exc.message, plot=plot, column=trait) from exc
            errors = [p for p in self._session.check_typed(plot, trait, value)
                      if p.severity == "error"]
            if errors:  # a value that cannot be used is not written (a warning is)
                raise TrialInputError(errors[0].message, plot=plot, column=trait)
            changes.append((plot, trait, value))
        return changes

    def refusal(self, row: int, column: int, text: str) -> str | None:
        """Why a text typed in a cell would be refused, in words; None when it would be written."""
        try:
            self.parse_texts([(row, column, text)])
        except TrialInputError as exc:
            return _place_words(exc)
        return None

    def write_texts(self, cells: Sequence[tuple[int, int, str]], *, announce: bool = True
                    ) -> str | None:
        """Write typed texts for (row, column) cells as one undoable edit, or none of them.

        Returns None when written, or why nothing was (the message names the plot and trait);
        with ``announce``, :attr:`edit_refused` says so too. A single refused cell keeps the text
        (shown marked until it is corrected). Values equal to those held are left out.
        """
        try:
            changes = self.parse_texts(cells)
        except TrialInputError as exc:
            message = _place_words(exc)
            if len(cells) == 1 and self.is_editable_column(cells[0][1]):
                row, column, text = cells[0]
                cell = (self._field(row), column - len(LABELS))
                self._drafts[cell] = (text, message)
                self._changed_cells([cell])
            if announce:
                self.edit_refused.emit(message)
            return message
        kept = []
        for (row, column, _), change in zip(cells, changes, strict=True):
            cell = (self._field(row), column - len(LABELS))
            if self._drafts.pop(cell, None) is not None:
                self._changed_cells([cell])
            if not _same(self._values[cell], change[2]):
                kept.append(change)
        if kept:
            try:
                self._session.set_values(kept)
            except TrialInputError as exc:
                if announce:
                    self.edit_refused.emit(exc.message)
                return exc.message
        return None

    # --- keeping up with the session ---------------------------------------------------------

    def _load(self) -> None:
        session = self._session
        self._drafts: dict[tuple[int, int], tuple[str, str]] = {}
        self._text: list[list[str] | None] = []
        self._sort: dict[int, list] = {}
        if session.trial is None or "plot" not in session.plots.columns:
            self._plots, self._blocks, self._entry_codes = [], [], []
            self._traits, self._units, self._decimals, self._derived = [], [], [], []
            self._recipes, self._ranges = [], []
            self._entry_order, self._is_check = [], []
            self._values = np.empty((0, 0))
        else:
            plots = session.plots
            self._plots = [str(p) for p in plots["plot"]]
            self._blocks = [_text(b) for b in plots["block"]]
            self._entry_codes = [_text(e) for e in plots["entry"]]
            self._load_traits()
        self._row_of = {plot: i for i, plot in enumerate(self._plots)}
        self._column_of = {trait: j for j, trait in enumerate(self._traits)}
        self._load_problems()

    def _load_traits(self) -> None:
        """Traits, entries and values (everything but the plots' labels)."""
        session = self._session
        traits = session.traits
        self._traits = [str(t) for t in traits["name"]]
        self._units = [_text(u) for u in traits["unit"]]
        self._decimals = [None if pd.isna(d) else int(d) for d in traits["decimals"]]
        self._recipes = [d if isinstance(d, dict) else None for d in traits["derivation"]]
        self._derived = [r is not None for r in self._recipes]
        self._ranges = [(None if pd.isna(lo) else float(lo), None if pd.isna(hi) else float(hi))
                        for lo, hi in zip(traits["low"], traits["high"], strict=True)]
        entries = session.entries
        self._entry_order = [str(c) for c in entries["code"]]
        checks = {str(c) for c, role in zip(entries["code"], entries["role"], strict=True)
                  if role == "check"}
        self._is_check = [code in checks for code in self._entry_codes]
        self._values = (session.values.reindex(index=self._plots, columns=self._traits)
                        .to_numpy(dtype=np.float64, copy=True))
        self._text = [None] * len(self._traits)

    def _same_layout(self) -> bool:
        session = self._session
        if session.trial is None or "plot" not in session.plots.columns:
            return not self._plots and not self._traits
        plots = session.plots
        return (self._plots == [str(p) for p in plots["plot"]]
                and self._blocks == [_text(b) for b in plots["block"]]
                and self._entry_codes == [_text(e) for e in plots["entry"]]
                and self._traits == [str(t) for t in session.traits["name"]])

    def _reset(self) -> None:
        self.beginResetModel()
        self._load()
        self._apply_sort()
        self.endResetModel()
        self._set_order_stale(False)

    def _structure_changed(self) -> None:
        """Rebuild when plots or traits changed; otherwise refresh in place (keeps the place)."""
        if not self._same_layout():
            self._reset()
            return
        self._load_traits()
        self._load_problems()
        if self.columnCount() > len(LABELS):
            self.headerDataChanged.emit(Qt.Orientation.Horizontal, len(LABELS),
                                        self.columnCount() - 1)
        if self.rowCount():
            self.dataChanged.emit(self.index(0, 0),
                                  self.index(self.rowCount() - 1, self.columnCount() - 1))

    def _values_changed(self, cells: list) -> None:
        values = self._session.values
        touched = []
        for plot, trait in cells:
            r, j = self._row_of.get(plot), self._column_of.get(trait)
            if r is None or j is None or trait not in values.columns or plot not in values.index:
                continue
            value = float(values.at[plot, trait])
            self._values[r, j] = value
            texts = self._text[j]
            if texts is not None:
                texts[r] = self._format(j, value)
            self._drafts.pop((r, j), None)
            touched.append((r, j))
        self._changed_cells(touched)
        sorted_trait = self._sorted_by[0] - len(LABELS)
        if self._order is not None and any(j == sorted_trait for _, j in touched):
            self._set_order_stale(True)

    def _problems_changed(self) -> None:
        before = set(self._cell_kind) | set(self._cell_tip)
        rows_before = set(self._row_kind) | set(self._row_tip)
        self._load_problems()
        after = set(self._cell_kind) | set(self._cell_tip)
        rows_after = set(self._row_kind) | set(self._row_tip)
        self._changed_cells(before | after)
        for r in sorted(self._shown(f) for f in rows_before | rows_after):
            self.dataChanged.emit(self.index(r, 0), self.index(r, len(LABELS) - 1))

    def _load_problems(self) -> None:
        """Each cell's worst problem and its tooltip; the same for the plots' own problems."""
        outliers = outlier_cells(self._session)
        kind: dict[tuple[int, int], str] = {}
        tips: dict[tuple[int, int], list[str]] = {}
        row_kind: dict[int, str] = {}
        row_tips: dict[int, list[str]] = {}
        for problem in self._session.problems:
            r = self._row_of.get(problem.plot) if problem.plot is not None else None
            if r is None:
                continue
            this = problem_kind(problem, outliers)
            words = problem_words(problem, outliers)
            j = self._column_of.get(problem.trait) if problem.trait is not None else None
            if j is None:
                if _RANK[this] > _RANK.get(row_kind.get(r, ""), 0):
                    row_kind[r] = this
                row_tips.setdefault(r, []).append(words)
            else:
                if _RANK[this] > _RANK.get(kind.get((r, j), ""), 0):
                    kind[(r, j)] = this
                tips.setdefault((r, j), []).append(words)
        self._cell_kind = kind
        self._cell_tip = {cell: "\n".join(lines) for cell, lines in tips.items()}
        self._row_kind = row_kind
        self._row_tip = {r: "\n".join(lines) for r, lines in row_tips.items()}

    def _changed_cells(self, cells: Iterable[tuple[int, int]]) -> None:
        """dataChanged for trait cells (field row, trait), one signal per run of rows shown with
        the same columns."""
        spans: dict[int, list[int]] = {}
        for f, j in cells:
            span = spans.setdefault(self._shown(f), [j, j])
            span[0], span[1] = min(span[0], j), max(span[1], j)
        runs: list[list[int]] = []  # [first row, last row]
        for r in sorted(spans):
            if runs and r == runs[-1][1] + 1 and spans[r] == spans[runs[-1][0]]:
                runs[-1][1] = r
            else:
                runs.append([r, r])
        for first, last in runs:
            self._emit_block(first, last, spans[first])

    def _emit_block(self, first: int, last: int, span: list[int]) -> None:
        offset = len(LABELS)
        self.dataChanged.emit(self.index(first, span[0] + offset),
                              self.index(last, span[1] + offset))

    # --- the order shown ---------------------------------------------------------------------

    def _field(self, row: int) -> int:
        return row if self._order is None else self._order[row]

    def _shown(self, field: int) -> int:
        return field if self._place is None else self._place[field]

    def _apply_sort(self) -> None:
        column, order = self._sorted_by
        if not 0 <= column < self.columnCount() or not self._plots:
            self._order = self._place = None
            return
        descending = order == Qt.SortOrder.DescendingOrder
        if column < len(LABELS):
            keys = self._label_keys(column)
            fields = sorted(range(len(keys)), key=keys.__getitem__, reverse=descending)
        else:
            values = self._values[:, column - len(LABELS)]
            present = np.flatnonzero(~np.isnan(values))
            present = present[np.argsort(-values[present] if descending else values[present],
                                         kind="stable")]
            fields = np.concatenate([present, np.flatnonzero(np.isnan(values))]).tolist()
        place = [0] * len(fields)
        for shown, field in enumerate(fields):
            place[field] = shown
        self._order, self._place = fields, place

    # --- formatting --------------------------------------------------------------------------

    def _column_text(self, j: int) -> list[str]:
        texts = self._text[j]
        if texts is None:
            decimals = self._shown_decimals(j)
            texts = ["" if math.isnan(v) else f"{v:.{decimals}f}" for v in self._values[:, j]]
            self._text[j] = texts
        return texts

    def _shown_decimals(self, j: int) -> int:
        decimals = self._decimals[j]
        return recorded_decimals(self._values[:, j]) if decimals is None else decimals

    def _format(self, j: int, value: float) -> str:
        return "" if math.isnan(value) else f"{value:.{self._shown_decimals(j)}f}"

    def _label_data(self, r: int, c: int, role: int) -> object:
        if role in (_Role.DisplayRole, _Role.EditRole):
            return (self._plots, self._blocks, self._entry_codes)[c][r]
        if role == _Role.UserRole:
            return self._label_keys(c)[r]
        if role == _Role.BackgroundRole:
            kind = self._row_kind.get(r)
            if kind is not None:
                return _BACKGROUND[kind]
            return CHECK_BG if self._is_check[r] else None
        if role == _Role.ToolTipRole:
            tip = self._row_tip.get(r)
            check = f"{self._entry_codes[r]} is a check variety" if self._is_check[r] else None
            return "\n".join(t for t in (tip, check) if t) or None
        return None

    def _label_keys(self, c: int) -> list:
        keys = self._sort.get(c)
        if keys is None:
            keys = self._sort[c] = _sort_keys((self._plots, self._blocks, self._entry_codes)[c])
        return keys

    def _draft_data(self, r: int, j: int, role: int) -> object:
        text, message = self._drafts[(r, j)]
        if role in (_Role.DisplayRole, _Role.EditRole):
            return text
        if role == _Role.BackgroundRole:
            return ERROR_BG
        if role == _Role.ForegroundRole:
            return ERROR_FG
        if role == _Role.ToolTipRole:
            return (f"Not saved: {message}\nType a value (or NA for missing), or press Esc to "
                    "show the saved value again.")
        if role == _Role.TextAlignmentRole:
            return _RIGHT
        return None

    def _recipe_words(self, j: int) -> str:
        recipe = self._recipes[j] or {}
        parts = [f"plot weight '{recipe['weight']}'"] if recipe.get("weight") else []
        if recipe.get("moisture"):
            parts.append(f"moisture '{recipe['moisture']}'")
        parts.append("the harvested area in the trial facts")
        return ", ".join(parts[:-1]) + " and " + parts[-1] if len(parts) > 1 else parts[0]

    def _header_tip(self, j: int) -> str:
        lines = [self._traits[j] + (f", in {self._units[j]}" if self._units[j] else "")]
        low, high = self._ranges[j]
        if low is not None and high is not None:
            lines.append(f"Expected from {low:g} to {high:g}")
        elif low is not None:
            lines.append(f"Expected from {low:g} up")
        elif high is not None:
            lines.append(f"Expected up to {high:g}")
        if self._derived[j]:
            lines.append(f"Computed from {self._recipe_words(j)}; not typed.")
        return "\n".join(lines)


def _same(held: float, value: float | None) -> bool:
    return math.isnan(held) if value is None else held == value


def _place_words(error: TrialInputError) -> str:
    """"plot 101, grain_yield: <message>" for an error on a cell."""
    where = ", ".join(part for part in (
        f"plot {error.plot}" if error.plot is not None else None, error.column) if part)
    return f"{where}: {error.message}" if where else error.message
