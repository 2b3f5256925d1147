"""Reading a wide field book: one row per entry, one column per replicate, one trait.

Some field books, and most tables copied from a trial report, hold a single trait laid out wide:
an entry column, then one column per replicate (``entry, rep1, rep2, rep3`` or ``Variety, I, II,
III, IV``), each cell the value of the entry's plot in that replicate. This reader turns such a
sheet into the same :class:`~trialdesk.core.fieldbook.FieldBook` the long reader returns, one
plot per entry and replicate, so everything downstream works unchanged.

The file is read, decoded and checked by the same steps as a long field book, and every message
names the file, the spreadsheet row and the column.
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd

from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import (
    _OTHER,
    FieldBook,
    _entry_code_warnings,
    _find_roles,
    _first_row,
    _holds_numbers,
    _labels,
    _open,
    _quoted,
    _shown,
    _source_name,
    _Table,
    _trait_values,
    _unknown_positions,
    _value_warnings,
)

__all__ = ["read_wide_fieldbook"]


def read_wide_fieldbook(
    path: str | os.PathLike[str],
    *,
    trait: str,
    entry: str | None = None,
    sheet: str | None = None,
    decimal_comma: bool = False,
) -> FieldBook:
    """Read a field book with entries as rows and one column per replicate, for one trait.

    Parameters
    ----------
    path : str or path-like
        A CSV file or an Excel workbook (.xlsx), read as the long reader reads them
        (:func:`~trialdesk.core.fieldbook.read_fieldbook`: separators, encodings, missing-value
        markers).
    trait : str
        The name of the trait the cells hold, such as ``"grain yield"``.
    entry : str, optional
        The entry column; looked for under the usual names (entry, variety, genotype, ...) when
        not given. Every other column is a replicate.
    sheet : str, optional
        Worksheet to read from a workbook; the first worksheet by default.
    decimal_comma : bool, default False
        Read "4,25" as 4.25 (and refuse "4.25").

    Returns
    -------
    FieldBook
        One plot per entry row and replicate column, replicate by replicate: ``block`` is the
        replicate column's name, ``plot`` is "<replicate>-<row>" (the spreadsheet row of the
        entry), ``source_row`` that row, and ``values`` has one column named ``trait``.
        ``roles["block"]`` lists the replicate columns, comma-separated; ``roles["plot"]``,
        ``roles["row"]`` and ``roles["column"]`` are None.

    Raises
    ------
    TrialInputError
        For anything that stops the file being read; the message names the file, the row and
        the column. No other exception escapes.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "wide.csv"
    >>> _ = path.write_text("Variety,I,II\\nAlpha,4.1,4.3\\nBeta,3.8,NA\\n")
    >>> book = read_wide_fieldbook(path, trait="yield")
    >>> book.plots[["entry", "block", "plot", "source_row"]].values.tolist()
    [['Alpha', 'I', 'I-2', 2], ['Beta', 'I', 'I-3', 3], ['Alpha', 'II', 'II-2', 2], \
['Beta', 'II', 'II-3', 3]]
    >>> book.values["yield"].tolist()
    [4.1, 3.8, 4.3, nan]
    """
    decimal_comma = bool(decimal_comma)
    source = _source_name(path)
    if not isinstance(trait, str) or not trait.strip():
        raise TrialInputError(
            f"name the trait the replicate columns hold (a text such as 'yield'), not {trait!r}",
            file=source,
        )
    opened = _open(source, sheet)
    table = opened.table
    roles, role_warnings = _find_roles(table, {"entry": entry})
    entry_at = roles["entry"]
    replicates = [i for i in range(len(table.names)) if i != entry_at]
    if not replicates:
        raise TrialInputError(
            f"there is no replicate column: the only column is the entry column "
            f"'{table.names[entry_at]}'; in the wide layout every other column holds one "
            "replicate of the trait",
            file=table.source,
        )
    for index in replicates:
        _check_replicate(table, index, trait)
    plots = _plots(table, entry_at, replicates)
    frame = pd.DataFrame(
        {trait: np.concatenate([_trait_values(table, i, decimal_comma) for i in replicates])}
    )
    found = (
        list(opened.warnings)
        + role_warnings
        + _value_warnings(frame, plots["source_row"], opened.source, read_from=plots["block"])
        + _entry_code_warnings(plots, opened.source, table.names[entry_at])
    )
    return FieldBook(
        plots=plots,
        values=frame,
        traits=(trait,),
        roles={"entry": table.names[entry_at],
               "block": ", ".join(table.names[i] for i in replicates),
               "plot": None, "row": None, "column": None},
        source=opened.source,
        sha256=opened.sha256,
        sheet=opened.sheet,
        warnings=tuple(found),
    )


def _plots(table: _Table, entry_at: int, replicates: list[int]) -> pd.DataFrame:
    """One plot per entry row and replicate column, replicate by replicate."""
    entries = _labels(table, entry_at, "no entry code in this row")
    blocks = np.repeat(np.array([table.names[i] for i in replicates], dtype=object),
                       len(table.numbers))
    rows = np.tile(np.asarray(table.numbers, dtype=np.int64), len(replicates))
    return pd.DataFrame({
        "entry": pd.Series(np.tile(entries, len(replicates)), dtype="str"),
        "block": pd.Series(blocks, dtype="str"),
        "plot": pd.Series([f"{block}-{row}" for block, row in zip(blocks, rows, strict=True)],
                          dtype="str"),
        "row": _unknown_positions(len(rows)),
        "column": _unknown_positions(len(rows)),
        "source_row": rows,
    })


def _check_replicate(table: _Table, index: int, trait: str) -> None:
    """A replicate column holds numbers, or nothing yet; a column of text is refused whole."""
    column = table.columns[index]
    row = _first_row(column, column.kinds == _OTHER)
    if row is None or _holds_numbers(column):
        return  # its cells that are not numbers are reported one by one, as in a long book
    raise TrialInputError(
        f"{_shown(column.cell(row))} is not a number, and this column holds text; in the wide "
        f"layout every column other than the entry column is a replicate of trait '{trait}'. "
        "Remove the column, or name the entry column if it is not this one (the columns are: "
        f"{_quoted(table.names)})",
        file=table.source,
        row=int(table.numbers[row]),
        column=table.names[index],
    )
