"""The side list of input problems: what is wrong or suspicious in the plot data, errors first.

Choosing a problem (a click, or Enter) asks for its plot to be shown in the grid, through
:attr:`ProblemsPanel.problem_activated`.
"""

from __future__ import annotations

from PySide6.QtCore import (
    QAbstractListModel,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    Qt,
    Signal,
)
from PySide6.QtGui import QKeyEvent
from PySide6.QtWidgets import QAbstractItemView, QLabel, QListView, QVBoxLayout, QWidget

from trialdesk.core.value_checks import Problem
from trialdesk.desktop.palette import ERROR_BG, ERROR_FG, OUTLIER_BG, WARNING_BG
from trialdesk.desktop.plot_model import outlier_cells, problem_kind, problem_words
from trialdesk.desktop.session import TrialSession

__all__ = ["ProblemListModel", "ProblemsPanel", "count_words", "problem_text"]

_BACKGROUND = {"error": ERROR_BG, "warning": WARNING_BG, "outlier": OUTLIER_BG}
_Role = Qt.ItemDataRole


def problem_text(problem: Problem) -> str:
    """A problem as the list shows it: "plot 101, grain_yield: <message>"."""
    where = ", ".join(part for part in (
        f"plot {problem.plot}" if problem.plot is not None else None, problem.trait) if part)
    return f"{where}: {problem.message}" if where else problem.message


def count_words(problems: list[Problem], outliers: set[tuple[str, str]] | None = None) -> str:
    """"3 problems: 1 error, 2 warnings", or "No problems found".

    With ``outliers`` (see :func:`~trialdesk.desktop.plot_model.outlier_cells`), the warnings
    raised by the last analysis are counted too: "2 warnings (1 from the last analysis)".
    """
    if not problems:
        return "No problems found"
    errors = sum(p.severity == "error" for p in problems)
    warnings = len(problems) - errors
    parts = [f"{n} {word}{'s' if n != 1 else ''}"
             for n, word in ((errors, "error"), (warnings, "warning")) if n]
    flagged = sum(problem_kind(p, outliers) == "outlier" for p in problems) if outliers else 0
    if flagged:
        parts[-1] += f" ({flagged} from the last analysis)"
    total = len(problems)
    return f"{total} problem{'s' if total != 1 else ''}: {', '.join(parts)}"


class ProblemListModel(QAbstractListModel):
    """The session's problems, errors first (otherwise in the order the checks found them)."""

    def __init__(self, session: TrialSession, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self._problems: list[Problem] = []
        self._outliers: set[tuple[str, str]] = set()
        self._load()
        session.problems_changed.connect(self._reload)
        session.opened.connect(self._reload)

    def rowCount(self, parent: QModelIndex | QPersistentModelIndex = QModelIndex()  # noqa: B008
                 ) -> int:
        return 0 if parent.isValid() else len(self._problems)

    def data(self, index: QModelIndex | QPersistentModelIndex,
             role: int = _Role.DisplayRole) -> object:
        if not index.isValid():
            return None
        problem = self._problems[index.row()]
        if role == _Role.DisplayRole:
            return problem_text(problem)
        if role == _Role.ToolTipRole:
            words = problem_words(problem, self._outliers)
            return f"{words}\n(field book row {problem.row})" if problem.row is not None else words
        if role == _Role.BackgroundRole:
            return _BACKGROUND[problem_kind(problem, self._outliers)]
        if role == _Role.ForegroundRole:
            return ERROR_FG if problem.severity == "error" else None
        if role == _Role.UserRole:
            return problem
        return None

    def problem_at(self, row: int) -> Problem:
        """The problem in a row."""
        return self._problems[row]

    def problems(self) -> list[Problem]:
        """The problems, in the order shown."""
        return list(self._problems)

    def summary(self) -> str:
        """The count line: "3 problems: 1 error, 2 warnings"."""
        return count_words(self._problems, self._outliers)

    def _load(self) -> None:
        problems = list(self._session.problems) if self._session.trial is not None else []
        self._problems = sorted(problems, key=lambda p: p.severity != "error")  # stable
        self._outliers = outlier_cells(self._session)

    def _reload(self) -> None:
        self.beginResetModel()
        self._load()
        self.endResetModel()


class _ProblemList(QListView):
    """The list; Enter on a problem chooses it as a click does."""

    def __init__(self, panel: ProblemsPanel) -> None:
        super().__init__(panel)
        self._panel = panel

    def keyPressEvent(self, event: QKeyEvent) -> None:
        if event.key() in (Qt.Key.Key_Return, Qt.Key.Key_Enter) and self.currentIndex().isValid():
            self._panel._chosen(self.currentIndex())
            return
        super().keyPressEvent(event)


class ProblemsPanel(QWidget):
    """A count and the list of the trial's input problems.

    Signals
    -------
    problem_activated(str, object) : (plot, trait or None) of the problem clicked or chosen by
        Enter; problems that concern no single plot do not emit it.
    """

    problem_activated = Signal(str, object)

    def __init__(self, session: TrialSession, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self.model = ProblemListModel(session, self)
        self.header = QLabel(self)
        self.header.setWordWrap(True)
        font = self.header.font()
        font.setBold(True)
        self.header.setFont(font)
        self.list = _ProblemList(self)
        self.list.setModel(self.model)
        self.list.setWordWrap(True)
        self.list.setUniformItemSizes(False)
        self.list.setResizeMode(QListView.ResizeMode.Adjust)
        self.list.setSpacing(2)
        self.list.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.list.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.list.clicked.connect(self._chosen)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.header)
        layout.addWidget(self.list, 1)
        self.model.modelReset.connect(self._count)
        self._count()

    def _count(self) -> None:
        self.header.setText(self.model.summary())

    def _chosen(self, index: QModelIndex) -> None:
        problem = self.model.problem_at(index.row())
        if problem.plot is not None:
            self.problem_activated.emit(problem.plot, problem.trait)
