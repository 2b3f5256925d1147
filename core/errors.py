"""The one error type Trialdesk raises for bad input, and the warning record.

Both carry where the problem is (file, spreadsheet row or plot, column) so the command line and the
desktop program can show the user a message they can act on, never a traceback.
"""

from __future__ import annotations

from dataclasses import dataclass


def _where(file: str | None, row: int | None, plot: str | None, column: str | None) -> str:
    parts = []
    if file:
        parts.append(str(file))
    if row is not None:
        parts.append(f"row {row}")
    if plot is not None:
        parts.append(f"plot {plot}")
    if column is not None:
        parts.append(f"column '{column}'")
    return ", ".join(parts)


class TrialInputError(ValueError):
    """Bad input: a message written for the user, and where the problem is.

    ``str(error)`` reads ``"<file>, row <n>, column '<name>': <message>"``, leaving out the parts
    that are not known.
    """

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        row: int | None = None,
        plot: str | None = None,
        column: str | None = None,
    ) -> None:
        self.message = message
        self.file = file
        self.row = row
        self.plot = plot
        self.column = column
        super().__init__(str(self))

    def __str__(self) -> str:
        where = _where(self.file, self.row, self.plot, self.column)
        return f"{where}: {self.message}" if where else self.message


@dataclass(frozen=True, slots=True, kw_only=True)
class InputWarning:
    """Something suspicious in the input that does not stop the analysis."""

    message: str
    file: str | None = None
    row: int | None = None
    plot: str | None = None
    column: str | None = None

    def __str__(self) -> str:
        where = _where(self.file, self.row, self.plot, self.column)
        return f"{where}: {self.message}" if where else self.message
